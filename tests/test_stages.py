"""Inactive lead/lag stages (synth.stages) and de-duplication with them (synth.rank).

References: the exact frequency response of (s + z)/(s + p), evaluated with numpy at
s = j w, for the phase and gain bounds; the maximum phase of a lead network,
asin((r - 1)/(r + 1)) at w = sqrt(z p) (Ogata, Modern Control Engineering, 5th ed.,
2010, sec. 6-8; formula from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from synth.rank import rank
from synth.stages import (REASONS, activity_codes, crossover_region, equivalent_params, near_copies, stage_infos,
                          summary_text)
from synth.structures import Family

PHASE_BOUND_DEG = math.degrees(math.atan(0.01))      # 0.573 deg


def _stage(w, z, p):
    s = 1j * np.asarray(w, float)
    return (s + z) / (s + p)


def test_the_levitated_carriage_stage_is_inactive():
    # issue 11: a second stage with zero at -9950 and pole at -10000 (ratio 1.005)
    codes = activity_codes(np.array([[30.0, 9950.0]]), np.array([[300.0, 10000.0]]), np.array([40.0]),
                           np.array([60.0]))
    assert codes.tolist() == [[0, 1]]
    # its largest phase is the lead-network maximum asin((r-1)/(r+1)) (Ogata 2010, sec. 6-8)
    w = np.logspace(2, 6, 20001)
    ph = np.degrees(np.abs(np.angle(_stage(w, 9950.0, 10000.0))))
    r = 10000.0 / 9950.0
    assert ph.max() == pytest.approx(math.degrees(math.asin((r - 1) / (r + 1))), rel=1e-4)
    assert ph.max() < PHASE_BOUND_DEG


def test_ratio_limit_is_two_percent():
    lo, hi = np.array([1.0]), np.array([1.0])
    assert activity_codes([[1.0]], [[1.0199]], lo, hi)[0, 0] == 1
    assert activity_codes([[1.0]], [[1.0201]], lo, hi)[0, 0] == 0
    # at r = 1.02 the maximum phase is just the 0.57 deg of the decade rule
    assert math.degrees(math.asin(0.02 / 2.02)) == pytest.approx(PHASE_BOUND_DEG, rel=0.01)


@settings(max_examples=200, deadline=None)
@given(st.floats(-3, 3), st.floats(-3, 3), st.floats(-2, 2), st.floats(0, 2))
def test_an_inactive_stage_is_a_constant_over_the_crossover_region(lz, lp, lwlo, span):
    # reference: the exact frequency response over [w_lo, w_hi]
    z, p = 10.0 ** lz, 10.0 ** lp
    w_lo, w_hi = 10.0 ** lwlo, 10.0 ** (lwlo + span)
    code = activity_codes([[z]], [[p]], [w_lo], [w_hi])[0, 0]
    w = np.logspace(lwlo, lwlo + span, 200)
    G = _stage(w, z, p)
    phase = np.degrees(np.abs(np.angle(G)))
    if code == 1:
        assert phase.max() <= PHASE_BOUND_DEG * 1.001
    if code in (2, 3):
        const = z / p if code == 2 else 1.0
        assert phase.max() <= PHASE_BOUND_DEG * 1.001
        np.testing.assert_allclose(np.abs(G), const, rtol=5.1e-5)
    if code == 0:       # active: the corners are not both 2 decades outside, and the ratio exceeds 2 %
        assert max(z, p) / min(z, p) > 1.02
        assert not (min(z, p) > 100 * w_hi) and not (max(z, p) < w_lo / 100)


def test_crossover_region_and_no_crossover():
    lo, hi = crossover_region([5.0, np.nan, np.nan], [20.0, 7.0, np.nan])
    np.testing.assert_allclose(lo[:2], [5.0, 7.0])
    np.testing.assert_allclose(hi[:2], [20.0, 7.0])
    assert np.isnan(lo[2]) and np.isnan(hi[2])
    # without a crossover only the ratio rule applies
    assert activity_codes([[1e6, 1.0]], [[2e6, 1.01]], lo[2:], hi[2:]).tolist() == [[0, 1]]


def test_stage_infos_and_text():
    fam = Family(stages=("lead", "lead"))
    params = np.array([2.0, math.log10(30), math.log10(300), math.log10(9950), math.log10(10000)])
    infos = stage_infos(fam, params, 45.0, 50.0)
    assert [s.active for s in infos] == [True, False]
    assert infos[1].reason == REASONS[1]
    assert "stage 2" in summary_text(infos) and "inactive" in summary_text(infos)
    assert stage_infos(Family(kind="pid"), np.zeros(4), 1.0, 1.0) == []


def test_equivalent_params_make_the_simpler_structure():
    fam = Family(stages=("lead", "lead"))
    lz, lp = math.log10(30), math.log10(300)
    a = [2.0, lz, lp, math.log10(9950), math.log10(10000)]        # stage 2 inactive (ratio)
    b = [2.0, math.log10(5000), math.log10(5050), lz, lp]          # stage 1 inactive, active stage second
    c = [2.0, lz, lp, 6.0, 6.5]                                    # stage 2 far above the crossover
    X = equivalent_params(fam, np.array([a, b, c]), np.array([40.0] * 3), np.array([60.0] * 3))
    np.testing.assert_array_equal(X[0], X[1])
    assert np.isnan(X[0, 3:]).all()
    assert X[2, 0] == pytest.approx(2.0 - 0.5)          # the stage acts as the gain z/p below its corners
    np.testing.assert_array_equal(X[2, 1:3], [lz, lp])


def test_near_copies_keep_the_first_of_a_cluster_and_are_idempotent():
    rng = np.random.default_rng(1)
    # nine near-copies of one design (gains 55.57 ... 55.68 as in issue 11) and two distinct designs
    g = np.log10(np.linspace(55.57, 55.68, 9))
    cluster = np.column_stack([g, 1.0 + 1e-4 * rng.normal(size=9), 2.0 + 1e-4 * rng.normal(size=9)])
    X = np.vstack([cluster[:1], [[1.2, 1.0, 2.0]], cluster[1:], [[1.745, 1.3, 2.0]]])
    keep = near_copies(X, 0.01)
    assert keep.tolist() == [True, True] + [False] * 8 + [True]
    assert near_copies(X[keep], 0.01).all()
    # every dropped row is within 2 tol of a kept one
    d = np.abs(X[~keep][:, None, :] - X[keep][None, :, :]).max(axis=2).min(axis=1)
    assert (d <= 0.02).all()


def _table(gains, viol_at):
    """An infeasible lead table: the overshoot is over its limit by viol_at."""
    n = len(gains)
    return pd.DataFrame({"id": np.arange(n), "log10_gain": np.log10(gains), "lead1_log10_zero": np.ones(n),
                         "lead1_log10_pole": 2.0 * np.ones(n), "internally_stable": True,
                         "overshoot_pct": 10.0 + np.asarray(viol_at), "settling_time_s": np.ones(n),
                         "phase_margin_rad_s": 30.0, "crossover_rad_s": 30.0})


def test_rank_drops_near_copies_among_infeasible_rows():
    gains = list(np.linspace(55.57, 55.68, 9)) + [20.0, 90.0]
    df = _table(gains, [1.0 + 0.01 * i for i in range(9)] + [3.0, 2.0])
    fam = Family(stages=("lead",))
    out = rank(df, {"max_overshoot_pct": 10.0}, ["settling_time_s"], dedupe_cols=fam.names, family=fam)
    assert out["id"].tolist() == [0, 10, 9]                 # least violating of the cluster, then distinct ones
    again = rank(out, {"max_overshoot_pct": 10.0}, ["settling_time_s"], dedupe_cols=fam.names, family=fam)
    assert again["id"].tolist() == out["id"].tolist()
    # feasible rows are not thinned by the infeasible rule
    ok = rank(df, {"max_overshoot_pct": 100.0}, ["settling_time_s"], dedupe_cols=fam.names, family=fam)
    plain = rank(df, {"max_overshoot_pct": 100.0}, ["settling_time_s"], dedupe_cols=fam.names, infeasible_tol=0)
    assert ok["feasible"].all() and len(ok) == len(plain) > 3
    # and without the rule, the infeasible cluster stays (the old behaviour)
    old = rank(df, {"max_overshoot_pct": 10.0}, ["settling_time_s"], dedupe_cols=fam.names, infeasible_tol=0)
    assert len(old) > len(out)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(0, 0.05), st.floats(0, 0.05)), min_size=2, max_size=40))
def test_near_copies_laws(points):
    # reference: brute-force Chebyshev distances between all rows
    X = np.array(points)
    keep = near_copies(X, 0.01)
    assert keep[0]
    K, D = X[keep], X[~keep]
    dk = np.abs(K[:, None, :] - K[None, :, :]).max(axis=2) + np.eye(len(K)) * 1e9
    assert (dk > 0.01).all()                                   # kept rows are distinct designs
    if len(D):
        assert (np.abs(D[:, None, :] - K[None, :, :]).max(axis=2).min(axis=1) <= 0.02 + 1e-12).all()
    assert near_copies(K, 0.01).all()                          # idempotent


def test_a_long_chain_of_near_copies_is_resolved_exactly():
    # a line of designs spaced 0.9 tol: greedy keeps every other one (reference: the sequential walk)
    X = np.column_stack([0.009 * np.arange(200) + 0.0001, np.zeros(200)])
    keep = near_copies(X, 0.01)
    assert keep.tolist() == [i % 2 == 0 for i in range(200)]
