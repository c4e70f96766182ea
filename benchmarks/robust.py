"""Robust design: the cost of evaluating a model set, and the price of robustness.

Run:  python benchmarks/robust.py [--quick] [--out benchmarks/results/robust.md]

(1) Evaluations per second, one batch of scrambled-Sobol candidates (the search's
    unit cube, decoded and prefiltered) on the third-order example of issue 10
    (an unstable 5/(0.05 s^3 + 1.025 s^2 + 0.35 s - 3) plant, lead-lead), with
    model sets of 1, 5, 17 and 65 models: the nominal alone; nominal + the 4
    vertices of a 2-coefficient box; + the 16 vertices of a 4-coefficient box;
    + 16 vertices and 48 interior samples. Two figures per set: the search's
    way (``synth.evaluate.robust.evaluate_models``: nominal screen first, the
    box's float screen, every other model only for nominal-feasible survivors,
    batched across models) and "all models for every candidate" (the nominal
    screen switched off by dropping the requirements for the gate), each as
    candidates per second and as a multiple of the nominal time per candidate.
(2) Target check: a 16-vertex box plus one variant (the 20 ms actuator lag of
    issue 10) through ``synth.search.explore.Search``: time to the first
    feasible design, evaluation time per candidate against the nominal.
(3) Price of robustness: the same search with and without the model set on two
    specs (the third-order example; specs/maglev_robust.toml); hypervolume of
    each feasible front with every objective divided by its requirement limit
    (reference point 1.0), and the robust front's hypervolume as a fraction of
    the nominal's. The robust front is re-judged on the nominal too (its rows'
    nominal values are not stored), so the fraction compares worst-case values
    of the robust designs with nominal values of the nominal designs: how much
    of the trade-off the uncertainty costs.

Quick mode: smaller batches and time limits. BLAS pinned to one thread. Times are
wall-clock on a shared 2-core machine: noisy; never asserted in tests.
"""

from __future__ import annotations

import argparse
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
from scipy.stats import qmc
from threadpoolctl import threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchmarks._machine import cpu_model  # noqa: E402
from synth.evaluate import EvalOptions, evaluate  # noqa: E402
from synth.evaluate.robust import evaluate_models  # noqa: E402
from synth.models import CoefficientBox, ModelSet  # noqa: E402
from synth.rank import front_hypervolume, rank  # noqa: E402
from synth.search.explore import Search, Settings  # noqa: E402
from synth.search.space import build_space  # noqa: E402
from synth.spec import load_spec, parse_spec  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
THIRD_ORDER = """
name = "third_order_two_lead"
[plant]
numerator = [5.0]
denominator = [0.05, 1.025, 0.35, -3.0]
[plant.intervals]
numerator = [[4.5, 5.5]]
denominator = [0.05, [0.95, 1.1], [0.3, 0.4], [-3.3, -2.8]]
[[plant.variants]]
name = "with-actuator-lag"
numerator = [5.0]
denominator = [0.001, 0.0705, 1.032, 0.29, -3.0]
[controller]
stages = ["lead", "lead"]
[requirements]
max_overshoot_pct = 30
max_sensitivity_peak = 2.2
max_settling_time_s = 3.0
[objectives]
minimize = ["settling_time_s", "disturbance_peak", "control_peak"]
"""


def model_sets(spec):
    nom = spec.plant
    ms = spec.models
    b = ms.box
    two = CoefficientBox(b.num_lo, b.num_hi, np.where([0, 0, 1, 1], b.den_lo, nom.den),
                         np.where([0, 0, 1, 1], b.den_hi, nom.den))
    return {1: None,
            5: ModelSet(nom, (), two, samples=0),
            17: ModelSet(nom, (), b, samples=0),
            65: ModelSet(nom, (), b, samples=48)}


def per_candidate(spec, n, reps):
    sp = build_space(spec.plant, spec.controller, dict(spec.requirements))
    u = qmc.Sobol(sp.dim, scramble=True, seed=0).random(n)
    params = sp.decode(u)
    params = params[sp.prefilter(params)]
    opts = EvalOptions(settling_band=spec.options.settling_band, pade_order=spec.options.pade_order, screen=True)
    reqs = dict(spec.requirements)
    rows = []

    def timeit(fn):
        best = np.inf
        for _ in range(reps):
            t = time.perf_counter()
            fn()
            best = min(best, time.perf_counter() - t)
        return best
    t_nom = timeit(lambda: evaluate(spec.plant, sp.family, params, reqs, opts))
    t_nom0 = timeit(lambda: evaluate(spec.plant, sp.family, params, {}, opts))
    surv = int(evaluate(spec.plant, sp.family, params, reqs, opts)["feasible"].sum())
    for k, ms in model_sets(spec).items():
        if ms is None:
            rows.append((k, len(params), surv, t_nom, t_nom0, len(params)))
            continue
        t_s = timeit(lambda: evaluate_models(ms, sp.family, params, reqs, opts, tuple(spec.objectives)))
        # every model for every candidate: no requirement gates the nominal stage
        t_a = timeit(lambda: evaluate_models(ms, sp.family, params, {}, opts, tuple(spec.objectives)))
        full = int(evaluate_models(ms, sp.family, params, {}, opts, tuple(spec.objectives))["models_complete"].sum())
        rows.append((k, len(params), surv, t_s, t_a, full))
    return (t_nom, t_nom0), rows


