"""Step responses of a loop with dead time, from the delay equation itself, batched.

Loop: plant P(s) = Np/Dp * e^(-theta s), controller C = Nc/Dc, unit steps of the
reference r and of a load d at the plant input. The delay sits at the plant input:
the plant is driven by s(t) = v(t - theta), v = u + d (for r->y, d->y and r->u the
place of the delay in the loop does not matter; a load entering before the delay is
delayed with u). Everything is at rest for t < 0.

Method of steps on a grid of step h = theta/m (m whole), so that every multiple of
theta, where the solution's derivatives jump, is a grid point. On interval
I_k = [k h, (k+1) h] the plant input s is v on I_(k-m), already computed; the loop
is then an ordinary linear ODE with state X = (plant state, controller state, r, d)
(r and d as constant states):

    X' = A X + B s(t),   y = Cy X + Dy s,   v = Cv X + Dv s,   u = v - d.

Representation. In local time sigma = (t - k h)/h in [0, 1], s on I_k is held as a
polynomial of degree P in the Taylor basis sigma^i/i! (coefficients a_i = h^i s^(i)
at the interval start). With q = (s, ds/dsigma, ..., d^P s/dsigma^P) the pair
(X, q) obeys the constant linear ODE  d/dsigma [X; q] = M [X; q],
M = [[hA, hB e0^T], [0, U]] (U the nilpotent up-shift), so that

    [X; q](k h + h) = e^M [X_k; a_k]                 (Van Loan, IEEE TAC 23, 1978)

exactly, and the Taylor coefficients of any output row c at the interval start are
exact too: h^i d^i/dt^i (c [X; q]) = c M^i [X_k; a_k].

What is exact and what is not. No finite-dimensional exact recursion exists in
general: on [j theta, (j+1) theta] the exact solution is an exponential polynomial
whose polynomial degree grows with j (the state of a delay equation is a function on
[-theta, 0], not a vector). Holding s on each step as a polynomial therefore cuts
the Taylor series of v after degree P; this is the only approximation. The cut-off
term is |sum_{i>P} b_i sigma^i/i!| <= ~|b_(P+1)|/(P+1)! with b_i = c M^i z, and it is
computed for every interval (``truncation``: the largest estimate relative to the
signal's peak). The grid is chosen so that h |lambda| <= RHO for every open-loop pole
of plant and controller (the exponents of the solution on each step), with at least
MIN_STEPS steps per dead time (the closed loop's dominant frequencies are O(1/theta));
then b_i ~ RHO^i and the cut-off is ~RHO^(P+1)/(P+1)! ~ 5e-13. Rows whose estimate
exceeds TRUNCATION_TOL are recomputed with every step halved. Fast stable poles (a
derivative filter 100x faster than the dead time) would force tiny steps everywhere;
their modes are excited only where the delayed input jumps, at multiples of theta, so
only the start of each dead time gets short, growing steps, and on the long uniform
steps after it the decayed fast modes are kept out of the Taylor maps (step_pattern,
_FastModes). All steps of a dead time repeat in the next, so a step's delayed input is
always one earlier step's polynomial; the state recursion over a dead time is one
inclusive scan. Each cut-off
perturbs the loop like a small load; a stable loop keeps the sum of these bounded
by (number of steps) x (cut-off) x (loop gain), below 1e-9 relative in practice,
and the tests check the responses against an independent solve_ivp solution of the
delay equation to 1e-7.

Residue tail. Slow loops (a lag zero near a pole, a slow integral) need 20/decay seconds
of response, which at h = theta/m can be millions of steps. After HEAD_STEPS steps (at
least HEAD_DELAYS dead times) every input is constant and the response is the residue
expansion y(t) = y(inf) + sum_k r_k e^(s_k t) over the roots s_k of the quasi-polynomial
(Bellman & Cooke 1963, ch. 6); synth takes the roots found by Newton from the Padé roots
and the residues r_k = F(s_k)/(s_k Delta'(s_k)). The expansion truncated to these roots is
used only where it matches the method of steps on the head's whole last dead time to
TAIL_TOL of each response's peak (a missed root shows there, and the row then runs the
method of steps to the horizon). The tail's polynomials are the exact Taylor coefficients
of the expansion about each step's midpoint (written in powers of the local time), so a
term's cut-off is (h |s_k| / 2)^(P+1)/(P+1)! of its size: the steps keep h |s_k| <= 2 RHO
for a root whose term is of the peak's size and let it grow as the term decays, so that
each term's cut-off stays at RHO^(P+1)/(P+1)! of the peak (h |s_k| <= GRADED_MU; terms below
ALIVE_TOL leave the tail). About the midpoint rather than the step's start, the same cut-off
allows steps twice as long. The tail's cut-offs do not propagate: each step's coefficients
come from the expansion itself, not from the step before.

Metrics use the same definitions as synth.evaluate.time (grouped_time_metrics keys).
Each interval's response is a polynomial known to rounding, so peaks (Newton on the
derivative), threshold crossings (bracketed Illinois steps) and integrals (antiderivative;
sign changes located the same way) are exact up to rounding and the polynomial cut-off;
candidate intervals are located with cubic crests on SUBSAMPLES exact sub-samples.
The horizon is HORIZON_DECAYS / decay rate (20 decays, against 14 for rational loops, so
that the integral's tail stays below ~1e-8 relative).
"""

from __future__ import annotations

from dataclasses import dataclass
from math import comb, factorial

import numpy as np

from ..lti import batch_conv, batch_polyval, batch_roots
from .bracket import illinois_root
from .time import CREST_SLACK, batched_expm, hermite_crest, highest_per_row

HORIZON_DECAYS = 20.0     # horizon = this / decay rate: the IAE tail beyond it is ~e^-20 (2e-9) relative
DEGREE = 11              # P: polynomial degree of the delayed signal on each step
RHO = 0.5                # h * |open-loop pole| at most
MIN_STEPS = 4            # steps per dead time at least
SUBSAMPLES = 4           # exact sub-samples per step for locating crests and crossings
MAX_INTERVALS = 1 << 14  # cap per candidate; beyond it the horizon is cut (figures the rest could change read inf)
TRUNCATION_TOL = 1e-11   # largest accepted cut-off estimate (relative to the signal's peak)
PEAK_INTERVALS = 3       # sub-intervals with the highest crests refined by Newton
MAX_REFINE = 3           # times the step may be halved for rows failing TRUNCATION_TOL
FAST_THETA = 64.0        # a stable open-loop pole with |p| theta above this gets graded steps (see step_pattern)
MAX_GRADED = 400         # graded steps per dead time at most
CLEAN_DECAYS = 32.0      # a fast mode this many time constants past its excitation counts as decayed
GRADED_MU = 4.0          # |pole| h at most on graded steps (no rounding blow-up through M^i below it)
HEAD_STEPS = 128         # the method of steps runs this many steps at least (and HEAD_DELAYS dead times)
HEAD_DELAYS = 8
TAIL_TOL = 1e-10         # largest accepted head/tail mismatch on the head's last dead time (relative to peak)
ALIVE_TOL = 1e-14        # a root's term below this (relative to the peak) leaves the tail
TAIL_CHUNK = 4096         # tail steps whose coefficients are formed in one batch
METRIC_CHUNK = 1 << 15    # steps whose metrics are computed in one batch (rows kept whole)
SIM_CHUNK = 1 << 17       # rows x steps of the method of steps simulated in one batch
SIGMA_TOL = 1e-15         # crossings located to this in local time (fraction of a step)
TAIL_STEPS = 32          # tail steps per segment at least (the step is re-chosen per segment)
TAIL_RETRIES = 2         # times the head is made longer (2x, then 4x) when the expansion does not match it
CHAIN_ROOTS = 16         # Newton also starts on the first CHAIN_ROOTS points of the root chains

_FACT = np.array([float(factorial(i)) for i in range(DEGREE + 3)])
# power-basis change: sum_i c_i (sigma - 1/2)^i = sum_j (c @ _FROM_MID)_j sigma^j
_FROM_MID = np.array([[comb(i, j) * (-0.5) ** (i - j) if j <= i else 0.0 for j in range(DEGREE + 1)]
                      for i in range(DEGREE + 1)])
_FROM_MID_F = _FROM_MID / _FACT[:DEGREE + 1, None]     # Taylor terms c_i / i! first, then the basis change


