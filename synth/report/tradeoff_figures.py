"""The trade-off view: every candidate on each pair of objectives, front highlighted (Figure 7)."""

from __future__ import annotations

import itertools
import math
from typing import Sequence

import numpy as np
import pandas as pd

from .candidates import Candidate
from .plotdata import FigureData, Panel, Points
from .style import MARKERS, METRIC_AXIS


def _use_log(v: np.ndarray) -> bool:
    v = v[np.isfinite(v)]
    return bool(v.size and v.min() > 0 and v.max() / v.min() > 20)


def tradeoff_data(df: pd.DataFrame, objectives: Sequence[str], cands: list[Candidate]) -> FigureData:
    """Figure 7: every candidate on each pair of objectives; front highlighted, chosen labelled."""
    objectives = list(objectives)
    pairs = list(itertools.combinations(objectives, 2)) or [("id", objectives[0])]
    feas = df["feasible"].astype(bool).to_numpy() if len(df) else np.zeros(0, bool)
    front = feas & (df["front"].to_numpy() == 0) if len(df) else feas
    chosen = {c.cid: c for c in cands}
    panels = []
    for a, b in pairs:
        xa = df[a].to_numpy(float) if len(df) else np.zeros(0)
        yb = df[b].to_numpy(float) if len(df) else np.zeros(0)
        ok = np.isfinite(xa) & np.isfinite(yb)
        p = Panel(f"{b} vs {a}", METRIC_AXIS.get(a, "candidate id (evaluation order) [-]"),
                  METRIC_AXIS.get(b, b), legend="none")
        sel = ok & feas
        p.xscale = "log" if _use_log(xa[sel]) else "linear"
        p.yscale = "log" if _use_log(yb[sel]) else "linear"
        inf = ok & ~feas
        if p.xscale == "log":
            inf &= xa > 0
        if p.yscale == "log":
            inf &= yb > 0
        p.points.append(Points(f"infeasible ({int((~feas).sum())})", xa[inf], yb[inf], "infeasible",
                               color="#b3b3b3", size=6, alpha=0.35))
        rest = ok & feas & ~front
        p.points.append(Points(f"feasible ({int(feas.sum())})", xa[rest], yb[rest], "feasible",
                               color="#56B4E9", size=12, alpha=0.8))
        fr = ok & front
        p.points.append(Points(f"first front ({int(front.sum())})", xa[fr], yb[fr], "front", marker="D",
                               color="#000000", size=22))
        for cid, c in chosen.items():
            hit = np.flatnonzero(df["id"].to_numpy() == cid)
            if not hit.size or not ok[hit[0]]:
                continue
            i = hit[0]
            p.points.append(Points(f"{c.tag} ({c.role})", xa[i:i + 1], yb[i:i + 1], "chosen",
                                   marker=MARKERS[c.index % len(MARKERS)], style=c.index, size=120,
                                   texts=[c.tag], cid=cid))
        if not feas.any():
            p.notes.append("no feasible candidate in the run")
        if sel.any():
            ids_all = df["id"].to_numpy()
            pick = np.array([i for k in chosen for i in np.flatnonzero(ids_all == k)[:1] if ok[i]], int)
            p.xlim = _pad_lim(np.concatenate([xa[sel], xa[pick]]), p.xscale)
            p.ylim = _pad_lim(np.concatenate([yb[sel], yb[pick]]), p.yscale)
        panels.append(p)
    cols = min(3, len(panels))
    rows = math.ceil(len(panels) / cols)
    cap = (f"Every stored candidate of the run ({len(df)} after removing near-duplicates), one panel per pair "
           f"of objectives ({', '.join(objectives)}; all minimised). Black diamonds: the first Pareto front in "
           "all objectives together (a front point can look dominated in one projection). Faint grey: "
           "infeasible candidates. The axes span the feasible candidates.")
    return FigureData("trade-off", "7. Trade-off between the objectives", cap, panels, grid=(rows, cols),
                      size=(11.0, 4.4 * rows + 0.9), figure_legend=True)


def _pad_lim(v: np.ndarray, scale: str) -> tuple[float, float] | None:
    v = v[np.isfinite(v)]
    if scale == "log":
        v = v[v > 0]
    if not v.size:
        return None
    lo, hi = float(v.min()), float(v.max())
    if scale == "log":
        f = (hi / lo) ** 0.06 if hi > lo else 1.5
        return (lo / f, hi * f)
    span = hi - lo if hi > lo else max(abs(hi), 1.0) * 0.5
    return (lo - 0.06 * span, hi + 0.06 * span)
