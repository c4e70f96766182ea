"""Independent reference computations for the evaluator tests.

Nothing here imports synth: every function is built from numpy, scipy, sympy or
mpmath only, so that a test comparing synth against it compares two
independent computations.

- Frequency quantities: dense logarithmic evaluation of L(jw) with numpy.polyval
  (or scipy.signal.freqresp), then local refinement of every extremum with
  scipy.optimize.minimize_scalar and of every crossing with scipy.optimize.brentq.
- Step responses: scipy.signal.lsim on a realisation scipy builds itself
  (tf2ss inside lsim), chained over the uniform segments of a time vector.
- Stability: mpmath.polyroots at high precision.
"""

from __future__ import annotations

import mpmath
import numpy as np
from scipy import optimize, signal


# ---------------------------------------------------------------- loop algebra
def trimmed(p):
    p = np.atleast_1d(np.asarray(p, dtype=float))
    nz = np.flatnonzero(p != 0)
    return p[nz[0]:] if nz.size else np.zeros(1)


def closed_loop(pn, pd, cn, cd):
    """Independent closed-loop transfer functions (numpy polynomial algebra).

    Returns dict name -> (num, den) for T = PC/(1+PC) (reference -> y),
    PS = P/(1+PC) (load at plant input -> y) and CS = C/(1+PC) (reference -> u),
    all over the unreduced Delta = Pd Cd + Pn Cn.
    """
    pn, pd, cn, cd = map(trimmed, (pn, pd, cn, cd))
    delta = np.polyadd(np.polymul(pd, cd), np.polymul(pn, cn))
    return {"T": (np.polymul(pn, cn), delta), "PS": (np.polymul(pn, cd), delta),
            "CS": (np.polymul(cn, pd), delta)}


def char_poly(pn, pd, cn, cd):
    return np.polyadd(np.polymul(trimmed(pd), trimmed(cd)), np.polymul(trimmed(pn), trimmed(cn)))


# ---------------------------------------------------------------- stability
def mp_roots(p, dps: int = 60) -> np.ndarray:
    """High-precision roots (mpmath.polyroots), rounded to complex128.

    Multiple roots slow mpmath's iteration down to a stall; then the polynomial is split
    exactly into square-free factors first (sympy.sqf_list on the exact rational value of
    the float coefficients) and each factor's roots are repeated by their multiplicity.
    """
    p = trimmed(p)
    if p.size <= 1:
        return np.zeros(0, complex)
    try:
        with mpmath.workdps(dps):
            r = mpmath.polyroots([mpmath.mpf(float(c)) for c in p], maxsteps=500, extraprec=3 * dps)
        return np.array([complex(x) for x in r])
    except mpmath.libmp.libhyper.NoConvergence:
        import sympy as sp
        s = sp.symbols("s")
        poly = sp.Poly([sp.Rational(float(c)) for c in p], s)
        out = []
        for factor, mult in sp.sqf_list(poly)[1]:
            coeffs = [sp.Rational(c) for c in factor.all_coeffs()]
            if len(coeffs) > 1:
                with mpmath.workdps(dps):
                    fr = mpmath.polyroots([mpmath.mpf(int(c.p)) / int(c.q) for c in coeffs],
                                          maxsteps=500, extraprec=3 * dps)
                out += [complex(x) for x in fr] * mult
        return np.array(out)


def hurwitz_by_roots(p, dps: int = 60) -> bool:
    return bool(np.all(mp_roots(p, dps).real < 0))


