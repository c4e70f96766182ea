"""Model sets and robust stability over coefficient boxes (synth.models, synth.evaluate.robust).

Outside references: Kharitonov's theorem (Kharitonov, Differential Equations 14,
1978) with the numbering of Bhattacharyya, Chapellat & Keel, *Robust Control: The
Parametric Approach*, 1995; the generalized Kharitonov theorem (Chapellat &
Bhattacharyya, IEEE TAC 34, 1989); Orlando's formula and the Routh-Hurwitz
criterion (Gantmacher, *The Theory of Matrices* vol. 2, 1959, ch. XV); numpy
polynomial roots as an independent numerical oracle; interval arithmetic (Moore,
*Interval Analysis*, 1966).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import assume, given, settings, strategies as st

from synth.evaluate import evaluate_controllers
from synth.evaluate.robust import (box_certificate, box_stable_screen, evaluate_models, routh_screen,
                                   segment_hurwitz_exact, sturm_count)
from synth.models import CoefficientBox, ModelSet, interval_poly_product, kharitonov_vertices
from synth.lti import TransferFunction
from synth.spec import SpecError, parse_spec
from synth.structures import Family


def hurwitz_np(p) -> bool:
    r = np.roots(np.trim_zeros(np.asarray(p, float), "f"))
    return bool(np.all(r.real < 0))


# ------------------------------------------------------------------ Kharitonov polynomials
def test_kharitonov_polynomials_recomputed():
    # interval polynomial [1,2] + [3,4]s + [5,6]s^2 + [7,8]s^3 + [9,10]s^4; the four polynomials
    # recomputed by hand from the patterns (lo,lo,hi,hi), (lo,hi,hi,lo), (hi,lo,lo,hi), (hi,hi,lo,lo)
    # over ascending powers (Bhattacharyya, Chapellat & Keel 1995, sec. 5.2 numbering).
    lo = np.array([9, 7, 5, 3, 1.0])     # descending: s^4 .. s^0
    hi = np.array([10, 8, 6, 4, 2.0])
    k = kharitonov_vertices(lo, hi)
    expect = [[9, 8, 6, 3, 1], [9, 7, 6, 4, 1], [10, 8, 5, 3, 2], [10, 7, 5, 4, 2]]
    np.testing.assert_array_equal(k, np.array(expect, float))


def test_kharitonov_rectangle_contains_random_members():
    # Dasgupta (1988): at s = jw the value set of an interval polynomial is the axis-parallel
    # rectangle with the four Kharitonov values at its corners.
    rng = np.random.default_rng(0)
    lo = np.array([1.0, 2, 0.5, 3, 1])
    hi = lo + rng.uniform(0, 2, lo.size)
    k = kharitonov_vertices(lo, hi)
    for w in (0.1, 0.7, 1.3, 4.0):
        kv = np.array([np.polyval(r, 1j * w) for r in k])
        members = lo + rng.random((2000, lo.size)) * (hi - lo)
        v = np.array([np.polyval(m, 1j * w) for m in members])
        assert v.real.min() >= kv.real.min() - 1e-9 and v.real.max() <= kv.real.max() + 1e-9
        assert v.imag.min() >= kv.imag.min() - 1e-9 and v.imag.max() <= kv.imag.max() + 1e-9


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0.2, 5.0), min_size=4, max_size=6), st.lists(st.floats(0.0, 1.0), min_size=6, max_size=6))
def test_kharitonov_theorem_against_sampling(lo, w):
    # Kharitonov (1978): the interval polynomial is Hurwitz iff its four Kharitonov polynomials are.
    # Here through the box certificate with a unit controller (char = N + D, D the interval polynomial).
    lo = np.array(lo)
    hi = lo + np.array(w[: lo.size]) * lo
    box = CoefficientBox(np.array([0.0]), np.array([0.0]), lo, hi)
    cert = box_certificate(box, np.array([1.0]), np.array([1.0]))["robust_stable"]
    kh = kharitonov_vertices(lo, hi)
    margin = max(np.max(np.roots(k).real) for k in kh)
    assume(abs(margin) > 1e-6)                 # numpy's roots cannot judge a root on the axis
    assert cert == (margin < 0)


# ------------------------------------------------------------------ exact segment test
def test_segment_unstable_inside_with_stable_end_points():
    # s^3 + a s^2 + b s + c is Hurwitz iff a, b, c > 0 and ab > c (Routh). End points
    # (1, 1, 0.5) and (10, 10, 99) satisfy it (ab - c = 0.5 and 1); the midpoint
    # (5.5, 5.5, 49.75) does not (30.25 < 49.75): recomputed by hand.
    p0, p1 = [1, 1, 1, 0.5], [1, 10, 10, 99]
    assert hurwitz_np(p0) and hurwitz_np(p1) and not hurwitz_np(np.add(p0, p1) / 2)
    ok, why, lam = segment_hurwitz_exact(np.array(p0, float), np.array(p1, float))
    assert not ok and 0 < lam < 1
    bad = (1 - lam) * np.array(p0) + lam * np.array(p1)
    assert np.max(np.roots(bad).real) > -1e-6      # the named point is (numerically) on the boundary
    ok2, _, _ = segment_hurwitz_exact(np.array([1, 1, 1, 0.5]), np.array([1, 10, 10, 9.0]))
    assert ok2                                      # ab - c = 1.5*... stays positive (convex, no dip)
    lam_grid = np.linspace(0, 1, 2001)
    assert all(hurwitz_np((1 - t) * np.array([1, 1, 1, 0.5]) + t * np.array([1, 10, 10, 9.0])) for t in lam_grid)


def test_sturm_count_against_known_roots():
    from fractions import Fraction as F
    # (x - 1/4)(x - 1/2)(x - 2): two roots in (0, 1] (Sturm 1829)
    p = np.poly([0.25, 0.5, 2.0])
    assert sturm_count([F(float(c)) for c in p], F(0), F(1)) == 2
    assert sturm_count([F(1), F(0), F(1)], F(-10), F(10)) == 0      # x^2 + 1


@settings(max_examples=200, deadline=None)
@given(st.integers(1, 8), st.integers(0, 10 ** 6))
def test_routh_screen_matches_roots(deg, seed):
    rng = np.random.default_rng(seed)
    p = np.abs(rng.normal(size=deg + 1)) + 0.05
    if rng.random() < 0.3:
        p[rng.integers(1, deg + 1)] *= -1
    assert routh_screen(p[None, :])[0] == hurwitz_np(p)


# ------------------------------------------------------------------ vertices stable, segment not
# Constructed here (random search over second-order controllers, recomputed below with numpy
# roots): every vertex of the box gives a stable loop, yet the box is not robustly stable,
# as the generalized Kharitonov theorem allows (Chapellat & Bhattacharyya 1989 show vertices
# do not suffice in general; Barmish & Kang, Automatica 29, 1993, survey such counterexamples).


# ------------------------------------------------------------------ vertices stable, a segment not
# Constructed for this test (a random search over second-order controllers, then rounded to three
# decimals and recomputed here with numpy roots): all 16 vertices of the box give stable loops,
# yet a point on the extremal segment [K1, K3] of N (with K1 of D) is unstable. Vertices do not
# suffice for interval plants in general (Chapellat & Bhattacharyya, IEEE TAC 34, 1989; see the
# counterexamples surveyed by Barmish & Kang, Automatica 29, 1993); this is our own instance.
EX_BOX = CoefficientBox(np.array([0.553, 3.036]), np.array([0.824, 5.068]),
                        np.array([1.0, -1.755, 6.771]), np.array([1.0, -0.815, 10.857]))
EX_NC = np.array([13.217, 171.593, 507.932])
EX_DC = np.array([1.0, 12.664, -42.56])


def test_vertices_stable_segment_unstable_is_refused():
    box = EX_BOX
    f = box.free
    assert f.size == 4
    for bits in itertools.product([0, 1], repeat=4):
        num, den = box.split(box.corner(bits))
        ch = np.polyadd(np.convolve(EX_DC, den), np.convolve(EX_NC, num))
        assert np.max(np.roots(ch).real) < -1e-3            # every vertex stable (numpy oracle)
    cert = box_certificate(box, EX_NC, EX_DC)
    assert not cert["robust_stable"]
    d = cert["destabilising"]
    assert "segment" in d["model"]
    # numpy oracle: a dense sweep of the named kind of segment finds an unstable point
    lam = np.linspace(0, 1, 401)
    kn = kharitonov_vertices(box.num_lo, box.num_hi)
    kd = kharitonov_vertices(box.den_lo, box.den_hi)
    worst = max(np.max(np.roots(np.polyadd(np.convolve(EX_DC, kd[0]),
                                           np.convolve(EX_NC, (1 - t) * kn[0] + t * kn[2]))).real) for t in lam)
    assert worst > 1e-3
    assert not box_stable_screen(box, EX_NC[None, :], EX_DC[None, :])[0]


def test_check_reports_not_robust_with_destabilising_model(tmp_path):
    import json
    from typer.testing import CliRunner
    from synth.cli import app
    spec = tmp_path / "ex.toml"
    spec.write_text("""
