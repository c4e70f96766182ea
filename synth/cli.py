"""Command-line interface (typer). Thin: parse arguments, call :mod:`synth.api`, print.

Bad input exits with status 2 and one message naming the file or option, never a
traceback; Ctrl-C exits with status 130 and one line (a run folder being written
stays resumable). Nothing heavy is imported before a command runs, so ``--help``
is quick.
"""

from __future__ import annotations

import json
import signal
import sys
from pathlib import Path

try:
    import typer
except KeyboardInterrupt:             # Ctrl-C while the interpreter starts: one line, no traceback
    sys.stderr.write("interrupted\n")
    sys.exit(130)

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="synth: constraint-driven compensator synthesis for SISO feedback loops.")


class Interrupted(BaseException):
    """Ctrl-C (SIGINT). A BaseException of our own, so that no library turns it into
    another exit status on the way up; ``finally`` blocks still run (locks released)."""


@app.callback()
def _root() -> None:
    """synth: constraint-driven compensator synthesis for SISO feedback loops."""


def fail(message: str) -> None:
    """Print a user-facing error and exit with status 2."""
    typer.echo(f"error: {message}", err=True)
    raise typer.Exit(2)


def _api():
    from . import api
    return api


def _call(fn, *args, **kwargs):
    """Call an API function; its SynthError becomes a user-facing exit 2."""
    api = _api()
    try:
        return fn(*args, **kwargs)
    except api.SynthError as e:
        fail(str(e))


def _print_json(obj) -> None:
    typer.echo(json.dumps(obj, indent=2))


def _stream_json_rows(rows) -> None:
    """A JSON array written row by row (one row object per line), never held whole in memory;
    ``rows`` are row objects or their JSON texts."""
    out = sys.stdout
    first = True
    out.write("[")
    for r in rows:
        out.write("\n" if first else ",\n")
        out.write(r if isinstance(r, str) else json.dumps(r, allow_nan=False))
        first = False
    out.write("\n]\n" if not first else "]\n")
    out.flush()


def _open(run_dir: Path):
    return _call(_api().open_run, run_dir)


def _warn(spec) -> None:
    for w in spec.warnings:
        typer.echo(f"warning: {w}", err=True)


# ------------------------------------------------------------------ check
@app.command()
def check(spec_path: Path = typer.Argument(..., metavar="SPEC", help="requirements file (TOML)"),
          controller: str = typer.Option(..., "--controller", "-c",
                                         help='compensator as a rational expression in s, e.g. "12*(s+1.5)/(s+9)"'),
          as_json: bool = typer.Option(False, "--json", help="print one JSON object")) -> None:
    """Evaluate one compensator against a requirements file: every metric, every requirement
    with value, limit and slack, the closed-loop poles, the exact certificate and hidden modes.
    Exit status 0 whether or not the requirements are met; 2 for bad input."""
    api = _api()
    spec, _ = _call(api.read_spec, spec_path)
    _warn(spec)
    try:
        c = api.parse_controller(controller)
    except api.SynthError as e:
        fail(f"--{e}")
    if as_json:
        _print_json(_call(api.check, spec_path, c))
    else:
        from .describe import format_record
        rec = _call(api.check_record, spec, c)
        typer.echo(format_record(rec, title=f"check: {spec.name} ({spec_path})"))


# ------------------------------------------------------------------ synthesis
def _progress(quiet: bool, settings=None):
    """The progress display; ``settings`` (search settings, or their dict) give the limits shown."""
    from .progress import ProgressPrinter
    get = settings.get if isinstance(settings, dict) else (lambda k: getattr(settings, k, None))
    return ProgressPrinter(enabled=not quiet, budget=get("budget"), time_limit_s=get("time_limit_s"))


def _finish(d, as_json: bool, top: int, report: bool) -> None:
    """What every search command prints at the end: the summary (or JSON), then the report."""
    if as_json:
        _print_json({"run": str(d.folder), "rows": d.rows(top)})
    else:
        typer.echo(d.summary(top))
    if report:
        path = _call(d.report)
        typer.echo(f"report: {path}", err=True)


def _search(start, quiet: bool, settings=None):
    """Run one search call with a progress printer; the printer is closed however it ends."""
    printer = _progress(quiet, settings)
    try:
        return _call(start, printer)
    finally:
        printer.close()


