"""Many loops, locally and on a real Dask cluster (synth.multi, synth.executor).

The cluster fixture starts a real ``dask scheduler`` and two ``dask worker`` processes
on 127.0.0.1 (the commands installed with distributed) and stops every process it
started, also when a test fails. Budgets are small so the file runs in well under a
minute; the time limits are generous so that the budget, not the clock, ends every
search (determinism holds for a given seed and budget).
"""

from __future__ import annotations

import csv
import io
import json
import os
import shutil
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from synth import executor as ex_mod
from synth.archive import RunStore
from synth.cli import app
from synth.executor import ClusterError, InlineExecutor, connect
from synth.multi import design_many, folder_names, safe_name, summary_csv, summary_frame
from synth.runs import open_run, ranked, run_search, settings_from
from synth.spec import load_spec

ROOT = Path(__file__).resolve().parent.parent
SPECS = [ROOT / "specs" / f for f in ("maglev_carriage.toml", "camera_gimbal.toml", "buck_converter.toml")]
BUDGET, LIMIT = 250, 600.0
runner = CliRunner()


# ------------------------------------------------------------------ a real cluster on loopback
def _dask_command() -> str:
    here = Path(sys.executable).parent / "dask"
    found = str(here) if here.exists() else shutil.which("dask")
    if not found:
        pytest.skip("the 'dask' command (distributed) is not installed")
    return found


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class LocalDask:
    """A scheduler and workers started as separate processes; ``stop`` ends each by its pid."""

    def __init__(self, log_dir: Path):
        self.dask = _dask_command()
        self.port = _free_port()
        self.address = f"tcp://127.0.0.1:{self.port}"
        self.log_dir = log_dir
        self.env = dict(os.environ, PYTHONPATH=os.pathsep.join(
            [str(ROOT)] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]))
        self.procs: dict[str, subprocess.Popen] = {}

    def _spawn(self, name: str, args: list[str]) -> subprocess.Popen:
        log = open(self.log_dir / f"{name}.log", "w")
        p = subprocess.Popen([self.dask] + args, env=self.env, stdout=log, stderr=subprocess.STDOUT,
                             stdin=subprocess.DEVNULL)
        log.close()
        self.procs[name] = p
        return p

    def start_scheduler(self) -> None:
        self._spawn("scheduler", ["scheduler", "--host", "127.0.0.1", "--port", str(self.port), "--no-dashboard"])
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            try:
                socket.create_connection(("127.0.0.1", self.port), timeout=0.5).close()
                return
            except OSError:
                time.sleep(0.1)
        raise RuntimeError(f"the dask scheduler did not listen on {self.address}; see {self.log_dir}")

    def start_worker(self, name: str) -> None:
        self._spawn(name, ["worker", self.address, "--name", name, "--nthreads", "1", "--no-nanny",
                           "--no-dashboard", "--host", "127.0.0.1"])

    def worker_of(self, client, key_part: str = "") -> str | None:
        """Name of a worker processing a task now (None if none is)."""
        info = client.scheduler_info()["workers"]
        for addr, keys in client.processing().items():
            if keys and addr in info:
                return info[addr]["name"]
        return None

    def kill(self, name: str) -> None:
        p = self.procs[name]
        p.kill()
        p.wait(timeout=10)

    def stop(self) -> None:
        """Terminate the workers, then the scheduler (each by its own pid); kill what lingers."""
        order = [n for n in self.procs if n != "scheduler"] + [n for n in self.procs if n == "scheduler"]
        for n in order:
            if self.procs[n].poll() is None:
                self.procs[n].terminate()
        for n in order:
            try:
                self.procs[n].wait(timeout=3)
            except subprocess.TimeoutExpired:
                self.procs[n].kill()
                self.procs[n].wait(timeout=10)


def _start(tmp: Path, workers: int) -> LocalDask:
    c = LocalDask(tmp)
    try:
        c.start_scheduler()
        for i in range(workers):
            c.start_worker(f"w{i}")
        return c
    except BaseException:
        c.stop()
        raise


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    c = _start(tmp_path_factory.mktemp("dask"), 2)
    try:
        yield c
    finally:
        c.stop()


