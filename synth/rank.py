"""Ranking of evaluated designs: feasibility, violation, Pareto fronts, hypervolume, knee.

Pure functions of (metrics table, requirements, objectives); nothing here evaluates a
loop, so an archive can be re-ranked under tighter or looser requirements at no cost.
All objectives are minimised. Conventions:

* feasibility is recomputed from the metric columns with
  :func:`synth.requirements.requirement_value` / :func:`synth.requirements.slack`,
  AND ``internally_stable`` (AND ``admissible`` when the column is present, as the
  evaluator does);
* ``front`` is the non-dominated level among the feasible rows (0 = non-dominated),
  ``-1`` for infeasible rows;
* ``violation`` is 0 exactly for the feasible rows, positive for the infeasible ones
  and ``inf`` for unstable, inadmissible or undefined rows.

References
----------
K. Deb, A. Pratap, S. Agarwal, T. Meyarivan, "A fast and elitist multiobjective
genetic algorithm: NSGA-II", IEEE Trans. Evol. Comput. 6(2):182-197, 2002
(fast non-dominated sorting, crowding distance).
E. Zitzler, L. Thiele, "Multiobjective optimization using evolutionary algorithms -
a comparative case study", PPSN V, 1998, and "Multiobjective evolutionary
algorithms: a comparative case study and the strength Pareto approach", IEEE Trans.
Evol. Comput. 3(4):257-271, 1999 (hypervolume, the "size of the space covered").
L. While, P. Hingston, L. Barone, S. Huband, "A faster algorithm for calculating
hypervolume", IEEE Trans. Evol. Comput. 10(1):29-38, 2006 (slicing objectives, HSO).
I. Das, "On characterizing the 'knee' of the Pareto curve based on Normal-Boundary
Intersection", Structural Optimization 18:107-115, 1999 (knee).
"""

from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from .requirements import REQUIREMENTS, requirement_value, slack

# Smallest scale per requirement unit for the normalised violation: the violation of
# a requirement is its shortfall divided by max(|limit|, floor), so a limit of 0
# (no overshoot, zero steady-state error) still gives a finite, comparable number.
# The floors are one "just noticeable" step in each unit: 1 percentage point, 1 dB,
# 1 degree; 1e-3 for seconds, rad/s, 1/s, 1/s^2 and dimensionless ratios.
VIOLATION_FLOOR: dict[str, float] = {
    "%": 1.0, "dB": 1.0, "deg": 1.0,
    "s": 1e-3, "1/s": 1e-3, "1/s^2": 1e-3, "rad/s": 1e-3, "": 1e-3,
}
DEFAULT_FLOOR = 1e-3

# columns rank() (re)computes; any older copies are dropped first
RANK_COLUMNS = ("feasible", "violation", "front", "crowding", "knee", "rank")

INFEASIBLE_TOL = 0.01     # near-copy distance among infeasible rows, in the dedupe columns (log10: 2.3 %)

_CHUNK_ELEMENTS = 1 << 22   # bound on n_chunk * n booleans per temporary in the pairwise dominance


# ------------------------------------------------------------------ feasibility
def _check_requirements(requirements: Mapping[str, float]) -> dict[str, float]:
    unknown = [k for k in requirements if k not in REQUIREMENTS]
    if unknown:
        raise KeyError(f"unknown requirement key(s) {unknown}; expected keys of synth.requirements.REQUIREMENTS")
    out = {}
    for k, v in requirements.items():
        v = float(v)
        if np.isnan(v):
            raise ValueError(f"requirement {k!r}: limit is NaN; expected a number")
        out[k] = v
    return out


def _flag(df: pd.DataFrame, col: str, default: bool | None = None) -> np.ndarray:
    """Boolean column with missing values (NaN/None/<NA>) read as False."""
    if col not in df.columns:
        if default is None:
            raise KeyError(f"ranking needs a {col!r} column (from the evaluator)")
        return np.full(len(df), default, dtype=bool)
    return df[col].astype("boolean").fillna(False).to_numpy(dtype=bool)


def _ok_mask(df: pd.DataFrame) -> np.ndarray:
    """internally_stable AND admissible AND, for model sets, robust_stable and models_complete (when present)."""
    return (_flag(df, "internally_stable") & _flag(df, "admissible", default=True)
            & _flag(df, "robust_stable", default=True) & _flag(df, "models_complete", default=True))


