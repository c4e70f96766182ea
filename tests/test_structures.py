"""synth.structures: parameter vectors -> controller polynomials, against sympy.

The reference for every family is the controller written out by hand as a sympy
expression (lead/lag stages K prod (s+z)/(s+p), optional 1/s; the parallel PID
kp + ki/s + kd s/(tf s + 1) of Astrom & Hagglund, *Advanced PID Control*, ISA 2006),
brought to one fraction with sympy.cancel.
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from synth.structures import Family

HYP = settings(max_examples=40, deadline=None)
s = sp.symbols("s")
logf = st.floats(-2, 2, allow_nan=False)


def as_fraction(expr):
    """(num, den) float coefficient lists of a rational sympy expression, den monic."""
    n, d = sp.fraction(sp.cancel(sp.together(expr)))
    pn, pd = sp.Poly(n, s), sp.Poly(d, s)
    lead = pd.LC()
    return ([float(c / lead) for c in pn.all_coeffs()], [float(c / lead) for c in pd.all_coeffs()])


def synth_fraction(num, den):
    """Normalise synth's (num, den) rows to a monic denominator, leading zeros dropped."""
    num, den = np.trim_zeros(np.asarray(num, float), "f"), np.trim_zeros(np.asarray(den, float), "f")
    return num / den[0], den / den[0]


def hand_leadlag(k, zeros, poles, integrator):
    expr = sp.Float(k, 30)
    for z, p in zip(zeros, poles):
        expr *= (s + sp.Float(z, 30)) / (s + sp.Float(p, 30))
    if integrator:
        expr /= s
    return expr


def assert_same_controller(num, den, expr):
    rn, rd = as_fraction(expr)
    gn, gd = synth_fraction(num, den)
    np.testing.assert_allclose(gn, rn, rtol=1e-12, atol=1e-14 * max(1.0, np.abs(rn).max()))
    np.testing.assert_allclose(gd, rd, rtol=1e-12, atol=1e-14 * max(1.0, np.abs(rd).max()))


# ------------------------------------------------------------------ lead-lag family
@pytest.mark.parametrize("stages, integrator, sign", [
    (("lead",), False, 1.0),
    (("lag",), False, 1.0),
    (("lead-lag",), False, 1.0),
    (("lead", "lag"), True, 1.0),
    (("lead", "lead"), False, -1.0),
    ((), True, 1.0),                      # pure integral controller K/s
    ((), False, -1.0),                    # pure gain
])
def test_leadlag_coefficients_match_hand_built_sympy_product(stages, integrator, sign):
    fam = Family("lead-lag", stages, integrator, sign)
    rng = np.random.default_rng(7)
    for _ in range(5):
        params = rng.uniform(-1.5, 1.5, fam.dim)
        num, den = fam.controllers(params[None])
        zc = [c for _, c, _ in fam.pairs]
        pc = [c for _, _, c in fam.pairs]
        expr = hand_leadlag(sign * 10 ** params[0], 10 ** params[zc], 10 ** params[pc], integrator)
        assert_same_controller(num[0], den[0], expr)


def test_lead_example_by_hand():
    # Ogata's lead 41.7 (s + 4.41)/(s + 18.4) (Modern Control Engineering, 5th ed., ex. 7-26)
    fam = Family("lead-lag", ("lead",))
    p = fam.params_from_roots(41.7, [4.41], [18.4])
    num, den = fam.controllers(p[None])
    np.testing.assert_allclose(num[0], [41.7, 41.7 * 4.41], rtol=1e-14)
    np.testing.assert_allclose(den[0], [1.0, 18.4], rtol=1e-14)


def test_parameter_names_and_layout():
    fam = Family("lead-lag", ("lead-lag", "lag"), integrator=True)
    assert fam.names == ["log10_gain", "lead1_log10_zero", "lead1_log10_pole", "lag2_log10_zero",
                         "lag2_log10_pole", "lag3_log10_zero", "lag3_log10_pole"]
    assert fam.dim == 7
    assert [r for r, _, _ in fam.pairs] == ["lead", "lag", "lag"]