@pytest.fixture()
def executor(cluster):
    ex = connect(cluster.address, timeout=30)
    try:
        ex.client.wait_for_workers(2, timeout=30)
        yield ex
    finally:
        ex.shutdown(wait=False)


@pytest.fixture(scope="module")
def local(tmp_path_factory):
    """The three-spec design on this machine (local process pool): the reference."""
    out = tmp_path_factory.mktemp("local") / "out"
    return out, design_many(SPECS, out, budget=BUDGET, time_limit=LIMIT)


def _tables(out: Path, summary: pd.DataFrame) -> dict[str, pd.DataFrame]:
    return {r.name: ranked(open_run(Path(r.run_folder))) for r in summary.itertuples()}


def _same_designs(a_out, a_sum, b_out, b_sum) -> None:
    cols = [c for c in a_sum.columns if c != "run_folder"]
    pd.testing.assert_frame_equal(a_sum[cols], b_sum[cols])
    ta, tb = _tables(a_out, a_sum), _tables(b_out, b_sum)
    for name in ta:
        pd.testing.assert_frame_equal(ta[name], tb[name], check_exact=True)
        stored = RunStore(b_out / name).load()
        assert stored["id"].tolist() == list(range(1, len(stored) + 1)), "candidates lost or duplicated"


# ------------------------------------------------------------------ on the cluster
def test_three_specs_on_cluster_equal_local_run(local, executor, tmp_path):
    l_out, l_sum = local
    assert list(l_sum["status"]) == ["feasible"] * 3
    out = tmp_path / "cluster"
    c_sum = design_many(SPECS, out, executor, budget=BUDGET, time_limit=LIMIT)
    _same_designs(l_out, l_sum, out, c_sum)


def test_single_spec_batches_on_cluster_equal_in_process(executor, tmp_path):
    """One spec with --cluster: its evaluator batches are the tasks (chunks merged in order)."""
    spec = load_spec(SPECS[0])
    s = settings_from(spec, 600, LIMIT, 3)      # a 420-row screening batch: seven chunks
    text = SPECS[0].read_text()
    a = run_search(spec, text, out=tmp_path / "a", settings=s, executor=InlineExecutor())
    b = run_search(spec, text, out=tmp_path / "b", settings=s, executor=executor)
    da, db = a.store.load(), b.store.load()
    assert len(da) == 600 and da["id"].is_unique
    pd.testing.assert_frame_equal(da, db, check_exact=True)
    pd.testing.assert_frame_equal(ranked(a), ranked(b), check_exact=True)


def test_worker_killed_mid_run_loses_and_duplicates_nothing(local, cluster, executor, tmp_path):
    l_out, l_sum = local
    out = tmp_path / "faults"
    result: dict = {}

    def drive():
        try:
            result["summary"] = design_many(SPECS, out, executor, budget=BUDGET, time_limit=LIMIT)
        except BaseException as e:   # reported by the main thread
            result["error"] = e

    t = threading.Thread(target=drive)
    t.start()
    victim, deadline = None, time.monotonic() + 30
    while victim is None and time.monotonic() < deadline and t.is_alive():
        victim = cluster.worker_of(executor.client)
        time.sleep(0.05)
    assert victim is not None, "no task reached a worker"
    cluster.kill(victim)        # with a design task on it (about 0.5 s of work each)
    cluster.start_worker(f"{victim}-replacement")   # the pool may also grow while a run goes on
    t.join(timeout=120)
    assert not t.is_alive()
    assert "error" not in result, result.get("error")
    _same_designs(l_out, l_sum, out, result["summary"])


