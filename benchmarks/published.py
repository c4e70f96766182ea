"""Published tuning rules and fundamental limits against synth's own designs.

Run:  python benchmarks/published.py [--quick] [--workers N] [--out DIR]

Plants: the PID benchmark set of K. J. Astrom and T. Hagglund, "Benchmark systems
for PID control", IFAC Workshop on Digital Control: Past, Present and Future of PID
Control (PID'00), Terrassa, 2000 — families 1-5 and 7-11 with their parameters as
listed in /work/shared/REFERENCES.md (family 6, e^(-sqrt(s)), is irrational and
skipped; T = 1 is added to families 4 and 5, whose parameter list REFERENCES.md asks
to check, because the recomputed reference table uses it; family 5 at T = 0 is the
same plant as family 4 at T = 0 and is listed once). Family 11 is families 1-5 with
an added integrator.

(a) Rules, evaluated by synth's evaluator (``synth.evaluate.evaluate_controllers``;
    with dead time, time responses from the delay equation itself and the exact
    frequency response, the Pade(6) model only setting the horizon):
    SIMC (Skogestad, J. Process Control 13, 2003) with tauc = theta on the half-rule
    model (first order for PI, second order, series PID with Td = tau2, for PID);
    SIMC(Ms), the same rule with tauc tuned by bisection so that Ms equals the level
    (Grimholt & Skogestad, J. Process Control 70, 2018 trace SIMC's IAE-Ms curve the
    same way); AMIGO PI and PID (Astrom & Hagglund, J. Process Control 14, 2004) on the
    half-rule first-order model (method of areas where the half rule does not apply,
    see ``synth.yardsticks.fopdt_fit``); Ziegler-Nichols (1942) frequency method with
    the exact ultimate point (``synth.yardsticks.ultimate``). Derivative filter
    tf = Td/10 on every PID rule. Metrics: Ms, gain margin (ratio), phase margin,
    IAE and peak |y| after a unit load step at the plant input, 2 % settling time of
    the reference step, peak |u| for a unit reference step.
(b) synth: a spec built with ``synth.spec.parse_spec`` per (plant, family PI or PID,
    Ms constraint), objectives minimize = ["disturbance_iae", "controller_hf_gain"],
    requirement max_sensitivity_peak = constraint, searched with
    ``synth.search.explore.Search``; the reported design is the lowest-IAE member of
    the feasible first front (``synth.rank.rank``) of all candidates evaluated for
    that plant and family, re-evaluated with ``synth.evaluate.evaluate``.
    Constraint of a head-to-head: min(rule's Ms, level) — synth never gets more
    robustness budget than the rule used; rules above the level are flagged
    (``>lvl``), unstable rules flagged ``unstable`` (ratio 0).
    The constraints of one plant and family are searched from the loosest down; each
    tighter search is warm-started (``Search.warm_start``) from the best candidates
    evaluated so far (the "tighten and rerun" flow of DESIGN.md).
    Dead-time plants: each search runs first on the rational plant with the dead time
    replaced by its Pade approximant of order 6 (the same approximant synth's
    evaluator uses for time responses; a parse_spec spec in numerator/denominator
    form), then on the exact dead-time spec, warm-started from the first stage's best
    candidates (the exact spec's search polishes them; only exact-plant evaluations
    are reported).
(b') diagnostic, same searches with minimize = ["disturbance_iae"] only: shows how
    much of a gap is synth's search (its TPE start and compass polish rank
    candidates by the sum of log objectives, so the low-IAE end of a two-objective
    front is only as good as the quasi-random screening) rather than the structure.
(c) IAE ratio synth/rule per head-to-head.

Fundamental limits: interpolation lower bounds (``synth.limits``; Skogestad &
Postlethwaite, *Multivariable Feedback Control*, 2nd ed. 2005, ch. 5) on Ms and Mt
for (1 - a s)/(s + 1)^3 (a = 0.5, 1, 2, 5), 1/(s - 1) and invented plants, against
synth's smallest Ms and Mt (objectives minimize = ["sensitivity_peak",
"complementary_peak"], no requirement but internal stability) with lead-lag families
of increasing order, without and with an integrator.

Output: benchmarks/results/published.md (printed too) and published.png (IAE versus
Ms per plant: rules as points, synth's lower envelope over everything it evaluated
on the exact plant as a curve). BLAS is pinned to one thread in every process
(threadpoolctl); every search has a fixed seed and a budget that governs (time
limits are far above the expected time; a search stopped by time is reported).
"""

from __future__ import annotations

import argparse
import datetime
import math
import os
import platform
import sys
import time
import warnings
from dataclasses import dataclass, field

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from synth import yardsticks as Y  # noqa: E402
from synth.evaluate import EvalOptions, evaluate, evaluate_controllers  # noqa: E402
from synth.expr import parse_rational  # noqa: E402
from synth.limits import complementary_bound, sensitivity_bound  # noqa: E402
from synth.lti import TransferFunction  # noqa: E402
from synth.rank import rank  # noqa: E402
from synth.search.explore import Search, Settings  # noqa: E402
from synth.spec import parse_spec  # noqa: E402
from _machine import cpu_model  # noqa: E402  (sibling module; scripts run as files)

LEVELS = (1.4, 2.0)
PADE = 6
SEED = 0
SOBOL_BATCH = 2048                 # synth's Sobol batch (explore.SOBOL_BATCH)
OBJ_BRIEF = ("disturbance_iae", "controller_hf_gain")
OBJ_DIAG = ("disturbance_iae",)
METRIC_COLS = ("sensitivity_peak", "gain_margin_db", "gain_margin_low_db", "phase_margin_deg",
               "disturbance_iae", "disturbance_peak", "settling_time_s", "control_peak")
NEAR_OPTIMAL = 0.98                # synth/rule IAE ratio above which a rule counts as near-optimal
TIME_LIMIT_S = 600.0               # per search; far above the budget's time so the budget governs


# ------------------------------------------------------------------ plants
@dataclass(frozen=True)
class Plant:
    pid: str
    family: int
    transfer: str
    note: str = ""


def _g(x: float) -> str:
    return f"{x:g}"