@app.command()
def design(spec_paths: list[Path] = typer.Argument(None, metavar="SPEC",
                                                  help="requirements file(s) (TOML); several: one run folder each"),
           budget: int = typer.Option(None, "--budget", min=1, help="evaluations (default: spec [search].budget)"),
           time_limit: float = typer.Option(None, "--time-limit", min=0.1,
                                            help="seconds for the search and its final ranking"),
           seed: int = typer.Option(None, "--seed", min=0, help="random seed (deterministic per seed and budget)"),
           out: Path = typer.Option(None, "--out", help="run folder to create (default runs/<name>-<time>); "
                                    "with several specs the folder of their run folders and summary.csv"),
           resume: Path = typer.Option(None, "--resume", help="continue an interrupted run folder, or extend a finished one "
                                                          "(with a larger --budget or a --time-limit)"),
           top: int = typer.Option(10, "--top", min=1, help="rows to print"),
           report: bool = typer.Option(False, "--report", help="write the design report at the end"),
           quiet: bool = typer.Option(False, "--quiet", "-q", help="no progress display"),
           as_json: bool = typer.Option(False, "--json", help="print {run, rows} as JSON"),
           cluster: str = typer.Option(None, "--cluster", metavar="ADDRESS",
                                       help="Dask scheduler to run on, e.g. tcp://127.0.0.1:8786 "
                                            "(default $SYNTH_CLUSTER; unset: this machine)")) -> None:
    """Search the spec's compensator family, store every candidate, print the ranked table.
    Several specs: one run folder each under --out, a summary table and --out/summary.csv."""
    from .executor import cluster_address
    api = _api()
    quiet = quiet or as_json
    spec_paths = list(spec_paths or [])
    address = cluster_address(cluster)
    if len(spec_paths) > 1:
        if resume is not None or report:
            fail("design: --resume and --report take one run; give one SPEC (or none with --resume)")
        raise typer.Exit(_design_many(spec_paths, out, address, budget, time_limit, seed, as_json))
    if resume is not None and spec_paths:
        fail("design: give either a SPEC file or --resume RUN, not both")
    if resume is None and not spec_paths:
        fail("design: give a SPEC file, or --resume RUN to continue a run")
    if resume is None and address is not None and out is None:
        from .archive import default_run_dir
        spec, _ = _call(api.read_spec, spec_paths[0])
        out = default_run_dir(spec.name)      # named now, so a failure message can name it
    with _executor(address) as (executor, where):
        try:
            if resume is not None:
                settings = _open(resume).run.manifest.get("settings") or {}
                d = _search(lambda pr: api.resume(resume, budget=budget, time_limit_s=time_limit, on_progress=pr,
                                                  executor=executor), quiet, settings)
            else:
                d = _design_one(spec_paths[0], budget, time_limit, seed, out, quiet, executor)
        except Exception as e:
            from .executor import failure_message, is_infrastructure_failure
            if not is_infrastructure_failure(e):
                raise
            fail(f"{failure_message(e, where)}; every finished batch is stored: continue with "
                 f"synth design --resume {resume or out}")
    _finish(d, as_json, top, report)


def _design_one(spec_path: Path, budget, time_limit, seed, out, quiet: bool, executor=None):
    """One spec: validate, search into ``out``, return the Design (the unit a multi-spec
    or cluster design repeats)."""
    from .runs import settings_from
    api = _api()
    spec, text = _call(api.read_spec, spec_path)
    _warn(spec)
    settings = settings_from(spec, budget, time_limit, seed)
    return _search(lambda pr: api.design(spec_path, budget=budget, time_limit_s=time_limit, seed=seed,
                                         out=out, on_progress=pr, executor=executor), quiet, settings)


def _executor(address):
    """Context: (executor, where) for one spec: the Dask cluster at ``address``, or (None, ...) in-process."""
    from contextlib import contextmanager

    @contextmanager
    def ctx():
        if address is None:
            yield None, "in-process"
            return
        from .executor import ClusterError, connect
        try:
            ex = connect(address)
        except ClusterError as e:
            fail(str(e))
        try:
            yield ex, f"--cluster {address}"
        finally:
            ex.shutdown(wait=False)
    return ctx()


