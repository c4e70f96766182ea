"""Synthesis quality: synth's search against plain baselines, side by side, per spec.

Run:  python benchmarks/synthesis.py [--quick] [--budget N] [--reference-seconds S]

Specs: every ``specs/*.toml`` (the examples) plus the invented scenarios in
``benchmarks/specs/*.toml`` (stable, unstable, dead time, right-half-plane zero,
lightly damped resonance, a type-1 servo). For each spec, in one run and with
the same evaluator (``synth.evaluate.evaluate``, screening on, as the search
uses it), the same unit cube (``Space.decode``) and the same prefilter:

(a) synth: ``synth.search.explore.Search`` as is (seeds, Sobol screening,
    constrained TPE, compass polish), time limit lifted so the budget governs;
(b) random: uniform points in the unit cube, prefiltered, evaluated in batches
    of 2048 (synth's Sobol batch);
(c) NSGA-II alone: ``optuna.samplers.NSGAIISampler`` (population 64), ask/tell in
    batches of 64, objectives log10 of the objective metrics, one constraint per
    requirement via ``trial.set_constraint`` (normalised shortfall, <= 0 met);
(d) TPE alone: ``TPESampler(multivariate=True, constant_liar=True)``, same setup;
(e) seeds alone: ``synth.search.seeds.seeds``, evaluated once.

Budget: rows handed to the evaluator for (a), (b) (synth's own definition);
trials for (c), (d) (a prefiltered trial is told a penalty and still counts).
optuna costs milliseconds per trial and grows with the number of trials
(TPE's multi-objective split is quadratic), so (c) and (d) stop at the budget
or at ``--optuna-cap-seconds``, whichever comes first; the table shows how many
trials they reached. Equal wall time: the prefix of (c) and (d) finished
within synth's wall time (their cap is raised to cover it). Plants with dead
time use ``--delay-budget`` (their evaluation costs ~10-50 ms per candidate).

Hypervolume: of the feasible designs' objectives, each divided by its
requirement limit when a ``max_`` requirement bounds that metric, else by the
worst value of that objective on the best-known front; reference point 1.0
(the limits). Best known: the front of every method's feasible points pooled
with long synth runs (``--reference-seconds`` in all, each warm-started from
the pooled front). HV is printed as a fraction of the best known.

Time is measured from each method's start (space and study setup included);
"first feas" is the end of the first batch that held a feasible design; "t90"
when the feasible front first reached 90 % of the best-known hypervolume.
BLAS is pinned to one thread; every method has a fixed seed. Nothing here
asserts on timing: the summary prints each target beside the measurement.
"""

from __future__ import annotations

import argparse
import datetime
import glob
import hashlib
import os
import platform
import sys
import time
import warnings
from dataclasses import dataclass, field

import numpy as np
import optuna  # noqa: F401  imported before any timed run, as `synth design` does for its manifest
import pandas as pd
from threadpoolctl import threadpool_limits

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from synth.evaluate import EvalOptions, evaluate  # noqa: E402
from synth.rank import hypervolume, non_dominated_sort  # noqa: E402
from synth.requirements import REQUIREMENTS  # noqa: E402
from synth.search.explore import Search, Settings  # noqa: E402
from synth.search.seeds import seeds as classical_seeds  # noqa: E402
from synth.search.space import Space, build_space  # noqa: E402
from synth.spec import Spec, load_spec  # noqa: E402
from _machine import cpu_model  # noqa: E402  (sibling module; scripts run as files)

SEED = 0
RANDOM_BATCH = 2048              # synth's Sobol batch
OPTUNA_BATCH = 64
PENALTY = 1e3                    # objective/constraint value told for unusable trials
OBJECTIVE_FLOOR = 1e-9           # as synth: log10 of |f| floored here
FRONT_CHUNK = 4000               # rows per non-dominated sort while pooling fronts
WARM_ROWS = 512                  # pooled-front rows handed to each reference run
QUICK_SPECS = 3

TARGET_FIRST_FEASIBLE_S = 1.0
TARGET_LEADLAG_FRACTION = 0.90
TARGET_LEADLAG_SECONDS = 15.0
TARGET_WALL_RATIO = 1.2
TIMED_BUDGET_CAP = 10 ** 7       # the 15-s run: the time limit governs, the budget is only a cap
TWO_STAGE_LEADLAG = (("lead-lag", "lead-lag"), ("lead", "lag"), ("lag", "lead"))