def benchmark_plants() -> list[Plant]:
    base: list[Plant] = []
    for n in (1, 2, 3, 4, 8):
        base.append(Plant(f"1:n={n}", 1, "1/(1+s)" if n == 1 else f"1/(1+s)^{n}"))
    for a in (0.1, 0.2, 0.5, 1.0):
        base.append(Plant(f"2:a={_g(a)}", 2, f"1/((1+s)*(1+{_g(a)}*s)*(1+{_g(a ** 2)}*s)*(1+{_g(a ** 3)}*s))"))
    for a in (0.1, 0.2, 0.5, 1.0, 2.0, 5.0):
        base.append(Plant(f"3:a={_g(a)}", 3, f"(1-{_g(a)}*s)/(s+1)^3"))
    for T in (0.0, 0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0):
        base.append(Plant(f"4:T={_g(T)}", 4, f"exp(-s)/(1+{_g(T)}*s)" if T else "exp(-s)",
                          "T = 1 added" if T == 1 else ""))
    for T in (0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0):
        base.append(Plant(f"5:T={_g(T)}", 5, f"exp(-s)/(1+{_g(T)}*s)^2", "T = 1 added" if T == 1 else ""))
    out = list(base)
    out.append(Plant("7", 7, "100/(s+10)^2*(1/(s+1)+0.5/(s+0.05))"))
    out.append(Plant("8", 8, "(s+6)^2/(s*(s+1)^2*(s+36))", "conditionally stable"))
    for w0 in (1, 2, 5, 10):
        out.append(Plant(f"9:w0={w0}", 9, f"{w0 ** 2}/((s+1)*(s^2+{_g(0.2 * w0)}*s+{w0 ** 2}))", "zeta = 0.1"))
    out.append(Plant("10", 10, "1/(s-1)", "unstable"))
    for p in base:
        t = p.transfer
        if t == "exp(-s)":
            t2 = "exp(-s)/s"
        elif t.startswith("exp(-s)/"):
            t2 = "exp(-s)/(s*" + t[len("exp(-s)/"):] + ")"
        else:
            num, den = t.split("/", 1)
            t2 = f"{num}/(s*{den})"
        out.append(Plant(f"11({p.pid})", 11, t2, p.note))
    return out


QUICK_PLANTS = ("1:n=4", "4:T=1", "11(4:T=0)")


@dataclass(frozen=True)
class LimitPlant:
    pid: str
    transfer: str
    note: str


def limit_plants() -> list[LimitPlant]:
    out = [LimitPlant(f"3:a={_g(a)}", f"(1-{_g(a)}*s)/(s+1)^3", "A&H family 3") for a in (0.5, 1.0, 2.0, 5.0)]
    out.append(LimitPlant("10", "1/(s-1)", "A&H family 10"))
    out.append(LimitPlant("inv-A", "(s-4)/((s-1)*(s+2))", "invented (REFERENCES.md: bound 5/3)"))
    out.append(LimitPlant("inv-B", "(s-10)/((s-1)*(s+5))", "invented"))
    out.append(LimitPlant("inv-C", "exp(-0.2*s)/(s-1)", "invented, dead time"))
    return out


QUICK_LIMITS = ("inv-A",)
LIMIT_ORDERS = ((("lead",), False), (("lead",), True), (("lead", "lead"), False), (("lead", "lead"), True),
                (("lead-lag", "lead"), False), (("lead-lag", "lead"), True))


# ------------------------------------------------------------------ budgets
@dataclass(frozen=True)
class Budget:
    first_sobol_batches: int      # quasi-random batches of the first (loosest) search per plant and family
    first_trials: int             # TPE trials of the first search
    first_budget: int             # total evaluations of the first search
    next_trials: int              # warm-started tighter searches: TPE trials ...
    next_budget: int              # ... and evaluations (no Sobol screening)
    exact_budget: int             # dead-time plants: evaluations on the exact spec per constraint
    limit_budget: int             # fundamental-limit searches (per order)
    limit_sobol_batches: int


# exact dead-time budgets raised 8x (from 100 / 160) when the delay-equation evaluator became
# ~8x faster, so the exact polish costs about the wall time it did before
BUDGET = {"pi": Budget(1, 64, 3500, 24, 800, 800, 6000, 2),
          "pid": Budget(2, 96, 6000, 32, 1500, 1200, 6000, 2)}


def settings(budget: int, sobol_batches: int, trials: int) -> Settings:
    # exactly `sobol_batches` batches of 2048 quasi-random points (half a point of margin so that
    # int(share * budget) in explore._phase_sobol is not rounded down)
    share = (sobol_batches * SOBOL_BATCH + 0.5) / budget if sobol_batches else 0.0
    return Settings(budget=budget, time_limit_s=TIME_LIMIT_S, seed=SEED, optuna_trials=trials, sobol_share=share)


# ------------------------------------------------------------------ specs
def _list(a) -> str:
    return "[" + ", ".join(repr(float(x)) for x in a) + "]"


def spec_text(plant: TransferFunction | str, kind: str, requirements: dict, objectives, freq, name: str,
              stages=(), integrator=False) -> str:
    """TOML requirements text for parse_spec: the plant as a transfer string or as polynomials."""
    if isinstance(plant, str):
        plant_lines = f'transfer = "{plant}"'
    else:
        plant_lines = f"numerator = {_list(plant.num)}\ndenominator = {_list(plant.den)}"
        if plant.delay:
            plant_lines += f"\ndelay_s = {plant.delay!r}"
    ctrl = f'kind = "{kind}"\nfrequency_range_rad_s = [{freq[0]!r}, {freq[1]!r}]'
    if kind == "lead-lag":
        ctrl += "\nstages = [" + ", ".join(f'"{s}"' for s in stages) + f"]\nintegrator = {str(integrator).lower()}"
    reqs = "\n".join(f"{k} = {v!r}" for k, v in requirements.items())
    objs = ", ".join(f'"{o}"' for o in objectives)
    return (f'name = "{name}"\n\n[plant]\n{plant_lines}\n\n[controller]\n{ctrl}\n\n[requirements]\n{reqs}\n\n'
            f'[objectives]\nminimize = [{objs}]\n\n[options]\npade_order = {PADE}\n')


def frequency_range(P: TransferFunction) -> tuple[float, float]:
    """Search box from the plant's own time scale: 5 decades around the ultimate frequency
    (or 1/theta of the half-rule model, or the largest pole/zero magnitude)."""
    w = None
    try:
        w = 2 * math.pi / Y.ultimate(P)[1]
    except ValueError:
        try:
            m = Y.half_rule(P, 1)
            if m.theta > 0:
                w = 1.0 / m.theta
        except ValueError:
            pass
    if w is None:
        mags = [abs(r) for r in np.concatenate([P.poles, P.zeros]) if abs(r) > 1e-9]
        w = max(mags) if mags else 1.0
    return (float(f"{w / 1000:.3g}"), float(f"{w * 100:.3g}"))


# ------------------------------------------------------------------ rules
@dataclass
class RuleResult:
    name: str
    kind: str                      # "pi" | "pid"
    gains: Y.Gains | None
    note: str = ""
    metrics: dict = field(default_factory=dict)
    level: float | None = None     # SIMC(Ms): the level it was tuned to

    @property
    def stable(self) -> bool:
        return bool(self.metrics.get("internally_stable", False))


