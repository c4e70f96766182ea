"""Runs: from a spec to a stored, ranked, certified set of designs.

The glue between the pure parts (search, evaluator, ranking) and the run folder;
the API (:mod:`synth.api`) and the CLI call these functions and print what they return.

When a search ends (design, resume, tighten) the ranking of every candidate and
the certified records of the first rows are stored in the run
(:meth:`synth.archive.RunStore.save_ranking`), so showing a table afterwards reads
them instead of re-ranking and re-certifying. Heavy modules (pandas, the evaluator,
the search) are imported where they are used, so that reading a stored table stays
quick.
"""

from __future__ import annotations

import platform
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Iterator

import numpy as np

from . import __version__
from .archive import ArchiveError, RunStore, default_run_dir
from .lti import TransferFunction
from .metric_names import METRICS
from .spec import Spec, SpecError, load_spec

SHOWN_STORED = 50          # rows whose certified records are stored when a search ends
MIN_SHOWN = 10             # ... never fewer, even when the time limit is nearly used up (the default --top)
RESERVE_PROBE = 8          # stable rows certified once, timed, to learn what certifying a row costs
RESERVE_SHARE = 0.25       # at most this share of the time limit is kept back for the final ranking
RANK_PROBE_ROWS = 2000     # stored rows when ranking them is timed once (what the final ranking will cost)
RANK_WRITE_FACTOR = 1.5    # the final ranking also writes the ranking back: ~half again of reading and ranking
RECORD_CHUNK = 2000        # rows per chunk when streaming records of a whole run


@dataclass
class Run:
    folder: Path
    spec: Spec
    store: RunStore
    manifest: dict


@dataclass
class TableView:
    """What a table shows: the run's counts and the JSON row records, best first."""
    total: int
    feasible: int
    records: Iterable[dict]
    stored: bool = True        # False when the ranking had to be computed (run in progress)


def settings_from(spec: Spec, budget=None, time_limit=None, seed=None):
    from .search.explore import Settings
    s = dict(spec.search)
    return Settings(budget=int(budget if budget is not None else s.get("budget", 20000)),
                    time_limit_s=float(time_limit if time_limit is not None else s.get("time_limit_s", 30.0)),
                    seed=int(seed if seed is not None else s.get("seed", 0)))


def _versions() -> dict:
    import optuna
    import pandas as pd
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


def run_search(spec: Spec, spec_text: str, out: Path | None = None, settings=None,
               resume: Path | None = None, warm_params: np.ndarray | None = None,
               inherited=None, extra_manifest: dict | None = None,
               on_progress=None, shown: int = SHOWN_STORED, executor=None,
               budget: int | None = None, time_limit: float | None = None) -> Run:
    """Create (or resume) a run folder and search until the budget or time limit is used.

    The folder is locked for writing (:mod:`synth.runlock`) from start to end; a second
    writer gets ArchiveError "run folder in use by process N". When the search ends the
    ranking and the certified records of the first ``shown`` rows are stored.
    ``executor`` (synth.executor) runs the evaluator's batches; None runs them in-process.
    Storage stays here in the calling process: one writer per run folder.
    Resuming continues an interrupted run, and extends a finished one: ``budget`` is the
    new cap on the run's total evaluations, ``time_limit`` the seconds (search and ranking) for this
    session (default: the run's own limit). A finished run whose budget is used up and
    that is given no larger budget is reported as an error instead of doing nothing.
    """
    import pandas as pd
    from .search.explore import Settings
    if resume is not None:
        run = open_run(resume)
        spec, store, manifest = run.spec, run.store, run.manifest
        if "settings" not in manifest:
            raise ArchiveError(f"{resume}: manifest.json has no search settings; expected a run written by synth")
        store.lock_for_writing()
    else:
        folder = Path(out) if out else default_run_dir(spec.name)
        store = RunStore.create(folder, spec_text)
    try:
        if resume is not None:
            settings = Settings(**manifest["settings"])
            previous = store.load()
            state = store.load_state()
            used = int(state.get("evaluated", 0))
            if budget is not None:
                if budget <= used:
                    raise ArchiveError(f"{resume}: --budget {budget} is not larger than the {used} evaluations "
                                       "the run already used; give a larger total budget to extend it")
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
            manifest = new_manifest(spec, settings, extra_manifest)
            previous, state = pd.DataFrame(), {}
            if inherited is not None and not inherited.empty:
                store.append(inherited)
                previous = inherited
        t0 = time.perf_counter()
        finish = FinishCost()                   # what ranking and certifying will take, learned on the way

        def on_batch(df, st):
            store.append(df, state=st)          # rows and the state after them: one transaction
            store.save_json("state.json", st)
            finish.learn(spec, Run(store.folder, spec, store, manifest), df, int(st["evaluated"]))
            search.reserve_s = finish.reserve(settings.time_limit_s, shown, int(st["evaluated"]))

        search = make_search(spec, settings, on_batch, on_progress, executor)
        if not previous.empty:
            search.restore(previous, state)
            if resume is None:  # inherited rows: keep their ids, continue numbering after them
                search.state["evaluated"] = 0
            # never reuse an id, whatever the state says
            search.state["next_id"] = max(int(search.state.get("next_id", 1)), int(previous["id"].max()) + 1)
        if warm_params is not None and len(warm_params):
            search._warm = search.space.encode(warm_params)
        manifest.update(space_manifest(search))
        store.save_json("manifest.json", manifest)
        finish.setup_s = time.perf_counter() - t0    # before the search clock starts
        search.run()
        store.save_json("state.json", dict(search.state))
        shown = finish.rows_that_fit(settings.time_limit_s - (time.perf_counter() - t0), shown)
        run = Run(store.folder, spec, store, manifest)
        _report_phase(on_progress, "ranking", search)
        t1 = time.perf_counter()
        store_ranking(run, shown)
        add_timing(manifest, time.perf_counter() - t0, search.state, time.perf_counter() - t1)
        store.save_json("manifest.json", manifest)
        return run
    finally:
        store.close()


