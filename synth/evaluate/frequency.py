"""Frequency-domain metrics, batched over candidates.

Rational loops: every quantity comes from polynomial roots in x = w^2, not from a
frequency grid. With p(jw) = R(x) + jw I(x), |p(jw)|^2 = R^2 + x I^2; gain
crossovers solve |N|^2 = |D|^2, phase crossovers solve Ni*Dr - Nr*Di = 0, and the
peak of |A/B| over w is at x = 0, x -> inf or a positive root of A'B - AB'.

Loops with dead time: gain crossovers are polynomial roots as above (|e^{-jw theta}| = 1);
the rest is evaluated on the exact frequency response (phase -w*theta) on a dense
logarithmic grid, every extremum refined by batched Brent steps and every crossing by
Illinois steps on the exact response (no loop per candidate). Their stability verdict
is the crossing count of synth.evaluate.delay, not a frequency-domain test.

All polynomials are first rescaled to s = w0 * s_hat, with w0 the geometric mean
of the closed-loop pole magnitudes, which keeps the companion matrices well
conditioned over wide frequency ranges.
"""

from __future__ import annotations

import numpy as np

from ..lti import batch_add, batch_conv, batch_polyval, batch_roots
from .bracket import brent_minimize, illinois_root
from .time import highest_per_row

_REAL_TOL = 1e-6      # |Im x| / (1 + |x|) below which a root in x = w^2 counts as real


# ------------------------------------------------------------ polynomial tools
def scale(p: np.ndarray, w0: np.ndarray) -> np.ndarray:
    """Coefficients of p(w0 * s_hat), row-wise (w0 is (N,))."""
    p = np.atleast_2d(p)
    powers = np.arange(p.shape[1] - 1, -1, -1)
    return p * w0[:, None] ** powers