# ------------------------------------------------------------------ traces
@dataclass
class Trace:
    """What one method evaluated: one frame per batch and the time each batch ended."""

    name: str
    frames: list[pd.DataFrame] = field(default_factory=list)
    times: list[float] = field(default_factory=list)   # s since the method started
    counts: list[int] = field(default_factory=list)    # budget units used after each batch
    wall_s: float = 0.0
    note: str = ""

    def add(self, t: float, df: pd.DataFrame, used: int) -> None:
        self.times.append(t)
        self.frames.append(df)
        self.counts.append(used)

    @property
    def used(self) -> int:
        return self.counts[-1] if self.counts else 0

    def prefix(self, seconds: float, name: str) -> "Trace":
        """The batches finished within ``seconds`` (an equal-wall-time view of the same run)."""
        k = int(np.searchsorted(np.asarray(self.times), seconds, side="right"))
        return Trace(name, self.frames[:k], self.times[:k], self.counts[:k], self.times[k - 1] if k else 0.0)


@dataclass
class Scoring:
    """Objective normalisation of one spec: divide by ``scale``, reference point 1."""

    objectives: tuple[str, ...]
    scale: np.ndarray
    source: list[str]            # "limit" or "front" per objective
    best: float                  # best-known hypervolume
    front_size: int = 0          # points on the best-known front

    def normalise(self, F: np.ndarray) -> np.ndarray:
        return F / self.scale

    def hv(self, F: np.ndarray) -> float:
        if len(F) == 0:
            return 0.0
        return hypervolume(pareto_front(self.normalise(F)), np.ones(len(self.objectives)))


def feasible_objectives(trace: Trace, objectives) -> tuple[np.ndarray, np.ndarray]:
    """(F, t): objective rows of the feasible designs and the time each was known."""
    F, T = [], []
    for t, df in zip(trace.times, trace.frames):
        if df.empty:
            continue
        f = df.loc[df["feasible"].to_numpy(bool), list(objectives)].to_numpy(float)
        f = f[np.all(np.isfinite(f), axis=1)]
        F.append(f)
        T.append(np.full(len(f), t))
    if not F:
        return np.zeros((0, len(objectives))), np.zeros(0)
    return np.vstack(F), np.concatenate(T)


def feasible_rows(trace: Trace, cols) -> pd.DataFrame:
    parts = [df.loc[df["feasible"].to_numpy(bool), list(cols)] for df in trace.frames if not df.empty]
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=list(cols))


def pareto_front(F: np.ndarray) -> np.ndarray:
    """Non-dominated rows of F (minimisation), by chunked sorts: the front of a union is the
    front of the union of the chunks' fronts."""
    F = np.unique(F[np.all(np.isfinite(F), axis=1)], axis=0)
    while len(F) > FRONT_CHUNK:
        parts = [F[i:i + FRONT_CHUNK] for i in range(0, len(F), FRONT_CHUNK)]
        G = np.vstack([p[non_dominated_sort(p) == 0] for p in parts])
        if len(G) == len(F):
            break
        F = G
    return F[non_dominated_sort(F) == 0] if len(F) else F


# ------------------------------------------------------------------ evaluation
def eval_options(spec: Spec) -> EvalOptions:
    """The options synth's search evaluates with (screening on)."""
    return EvalOptions(settling_band=spec.options.settling_band, pade_order=spec.options.pade_order, screen=True)


def evaluate_u(spec: Spec, space: Space, u: np.ndarray) -> tuple[pd.DataFrame, np.ndarray]:
    """Decode, prefilter and evaluate unit-cube points; returns (rows with u columns, keep mask)."""
    params = space.decode(u)
    keep = space.prefilter(params)
    if not keep.any():
        return pd.DataFrame(), keep
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        df = evaluate(spec.plant, space.family, params[keep], dict(spec.requirements), eval_options(spec))
    for i in range(space.dim):
        df[f"u{i}"] = u[keep, i]
    return df, keep


def make_space(spec: Spec) -> Space:
    return build_space(spec.plant, spec.controller, dict(spec.requirements))


