"""The global search: seeds, quasi-random screening, model-based trials, polishing.

Evaluations are cheap (tens of microseconds each, batched) while optuna's
bookkeeping costs about a millisecond per trial, so the search maps the feasible
region with large scrambled-Sobol batches (Owen 1998; scipy.stats.qmc) screened
by the cheap metrics first ("screening"), hands the best feasible and
near-feasible points to a constrained multi-objective TPE (Ozaki et al., GECCO
2020 / JAIR 2022; optuna) for a bounded number of trials asked and told in
batches ("model-based"), refines the whole front with batched constraint-aware
local searches along Chebyshev directions (``refine.py``, "front refinement")
and solves convex programs in the numerator coefficients with the poles fixed
(``convex.py``, "convex step").

Anytime: the time limit governs and the budget is a cap. After the first round
the search keeps restarting phases (new quasi-random points, a new TPE study,
a denser set of front directions, the convex step) until the clock or the
budget ends it; a finished run resumed with a larger budget or a new time limit
continues the same way. Batches are sized so that the clock is checked often
(small batches for dead-time plants, whose evaluations are slow) and the last
batch is trimmed to the time left. The search only asks for parameter vectors
and is told metrics; the evaluator knows nothing of it. Deterministic for a
given seed and budget when the budget, not the clock, ends the run.
"""

from __future__ import annotations

import time as _time
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd
from scipy.stats import qmc

from ..evaluate import EvalOptions, evaluate
from ..lti import TransferFunction
from ..rank import violation
from ..requirements import REQUIREMENTS, requirement_value
from ..rank import hypervolume, non_dominated_sort
from .convex import convex_step
from .refine import front_refine
from .seeds import seeds as classical_seeds
from .space import Space, build_space, build_space_models

SOBOL_BATCH = 2048
SLOW_BATCH = 64           # dead-time plants: evaluations are slow, check the clock often
RESTART_SOBOL = 4096      # quasi-random points per restart round (rational plants)
RESTART_TPE = 128         # TPE trials per restart round
PHASE_LABELS = {"seeds": "seeds", "sobol": "screening", "optuna": "model-based", "front": "front refinement",
                "convex": "convex step", "polish": "front refinement", "done": "done"}
ROUND0 = ["seeds", "sobol", "optuna", "front", "convex", "front"]
ROUNDS = ["sobol", "optuna", "front", "convex", "front"]
PHASE_SOURCES = {"seeds": "seed", "sobol": "sobol", "optuna": "tpe", "front": "front", "polish": "front",
                 "convex": "convex"}
TRIM_SAFETY = 1.5         # the last batch of a phase is trimmed to 1/1.5 of the time its rows would take
RESTORE_POLLS = 8         # batches of the early feasibility restoration
UNKNOWN_COST = 5.0        # first batch of a source: rows assumed 5x the dearest seen (screening is cheap)
HV_EVERY_S = 0.25         # recompute the progress hypervolume at most this often
MAX_DRAW_FACTOR = 20      # give up on quasi-random draws when the prefilter rejects nearly all
OPTUNA_BATCH = 32
OBJECTIVE_FLOOR = 1e-9
CHUNK_SPLIT = 8           # with an executor a batch becomes up to this many evaluator tasks ...
CHUNK_ROWS = 64           # ... of at least this many rows (the evaluator's fixed cost per call, ~50 ms,
                          # is worth ~64 rows of a dead-time loop); a function of the batch length only,
                          # so the rows never depend on the number of workers


@dataclass
class Settings:
    budget: int = 20000          # evaluations (rows handed to the evaluator)
    time_limit_s: float = 30.0
    seed: int = 0
    optuna_trials: int = 256     # bounded: optuna costs ~1 ms per trial, evaluations ~20 us
    sobol_share: float = 0.7     # share of the budget for quasi-random screening


@dataclass
class Progress:
    """One progress report. ``phase`` says what runs (screening, model-based, front
    refinement, convex step); ``hypervolume`` is the feasible front's hypervolume with
    each objective divided by its reference (the requirement limit where a max_
    requirement bounds it, else twice the worst value of the first feasible designs),
    reference point 1 (Zitzler & Thiele 1998); None before the first feasible design."""
    phase: str
    evaluated: int
    feasible: int
    best: dict = field(default_factory=dict)
    elapsed_s: float = 0.0
    hypervolume: float | None = None
    round: int = 0
    front_size: int = 0


