"""The global search: seeds, quasi-random screening, model-based trials, polishing.

Evaluations are cheap (tens of microseconds each, batched) while optuna's
bookkeeping costs about a millisecond per trial, so the search maps the feasible
region with large scrambled-Sobol batches (Owen 1998; scipy.stats.qmc) screened
by the cheap metrics first, hands the best feasible and near-feasible points to
a constrained multi-objective TPE (Ozaki et al., GECCO 2020 / JAIR 2022; optuna)
for a bounded number of trials asked and told in batches, and finishes with a
batched compass search around the front (Kolda, Lewis & Torczon, SIAM Review
45, 2003). The search only asks for parameter vectors and is told metrics; the
evaluator knows nothing of it. Deterministic for a given seed and budget.
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
from .refine import compass_polish
from .seeds import seeds as classical_seeds
from .space import Space, build_space, build_space_models

SOBOL_BATCH = 2048
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
    phase: str
    evaluated: int
    feasible: int
    best: dict = field(default_factory=dict)
    elapsed_s: float = 0.0


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
                      "polish_rounds": 0, "next_id": 1, "first_feasible_s": None, "search_s": 0.0}
        self._t0 = 0.0
        self._feasible = 0

    # ----------------------------------------------------------------- plumbing
    @property
    def ucols(self) -> list[str]:
        return [f"u{i}" for i in range(self.space.dim)]

    def restore(self, previous: pd.DataFrame, state: dict) -> None:
        """Continue after an interrupt: the stored rows and counters replace a fresh start."""
        if not previous.empty:
            self.frames = [previous]
            self._feasible = int(previous["feasible"].sum())
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
        df = self.evaluate_params(params)
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

    def _out_of_time(self) -> bool:
        return self._elapsed() >= self.settings.time_limit_s

    def _left(self) -> int:
        return self.settings.budget - self.state["evaluated"]

    def _report(self) -> None:
        if not self.on_progress:
            return
        best = {}
        if self._feasible:
            allf = self.all_rows()
            f = allf[allf["feasible"]]
            best = {o: float(f[o].min()) for o in self.objectives if o in f}
        self.on_progress(Progress(self.state["phase"], self.state["evaluated"], self._feasible, best,
                                  self._elapsed()))

    def all_rows(self) -> pd.DataFrame:
        if not self.frames:
            return pd.DataFrame()
        if len(self.frames) > 1:
            self.frames = [pd.concat(self.frames, ignore_index=True)]
        return self.frames[0]

    # ---------------------------------------------------------------- phases
    def run(self) -> pd.DataFrame:
        """Run (or continue) every phase until the budget or the time limit is used."""
        self._t0 = _time.perf_counter()
        self.state["search_s_before"] = self.state.get("search_s", 0.0)
        phases = ["seeds", "sobol", "optuna", "polish", "done"]
        start = phases.index(self.state.get("phase", "seeds"))
        for ph in phases[start:-1]:
            self.state["phase"] = ph
            if self._left() <= 0 or self._out_of_time():
                break
            getattr(self, f"_phase_{ph}")()
        else:
            self.state["phase"] = "done"
        if self._left() <= 0 or self._out_of_time():
            self.state["phase"] = "done"
        self.state["search_s"] = self._elapsed()
        return self.all_rows()

    def _phase_seeds(self) -> None:
        raw = classical_seeds(self.plant, self.space, self.requirements)
        u = self.space.encode(raw) if len(raw) else np.zeros((0, self.space.dim))
        warm = getattr(self, "_warm", None)
        if warm is not None and len(warm):
            u = np.vstack([warm, u])
        if len(u):
            self.evaluate_u(u[: max(self._left(), 0)], "seed")

    def _phase_sobol(self) -> None:
        share = int(self.settings.sobol_share * self.settings.budget)
        sob = qmc.Sobol(self.space.dim, scramble=True, seed=self.settings.seed)
        if self.state["sobol_drawn"]:
            sob.fast_forward(self.state["sobol_drawn"])
        # counts evaluations (points the prefilter lets through), with a cap on points drawn
        while (self.state["sobol_evaluated"] < share and self._left() > 0 and not self._out_of_time()
               and self.state["sobol_drawn"] < MAX_DRAW_FACTOR * share):
            n = min(SOBOL_BATCH, share - self.state["sobol_evaluated"], self._left())
            with warnings.catch_warnings():   # a last, shorter batch is fine for screening
                warnings.simplefilter("ignore", UserWarning)
                u = sob.random(n)
            self.state["sobol_drawn"] += n
            before = self.state["evaluated"]
            self.evaluate_u(u, "sobol")
            self.state["sobol_evaluated"] += self.state["evaluated"] - before

    def _phase_optuna(self) -> None:
        import optuna
        optuna.logging.set_verbosity(optuna.logging.WARNING)
        n_trials = min(self.settings.optuna_trials, max(self._left() // 2, 0)) - self.state["optuna_done"]
        if n_trials <= 0:
            return
        sampler = optuna.samplers.TPESampler(multivariate=True, seed=self.settings.seed + 1,
                                             n_startup_trials=0, constant_liar=True)
        study = optuna.create_study(directions=["minimize"] * len(self.objectives), sampler=sampler)
        dist = {c: optuna.distributions.FloatDistribution(0.0, 1.0) for c in self.ucols}
        for _, row in self._elite(64).iterrows():
            values, cons = self._trial_values(row)
            study.add_trial(optuna.trial.create_trial(
                params={c: float(row[c]) for c in self.ucols}, distributions=dist,
                values=values, constraints=cons))
        done = 0
        while done < n_trials and self._left() > 0 and not self._out_of_time():
            b = min(OPTUNA_BATCH, n_trials - done, self._left())
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

    def _phase_polish(self) -> None:
        compass_polish(self)

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

    def _elite(self, k: int) -> pd.DataFrame:
        """Best feasible rows (by summed log objectives) then least-violating infeasible ones."""
        df = self.all_rows()
        if df.empty:
            return df
        feas = df[df["feasible"]]
        if len(feas):
            order = np.argsort(self.objective_matrix(feas).sum(axis=1), kind="stable")
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
