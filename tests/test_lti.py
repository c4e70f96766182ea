"""synth.lti against numpy, scipy.signal, sympy and mpmath.

Every check compares synth with a computation that does not use synth.
"""

from __future__ import annotations

from math import factorial

import mpmath
import numpy as np
import pytest
import sympy as sp
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import signal

from synth.lti import (TransferFunction, batch_add, batch_conv, batch_polyval, batch_roots, format_poly,
                       pade, poly_from_roots, polyadd, shift_poly, trim)

HYP = settings(max_examples=40, deadline=None)
s = sp.symbols("s")


def assert_same_roots(got, ref, tol):
    """Each reference root matched to a distinct computed root within tol * max(1, |root|)."""
    got, ref = list(np.asarray(got, complex)), np.asarray(ref, complex)
    assert len(got) == ref.size
    for r in ref:
        d = [abs(g - r) for g in got]
        j = int(np.argmin(d))
        assert d[j] <= tol * max(1.0, abs(r)), (r, got)
        got.pop(j)


def sym_poly(coeffs):
    """Exact sympy polynomial from float coefficients (every float64 is a rational)."""
    c = list(coeffs)
    return sum(sp.Rational(float(x)) * s ** (len(c) - 1 - i) for i, x in enumerate(c))


def sym_coeffs(expr):
    return [float(c) for c in sp.Poly(sp.expand(expr), s).all_coeffs()]


# random root sets: real roots and conjugate pairs, away from each other
real_root = st.floats(-10, 10, allow_nan=False).filter(lambda x: abs(x) > 1e-2)
pair = st.tuples(st.floats(-10, 10), st.floats(0.1, 10))


@st.composite
def root_sets(draw, max_real=4, max_pairs=2):
    rr = draw(st.lists(real_root, min_size=0, max_size=max_real))
    pp = draw(st.lists(pair, min_size=0, max_size=max_pairs))
    roots = np.array(list(rr) + [complex(a, b) for a, b in pp] + [complex(a, -b) for a, b in pp], complex)
    if roots.size > 1:   # distinct roots: multiple roots are ill-conditioned for any root finder
        d = np.abs(roots[:, None] - roots[None, :]) + np.eye(roots.size) * 1e9
        assume(d.min() > 0.3)
    return roots


# ------------------------------------------------------------------ polynomials
def test_trim_drops_leading_zeros_only():
    # reference: the definition (numpy.trim_zeros on the front)
    p = [0.0, 0.0, 1.0, 0.0, 2.0, 0.0]
    np.testing.assert_array_equal(trim(p), np.trim_zeros(np.array(p), "f"))
    np.testing.assert_array_equal(trim([0.0, 0.0]), [0.0])


@HYP
@given(st.lists(st.floats(-100, 100), min_size=1, max_size=7),
       st.lists(st.floats(-100, 100), min_size=1, max_size=7))
def test_polyadd_matches_numpy(a, b):
    np.testing.assert_allclose(polyadd(a, b), np.polyadd(a, b), rtol=0, atol=1e-12)


@HYP
@given(root_sets())
def test_poly_from_roots_matches_numpy_poly(roots):
    # reference: numpy.poly (monic polynomial from roots)
    ref = np.real(np.poly(roots)) if roots.size else np.ones(1)
    np.testing.assert_allclose(poly_from_roots(roots), ref, rtol=1e-12, atol=1e-12)


@HYP
@given(root_sets(max_real=3, max_pairs=1), root_sets(max_real=3, max_pairs=2),
       st.floats(0.1, 50) | st.floats(-50, -0.1))
def test_roots_coefficient_round_trip(zeros, poles, gain):
    # roots -> coefficients (synth) -> roots by numpy.roots: same zeros, poles and gain
    g = TransferFunction.from_roots(zeros, poles, gain)
    np.testing.assert_allclose(g.num, gain * (np.real(np.poly(zeros)) if zeros.size else np.ones(1)),
                               rtol=1e-12, atol=1e-9)
    if zeros.size:
        assert_same_roots(g.zeros, np.roots(g.num), 1e-12)
        assert_same_roots(g.zeros, zeros, 1e-6)
    if poles.size:
        assert_same_roots(g.poles, poles, 1e-6)
    assert g.gain == pytest.approx(gain, rel=1e-14)
    # coefficients -> roots -> coefficients
    back = TransferFunction.from_roots(g.zeros, g.poles, g.gain)
    np.testing.assert_allclose(back.num, g.num, rtol=1e-8, atol=1e-8 * np.abs(g.num).max())
    np.testing.assert_allclose(back.den, g.den, rtol=1e-8, atol=1e-8 * np.abs(g.den).max())


