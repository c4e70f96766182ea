"""Closed-loop poles, internal stability, hidden modes and the exact certificate.

For P = Np/Dp and C = Nc/Dc (gain inside Nc) the loop is internally stable iff
every root of the unreduced characteristic polynomial Dp*Dc + Np*Nc lies in the
open left half plane (Doyle, Francis & Tannenbaum, *Feedback Control Theory*,
1992, ch. 3). Nothing is cancelled before the test.
"""

from __future__ import annotations

from fractions import Fraction
from math import comb

import mpmath
import numpy as np

from ..lti import batch_add, batch_conv, batch_polyval, batch_roots, trim


def characteristic(np_, dp, nc: np.ndarray, dc: np.ndarray) -> np.ndarray:
    """Batched unreduced characteristic polynomial Dp*Dc + Np*Nc, shape (N, n+1)."""
    return batch_add(batch_conv(dc, dp), batch_conv(nc, np_))


def pole_summary(poles: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(stable, min damping, decay rate) from an (N, n) NaN-padded pole array."""
    valid = ~np.isnan(poles)
    re = np.where(valid, poles.real, -np.inf)
    mag = np.abs(poles)
    with np.errstate(invalid="ignore", divide="ignore"):
        zeta = np.where(valid, -poles.real / np.where(mag > 0, mag, 1.0), np.inf)
        zeta = np.where(valid & (mag == 0), 0.0, zeta)
    maxre = re.max(axis=1) if poles.shape[1] else np.full(poles.shape[0], -np.inf)
    stable = maxre < 0
    damping = zeta.min(axis=1) if poles.shape[1] else np.full(poles.shape[0], 1.0)
    damping = np.where(np.isinf(damping), 1.0, damping)  # no finite poles: pure gain loop
    return stable, damping, -maxre


def closed_loop_poles(char: np.ndarray) -> np.ndarray:
    """Batched roots of the characteristic polynomials (companion eigenvalues), NaN padded."""
    return batch_roots(char)


def well_posed(np_, dp, nc: np.ndarray, dc: np.ndarray) -> np.ndarray:
    """1 + L(inf) != 0: the leading terms of Dp*Dc and Np*Nc do not cancel.

    Only a biproper loop can fail; for each row the two coefficients of that row's
    full degree are compared with each other (relative 1e-12), not with the rest of
    the polynomial, whose coefficients may span many decades.
    """
    a = batch_conv(dc, dp)
    b = batch_conv(nc, np_)
    m = max(a.shape[1], b.shape[1])
    a = np.pad(a, ((0, 0), (m - a.shape[1], 0)))
    b = np.pad(b, ((0, 0), (m - b.shape[1], 0)))
    first = np.argmax((a != 0) | (b != 0), axis=1)      # full degree of each row
    rows = np.arange(a.shape[0])
    la, lb = a[rows, first], b[rows, first]
    return np.abs(la + lb) > 1e-12 * (np.abs(la) + np.abs(lb))


# ------------------------------------------------------------------ hidden modes
def _near_root(poly: np.ndarray, point: complex) -> np.ndarray:
    """Rows of ``poly`` (N, m) that vanish at ``point`` to within a relative 1e-7."""
    val = np.abs(batch_polyval(poly, np.full(poly.shape[0], point)))
    powers = np.abs(point) ** np.arange(poly.shape[1] - 1, -1, -1)
    scale = np.abs(poly) @ powers
    return val <= 1e-7 * np.maximum(scale, 1e-300)


def hidden_mode_mask(plant_num, plant_den, nc: np.ndarray, dc: np.ndarray) -> tuple[np.ndarray, list]:
    """Which candidates cancel a plant pole/zero at or right of the imaginary axis.

    Returns a boolean mask (N,) and a list of per-candidate descriptions (empty
    string where none). Only plant roots with Re >= 0 can hide an unstable mode,
    so the test evaluates the controller polynomials at those few points.
    """
    n = nc.shape[0]
    msgs: list[list[str]] = [[] for _ in range(n)]
    mask = np.zeros(n, dtype=bool)
    pz = np.roots(trim(plant_num)) if trim(plant_num).size > 1 else []
    pp = np.roots(trim(plant_den)) if trim(plant_den).size > 1 else []
    for roots, ctrl, what, other in ((pp, nc, "zero", "pole"), (pz, dc, "pole", "zero")):
        for r in roots:
            if r.real < -1e-9 * max(1.0, abs(r)):
                continue
            if abs(r.imag) < 1e-9 * max(1.0, abs(r)):
                r = complex(r.real, 0.0)
            hit = _near_root(ctrl, r)
            mask |= hit
            kind = "unstable" if r.real > 1e-9 * max(1.0, abs(r)) else "marginally stable"
            for i in np.flatnonzero(hit):
                msgs[i].append(f"controller {what} at s={_fmt(r)} cancels {kind} plant {other} at s={_fmt(r)}")
    return mask, ["; ".join(m) for m in msgs]


def _fmt(z: complex) -> str:
    if abs(z.imag) < 1e-12 * max(1.0, abs(z)):
        return f"{z.real:.6g}"
    return f"{z.real:.6g}{'+' if z.imag >= 0 else '-'}{abs(z.imag):.6g}j"


# ------------------------------------------------------------- exact certificate
def routh_first_column(coeffs) -> list[Fraction] | None:
    """First column of the Routh array in exact rational arithmetic.

    ``coeffs`` are floats (each float64 is an exact rational) or Fractions.
    Returns None when a zero appears in the first column: then the polynomial is
    not Hurwitz, it has a root on the imaginary axis or in the right half plane
    (Routh 1877, Hurwitz 1895; Gantmacher, *The Theory of Matrices*, vol. 2, 1959, ch. XV).
    """
    c = [x if isinstance(x, Fraction) else Fraction(float(x)) for x in coeffs]
    while len(c) > 1 and c[0] == 0:
        c = c[1:]
    n = len(c) - 1
    if n == 0:
        return c if c[0] != 0 else None
    rows = [c[0::2], c[1::2]]
    width = len(rows[0])
    rows[1] = rows[1] + [Fraction(0)] * (width - len(rows[1]))
    col = [rows[0][0], rows[1][0]]
    if col[1] == 0:
        return None
    for _ in range(n - 1):
        a, b = rows[-2], rows[-1]
        new = [(b[0] * a[j + 1] - a[0] * b[j + 1]) / b[0] for j in range(width - 1)] + [Fraction(0)]
        rows.append(new)
        col.append(new[0])
        if new[0] == 0:
            return None
    return col


def is_hurwitz_exact(coeffs) -> bool:
    """Exact verdict: every root in the open left half plane (first column of one sign)."""
    col = routh_first_column(coeffs)
    if col is None:
        return False
    s0 = col[0] > 0
    return all((x > 0) == s0 for x in col)


def shift_exact(coeffs, alpha: float) -> list[Fraction]:
    """Exact coefficients of p(s - alpha) for a float alpha (its exact rational value)."""
    c = [Fraction(float(x)) for x in trim(coeffs)]
    a = Fraction(float(alpha))
    n = len(c) - 1
    out = [Fraction(0)] * (n + 1)
    for i, ci in enumerate(c):
        k = n - i
        for j in range(k + 1):
            out[n - j] += ci * comb(k, j) * (-a) ** (k - j)
    return out


def precise_roots(coeffs, digits: int = 40) -> np.ndarray:
    """Roots from mpmath's polyroots at ``digits`` significant digits, rounded to complex128.

    Repeated roots slow the Durand-Kerner iteration down; when it does not converge,
    the repeated factors are split off exactly first (sympy square-free factorisation
    over the rationals, each float being an exact rational) and each factor is solved.
    """
    c = trim(coeffs)
    if c.size <= 1:
        return np.zeros(0, complex)
    try:
        with mpmath.workdps(digits):
            r = mpmath.polyroots([mpmath.mpf(float(x)) for x in c], maxsteps=400, extraprec=4 * digits)
        return np.array([complex(x) for x in r])
    except mpmath.libmp.NoConvergence:
        import sympy
        s = sympy.symbols("s")
        poly = sympy.Poly([sympy.Rational(Fraction(float(x)).numerator, Fraction(float(x)).denominator)
                           for x in c], s)
        out = []
        for factor, mult in sympy.sqf_list(poly)[1]:
            coeffs_f = [float(x) for x in factor.all_coeffs()]
            with mpmath.workdps(digits):
                rr = mpmath.polyroots(coeffs_f, maxsteps=2000, extraprec=8 * digits) if len(coeffs_f) > 1 else []
            out += [complex(x) for x in rr] * mult
        return np.array(out)


def certificate(char, decay_rate: float | None = None, roots: bool = True) -> dict:
    """Exact Routh-Hurwitz verdict on the characteristic polynomial and on its shift.

    Returns ``{"hurwitz": bool, "decay_rate_certified": bool | None, "poles": ndarray,
    "text": str}``; the decay check certifies every pole left of -decay_rate by the
    Hurwitz test on char(s - decay_rate). ``roots=False`` leaves out the 40-digit poles
    (``poles`` None): the verdict alone is a fraction of their cost.
    """
    hur = is_hurwitz_exact(trim(char))
    dec = None
    if decay_rate is not None and decay_rate > 0:
        dec = is_hurwitz_exact(shift_exact(char, decay_rate))
    poles = precise_roots(char) if roots else None
    text = ("exact Routh-Hurwitz test (rational arithmetic): all closed-loop poles in the open left half plane"
            if hur else "exact Routh-Hurwitz test (rational arithmetic): NOT stable")
    if dec is not None:
        text += (f"; every pole left of s = -{decay_rate:g}" if dec
                 else f"; NOT every pole left of s = -{decay_rate:g}")
    return {"hurwitz": hur, "decay_rate_certified": dec, "poles": poles, "text": text}