def eval_gains(P: TransferFunction, gains_list) -> pd.DataFrame:
    num = [Y.pid_polynomials(g)[0] for g in gains_list]
    den = [Y.pid_polynomials(g)[1] for g in gains_list]
    m = max(len(x) for x in num + den)
    N = np.array([np.pad(x, (m - len(x), 0)) for x in num])
    D = np.array([np.pad(x, (m - len(x), 0)) for x in den])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return evaluate_controllers(P, N, D, {}, EvalOptions(pade_order=PADE))


def _metrics(row: pd.Series) -> dict:
    out = {c: float(row[c]) for c in METRIC_COLS if c in row}
    out["internally_stable"] = bool(row["internally_stable"])
    return out


def pi_model(P: TransferFunction):
    try:
        m = Y.half_rule(P, 1)
        return m.k, m.tau1, m.theta, "half rule"
    except ValueError:
        K, T, L = Y.areas_fit(P)
        return K, T, L, "areas"


def rules_for(P: TransferFunction) -> list[RuleResult]:
    out: list[RuleResult] = []

    def attempt(name, kind, fn, note=""):
        try:
            out.append(RuleResult(name, kind, fn(), note))
        except (ValueError, ZeroDivisionError) as e:
            out.append(RuleResult(name, kind, None, str(e)))

    try:
        k, t1, th, how = pi_model(P)
        model_note = f"{how}: k={k:.4g}, tau1={t1:.4g}, theta={th:.4g}"
        attempt("SIMC", "pi", lambda: Y.simc_pi(k, t1, th), model_note)
        attempt("AMIGO", "pi", lambda: Y.amigo_pi(k, t1, th), model_note)
    except ValueError as e:
        out += [RuleResult("SIMC", "pi", None, str(e)), RuleResult("AMIGO", "pi", None, str(e))]
        k = None
    try:
        m2 = Y.half_rule(P, 2)
        if m2.tau2 > 0:
            attempt("SIMC", "pid", lambda: Y.simc_pid_series(m2.k, m2.tau1, m2.tau2, m2.theta),
                    f"half rule: k={m2.k:.4g}, tau1={m2.tau1:.4g}, tau2={m2.tau2:.4g}, theta={m2.theta:.4g}")
        else:
            out.append(RuleResult("SIMC", "pid", None, "second-order model has tau2 = 0 (PI)"))
    except ValueError as e:
        out.append(RuleResult("SIMC", "pid", None, str(e)))
    if k is not None:
        attempt("AMIGO", "pid", lambda: Y.amigo_pid(k, t1, th), model_note)
    else:
        out.append(RuleResult("AMIGO", "pid", None, "no FOPDT model"))
    try:
        ku, pu = Y.ultimate(P)
        attempt("ZN", "pi", lambda: Y.zn_pi(ku, pu), f"Ku={ku:.4g}, Pu={pu:.4g}")
        attempt("ZN", "pid", lambda: Y.zn_pid(ku, pu), f"Ku={ku:.4g}, Pu={pu:.4g}")
    except ValueError as e:
        out += [RuleResult("ZN", "pi", None, str(e)), RuleResult("ZN", "pid", None, str(e))]
    ok = [r for r in out if r.gains is not None]
    if ok:
        df = eval_gains(P, [r.gains for r in ok])
        for r, (_, row) in zip(ok, df.iterrows()):
            r.metrics = _metrics(row)
    # SIMC(Ms): tauc tuned so that Ms = level, on the same models
    for kind in ("pi", "pid"):
        for level in LEVELS:
            out.append(simc_at_level(P, kind, level))
    return out


def simc_at_level(P: TransferFunction, kind: str, level: float) -> RuleResult:
    name = "SIMC(Ms)"
    try:
        if kind == "pi":
            k, t1, th, _ = pi_model(P)
            rule = (lambda tc: Y.simc_pi(k, t1, th, tc))
            scale = th if th > 0 else (t1 if math.isfinite(t1) and t1 > 0 else 1.0)
        else:
            m = Y.half_rule(P, 2)
            if not m.tau2 > 0:
                return RuleResult(name, kind, None, "second-order model has tau2 = 0", level=level)
            rule = (lambda tc: Y.simc_pid_series(m.k, m.tau1, m.tau2, m.theta, tc))
            scale = m.theta if m.theta > 0 else m.tau2
    except ValueError as e:
        return RuleResult(name, kind, None, str(e), level=level)
    grid = scale * np.geomspace(1e-2, 1e3, 31)
    df = eval_gains(P, [rule(tc) for tc in grid])
    ms = np.where(df["internally_stable"].to_numpy(bool), df["sensitivity_peak"].to_numpy(float), np.inf)
    # Ms falls as tauc grows; the level is crossed where Ms goes from above to at or below it
    idx = np.flatnonzero((ms[:-1] > level) & (ms[1:] <= level))
    if idx.size == 0:
        return RuleResult(name, kind, None, f"no tauc in [{grid[0]:.3g}, {grid[-1]:.3g}] gives Ms = {level}",
                          level=level)
    lo, hi = np.log(grid[idx[-1]]), np.log(grid[idx[-1] + 1])
    for _ in range(30):                       # bisection on log tauc; keep the side with Ms <= level
        mid = 0.5 * (lo + hi)
        r = eval_gains(P, [rule(math.exp(mid))]).iloc[0]
        if r["internally_stable"] and r["sensitivity_peak"] <= level:
            hi = mid
        else:
            lo = mid
    tc = math.exp(hi)
    g = rule(tc)
    res = RuleResult(name, kind, g, f"tauc={tc:.4g}", level=level)
    res.metrics = _metrics(eval_gains(P, [g]).iloc[0])
    return res


# ------------------------------------------------------------------ synth searches
MS_EQUAL = 1e-6      # a rule's Ms within this relative distance of a level counts as equal to it


def constraint_for(rule_ms: float, level: float) -> float:
    """Ms constraint of a head-to-head with a rule meeting the level: a level when the rule's Ms
    equals it (SIMC(Ms), within MS_EQUAL), else the rule's Ms rounded down to 1e-6."""
    for lv in LEVELS:                     # SIMC(Ms) tuned to a level shares that level's search
        if lv <= level and abs(rule_ms - lv) <= MS_EQUAL * lv:
            return lv
    return math.floor(min(rule_ms, level) * 1e6) / 1e6