# ---------------------------------------------------------------- frequency
def freq_eval(num, den, w, delay: float = 0.0):
    """num(jw)/den(jw) * exp(-j w delay) with numpy.polyval."""
    jw = 1j * np.asarray(w, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.polyval(num, jw) / np.polyval(den, jw) * np.exp(-delay * jw)


def refined_peak(f, lo: float, hi: float, n: int = 20000, extra_points=()):
    """sup of f(w) on [0, inf) approximated by a dense log grid on [lo, hi] plus the
    end values f(0) and f(hi * 1e4), refined by bounded minimize_scalar in log w
    around the best grid point. Returns (peak, w_peak)."""
    w = np.geomspace(lo, hi, n)
    v = f(w)
    k = int(np.argmax(v))
    a, b = np.log(w[max(k - 1, 0)]), np.log(w[min(k + 1, n - 1)])
    res = optimize.minimize_scalar(lambda x: -f(np.array([np.exp(x)]))[0], bounds=(a, b),
                                   method="bounded", options={"xatol": 1e-12, "maxiter": 500})
    best, wbest = (-res.fun, np.exp(res.x)) if -res.fun >= v[k] else (v[k], w[k])
    for wx in (lo * 1e-6, hi * 1e6, *extra_points):
        fx = f(np.array([wx]))[0]
        if fx > best:
            best, wbest = fx, wx
    return float(best), float(wbest)


def crossings(g, lo: float, hi: float, n: int = 20000):
    """All sign changes of g on a dense log grid, refined by brentq (xtol 1e-14 relative)."""
    w = np.geomspace(lo, hi, n)
    v = g(w)
    out = []
    for k in np.flatnonzero(np.sign(v[:-1]) * np.sign(v[1:]) < 0):
        if not (np.isfinite(v[k]) and np.isfinite(v[k + 1])):
            continue
        r = optimize.brentq(lambda x: g(np.array([x]))[0], w[k], w[k + 1], xtol=1e-15, rtol=1e-14,
                            maxiter=400)
        out.append(r)
    return np.array(out)


def frequency_range(*polys, delay: float = 0.0):
    """A grid range that brackets every corner frequency: 1e-3 x the smallest and
    1e3 x the largest nonzero root magnitude of the given polynomials (and 1/delay)."""
    mags = []
    for p in polys:
        p = trimmed(p)
        if p.size > 1:
            r = np.abs(np.roots(p))
            mags += list(r[r > 1e-12])
    if delay:
        mags.append(1.0 / delay)
    mags = mags or [1.0]
    return 1e-3 * min(mags), 1e3 * max(mags)


def reference_metrics(pn, pd, cn, cd, delay: float = 0.0, lo: float | None = None,
                      hi: float | None = None, n: int = 20000) -> dict:
    """Dense-grid-plus-refinement reference for the frequency metrics of L = P C.

    Gain margins are the nearest critical gains above and below 1 among
    k = -1/L(jw) at phase crossovers (L(jw) real and negative), including w = 0.
    Peaks also look at w = lo*1e-6 and hi*1e6 (the limits at 0 and infinity).
    """
    pn, pd, cn, cd = map(trimmed, (pn, pd, cn, cd))
    nl, dl = np.polymul(pn, cn), np.polymul(pd, cd)
    flo, fhi = frequency_range(pn, pd, cn, cd, np.polyadd(nl, dl), delay=delay)
    lo = flo if lo is None else lo
    hi = fhi if hi is None else hi

    def L(w):
        return freq_eval(nl, dl, w, delay)

    def S(w):
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.abs(1.0 / (1.0 + L(w)))

    def T(w):
        lw = L(w)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.nan_to_num(np.abs(lw / (1.0 + lw)), nan=1.0)

    def PS(w):
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.abs(freq_eval(pn, pd, w, delay) / (1.0 + L(w)))

    def CS(w):
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.abs(freq_eval(cn, cd, w) / (1.0 + L(w)))

    out = {}
    out["lo"], out["hi"] = lo, hi
    out["S"], out["T"], out["PS"], out["CS"], out["L"] = S, T, PS, CS, L
    out["Ms"], out["w_Ms"] = refined_peak(S, lo, hi, n)
    out["Mt"], out["w_Mt"] = refined_peak(T, lo, hi, n)
    out["PS_peak"], _ = refined_peak(PS, lo, hi, n)
    out["CS_peak"], _ = refined_peak(CS, lo, hi, n)

    wc = crossings(lambda w: np.log(np.abs(L(w))), lo, hi, n)
    out["gain_crossovers"] = wc
    if wc.size:
        lc = L(wc)
        pm = np.degrees(np.angle(lc)) + 180.0            # in (0, 360]
        pm = np.where(pm > 180.0, pm - 360.0, pm)          # (-180, 180]
        k = int(np.argmin(pm))
        out["pm"], out["w_pm"] = float(pm[k]), float(wc[k])
        out["dm"] = float(np.min(np.mod(np.radians(pm), 2 * np.pi) / wc))
        out["w_max_crossover"] = float(wc.max())
    else:
        out["pm"], out["w_pm"], out["dm"], out["w_max_crossover"] = np.inf, np.nan, np.inf, np.nan

    wp = crossings(lambda w: L(w).imag, lo, hi, n)
    lp = L(wp)
    neg = lp.real < 0
    kc = list(-1.0 / lp.real[neg])
    wpc = list(wp[neg])
    l0 = L(np.array([0.0]))[0] if dl[-1] != 0 else np.inf
    if np.isfinite(l0) and l0.real < 0:
        kc.append(-1.0 / l0.real)
        wpc.append(0.0)
    kc, wpc = np.array(kc), np.array(wpc)
    above = kc > 1
    below = (kc < 1) & (kc > 0)
    out["gm"] = float(kc[above].min()) if above.any() else np.inf
    out["w_gm"] = float(wpc[above][np.argmin(kc[above])]) if above.any() else np.nan
    out["gm_low"] = float(kc[below].max()) if below.any() else 0.0
    out["w_gm_low"] = float(wpc[below][np.argmax(kc[below])]) if below.any() else np.nan

    t0 = abs(L(np.array([0.0]))[0] / (1 + L(np.array([0.0]))[0])) if dl[-1] != 0 else 1.0
    wb = crossings(lambda w: T(w) - t0 / np.sqrt(2), lo, hi, n)
    out["bandwidth"] = float(wb.min()) if wb.size else np.inf
    return out


# ---------------------------------------------------------------- time
def uniform_runs(t, rtol: float = 1e-9):
    """Split a piecewise-uniform time vector into maximal runs of equal steps
    (each run shares its first point with the end of the previous one)."""
    t = np.asarray(t, dtype=float)
    h = np.diff(t)
    runs, start = [], 0
    for k in range(1, h.size + 1):
        if k == h.size or abs(h[k] - h[start]) > rtol * h[start]:
            runs.append((start, k + 1))
            start = k
    return runs


def scipy_step(num, den, t):
    """Unit-step response of num/den at the times t (t[0] = 0, piecewise uniform),
    by scipy.signal.lsim chained over the uniform runs (state handed on exactly)."""
    sys = signal.StateSpace(*signal.tf2ss(trimmed(num), trimmed(den)))
    y = np.empty(len(t))
    x0 = np.zeros(sys.A.shape[0])
    for a, b in uniform_runs(t):
        tt = t[a:b]
        _, yy, xx = signal.lsim(sys, np.ones(tt.size), tt - tt[0], X0=x0, interp=False)
        xx = np.atleast_2d(xx.T).T if xx.ndim == 1 else xx
        y[a:b] = yy
        x0 = xx[-1]
    return y