# ------------------------------------------------------------------ methods
def run_synth(spec: Spec, budget: int, seed: int, time_limit: float = 1e9, name: str = "synth",
              warm: pd.DataFrame | None = None) -> tuple[Trace, Search]:
    """synth's Search as is; every batch it evaluates is recorded through ``on_batch``."""
    trace = Trace(name)
    t0 = time.perf_counter()

    def on_batch(df, state):
        trace.add(time.perf_counter() - t0, df, int(state["evaluated"]))

    search = Search(spec.plant, spec.controller, dict(spec.requirements), spec.objectives,
                    Settings(budget=budget, time_limit_s=time_limit, seed=seed), eval_options(spec),
                    on_batch=on_batch)
    if warm is not None and not warm.empty:
        search.warm_start(warm)
    search.run()
    trace.wall_s = time.perf_counter() - t0
    if search.state["evaluated"] < budget and trace.wall_s < time_limit:
        trace.note = f"stopped at {search.state['evaluated']} of {budget}"
    return trace, search


def run_random(spec: Spec, budget: int, seed: int) -> Trace:
    """Uniform random points in synth's unit cube, same prefilter and evaluator."""
    trace = Trace("random")
    t0 = time.perf_counter()
    space = make_space(spec)
    rng = np.random.default_rng(seed)
    used = drawn = 0
    while used < budget and drawn < 200 * budget:
        u = rng.random((RANDOM_BATCH, space.dim))
        drawn += len(u)
        keep = space.prefilter(space.decode(u))
        u = u[keep][: budget - used]
        if len(u) == 0:
            continue
        df, _ = evaluate_u(spec, space, u)
        used += len(df)
        trace.add(time.perf_counter() - t0, df, used)
    trace.wall_s = time.perf_counter() - t0
    if used < budget:
        trace.note = f"prefilter passed {used} of {drawn} draws"
    return trace


def trial_values(row, objectives, requirements) -> tuple[list[float], dict[str, float]]:
    """log10 objectives and normalised constraint shortfalls (<= 0 met) of one evaluated row."""
    f = np.array([float(row[o]) for o in objectives])
    with np.errstate(divide="ignore", invalid="ignore"):
        logs = np.log10(np.maximum(np.abs(f), OBJECTIVE_FLOOR))
    values = [float(v) if np.isfinite(v) else PENALTY for v in logs]
    cons = {}
    for key, limit in requirements.items():
        s = float(row[f"slack_{key}"])
        c = -s / max(abs(float(limit)), 1e-3)
        cons[key] = float(np.clip(c, -PENALTY, PENALTY)) if np.isfinite(c) else PENALTY
    if not cons:
        cons["stable"] = 0.0 if bool(row["internally_stable"]) else PENALTY
    return values, cons


def make_sampler(kind: str, seed: int):
    import optuna
    if kind == "nsga2":
        return optuna.samplers.NSGAIISampler(population_size=OPTUNA_BATCH, seed=seed)
    return optuna.samplers.TPESampler(multivariate=True, constant_liar=True, seed=seed)


def run_optuna(spec: Spec, kind: str, budget: int, seed: int, cap_s: float) -> Trace:
    """optuna alone (NSGA-II or TPE), ask/tell in batches so the evaluator runs vectorised."""
    import optuna
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    trace = Trace("NSGA-II" if kind == "nsga2" else "TPE")
    t0 = time.perf_counter()
    space = make_space(spec)
    objectives, reqs = spec.objectives, dict(spec.requirements)
    study = optuna.create_study(directions=["minimize"] * len(objectives), sampler=make_sampler(kind, seed))
    dist = {f"u{i}": optuna.distributions.FloatDistribution(0.0, 1.0) for i in range(space.dim)}
    done = 0
    while done < budget and time.perf_counter() - t0 < cap_s:
        trials = [study.ask(dist) for _ in range(min(OPTUNA_BATCH, budget - done))]
        u = np.array([[t.params[f"u{i}"] for i in range(space.dim)] for t in trials])
        df, keep = evaluate_u(spec, space, u)
        rows = df.to_dict("records") if not df.empty else []
        it = iter(rows)
        for t, k in zip(trials, keep):
            if k:
                values, cons = trial_values(next(it), objectives, reqs)
            else:
                values, cons = [PENALTY] * len(objectives), {key: PENALTY for key in (reqs or {"stable": 0})}
            for key, v in cons.items():
                t.set_constraint(key, v)
            study.tell(t, values)
        done += len(trials)
        trace.add(time.perf_counter() - t0, df, done)
    trace.wall_s = time.perf_counter() - t0
    if done < budget:
        trace.note = f"cap {cap_s:.0f} s: {done} of {budget} trials"
    return trace