[plant]
numerator = [0.6885, 4.052]
denominator = [1.0, -1.285, 8.814]
[plant.intervals]
numerator = [[0.553, 0.824], [3.036, 5.068]]
denominator = [1.0, [-1.755, -0.815], [6.771, 10.857]]
[controller]
kind = "lead-lag"
stages = ["lead"]
[requirements]
min_damping = 0.0
""")
    c = "(13.217*s^2 + 171.593*s + 507.932)/(s^2 + 12.664*s - 42.56)"
    r = CliRunner().invoke(app, ["check", str(spec), "--controller", c, "--json"])
    assert r.exit_code == 0, r.output
    rec = json.loads(r.output)
    assert rec["internally_stable"] is True and rec["robust_stable"] is False and rec["feasible"] is False
    assert "segment" in rec["robust_certificate"]["destabilising"]["model"]
    r2 = CliRunner().invoke(app, ["check", str(spec), "--controller", c])
    assert "NOT robustly stable" in r2.output and "destabilising model" in r2.output


def test_spec_error_exit_2(tmp_path):
    from typer.testing import CliRunner
    from synth.cli import app
    spec = tmp_path / "bad.toml"
    spec.write_text(BASE.replace("numerator = [[4.0, 6.0]]", "numerator = [[6.0, 4.0]]"))
    r = CliRunner().invoke(app, ["check", str(spec), "--controller", "1"])
    assert r.exit_code == 2 and "[plant.intervals].numerator[0]" in r.output and "Traceback" not in r.output


# ------------------------------------------------------------------ hypothesis cross-check
def _clearly_unstable(p) -> bool:
    r = np.roots(np.trim_zeros(np.asarray(p, float), "f"))
    return bool(r.size and np.max(r.real) > 1e-7 * max(1.0, np.max(np.abs(r))))


def _sample_unstable(box: CoefficientBox, nc, dc, rng, n=400) -> bool:
    """Dense random sampling of the box plus sweeps along every extremal segment (numpy roots)."""
    from synth.evaluate.robust import segment_polys
    hurwitz_np = lambda p: not _clearly_unstable(p)   # noqa: E731  (roundoff at the boundary is not a verdict)
    lo, hi = box.lo, box.hi
    pts = lo + rng.random((n, lo.size)) * (hi - lo)
    for c in pts:
        num, den = box.split(c)
        ch = np.polyadd(np.convolve(dc, den), np.convolve(nc, num))
        if not hurwitz_np(ch):
            return True
    p0, p1, _ = segment_polys(box, nc[None, :], dc[None, :])
    for a, b in zip(p0[0], p1[0]):
        for t in np.linspace(0, 1, 101):
            if not hurwitz_np((1 - t) * a + t * b):
                return True
    return False


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 10 ** 6))
def test_certificate_never_false_stable(seed):
    rng = np.random.default_rng(seed)
    nd = int(rng.integers(2, 4))
    den = np.concatenate([[1.0], rng.uniform(-2, 6, nd)])
    num = rng.uniform(0.5, 4, int(rng.integers(1, 3)))
    w = rng.uniform(0, 0.4, den.size + num.size) * (rng.random(den.size + num.size) < 0.6)
    w[num.size] = 0.0                       # keep the leading denominator coefficient fixed
    box = CoefficientBox(num, num + w[:num.size] * np.abs(num), den, den + w[num.size:] * np.maximum(np.abs(den), 0.5))
    k = rng.uniform(0.5, 30)
    order = int(rng.integers(1, 3))           # first- and second-order controllers, poles of either sign
    nc = k * np.poly(-rng.uniform(-1, 6, order))
    dc = np.poly(-rng.uniform(-3, 20, order))
    cert = box_certificate(box, nc, dc)
    if cert["robust_stable"]:
        assert not _sample_unstable(box, nc, dc, rng)
    else:
        d = cert["destabilising"]
        ch = np.polyadd(np.convolve(dc, d["denominator"]), np.convolve(nc, d["numerator"]))
        r = np.roots(np.trim_zeros(ch, "f"))
        # the named model is unstable or on the boundary (roots at the crossing, to rounding)
        assert np.max(r.real) > -1e-5 * max(1.0, np.max(np.abs(r)))


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 10 ** 6))
def test_screen_agrees_with_certificate_when_clear(seed):
    rng = np.random.default_rng(seed)
    den = np.concatenate([[1.0], rng.uniform(0, 6, 3)])
    num = rng.uniform(0.5, 4, 1)
    box = CoefficientBox(num, num * 1.2, den, den * np.array([1, 1.2, 1.1, 1.3]))
    nc = rng.uniform(0.5, 20) * np.poly(-rng.uniform(0.2, 6, 1))
    dc = np.poly(-rng.uniform(0.5, 20, 1))
    exact = box_certificate(box, nc, dc)["robust_stable"]
    screen = bool(box_stable_screen(box, nc[None, :], dc[None, :])[0])
    assert screen == exact


# ------------------------------------------------------------------ interval arithmetic
@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.floats(-30, 30), st.floats(0, 5)), min_size=1, max_size=4), st.integers(0, 1000))
def test_root_box_encloses_every_root_choice(roots, seed):
    # Moore (1966): the interval product encloses the coefficients for every root choice.
    factors = [(np.array([1.0, -(a + w)]), np.array([1.0, -a])) for a, w in roots]
    lo, hi = interval_poly_product(factors)
    rng = np.random.default_rng(seed)
    for _ in range(20):
        rr = [a + rng.random() * w for a, w in roots]
        c = np.poly(rr)
        # rounding of a product's coefficient is relative to the sum of its terms' sizes (the
        # coefficients of prod (x + |r|)), and below the normal range it is whole subnormal steps
        # (hypothesis: roots 7.5e-159 twice and 4 gave c_3 = -2.2e-316, 5e-323 off the box)
        tol = 1e-12 * np.abs(np.poly(-np.abs(rr))) + 64 * np.finfo(float).smallest_subnormal
        assert np.all(c >= lo - tol) and np.all(c <= hi + tol)


# ------------------------------------------------------------------ spec
BASE = """
[plant]
numerator = [5.0]
denominator = [0.05, 1.025, 0.35, -3.0]
[plant.intervals]
numerator = [[4.0, 6.0]]
denominator = [0.05, [0.95, 1.1], [0.2, 0.5], [-3.6, -2.6]]
[[plant.variants]]
name = "with-actuator-lag"
numerator = [5.0]
denominator = [0.001, 0.0705, 1.032, 0.29, -3.0]
[controller]
stages = ["lead", "lead"]
[requirements]
max_overshoot_pct = 30
max_sensitivity_peak = 2.2
"""


def test_spec_model_set_and_round_trip():
    s = parse_spec(BASE)
    ms = s.models
    assert ms.box.k == 4 and len(ms.variants) == 1
    kinds = [m.kind for m in ms.members]
    assert kinds.count("vertex") == 16 and kinds.count("sample") == 64 and kinds.count("variant") == 1
    assert parse_spec(s.to_toml()) == s
    t = s.tighten({"max_overshoot_pct": 25})
    assert t.models == s.models


@pytest.mark.parametrize("bad, words", [
    ("numerator = [[6.0, 4.0]]", "low > high"),
    ("numerator = [[5.5, 6.0]]", "outside"),
    ("numerator = [[4.0, 6.0], 1]", "entries"),
    ("denominator = [[-0.01, 0.1], 1.025, 0.35, -3.0]", "contains 0"),
    ("numerator = [4.0]", "differs from the nominal"),
])
def test_spec_interval_errors(bad, words):
    text = BASE.replace("numerator = [[4.0, 6.0]]", bad) if bad.startswith("numerator") else \
        BASE.replace("denominator = [0.05, [0.95, 1.1], [0.2, 0.5], [-3.6, -2.6]]", bad)
    with pytest.raises(SpecError, match=words) as e:
        parse_spec(text, source="x.toml")
    assert "x.toml: [plant.intervals]" in str(e.value)


def test_spec_zpk_intervals_are_enclosed():
    s = parse_spec("""
