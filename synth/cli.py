"""Command-line interface (typer). Thin: parse arguments, call the library, print.

Bad input exits with status 2 and one message naming the file or option, never a
traceback.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import typer

from .describe import check_controller, format_record, jsonable
from .expr import ExpressionError, parse_rational
from .spec import SpecError, load_spec

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="synth: constraint-driven compensator synthesis for SISO feedback loops.")


@app.callback()
def _root() -> None:
    """synth: constraint-driven compensator synthesis for SISO feedback loops."""


def fail(message: str) -> None:
    """Print a user-facing error and exit with status 2."""
    typer.echo(f"error: {message}", err=True)
    raise typer.Exit(2)


def _load(spec_path: Path):
    try:
        spec = load_spec(spec_path)
    except SpecError as e:
        fail(str(e))
    for w in spec.warnings:
        typer.echo(f"warning: {w}", err=True)
    return spec


@app.command()
def check(spec_path: Path = typer.Argument(..., metavar="SPEC", help="requirements file (TOML)"),
          controller: str = typer.Option(..., "--controller", "-c",
                                         help='compensator as a rational expression in s, e.g. "12*(s+1.5)/(s+9)"'),
          as_json: bool = typer.Option(False, "--json", help="print one JSON object")) -> None:
    """Evaluate one compensator against a requirements file: every metric, every requirement
    with value, limit and slack, the closed-loop poles, the exact certificate and hidden modes.
    Exit status 0 whether or not the requirements are met; 2 for bad input."""
    spec = _load(spec_path)
    try:
        c = parse_rational(controller)
    except ExpressionError as e:
        fail(f"--controller: {e}")
    if c.delay:
        fail("--controller: the compensator must be rational (no exp(...) dead time)")
    if not c.is_proper:
        fail(f"--controller: the compensator {controller!r} is improper (numerator degree "
             f"{c.num.size - 1} > denominator degree {c.den.size - 1}); add a filter pole")
    if not any(c.num):
        fail("--controller: the compensator is identically zero")
    rec = check_controller(spec.plant, c, dict(spec.requirements), spec.options.settling_band,
                           spec.options.pade_order)
    if as_json:
        rec = dict(rec, spec=spec.name, source=str(spec_path), warnings=list(spec.warnings))
        typer.echo(json.dumps(jsonable(rec), indent=2))
    else:
        typer.echo(format_record(rec, title=f"check: {spec.name} ({spec_path})"))



# ------------------------------------------------------------------ synthesis
def _progress_printer(enabled: bool):
    """Progress on stderr: evaluations, feasible found, best objective values so far."""
    last = [0.0]

    def show(p):
        if not enabled:
            return
        now = p.elapsed_s
        if now - last[0] < 0.5 and p.phase != "done":
            return
        last[0] = now
        best = ", ".join(f"{k}={v:.4g}" for k, v in p.best.items())
        typer.echo(f"\r[{p.phase:>6}] {p.evaluated:>8} evaluated  {p.feasible:>6} feasible  "
                   f"{now:6.1f} s  {best}"[:160], err=True, nl=False)
    return show


def _open(run_dir: Path):
    from .archive import ArchiveError
    from .runs import open_run
    try:
        return open_run(run_dir)
    except ArchiveError as e:
        fail(str(e))


def _candidate(run_dir: Path, cid: int):
    """(run, ranked row, controller, exact check record) of one stored candidate."""
    from .archive import ArchiveError
    from .runs import controller_of, find_row, ranked
    run = _open(run_dir)
    try:
        row = find_row(run, ranked(run), cid)
    except ArchiveError as e:
        fail(str(e))
    c = controller_of(run, row)
    spec = run.spec
    rec = check_controller(spec.plant, c, dict(spec.requirements), spec.options.settling_band,
                           spec.options.pade_order)
    return run, row, c, rec


def _finish_design(run, as_json: bool, top: int, report: bool) -> None:
    from .runs import ranked
    from .tables import design_summary, json_rows
    df = ranked(run)
    if as_json:
        typer.echo(json.dumps(jsonable({"run": str(run.folder), "rows": json_rows(run, df, top)}), indent=2))
    else:
        typer.echo("", err=True)
        typer.echo(design_summary(run, df, top))
    if report:
        _write_report(run, [], None, None)


def _write_report(run, ids, out, png):
    from .archive import ArchiveError
    from .report import ReportError, build_report
    try:
        path = build_report(run, ids, out, png)
    except (ReportError, ArchiveError) as e:
        fail(f"--report: {e}")
    typer.echo(f"report: {path}", err=True)


@app.command()
def design(spec_path: Path = typer.Argument(None, metavar="SPEC", help="requirements file (TOML)"),
           budget: int = typer.Option(None, "--budget", min=1, help="evaluations (default: spec [search].budget)"),
           time_limit: float = typer.Option(None, "--time-limit", min=0.1, help="seconds of search"),
           seed: int = typer.Option(None, "--seed", min=0, help="random seed (deterministic per seed and budget)"),
           out: Path = typer.Option(None, "--out", help="run folder to create (default runs/<name>-<time>)"),
           resume: Path = typer.Option(None, "--resume", help="continue an interrupted run folder, or extend a finished one (with a larger --budget or a --time-limit)"),
           top: int = typer.Option(10, "--top", min=1, help="rows to print"),
           report: bool = typer.Option(False, "--report", help="write the design report at the end"),
           as_json: bool = typer.Option(False, "--json", help="print {run, rows} as JSON")) -> None:
    """Search the spec's compensator family, store every candidate, print the ranked table."""
    from .archive import ArchiveError
    from .runs import run_search, settings_from
    if resume is None and spec_path is None:
        fail("design: give a SPEC file, or --resume RUN to continue a run")
    try:
        if resume is not None:
            run = run_search(None, "", resume=resume, on_progress=_progress_printer(not as_json),
                             budget=budget, time_limit=time_limit)
        else:
            spec = _load(spec_path)
            text = spec_path.read_text(encoding="utf-8")
            run = run_search(spec, text, out=out, settings=settings_from(spec, budget, time_limit, seed),
                             on_progress=_progress_printer(not as_json))
    except ArchiveError as e:
        fail(str(e))
    _finish_design(run, as_json, top, report)