def _slacks(df: pd.DataFrame, requirements: Mapping[str, float], stable: np.ndarray) -> dict[str, np.ndarray]:
    out = {}
    for key, limit in requirements.items():
        req = REQUIREMENTS[key]
        missing = [c for c in (req.metric, "gain_margin_low_db" if key == "min_gain_margin_db" else None)
                   if c is not None and c not in df.columns]
        if missing:
            raise KeyError(f"requirement {key!r} needs metric column(s) {missing}")
        s = slack(req, requirement_value(req, df), limit)
        out[key] = np.where(stable, s, -np.inf)
    return out


def _scale(key: str, limit: float) -> float:
    return max(abs(limit), VIOLATION_FLOOR.get(REQUIREMENTS[key].unit, DEFAULT_FLOOR))


def _violation(slacks: Mapping[str, np.ndarray], requirements: Mapping[str, float], ok: np.ndarray) -> np.ndarray:
    v = np.zeros(ok.shape[0])
    tiny = np.finfo(float).tiny
    for key, s in slacks.items():
        with np.errstate(over="ignore"):
            term = -s / _scale(key, requirements[key])
        # keep a strictly positive term for any shortfall (no underflow to 0)
        v += np.where(s < 0, np.maximum(term, tiny), 0.0)
    return np.where(ok, v, np.inf)


def violation(df: pd.DataFrame, requirements: Mapping[str, float]) -> np.ndarray:
    """Total normalised requirement violation per row (dimensionless, >= 0).

    ``sum_k max(0, -slack_k) / max(|limit_k|, floor(unit_k))`` with the floors of
    :data:`VIOLATION_FLOOR` (1 % point, 1 dB, 1 deg; 1e-3 otherwise). Slacks are
    recomputed from the metric columns, so stale ``slack_`` columns are ignored.
    ``inf`` where a slack is ``-inf`` (undefined metric) or where the row is not
    internally stable (or not ``admissible``, when that column exists). Exactly 0
    for the feasible rows and strictly positive for every infeasible row.
    """
    requirements = _check_requirements(requirements)
    ok = _ok_mask(df)
    return _violation(_slacks(df, requirements, _flag(df, "internally_stable")), requirements, ok)


# ------------------------------------------------------------------ Pareto fronts
def _as_min(F, minimise) -> np.ndarray:
    F = np.asarray(F, dtype=float)
    if F.ndim == 1:
        F = F[:, None]
    if F.ndim != 2:
        raise ValueError(f"objectives must be an (n, m) array, got shape {F.shape}")
    sign = np.where(np.broadcast_to(np.asarray(minimise, dtype=bool), (F.shape[1],)), 1.0, -1.0)
    F = F * sign
    return np.where(np.isnan(F), np.inf, F)