[plant]
poles = [20, -20, -500]
gain = 2e6
[plant.intervals]
gain = [1.8e6, 2.2e6]
poles = [[18, 22], [-22, -18], -500]
""")
    b = s.models.box
    assert b.origin == "roots" and "interval arithmetic" in s.models.describe()
    rng = np.random.default_rng(1)
    for _ in range(50):
        r = [rng.uniform(18, 22), rng.uniform(-22, -18), -500]
        d = np.poly(r)
        assert np.all(d >= b.den_lo) and np.all(d <= b.den_hi)


def test_variant_errors_name_the_variant():
    with pytest.raises(SpecError, match=r"\[plant.variants\[0\]\]"):
        parse_spec(BASE.replace('numerator = [5.0]\ndenominator = [0.001', 'numerator = [5.0, 1, 1, 1, 1, 1]\ndenominator = [0.001'))


# ------------------------------------------------------------------ worst case = max over models
def test_worst_case_equals_max_over_independent_models():
    s = parse_spec(BASE.replace("max_overshoot_pct = 30", "max_overshoot_pct = 90")
                   .replace("max_sensitivity_peak = 2.2", "max_sensitivity_peak = 20"))
    fam = Family(kind="lead-lag", stages=("lead", "lead"), integrator=False, sign=1.0)
    # two lead-lead designs (log10 parameters: gain, z1, p1, z2, p2), robustly stable on this box
    params = np.array([[1.429965, 0.536508, 1.037405, 0.536508, 1.037405],
                       [1.40, 0.52, 1.03, 0.55, 1.05]])
    reqs = dict(s.requirements)
    df = evaluate_models(s.models, fam, params, reqs)
    assert df["models_complete"].all() and df["robust_stable"].all()
    cn, cd = fam.controllers(params)
    per = [evaluate_controllers(m.plant, cn, cd, reqs) for m in s.models.members]
    for metric, sense in (("overshoot_pct", max), ("sensitivity_peak", max), ("settling_time_s", max),
                          ("phase_margin_deg", min), ("min_damping", min)):
        stack = np.array([p[metric].to_numpy(float) for p in per])
        want = stack.max(axis=0) if sense is max else stack.min(axis=0)
        np.testing.assert_allclose(df[metric].to_numpy(float), want, rtol=1e-9)


def test_model_set_members_are_deterministic():
    s1, s2 = parse_spec(BASE), parse_spec(BASE)
    a = [m.plant.den for m in s1.models.members]
    b = [m.plant.den for m in s2.models.members]
    assert all(np.array_equal(x, y) for x, y in zip(a, b))
    # every vertex and sample lies in the box
    box = s1.models.box
    for m in s1.models.members[2:]:
        d = np.pad(m.plant.den, (box.den_lo.size - m.plant.den.size, 0))
        assert np.all(d >= box.den_lo) and np.all(d <= box.den_hi)


def test_screen_agrees_with_certificate_on_wide_coefficient_scales():
    # maglev-like box (coefficients from 1 to 2.4e5, gain 2e6): the float screen must follow the
    # exact certificate over a sweep of controller gains (a scaling bug once flagged every row)
    s = parse_spec(open("specs/maglev_robust.toml").read(), source="maglev_robust.toml")
    box = s.models.box
    agree, stable = 0, 0
    for k in np.logspace(np.log10(0.5), np.log10(60), 25):
        nc = k * np.poly([-32.7, -149.0])
        dc = np.poly([-190.0, -353.0])
        exact = box_certificate(box, nc, dc)["robust_stable"]
        agree += bool(box_stable_screen(box, nc[None, :], dc[None, :])[0]) == exact
        stable += exact
    assert agree == 25 and 0 < stable < 25


def test_example_spec_is_labelled_and_loads():
    text = open("specs/maglev_robust.toml").read()
    assert text.startswith("# INVENTED SCENARIO")
    s = parse_spec(text, source="specs/maglev_robust.toml")
    assert s.models.box.k == 4 and [n for n, _ in s.models.variants] == ["slow-coil-driver", "sensor-delay-0.5ms"]
    assert s.models.variants[1][1].delay == 0.0005


def test_whole_loop_on_a_model_set(tmp_path):
    """design -> table -> show -> export -> tighten -> check on a spec with intervals and a variant."""
    import json
    from typer.testing import CliRunner
    from synth.cli import app
    from synth.export import read_design
    spec = tmp_path / "lag.toml"
    spec.write_text(BASE + "\n[search]\nbudget = 400\ntime_limit_s = 20\n")
    run = tmp_path / "run"
    cli = CliRunner()
    r = cli.invoke(app, ["design", str(spec), "--out", str(run), "--json", "--top", "3"])
    assert r.exit_code == 0, r.output
    rows = json.loads(r.output)["rows"]
    assert rows and all("robust_stable" in x for x in rows)
    feas = [x for x in rows if x["feasible"]]
    assert feas, "the seeds of this spec include robustly stable, feasible designs"
    assert all(x["robust_stable"] for x in feas)            # every shown feasible design is certified
    cid = str(feas[0]["id"])
    rec = json.loads(cli.invoke(app, ["show", str(run), cid, "--json"]).output)
    assert rec["robust_stable"] and len(rec["models"]) == 82
    for key, req in rec["requirements"].items():           # worst case = the named model's value
        named = next(m for m in rec["models"] if m["name"] == req["worst_model_name"])
        assert named["values"][key] == req["value"]
        vals = [m["values"][key] for m in rec["models"]]
        assert req["value"] == (max(vals) if key.startswith("max_") else min(vals))
    out = tmp_path / "d.csv"
    assert cli.invoke(app, ["export", str(run), cid, "-o", str(out)]).exit_code == 0
    text = out.read_text()
    assert "model_set" in text and "generalized Kharitonov" in text
    read_design(out)
    r = cli.invoke(app, ["tighten", str(run), "--set", "max_overshoot_pct=28", "--out", str(tmp_path / "t"),
                         "--budget", "100", "--json"])
    assert r.exit_code == 0, r.output
    from synth.runs import open_run
    assert open_run(tmp_path / "t").spec.models == open_run(run).spec.models


def test_report_envelopes_contain_every_model_scipy_step():
    # outside reference: scipy.signal.step of each model's closed loop T = L/(1+L) lies inside the
    # drawn envelope (up to the display interpolation), and the pole map holds every model's poles
    import scipy.signal as sig
    from synth.describe import check_controller
    from synth.report import Candidate
    from synth.report.model_figures import model_set_figures
    box = CoefficientBox(np.array([4.5]), np.array([5.5]), np.array([0.05, 0.95, 0.3, -3.3]),
                         np.array([0.05, 1.1, 0.4, -2.8]))
    nom = TransferFunction(np.array([5.0]), np.array([0.05, 1.025, 0.35, -3.0]))
    ms = ModelSet(nom, (), box, samples=4)
    c = TransferFunction(26.9132 * np.poly([-3.4396, -3.4396]), np.poly([-10.899, -10.899]))
    rec = check_controller(nom, c, {"max_overshoot_pct": 40.0}, models=ms)
    assert rec["robust_stable"]
    fd = model_set_figures([Candidate(1, "chosen", 0, 1, c, rec, None)], ms, {}, 6, (0.01, 1000))[0]
    step = fd.panels[0]
    lo, hi = step.curves[0], step.curves[1]
    for m in ms.members:
        num = np.convolve(c.num, m.plant.num)
        den = np.polyadd(np.convolve(c.den, m.plant.den), num)
        _, y = sig.step((num, den), T=lo.x)
        span = hi.y.max() - lo.y.min()
        assert np.all(y >= lo.y - 0.02 * span) and np.all(y <= hi.y + 0.02 * span)
    n_poles = sum(len(p.x) for p in fd.panels[2].points)
    assert n_poles == len(ms.members) * 5          # 3 plant + 2 controller poles per model


def test_vertex_subset_above_six_intervals_is_stated_and_deterministic():
    lo = np.array([1.0, 2, 3, 4, 5, 6, 7, 8])
    box = CoefficientBox(np.array([1.0]), np.array([2.0]), lo, np.r_[1.0, lo[1:] * 1.1])
    ms = ModelSet(TransferFunction(np.array([1.5]), np.r_[1.0, lo[1:] * 1.05]), (), box, samples=8)
    bits, how = ms.vertex_bits()
    assert box.k == 8 and len(bits) == 64 and "deterministic subset" in how
    assert np.array_equal(bits, ModelSet(ms.nominal, (), box, samples=8).vertex_bits()[0])
    assert len({b.tobytes() for b in bits}) == 64
    # the 16 Kharitonov vertex pairs are among them
    kn, kd = kharitonov_vertices(box.num_lo, box.num_hi), kharitonov_vertices(box.den_lo, box.den_hi)
    corners = {tuple(box.corner(b)) for b in bits}
    for i in range(4):
        for j in range(4):
            assert tuple(np.concatenate([kn[i], kd[j]])) in corners
