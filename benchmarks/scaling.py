"""Scaling of synth over Dask workers: many specs, one heavy spec, scheduler overhead, projection.

Run:  python benchmarks/scaling.py [--quick] [--out benchmarks/results/scaling.md]

Starts a real ``dask scheduler`` and ``dask worker`` processes on 127.0.0.1 (one
thread each, no nanny), and measures on this machine:

1. a multi-spec design (whole designs as tasks, synth.multi.design_many) with 1 and
   2 workers: designs and evaluations per second (target: 2 workers >= 1.7x);
2. one heavy spec with big batches (its evaluator batches as tasks, chunked by
   synth.search.explore): the invented dead-time heated tank, specs/heated_tank.toml,
   whose rows cost ~4 ms each (a robust many-model spec was being built elsewhere at
   the time; a dead-time spec stands in for it) with 1 and 2 workers (target >= 1.5x);
3. the scheduler's overhead per task (round trip of an empty task, and many in
   flight) and per batch size (an evaluator task on the cluster against the same
   call in-process);
4. a projection, from those figures, of a 300-loop retune on 1, 8 and 64 machines.

CPU-seconds of the driver and of every worker process are reported beside wall
times: the machine is shared with other developers, so wall-clock figures are noisy
and CPU-seconds say how much work was done. Nothing here asserts on timing.
"""

from __future__ import annotations

import argparse
import concurrent.futures as cf
import datetime
import math
import os
import pickle
import platform
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import psutil

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _machine import cpu_model  # noqa: E402
from synth.executor import connect  # noqa: E402
from synth.multi import design_many, design_task, _prepare, _record, _start, summary_row  # noqa: E402
from synth.runs import make_search, run_search, settings_from  # noqa: E402
from synth.search.explore import evaluate_batch  # noqa: E402
from synth.spec import load_spec  # noqa: E402

FAST = [ROOT / "specs" / f for f in ("maglev_carriage.toml", "camera_gimbal.toml", "buck_converter.toml")]
HEAVY = ROOT / "specs" / "heated_tank.toml"
LIMIT = 3600.0      # the budget, not the clock, ends every search
LOOPS = 300


# ------------------------------------------------------------------ a cluster on loopback
class Cluster:
    def __init__(self, workers: int):
        dask = str(Path(sys.executable).parent / "dask")
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            port = s.getsockname()[1]
        self.address = f"tcp://127.0.0.1:{port}"
        env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
        quiet = dict(stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, stdin=subprocess.DEVNULL, env=env)
        self.scheduler = subprocess.Popen([dask, "scheduler", "--host", "127.0.0.1", "--port", str(port),
                                           "--no-dashboard"], **quiet)
        self.workers = [subprocess.Popen([dask, "worker", self.address, "--nthreads", "1", "--no-nanny",
                                          "--no-dashboard", "--host", "127.0.0.1", "--name", f"w{i}"], **quiet)
                        for i in range(workers)]
        self.ex = connect(self.address, timeout=60)
        self.ex.client.wait_for_workers(workers, timeout=60)
        # warm every worker: import synth once, outside the timed runs
        self.ex.client.run(lambda: __import__("synth.multi") and None)

    def cpu(self) -> float:
        """CPU-seconds used so far by the worker processes."""
        total = 0.0
        for w in self.workers:
            t = psutil.Process(w.pid).cpu_times()
            total += t.user + t.system
        return total

    def stop(self):
        self.ex.shutdown(wait=False)
        for p in self.workers + [self.scheduler]:
            p.terminate()
        for p in self.workers + [self.scheduler]:
            try:
                p.wait(timeout=10)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()


def timed(fn, cl: Cluster | None = None):
    w0, d0 = time.perf_counter(), time.process_time()
    c0 = cl.cpu() if cl else 0.0
    out = fn()
    return out, time.perf_counter() - w0, time.process_time() - d0, (cl.cpu() - c0 if cl else 0.0)


# ------------------------------------------------------------------ CPU model (load-independent)
def in_task(fn, *args):
    """Run fn on a worker and say how long it ran there (wall, thread CPU): separates the
    scheduler's overhead from the task's own time."""
    w, c = time.perf_counter(), time.thread_time()
    out = fn(*args)
    return out, time.perf_counter() - w, time.thread_time() - c


def lpt(costs, k: int) -> float:
    """Makespan of independent tasks on k equal workers, longest first (Graham 1969: LPT is
    within 4/3 of the optimum)."""
    loads = [0.0] * k
    for c in sorted(costs, reverse=True):
        i = loads.index(min(loads))
        loads[i] += c
    return max(loads) if costs else 0.0


