"""Many loops at once: one design per spec, run as whole-design tasks, one summary.

:func:`design_many` validates every spec (an invalid one gets its row and message,
the others still run), gives each valid spec a run folder under the output folder
(named after the spec's ``name``; clashes get ``-2``, ``-3``, ... in argument
order), submits one whole-design task per spec to an executor (a local process
pool sized to the cores by default, or a Dask cluster; see :mod:`synth.executor`)
and writes ``summary.csv``.

A design task is a pure function (spec text, settings) -> every evaluated batch and
the final search state; it never touches storage. The driver (this process) is the
only writer of every run folder: it creates each folder (spec.toml, manifest.json)
before submitting, so a run whose task never comes back (lost scheduler, broken
pool) is resumable with ``synth design --resume FOLDER``, and it writes the
candidates when a task returns. A task that is run twice (Dask re-runs the tasks of
a worker that died) returns the same rows, so nothing is lost or duplicated.
Determinism: a design's rows depend on its spec, seed and budget only (when the
budget, not the time limit, ends the search), not on where it ran.
"""

from __future__ import annotations

import concurrent.futures as cf
import csv
import io
import math
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd

from . import CAUTION
from .archive import ArchiveError, RunStore, atomic_write_text
from .executor import ClusterError, InlineExecutor, failure_message, is_infrastructure_failure, local_pool
from .runs import (add_timing, make_search, new_manifest, open_run, ranked, settings_from, space_manifest,
                   store_ranking)
from .search.explore import Settings, requirement_conflicts
from .spec import Spec, SpecError, load_spec, parse_spec

STATUSES = ("feasible", "infeasible", "invalid", "error")
BASE_COLUMNS = ["name", "spec", "status", "candidates", "feasible", "knee_id"]
TAIL_COLUMNS = ["conflict", "run_folder", "message"]


# ------------------------------------------------------------------ the task (runs anywhere)
@dataclass
class Outcome:
    """What a whole-design task returns: every evaluated batch, the final search state, wall time."""

    batches: list[pd.DataFrame]
    state: dict
    wall_s: float


def design_task(spec_text: str, source: str, settings: Settings) -> Outcome:
    """Run one spec's whole search in this process and return its rows (no storage)."""
    spec = parse_spec(spec_text, source)
    batches: list[pd.DataFrame] = []
    # closed_loop_poles is recomputed for shown rows and never stored (archive.SKIP_COLUMNS)
    search = make_search(spec, settings,
                         on_batch=lambda df, st: batches.append(df.drop(columns=["closed_loop_poles"],
                                                                        errors="ignore")))
    t0 = time.perf_counter()
    search.run()
    return Outcome(batches, dict(search.state), time.perf_counter() - t0)


# ------------------------------------------------------------------ the driver
@dataclass
class Item:
    """One spec of a multi-spec design, as the driver tracks it."""

    path: Path
    spec: Spec | None = None
    text: str = ""
    folder: Path | None = None
    settings: Settings | None = None
    row: dict = field(default_factory=dict)


def safe_name(name: str) -> str:
    """A folder name from a spec name: letters, digits, '-' and '_' kept, others become '-'."""
    return "".join(c if c.isalnum() or c in "-_" else "-" for c in name).strip("-") or "run"


def folder_names(names: list[str]) -> list[str]:
    """Distinct folder names, in order: the first of a name keeps it, later ones get -2, -3, ...

    Compared case-insensitively (so the result also works on case-insensitive file systems);
    a suffixed name never takes a name that a later spec has on its own.
    """
    bases = [safe_name(n) for n in names]
    taken = {b.lower() for b in bases}
    used: set[str] = set()
    out = []
    for b in bases:
        cand, k = b, 1
        while cand.lower() in used or (k > 1 and cand.lower() in taken):
            k += 1
            cand = f"{b}-{k}"
        used.add(cand.lower())
        out.append(cand)
    return out


def default_out_dir(root: Path = Path("runs")) -> Path:
    return root / f"design-{datetime.now(timezone.utc).strftime('%Y%m%d-%H%M%S')}"


def _prepare(paths: list[Path], out_dir: Path, budget, time_limit, seed) -> list[Item]:
    """Validate every spec and assign the folders; raise ArchiveError before any work if a
    folder is in use."""
    items = [Item(Path(p)) for p in paths]
    for it in items:
        try:
            it.spec = load_spec(it.path)
            it.text = it.path.read_text(encoding="utf-8")
            it.settings = settings_from(it.spec, budget, time_limit, seed)
        except SpecError as e:
            it.spec = None
            it.row = _row(it, "invalid", message=str(e))
        except OSError as e:
            it.spec = None
            it.row = _row(it, "invalid", message=f"{it.path}: cannot read the file ({e.strerror or e})")
    valid = [it for it in items if it.spec is not None]
    for it, name in zip(valid, folder_names([it.spec.name for it in valid])):
        it.folder = Path(out_dir) / name
        if it.folder.exists() and (not it.folder.is_dir() or any(it.folder.iterdir())):
            raise ArchiveError(f"{it.folder}: the run folder for {it.path} exists and is not empty; "
                               "expected a new --out folder (or resume that run with synth design --resume)")
    return items


