"""PID configuration forms (synth.pid_forms) and the incremental form (synth.incremental).

References: sympy expands every form to a transfer function in s, which must equal the
parallel form's (Astrom & Hagglund, Advanced PID Control, ISA 2006, ch. 3, for the
forms; conversion formulas from memory, re-derived in the module docstring);
scipy.signal.lfilter simulates the position form u[k] of a discrete controller as the
reference for the accumulated velocity form.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import sympy as sp
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from synth.discrete import tustin, zoh
from synth.incremental import incremental_equation, incremental_form
from synth.lti import TransferFunction
from synth.pid_forms import (SeriesForm, forms, forms_from_params, parallel_from_series, parallel_from_standard,
                             series_from_parallel, standard_from_parallel, transfer_coefficients)
from synth.structures import Family

s = sp.symbols("s")
pos = st.floats(min_value=1e-3, max_value=1e3, allow_nan=False, allow_infinity=False)


def _coeffs(expr) -> np.ndarray:
    """Numerator and denominator coefficients of a rational expression, denominator made monic."""
    num, den = sp.fraction(sp.together(sp.expand(expr)))
    pn, pd = sp.Poly(sp.expand(num), s), sp.Poly(sp.expand(den), s)
    lead = pd.LC()
    return (np.array([float(c / lead) for c in pn.all_coeffs()]), np.array([float(c / lead) for c in pd.all_coeffs()]))


def _same_tf(e1, e2):
    (n1, d1), (n2, d2) = _coeffs(e1), _coeffs(e2)
    assert d1.size == d2.size and n1.size == n2.size
    np.testing.assert_allclose(d1, d2, rtol=1e-9, atol=1e-12 * np.abs(d1).max())
    np.testing.assert_allclose(n1, n2, rtol=1e-9, atol=1e-12 * np.abs(n1).max())


def R(x):                      # exact rational of a float64
    return sp.Rational(float(x))


@settings(max_examples=60, deadline=None)
@given(pos, pos, pos, pos, st.sampled_from([1.0, -1.0]))
def test_every_pid_form_expands_to_the_parallel_transfer_function(kp, ki, kd, tf, sign):
    kp, ki, kd = sign * kp, sign * ki, sign * kd
    f = forms("pid", kp, ki, kd, tf)
    parallel = R(kp) + R(ki) / s + R(kd) * s / (R(tf) * s + 1)
    standard = R(f.kc) * (1 + 1 / (R(f.ti) * s) + R(f.td) * s / (1 + s * R(f.td) / R(f.n)))
    _same_tf(standard, parallel)
    assert f.ti > 0 and f.td > 0 and f.n > 0           # times and N stay positive for either sign
    # our coefficient vectors agree with sympy's expansion of the parallel form
    num, den = transfer_coefficients(f)
    _same_tf(sp.Poly(list(map(R, num)), s).as_expr() / sp.Poly(list(map(R, den)), s).as_expr(), parallel)
    # series form: exists exactly when the numerator's zeros are real
    disc = (kp + ki * tf) ** 2 - 4 * ki * (kp * tf + kd)
    if f.series is None:
        assert disc < 0
        zeros = np.roots(num)
        assert np.all(np.abs(zeros.imag) > 0)
    else:
        assert disc >= -1e-9 * (kp + ki * tf) ** 2
        sf = f.series
        assert sf.ti >= sf.td > 0 and sf.tf == tf
        series = R(sf.k) * (1 + 1 / (R(sf.ti) * s)) * (1 + R(sf.td) * s) / (1 + R(sf.tf) * s)
        _same_tf(series, parallel)


@settings(max_examples=40, deadline=None)
@given(pos, pos)
def test_pi_standard_form(kp, ki):
    f = forms("pi", kp, ki)
    _same_tf(R(f.kc) * (1 + 1 / (R(f.ti) * s)), R(kp) + R(ki) / s)
    assert f.series is None and "equals its standard form" in f.series_note


@settings(max_examples=40, deadline=None)
@given(pos, pos, pos, st.floats(min_value=1.0, max_value=1e3))       # N >= 1: filter faster than Td
def test_round_trips_between_forms(kc, ti, td, n):
    kp, ki, kd, tf = parallel_from_standard(kc, ti, td, n)
    back = standard_from_parallel(kp, ki, kd, tf)
    np.testing.assert_allclose(back, (kc, ti, td, n), rtol=1e-12)
    sf = SeriesForm(kc, max(ti, td), min(ti, td), td / n)
    again = series_from_parallel(*parallel_from_series(sf))
    # a double zero (Ti' = Td') is a square root of a vanishing discriminant: sqrt(eps) conditioning
    rtol = 1e-9 if sf.ti > 1.5 * sf.td else 1e-5
    np.testing.assert_allclose([again.k, again.ti, again.td, again.tf], [sf.k, sf.ti, sf.td, sf.tf], rtol=rtol)


def test_series_without_filter_matches_the_textbook_relations():
    # Astrom & Hagglund (2006) ch. 3, series -> standard without filter (formula from memory):
    # Kc = K'(Ti' + Td')/Ti', Ti = Ti' + Td', Td = Ti' Td'/(Ti' + Td'); exists iff Ti >= 4 Td
    K1, Ti1, Td1 = 2.0, 8.0, 0.5
    kp, ki, kd, tf = parallel_from_series(SeriesForm(K1, Ti1, Td1, 0.0))
    kc, ti, td, n = standard_from_parallel(kp, ki, kd, tf)
    assert kc == pytest.approx(K1 * (Ti1 + Td1) / Ti1)
    assert ti == pytest.approx(Ti1 + Td1) and td == pytest.approx(Ti1 * Td1 / (Ti1 + Td1))
    assert n == math.inf
    # the boundary Ti = 4 Td: a double real zero, Ti' = Td' = Ti/2
    sf = series_from_parallel(*parallel_from_standard(1.0, 4.0, 1.0))
    assert sf is not None and sf.ti == pytest.approx(2.0) and sf.td == pytest.approx(2.0)
    assert series_from_parallel(*parallel_from_standard(1.0, 3.9, 1.0)) is None


def test_forms_from_family_params_match_the_family_controller():
    fam = Family(kind="pid")
    params = np.log10([2.5, 1.2, 0.4, 0.05])
    f = forms_from_params("pid", params)
    num, den = fam.controllers(params[None, :])
    n2, d2 = transfer_coefficients(f)
    np.testing.assert_allclose(num[0], n2, rtol=1e-14)
    np.testing.assert_allclose(den[0], d2, rtol=1e-14)
    neg = forms_from_params("pid", params, sign=-1.0)
    assert neg.kc == -2.5 and neg.ti == pytest.approx(2.5 / 1.2) and neg.series.k < 0 < neg.series.ti


# ------------------------------------------------------------------ incremental form
@settings(max_examples=40, deadline=None)
@given(pos, pos, pos, st.floats(min_value=1e-3, max_value=1.0), st.floats(min_value=1e-3, max_value=0.5),
       st.sampled_from(["tustin", "zoh"]), st.integers(0, 2 ** 31))
def test_velocity_form_gives_the_same_u_as_the_position_form(kp, ki, kd, tf, T, method, seed):
    c = TransferFunction(*transfer_coefficients(forms("pid", kp, ki, kd, tf)))
    b, a = tustin(c, T) if method == "tustin" else zoh(c, T)
    inc = incremental_form(b, a)
    assert inc is not None
    bv, av = inc
    e = np.random.default_rng(seed).normal(size=200)
    u_pos = signal.lfilter(b, a, e)                    # reference: the position form
    du = np.zeros_like(e)
    u = np.zeros_like(e)
    for k in range(e.size):                            # the PLC's loop, written out
        acc = sum(bv[i] * e[k - i] for i in range(bv.size) if k - i >= 0)
        acc -= sum(av[i] * du[k - i] for i in range(1, av.size) if k - i >= 0)
        du[k] = acc
        u[k] = (u[k - 1] if k else 0.0) + du[k]
    np.testing.assert_allclose(u, u_pos, rtol=1e-8, atol=1e-8 * np.abs(u_pos).max())


def test_pi_velocity_form_is_the_textbook_one():
    # Tustin PI: u[k] = u[k-1] + (kp + ki T/2) e[k] + (ki T/2 - kp) e[k-1] (bilinear rule, common practice)
    kp, ki, T = 2.0, 3.0, 0.1
    b, a = tustin(TransferFunction([kp, ki], [1.0, 0.0]), T)
    bv, av = incremental_form(b, a)
    np.testing.assert_allclose(bv, [kp + ki * T / 2, ki * T / 2 - kp], rtol=1e-12)
    np.testing.assert_allclose(av, [1.0], rtol=1e-12)
    assert incremental_equation(bv, av).startswith("du[k] = +2.15 e[k] -1.85 e[k-1]")


def test_no_integrator_no_velocity_form():
    b, a = tustin(TransferFunction([1.0, 2.0], [1.0, 10.0]), 0.01)
    assert incremental_form(b, a) is None
