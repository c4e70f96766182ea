"""Loops with dead time: stability, delay margin and rightmost roots of the quasi-polynomial.

For P = Np/Dp e^{-theta s} and C = Nc/Dc the closed loop is internally stable iff every
root of the (unreduced, nothing cancelled) quasi-polynomial

    Delta(s) = A(s) + B(s) e^{-theta s},   A = Dp*Dc,  B = Np*Nc

lies in the open left half plane. A root reaches the imaginary axis at s = jw only
where |A(jw)| = |B(jw)|, i.e. at a positive real root x = w^2 of the polynomial

    W(x) = |A(j sqrt x)|^2 - |B(j sqrt x)|^2,

and there only at the critical delays theta_k = (phi + 2 pi k)/w, phi = arg(-B/A)(jw)
taken in [0, 2 pi). Every crossing at a simple root of W goes in the same direction
for all k, sign Re(ds/dtheta) = sign W'(x): to the right where W' > 0 (Cooke & van den
Driessche, Funkcialaj Ekvacioj 29, 1986; Walton & Marshall, IEE Proc. D 134, 1987).
Starting from the delay-free count Z(0) (deg B < deg A: the new roots come in from
Re s = -inf as theta leaves 0; Hale & Verduyn Lunel, *Introduction to Functional
Differential Equations*, 1993, ch. 12), the number of right-half-plane roots at the
actual delay is

    Z(theta) = Z(0) + 2 * sum over crossings with theta_k < theta of sign W'(x).

Neutral loops (deg B = deg A, a biproper loop) have a root chain with Re s ->
ln|b_lead/a_lead| / theta: finitely many RHP roots only if |b_lead| < |a_lead|;
otherwise the loop is refused (not stable).

Everything here is batched over candidates (rows). ``certificate`` is the exact
single-row version: rational arithmetic for the products, the Routh count and a
Sturm sequence of W; mpmath only for refining isolated roots.
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction

import mpmath
import numpy as np

from ..lti import batch_add, batch_conv, batch_polyval, batch_roots
from .frequency import deriv, mag2, positive_real_roots, scale
from .exact_poly import padd, pderiv, pgcd, pmul, ptrim, pval, sturm_sequence, variations, variations_inf

DOMINANCE = 3.0        # loop roots: the region Re s >= -DOMINANCE * decay rate (dominant-root rule of thumb, common practice)
NEWTON_STEPS = 10
_TWO_PI = 2.0 * np.pi


# ------------------------------------------------------------------ batched pieces
def split(np_, dp, nc: np.ndarray, dc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A = Dp*Dc and B = Np*Nc, right-aligned to one width (N, n+1)."""
    a = batch_conv(dc, dp)
    b = batch_conv(nc, np_)
    m = max(a.shape[1], b.shape[1])
    return np.pad(a, ((0, 0), (m - a.shape[1], 0))), np.pad(b, ((0, 0), (m - b.shape[1], 0)))


