"""Local polishing of the best candidates: a batched compass (pattern) search.

Around each of the best M candidates, the 2d coordinate moves of the current
step in the unit cube (plus the same number of random directions) are evaluated
in one batch; a candidate moves to the best trial point that improves it and
halves its step otherwise (compass search; Kolda, Lewis & Torczon, "Optimization
by direct search", SIAM Review 45, 2003). Improvement means: for a feasible
candidate, a feasible point with a smaller sum of log objectives; for an
infeasible one, a smaller total normalised violation. Batching keeps the
evaluator vectorised: scipy.optimize's one-point-at-a-time calls would pay the
evaluator's fixed per-call cost (the time-grid loop) for every point.
"""

from __future__ import annotations

import numpy as np

from ..rank import violation

POLISH_MEMBERS = 8
INITIAL_STEP = 0.05
MIN_STEP = 1e-4


def _merit(search, df):
    """(feasible, merit) for rows: merit = summed log objectives if feasible else violation."""
    feas = np.array(df["feasible"].to_numpy(bool))
    obj = search.objective_matrix(df).sum(axis=1)
    vio = violation(df, search.requirements)
    return feas, np.array(np.where(feas, obj, vio))


def compass_polish(search) -> None:
    """Polish the elite of ``search`` in place until its budget or time runs out."""
    elite = search._elite(POLISH_MEMBERS)
    if elite.empty:
        return
    elite = elite.iloc[:POLISH_MEMBERS]
    d = search.space.dim
    centres = elite[search.ucols].to_numpy(float)
    feas, merit = _merit(search, elite)
    steps = np.full(len(centres), INITIAL_STEP)
    rng = np.random.default_rng(search.settings.seed + 7)
    eye = np.eye(d)
    while search._left() > 0 and not search._out_of_time() and np.any(steps > MIN_STEP):
        active = np.flatnonzero(steps > MIN_STEP)
        rand = rng.normal(size=(len(active), 2 * d, d))
        rand /= np.linalg.norm(rand, axis=2, keepdims=True)
        moves = np.concatenate([np.broadcast_to(np.vstack([eye, -eye]), (len(active), 2 * d, d)), rand], axis=1)
        pts = np.clip(centres[active, None, :] + steps[active, None, None] * moves, 0.0, 1.0)
        flat = pts.reshape(-1, d)
        budget = search._left()
        if budget < len(flat):
            flat = flat[:budget]
        df = search.evaluate_u(flat, "polish")
        search.state["polish_rounds"] += 1
        if df.empty:
            steps[active] /= 2
            continue
        # owner of each evaluated row (the prefilter may have dropped some points)
        u_eval = df[search.ucols].to_numpy(float)
        owner = np.repeat(np.arange(len(active)), moves.shape[1])[: len(flat)][search.last_keep]
        f_new, m_new = _merit(search, df)
        for j, i in enumerate(active):
            sel = np.flatnonzero(owner == j)
            improved = False
            if sel.size:
                cand_f, cand_m = f_new[sel], m_new[sel]
                if feas[i]:
                    ok = cand_f & (cand_m < merit[i] - 1e-12)
                else:
                    ok = cand_f | (cand_m < merit[i] - 1e-12)
                if ok.any():
                    # prefer feasible points, then the best merit
                    score = np.where(cand_f, cand_m, np.inf) if (cand_f & ok).any() else cand_m
                    score = np.where(ok, score, np.inf)
                    k = sel[int(np.argmin(score))]
                    centres[i] = u_eval[k]
                    feas[i], merit[i] = f_new[k], m_new[k]
                    improved = True
            steps[i] = steps[i] * 1.5 if improved else steps[i] / 2