def test_roots_of_constant_and_zero_numerator():
    g = TransferFunction([0.0, 0.0], [1.0, 2.0])
    assert g.zeros.size == 0 and g.gain == 0.0
    k = TransferFunction.constant(3.5)
    assert k.poles.size == 0 and k.zeros.size == 0 and k.gain == 3.5 and k.dc_gain() == 3.5


# ------------------------------------------------------------------ batched helpers
@HYP
@given(st.integers(1, 5), st.integers(1, 6), st.integers(1, 6), st.randoms(use_true_random=False))
def test_batch_conv_matches_numpy_convolve_per_row(n, m, k, rnd):
    rng = np.random.default_rng(rnd.randint(0, 2 ** 32 - 1))
    a, b = rng.normal(size=(n, m)), rng.normal(size=(n, k))
    out = batch_conv(a, b)
    ref = np.array([np.convolve(a[i], b[i]) for i in range(n)])
    np.testing.assert_allclose(out, ref, rtol=1e-13, atol=1e-13)
    b1 = rng.normal(size=k)                       # one batch and one 1-D polynomial
    np.testing.assert_allclose(batch_conv(a, b1), [np.convolve(r, b1) for r in a], rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(batch_conv(b1, a), [np.convolve(b1, r) for r in a], rtol=1e-13, atol=1e-13)


@HYP
@given(st.integers(1, 5), st.integers(1, 6), st.integers(1, 6), st.randoms(use_true_random=False))
def test_batch_add_matches_numpy_polyadd(n, m, k, rnd):
    rng = np.random.default_rng(rnd.randint(0, 2 ** 32 - 1))
    a, b = rng.normal(size=(n, m)), rng.normal(size=(n, k))
    np.testing.assert_allclose(batch_add(a, b), [np.polyadd(a[i], b[i]) for i in range(n)], atol=1e-15)


@HYP
@given(st.integers(1, 5), st.integers(1, 7), st.randoms(use_true_random=False))
def test_batch_polyval_matches_numpy_polyval(n, m, rnd):
    rng = np.random.default_rng(rnd.randint(0, 2 ** 32 - 1))
    p = rng.normal(size=(n, m))
    x1 = rng.normal(size=n) + 1j * rng.normal(size=n)
    np.testing.assert_allclose(batch_polyval(p, x1), [np.polyval(p[i], x1[i]) for i in range(n)],
                               rtol=1e-12, atol=1e-12)
    x2 = rng.normal(size=(n, 4)) * 3
    np.testing.assert_allclose(batch_polyval(p, x2), [np.polyval(p[i], x2[i]) for i in range(n)],
                               rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(batch_polyval(p, 0.7), [np.polyval(r, 0.7) for r in p], rtol=1e-12)


@HYP
@given(st.lists(root_sets(max_real=4, max_pairs=2), min_size=1, max_size=5),
       st.lists(st.integers(0, 2), min_size=5, max_size=5))
def test_batch_roots_matches_numpy_roots_per_row(rsets, pads):
    # rows of different degrees in one batch, right-aligned with leading zeros
    polys = [np.atleast_1d(np.real(np.poly(r))) * (1 + i) for i, r in enumerate(rsets)]
    width = max(p.size for p in polys) + max(pads)
    batch = np.array([np.pad(p, (width - p.size, 0)) for p in polys])
    out = batch_roots(batch)
    assert out.shape == (len(polys), width - 1)
    for i, p in enumerate(polys):
        ref = np.roots(p)
        got = out[i][~np.isnan(out[i])]
        assert_same_roots(got, ref, 1e-7)
        assert np.all(np.isnan(out[i][ref.size:]))


def test_batch_roots_constant_rows_give_only_nan():
    out = batch_roots(np.array([[0.0, 0.0, 2.0], [1.0, -3.0, 2.0]]))
    assert np.all(np.isnan(out[0]))
    np.testing.assert_allclose(np.sort(out[1].real), [1.0, 2.0])     # (s-1)(s-2), numpy.roots


@HYP
@given(st.lists(st.floats(-5, 5), min_size=1, max_size=7), st.floats(-3, 3))
def test_shift_poly_matches_sympy_expand(coeffs, a):
    # reference: sympy.expand(p(s - a)) in exact rational arithmetic
    ref = sym_coeffs(sym_poly(coeffs).subs(s, s - sp.Rational(a))) if any(coeffs) else [0.0]
    ref = np.pad(ref, (len(coeffs) - len(ref), 0))
    got = shift_poly(coeffs, a)
    np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-10 * max(1.0, np.abs(ref).max()))


# ------------------------------------------------------------------ Padé
def _mp_pade(delay: float, n: int):
    """Reference [n/n] Padé approximant of exp(-delay s) from its Taylor series
    (mpmath.pade, 60 digits), returned in descending powers like synth."""
    with mpmath.workdps(60):
        tay = [(-mpmath.mpf(delay)) ** k / mpmath.factorial(k) for k in range(2 * n + 1)]
        p, q = mpmath.pade(tay, n, n)
        p = [x / q[0] for x in p]
        q = [x / q[0] for x in q]
        return np.array([float(x) for x in p[::-1]]), np.array([float(x) for x in q[::-1]])


@pytest.mark.parametrize("delay", [0.1, 1.0, 2.5])
@pytest.mark.parametrize("order", [1, 2, 3, 4, 6, 8, 10, 12])
def test_pade_coefficients_match_mpmath_pade(delay, order):
    num, den = pade(delay, order)
    rn, rd = _mp_pade(delay, order)
    scale = den[-1]      # synth normalises the constant coefficient to 1 as well
    assert scale == pytest.approx(1.0, rel=1e-15)
    np.testing.assert_allclose(num, rn, rtol=1e-12)
    np.testing.assert_allclose(den, rd, rtol=1e-12)


@pytest.mark.parametrize("order", [1, 2, 3, 5, 8])
def test_pade_matches_taylor_series_to_order_2n(order):
    # The [n/n] Padé approximant of exp(-T s) agrees with its Taylor series through s^(2n)
    # and the first error term is (n!)^2 / ((2n)! (2n+1)!) T^(2n+1) in magnitude
    # (Baker & Graves-Morris, *Padé Approximants*, 2nd ed. 1996; error constant value from
    # memory, recomputed here with sympy: it agrees).
    T = sp.Rational(1, 2)
    num, den = pade(0.5, order)
    ser = sp.series(sym_poly(num) / sym_poly(den) - sp.exp(-T * s), s, 0, 2 * order + 2).removeO()
    for k in range(2 * order + 1):
        taylor = T ** k / sp.factorial(k)
        assert abs(float(ser.coeff(s, k) / taylor)) < 1e-12, k
    err = float(ser.coeff(s, 2 * order + 1))
    expected = factorial(order) ** 2 / (factorial(2 * order) * factorial(2 * order + 1)) * 0.5 ** (2 * order + 1)
    assert abs(err) == pytest.approx(expected, rel=1e-9)


def test_pade_is_all_pass_on_the_imaginary_axis():
    # |exp(-j w T)| = 1 and a diagonal Padé approximant keeps that exactly: D(-s) = N(s)
    num, den = pade(0.7, 6)
    w = np.geomspace(1e-2, 1e3, 50)
    np.testing.assert_allclose(np.abs(np.polyval(num, 1j * w) / np.polyval(den, 1j * w)), 1.0, rtol=1e-12)


def test_pade_trivial_orders_and_errors():
    for args in ((0.0, 5), (1.0, 0)):
        n, d = pade(*args)
        np.testing.assert_array_equal(n, [1.0])
        np.testing.assert_array_equal(d, [1.0])
    with pytest.raises(ValueError):
        pade(1.0, -1)


def test_with_pade_multiplies_the_approximant_in():
    g = TransferFunction([2.0], [1.0, 1.0], delay=0.5)
    r = g.with_pade(4)
    pn, pd = _mp_pade(0.5, 4)
    assert r.delay == 0.0
    np.testing.assert_allclose(r.num, np.polymul([2.0], pn), rtol=1e-12)
    np.testing.assert_allclose(r.den, np.polymul([1.0, 1.0], pd), rtol=1e-12)
    # the approximant agrees with the exact response at low frequency (scipy.signal.freqresp)
    w = np.array([0.01, 0.1, 0.5])
    _, h = signal.freqresp((r.num, r.den), w)
    np.testing.assert_allclose(h, g(1j * w), rtol=1e-6)


# ------------------------------------------------------------------ transfer functions
def test_products_match_numpy_polymul_and_add_delays():
    a = TransferFunction([1.0, 2.0], [1.0, 3.0, 5.0], delay=0.2)
    b = TransferFunction([3.0], [1.0, 0.5], delay=0.3)
    c = a * b
    np.testing.assert_array_equal(c.num, np.polymul(a.num, b.num))
    np.testing.assert_array_equal(c.den, np.polymul(a.den, b.den))
    assert c.delay == pytest.approx(0.5)
    d = 2.5 * a
    np.testing.assert_array_equal(d.num, 2.5 * a.num)
    np.testing.assert_array_equal(d.den, a.den)
    # nothing is cancelled: (s+1)/(s+2) * (s+2)/(s+1) keeps degree 2 / 2
    e = TransferFunction([1, 1], [1, 2]) * TransferFunction([1, 2], [1, 1])
    assert e.num.size == 3 and e.den.size == 3


@pytest.mark.parametrize("sign", [-1, 1])
def test_feedback_matches_sympy(sign):
    # integer coefficients: float arithmetic in synth is exact, so compare exactly
    gn, gd = [2, 3], [1, 4, 1, 0]
    hn, hd = [5], [1, 7]
    G = sym_poly(gn) / sym_poly(gd)
    H = sym_poly(hn) / sym_poly(hd)
    ref = sp.cancel(G / (1 - sign * G * H))
    out = TransferFunction(gn, gd).feedback(TransferFunction(hn, hd), sign=sign)
    assert sp.simplify(sym_poly(out.num) / sym_poly(out.den) - ref) == 0
    # unreduced: numerator Ng Dh, denominator Dg Dh - sign Ng Nh, by sympy expand
    assert sym_coeffs(sym_poly(out.num)) == sym_coeffs(sym_poly(gn) * sym_poly(hd))
    assert sym_coeffs(sym_poly(out.den)) == sym_coeffs(sym_poly(gd) * sym_poly(hd)
                                                     - sign * sym_poly(gn) * sym_poly(hn))


def test_unity_feedback_default_and_delay_refused():
    out = TransferFunction([4.0], [1.0, 2.0, 0.0]).feedback()
    np.testing.assert_array_equal(out.den, [1.0, 2.0, 4.0])      # s^2 + 2 s + 4, by hand
    with pytest.raises(ValueError):
        TransferFunction([1.0], [1.0, 1.0], delay=1.0).feedback()


def test_frequency_response_matches_scipy_freqresp():
    g = TransferFunction([2.0, 1.0], [1.0, 0.4, 4.0, 0.0])
    w = np.geomspace(1e-2, 1e2, 200)
    _, h = signal.freqresp((g.num, g.den), w)
    np.testing.assert_allclose(g(1j * w), h, rtol=1e-12)
    gd = TransferFunction(g.num, g.den, delay=0.3)
    np.testing.assert_allclose(gd(1j * w), h * np.exp(-0.3j * w), rtol=1e-12)


@pytest.mark.parametrize("num, den, expected", [
    ([1.0, 2.0], [1.0, 3.0, 4.0], 0.5),                  # G(0) = 2/4
    ([3.0], [2.0, 1.0, 0.0], np.inf),                    # integrator: +inf
    ([-3.0], [1.0, 0.0], -np.inf),                        # negative integrator: -inf
    ([5.0, 0.0], [1.0, 1.0], 0.0),                        # zero at the origin
])
def test_dc_gain(num, den, expected):
    assert TransferFunction(num, den).dc_gain() == expected


def test_relative_degree_and_properness():
    assert TransferFunction([1.0], [1.0, 2.0, 3.0]).relative_degree == 2
    assert TransferFunction([1.0, 0.0, 0.0], [1.0, 1.0]).is_proper is False
    assert TransferFunction([0.0, 0.0, 1.0], [0.0, 1.0, 1.0]).relative_degree == 1   # leading zeros trimmed


def test_cancel_common_factors_cancels_only_when_asked():
    g = TransferFunction(np.poly([-1.0, -3.0]) * 2.0, np.poly([-1.0, -2.0, -5.0]))
    assert g.den.size == 4
    r = g.cancel_common_factors()
    np.testing.assert_allclose(r.num, [2.0, 6.0], rtol=1e-10)                # 2 (s+3)
    np.testing.assert_allclose(r.den, np.poly([-2.0, -5.0]), rtol=1e-10)    # (s+2)(s+5)


@pytest.mark.parametrize("kwargs", [
    dict(num=[1.0, np.nan], den=[1.0, 1.0]),
    dict(num=[1.0], den=[0.0, 0.0]),
    dict(num=[1.0], den=[1.0, 1.0], delay=-0.1),
    dict(num=[1.0], den=[1.0, 1.0], delay=np.inf),
])
def test_invalid_transfer_functions_rejected(kwargs):
    with pytest.raises(ValueError):
        TransferFunction(**kwargs)


def test_transfer_function_is_immutable():
    g = TransferFunction([1.0], [1.0, 1.0])
    with pytest.raises(ValueError):
        g.num[0] = 2.0


def test_format_poly():
    # expected strings written out by hand
    assert format_poly([2.0, 3.0, 1.0]) == "2 s^2 + 3 s + 1"
    assert format_poly([-1.0, 0.0, -0.5]) == "-s^2 - 0.5"
    assert format_poly([0.0]) == "0"
