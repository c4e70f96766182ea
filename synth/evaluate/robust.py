"""Robust stability over a coefficient box and worst-case metrics over a model set.

**Theorem used.** For a plant N(s)/D(s) whose coefficients vary independently in
intervals and a fixed controller Nc/Dc in a unity loop, the characteristic family
is delta = Nc*N + Dc*D. This is the setting of the generalized Kharitonov theorem
(Chapellat & Bhattacharyya, "A generalization of Kharitonov's theorem: robust
stability of interval plants", IEEE TAC 34(3), 1989; Bhattacharyya, Chapellat &
Keel, *Robust Control: The Parametric Approach*, 1995, ch. 7): with constant
degree over the box, the whole family is Hurwitz if and only if every polynomial
of the extremal set

    Nc*S_N + Dc*K_D^j   and   Nc*K_N^i + Dc*S_D   (i, j = 1..4),

is Hurwitz, where K^i are the four Kharitonov polynomials of N or D and S one of
the four Kharitonov segments (the pairs of Kharitonov polynomials sharing their
even or their odd part). Derivation, in brief: at s = jw the values of an
interval polynomial fill an axis-parallel rectangle with the four Kharitonov
values at its corners (Dasgupta 1988); delta(jw) fills the Minkowski sum of two
rotated rectangles, a convex polygon whose boundary points are each an edge of one
rectangle plus a corner of the other. By zero exclusion (the degree is constant
and the value set leaves 0 for large w), the family loses stability only if 0
reaches that boundary, i.e. only if an extremal segment polynomial has a root on
the imaginary axis. We test all 4 x 4 x 2 = 32 segments (fewer when N or D is
fixed), a superset of the reduced extremal set, so the test is exact either way.

**Segment test, exact.** A segment (1-l)*p0 + l*p1 with Hurwitz end points of
equal leading-coefficient sign is Hurwitz for all l in [0, 1] iff the Hurwitz
determinant H_{n-1}(l) = det((1-l)*H0 + l*H1) has no zero in [0, 1]: roots can
leave the open left half plane only through s = 0 (excluded: the constant term is
linear in l with the same sign at both ends) or through a pair +-jw, where
s_i + s_j = 0 makes H_{n-1} vanish by Orlando's formula (Gantmacher, *The Theory
of Matrices*, vol. 2, 1959, ch. XV). This is Bialas's condition in determinant
form (Bialas, Bull. Polish Acad. Sci. 33, 1985). H_{n-1}(l) has degree <= n-1;
we compute it exactly from n integer-exact determinants (Bareiss elimination on
integer matrices; each float64 is an exact rational) and count its roots in
(0, 1] with a Sturm sequence in rational arithmetic (Sturm 1829).

**Screening.** Inside the search the same extremal set is screened in float64,
batched: vertex roots by companion eigenvalues, and each segment's axis
crossings from Im(p0(jw) conj p1(jw)) = 0 with Re(p0 conj p1) <= 0. Rows that
reach a table or an export are re-certified exactly.
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction
from math import lcm
from typing import Mapping

import numpy as np
import pandas as pd

from ..lti import batch_add, batch_conv, batch_roots
from ..models import CoefficientBox, ModelSet, kharitonov_vertices
from ..requirements import REQUIREMENTS
from . import stability
from .core import EvalOptions, evaluate, evaluate_controllers
from .exact_poly import padd, pmul, ptrim, sturm_count

CERTIFICATE_METHOD = ("generalized Kharitonov theorem (Chapellat & Bhattacharyya 1989): the extremal segments (at most 32), "
                      "each certified by the sign of the Hurwitz determinant H_{n-1} along the segment "
                      "(Bialas 1985; Orlando's formula), exact Sturm count in rational arithmetic")


# ------------------------------------------------------------------ extremal set
def _edges(kh: np.ndarray) -> list[tuple[int, int]]:
    """Kharitonov segments: pairs of distinct Kharitonov polynomials sharing the even or the odd part."""
    asc = kh[:, ::-1]
    out = []
    u = _unique_rows(kh)
    for a in u:
        for b in u:
            if b <= a:
                continue
            if np.array_equal(asc[a], asc[b]):
                continue
            same_even = np.array_equal(asc[a, 0::2], asc[b, 0::2])
            same_odd = np.array_equal(asc[a, 1::2], asc[b, 1::2])
            if same_even or same_odd:
                out.append((a, b))
    return out


def _unique_rows(kh: np.ndarray) -> list[int]:
    keep = []
    for i in range(kh.shape[0]):
        if not any(np.array_equal(kh[i], kh[j]) for j in keep):
            keep.append(i)
    return keep


@dataclass(frozen=True)
class Segment:
    """One extremal segment: which polynomial moves (``"N"`` or ``"D"``), its end points, the fixed corner."""

    moving: str
    a: int          # Kharitonov index (0-based) of the moving end points
    b: int
    fixed: int      # Kharitonov index of the other polynomial

    def label(self) -> str:
        other = "D" if self.moving == "N" else "N"
        return (f"segment [K{self.a + 1}, K{self.b + 1}] of {self.moving} with K{self.fixed + 1} of {other}")


def extremal_set(box: CoefficientBox) -> tuple[np.ndarray, np.ndarray, list[Segment]]:
    """(Kharitonov N (4, m), Kharitonov D (4, n), the extremal segments, deduplicated)."""
    kn = kharitonov_vertices(box.num_lo, box.num_hi)
    kd = kharitonov_vertices(box.den_lo, box.den_hi)
    un, ud = _unique_rows(kn), _unique_rows(kd)
    segs = [Segment("N", a, b, j) for a, b in _edges(kn) for j in ud]
    segs += [Segment("D", a, b, i) for a, b in _edges(kd) for i in un]
    if not segs:   # both fixed: the single vertex, as a degenerate segment
        segs = [Segment("D", 0, 0, 0)]
    return kn, kd, segs


def segment_polys(box: CoefficientBox, cnum: np.ndarray, cden: np.ndarray):
    """End-point characteristic polynomials P0, P1 of shape (N, S, L) and the segment list."""
    kn, kd, segs = extremal_set(box)
    cnum, cden = np.atleast_2d(cnum), np.atleast_2d(cden)

    def char(nrow, drow):
        return batch_add(batch_conv(cnum, nrow), batch_conv(cden, drow))
    p0, p1 = [], []
    for s in segs:
        if s.moving == "N":
            p0.append(char(kn[s.a], kd[s.fixed]))
            p1.append(char(kn[s.b], kd[s.fixed]))
        else:
            p0.append(char(kn[s.fixed], kd[s.a]))
            p1.append(char(kn[s.fixed], kd[s.b]))
    width = max(p.shape[1] for p in p0 + p1)
    pad = lambda p: np.pad(p, ((0, 0), (width - p.shape[1], 0)))   # noqa: E731
    return np.stack([pad(p) for p in p0], axis=1), np.stack([pad(p) for p in p1], axis=1), segs


# ------------------------------------------------------------------ float screen
def _even_odd(p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """p(jw) = A(x) + j w B(x), x = w^2: descending coefficients of A and B per row."""
    asc = p[:, ::-1]
    a, b = asc[:, 0::2].copy(), asc[:, 1::2].copy()
    a[:, 1::2] *= -1
    b[:, 1::2] *= -1
    return a[:, ::-1], b[:, ::-1]


def routh_screen(p: np.ndarray) -> np.ndarray:
    """Float64 Routh test per row (descending coefficients, common length): all roots in Re s < 0.

    Vectorised over rows; a screen only (Routh 1877), the exact verdict is :func:`segment_hurwitz_exact`.
    """
    p = np.atleast_2d(np.asarray(p, float))
    lead = p[:, 0:1]
    ok = lead[:, 0] != 0
    q = p / np.where(lead == 0, 1.0, lead)
    a, b = q[:, 0::2], q[:, 1::2]
    b = np.pad(b, ((0, 0), (0, a.shape[1] - b.shape[1])))
    n = p.shape[1] - 1
    zero = np.zeros((p.shape[0], 1))
    for _ in range(n):
        ok &= b[:, 0] > 0
        b0 = np.where(b[:, 0:1] > 0, b[:, 0:1], 1.0)
        a, b = b, np.hstack([a[:, 1:] - a[:, 0:1] * b[:, 1:] / b0, zero])
    return ok


def box_stable_screen(box: CoefficientBox, cnum: np.ndarray, cden: np.ndarray) -> np.ndarray:
    """Float64 screen of robust stability over the box, (N,) bool, batched over candidates and segments."""
    kn, kd, _ = extremal_set(box)
    cnum, cden = np.atleast_2d(cnum), np.atleast_2d(cden)
    n = cnum.shape[0]
    verts = [batch_add(batch_conv(cnum, kn[i]), batch_conv(cden, kd[j]))
             for i in _unique_rows(kn) for j in _unique_rows(kd)]
    width = max(v.shape[1] for v in verts)
    verts = np.stack([np.pad(v, ((0, 0), (width - v.shape[1], 0))) for v in verts], axis=1)   # (N, V, L)
    lead, const = verts[:, :, 0], verts[:, :, -1]
    ok = (np.all(lead > 0, axis=1) | np.all(lead < 0, axis=1)) & np.all(const * np.sign(lead[:, :1]) > 0, axis=1)
    ok &= routh_screen(verts.reshape(-1, width)).reshape(n, -1).all(axis=1)
    idx = np.flatnonzero(ok)
    if not idx.size:
        return ok
    p0, p1, _ = segment_polys(box, cnum[idx], cden[idx])
    m, s, L = p0.shape
    q0, q1 = p0.reshape(m * s, L), p1.reshape(m * s, L)
    a0, b0 = _even_odd(q0)
    a1, b1 = _even_odd(q1)
    g = batch_add(batch_conv(a0, b1), -batch_conv(a1, b0))        # Im(p0 conj p1) / w, in x = w^2
    h = batch_add(batch_conv(a0, a1), np.pad(batch_conv(b0, b1), ((0, 0), (0, 1))))   # Re(p0 conj p1)
    xr = batch_roots(g)
    real = ~np.isnan(xr) & (np.abs(xr.imag) <= 1e-6 * np.maximum(np.abs(xr), 1e-300)) & (xr.real > 0)
    x = np.where(real, xr.real, 0.0)
    hv, habs = np.zeros_like(x), np.zeros_like(x)
    for j in range(h.shape[1]):
        hv = hv * x + h[:, j:j + 1]
        habs = habs * x + np.abs(h[:, j:j + 1])
    cross = real & (hv <= 1e-9 * habs)        # Re(p0 conj p1) <= 0 up to rounding: a crossing on the segment
    ok[idx] = ~cross.any(axis=1).reshape(m, s).any(axis=1)
    return ok


# ------------------------------------------------------------------ exact certificate
def _ints(coeffs) -> list[int]:
    """Positive integer multiple of a float polynomial (exact: every float64 is a dyadic rational)."""
    fr = [Fraction(float(c)) for c in coeffs]
    m = lcm(*[f.denominator for f in fr]) if fr else 1
    return [int(f * m) for f in fr]


def _hurwitz_matrix(c: list, order: int) -> list[list]:
    """Leading order x order block of the Hurwitz matrix of c (descending coefficients)."""
    n = len(c) - 1
    return [[c[2 * j - i + 1] if 0 <= 2 * j - i + 1 <= n else 0 for j in range(order)] for i in range(order)]


def _bareiss_det(m: list[list[int]]) -> int:
    """Exact determinant of an integer matrix by fraction-free elimination (Bareiss 1968)."""
    a = [row[:] for row in m]
    n = len(a)
    if n == 0:
        return 1
    sign, prev = 1, 1
    for k in range(n - 1):
        if a[k][k] == 0:
            swap = next((r for r in range(k + 1, n) if a[r][k] != 0), None)
            if swap is None:
                return 0
            a[k], a[swap] = a[swap], a[k]
            sign = -sign
        for i in range(k + 1, n):
            for j in range(k + 1, n):
                a[i][j] = (a[i][j] * a[k][k] - a[i][k] * a[k][j]) // prev
        prev = a[k][k]
    return sign * a[n - 1][n - 1]


def _interpolate(xs: list[int], ys: list[int]) -> list[Fraction]:
    """Exact polynomial (descending) through the points (Newton divided differences)."""
    n = len(xs)
    coef = [Fraction(y) for y in ys]
    for j in range(1, n):
        for i in range(n - 1, j - 1, -1):
            coef[i] = (coef[i] - coef[i - 1]) / (xs[i] - xs[i - j])
    poly = [Fraction(0)]
    for i in range(n - 1, -1, -1):       # Horner on the Newton form
        poly = padd(pmul(poly, [Fraction(1), Fraction(-xs[i])]), [coef[i]])
    return ptrim(poly)


def segment_hurwitz_exact(p0, p1) -> tuple[bool, str, float | None]:
    """Exact verdict on the segment (1-l) p0 + l p1, l in [0, 1]: (stable, reason, l of a failure or None)."""
    # one common positive scale keeps the segment's parameterisation (_ints scales each separately)
    f0 = [Fraction(float(x)) for x in p0]
    f1 = [Fraction(float(x)) for x in p1]
    m = lcm(*[f.denominator for f in f0 + f1])
    c0, c1 = [int(f * m) for f in f0], [int(f * m) for f in f1]
    while len(c0) > 1 and c0[0] == 0 and c1[0] == 0:
        c0, c1 = c0[1:], c1[1:]
    if c0[0] == 0 or c1[0] == 0 or (c0[0] > 0) != (c1[0] > 0):
        return False, "the degree drops on the segment (leading coefficient vanishes)", 0.0 if c0[0] == 0 else 1.0
    if c0[0] < 0:
        c0, c1 = [-x for x in c0], [-x for x in c1]
    if not stability.is_hurwitz_exact([Fraction(x) for x in c0]):
        return False, "end point not Hurwitz (exact Routh)", 0.0
    if not stability.is_hurwitz_exact([Fraction(x) for x in c1]):
        return False, "end point not Hurwitz (exact Routh)", 1.0
    n = len(c0) - 1
    if n <= 1 or c0 == c1:
        return True, "end points Hurwitz; first-order or degenerate segment", None
    h0, h1 = _hurwitz_matrix(c0, n - 1), _hurwitz_matrix(c1, n - 1)
    xs = list(range(n))
    ys = [_bareiss_det([[(1 - x) * a + x * b for a, b in zip(r0, r1)] for r0, r1 in zip(h0, h1)]) for x in xs]
    q = _interpolate(xs, ys)
    k = sturm_count(q, Fraction(0), Fraction(1))
    if k == 0:
        return True, "H_{n-1} has no zero on [0, 1] (Sturm count 0)", None
    # locate one zero for the message (float, after the exact verdict)
    r = np.roots([float(x) for x in q])
    r = r[np.abs(r.imag) < 1e-9 * np.maximum(1, abs(r))].real
    r = r[(r >= -1e-12) & (r <= 1 + 1e-12)]
    lam = float(np.clip(r[0], 0, 1)) if r.size else 0.5
    return False, f"H_{{n-1}} vanishes on the segment ({k} zero{'s' if k > 1 else ''} in (0, 1], Sturm count)", lam


def box_certificate(box: CoefficientBox, cnum, cden) -> dict:
    """Exact robust-stability certificate of one controller over the coefficient box.

    Returns ``{"robust_stable": bool, "text": str, "segments": int, "destabilising": dict | None}``;
    a destabilising model is given by its plant coefficients (a vertex or a point on a segment).
    """
    cnum = np.atleast_1d(np.asarray(cnum, float))
    cden = np.atleast_1d(np.asarray(cden, float))
    kn, kd, segs = extremal_set(box)
    p0, p1, _ = segment_polys(box, cnum[None, :], cden[None, :])
    for i, s in enumerate(segs):
        ok, why, lam = segment_hurwitz_exact(p0[0, i], p1[0, i])
        if ok:
            continue
        if s.moving == "N":
            num = (1 - lam) * kn[s.a] + lam * kn[s.b]
            den = kd[s.fixed]
        else:
            num = kn[s.fixed]
            den = (1 - lam) * kd[s.a] + lam * kd[s.b]
        where = ("a vertex" if lam in (0.0, 1.0) else f"a point on the segment (l = {lam:.6g})")
        bad = {"model": f"{where}: {s.label()}", "numerator": [float(x) for x in num],
               "denominator": [float(x) for x in den], "reason": why}
        text = (f"NOT robustly stable over the coefficient box: {why}, on the {s.label()}; destabilising plant "
                f"(numerator {bad['numerator']}, denominator {bad['denominator']}) is {where}. Method: "
                f"{CERTIFICATE_METHOD}")
        return {"robust_stable": False, "text": text, "segments": len(segs), "destabilising": bad}
    return {"robust_stable": True, "segments": len(segs), "destabilising": None,
            "text": f"robustly stable over the whole coefficient box: all {len(segs)} extremal segments Hurwitz. "
                    f"Method: {CERTIFICATE_METHOD}"}


# ------------------------------------------------------------------ worst case over the models
def worst_sense(metric: str, requirements: Mapping[str, float]) -> str | None:
    """"max" when larger values are worse, "min" when smaller are worse, None when not judged."""
    if metric == "bandwidth_rad_s":
        return "min" if "min_bandwidth_rad_s" in requirements else "max"
    if metric == "gain_margin_low_db":
        return "max"
    for r in REQUIREMENTS.values():
        if r.metric == metric:
            return "max" if r.sense == "max" else "min"
    return None


WORST_METRICS = tuple(dict.fromkeys([r.metric for r in REQUIREMENTS.values()]
                                    + ["gain_margin_low_db", "controller_hf_gain"]))


@dataclass(frozen=True, eq=False)
class StackedPlant:
    """Rational plants, one per evaluated row ((R, a) numerators, (R, b) denominators, no dead time).

    The evaluator's batched routines take a plant polynomial or a batch of them
    (row-wise products), so many models and candidates go through one call.
    """

    num: np.ndarray
    den: np.ndarray
    delay: float = 0.0

    def __call__(self, s):
        raise TypeError("a stacked plant has no single frequency response")


def _stack(models, cnum, cden):
    """(StackedPlant of len(models) x c rows, controller rows), model-major."""
    c = cnum.shape[0]
    a = max(m.plant.num.size for m in models)
    b = max(m.plant.den.size for m in models)
    pn = np.array([np.pad(m.plant.num, (a - m.plant.num.size, 0)) for m in models])
    pd_ = np.array([np.pad(m.plant.den, (b - m.plant.den.size, 0)) for m in models])
    return (StackedPlant(np.repeat(pn, c, axis=0), np.repeat(pd_, c, axis=0)),
            np.tile(cnum, (len(models), 1)), np.tile(cden, (len(models), 1)))


def _combine(worst: pd.DataFrame, df: pd.DataFrame, idx: np.ndarray, n_models: int, requirements,
             objectives) -> np.ndarray:
    """Fold ``n_models`` models' rows (model-major, candidates ``idx``) into the running worst case in
    place; returns the per-candidate "stable on all of them" mask."""
    c = idx.size
    for m in set(WORST_METRICS) | set(objectives):
        if m not in df or m not in worst:
            continue
        sense = worst_sense(m, requirements) or "max"
        b = df[m].to_numpy(float).reshape(n_models, c)
        b = b.max(axis=0) if sense == "max" else b.min(axis=0)     # NaN (unstable) propagates
        col = worst[m].to_numpy(float).copy()
        a = col[idx]
        with np.errstate(invalid="ignore"):
            col[idx] = np.where(np.isnan(a) | np.isnan(b), np.nan, np.maximum(a, b) if sense == "max"
                                else np.minimum(a, b))
        worst[m] = col
    for key in requirements:
        name = f"slack_{key}"
        col = worst[name].to_numpy(float).copy()
        col[idx] = np.minimum(col[idx], df[name].to_numpy(float).reshape(n_models, c).min(axis=0))
        worst[name] = col
        worst[f"met_{key}"] = col >= 0
    return df["internally_stable"].to_numpy(bool).reshape(n_models, c).all(axis=0)


def variant_screen(variants, cnum, cden, pade_order: int) -> np.ndarray:
    """Cheap stability screen of the variants (poles, Padé for dead time): (N,) bool."""
    ok = np.ones(cnum.shape[0], bool)
    for _, tf in variants:
        rp = tf.with_pade(pade_order) if tf.delay else tf
        poles = stability.closed_loop_poles(stability.characteristic(rp.num, rp.den, cnum, cden))
        ok &= stability.pole_summary(poles)[0]
    return ok


def evaluate_models(models: ModelSet, family, params: np.ndarray, requirements: Mapping[str, float] | None = None,
                    options: EvalOptions = EvalOptions(), objectives: tuple[str, ...] = (),
                    certify_box: bool = False) -> pd.DataFrame:
    """Worst-case rows over a model set for an (N, d) parameter batch; columns as :func:`evaluate` plus
    ``robust_stable`` and ``models_evaluated``.

    The nominal is evaluated first (with the requested screening); only candidates
    feasible on it are screened for robust stability (box and variants), and only
    the robustly stable ones are evaluated on the other models, one batched call per
    model, dropping a candidate as soon as one model makes it infeasible. Metric
    columns hold the worst value over the models evaluated (``models_evaluated`` of
    them; a feasible row saw every model), slack columns the smallest slack.
    ``certify_box`` replaces the float screen by the exact certificate (per row).
    """
    requirements = dict(requirements or {})
    params = np.atleast_2d(np.asarray(params, float))
    cnum, cden = family.controllers(params)
    nominal = evaluate(models.nominal, family, params, requirements, options)
    worst = nominal.copy()
    n = len(worst)
    stable = nominal["internally_stable"].to_numpy(bool)
    rs = stable & nominal["certified"].to_numpy(bool) if options.certify else stable.copy()
    idx = np.flatnonzero(stable)
    if models.variants and idx.size:
        rs[idx] &= variant_screen(models.variants, cnum[idx], cden[idx], options.pade_order)
    box = models.box
    if box is not None and box.k and rs.any():
        idx = np.flatnonzero(rs)
        if certify_box:
            rs[idx] = [box_certificate(box, cnum[i], cden[i])["robust_stable"] for i in idx]
        else:
            rs[idx] &= box_stable_screen(box, cnum[idx], cden[idx])
    go = nominal["feasible"].to_numpy(bool) & rs
    count = np.ones(n, int)
    rest = models.members[1:]
    stages = [[m] for m in rest if m.plant.delay]                       # dead time: one call each
    rational = [m for m in rest if not m.plant.delay]
    stages += [[m for m in rational if m.kind != "sample"], [m for m in rational if m.kind == "sample"]]
    for stage in stages:
        if not stage or not go.any():
            continue
        idx = np.flatnonzero(go)
        if len(stage) == 1:
            df = evaluate_controllers(stage[0].plant, cnum[idx], cden[idx], requirements, options)
        else:
            plant, sn, sd = _stack(stage, cnum[idx], cden[idx])
            df = evaluate_controllers(plant, sn, sd, requirements, options)
        st = _combine(worst, df, idx, len(stage), requirements, objectives)
        if options.certify:
            st &= df["certified"].to_numpy(bool).reshape(len(stage), idx.size).all(axis=0)
        rs[idx] &= st
        count[idx] += len(stage)
        feas = st.copy()
        for key in requirements:
            feas &= worst[f"slack_{key}"].to_numpy(float)[idx] >= 0
        go[idx] = feas
    done = count == len(models.members)
    worst["robust_stable"] = rs
    worst["models_evaluated"] = count
    worst["models_complete"] = done
    worst["feasible"] = worst["feasible"].to_numpy(bool) & rs & done
    for key in requirements:
        worst["feasible"] &= worst[f"slack_{key}"].to_numpy(float) >= 0
    return worst