@dataclass
class DelayResponses:
    """Sampled responses of N dead-time loops, with their exact piecewise polynomials.

    ``t``, ``y``, ``dy``, ``final`` as in synth.evaluate.time.Responses (y/dy (N, K+1, 3):
    reference->y, load->y, reference->u, right limits; the last sample is the left
    limit at the horizon). ``coef`` (N, K, 3, DEGREE+1) holds each step's polynomial in
    local time sigma in [0, 1] (power basis); ``h`` (N, K) each step's length in seconds
    (the method of steps' theta/m, then the residue tail's growing steps; 0 where padded).
    """
    t: np.ndarray
    y: np.ndarray
    dy: np.ndarray
    final: np.ndarray
    coef: np.ndarray
    h: np.ndarray
    steps_per_delay: np.ndarray
    truncation: np.ndarray


# ------------------------------------------------------------------ realisation
def _scaled(p: np.ndarray, h: np.ndarray, width: int) -> np.ndarray:
    """Rows of p padded to ``width`` coefficients, coefficient i scaled by h^i (s = s_hat/h)."""
    p = np.pad(p, ((0, 0), (width - p.shape[1], 0)))
    return p * h[:, None] ** np.arange(width)[None, :]


def _companion(num: np.ndarray, den: np.ndarray):
    """Controllable canonical (A, C, D) of num/den rows (equal width, den[:, 0] != 0); B = e1."""
    a = den / den[:, :1]
    b = num / den[:, :1]
    k = den.shape[1] - 1
    A = np.zeros((den.shape[0], k, k))
    if k:
        A[:, 0, :] = -a[:, 1:]
        A[:, np.arange(1, k), np.arange(k - 1)] = 1.0
    return A, b[:, 1:] - b[:, :1] * a[:, 1:], b[:, 0]


def _trim(p: np.ndarray) -> np.ndarray:
    nz = np.flatnonzero(np.any(p != 0, axis=0))
    return p[:, nz[0]:] if nz.size else p[:, -1:]


def loop_matrices(pnum, pden, cnum, cden, h):
    """Augmented generator M (N, n+P+1, n+P+1) and output rows (N, 3, n+P+1) for y, u, v.

    ``cden`` rows must share their degree (leading coefficient nonzero). State order:
    plant states, controller states, r, d, then q = (s, s', ..., s^(P)) in local time.
    """
    N = cnum.shape[0]
    pden = _trim(np.atleast_2d(pden))
    wp = pden.shape[1]
    Ap, Cp, Dp = _companion(_scaled(np.atleast_2d(pnum), h, wp), _scaled(np.repeat(pden, N, 0), h, wp))
    cden = _trim(cden)
    wc = cden.shape[1]
    Ac, Cc, Dc = _companion(_scaled(cnum[:, -wc:] if cnum.shape[1] >= wc else cnum, h, wc), _scaled(cden, h, wc))
    npl, nc = wp - 1, wc - 1
    n = npl + nc + 2
    ir, idd = npl + nc, npl + nc + 1
    P = DEGREE
    M = np.zeros((N, n + P + 1, n + P + 1))
    M[:, :npl, :npl] = Ap
    if nc:
        M[:, npl, :npl] = -Cp                 # controller input e = r - y, y = Cp xp + Dp s
        M[:, npl:npl + nc, npl:npl + nc] = Ac
        M[:, npl, ir] = 1.0
        M[:, npl, n] = -Dp
    if npl:
        M[:, 0, n] = 1.0                      # plant input s = q_0
    M[:, np.arange(n, n + P), np.arange(n + 1, n + P + 1)] = 1.0
    rows = np.zeros((N, 3, n + P + 1))
    rows[:, 0, :npl] = Cp                      # y
    rows[:, 0, n] = Dp
    rows[:, 1, :npl] = -Dc[:, None] * Cp       # u = Cc xc + Dc (r - y)
    rows[:, 1, npl:npl + nc] = Cc
    rows[:, 1, ir] = Dc
    rows[:, 1, n] = -Dc * Dp
    rows[:, 2] = rows[:, 1]                    # v = u + d
    rows[:, 2, idd] = 1.0
    return M, rows, n


def _taylor_maps(M, rows, count):
    """(N, 3, count, n+P+1): rows @ M^i for i < count."""
    out = np.empty(rows.shape[:2] + (count, rows.shape[2]))
    r = rows
    for i in range(count):
        out[:, :, i] = r
        r = r @ M
    return out


# ------------------------------------------------------------------ simulation
def _simulate_group(pnum, pden, cnum, cden, hd, G, L, K):
    """Piecewise-polynomial responses of one group (common step pattern shape G, L and K).

    Every dead time is cut into the same L steps: G graded ones of lengths hd[:, :G], then
    L - G of length hd[:, G]; step k has the length of position k mod L, so the delayed
    input of a step is exactly the v polynomial of the step one dead time earlier.
    Returns (coef (N, K, 3, P+1) power basis, truncation (N,), step lengths (N, K)).

    Batch first; per dead time the delayed inputs are known, so the inputs' contribution
    Gamma a_k and the v coefficients of the whole period are each one batched product,
    and X_(k+1) = Phi X_k + (Gamma a)_k over the period is one scan (:func:`_scan_powers`)."""
    N = cnum.shape[0]
    D = G + 1
    M, rows, n = loop_matrices(pnum, pden, np.repeat(cnum, D, 0), np.repeat(cden, D, 0), hd[:, :D].ravel())
    P = DEGREE
    q = P + 1
    d = n + q
    E = batched_expm(M).reshape(N, D, d, d)
    R = _taylor_maps(M, rows, P + 3).reshape(N, D, 3, P + 3, d)    # rows @ M^i
    # the companion states of a step of length h are x_i / h^(i+1) of the physical ones
    # (local time sigma = t / h): carry physical states so that steps of different lengths
    # meet in one coordinate system (diagonal similarity, exact up to rounding)
    npl = _trim(np.atleast_2d(pden)).shape[1] - 1
    nc = n - npl - 2
    expo = np.concatenate([np.arange(1, npl + 1), np.arange(1, nc + 1), np.zeros(2 + q)])
    S = hd[:, :D, None] ** expo[None, None, :]                       # (N, D, d): physical = S * companion
    E = S[..., :, None] * E / S[..., None, :]
    R = R / S[:, :, None, None, :]
    if G:        # uniform steps of a graded pattern: Taylor maps without the decayed fast modes
        fast = _FastModes(M.reshape(N, D, d, d)[:, G], S[:, G], rows.reshape(N, D, 3, d)[:, G] / S[:, G, None, :],
                          hd[:, G], n)
        if fast.any:
            R[:, G] = fast.R
    pos = np.minimum(np.arange(L), G)                               # distinct length of each position
    Phi = np.ascontiguousarray(E[:, :, :n, :n][:, pos])             # (N, L, n, n)
    Gam = np.ascontiguousarray(E[:, :, :n, n:][:, pos])             # (N, L, n, q)
    Rv = np.ascontiguousarray(R[:, :, 2, :q][:, pos])               # (N, L, q, d): v's Taylor coefficients
    # Z[:, k, :, c] = [X_k; a_k] of case c (0: reference step, 1: load step)
    Z = np.zeros((N, K + 1, d, 2))
    Z[:, 0, n - 2, 0] = 1.0                     # r = 1
    Z[:, 0, n - 1, 1] = 1.0                     # d = 1
    V = np.zeros((N, K, q, 2))
    x = Z[:, 0, :n]
    # within a dead time X_(j+1) = Phi_j X_j + (Gamma a)_j is an affine recursion whose matrices
    # depend on the position only: its prefix products are computed once and each dead time
    # is one inclusive scan (Hillis & Steele, CACM 29, 1986) in log2(L) batched products
    pw, pref = _scan_powers(Phi)
    for k0 in range(0, K, L):
        k1 = min(k0 + L, K)
        Ls = k1 - k0
        xs = pref[:, :Ls] @ x[:, None]            # the state's part: Phi_j ... Phi_0 X
        if k0 >= L:
            Z[:, k0:k1, n:] = V[:, k0 - L:k1 - L]
            c = Gam[:, :Ls] @ V[:, k0 - L:k1 - L]
            for dlt, P_ in pw:                                        # c_j <- c_j + Phi_j..Phi_(j-dlt+1) c_(j-dlt)
                if dlt >= Ls:
                    break
                nxt = c.copy()
                nxt[:, dlt:] += P_[:, dlt:Ls] @ c[:, :Ls - dlt]
                c = nxt
            xs = xs + c
        Z[:, k0 + 1:k1 + 1, :n] = xs
        x = xs[:, -1]
        V[:, k0:k1] = Rv[:, :Ls] @ Z[:, k0:k1]
    kpos = pos[np.arange(K) % L]                                    # distinct length of every step
    coef = np.empty((N, K, 3, q))
    tail = np.zeros(N)
    scale = np.zeros(N)
    # Taylor coefficients (power basis) of y and u and v's cut-off terms, both cases, for all
    # the steps of one length in one product per row: (2k, d) @ (d, 2(P+3) + 2)
    q2 = q + 2
    for dd in range(D):
        ks = np.flatnonzero(kpos == dd)
        if ks.size == 0:
            continue
        k = ks.size
        Zs = np.ascontiguousarray(Z[:, ks].swapaxes(2, 3)).reshape(N, 2 * k, d)     # (N, k x case, d)
        maps = np.concatenate([R[:, dd, 0] / _FACT[:, None], R[:, dd, 1] / _FACT[:, None],
                               R[:, dd, 2, q:] / _FACT[q:, None]], axis=1)        # (N, 2 q2 + 2, d)
        full = (Zs @ np.swapaxes(maps, 1, 2)).reshape(N, k, 2, 2 * q2 + 2)
        y, u = full[..., :q2], full[:, :, 0, q2:2 * q2]
        coef[:, ks, :2] = y[..., :q]
        coef[:, ks, 2] = u[..., :q]
        cut = np.maximum((np.abs(y[..., q]) + np.abs(y[..., q + 1])).max(axis=(1, 2)),
                         (np.abs(u[..., q]) + np.abs(u[..., q + 1])).max(axis=1))
        vt = np.abs(full[:, :, 1, 2 * q2:]).sum(axis=2).max(axis=1)                 # v's cut-off, load case
        tail = np.maximum(tail, np.maximum(cut, vt))
        scale = np.maximum(scale, np.maximum(np.abs(y[..., 0]).max(axis=(1, 2)), np.abs(u[..., 0]).max(axis=1)))
    return coef, tail / np.maximum(scale, 1e-300), hd[np.arange(N)[:, None], kpos[None, :]]


