"""Inactive lead/lag stages: stages that leave the loop unchanged where it matters.

A stage G(s) = (s + z)/(s + p) (z, p > 0 in rad/s) is *inactive* when, over the
loop's crossover region, it acts as a constant: its phase there is at most
atan(0.01) = 0.573 deg and its magnitude constant within 0.005 %. Two cases:

* ratio: max(z, p)/min(z, p) <= 1.02 (RATIO_TOL). Such a stage is a constant everywhere:
  its largest phase lead or lag, reached at sqrt(z p), is asin((r - 1)/(r + 1)) =
  0.57 deg for r = 1.02 (the maximum-phase formula of a lead network, e.g. Ogata,
  *Modern Control Engineering*, 5th ed., 2010, sec. 6-8), and its gain lies between 1
  and r.
* decades: both corners more than DECADES = 2 decades above the highest gain
  crossover, or both more than 2 decades below the lowest one. For
  w <= min(z, p)/100 the phase atan(w/z) - atan(w/p) is below atan(0.01) and the gain
  is z/p within 0.005 %; for w >= 100 max(z, p) likewise with gain 1. The margins,
  the sensitivity peaks and the dominant closed-loop poles are decided in the crossover
  region, so there the stage is a gain factor (z/p above, 1 below).

The crossover region spans the gain crossovers the evaluator stores with every
candidate: ``phase_margin_rad_s`` (the crossover with the smallest phase margin) and
``crossover_rad_s`` (the highest one). Without a gain crossover only the ratio rule
applies.

What "inactive" does not claim: a stage far above the crossover still sets the
controller's high-frequency gain (noise gain, u(0+)), and a stage far below it still
scales the loop gain at very low frequency by z/p (steady-state error of a type-0
loop, a slow tail in the step response). The flag says the stage does not shape the
loop near crossover; the table and ``synth show`` say which rule applied.

For de-duplication a design with inactive stages counts as the simpler structure:
:func:`equivalent_params` drops those stages (their columns become NaN, the gain of a
stage above the crossover region moves into the controller gain) and sorts the active
stages of one role, so that designs whose active parts agree bin together.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

RATIO_TOL = 0.02          # |z/p| within 2 % of 1
DECADES = 2.0             # corners this many decades outside the crossover region

REASONS = {0: "", 1: "zero/pole ratio within 2 % of 1", 2: "more than 2 decades above the crossover region",
           3: "more than 2 decades below the crossover region"}


@dataclass(frozen=True)
class StageInfo:
    stage: int               # 1-based, in the family's pair order
    role: str                # "lead" or "lag"
    zero_rad_s: float        # corner magnitudes (the roots are at -zero, -pole)
    pole_rad_s: float
    active: bool
    reason: str

    def as_dict(self) -> dict:
        return {"stage": self.stage, "role": self.role, "zero_rad_s": self.zero_rad_s,
                "pole_rad_s": self.pole_rad_s, "active": self.active, "reason": self.reason}


def crossover_region(phase_margin_rad_s, crossover_rad_s) -> tuple[np.ndarray, np.ndarray]:
    """(w_lo, w_hi) per candidate from the stored crossover frequencies; NaN when there is none."""
    a = np.atleast_1d(np.asarray(phase_margin_rad_s, float))
    b = np.atleast_1d(np.asarray(crossover_rad_s, float))
    f = np.stack([a, b], axis=1)
    f = np.where(np.isfinite(f) & (f > 0), f, np.nan)
    with np.errstate(all="ignore"):
        none = np.all(np.isnan(f), axis=1)
        lo = np.where(none, np.nan, np.nanmin(np.where(none[:, None], 1.0, f), axis=1))
        hi = np.where(none, np.nan, np.nanmax(np.where(none[:, None], 1.0, f), axis=1))
    return lo, hi


def activity_codes(zeros: np.ndarray, poles: np.ndarray, w_lo: np.ndarray, w_hi: np.ndarray) -> np.ndarray:
    """Reason codes (N, S): 0 active, 1 ratio, 2 above, 3 below (keys of REASONS).

    ``zeros``, ``poles``: (N, S) corner magnitudes in rad/s; ``w_lo``, ``w_hi``: (N,).
    """
    z = np.atleast_2d(np.asarray(zeros, float))
    p = np.atleast_2d(np.asarray(poles, float))
    lo = np.asarray(w_lo, float)[:, None]
    hi = np.asarray(w_hi, float)[:, None]
    with np.errstate(all="ignore"):
        ratio = np.maximum(z, p) / np.minimum(z, p) <= 1.0 + RATIO_TOL
        above = np.minimum(z, p) > 10.0 ** DECADES * hi          # False when hi is NaN
        below = np.maximum(z, p) < lo / 10.0 ** DECADES
    return np.where(ratio, 1, np.where(above, 2, np.where(below, 3, 0))).astype(np.int8)


def _corners(family, params: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    zc = [c for _, c, _ in family.pairs]
    pc = [c for _, _, c in family.pairs]
    return 10.0 ** params[:, zc], 10.0 ** params[:, pc]


def family_codes(family, params, w_lo, w_hi) -> np.ndarray:
    """Reason codes (N, S) for a lead-lag family's parameter rows; (N, 0) for PID/PI families."""
    p = np.atleast_2d(np.asarray(params, float))
    if family.kind != "lead-lag" or not family.pairs:
        return np.zeros((p.shape[0], 0), np.int8)
    z, q = _corners(family, p)
    return activity_codes(z, q, w_lo, w_hi)


