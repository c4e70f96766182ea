"""Step responses of the closed loop, exact at the samples, batched.

The three responses share the denominator Delta = Dp*Dc + Np*Nc:
reference -> output T = Np Nc/Delta, load at the plant input -> output
P S = Np Dc/Delta, reference -> control C S = Nc Dp/Delta. One controllable
canonical realisation of 1/Delta (in time scaled by w0, the geometric mean of the
pole magnitudes, for conditioning) is discretised by the zero-order-hold matrix
exponential (Van Loan, IEEE TAC 23, 1978), which is exact at the sample instants
for a step input.

The grid is planned per candidate from its closed-loop poles: the first step
resolves the fastest pole (RESOLUTION/|p| in scaled time), and at each segment
boundary the step grows by the largest power of two that keeps every mode still
alive (e^(-sigma t) above e^-ALIVE_DECAYS) at RESOLUTION or finer (at least
2 pi/RESOLUTION samples per period); the horizon is HORIZON_DECAYS/decay rate.
Candidates are simulated in groups of similar grid length (within 2^(1/3)).
Peaks and threshold crossings are refined inside their sample interval on 16
extra exact samples (one more matrix exponential), then by cubic Hermite
interpolation from exact values and exact derivatives.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .bracket import illinois_root

FIRST_SEGMENT = 128      # samples at the finest step (a multiple of SEGMENT_SAMPLES)
SEGMENT_SAMPLES = 32     # samples per later segment (the step may grow between segments)
HORIZON_DECAYS = 14.0    # horizon = this / decay rate (e^-14 ~ 1e-6 of a unit residue)
ALIVE_DECAYS = 20.0      # a mode counts as alive while sigma * t < this
RESOLUTION = 0.8         # largest step * |pole| for a mode still alive (~8 samples per period)
MAX_SAMPLES = 1 << 15    # cap per candidate; beyond it the horizon is cut (settling then reads inf)
MAX_GROWTH = 10          # the step grows by at most 2^MAX_GROWTH at one segment boundary
GROUPS_PER_OCTAVE = 3    # grid lengths grouped within 2^(1/3): little padding, few calls
SUBSAMPLES = 16          # exact sub-samples inside an interval being refined
CROSS_TOL = 1e-13        # a crossing's place inside its sub-interval, as a fraction of it


@dataclass
class Responses:
    """Sampled responses of N candidates; times in seconds.

    ``y``/``dy`` are (N, K, 3): reference->y, load->y, reference->u and their exact
    time derivatives (right limits). The realisation (scaled time) is kept so that
    intervals can be refined exactly.
    """
    t: np.ndarray          # (N, K) seconds
    y: np.ndarray          # (N, K, 3)
    dy: np.ndarray         # (N, K, 3) per second
    final: np.ndarray      # (N, 3) final values (DC gains)
    X: np.ndarray | None = None      # (N, K, n) states
    A: np.ndarray | None = None      # (N, n, n) scaled-time realisation
    C: np.ndarray | None = None      # (N, 3, n)
    D: np.ndarray | None = None      # (N, 3)
    w0: np.ndarray | None = None     # (N,) time scale


def _pad_to(p: np.ndarray, m: int) -> np.ndarray:
    return np.pad(p, ((0, 0), (m - p.shape[1], 0)))


def plan(poles_s: np.ndarray, t_end: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-candidate first step h0, step growth per segment (N, S) and number of segments needed.

    ``poles_s`` are the closed-loop poles in scaled time (NaN padded), ``t_end`` the
    scaled horizons. At each segment boundary the step grows by the largest power of two
    2^d (d <= MAX_GROWTH) that keeps every mode still alive resolved; the growth array
    holds d.
    """
    n = t_end.shape[0]
    mag = np.abs(poles_s)
    sig = np.where(np.isnan(poles_s.real), np.inf, -poles_s.real)
    with np.errstate(invalid="ignore", divide="ignore"):
        need = np.where(np.isnan(mag) | (mag == 0), np.inf, RESOLUTION / mag)
    pmax = np.nanmax(np.where(np.isnan(mag), 0.0, mag), axis=1) if mag.shape[1] else np.ones(n)
    with np.errstate(divide="ignore"):
        h0 = np.minimum(np.where(pmax > 0, RESOLUTION / pmax, np.inf), t_end / FIRST_SEGMENT)
    h0 = np.where(np.isfinite(h0) & (h0 > 0), h0, 1.0)
    t = FIRST_SEGMENT * h0
    h = h0.copy()
    smax = (MAX_SAMPLES - FIRST_SEGMENT) // SEGMENT_SAMPLES
    growth = np.zeros((n, smax), np.int8)
    nseg = np.zeros(n, dtype=int)
    act = np.flatnonzero(t < t_end)          # rows still short of their horizon
    for j in range(smax):
        if act.size == 0:
            break
        alive = sig[act] * t[act, None] < ALIVE_DECAYS
        hreq = np.min(np.where(alive, need[act], np.inf), axis=1) if need.shape[1] else np.full(act.size, np.inf)
        d = np.zeros(act.size, np.int8)
        for _ in range(MAX_GROWTH):           # doublings while the doubled step still resolves every alive mode
            up = (d < MAX_GROWTH) & (2.0 ** (d + 1) * h[act] <= hreq)
            if not up.any():
                break
            d += up
        h[act] *= 2.0 ** d
        growth[act, j] = d
        t[act] += SEGMENT_SAMPLES * h[act]
        nseg[act] += 1
        act = act[t[act] < t_end[act]]
    return h0, growth[:, :max(int(nseg.max()) if n else 0, 0)], nseg