class _FastModes:
    """Taylor coefficients on the uniform steps of a graded pattern without rounding blow-up.

    A fast open-loop pole p on a step with |p| h >> 1 enters the i-th Taylor coefficient
    as (p h)^i / i!: computed through M^i, rounding noise in its modal coordinate would be
    amplified by up to ~1e10 every dead time. step_pattern ends the graded steps only once
    every such mode has decayed by e^(-CLEAN_DECAYS) since the last multiple of the dead
    time, so on the uniform steps its modal coordinate xi is the polynomial particular
    solution of xi' = mu xi + beta s for the step's input s(sigma) = sum a_j sigma^j/j!
    (mu = p h, beta = (w . b) h): xi^(i)(0) = -beta sum_j a_(i+j) / mu^(j+1). The outputs'
    Taylor coefficients are then those of the slow part (the state projected off the fast
    modes, the input column projected likewise: M^i then never meets mu) plus c v_f xi^(i).
    All of it is one linear map of [X; a] per output (``R``, (N, 3, q+2, d), in place of
    rows @ M^i). The propagation X_(k+1) = Phi X_k + Gamma a_k is untouched (exact)."""

    def __init__(self, M, S, rows_phys, h, n):
        q = M.shape[-1] - n
        Mp = S[:, :, None] * M / S[:, None, :]                        # physical coordinates
        A = Mp[:, :n, :n] / h[:, None, None]
        lam, Vr = np.linalg.eig(A)
        laml, Wl = np.linalg.eig(np.swapaxes(A, 1, 2))
        fastm = np.abs(lam) * h[:, None] > RHO
        F = int(fastm.sum(axis=1).max(initial=0))
        self.any = F > 0
        if not self.any:
            return
        order = np.argsort(-np.abs(lam), axis=1)[:, :F]
        lf = np.take_along_axis(lam, order, axis=1)                   # (N, F)
        vf = np.take_along_axis(Vr, order[:, None, :], axis=2)        # (N, n, F)
        match = np.argmin(np.abs(laml[:, None, :] - lf[:, :, None]), axis=2)
        wf = np.take_along_axis(np.swapaxes(Wl, 1, 2), match[:, :, None], axis=1)   # (N, F, n)
        with np.errstate(all="ignore"):
            wf = wf / np.einsum("nfd,ndf->nf", wf, vf)[:, :, None]
        use = (np.abs(lf) * h[:, None] > RHO) & np.isfinite(wf).all(axis=2)
        wf = np.where(use[:, :, None], wf, 0.0)
        vf = np.where(use[:, None, :], vf, 0.0)
        self.Pf = np.einsum("ndf,nfe->nde", vf, wf).real              # spectral projector on the fast modes
        Ms = Mp.copy()              # slow part: fast eigenvalues and input directions projected out
        Ms[:, :n, :n] = Mp[:, :n, :n] - Mp[:, :n, :n] @ self.Pf
        Ms[:, :n, n:] = Mp[:, :n, n:] - self.Pf @ Mp[:, :n, n:]
        Rs = _taylor_maps(Ms, rows_phys, q + 2)                       # (N, 3, q+2, d): slow part
        mu = np.where(use, lf * h[:, None], 1.0)
        beta = np.einsum("nfd,nd->nf", wf, Mp[:, :n, n])              # (N, F): (w . b) h
        # xi^(i) = -beta sum_j a_(i+j) / mu^(j+1): T[i, k] = mu^-(k-i+1) for k >= i (0 beyond the degree)
        i, k = np.arange(q + 2)[:, None], np.arange(q)[None, :]
        with np.errstate(all="ignore"):
            T = np.where(k >= i, (1.0 / mu)[..., None, None] ** np.maximum(k - i + 1, 0), 0.0)   # (N, F, q+2, q)
        T = np.where(use[..., None, None], T, 0.0)
        cv = np.einsum("nrd,ndf->nrf", rows_phys[:, :, :n], vf)      # (N, 3, F)
        fmap = -np.einsum("nrf,nf,nfik->nrik", cv, beta, T).real     # (N, 3, q+2, q)
        # one linear map of [X; a] per output, like rows @ M^i: slow part of X, input part, forced fast part
        self.R = np.concatenate([Rs[..., :n] - Rs[..., :n] @ self.Pf[:, None], Rs[..., n:] + fmap], axis=-1)


def _scan_powers(Phi):
    """Products of consecutive step matrices for the scan over one dead time: a list of
    (dlt, P) with P[:, j] = Phi_j ... Phi_(j-dlt+1) (dlt = 1, 2, 4, ...; valid for j >= dlt - 1),
    and the prefixes Phi_j ... Phi_0 (N, L, n, n)."""
    L = Phi.shape[1]
    pw = []
    P_ = Phi
    dlt = 1
    pref = Phi.copy()
    while dlt < L:
        pw.append((dlt, P_))
        nxt = pref.copy()
        nxt[:, dlt:] = P_[:, dlt:] @ pref[:, :L - dlt]
        pref = nxt
        if 2 * dlt < L:
            Q = P_.copy()
            Q[:, dlt:] = P_[:, dlt:] @ P_[:, :L - dlt]
            P_ = Q
        dlt *= 2
    return pw, pref


def _open_loop_poles(pden, cden):
    """Open-loop poles of plant and controller, (N, n) complex (0 where absent): the exponents
    of the loop's solution on each step."""
    pp = np.roots(np.trim_zeros(np.asarray(pden, float), "f")) if np.count_nonzero(pden) > 1 else np.zeros(0)
    cp = batch_roots(cden)
    cp = np.where(np.isnan(cp), 0.0, cp)
    return np.concatenate([np.broadcast_to(pp.astype(complex), (cden.shape[0], pp.size)), cp], axis=1)