def stage_infos(family, params, phase_margin_rad_s, crossover_rad_s) -> list[StageInfo]:
    """The stages of one design (1-D ``params``) with their activity."""
    p = np.atleast_2d(np.asarray(params, float))
    if family.kind != "lead-lag" or not family.pairs:
        return []
    lo, hi = crossover_region([phase_margin_rad_s], [crossover_rad_s])
    codes = family_codes(family, p, lo, hi)[0]
    z, q = _corners(family, p)
    return [StageInfo(i + 1, role, float(z[0, i]), float(q[0, i]), bool(codes[i] == 0), REASONS[int(codes[i])])
            for i, (role, _, _) in enumerate(family.pairs)]


def equivalent_params(family, params, w_lo, w_hi) -> np.ndarray:
    """Parameter rows with inactive stages removed, for de-duplication (see the module docstring).

    Inactive stages' columns become NaN; a stage above the crossover region adds
    log10(z/p) to the gain column (it acts as the gain z/p there); the stages of each
    role are sorted by their zero, NaN last, so the stage order does not matter.
    """
    p = np.array(np.atleast_2d(np.asarray(params, float)), copy=True)
    if family.kind != "lead-lag" or not family.pairs:
        return p
    codes = family_codes(family, p, w_lo, w_hi)
    for i, (_, zc, pc) in enumerate(family.pairs):
        above = codes[:, i] == 2
        p[above, 0] += p[above, zc] - p[above, pc]
        off = codes[:, i] != 0
        p[off, zc] = np.nan
        p[off, pc] = np.nan
    for role in ("lead", "lag"):
        cols = [(zc, pc) for r, zc, pc in family.pairs if r == role]
        if len(cols) < 2:
            continue
        zcols = [c for c, _ in cols]
        pcols = [c for _, c in cols]
        key = np.where(np.isnan(p[:, zcols]), np.inf, p[:, zcols])
        order = np.argsort(key, axis=1, kind="stable")
        p[:, zcols] = np.take_along_axis(p[:, zcols], order, axis=1)
        p[:, pcols] = np.take_along_axis(p[:, pcols], order, axis=1)
    return p


