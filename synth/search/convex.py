"""The convex step: with the controller poles fixed, optimise the numerator by convex programs.

With the poles fixed (the stage poles of a lead-lag family, the derivative
filter of a PID, nothing for a PI) the controller is C = sum_k x_k phi_k(s) with
fixed basis functions phi_k, so the loop L(jw) = P(jw) C(jw) = A(w) x is linear
in the numerator coefficients x. On a frequency grid around the current loop:

* |S| <= Ms, and the margin requirements through the circles they imply
  (|1 + L| >= 2 sin(PM/2) gives phase margin >= PM; |1 + L| >= 1 - 10^(-GM/20)
  gives gain margin >= GM at the upper end), all read |1 + L(jw)| >= r. This is
  reverse-convex; around the current loop L0 it is replaced by the line
  constraint Re(conj(e0) (1 + L)) >= r with e0 = (1 + L0)/|1 + L0|, an inner
  approximation because |z| >= Re(conj(e0) z) (Karimi, Galdos & Longchamp,
  Automatica 46, 2010; the convex-concave procedure of Hast, Astrom,
  Bernhardsson & Boyd, ECC 2013);
* |T| <= Mt, |C S| <= Mcs, |P S| <= Mps become second-order cones
  |L| <= Mt Re(conj(e0)(1 + L)) etc., again inner approximations.

The objective is the integral gain (ki; for a lead-lag family with an
integrator lim s C(s), without one C(0)), the proxy for the load-step
integrated error used by MIGO (Astrom, Panagopoulos & Hagglund, Automatica 34,
1998: IE = 1/ki), under an epsilon-constraint on the high-frequency gain
|C(inf)| (noise to the actuator, and u(0+) for a unit reference step); several
levels of that cap give a trade-off. The linearisation is iterated (CCP) until
the solution settles. A grid never certifies anything: every returned point
goes through the exact evaluator (``Search.evaluate_u``) before it enters the
archive, and a point whose claimed requirement is not met exactly is counted as
discarded. The step alternates with moves of the poles: each pole (or the
filter time constant) is moved by a factor and the numerator re-solved; the
move is kept when the exactly evaluated integral gain improves.

Solved with cvxpy (Diamond & Boyd, JMLR 17, 2016) and the Clarabel solver,
with parameters so that each CCP iteration only updates numbers.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
import numpy as np

GRID_PER_DECADE = 80
GRID_DECADES = 2.0          # grid reaches 10^2 beyond the outermost corner or crossover
TIGHTEN = 0.005             # inner margin on every grid constraint (relative)
CCP_ITER = 12
TRUST = 0.5                 # trust region per CCP iteration, relative to each coefficient
CCP_TOL = 1e-5
HF_LEVELS = (0.5, 1.0, 2.0)   # high-frequency gain caps relative to the start's
POLE_STEP = 0.15              # log10 factor of a pole move
MAX_STARTS = 3
CONVEX_CALLS = 12             # numerator designs (each: stages x levels CCP solves) per convex phase
RESTART_EVERY = 3             # restart rounds with a convex step (half the calls)
FIRST_SOLVE_S = 0.5           # assumed cost of the first design before one is measured


@dataclass
class FixedPoleLoop:
    """L(jw) = A(w) x on a grid, plus the linear maps to the objective and the HF gain."""

    w: np.ndarray               # rad/s
    A: np.ndarray               # (nw, nx) complex: loop per numerator coefficient
    Ac: np.ndarray              # (nw, nx) complex: controller per coefficient
    P: np.ndarray               # (nw,) plant response
    gain_row: np.ndarray        # objective (integral / low-frequency gain) = gain_row @ x
    hf_row: np.ndarray | None   # |C(inf)| = hf_row @ x (None: strictly proper controller)
    x0: np.ndarray              # current numerator coefficients (magnitudes)
    poles: np.ndarray           # the fixed poles (lead-lag) or [tf] (pid) or [] (pi)
    all_positive: bool = False  # PI/PID: every coefficient is a gain and must stay positive
    lin: np.ndarray | None = None   # rows M of the linear admissibility constraints M x <= 0
    zeros: np.ndarray | None = None  # lead-lag: every stage zero (the free stage's is x[1]/x[0])
    stage: int | None = None         # lead-lag: the stage whose zero is free


@dataclass
class Limits:
    """Grid requirements: |1 + L| >= r, |T| <= mt, |CS| <= mcs, |PS| <= mps (None: absent)."""

    r: float | None = None
    mt: float | None = None
    mcs: float | None = None
    mps: float | None = None
    claims: tuple[str, ...] = field(default_factory=tuple)


def limits_from(requirements: dict) -> Limits:
    """The requirements the convex step can express, as grid limits (others: the evaluator)."""
    r, claims = [], []
    if "max_sensitivity_peak" in requirements:
        r.append(1.0 / float(requirements["max_sensitivity_peak"]))
        claims.append("max_sensitivity_peak")
    if "min_phase_margin_deg" in requirements:
        r.append(2.0 * np.sin(np.radians(float(requirements["min_phase_margin_deg"])) / 2.0))
        claims.append("min_phase_margin_deg")
    mt = requirements.get("max_complementary_peak")
    mcs = requirements.get("max_noise_gain")
    mps = requirements.get("max_disturbance_gain_peak")
    for key, v in (("max_complementary_peak", mt), ("max_noise_gain", mcs), ("max_disturbance_gain_peak", mps)):
        if v is not None:
            claims.append(key)
    return Limits(r=max(r) if r else None, mt=mt, mcs=mcs, mps=mps, claims=tuple(claims))


def loop_grid(plant, family, params: np.ndarray) -> np.ndarray:
    """Frequency grid around the current loop: every corner frequency of plant and controller
    and the gain crossovers, widened by 10^GRID_DECADES each way, GRID_PER_DECADE points a decade."""
    num, den = family.controllers(np.asarray(params, float)[None, :])
    roots = np.concatenate([np.roots(plant.num), np.roots(plant.den), np.roots(num[0]), np.roots(den[0])])
    corners = np.abs(roots[np.abs(roots) > 1e-12])
    if plant.delay:
        corners = np.append(corners, 1.0 / plant.delay)
    wide = np.logspace(-6, 6, 1201)
    L = plant(1j * wide) * np.polyval(num[0], 1j * wide) / np.polyval(den[0], 1j * wide)
    mag = np.abs(L)
    cross = wide[np.flatnonzero((mag[:-1] - 1) * (mag[1:] - 1) < 0)]
    f = np.log10(np.concatenate([corners, cross])) if corners.size + cross.size else np.zeros(1)
    lo, hi = f.min() - GRID_DECADES, f.max() + GRID_DECADES
    n = int(np.clip((hi - lo) * GRID_PER_DECADE, 100, 1500))
    return np.logspace(lo, hi, n)


def fixed_pole_loop(plant, family, params: np.ndarray, w: np.ndarray | None = None, stage: int | None = None,
                    max_ratio: float = 1e3) -> FixedPoleLoop | None:
    """The linear-in-numerator loop of one parameter vector (None where the family has no such form).

    PI: x = (kp, ki); PID with the filter tf fixed: x = (kp, ki, kd); lead-lag with every pole
    and all zeros but the one of ``stage`` fixed: x = (K, K z_stage), with the stage's
    lead/lag order and ``max_ratio`` as linear constraints (keeps the zeros real, so the
    result maps back to the family)."""
    p = np.asarray(params, float).ravel()
    sgn = family.sign
    if w is None:
        w = loop_grid(plant, family, p)
    s = 1j * w
    P = plant(s)
    if family.kind == "pi":
        kp, ki = 10.0 ** p
        Ac = sgn * np.stack([np.ones_like(s), 1.0 / s], axis=1)
        return FixedPoleLoop(w, P[:, None] * Ac, Ac, P, np.array([0.0, 1.0]), np.array([1.0, 0.0]),
                             np.array([kp, ki]), np.zeros(0), True)
    if family.kind == "pid":
        kp, ki, kd, tf = 10.0 ** p
        Ac = sgn * np.stack([np.ones_like(s), 1.0 / s, s / (tf * s + 1.0)], axis=1)
        return FixedPoleLoop(w, P[:, None] * Ac, Ac, P, np.array([0.0, 1.0, 0.0]), np.array([1.0, 0.0, 1.0 / tf]),
                             np.array([kp, ki, kd]), np.array([tf]), True)
    # lead-lag: one stage's zero free, C = sign * (a0 s + a1) * F(s) with F the rest of the
    # controller at unit gain (the other zeros and every pole fixed); a0 = K, a1 = K z_j
    n = len(family.pairs)
    if n == 0:
        return None
    j = 0 if stage is None else int(stage) % n
    poles = np.array([10.0 ** p[pc] for _, _, pc in family.pairs])
    zeros = np.array([10.0 ** p[zc] for _, zc, _ in family.pairs])
    others = np.delete(zeros, j)
    F = np.polyval(np.poly(-others), s) if others.size else np.ones_like(s)
    D = np.polyval(np.poly(-poles), s)
    if family.integrator:
        D = D * s
    F = F / D
    Ac = sgn * np.stack([s * F, F], axis=1)
    gain_row = np.array([0.0, float(np.prod(others) / np.prod(poles))])  # lim s C (integrator) or C(0)
    hf_row = None if family.integrator else np.array([1.0, 0.0])          # C(inf) = K
    pj, role = poles[j], family.pairs[j][0]
    eps = 1e-6
    if role == "lead":       # p/ratio <= z < p
        lin = np.array([[-pj * (1 - eps), 1.0], [pj / max_ratio, -1.0]])
    else:                    # p < z <= p*ratio
        lin = np.array([[pj * (1 + eps), -1.0], [-pj * max_ratio, 1.0]])
    x0 = np.array([10.0 ** p[0], 10.0 ** p[0] * zeros[j]])
    return FixedPoleLoop(w, P[:, None] * Ac, Ac, P, gain_row, hf_row, x0, poles, False, lin, zeros, j)


class ConvexProblem:
    """One fixed-pole loop and its grid limits, compiled once (cvxpy parameters, DPP)."""

    def __init__(self, loop: FixedPoleLoop, lim: Limits):
        import cvxpy as cp
        self.cp, self.loop, self.lim = cp, loop, lim
        nw, nx = loop.A.shape
        self.x = cp.Variable(nx)
        self.G = cp.Parameter((nw, nx))       # Re(conj(e0) A)
        self.b = cp.Parameter(nw)             # Re(conj(e0))
        self.hmax = cp.Parameter(nonneg=True)
        self.xc = cp.Parameter(nx)             # trust-region centre (units of the start's)
        self.rad = cp.Parameter(nx, nonneg=True)
        x = self.x
        scale = np.maximum(np.abs(loop.x0), 1e-12)   # coefficients in units of the start's
        xs = cp.multiply(scale, x)
        dist = self.G @ xs + self.b                  # inner approximation of |1 + L|
        # positivity: every PI/PID gain; the lead-lag gain K (leading coefficient)
        cons = [x >= 1e-9] if loop.all_positive else [x[0] >= 1e-9]
        if loop.lin is not None:
            cons.append(loop.lin @ xs <= 0)
        # trust region: the grid only sees frequencies around the current loop
        cons.append(cp.abs(x - self.xc) <= self.rad)
        t = TIGHTEN
        if lim.r is not None:
            cons.append(dist >= lim.r * (1 + t))
        else:
            cons.append(dist >= 1e-3)                # keep 1 + L away from 0 (Nyquist count kept)
        if lim.mt is not None:
            cons.append(cp.abs(loop.A @ xs) <= lim.mt / (1 + t) * dist)
        if lim.mcs is not None:
            cons.append(cp.abs(loop.Ac @ xs) <= lim.mcs / (1 + t) * dist)
        if lim.mps is not None:
            cons.append(np.abs(loop.P) <= lim.mps / (1 + t) * dist)
        if loop.hf_row is not None:
            cons.append((loop.hf_row * scale) @ x <= self.hmax)
        self.problem = cp.Problem(cp.Maximize((loop.gain_row * scale) @ x), cons)
        self.scale = scale

    def _linearise(self, xabs: np.ndarray) -> None:
        one_l = 1.0 + self.loop.A @ xabs
        e0 = one_l / np.maximum(np.abs(one_l), 1e-300)
        self.G.value = np.real(np.conj(e0)[:, None] * self.loop.A)
        self.b.value = np.real(np.conj(e0))

    def solve(self, hmax: float | None = None, x_start: np.ndarray | None = None, stop=None) -> np.ndarray | None:
        """CCP from ``x_start`` (default the loop's own coefficients); coefficient magnitudes or None."""
        cp = self.cp
        xk = np.array(self.loop.x0 if x_start is None else x_start, float)
        self.hmax.value = float(hmax if hmax is not None else 1e300 if self.loop.hf_row is None
                                else self.loop.hf_row @ xk)
        best = None
        for _ in range(CCP_ITER):
            if stop is not None and stop():
                return None              # out of time: an unfinished iteration returns nothing
            self._linearise(xk)
            xr = xk / self.scale
            self.xc.value = xr
            self.rad.value = TRUST * np.maximum(np.abs(xr), 0.05 * np.abs(xr).max())
            try:
                self.problem.solve(solver=cp.CLARABEL)
            except (cp.error.SolverError, ValueError):
                break
            if self.x.value is None or self.problem.status not in ("optimal", "optimal_inaccurate"):
                break
            xn = np.asarray(self.x.value, float) * self.scale
            best = xn
            if np.max(np.abs(xn - xk) / np.maximum(np.abs(xk), 1e-12)) < CCP_TOL:
                break
            xk = xn
        return best

    def grid_ok(self, xabs: np.ndarray) -> bool:
        """Whether ``xabs`` meets every grid limit (without the inner tightening)."""
        L = self.loop.A @ xabs
        d = np.abs(1 + L)
        ok = True
        if self.lim.r is not None:
            ok &= bool(np.all(d >= self.lim.r * (1 - 1e-9)))
        if self.lim.mt is not None:
            ok &= bool(np.all(np.abs(L) <= self.lim.mt * d * (1 + 1e-9)))
        if self.lim.mcs is not None:
            ok &= bool(np.all(np.abs(self.loop.Ac @ xabs) <= self.lim.mcs * d * (1 + 1e-9)))
        if self.lim.mps is not None:
            ok &= bool(np.all(np.abs(self.loop.P) <= self.lim.mps * d * (1 + 1e-9)))
        return ok


def params_from_numerator(family, xabs: np.ndarray, poles: np.ndarray, loop_zeros=None,
                          stage: int | None = None) -> np.ndarray | None:
    """Map solved numerator coefficients (magnitudes) with the fixed poles back to the family's
    parameter vector (structures.params_from_pid / params_from_roots); None if not representable
    (a non-positive gain or zero, or a stage order lead z < p / lag z > p not met)."""
    x = np.asarray(xabs, float)
    if family.kind == "pi":
        return family.params_from_pid(x[0], x[1]) if np.all(x > 0) else None
    if family.kind == "pid":
        return family.params_from_pid(x[0], x[1], x[2], poles[0]) if np.all(x > 0) else None
    if x[0] <= 0 or x[1] <= 0 or loop_zeros is None:
        return None
    z = np.array(loop_zeros, float).copy()
    z[stage] = x[1] / x[0]
    q = family.params_from_roots(family.sign * x[0], z, poles)
    return q if bool(family.admissible(q[None, :])[0]) else None


def _pole_variants(family, params: np.ndarray, step: float) -> np.ndarray:
    """The parameter vector and its pole moves: each pole (or tf) times 10^(+-step)."""
    p = np.asarray(params, float)
    cols = [pc for _, _, pc in family.pairs] if family.kind == "lead-lag" else ([3] if family.kind == "pid" else [])
    out = [p]
    for c in cols:
        for sgn in (1.0, -1.0):
            q = p.copy()
            q[c] += sgn * step
            out.append(q)
    return np.array(out)


def numerator_designs(plant, family, params: np.ndarray, requirements: dict, levels=HF_LEVELS,
                      max_ratio: float = 1e3, stop=None) -> tuple[np.ndarray, list[tuple[str, ...]]]:
    """Convex designs for one parameter vector's poles: (k, d) parameter vectors and the grid
    requirements each claims to meet (only designs meeting every grid limit are returned)."""
    lim = limits_from(requirements)
    stages = range(len(family.pairs)) if family.kind == "lead-lag" else (None,)
    cap = requirements.get("max_control_peak")
    out, claims = [], []
    for j in stages:
        loop = fixed_pole_loop(plant, family, params, stage=j, max_ratio=max_ratio)
        if loop is None:
            continue
        prob = ConvexProblem(loop, lim)
        h0 = float(loop.hf_row @ loop.x0) if loop.hf_row is not None else None
        for lv in (levels if h0 is not None else (None,)):
            h = None if lv is None else h0 * lv
            if h is not None and cap is not None:
                h = min(h, float(cap))
            x = prob.solve(h, stop=stop)
            if x is None or not prob.grid_ok(x):
                continue
            q = params_from_numerator(family, x, loop.poles, loop.zeros, loop.stage)
            if q is not None and np.all(np.isfinite(q)):
                out.append(q)
                claims.append(lim.claims)
    return (np.array(out) if out else np.zeros((0, family.dim))), claims


def verify(df, claims: list[tuple[str, ...]]) -> np.ndarray:
    """Exact check of the grid claims: True where every claimed requirement is met by the
    evaluator's row (and the loop is internally stable); False rows are discarded."""
    ok = df["internally_stable"].to_numpy(bool).copy()
    for i, keys in enumerate(claims):
        for k in keys:
            ok[i] &= bool(df[f"met_{k}"].iloc[i])
    return ok


def _starts(search, k: int) -> np.ndarray:
    """Starting parameter vectors: the feasible rows with the largest integral gain, and the
    extremes of each objective, distinct."""
    df = search.all_rows()
    feas = df[df["feasible"].to_numpy(bool)]
    if feas.empty:
        return np.zeros((0, search.space.dim))
    names = search.space.family.names
    from .space import low_frequency_gain
    P = feas[names].to_numpy(float)
    picks = [int(np.argmax(low_frequency_gain(search.space.family, P)))]
    F = search.objective_matrix(feas)
    for j in range(F.shape[1]):
        picks.append(int(np.argmin(np.where(np.isfinite(F[:, j]), F[:, j], np.inf))))
    picks = list(dict.fromkeys(picks))[:k]
    return P[picks]


def convex_step(search) -> None:
    """Alternate convex numerator designs and pole moves from the front's best points."""
    fam = search.space.family
    if fam.kind == "lead-lag" and not fam.pairs:
        return
    r = int(search.state.get("round", 0))
    # solver work is bounded by a count (deterministic), not by evaluations: the step
    # costs solver time but few evaluations, so a budget-bound run would otherwise repeat it
    calls = CONVEX_CALLS if r == 0 else (CONVEX_CALLS // 2 if r % RESTART_EVERY == 0 else 0)
    if calls <= 0:
        return
    centres = _starts(search, MAX_STARTS if r == 0 else 1 + r % MAX_STARTS)
    if not len(centres):
        return
    steps = np.full(len(centres), POLE_STEP)
    est = [FIRST_SOLVE_S]          # measured seconds per numerator design (compile included)
    search.state.setdefault("convex_discarded", 0)
    for _ in range(2):
        batch, claims, owner = [], [], []
        for i, c in enumerate(centres):
            for v in _pole_variants(fam, c, steps[i]):
                if search._out_of_time() or search.time_left() < 1.5 * est[0] or calls <= 0:
                    break
                calls -= 1
                t0 = time.perf_counter()
                q, cl = numerator_designs(search.plant, fam, v, search.requirements,
                                          max_ratio=10.0 ** search.space.log_ratio, stop=search._out_of_time)
                search.state["convex_solves"] = search.state.get("convex_solves", 0) + 1
                est[0] = max(time.perf_counter() - t0, 0.5 * est[0])
                batch += list(q)
                claims += cl
                owner += [i] * len(q)
        if not batch or search._out_of_time():
            break
        batch = np.array(batch)
        u = search.space.encode(batch)
        back = search.space.decode(u)
        inside = np.all(np.abs(back - batch) < 1e-9, axis=1)      # outside the space's bounds: dropped
        u, claims, owner = u[inside], [c for c, k in zip(claims, inside) if k], np.array(owner)[inside]
        n = search.fit(len(u))
        if n <= 0:
            break
        df = search.evaluate_u(u[:n], "convex")
        if df.empty:
            break
        keep = search.last_keep[:n]
        claims = [c for c, k in zip(claims[:n], keep) if k]
        owner = owner[:n][keep]
        ok = verify(df, claims)
        search.state["convex_discarded"] += int((~ok).sum())
        feas = df["feasible"].to_numpy(bool) & ok
        gain = low_frequency_gain_of(search, df)
        for i in range(len(centres)):
            sel = np.flatnonzero((owner == i) & feas)
            if sel.size:
                centres[i] = df[fam.names].to_numpy(float)[sel[np.argmax(gain[sel])]]
            else:
                steps[i] /= 2


def low_frequency_gain_of(search, df) -> np.ndarray:
    from .space import low_frequency_gain
    return low_frequency_gain(search.space.family, df[search.space.family.names].to_numpy(float))
