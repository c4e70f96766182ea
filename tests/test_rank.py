"""Tests of synth.rank against outside references.

References used below: the textbook definition of Pareto dominance and of the
non-dominated levels (peeling by brute force); the crowding distance procedure
as printed in Deb, Pratap, Agarwal & Meyarivan, IEEE TEVC 6(2), 2002, Sec. III-B;
closed-form rectangle areas and the inclusion-exclusion formula for the volume
of a union of boxes [p, ref] (the hypervolume of Zitzler & Thiele 1998/1999);
the evaluator's own slack function ``synth.evaluate.core.add_slack``.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings, strategies as st, HealthCheck

from synth.rank import (crowding_distance, dedupe, front_hypervolume, hypervolume, knee_index,
                        non_dominated_sort, rank, violation)
from synth.requirements import REQUIREMENTS

SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
NAN, INF = float("nan"), float("inf")


# ------------------------------------------------------------------ brute-force references
def dominates(a, b):
    """Textbook Pareto dominance (minimisation)."""
    return all(x <= y for x, y in zip(a, b)) and any(x < y for x, y in zip(a, b))


def brute_fronts(F):
    """Non-dominated levels by repeated peeling, straight from the definition."""
    F = [tuple(r) for r in F]
    level = [-1] * len(F)
    remaining = set(range(len(F)))
    k = 0
    while remaining:
        nd = {i for i in remaining if not any(dominates(F[j], F[i]) for j in remaining if j != i)}
        for i in nd:
            level[i] = k
        remaining -= nd
        k += 1
    return np.array(level)


def deb_crowding(F):
    """Crowding-distance-assignment as printed in Deb et al. 2002 (distinct values)."""
    n, m = len(F), len(F[0])
    d = [0.0] * n
    for k in range(m):
        idx = sorted(range(n), key=lambda i: F[i][k])
        fmin, fmax = F[idx[0]][k], F[idx[-1]][k]
        d[idx[0]] = d[idx[-1]] = math.inf
        for t in range(1, n - 1):
            d[idx[t]] += (F[idx[t + 1]][k] - F[idx[t - 1]][k]) / (fmax - fmin)
    return np.array(d)


def union_of_boxes(F, ref):
    """Volume of the union of boxes [p, ref] by inclusion-exclusion over all subsets."""
    P = [p for p in np.asarray(F, float) if np.all(p < ref)]
    total = 0.0
    for r in range(1, len(P) + 1):
        for S in itertools.combinations(P, r):
            total += (-1) ** (r + 1) * np.prod(ref - np.max(S, axis=0))
    return total


# ------------------------------------------------------------------ strategies
small_vals = st.sampled_from([0.0, 1.0, 2.0, 2.5, 3.0, 4.0])


@st.composite
def objective_arrays(draw, max_n=25, min_m=1, max_m=4, vals=small_vals):
    n = draw(st.integers(0, max_n))
    m = draw(st.integers(min_m, max_m))
    return np.array(draw(st.lists(st.lists(vals, min_size=m, max_size=m), min_size=n, max_size=n)),
                    dtype=float).reshape(n, m)


COLUMN_VALUES = {
    "settling_time_s": [0.5, 1.0, 2.0, 3.0, NAN, INF],
    "overshoot_pct": [0.0, 5.0, 10.0, 20.0, NAN],
    "disturbance_peak": [0.1, 0.2, 0.5, NAN],
    "control_peak": [1.0, 2.0, 5.0, 10.0, INF],
    "gain_margin_db": [3.0, 6.0, 10.0, INF, NAN],
    "gain_margin_low_db": [-INF, -6.0, -3.0, 0.0],
    "phase_margin_deg": [20.0, 30.0, 45.0, 60.0, NAN],
}
REQ_CHOICES = {
    "max_settling_time_s": [1.0, 2.0, 3.0],
    "max_overshoot_pct": [0.0, 5.0, 10.0],
    "min_gain_margin_db": [3.0, 6.0],
    "min_phase_margin_deg": [30.0, 45.0],
    "max_control_peak": [5.0, 10.0],
}
OBJECTIVES = ["settling_time_s", "overshoot_pct", "disturbance_peak", "control_peak"]


@st.composite
def frames(draw, max_n=20):
    n = draw(st.integers(0, max_n))
    cols = {"p0": draw(st.lists(st.sampled_from([-1.0, -0.9995, 0.0, 0.5, 1.0]), min_size=n, max_size=n)),
            "p1": draw(st.lists(st.sampled_from([0.0, 0.2, 0.7]), min_size=n, max_size=n)),
            "internally_stable": draw(st.lists(st.booleans(), min_size=n, max_size=n))}
    for c, vals in COLUMN_VALUES.items():
        cols[c] = draw(st.lists(st.sampled_from(vals), min_size=n, max_size=n))
    df = pd.DataFrame(cols)
    perm = draw(st.permutations(range(n)))
    df.index = pd.Index([f"r{i}" for i in perm])
    return df


@st.composite
def requirement_sets(draw):
    keys = draw(st.lists(st.sampled_from(sorted(REQ_CHOICES)), unique=True, max_size=len(REQ_CHOICES)))
    return {k: draw(st.sampled_from(REQ_CHOICES[k])) for k in keys}


@st.composite
def rank_args(draw):
    objs = draw(st.lists(st.sampled_from(OBJECTIVES), min_size=1, max_size=3, unique=True))
    primary = draw(st.one_of(st.none(), st.sampled_from(objs)))
    return objs, primary


# ------------------------------------------------------------------ non-dominated sorting
@SETTINGS
@given(objective_arrays())
def test_non_dominated_sort_matches_brute_force(F):
    np.testing.assert_array_equal(non_dominated_sort(F), brute_fronts(F))


@SETTINGS
@given(objective_arrays(max_n=15, max_m=3))
def test_non_dominated_sort_maximise_is_negated_minimise(F):
    np.testing.assert_array_equal(non_dominated_sort(F, minimise=False), brute_fronts(-F))
    mixed = [True] + [False] * (F.shape[1] - 1)
    np.testing.assert_array_equal(non_dominated_sort(F, minimise=mixed), brute_fronts(np.c_[F[:, :1], -F[:, 1:]]))


def test_non_dominated_sort_small_case():
    F = np.array([[1, 1], [2, 2], [1, 2], [3, 0], [3, 3], [1, 1]])
    np.testing.assert_array_equal(non_dominated_sort(F), [0, 2, 1, 0, 3, 0])


def test_non_dominated_sort_nan_is_worst():
    F = np.array([[1.0, NAN], [1.0, 5.0]])
    np.testing.assert_array_equal(non_dominated_sort(F), [1, 0])


# ------------------------------------------------------------------ crowding distance
def test_crowding_hand_computed():
    # Deb et al. 2002: f1 range 6, f2 range 5.
    # (1,3): (3-0)/6 + (5-1)/5 = 0.5 + 0.8;  (3,1): (6-1)/6 + (3-0)/5
    F = np.array([[0, 5], [1, 3], [3, 1], [6, 0]], float)
    np.testing.assert_allclose(crowding_distance(F), [INF, 1.3, 5 / 6 + 0.6, INF])


def test_crowding_small_fronts_are_boundary():
    assert np.all(np.isinf(crowding_distance(np.array([[1.0, 2.0]]))))
    assert np.all(np.isinf(crowding_distance(np.array([[1.0, 2.0], [2.0, 1.0]]))))
    assert np.all(np.isinf(crowding_distance(np.array([[1.0, 2.0]] * 3))))


def test_crowding_ties_split_the_gap():
    # values 0, 2, 2, 6 in one objective: Deb's sort gives the tied pair 2 and 0 (or 0
    # and 4) in either order, (2 + 4) / 6 between them; each gets the average 0.5
    F = np.array([[0.0], [2.0], [2.0], [6.0]])
    np.testing.assert_allclose(crowding_distance(F), [INF, 0.5, 0.5, INF])


@SETTINGS
@given(st.integers(3, 12), st.integers(1, 4), st.data())
def test_crowding_matches_deb_for_distinct_values(n, m, data):
    cols = [data.draw(st.lists(st.integers(-50, 50), min_size=n, max_size=n, unique=True)) for _ in range(m)]
    F = np.array(cols, float).T
    np.testing.assert_allclose(crowding_distance(F), deb_crowding(F.tolist()))


@SETTINGS
@given(objective_arrays(max_n=15), st.randoms())
def test_crowding_is_permutation_equivariant(F, rnd):
    perm = list(range(F.shape[0]))
    rnd.shuffle(perm)
    np.testing.assert_array_equal(crowding_distance(F)[perm], crowding_distance(F[perm]))


# ------------------------------------------------------------------ hypervolume
def test_hypervolume_closed_form_2d():
    assert hypervolume([[1.0, 2.0]], [3.0, 3.0]) == pytest.approx(2.0)
    # two rectangles 3x1 and 2x3 overlapping in 2x1
    assert hypervolume([[1.0, 3.0], [2.0, 1.0]], [4.0, 4.0]) == pytest.approx(7.0)
    # a dominated point adds nothing; a point on the reference boundary does not count
    assert hypervolume([[1.0, 3.0], [2.0, 1.0], [3.0, 3.0], [0.0, 4.0]], [4.0, 4.0]) == pytest.approx(7.0)
    assert hypervolume(np.empty((0, 2)), [1.0, 1.0]) == 0.0
    assert hypervolume([[NAN, 0.0]], [1.0, 1.0]) == 0.0


def test_hypervolume_1d_and_unit_cube():
    assert hypervolume([[3.0], [1.0], [5.0]], [4.0]) == pytest.approx(3.0)
    assert hypervolume([[0.0, 0.0, 0.0]], [1.0, 1.0, 1.0]) == pytest.approx(1.0)
    assert hypervolume([[0.0] * 4, [0.5] * 4], [2.0] * 4) == pytest.approx(16.0)


@SETTINGS
@given(objective_arrays(max_n=7, min_m=2, max_m=4))
def test_hypervolume_matches_inclusion_exclusion(F):
    ref = np.full(F.shape[1], 3.5)
    assert hypervolume(F, ref) == pytest.approx(union_of_boxes(F, ref), rel=1e-12, abs=1e-12)


@SETTINGS
@given(objective_arrays(max_n=7, min_m=3, max_m=3,
                        vals=st.floats(0, 1, allow_nan=False, allow_subnormal=False)))
def test_hypervolume_3d_continuous_matches_inclusion_exclusion(F):
    ref = np.array([1.0, 1.2, 0.9])
    assert hypervolume(F, ref) == pytest.approx(union_of_boxes(F, ref), rel=1e-9, abs=1e-12)


@SETTINGS
@given(objective_arrays(max_n=12, min_m=1, max_m=4), st.data())
def test_hypervolume_monotone_when_adding_a_point(F, data):
    m = F.shape[1]
    p = np.array(data.draw(st.lists(small_vals, min_size=m, max_size=m)))
    ref = np.full(m, 3.5)
    before = hypervolume(F, ref)
    after = hypervolume(np.vstack([F, p]), ref)
    assert after >= before - 1e-12


# ------------------------------------------------------------------ knee, dedupe
def test_knee_symmetric_convex_front_is_middle():
    th = np.linspace(0.0, np.pi / 2, 7)
    F = np.c_[1 - np.sin(th), 1 - np.cos(th)] * [3.0, 3.0] + [1.0, 1.0]   # quarter circle, bulging to the ideal
    assert knee_index(F) == 3
    perm = np.array([5, 0, 3, 6, 1, 4, 2])
    assert perm[knee_index(F[perm])] == 3


def test_knee_independent_of_objective_scale():
    th = np.linspace(0.0, np.pi / 2, 9)
    F = np.c_[1 - np.sin(th), 1 - np.cos(th)] * [1000.0, 0.01]
    assert knee_index(F) == 4


def test_dedupe_keeps_first():
    df = pd.DataFrame({"a": [0.1, 0.1004, 0.2, 0.1, 0.3001, 0.3, NAN, NAN],
                       "b": [1.0, 1.0, 1.0, 2.0, 0.0, -0.0, 1.0, 1.0]})
    # round(a/1e-3): 100, 100, 200, 100, 300, 300, nan, nan; row 3 differs in b
    np.testing.assert_array_equal(dedupe(df, ["a", "b"], 1e-3), [1, 0, 1, 1, 1, 0, 1, 0])
    np.testing.assert_array_equal(dedupe(df, ["a"], 1e-3), [1, 0, 1, 0, 1, 0, 1, 0])


# ------------------------------------------------------------------ violation and rank
def _frame(**cols):
    n = len(next(iter(cols.values())))
    base = {c: [v[0]] * n for c, v in COLUMN_VALUES.items()}
    base["internally_stable"] = [True] * n
    base.update(cols)
    return pd.DataFrame(base)


def test_violation_hand_computed():
    df = _frame(settling_time_s=[3.0, 1.0, 2.0, 1.0], overshoot_pct=[10.0, 0.0, 0.0, 0.0],
                internally_stable=[True, True, True, False])
    req = {"max_settling_time_s": 2.0, "max_overshoot_pct": 0.0}
    # row 0: (3-2)/2 + (10-0)/max(0, 1 %) = 0.5 + 10; rows 1, 2 meet; row 3 unstable
    np.testing.assert_allclose(violation(df, req), [10.5, 0.0, 0.0, INF])
    df2 = _frame(phase_margin_deg=[NAN, 20.0])
    np.testing.assert_allclose(violation(df2, {"min_phase_margin_deg": 40.0}), [INF, 0.5])


def test_rank_slack_matches_evaluator_add_slack():
    from synth.evaluate.core import add_slack   # the evaluator's own contract
    df = _frame(settling_time_s=[3.0, 1.0, NAN, 0.5], gain_margin_db=[6.0, 10.0, 3.0, INF],
                gain_margin_low_db=[-INF, -3.0, -10.0, 0.0], internally_stable=[True, True, False, True])
    req = {"max_settling_time_s": 2.0, "min_gain_margin_db": 4.0}
    ref = add_slack(df, req)
    r = rank(df, req, ["settling_time_s"]).loc[ref.index]
    for key in req:
        np.testing.assert_array_equal(r[f"slack_{key}"], ref[f"slack_{key}"])
        np.testing.assert_array_equal(r[f"met_{key}"], ref[f"met_{key}"])
    np.testing.assert_array_equal(r["feasible"], ref["feasible"])


def test_rank_small_table():
    df = _frame(settling_time_s=[1.0, 2.0, 1.5, 3.0, 0.5, 1.0, INF],
                overshoot_pct=[10.0, 0.0, 3.0, 12.0, 30.0, 10.0, 0.0],
                internally_stable=[True, True, True, True, True, False, True],
                admissible=[True] * 7)
    df.loc[4, "admissible"] = False
    req = {"max_overshoot_pct": 20.0}
    r = rank(df, req, ["settling_time_s", "overshoot_pct"])
    # front 0 = {0, 1, 2}: the knee 2 leads, then by crowding the boundaries 0 and 1; front 1 = {3},
    # then the feasible row 6 with inf settling; infeasible: 4 (inadmissible), 5 (unstable)
    assert list(r.index[:3]) in ([2, 0, 1], [2, 1, 0])
    assert list(r.index[3:]) == [3, 6, 4, 5]
    assert list(r["front"]) == [0, 0, 0, 1, 2, -1, -1]
    assert list(r["rank"]) == list(range(1, 8))
    assert r["knee"].sum() == 1 and r.loc[2, "knee"]
    assert list(r["feasible"]) == [True] * 5 + [False] * 2
    assert np.all(np.isinf(r["violation"].iloc[5:]))
    assert np.all(r["violation"].iloc[:5] == 0)
    rp = rank(df, req, ["settling_time_s", "overshoot_pct"], primary="settling_time_s")
    assert list(rp.index) == [2, 0, 1, 3, 6, 4, 5]   # knee first, then by settling time


def test_rank_drops_stale_columns_and_leaves_input_untouched():
    df = _frame(settling_time_s=[1.0, 2.0], control_peak=[5.0, 20.0])
    first = rank(df, {"max_control_peak": 10.0}, ["settling_time_s"])
    snapshot = first.copy()
    again = rank(first, {"max_settling_time_s": 1.5}, ["settling_time_s"])
    pd.testing.assert_frame_equal(first, snapshot)
    assert "slack_max_control_peak" not in again and "met_max_control_peak" not in again
    assert "slack_max_settling_time_s" in again
    assert list(first["feasible"]) == [True, False]    # control peak 20 > 10
    assert list(again["feasible"]) == [True, False]    # settling time 2 > 1.5


def test_infeasible_ordered_by_violation():
    df = _frame(settling_time_s=[5.0, 2.5, 1.0, 4.0, 3.0], internally_stable=[True, True, True, False, True])
    r = rank(df, {"max_settling_time_s": 2.0}, ["settling_time_s"])
    assert list(r.index) == [2, 1, 4, 0, 3]
    np.testing.assert_allclose(r["violation"], [0.0, 0.25, 0.5, 1.5, INF])


@SETTINGS
@given(frames(), requirement_sets(), rank_args())
def test_rank_is_idempotent(df, req, args):
    objs, primary = args
    r1 = rank(df, req, objs, primary=primary, dedupe_cols=["p0", "p1"])
    r2 = rank(r1, req, objs, primary=primary, dedupe_cols=["p0", "p1"])
    pd.testing.assert_frame_equal(r1, r2)
    # re-ranking a table ranked under other requirements (stale slack columns) gives the
    # same columns and the same per-row results as ranking the raw table (without
    # dedupe, whose "first occurrence" depends on the row order by definition)
    r3 = rank(rank(df, {"max_control_peak": 5.0}, objs), req, objs, primary=primary)
    r4 = rank(df, req, objs, primary=primary)
    assert list(r3.columns) == list(r4.columns)
    pd.testing.assert_frame_equal(r3.drop(columns=["rank", "knee"]).loc[r4.index], r4.drop(columns=["rank", "knee"]))


@SETTINGS
@given(frames(), requirement_sets(), rank_args())
def test_rank_order_invariants(df, req, args):
    objs, primary = args
    r = rank(df, req, objs, primary=primary)
    assert len(r) == len(df) and set(r.index) == set(df.index)
    feas = r["feasible"].to_numpy()
    nf = int(feas.sum())
    assert feas[:nf].all() and not feas[nf:].any()                     # feasible first
    v = r["violation"].to_numpy()[nf:]
    assert np.all(v[1:] >= v[:-1])                                        # then by violation
    assert np.all((r["violation"].to_numpy() == 0) == feas)
    fr = r["front"].to_numpy()
    assert np.all(np.diff(fr[:nf]) >= 0) and np.all(fr[nf:] == -1)
    finite = np.isfinite(r[objs].to_numpy(float)).all(axis=1)[:nf]
    assert np.all(np.diff(finite.astype(int)) <= 0)                      # finite objectives first
    assert r["knee"].sum() == (1 if finite.any() else 0)
    # fronts of the finite feasible rows match the brute-force levels
    Ff = r[objs].to_numpy(float)[:nf][finite]
    np.testing.assert_array_equal(fr[:nf][finite], brute_fronts(Ff))


@SETTINGS
@given(frames(), requirement_sets(), st.data())
def test_tightening_and_loosening(df, loose, data):
    tight = {}
    for k, v in loose.items():
        d = data.draw(st.sampled_from([0.0, 0.5, 2.0, 10.0]))
        tight[k] = v - d if REQUIREMENTS[k].sense == "max" else v + d
    extra = data.draw(st.sampled_from(sorted(set(REQ_CHOICES) - set(loose)) or [None]))
    if extra is not None:
        tight[extra] = REQ_CHOICES[extra][0]                          # a new requirement tightens too
    f_loose = rank(df, loose, ["settling_time_s"])["feasible"].reindex(df.index)
    f_tight = rank(df, tight, ["settling_time_s"])["feasible"].reindex(df.index)
    assert not (f_tight & ~f_loose).any()    # tightening: no infeasible row becomes feasible
    assert (f_loose | ~f_tight).all()        # loosening tight -> loose: feasible rows stay feasible


def test_nonfinite_objectives_after_finite():
    df = _frame(settling_time_s=[INF, 2.0, NAN, 1.0], overshoot_pct=[0.0, 1.0, 0.0, 2.0])
    r = rank(df, {}, ["settling_time_s", "overshoot_pct"])
    assert list(r.index[:2]) in ([1, 3], [3, 1]) and set(r.index[2:]) == {0, 2}
    assert r["front"].iloc[2:].min() == 1


# ------------------------------------------------------------------ front hypervolume
def test_front_hypervolume():
    df = _frame(settling_time_s=[1.0, 2.0, 4.0, 0.1], overshoot_pct=[3.0, 1.0, 4.0, 0.1],
                internally_stable=[True, True, True, False])
    objs = ["settling_time_s", "overshoot_pct"]
    r = rank(df, {}, objs)
    # feasible worst = (4, 4); rectangles 3x1 + 2x3 - 2x1 (the unstable row is ignored)
    assert front_hypervolume(r, objs) == pytest.approx(7.0)
    lim = {"max_settling_time_s": 4.0, "max_overshoot_pct": 4.0}
    assert front_hypervolume(r, objs, limits=lim) == pytest.approx(7.0 / 16.0)
    assert front_hypervolume(r, objs, ref=[5.0, 5.0]) == pytest.approx(4 * 2 + 3 * 4 - 3 * 2)
    with pytest.raises(ValueError):
        front_hypervolume(r, objs, limits={"max_settling_time_s": 4.0})
