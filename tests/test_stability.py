"""synth.evaluate.stability against high-precision roots (mpmath), sympy and theorems.

References: Routh (1877) and Hurwitz (1895) via Gantmacher, *The Theory of Matrices*,
vol. 2, 1959, ch. XV: a real polynomial has all roots in the open left half plane iff
the first column of its Routh array has no zero and no sign change; when no zero
appears, the number of sign changes equals the number of right-half-plane roots.
Internal stability of a loop = Hurwitz unreduced characteristic polynomial (Doyle,
Francis & Tannenbaum, *Feedback Control Theory*, 1992, ch. 3).
"""

from __future__ import annotations

import sys
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
import sympy as sp
from hypothesis import assume, given, settings
from hypothesis import strategies as st

sys.path.insert(0, str(Path(__file__).parent))
from _oracles import char_poly, mp_roots  # noqa: E402

from synth.evaluate import EvalOptions, evaluate_controllers  # noqa: E402
from synth.evaluate.stability import (certificate, characteristic, closed_loop_poles, hidden_mode_mask,  # noqa: E402
                                      is_hurwitz_exact, pole_summary, precise_roots, routh_first_column,
                                      shift_exact)
from synth.lti import TransferFunction  # noqa: E402

HYP = settings(max_examples=60, deadline=None)
s = sp.symbols("s")


def sign_changes(col):
    sg = [x > 0 for x in col]
    return sum(a != b for a, b in zip(sg, sg[1:]))


