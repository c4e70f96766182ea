"""How quickly synth answers an engineer: start-up and table commands on a big run.

Run:  python benchmarks/usability.py [--quick] [--run DIR] [--repeat N]

1. Start-up: wall time of ``synth --help`` against a bare two-command typer app's
   ``--help`` (target: within 1.5x), each a fresh interpreter.
2. Tables on a run of about 40,000 candidates (built once, kept in --run DIR; the
   scenario is the invented maglev carriage of specs/maglev_carriage.toml with a big
   budget): ``synth table RUN --top 10`` (target: under 0.5 s) and
   ``synth table RUN --json --all`` (target: within 3x of reading the archive, the
   candidates table of candidates.db, into pandas with ``pandas.read_sql``).

Every figure is the median of --repeat fresh processes (the machine is shared and
noisy). Writes benchmarks/results/usability.md (usability-quick.md with --quick,
which uses a 6,000-candidate run). Nothing here asserts on timing.
"""

from __future__ import annotations

import argparse
import os
import resource
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(Path(__file__).resolve().parent))
from _machine import results_footer, write_results  # noqa: E402

BARE_APP = '''
import typer
app = typer.Typer(add_completion=False)

@app.command()
def first(x: int = 1):
    """First command."""

@app.command()
def second(y: str = "a"):
    """Second command."""

app()
'''

# the floor under any typer command that reads a run: the interpreter, typer running a command
# with a path argument (this typer version builds its argument coercion with pydantic), numpy
FLOOR_APP = '''
from pathlib import Path
import typer
app = typer.Typer(add_completion=False)

@app.command()
def first(run: Path, top: int = 10):
    """Read a path."""
    import numpy
    import sqlite3
    sqlite3.connect(str(run / "candidates.db")).execute("SELECT COUNT(*) FROM candidates").fetchone()

@app.command()
def second(y: str = "a"):
    """Second command."""

app()
'''

READ_ARCHIVE = ("import sqlite3, sys, pandas as pd; con = sqlite3.connect(sys.argv[1]); "
                "df = pd.read_sql('SELECT * FROM candidates', con); print(df.shape)")


def env() -> dict:
    e = dict(os.environ)
    e["PYTHONPATH"] = str(ROOT) + os.pathsep + e.get("PYTHONPATH", "")
    return e


def timed(cmd: list[str], repeat: int, out_path: str = os.devnull) -> tuple[float, float]:
    """Median wall time and median CPU time (user + system) of ``repeat`` fresh processes,
    stdout to ``out_path``. The CPU time is the steadier figure on a shared, loaded machine."""
    walls, cpus = [], []
    for _ in range(repeat):
        with open(out_path, "w") as out:
            r0 = resource.getrusage(resource.RUSAGE_CHILDREN)
            t0 = time.perf_counter()
            subprocess.run(cmd, env=env(), cwd=ROOT, stdout=out, stderr=subprocess.DEVNULL, check=True)
            walls.append(time.perf_counter() - t0)
            r1 = resource.getrusage(resource.RUSAGE_CHILDREN)
            cpus.append((r1.ru_utime - r0.ru_utime) + (r1.ru_stime - r0.ru_stime))
    return statistics.median(walls), statistics.median(cpus)


def synth_cmd(*args) -> list[str]:
    return [sys.executable, "-m", "synth.cli", *map(str, args)]