def run_seeds(spec: Spec) -> Trace:
    """The classical seed designs alone, evaluated once."""
    trace = Trace("seeds only")
    t0 = time.perf_counter()
    space = make_space(spec)
    raw = classical_seeds(spec.plant, space, dict(spec.requirements))
    if len(raw):
        df, _ = evaluate_u(spec, space, space.encode(raw))
        trace.add(time.perf_counter() - t0, df, len(raw))
    trace.wall_s = time.perf_counter() - t0
    return trace


def run_reference(spec: Spec, pooled: list[Trace], seconds: float, rate: float, budget: int) -> list[Trace]:
    """Long synth runs, each warm-started from the current pooled front, until ``seconds`` are used."""
    runs: list[Trace] = []
    t0 = time.perf_counter()
    k = 0
    while True:
        left = seconds - (time.perf_counter() - t0)
        if left <= 1.0 and runs:
            break
        warm = pooled_front_rows(spec, pooled + runs)
        b = int(max(budget, 0.9 * rate * max(left, 1.0)))
        trace, _ = run_synth(spec, b, seed=1001 + k, time_limit=max(left, 1.0), name=f"reference {k + 1}",
                             warm=warm)
        runs.append(trace)
        k += 1
    return runs


def pooled_front_rows(spec: Spec, traces: list[Trace]) -> pd.DataFrame:
    """Up to WARM_ROWS non-dominated feasible rows (u columns) of all traces, spread along the front."""
    dim = make_space(spec).dim
    ucols = [f"u{i}" for i in range(dim)]
    cols = list(spec.objectives) + ucols
    rows = pd.concat([feasible_rows(t, cols) for t in traces], ignore_index=True)
    if rows.empty:
        return rows
    F = rows[list(spec.objectives)].to_numpy(float)
    ok = np.all(np.isfinite(F), axis=1)
    rows, F = rows[ok], F[ok]
    front = np.zeros(len(rows), bool)
    for i in range(0, len(rows), FRONT_CHUNK):
        sl = slice(i, i + FRONT_CHUNK)
        front[sl] = non_dominated_sort(F[sl]) == 0
    rows, F = rows[front], F[front]
    if len(rows) > FRONT_CHUNK:
        rows = rows.iloc[:: int(np.ceil(len(rows) / FRONT_CHUNK))]
        F = rows[list(spec.objectives)].to_numpy(float)
    rows = rows[non_dominated_sort(F) == 0]
    rows = rows.sort_values(spec.objectives[0])
    if len(rows) > WARM_ROWS:
        rows = rows.iloc[np.linspace(0, len(rows) - 1, WARM_ROWS).astype(int)]
    return rows.reset_index(drop=True)


# ------------------------------------------------------------------ scoring
def objective_limits(spec: Spec) -> dict[str, float]:
    """Objective metric -> tightest max_ requirement limit on it (if any)."""
    out: dict[str, float] = {}
    for key, limit in spec.requirements.items():
        req = REQUIREMENTS[key]
        if req.sense == "max" and req.metric in spec.objectives:
            out[req.metric] = min(out.get(req.metric, np.inf), float(limit))
    return out


def make_scoring(spec: Spec, traces: list[Trace]) -> Scoring:
    """Normalisation and best-known hypervolume from every feasible point of every trace."""
    objs = tuple(spec.objectives)
    F = np.vstack([feasible_objectives(t, objs)[0] for t in traces])
    front = pareto_front(F) if len(F) else F
    limits = objective_limits(spec)
    scale, source = np.ones(len(objs)), []
    for i, o in enumerate(objs):
        if o in limits:
            scale[i], src = limits[o], "limit"
        else:
            worst = float(front[:, i].max()) if len(front) else 1.0
            scale[i], src = (worst if worst > 0 else 1.0), "front"
        source.append(src)
    sc = Scoring(objs, scale, source, 0.0, len(front))
    sc.best = sc.hv(front)
    return sc


