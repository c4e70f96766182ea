"""Tests for synth.expr: the rational-expression parser.

Numeric checks name their outside reference: sympy exact polynomial expansion
(sympy.Poly on expressions built directly from the same factors, never by
parsing our text) or hand expansion.
"""

import numpy as np
import pytest
import sympy
from hypothesis import given, settings, strategies as st

from synth.expr import MAX_LENGTH_CHARS, ExpressionError, parse_rational

S = sympy.Symbol("s")


def coeffs(expr) -> np.ndarray:
    """Reference coefficients, descending powers: sympy exact polynomial expansion."""
    return np.array([float(c) for c in sympy.Poly(sympy.expand(expr), S).all_coeffs()])


# -------------------------------------------------------------- random factors
# A factor is (text, sympy expression). Coefficients are small integers or halves,
# so the sympy reference is exact and the float result must match to rounding.
coef = st.sampled_from([-3, -2, -1, 1, 2, 3, 5]).map(sympy.Integer) | st.sampled_from(
    [sympy.Rational(1, 2), sympy.Rational(-5, 2), sympy.Rational(3, 4)])


def num_text(c) -> str:
    return str(c) if c.q == 1 else str(float(c))


@st.composite
def linear_or_quadratic(draw):
    a, b = draw(coef), draw(coef)
    if draw(st.booleans()):
        c = draw(coef)
        text = f"({num_text(a)}*s^2 + ({num_text(b)})*s + ({num_text(c)}))"
        return text, a * S**2 + b * S + c
    text = f"({num_text(a)}*s + ({num_text(b)}))"
    return text, a * S + b


@st.composite
def power_factor(draw):
    text, expr = draw(linear_or_quadratic())
    k = draw(st.integers(1, 3))
    op = draw(st.sampled_from(["^", "**"]))
    return (text if k == 1 else f"{text}{op}{k}"), expr**k


@st.composite
def product(draw):
    """Factors joined by '*' or by juxtaposition (implicit multiplication)."""
    factors = draw(st.lists(power_factor(), min_size=1, max_size=4))
    text, expr = factors[0]
    for t, e in factors[1:]:
        text += draw(st.sampled_from(["*", "", " ", " * "])) + t
        expr *= e
    return text, expr


@settings(max_examples=150, deadline=None)
@given(k=coef, num=product(), den=product(), implicit=st.booleans())
def test_products_match_sympy_expansion(k, num, den, implicit):
    # reference: sympy exact polynomial expansion of the same factors
    gain = num_text(k)
    text = f"{gain}{'' if implicit else '*'}{num[0]}/({den[0]})"
    tf = parse_rational(text)
    ref_num, ref_den = coeffs(k * num[1]), coeffs(den[1])
    assert tf.num.shape == ref_num.shape and tf.den.shape == ref_den.shape
    np.testing.assert_allclose(tf.num, ref_num, rtol=1e-12, atol=1e-12 * np.abs(ref_num).max())
    np.testing.assert_allclose(tf.den, ref_den, rtol=1e-12, atol=1e-12 * np.abs(ref_den).max())
    assert tf.delay == 0.0


@settings(max_examples=100, deadline=None)
@given(a=product(), b=product(), c=product(), d=product(), minus=st.booleans())
def test_sum_of_fractions_is_cross_multiplied_without_cancelling(a, b, c, d, minus):
    # reference: sympy exact expansion of (a d +- c b) / (b d), the documented unreduced form
    op = "-" if minus else "+"
    text = f"{a[0]}/({b[0]}) {op} {c[0]}/({d[0]})"
    tf = parse_rational(text)
    sign = -1 if minus else 1
    same_den = sympy.expand(b[1]) == sympy.expand(d[1])
    if same_den:
        ref_num, ref_den = coeffs(a[1] + sign * c[1]), coeffs(b[1])
    else:
        ref_num, ref_den = coeffs(a[1] * d[1] + sign * c[1] * b[1]), coeffs(b[1] * d[1])
    # trim leading zeros of the reference the way a polynomial is trimmed
    nz = np.flatnonzero(ref_num)
    ref_num = ref_num[nz[0]:] if nz.size else np.zeros(1)
    np.testing.assert_allclose(tf.den, ref_den, rtol=1e-12, atol=1e-12 * np.abs(ref_den).max())
    scale = max(np.abs(ref_num).max(), 1.0)
    np.testing.assert_allclose(tf.num, ref_num, rtol=1e-10, atol=1e-10 * scale)