def step_pattern(pden, cden, theta, level):
    """The steps of one dead time, shared by every dead time: (hd (N, Dmax), G (N,), L (N,)).

    Uniform rows: L = m steps of theta/m, m a power of 2 with h |pole| <= RHO for every
    open-loop pole and at least MIN_STEPS (G = 0). A stable pole with |p| theta > FAST_THETA
    (e.g. a derivative filter) would need many more steps, but only at the start of each
    dead time, where the delayed input's jumps excite its mode: there the steps are graded,
    growing so that e^(-|p| tau) (|p| h)^(P+1)/(P+1)! stays at the level of RHO^(P+1)/(P+1)!
    (its transient has decayed by e^(-|p| tau) after tau) with |p| h <= GRADED_MU, until
    every fast mode has decayed by e^(-CLEAN_DECAYS); the rest of the dead time is uniform
    at the step the other poles need (:class:`_FastModes` keeps the fast modes out of its
    Taylor maps). ``level`` halves every step that many times (rows whose cut-off estimate
    failed)."""
    N = cden.shape[0]
    poles = _open_loop_poles(pden, cden)
    lam = np.abs(poles)                                             # (N, n)
    fast = (lam * theta > FAST_THETA) & (poles.real < 0)
    scale = 2.0 ** np.asarray(level, float)
    rho = RHO / scale
    slow = np.where(fast, 0.0, lam).max(axis=1, initial=0.0)
    m = np.maximum(MIN_STEPS, np.ceil(theta * slow / RHO))
    m = (2 ** np.ceil(np.log2(m))).astype(int) * scale.astype(int)
    graded = fast.any(axis=1)
    H = theta / m
    steps = []
    tau = np.zeros(N)
    going = graded.copy()
    for _ in range(MAX_GRADED):
        if not going.any():
            break
        with np.errstate(over="ignore", divide="ignore"):
            allowed = np.where(lam > 0, rho[:, None] * np.exp(np.minimum(lam * tau[:, None], 700.0) / (DEGREE + 1)) / lam, np.inf)
        allowed = np.minimum(allowed, GRADED_MU / scale[:, None] / np.where(lam > 0, lam, 1.0))
        h = np.minimum(allowed.min(axis=1), H)
        decayed = np.all(~fast | (lam * tau[:, None] >= CLEAN_DECAYS), axis=1)
        going &= ~decayed
        h = np.where(going, h, 0.0)
        steps.append(h)
        tau += h
    hs = np.stack(steps, axis=1) if steps else np.zeros((N, 0))
    G = (hs > 0).sum(axis=1)
    rest = theta - hs.sum(axis=1)
    n_u = np.where(graded, np.ceil(rest / H - 1e-9), m).astype(int)
    hu = np.where(graded, rest / np.maximum(n_u, 1), H)
    width = int(G.max(initial=0)) + 1
    hd = np.zeros((N, width))
    hd[:, :width - 1] = hs[:, :width - 1]
    hd[np.arange(N), G] = hu
    return hd, G, G + n_u


def finals(pnum, pden, cnum, cden):
    """Final values (N, 3) of the three responses: the loop at s = 0, where e^(-theta s) = 1."""
    np0, dp0 = float(np.atleast_1d(pnum)[-1]), float(np.atleast_1d(pden)[-1])
    nc0, dc0 = cnum[:, -1], cden[:, -1]
    delta = dp0 * dc0 + np0 * nc0
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.stack([np0 * nc0 / delta, np0 * dc0 / delta, nc0 * dp0 / delta], axis=1)