def new_manifest(spec: Spec, settings, extra: dict | None = None) -> dict:
    """The manifest of a new run: spec name, time, versions, search settings, objectives."""
    return {"spec": spec.name, "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "versions": _versions(), "settings": settings.__dict__.copy(),
            "objectives": list(spec.objectives), **(extra or {})}


def make_search(spec: Spec, settings, on_batch=None, on_progress=None, executor=None):
    """The search of a spec (no storage: ``on_batch`` receives each evaluated batch)."""
    from .evaluate import EvalOptions
    from .search.explore import Search
    return Search(spec.plant, spec.controller, dict(spec.requirements), spec.objectives, settings,
                  EvalOptions(settling_band=spec.options.settling_band, pade_order=spec.options.pade_order),
                  on_batch=on_batch, on_progress=on_progress, executor=executor, models=spec.models)


def space_manifest(search) -> dict:
    """What the manifest records about the search space: family, parameter names, bounds applied."""
    sp = search.space
    return {"family": sp.family.describe(), "parameters": sp.family.names,
            "bounds_applied": list(sp.notes), "infeasible_by_construction": list(sp.infeasible)}


def add_timing(manifest: dict, wall_s: float, state: dict, ranking_s: float) -> None:
    """One session's timings: ``wall_s`` search and final ranking, ``ranking_s`` the ranking alone
    (ranking every row and certifying the first ones), seconds."""
    manifest.setdefault("timings", []).append({"wall_s": round(wall_s, 3), "ranking_s": round(ranking_s, 3),
                                               "evaluated": state["evaluated"],
                                               "first_feasible_s": state["first_feasible_s"]})


@dataclass
class FinishCost:
    """What the work after the search costs, learned during it, so that the time limit covers
    the whole run: the setup before the search clock starts, certifying one row (exact
    certificates, every model of a set: far more than screening) and ranking one stored row
    (reading the archive back, ranking, writing the ranking). Seconds."""
    setup_s: float = 0.0
    certify_row_s: float | None = None
    rank_row_s: float | None = None

    def learn(self, spec: Spec, run: Run, df, rows: int) -> None:
        """Time the two probes once each, on the first batch that allows it: RESERVE_PROBE stable
        rows of ``df`` certified (feasible ones first), and the stored ``rows`` ranked once
        there are RANK_PROBE_ROWS of them. Fixed costs per call make both overestimates."""
        if self.certify_row_s is None and not df.empty and "internally_stable" in df:
            stable = df[df["internally_stable"].to_numpy(bool)]
            if len(stable) >= RESERVE_PROBE:
                probe = stable.sort_values("feasible", ascending=False, kind="stable").head(RESERVE_PROBE)
                fam = _family(spec)
                t = time.perf_counter()
                evaluate_spec(spec, fam, probe[fam.names].to_numpy(float), certify_options(spec))
                self.certify_row_s = (time.perf_counter() - t) / len(probe)
        if self.rank_row_s is None and rows >= RANK_PROBE_ROWS:
            t = time.perf_counter()
            compute_ranked(run)
            self.rank_row_s = RANK_WRITE_FACTOR * (time.perf_counter() - t) / rows

    def reserve(self, limit_s: float, shown: int, rows: int) -> float:
        """Seconds of the limit to keep back from the search (at most RESERVE_SHARE of it)."""
        need = self.setup_s + shown * (self.certify_row_s or 0.0) + rows * (self.rank_row_s or 0.0)
        return min(RESERVE_SHARE * limit_s, need)

    def rows_that_fit(self, left_s: float, shown: int) -> int:
        """How many first rows to certify in ``left_s`` seconds: ``shown`` at most, MIN_SHOWN at least."""
        if not self.certify_row_s or not np.isfinite(left_s):
            return shown
        return max(min(shown, MIN_SHOWN), min(shown, int(left_s / self.certify_row_s)))