class Recording(cf.Executor):
    """In-process executor that records each task's CPU time, grouped by the batch it belongs to."""

    def __init__(self):
        self.groups: list[list[float]] = []

    def submit(self, fn, /, *args, **kw):
        f = cf.Future()
        c = time.process_time()
        f.set_result(fn(*args, **kw))
        self.groups[-1].append(time.process_time() - c)
        return f


def heavy_model(budget: int) -> dict:
    """The heavy spec in-process with the cluster's chunking: CPU per chunk and per batch, driver CPU."""
    from synth.search import explore
    spec = load_spec(HEAVY)
    rec = Recording()
    orig = explore.Search.evaluate_params

    def grouped(self, params):
        rec.groups.append([])
        return orig(self, params)
    explore.Search.evaluate_params = grouped
    try:
        with tempfile.TemporaryDirectory() as tmp:
            c = time.process_time()
            run_search(spec, HEAVY.read_text(), out=Path(tmp) / "r", executor=rec,
                       settings=settings_from(spec, budget, LIMIT, 0))
            total = time.process_time() - c
    finally:
        explore.Search.evaluate_params = orig
    tasks = sum(len(g) for g in rec.groups)
    driver = total - sum(map(sum, rec.groups))
    return {"groups": rec.groups, "driver": driver, "tasks": tasks, "total": total}


def model_wall(groups, driver: float, k: int, per_task: float) -> float:
    """Wall time on k dedicated cores: the driver's own CPU, then each batch's chunks (LPT) one
    batch after the other, plus the measured scheduler overhead per task spread over the workers."""
    return driver + sum(lpt(g, k) + per_task * math.ceil(len(g) / k) for g in groups)


# ------------------------------------------------------------------ measurements
def multi_spec(workers: int, paths, budget: int) -> dict:
    cl = Cluster(workers)
    try:
        with tempfile.TemporaryDirectory() as tmp:
            summary, wall, dcpu, wcpu = timed(lambda: design_many(paths, Path(tmp) / "o", cl.ex, budget=budget,
                                                                  time_limit=LIMIT, seed=0), cl)
        evals = int(summary["candidates"].sum())
    finally:
        cl.stop()
    return {"workers": workers, "wall": wall, "driver_cpu": dcpu, "worker_cpu": wcpu, "designs": len(paths),
            "status": ",".join(sorted(set(summary["status"]))), "evals": evals}


def heavy_spec(workers: int, budget: int) -> dict:
    spec = load_spec(HEAVY)
    text = HEAVY.read_text()
    cl = Cluster(workers)
    try:
        with tempfile.TemporaryDirectory() as tmp:
            run, wall, dcpu, wcpu = timed(lambda: run_search(spec, text, out=Path(tmp) / "r", executor=cl.ex,
                                                             settings=settings_from(spec, budget, LIMIT, 0)), cl)
            n = run.store.count()
    finally:
        cl.stop()
    return {"workers": workers, "wall": wall, "driver_cpu": dcpu, "worker_cpu": wcpu, "evals": n}


def overhead(quick: bool) -> dict:
    cl = Cluster(1)
    ex = cl.ex
    try:
        n_seq = 50 if quick else 200
        lat = []
        for _ in range(n_seq):
            t = time.perf_counter()
            ex.submit(int, 0).result()
            lat.append(time.perf_counter() - t)
        n_par = 200 if quick else 1000
        t = time.perf_counter()
        fs = [ex.submit(int, i) for i in range(n_par)]
        for f in fs:
            f.result()
        par = (time.perf_counter() - t) / n_par
        rows = []
        for path in (FAST[0], HEAVY):
            spec = load_spec(path)
            s = make_search(spec, settings_from(spec))
            u = np.random.default_rng(1).random((4096, s.space.dim))
            p = s.space.decode(u)
            p = p[s.space.prefilter(p)]
            args = (s.plant, s.space.family)
            for n in ((16, 64, 256) if path == HEAVY else (64, 256, 1024)):
                reps = 3 if path == HEAVY else 5
                local = []
                for _ in range(reps):
                    t = time.process_time()
                    df = evaluate_batch(*args, p[:n], s.requirements, s.options)
                    local.append(time.process_time() - t)
                remote, inside = [], []
                for _ in range(reps):
                    t = time.perf_counter()
                    _, w_in, _ = ex.submit(in_task, evaluate_batch, *args, p[:n], s.requirements,
                                           s.options).result()
                    remote.append(time.perf_counter() - t)
                    inside.append(w_in)
                j = int(np.argmin(remote))
                rows.append({"spec": path.stem, "rows": n, "local_cpu": min(local), "remote_wall": remote[j],
                             "task_wall": inside[j], "bytes": len(pickle.dumps(df))})
    finally:
        cl.stop()
    return {"latency": float(np.median(lat)), "latency_p90": float(np.quantile(lat, 0.9)),
            "in_flight": par, "batches": rows}