class Search:
    """One search over a spec's compensator family; resumable from a stored state."""

    def __init__(self, plant: TransferFunction, controller, requirements: dict, objectives: tuple[str, ...],
                 settings: Settings, eval_options: EvalOptions,
                 on_batch: Callable[[pd.DataFrame, dict], None] | None = None,
                 on_progress: Callable[[Progress], None] | None = None, executor=None, models=None):
        self.plant = plant
        self.executor = executor          # a concurrent.futures.Executor (synth.executor), or None: in-process
        self.chunk_rows = CHUNK_ROWS
        self.models = models if models is not None and not models.trivial else None   # synth.models.ModelSet
        self.requirements = dict(requirements)
        self.objectives = tuple(objectives)
        self.settings = settings
        self.space: Space = (build_space(plant, controller, self.requirements) if self.models is None
                             else build_space_models(self.models, controller, self.requirements))
        self.options = EvalOptions(settling_band=eval_options.settling_band,
                                   pade_order=eval_options.pade_order, screen=True)
        self.on_batch = on_batch
        self.on_progress = on_progress
        self.frames: list[pd.DataFrame] = []
        self.state = {"phase": "seeds", "evaluated": 0, "sobol_drawn": 0, "sobol_evaluated": 0, "optuna_done": 0,
                      "polish_rounds": 0, "next_id": 1, "first_feasible_s": None, "search_s": 0.0,
                      "round": 0, "step": 0, "convex_solves": 0, "hv_ref": None}
        self._t0 = 0.0
        self._feasible = 0
        self.slow = float(getattr(plant, "delay", 0.0) or 0.0) > 0.0
        self._sec_per_row: dict[str, float] = {}   # measured cost per row and source, to trim the last batch
        self._front = np.zeros((0, len(self.objectives)))
        self._hv = None
        self._hv_at = -1.0
        self._hv_dirty = False
        self._phase_end = np.inf
        self.reserve_s = 0.0              # seconds of the limit kept for the work after the search (set by the run)
        try:                              # the convex step's solver: imported before the clock starts
            import cvxpy  # noqa: F401
        except ImportError:               # pragma: no cover - a declared dependency
            pass

    # ----------------------------------------------------------------- plumbing
    @property
    def ucols(self) -> list[str]:
        return [f"u{i}" for i in range(self.space.dim)]

    def restore(self, previous: pd.DataFrame, state: dict) -> None:
        """Continue after an interrupt: the stored rows and counters replace a fresh start."""
        if not previous.empty:
            self.frames = [previous]
            self._feasible = int(previous["feasible"].sum())
            self._update_front(previous)
        state = dict(state)
        if state and "round" not in state:     # state written before restart rounds existed
            old = {"seeds": 0, "sobol": 1, "optuna": 2, "polish": 3}
            ph = state.get("phase", "seeds")
            state.update(round=0, step=old[ph]) if ph in old else state.update(round=1, step=0)
        self.state.update(state)

    def warm_start(self, rows: pd.DataFrame) -> None:
        """Candidates from an earlier run (tighten): evaluated first, as the seed phase."""
        self._warm = rows[self.ucols].to_numpy() if not rows.empty else None

    def evaluate_u(self, u: np.ndarray, source: str) -> pd.DataFrame:
        """Decode, prefilter, evaluate and record one batch of unit-cube points."""
        u = np.atleast_2d(u)
        params = self.space.decode(u)
        keep = self.space.prefilter(params)
        self.last_keep = keep
        u, params = u[keep], params[keep]
        if len(u) == 0:
            return pd.DataFrame()
        t0 = _time.perf_counter()
        df = self.evaluate_params(params)
        dt = (_time.perf_counter() - t0) / len(df)
        old = self._sec_per_row.get(source)
        self._sec_per_row[source] = dt if old is None else max(dt, 0.5 * old + 0.5 * dt)
        df.insert(0, "id", np.arange(self.state["next_id"], self.state["next_id"] + len(df)))
        df.insert(1, "source", source)
        for i, c in enumerate(self.ucols):
            df[c] = u[:, i]
        self.state["next_id"] += len(df)
        self.state["evaluated"] += len(df)
        nf = int(df["feasible"].sum())
        self._feasible += nf
        if nf and self.state["first_feasible_s"] is None:
            self.state["first_feasible_s"] = self._elapsed()
        self.frames.append(df)
        if nf:
            self._update_front(df)
        if self.on_batch:
            self.on_batch(df, dict(self.state, search_s=self._elapsed()))
        self._report()
        return df

    def evaluate_params(self, params: np.ndarray) -> pd.DataFrame:
        """The one place the search hands a parameter batch to the evaluator (the seam for
        model sets and for where the work runs). With a model set the nominal model screens
        first and every model judges the survivors. With an executor the batch is split into
        chunks (CHUNK_SPLIT, CHUNK_ROWS) submitted as pure tasks and merged in submission order,
        so the rows do not depend on how many workers there are or which one ran what."""
        task = (self.plant, self.space.family)
        extra = (self.models, self.objectives)
        if self.executor is None:
            return evaluate_batch(*task, params, self.requirements, self.options, *extra)
        rows = max(self.chunk_rows, -(-len(params) // CHUNK_SPLIT))
        futures = [self.executor.submit(evaluate_batch, *task, params[i:i + rows], self.requirements, self.options,
                                        *extra)
                   for i in range(0, len(params), rows)]
        return pd.concat([f.result() for f in futures], ignore_index=True)

    def _elapsed(self) -> float:
        return self.state.get("search_s_before", 0.0) + (_time.perf_counter() - self._t0)

    def _limit(self) -> float:
        """Seconds of search allowed: the time limit less what the run keeps for ranking and
        certifying the first rows when the search ends (``reserve_s``)."""
        return self.settings.time_limit_s - self.reserve_s

    def _out_of_time(self) -> bool:
        return self._elapsed() >= min(self._limit(), self._phase_end)

    def _left(self) -> int:
        return self.settings.budget - self.state["evaluated"]

    def fit(self, n: int) -> int:
        """Rows of a batch that fit in the budget and, by the measured cost per row, in
        the time left (the clock only trims when it binds, so budget-bound runs stay
        deterministic)."""
        n = min(int(n), self._left())
        src = PHASE_SOURCES.get(self.state.get("phase"), "")
        spr = self._sec_per_row.get(src)
        if spr is None and self._sec_per_row:     # a new kind of batch: assume a full evaluation's cost
            spr = UNKNOWN_COST * max(self._sec_per_row.values())
        if spr and n > 0:
            left_s = min(self._limit(), self._phase_end) - self._elapsed()
            fits = int(left_s / (TRIM_SAFETY * spr))
            if fits < n:
                n = max(fits, 0)
        return max(n, 0)

    def time_left(self) -> float:
        """Seconds until the time limit or the current phase's share of it."""
        return min(self._limit(), self._phase_end) - self._elapsed()

    def batch_size(self, n: int) -> int:
        """Batch size for a phase: ``n`` for rational plants, SLOW_BATCH for dead-time plants."""
        return min(n, SLOW_BATCH) if self.slow else n

    # ------------------------------------------------------------ front and progress
    def objective_refs(self, F: np.ndarray) -> np.ndarray:
        """Per-objective divisors for the progress hypervolume (fixed once, kept in the state)."""
        if self.state.get("hv_ref") is None:
            refs = []
            for j, o in enumerate(self.objectives):
                lim = [float(v) for k, v in self.requirements.items()
                       if REQUIREMENTS[k].metric == o and REQUIREMENTS[k].sense == "max"]
                if lim and min(lim) > 0:
                    refs.append(min(lim))
                else:
                    col = F[:, j][np.isfinite(F[:, j])]
                    refs.append(float(2.0 * max(np.abs(col).max(), OBJECTIVE_FLOOR)) if col.size else 1.0)
            self.state["hv_ref"] = refs
        return np.asarray(self.state["hv_ref"], float)

    def _update_front(self, df: pd.DataFrame) -> None:
        feas = df[df["feasible"].to_numpy(bool)]
        if feas.empty:
            return
        F = feas[list(self.objectives)].to_numpy(float)
        F = F[np.all(np.isfinite(F), axis=1)]
        if not len(F):
            return
        P = np.vstack([self._front, F])
        if len(P) > 1:
            P = P[non_dominated_sort(P) == 0]
        self._front = np.unique(P, axis=0)
        self._hv_dirty = True

    def front_hypervolume(self) -> float | None:
        """Hypervolume of the feasible front in the normalised units of :class:`Progress`."""
        if not len(self._front):
            return None
        if self._hv_dirty or self._hv is None:
            refs = self.objective_refs(self._front)
            self._hv = float(hypervolume(np.abs(self._front) / refs, np.ones(len(refs))))
            self._hv_dirty = False
        return self._hv

    def _report(self, force: bool = False) -> None:
        if not self.on_progress:
            return
        best = {}
        if len(self._front):
            best = {o: float(self._front[:, j].min()) for j, o in enumerate(self.objectives)}
        now = self._elapsed()
        if force or self._hv is None or now - self._hv_at >= HV_EVERY_S:
            self.front_hypervolume()
            self._hv_at = now
        self.on_progress(Progress(PHASE_LABELS.get(self.state["phase"], self.state["phase"]),
                                  self.state["evaluated"], self._feasible, best, now, self._hv,
                                  int(self.state.get("round", 0)), len(self._front)))

    def all_rows(self) -> pd.DataFrame:
        if not self.frames:
            return pd.DataFrame()
        if len(self.frames) > 1:
            self.frames = [pd.concat(self.frames, ignore_index=True)]
        return self.frames[0]

    # ---------------------------------------------------------------- phases
    def run(self) -> pd.DataFrame:
        """Run (or continue) the phases, restarting them while budget and time remain."""
        self._t0 = _time.perf_counter()
        self.state["search_s_before"] = self.state.get("search_s", 0.0)
        if self.state.get("phase") == "done":          # a finished run, extended
            self.state["round"] = int(self.state.get("round", 0)) + 1
            self.state["step"] = 0
        self.state.setdefault("round_start", self.state["evaluated"])
        while self._left() > 0 and not self._out_of_time():
            plan = ROUND0 if self.state["round"] == 0 else ROUNDS
            step = int(self.state.get("step", 0))
            if step >= len(plan):
                if self.state["round"] > 0 and self.state["evaluated"] == self.state["round_start"]:
                    break                  # a whole restart round found nothing left to try
                self.state["round"] += 1
                self.state["step"] = 0
                self.state["round_start"] = self.state["evaluated"]
                continue
            ph = plan[step]
            self.state["phase"] = ph
            self._phase_end = self._phase_deadline(ph)
            getattr(self, f"_phase_{ph}")()
            self._phase_end = np.inf
            self._report(force=True)
            if self._left() > 0 and self._elapsed() < self._limit():
                self.state["step"] = step + 1      # an interrupted phase is re-entered on resume
        self.state["phase"] = "done"
        self.state["search_s"] = self._elapsed()
        self._report(force=True)
        return self.all_rows()

    def _phase_deadline(self, ph: str) -> float:
        """Share of the time left a phase may use (restart rounds keep every phase short).

        Only when the budget would outlast the clock at the rate seen so far: a run the
        budget ends stays free of clock effects, hence deterministic."""
        left = self._limit() - self._elapsed()
        if not np.isfinite(left):
            return np.inf
        ev = self.state["evaluated"]
        if ev > 0 and self._left() * (self._elapsed() / ev) <= 0.8 * left:
            return np.inf     # the budget will end the run well within the limit: no clock in the phases
        share = {"seeds": 0.3, "sobol": 0.3, "optuna": 0.2, "front": 0.5, "convex": 0.3}[ph]
        if self.state["round"] > 0:
            share = min(share, 0.25)
        return self._elapsed() + share * left

    def _phase_seeds(self) -> None:
        raw = classical_seeds(self.plant, self.space, self.requirements)
        u = self.space.encode(raw) if len(raw) else np.zeros((0, self.space.dim))
        warm = getattr(self, "_warm", None)
        if warm is not None and len(warm):
            u = np.vstack([warm, u])
        b = self.batch_size(len(u))
        for i in range(0, len(u), max(b, 1)):
            n = self.fit(min(b, len(u) - i))
            if n <= 0 or self._out_of_time():
                break
            self.evaluate_u(u[i:i + n], "seed")

    def _phase_sobol(self) -> None:
        share = int(self.settings.sobol_share * self.settings.budget)
        if self.state["round"] > 0:      # restart: a further block of the same sequence
            share = self.state["sobol_evaluated"] + min(RESTART_SOBOL, max(self._left() // 4, 1))
            if self.slow:
                share = self.state["sobol_evaluated"] + min(4 * SLOW_BATCH, max(self._left() // 4, 1))
        sob = qmc.Sobol(self.space.dim, scramble=True, seed=self.settings.seed)
        if self.state["sobol_drawn"]:
            sob.fast_forward(self.state["sobol_drawn"])
        # counts evaluations (points the prefilter lets through), with a cap on points drawn
        cap = MAX_DRAW_FACTOR * max(share, int(self.settings.sobol_share * self.settings.budget))
        while (self.state["sobol_evaluated"] < share and self._left() > 0 and not self._out_of_time()
               and self.state["sobol_drawn"] < cap):
            n = self.fit(min(self.batch_size(SOBOL_BATCH), share - self.state["sobol_evaluated"]))
            if n <= 0:
                break
            with warnings.catch_warnings():   # a last, shorter batch is fine for screening
                warnings.simplefilter("ignore", UserWarning)
                u = sob.random(n)
            self.state["sobol_drawn"] += n
            before = self.state["evaluated"]
            self.evaluate_u(u, "sobol")
            self.state["sobol_evaluated"] += self.state["evaluated"] - before
            if self._feasible == 0 and not self.state.get("restored") and self._left() > 0:
                # nothing feasible after the seeds and a first screening batch: a short
                # feasibility restoration from the least violating points, then screen on
                self.state["restored"] = True
                front_refine(self, max_polls=RESTORE_POLLS)

    def _phase_optuna(self) -> None:
        import optuna
        optuna.logging.set_verbosity(optuna.logging.WARNING)
        r = int(self.state["round"])
        if r == 0:
            n_trials = min(self.settings.optuna_trials, max(self._left() // 2, 0)) - self.state["optuna_done"]
        else:
            n_trials = min(RESTART_TPE, max(self._left() // 4, 0))
        if n_trials <= 0:
            return
        sampler = optuna.samplers.TPESampler(multivariate=True, seed=self.settings.seed + 1 + 7919 * r,
                                             n_startup_trials=0, constant_liar=True)
        study = optuna.create_study(directions=["minimize"] * len(self.objectives), sampler=sampler)
        dist = {c: optuna.distributions.FloatDistribution(0.0, 1.0) for c in self.ucols}
        for _, row in self._elite(64, offset=r).iterrows():
            values, cons = self._trial_values(row)
            study.add_trial(optuna.trial.create_trial(
                params={c: float(row[c]) for c in self.ucols}, distributions=dist,
                values=values, constraints=cons))
        done = 0
        while done < n_trials and self._left() > 0 and not self._out_of_time():
            b = self.fit(min(OPTUNA_BATCH, n_trials - done))
            if b <= 0:
                break
            trials = [study.ask(dist) for _ in range(b)]
            u = np.array([[t.params[c] for c in self.ucols] for t in trials])
            df = self.evaluate_u(u, "tpe")
            keep = self.last_keep
            rows = iter(df.itertuples(index=False)) if not df.empty else iter(())
            cols = list(df.columns)
            for t, k in zip(trials, keep):
                if k:
                    row = pd.Series(next(rows), index=cols)
                    values, cons = self._trial_values(row)
                else:
                    values, cons = [1e3] * len(self.objectives), {"prefilter": 1e3}
                for key, v in cons.items():
                    t.set_constraint(key, v)
                study.tell(t, values)
            done += b
            self.state["optuna_done"] += b

    def _phase_front(self) -> None:
        front_refine(self)

    def _phase_convex(self) -> None:
        convex_step(self)

    _phase_polish = _phase_front      # state files written before the front refinement

    # ------------------------------------------------------------ helpers
    def objective_matrix(self, df: pd.DataFrame) -> np.ndarray:
        """log10 of the objectives (all minimised; non-positive values floored)."""
        f = df[list(self.objectives)].to_numpy(float)
        f = np.where(np.isfinite(f), f, np.inf)
        return np.log10(np.maximum(np.abs(f), OBJECTIVE_FLOOR))

    def _trial_values(self, row: pd.Series) -> tuple[list[float], dict[str, float]]:
        f = self.objective_matrix(row.to_frame().T)[0]
        values = [float(v) if np.isfinite(v) else 1e3 for v in f]
        cons = {}
        for key, limit in self.requirements.items():
            s = float(row.get(f"slack_{key}", -np.inf))
            scale = max(abs(float(limit)), 1e-3)
            cons[key] = float(np.clip(-s / scale, -1e3, 1e3)) if np.isfinite(s) else 1e3
        if not cons:
            cons["stable"] = 0.0 if bool(row["internally_stable"]) else 1e3
        return values, cons

    def _elite(self, k: int, offset: int = 0) -> pd.DataFrame:
        """Best feasible rows (by summed log objectives) then least-violating infeasible ones.

        ``offset`` (the restart round) takes every feasible row's score with a rotated
        weight vector, so that each restart starts its model from another part of the front."""
        df = self.all_rows()
        if df.empty:
            return df
        feas = df[df["feasible"]]
        if len(feas):
            F = self.objective_matrix(feas)
            w = np.ones(F.shape[1])
            if offset and F.shape[1] > 1:
                w = np.roll(np.linspace(0.2, 1.8, F.shape[1]), offset)
            order = np.argsort((np.where(np.isfinite(F), F, 1e3) * w).sum(axis=1), kind="stable")
            feas = feas.iloc[order[:k]]
        rest = df[~df["feasible"]]
        v = violation(rest, self.requirements)
        rest = rest.iloc[np.argsort(v, kind="stable")[: max(k - len(feas), k // 4)]]
        rest = rest[np.isfinite(violation(rest, self.requirements))]
        return pd.concat([feas, rest])


def evaluate_batch(plant, family, params, requirements, options, models=None, objectives=()) -> pd.DataFrame:
    """One evaluator task: (plant, family, parameter batch, requirements, options[, model set,
    objectives]) -> metrics frame; with a model set the worst case over its models
    (synth.evaluate.robust.evaluate_models). Pure (no storage, no search state), so it may run
    in any process, twice."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        if models is not None:
            from ..evaluate.robust import evaluate_models
            return evaluate_models(models, family, params, requirements, options, tuple(objectives))
        df = evaluate(plant, family, params, requirements, options)
        df["robust_stable"] = df["internally_stable"]
        return df


def requirement_conflicts(df: pd.DataFrame, requirements: dict) -> list[dict]:
    """For each requirement: the best value reached among candidates meeting all the others.

    Tells the engineer which requirement is the one in conflict when nothing is
    feasible: if dropping requirement r leaves feasible candidates, r is in
    conflict with the rest, and the best value seen shows by how much.
    """
    out = []
    stable = df["internally_stable"].to_numpy(bool)
    for key in requirements:
        others = stable.copy()
        for k2 in requirements:
            if k2 != key:
                others &= df[f"met_{k2}"].to_numpy(bool)
        req = REQUIREMENTS[key]
        n = int(others.sum())
        best = None
        if n:
            vals = requirement_value(req, df[others])
            vals = vals[np.isfinite(vals)] if np.any(np.isfinite(vals)) else vals
            best = float(vals.max() if req.sense == "min" else vals.min()) if len(vals) else None
        out.append({"requirement": key, "limit": float(requirements[key]), "candidates_meeting_others": n,
                    "best_value_when_dropped": best})
    return out
