"""Discrete-time equivalents of a continuous design and a check of the sampled loop.

Conventions
-----------
A discrete transfer function is a pair ``(b, a)`` of equal-length coefficient
arrays in descending powers of z, normalised so that ``a[0] == 1``. Dividing both
by z^n gives the coefficient of z^-k at index k, so the same arrays are the
difference equation

    u[k] + a[1] u[k-1] + ... + a[n] u[k-n] = b[0] e[k] + b[1] e[k-1] + ... + b[n] e[k-n].

Where a function accepts ``(b, a)`` of different lengths it reads them in that
z^-k sense (the shorter one is padded with trailing zeros).

Methods
-------
* :func:`tustin`: the bilinear substitution s = c (z - 1)/(z + 1) (Tustin 1947),
  with c = 2/T, or with frequency pre-warping c = w / tan(w T / 2) so that the
  discrete frequency response equals the continuous one at w exactly (Franklin,
  Powell & Workman, *Digital Control of Dynamic Systems*, 3rd ed. 1998, ch. 6).
  Done by polynomial substitution: N(s) = sum n_i s^i becomes
  sum n_i c^i (z - 1)^i (z + 1)^(n - i), likewise D(s).
* :func:`zoh`: the step-invariant (zero-order-hold) equivalent, exact at the
  sampling instants, dead time included: the integer part of delay/T as extra
  z^-1 factors, the fractional part by the modified state-space formula
  (Astrom & Wittenmark, *Computer-Controlled Systems*, 3rd ed. 1997, sec. 2.3;
  Franklin, Powell & Workman 1998, ch. 4). With delay = l T + tau', 0 < tau' < T:

      x[k+1] = Phi x[k] + Gamma0 u[k-l] + Gamma1 u[k-l-1],
      Phi = e^{AT}, Gamma0 = int_0^{T-tau'} e^{As} ds B, Gamma1 = e^{A(T-tau')} int_0^{tau'} e^{As} ds B.

  The integrals come from one matrix exponential of [[A, B], [0, 0]]. Poles map
  exactly as z = e^{pT}; the numerator follows from Markov parameters,
  C adj(zI - Phi) v = sum_k z^(n-1-k) sum_{j<=k} alpha_{k-j} C Phi^j v, with alpha the
  coefficients of det(zI - Phi). The realisation is built in time normalised by T
  (A T, B T), which keeps the matrix exponential well scaled.
* :func:`discrete_loop`: the ZOH-sampled plant in negative unity feedback with a
  discrete controller. The verdict is exact for the computed characteristic
  polynomial: z = (1 + w)/(1 - w) maps the open unit disc onto the open left half
  plane, and the mapped polynomial gets the exact Routh-Hurwitz test of
  :mod:`synth.evaluate.stability` (the bilinear route to a discrete stability test,
  Astrom & Wittenmark 1997, ch. 3). Margins come from L(e^{jwT}), w in (0, pi/T], on a
  dense grid with bisection refinement of every sign change.
"""

from __future__ import annotations

from fractions import Fraction
from math import comb, floor, isfinite

import numpy as np
from scipy.linalg import expm

from .evaluate.stability import is_hurwitz_exact
from .lti import TransferFunction, trim

_INT_TOL = 1e-9        # delay/T closer than this (relative) to an integer counts as an integer


# ------------------------------------------------------------------ helpers
def _check_T(T, what: str = "sample time T") -> float:
    try:
        T = float(T)
    except (TypeError, ValueError):
        raise ValueError(f"{what} must be a number of seconds, got {T!r}") from None
    if not isfinite(T) or T <= 0:
        raise ValueError(f"{what} must be a positive, finite number of seconds, got {T!r}")
    return T


def _split_delay(delay: float, T: float) -> tuple[int, float]:
    """delay = (l + f) T with l an integer and f in [0, 1); f snapped to 0 near integers."""
    r = delay / T
    near = round(r)
    if abs(r - near) <= _INT_TOL * max(1.0, r):
        return int(near), 0.0
    ell = floor(r)
    return int(ell), r - ell