@app.command()
def table(run_dir: Path = typer.Argument(..., metavar="RUN", help="run folder"),
          top: int = typer.Option(10, "--top", min=1, help="rows to show"),
          all_rows: bool = typer.Option(False, "--all", help="every stored candidate, infeasible included"),
          sort: str = typer.Option(None, "--sort", help="order the feasible rows by this metric (ascending)"),
          as_json: bool = typer.Option(False, "--json", help="JSON array of row objects, best first")) -> None:
    """The ranked table of a run: feasible designs first (Pareto rank), then the least violating."""
    from .runs import ranked
    from .tables import json_rows, ranked_text
    run = _open(run_dir)
    df = ranked(run)
    if sort is not None:
        if sort not in df.columns:
            fail(f"--sort: unknown metric {sort!r}; expected a metric column such as settling_time_s")
        feas = df[df["feasible"]].sort_values(sort, kind="stable")
        df = pd_concat([feas, df[~df["feasible"]]])
    n = len(df) if all_rows else top
    if as_json:
        typer.echo(json.dumps(jsonable(json_rows(run, df, n)), indent=2))
    else:
        typer.echo(ranked_text(run, df, n))


@app.command()
def show(run_dir: Path = typer.Argument(..., metavar="RUN", help="run folder"),
         cid: int = typer.Argument(..., metavar="ID", help="candidate id from the table"),
         as_json: bool = typer.Option(False, "--json", help="one JSON object")) -> None:
    """One candidate in full: controller, closed-loop poles, every metric and requirement, certificate."""
    run, row, c, rec = _candidate(run_dir, cid)
    rec.update(id=int(cid), rank=int(row["rank"]), structure=run.manifest.get("family", ""))
    if as_json:
        typer.echo(json.dumps(jsonable(rec), indent=2))
    else:
        typer.echo(format_record(rec, title=f"candidate {cid} (rank {int(row['rank'])}) of {run.folder}"))


def _parse_set(items: list[str]) -> dict:
    from .requirements import REQUIREMENTS
    out = {}
    for it in items:
        if "=" not in it:
            fail(f"--set {it!r}: expected KEY=VALUE, e.g. --set max_overshoot_pct=10")
        k, v = it.split("=", 1)
        k = k.strip()
        if k not in REQUIREMENTS and k != "settling_band":
            fail(f"--set {k}: not a requirement key; expected one of {', '.join(REQUIREMENTS)}")
        try:
            out[k] = float(v)
        except ValueError:
            fail(f"--set {k}={v}: expected a number")
    return out


