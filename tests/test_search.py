"""Synthesis: seeds, the search, resume, determinism, tighten/loosen, table rows re-checked independently."""

from __future__ import annotations

import numpy as np
import pytest

from synth.runs import open_run, ranked, recheck, run_search
from synth.search.explore import Search, Settings
from synth.search.seeds import seeds
from synth.search.space import build_space, gain_sign
from synth.evaluate import EvalOptions, evaluate
from synth.lti import TransferFunction
from synth.spec import parse_spec

from _oracles import closed_loop, hurwitz_by_roots, reference_metrics, scipy_step

# Ogata, Modern Control Engineering, 5th ed. 2010, ex. 7-26 (value from memory): G = 4/(s(s+2)),
# specification Kv = 20 1/s, phase margin >= 50 deg, gain margin >= 10 dB.
OGATA_LEAD = """
name = "ogata-lead"
[plant]
numerator = [4]
denominator = [1, 2, 0]
[controller]
stages = ["lead"]
frequency_range_rad_s = [0.1, 1000]
[requirements]
min_velocity_constant = 20
min_phase_margin_deg = 50
min_gain_margin_db = 10
"""

# invented: a levitated carriage with one unstable pole, two lead stages
MAGLEV = """
name = "maglev-test"
[plant]
zeros = []
poles = [20, -20, -500]
gain = 40000
[controller]
stages = ["lead", "lead"]
frequency_range_rad_s = [1, 5000]
[requirements]
min_damping = 0.4
max_overshoot_pct = 25
max_settling_time_s = 0.3
min_phase_margin_deg = 35
max_sensitivity_peak = 2.0
max_control_peak = 100
[search]
budget = 6000
time_limit_s = 60
seed = 3
"""


def _search(spec, budget=3000, seed=0, **kw):
    s = Search(spec.plant, spec.controller, dict(spec.requirements), spec.objectives,
               Settings(budget=budget, time_limit_s=120, seed=seed, **kw),
               EvalOptions(settling_band=spec.options.settling_band))
    return s, s.run()


def test_seed_designs_meet_the_textbook_lead_specification():
    # The classical frequency-response lead design must meet Ogata's ex. 7-26 specification
    # (Kv = 20, PM >= 50 deg, GM >= 10 dB) among the seeds alone.
    spec = parse_spec(OGATA_LEAD)
    space = build_space(spec.plant, spec.controller, dict(spec.requirements))
    p = seeds(spec.plant, space, dict(spec.requirements))
    assert len(p) > 0
    df = evaluate(spec.plant, space.family, p, dict(spec.requirements))
    assert df["feasible"].any()
    best = df[df["feasible"]].iloc[0]
    assert best["velocity_constant"] >= 20 - 1e-9
    assert best["phase_margin_deg"] >= 50


# invented: a light robot arm link with a bending mode at 20 rad/s and 2 % damping
FLEX_ARM = """
name = "flex-arm-test"
[plant]
zeros = []
poles = [-2, [-0.4, 19.996], [-0.4, -19.996]]
gain = 800
[controller]
stages = ["lag", "lead"]
frequency_range_rad_s = [0.01, 1000]
[requirements]
max_steady_state_error = 0.05
min_phase_margin_deg = 45
min_gain_margin_db = 6
"""


def test_roll_off_seeds_gain_stabilise_a_lightly_damped_mode():
    # 5 % static error needs a DC loop gain of 19, the mode needs |L(j20)| < 1/2: only a lag that
    # keeps rolling off past the crossover does both (gain stabilisation, common practice).
    # Verdicts from outside synth: 60-digit roots of Delta and a dense grid for the margins.
    spec = parse_spec(FLEX_ARM)
    space = build_space(spec.plant, spec.controller, dict(spec.requirements))
    p = seeds(spec.plant, space, dict(spec.requirements))
    cn, cd = space.family.controllers(p)
    pn, pd = spec.plant.num, spec.plant.den
    good = []
    for n_, d_ in zip(cn, cd):
        if not hurwitz_by_roots(np.polyadd(np.polymul(pd, d_), np.polymul(pn, n_))):
            continue
        ref = reference_metrics(pn, pd, n_, d_, lo=1e-3, hi=1e4)
        ess = 1 / (1 + np.polyval(n_, 0) * np.polyval(pn, 0) / (np.polyval(d_, 0) * np.polyval(pd, 0)))
        if ref["gm"] >= 10 ** (6 / 20) and ref["pm"] >= 45 and ess <= 0.05 + 1e-9:
            good.append(ref["gm"])
    assert good, "no seed meets the static error and both margins"