def record_cost(budget: int) -> dict:
    """Driver-side cost of one finished design: writing its run folder and its summary row."""
    spec_path = FAST[0]
    spec = load_spec(spec_path)
    out = design_task(spec_path.read_text(), str(spec_path), settings_from(spec, budget, LIMIT, 0))
    with tempfile.TemporaryDirectory() as tmp:
        it = _prepare([spec_path], Path(tmp), budget, LIMIT, 0)[0]
        t = time.process_time()
        _start(it)
        _record(it, out)
        summary_row(it)
        dt = time.process_time() - t
    size = len(pickle.dumps(out))
    return {"record_s": dt, "bytes": size, "rows": sum(len(b) for b in out.batches)}


# ------------------------------------------------------------------ report
def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="small budgets (about 3 minutes)")
    ap.add_argument("--out", type=Path, default=None, help="also write the report to this Markdown file")
    a = ap.parse_args()
    q = a.quick
    multi_budget, heavy_budget, copies = (1500, 1200, 2) if q else (5000, 3000, 2)
    paths = FAST * copies
    L = []
    say = L.append
    say("synth scaling benchmark (Dask workers on this machine)")
    say(f"date      {datetime.datetime.now(datetime.timezone.utc).isoformat(timespec='seconds')}")
    say(f"machine   nproc={os.cpu_count()}  cpu={cpu_model()}  {platform.system()} {platform.machine()}")
    say(f"load      {' '.join(f'{x:.2f}' for x in os.getloadavg())} (1/5/15 min; above nproc means other "
        "developers' work shares the cores: wall figures are noisy, CPU-seconds less so)")
    say(f"command   python benchmarks/scaling.py{' --quick' if q else ''}")
    say("")

    say(f"1. multi-spec design: {len(paths)} designs ({', '.join(p.stem for p in FAST)} x{copies}), "
        f"budget {multi_budget} each, whole designs as tasks")
    m = [multi_spec(w, paths, multi_budget) for w in (1, 2)]
    say(f"{'workers':>8} {'wall s':>8} {'designs/min':>12} {'evals/s':>9} {'worker CPU s':>13} "
        f"{'driver CPU s':>13} {'evals/CPU-s':>12}  status")
    for r in m:
        say(f"{r['workers']:>8} {r['wall']:>8.1f} {60 * r['designs'] / r['wall']:>12.2f} {r['evals'] / r['wall']:>9.0f} "
            f"{r['worker_cpu']:>13.1f} {r['driver_cpu']:>13.1f} {r['evals'] / max(r['worker_cpu'], 1e-9):>12.0f}  "
            f"{r['status']}")
    sp_multi = m[0]["wall"] / m[1]["wall"]
    say(f"measured speed-up 2 vs 1 worker (wall): {sp_multi:.2f}x (target >= 1.7x: "
        f"{'PASS' if sp_multi >= 1.7 else 'FAIL'}; noisy: other developers' load)")
    o = overhead(q)
    costs = []
    for path in paths:          # each design's own CPU, in-process, one after the other
        spec = load_spec(path)
        c = time.process_time()
        design_task(path.read_text(), str(path), settings_from(spec, multi_budget, LIMIT, 0))
        costs.append(time.process_time() - c)
    rc = record_cost(multi_budget)
    mw = [lpt(costs, k) + rc["record_s"] + o["in_flight"] * math.ceil(len(costs) / k) for k in (1, 2)]
    say(f"CPU model (each design's measured CPU-s: {', '.join(f'{c:.2f}' for c in costs)}; longest first on k "
        f"dedicated cores, + the last design's driver write {rc['record_s']:.2f} s)")
    say(f"  1 worker {mw[0]:.1f} s, 2 workers {mw[1]:.1f} s: speed-up {mw[0] / mw[1]:.2f}x "
        f"(target >= 1.7x: {'PASS' if mw[0] / mw[1] >= 1.7 else 'FAIL'})")
    say("")

    say(f"2. one heavy spec, batches as tasks: {HEAVY.name} (invented dead-time loop, ~4 ms per row), "
        f"budget {heavy_budget}")
    h = [heavy_spec(w, heavy_budget) for w in (1, 2)]
    say(f"{'workers':>8} {'wall s':>8} {'evals/s':>9} {'worker CPU s':>13} {'driver CPU s':>13}")
    for r in h:
        say(f"{r['workers']:>8} {r['wall']:>8.1f} {r['evals'] / r['wall']:>9.1f} {r['worker_cpu']:>13.1f} "
            f"{r['driver_cpu']:>13.1f}")
    sp_heavy = h[0]["wall"] / h[1]["wall"]
    say(f"measured speed-up 2 vs 1 worker (wall): {sp_heavy:.2f}x (target >= 1.5x: "
        f"{'PASS' if sp_heavy >= 1.5 else 'FAIL'}; noisy: other developers' load)")
    hm = heavy_model(heavy_budget)
    hw = [model_wall(hm["groups"], hm["driver"], k, o["in_flight"]) for k in (1, 2, 4, 8)]
    serial = sum(sum(g) for g in hm["groups"] if len(g) == 1)
    say(f"CPU model ({hm['tasks']} tasks in {len(hm['groups'])} batches, {sum(map(sum, hm['groups'])):.1f} "
        f"evaluator CPU-s, of which {serial:.1f} in single-task batches; driver {hm['driver']:.1f} CPU-s):")
    say(f"  1 worker {hw[0]:.1f} s, 2 workers {hw[1]:.1f} s: speed-up {hw[0] / hw[1]:.2f}x (target >= 1.5x: "
        f"{'PASS' if hw[0] / hw[1] >= 1.5 else 'FAIL'}); 4 workers {hw[0] / hw[2]:.2f}x, 8 workers {hw[0] / hw[3]:.2f}x")
    say("  the screening batches split into 8 tasks; the model-based batches (32 rows) are one task and the")
    say("  polishing batches one or two, so that part runs one task at a time (Amdahl's law)")
    say("")

    say("3. scheduler overhead (1 worker)")
    say(f"empty task round trip: median {o['latency'] * 1e3:.1f} ms, 90th percentile {o['latency_p90'] * 1e3:.1f} ms; "
        f"many in flight: {o['in_flight'] * 1e3:.2f} ms per task")
    say(f"{'spec':<16} {'rows':>6} {'in-process CPU ms':>18} {'round trip ms':>14} {'in task ms':>11} "
        f"{'overhead ms':>12} {'result kB':>10}")
    for b in o["batches"]:
        say(f"{b['spec']:<16} {b['rows']:>6} {b['local_cpu'] * 1e3:>18.1f} {b['remote_wall'] * 1e3:>14.1f} "
            f"{b['task_wall'] * 1e3:>11.1f} {(b['remote_wall'] - b['task_wall']) * 1e3:>12.1f} "
            f"{b['bytes'] / 1e3:>10.0f}")
    say("overhead = round trip - time inside the task: submit, scheduling, pickling and moving the result")
    say("")

    say(f"4. projection: a {LOOPS}-loop retune at the default budget (20000 evaluations per loop)")
    cpu_per_eval = sum(costs) / (len(costs) * multi_budget)
    t_design = cpu_per_eval * 20000          # CPU-seconds of one design, linear in the budget
    rec = rc["record_s"] * 20000 / rc["rows"]
    size = rc["bytes"] * 20000 / rc["rows"]
    say(f"measured: {cpu_per_eval * 1e3:.3f} CPU-ms per evaluation (section 1, in-process) -> "
        f"{t_design:.1f} CPU-s per design (linear in the budget, an assumption: optuna's share is capped)")
    say(f"measured: the driver writes a design's run folder and summary row in {rec:.2f} CPU-s, result "
        f"{size / 1e6:.1f} MB per design (scaled from budget {multi_budget}); task overhead {o['in_flight'] * 1e3:.1f} ms")
    say(f"{'machines':>9} {'cores':>6} {'waves':>6} {'compute s':>10} {'driver s':>9} {'projected wall':>15}  limited by")
    for machines in (1, 8, 64):
        slots = 2 * machines
        waves = math.ceil(LOOPS / slots)
        compute = waves * t_design
        driver = LOOPS * (rec + o["in_flight"])
        wall = max(compute, driver) + rec
        lim = ("compute (cores)" if compute > 2 * driver else "the driver's serial writes" if driver > compute
               else "compute and the driver's writes")
        if waves * slots > LOOPS and machines > 1:
            lim += f"; last wave {LOOPS - (waves - 1) * slots}/{slots} slots busy"
        say(f"{machines:>9} {slots:>6} {waves:>6} {compute:>10.0f} {driver:>9.0f} {_hms(wall):>15}  {lim}")
    say("assumes machines like this one (2 cores, 1 worker thread per core), whole designs as tasks and no other load;")
    say("at 64 machines 128 slots take 300 loops in 3 waves, so a loop that takes longer than the rest (stragglers)")
    say("and the one driver that writes every run folder (SQLite, one process) set the wall time; results of")
    say(f"~{size / 1e6:.0f} MB per design also cross the network to the driver.")
    text = "\n".join(L)
    print(text)
    if a.out:
        a.out.write_text("# Scaling benchmark\n\n```\n" + text + "\n```\n")


def _hms(s: float) -> str:
    return f"{s / 3600:.1f} h" if s >= 3600 else f"{s / 60:.1f} min" if s >= 60 else f"{s:.0f} s"


if __name__ == "__main__":
    main()