def dominance_matrix(F: np.ndarray) -> np.ndarray:
    """``D[i, j]`` is True when row i Pareto-dominates row j (minimisation): no worse in
    every objective and strictly better in at least one. Chunked over rows."""
    n, m = F.shape
    D = np.empty((n, n), dtype=bool)
    step = max(1, _CHUNK_ELEMENTS // max(1, n))
    for i0 in range(0, n, step):
        A = F[i0:i0 + step]
        le = np.ones((A.shape[0], n), dtype=bool)
        lt = np.zeros((A.shape[0], n), dtype=bool)
        for k in range(m):          # one (chunk, n) comparison per objective, no 3-D temporaries
            le &= A[:, k, None] <= F[None, :, k]
            lt |= A[:, k, None] < F[None, :, k]
        D[i0:i0 + step] = le & lt
    return D


def non_dominated_sort(F, minimise: bool | Sequence[bool] = True) -> np.ndarray:
    """Non-dominated level of each row of an (n, m) objective array; 0 = non-dominated.

    Fast non-dominated sorting of Deb et al. (2002): domination counts from a
    (chunked, vectorised) pairwise dominance matrix, then peeling of the rows whose
    count reaches zero. O(n^2 m) time, n^2 booleans of memory (25 MB at n = 5000).
    ``minimise`` is a bool or one bool per objective (False = maximise). NaN is the
    worst possible value of its objective (+inf after orientation); equal rows share
    a level.
    """
    F = _as_min(F, minimise)
    n = F.shape[0]
    front = np.full(n, -1, dtype=np.int64)
    if n == 0:
        return front
    D = dominance_matrix(F)
    count = D.sum(axis=0)                   # how many rows dominate each row
    current = count == 0
    level = 0
    while current.any():
        front[current] = level
        count = count - D[current].sum(axis=0)
        count[front >= 0] = -1
        current = count == 0
        level += 1
    return front


def crowding_distance(F) -> np.ndarray:
    """Crowding distance of each row of one front (Deb et al. 2002, Sec. III-B).

    Per objective, rows sorted by value; the boundary rows get ``inf``, an interior
    row gets (next value - previous value) / (max - min); the distances add over
    objectives. Dimensionless. Ties are resolved so the result does not depend on
    row order: rows sharing a value get Deb's distance averaged over all orders of
    the tie, i.e. (next distinct - previous distinct) / (tie size * (max - min)),
    and every row at the minimum or the maximum is a boundary row (``inf``). Without
    ties this is exactly Deb's definition. An objective that is constant over the
    front (or has no finite value) carries no information and is skipped; if every
    objective is skipped (one row, identical rows) all rows get ``inf``. Rows with a
    non-finite value in an objective get no contribution from it.
    """
    F = np.asarray(F, dtype=float)
    if F.ndim == 1:
        F = F[:, None]
    n, m = F.shape
    d = np.zeros(n)
    informative = False
    for k in range(m):
        col = F[:, k]
        fin = np.isfinite(col)
        u, inv, cnt = np.unique(col[fin], return_inverse=True, return_counts=True)
        if u.size < 2:
            continue
        informative = True
        g = np.full(u.size, np.inf)
        g[1:-1] = (u[2:] - u[:-2]) / ((u[-1] - u[0]) * cnt[1:-1])
        d[fin] += g[inv.ravel()]
    if not informative:
        d[:] = np.inf
    return d


# ------------------------------------------------------------------ hypervolume
def _hv2_sorted(P: np.ndarray, ref: np.ndarray) -> float:
    """Area dominated by 2-D points sorted by (f1, f2), all strictly better than ref."""
    if P.shape[0] == 0:
        return 0.0
    run = np.minimum.accumulate(P[:, 1])
    widths = np.diff(np.append(P[:, 0], ref[0]))
    return float(np.sum(widths * (ref[1] - run)))


def _hv(P: np.ndarray, ref: np.ndarray) -> float:
    n, m = P.shape
    if n == 0:
        return 0.0
    if m == 1:
        return float(ref[0] - P[:, 0].min())
    if m == 2:
        return _hv2_sorted(P[np.lexsort((P[:, 1], P[:, 0]))], ref)
    if n > 1:
        P = P[non_dominated_sort(P) == 0]
        n = P.shape[0]
    order = np.argsort(P[:, -1], kind="stable")
    P = P[order]
    tops = np.append(P[1:, -1], ref[-1])
    heights = tops - P[:, -1]
    vol = 0.0
    if m == 3:
        # presort once by (f1, f2); each slab uses the points below it in f3
        o12 = np.lexsort((P[:, 1], P[:, 0]))
        Q = P[o12, :2]          # row j of Q is row o12[j] of P, i.e. the o12[j]-th lowest f3
        for i in range(n):
            if heights[i] > 0:
                vol += heights[i] * _hv2_sorted(Q[o12 <= i], ref[:2])
        return vol
    for i in range(n):
        if heights[i] > 0:
            vol += heights[i] * _hv(P[:i + 1, :-1], ref[:-1])
    return vol


def hypervolume(F, ref) -> float:
    """Hypervolume (Lebesgue measure) dominated by the rows of F and bounded by ``ref``.

    Minimisation; the indicator of Zitzler & Thiele (1998, 1999). Only rows strictly
    better than ``ref`` in every objective count (NaN never does). Exact: m = 1 is
    ``ref - min``; m = 2 a sorted sweep; m >= 3 slices along the last objective
    (While et al. 2006, HSO), each slab times the (m-1)-dimensional volume of the
    points below it, down to the 2-D sweep. Units: product of the objective units.
    """
    F = np.asarray(F, dtype=float)
    if F.ndim == 1:
        F = F[:, None]
    ref = np.asarray(ref, dtype=float).ravel()
    if ref.size != F.shape[1]:
        raise ValueError(f"reference point has {ref.size} values, objectives have {F.shape[1]}")
    with np.errstate(invalid="ignore"):
        P = F[np.all(F < ref, axis=1)]
    return _hv(P, ref)


# ------------------------------------------------------------------ knee, duplicates
def knee_index(F) -> int:
    """Index of the knee of a front (Das 1999, normal-boundary-intersection knee).

    Objectives are normalised to [0, 1] over the front (a constant objective maps to
    0); the knee is the row farthest on the improving side of the hyperplane
    ``sum(f_norm) = 1``, i.e. the row with the smallest normalised sum. For m = 2 on
    a non-dominated front this hyperplane is the line through the two anchor
    (individual-minimum) points, which is Das's definition exactly; for m >= 3 it is
    the hyperplane through the unit anchors of the normalised box, an approximation
    to Das's convex hull of individual minima. Rows with a non-finite objective are
    never the knee (unless all are); ties go to the first row.
    """
    F = np.asarray(F, dtype=float)
    if F.ndim == 1:
        F = F[:, None]
    if F.shape[0] == 0:
        raise ValueError("knee_index of an empty front")
    fin = np.all(np.isfinite(F), axis=1)
    if not fin.any():
        return 0
    lo, hi = F[fin].min(axis=0), F[fin].max(axis=0)
    span = np.where(hi > lo, hi - lo, 1.0)
    score = np.where(fin, ((F - lo) / span).sum(axis=1), np.inf)
    return int(np.argmin(score))


def dedupe(df: pd.DataFrame, cols: Sequence[str], tol: float = 1e-3) -> np.ndarray:
    """Keep-mask for near-duplicate designs: first occurrence, in the given row order.

    Rows are the same design when ``round(value / tol)`` agrees on every column of
    ``cols`` (NaN equals NaN). On the families' log10 parameter columns this is a
    relative tolerance: ``tol = 1e-3`` in log10 is about 0.23 % in the gain or the
    corner frequency. Binning (not pairwise distance) makes "duplicate" an
    equivalence, so deduping twice removes nothing more.
    """
    if tol <= 0:
        raise ValueError(f"dedupe tolerance must be positive, got {tol}")
    cols = list(cols)
    missing = [c for c in cols if c not in df.columns]
    if missing:
        raise KeyError(f"dedupe columns {missing} not in the table")
    if not cols or len(df) == 0:
        return np.ones(len(df), dtype=bool)
    return dedupe_values(df[cols].to_numpy(dtype=float), tol)


def dedupe_values(values: np.ndarray, tol: float = 1e-3) -> np.ndarray:
    """:func:`dedupe` on an (N, d) array of design parameters (NaN equals NaN)."""
    if tol <= 0:
        raise ValueError(f"dedupe tolerance must be positive, got {tol}")
    values = np.asarray(values, float)
    if values.ndim != 2 or values.shape[1] == 0 or values.shape[0] == 0:
        return np.ones(len(values), dtype=bool)
    keys = np.round(values / tol) + 0.0   # + 0.0 folds -0.0 into 0.0
    return ~pd.DataFrame(keys).duplicated(keep="first").to_numpy()


def design_values(df: pd.DataFrame, cols: Sequence[str], family=None) -> np.ndarray:
    """The parameter values two rows are compared on when de-duplicating.

    With a lead-lag ``family`` (synth.structures.Family) whose parameter names are the
    columns, inactive stages are dropped first (:func:`synth.stages.equivalent_params`,
    crossover region from the ``phase_margin_rad_s`` and ``crossover_rad_s`` columns), so a
    design with an inactive stage counts as the simpler structure.
    """
    X = df[list(cols)].to_numpy(dtype=float)
    if family is None or family.kind != "lead-lag" or list(cols) != list(family.names):
        return X
    from .stages import crossover_region, equivalent_params
    nan = np.full(len(df), np.nan)
    lo, hi = crossover_region(df["phase_margin_rad_s"].to_numpy(float) if "phase_margin_rad_s" in df else nan,
                              df["crossover_rad_s"].to_numpy(float) if "crossover_rad_s" in df else nan)
    return equivalent_params(family, X, lo, hi)


# ------------------------------------------------------------------ ranking
def _is_computed(col) -> bool:
    if not isinstance(col, str):
        return False
    if col in RANK_COLUMNS:
        return True
    for prefix in ("slack_", "met_"):
        if col.startswith(prefix) and col[len(prefix):] in REQUIREMENTS:
            return True
    return False


def rank(df: pd.DataFrame, requirements: Mapping[str, float], objectives: Sequence[str],
         primary: str | None = None, dedupe_cols: Sequence[str] | None = None,
         tol: float = 1e-3, family=None, infeasible_tol: float = INFEASIBLE_TOL) -> pd.DataFrame:
    """Rank evaluated designs, best first; returns a new DataFrame (``df`` untouched).

    1. Near-duplicates on ``dedupe_cols`` are removed first (:func:`dedupe`, ``tol``);
       with ``family``, a design with inactive stages counts as the simpler structure
       (:func:`design_values`).
    2. ``slack_<key>``, ``met_<key>`` and ``feasible`` are recomputed for the given
       requirements from the metric columns and ``internally_stable`` (and
       ``admissible`` if present); slack/met columns of other requirement keys are
       dropped. No re-evaluation is needed to re-rank under new limits.
    3. Feasible rows come first: those with finite objectives by non-dominated
       ``front`` (0 = Pareto front), then those with a NaN/inf objective (fronts
       numbered on after the finite ones); within a front by ``primary`` ascending
       (then crowding descending) if given, else by ``crowding`` descending.
       Infeasible rows follow by ``violation`` ascending (then ``primary``), with
       ``front = -1`` and ``crowding = NaN``. Remaining ties keep the input order.
       Among the infeasible rows (with ``dedupe_cols``), a row within
       ``infeasible_tol`` of a less-violating one in every compared value (log10
       parameters: 0.01 is 2.3 %) is a near-copy and is dropped
       (:func:`synth.stages.near_copies`), so the least-violating rows that an
       infeasible run shows are distinct designs.
    4. ``knee`` marks the knee (:func:`knee_index`) of the finite first front, and
       the knee row is moved to the top; ``rank`` is 1..n.

    Objectives are metric column names, all minimised. Index labels are kept. The
    result is idempotent: ranking it again gives the same rows, order and columns.
    """
    requirements = _check_requirements(requirements)
    objectives = list(objectives)
    missing = [c for c in objectives + ([primary] if primary is not None else []) if c not in df.columns]
    if missing:
        raise KeyError(f"objective/primary column(s) {missing} not in the table")
    out = df
    X = None
    if dedupe_cols:
        missing = [c for c in dedupe_cols if c not in df.columns]
        if missing:
            raise KeyError(f"dedupe columns {missing} not in the table")
        X = design_values(out, dedupe_cols, family)
        keep = np.flatnonzero(dedupe_values(X, tol))
        out, X = out.iloc[keep], X[keep]
    out = out.drop(columns=[c for c in out.columns if _is_computed(c)]).copy()
    n = len(out)

    stable = _flag(out, "internally_stable")
    ok = _ok_mask(out)
    slacks = _slacks(out, requirements, stable)
    feasible = ok.copy()
    for s in slacks.values():
        feasible &= s >= 0
    viol = _violation(slacks, requirements, ok)

    F = out[objectives].to_numpy(dtype=float).reshape(n, len(objectives))
    finite = np.all(np.isfinite(F), axis=1)
    front = np.full(n, -1, dtype=np.int64)
    crowd = np.full(n, np.nan)
    ia = np.flatnonzero(feasible & finite)
    ib = np.flatnonzero(feasible & ~finite)
    if ia.size:
        front[ia] = non_dominated_sort(F[ia])
    if ib.size:
        front[ib] = non_dominated_sort(F[ib]) + (front[ia].max() + 1 if ia.size else 0)
    for level in np.unique(front[feasible]):
        rows = np.flatnonzero(front == level)
        crowd[rows] = crowding_distance(F[rows])

    neg_crowd = np.where(feasible, -np.nan_to_num(crowd, nan=0.0, posinf=np.inf), 0.0)
    if primary is not None:
        p = out[primary].to_numpy(dtype=float)
        p = np.where(np.isnan(p), np.inf, p)
        keys = (neg_crowd, p)
    else:
        keys = (neg_crowd,)
    level_key = np.where(feasible, front.astype(float), viol)
    order = np.lexsort(keys + (level_key, ~feasible))
    if X is not None and infeasible_tol > 0:
        bad = np.flatnonzero(~feasible[order])               # infeasible positions, least violating first
        if bad.size > 1:
            from .stages import near_copies
            drop = bad[~near_copies(X[order[bad]], infeasible_tol)]
            if drop.size:
                order = np.delete(order, drop)
                n = order.size

    out = out.iloc[order]
    front, crowd, viol, feasible, F = front[order], crowd[order], viol[order], feasible[order], F[order]
    knee = np.zeros(n, dtype=bool)
    first = np.flatnonzero(feasible & (front == 0) & np.all(np.isfinite(F), axis=1))
    if first.size:
        Ff = F[first]
        # objectives spanning decades (peaks, times) are compared on a log scale
        k = first[knee_index(np.log10(Ff) if np.all(Ff > 0) else Ff)]
        knee[k] = True
        # the knee leads the table: it is the balanced design an engineer looks at first
        lead = np.concatenate([[k], np.delete(np.arange(n), k)])
        out = out.iloc[lead]
        front, crowd, viol, feasible, knee = front[lead], crowd[lead], viol[lead], feasible[lead], knee[lead]
        order = order[lead]

    new = {}
    for key in requirements:
        s = slacks[key][order]
        new[f"slack_{key}"] = s
        new[f"met_{key}"] = s >= 0
    new.update(feasible=feasible, violation=viol, front=front, crowding=crowd, knee=knee,
               rank=np.arange(1, n + 1, dtype=np.int64))
    return pd.concat([out, pd.DataFrame(new, index=out.index)], axis=1)


def _objective_limit(obj: str, limits: Mapping[str, float]) -> float:
    if obj in limits:
        return float(limits[obj])
    keys = [k for k in limits if k in REQUIREMENTS and REQUIREMENTS[k].metric == obj
            and REQUIREMENTS[k].sense == "max"]
    if len(keys) != 1:
        raise ValueError(f"objective {obj!r}: expected one max_ requirement on it in limits, found {keys}")
    return float(limits[keys[0]])


def front_hypervolume(ranked: pd.DataFrame, objectives: Sequence[str], ref=None,
                      limits: Mapping[str, float] | None = None) -> float:
    """Hypervolume of the feasible first front of a :func:`rank` result.

    Without ``limits`` the objectives are in their own units and ``ref`` defaults to
    the worst (largest) value of each objective over all feasible rows with finite
    objectives; front points lying on that worst value add nothing in that
    objective. With ``limits`` (a requirements mapping, ``max_`` keys matched to the
    objectives through their metric, or metric name -> limit) each objective is
    divided by its limit (which must be > 0), so the hypervolume is dimensionless and
    comparable across runs, and ``ref`` defaults to 1.0 (the limits); an explicit
    ``ref`` is then in these normalised units. Returns 0.0 with no feasible finite row.
    """
    for c in ("feasible", "front"):
        if c not in ranked.columns:
            raise KeyError(f"front_hypervolume needs a ranked table (column {c!r}); call rank() first")
    objectives = list(objectives)
    F = ranked[objectives].to_numpy(dtype=float).reshape(len(ranked), len(objectives))
    fin = _flag(ranked, "feasible") & np.all(np.isfinite(F), axis=1)
    if limits is not None:
        lim = np.array([_objective_limit(o, limits) for o in objectives])
        if np.any(~(lim > 0)) or np.any(~np.isfinite(lim)):
            raise ValueError(f"limits used to normalise {objectives} must be positive and finite, got {lim}")
        F = F / lim
    if not fin.any():
        return 0.0
    if ref is None:
        ref = np.ones(len(objectives)) if limits is not None else F[fin].max(axis=0)
    first = fin & (ranked["front"].to_numpy() == 0)
    return hypervolume(F[first], ref)