def test_space_bounds_from_necessary_conditions():
    spec = parse_spec(MAGLEV)
    space = build_space(spec.plant, spec.controller, dict(spec.requirements))
    # initial-value theorem: u(0+) = K for a unit reference step, so |K| <= max_control_peak
    assert space.log_gain[1] <= np.log10(100) + 1e-12
    assert any("initial-value theorem" in n for n in space.notes)
    u = np.random.default_rng(0).random((500, space.dim))
    p = space.decode(u)
    assert space.family.admissible(p).all()
    np.testing.assert_allclose(space.decode(space.encode(p)), p, atol=1e-9)
    # Kv bound: the Ogata spec forces K*z/p*4/2 >= 20 at every decoded point that passes the prefilter
    og = parse_spec(OGATA_LEAD)
    sp2 = build_space(og.plant, og.controller, dict(og.requirements))
    pts = sp2.decode(u[:, :sp2.dim])
    ok = sp2.prefilter(pts)
    assert ok.all()          # the Kv bound shapes the gain coordinate: no sample is wasted
    df = evaluate(og.plant, sp2.family, pts[ok], dict(og.requirements))
    assert (df["velocity_constant"] >= 20 * (1 - 1e-9)).all()


def test_gain_sign_from_stodola_condition():
    # Stodola: a Hurwitz polynomial has coefficients of one sign; constant term Dp(0)Dc(0) + K Np(0) Nc(0)
    assert gain_sign(TransferFunction([1], [1, -1]))[0] == 1.0           # 1/(s-1): K > 1 > 0
    assert gain_sign(TransferFunction([-1], [1, 3, 2]))[0] == -1.0       # negative DC gain
    assert gain_sign(TransferFunction([-2, 1], [1, 3, 2]))[0] == 1.0     # RHP zero, positive DC gain


def test_search_finds_feasible_designs_and_rows_recheck_independently(tmp_path):
    spec = parse_spec(MAGLEV)
    run = run_search(spec, MAGLEV, out=tmp_path / "run", settings=Settings(budget=4000, time_limit_s=60, seed=1))
    df = ranked(run)
    assert df["feasible"].any()
    top = recheck(run, df.head(5))
    assert top["certified"].all() and top["feasible"].all()
    # independent re-check of every shown row: mpmath roots, a dense-grid reference and scipy.signal
    fam = build_space(spec.plant, spec.controller, dict(spec.requirements)).family
    for _, r in top.iterrows():
        cn, cd = fam.controllers(r[fam.names].to_numpy(float)[None, :])
        pn, pd_ = spec.plant.num, spec.plant.den
        cl = closed_loop(pn, pd_, cn[0], cd[0])
        assert hurwitz_by_roots(cl["T"][1])
        ref = reference_metrics(pn, pd_, cn[0], cd[0])
        assert ref["Ms"] <= 2.0 + 1e-6
        assert ref["pm"] >= 35 - 1e-6
        t = np.linspace(0, 2.0, 20001)
        y = scipy_step(*cl["T"], t)
        yf = np.polyval(cl["T"][0], 0) / np.polyval(cl["T"][1], 0)
        assert (y.max() - yf) / abs(yf) * 100 <= 25 + 1e-3