def near_copies(X: np.ndarray, tol: float, neighbours: int = 12, passes: int = 8) -> np.ndarray:
    """Keep-mask over rows in the given order: a row within ``tol`` of an earlier kept row
    in every column (Chebyshev distance; NaN equals NaN) is dropped.

    The result is the greedy one (walk the rows in order, keep a row unless a kept row
    is within ``tol``), computed without a loop over rows: each row is linked to its
    ``neighbours`` nearest rows within ``tol`` (a k-d tree), and "kept = no kept earlier
    neighbour" is solved on the links (:func:`_fixed_point`). Rows with more near neighbours than
    ``neighbours`` are caught by repeating this on the kept rows (``passes``). So the
    first (best ranked) of a cluster is kept, and applying it again drops nothing
    (up to the ``passes`` bound on very dense clusters). Rows sharing a grid cell of
    width ``tol`` are first reduced to the first of the cell; a dropped row is then
    within 2 ``tol`` of a kept one.
    """
    X = np.atleast_2d(np.asarray(X, float))
    n = X.shape[0]
    keep = np.ones(n, bool)
    if n < 2 or X.shape[1] == 0:
        return keep
    import pandas as pd
    from scipy.spatial import cKDTree
    Y = np.where(np.isnan(X), 1e9, X)           # NaN columns meet only NaN columns
    keep = ~pd.DataFrame(np.floor(Y / tol) + 0.0).duplicated(keep="first").to_numpy()
    for _ in range(passes):
        idx = np.flatnonzero(keep)
        if idx.size < 2:
            break
        k = min(neighbours + 1, idx.size)
        dist, nb = cKDTree(Y[idx]).query(Y[idx], k=k, p=np.inf, distance_upper_bound=np.nextafter(tol, np.inf))
        dist, nb = np.atleast_2d(dist), np.atleast_2d(nb)
        src = np.broadcast_to(np.arange(idx.size)[:, None], nb.shape)
        link = np.isfinite(dist) & (nb < idx.size) & (dist <= tol)
        a, b = np.minimum(src[link], nb[link]), np.maximum(src[link], nb[link])
        edge = a < b                             # earlier -> later, positions in idx (row order)
        a, b = a[edge], b[edge]
        if not a.size:
            break
        sub = _fixed_point(a, b, idx.size)
        if sub.all():
            break
        keep[idx[~sub]] = False
    return keep


def _fixed_point(a: np.ndarray, b: np.ndarray, n: int, sweeps: int = 30) -> np.ndarray:
    """kept[j] = no kept i with a link (i, j), i < j: the greedy result on the links.

    Vectorised sweeps from "all kept" settle every row whose longest chain of earlier
    links is shorter than the sweep count (clusters are shallow); a long chain is
    finished exactly by one pass in row order over the rows that have earlier links.
    """
    keep = np.ones(n, bool)
    for _ in range(sweeps):
        hit = np.zeros(n, bool)
        hit[b[keep[a]]] = True
        if np.array_equal(~hit, keep):
            return keep
        keep = ~hit
    order = np.argsort(b, kind="stable")
    a, b = a[order], b[order]
    js, starts = np.unique(b, return_index=True)
    ends = np.append(starts[1:], b.size)
    keep = np.ones(n, bool)
    for j, s, e in zip(js, starts, ends):        # earlier rows are final when row j is reached
        keep[j] = not keep[a[s:e]].any()
    return keep


def summary_text(infos: list[StageInfo]) -> str:
    """'stage 2 inactive (zero/pole ratio within 2 % of 1)' or '' when every stage is active."""
    off = [s for s in infos if not s.active]
    return "; ".join(f"stage {s.stage} ({s.role}, zero -{s.zero_rad_s:.4g}, pole -{s.pole_rad_s:.4g}) inactive: "
                     f"{s.reason}" for s in off)


__all__ = ["RATIO_TOL", "DECADES", "StageInfo", "crossover_region", "activity_codes", "family_codes",
           "stage_infos", "equivalent_params", "near_copies", "summary_text"]
