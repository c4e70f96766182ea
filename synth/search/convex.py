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

from dataclasses import dataclass, field
from itertools import permutations

import numpy as np

GRID_POINTS = 300
GRID_DECADES = 3.0          # grid spans the current crossover times/divided by 10^3
TIGHTEN = 0.005             # inner margin on every grid constraint (relative)
CCP_ITER = 12
TRUST = 0.5                 # trust region per CCP iteration, relative to each coefficient
CCP_TOL = 1e-5
HF_LEVELS = (0.5, 1.0, 2.0)   # high-frequency gain caps relative to the start's
POLE_STEP = 0.15              # log10 factor of a pole move
MAX_STARTS = 3


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


def _crossover(w: np.ndarray, L: np.ndarray) -> float:
    mag = np.abs(L)
    i = np.flatnonzero((mag[:-1] >= 1) & (mag[1:] < 1))
    return float(w[i[-1]]) if i.size else float(w[np.argmin(np.abs(np.log(np.maximum(mag, 1e-300))))])


def fixed_pole_loop(plant, family, params: np.ndarray, w: np.ndarray | None = None) -> FixedPoleLoop | None:
    """The linear-in-numerator loop of one parameter vector (None where the family has no such form)."""
    p = np.asarray(params, float).ravel()
    sgn = family.sign
    if w is None:
        num, den = family.controllers(p[None, :])
        wide = np.logspace(-4, 5, 900)
        L = plant(1j * wide) * np.polyval(num[0], 1j * wide) / np.polyval(den[0], 1j * wide)
        wc = _crossover(wide, L)
        w = np.logspace(np.log10(wc) - GRID_DECADES, np.log10(wc) + GRID_DECADES, GRID_POINTS)
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
    # lead-lag: C = sign * (sum_j a_j s^(n-j)) / (prod (s + p_i) * s^integrator)
    n = len(family.pairs)
    poles = np.array([10.0 ** p[pc] for _, _, pc in family.pairs])
    zeros = np.array([10.0 ** p[zc] for _, zc, _ in family.pairs])
    a = 10.0 ** p[0] * np.poly(-zeros) if n else np.array([10.0 ** p[0]])
    D = np.polyval(np.poly(-poles), s) if n else np.ones_like(s)
    if family.integrator:
        D = D * s
    Ac = sgn * np.stack([s ** (n - j) / D for j in range(n + 1)], axis=1)
    prod_p = float(np.prod(poles)) if n else 1.0
    gain_row = np.zeros(n + 1)
    gain_row[-1] = 1.0 / prod_p           # lim s C(s) with integrator, C(0) without
    hf_row = None if family.integrator else np.eye(n + 1)[0]
    return FixedPoleLoop(w, P[:, None] * Ac, Ac, P, gain_row, hf_row, a.real.astype(float), poles)


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

    def solve(self, hmax: float | None = None, x_start: np.ndarray | None = None) -> np.ndarray | None:
        """CCP from ``x_start`` (default the loop's own coefficients); coefficient magnitudes or None."""
        cp = self.cp
        xk = np.array(self.loop.x0 if x_start is None else x_start, float)
        self.hmax.value = float(hmax if hmax is not None else 1e300 if self.loop.hf_row is None
                                else self.loop.hf_row @ xk)
        best = None
        for _ in range(CCP_ITER):
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


def params_from_numerator(family, xabs: np.ndarray, poles: np.ndarray) -> np.ndarray | None:
    """Map solved numerator coefficients (magnitudes) with the fixed poles back to the family's
    parameter vector (structures.params_from_pid / params_from_roots); None if not representable
    (complex or non-negative zeros, or no stage assignment meeting lead z < p / lag z > p)."""
    x = np.asarray(xabs, float)
    if family.kind == "pi":
        return family.params_from_pid(x[0], x[1]) if np.all(x > 0) else None
    if family.kind == "pid":
        return family.params_from_pid(x[0], x[1], x[2], poles[0]) if np.all(x > 0) else None
    if x[0] <= 0:
        return None
    n = len(family.pairs)
    if n == 0:
        return np.log10(x[:1])
    r = np.roots(x)
    if r.size != n or np.any(np.abs(r.imag) > 1e-9 * np.maximum(np.abs(r), 1e-300)) or np.any(r.real >= 0):
        return None
    zeros = np.sort(-r.real)
    for perm in permutations(range(n)):
        z = zeros[list(perm)]
        if all((zi < pi) if role == "lead" else (zi > pi) for (role, _, _), zi, pi in zip(family.pairs, z, poles)):
            return family.params_from_roots(family.sign * x[0], z, poles)
    return None


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


def numerator_designs(plant, family, params: np.ndarray, requirements: dict,
                      levels=HF_LEVELS) -> tuple[np.ndarray, list[tuple[str, ...]]]:
    """Convex designs for one parameter vector's poles: (k, d) parameter vectors and the grid
    requirements each claims to meet."""
    loop = fixed_pole_loop(plant, family, params)
    if loop is None:
        return np.zeros((0, family.dim)), []
    lim = limits_from(requirements)
    prob = ConvexProblem(loop, lim)
    h0 = float(loop.hf_row @ loop.x0) if loop.hf_row is not None else None
    cap = requirements.get("max_control_peak")
    out, claims = [], []
    for lv in (levels if h0 is not None else (None,)):
        h = None if lv is None else h0 * lv
        if h is not None and cap is not None:
            h = min(h, float(cap))
        x = prob.solve(h)
        if x is None or not prob.grid_ok(x):
            continue
        q = params_from_numerator(family, x, loop.poles)
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
    if fam.kind == "lead-lag" and len(fam.pairs) > 3:
        return
    r = int(search.state.get("round", 0))
    centres = _starts(search, MAX_STARTS if r == 0 else 1 + r % MAX_STARTS)
    if not len(centres):
        return
    steps = np.full(len(centres), POLE_STEP)
    search.state.setdefault("convex_discarded", 0)
    for _ in range(2):
        batch, claims, owner = [], [], []
        for i, c in enumerate(centres):
            for v in _pole_variants(fam, c, steps[i]):
                if search._out_of_time():
                    break
                q, cl = numerator_designs(search.plant, fam, v, search.requirements)
                search.state["convex_solves"] = search.state.get("convex_solves", 0) + 1
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