def _report_phase(on_progress, phase: str, search) -> None:
    """Tell the progress display about the post-search work (ranking, certificates)."""
    if on_progress is None:
        return
    from .search.explore import Progress
    on_progress(Progress(phase, search.state["evaluated"], search._feasible, {}, search._elapsed()))


# ------------------------------------------------------------------ ranking
def compute_ranked(run: Run, requirements: dict | None = None):
    """Rank every stored candidate under ``requirements`` (default: the run's spec), now."""
    from .rank import rank
    df = run.store.load()
    if df.empty:
        return df
    reqs = dict(run.spec.requirements) if requirements is None else requirements
    names = run.manifest.get("parameters") or []
    return rank(df, reqs, list(run.spec.objectives), dedupe_cols=[c for c in names if c in df.columns],
                family=family_of(run))     # inactive stages count as the simpler structure


def ranked(run: Run, requirements: dict | None = None):
    """Every stored candidate of the run, ranked under ``requirements`` (default: the run's spec).

    Under the run's own requirements the stored ranking is used when it covers every
    stored candidate; otherwise (a run in progress, other requirements) it is computed."""
    if requirements is None:
        stored = _stored_ranked(run)
        if stored is not None:
            return stored
    return compute_ranked(run, requirements)


def _stored_ranked(run: Run, columns=None):
    """The stored ranking joined to the stored candidates (only ``columns`` of them when given)."""
    import pandas as pd
    from .rank import _is_computed
    ranking = run.store.load_ranking()
    if ranking is None:
        return None
    df = run.store.load(columns=columns)
    if df.empty:
        return df
    base = df[[c for c in df.columns if not _is_computed(c)]]
    pos = pd.Series(np.arange(len(base)), index=base["id"].to_numpy())
    take = pos.loc[ranking["id"].to_numpy()].to_numpy()
    out = base.iloc[take]
    extra = ranking.drop(columns=["id"]).set_index(out.index)
    for c in extra.columns:
        if c in ("feasible", "knee") or c.startswith("met_"):
            extra[c] = extra[c].astype(bool)
    return pd.concat([out, extra], axis=1)


def store_ranking(run: Run, shown: int = SHOWN_STORED) -> None:
    """Rank the run now and store the ranking and the certified records of the first rows."""
    from .rank import _is_computed
    from .tables import records
    df = compute_ranked(run)
    cols = ["id"] + [c for c in df.columns if _is_computed(c)] if len(df) else ["id", "rank"]
    if df.empty:
        import pandas as pd
        df = pd.DataFrame({"id": np.zeros(0, dtype=np.int64), "rank": np.zeros(0, dtype=np.int64)})
    recs = records(run, recheck(run, df.head(shown)), details=True) if len(df) else []
    meta = {"rows": int(len(df)), "feasible": int(df["feasible"].sum()) if "feasible" in df else 0,
            "shown": len(recs)}
    run.store.save_ranking(df[cols], recs, meta)