def _design_many(paths, out, address, budget, time_limit, seed, as_json) -> int:
    """Several specs: whole designs as tasks (local pool, or the cluster); print the summary."""
    from .archive import ArchiveError
    from .executor import ClusterError, connect
    from .multi import default_out_dir, design_many, exit_status, summary_records, summary_text
    out = out or default_out_dir()

    def event(row):
        if not as_json:
            typer.echo(f"{row['name']}: {row['status']}" + (f" ({row['candidates']} candidates)"
                                                            if row["candidates"] is not None else ""), err=True)
    executor = None
    try:
        executor = connect(address) if address else None
        summary = design_many(paths, out, executor, budget, time_limit, seed,
                              where=f"--cluster {address}" if address else "local pool", on_event=event)
    except (ArchiveError, ClusterError) as e:
        fail(str(e))
    finally:
        if executor is not None:
            executor.shutdown(wait=False)
    for r in summary_records(summary):
        if r["status"] in ("invalid", "error"):
            typer.echo(f"error: {r['message']}", err=True)
    if as_json:
        from . import CAUTION
        from .describe import jsonable
        typer.echo(json.dumps(jsonable({"out": str(out), "summary": summary_records(summary),
                                        "caution": CAUTION}), indent=2))
    else:
        typer.echo(summary_text(summary, out))
    return exit_status(summary)


@app.command()
def table(run_dir: Path = typer.Argument(..., metavar="RUN", help="run folder"),
          top: int = typer.Option(10, "--top", min=1, help="rows to show"),
          all_rows: bool = typer.Option(False, "--all", help="every stored candidate, infeasible included"),
          sort: str = typer.Option(None, "--sort", help="order the feasible rows by this metric (ascending)"),
          as_json: bool = typer.Option(False, "--json", help="JSON array of row objects, best first")) -> None:
    """The ranked table of a run: feasible designs first (Pareto rank), then the least violating.
    Reads the ranking stored when the search ended; --all re-evaluates nothing."""
    d = _open(run_dir)
    n = None if all_rows else top
    try:
        view = d.view(n, sort, as_json)
    except _api().SynthError as e:
        fail(f"--{e}" if str(e).startswith("sort:") else str(e))
    if not view.stored:
        typer.echo(f"note: {run_dir} has no stored ranking for all its candidates (a search still "
                   "running or interrupted); ranked now", err=True)
    if as_json:
        _stream_json_rows(view.records)
    else:
        from .tables import ranked_text
        typer.echo(ranked_text(d.run, view))


@app.command()
def show(run_dir: Path = typer.Argument(..., metavar="RUN", help="run folder"),
         cid: int = typer.Argument(..., metavar="ID", help="candidate id from the table"),
         as_json: bool = typer.Option(False, "--json", help="one JSON object")) -> None:
    """One candidate in full: controller, closed-loop poles, every metric and requirement, certificate."""
    d = _open(run_dir)
    if as_json:
        _print_json(_call(d.show, cid))
    else:
        from .describe import format_record
        rec = _call(d.show_record, cid)
        typer.echo(format_record(rec, title=f"candidate {cid} (rank {rec['rank']}) of {d.folder}"))


def _parse_set(items: list[str]) -> dict:
    out = {}
    for it in items:
        if "=" not in it:
            fail(f"--set {it!r}: expected KEY=VALUE, e.g. --set max_overshoot_pct=10")
        k, v = it.split("=", 1)
        k = k.strip()
        try:
            out.update(_api().check_changes({k: v}))
        except _api().SynthError as e:
            fail(f"--set {e}")
    return out


@app.command()
def tighten(run_dir: Path = typer.Argument(..., metavar="RUN", help="run folder to derive from (left untouched)"),
            sets: list[str] = typer.Option(..., "--set", help="KEY=VALUE requirement change (repeatable)"),
            budget: int = typer.Option(None, "--budget", min=1, help="further evaluations"),
            time_limit: float = typer.Option(None, "--time-limit", min=0.1,
                                             help="seconds for the search and its final ranking"),
            out: Path = typer.Option(None, "--out", help="new run folder"),
            top: int = typer.Option(10, "--top", min=1),
            report: bool = typer.Option(False, "--report", help="write the design report at the end"),
            quiet: bool = typer.Option(False, "--quiet", "-q", help="no progress display"),
            as_json: bool = typer.Option(False, "--json")) -> None:
    """A new run with changed requirements: re-rank the old archive at once (no re-evaluation),
    say which former front members fall out and why, then continue the search warm-started."""
    from .runs import settings_from
    from .spec import SpecError
    old = _open(run_dir)
    changes = _parse_set(sets)
    quiet = quiet or as_json
    try:
        new_spec = old.spec.tighten(changes)
    except SpecError as e:          # the message names the key and the expected range
        fail(str(e))
    settings = settings_from(new_spec, budget, time_limit, None)
    say = None if as_json else (lambda msg: typer.echo(msg, err=True))
    d = _search(lambda pr: old.tighten(budget, time_limit, out=out, on_progress=pr, on_message=say, **changes),
                quiet, settings)
    _finish(d, as_json, top, report)