def search(spec, models, seconds, budget):
    st = Settings(budget=budget, time_limit_s=seconds, seed=0)
    opts = EvalOptions(settling_band=spec.options.settling_band, pade_order=spec.options.pade_order)
    s = Search(spec.plant, spec.controller, dict(spec.requirements), spec.objectives, st, opts, models=models)
    t = time.perf_counter()
    df = s.run()
    wall = time.perf_counter() - t
    return s, df, wall


def main(argv=None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--out", type=Path, default=None)
    a = ap.parse_args(argv)
    n, reps, secs, budget = (512, 2, 6.0, 3000) if a.quick else (2048, 3, 20.0, 20000)
    out = [f"# Robust design benchmark{' (quick)' if a.quick else ''}", "",
           f"Machine: {cpu_model()}, BLAS one thread. Command: `python benchmarks/robust.py"
           f"{' --quick' if a.quick else ''}`.", ""]
    with threadpool_limits(limits=1, user_api="blas"):
        spec = parse_spec(THIRD_ORDER, "third_order_two_lead")
        (t_nom, t_nom0), rows = per_candidate(spec, n, reps)
        out += ["## (1) Evaluation cost per model-set size", "",
                f"{rows[0][1]} candidates after the prefilter, {rows[0][2]} feasible on the nominal "
                "(with the requirements). Left: the search's way (requirements on, nominal gate). Right: "
                "requirements dropped, so every candidate stable on the nominal and passing the box screen "
                "is evaluated on every model (count in the last column); both against the nominal-only "
                "evaluation of the same batch with the same requirement set.", "",
                "| models | search way: cand/s | x nominal | no gate: cand/s | x nominal | rows on all models |",
                "| ---: | ---: | ---: | ---: | ---: | ---: |"]
        for k, m, _, ts, ta, full in rows:
            out.append(f"| {k} | {m / ts:,.0f} | {ts / t_nom:.1f} | {m / ta:,.0f} | {ta / t_nom0:.1f} | {full} |")
        out.append("")

        # (2) target: 16-vertex box + one variant
        target = replace(spec.models, samples=0)
        s_r, df_r, wall_r = search(spec, target, secs, budget)
        s_n, df_n, wall_n = search(spec, None, secs, budget)
        per_r = wall_r / max(s_r.state["evaluated"], 1)
        per_n = wall_n / max(s_n.state["evaluated"], 1)
        ff = s_r.state["first_feasible_s"]
        out += ["## (2) Target: 16-vertex box + one variant, through the search", "",
                f"- first feasible design after {ff if ff is None else round(ff, 2)} s (target <= 2 s); "
                f"nominal-only search: {s_n.state['first_feasible_s'] and round(s_n.state['first_feasible_s'], 2)} s",
                f"- wall time per evaluated candidate: robust {per_r * 1e3:.3f} ms, nominal {per_n * 1e3:.3f} ms, "
                f"ratio {per_r / per_n:.1f}x (target <= 20x)",
                f"- evaluated: robust {s_r.state['evaluated']} in {wall_r:.1f} s ({int(df_r['feasible'].sum())} feasible), "
                f"nominal {s_n.state['evaluated']} in {wall_n:.1f} s ({int(df_n['feasible'].sum())} feasible)", ""]

        # (3) price of robustness
        out += ["## (3) Price of robustness (hypervolume, objectives / limits, reference 1.0)", "",
                "| spec | models | nominal HV | robust HV | robust / nominal | feasible robust / nominal |",
                "| --- | ---: | ---: | ---: | ---: | ---: |"]
        for sp_ in (spec, load_spec(ROOT / "specs" / "maglev_robust.toml")):
            _, dn, _ = search(sp_, None, secs, budget)
            _, dr, _ = search(sp_, sp_.models, secs, budget)
            lims = dict(sp_.requirements)
            objs = [o for o in sp_.objectives if _has_limit(o, lims)]
            hv = []
            for d in (dn, dr):
                rk = rank(d, lims, objs)
                hv.append(front_hypervolume(rk, objs, limits=lims) if objs else float("nan"))
            frac = hv[1] / hv[0] if hv[0] > 0 else float("nan")
            out.append(f"| {sp_.name} | {len(sp_.models.members)} | {hv[0]:.4g} | {hv[1]:.4g} | {frac:.3f} | "
                       f"{int(dr['feasible'].sum())} / {int(dn['feasible'].sum())} |")
        out += ["", f"Objectives with a max_ limit only (HV needs a limit to normalise); search time limit "
                f"{secs:g} s, budget {budget}, seed 0."]
    text = "\n".join(out) + "\n"
    print(text)
    if a.out:
        a.out.parent.mkdir(parents=True, exist_ok=True)
        a.out.write_text(text)
    return 0


def _has_limit(obj: str, lims: dict) -> bool:
    from synth.requirements import REQUIREMENTS
    return any(k in lims for k, r in REQUIREMENTS.items() if r.metric == obj and r.sense == "max")


if __name__ == "__main__":
    raise SystemExit(main())