def jw_split(p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """R, I (descending in x = w^2) with p(jw) = R(x) + j w I(x)."""
    p = np.atleast_2d(p)
    asc = p[:, ::-1]
    ev, od = asc[:, 0::2], asc[:, 1::2]
    ev = ev * (-1.0) ** np.arange(ev.shape[1])
    od = od * (-1.0) ** np.arange(od.shape[1]) if od.shape[1] else np.zeros((p.shape[0], 1))
    return ev[:, ::-1], od[:, ::-1]


def at_jw(split: tuple[np.ndarray, np.ndarray], w: np.ndarray) -> np.ndarray:
    """p(jw) = R(w^2) + j w I(w^2) from ``split`` = jw_split(p), rows matching w (N,) or (N, K):
    two real Horner evaluations of half the degree instead of one complex one."""
    r, i = split
    x = w * w
    return batch_polyval(r, x) + 1j * w * batch_polyval(i, x)


def times_x(p: np.ndarray) -> np.ndarray:
    return np.pad(p, ((0, 0), (0, 1)))


def mag2(p: np.ndarray) -> np.ndarray:
    """|p(jw)|^2 as a polynomial in x = w^2 (descending)."""
    r, i = jw_split(p)
    return batch_add(batch_conv(r, r), times_x(batch_conv(i, i)))


def deriv(p: np.ndarray) -> np.ndarray:
    m = p.shape[1]
    if m == 1:
        return np.zeros_like(p)
    return p[:, :-1] * np.arange(m - 1, 0, -1)


def positive_real_roots(p: np.ndarray, polish: int = 3) -> np.ndarray:
    """Positive real roots of each row (NaN padded), polished by Newton steps."""
    r = batch_roots(p)
    ok = (np.abs(r.imag) <= _REAL_TOL * (1 + np.abs(r))) & (r.real > 0)
    x = np.where(ok, r.real, np.nan)
    if x.shape[1] == 0:
        return x
    dp = deriv(p)
    for _ in range(polish):
        f = batch_polyval(p, x)
        g = batch_polyval(dp, x)
        with np.errstate(invalid="ignore", divide="ignore"):
            step = np.where(g != 0, f / g, 0.0)
        nx = x - step
        x = np.where(np.isfinite(nx) & (nx > 0) & (np.abs(step) < 0.5 * np.abs(x)), nx, x)
    return x


def peak_ratio(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """sup over w >= 0 of sqrt(A(x)/B(x)) and the w where it occurs (0 or inf at the ends)."""
    stat = batch_add(batch_conv(deriv(a), b), -batch_conv(a, deriv(b)))
    xs = positive_real_roots(stat)
    with np.errstate(invalid="ignore", divide="ignore"):
        vals = batch_polyval(a, xs) / batch_polyval(b, xs)
        f0 = a[:, -1] / b[:, -1]
        finf = _limit_inf(a, b)
    allv = np.concatenate([f0[:, None], np.nan_to_num(vals, nan=-np.inf), finf[:, None]], axis=1)
    allx = np.concatenate([np.zeros((a.shape[0], 1)), xs, np.full((a.shape[0], 1), np.inf)], axis=1)
    k = np.argmax(allv, axis=1)
    best = allv[np.arange(a.shape[0]), k]
    return np.sqrt(np.maximum(best, 0.0)), np.sqrt(allx[np.arange(a.shape[0]), k])


def _limit_inf(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """lim x->inf A(x)/B(x) row-wise, from the effective degrees."""
    da, la = _lead(a)
    db, lb = _lead(b)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(da < db, 0.0, np.where(da > db, np.inf, la / lb))


def _lead(p: np.ndarray, rel: float = 1e-14) -> tuple[np.ndarray, np.ndarray]:
    """Effective degree and leading coefficient of each row (coefficients below rel*max are zero)."""
    nz = np.abs(p) > rel * np.max(np.abs(p), axis=1, keepdims=True)
    first = np.where(nz.any(axis=1), nz.argmax(axis=1), p.shape[1] - 1)
    return p.shape[1] - 1 - first, p[np.arange(p.shape[0]), first]


# ------------------------------------------------------------------ rational
def rational_metrics(np_, dp, nc: np.ndarray, dc: np.ndarray, w0: np.ndarray) -> dict[str, np.ndarray]:
    """Margins, crossovers, peaks and bandwidth of the rational loops L = Np Nc/(Dp Dc)."""
    n = nc.shape[0]
    nl = scale(batch_conv(nc, np_), w0)
    dl = scale(batch_conv(dc, dp), w0)
    norm = np.maximum(np.abs(dl).max(axis=1), np.abs(nl).max(axis=1))[:, None]
    nl, dl = nl / norm, dl / norm
    char = batch_add(dl, nl)
    npdc = scale(batch_conv(dc, np_), w0) / norm
    ncdp = scale(batch_conv(nc, dp), w0) / norm

    def loop_at(w):
        jw = 1j * w
        return batch_polyval(nl, jw) / batch_polyval(dl, jw)

    # gain crossovers and phase margin
    m2n, m2d, m2c = mag2(nl), mag2(dl), mag2(char)
    xg = positive_real_roots(batch_add(m2n, -m2d))
    wg = np.sqrt(xg)
    with np.errstate(invalid="ignore", divide="ignore"):
        lg = loop_at(wg)
    out = _margins_from_crossovers(wg, lg, w0)

    # phase crossovers -> critical gains -> stabilising gain interval
    nr, ni = jw_split(nl)
    dr, di = jw_split(dl)
    xp = positive_real_roots(batch_add(batch_conv(ni, dr), -batch_conv(nr, di)))
    with np.errstate(invalid="ignore", divide="ignore"):
        lp = loop_at(np.sqrt(xp))
        l0 = nl[:, -1] / dl[:, -1]
        dn, ln_ = _lead(nl)
        dd, ld = _lead(dl)
        linf = np.where(dn == dd, ln_ / ld, 0.0)
    lpts = np.concatenate([l0[:, None], lp, linf[:, None]], axis=1)
    wpts = np.concatenate([np.zeros((n, 1)), np.sqrt(xp) * w0[:, None], np.full((n, 1), np.inf)], axis=1)
    out.update(_gain_interval(lpts, wpts))

    # peaks of |S|, |T|, |PS|, |CS|
    out["sensitivity_peak"], out["sensitivity_peak_rad_s"] = _scaled_peak(m2d, m2c, w0)
    out["complementary_peak"], out["complementary_peak_rad_s"] = _scaled_peak(m2n, m2c, w0)
    out["disturbance_gain_peak"], _ = peak_ratio(mag2(npdc), m2c)
    out["control_gain_peak"], _ = peak_ratio(mag2(ncdp), m2c)

    # closed-loop -3 dB bandwidth of T
    with np.errstate(invalid="ignore", divide="ignore"):
        t0sq = (nl[:, -1] / char[:, -1]) ** 2
    xb = positive_real_roots(batch_add(m2n, -0.5 * t0sq[:, None] * m2c))
    with np.errstate(invalid="ignore"):
        bw = np.sqrt(np.nanmin(np.where(np.isnan(xb), np.inf, xb), axis=1)) if xb.shape[1] else np.full(n, np.inf)
    out["bandwidth_rad_s"] = np.where(t0sq > 0, bw * w0, np.nan)
    return out


def _scaled_peak(a, b, w0):
    pk, w = peak_ratio(a, b)
    return pk, w * w0


def _margins_from_crossovers(wg: np.ndarray, lg: np.ndarray, w0: np.ndarray) -> dict[str, np.ndarray]:
    """Phase margin (min over crossovers), delay margin and the crossover frequency.

    ``wg`` are crossover frequencies in the same scaled units as ``w0`` divides out
    (real frequency = wg * w0), NaN padded; ``lg`` the loop values there.
    """
    valid = ~np.isnan(wg)
    pm = np.degrees(np.angle(-lg))                       # angle measured from -1, in (-180, 180]
    pm = np.where(valid, pm, np.inf)
    w = wg * w0[:, None]
    phi = np.where(valid, np.mod(np.radians(np.where(valid, pm, 0.0)), 2 * np.pi), np.inf)  # lag still available
    with np.errstate(invalid="ignore", divide="ignore"):
        dm = np.where(valid, phi / w, np.inf)
    k = np.argmin(pm, axis=1) if pm.shape[1] else np.zeros(wg.shape[0], int)
    rows = np.arange(wg.shape[0])
    has = valid.any(axis=1) if valid.shape[1] else np.zeros(wg.shape[0], bool)
    wmax = np.where(has, np.nanmax(np.where(valid, w, -np.inf), axis=1) if w.shape[1] else np.nan, np.nan)
    return {
        "phase_margin_deg": np.where(has, pm[rows, k] if pm.shape[1] else np.inf, np.inf),
        "phase_margin_rad_s": np.where(has, w[rows, k] if w.shape[1] else np.nan, np.nan),
        "delay_margin_s": np.where(has, dm.min(axis=1) if dm.shape[1] else np.inf, np.inf),
        "crossover_rad_s": wmax,
    }


def _gain_interval(lpts: np.ndarray, wpts: np.ndarray) -> dict[str, np.ndarray]:
    """Stabilising gain interval around k = 1 from loop values at phase crossovers.

    Where L(jw) is real and negative, the gain k = -1/L(jw) puts a closed-loop
    pole on the imaginary axis; the nearest such gains above and below 1 bound
    the interval (gain margins; +inf / no lower limit when none exist). ``wpts``
    are the frequencies (rad/s) of the points, reported for plots.
    """
    rows = np.arange(lpts.shape[0])
    with np.errstate(invalid="ignore", divide="ignore"):
        neg = (lpts.real < 0) & (np.abs(lpts.imag) <= 1e-6 * np.abs(lpts)) & np.isfinite(lpts.real)
        kc = np.where(neg, -1.0 / lpts.real, np.nan)
        ka = np.where(kc > 1.0, kc, np.inf)
        kb = np.where(kc < 1.0, kc, -np.inf)
        ia, ib = np.argmin(ka, axis=1), np.argmax(kb, axis=1)
        above, below = ka[rows, ia], kb[rows, ib]
        return {
            "gain_margin_db": 20 * np.log10(above),
            "gain_margin_low_db": np.where(below > 0, 20 * np.log10(np.maximum(below, 1e-300)), -np.inf),
            "gain_margin_rad_s": np.where(np.isfinite(above), wpts[rows, ia], np.nan),
            "gain_margin_low_rad_s": np.where(below > 0, wpts[rows, ib], np.nan),
        }


# -------------------------------------------------------------- dead time
def delay_metrics(np_, dp, nc: np.ndarray, dc: np.ndarray, delay: float, w0: np.ndarray,
                  crossings=None, points: int = 1200) -> dict[str, np.ndarray]:
    """The same metrics for L = Np Nc exp(-delay s)/(Dp Dc), batched over candidates.

    Gain crossovers are the positive roots of |Dp Dc|^2 - |Np Nc|^2 in w^2 (polynomial
    roots, no grid; ``crossings`` from :func:`synth.evaluate.delay.crossings` when already
    computed). Phase crossovers, peaks and the bandwidth come from a grid of ``points``
    logarithmic frequencies from 1e-5 w0 to 1e4 w0 per candidate plus w = 0: the largest few
    local maxima of each peak function are refined by Brent's method and every crossing by the
    Illinois method, all candidates of a chunk together, on the exact response. Candidates go
    FREQ_CHUNK at a time: each grid array then stays a few MB, reused by the allocator, where
    the whole batch's (tens of MB each) would be mapped afresh, page by page, every time.
    The stability verdict is not made here (see :mod:`synth.evaluate.delay`).
    """
    if crossings is None:
        from .delay import crossings as _crossings, split
        crossings = _crossings(*split(np_, dp, nc, dc))
    parts = [_delay_metrics_rows(np_, dp, nc[s], dc[s], delay, w0[s], crossings.w[s], points)
             for s in (slice(i, i + FREQ_CHUNK) for i in range(0, nc.shape[0], FREQ_CHUNK))]
    return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}


def _delay_metrics_rows(np_, dp, nc, dc, delay, w0, wg, points):
    """delay_metrics for one chunk of candidates, gain crossovers ``wg`` given."""
    n = nc.shape[0]
    nl = batch_conv(nc, np_)
    dl = batch_conv(dc, dp)
    npdc = batch_conv(dc, np_)
    ncdp = batch_conv(nc, dp)
    lo, hi = 1e-5 * w0, 1e4 * w0
    u = np.linspace(0.0, 1.0, points)
    grid = lo[:, None] * (hi / lo)[:, None] ** u[None, :]
    every = np.arange(n)
    nls, dls = jw_split(nl), jw_split(dl)

    def loop(rows, w):
        return at_jw(_rows_of(nls, rows), w) * np.exp(-1j * delay * w) / at_jw(_rows_of(dls, rows), w)

    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        out = {}
        # gain crossovers: |L(jw)| = 1 exactly where |A|^2 = |B|^2
        lg = _pairs_eval(loop, wg)
        out.update(_margins_from_crossovers(wg, lg, np.ones(n)))

        # the exact response on the grid, once, from the plant's and the controller's own
        # polynomials (half the degree of their products); every grid function below is built
        # from these four
        pn_g = at_jw(jw_split(np.atleast_2d(np_)), grid) * np.exp(-1j * delay * grid)
        pd_g = at_jw(jw_split(np.atleast_2d(dp)), grid)
        cn_g, cd_g = at_jw(jw_split(nc), grid), at_jw(jw_split(dc), grid)
        ngr = pn_g * cn_g
        dgr = pd_g * cd_g
        cgr = dgr + ngr
        lgr = ngr / dgr

        # phase crossovers (L real negative): only the few grid intervals per candidate with
        # |L| nearest 1 decide the gain margins (k = -1/L nearest 1 from above and below)
        ch = (np.sign(lgr.imag[:, :-1]) * np.sign(lgr.imag[:, 1:]) < 0) & \
            ((lgr.real[:, :-1] < 0) | (lgr.real[:, 1:] < 0))
        closeness = np.where(ch, -np.abs(np.log(np.abs(lgr[:, :-1]))), -np.inf)
        m = min(PHASE_CANDIDATES, closeness.shape[1])
        top = np.argpartition(-closeness, m - 1, axis=1)[:, :m]
        sel = np.zeros_like(ch)
        np.put_along_axis(sel, top, True, axis=1)

        def imag(rows, w):
            return loop(rows, w).imag
        wp = _bisect_crossings(imag, grid, lgr.imag, select=sel & ch)
        lp = _pairs_eval(loop, wp)
        lp = np.where(lp.real < 0, lp.real + 0j, np.nan)
        l0 = nl[:, -1] / dl[:, -1]
        dn, ln_ = _lead(nl)
        dd, ld = _lead(dl)
        linf_mag = np.where(dn == dd, np.abs(ln_ / ld), 0.0)
        # at high frequency the delayed loop turns round at |L(inf)|: every phase is reached
        lpts = np.concatenate([l0[:, None] + 0j, lp, -linf_mag[:, None] + 0j], axis=1)
        wpts = np.concatenate([np.zeros((n, 1)), wp, np.full((n, 1), np.inf)], axis=1)
        out.update(_gain_interval(np.where(np.abs(lpts) > 0, lpts, np.nan), wpts))

        # peaks (w = 0 included: |T(0)| = 1 with integral action, |CS(0)| = 1/P(0), ...)
        for key, num, top_grid in (("sensitivity_peak", None, dgr), ("complementary_peak", "T", ngr),
                                   ("disturbance_gain_peak", jw_split(npdc), pn_g * cd_g),
                                   ("control_gain_peak", jw_split(ncdp), cn_g * pd_g)):
            f = _closed_loop_mag(nls, dls, delay, num)
            pk, wpk = _grid_peak(f, grid, np.abs(top_grid / cgr))
            at0 = f(every, np.zeros(n))
            at0 = np.where(np.isfinite(at0), at0, -np.inf)
            out[key] = np.maximum(pk, at0)
            if key in ("sensitivity_peak", "complementary_peak"):
                out[key + "_rad_s"] = np.where(at0 > pk, 0.0, wpk)

        # bandwidth of T: first crossing of |T(0)|/sqrt(2)
        ft = _closed_loop_mag(nls, dls, delay, "T")
        t0 = np.abs(nl[:, -1] / (nl[:, -1] + dl[:, -1]))
        level = t0 / np.sqrt(2)

        def tdrop(rows, w):
            return ft(rows, w) - level[rows]
        wb = _bisect_crossings(tdrop, grid, np.abs(ngr / cgr) - level[:, None], first_only=True)
        out["bandwidth_rad_s"] = np.where(t0 > 0, wb[:, 0], np.nan)
    return out


def _pairs_eval(fun, w: np.ndarray) -> np.ndarray:
    """fun(rows, w) on an (N, M) NaN-padded frequency array (NaN stays NaN)."""
    rows, cols = np.nonzero(~np.isnan(w))
    out = np.full(w.shape, np.nan + 0j)
    if rows.size:
        out[rows, cols] = fun(rows, w[rows, cols])
    return out


def _rows_of(split, rows):
    return split[0][rows], split[1][rows]


def _closed_loop_mag(nls, dls, delay, which):
    """|S| (which None), |T| (which "T") or |X/(D + N e^{-sT})| for a numerator X given as its
    jw_split, as a function of (rows, w) 1-D arrays (|e^{-jwT}| = 1 in any numerator); N and D
    come as their jw_split too."""
    def f(rows, w):
        nn = at_jw(_rows_of(nls, rows), w) * np.exp(-1j * delay * w)
        dd = at_jw(_rows_of(dls, rows), w)
        if which is None:
            top = dd
        elif isinstance(which, str):
            top = nn
        else:
            top = at_jw(_rows_of(which, rows), w)
        return np.abs(top / (dd + nn))
    return f


PEAK_CANDIDATES = 6   # local maxima of the grid refined per candidate
PHASE_CANDIDATES = 6  # phase-crossing intervals (|L| nearest 1) refined per candidate
FREQ_CHUNK = 512      # candidates per pass of the dead-time frequency metrics
CROSSING_TOL = 4e-15  # bracket width in ln w (relative in w) at which a crossing is located


def _grid_peak(f, grid, v=None, tol: float = 3e-9):
    """Max of f(rows, w) over the grid: the largest few local maxima each refined by Brent's
    method in ln w on the two grid intervals around them (several near-equal maxima occur with
    dead time). ``v`` are the grid values when already known. The maxima are located to
    ``tol`` in ln w (relative in w), the peak (quadratic in the error) to about 1e-12 relative
    even for a resonance with Q = 1,000."""
    n, K = grid.shape
    if v is None:
        v = f(np.repeat(np.arange(n), K), grid.ravel()).reshape(n, K)
    v = np.where(np.isfinite(v), v, -np.inf)
    locmax = np.zeros_like(v, dtype=bool)
    locmax[:, 1:-1] = (v[:, 1:-1] >= v[:, :-2]) & (v[:, 1:-1] >= v[:, 2:])
    locmax[:, 0] = v[:, 0] >= v[:, 1]
    locmax[:, -1] = v[:, -1] >= v[:, -2]
    # the few highest local maxima of each row (a sparse set: no sort over the whole grid)
    rows, k = np.nonzero(locmax & np.isfinite(v))
    keep = highest_per_row(rows, v[rows, k], PEAK_CANDIDATES)
    rows, k = rows[keep], k[keep]
    lg = np.log(grid[rows, k])
    a = np.log(grid[rows, np.maximum(k - 1, 0)])
    b = np.log(grid[rows, np.minimum(k + 1, K - 1)])

    def neg(idx, x):
        fx = f(rows[idx], np.exp(x))
        return np.where(np.isfinite(fx), -fx, np.inf)
    x, fx = brent_minimize(neg, a, lg, b, -v[rows, k], tol)
    peak, where = np.full(n, -np.inf), np.full(n, np.nan)
    best = highest_per_row(rows, -fx, 1)                # the highest refined maximum of each row
    peak[rows[best]], where[rows[best]] = -fx[best], np.exp(x[best])
    return peak, where




def _bisect_crossings(fun, grid, vals, iters: int = 48, first_only: bool = False, select=None):
    """Sign changes of ``vals`` along each grid row, refined on fun(rows, w) in ln w.

    All (candidate, interval) pairs are refined together (only those in ``select`` when
    given) by :func:`synth.evaluate.bracket.illinois_root` to CROSSING_TOL in ln w (at most
    ``iters`` halvings after the Illinois steps; 48 halvings of a grid interval reach the
    spacing of doubles in ln w). Returns an (N, M) NaN-padded array of crossing frequencies.
    """
    sgn = np.sign(vals)
    ch = (sgn[:, :-1] * sgn[:, 1:] < 0) & np.isfinite(vals[:, :-1]) & np.isfinite(vals[:, 1:])
    if first_only:
        ch &= np.cumsum(ch, axis=1) == 1
    if select is not None:
        ch &= select
    counts = ch.sum(axis=1)
    m = max(int(counts.max()) if counts.size else 0, 1)
    out = np.full((grid.shape[0], m), np.nan)
    rows, cols = np.nonzero(ch)
    if rows.size == 0:
        return out
    order = np.arange(rows.size) - np.searchsorted(rows, rows)     # place among the row's crossings
    x = illinois_root(lambda idx, u: fun(rows[idx], np.exp(u)), np.log(grid[rows, cols]),
                      np.log(grid[rows, cols + 1]), vals[rows, cols], vals[rows, cols + 1], CROSSING_TOL, iters)
    out[rows, order] = np.exp(x)
    return out