def _degree(p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    nz = p != 0
    first = np.where(nz.any(axis=1), nz.argmax(axis=1), p.shape[1] - 1)
    return p.shape[1] - 1 - first, p[np.arange(p.shape[0]), first]


def loop_type(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(admissible, neutral): retarded (deg B < deg A) or neutral with |b_lead| < |a_lead|."""
    da, la = _degree(a)
    db, lb = _degree(b)
    neutral = da == db
    ok = (db < da) | (neutral & (np.abs(lb) < np.abs(la)))
    return ok & (la != 0), neutral


def _scale_of(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Geometric mean of the delay-free root magnitudes (conditioning scale, rad/s)."""
    c = a + b
    deg, lead = _degree(c)
    with np.errstate(divide="ignore", invalid="ignore"):
        w0 = np.abs(c[:, -1] / lead) ** (1.0 / np.maximum(deg, 1))
    return np.where(np.isfinite(w0) & (w0 > 0), w0, 1.0)


@dataclass(frozen=True)
class Crossings:
    """Imaginary-axis crossings of Delta, (N, M) NaN padded."""
    w: np.ndarray          # crossing frequencies, rad/s
    phi: np.ndarray        # phase in [0, 2 pi): critical delays (phi + 2 pi k)/w
    direction: np.ndarray  # +1 to the right, -1 to the left, 0 degenerate (W' = 0)


def crossings(a: np.ndarray, b: np.ndarray, w0: np.ndarray | None = None) -> Crossings:
    """Positive real roots of W(x) = |A|^2 - |B|^2 (scaled by w0 for conditioning), the
    phase of -B/A there and the crossing direction sign W'(x)."""
    w0 = _scale_of(a, b) if w0 is None else w0
    sa, sb = scale(a, w0), scale(b, w0)
    norm = np.maximum(np.abs(sa).max(axis=1), np.abs(sb).max(axis=1))[:, None]
    sa, sb = sa / norm, sb / norm
    wpoly = batch_add(mag2(sa), -mag2(sb))
    x = positive_real_roots(wpoly)
    with np.errstate(invalid="ignore"):
        dw = batch_polyval(deriv(wpoly), x)
        tiny = np.abs(dw) <= 1e-12 * (np.abs(wpoly).max(axis=1, keepdims=True) * (1 + np.abs(x)) ** wpoly.shape[1])
        direction = np.where(np.isnan(x), np.nan, np.where(tiny, 0.0, np.sign(dw)))
        ws = np.sqrt(x)
        jw = 1j * ws
        ratio = -batch_polyval(sa, jw) / batch_polyval(sb, jw)     # e^{-j w theta} at the crossing
        phi = np.mod(-np.angle(ratio), _TWO_PI)
    return Crossings(ws * w0[:, None], phi, direction)


def crossings_below(c: Crossings, theta: float) -> np.ndarray:
    """Net number of root pairs that crossed to the right for delays in (0, theta)."""
    with np.errstate(invalid="ignore"):
        span = c.w * theta - c.phi                        # >= 0 iff theta_0 <= theta
        k = np.where(span > 0, np.floor(span / _TWO_PI) + 1, 0.0)
        at_zero = (c.phi < 1e-12) | (c.phi > _TWO_PI - 1e-12)   # axis root already at theta = 0
        # a pair on the axis at theta = 0 is not in Z(0): it adds only if it moves right
        net = np.where(at_zero & (k > 0), (k - 1) * c.direction + np.maximum(c.direction, 0), k * c.direction)
    return np.nansum(net, axis=1)


def on_axis(c: Crossings, theta: float, rel: float = 1e-9) -> np.ndarray:
    """Rows with a critical delay equal to theta (a root on the imaginary axis)."""
    with np.errstate(invalid="ignore"):
        frac = np.mod(c.w * theta - c.phi, _TWO_PI)
        d = np.minimum(frac, _TWO_PI - frac)
        return np.any(d <= rel * np.maximum(c.w * theta, 1.0), axis=1)


def delay_margin(c: Crossings, theta: float) -> np.ndarray:
    """Smallest critical delay above theta minus theta (s); inf without crossings."""
    with np.errstate(invalid="ignore", divide="ignore"):
        k = np.maximum(np.ceil((c.w * theta - c.phi) / _TWO_PI), 0.0)
        tk = (c.phi + _TWO_PI * k) / c.w
        tk = np.where(tk <= theta, tk + _TWO_PI / c.w, tk)
        tk = np.where(np.isnan(tk), np.inf, tk)
    return tk.min(axis=1) - theta if tk.shape[1] else np.full(c.w.shape[0], np.inf)


def rhp_count(a: np.ndarray, b: np.ndarray, theta: float, delay_free_roots: np.ndarray | None = None):
    """Batched floating-point verdict: (stable, rhp_roots, crossings, delay margin).

    ``rhp_roots`` is Z(theta) (roots in Re s > 0); rows with a root on the axis, a
    degenerate crossing or an inadmissible (neutral |b|>=|a| or advanced) loop are not
    stable. ``delay_free_roots`` are the roots of A + B when already known.
    """
    ok, _ = loop_type(a, b)
    r = batch_roots(a + b) if delay_free_roots is None else delay_free_roots
    re = np.nan_to_num(r.real, nan=-np.inf)
    mag = np.nan_to_num(np.abs(r), nan=0.0)
    axis = np.abs(re) <= 1e-10 * np.maximum(mag, 1e-300)
    z0 = np.sum((re > 0) & ~axis, axis=1)
    c = crossings(a, b)
    z = z0 + 2 * crossings_below(c, theta)
    degenerate = np.any(c.direction == 0, axis=1)
    # A(jw) = B(jw) = 0 at a crossing frequency: a common factor, a root on the axis for every delay
    degenerate |= np.any(~np.isnan(c.w) & ~np.isfinite(c.phi), axis=1)
    stable = ok & (z == 0) & ~on_axis(c, theta) & ~degenerate & ~np.any(axis & (mag == 0), axis=1)
    return stable, np.where(ok, z, -1), c, np.where(stable, delay_margin(c, theta), np.nan)


# ------------------------------------------------------------------ roots
def polyval_and_derivative(p: np.ndarray, s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """p(s) and p'(s) for rows of p (descending powers) at s (N, K), in one Horner pass:
    what Newton on Delta and the residues of the dead-time step responses need."""
    v = np.zeros(s.shape, dtype=complex)
    d = np.zeros(s.shape, dtype=complex)
    for j in range(p.shape[1]):
        d = d * s + v
        v = v * s + p[:, j:j + 1]
    return v, d


def quasi_value(a, b, theta, s):
    """Delta(s) and Delta'(s) for rows of a, b at s (N, K)."""
    e = np.exp(-theta * s)
    av, ad = polyval_and_derivative(a, s)
    bv, bd = polyval_and_derivative(b, s)
    return av + bv * e, ad + (bd - theta * bv) * e


def newton_roots(a: np.ndarray, b: np.ndarray, theta: float, starts: np.ndarray,
                 steps: int = NEWTON_STEPS, tol: float = 1e-10) -> np.ndarray:
    """Roots of Delta by Newton's method from ``starts`` (N, K), batched; NaN where a start
    did not converge (relative residual above ``tol``); duplicates removed (NaN)."""
    s = np.array(starts, dtype=complex)
    good = ~np.isnan(s)
    s = np.where(good, s, 0.0)
    with np.errstate(all="ignore"):
        for _ in range(steps):
            f, g = quasi_value(a, b, theta, s)
            step = f / g
            lim = 0.5 * (1.0 + np.abs(s))            # damp wild steps
            big = np.abs(step) > lim
            step = np.where(big, step * lim / np.abs(step), step)
            s = np.where(np.isfinite(step), s - step, s)
        f, g = quasi_value(a, b, theta, s)
        scale_ = np.abs(batch_polyval(np.abs(a), np.abs(s))) + np.abs(batch_polyval(np.abs(b), np.abs(s))) * np.abs(np.exp(-theta * s))
        conv = good & np.isfinite(s) & (np.abs(f) <= tol * scale_)
    s = np.where(conv, s, np.nan)
    s = np.where(np.abs(s.imag) <= 1e-10 * np.maximum(np.abs(s), 1e-300), s.real + 0j, s)
    return dedupe_roots(s)


def dedupe_roots(s: np.ndarray, rel: float = 1e-7) -> np.ndarray:
    """NaN out later copies of the same root in each row (sorted by real part, rightmost first)."""
    key = np.where(np.isnan(s), -np.inf, s.real)
    order = np.argsort(-key, axis=1, kind="stable")
    s = np.take_along_axis(s, order, axis=1)
    k = s.shape[1]
    dup = np.zeros(s.shape, bool)
    tol = rel * np.maximum(np.abs(s), 1.0)
    # compare each root with those j places earlier in the order, j = 1, 2, ...: once every
    # real-part gap at some j exceeds the tolerance, larger j (larger gaps) cannot match
    for j in range(1, k):
        later, before = s[:, j:], s[:, :-j]
        with np.errstate(invalid="ignore"):
            dup[:, j:] |= np.abs(later - before) <= tol[:, j:]
            if not np.any(before.real - later.real <= tol[:, j:]):
                break
    return np.where(dup, np.nan, s)


def chain_starts(a: np.ndarray, b: np.ndarray, theta: float, ymax: np.ndarray, per_row: int) -> np.ndarray:
    """Starting points on the root chains of Delta: at y = k pi / theta (k = 1..per_row, only
    up to ymax), real part ln(|B(jy)|/|A(jy)|)/theta where |A e^{theta s}| = |B| (asymptotics of
    retarded quasi-polynomials; Bellman & Cooke, *Differential-Difference Equations*, 1963, ch. 12)."""
    k = np.arange(1, per_row + 1)
    y = np.pi * k[None, :] / theta * np.ones((a.shape[0], 1))
    y = np.where(y <= ymax[:, None] * 1.05, y, np.nan)
    jy = 1j * y
    with np.errstate(all="ignore"):
        x = np.log(np.abs(batch_polyval(b, jy)) / np.abs(batch_polyval(a, jy))) / theta
    s = x + jy
    return np.concatenate([s, np.conj(s)], axis=1)


def root_bound(a: np.ndarray, b: np.ndarray, theta: float, sigma: np.ndarray) -> np.ndarray:
    """R with |Delta(s)| > 0 for Re s >= -sigma and |s| >= R (inf where no such R exists).

    |A(s)| >= |a_n| r^n - sum_{k<n} |a_k| r^k and |B(s) e^{-theta s}| <= e^{theta sigma} sum |b_k| r^k
    for r = |s|; R is the positive root of the difference (one root, Descartes' rule of signs),
    found by bisection from Fujiwara's bound (Fujiwara, Tohoku Math. J. 10, 1916).
    """
    n_rows, m = a.shape
    deg, _ = _degree(a)
    first = m - 1 - deg
    rows = np.arange(n_rows)
    grow = np.exp(theta * sigma)[:, None]
    q = -(np.abs(a) + grow * np.abs(b))                      # coefficients of -sum c_k r^k
    lead = np.abs(a[rows, first]) - grow[:, 0] * np.abs(b[rows, first])
    cols = np.arange(m)[None, :]
    q = np.where(cols < first[:, None], 0.0, q)
    q[rows, first] = lead
    ok = lead > 0
    with np.errstate(all="ignore"):
        powr = (m - 1 - cols) - deg[:, None]                  # k - n <= 0 for k < n
        cr = np.where(cols > first[:, None], -q / np.where(ok, lead, 1.0)[:, None], 0.0)
        fuj = 2.0 * np.nanmax(np.where(cols > first[:, None], cr ** (1.0 / np.maximum(-powr, 1)), 0.0), axis=1)
        hi = np.maximum(fuj, 1e-300)
        lo = np.zeros(n_rows)
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            pos = batch_polyval(q, mid) > 0
            hi = np.where(pos, mid, hi)
            lo = np.where(pos, lo, mid)
    return np.where(ok, hi * (1 + 1e-9) + 1e-300, np.inf)


def argument_count(a: np.ndarray, b: np.ndarray, theta: float, sigma: np.ndarray, bound: np.ndarray,
                   points: int = 512, max_points: int = 65536) -> tuple[np.ndarray, np.ndarray]:
    """Number of roots of Delta in the rectangle -sigma < Re s < R, |Im s| < R by the argument
    principle: the winding number of Delta along the rectangle's boundary (the caller picks R
    from :func:`root_bound`, so the rectangle holds every root with Re s > -sigma).

    The boundary is sampled until every phase step is below pi/4 (doubling the samples up
    to ``max_points`` per side); returns (count, resolved) with ``resolved`` False where the
    sampling did not resolve the phase or Delta came close to 0 on the boundary.
    """
    n = a.shape[0]
    count = np.full(n, -1)
    resolved = np.zeros(n, bool)
    todo = np.flatnonzero(np.isfinite(bound) & np.isfinite(sigma))
    k = points
    while todo.size and k <= max_points:
        aa, bb = a[todo], b[todo]
        sg, r = sigma[todo][:, None], bound[todo][:, None]
        t = (np.arange(k) + 0.5) / k
        t = t[None, :]
        # counter-clockwise: bottom, right, top, left
        z = np.concatenate([-sg + (r + sg) * t - 1j * r,
                            r + 1j * (-r + 2 * r * t),
                            r - (r + sg) * t + 1j * r,
                            -sg + 1j * (r - 2 * r * t)], axis=1)
        with np.errstate(all="ignore"):
            # exp(-theta s) scaled by e^{-theta sigma} keeps the left side finite; the winding is unchanged
            f = batch_polyval(aa, z) * np.exp(-theta * sg) + batch_polyval(bb, z) * np.exp(-theta * (z + sg))
            ph = np.angle(f)
            d = np.diff(np.concatenate([ph, ph[:, :1]], axis=1), axis=1)
            d = np.mod(d + np.pi, _TWO_PI) - np.pi
            fine = np.all(np.abs(d) < np.pi / 4, axis=1) & np.all(np.isfinite(f), axis=1)
        wind = np.rint(d.sum(axis=1) / _TWO_PI).astype(int)
        count[todo[fine]] = wind[fine]
        resolved[todo[fine]] = True
        todo = todo[~fine]
        k *= 2
    return count, resolved


def shift_rows(p: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Coefficients of p(z - sigma) row by row (repeated synthetic division, Horner's
    Taylor shift), batched over rows with one sigma each."""
    q = np.array(p, dtype=float, copy=True)
    m = q.shape[1]
    sg = -np.asarray(sigma, float)[:, None]
    for i in range(m - 1):
        for j in range(1, m - i):
            q[:, j] = q[:, j] + sg[:, 0] * q[:, j - 1]
    return q


def count_right_of(a: np.ndarray, b: np.ndarray, theta: float, sigma: np.ndarray) -> np.ndarray:
    """Number of roots of Delta with Re s > -sigma, -1 where undecided.

    With s = z - sigma, Delta = A(z - sigma) + e^{theta sigma} B(z - sigma) e^{-theta z} is a
    quasi-polynomial of the same kind, so the crossing count above (polynomial roots only,
    no contour sampling) gives its roots in Re z > 0. Undecided: a root on the line
    Re s = -sigma, a degenerate crossing, or a neutral chain not left of the line.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        at = shift_rows(a, sigma)
        bt = shift_rows(b, sigma) * np.exp(theta * sigma)[:, None]
        ok = np.all(np.isfinite(at), axis=1) & np.all(np.isfinite(bt), axis=1)
        at, bt = np.where(ok[:, None], at, 1.0), np.where(ok[:, None], bt, 0.0)
        adm, _ = loop_type(at, bt)
        r = batch_roots(at + bt)
        re = np.nan_to_num(r.real, nan=-np.inf)
        mag = np.nan_to_num(np.abs(r), nan=0.0)
        axis = np.abs(re) <= 1e-9 * np.maximum(mag, 1e-300)
        c = crossings(at, bt)
        z = np.sum(re > 0, axis=1) + 2 * crossings_below(c, theta)
    bad = ~ok | ~adm | np.any(axis, axis=1) | on_axis(c, theta, 1e-7) | np.any(c.direction == 0, axis=1)
    return np.where(bad, -1, z).astype(int)


@dataclass(frozen=True)
class LoopRoots:
    roots: np.ndarray        # (N, K) rightmost roots found, rightmost first, NaN padded
    decay: np.ndarray        # -max Re over all roots found
    damping: np.ndarray      # min zeta over the roots with Re s >= -sigma
    sigma: np.ndarray        # region of interest Re s >= -sigma
    counted: np.ndarray      # roots counted in the region (-1: not counted)
    found: np.ndarray        # roots found in the region
    complete: np.ndarray     # counted == found (no root missed)


def loop_roots(a: np.ndarray, b: np.ndarray, theta: float, starts: np.ndarray, count: bool = True) -> LoopRoots:
    """Rightmost roots of Delta: Newton from ``starts`` (e.g. the roots of the Padé
    characteristic polynomial), then -- with ``count`` -- the exact number of roots with
    Re s > -sigma, sigma = DOMINANCE * decay rate (:func:`count_right_of`, the crossing
    count of the shifted quasi-polynomial), and Newton from the root-chain asymptotes
    when the first pass found fewer roots than counted. :func:`argument_count` (the
    argument principle on a contour) is the independent cross-check used in the tests."""
    roots = newton_roots(a, b, theta, starts)
    n = a.shape[0]
    counted = np.full(n, -1)

    def summarise(rs):
        re = np.where(np.isnan(rs), -np.inf, rs.real)
        decay = -re.max(axis=1) if rs.shape[1] else np.full(n, np.inf)
        sigma = DOMINANCE * np.where(np.isfinite(decay) & (decay > 0), decay, 1.0 / theta)
        inside = (re > -sigma[:, None]) & ~np.isnan(rs)
        return decay, sigma, inside

    decay, sigma, inside = summarise(roots)
    if count and n:
        _, neutral = loop_type(a, b)
        da, la = _degree(a)
        db, lb = _degree(b)
        with np.errstate(divide="ignore"):
            cap = np.where(neutral, 0.9 * np.log(np.abs(la) / np.maximum(np.abs(lb), 1e-300)) / theta, np.inf)
        sigma = np.minimum(sigma, cap)
        bound = root_bound(a, b, theta, sigma)
        counted = count_right_of(a, b, theta, sigma)
        resolved = counted >= 0
        inside = (np.where(np.isnan(roots), -np.inf, roots.real) > -sigma[:, None])
        missing = resolved & (counted > inside.sum(axis=1))
        if missing.any():
            idx = np.flatnonzero(missing)
            per = int(min(max(np.nanmax(bound[idx]) * theta / np.pi + 1, 1), 200))
            extra = newton_roots(a[idx], b[idx], theta, np.concatenate(
                [np.where(np.isnan(roots[idx]), np.nan, roots[idx]),
                 chain_starts(a[idx], b[idx], theta, bound[idx], per)], axis=1))
            width = max(roots.shape[1], extra.shape[1])
            roots = np.pad(roots, ((0, 0), (0, width - roots.shape[1])), constant_values=np.nan)
            roots[idx] = np.pad(extra, ((0, 0), (0, width - extra.shape[1])), constant_values=np.nan)
        counted = np.where(resolved, counted, -1)
        re = np.where(np.isnan(roots), -np.inf, roots.real)
        decay = -re.max(axis=1)
        inside = (re > -sigma[:, None]) & ~np.isnan(roots)
    mag = np.abs(roots)
    with np.errstate(invalid="ignore", divide="ignore"):
        zeta = np.where(inside, np.where(mag > 0, -roots.real / np.where(mag > 0, mag, 1.0), 0.0), np.inf)
    damping = zeta.min(axis=1) if zeta.shape[1] else np.ones(n)
    damping = np.where(np.isinf(damping), 1.0, damping)
    found = inside.sum(axis=1)
    roots = np.where(inside | np.isnan(roots), roots, np.nan)       # keep the region's roots only
    roots = dedupe_roots(roots)
    return LoopRoots(roots, decay, damping, sigma, counted, found, counted == found)


def confirmed_count(a: np.ndarray, b: np.ndarray, theta: float, lr: LoopRoots) -> np.ndarray:
    """The loop-root count of :func:`loop_roots` where a second, independent count agrees with
    it, else -1: the winding number of Delta on a rectangle enclosing every root with
    Re s > -sigma (:func:`argument_count` inside :func:`root_bound`). For the few loops a
    user reads (check, show, export, report); too costly for every candidate of a search."""
    wind, ok = argument_count(a, b, theta, lr.sigma, root_bound(a, b, theta, lr.sigma))
    return np.where(ok & (lr.counted >= 0) & (wind == lr.counted), lr.counted, -1)


# ------------------------------------------------------------------ exact certificate
def _fr(p) -> list[Fraction]:
    return ptrim(Fraction(float(x)) for x in np.atleast_1d(p))


def _mag2_exact(p: list[Fraction]) -> list[Fraction]:
    """|p(jw)|^2 as an exact polynomial in x = w^2 (descending)."""
    asc = p[::-1]
    ev = [c * (-1) ** (i) for i, c in enumerate(asc[0::2])][::-1] or [Fraction(0)]
    od = [c * (-1) ** (i) for i, c in enumerate(asc[1::2])][::-1] or [Fraction(0)]
    return padd(pmul(ev, ev), pmul(od, od) + [Fraction(0)])


def positive_roots_exact(p: list[Fraction]) -> list[tuple[Fraction, Fraction]]:
    """Isolating intervals (a, b] of the distinct positive roots of p, by Sturm counts."""
    p = ptrim(p)
    if len(p) <= 1:
        return []
    seq = sturm_sequence(p)
    bound = 1 + max(abs(c / p[0]) for c in p[1:])           # Cauchy's bound
    total = variations(seq, Fraction(0)) - variations_inf(seq)
    out = []
    stack = [(Fraction(0), Fraction(bound), total)]
    while stack:
        lo, hi, k = stack.pop()
        if k == 0:
            continue
        if k == 1:
            out.append((lo, hi))
            continue
        mid = (lo + hi) / 2
        kl = variations(seq, lo) - variations(seq, mid)
        stack += [(lo, mid, kl), (mid, hi, k - kl)]
    return sorted(out)


def _bisect_mp(wp, lo: Fraction, hi: Fraction, up: bool, digits: int):
    """The root of W in its isolating interval (lo, hi] by bisection at ``digits`` + 20 digits."""
    with mpmath.workdps(digits + 20):
        a = mpmath.mpf(lo.numerator) / lo.denominator
        b = mpmath.mpf(hi.numerator) / hi.denominator
        tol = mpmath.mpf(10) ** (-digits - 5) * b
        while b - a > tol:
            m = (a + b) / 2
            if (mpmath.polyval(wp, m) > 0) == up:
                b = m
            else:
                a = m
        return (a + b) / 2


def routh_count(coeffs: list[Fraction]) -> int | None:
    """Number of roots in Re s > 0 from the sign changes of the exact Routh column
    (Routh 1877); None when a zero appears in the column (a singular case)."""
    from .stability import routh_first_column
    col = routh_first_column(coeffs)
    if col is None:
        return None
    return sum(1 for u, v in zip(col, col[1:]) if (u > 0) != (v > 0))


def certificate(np_, dp, nc, dc, theta: float, digits: int = 40) -> dict:
    """Exact stability certificate of one dead-time loop, in plain words.

    Returns {"stable": bool | None (None: not decided), "rhp_roots": int | None,
    "delay_margin_s": float, "crossings": [(w, direction, first critical delay)], "text": str}.
    """
    A = pmul(_fr(dc), _fr(dp))
    B = pmul(_fr(nc), _fr(np_))
    th = Fraction(float(theta))
    parts = []
    res = {"stable": None, "rhp_roots": None, "delay_margin_s": float("nan"), "crossings": []}
    degA, degB = len(A) - 1, len(B) - 1 if any(B) else -1
    if degB > degA:
        res.update(stable=False, text="loop improper (deg Np*Nc > deg Dp*Dc): advanced type, "
                   "infinitely many right-half-plane roots; NOT stable")
        return res
    if degB == degA:
        if abs(B[0]) >= abs(A[0]):
            res.update(stable=False, text=f"neutral loop with |b_lead/a_lead| = {float(abs(B[0] / A[0])):.6g} >= 1: "
                       "a root chain on or right of the imaginary axis; NOT stable")
            return res
        parts.append(f"neutral loop, |b_lead/a_lead| = {float(abs(B[0] / A[0])):.6g} < 1 (exact)")
    char = padd(A, B)
    if char[-1] == 0:
        res.update(stable=False, text="Delta(0) = A(0) + B(0) = 0 exactly: a root at s = 0 for every delay; NOT stable")
        return res
    z0 = routh_count(char)
    if z0 is None:
        res["text"] = "; ".join(parts + ["delay-free characteristic polynomial: zero in the exact Routh column "
                                         "(a root on the imaginary axis or a singular case); not certified"])
        return res
    parts.append("delay-free loop Hurwitz (exact Routh)" if z0 == 0
                 else f"delay-free loop has {z0} root(s) in Re s > 0 (exact Routh count)")
    W = padd(_mag2_exact(A), [-c for c in _mag2_exact(B)])
    if not any(W):
        res["text"] = "; ".join(parts + ["|A|^2 - |B|^2 vanishes identically; not certified"])
        return res
    g = pgcd(W, pderiv(W))
    if len(g) > 1 and positive_roots_exact(g):
        res["text"] = "; ".join(parts + ["|A|^2 - |B|^2 has a multiple positive root (tangential crossing); "
                                         "not certified"])
        return res
    intervals = positive_roots_exact(W)
    z = z0
    margin = mpmath.inf
    at_axis = False
    with mpmath.workdps(digits):
        wp = [mpmath.mpf(c.numerator) / c.denominator for c in W]
        mth = mpmath.mpf(th.numerator) / th.denominator
        a_mp = [mpmath.mpf(c.numerator) / c.denominator for c in A]
        b_mp = [mpmath.mpf(c.numerator) / c.denominator for c in B]
        for lo, hi in intervals:
            up = pval(W, hi) > 0                 # W rises through the root: crossing to the right
            x = _bisect_mp(wp, lo, hi, up, digits)
            w = mpmath.sqrt(x)
            ratio = -mpmath.polyval(a_mp, 1j * w) / mpmath.polyval(b_mp, 1j * w)
            phi = mpmath.fmod(-mpmath.arg(ratio) + 2 * mpmath.pi, 2 * mpmath.pi)
            t0 = phi / w
            period = 2 * mpmath.pi / w
            span = w * mth - phi
            k = int(mpmath.floor(span / (2 * mpmath.pi))) + 1 if span > 0 else 0
            if phi < mpmath.mpf(10) ** (-digits + 5):
                z += 2 * ((k - 1) * (1 if up else -1) + (1 if up else 0)) if k > 0 else 0
            else:
                z += 2 * k * (1 if up else -1)
            nxt = t0 + k * period
            if abs(nxt - mth) < mpmath.mpf(10) ** (-digits + 8) * (1 + mth):
                at_axis = True
            margin = min(margin, nxt - mth if nxt > mth else nxt + period - mth)
            res["crossings"].append((float(w), 1 if up else -1, float(t0)))
    n_x = len(intervals)
    desc = (f"|A|^2 - |B|^2 has {n_x} positive root(s) (Sturm count, exact)"
            + (": " + ", ".join(f"w = {w:.6g} rad/s ({'rightward' if d > 0 else 'leftward'}, "
                                f"first critical delay {t:.6g} s)" for w, d, t in res["crossings"]) if n_x else
               ": no imaginary-axis crossing for any delay"))
    parts.append(desc)
    if at_axis:
        res.update(stable=False, rhp_roots=None, text="; ".join(parts + [
            f"the actual delay {theta:g} s is a critical delay: a root on the imaginary axis; NOT stable"]))
        return res
    if n_x:
        first = min(t for _, _, t in res["crossings"])
        parts.append(f"first critical delay {first:.6g} s {'>' if first > theta else '<'} {theta:g} s"
                     + (": no crossing below the actual delay" if first > theta else ""))
    res["rhp_roots"] = z
    res["stable"] = z == 0
    res["delay_margin_s"] = float(margin) if z == 0 else float("nan")
    parts.append(f"{z} root(s) in Re s >= 0 at the delay {theta:g} s"
                 + ("" if z else f" (delay margin {float(margin):.6g} s; critical delays computed to {digits} digits)"))
    res["text"] = "; ".join(parts)
    return res


def screen(np_, dp, nc: np.ndarray, dc: np.ndarray, theta: float, pade_num: np.ndarray,
           pade_den: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Screening of a batch: (stable, min damping, decay rate) of the quasi-polynomial
    (damping and decay NaN for the unstable rows, which the search discards anyway).

    The verdict is the crossing count; damping and decay come from Newton on Delta started
    at the roots of the Padé characteristic polynomial Dp Dc pd + Np Nc pn (no counting
    pass: the full evaluation adds it for the rows that survive the screen).
    """
    a, b = split(np_, dp, nc, dc)
    stable, _, _, _ = rhp_count(a, b, theta)
    damping, decay = np.full(a.shape[0], np.nan), np.full(a.shape[0], np.nan)
    if stable.any():
        a1, b1 = a[stable], b[stable]
        char = batch_add(batch_conv(a1, pade_den), batch_conv(b1, pade_num))
        lr = loop_roots(a1, b1, theta, batch_roots(char), count=False)
        damping[stable], decay[stable] = lr.damping, lr.decay
    return stable, damping, decay
