"""The Python API: what the command line does, as functions and a :class:`Design` object.

    import synth
    d = synth.design("specs/maglev_carriage.toml", budget=5000, seed=1, out="runs/maglev")
    d.table.head()                       # the ranked table (pandas), columns as `synth table --json`
    d.show(d.table.id[0])                # one design in full, as `synth show --json`
    d.export(d.table.id[0], "design.csv", sample_time=1e-3)
    t = d.tighten(max_overshoot_pct=10)  # a new run, warm-started from this one
    t.report("review.html")
    synth.check("specs/maglev_carriage.toml", "30*(s+20)/(s+200)")

The command-line interface (:mod:`synth.cli`) is a thin layer over these functions:
it parses arguments, calls them and prints what they return. Errors meant for the
user (a malformed spec, a run folder in use, an unknown id) are raised as
:class:`SynthError` with a message naming the file or key and what was expected.
Every dict returned here is JSON-ready, exactly what the matching ``--json`` prints.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Callable, Iterator, Mapping

from .archive import ArchiveError, default_run_dir, ordinary_mode
from .spec import Spec, SpecError

__all__ = ["Design", "SynthError", "check", "design", "open_run", "resume"]


class SynthError(Exception):
    """A user-facing problem: bad spec, bad controller, bad run folder, bad option value."""


# ------------------------------------------------------------------ inputs
def read_spec(spec) -> tuple[Spec, str]:
    """(Spec, TOML text) from a path, TOML text or a dict shaped like the TOML file."""
    from . import spec as spec_mod
    try:
        if isinstance(spec, Spec):
            return spec, spec.to_toml()
        if isinstance(spec, Mapping):
            s = spec_mod._Reader("<dict>").spec(dict(spec))
            return s, s.to_toml()
        if isinstance(spec, str) and ("\n" in spec or "=" in spec) and not Path(spec).is_file():
            return spec_mod.parse_spec(spec, "<text>"), spec
        path = Path(spec)
        s = spec_mod.load_spec(path)
        return s, path.read_text(encoding="utf-8")
    except SpecError as e:
        raise SynthError(str(e)) from None
    except (TypeError, AttributeError) as e:
        raise SynthError(f"spec: expected a path, TOML text or a dict ({e})") from None


def parse_controller(controller):
    """A compensator from an expression in s, a TransferFunction or a (numerator, denominator) pair."""
    from .expr import ExpressionError, parse_rational
    from .lti import TransferFunction
    if isinstance(controller, TransferFunction):
        c = controller
    elif isinstance(controller, str):
        try:
            c = parse_rational(controller)
        except ExpressionError as e:
            raise SynthError(f"controller: {e}") from None
    else:
        try:
            num, den = controller
            c = TransferFunction(num, den)
        except (TypeError, ValueError) as e:
            raise SynthError(f"controller: expected an expression in s or (numerator, denominator) ({e})") from None
    if c.delay:
        raise SynthError("controller: the compensator must be rational (no exp(...) dead time)")
    if not c.is_proper:
        raise SynthError(f"controller: the compensator {controller!r} is improper (numerator degree "
                         f"{c.num.size - 1} > denominator degree {c.den.size - 1}); add a filter pole")
    if not any(c.num):
        raise SynthError("controller: the compensator is identically zero")
    return c


def check_changes(changes: Mapping[str, float]) -> dict:
    """Requirement changes for tighten: known keys, numeric values."""
    from .requirements import REQUIREMENTS
    out = {}
    for k, v in changes.items():
        if k not in REQUIREMENTS and k != "settling_band":
            raise SynthError(f"{k}: not a requirement key; expected one of {', '.join(REQUIREMENTS)}")
        try:
            out[k] = float(v)
        except (TypeError, ValueError):
            raise SynthError(f"{k}={v!r}: expected a number") from None
    if not out:
        raise SynthError("tighten: no requirement changes; expected KEY=VALUE pairs such as max_overshoot_pct=10")
    return out


# ------------------------------------------------------------------ check
def check_record(spec: Spec, controller) -> dict:
    """The full check record of one compensator (numbers as Python/numpy values)."""
    from .describe import check_controller
    c = parse_controller(controller)
    return check_controller(spec.plant, c, dict(spec.requirements), spec.options.settling_band,
                            spec.options.pade_order, models=spec.models)


def check(spec, controller) -> dict:
    """Judge one compensator against a spec: every metric, each requirement's value, limit,
    slack and met flag, the closed-loop poles and the exact certificate, as ``check --json``."""
    from .describe import jsonable
    s, _ = read_spec(spec)
    rec = check_record(s, controller)
    source = str(spec) if isinstance(spec, (str, Path)) and not (isinstance(spec, str) and "\n" in spec) \
        else s.source
    return jsonable(dict(rec, spec=s.name, source=source, warnings=list(s.warnings)))


# ------------------------------------------------------------------ runs
def design(spec, *, budget: int | None = None, time_limit_s: float | None = None, seed: int | None = None,
           out=None, on_progress: Callable | None = None, executor=None) -> "Design":
    """Search the spec's compensator family into a new run folder; return the finished Design.

    ``spec``: a path, TOML text or a dict; ``budget`` evaluations, ``time_limit_s`` seconds
    and ``seed`` override the spec's ``[search]`` table; ``out`` is the new run folder
    (default ``runs/<name>-<UTC time>``). ``on_progress`` receives
    :class:`synth.search.explore.Progress` records while the search runs; ``executor``
    (:mod:`synth.executor`, e.g. a Dask cluster's) runs the evaluator's batches.
    """
    from .runs import run_search, settings_from
    s, text = read_spec(spec)
    folder = Path(out) if out is not None else default_run_dir(s.name)
    settings = settings_from(s, budget, time_limit_s, seed)
    try:
        with writing(folder):
            run = run_search(s, text, out=folder, settings=settings, on_progress=on_progress,
                             executor=executor)
    except ArchiveError as e:
        raise SynthError(str(e)) from None
    return Design(run)


def resume(path, *, budget: int | None = None, time_limit_s: float | None = None,
           on_progress: Callable | None = None, executor=None) -> "Design":
    """Continue an interrupted run folder where its last stored batch ended, or extend a
    finished one: ``budget`` is the new total evaluation cap, ``time_limit_s`` the seconds
    of search for this call."""
    from .runs import run_search
    try:
        with writing(Path(path)):
            run = run_search(None, "", resume=Path(path), on_progress=on_progress, executor=executor,
                             budget=budget, time_limit=time_limit_s)
    except ArchiveError as e:
        raise SynthError(str(e)) from None
    return Design(run)


def open_run(path) -> "Design":
    """An existing run folder, for reading (table, show, export, report) or tightening."""
    from . import runs
    try:
        return Design(runs.open_run(Path(path)))
    except ArchiveError as e:
        raise SynthError(str(e)) from None


# the run folder a call is writing, so that an interrupt can say which folder to resume
WRITING: list[Path] = []


class writing:
    """Context manager recording the folder being written (see :data:`WRITING`)."""

    def __init__(self, folder: Path):
        self.folder = Path(folder)

    def __enter__(self):
        WRITING.append(self.folder)
        return self

    def __exit__(self, exc_type, *rest):
        if exc_type is None or issubclass(exc_type, Exception):
            WRITING.remove(self.folder)      # an interrupt leaves the folder named for the message
        return False


class Design:
    """One run folder: its ranked table, single designs, exports, reports and tightening."""

    def __init__(self, run):
        self.run = run
        self._table = None

    def __repr__(self) -> str:
        return f"Design({str(self.folder)!r})"

    @property
    def folder(self) -> Path:
        return Path(self.run.folder)

    @property
    def spec(self) -> Spec:
        return self.run.spec

    @property
    def warnings(self) -> list[str]:
        return list(self.run.spec.warnings)

    # -- tables -----------------------------------------------------------------
    def view(self, n: int | None = 10, sort: str | None = None, text: bool = False):
        """The table of the first ``n`` rows (every row when None) as a :class:`synth.runs.TableView`;
        with ``text`` its records are JSON texts."""
        from .runs import table_view
        try:
            return table_view(self.run, n, sort, text)
        except KeyError:
            raise SynthError(f"sort: unknown metric {sort!r}; expected a metric column such as "
                             "settling_time_s") from None

    def rows(self, n: int | None = 10, sort: str | None = None) -> list[dict]:
        """Row records, best first, as ``table --json --top n`` (every row when ``n`` is None)."""
        return list(self.view(n, sort).records)

    def iter_rows(self, sort: str | None = None) -> Iterator[dict]:
        """Every row record, best first, streamed (``table --json --all``); nothing re-evaluated."""
        return iter(self.view(None, sort).records)

    @property
    def table(self):
        """The ranked table of every stored design as a pandas DataFrame, best first; the columns
        are the keys of ``table --json`` (controller and requirements as dict cells)."""
        if self._table is None:
            import pandas as pd
            self._table = pd.DataFrame(self.rows(None))
        return self._table

    def ranked(self, requirements: Mapping[str, float] | None = None):
        """Every stored candidate with all stored columns, ranked (under other limits if given)."""
        from .runs import ranked
        return ranked(self.run, dict(requirements) if requirements is not None else None)

    def summary(self, top: int = 10) -> str:
        """The text a finished ``synth design`` prints."""
        from .tables import design_summary
        return design_summary(self.run, self.view(top))

    def table_text(self, n: int | None = 10, sort: str | None = None) -> str:
        from .tables import ranked_text
        return ranked_text(self.run, self.view(n, sort))

    # -- one design -------------------------------------------------------------
    def _candidate(self, cid: int):
        from .runs import controller_of, find_row, ranked
        try:
            row = find_row(self.run, ranked(self.run), int(cid))
        except ArchiveError as e:
            raise SynthError(str(e)) from None
        c = controller_of(self.run, row)
        rec = check_record(self.run.spec, c)
        rec.update(id=int(cid), rank=int(row["rank"]), structure=self.run.manifest.get("family", ""))
        from .describe import structure_details
        from .runs import family_of
        fam = family_of(self.run)
        rec.update(structure_details(fam, [float(row[n]) for n in fam.names], rec))    # PID forms, stage activity
        return row, c, rec

    def show_record(self, cid: int) -> dict:
        """:meth:`show` before the JSON conversion (complex poles, numpy numbers)."""
        return self._candidate(cid)[2]

    def show(self, cid: int) -> dict:
        """One design in full, as ``show --json``: controller, every metric and requirement,
        closed-loop poles, the exact certificate."""
        from .describe import jsonable
        return jsonable(self.show_record(cid))

    def export(self, cid: int, path=None, sample_time: float | None = None, method: str = "tustin",
               prewarp: bool = True) -> Path:
        """Write the CSV of one design (default ``RUN/design-ID.csv``); returns the path."""
        from .export import ExportError, export_design
        if method not in ("tustin", "zoh"):
            raise SynthError(f"method {method!r}: expected tustin or zoh")
        if sample_time is not None and not sample_time > 0:
            raise SynthError("sample_time: expected a positive sample period in seconds")
        row, c, rec = self._candidate(cid)
        spec = self.run.spec
        path = Path(path) if path is not None else self.folder / f"design-{int(cid)}.csv"
        try:
            export_design(path, spec.plant, c, rec, spec.name, dict(spec.requirements), sample_time=sample_time,
                          method=method, prewarp=prewarp, structure=self.run.manifest.get("family"),
                          settling_band=spec.options.settling_band)
            os.chmod(path, ordinary_mode())       # the writer's temporary file was 0600
        except ExportError as e:
            raise SynthError(str(e)) from None
        return path

    def report(self, path=None, ids=(), png=None) -> Path:
        """Write the HTML design report (default ``RUN/report.html``); returns its path."""
        from .report import ReportError, build_report
        try:
            return build_report(self.run, list(ids or []), Path(path) if path is not None else None,
                                Path(png) if png is not None else None)
        except (ReportError, ArchiveError) as e:
            raise SynthError(str(e)) from None

    # -- tightening -------------------------------------------------------------
    def tighten_plan(self, changes: Mapping[str, float]):
        """(new spec, fall-out text, warm-start parameters, inherited rows) for new requirements;
        nothing is evaluated or written."""
        import numpy as np
        from .runs import ranked
        from .tables import fallout_text
        changes = check_changes(changes)
        try:
            new_spec = self.run.spec.tighten(changes)
        except SpecError as e:
            raise SynthError(str(e)) from None
        before = ranked(self.run)
        after = ranked(self.run, dict(new_spec.requirements))
        msg = fallout_text(before, after, dict(new_spec.requirements))
        keep_cols = [c for c in before.columns if c not in ("rank", "front", "crowding", "knee", "violation")]
        inherited = after[keep_cols].assign(source="inherited").sort_values("id") if len(after) else None
        names = self.run.manifest.get("parameters") or []
        warm = None
        if names and len(after):
            good, near = after[after["feasible"]].head(64), after[~after["feasible"]].head(32)
            warm = np.vstack([good[names].to_numpy(float), near[names].to_numpy(float)])
        return new_spec, changes, msg, warm, inherited

    def tighten(self, budget: int | None = None, time_limit_s: float | None = None, *, out=None,
                on_progress: Callable | None = None, on_message: Callable[[str], None] | None = None,
                **limits) -> "Design":
        """A new run with changed requirements (``max_overshoot_pct=10``, ...): the stored
        candidates re-ranked at once, then the search continued warm-started. This run's
        folder is left untouched. ``on_message`` receives the fall-out text."""
        from .runs import run_search, settings_from
        new_spec, changes, msg, warm, inherited = self.tighten_plan(limits)
        if on_message is not None:
            on_message(msg)
        folder = Path(out) if out is not None else default_run_dir(new_spec.name)
        try:
            with writing(folder):
                run = run_search(new_spec, new_spec.to_toml(), out=folder,
                                 settings=settings_from(new_spec, budget, time_limit_s, None),
                                 warm_params=warm, inherited=inherited,
                                 extra_manifest={"derived_from": str(self.folder), "changes": changes},
                                 on_progress=on_progress)
        except ArchiveError as e:
            raise SynthError(str(e)) from None
        d = Design(run)
        d.fallout = msg
        return d