@app.command()
def export(run_dir: Path = typer.Argument(..., metavar="RUN", help="run folder"),
           cid: int = typer.Argument(..., metavar="ID", help="candidate id"),
           output: Path = typer.Option(None, "-o", "--output", help="CSV file (default RUN/design-ID.csv)"),
           sample_time: float = typer.Option(None, "--sample-time", min=0.0, help="discretise with this period, s"),
           method: str = typer.Option("tustin", "--method", help="tustin | zoh"),
           prewarp: bool = typer.Option(True, "--prewarp/--no-prewarp", help="Tustin pre-warped at the crossover")) -> None:
    """CSV of one design: requirements, controller (continuous and discrete), closed-loop poles, caution."""
    if method not in ("tustin", "zoh"):
        fail(f"--method {method!r}: expected tustin or zoh")
    if sample_time is not None and sample_time <= 0:
        fail("--sample-time: expected a positive sample period in seconds")
    d = _open(run_dir)
    path = _call(d.export, cid, output, sample_time=sample_time, method=method, prewarp=prewarp)
    typer.echo(str(path))


@app.command()
def report(run_dir: Path = typer.Argument(..., metavar="RUN", help="run folder"),
           ids: list[int] = typer.Argument(None, metavar="[ID ...]",
                                           help="candidate ids to overlay (default: the front)"),
           output: Path = typer.Option(None, "-o", "--output", help="HTML file (default RUN/report.html)"),
           png: Path = typer.Option(None, "--png", help="also write the figures as PNG files into this folder")) -> None:
    """Self-contained HTML design report: step responses with the requirement bounds, open-loop
    frequency response and margins, pole map, trade-offs, requirement tables and certificates."""
    d = _open(run_dir)
    typer.echo(str(_call(d.report, output, ids or [], png)))


# ------------------------------------------------------------------ entry point
REDELIVER_S = 2.0       # a Ctrl-C still unanswered after this long is delivered again
_pending = False


def _on_sigint(signum, frame):
    """Raise :class:`Interrupted` in the main thread. An exception raised by a signal handler
    is lost when it lands in a finaliser or a callback that swallows errors; so until
    :func:`main` has taken it, a daemon thread delivers the Ctrl-C again every REDELIVER_S."""
    global _pending
    if not _pending:
        _pending = True
        import threading
        threading.Thread(target=_redeliver, daemon=True, name="synth-sigint").start()
    raise Interrupted()


def _redeliver() -> None:
    import threading
    import time
    main_id = threading.main_thread().ident
    while True:
        time.sleep(REDELIVER_S)
        if not _pending:
            return
        # a real signal to the main thread, so that a blocking call there wakes up too
        signal.pthread_kill(main_id, signal.SIGINT)


def _interrupted_message() -> str:
    api = sys.modules.get("synth.api")
    folders = list(getattr(api, "WRITING", []) or [])
    if folders:
        return (f"interrupted; {folders[-1]} keeps every batch stored so far: continue with "
                f"'synth design --resume {folders[-1]}'")
    return "interrupted"


def main() -> None:
    """Console-script entry point: Ctrl-C anywhere gives one line and exit status 130."""
    global _pending
    signal.signal(signal.SIGINT, _on_sigint)
    try:
        app()
    except (Interrupted, KeyboardInterrupt):
        signal.signal(signal.SIGINT, signal.SIG_IGN)     # a second Ctrl-C must not interrupt the message
        _pending = False
        try:
            sys.stdout.flush()
        except Exception:
            pass
        sys.stderr.write("\n" + _interrupted_message() + "\n")
        sys.stderr.flush()
        sys.exit(130)
    finally:                       # no Ctrl-C delivered again while the interpreter shuts down
        signal.signal(signal.SIGINT, signal.SIG_IGN)
        _pending = False


if __name__ == "__main__":
    main()