def _start(it: Item) -> None:
    """Create the run folder with spec.toml and manifest.json, so it can be resumed from here."""
    store = RunStore.create(it.folder, it.text)
    manifest = new_manifest(it.spec, it.settings)
    manifest.update(space_manifest(make_search(it.spec, it.settings)))
    try:
        store.save_json("manifest.json", manifest)
    finally:
        store.close()                 # the writer lock is taken again when the design comes back


def _record(it: Item, out: Outcome) -> None:
    """Write a returned design into its run folder (one transaction per batch, as run_search)."""
    store = RunStore.open(it.folder)
    store.lock_for_writing()
    try:
        manifest = store.load_json("manifest.json")
        last = len(out.batches) - 1
        for i, df in enumerate(out.batches):
            store.append(df, state=out.state if i == last else None)   # the final state with the last batch
        if last < 0:
            store.append(pd.DataFrame(), state=out.state)
        store.save_json("state.json", out.state)
        t0 = time.perf_counter()
        store_ranking(open_run(it.folder))      # instant tables, as after a single design
        ranking_s = time.perf_counter() - t0
        add_timing(manifest, out.wall_s + ranking_s, out.state, ranking_s)
        store.save_json("manifest.json", manifest)
    finally:
        store.close()


def design_many(spec_paths, out_dir: Path, executor: cf.Executor | None = None, budget=None, time_limit=None,
                seed=None, where: str = "local pool", on_event=None) -> pd.DataFrame:
    """Design every spec in ``spec_paths`` into ``out_dir``; returns the summary (one row per spec,
    in argument order) and writes it to ``out_dir/summary.csv``.

    ``executor`` runs the whole-design tasks; None means a local process pool sized to the
    cores, or in-process for a single valid spec. Raises :class:`ArchiveError` if a run folder
    is in use (before any work) and :class:`ClusterError` if the executor fails (lost
    scheduler, broken pool), after writing every finished design and the summary.
    """
    out_dir = Path(out_dir)
    items = _prepare(list(spec_paths), out_dir, budget, time_limit, seed)
    valid = [it for it in items if it.spec is not None]
    own = executor is None
    if own:
        executor = local_pool(len(valid)) if len(valid) > 1 else InlineExecutor()
    failure, aborted = None, True
    try:
        for it in valid:
            _start(it)
        futures = {executor.submit(design_task, it.text, str(it.path), it.settings): it for it in valid}
        for f in cf.as_completed(futures):
            it = futures[f]
            try:
                out = f.result()
            except Exception as e:
                if is_infrastructure_failure(e):
                    failure = failure_message(e, where)
                    break
                it.row = _row(it, "error", message=f"{type(e).__name__}: {e}")
            else:
                _record(it, out)
                it.row = summary_row(it)
            if on_event:
                on_event(it.row)
        aborted = failure is not None
    finally:   # an interrupt or a failure does not wait for the other designs
        if own:
            executor.shutdown(wait=not aborted, cancel_futures=aborted)
    for it in valid:
        if not it.row:
            it.row = _row(it, "error", message=f"not finished ({failure}); resume with "
                                               f"synth design --resume {it.folder}")
    summary = summary_frame([it.row for it in items])
    out_dir.mkdir(parents=True, exist_ok=True)
    atomic_write_text(out_dir / "summary.csv", summary_csv(summary))
    if failure is not None:
        unfinished = [str(it.folder) for it in valid if it.row["status"] == "error" and it.folder]
        raise ClusterError(f"{failure}; finished designs and {out_dir / 'summary.csv'} are written; "
                           f"resume the others with synth design --resume FOLDER ({', '.join(unfinished)})")
    return summary


# ------------------------------------------------------------------ the summary
def _row(it: Item, status: str, message: str = "", **kw) -> dict:
    name = it.spec.name if it.spec is not None else it.path.stem
    return {"name": name, "spec": str(it.path), "status": status, "candidates": kw.get("candidates"),
            "feasible": kw.get("feasible"), "knee_id": kw.get("knee_id"), "knee": kw.get("knee", {}),
            "conflict": kw.get("conflict", ""), "run_folder": str(it.folder) if it.folder and status != "invalid"
            else "", "message": message}


