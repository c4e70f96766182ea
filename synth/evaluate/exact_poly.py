"""Exact polynomial arithmetic on lists of Fractions (descending powers), and Sturm counts.

Shared by the exact certificates: the dead-time crossing polynomial (delay.py) and the
robust segment test (robust.py). Pure Python on ``fractions.Fraction``: no rounding
anywhere, so a sign or a root count computed here is a proof for the given coefficients.
Sturm's theorem: C. Sturm, "Mémoire sur la résolution des équations numériques", 1835.
"""

from __future__ import annotations

from fractions import Fraction


def ptrim(p) -> list[Fraction]:
    """p without leading zeros (the zero polynomial stays [0])."""
    p = list(p)
    i = 0
    while i < len(p) - 1 and p[i] == 0:
        i += 1
    return p[i:]


def padd(p, q) -> list[Fraction]:
    n = max(len(p), len(q))
    p = [Fraction(0)] * (n - len(p)) + list(p)
    q = [Fraction(0)] * (n - len(q)) + list(q)
    return ptrim([x + y for x, y in zip(p, q)])


def pmul(p, q) -> list[Fraction]:
    out = [Fraction(0)] * (len(p) + len(q) - 1)
    for i, x in enumerate(p):
        if x:
            for j, y in enumerate(q):
                out[i + j] += x * y
    return out


def prem(p, q) -> list[Fraction]:
    """Remainder of p / q."""
    p = list(p)
    while len(p) >= len(q) and any(p):
        f = p[0] / q[0]
        for i in range(len(q)):
            p[i] -= f * q[i]
        p = p[1:]
    return ptrim(p) if p else [Fraction(0)]


def pdiv(p, q) -> list[Fraction]:
    """Quotient of p / q."""
    p = list(p)
    out = []
    while len(p) >= len(q):
        f = p[0] / q[0]
        out.append(f)
        for i in range(len(q)):
            p[i] -= f * q[i]
        p = p[1:]
    return ptrim(out) if out else [Fraction(0)]


def pderiv(p) -> list[Fraction]:
    n = len(p) - 1
    return [c * (n - i) for i, c in enumerate(p[:-1])] or [Fraction(0)]


def pgcd(p, q) -> list[Fraction]:
    while any(q):
        p, q = q, prem(p, q)
    return p


def pval(p, x) -> Fraction:
    v = Fraction(0)
    for c in p:
        v = v * x + c
    return v


def sturm_sequence(p) -> list[list[Fraction]]:
    """Sturm chain p, p', -rem(...), ... (Sturm 1835)."""
    seq = [ptrim(p), ptrim(pderiv(p))]
    while len(seq[-1]) > 1 or seq[-1][0] != 0:
        r = prem(seq[-2], seq[-1])
        if not any(r):
            break
        seq.append([-c for c in r])
        if len(seq[-1]) == 1:
            break
    return seq


def variations(seq, x) -> int:
    """Sign changes of the chain at x (zeros skipped)."""
    vals = [v for v in (pval(p, x) for p in seq) if v != 0]
    return sum(1 for u, v in zip(vals, vals[1:]) if (u > 0) != (v > 0))


def variations_inf(seq) -> int:
    """Sign changes of the chain at +infinity (the leading coefficients)."""
    vals = [p[0] for p in seq if p[0] != 0]
    return sum(1 for u, v in zip(vals, vals[1:]) if (u > 0) != (v > 0))


def squarefree(p) -> list[Fraction]:
    """p / gcd(p, p'): the same distinct roots, each simple."""
    p = ptrim(p)
    if len(p) <= 2:
        return p
    return pdiv(p, pgcd(p, pderiv(p)))


def sturm_count(p, lo: Fraction, hi: Fraction) -> int:
    """Number of distinct real roots of p in (lo, hi] (Sturm's theorem).

    The chain is that of the square-free part: with a multiple root at an end point every
    member of p's own chain vanishes there and the count goes wrong ((x-2)^2 (x-3) on
    (-2, 2] counted 2)."""
    p = squarefree(p)
    if len(p) <= 1:
        return 0
    seq = sturm_sequence(p)
    return variations(seq, lo) - variations(seq, hi)