@st.composite
def polys_from_roots(draw):
    """Float polynomials of degree 1..8 from random roots with |Re| >= 0.05 (so the
    verdict is far from the imaginary axis) and a random, possibly negative, leading
    coefficient."""
    n_real = draw(st.integers(0, 8))
    n_pair = draw(st.integers(0, (8 - n_real) // 2))
    assume(n_real + 2 * n_pair >= 1)
    re = st.floats(0.05, 20).flatmap(lambda x: st.sampled_from([x, -x]))
    roots = [draw(re) for _ in range(n_real)]
    for _ in range(n_pair):
        a, b = draw(re), draw(st.floats(0.01, 20))
        roots += [complex(a, b), complex(a, -b)]
    lead = draw(st.floats(0.1, 10).flatmap(lambda x: st.sampled_from([x, -x])))
    return lead * np.real(np.poly(roots))


@st.composite
def integer_polys(draw):
    deg = draw(st.integers(1, 8))
    c = [draw(st.integers(-9, 9).filter(lambda x: x != 0))] + [draw(st.integers(-9, 9)) for _ in range(deg)]
    return np.array(c, dtype=float)


# ------------------------------------------------------------------ Routh verdicts
@HYP
@given(polys_from_roots())
def test_routh_verdict_matches_high_precision_roots(p):
    r = mp_roots(p, dps=30)           # mpmath.polyroots, 30 digits, on the float coefficients given
    assume(np.min(np.abs(r.real)) > 1e-3)
    assert is_hurwitz_exact(p) == bool(np.all(r.real < 0))
    col = routh_first_column(p)
    if col is not None:      # Routh's theorem: sign changes = number of RHP roots
        assert sign_changes(col) == int(np.sum(r.real > 0))


@HYP
@given(integer_polys())
def test_routh_on_integer_polynomials(p):
    r = mp_roots(p, dps=30)
    assume(np.min(np.abs(r.real)) > 1e-3)
    assert is_hurwitz_exact(p) == bool(np.all(r.real < 0))
    col = routh_first_column(p)
    if col is not None:      # Routh's theorem: sign changes = number of RHP roots
        assert sign_changes(col) == int(np.sum(r.real > 0))


def test_routh_first_column_by_hand():
    # s^3 + 2 s^2 + 3 s + 4: rows (1, 3), (2, 4), ((2*3 - 1*4)/2 = 1), (4)  -- by hand
    assert routh_first_column([1, 2, 3, 4]) == [1, 2, 1, 4]
    # s^3 + s^2 + 2 s + 8: third row (1*2 - 1*8)/1 = -6: two sign changes, two RHP roots
    col = routh_first_column([1, 1, 2, 8])
    assert col == [1, 1, -6, 8]
    assert int(np.sum(mp_roots([1, 1, 2, 8]).real > 0)) == 2


@pytest.mark.parametrize("p", [
    [1, 1, 1, 1],               # (s+1)(s^2+1): roots on the imaginary axis
    [1, 0, 1],                  # s^2 + 1
    [1, 2, 3, 0],               # root at the origin
    [1, 1, 2, 2, 3],            # zero in the first column, two RHP roots (textbook epsilon case)
    [1, -1],                    # s - 1
])
def test_not_hurwitz_cases(p):
    assert is_hurwitz_exact(p) is False
    assert np.max(mp_roots(p).real) >= -1e-12      # mpmath agrees: a root on or right of the axis


def test_negative_leading_coefficient_and_constants():
    assert is_hurwitz_exact([-1.0, -3.0, -2.0]) is True          # -(s+1)(s+2)
    assert is_hurwitz_exact([5.0]) is True                        # no roots at all
    assert is_hurwitz_exact([0.0, 0.0, 1.0, 1.0]) is True         # leading zeros ignored: s + 1
    assert is_hurwitz_exact([Fraction(1), Fraction(1, 3), Fraction(1, 50)]) is True


def test_exact_verdict_right_next_to_the_axis():
    # a lightly damped pair with Re = +-1e-10 next to a cluster of poles: the verdict
    # must follow the exact float coefficients; reference: mpmath roots at 60 digits
    for re in (1e-10, -1e-10):
        p = np.polymul([1.0, -2 * re, 1.0 + re * re], np.poly([-2.0, -3.0, -3.5, -5.0]))
        truth = bool(np.all(mp_roots(p, dps=80).real < 0))
        assert truth == (re < 0)
        assert is_hurwitz_exact(p) == truth


# ------------------------------------------------------------------ shift and roots
@HYP
@given(st.lists(st.floats(-10, 10), min_size=2, max_size=8).filter(lambda c: c[0] != 0), st.floats(-5, 5))
def test_shift_exact_matches_sympy(coeffs, a):
    ref = sp.Poly(sp.expand(sum(sp.Rational(c) * (s - sp.Rational(a)) ** (len(coeffs) - 1 - i)
                                for i, c in enumerate(coeffs))), s).all_coeffs()
    got = shift_exact(coeffs, a)
    assert len(got) == len(ref)
    assert all(sp.Rational(g.numerator, g.denominator) == r for g, r in zip(got, ref))


def test_precise_roots_match_mpmath_and_numpy():
    p = np.poly([-0.5, -3.0, -1 + 2j, -1 - 2j, 4.0]).real
    r = precise_roots(p)
    ref = mp_roots(p, dps=80)
    assert len(r) == 5
    for z in ref:
        assert np.min(np.abs(r - z)) < 1e-12 * max(1, abs(z))
    for z in np.roots(p):
        assert np.min(np.abs(r - z)) < 1e-8 * max(1, abs(z))
    assert precise_roots([3.0]).size == 0


def test_precise_roots_of_a_double_root():
    # (s+1)^2 (s+2) with exact integer coefficients: the double root is exactly -1
    r = precise_roots([1.0, 4.0, 5.0, 2.0])
    assert np.sort(np.abs(r + 1))[:2].max() < 1e-15
    assert np.min(np.abs(r + 2)) < 1e-15


def test_precise_roots_of_a_triple_root():
    # (s+1)^3 = s^3 + 3 s^2 + 3 s + 1, exactly representable: all roots exactly -1
    r = precise_roots([1.0, 3.0, 3.0, 1.0])
    assert np.abs(r + 1).max() < 1e-9


# ------------------------------------------------------------------ certificate
def test_certificate_text_and_decay_rate():
    char = np.poly([-1.0, -2.0, -3.0])                      # poles -1, -2, -3
    c = certificate(char, 0.5)
    assert c["hurwitz"] is True and c["decay_rate_certified"] is True
    assert "all closed-loop poles in the open left half plane" in c["text"]
    assert "every pole left of s = -0.5" in c["text"]
    np.testing.assert_allclose(np.sort(c["poles"].real), [-3.0, -2.0, -1.0], atol=1e-14)
    c = certificate(char, 1.5)                               # pole -1 is right of -1.5
    assert c["hurwitz"] is True and c["decay_rate_certified"] is False
    assert "NOT every pole left of s = -1.5" in c["text"]
    c = certificate(char, 1.0)                               # pole exactly on the line: not strictly left
    assert c["decay_rate_certified"] is False
    c = certificate(np.poly([1.0, -2.0]))
    assert c["hurwitz"] is False and c["decay_rate_certified"] is None
    assert "NOT stable" in c["text"]


def test_certified_column_matches_mpmath():
    plant = TransferFunction([1.0], [1.0, 3.0, 2.0, 0.0])     # 1/(s(s+1)(s+2)), critical gain 6
    gains = np.array([[1.0], [5.9], [6.1], [20.0]])
    df = evaluate_controllers(plant, gains, np.ones((4, 1)), {"min_decay_rate": 0.1}, EvalOptions(certify=True))
    truth = [bool(np.all(mp_roots(char_poly([1.0], plant.den, g, [1.0])).real < 0)) for g in gains]
    assert truth == [True, True, False, False]
    np.testing.assert_array_equal(df["certified"], truth)
    np.testing.assert_array_equal(df["internally_stable"], truth)


def test_certify_a_triple_closed_loop_pole():
    # 1/(s(s^2+3s+3)) with unit gain: Delta = (s+1)^3 exactly; stable (poles all at -1)
    df = evaluate_controllers(TransferFunction([1.0], [1.0, 3.0, 3.0, 0.0]), [[1.0]], [[1.0]], {},
                              EvalOptions(certify=True))
    assert bool(df["certified"][0]) is True


# ------------------------------------------------------------------ loop assembly
def test_characteristic_polynomial_matches_numpy():
    pn, pd = np.array([2.0, 1.0]), np.array([1.0, -1.0, 0.5])
    nc = np.array([[1.0, 3.0], [0.0, 2.0]])
    dc = np.array([[1.0, 0.0], [1.0, 5.0]])
    ch = characteristic(pn, pd, nc, dc)
    for i in range(2):
        np.testing.assert_allclose(np.trim_zeros(ch[i], "f"), char_poly(pn, pd, nc[i], dc[i]), rtol=1e-15)


def test_pole_summary_damping_and_decay():
    # poles -1 +- j (zeta = 1/sqrt(2)) and -3; decay rate = -max Re = 1 (definitions)
    poles = closed_loop_poles(np.poly([-1 + 1j, -1 - 1j, -3.0]).real[None])
    stable, damping, decay = pole_summary(poles)
    assert stable[0]
    assert damping[0] == pytest.approx(1 / np.sqrt(2), rel=1e-12)
    assert decay[0] == pytest.approx(1.0, rel=1e-12)
    stable, damping, decay = pole_summary(closed_loop_poles(np.poly([0.5 + 2j, 0.5 - 2j]).real[None]))
    assert not stable[0]
    assert damping[0] == pytest.approx(-0.5 / np.hypot(0.5, 2), rel=1e-12) and decay[0] == pytest.approx(-0.5)


# ------------------------------------------------------------------ hidden modes
def test_cancellation_trap_rejected_and_named():
    # G = 1/(s-1), C = (s-1)/(s(s+1)): L = 1/(s(s+1)) looks fine but Np Nc + Dp Dc =
    # s^3 - 1 has a root at +1 (REFERENCES.md, "cancellation trap", fact of the trade)
    G = TransferFunction([1.0], [1.0, -1.0])
    nc, dc = np.array([[1.0, -1.0]]), np.array([[1.0, 1.0, 0.0]])
    ref = sp.expand(sp.Integer(1) * (s - 1) + (s - 1) * s * (s + 1))
    assert ref == s ** 3 - 1
    df = evaluate_controllers(G, nc, dc)
    assert not df["internally_stable"][0] and not df["feasible"][0]
    msg = df["hidden_modes"][0]
    assert "s=1" in msg and "controller zero" in msg and "unstable plant pole" in msg
    poles = df["closed_loop_poles"][0]
    assert np.min(np.abs(poles - 1.0)) < 1e-9
    mask, txt = hidden_mode_mask(G.num, G.den, nc, dc)
    assert mask.tolist() == [True] and txt == [msg]


def test_controller_pole_on_rhp_plant_zero_named():
    # G = (s-1)/((s+2)(s+3)), C = 1/(s-1): Delta = (s-1)[(s+2)(s+3) + 1], root at +1 (sympy)
    G = TransferFunction([1.0, -1.0], [1.0, 5.0, 6.0])
    nc, dc = np.array([[1.0]]), np.array([[1.0, -1.0]])
    delta = sp.factor(sp.expand((s + 2) * (s + 3) * (s - 1) + (s - 1)))
    assert delta == (s - 1) * (s ** 2 + 5 * s + 7)
    df = evaluate_controllers(G, nc, dc)
    assert not df["internally_stable"][0]
    msg = df["hidden_modes"][0]
    assert "controller pole at s=1" in msg and "plant zero at s=1" in msg


def test_complex_unstable_pole_pair_cancellation_named():
    # plant poles 1 +- 2j cancelled by controller zeros: both named
    G = TransferFunction([1.0], [1.0, -2.0, 5.0])
    nc, dc = np.array([[1.0, -2.0, 5.0]]), np.array([[1.0, 4.0, 0.0]])
    mask, txt = hidden_mode_mask(G.num, G.den, nc, dc)
    assert mask[0]
    assert "s=1+2j" in txt[0] and "s=1-2j" in txt[0]
    assert not evaluate_controllers(G, nc, dc)["internally_stable"][0]


def test_marginal_and_stable_cancellations():
    # integrator plant 1/s with a controller zero at the origin: a hidden marginal mode
    mask, txt = hidden_mode_mask([1.0], [1.0, 0.0], np.array([[1.0, 0.0]]), np.array([[1.0, 1.0]]))
    assert mask[0] and "marginally stable plant pole at s=0" in txt[0]
    # cancelling a stable plant pole is not a hidden unstable mode: G = 1/(s+1), C = (s+1)/s
    G = TransferFunction([1.0], [1.0, 1.0])
    df = evaluate_controllers(G, np.array([[1.0, 1.0]]), np.array([[1.0, 0.0]]))
    assert df["internally_stable"][0] and df["hidden_modes"][0] == ""
    # batched mask: only the cancelling row flagged
    mask, txt = hidden_mode_mask([1.0], [1.0, -1.0], np.array([[1.0, -1.0], [1.0, 2.0]]),
                                 np.array([[1.0, 1.0, 0.0], [1.0, 1.0, 0.0]]))
    assert mask.tolist() == [True, False] and txt[1] == ""


# ------------------------------------------------------------------ well-posedness scale
def test_fast_poles_in_time_constant_form_are_stable():
    # G = 1/((0.001 s + 1)^4 (s + 1)), C = 0.5: leading coefficient 1e-12, constant term 1.5.
    # Every closed-loop root is in the open LHP (mpmath roots at 60 digits), and 1 + L(inf) = 1.
    # (regression: the well-posedness test once compared the leading coefficient of Delta with
    # its largest coefficient and rejected this loop)
    den = np.polymul(np.poly([-1000.0] * 4) / 1e12, [1.0, 1.0])
    G = TransferFunction([1.0], den)
    roots = mp_roots(char_poly([1.0], den, [0.5], [1.0]))
    assert np.all(roots.real < -1.0)
    df = evaluate_controllers(G, [[0.5]], [[1.0]])
    assert bool(df["internally_stable"][0]) is True