def table_view(run: Run, n: int | None = None, sort: str | None = None, text: bool = False) -> TableView:
    """The rows a table shows (``n`` of them, every row when None), best first, as JSON records.

    The first rows come with their exact certificate (stored when the search ended, or
    computed now for rows that were not stored); with ``n=None`` the rows past those carry
    the stored screening metrics, nothing is re-evaluated, and the records are streamed.
    ``sort`` orders the feasible rows by a metric column (ascending). Raises KeyError for
    an unknown sort column. With ``text`` the records come as their JSON texts (what
    ``json.dumps`` would write), built without per-row dictionaries.
    """
    meta = run.store.ranking_meta()
    if meta is not None and sort is None and n is not None and n <= meta["shown"]:
        recs = run.store.shown_records(n, raw=text)   # the quick path: no pandas, no evaluation
        return TableView(meta["rows"], meta["feasible"], recs)
    df = None
    if n is None and meta is not None:     # every row: read only the columns a record shows
        df = _stored_ranked(run, columns=["id", *family_of(run).names, *METRICS, sort])
    if df is None:
        df = ranked(run)
    if sort is not None:
        import pandas as pd
        if sort not in df.columns:
            raise KeyError(sort)
        feas = df[df["feasible"]].sort_values(sort, kind="stable")
        df = pd.concat([feas, df[~df["feasible"]]])
    total = len(df)
    nfeas = int(df["feasible"].sum()) if total else 0
    stored = dict(zip(run.store.shown_ids(), run.store.shown_records(raw=text))) if meta is not None else {}
    if n is not None:
        return TableView(total, nfeas, list(_records(run, df.head(n), stored, True, text)), meta is not None)
    return TableView(total, nfeas, _records(run, df, stored, False, text), meta is not None)


def _records(run: Run, df, stored: dict, certify: bool, text: bool = False) -> Iterator:
    """Records of ``df``'s rows in order: stored certified ones where available, otherwise
    certified now (``certify``) or built from the stored screening metrics; as JSON texts
    with ``text``."""
    from .tables import records, records_json
    build = records_json if text else records
    ids = df["id"].to_numpy()
    have = np.fromiter((i in stored for i in ids), bool, len(ids))
    i = 0
    while i < len(df):
        j = i
        while j < len(df) and have[j] == have[i] and j - i < RECORD_CHUNK:
            j += 1
        if have[i]:
            yield from (stored[k] for k in ids[i:j])
        else:
            part = df.iloc[i:j]
            yield from (build(run, recheck(run, part), details=True) if certify and not text
                        else build(run, recheck(run, part) if certify else part))   # JSON-ready already
        i = j


def family_of(run: Run):
    return _family(run.spec)


def _family(spec: Spec):
    from .search.space import build_space
    return build_space(spec.plant, spec.controller, dict(spec.requirements)).family


def certify_options(spec: Spec):
    """Evaluator options for certified (displayed, exported) figures of the spec."""
    from .evaluate import EvalOptions
    return EvalOptions(settling_band=spec.options.settling_band, pade_order=spec.options.pade_order, certify=True)


def evaluate_spec(spec: Spec, fam, params: np.ndarray, opts):
    """Evaluate on the spec's plant, or worst-case over its model set (box certified exactly when certifying)."""
    from .evaluate import evaluate
    if spec.models is None:
        df = evaluate(spec.plant, fam, params, dict(spec.requirements), opts)
        df["robust_stable"] = df["certified"] if opts.certify else df["internally_stable"]
        return df
    from .evaluate.robust import evaluate_models
    return evaluate_models(spec.models, fam, params, dict(spec.requirements), opts, tuple(spec.objectives),
                           certify_box=opts.certify)


def recheck(run: Run, rows):
    """Re-evaluate rows from their parameters with the exact certificate (for display/export)."""
    fam = family_of(run)
    if rows.empty:
        return rows
    df = evaluate_spec(run.spec, fam, rows[fam.names].to_numpy(float), certify_options(run.spec))
    df.insert(0, "id", rows["id"].to_numpy())
    for c in ("rank", "front", "knee", "crowding", "violation"):
        if c in rows:
            df[c] = rows[c].to_numpy()
    return df


def controller_of(run: Run, row) -> TransferFunction:
    fam = family_of(run)
    num, den = fam.controllers(np.array([[float(row[c]) for c in fam.names]]))
    return TransferFunction(num[0], den[0])


def find_row(run: Run, ranked_df, cid: int):
    hit = ranked_df[ranked_df["id"] == cid]
    if hit.empty:
        raise ArchiveError(f"{run.folder}: no candidate with id {cid}; expected one of the ids in 'synth table'")
    return hit.iloc[0]


def conflicts(run: Run) -> list[dict]:
    from .search.explore import requirement_conflicts
    return requirement_conflicts(run.store.load(), dict(run.spec.requirements))