def test_same_seed_same_table_and_resume_loses_nothing(tmp_path):
    spec = parse_spec(MAGLEV)
    st = Settings(budget=3000, time_limit_s=60, seed=5)
    a = ranked(run_search(spec, MAGLEV, out=tmp_path / "a", settings=st))
    b = ranked(run_search(spec, MAGLEV, out=tmp_path / "b", settings=st))
    assert a["id"].tolist() == b["id"].tolist()
    np.testing.assert_array_equal(a["settling_time_s"].to_numpy(), b["settling_time_s"].to_numpy())

    # interrupt after two batches: everything written so far survives and resume continues
    calls = {"n": 0}

    def boom(progress):
        calls["n"] += 1
        if calls["n"] == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_search(spec, MAGLEV, out=tmp_path / "c", settings=st, on_progress=boom)
    stored = open_run(tmp_path / "c").store.load()
    assert len(stored) > 0
    before_ids = set(stored["id"])
    run = run_search(None, "", resume=tmp_path / "c")
    after = run.store.load()
    assert before_ids <= set(after["id"])
    assert after["id"].is_unique
    assert len(after) > len(stored)


def test_tighten_never_shows_violators_and_loosen_keeps_feasible(tmp_path):
    spec = parse_spec(MAGLEV)
    run = run_search(spec, MAGLEV, out=tmp_path / "r", settings=Settings(budget=3000, time_limit_s=60, seed=2))
    base = ranked(run)
    tight = dict(spec.requirements, max_overshoot_pct=5.0)
    t = ranked(run, tight)
    feas = t[t["feasible"]]
    assert (feas["overshoot_pct"] <= 5.0).all()
    assert set(feas["id"]) <= set(base[base["feasible"]]["id"])
    loose = dict(spec.requirements, max_overshoot_pct=40.0)
    lo = ranked(run, loose)
    assert set(base[base["feasible"]]["id"]) <= set(lo[lo["feasible"]]["id"])


def test_time_limit_keeps_back_what_the_final_ranking_costs(tmp_path):
    # The limit covers the whole run: a reserve as long as the limit leaves the search no
    # time at all, and what ranking and certifying cost is learned from the run's own batches.
    from synth.runs import MIN_SHOWN, RESERVE_PROBE, RESERVE_SHARE, SHOWN_STORED, FinishCost, Run
    spec = parse_spec(MAGLEV)
    s = Search(spec.plant, spec.controller, dict(spec.requirements), spec.objectives,
               Settings(budget=3000, time_limit_s=5.0, seed=0), EvalOptions())
    s.reserve_s = 5.0
    s.run()
    assert s.state["evaluated"] == 0

    run = run_search(spec, MAGLEV, out=tmp_path / "r", settings=Settings(budget=2500, time_limit_s=60, seed=1))
    df = run.store.load()
    stable = df[df["internally_stable"]]
    assert len(stable) >= RESERVE_PROBE
    cost = FinishCost()
    cost.learn(spec, run, stable.head(RESERVE_PROBE - 1), len(df))        # too few stable rows: no probe yet
    assert cost.certify_row_s is None and cost.rank_row_s is not None and cost.rank_row_s > 0
    cost.learn(spec, run, df, len(df))
    assert cost.certify_row_s > 0
    assert cost.reserve(1e-3, SHOWN_STORED, len(df)) == pytest.approx(RESERVE_SHARE * 1e-3)   # never most of the limit
    assert cost.reserve(1e6, SHOWN_STORED, len(df)) >= SHOWN_STORED * cost.certify_row_s
    assert cost.rows_that_fit(0.0, SHOWN_STORED) == MIN_SHOWN
    assert cost.rows_that_fit(1e6, SHOWN_STORED) == SHOWN_STORED
    assert cost.rows_that_fit(20.5 * cost.certify_row_s, SHOWN_STORED) == 20
    t = run.manifest["timings"][-1]
    assert 0 < t["ranking_s"] <= t["wall_s"]
    assert isinstance(run, Run) and run.store.ranking_meta()["shown"] == SHOWN_STORED   # the limit did not bind