def time_to_fraction(trace: Trace, sc: Scoring, frac: float) -> float | None:
    """Seconds until the trace's feasible front first reached ``frac`` of the best-known HV."""
    if sc.best <= 0:
        return None
    F, T = feasible_objectives(trace, sc.objectives)
    if not len(F) or sc.hv(F) < frac * sc.best:
        return None
    times = np.unique(T)
    lo, hi = 0, len(times) - 1          # HV of a prefix is non-decreasing: bisect on batch ends
    while lo < hi:
        mid = (lo + hi) // 2
        if sc.hv(F[T <= times[mid]]) >= frac * sc.best:
            hi = mid
        else:
            lo = mid + 1
    return float(times[lo])


@dataclass
class Row:
    method: str
    used: int
    unit: str
    wall_s: float
    first_feasible_s: float | None
    feasible: int
    hv: float
    fraction: float
    t90_s: float | None
    note: str


def score(trace: Trace, sc: Scoring, unit: str) -> Row:
    F, T = feasible_objectives(trace, sc.objectives)
    hv = sc.hv(F)
    return Row(trace.name, trace.used, unit, trace.wall_s, float(T.min()) if len(T) else None, len(F), hv,
               hv / sc.best if sc.best > 0 else 0.0, time_to_fraction(trace, sc, TARGET_LEADLAG_FRACTION),
               trace.note)


# ------------------------------------------------------------------ printing
class Out:
    """Prints and keeps every line for the results file."""

    def __init__(self):
        self.lines: list[str] = []

    def __call__(self, text: str = "") -> None:
        print(text, flush=True)
        self.lines.extend(text.split("\n"))


def fmt(x, spec: str = ".2f", none: str = "-") -> str:
    return none if x is None else format(x, spec)


def secs(x: float | None) -> str:
    return "never" if x is None else f"{x:.2f} s"


def table(out: Out, rows: list[Row]) -> None:
    out("| method | used | wall s | first feas s | feasible | HV | HV / best | t90 s | note |")
    out("| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | --- |")
    for r in rows:
        out(f"| {r.method} | {r.used} {r.unit} | {r.wall_s:.2f} | {fmt(r.first_feasible_s, '.3f')} | "
            f"{r.feasible} | {r.hv:.4g} | {r.fraction:.3f} | {fmt(r.t90_s, '.2f')} | {r.note} |")


def describe(spec: Spec, space: Space) -> str:
    p = spec.plant
    plant = f"order {p.den.size - 1}, poles {np.round(p.poles, 3).tolist()}"
    if len(p.zeros):
        plant += f", zeros {np.round(p.zeros, 3).tolist()}"
    if p.delay:
        plant += f", dead time {p.delay:g} s"
    return f"plant {plant}; controller {space.family.describe()} ({space.dim} parameters)"


# ------------------------------------------------------------------ one spec
@dataclass
class Result:
    name: str
    path: str
    budget: int
    rows: dict[str, Row]
    scoring: Scoring
    two_stage_third_order: bool
    ratio_nsga: float
    ratio_tpe: float


def is_two_stage_third_order(spec: Spec) -> bool:
    c = spec.controller
    return c.kind == "lead-lag" and tuple(c.stages) in TWO_STAGE_LEADLAG and spec.plant.den.size - 1 == 3


def ratio(a: float, b: float) -> float:
    return np.inf if b <= 0 and a > 0 else (a / b if b > 0 else np.nan)


def load_specs(paths: list[str]) -> list[tuple[str, Spec, str]]:
    """Every spec read once at the start (path, spec, short SHA-1 of the file), so that files
    edited while the benchmark runs do not change what it measures."""
    out = []
    for p in paths:
        with open(p, "rb") as f:
            digest = hashlib.sha1(f.read()).hexdigest()[:10]
        out.append((p, load_spec(p), digest))
    return out


