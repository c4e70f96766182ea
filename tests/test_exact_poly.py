"""Exact polynomial arithmetic and Sturm counts (synth.evaluate.exact_poly) against sympy.

References: sympy's exact polynomial remainder, gcd and real-root isolation
(sympy.Poly.rem, sympy.gcd, sympy.real_roots) as independent computations; Sturm's
theorem (Sturm 1835): the count is of distinct real roots in (lo, hi].
"""

from __future__ import annotations

from fractions import Fraction as F

import sympy
from hypothesis import given, settings, strategies as st

from synth.evaluate.exact_poly import padd, pgcd, pmul, prem, ptrim, sturm_count

x = sympy.Symbol("x")
coeffs = st.lists(st.integers(-6, 6), min_size=2, max_size=6).filter(lambda c: c[0] != 0)


def _sym(p):
    return sympy.Poly([sympy.Rational(c.numerator, c.denominator) for c in p], x)


def _fr(c):
    return [F(v) for v in c]


@given(st.lists(st.integers(-3, 3), min_size=1, max_size=4), st.lists(st.integers(-3, 3), min_size=1, max_size=4))
@settings(max_examples=60, deadline=None)
def test_roots_product_counts_distinct_real_roots_like_sympy(r1, r2):
    # a product of linear factors with repeated roots: Sturm counts each distinct root once
    p = [F(1)]
    for r in r1 + r2:
        p = pmul(p, [F(1), F(-r)])
    lo, hi = F(-2), F(2)
    want = len({r for r in sympy.real_roots(_sym(p)) if lo < r <= hi})
    assert sturm_count(p, lo, hi) == want


@given(coeffs, st.integers(-5, 5), st.integers(1, 6))
@settings(max_examples=60, deadline=None)
def test_sturm_count_matches_sympy_real_roots(c, lo, width):
    p = _fr(c)
    lo, hi = F(lo), F(lo + width)
    want = len({r for r in sympy.real_roots(_sym(p)) if lo < r <= hi})
    assert sturm_count(p, lo, hi) == want


@given(coeffs, coeffs)
@settings(max_examples=60, deadline=None)
def test_remainder_gcd_and_sum_match_sympy(a, b):
    p, q = _fr(a), _fr(b)
    assert _sym(prem(p, q)) == _sym(p).rem(_sym(q))
    g = _sym(pgcd(p, q))
    assert g.monic() == sympy.gcd(_sym(p), _sym(q)).monic()
    assert _sym(padd(p, q)) == _sym(p) + _sym(q)
    assert ptrim([F(0), F(0), F(3)]) == [F(3)] and ptrim([F(0)]) == [F(0)]


def test_multiple_root_at_the_end_point_counts_once():
    # (x-2)^2 (x-3) on (-2, 2]: one distinct root, x = 2 (found by hypothesis: p's own Sturm
    # chain vanishes entirely at a multiple root and counted 2)
    p = pmul(pmul([F(1), F(-2)], [F(1), F(-2)]), [F(1), F(-3)])
    assert sturm_count(p, F(-2), F(2)) == 1
    assert sturm_count(p, F(2), F(3)) == 1 and sturm_count(p, F(-2), F(3)) == 2