def _search(P: TransferFunction, kind: str, c: float, objectives, freq, st: Settings,
            warm_params: np.ndarray | None, name: str) -> tuple[pd.DataFrame, dict]:
    text = spec_text(P, kind, {"max_sensitivity_peak": c}, objectives, freq, name)
    spec = parse_spec(text, source=f"<{name}>")
    s = Search(spec.plant, spec.controller, dict(spec.requirements), spec.objectives, st,
               EvalOptions(settling_band=spec.options.settling_band, pade_order=spec.options.pade_order))
    if warm_params is not None and len(warm_params):
        s.warm_start(pd.DataFrame(s.space.encode(warm_params), columns=s.ucols))
    t0 = time.perf_counter()
    df = s.run()
    info = {"evaluated": int(s.state["evaluated"]), "seconds": time.perf_counter() - t0,
            "time_stopped": s.state["evaluated"] < st.budget and time.perf_counter() - t0 >= st.time_limit_s}
    return df, info


def best_rows(pool: pd.DataFrame, names, c: float, objectives, k: int) -> pd.DataFrame:
    """The k lowest-IAE feasible rows of a pool under Ms <= c (ranked by synth.rank)."""
    if pool.empty:
        return pool
    # only rows that can be feasible go to the (quadratic) non-dominated sort; rank decides
    pre = pool[pool["internally_stable"].astype(bool) & (pool["sensitivity_peak"].to_numpy(float) <= c)
               & np.isfinite(pool["disturbance_iae"].to_numpy(float))]
    if pre.empty:
        return pre
    r = rank(pre, {"max_sensitivity_peak": c}, list(objectives), dedupe_cols=list(names))
    f = r[r["feasible"] & np.isfinite(r["disturbance_iae"].to_numpy(float))]
    return f.sort_values("disturbance_iae", kind="stable").head(k)


WARM_ROWS = 48