def first_conflict(df_all: pd.DataFrame, requirements: dict, ranked_df: pd.DataFrame) -> str:
    """The first requirement (in the spec's order) that alone stands between the candidates and
    feasibility (dropping it leaves candidates meeting all the others); else the first one the
    least-violating candidate misses; '' when there are no candidates."""
    if df_all.empty or not requirements:
        return "" if df_all.empty else "internal stability"
    for c in requirement_conflicts(df_all, requirements):
        if c["candidates_meeting_others"] > 0:
            return c["requirement"]
    top = ranked_df.iloc[0]
    for key in requirements:
        if not bool(top.get(f"met_{key}", False)):
            return key
    return "internal stability"


def summary_row(it: Item) -> dict:
    """The summary row of a finished design, from its run folder (the ranking of synth table)."""
    run = open_run(it.folder)
    df = ranked(run)
    n = len(df)
    nf = int(df["feasible"].sum()) if n else 0
    kw = {"candidates": n, "feasible": nf}
    if nf:
        knee = df[df["knee"]] if "knee" in df else df.iloc[:0]
        k = knee.iloc[0] if len(knee) else df[df["feasible"]].iloc[0]
        kw["knee_id"] = int(k["id"])
        kw["knee"] = {o: float(k[o]) for o in run.spec.objectives}
        return _row(it, "feasible", **kw)
    kw["conflict"] = first_conflict(run.store.load(), dict(run.spec.requirements), df)
    return _row(it, "infeasible", **kw)


def summary_frame(rows: list[dict]) -> pd.DataFrame:
    """Rows -> the summary table: fixed columns, then knee_<objective> for every objective of any spec."""
    objectives: list[str] = []
    for r in rows:
        objectives += [o for o in r["knee"] if o not in objectives]
    recs = []
    for r in rows:
        rec = {c: r[c] for c in BASE_COLUMNS}
        rec.update({f"knee_{o}": r["knee"].get(o, math.nan) for o in objectives})
        rec.update({c: r[c] for c in TAIL_COLUMNS})
        recs.append(rec)
    cols = BASE_COLUMNS + [f"knee_{o}" for o in objectives] + TAIL_COLUMNS
    df = pd.DataFrame(recs, columns=cols)
    for c in ("candidates", "feasible", "knee_id"):
        df[c] = pd.array([None if _missing(v) else int(v) for v in df[c]], dtype="Int64")
    return df


def summary_csv(df: pd.DataFrame) -> str:
    """Plain CSV (RFC 4180: header first, CRLF line ends, fields quoted only when needed);
    missing values are empty fields, floats in repr precision."""
    buf = io.StringIO(newline="")
    w = csv.writer(buf, lineterminator="\r\n")
    w.writerow(df.columns)
    for rec in df.itertuples(index=False):
        w.writerow(["" if _missing(v) else (repr(float(v)) if isinstance(v, float) else v) for v in rec])
    return buf.getvalue()


def _missing(v) -> bool:
    return v is None or v is pd.NA or (isinstance(v, float) and math.isnan(v))


def summary_records(df: pd.DataFrame) -> list[dict]:
    """JSON-ready rows (missing values as null)."""
    out = []
    for rec in df.to_dict("records"):
        out.append({k: (None if _missing(v) else (int(v) if k in ("candidates", "feasible", "knee_id") else v))
                    for k, v in rec.items()})
    return out


def summary_text(df: pd.DataFrame, out_dir: Path) -> str:
    """The summary as an aligned text table, with the knee's objectives and the caution."""
    from .describe import fmt_num
    head = ["name", "status", "cand.", "feas.", "knee", "knee objectives / conflict / message"]
    body = []
    for r in summary_records(df):
        if r["status"] == "feasible":
            detail = "  ".join(f"{c[5:]}={fmt_num(v, 4)}" for c, v in r.items()
                               if c.startswith("knee_") and c != "knee_id" and v is not None)
        elif r["status"] == "infeasible":
            detail = f"conflict: {r['conflict']}"
        else:
            detail = r["message"]
        body.append([r["name"], r["status"], _txt(r["candidates"]), _txt(r["feasible"]), _txt(r["knee_id"]),
                     detail])
    widths = [max(len(str(x[i])) for x in [head] + body) for i in range(5)]
    lines = ["  ".join(str(x[i]).ljust(widths[i]) for i in range(5)) + "  " + x[5] for x in [head] + body]
    counts = df["status"].value_counts()
    lines += ["", f"{len(df)} specs: " + ", ".join(f"{int(counts.get(s, 0))} {s}" for s in STATUSES)
              + f"; run folders and summary.csv in {out_dir}", ""]
    import textwrap
    lines += textwrap.wrap(CAUTION, 100)
    return "\n".join(lines)


def _txt(v) -> str:
    return "-" if v is None else str(v)


def exit_status(df: pd.DataFrame) -> int:
    """2 when any spec was invalid, 1 when any design failed, else 0."""
    s = set(df["status"])
    return 2 if "invalid" in s else 1 if "error" in s else 0
