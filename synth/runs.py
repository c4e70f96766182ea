"""Runs: from a spec to a stored, ranked, certified set of designs.

The glue between the pure parts (search, evaluator, ranking) and the run folder;
the CLI calls these functions and prints what they return.
"""

from __future__ import annotations

import platform
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__
from .archive import ArchiveError, RunStore, default_run_dir
from .evaluate import EvalOptions, evaluate
from .lti import TransferFunction
from .rank import rank
from .search.explore import Progress, Search, Settings, requirement_conflicts
from .search.space import build_space
from .spec import Spec, SpecError, load_spec


@dataclass
class Run:
    folder: Path
    spec: Spec
    store: RunStore
    manifest: dict


def settings_from(spec: Spec, budget=None, time_limit=None, seed=None) -> Settings:
    s = dict(spec.search)
    return Settings(budget=int(budget if budget is not None else s.get("budget", 20000)),
                    time_limit_s=float(time_limit if time_limit is not None else s.get("time_limit_s", 30.0)),
                    seed=int(seed if seed is not None else s.get("seed", 0)))


def _versions() -> dict:
    import optuna
    import scipy
    return {"synth": __version__, "python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "pandas": pd.__version__, "optuna": optuna.__version__}


def open_run(folder: Path) -> Run:
    """Open an existing run folder (spec re-validated, manifest read)."""
    store = RunStore.open(folder)
    try:
        spec = load_spec(store.spec_path)
    except SpecError as e:
        raise ArchiveError(f"{folder}: its spec.toml no longer validates: {e}") from None
    return Run(Path(folder), spec, store, store.load_json("manifest.json"))


def run_search(spec: Spec, spec_text: str, out: Path | None = None, settings: Settings | None = None,
               resume: Path | None = None, warm_params: np.ndarray | None = None,
               inherited: pd.DataFrame | None = None, extra_manifest: dict | None = None,
               on_progress=None, budget: int | None = None, time_limit: float | None = None) -> Run:
    """Create (or resume) a run folder and search until the budget or time limit is used.

    Resuming continues an interrupted run, and extends a finished one: ``budget`` is the
    new cap on the run's total evaluations, ``time_limit`` the seconds of search for this
    session (default: the run's own limit). A finished run whose budget is used up and
    that is given no larger budget is reported as an error instead of doing nothing."""
    if resume is not None:
        run = open_run(resume)
        spec, store, manifest = run.spec, run.store, run.manifest
        if "settings" not in manifest:
            raise ArchiveError(f"{resume}: manifest.json has no search settings; expected a run written by synth")
        settings = Settings(**manifest["settings"])
        previous = store.load()
        state = store.load_json("state.json")
        used = int(state.get("evaluated", 0))
        if budget is not None:
            if budget <= used:
                raise ArchiveError(f"{resume}: --budget {budget} is not larger than the {used} evaluations the "
                                   "run already used; give a larger total budget to extend it")
            settings.budget = int(budget)
        elif used >= settings.budget:
            raise ArchiveError(f"{resume}: the run already used its budget of {settings.budget} evaluations; "
                               "give --budget N (a larger total) to extend it")
        # the time limit counts this session's search time
        state["search_s"] = 0.0
        state.pop("search_s_before", None)
        settings.time_limit_s = float(time_limit if time_limit is not None else settings.time_limit_s)
        manifest["settings"] = settings.__dict__.copy()
    else:
        settings = settings or settings_from(spec)
        folder = Path(out) if out else default_run_dir(spec.name)
        store = RunStore.create(folder, spec_text)
        manifest = {"spec": spec.name, "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                    "versions": _versions(), "settings": settings.__dict__.copy(),
                    "objectives": list(spec.objectives), **(extra_manifest or {})}
        previous, state = pd.DataFrame(), {}
        if inherited is not None and not inherited.empty:
            store.append(inherited)
            previous = inherited
    t0 = time.perf_counter()

    def on_batch(df, st):
        store.append(df)
        store.save_json("state.json", st)

    search = Search(spec.plant, spec.controller, dict(spec.requirements), spec.objectives, settings,
                    EvalOptions(settling_band=spec.options.settling_band, pade_order=spec.options.pade_order),
                    on_batch=on_batch, on_progress=on_progress)
    if not previous.empty:
        search.restore(previous, state)
        if resume is None:  # inherited rows: keep their ids, continue numbering after them
            search.state["next_id"] = int(previous["id"].max()) + 1
            search.state["evaluated"] = 0
    if warm_params is not None and len(warm_params):
        search._warm = search.space.encode(warm_params)
    manifest.update({"family": search.space.family.describe(), "parameters": search.space.family.names,
                     "bounds_applied": list(search.space.notes), "infeasible_by_construction":
                     list(search.space.infeasible)})
    store.save_json("manifest.json", manifest)
    search.run()
    store.save_json("state.json", dict(search.state))
    wall = time.perf_counter() - t0
    manifest.setdefault("timings", []).append({"wall_s": round(wall, 3), "evaluated": search.state["evaluated"],
                                               "first_feasible_s": search.state["first_feasible_s"]})
    store.save_json("manifest.json", manifest)
    return Run(store.folder, spec, store, manifest)


def ranked(run: Run, requirements: dict | None = None) -> pd.DataFrame:
    """Every stored candidate of the run, ranked under ``requirements`` (default: the run's spec)."""
    df = run.store.load()
    if df.empty:
        return df
    reqs = dict(run.spec.requirements) if requirements is None else requirements
    names = run.manifest.get("parameters") or []
    return rank(df, reqs, list(run.spec.objectives), dedupe_cols=[c for c in names if c in df.columns])


def family_of(run: Run):
    return build_space(run.spec.plant, run.spec.controller, dict(run.spec.requirements)).family


def recheck(run: Run, rows: pd.DataFrame) -> pd.DataFrame:
    """Re-evaluate rows from their parameters with the exact certificate (for display/export)."""
    fam = family_of(run)
    if rows.empty:
        return rows
    params = rows[fam.names].to_numpy(float)
    opts = EvalOptions(settling_band=run.spec.options.settling_band, pade_order=run.spec.options.pade_order,
                       certify=True)
    df = evaluate(run.spec.plant, fam, params, dict(run.spec.requirements), opts)
    df.insert(0, "id", rows["id"].to_numpy())
    for c in ("rank", "front", "knee", "crowding", "violation"):
        if c in rows:
            df[c] = rows[c].to_numpy()
    return df


def controller_of(run: Run, row: pd.Series) -> TransferFunction:
    fam = family_of(run)
    num, den = fam.controllers(np.array([[float(row[c]) for c in fam.names]]))
    return TransferFunction(num[0], den[0])


def find_row(run: Run, ranked_df: pd.DataFrame, cid: int) -> pd.Series:
    hit = ranked_df[ranked_df["id"] == cid]
    if hit.empty:
        raise ArchiveError(f"{run.folder}: no candidate with id {cid}; expected one of the ids in 'synth table'")
    return hit.iloc[0]


def conflicts(run: Run) -> list[dict]:
    return requirement_conflicts(run.store.load(), dict(run.spec.requirements))