def _normalise(b, a) -> tuple[np.ndarray, np.ndarray]:
    b, a = np.asarray(b, dtype=float), np.asarray(a, dtype=float)
    if a[0] == 0.0:
        raise ValueError("discrete denominator has a zero leading coefficient (a pole at z = infinity)")
    return b / a[0], a / a[0]


def _delay_z(b: np.ndarray, a: np.ndarray, d: int) -> tuple[np.ndarray, np.ndarray]:
    """Multiply b/a by z^-d, keeping equal lengths (index = delay k in z^-k)."""
    if d <= 0:
        return b, a
    return np.concatenate([np.zeros(d), b]), np.concatenate([a, np.zeros(d)])


def as_pair(b, a) -> tuple[np.ndarray, np.ndarray]:
    """Validate a discrete transfer function given in the z^-k sense; equal lengths, a[0] = 1."""
    b = np.atleast_1d(np.asarray(b, dtype=float))
    a = np.atleast_1d(np.asarray(a, dtype=float))
    if b.ndim != 1 or a.ndim != 1 or b.size == 0 or a.size == 0:
        raise ValueError("discrete coefficients b and a must be non-empty 1-D sequences")
    if not (np.all(np.isfinite(b)) and np.all(np.isfinite(a))):
        raise ValueError("discrete coefficients b and a must be finite")
    n = max(b.size, a.size)
    b = np.pad(b, (0, n - b.size))
    a = np.pad(a, (0, n - a.size))
    if a[0] == 0.0:
        raise ValueError("discrete denominator a must have a[0] != 0 (the coefficient of u[k])")
    return _normalise(b, a)


# ------------------------------------------------------------------ Tustin
def tustin(controller: TransferFunction, T: float, prewarp_rad_s: float | None = None
           ) -> tuple[np.ndarray, np.ndarray]:
    """Bilinear (Tustin) equivalent of ``controller``, optionally pre-warped at ``prewarp_rad_s``.

    Returns ``(b, a)`` in descending powers of z with ``a[0] == 1``. A dead time in the
    controller is accepted only as a whole number of sample periods (extra z^-1 factors).
    """
    T = _check_T(T)
    if prewarp_rad_s is None:
        c = 2.0 / T
    else:
        w = float(prewarp_rad_s)
        if not isfinite(w) or w <= 0 or w * T >= np.pi:
            raise ValueError(f"pre-warping frequency must satisfy 0 < w < pi/T = {np.pi / T:g} rad/s "
                             f"(the Nyquist frequency for T = {T:g} s), got {prewarp_rad_s!r}")
        c = w / np.tan(w * T / 2.0)
    num, den = controller.num, controller.den
    n = max(num.size, den.size) - 1
    num_asc = np.pad(num, (n + 1 - num.size, 0))[::-1]
    den_asc = np.pad(den, (n + 1 - den.size, 0))[::-1]
    b = np.zeros(n + 1)
    a = np.zeros(n + 1)
    for i in range(n + 1):
        # (z - 1)^i (z + 1)^(n - i), descending powers of z, exact integer coefficients
        basis = np.array(_binom_product(i, n - i), dtype=float)
        ci = c ** i
        b += num_asc[i] * ci * basis
        a += den_asc[i] * ci * basis
    if a[0] == 0.0:
        raise ValueError(f"the controller has a pole at s = {c:g} rad/s, which the bilinear map sends to "
                         "z = infinity; choose another sample time")
    b, a = _normalise(b, a)
    if controller.delay:
        d, f = _split_delay(controller.delay, T)
        if f:
            raise ValueError(f"controller dead time {controller.delay:g} s is not a whole number of sample "
                             f"periods T = {T:g} s; the Tustin map needs delay = k T")
        b, a = _delay_z(b, a, d)
    return b, a