def test_lost_scheduler_clear_error_and_resumable(local, tmp_path):
    l_out, l_sum = local
    mini = _start(tmp_path, 1)
    try:
        ex = connect(mini.address, timeout=30)
        out = tmp_path / "lost"
        result: dict = {}

        def drive():
            try:
                design_many(SPECS[:1], out, ex, budget=BUDGET, time_limit=LIMIT, where=f"scheduler {mini.address}")
            except BaseException as e:
                result["error"] = e

        t = threading.Thread(target=drive)
        t.start()
        deadline = time.monotonic() + 30
        while mini.worker_of(ex.client) is None and time.monotonic() < deadline:
            time.sleep(0.05)
        mini.kill("scheduler")
        t.join(timeout=60)
        ex.shutdown(wait=False)
    finally:
        mini.stop()
    err = result.get("error")
    assert isinstance(err, ClusterError), err
    assert "lost the connection to the Dask scheduler" in str(err) and "--resume" in str(err)
    summary = pd.read_csv(out / "summary.csv")
    assert list(summary["status"]) == ["error"] and "--resume" in summary.loc[0, "message"]
    for r in summary.itertuples():        # every unfinished folder resumes to the local result
        if r.status == "error":
            run_search(None, "", resume=Path(r.run_folder))
        ref = ranked(open_run(l_out / r.name))
        pd.testing.assert_frame_equal(ranked(open_run(Path(r.run_folder))), ref, check_exact=True)


def test_cli_unreachable_scheduler_exit_2(tmp_path, monkeypatch):
    monkeypatch.setattr(ex_mod, "CONNECT_TIMEOUT_S", 1.0)
    addr = f"tcp://127.0.0.1:{_free_port()}"
    r = runner.invoke(app, ["design", str(SPECS[0]), str(SPECS[1]), "--cluster", addr, "--out", str(tmp_path / "o")])
    assert r.exit_code == 2
    assert f"--cluster {addr}: cannot reach a Dask scheduler" in r.output
    assert "Traceback" not in r.output
    monkeypatch.setenv("SYNTH_CLUSTER", addr)   # the environment variable selects the cluster too
    r = runner.invoke(app, ["design", str(SPECS[0]), "--out", str(tmp_path / "p")])
    assert r.exit_code == 2 and "cannot reach a Dask scheduler" in r.output


# ------------------------------------------------------------------ summary, names, invalid specs
BAD = 'name = "bad"\n[plant]\ntransfer = "1/(s+1)"\n[requirements]\nmax_overshoot_pct = "ten"\n'
TWIN = 'name = "twin"\n[plant]\ntransfer = "4/(s*(s+2))"\n[controller]\nstages = ["lead"]\n' \
       '[requirements]\n{reqs}\n[search]\nbudget = 300\ntime_limit_s = 600\n'


def test_folder_names_deterministic_and_distinct():
    names = ["tank", "tank", "Tank", "tank-2", "a b", "", "tank"]
    got = folder_names(names)
    assert got == ["tank", "tank-3", "Tank-4", "tank-2", "a-b", "run", "tank-5"]
    assert len({g.lower() for g in got}) == len(got)
    assert folder_names(names) == got


@settings(max_examples=200, deadline=None)
@given(st.lists(st.text(alphabet="abAB -_.", max_size=6), max_size=12))
def test_folder_names_law(names):
    """For any names: distinct (case-insensitively), deterministic, each the spec's own safe name
    or that name with a -k suffix, and the first spec of a name that no other spec takes keeps it."""
    got = folder_names(names)
    assert len(got) == len(names) and len({g.lower() for g in got}) == len(got)
    assert folder_names(list(names)) == got
    for n, g in zip(names, got):
        b = safe_name(n)
        assert g == b or (g.startswith(b + "-") and g[len(b) + 1:].isdigit())
    lowered = [safe_name(n).lower() for n in names]
    for i, n in enumerate(names):
        if lowered.index(lowered[i]) == i:
            assert got[i] == safe_name(n)


@settings(max_examples=100, deadline=None)
@given(st.text(max_size=30), st.text(max_size=60), st.floats(allow_nan=False, allow_infinity=False))
def test_summary_csv_round_trip(name, message, value):
    """Any name and message (commas, quotes, line breaks) and any finite float survive the csv module."""
    rows = [{"name": name, "spec": "a.toml", "status": "error", "candidates": 1, "feasible": 0, "knee_id": None,
             "knee": {"settling_time_s": value}, "conflict": "", "run_folder": "", "message": message}]
    recs = list(csv.DictReader(io.StringIO(summary_csv(summary_frame(rows)), newline="")))
    assert len(recs) == 1 and recs[0]["name"] == name and recs[0]["message"] == message
    assert float(recs[0]["knee_settling_time_s"]) == value


