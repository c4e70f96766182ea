"""The engineer's side of synth: the Python API against the CLI's JSON, stored rankings,
one writer per run folder, kill -9 and Ctrl-C during a run, file modes, progress lines,
a light `import synth`.

Timing is measured in benchmarks/usability.py, never asserted here.
"""

from __future__ import annotations

import io
import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

import synth
from synth import CAUTION
from synth.cli import app
from synth.progress import ProgressPrinter
from synth.runlock import RunLock
from synth.runs import compute_ranked, open_run, ranked

ROOT = Path(__file__).resolve().parent.parent
runner = CliRunner()

# Ogata, Modern Control Engineering, 5th ed. 2010, ex. 7-26 (value from memory): G = 4/(s(s+2)),
# the textbook lead C = 41.7(s+4.41)/(s+18.4) gives PM about 50 deg and Kv about 20 1/s.
OGATA = """
name = "ogata-lead"
[plant]
transfer = "4/(s*(s+2))"
[controller]
stages = ["lead"]
[requirements]
min_phase_margin_deg = 50
min_velocity_constant = 19
max_sensitivity_peak = 1.5
[search]
budget = 1200
time_limit_s = 60
seed = 3
"""

# invented scenario: the maglev-like unstable plant of tests/test_search.py, a search long
# enough (seconds) to be interrupted part-way
SLOW = """
name = "slow-unstable"
[plant]
zeros = []
poles = [20, -20, -500]
gain = 2e6
[controller]
stages = ["lead", "lead"]
frequency_range_rad_s = [1, 10000]
max_stage_ratio = 30
gain_range = [0.01, 100]
[requirements]
min_phase_margin_deg = 35
max_sensitivity_peak = 1.8
max_overshoot_pct = 30
[search]
budget = 400000
time_limit_s = 120
seed = 0
"""


def cli(*args):
    return runner.invoke(app, [str(a) for a in args])


def cli_json(*args):
    r = cli(*args)
    assert r.exit_code == 0, r.output
    return json.loads(r.stdout)


def env():
    e = dict(os.environ)
    e["PYTHONPATH"] = str(ROOT) + os.pathsep + e.get("PYTHONPATH", "")
    return e