def _binom_product(i: int, m: int) -> list[int]:
    """Integer coefficients of (z - 1)^i (z + 1)^m, descending powers of z."""
    p = [comb(i, j) * (-1) ** j for j in range(i + 1)]
    q = [comb(m, j) for j in range(m + 1)]
    out = [0] * (i + m + 1)
    for j, pj in enumerate(p):
        for k, qk in enumerate(q):
            out[j + k] += pj * qk
    return out


# -------------------------------------------------------------------- ZOH
def zoh(sys: TransferFunction, T: float) -> tuple[np.ndarray, np.ndarray]:
    """Zero-order-hold (step-invariant) equivalent of ``sys`` with its dead time.

    Returns ``(b, a)``, equal lengths, descending powers of z, ``a[0] == 1``; the
    samples of its response to a held input equal the continuous response at t = kT.
    """
    T = _check_T(T)
    if not sys.is_proper:
        raise ValueError(f"the zero-order-hold equivalent needs a proper transfer function; {sys!r} has more "
                         "zeros than poles")
    ell, f = _split_delay(sys.delay, T)
    extra = ell + (1 if f else 0)
    n = sys.den.size - 1
    if n == 0:
        g = float(sys.num[-1] / sys.den[-1])
        return _delay_z(np.array([g]), np.ones(1), extra)

    # realisation of H(s') = G(s'/T) (time in units of T): coefficient j scaled by T^j
    scale = T ** np.arange(n + 1)
    dn = sys.den * scale
    nn = np.pad(sys.num, (n + 1 - sys.num.size, 0)) * scale
    nn, dn = nn / dn[0], dn / dn[0]
    A = np.zeros((n, n))
    A[0, :] = -dn[1:]
    if n > 1:
        A[np.arange(1, n), np.arange(n - 1)] = 1.0
    B = np.zeros(n)
    B[0] = 1.0
    C = nn[1:] - nn[0] * dn[1:]
    D = nn[0]

    M = np.zeros((n + 1, n + 1))
    M[:n, :n] = A
    M[:n, n] = B

    def phi_gamma(t: float) -> tuple[np.ndarray, np.ndarray]:
        E = expm(M * t)
        return E[:n, :n], E[:n, n]

    Phi, Gam = phi_gamma(1.0)
    alpha = _exp_poles(sys.poles * T)

    def adj_num(v: np.ndarray) -> np.ndarray:
        """Coefficients (length n, descending) of C adj(zI - Phi) v."""
        h = np.empty(n)
        x = v.copy()
        for j in range(n):
            h[j] = C @ x
            x = Phi @ x
        return np.array([np.dot(alpha[k::-1][:k + 1], h[:k + 1]) for k in range(n)])

    if f == 0.0:
        num = np.concatenate([[0.0], adj_num(Gam)]) + D * alpha
    else:
        Phi_a, Int_a = phi_gamma(1.0 - f)
        _, Int_f = phi_gamma(f)
        g0 = Int_a
        g1 = Phi_a @ Int_f
        num = np.concatenate([adj_num(g0), [0.0]]) + np.concatenate([[0.0], adj_num(g1)]) + D * alpha
    return _delay_z(num, alpha.copy(), extra)


def _exp_poles(pt: np.ndarray) -> np.ndarray:
    """Real monic polynomial with roots exp(p T) (conjugate pairs kept exact)."""
    z = np.exp(np.asarray(pt, dtype=complex))
    z = np.where(np.abs(np.asarray(pt).imag) == 0, z.real + 0j, z)
    return np.real(np.poly(z)) if z.size else np.ones(1)