# -------------------------------------------------------------- hand cases
# reference for each row: hand expansion of the written polynomial
@pytest.mark.parametrize("text, num, den, delay", [
    ("2(s+1)", [2, 2], [1], 0.0),
    ("2s", [2, 0], [1], 0.0),
    ("2 s", [2, 0], [1], 0.0),
    ("(s+1)(s+2)", [1, 3, 2], [1], 0.0),
    ("s(s+1)", [1, 1, 0], [1], 0.0),
    ("s s", [1, 0, 0], [1], 0.0),
    ("3exp(-s)", [3], [1], 1.0),
    ("(s+1)^-2", [1], [1, 2, 1], 0.0),
    ("(s+1)**-1", [1], [1, 1], 0.0),
    ("s**3", [1, 0, 0, 0], [1], 0.0),
    ("-s^2", [-1, 0, 0], [1], 0.0),          # unary minus binds looser than a power
    ("(-s)^2", [1, 0, 0], [1], 0.0),
    ("2^-1", [1], [2], 0.0),            # kept as 1/2, not folded
    ("--s", [1, 0], [1], 0.0),
    ("+s", [1, 0], [1], 0.0),
    ("2*-s", [-2, 0], [1], 0.0),
    ("1e-3s + 1", [1e-3, 1], [1], 0.0),
    ("1.5E+2", [150], [1], 0.0),
    (".5/s", [0.5], [1, 0], 0.0),
    ("2*(s+3)/((s-1)*(s+4))", [2, 6], [1, 3, -4], 0.0),
    ("1.8*exp(-4*s)/(60*s+1)", [1.8], [60, 1], 4.0),
    ("exp(-0.3*s)", [1], [1], 0.3),
    ("exp(-s/2)", [1], [1], 0.5),
    ("exp(-2 s)", [1], [1], 2.0),
    ("exp(0)", [1], [1], 0.0),
    ("exp(-s)*exp(-2*s)", [1], [1], 3.0),
    ("exp(-3s)/exp(-s)", [1], [1], 2.0),
    ("exp(-s)^2", [1], [1], 2.0),
    ("exp(-s)/(s+1) + 2exp(-s)/(s+1)", [3], [1, 1], 1.0),
    ("(s+1)/(s+1)", [1, 1], [1, 1], 0.0),      # never cancelled
    ("1/(s+1) + 2/(s+1)", [3], [1, 1], 0.0),   # equal denominators are added directly
    ("1 + 1/(s+1)", [1, 2], [1, 1], 0.0),
    ("s - s", [0], [1], 0.0),
    ("0 + exp(-s)", [1], [1], 1.0),            # a zero term carries no dead time
    ("  ( s + 1 )\t/\n( s + 2 ) ", [1, 1], [1, 2], 0.0),
])
def test_hand_cases(text, num, den, delay):
    tf = parse_rational(text)
    np.testing.assert_allclose(tf.num, num, rtol=1e-15)
    np.testing.assert_allclose(tf.den, den, rtol=1e-15)
    assert tf.delay == pytest.approx(delay, rel=1e-15)


def test_no_negative_zero_coefficients():
    assert not np.any(np.signbit(parse_rational("-s^2").num[1:]))