def _march(pnum, pden, cnum, cden, theta, periods):
    """Method of steps for N rows over ``periods`` dead times each (at most MAX_INTERVALS
    steps); rows whose cut-off estimate exceeds TRUNCATION_TOL are rerun with every step
    halved. Returns (coef list (K_i, 3, P+1), step lengths list (K_i,), steps per dead time
    (N,), truncation (N,))."""
    N = cnum.shape[0]
    level = np.zeros(N, int)
    deg = cden.shape[1] - 1 - np.argmax(cden != 0, axis=1)
    coefs: list = [None] * N
    hs: list = [None] * N
    per = np.zeros(N, int)
    trunc = np.full(N, np.inf)
    todo = np.arange(N)
    for attempt in range(MAX_REFINE + 1):
        if todo.size == 0:
            break
        hd, G, L = step_pattern(pden, cden[todo], theta, level[todo])
        K = np.minimum(np.ceil(periods[todo] * L), MAX_INTERVALS).astype(int)
        key = np.stack([G, L, np.ceil(np.log2(K)).astype(int), deg[todo]], axis=1)
        keys, inv = np.unique(key, axis=0, return_inverse=True)
        for g in range(keys.shape[0]):
            members = np.flatnonzero(inv.ravel() == g)
            Kg = int(K[members].max())
            Gg, Lg, dg = int(keys[g, 0]), int(keys[g, 1]), int(keys[g, 3])
            # at most SIM_CHUNK steps x rows at a time: arrays of a few MB, reused by the allocator
            for here in np.array_split(members, -(-members.size * Kg // SIM_CHUNK)):
                sel = todo[here]
                cd = cden[sel][:, cden.shape[1] - 1 - dg:]
                cn = cnum[sel][:, -(dg + 1):] if cnum.shape[1] >= dg + 1 else cnum[sel]
                if np.any(cnum[sel][:, :max(cnum.shape[1] - dg - 1, 0)] != 0):
                    raise ValueError("improper controller: numerator degree above the denominator's")
                c, tr, hk = _simulate_group(pnum, pden, cn, cd, hd[here][:, :Gg + 1], Gg, Lg, Kg)
                for j, i in enumerate(sel):
                    coefs[i], hs[i] = c[j], hk[j]
                trunc[sel], per[sel] = tr, Lg
        bad = todo[trunc[todo] > TRUNCATION_TOL]
        if attempt < MAX_REFINE:
            level[bad] += 1
        todo = bad
    return coefs, hs, per, trunc


@dataclass
class Pieces:
    """Piecewise-polynomial responses of N loops: row i has steps starting at t0[i] (K_i,)
    of lengths h[i] (K_i,), with coef[i] (K_i, 3, P+1) in local time sigma in [0, 1], held as
    ``coef_parts[i]``, the list of its pieces in time order (method of steps, residue tail):
    the metrics join many rows' parts in one copy instead of joining each row first."""
    coef_parts: list
    h: list
    t0: list
    m: np.ndarray              # steps per dead time of the method of steps
    truncation: np.ndarray     # largest cut-off estimate, relative to the signal's peak
    tail: np.ndarray           # True where the residue tail took over after the head
    rest: np.ndarray           # (N, 2, 3) bounds on sup |y - y(inf)| and its integral after the last
                               # step (0: the horizon was reached; inf: cut, no bound)

    @property
    def coef(self) -> list:
        return [p[0] if len(p) == 1 else np.concatenate(p) for p in self.coef_parts]


def _starts_of(h: np.ndarray) -> np.ndarray:
    return np.concatenate([[0.0], np.cumsum(h)[:-1]])


def piecewise(pnum, pden, cnum, cden, theta: float, decay: np.ndarray,
              starts: np.ndarray | None = None) -> Pieces:
    """Piecewise-polynomial responses of N stable loops over 20 decays of their slowest mode.

    The method of steps runs for HEAD_DELAYS dead times at least (HEAD_STEPS steps); where
    the horizon is longer and ``starts`` (e.g. the Padé closed-loop poles) are given, the
    rest is the residue expansion over the loop roots found by Newton (:func:`_tail`), kept
    only where it matches the head's last dead time to TAIL_TOL; elsewhere the method of
    steps runs to the horizon (capped at MAX_INTERVALS steps)."""
    pnum, pden = np.atleast_1d(np.asarray(pnum, float)), np.atleast_1d(np.asarray(pden, float))
    cnum, cden = np.atleast_2d(np.asarray(cnum, float)), np.atleast_2d(np.asarray(cden, float))
    N = cnum.shape[0]
    _, _, L0 = step_pattern(pden, cden, theta, np.zeros(N, int))
    horizon = np.maximum(HORIZON_DECAYS / np.maximum(decay, 1e-300), 4 * theta)
    full = horizon / theta                                    # horizon in dead times
    head = np.maximum(np.ceil(HEAD_STEPS / L0), HEAD_DELAYS)
    use_tail = (full > head) if starts is not None else np.zeros(N, bool)
    coefs, h_list, m, trunc = _march(pnum, pden, cnum, cden, theta, np.where(use_tail, head, full))
    coefs = [[c] for c in coefs]
    t_list = [_starts_of(h) for h in h_list]
    tail_ok = np.zeros(N, bool)
    rest = np.zeros((N, 2, 3))
    idx = np.flatnonzero(use_tail)
    for attempt in range(TAIL_RETRIES + 1):
        if idx.size == 0:
            break
        ok, tc, th, tt, rb = _tail(pnum, pden, cnum[idx], cden[idx], theta, np.asarray(starts)[idx],
                                   [coefs[i][0] for i in idx], [h_list[i] for i in idx], m[idx], horizon[idx],
                                   chain=attempt > 0)
        for j, i in enumerate(idx):
            if ok[j]:
                coefs[i] = [coefs[i][0], tc[j]]
                h_list[i] = np.concatenate([h_list[i], th[j]])
                t_list[i] = np.concatenate([t_list[i], tt[j]])
                rest[i] = rb[j]
        tail_ok[idx] = ok
        fail = idx[~ok]
        head[fail] *= 2 if attempt == 0 else 4    # terms not in the expansion may still be alive: a longer head
        last = attempt == TAIL_RETRIES
        redo = fail[(head[fail] >= full[fail]) | last]
        idx = fail[(head[fail] < full[fail]) & (not last)]
        for rows, periods in ((redo, full), (idx, head)):   # no trustworthy tail yet: steps to the horizon / a longer head
            if rows.size:
                c2, h2, m2, tr2 = _march(pnum, pden, cnum[rows], cden[rows], theta, periods[rows])
                for j, i in enumerate(rows):
                    coefs[i], h_list[i], t_list[i] = [c2[j]], h2[j], _starts_of(h2[j])
                m[rows], trunc[rows] = m2, tr2
    # method of steps cut at MAX_INTERVALS before the horizon: no bound on the rest
    capped = np.array([h.size >= MAX_INTERVALS and t[-1] + h[-1] < hz for t, h, hz in zip(t_list, h_list, horizon)])
    short = ~tail_ok & capped
    rest[short] = np.inf
    return Pieces(coefs, h_list, t_list, m, trunc, tail_ok, rest)


def _residues(pnum, pden, cnum, cden, theta, roots):
    """Residues (N, 3, R) of the three step responses' transforms F(s)/(s Delta(s)) at the
    loop roots (simple roots assumed): reference->y Np Nc e^(-theta s), load->y Np Dc
    e^(-theta s), reference->u Nc Dp. Far in the left half-plane e^(-theta s) overflows;
    there it is taken from the root condition itself, e^(-theta s) = -A(s)/B(s)."""
    from .delay import polyval_and_derivative, split      # local: delay imports nothing from here
    a, b = split(pnum, pden, cnum, cden)
    s = np.where(np.isnan(roots), 0.0, roots)
    with np.errstate(all="ignore"):
        av, ad = polyval_and_derivative(a, s)
        bv, bd = polyval_and_derivative(b, s)
        e = np.where(-theta * s.real > 30.0, -av / bv, np.exp(-theta * np.where(-theta * s.real > 30.0, 0.0, s)))
        dd = ad + (bd - theta * bv) * e
        nums = (bv * e, batch_polyval(batch_conv(cden, pnum[None, :]), s) * e,
                batch_polyval(batch_conv(cnum, pden[None, :]), s))
        res = np.stack([f / (s * dd) for f in nums], axis=1)
    return np.where(np.isnan(roots)[:, None, :], 0.0, res)


def _tail(pnum, pden, cnum, cden, theta, starts, head, head_h, m, horizon, chain=False):
    """Residue expansion of the responses after the head: y(t) = y(inf) + sum_k r_k e^(s_k t)
    over the loop roots s_k (Newton on Delta from ``starts``). Past the head every input is
    constant, so the difference between the true response and this finite sum solves the
    homogeneous loop equation: it is checked on the head's whole last dead time (every
    sub-sample of the three responses, relative to the head's peak) and the tail is used
    only where it stays below TAIL_TOL there; a stable loop then keeps it of that order.

    The tail's steps shrink the roots' exponents like the head's (h |s_k| <= 2 RHO about the
    midpoint for a term of the peak's size, up to GRADED_MU as it decays: the same cut-off
    level for every term) and grow as fast terms die out.
    Returns (ok (N,), coef list, h list, t0 list) for the tail steps."""
    from .delay import dedupe_roots, chain_starts, newton_roots, split
    N = cnum.shape[0]
    a, b = split(pnum, pden, cnum, cden)
    if chain:      # a retry: the first roots of the chains too (slow chains when theta is long)
        starts = np.concatenate([starts, chain_starts(a, b, theta, np.full(N, CHAIN_ROOTS * np.pi / theta),
                                                      CHAIN_ROOTS)], axis=1)
    roots = newton_roots(a, b, theta, starts)
    # real loop: the roots come in conjugate pairs with conjugate residues, so the upper
    # half-plane ones (a root found only as its conjugate mapped there) carry twice the real
    # part of their term and the lower ones are not needed
    roots = dedupe_roots(np.where(roots.imag < 0, np.conj(roots), roots))
    twice = np.where(roots.imag > 0, 2.0, 1.0)
    res = _residues(pnum, pden, cnum, cden, theta, roots) * twice[:, None, :]   # (N, 3, R)
    fin = finals(pnum, pden, cnum, cden)                            # (N, 3)
    s = np.where(np.isnan(roots), 0.0, roots)
    T = np.array([hk.sum() for hk in head_h])
    # head's last dead time, every sub-sample, against the expansion: only the real steps of
    # each row (E in all, row-major); e^(s t) at the S+1 sub-samples of a step are the powers
    # of e^(s h/S) times its value at the step's start (two exponentials per step and root)
    take = np.array([min(mi, c.shape[0]) for c, mi in zip(head, m)])
    last = np.concatenate([c[-k:] for c, k in zip(head, take)])                    # (E, 3, P+1)
    hl = np.concatenate([hk[-k:] for hk, k in zip(head_h, take)])                  # (E,)
    t_start = np.concatenate([t - np.cumsum(hk[:-k - 1:-1])[::-1] for t, hk, k in zip(T, head_h, take)])
    row = np.repeat(np.arange(N), take)
    first = np.cumsum(take) - take
    hv = last @ _V0.T                                             # (E, 3, S+1)
    with np.errstate(all="ignore"):
        sr = s[row]
        e0 = np.exp(sr * t_start[:, None])                        # (E, R)
        q = np.exp(sr * (hl / SUBSAMPLES)[:, None])
        ex = np.empty((SUBSAMPLES + 1,) + e0.shape, complex)
        ex[0] = e0
        for j in range(1, SUBSAMPLES + 1):
            ex[j] = ex[j - 1] * q
        tv = fin[row][:, :, None] + np.einsum("eor,jer->eoj", res[row], ex).real
        err_e = np.abs(hv - tv).max(axis=2)                       # (E, 3)
    err = np.maximum.reduceat(err_e, first, axis=0)               # (N, 3)
    peak3 = np.stack([np.abs(c[..., 0]).max(axis=0) for c in head])                    # (N, 3)
    peak = peak3.max(axis=1)
    ok = np.all(err <= TAIL_TOL * np.maximum(peak3, 1e-12 * peak[:, None]), axis=1)
    ok &= np.isfinite(err).all(axis=1) & np.all(np.isfinite(res), axis=(1, 2)) & (peak > 0)
    # the tail grid, segment by segment for all live rows at once
    amp = np.abs(res).max(axis=1) / np.maximum(peak, 1e-300)[:, None]                  # (N, R)
    # roots ordered by the size of their term where the tail starts, so that the live ones
    # come first and each chunk below works on a prefix of the columns only
    with np.errstate(all="ignore"):
        size = np.where(np.isnan(roots), -np.inf, np.log(amp) + s.real * T[:, None])
    by = np.argsort(-size, axis=1, kind="stable")
    roots, s, amp = (np.take_along_axis(x, by, axis=1) for x in (roots, s, amp))
    res = np.take_along_axis(res, by[:, None, :], axis=2)
    t = T.astype(float).copy()
    seg_rows, seg_t, seg_h, seg_n, seg_alive = [], [], [], [], []
    total = np.zeros(N, int)
    live = np.flatnonzero(ok)
    while live.size:
        with np.errstate(all="ignore"):
            level = amp[live] * np.exp(s[live].real * t[live, None])         # each term now, rel. to peak
            alive = (level > ALIVE_TOL) & ~np.isnan(roots[live])
            # h |s_k| at most 2 RHO for a term of the peak's size, larger for smaller terms so that
            # every term's cut-off level (h |s_k| / 2)^(P+1)/(P+1)! x level stays at RHO^(P+1)/(P+1)!
            reach = np.minimum(2 * RHO * np.maximum(level, 1e-300) ** (-1.0 / (DEGREE + 1)), GRADED_MU)
            H = np.where(alive, reach / np.abs(s[live]), np.inf).min(axis=1)
        count = np.maximum(TAIL_STEPS, total[live] // 4)          # segments grow: few passes
        H = np.where(np.isfinite(H), H, (horizon[live] - t[live]) / count)
        H = np.maximum(H, 1e-300)
        count = np.minimum(count, np.maximum(np.ceil((horizon[live] - t[live]) / H), 1)).astype(int)
        seg_rows.append(live)
        seg_t.append(t[live])
        seg_h.append(H)
        seg_n.append(count)
        seg_alive.append(alive)
        total[live] += count
        t[live] += count * H
        live = live[(t[live] < horizon[live]) & (total[live] < MAX_INTERVALS)]
    rest = _rest_bounds(res, s, t, horizon)
    if not seg_rows:
        return ok, [None] * N, [None] * N, [None] * N, rest
    # one entry per tail step: (row, start, length, live roots), ordered by row then time
    n_s = np.concatenate(seg_n)
    rows_e = np.repeat(np.concatenate(seg_rows), n_s)
    h_e = np.repeat(np.concatenate(seg_h), n_s)
    first = np.repeat(np.cumsum(n_s) - n_s, n_s)
    t_e = np.repeat(np.concatenate(seg_t), n_s) + h_e * (np.arange(n_s.sum()) - first)
    al_e = np.repeat(np.concatenate(seg_alive), n_s, axis=0)
    order = np.argsort(rows_e, kind="stable")    # each segment pass is in row order, passes in time order
    rows_e, h_e, t_e, al_e = rows_e[order], h_e[order], t_e[order], al_e[order]
    P = DEGREE
    coef = np.empty((rows_e.size, 3, P + 1))
    with np.errstate(all="ignore"):
        for c0 in range(0, rows_e.size, TAIL_CHUNK):        # chunks of steps: arrays stay in cache
            c = slice(c0, c0 + TAIL_CHUNK)
            live_c = al_e[c]
            k = int(np.flatnonzero(live_c.any(axis=0)).max(initial=-1)) + 1     # live prefix
            se = s[rows_e[c], :k]                                       # (E, k)
            # Taylor coefficient i about the step's midpoint: sum_r r_r e^(s_r t_mid) (s_r h)^i / i!,
            # all i in one product, then in powers of sigma (_FROM_MID)
            w = np.empty((P + 1,) + se.shape, complex)
            w[0] = np.where(live_c[:, :k], np.exp(se * (t_e[c] + 0.5 * h_e[c])[:, None]), 0.0)
            sh = se * h_e[c, None]
            for i in range(1, P + 1):
                w[i] = w[i - 1] * sh
            coef[c] = (res[rows_e[c], :, :k] @ w.transpose(1, 2, 0)).real @ _FROM_MID_F
    coef[..., 0] += fin[rows_e]
    cuts = np.searchsorted(rows_e, np.arange(N + 1))
    cl = [coef[cuts[i]:cuts[i + 1]] for i in range(N)]
    hl = [h_e[cuts[i]:cuts[i + 1]] for i in range(N)]
    tl = [t_e[cuts[i]:cuts[i + 1]] for i in range(N)]
    return ok, cl, hl, tl, rest


def _rest_bounds(res, s, t_end, horizon):
    """Bounds on what the residue expansion leaves after ``t_end`` where the steps stopped
    short of the horizon (MAX_INTERVALS): sup |y - y(inf)| <= sum_k |r_k| e^(Re s_k t_end) and
    its integral <= sum_k |r_k| e^(Re s_k t_end)/|Re s_k|, per response (N, 2, 3); zero where
    the steps reached the horizon."""
    with np.errstate(all="ignore"):
        lvl = np.abs(res) * np.exp(s.real[:, None, :] * t_end[:, None, None])            # (N, 3, R)
        lvl = np.where(res == 0, 0.0, lvl)
        sup = lvl.sum(axis=-1)
        integ = (lvl / np.maximum(-s.real, 1e-300)[:, None, :]).sum(axis=-1)
    reached = (t_end >= horizon * (1 - 1e-12))[:, None]
    return np.stack([np.where(reached, 0.0, sup), np.where(reached, 0.0, integ)], axis=1)


# ------------------------------------------------------------------ polynomial helpers
def _vander(sig: np.ndarray, deg: int = DEGREE) -> np.ndarray:
    return sig[:, None] ** np.arange(deg + 1)[None, :]


def _horner(c: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Values of power-basis polynomials c (..., P+1) at s (...)."""
    v = c[..., -1]
    for i in range(c.shape[-1] - 2, -1, -1):
        v = v * s + c[..., i]
    return v


def _deriv(c: np.ndarray) -> np.ndarray:
    return c[..., 1:] * np.arange(1, c.shape[-1])


def _antideriv(c: np.ndarray) -> np.ndarray:
    z = np.zeros(c.shape[:-1] + (1,))
    return np.concatenate([z, c / np.arange(1, c.shape[-1] + 1)], axis=-1)


_SIG = np.linspace(0.0, 1.0, SUBSAMPLES + 1)
_V0 = _vander(_SIG)
_V1 = _vander(_SIG, DEGREE - 1)
_V2 = _vander(_SIG, DEGREE + 1)
# linear maps of the power-basis coefficients (P+1,): values, d/dsigma at the sub-samples and
# the integral over each sub-interval, each one matrix product of the coefficients
_DV1 = _deriv(np.eye(DEGREE + 1)) @ _V1.T                    # (P+1, S+1)
_IV2 = np.diff(_antideriv(np.eye(DEGREE + 1)) @ _V2.T, axis=-1)  # (P+1, S)


class _Piecewise:
    """One response of N loops as piecewise polynomials, the steps of all rows one after
    another (row i owns steps start[i]:start[i+1], in time order).

    Arrays over the steps are held step-last: coefficients (P+1, E), sub-sample values and
    d/dsigma (S+1, E), crests (S, E). Each sub-sample's slice is then contiguous, so the
    element-wise passes run at memory speed, and no row is padded to another's length."""

    def __init__(self, coef: np.ndarray, h: np.ndarray, t0: np.ndarray, row: np.ndarray, start: np.ndarray):
        self.c = coef                                   # (P+1, E) power basis in local time sigma
        self.h = h                                      # (E,) step lengths, s
        self.t0 = t0                                    # (E,) step starts, s
        self.row = row                                  # (E,) the row of each step
        self.start = start                              # (N+1,) first step of each row, then E
        self.v = _V0 @ coef                             # (S+1, E) exact sub-samples
        self.d = _DV1.T @ coef                          # d/dsigma there
        self._cache: dict = {}
        self._range = None

    def at(self, e, s):
        """Values at local point s of steps e."""
        return _horner(self.c.T[e], s)

    def time(self, e, s):
        """Time (s) of local point s of steps e."""
        return self.t0[e] + s * self.h[e]

    def crests(self, sign: float):
        """Cubic crests of sign*y per sub-interval (sign +1 or -1), computed on first use:
        (value (S, E), interior (S, E) bool: a stationary point, where the value is an
        estimate, elsewhere an exact sample; the crest's place in the sub-interval, read only
        where interior). The cubic is solved only where the derivative falls from + to -."""
        sign = float(sign)
        if sign not in self._cache:
            v, d = self.v, self.d
            if sign > 0:
                best = np.maximum(v[:-1], v[1:])
                inner = (d[:-1] > 0) & (d[1:] < 0)
            else:
                best = np.minimum(v[:-1], v[1:])
                np.negative(best, out=best)
                inner = (d[:-1] < 0) & (d[1:] > 0)
            tloc = np.empty(best.shape)
            idx = np.nonzero(inner)
            if idx[0].size:
                i1 = (idx[0] + 1, idx[1])
                sub = sign / SUBSAMPLES
                t, val = hermite_crest(sign * v[idx], sign * v[i1], d[idx] * sub, d[i1] * sub)
                best[idx] = np.maximum(best[idx], val)
                tloc[idx] = t
            self._cache[sign] = (best, inner, tloc)
        return self._cache[sign]

    def loc(self, sign, j, e):
        """Place in [0, 1] of sub-interval j's crest of sign*y in steps e (the larger sample's
        end where the crest is not interior); sign per entry or a scalar."""
        sign = np.broadcast_to(np.asarray(sign, float), j.shape)
        out = np.zeros(j.shape)
        for sg in np.unique(sign):
            m = sign == sg
            _, inner, tloc = self.crests(sg)
            jm, em = j[m], e[m]
            end = (sg * self.v[jm + 1, em] > sg * self.v[jm, em]).astype(float)
            out[m] = np.where(inner[jm, em], tloc[jm, em], end)
        return out

    def signed_crests(self, sign):
        """Crest values of sign*y, (S, E), for a sign per row (N,) or a scalar."""
        sign = np.asarray(sign, float)
        if sign.ndim and np.all(sign == sign.flat[0]):
            sign = sign.flat[0]
        if sign.ndim == 0:
            return self.crests(sign)[0]
        return np.where(sign[self.row] > 0, self.crests(1.0)[0], self.crests(-1.0)[0])

    def per_row(self, ufunc, x):
        """ufunc reduced over each row's steps: x (E,) -> (N,)."""
        return ufunc.reduceat(x, self.start[:-1])

    def first_last(self, hit, last=False):
        """First (or last) step of each row where ``hit`` (E,) holds: (step (N,), any (N,));
        rows without one get their first step."""
        step = np.arange(hit.size)
        if last:
            e = self.per_row(np.maximum, np.where(hit, step, -1))
        else:
            e = self.per_row(np.minimum, np.where(hit, step, hit.size))
        found = (e >= self.start[:-1]) & (e < self.start[1:])
        return np.where(found, e, self.start[:-1]), found

    def sample_range(self):
        """(max, min) over the horizon of the exact sub-samples, per row (computed once)."""
        if self._range is None:
            self._range = (self.per_row(np.maximum, self.v.max(axis=0)),
                           self.per_row(np.minimum, self.v.min(axis=0)))
        return self._range

    def sup(self, sign):
        """sup over the horizon of sign*y (sign (N,)): the largest exact sub-sample, and the
        PEAK_INTERVALS highest interior crests at or above it (less a slack for the cubic's
        error) refined by Newton on the exact polynomial inside their sub-interval."""
        N = self.start.size - 1
        sign = np.broadcast_to(np.asarray(sign, float), (N,))
        hi, lo = self.sample_range()
        best = np.where(sign > 0, hi, -lo)
        floor = best - CREST_SLACK * np.maximum(np.abs(hi), np.abs(lo))
        found = []
        for sg in np.unique(sign):
            val, inner, _ = self.crests(sg)
            bar = np.where(sign == sg, floor, np.inf)[self.row]
            j, e = np.nonzero(inner & (val >= bar))
            found.append((j, e, val[j, e]))
        j, e, cv = (np.concatenate(a) for a in zip(*found))
        if e.size == 0:
            return best
        r = self.row[e]
        keep = highest_per_row(r, cv, PEAK_INTERVALS)
        j, e, r = j[keep], e[keep], r[keep]
        sg = sign[r]
        lo_s, hi_s = j / SUBSAMPLES, (j + 1) / SUBSAMPLES
        s = lo_s + self.loc(sg, j, e) / SUBSAMPLES
        c = self.c.T[e]
        dc = _deriv(c)
        ddc = _deriv(dc)
        for _ in range(6):
            g, gg = sg * _horner(dc, s), sg * _horner(ddc, s)
            with np.errstate(invalid="ignore", divide="ignore"):
                step = np.where(gg < 0, g / gg, 0.0)
            s = np.clip(s - np.nan_to_num(step), lo_s, hi_s)
        np.maximum.at(best, r, sg * _horner(c, s))
        return best

    def sign_change(self, e, lo, hi, fn):
        """Point in [lo, hi] (sigma of steps e) where fn(i, value) changes sign (i: the entries
        asked for); hi where it has one sign at both ends."""
        return _sign_change(self.c.T[e], lo, hi, fn)

    def abs_integral(self):
        """Integral of |y| over the horizon, per row (y units x seconds): exact where y keeps
        its sign in a sub-interval (crest test); where it changes sign, the sub-interval is
        split at its extremum and at the roots (bracketed Illinois steps)."""
        ints = (_IV2.T @ self.c) * self.h                 # (S, E): exact integral of each sub-interval
        S = ints.shape[0]
        N = self.start.size - 1
        change = (self.crests(1.0)[0] > 0) & (self.crests(-1.0)[0] > 0)     # both signs inside
        whole = np.abs(ints)
        whole[change] = 0.0
        total = self.per_row(np.add, whole.sum(axis=0))
        j_i, e_i = np.nonzero(change)
        if e_i.size:
            c = self.c.T[e_i]
            Fc = _antideriv(c)
            a, b = j_i / S, (j_i + 1) / S
            # extremum: the one whose crest pokes across zero
            ext = np.where(self.v[j_i, e_i] > 0, self.loc(-1.0, j_i, e_i), self.loc(1.0, j_i, e_i))
            e = np.clip(a + ext / S, a, b)
            pts = [a]
            for u, w in ((a, e), (e, b)):
                fu, fw = _horner(c, u), _horner(c, w)
                r = np.where(np.sign(fu) != np.sign(fw), _sign_change(c, u, w), w)
                pts += [r, w]
            F = [_horner(Fc, p) for p in pts]
            part = sum(np.abs(F[i + 1] - F[i]) for i in range(len(F) - 1))
            total = total + np.bincount(self.row[e_i], part * self.h[e_i], minlength=N)
        return total


def _sign_change(c, lo, hi, fn=None):
    """Sign change of fn(i, y) (default y itself) of polynomials c (n, P+1) in local time
    [lo, hi], by bracketed Illinois steps (:func:`synth.evaluate.bracket.illinois_root`) to
    SIGMA_TOL; hi where fn has one sign at both ends."""
    lo, hi = np.broadcast_to(lo, (c.shape[0],)).astype(float), np.broadcast_to(hi, (c.shape[0],)).astype(float)
    if fn is None:
        def fn(i, y):
            return y
    every = np.arange(c.shape[0])
    flo, fhi = fn(every, _horner(c, lo)), fn(every, _horner(c, hi))
    s = illinois_root(lambda i, x: fn(i, _horner(c[i], x)), lo, hi, flo, fhi, SIGMA_TOL)
    return np.where(np.sign(flo) == np.sign(fhi), hi, s)


# ------------------------------------------------------------------ metrics
def _last_exit(pw: _Piecewise, final, band):
    """Last time |y - final| leaves the band (settling); inf if outside at the horizon."""
    S = SUBSAMPLES
    up, dn = pw.crests(1.0)[0], pw.crests(-1.0)[0]
    f = final[pw.row]
    out = np.maximum(up - f, dn + f) > band[pw.row]
    e, any_out = pw.first_last(out.any(axis=0), last=True)
    js = S - 1 - np.argmax(out[::-1, e], axis=0)
    above = up[js, e] - final >= dn[js, e] + final
    ext = np.where(above, pw.loc(1.0, js, e), pw.loc(-1.0, js, e))
    lo = js / S + ext / S
    hi = (js + 1) / S
    e_end = np.abs(pw.at(e, hi) - final)
    s = pw.sign_change(e, lo, hi, lambda i, v: np.abs(v - final[i]) - band[i])
    s = np.where(e_end > band, hi, s)              # a jump at the step's end leaves the band there
    t = pw.time(e, s)
    at_end = (e == pw.start[1:] - 1) & (js == S - 1) & (e_end > band)
    return np.where(~any_out, 0.0, np.where(at_end, np.inf, t))


def _first_reach(pw: _Piecewise, level, sign):
    """First time sign*y reaches ``level`` (inf if never)."""
    S = SUBSAMPLES
    above = pw.signed_crests(sign) >= level[pw.row]
    e, hit = pw.first_last(above.any(axis=0))
    js = np.argmax(above[:, e], axis=0)
    lo = js / S
    hi_end = (js + 1) / S
    end_ok = sign * pw.at(e, hi_end) >= level
    hi = np.where(end_ok, hi_end, lo + pw.loc(sign, js, e) / S)
    start_ok = sign * pw.at(e, lo) >= level
    sg = np.broadcast_to(sign, level.shape)
    s = pw.sign_change(e, lo, hi, lambda i, v: sg[i] * v - level[i])
    s = np.where(start_ok, lo, s)
    return np.where(hit, pw.time(e, s), np.inf)


def _pad_group(pieces: Pieces, idx):
    """Rows ``idx`` of ``pieces`` padded to a common number of steps: coef (n, K, 3, P+1),
    h and t0 (n, K) (padded steps: zero length at the row's end), valid (n, K), K_i (n,)."""
    coef = pieces.coef
    K = max(coef[i].shape[0] for i in idx)
    n = len(idx)
    c = np.zeros((n, K) + coef[idx[0]].shape[1:])
    h, t0 = np.zeros((n, K)), np.zeros((n, K))
    valid = np.zeros((n, K), bool)
    Ks = np.zeros(n, int)
    for j, i in enumerate(idx):
        k = coef[i].shape[0]
        c[j, :k], h[j, :k], t0[j, :k] = coef[i], pieces.h[i], pieces.t0[i]
        t0[j, k:] = pieces.t0[i][-1] + pieces.h[i][-1]
        valid[j, :k] = True
        Ks[j] = k
    return c, h, t0, valid, Ks


def metrics_from_pieces(coef, h, t0, counts, final, band, rest=None) -> dict[str, np.ndarray]:
    """The grouped_time_metrics keys of N loops from their piecewise responses: coef
    (E, 3, P+1) holds the steps of all rows one after another (``counts`` (N,) steps each,
    in time order), of lengths h (E,) starting at t0 (E,).

    ``rest`` (N, 2, 3): bounds on sup |y - y(inf)| and on its integral after the last step
    (Pieces.rest). Where the steps stop short of the horizon, a peak, a settling time or the
    IAE stands only if the bound proves that the rest cannot change it (the IAE: by more than
    1e-9 relative); otherwise it is inf, not established, never an optimistic figure."""
    counts = np.asarray(counts, int)
    row = np.repeat(np.arange(counts.size), counts)
    start = np.concatenate([[0], np.cumsum(counts)])
    cT = np.ascontiguousarray(np.transpose(coef, (1, 2, 0)))       # (3, P+1, E)
    pr, pd_, pu = (_Piecewise(cT[o], h, t0, row, start) for o in range(3))
    yf = final[:, 0]
    sg = np.where(yf < 0, -1.0, 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        peak = np.maximum(pr.sup(sg), np.abs(yf))
        overshoot = np.maximum(0.0, (peak - np.abs(yf)) / np.abs(yf) * 100)
        rise = [_first_reach(pr, f * np.abs(yf), sg) for f in (0.1, 0.9)]
        settle = _last_exit(pr, yf, band * np.abs(yf))
        ydf = final[:, 1]
        one = np.ones_like(yf)
        dpeak = np.maximum(np.maximum(pd_.sup(one), pd_.sup(-one)), np.abs(ydf))
        dsettle = _last_exit(pd_, ydf, band * dpeak)
        iae = np.where(np.abs(ydf) > 1e-12 * np.maximum(dpeak, 1e-300), np.inf, pd_.abs_integral())
        upeak = np.maximum(np.maximum(pu.sup(one), pu.sup(-one)), np.abs(final[:, 2]))
        if rest is not None:
            sup_r, int_r = rest[:, 0], rest[:, 1]
            peak = np.where(np.abs(yf) + sup_r[:, 0] <= peak, peak, np.inf)
            overshoot = np.where(np.isfinite(peak), overshoot, np.inf)
            settle = np.where(sup_r[:, 0] <= band * np.abs(yf), settle, np.inf)
            dpeak_ok = np.abs(ydf) + sup_r[:, 1] <= dpeak
            dsettle = np.where(sup_r[:, 1] <= band * dpeak, dsettle, np.inf)
            dpeak = np.where(dpeak_ok, dpeak, np.inf)
            iae = np.where(int_r[:, 1] <= 1e-9 * iae, iae, np.inf)
            upeak = np.where(np.abs(final[:, 2]) + sup_r[:, 2] <= upeak, upeak, np.inf)
        rise_t = rise[1] - rise[0]                 # inf - inf where 10 % is never reached either
    return {
        "settling_time_s": np.where(yf != 0, settle, np.inf),
        "overshoot_pct": np.where(yf != 0, overshoot, np.nan),
        "rise_time_s": np.where((yf != 0) & np.isfinite(rise_t), rise_t, np.inf),
        "steady_state_error": np.abs(1.0 - yf),
        "disturbance_peak": dpeak,
        "disturbance_settling_time_s": dsettle,
        "disturbance_steady_state": ydf,
        "disturbance_iae": iae,
        "control_peak": upeak,
    }


def delay_time_metrics(pnum, pden, cnum, cden, theta: float, decay: np.ndarray,
                       band: float, starts: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Time metrics (keys of synth.evaluate.time.grouped_time_metrics) of N stable loops
    with dead time ``theta`` > 0, from the delay equation (see the module docstring);
    ``starts`` (N, R): starting points for the loop roots of the residue tail. The key
    ``horizon_cut`` (bool) marks rows whose steps stopped short of the horizon, where figures
    no bound could establish read inf."""
    cnum, cden = np.atleast_2d(np.asarray(cnum, float)), np.atleast_2d(np.asarray(cden, float))
    N = cnum.shape[0]
    pieces = piecewise(pnum, pden, cnum, cden, theta, np.asarray(decay, float), starts)
    final = finals(pnum, pden, cnum, cden)
    out: dict[str, np.ndarray] = {}
    counts = np.array([h.size for h in pieces.h])
    # rows in chunks of about METRIC_CHUNK steps: the chunk's arrays stay in cache
    chunk = (np.cumsum(counts) - counts) // METRIC_CHUNK
    for rows in np.split(np.arange(N), np.flatnonzero(np.diff(chunk)) + 1):
        cat = [np.concatenate([c for i in rows for c in pieces.coef_parts[i]])] + \
            [np.concatenate([getattr(pieces, a)[i] for i in rows]) for a in ("h", "t0")]
        for key, v in metrics_from_pieces(*cat, counts[rows], final[rows], band, pieces.rest[rows]).items():
            out.setdefault(key, np.full(N, np.nan))[rows] = v
    out["horizon_cut"] = (pieces.rest != 0).any(axis=(1, 2))   # stopped short of the horizon (MAX_INTERVALS)
    return out


def delay_step_responses(pnum, pden, cnum, cden, theta: float, decay: np.ndarray,
                         starts: np.ndarray | None = None) -> DelayResponses:
    """Sampled responses (reference->y, load->y, reference->u) at every step of the grid the
    metrics are computed on, for plots; rows padded with their last value to a common length."""
    cnum, cden = np.atleast_2d(np.asarray(cnum, float)), np.atleast_2d(np.asarray(cden, float))
    pieces = piecewise(pnum, pden, cnum, cden, theta, np.asarray(decay, float), starts)
    N = cnum.shape[0]
    c, h, t0, valid, Ks = _pad_group(pieces, list(range(N)))
    K = c.shape[1]
    rows = np.arange(N)
    last = Ks - 1
    hs = np.where(valid, h, 1.0)
    y = np.empty((N, K + 1, 3))
    dy = np.zeros((N, K + 1, 3))
    y[:, :K] = c[..., 0]
    dy[:, :K] = c[..., 1] / hs[:, :, None]
    y[rows, Ks] = c[rows, last].sum(axis=-1)
    dy[rows, Ks] = (c[rows, last] * np.arange(DEGREE + 1)).sum(axis=-1) / hs[rows, last][:, None]
    t = np.concatenate([t0, t0[:, -1:] + h[:, -1:]], axis=1)
    pad = np.arange(K + 1)[None, :] > Ks[:, None]          # shorter rows: their end value
    y = np.where(pad[..., None], y[rows, Ks][:, None, :], y)
    dy = np.where(pad[..., None], 0.0, dy)
    return DelayResponses(t, y, dy, finals(pnum, pden, cnum, cden), c, h, pieces.m, pieces.truncation)


def delay_integral(r: DelayResponses, out: int) -> np.ndarray:
    """Signed integral of response ``out`` over the horizon, exact per step (antiderivative at
    sigma = 1; padded steps are zero polynomials)."""
    return (_antideriv(r.coef[:, :, out]).sum(axis=-1) * r.h).sum(axis=1)