# ------------------------------------------------------------- sampled loop
def schur_stable_exact(char) -> bool:
    """Exact verdict: every root of ``char`` (descending powers of z) strictly inside |z| < 1.

    The coefficients (floats are exact rationals) go through z = (1 + w)/(1 - w) in
    rational arithmetic; the image must be Hurwitz and keep its degree (a root at
    z = -1 would go to w = infinity).
    """
    c = [Fraction(float(x)) for x in trim(char)]
    n = len(c) - 1
    if n == 0:
        return c[0] != 0
    q = [Fraction(0)] * (n + 1)
    for i, ci in enumerate(c):
        if ci == 0:
            continue
        # z^(n-i) -> (1 + w)^(n-i) (1 - w)^i, i.e. (w + 1)^(n-i) * (-1)^i (w - 1)^i
        basis = _binom_product_pm(n - i, i)
        for j, bj in enumerate(basis):
            q[j] += ci * bj
    if q[0] == 0:
        return False
    return is_hurwitz_exact(q)


def _binom_product_pm(m: int, i: int) -> list[int]:
    """Integer coefficients of (1 + w)^m (1 - w)^i, descending powers of w."""
    p = [comb(m, j) for j in range(m + 1)]                       # (w + 1)^m
    q = [comb(i, j) * (-1) ** (i - j) for j in range(i + 1)]     # (1 - w)^i = (-w + 1)^i, descending
    out = [0] * (m + i + 1)
    for j, pj in enumerate(p):
        for k, qk in enumerate(q):
            out[j + k] += pj * qk
    return out


def discrete_loop(plant: TransferFunction, b, a, T: float, grid_points: int = 6000) -> dict:
    """The ZOH-sampled ``plant`` under the discrete controller ``b/a`` (negative unity feedback).

    Returns a dict:

    * ``stable``: every root of the unreduced characteristic polynomial
      a_c a_p + b_c b_p strictly inside the unit circle (exact test, see module notes);
    * ``poles`` (its roots), ``spectral_radius`` (largest |pole|), ``characteristic``,
      ``plant_zoh`` ((b_p, a_p)), ``well_posed`` (1 + C(inf) P(inf) != 0);
    * ``gain_margin_db`` / ``gain_margin_low_db``: both ends of the stabilising gain
      interval around k = 1 (``inf`` / ``-inf`` when unbounded), NaN for an unstable loop;
    * ``phase_margin_deg``: smallest over the gain crossovers (``inf`` when |L| never
      crosses 1), NaN for an unstable loop; ``crossover_rad_s``: the highest gain
      crossover (NaN when none); ``gain_crossovers_rad_s``, ``phase_crossovers_rad_s``.

    Frequencies w in (0, pi/T] are scanned on a dense grid (logarithmic down to well
    below the slowest loop dynamics, plus uniform in w T) and every sign change of
    |N| - |D| (gain crossover) or Im(N conj D) (phase crossover) is refined by bisection.
    A crossing that only touches the level without a sign change is not reported.
    """
    T = _check_T(T)
    bc, ac = as_pair(b, a)
    bp, ap = zoh(plant, T)
    nl = np.convolve(bc, bp)     # convolve keeps leading zeros: equal lengths throughout
    dl = np.convolve(ac, ap)
    char = dl + nl
    scale = float(np.max(np.abs(char)))
    posed = abs(char[0]) > 1e-12 * scale
    poles = np.roots(char) if trim(char).size > 1 else np.zeros(0, complex)
    rho = float(np.max(np.abs(poles))) if poles.size else 0.0
    stable = bool(posed and schur_stable_exact(char))

    def parts(theta):
        z = np.exp(1j * np.asarray(theta, dtype=float))
        N = np.polyval(bc, z) * np.polyval(bp, z)
        Dd = np.polyval(ac, z) * np.polyval(ap, z)
        return N, Dd

    grid = _theta_grid(nl, dl, grid_points)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        th_g = _crossings(lambda t: np.abs(parts(t)[0]) - np.abs(parts(t)[1]), grid)
        th_p = _crossings(lambda t: (lambda N, Dd: (N * np.conj(Dd)).imag)(*parts(t)), grid[:-1])
        Ng, Dg = parts(th_g)
        Lg = Ng / Dg
        # phase crossovers, z = 1 (w -> 0), z = -1 (w = pi/T), and z = infinity (degree drop)
        pts = [complex(x) for x in (lambda N, Dd: N / Dd)(*parts(th_p))]
        for z in (1.0, -1.0):
            # a loop pole at z = +-1 (an integrator, say) arrives with rounding error only
            Dz = np.polyval(dl, z)
            if abs(Dz) > 1e-12 * float(np.sum(np.abs(dl))):
                pts.append(complex(np.polyval(nl, z) / Dz))
        kc = [-1.0 / p.real for p in pts
              if np.isfinite(p.real) and p.real < 0 and abs(p.imag) <= 1e-6 * abs(p)]
        if nl[0] != 0:
            k_inf = -dl[0] / nl[0]
            if k_inf > 0:
                kc.append(k_inf)
    above = min([k for k in kc if k > 1.0], default=np.inf)
    below = max([k for k in kc if k < 1.0], default=0.0)
    if th_g.size:
        pm_all = np.degrees(np.angle(-Lg))
        pm = float(np.min(pm_all))
        wc = float(np.max(th_g) / T)
    else:
        pm, wc = np.inf, np.nan
    out = {
        "stable": stable,
        "well_posed": bool(posed),
        "poles": poles,
        "spectral_radius": rho,
        "characteristic": char / char[0] if posed else char,
        "plant_zoh": (bp, ap),
        "gain_margin_db": float(20 * np.log10(above)) if stable else np.nan,
        "gain_margin_low_db": (float(20 * np.log10(below)) if below > 0 else -np.inf) if stable else np.nan,
        "phase_margin_deg": pm if stable else np.nan,
        "crossover_rad_s": wc,
        "gain_crossovers_rad_s": np.sort(th_g) / T,
        "phase_crossovers_rad_s": np.sort(th_p) / T,
        "sample_time_s": T,
        "nyquist_rad_s": np.pi / T,
    }
    return out