def ensure_run(folder: Path, budget: int) -> int:
    """Build the big run once (reused when it is there and complete); its candidate count."""
    db = folder / "candidates.db"
    if db.exists() and (folder / "state.json").exists():
        con = sqlite3.connect(db)
        n = con.execute("SELECT COUNT(*) FROM candidates").fetchone()[0]
        con.close()
        return n
    print(f"building the run in {folder} (budget {budget}) ...", flush=True)
    t0 = time.perf_counter()
    subprocess.run(synth_cmd("design", ROOT / "specs" / "maglev_carriage.toml", "--budget", budget,
                             "--time-limit", 3600, "--out", folder, "--quiet"),
                   env=env(), cwd=ROOT, stdout=subprocess.DEVNULL, check=True)
    print(f"  built in {time.perf_counter() - t0:.1f} s", flush=True)
    return ensure_run(folder, budget)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="a 6,000-candidate run, 3 repeats")
    ap.add_argument("--run", type=Path, default=None, help="run folder to build or reuse")
    ap.add_argument("--repeat", type=int, default=None)
    a = ap.parse_args()
    repeat = a.repeat or (3 if a.quick else 5)
    budget = 6000 if a.quick else 56000
    folder = a.run or Path(tempfile.gettempdir()) / f"synth-usability-{budget}"
    n = ensure_run(folder, budget)

    with tempfile.TemporaryDirectory() as tmp:
        bare = Path(tmp) / "bare.py"
        bare.write_text(BARE_APP)
        t_bare = timed([sys.executable, str(bare), "--help"], repeat)
        t_help = timed(synth_cmd("--help"), repeat)
        floor = Path(tmp) / "floor.py"
        floor.write_text(FLOOR_APP)
        t_floor = timed([sys.executable, str(floor), "first", str(folder)], repeat)
        t_top = timed(synth_cmd("table", folder, "--top", 10), repeat)
        t_read = timed([sys.executable, "-c", READ_ARCHIVE, str(folder / "candidates.db")], repeat)
        all_json = Path(tmp) / "all.json"
        t_all = timed(synth_cmd("table", folder, "--json", "--all"), repeat, str(all_json))
        size_mb = all_json.stat().st_size / 1e6

    def verdict(wall_ok, cpu_ok):
        return ("met" if wall_ok else "NOT met (wall)") + (", met (CPU)" if cpu_ok else ", NOT met (CPU)")

    rows = [
        ("`synth --help`", f"{t_help[0]:.3f} s", f"{t_help[1]:.3f} s",
         f"{t_help[0] / t_bare[0]:.2f}x (CPU {t_help[1] / t_bare[1]:.2f}x) a bare two-command typer app "
         f"({t_bare[0]:.3f} s, CPU {t_bare[1]:.3f} s)", "within 1.5x",
         verdict(t_help[0] <= 1.5 * t_bare[0], t_help[1] <= 1.5 * t_bare[1])),
        ("`synth table RUN --top 10`", f"{t_top[0]:.3f} s", f"{t_top[1]:.3f} s",
         f"floor: a bare typer command importing numpy and opening the database takes {t_floor[0]:.3f} s "
         f"(CPU {t_floor[1]:.3f} s)", "under 0.5 s",
         verdict(t_top[0] < 0.5, t_top[1] < 0.5)),
        ("`synth table RUN --json --all`", f"{t_all[0]:.3f} s", f"{t_all[1]:.3f} s",
         f"{t_all[0] / t_read[0]:.2f}x (CPU {t_all[1] / t_read[1]:.2f}x) reading the archive into pandas "
         f"({t_read[0]:.3f} s, CPU {t_read[1]:.3f} s); {size_mb:.0f} MB of JSON", "within 3x",
         verdict(t_all[0] <= 3 * t_read[0], t_all[1] <= 3 * t_read[1])),
    ]
    lines = [f"# Usability timings{' (quick)' if a.quick else ''}", "",
             f"Run of {n:,} candidates (invented maglev carriage spec, budget {budget:,}); "
             f"median of {repeat} fresh processes each.", "",
             "| command | wall time | CPU time | comparison | target | verdict |",
             "| --- | --- | --- | --- | --- | --- |"]
    lines += [f"| {' | '.join(r)} |" for r in rows]
    lines += results_footer(f"python benchmarks/usability.py{' --quick' if a.quick else ''}")
    write_results(ROOT / "benchmarks" / "results" / f"usability{'-quick' if a.quick else ''}.md", lines)


if __name__ == "__main__":
    main()