def bench_spec(path: str, spec: Spec, digest: str, args, out: Out) -> Result:
    """Every method on one spec, then the reference runs, scoring and the table."""
    space = make_space(spec)
    budget = args.delay_budget if spec.plant.delay else args.budget
    out(f"\n## {spec.name}  ({os.path.relpath(path, ROOT)}, sha1 {digest})\n")
    out(describe(spec, space) + f"; budget {budget}; objectives {', '.join(spec.objectives)}")
    if space.infeasible:
        out("infeasible by construction: " + "; ".join(space.infeasible))

    synth, search = run_synth(spec, budget, SEED)
    rand = run_random(spec, budget, SEED)
    cap = max(args.optuna_cap_seconds, 1.1 * synth.wall_s + 1.0)
    nsga = run_optuna(spec, "nsga2", budget, SEED, cap)
    tpe = run_optuna(spec, "tpe", budget, SEED, cap)
    seeds = run_seeds(spec)
    nsga_t = nsga.prefix(synth.wall_s, "NSGA-II @ synth wall")
    tpe_t = tpe.prefix(synth.wall_s, "TPE @ synth wall")
    two = is_two_stage_third_order(spec)
    # as a user runs it: --time-limit 15 and a budget that does not bind (the anytime search)
    quick15, _ = run_synth(spec, TIMED_BUDGET_CAP, SEED, time_limit=TARGET_LEADLAG_SECONDS,
                           name=f"synth, {TARGET_LEADLAG_SECONDS:g} s")
    extra = [quick15]
    methods = [synth, rand, nsga, tpe, seeds] + extra
    rate = synth.used / max(synth.wall_s, 1e-9)
    refs = run_reference(spec, methods, args.reference_seconds, rate, budget)
    sc = make_scoring(spec, methods + refs)

    units = {"NSGA-II": "trials", "TPE": "trials", "NSGA-II @ synth wall": "trials", "TPE @ synth wall": "trials",
             "seeds only": "seeds"}
    ref_trace = Trace("best known (pooled)", wall_s=sum(r.wall_s for r in refs),
                      note=f"front of all above + {len(refs)} warm-started synth run(s); 'feasible' = front size")
    ordered = [synth, rand, nsga, tpe, seeds, nsga_t, tpe_t] + extra
    rows = {t.name: score(t, sc, units.get(t.name, "evals")) for t in ordered}
    best_row = Row(ref_trace.name, sum(r.used for r in refs), "evals", ref_trace.wall_s, None,
                   sc.front_size, sc.best, 1.0 if sc.best > 0 else 0.0, None, ref_trace.note)
    table(out, list(rows.values()) + [best_row])
    norm = ", ".join(f"{o} / {s:.4g} ({src})" for o, s, src in zip(sc.objectives, sc.scale, sc.source))
    out(f"\nnormalisation: {norm}; reference point 1.0")
    r_n = ratio(rows["synth"].hv, rows["NSGA-II @ synth wall"].hv)
    r_t = ratio(rows["synth"].hv, rows["TPE @ synth wall"].hv)
    out(f"equal wall time ({synth.wall_s:.2f} s): synth HV / NSGA-II HV = {r_n:.2f}, "
        f"synth HV / TPE HV = {r_t:.2f}; synth phases: evaluated {search.state['evaluated']}, "
        f"optuna trials {search.state['optuna_done']}, polish rounds {search.state['polish_rounds']}")
    return Result(spec.name, path, budget, rows, sc, two, r_n, r_t)