def synth_family(P: TransferFunction, kind: str, constraints: list[float], objectives, budget: Budget,
                 freq, tag: str) -> dict:
    """Searches at each constraint (loosest first), warm-started; returns the pool and bests."""
    from synth.structures import Family
    names = Family(kind).names
    exact_pool: list[pd.DataFrame] = []
    stage1_pool: list[pd.DataFrame] = []
    surrogate = P.with_pade(PADE) if P.delay else None
    log = []
    for i, c in enumerate(sorted(constraints, reverse=True)):
        st = (settings(budget.first_budget, budget.first_sobol_batches, budget.first_trials) if i == 0
              else settings(budget.next_budget, 0, budget.next_trials))
        base = surrogate if surrogate is not None else P
        pool1 = pd.concat(stage1_pool, ignore_index=True) if stage1_pool else pd.DataFrame()
        warm = best_rows(pool1, names, c, objectives, WARM_ROWS)
        warm_p = warm[names].to_numpy(float) if len(warm) else None
        df, info = _search(base, kind, c, objectives, freq, st, warm_p, f"{tag}-{kind}-{c:.4f}")
        stage1_pool.append(df)
        log.append(dict(info, constraint=c, stage="pade" if surrogate is not None else "exact"))
        if surrogate is not None:
            pool1 = pd.concat(stage1_pool, ignore_index=True)
            cand = [best_rows(pool1, names, c * (1 - 1e-3), objectives, WARM_ROWS // 2)]
            if exact_pool:
                cand.append(best_rows(pd.concat(exact_pool, ignore_index=True), names, c, objectives, WARM_ROWS // 2))
            cand = pd.concat(cand, ignore_index=True)
            warm_p = cand[names].to_numpy(float) if len(cand) else None
            st2 = settings(budget.exact_budget, 0, 0)
            df2, info2 = _search(P, kind, c, objectives, freq, st2, warm_p, f"{tag}-{kind}-{c:.4f}-exact")
            exact_pool.append(df2)
            log.append(dict(info2, constraint=c, stage="exact"))
    pool = pd.concat(exact_pool if surrogate is not None else stage1_pool, ignore_index=True)
    bests = {}
    for c in constraints:
        b = best_rows(pool, names, c, objectives, 1)
        bests[c] = b.iloc[0][names].to_numpy(float) if len(b) else None
    # re-evaluate the chosen designs (full metrics, no screening)
    fam = Family(kind)
    chosen = {c: p for c, p in bests.items() if p is not None}
    designs = {}
    if chosen:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            ev = evaluate(P, fam, np.array(list(chosen.values())), {}, EvalOptions(pade_order=PADE))
        for (c, p), (_, row) in zip(chosen.items(), ev.iterrows()):
            d = _metrics(row)
            d.update({n: float(v) for n, v in zip(names, p)})
            d["hf_gain"] = float(row["controller_hf_gain"])
            designs[c] = d
    # envelope for the plot: every exact-plant row with finite IAE
    stable = pool[pool["internally_stable"].astype(bool) & np.isfinite(pool["disturbance_iae"].to_numpy(float))]
    env = _envelope(stable["sensitivity_peak"].to_numpy(float), stable["disturbance_iae"].to_numpy(float))
    return {"designs": designs, "log": log, "envelope": env}


def _envelope(ms: np.ndarray, iae: np.ndarray) -> np.ndarray:
    """Lower envelope of IAE over Ms (running minimum in Ms order), thinned for plotting."""
    if ms.size == 0:
        return np.zeros((0, 2))
    o = np.argsort(ms)
    ms, iae = ms[o], np.minimum.accumulate(iae[o])
    keep = np.r_[True, np.diff(iae) < 0]
    pts = np.column_stack([ms[keep], iae[keep]])
    return pts[pts[:, 0] <= 2.5]


def plant_job(args) -> dict:
    plant, mode = args
    with threadpool_limits(limits=1):
        t0, c0 = time.perf_counter(), time.process_time()
        P = parse_rational(plant.transfer)
        rules = rules_for(P)
        freq = frequency_range(P)
        res = {"plant": plant, "rules": rules, "freq": freq, "synth": {}, "diag": {}}
        for kind in ("pi", "pid"):
            cons = set(LEVELS)
            for r in rules:
                if r.kind == kind and r.gains is not None and r.stable:
                    for level in LEVELS:
                        if r.metrics["sensitivity_peak"] <= level * (1 + MS_EQUAL):
                            cons.add(constraint_for(r.metrics["sensitivity_peak"], level))
            cons = sorted(cons, reverse=True)
            b = BUDGET[kind]
            res["synth"][kind] = synth_family(P, kind, cons, OBJ_BRIEF, b, freq, plant.pid)
            res["diag"][kind] = synth_family(P, kind, cons, OBJ_DIAG, b, freq, plant.pid + "-diag")
        res["seconds"] = time.perf_counter() - t0
        res["cpu_seconds"] = time.process_time() - c0
        return res


def limit_job(args) -> dict:
    lp, mode = args
    with threadpool_limits(limits=1):
        t0, c0 = time.perf_counter(), time.process_time()
        P = parse_rational(lp.transfer)
        out = {"plant": lp, "ms_bound": sensitivity_bound(P), "mt_bound": complementary_bound(P), "orders": [],
               "rhp_poles": int(np.sum(P.poles.real > 1e-9))}
        b = BUDGET["pi"]
        objectives = ("sensitivity_peak", "complementary_peak")
        for stages, integ in LIMIT_ORDERS:
            st = settings(b.limit_budget, b.limit_sobol_batches, 128)
            base = P.with_pade(PADE) if P.delay else P
            text = spec_text(base, "lead-lag", {}, objectives, (0.01, 1000.0), f"limit-{lp.pid}",
                             stages=stages, integrator=integ)
            spec = parse_spec(text)
            s = Search(spec.plant, spec.controller, {}, spec.objectives, st, EvalOptions(pade_order=PADE))
            df = s.run()
            fam = s.space.family
            if P.delay:     # exact dead-time plant: polish the Pade stage's best on the exact spec
                ok = df[df["internally_stable"].astype(bool)]
                warm = pd.concat([ok.nsmallest(24, "sensitivity_peak"), ok.nsmallest(24, "complementary_peak")])
                spec2 = parse_spec(spec_text(P, "lead-lag", {}, objectives, (0.01, 1000.0), f"limit-{lp.pid}",
                                             stages=stages, integrator=integ))
                s2 = Search(spec2.plant, spec2.controller, {}, spec2.objectives,
                            settings(b.exact_budget * 2, 0, 0), EvalOptions(pade_order=PADE))
                s2.warm_start(pd.DataFrame(s2.space.encode(warm[fam.names].to_numpy(float)), columns=s2.ucols))
                df = s2.run()
            ok = df[df["internally_stable"].astype(bool) & df["admissible"].astype(bool)]
            label = " + ".join(stages) + (" + integrator" if integ else "")
            out["orders"].append({"order": label, "integrator": integ, "n_states": len(stages) + sum(s == "lead-lag" for s in stages)
                                  + int(integ),
                                  "ms": float(ok["sensitivity_peak"].min()) if len(ok) else math.inf,
                                  "mt": float(ok["complementary_peak"].min()) if len(ok) else math.inf,
                                  "evaluated": len(df)})
        out["seconds"] = time.perf_counter() - t0
        out["cpu_seconds"] = time.process_time() - c0
        return out


# ------------------------------------------------------------------ comparison
def head_to_heads(res: dict) -> list[dict]:
    rows = []
    rules = res["rules"]
    for level in LEVELS:
        for r in rules:
            if r.name == "SIMC(Ms)" and r.level != level:
                continue
            if r.gains is None:
                continue
            flag, c = "", level
            if not r.stable:
                flag = "unstable"
            elif r.metrics["sensitivity_peak"] > level * (1 + MS_EQUAL):
                flag = ">lvl"
            else:
                c = constraint_for(r.metrics["sensitivity_peak"], level)
            row = {"plant": res["plant"].pid, "family": res["plant"].family, "level": level, "rule": r.name,
                   "kind": r.kind, "flag": flag, "c": c,
                   "rule_iae": r.metrics.get("disturbance_iae", math.inf) if r.stable else math.inf,
                   "rule_ms": r.metrics.get("sensitivity_peak", math.nan)}
            for key, src in (("synth", res["synth"]), ("diag", res["diag"])):
                d = src[r.kind]["designs"].get(c)
                row[f"{key}_iae"] = d["disturbance_iae"] if d else math.inf
                row[f"{key}_ms"] = d["sensitivity_peak"] if d else math.nan
                row[f"{key}_ratio"] = (row[f"{key}_iae"] / row["rule_iae"]) if math.isfinite(row["rule_iae"]) \
                    else 0.0
            rows.append(row)
    return rows


# ------------------------------------------------------------------ report
def _f(x, nd=3) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "-"
    if isinstance(x, float) and math.isinf(x):
        return "inf"
    return f"{x:.{nd}g}"


def _gm(m: dict) -> str:
    up = m.get("gain_margin_db", math.nan)
    lo = m.get("gain_margin_low_db", -math.inf)
    s = _f(10 ** (up / 20)) if math.isfinite(up) else ("inf" if up == math.inf else "-")
    if math.isfinite(lo):
        s += f" (low {_f(10 ** (lo / 20))})"
    return s


def machine() -> str:
    cpu = cpu_model("")
    return f"nproc {os.cpu_count()}, {cpu}, {platform.system()} {platform.release()}"


def versions() -> str:
    import matplotlib
    import optuna
    import scipy
    import synth
    return (f"python {platform.python_version()}, synth {synth.__version__}, numpy {np.__version__}, "
            f"scipy {scipy.__version__}, pandas {pd.__version__}, optuna {optuna.__version__}, "
            f"matplotlib {matplotlib.__version__}")


def _wins(d: pd.DataFrame, key: str) -> tuple[int, int]:
    g = d.groupby("plant")
    return sum(bool((x[f"{key}_ratio"] < 1.0).all()) for _, x in g), g.ngroups


def summarise(h2h: pd.DataFrame, key: str) -> list[str]:
    """One line per level: wins against the rules meeting the level (and unstable ones), then all rules."""
    lines = []
    for level in LEVELS:
        d = h2h[h2h["level"] == level]
        meet = d[d["flag"] != ">lvl"]
        w, n = _wins(meet, key)
        wa, na = _wins(d, key)
        fin = meet[meet["flag"] != "unstable"]
        r = fin[f"{key}_ratio"]
        worst = fin.loc[r.idxmax()] if len(fin) else None
        lines.append(f"| {level} | {n} | {w} ({100 * w / max(n, 1):.0f} %) | {_f(float(r.median()))} | "
                     + (f"{_f(float(worst[key + '_ratio']))} ({worst['plant']}, {worst['rule']} "
                        f"{worst['kind'].upper()}) | " if worst is not None else "- | ")
                     + f"{int((r > 1.02).sum())} of {len(r)} | {wa} of {na} |")
    return lines


def target_check(h2h: pd.DataFrame, key: str) -> tuple[list[float], float]:
    share = []
    for level in LEVELS:
        d = h2h[(h2h["level"] == level) & (h2h["flag"] != ">lvl")]
        w, n = _wins(d, key)
        share.append(w / max(n, 1))
    fin = h2h[h2h["flag"] == ""]
    return share, float(fin[f"{key}_ratio"].max()) if len(fin) else math.nan


def plant_class(transfer: str) -> str:
    try:
        _, t1, th, _ = pi_model(parse_rational(transfer))
    except ValueError:
        return "no FOPDT model"
    if not math.isfinite(t1):
        return "integrating"
    tau = th / (th + t1) if th + t1 > 0 else 0.0
    return ("lag-dominant (< 0.2)" if tau < 0.2 else "balanced (0.2-0.5)" if tau <= 0.5
            else "delay-dominant (> 0.5)")


CLASS_ORDER = ("lag-dominant (< 0.2)", "balanced (0.2-0.5)", "delay-dominant (> 0.5)", "integrating")


def class_table(h2h: pd.DataFrame, results: list[dict]) -> list[list[str]]:
    cls = {res["plant"].pid: plant_class(res["plant"].transfer) for res in results}
    d = h2h[(h2h["flag"] == "") & (h2h["kind"] == "pi")].copy()
    d["cls"] = d["plant"].map(cls)
    out = []
    for c in CLASS_ORDER:
        for rule in ("SIMC", "SIMC(Ms)", "AMIGO", "ZN"):
            x = d[(d["cls"] == c) & (d["rule"] == rule)]["diag_ratio"]
            if len(x):
                out.append([c, rule, str(len(x)), _f(float(x.median())), _f(float(x.min())), _f(float(x.max()))])
    x = d[d["plant"].isin([p for p, v in cls.items() if v == "delay-dominant (> 0.5)" and p.startswith("4:")])
          & (d["rule"] == "SIMC")]
    if len(x):
        out.append(["family 4, T <= 0.5 (dead time >= 2/3)", "SIMC", str(len(x)), _f(float(x["diag_ratio"].median())),
                    _f(float(x["diag_ratio"].min())), _f(float(x["diag_ratio"].max()))])
    return out


def report(results: list[dict], limits: list[dict], args, wall: float) -> str:
    h2h = pd.DataFrame([row for res in results for row in head_to_heads(res)])
    cpu = sum(r["cpu_seconds"] for r in results) + sum(lm["cpu_seconds"] for lm in limits)
    L = []
    L.append("# Published tuning rules and limits against synth")
    L.append("")
    L.append(f"Generated {datetime.datetime.now().strftime('%Y-%m-%d %H:%M')} by `benchmarks/published.py"
             f"{' --quick' if args.quick else ''}` (workers {args.workers}); wall time {wall:.0f} s; CPU time of "
             f"the jobs {cpu:.0f} s (= {cpu / 2 / 60:.1f} min on 2 dedicated cores; the machine is shared, so wall "
             "time depends on its load).  ")
    L.append(f"Machine: {machine()}.  ")
    L.append(f"Packages: {versions()}.  ")
    b = BUDGET
    L.append("Budgets (evaluations per search): first search per plant/family "
             f"PI {b['pi'].first_budget} ({b['pi'].first_sobol_batches} Sobol batches, {b['pi'].first_trials} TPE), "
             f"PID {b['pid'].first_budget} ({b['pid'].first_sobol_batches}, {b['pid'].first_trials}); each tighter "
             f"constraint PI {b['pi'].next_budget}, PID {b['pid'].next_budget} (warm-started); dead-time plants "
             f"run on the Pade({PADE}) model, then PI {b['pi'].exact_budget} / PID {b['pid'].exact_budget} "
             "evaluations on the exact spec per constraint. Seed 0 everywhere.")
    stopped = [(res["plant"].pid, lg) for res in results for src in ("synth", "diag")
               for kind in ("pi", "pid") for lg in res[src][kind]["log"] if lg["time_stopped"]]
    L.append(f"Searches stopped by their time limit: {len(stopped)}"
             + (" (" + ", ".join(p for p, _ in stopped[:10]) + ")" if stopped else "") + ".")
    L.append("")
    L.append("Plants: Astrom & Hagglund, \"Benchmark systems for PID control\", IFAC PID'00, 2000 (families as in "
             "REFERENCES.md). Rules: SIMC (Skogestad, J. Process Control 13, 2003; tauc = theta on the half-rule "
             "model), SIMC(Ms) (tauc tuned to Ms = level), AMIGO (Astrom & Hagglund, J. Process Control 14, 2004; "
             "half-rule FOPDT, method of areas for family 9), ZN (Ziegler & Nichols 1942, frequency method, exact "
             "ultimate point). PID rules carry a derivative filter tf = Td/10. Load disturbance: unit step at the "
             "plant input; IAE and peak |y| of that response; settling: 2 % band of the reference step; u peak: "
             "unit reference step. GM as a ratio (inf: no phase crossover).")
    L.append("")
    L.append("## Summary")
    L.append("")
    L.append("Head-to-head: synth's lowest-IAE feasible design at Ms <= min(rule Ms, level) against the rule "
             "(PI rules against synth's PI family, PID rules against synth's PID family). A plant is won when "
             "synth's IAE is lower than every applicable rule's. Ratio = synth IAE / rule IAE (unstable rules: "
             "ratio 0, counted as won).")
    L.append("")
    L.append("Columns: plants with at least one rule meeting the level (SIMC(Ms) always does where it applies; "
             "unstable rules count as beaten); plants where synth beats every such rule; median and worst synth/rule "
             "IAE ratio over those head-to-heads; how many are more than 2 % worse; last, plants where synth beats "
             "every rule including the flagged ones above the level (synth held to the level).")
    L.append("")
    for key, title in (("synth", "synth as briefed, minimize = [disturbance_iae, controller_hf_gain]"),
                       ("diag", "diagnostic: the same searches with minimize = [disturbance_iae]")):
        L.append(f"**{title}**")
        L.append("")
        L.append("| level Ms | plants | synth beats every rule meeting the level | median ratio | worst ratio | "
                 "ratios > 1.02 | beats every rule incl. flagged |")
        L.append("| --- | --- | --- | --- | --- | --- | --- |")
        L += summarise(h2h, key)
        L.append("")
    for key, title in (("synth", "as briefed"), ("diag", "IAE-only diagnostic")):
        share, worst = target_check(h2h, key)
        L.append(f"Target check ({title}): synth's IAE lower than every rule meeting the level on >= 90 % of plants: "
                 f"{'met' if min(share) >= 0.9 else 'missed'} ({', '.join(f'{100 * x:.0f} %' for x in share)} at Ms "
                 f"{', '.join(str(v) for v in LEVELS)}); never more than 2 % worse: "
                 f"{'met' if worst <= 1.02 else 'missed'} (worst ratio {_f(worst)}).  ")
    L.append("")
    L.append("Where the rules are near-optimal: PI rules (the PI family has two parameters, so synth's IAE-only "
             "search is close to the true optimum at each Ms) by plant class, from the half-rule model's "
             "normalised dead time theta/(theta + tau1) (Grimholt & Skogestad, J. Process Control 70, 2018 "
             "place SIMC close to the IAE-Ms Pareto front except for delay-dominant plants). Ratio = synth "
             "(IAE-only diagnostic) / rule, head-to-heads with rules meeting the level; a ratio near 1 means "
             "the rule is on synth's front.")
    L.append("")
    L.append("| plant class | rule | head-to-heads | median ratio | min | max |")
    L.append("| --- | --- | --- | --- | --- | --- |")
    for row in class_table(h2h, results):
        L.append("| " + " | ".join(row) + " |")
    L.append("")
    ties = h2h[(h2h["flag"] == "") & (h2h["diag_ratio"] >= NEAR_OPTIMAL)]
    if len(ties):
        L.append(f"Head-to-heads where a rule is within {100 * (1 - NEAR_OPTIMAL):.0f} % of synth's IAE-only "
                 f"design or better (diagnostic ratio >= {NEAR_OPTIMAL}): {len(ties)} of "
                 f"{int((h2h['flag'] == '').sum())}; by rule: "
                 + ", ".join(f"{r} {k.upper()} {n}" for (r, k), n in ties.groupby(["rule", "kind"]).size().items())
                 + ". Those above 1.00 (synth worse): "
                 + (", ".join(f"{r.plant} {r.rule} {r.kind.upper()} @{r.level} ({r.diag_ratio:.3f})"
                              for r in ties[ties["diag_ratio"] > 1.0].itertuples()) or "none") + ".")
        L.append("")
    # fundamental limits
    if limits:
        L.append("## Fundamental limits")
        L.append("")
        L.append("Interpolation bounds (Skogestad & Postlethwaite 2005, ch. 5; `synth.limits`): Ms >= prod |z + "
                 "conj(p)|/|z - p| for a RHP zero z with RHP poles p (1 otherwise), Mt >= prod |conj(z) + p|/|z - p| "
                 "e^(p theta) for a RHP pole p. synth: smallest Ms and Mt among internally stable lead-lag "
                 "designs (objectives sensitivity_peak, complementary_peak); ratio to the bound; the first "
                 "(lowest) order within 10 % of the bound.")
        L.append("")
        L.append("| plant | transfer | note | Ms bound | best Ms | ratio | order reaching 1.1x | Mt bound | best Mt | "
                 "ratio | order reaching 1.1x | per order (Ms / Mt) |")
        L.append("| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |")
        for lm in limits:
            lp = lm["plant"]
            cells = []
            for q, bound in (("ms", lm["ms_bound"]), ("mt", lm["mt_bound"])):
                vals = [o[q] for o in lm["orders"]]
                best = min(vals)
                if q == "mt" and not lm["rhp_poles"]:
                    # no RHP pole: T can be made arbitrarily small without integral action, and
                    # synth.limits.complementary_bound claims no bound (None); 1 holds only with integral action
                    with_i = min(o[q] for o in lm["orders"] if o["integrator"])
                    cells += ["none (1 with integrator)", _f(best, 4) + f" ({_f(with_i, 4)} with integrator)",
                              f"{_f(with_i, 4)} with integrator", "-"]
                    continue
                reach = next((o["order"] for o in lm["orders"] if o[q] <= 1.1 * bound), "none")
                trivial = " (trivial)" if bound == 1.0 else ""
                cells += [_f(bound, 4) + trivial, _f(best, 4), _f(best / bound, 4), reach]
            per = "; ".join(f"{o['order']}: {_f(o['ms'], 4)} / {_f(o['mt'], 4)}" for o in lm["orders"])
            L.append(f"| {lp.pid} | `{lp.transfer}` | {lp.note} | " + " | ".join(cells) + f" | {per} |")
        L.append("")
    # rules table
    L.append("## Rules evaluated by synth's evaluator")
    L.append("")
    L.append("| plant | transfer | rule | kp | ki | kd | tf | Ms | GM | PM deg | IAE | peak | settling s | u peak | "
             "note |")
    L.append("| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for res in results:
        p = res["plant"]
        for r in res["rules"]:
            nm = f"{r.name} {r.kind.upper()}" + (f" @{r.level}" if r.level else "")
            if r.gains is None:
                L.append(f"| {p.pid} | `{p.transfer}` | {nm} | - | - | - | - | - | - | - | - | - | - | - | "
                         f"n/a: {r.note[:70]} |")
                continue
            m = r.metrics
            g = r.gains
            if not r.stable:
                L.append(f"| {p.pid} | `{p.transfer}` | {nm} | {_f(g.kp, 4)} | {_f(g.ki, 4)} | {_f(g.kd, 4)} | "
                         f"{_f(g.tf, 4)} | unstable | - | - | - | - | - | - | {r.note[:70]} |")
                continue
            L.append(f"| {p.pid} | `{p.transfer}` | {nm} | {_f(g.kp, 4)} | {_f(g.ki, 4)} | {_f(g.kd, 4)} | "
                     f"{_f(g.tf, 4)} | {_f(m['sensitivity_peak'])} | {_gm(m)} | {_f(m['phase_margin_deg'])} | "
                     f"{_f(m['disturbance_iae'])} | {_f(m['disturbance_peak'])} | {_f(m['settling_time_s'])} | "
                     f"{_f(m['control_peak'])} | {r.note[:70]} |")
    L.append("")
    # head to head table
    L.append("## Head-to-head (IAE at equal or lower Ms)")
    L.append("")
    L.append("| plant | level | rule | flag | rule Ms | rule IAE | constraint Ms | synth IAE | synth Ms | ratio | "
             "diag IAE | diag ratio |")
    L.append("| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for r in h2h.itertuples():
        L.append(f"| {r.plant} | {r.level} | {r.rule} {r.kind.upper()} | {r.flag} | {_f(r.rule_ms, 4)} | "
                 f"{_f(r.rule_iae, 4)} | {_f(r.c, 4)} | {_f(r.synth_iae, 4)} | {_f(r.synth_ms, 4)} | "
                 f"{_f(r.synth_ratio, 3)} | {_f(r.diag_iae, 4)} | {_f(r.diag_ratio, 3)} |")
    L.append("")
    # synth designs
    L.append("## synth's designs (as briefed)")
    L.append("")
    L.append("| plant | family | constraint Ms | kp | ki | kd | tf | Ms | GM | PM deg | IAE | peak | settling s | "
             "u peak | freq. range rad/s |")
    L.append("| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for res in results:
        for kind in ("pi", "pid"):
            for c, d in sorted(res["synth"][kind]["designs"].items()):
                kd = _f(10 ** d["log10_kd"], 4) if "log10_kd" in d else "-"
                tf = _f(10 ** d["log10_tf"], 4) if "log10_tf" in d else "-"
                L.append(f"| {res['plant'].pid} | {kind.upper()} | {_f(c, 4)} | {_f(10 ** d['log10_kp'], 4)} | "
                         f"{_f(10 ** d['log10_ki'], 4)} | {kd} | {tf} | {_f(d['sensitivity_peak'], 4)} | {_gm(d)} | "
                         f"{_f(d['phase_margin_deg'])} | {_f(d['disturbance_iae'], 4)} | {_f(d['disturbance_peak'])} | "
                         f"{_f(d['settling_time_s'])} | {_f(d['control_peak'])} | {res['freq'][0]:g}-{res['freq'][1]:g} |")
    L.append("")
    L.append("Per-plant wall time (s): " + ", ".join(f"{res['plant'].pid} {res['seconds']:.0f}" for res in results)
             + (";  limits: " + ", ".join(f"{lm['plant'].pid} {lm['seconds']:.0f}" for lm in limits) if limits else "")
             + ".")
    L.append("")
    L.append("![IAE versus Ms](published.png)")
    return "\n".join(L) + "\n", h2h


def plot(results: list[dict], path: str) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    n = len(results)
    cols = min(6, n)
    rows = math.ceil(n / cols)
    fig, axes = plt.subplots(rows, cols, figsize=(3.2 * cols, 2.7 * rows), squeeze=False)
    markers = {"SIMC": "o", "SIMC(Ms)": "s", "AMIGO": "^", "ZN": "v"}
    colors = {"pi": "tab:blue", "pid": "tab:red"}
    for ax, res in zip(axes.flat, results):
        for kind in ("pi", "pid"):
            for src, ls in (("synth", "-"), ("diag", "--")):
                env = res[src][kind]["envelope"]
                if len(env):
                    ax.step(env[:, 0], env[:, 1], where="post", color=colors[kind], lw=1.0, ls=ls)
            for c, d in res["synth"][kind]["designs"].items():
                ax.plot(d["sensitivity_peak"], d["disturbance_iae"], "x", color=colors[kind], ms=4)
            for r in res["rules"]:
                if r.kind == kind and r.stable and r.metrics["sensitivity_peak"] <= 2.5:
                    ax.plot(r.metrics["sensitivity_peak"], r.metrics["disturbance_iae"], markers[r.name],
                            mfc="none", color=colors[kind], ms=5)
        for lv in LEVELS:
            ax.axvline(lv, color="0.7", lw=0.6, ls=":")
        ax.set_yscale("log")
        ax.set_xlim(1.0, 2.5)
        pts = [d["disturbance_iae"] for kind in ("pi", "pid") for d in res["synth"][kind]["designs"].values()]
        pts += [r.metrics["disturbance_iae"] for r in res["rules"] if r.stable and r.metrics["sensitivity_peak"] <= 2.5]
        pts += [float(res[src][kind]["envelope"][-1, 1]) for src in ("synth", "diag") for kind in ("pi", "pid")
                if len(res[src][kind]["envelope"])]       # each envelope's lowest IAE (at its largest Ms)
        pts = [v for v in pts if np.isfinite(v) and v > 0]
        if pts:
            lo, hi = min(pts), max(pts)
            ax.set_ylim(0.8 * lo, max(2.5 * hi, 3 * lo))
        ax.set_title(f"{res['plant'].pid}: {res['plant'].transfer}", fontsize=6.5)
        ax.tick_params(labelsize=6)
    for ax in list(axes.flat)[n:]:
        ax.axis("off")
    handles = [plt.Line2D([], [], color=colors[k], ls=ls, label=f"synth {k.upper()}, {what}")
               for k in colors for ls, what in (("-", "as briefed"), ("--", "IAE-only diagnostic"))]
    handles += [plt.Line2D([], [], color="k", marker="x", ls="", label="synth design as briefed")]
    handles += [plt.Line2D([], [], color="k", marker=m, mfc="none", ls="", label=nm) for nm, m in markers.items()]
    fig.legend(handles=handles, loc="lower center", ncol=5, fontsize=8,
               title="curves: lower envelope of IAE over Ms of every candidate evaluated on the exact plant; "
                     "blue PI, red PID", title_fontsize=8)
    fig.supxlabel("Ms", fontsize=8)
    fig.supylabel("IAE, unit load step at the plant input", fontsize=8)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    fig.savefig(path, dpi=90)
    plt.close(fig)


# ------------------------------------------------------------------ main
def parse_args(argv=None) -> argparse.Namespace:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help=f"plants {', '.join(QUICK_PLANTS)} and two limit plants")
    ap.add_argument("--workers", type=int, default=2, help="worker processes (default 2)")
    ap.add_argument("--out", default=os.path.join(ROOT, "benchmarks", "results"), help="output folder")
    ap.add_argument("--plants", default="", help="comma-separated plant ids to run (default: all)")
    ap.add_argument("--save", default="", help="also pickle the raw results to this file")
    return ap.parse_args(argv)


def main(argv=None) -> None:
    args = parse_args(argv)
    mode = "quick" if args.quick else "full"
    plants = benchmark_plants()
    lims = limit_plants()
    if args.quick:
        plants = [p for p in plants if p.pid in QUICK_PLANTS]
        lims = [lp for lp in lims if lp.pid in QUICK_LIMITS]
    if args.plants:
        keep = set(args.plants.split(","))
        plants = [p for p in plants if p.pid in keep]
        lims = [lp for lp in lims if lp.pid in keep]
    t0 = time.perf_counter()
    # dead-time plants first (longest jobs), so that the two workers finish together
    order = sorted(range(len(plants)), key=lambda i: -(("exp" in plants[i].transfer) * 10 + plants[i].family / 100))
    jobs = [("plant", (plants[i], mode)) for i in order] + [("limit", (lp, mode)) for lp in lims]
    results, limits = {}, {}

    def done(kind, item, r):
        (results if kind == "plant" else limits)[item[0].pid] = r
        print(f"[{time.perf_counter() - t0:6.0f} s] {kind} {item[0].pid} done in {r['seconds']:.0f} s", flush=True)

    if args.workers > 1:
        import multiprocessing as mp
        with mp.get_context("fork").Pool(args.workers, maxtasksperchild=4) as pool:
            handles = [(k, it, pool.apply_async(plant_job if k == "plant" else limit_job, (it,))) for k, it in jobs]
            for k, it, h in handles:
                done(k, it, h.get())
    else:
        for k, it in jobs:
            done(k, it, (plant_job if k == "plant" else limit_job)(it))
    wall = time.perf_counter() - t0
    res_list = [results[p.pid] for p in plants]
    lim_list = [limits[lp.pid] for lp in lims]
    os.makedirs(args.out, exist_ok=True)
    name = "published_quick" if args.quick else "published"
    text, h2h = report(res_list, lim_list, args, wall)
    with open(os.path.join(args.out, name + ".md"), "w") as fh:
        fh.write(text.replace("(published.png)", f"({name}.png)"))
    h2h.to_csv(os.path.join(args.out, name + "_h2h.csv"), index=False)
    if args.save:
        import pickle
        with open(args.save, "wb") as fh:
            pickle.dump({"results": res_list, "limits": lim_list, "wall": wall}, fh)
    plot(res_list, os.path.join(args.out, name + ".png"))
    print(text.replace("(published.png)", f"({name}.png)"))


if __name__ == "__main__":
    main()