def spawn(*args):
    return subprocess.Popen([sys.executable, "-m", "synth.cli", *map(str, args)], env=env(), cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def ids_of(folder: Path) -> list[int]:
    con = sqlite3.connect(folder / "candidates.db", timeout=30)
    try:
        return [r[0] for r in con.execute("SELECT id FROM candidates")]
    except sqlite3.OperationalError:
        return []
    finally:
        con.close()


def wait_for_rows(folder: Path, n: int = 1, timeout: float = 120.0) -> None:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if (folder / "candidates.db").exists() and len(ids_of(folder)) >= n:
            return
        time.sleep(0.05)
    raise AssertionError(f"no rows in {folder} after {timeout} s")


# ------------------------------------------------------------------ API round trip
@pytest.fixture(scope="module")
def api_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("api") / "run"
    return synth.design(OGATA, out=out, seed=3), out


def test_api_design_table_show_match_the_cli(api_run):
    d, out = api_run
    assert isinstance(d, synth.Design) and d.folder == out
    rows = cli_json("table", out, "--json", "--top", 5)
    assert d.rows(5) == rows
    every = cli_json("table", out, "--json", "--all")
    assert list(d.table.columns) == list(every[0].keys())
    assert len(d.table) == len(every) and d.table["id"].tolist() == [r["id"] for r in every]
    assert every[:5] == rows                      # --all starts with the same certified rows
    cid = rows[0]["id"]
    assert d.show(cid) == cli_json("show", out, cid, "--json")
    # a design shown is the design ranked: feasible rows meet every requirement
    first = d.show(cid)
    assert first["feasible"] and first["certified"] and first["phase_margin_deg"] >= 50


def test_api_export_and_report_match_the_cli(api_run, tmp_path):
    d, out = api_run
    cid = d.rows(1)[0]["id"]
    a = d.export(cid, tmp_path / "a.csv", sample_time=0.01, method="zoh")
    r = cli("export", out, cid, "-o", tmp_path / "b.csv", "--sample-time", 0.01, "--method", "zoh")
    assert r.exit_code == 0, r.output
    assert a.read_text() == (tmp_path / "b.csv").read_text()
    assert CAUTION.split(".")[0] in a.read_text()
    html = d.report(tmp_path / "r.html", ids=[cid])
    assert html.exists() and "CAUTION" in html.read_text()


def test_api_tighten_matches_the_cli(api_run, tmp_path):
    d, out = api_run
    msgs = []
    t = d.tighten(budget=300, out=tmp_path / "t", on_message=msgs.append, max_sensitivity_peak=1.4)
    assert msgs and "re-ranked" in msgs[0]
    assert t.spec.requirements["max_sensitivity_peak"] == 1.4
    assert t.rows(10) == cli_json("table", tmp_path / "t", "--json", "--top", 10)
    assert all(r["sensitivity_peak"] <= 1.4 for r in t.rows(10) if r["feasible"])
    r = cli("tighten", out, "--set", "max_sensitivity_peak=1.4", "--budget", 300, "--out", tmp_path / "c",
            "--json")
    assert r.exit_code == 0, r.output
    assert json.loads(r.stdout)["rows"] == t.rows(10)        # same seed and budget: same search
    with pytest.raises(synth.SynthError, match="not a requirement key"):
        d.tighten(max_banana=3)


def test_api_check_matches_the_cli(tmp_path):
    p = tmp_path / "ogata.toml"
    p.write_text(OGATA)
    c = "41.7*(s+4.41)/(s+18.4)"
    got = synth.check(p, c)
    assert got == cli_json("check", p, "-c", c, "--json")
    # Ogata 2010 ex. 7-26 (value from memory): phase margin about 50 deg
    assert abs(got["phase_margin_deg"] - 50.5) < 0.5
    from_dict = synth.check({"plant": {"transfer": "4/(s*(s+2))"},
                             "requirements": {"min_phase_margin_deg": 50}}, c)
    assert from_dict["phase_margin_deg"] == got["phase_margin_deg"]
    with pytest.raises(synth.SynthError, match="controller"):
        synth.check(p, "(s+1")


def test_open_run_and_bad_folder(api_run, tmp_path):
    d, out = api_run
    assert synth.open_run(out).rows(3) == d.rows(3)
    with pytest.raises(synth.SynthError, match="not a synth run folder"):
        synth.open_run(tmp_path / "nope")


# ------------------------------------------------------------------ stored rankings
def test_stored_ranking_equals_a_fresh_ranking(api_run):
    d, out = api_run
    run = open_run(out)
    stored, fresh = ranked(run), compute_ranked(run)
    assert run.store.ranking_meta() is not None
    assert stored["id"].tolist() == fresh["id"].tolist()
    cols = [c for c in fresh.columns if c not in ("source", "hidden_modes")]
    pd.testing.assert_frame_equal(stored[cols].reset_index(drop=True), fresh[cols].reset_index(drop=True),
                                  check_dtype=False)
    every = d.rows(None)
    shown = run.store.ranking_meta()["shown"]
    assert all(r["certified"] or not r["internally_stable"] for r in every[:shown] if r["feasible"])
    assert all(r["closed_loop_poles"] is None for r in every[shown:])   # nothing re-evaluated


def test_stale_ranking_is_recomputed(api_run, tmp_path):
    """A run whose candidates outnumber its stored ranking (a search in progress) is ranked now."""
    d, out = api_run
    import shutil
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    run = open_run(copy)
    extra = run.store.load().tail(1).assign(id=10 ** 6)
    run.store.append(extra)
    assert run.store.ranking_meta() is None
    r = cli("table", copy, "--json", "--top", 3)
    assert r.exit_code == 0 and "no stored ranking" in r.output


# ------------------------------------------------------------------ file modes
@pytest.mark.parametrize("umask", [0o022, 0o002])
def test_run_files_and_exports_get_the_umask_modes(tmp_path, umask):
    old = os.umask(umask)
    try:
        d = synth.design(OGATA, budget=200, out=tmp_path / "run")
        csv = d.export(d.rows(1)[0]["id"], tmp_path / "x.csv")
    finally:
        os.umask(old)
    want = 0o666 & ~umask
    for f in ["spec.toml", "manifest.json", "state.json", "candidates.db"]:
        assert (tmp_path / "run" / f).stat().st_mode & 0o777 == want, f
    assert csv.stat().st_mode & 0o777 == want


# ------------------------------------------------------------------ one writer
def test_lock_names_the_holder_and_is_taken_over_after_kill(tmp_path):
    folder = tmp_path / "run"
    folder.mkdir()
    holder = subprocess.Popen([sys.executable, "-c",
                               "import sys, time; from synth.runlock import RunLock; "
                               f"RunLock({str(folder)!r}).acquire(); print('held', flush=True); time.sleep(60)"],
                              env=env(), stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        from synth.runlock import RunFolderBusy
        with pytest.raises(RunFolderBusy, match=f"run folder in use by process {holder.pid}"):
            RunLock(folder).acquire()
    finally:
        holder.kill()
        holder.wait()
    lock = RunLock(folder).acquire()          # the kernel released the dead holder's lock
    assert lock.previous_pid == holder.pid     # ... and the stale id is recognised
    lock.release()
    assert RunLock(folder).acquire().previous_pid is None    # a clean release leaves no id


def test_two_concurrent_writers(tmp_path):
    spec = tmp_path / "slow.toml"
    spec.write_text(SLOW)
    out = tmp_path / "run"
    first = spawn("design", spec, "--out", out, "--quiet", "--time-limit", 8)
    try:
        wait_for_rows(out)
        reader = cli("table", out, "--json", "--top", 3)          # readers work during the run
        assert reader.exit_code == 0 and json.loads(reader.stdout)
        second = spawn("design", "--resume", out, "--quiet")
        _, err = second.communicate(timeout=120)
        assert second.returncode == 2, err
        assert f"run folder in use by process {first.pid}" in err and "Traceback" not in err
        third = spawn("design", spec, "--out", out, "--quiet")          # a new design into the same folder
        _, err3 = third.communicate(timeout=120)
        assert third.returncode == 2 and "Traceback" not in err3
    finally:
        first.wait(timeout=300)
    assert first.returncode == 0
    ids = ids_of(out)
    assert len(ids) == len(set(ids))


def test_kill_9_then_resume_loses_and_duplicates_nothing(tmp_path):
    spec = tmp_path / "slow.toml"
    spec.write_text(SLOW.replace("time_limit_s = 120", "time_limit_s = 6"))
    out = tmp_path / "run"
    p = spawn("design", spec, "--out", out, "--quiet")
    wait_for_rows(out, 3000)
    p.send_signal(signal.SIGKILL)
    p.wait()
    before = ids_of(out)
    assert before and (out / "lock").read_text().strip() == str(p.pid)    # the dead writer's id is left
    r = spawn("design", "--resume", out, "--quiet")
    _, err = r.communicate(timeout=300)
    assert r.returncode == 0, err
    after = ids_of(out)
    assert set(before) <= set(after)                       # nothing lost
    assert len(after) == len(set(after))                   # nothing duplicated
    assert sorted(after) == list(range(1, len(after) + 1))  # ids run on without a gap
    assert len(after) > len(before)
    assert open_run(out).store.ranking_meta() is not None


def test_ctrl_c_exits_130_with_one_line_and_the_run_resumes(tmp_path):
    spec = tmp_path / "slow.toml"
    spec.write_text(SLOW.replace("time_limit_s = 120", "time_limit_s = 6"))
    out = tmp_path / "run"
    p = spawn("design", spec, "--out", out, "--quiet")
    wait_for_rows(out, 2000)
    p.send_signal(signal.SIGINT)
    _, err = p.communicate(timeout=60)
    assert p.returncode == 130
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "interrupted" in lines[0] and f"--resume {out}" in lines[0], err
    before = ids_of(out)
    r = spawn("design", "--resume", out, "--quiet")
    _, err = r.communicate(timeout=300)
    assert r.returncode == 0, err
    after = ids_of(out)
    assert set(before) <= set(after) and len(after) == len(set(after))


@pytest.mark.parametrize("delay", [0.6, 1.2])   # after the interpreter's own start-up (site), in synth's imports
def test_ctrl_c_during_start_up(tmp_path, delay):
    spec = tmp_path / "slow.toml"
    spec.write_text(SLOW)
    p = spawn("design", spec, "--out", tmp_path / "run", "--quiet")
    time.sleep(delay)
    p.send_signal(signal.SIGINT)
    _, err = p.communicate(timeout=60)
    assert p.returncode == 130, err
    assert "Traceback" not in err and "interrupted" in err
    assert len([ln for ln in err.splitlines() if ln.strip()]) == 1


# ------------------------------------------------------------------ progress
class _P:
    def __init__(self, phase, n, hv=None):
        self.phase, self.evaluated, self.feasible = phase, n, n // 10
        self.best = {"settling_time_s": 0.5 / (1 + n)}
        self.elapsed_s = n / 1000
        if hv is not None:
            self.hypervolume = hv


def test_progress_plain_lines_one_per_phase():
    buf = io.StringIO()
    pr = ProgressPrinter(stream=buf, live=False, budget=5000, time_limit_s=30)
    for ph, ns in [("seeds", [10]), ("sobol", [1000, 2000, 3000]), ("polish", [4000, 5000])]:
        for n in ns:
            pr(_P(ph, n, hv=0.25 if ph == "polish" else None))
    pr.close()
    text = buf.getvalue()
    assert "\r" not in text
    lines = text.splitlines()
    assert [ln.split()[0] for ln in lines] == ["[seeds]", "[sobol]", "[polish]"]
    assert "3000/5000 evaluated" in lines[1] and "300 feasible" in lines[1] and "of 30 s" in lines[1]
    assert "hypervolume 0.25" in lines[2] and "hypervolume" not in lines[1]
    quiet = io.StringIO()
    q = ProgressPrinter(enabled=False, stream=quiet)
    q(_P("seeds", 1))
    q.close()
    assert quiet.getvalue() == ""


def test_progress_live_line_on_a_terminal():
    buf = io.StringIO()
    pr = ProgressPrinter(stream=buf, live=True, min_interval_s=0.0)
    for n in (10, 20, 30):
        pr(_P("sobol", n))
    pr.close()
    out = buf.getvalue()
    assert "30 evaluated" in out and out.count("\n") <= 2    # redrawn in place, not one line each


def test_cli_design_progress_is_plain_when_piped(tmp_path):
    spec = tmp_path / "o.toml"
    spec.write_text(OGATA)
    p = spawn("design", spec, "--out", tmp_path / "run", "--budget", 600)
    _, err = p.communicate(timeout=300)
    assert p.returncode == 0, err
    assert "\r" not in err
    phases = [ln.split()[0] for ln in err.splitlines() if ln.startswith("[")]
    assert len(phases) == len(set(phases)) >= 2


# ------------------------------------------------------------------ start-up
def test_import_synth_and_the_cli_stay_light():
    code = ("import sys, synth, synth.cli; heavy = [m for m in ('pandas', 'scipy', 'matplotlib', 'optuna', "
            "'cvxpy', 'synth.evaluate') if m in sys.modules]; print(heavy); print(callable(synth.design))")
    out = subprocess.run([sys.executable, "-c", code], env=env(), capture_output=True, text=True, check=True)
    assert out.stdout.split("\n")[:2] == ["[]", "True"]


def test_records_and_the_evaluator_share_one_metric_list():
    from synth import metric_names, runs, tables
    from synth.evaluate import METRICS
    assert METRICS is metric_names.METRICS is tables.METRICS is runs.METRICS


def test_json_texts_equal_json_dumps_of_the_records(api_run):
    """The column-wise JSON writer of `table --json --all` writes what json.dumps writes."""
    from synth.runs import recheck
    from synth.tables import records, records_json
    d, out = api_run
    run = open_run(out)
    df = ranked(run)
    for rows in (df, recheck(run, df.head(7))):
        assert records_json(run, rows) == [json.dumps(r, allow_nan=False) for r in records(run, rows)]


from hypothesis import given, settings as hsettings, strategies as st  # noqa: E402

_floats = st.floats(allow_nan=True, allow_infinity=True, width=64)


@hsettings(max_examples=200, deadline=None)
@given(st.lists(_floats, min_size=0, max_size=40))
def test_json_column_writes_what_json_dumps_writes(xs):
    """Law: for every float column (NaN, +-inf, -0.0, subnormals included) the column-wise JSON
    texts equal json.dumps of the JSON values (Python's json module is the reference)."""
    from synth.tables import _column, _json_column
    a = np.array(xs, dtype=float)
    assert _json_column(a) == [json.dumps(v, allow_nan=False) for v in _column(a)]


@hsettings(max_examples=100, deadline=None)
@given(st.integers(1, 6), st.integers(0, 3), st.data())
def test_json_roots_writes_what_json_dumps_writes(n, k, data):
    from synth.tables import _json_roots, _roots
    finite = st.floats(allow_nan=False, allow_infinity=False, width=64)
    z = np.array([[complex(data.draw(finite), data.draw(finite)) for _ in range(k)] for _ in range(n)],
                 dtype=complex).reshape(n, k)
    want = [json.dumps(r) for r in _roots(z)]
    assert _json_roots(z) == want and _json_roots(list(z)) == want


def test_ctrl_c_swallowed_by_a_library_is_delivered_again(tmp_path):
    # An exception raised by a signal handler is lost when it lands in a finaliser or in a
    # library's catch-all; the Ctrl-C must still end the command (status 130, one line).
    script = tmp_path / "swallow.py"
    script.write_text(
        "import os, signal, sys, time\n"
        "from synth import cli\n"
        "@cli.app.command('swallow')\n"
        "def swallow():\n"
        "    try:\n"
        "        os.kill(os.getpid(), signal.SIGINT)\n"
        "        time.sleep(5)\n"
        "    except BaseException:\n"
        "        pass                     # the first delivery is lost here\n"
        "    time.sleep(60)\n"
        "    print('finished')\n"
        "sys.argv = ['synth', 'swallow']\n"
        "cli.main()\n")
    p = subprocess.run([sys.executable, str(script)], env=env(), cwd=ROOT, capture_output=True, text=True,
                       timeout=50)
    assert p.returncode == 130, p.stderr
    assert "finished" not in p.stdout and "Traceback" not in p.stderr
    assert [ln for ln in p.stderr.splitlines() if ln.strip()] == ["interrupted"]