# ------------------------------------------------------------------ summary
def summary(out: Out, results: list[Result]) -> None:
    """Targets beside the measurements, then observations for the search's authors."""
    out("\n## Summary against the targets\n")
    out(f"| spec | synth first feas s (target <= {TARGET_FIRST_FEASIBLE_S:g}) | random first feas s | "
        f"synth HV/best | random HV/best | HV ratio vs NSGA-II @ wall (>= {TARGET_WALL_RATIO}) | "
        f"vs TPE @ wall (>= {TARGET_WALL_RATIO}) |")
    out("| --- | ---: | ---: | ---: | ---: | ---: | ---: |")
    for r in results:
        s, rn = r.rows["synth"], r.rows["random"]
        out(f"| {r.name} | {fmt(s.first_feasible_s, '.3f', 'none')} | {fmt(rn.first_feasible_s, '.3f', 'none')} | "
            f"{s.fraction:.3f} | {rn.fraction:.3f} | {r.ratio_nsga:.2f} | {r.ratio_tpe:.2f} |")
    feasible = [r for r in results if r.scoring.best > 0]
    first_ok = [r for r in feasible if (r.rows["synth"].first_feasible_s or np.inf) <= TARGET_FIRST_FEASIBLE_S]
    out(f"\n- first feasible design within {TARGET_FIRST_FEASIBLE_S:g} s on every feasible spec: "
        f"{'MET' if len(first_ok) == len(feasible) else 'MISSED'} ({len(first_ok)} of {len(feasible)}"
        + (f"; missed: {', '.join(r.name for r in feasible if r not in first_ok)}" if len(first_ok) < len(feasible)
           else "") + ")")
    infeasible = [r.name for r in results if r.scoring.best <= 0]
    if infeasible:
        out(f"- no feasible design known for: {', '.join(infeasible)}")
    key15 = f"synth, {TARGET_LEADLAG_SECONDS:g} s"
    timed = [r for r in feasible if r.rows[key15].fraction >= TARGET_LEADLAG_FRACTION]
    out(f"- {TARGET_LEADLAG_FRACTION:.0%} of the best-known HV within {TARGET_LEADLAG_SECONDS:g} s of search "
        f"(--time-limit {TARGET_LEADLAG_SECONDS:g}, budget not binding) on every feasible spec: "
        f"{'MET' if len(timed) == len(feasible) else 'MISSED'} ({len(timed)} of {len(feasible)}; "
        + ", ".join(f"{r.name} {r.rows[key15].fraction:.3f}" for r in feasible) + ")")
    two = [r for r in results if r.two_stage_third_order]
    for r in two:
        q, s = r.rows[key15], r.rows["synth"]
        ok = q.t90_s is not None and q.t90_s <= TARGET_LEADLAG_SECONDS
        out(f"- two-stage lead-lag on a third-order plant ({r.name}): {TARGET_LEADLAG_FRACTION:.0%} of the best-known "
            f"HV within {TARGET_LEADLAG_SECONDS:g} s: {'MET' if ok else 'MISSED'} ({TARGET_LEADLAG_SECONDS:g}-s run "
            f"reached {q.fraction:.3f}, t90 {secs(q.t90_s)}; budget-{r.budget} run reached "
            f"{s.fraction:.3f} in {s.wall_s:.2f} s, t90 {secs(s.t90_s)})")
    if not two:
        out("- two-stage lead-lag on a third-order plant: no such spec in this run")
    for label, attr in (("NSGA-II", "ratio_nsga"), ("TPE", "ratio_tpe")):
        vals = [getattr(r, attr) for r in feasible]
        met = [v for v in vals if v >= TARGET_WALL_RATIO]
        out(f"- equal wall time, at least {TARGET_WALL_RATIO}x the HV of {label} alone: "
            f"{'MET' if len(met) == len(vals) else 'MISSED'} (met on {len(met)} of {len(vals)} feasible specs; "
            f"ratios {', '.join(f'{r.name} {getattr(r, attr):.2f}' for r in feasible)})")
    observations(out, results)


def observations(out: Out, results: list[Result]) -> None:
    """Plain facts where synth did worse than a baseline or left budget unused."""
    notes = []
    for r in results:
        s, rn = r.rows["synth"], r.rows["random"]
        if rn.first_feasible_s is not None and (s.first_feasible_s is None or s.first_feasible_s > rn.first_feasible_s):
            notes.append(f"{r.name}: random search found a feasible design sooner ({rn.first_feasible_s:.3f} s) "
                         f"than synth ({fmt(s.first_feasible_s, '.3f', 'never')} s)")
        if rn.hv > s.hv:
            notes.append(f"{r.name}: random search at equal budget has more HV ({rn.fraction:.3f} vs "
                         f"{s.fraction:.3f} of best)")
        for name in ("NSGA-II", "TPE"):
            o = r.rows[name]
            if o.hv > s.hv:
                notes.append(f"{r.name}: {name} ({o.used} trials, {o.wall_s:.1f} s) has more HV than synth "
                             f"({o.fraction:.3f} vs {s.fraction:.3f})")
        if s.note:
            notes.append(f"{r.name}: synth {s.note} evaluations (the search ended with budget left)")
        if s.feasible == 0 and r.scoring.best > 0:
            notes.append(f"{r.name}: synth found no feasible design although others did")
    out("\n## Observations\n")
    out("\n".join(f"- {n}" for n in notes) if notes else "- none")