def test_invalid_spec_row_others_run_exit_2_and_clashes(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(BAD)
    a, b = tmp_path / "a.toml", tmp_path / "b.toml"
    a.write_text(TWIN.format(reqs="min_phase_margin_deg = 45"))
    # same name; a 0.01 control peak leaves the loop far too slow to settle in 0.5 s
    b.write_text(TWIN.format(reqs="max_settling_time_s = 0.5\nmax_control_peak = 0.01"))
    out = tmp_path / "out"
    r = runner.invoke(app, ["design", str(a), str(bad), str(b), "--out", str(out)])
    assert r.exit_code == 2, r.output
    assert "max_overshoot_pct" in r.output and "Traceback" not in r.output
    s = pd.read_csv(out / "summary.csv")
    assert list(s["name"]) == ["twin", "bad", "twin"]
    assert list(s["status"]) == ["feasible", "invalid", "infeasible"]
    assert s.loc[1, "message"].startswith(str(bad)) and pd.isna(s.loc[1, "run_folder"])
    assert [Path(f).name for f in s.loc[[0, 2], "run_folder"]] == ["twin", "twin-2"]
    assert s.loc[2, "conflict"] == "max_settling_time_s" and pd.isna(s.loc[2, "knee_id"])
    k = int(s.loc[0, "knee_id"])
    knee = ranked(open_run(out / "twin")).set_index("id").loc[k]
    assert bool(knee["knee"]) and s.loc[0, "knee_settling_time_s"] == float(knee["settling_time_s"])
    r = runner.invoke(app, ["design", str(a), str(b), "--out", str(out), "--json"])   # folders in use
    assert r.exit_code == 2 and "exists and is not empty" in r.output
    r = runner.invoke(app, ["design", str(bad), str(a), "--out", str(tmp_path / "j"), "--json"])
    assert r.exit_code == 2
    doc = json.loads(r.stdout)
    assert [x["status"] for x in doc["summary"]] == ["invalid", "feasible"] and doc["caution"]
    assert doc["summary"][1]["knee_id"] == int(pd.read_csv(tmp_path / "j" / "summary.csv").loc[1, "knee_id"])


def test_summary_csv_plain_for_pandas_and_csv(tmp_path):
    rows = [{"name": 'odd, "quoted" name', "spec": "x.toml", "status": "feasible", "candidates": 10,
             "feasible": 3, "knee_id": 7, "knee": {"settling_time_s": 0.1 + 0.2, "control_peak": 4.0},
             "conflict": "", "run_folder": "out/x", "message": ""},
            {"name": "y", "spec": "y.toml", "status": "invalid", "candidates": None, "feasible": None,
             "knee_id": None, "knee": {}, "conflict": "", "run_folder": "", "message": "y.toml: line 1\nbad"}]
    text = summary_csv(summary_frame(rows))
    p = tmp_path / "summary.csv"
    p.write_bytes(text.encode())
    assert text.splitlines()[0].startswith("name,spec,status,candidates,feasible,knee_id,knee_settling_time_s")
    df = pd.read_csv(p)
    assert df.loc[0, "name"] == 'odd, "quoted" name' and df.loc[0, "knee_settling_time_s"] == 0.1 + 0.2
    assert df.loc[0, "knee_id"] == 7 and pd.isna(df.loc[1, "candidates"])
    with open(p, newline="") as f:
        recs = list(csv.DictReader(f))
    assert [r["status"] for r in recs] == ["feasible", "invalid"]
    assert recs[0]["knee_id"] == "7" and recs[1]["knee_id"] == "" and recs[1]["message"] == "y.toml: line 1\nbad"


def test_task_error_is_a_row_not_a_crash(tmp_path, monkeypatch):
    import synth.multi as multi

    def boom(*a):
        raise ValueError("evaluator blew up")
    monkeypatch.setattr(multi, "design_task", boom)
    s = design_many(SPECS[:1], tmp_path / "o", InlineExecutor(), budget=50)
    assert s.loc[0, "status"] == "error" and "evaluator blew up" in s.loc[0, "message"]
    assert (tmp_path / "o" / "maglev_carriage" / "manifest.json").exists()   # resumable folder