@HYP
@given(st.lists(logf, min_size=5, max_size=5), st.booleans())
def test_high_frequency_gain_is_sign_times_k(params, integ):
    # a proper lead-lag controller has C(inf) = sign*K (initial-value theorem: u(0+) = K
    # for a unit reference step into a strictly proper loop)
    fam = Family("lead-lag", ("lead", "lag"), integrator=False, sign=-1.0 if integ else 1.0)
    num, den = fam.controllers(np.array(params)[None])
    assert num[0, 0] / den[0, 0] == pytest.approx(fam.sign * 10 ** params[0], rel=1e-13)


# ------------------------------------------------------------------ PID / PI
@pytest.mark.parametrize("sign", [1.0, -1.0])
def test_pid_coefficients_match_sympy(sign):
    fam = Family("pid", sign=sign)
    rng = np.random.default_rng(3)
    for _ in range(6):
        p = rng.uniform(-1.5, 1.5, 4)
        kp, ki, kd, tf = (sp.Float(10 ** x, 30) for x in p)
        expr = sign * (kp + ki / s + kd * s / (tf * s + 1))
        num, den = fam.controllers(p[None])
        assert_same_controller(num[0], den[0], expr)


def test_pi_coefficients_match_sympy():
    fam = Family("pi")
    p = np.array([0.3, -0.7])
    num, den = fam.controllers(p[None])
    assert_same_controller(num[0], den[0], sp.Float(10 ** 0.3, 30) + sp.Float(10 ** -0.7, 30) / s)
    assert fam.names == ["log10_kp", "log10_ki"]


def test_params_from_pid_inverse():
    for kind, gains in (("pi", (2.0, 0.5)), ("pid", (2.0, 0.5, 0.3, 0.05))):
        fam = Family(kind)
        p = fam.params_from_pid(*gains)
        np.testing.assert_allclose(10 ** p, gains, rtol=1e-14)
        num, den = fam.controllers(p[None])
        kp, ki = gains[0], gains[1]
        expr = kp + ki / s + (gains[2] * s / (gains[3] * s + 1) if kind == "pid" else 0)
        assert_same_controller(num[0], den[0], expr)


# ------------------------------------------------------------------ admissible masks
def test_admissible_masks():
    lead = Family("lead-lag", ("lead",))
    lag = Family("lead-lag", ("lag",))
    ll = Family("lead-lag", ("lead-lag",))
    p = np.array([[0.0, 0.0, 1.0],      # zero below pole: lead
                  [0.0, 1.0, 0.0],      # zero above pole: lag
                  [0.0, 0.5, 0.5],      # equal: neither
                  [0.0, np.nan, 1.0]])  # not finite
    np.testing.assert_array_equal(lead.admissible(p), [True, False, False, False])
    np.testing.assert_array_equal(lag.admissible(p), [False, True, False, False])
    q = np.array([[0.0, -1.0, 0.0, 1.0, 0.5],     # lead then lag
                  [0.0, -1.0, 0.0, 0.5, 1.0],     # second pair is not a lag
                  [0.0, 0.0, -1.0, 1.0, 0.5]])    # first pair is not a lead
    np.testing.assert_array_equal(ll.admissible(q), [True, False, False])
    assert Family("pid").admissible(np.zeros((2, 4))).all()