# ------------------------------------------------------------------ main
def spec_paths(quick: bool) -> list[str]:
    examples = sorted(glob.glob(os.path.join(ROOT, "specs", "*.toml")))
    invented = sorted(glob.glob(os.path.join(ROOT, "benchmarks", "specs", "*.toml")))
    paths = examples + invented
    if quick:
        order = [p for p in invented if os.path.basename(p) in QUICK_PICK] or invented
        paths = order[:QUICK_SPECS]
    return paths


# quick mode: the two-stage lead-lag target, an unstable plant and a right-half-plane zero (no dead time)
QUICK_PICK = ("valve_positioner.toml", "balancing_cart.toml", "rhp_zero_turbine.toml")


def machine() -> str:
    cpu = cpu_model()
    return f"nproc {os.cpu_count()}, CPU {cpu}, {platform.system()} {platform.release()}"


def versions() -> str:
    import optuna
    import scipy
    import threadpoolctl
    import synth
    return (f"python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}, "
            f"pandas {pd.__version__}, optuna {optuna.__version__}, threadpoolctl {threadpoolctl.__version__}, "
            f"synth {getattr(synth, '__version__', '?')}")


def code_version() -> str:
    """git commit of the work tree and whether synth/ has uncommitted changes (what was measured)."""
    import subprocess
    try:
        head = subprocess.run(["git", "-C", ROOT, "rev-parse", "--short", "HEAD"], capture_output=True,
                              text=True, timeout=10).stdout.strip()
        dirty = subprocess.run(["git", "-C", ROOT, "status", "--porcelain", "--", "synth"], capture_output=True,
                               text=True, timeout=10).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return "unknown"
    return f"{head or 'unknown'}{' + uncommitted changes in synth/' if dirty else ''}"


def parse_args(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help=f"budget 3000, {QUICK_SPECS} specs, short reference")
    ap.add_argument("--budget", type=int, default=None, help="evaluations per method (default 20000; quick 3000)")
    ap.add_argument("--delay-budget", type=int, default=None,
                    help="budget for plants with dead time (default 1000; quick 300)")
    ap.add_argument("--reference-seconds", type=float, default=None,
                    help="long synth runs per spec for the best-known front (default 120; quick 15)")
    ap.add_argument("--optuna-cap-seconds", type=float, default=None,
                    help="wall-time cap of each optuna-alone run (default 60; quick 15)")
    ap.add_argument("--specs", nargs="*", default=None, help="spec files (default: specs/ and benchmarks/specs/)")
    ap.add_argument("--out", default=None,
                    help="results file (default benchmarks/results/synthesis.md; quick: synthesis-quick.md)")
    a = ap.parse_args(argv)
    q = a.quick
    a.budget = a.budget or (3000 if q else 20000)
    a.delay_budget = a.delay_budget or (300 if q else 1000)
    a.reference_seconds = a.reference_seconds if a.reference_seconds is not None else (15.0 if q else 120.0)
    a.optuna_cap_seconds = a.optuna_cap_seconds if a.optuna_cap_seconds is not None else (15.0 if q else 60.0)
    a.out = a.out or os.path.join(ROOT, "benchmarks", "results", "synthesis-quick.md" if q else "synthesis.md")
    return a


def main(argv=None) -> None:
    args = parse_args(argv)
    out = Out()
    out("# Synthesis benchmark: synth against random search, NSGA-II, TPE and the seeds\n")
    out(f"- date: {datetime.datetime.now().isoformat(timespec='seconds')}")
    out(f"- machine: {machine()}; BLAS pinned to 1 thread")
    out(f"- versions: {versions()}; code {code_version()}")
    out(f"- command: python benchmarks/synthesis.py {' '.join(sys.argv[1:] if argv is None else argv)}")
    out(f"- budget {args.budget} (dead time: {args.delay_budget}); optuna cap {args.optuna_cap_seconds:g} s; "
        f"reference {args.reference_seconds:g} s per spec; seed {SEED} for every method")
    t0 = time.perf_counter()
    specs = load_specs(args.specs or spec_paths(args.quick))
    results = []
    with threadpool_limits(limits=1):
        for path, spec, digest in specs:
            results.append(bench_spec(path, spec, digest, args, out))
        summary(out, results)
    out(f"\ntotal wall time {time.perf_counter() - t0:.0f} s")
    os.makedirs(os.path.dirname(args.out), exist_ok=True)
    with open(args.out, "w") as f:
        f.write("\n".join(out.lines) + "\n")


if __name__ == "__main__":
    main()