@app.command()
def tighten(run_dir: Path = typer.Argument(..., metavar="RUN", help="run folder to derive from (left untouched)"),
            sets: list[str] = typer.Option(..., "--set", help="KEY=VALUE requirement change (repeatable)"),
            budget: int = typer.Option(None, "--budget", min=1, help="further evaluations"),
            time_limit: float = typer.Option(None, "--time-limit", min=0.1, help="seconds of search"),
            out: Path = typer.Option(None, "--out", help="new run folder"),
            top: int = typer.Option(10, "--top", min=1),
            report: bool = typer.Option(False, "--report", help="write the design report at the end"),
            as_json: bool = typer.Option(False, "--json")) -> None:
    """A new run with changed requirements: re-rank the old archive at once (no re-evaluation),
    say which former front members fall out and why, then continue the search warm-started."""
    from .archive import ArchiveError
    from .runs import ranked, run_search, settings_from
    from .tables import fallout_text
    old = _open(run_dir)
    changes = _parse_set(sets)
    try:
        new_spec = old.spec.tighten(changes)
    except SpecError as e:
        fail(str(e))
    before = ranked(old)
    after = ranked(old, dict(new_spec.requirements))
    msg = fallout_text(before, after, dict(new_spec.requirements))
    if not as_json:
        typer.echo(msg, err=True)
    keep_cols = [c for c in before.columns if c not in ("rank", "front", "crowding", "knee", "violation")]
    inherited = after[keep_cols].assign(source="inherited").sort_values("id")
    warm = after[after["feasible"]].head(64)
    near = after[~after["feasible"]].head(32)
    names = old.manifest.get("parameters") or []
    warm_params = np.vstack([warm[names].to_numpy(float), near[names].to_numpy(float)]) if names else None
    try:
        run = run_search(new_spec, new_spec.to_toml(), out=out,
                         settings=settings_from(new_spec, budget, time_limit, None),
                         warm_params=warm_params, inherited=inherited,
                         extra_manifest={"derived_from": str(run_dir), "changes": changes},
                         on_progress=_progress_printer(not as_json))
    except ArchiveError as e:
        fail(str(e))
    _finish_design(run, as_json, top, report)


@app.command()
def export(run_dir: Path = typer.Argument(..., metavar="RUN", help="run folder"),
           cid: int = typer.Argument(..., metavar="ID", help="candidate id"),
           output: Path = typer.Option(None, "-o", "--output", help="CSV file (default RUN/design-ID.csv)"),
           sample_time: float = typer.Option(None, "--sample-time", min=0.0, help="discretise with this period, s"),
           method: str = typer.Option("tustin", "--method", help="tustin | zoh"),
           prewarp: bool = typer.Option(True, "--prewarp/--no-prewarp", help="Tustin pre-warped at the crossover")) -> None:
    """CSV of one design: requirements, controller (continuous and discrete), closed-loop poles, caution."""
    from .export import ExportError, export_design
    if method not in ("tustin", "zoh"):
        fail(f"--method {method!r}: expected tustin or zoh")
    if sample_time is not None and sample_time <= 0:
        fail("--sample-time: expected a positive sample period in seconds")
    run, row, c, rec = _candidate(run_dir, cid)
    spec = run.spec
    path = output or (run.folder / f"design-{cid}.csv")
    try:
        export_design(path, spec.plant, c, rec, spec.name, dict(spec.requirements), sample_time=sample_time,
                      method=method, prewarp=prewarp, structure=run.manifest.get("family"),
                      settling_band=spec.options.settling_band)
    except ExportError as e:
        fail(str(e))
    typer.echo(str(path))


@app.command()
def report(run_dir: Path = typer.Argument(..., metavar="RUN", help="run folder"),
           ids: list[int] = typer.Argument(None, metavar="[ID ...]",
                                           help="candidate ids to overlay (default: the front)"),
           output: Path = typer.Option(None, "-o", "--output", help="HTML file (default RUN/report.html)"),
           png: Path = typer.Option(None, "--png", help="also write the figures as PNG files into this folder")) -> None:
    """Self-contained HTML design report: step responses with the requirement bounds, open-loop
    frequency response and margins, pole map, trade-offs, requirement tables and certificates."""
    from .archive import ArchiveError
    from .report import ReportError, build_report
    run = _open(run_dir)
    try:
        path = build_report(run, ids or [], output, png)
    except (ArchiveError, ReportError) as e:
        fail(str(e))
    typer.echo(str(path))


def pd_concat(frames):
    import pandas as pd
    return pd.concat(frames)


def main() -> None:
    """Console-script entry point."""
    try:
        app()
    except KeyboardInterrupt:
        typer.echo("interrupted", err=True)
        sys.exit(130)


if __name__ == "__main__":
    main()