# ------------------------------------------------------------------ gain-zeros-poles and its inverse
@HYP
@given(st.lists(logf, min_size=7, max_size=7), st.booleans(), st.sampled_from([1.0, -1.0]))
def test_params_from_roots_inverts_gain_zeros_poles(params, integ, sign):
    fam = Family("lead-lag", ("lead", "lag", "lead"), integrator=integ, sign=sign)
    p = np.array(params)
    gains, zeros, poles = fam.gain_zeros_poles(p[None])
    # the zeros and poles are those of the coefficient polynomials: numpy.poly of them gives
    # the monic coefficient rows back (well conditioned even for repeated corners)
    num, den = fam.controllers(p[None])
    np.testing.assert_allclose(np.real(np.poly(zeros[0])), num[0] / num[0, 0], rtol=1e-12)
    np.testing.assert_allclose(np.real(np.poly(poles[0])), den[0] / den[0, 0], rtol=1e-12, atol=1e-300)
    assert gains[0] == pytest.approx(num[0, 0] / den[0, 0], rel=1e-13)
    # back to parameters: corner frequencies are the negated zeros / stage poles
    stage_poles = -poles[0].real[: len(fam.pairs)]
    back = fam.params_from_roots(gains[0], -zeros[0].real, stage_poles)
    np.testing.assert_allclose(back, p, rtol=1e-12, atol=1e-12)


def test_pid_roots_matches_numpy_roots():
    fam = Family("pid")
    p = np.log10([[2.0, 0.5, 0.3, 0.05]])
    gains, zeros, poles = fam.gain_zeros_poles(p)
    num, den = fam.controllers(p)
    np.testing.assert_allclose(np.sort(zeros[0]), np.sort(np.roots(num[0])), rtol=1e-12)
    np.testing.assert_allclose(np.sort(poles[0].real), [-20.0, 0.0], atol=1e-12)   # 1/tf and the integrator
    assert gains[0] == pytest.approx((2.0 * 0.05 + 0.3) / 0.05, rel=1e-13)          # (kp tf + kd)/tf


def test_params_from_roots_errors():
    fam = Family("lead-lag", ("lead",))
    with pytest.raises(ValueError):
        fam.params_from_roots(-1.0, [1.0], [2.0])        # sign mismatch
    with pytest.raises(ValueError):
        fam.params_from_roots(1.0, [1.0, 2.0], [2.0])    # wrong count
    with pytest.raises(ValueError):
        Family("pid").params_from_roots(1.0, [], [])
    with pytest.raises(ValueError):
        fam.params_from_pid(1.0, 1.0)


@pytest.mark.parametrize("kwargs", [dict(kind="pd"), dict(stages=("notch",)), dict(sign=2.0)])
def test_invalid_families_rejected(kwargs):
    with pytest.raises(ValueError):
        Family(**kwargs)


def test_wrong_parameter_count_rejected():
    with pytest.raises(ValueError):
        Family("lead-lag", ("lead",)).controllers(np.zeros((2, 4)))


# ------------------------------------------------------------------ batching
@HYP
@given(st.lists(st.lists(logf, min_size=5, max_size=5), min_size=1, max_size=6),
       st.sampled_from([("lead", "lag"), ("lead-lag",)]), st.booleans())
def test_batched_equals_one_at_a_time(rows, stages, integ):
    fam = Family("lead-lag", stages, integrator=integ)
    p = np.array(rows)
    num, den = fam.controllers(p)
    for i in range(p.shape[0]):
        n1, d1 = fam.controllers(p[i:i + 1])
        np.testing.assert_array_equal(num[i:i + 1], n1)
        np.testing.assert_array_equal(den[i:i + 1], d1)
    np.testing.assert_array_equal(fam.admissible(p), [fam.admissible(p[i:i + 1])[0] for i in range(p.shape[0])])


@HYP
@given(st.lists(st.lists(logf, min_size=4, max_size=4), min_size=1, max_size=6))
def test_pid_batched_equals_one_at_a_time(rows):
    fam = Family("pid")
    p = np.array(rows)
    num, den = fam.controllers(p)
    for i in range(p.shape[0]):
        n1, d1 = fam.controllers(p[i:i + 1])
        np.testing.assert_array_equal(num[i:i + 1], n1)
        np.testing.assert_array_equal(den[i:i + 1], d1)