def _theta_grid(nl: np.ndarray, dl: np.ndarray, points: int) -> np.ndarray:
    """Angles theta = w T in (0, pi]: logarithmic from far below the slowest loop root, plus uniform."""
    roots = np.concatenate([np.roots(trim(nl)) if trim(nl).size > 1 else [],
                            np.roots(trim(dl)) if trim(dl).size > 1 else []])
    roots = roots[np.abs(roots) > 0]
    with np.errstate(divide="ignore"):
        ang = np.abs(np.log(roots.astype(complex)))
    ang = ang[(ang > 1e-9) & np.isfinite(ang)]          # roots at z = 1 (integrators) set no scale
    lo = min(1e-6, 1e-3 * float(ang.min())) if ang.size else 1e-6
    lo = max(lo, 1e-14)
    g = np.concatenate([np.geomspace(lo, np.pi, points), np.linspace(0.0, np.pi, points // 2 + 1)[1:]])
    return np.unique(g)


def _crossings(fun, grid: np.ndarray, iters: int = 64) -> np.ndarray:
    """Zeros of ``fun`` on the grid: exact zeros at grid points and bisected sign changes."""
    v = np.asarray(fun(grid), dtype=float)
    ok = np.isfinite(v)
    exact = grid[(v == 0) & ok]
    s = np.sign(v)
    ch = np.flatnonzero((s[:-1] * s[1:] < 0) & ok[:-1] & ok[1:])
    lo, hi = grid[ch].copy(), grid[ch + 1].copy()
    flo = v[ch].copy()
    for _ in range(iters):
        if lo.size == 0:
            break
        mid = 0.5 * (lo + hi)
        fm = np.asarray(fun(mid), dtype=float)
        same = np.sign(fm) == np.sign(flo)
        lo = np.where(same, mid, lo)
        flo = np.where(same, fm, flo)
        hi = np.where(same, hi, mid)
    return np.sort(np.concatenate([exact, 0.5 * (lo + hi)]))