# -------------------------------------------------------------- errors
@pytest.mark.parametrize("text, position, words", [
    ("", 1, "empty"),
    ("   ", 4, "empty"),
    ("s +", 4, "end of expression"),
    ("(s+1", 5, "expected ')'"),
    ("s+1)", 4, "unmatched ')'"),
    ("1/0", 2, "division by zero"),
    ("1/(s-s)", 2, "division by zero"),
    ("0^-1", 2, "division by zero"),
    ("s^2^3", 4, "chained powers"),
    ("s^1.5", 3, "integer"),
    ("s^x", 3, "integer"),
    ("s^51", 3, "exponent 51"),
    ("s^-51", 4, "exponent -51"),
    ("2 3", 3, "missing operator"),
    ("(s+1)2", 6, "missing operator"),
    ("1e999", 1, "floating-point range"),
    ("x+1", 1, "unknown name 'x'"),
    ("s2", 1, "unknown name 's2'"),
    ("2*sin(s)", 3, "unknown name 'sin'"),
    ("s@2", 2, "unexpected character '@'"),
    ("s²", 2, "unexpected character"),
    ("exp s", 5, "expected '(' after 'exp'"),
    ("exp(s)", 1, "non-causal"),
    ("exp(1-s)", 1, "-theta*s"),
    ("exp(-s*s)", 1, "-theta*s"),
    ("exp(-1/s)", 1, "-theta*s"),
    ("exp(exp(-s))", 1, "-theta*s"),
    ("1/exp(-s)", 1, "non-causal"),
    ("exp(-s)^-1", 1, "non-causal"),
    ("exp(-s) + 1", 9, "different dead times"),
    ("exp(-s)/(s+1) - exp(-2s)", 15, "different dead times"),
    ("((s+1)^50)^50", 11, "degree"),
    ("(" * 70 + "s" + ")" * 70, 65, "nested"),
])
def test_errors_name_problem_and_position(text, position, words):
    with pytest.raises(ExpressionError) as info:
        parse_rational(text)
    assert info.value.position == position
    assert f"at position {position}" in str(info.value)
    assert words in str(info.value)
    assert isinstance(info.value, ValueError)


def test_exponent_limit_is_inclusive():
    # reference: binomial theorem, coefficients of (s+1)^50 are C(50, k); sympy.binomial
    tf = parse_rational("(s+1)^50")
    np.testing.assert_allclose(tf.num, [float(sympy.binomial(50, k)) for k in range(51)], rtol=1e-12)
    assert parse_rational("(s+1)^-50").den.size == 51


def test_length_limit():
    ok = "+".join(["s"] * (MAX_LENGTH_CHARS // 2))   # 9999 characters
    assert len(ok) <= MAX_LENGTH_CHARS
    assert parse_rational(ok).num[0] == MAX_LENGTH_CHARS // 2   # reference: counting terms
    with pytest.raises(ExpressionError, match="longer than 10000"):
        parse_rational("s" + " " * MAX_LENGTH_CHARS)


@pytest.mark.parametrize("text", [
    "__import__('os')", "__import__(\"os\").system(\"true\")", "os.system('true')", "s.real",
    "lambda: 1", "[s]", "{1}", "s; 1", "s if 1 else 2", "1 == 1", "s, 1", "`s`", "$s", "s % 2",
])
def test_no_eval_python_syntax_is_rejected(text):
    with pytest.raises(ExpressionError):
        parse_rational(text)


def test_non_string_input():
    with pytest.raises(ExpressionError, match="expected a string"):
        parse_rational(3)


@settings(max_examples=400, deadline=None)
@given(st.text(alphabet="s0123456789.eE+-*/^()exp _x,", max_size=40))
def test_fuzz_only_expression_errors(text):
    """Any text either parses or raises ExpressionError with a position inside (or just past) it."""
    try:
        tf = parse_rational(text)
    except ExpressionError as e:
        assert 1 <= e.position <= len(text) + 1
    else:
        assert np.all(np.isfinite(tf.num)) and np.all(np.isfinite(tf.den)) and tf.delay >= 0