def _powers(phi: np.ndarray, gam: np.ndarray, m: int) -> tuple[np.ndarray, np.ndarray]:
    """P[k] = Phi^(k+1) and G[k] = sum_{i<=k} Phi^i Gamma for k < m (batch on the last axis),
    by doubling: Phi^(k+j) = Phi^j Phi^k, G_(k+j) = Phi^j G_k + G_j."""
    order, n_c = gam.shape
    P = np.empty((m, order, order, n_c))
    G = np.empty((m, order, n_c))
    P[0], G[0] = phi, gam
    k = 1
    while k < m:
        P[k:2 * k] = np.einsum("mijn,jkn->mikn", P[:k], P[k - 1])
        G[k:2 * k] = np.einsum("mijn,jn->min", P[:k], G[k - 1]) + G[:k]
        k *= 2
    return P, G


def simulate(char: np.ndarray, nums: list[np.ndarray], w0: np.ndarray, decay: np.ndarray,
             poles: np.ndarray | None = None, grid_plan=None) -> Responses:
    """Unit-step responses of nums[i]/char for stable candidates (decay > 0), one grid layout.

    ``poles`` (unscaled, NaN padded) plan the grid; computed from ``char`` if omitted.
    """
    char = np.atleast_2d(np.asarray(char, float))
    m = char.shape[1]
    nums = [_pad_to(np.atleast_2d(b), m) for b in nums]
    while char.shape[1] > 1 and not np.any(char[:, 0]):      # leading zeros common to every row
        char, nums = char[:, 1:], [b[:, 1:] for b in nums]
    n_c = char.shape[0]
    order = char.shape[1] - 1
    powers = np.arange(order, -1, -1)
    sc = w0[:, None] ** powers                       # s = w0 * s_hat
    a = char * sc
    lead = a[:, :1]
    a = a / lead
    bs = [b * sc / lead for b in nums]
    final = np.stack([b[:, -1] / a[:, -1] for b in bs], axis=1)
    if order == 0:   # static loop
        t = np.tile([0.0, 1.0], (n_c, 1))
        y = np.repeat(np.stack([b[:, 0] for b in bs], axis=1)[:, None, :], 2, axis=1)
        return Responses(t, y, np.zeros_like(y), final)

    A = np.zeros((n_c, order, order))
    A[:, 0, :] = -a[:, 1:]
    if order > 1:
        A[:, np.arange(1, order), np.arange(order - 1)] = 1.0
    C = np.stack([b[:, 1:] - b[:, :1] * a[:, 1:] for b in bs], axis=1)    # (N, 3, n)
    D = np.stack([b[:, 0] for b in bs], axis=1)                            # (N, 3)

    if poles is None:
        from ..lti import batch_roots
        poles = batch_roots(char)
    if grid_plan is None:
        grid_plan = plan(poles / w0[:, None], HORIZON_DECAYS / (decay / w0))
    h0, growth, nseg = grid_plan
    segs = int(nseg.max()) if nseg.size else 0
    phi, gam = _zoh(A, h0)

    total = FIRST_SEGMENT + SEGMENT_SAMPLES * segs + 1
    M = SEGMENT_SAMPLES
    X = np.zeros((total, order, n_c))
    T = np.zeros((total, n_c))
    x = np.zeros((order, n_c))
    tcur, h = np.zeros(n_c), h0.copy()
    # a block of M steps at once: x_j = Phi^j x_0 + G_j (G_j = sum_{i<j} Phi^i Gamma), from
    # P[m] = Phi^(m+1), G[m] = G_(m+1) built by doubling
    P, G = _powers(phi.transpose(1, 2, 0), gam.T, M)
    half = M // 2
    first_blocks = FIRST_SEGMENT // M
    blocks = first_blocks + segs
    doubles, grows = (growth == 1).any(axis=0), (growth > 1).any(axis=0)   # per segment
    starts, steps = np.empty((blocks, n_c)), np.empty((blocks, n_c))      # per block: its start time and step
    for b in range(blocks):
        seg = b - first_blocks + 1
        d = growth[:, seg - 1] if seg > 0 else None
        if d is not None and doubles[seg - 1]:
            # the step doubles: Phi(2h)^j = Phi(h)^(2j) and G_j(2h) = G_2j(h) for j <= M/2 are
            # already there; the second half follows from them by one product
            sel = np.flatnonzero(d == 1)
            Pd, Gd = P[1::2][..., sel], G[1::2][..., sel]
            P[:half, ..., sel], G[:half, :, sel] = Pd, Gd
            P[half:, ..., sel] = np.einsum("mijn,jkn->mikn", Pd, Pd[-1])
            G[half:, :, sel] = np.einsum("mijn,jn->min", Pd, Gd[-1]) + Gd
            h[sel] *= 2
        if d is not None and grows[seg - 1]:
            # the step grows by 2^d: Phi(2^d h) = Phi(h)^(2^d) and Gamma(2^d h) = G_(2^d)(h),
            # from the table (2^d <= M) or by squaring Phi^M further; then a new table
            sel = np.flatnonzero(d > 1)
            jump = 2 ** d[sel].astype(int)
            k = np.minimum(jump, M) - 1
            ph, gm = P[k, :, :, sel], G[k, :, sel]                          # (rows, n, n), (rows, n)
            for _ in range(int(np.log2(max(jump.max() // M, 1)))):
                more = jump > M
                ph2 = np.einsum("rij,rjk->rik", ph, ph)
                gm2 = np.einsum("rij,rj->ri", ph, gm) + gm
                ph, gm = np.where(more[:, None, None], ph2, ph), np.where(more[:, None], gm2, gm)
                jump = np.where(more, jump // 2, jump)
            P[..., sel], G[..., sel] = _powers(ph.transpose(1, 2, 0), gm.T, M)
            h[sel] *= 2.0 ** d[sel]
        i0 = 1 + b * M
        X[i0:i0 + M] = np.einsum("mijn,jn->min", P, x) + G
        starts[b], steps[b] = tcur, h
        x = X[i0 + M - 1]
        tcur = tcur + M * h
    T[1:] = (starts[:, None, :] + steps[:, None, :] * np.arange(1, M + 1)[None, :, None]).reshape(-1, n_c)
    # outputs and their derivatives (y' = C x' + D u', x' = A x + e1) in one batched product
    # (N, 6, K) planes, so that each output's samples are contiguous in time
    planes = np.concatenate([C, C @ A], axis=1) @ X.transpose(2, 1, 0)
    planes[:, :3] += D[:, :, None]
    planes[:, 3:] += C[:, :, :1]
    planes[:, 3:] *= w0[:, None, None]
    return Responses(T.T / w0[:, None], planes[:, :3].transpose(0, 2, 1), planes[:, 3:].transpose(0, 2, 1),
                     final, X.transpose(2, 0, 1), A, C, D, w0)


def batched_expm(M: np.ndarray, degree: int = 14) -> np.ndarray:
    """Matrix exponentials of a stack (N, k, k) in one vectorised pass.

    Scaling and squaring with a truncated Taylor series (Moler & Van Loan, "Nineteen
    dubious ways to compute the exponential of a matrix", SIAM Review 20, 1978 / 45,
    2003): each matrix is scaled by 2^-s so that its 1-norm is at most 1/2, where
    degree 14 leaves a truncation error below 1e-16; then squared s times. scipy's
    expm treats a stack one matrix at a time, which costs ~40 us per matrix here.
    """
    norm = np.abs(M).sum(axis=1).max(axis=1)
    s = np.maximum(0, np.ceil(np.log2(np.maximum(norm, 1e-300) / 0.5))).astype(int)
    X = M / (2.0 ** s)[:, None, None]
    eye = np.broadcast_to(np.eye(M.shape[1]), M.shape)
    E = eye + X / degree
    for k in range(degree - 1, 0, -1):          # Horner: I + X/1 (I + X/2 (I + ...))
        E = eye + (X @ E) / k
    for j in range(int(s.max()) if s.size else 0):
        sq = j < s
        if sq.any():
            E[sq] = E[sq] @ E[sq]
    return E


def _zoh(A: np.ndarray, h: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Batched zero-order-hold pair (Phi, Gamma) for x' = A x + e1 u over steps h (N,)."""
    n_c, order = A.shape[0], A.shape[1]
    M = np.zeros((n_c, order + 1, order + 1))
    M[:, :order, :order] = A * h[:, None, None]
    M[:, 0, order] = h
    E = batched_expm(M)
    return E[:, :order, :order], E[:, :order, order]


def _outputs(X, A, C, D):
    y = X @ C.transpose(0, 2, 1) + D[:, None, :]
    xdot = X @ A.transpose(0, 2, 1)
    xdot[..., 0] += 1.0
    return y, xdot @ C.transpose(0, 2, 1)


def fine(r: Responses, k: np.ndarray, out: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact sub-samples of output ``out`` inside interval [k, k+1] of each row.

    ``k`` is (N,) or (N, q) (q intervals per row, refined in one batch). Returns times
    (N, [q,] S+1) in seconds, values and derivatives, S = SUBSAMPLES.
    """
    k = np.asarray(k)
    multi = k.ndim == 2
    n, q = r.t.shape[0], k.shape[1] if multi else 1
    shape = (n, q, SUBSAMPLES + 1) if multi else (n, SUBSAMPLES + 1)
    return tuple(a.reshape(shape) for a in fine_at(r, np.repeat(np.arange(n), q), k.reshape(-1), out))


def fine_at(r: Responses, rows: np.ndarray, k: np.ndarray, out: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact sub-samples of output ``out`` inside interval [k_i, k_i + 1] of row rows_i (M pairs):
    times (M, S+1) in seconds, values and derivatives."""
    k = np.clip(k, 0, r.t.shape[1] - 2)
    w0 = r.w0[rows]
    hs = (r.t[rows, k + 1] - r.t[rows, k]) * w0 / SUBSAMPLES       # scaled sub-step
    A = r.A[rows]
    phi, gam = _zoh(A, hs)
    x = r.X[rows, k][..., None]
    xs = [x]
    for _ in range(SUBSAMPLES):
        x = phi @ x + gam[..., None]
        xs.append(x)
    Xf = np.concatenate(xs, axis=2).transpose(0, 2, 1)                # (M, S+1, n)
    y, dy = _outputs(Xf, A, r.C[rows, out:out + 1], r.D[rows, out:out + 1])
    tf = r.t[rows, k][:, None] + np.arange(SUBSAMPLES + 1)[None, :] * (hs / w0)[:, None]
    return tf, y[..., 0], dy[..., 0] * w0[:, None]


# ----------------------------------------------------------- Hermite helpers
def _hermite(t0, t1, y0, y1, d0, d1, tau):
    """Cubic Hermite value at fraction tau in [0, 1] of [t0, t1]."""
    h = t1 - t0
    h00 = 2 * tau ** 3 - 3 * tau ** 2 + 1
    h10 = tau ** 3 - 2 * tau ** 2 + tau
    h01 = -2 * tau ** 3 + 3 * tau ** 2
    h11 = tau ** 3 - tau ** 2
    return h00 * y0 + h10 * h * d0 + h01 * y1 + h11 * h * d1


def hermite_crest(y0, y1, d0, d1):
    """(tau, value) of the crest of the cubic Hermite interpolant on [0, 1] with end values
    y0, y1 and end slopes d0, d1 (slopes already scaled by the interval length)."""
    c3 = 2 * y0 + d0 - 2 * y1 + d1
    c2 = -3 * y0 - 2 * d0 + 3 * y1 - d1
    qa, qb, qc = 3 * c3, 2 * c2, d0
    with np.errstate(invalid="ignore", divide="ignore"):
        disc = np.sqrt(np.maximum(qb * qb - 4 * qa * qc, 0.0))
        # the root where p' goes from + to -: numerically stable form of the quadratic formula
        q = -0.5 * (qb + np.copysign(disc, qb))
        r1, r2 = q / qa, qc / q
        tau = np.where((r1 > 0) & (r1 < 1), r1, r2)
        tau = np.where(np.abs(qa) < 1e-300, -qc / qb, tau)
    tau = np.clip(np.nan_to_num(tau, nan=0.5), 0.0, 1.0)
    return tau, ((c3 * tau + c2) * tau + d0) * tau + y0


def interval_extrema(t, y, dy):
    """Crest and trough of the cubic Hermite interpolant on each sample interval,
    (hi, lo, hi_inner, lo_inner), each (N, K-1); the masks mark an interior crest (trough).

    From exact samples and derivatives: a crest (trough) between two samples exists
    where the derivative changes sign from + to - (- to +), and there the cubic's
    stationary point solves a quadratic. This finds extrema the samples miss, which
    would otherwise misplace a peak or a last exit from the settling band. Computed
    once per output and shared by the peak, rise and settling tests and the sign
    test of the absolute integral.
    """
    y0, y1, d0, d1 = y[:, :-1], y[:, 1:], dy[:, :-1], dy[:, 1:]
    hi, lo = np.maximum(y0, y1), np.minimum(y0, y1)
    up = d0 > 0
    hi_in, lo_in = up & (d1 < 0), (d0 < 0) & (d1 > 0)
    i, j = np.nonzero(hi_in | lo_in)                               # a crest or a trough inside
    if i.size:
        h = t[i, j + 1] - t[i, j]
        sg = np.where(up[i, j], 1.0, -1.0)                         # a trough is the crest of -y
        v = sg * hermite_crest(sg * y0[i, j], sg * y1[i, j], sg * d0[i, j] * h, sg * d1[i, j] * h)[1]
        hi[i, j] = np.where(sg > 0, np.maximum(hi[i, j], v), hi[i, j])
        lo[i, j] = np.where(sg < 0, np.minimum(lo[i, j], v), lo[i, j])
    return hi, lo, hi_in, lo_in


def _crossing_time(t, y, dy, k, level):
    """Refine a crossing of ``level`` in interval [k, k+1] of each row: a root of the cubic
    Hermite interpolant (Illinois steps, :func:`bracket.illinois_root`, to CROSS_TOL of the
    interval). Where the interval's ends do not straddle the level its right end is taken."""
    rows = np.arange(t.shape[0])
    k = np.clip(k, 0, t.shape[1] - 2)
    t0, t1 = t[rows, k], t[rows, k + 1]
    y0, y1, d0, d1 = y[rows, k], y[rows, k + 1], dy[rows, k], dy[rows, k + 1]
    lv = np.broadcast_to(np.asarray(level, float), t0.shape)
    f0, f1 = y0 - lv, y1 - lv
    straddle = np.sign(f0) * np.sign(f1) < 0
    tau = np.where(f0 == 0, 0.0, 1.0)
    i = np.flatnonzero(straddle)
    if i.size:
        def cubic(j, x):
            r = i[j]
            return _hermite(t0[r], t1[r], y0[r], y1[r], d0[r], d1[r], x) - lv[r]
        tau[i] = illinois_root(cubic, np.zeros(i.size), np.ones(i.size), f0[i], f1[i], CROSS_TOL)
    return t0 + tau * (t1 - t0)


def cubic_top(y0, y1, d0, d1):
    """Largest value on [0, 1] of the cubic Hermite interpolant with end values y0, y1 and
    end slopes d0, d1 (already scaled by the interval length): the larger end or a stationary
    point inside, both roots of the derivative's quadratic taken (clipped into [0, 1])."""
    c3 = 2 * y0 + d0 - 2 * y1 + d1
    c2 = -3 * y0 - 2 * d0 + 3 * y1 - d1
    qa, qb, qc = 3 * c3, 2 * c2, d0
    best = np.maximum(y0, y1)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        disc = np.sqrt(np.maximum(qb * qb - 4 * qa * qc, 0.0))
        q = -0.5 * (qb + np.copysign(disc, qb))          # stable quadratic formula
        for r in (q / qa, qc / q):
            tau = np.clip(np.nan_to_num(r, nan=0.0, posinf=0.0, neginf=0.0), 0.0, 1.0)
            best = np.maximum(best, ((c3 * tau + c2) * tau + d0) * tau + y0)
    return best


def _cubic_max(t, v, dv):
    """max of v (N, K) with the cubic Hermite refinement on both intervals next to the largest sample."""
    rows = np.arange(t.shape[0])
    k = np.argmax(v, axis=1)
    best = v[rows, k]
    for kk in (k - 1, k):
        ok = (kk >= 0) & (kk + 1 < t.shape[1])
        kk = np.clip(kk, 0, t.shape[1] - 2)
        h = t[rows, kk + 1] - t[rows, kk]
        top = cubic_top(v[rows, kk], v[rows, kk + 1], dv[rows, kk] * h, dv[rows, kk + 1] * h)
        best = np.where(ok, np.maximum(best, top), best)
    return best


PEAK_INTERVALS = 3   # per row, the intervals with the highest interior crests re-sampled exactly
CREST_SLACK = 1e-2   # an interior crest this far (rel. to the row's range) below the top sample is still refined


def highest_per_row(rows: np.ndarray, vals: np.ndarray, k: int) -> np.ndarray:
    """Indices into the sparse entries (rows, vals) of the k highest values of each row,
    ordered by row then value (highest first)."""
    order = np.lexsort((-vals, rows))
    r = rows[order]
    return order[np.arange(r.size) - np.searchsorted(r, r) < k]


def refined_peak(r: Responses, out: int, sign: np.ndarray | None, ext=None) -> np.ndarray:
    """sup over t of sign*y_out(t), or of |y_out(t)| when ``sign`` is None.

    The largest exact sample, and inside the PEAK_INTERVALS intervals per row whose interior
    cubic crests are highest and reach the largest sample (less CREST_SLACK of the row's
    range, far above the cubic's error at RESOLUTION) re-sampled exactly and refined: near-
    equal crests of a lightly damped mode cannot be told apart by the cubic alone, and an
    interval without an interior crest peaks at a sample. Never below the final value,
    approached as t -> inf. ``ext`` is the output's interval_extrema, if already known.
    """
    y, dy = r.y[:, :, out], r.dy[:, :, out]
    hi, lo, hi_in, lo_in = interval_extrema(r.t, y, dy) if ext is None else ext
    ymax, ymin = y.max(axis=1), y.min(axis=1)
    slack = CREST_SLACK * np.maximum(np.abs(ymax), np.abs(ymin))
    if sign is None:
        best = np.maximum(ymax, -ymin)
        parts = ((1.0, hi, hi_in), (-1.0, -lo, lo_in))
    else:
        pos = sign > 0
        best = np.where(pos, ymax, -ymin)
        parts = ((1.0, np.where(pos[:, None], hi, -np.inf), hi_in), (-1.0, np.where(pos[:, None], -np.inf, -lo), lo_in))
    rows, ks, sg, vals = [], [], [], []
    for s, crest, inner in parts:
        i, j = np.nonzero(inner & (crest >= (best - slack)[:, None]))
        rows.append(i), ks.append(j), sg.append(np.full(i.size, s)), vals.append(crest[i, j])
    rows, ks, sg, vals = (np.concatenate(a) for a in (rows, ks, sg, vals))
    if rows.size:
        keep = highest_per_row(rows, vals, PEAK_INTERVALS)
        rows, ks, sg = rows[keep], ks[keep], sg[keep]
        tf, yf, df = fine_at(r, rows, ks, out)
        np.maximum.at(best, rows, _cubic_max(tf, sg[:, None] * yf, sg[:, None] * df))
    final = np.abs(r.final[:, out]) if sign is None else r.final[:, out] * sign
    return np.maximum(best, final)


def refined_crossing(r: Responses, out: int, k: np.ndarray, level: np.ndarray, offset: np.ndarray,
                     absolute: bool, last: bool) -> np.ndarray:
    """Time where e = y_out - offset (or |e| when ``absolute``) crosses ``level`` inside
    interval k: the first or last crossing among the exact sub-samples, refined by
    Hermite bisection. ``k`` and ``level`` are (N,) or (N, q); ``offset`` is (N,)."""
    k = np.asarray(k)
    n, q = k.shape[0], 1 if k.ndim == 1 else k.shape[1]
    tf, yf, df = (a.reshape(n * q, -1) for a in fine(r, k.reshape(n, q), out))
    level = np.broadcast_to(level, k.shape).reshape(-1)
    ef = yf - np.repeat(offset, q)[:, None]
    if absolute:
        df = np.sign(ef) * df
        ef = np.abs(ef)
    s = np.sign(ef - level[:, None])
    ch = s[:, :-1] * s[:, 1:] <= 0
    j = (SUBSAMPLES - 1 - np.argmax(ch[:, ::-1], axis=1)) if last else np.argmax(ch, axis=1)
    j = np.where(ch.any(axis=1), j, 0)
    return _crossing_time(tf, ef, df, j, level).reshape(k.shape)


def _settling(r: Responses, out: int, band_abs: np.ndarray, ext=None) -> np.ndarray:
    """Last time |y - final| leaves the band; inf if still outside at the horizon."""
    y, dy = r.y[:, :, out], r.dy[:, :, out]
    final = r.final[:, out]
    e = y - final[:, None]
    hi, lo = (interval_extrema(r.t, y, dy) if ext is None else ext)[:2]
    crest = np.maximum(hi - final[:, None], final[:, None] - lo)     # of |y - final|
    outside = crest > band_abs[:, None]
    any_out = outside.any(axis=1)
    last = outside.shape[1] - 1 - np.argmax(outside[:, ::-1], axis=1)
    at_end = np.abs(e[:, -1]) > band_abs
    ts = refined_crossing(r, out, last, band_abs, final, absolute=True, last=True)
    return np.where(~any_out, 0.0, np.where(at_end, np.inf, ts))


def interval_integrals(r: Responses, out: int) -> np.ndarray:
    """Exact integral of y_out over each sample interval, (N, K-1), in output units x s.

    With x' = A x + e1 for a unit step, the integral of x over an interval of length h
    is A^-1 (x_end - x_start - e1 h) (A is invertible for a stable loop).
    """
    dt = np.diff(r.t, axis=1)
    cainv = np.linalg.solve(r.A.transpose(0, 2, 1), r.C[:, out, :, None])[..., 0]   # (C A^-1)^T, (N, n)
    # C A^-1 (x_end - x_start) - (C A^-1)_1 h: the state projected once, then differenced
    proj = np.diff(np.einsum("nkj,nj->nk", r.X, cainv), axis=1) - cainv[:, :1] * (dt * r.w0[:, None])
    return proj / r.w0[:, None] + r.D[:, out, None] * dt


def exact_integral(r: Responses, out: int) -> np.ndarray:
    """Signed integral of y_out over the horizon, exact (sum of exact interval integrals)."""
    return interval_integrals(r, out).sum(axis=1)


def abs_integral(r: Responses, out: int, ext=None) -> np.ndarray:
    """Integral of |y_out|: exact on every interval where y keeps its sign (cubic crest test),
    Simpson with Hermite midpoints on the few intervals where it changes sign."""
    y, dy = r.y[:, :, out], r.dy[:, :, out]
    ints = interval_integrals(r, out)
    hi, lo = (interval_extrema(r.t, y, dy) if ext is None else ext)[:2]
    same = (lo >= 0) | (hi <= 0)
    h = np.diff(r.t, axis=1)
    ym = 0.5 * (y[:, :-1] + y[:, 1:]) + h * (dy[:, :-1] - dy[:, 1:]) / 8
    simpson = h / 6 * (np.abs(y[:, :-1]) + 4 * np.abs(ym) + np.abs(y[:, 1:]))
    return np.where(same, np.abs(ints), simpson).sum(axis=1)


def time_metrics(r: Responses, band: float) -> dict[str, np.ndarray]:
    """Step-response metrics from sampled responses (see the DESIGN definitions)."""
    n = r.t.shape[0]
    yf = r.final[:, 0]
    sg = np.where(yf < 0, -1.0, 1.0)
    ext = [interval_extrema(r.t, r.y[:, :, o], r.dy[:, :, o]) for o in range(3)]
    with np.errstate(invalid="ignore", divide="ignore"):
        peak = refined_peak(r, 0, sg, ext[0])
        overshoot = np.maximum(0.0, (peak - np.abs(yf)) / np.abs(yf) * 100)
        crest = np.where(sg[:, None] > 0, ext[0][0], -ext[0][1])        # of sign * y
        lvl = np.abs(yf)[:, None] * np.array([0.1, 0.9])                 # 10 % and 90 % levels
        above = crest[:, None, :] >= lvl[:, :, None]
        tr = refined_crossing(r, 0, np.argmax(above, axis=2), lvl * sg[:, None], np.zeros(n),
                              absolute=False, last=False)
        rise = np.where(above.any(axis=2), tr, np.inf).T
        settle = _settling(r, 0, band * np.abs(yf), ext[0])
        ydf = r.final[:, 1]
        dpeak = refined_peak(r, 1, None, ext[1])
        dsettle = _settling(r, 1, band * dpeak, ext[1])
        iae = np.where(np.abs(ydf) > 1e-12 * np.maximum(dpeak, 1e-300), np.inf, abs_integral(r, 1, ext[1]))
        upeak = refined_peak(r, 2, None, ext[2])
    return {
        "settling_time_s": np.where(yf != 0, settle, np.inf),
        "overshoot_pct": np.where(yf != 0, overshoot, np.nan),
        "rise_time_s": np.where(yf != 0, rise[1] - rise[0], np.inf),
        "steady_state_error": np.abs(1.0 - yf),
        "disturbance_peak": dpeak,
        "disturbance_settling_time_s": dsettle,
        "disturbance_steady_state": ydf,
        "disturbance_iae": iae,
        "control_peak": upeak,
    }


def grouped_time_metrics(char: np.ndarray, nums: list[np.ndarray], w0: np.ndarray, decay: np.ndarray,
                         poles: np.ndarray, band: float, chunk_samples: int = 1 << 20) -> dict[str, np.ndarray]:
    """time_metrics for a batch, simulated in groups of similar grid length (bounded memory)."""
    n = char.shape[0]
    t_end = HORIZON_DECAYS / (decay / w0)
    h0, growth, nseg = plan(poles / w0[:, None], t_end)
    length = FIRST_SEGMENT + SEGMENT_SAMPLES * nseg
    degree = char.shape[1] - 1 - np.argmax(char != 0, axis=1)   # rows of a batch may differ in order
    bucket = np.ceil(GROUPS_PER_OCTAVE * np.log2(length)).astype(int) * (char.shape[1] + 1) + degree
    out: dict[str, np.ndarray] = {}
    for b in np.unique(bucket):
        idx = np.flatnonzero(bucket == b)
        per = max(1, chunk_samples // int(length[idx].max()))
        for s in range(0, idx.size, per):
            sl = idx[s:s + per]
            nsl = nseg[sl]
            r = simulate(char[sl], [x[sl] for x in nums], w0[sl], decay[sl], poles[sl],
                         (h0[sl], growth[sl, :int(nsl.max())], nsl))
            for key, v in time_metrics(r, band).items():
                out.setdefault(key, np.full(n, np.nan))[sl] = v
    return out
