"""The candidates a report shows: which ones (front or given ids), their exact records and steps."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import pandas as pd

from ..describe import check_controller
from ..evaluate import step_responses
from ..evaluate.stability import hidden_mode_mask
from ..lti import TransferFunction, poly_from_roots
from ..runs import Run, controller_of, find_row

FRONT_SIZE = 5            # candidates chosen automatically: knee + extreme of each objective
MAX_CANDIDATES = 7        # one palette colour each


class ReportError(Exception):
    """A user-facing problem with a report request (ids, output path)."""


# ================================================================== candidates
@dataclass
class StepSeries:
    """One candidate's sampled unit-step responses, straight from the evaluator."""
    t: np.ndarray          # (K,) s
    y: np.ndarray          # (K, 3): reference->y, load->y, reference->u
    final: np.ndarray      # (3,) final values


@dataclass
class Candidate:
    cid: int
    role: str
    index: int                     # style index (colour, dash, marker)
    rank: int
    controller: TransferFunction
    record: dict                   # check_controller record
    steps: StepSeries | None       # None when the loop is not internally stable
    hidden_at: list = field(default_factory=list)   # plant roots the controller cancels (Re >= 0)

    @property
    def tag(self) -> str:
        return f"#{self.cid}"


def _role_of(row: pd.Series) -> str:
    if bool(row.get("knee", False)):
        return "knee of the front"
    if bool(row["feasible"]):
        return "on the front" if int(row["front"]) == 0 else f"feasible, front {int(row['front']) + 1}"
    v = float(row.get("violation", math.inf))
    return "infeasible" + ("" if math.isfinite(v) else ", not internally stable")


def choose_front(df: pd.DataFrame, objectives: Sequence[str], size: int = FRONT_SIZE) -> list[tuple[int, str]]:
    """(id, role) of the candidates a report shows when no id is given.

    The knee and the extreme (smallest value) of each objective among the feasible
    first front; when nothing is feasible, the least-violating internally stable
    candidates (``df`` is a :func:`synth.rank.rank` table, best first).
    """
    if df.empty:
        return []
    front = df[df["feasible"].astype(bool) & (df["front"] == 0)]
    picks: dict[int, list[str]] = {}
    if not front.empty:
        knee = front[front["knee"].astype(bool)] if "knee" in front else front.iloc[:0]
        if not knee.empty:
            picks.setdefault(int(knee["id"].iloc[0]), []).append("knee")
        for obj in objectives:
            vals = front[obj].to_numpy(float)
            if not np.isfinite(vals).any():
                continue
            i = int(np.nanargmin(np.where(np.isfinite(vals), vals, np.nan)))
            picks.setdefault(int(front["id"].iloc[i]), []).append(f"lowest {obj}")
        if not picks:
            picks[int(front["id"].iloc[0])] = ["first on the front"]
        return [(cid, ", ".join(r)) for cid, r in list(picks.items())[:size]]
    viol = df["violation"].to_numpy(float) if "violation" in df else np.full(len(df), np.inf)
    stable = df[np.isfinite(viol)]
    if stable.empty:
        return [(int(df["id"].iloc[0]), "no stable candidate in the run")]
    return [(int(cid), f"least violating #{k + 1} (none feasible)")
            for k, cid in enumerate(stable["id"].head(size))]


def cancelled_roots(plant: TransferFunction, controller: TransferFunction) -> list[complex]:
    """Plant poles/zeros at or right of the imaginary axis that the controller cancels.

    The decision is the evaluator's own (:func:`hidden_mode_mask`, same tolerance),
    asked once per such plant root so that the report knows where to draw it.
    """
    nc, dc = controller.num[None, :], controller.den[None, :]
    if not hidden_mode_mask(plant.num, plant.den, nc, dc)[0][0]:
        return []
    out = []
    for roots, is_pole in ((plant.poles, True), (plant.zeros, False)):
        for r in roots:
            if r.real < -1e-9 * max(1.0, abs(r)) or (r.imag < 0 and abs(r.imag) > 1e-12):
                continue
            factor = np.real(poly_from_roots([r, np.conj(r)] if abs(r.imag) > 1e-12 else [r.real]))
            num, den = (np.ones(1), factor) if is_pole else (factor, np.ones(1))
            if hidden_mode_mask(num, den, nc, dc)[0][0]:
                out.append(complex(r))
                if abs(r.imag) > 1e-12:
                    out.append(complex(np.conj(r)))
    return out


def load_candidates(run: Run, df: pd.DataFrame, ids: Sequence[int] | None) -> list[Candidate]:
    """The report's candidates with their exact records and step responses.

    ``ids`` empty or None: :func:`choose_front`. Unknown ids raise ArchiveError (from
    :func:`synth.runs.find_row`); more than MAX_CANDIDATES raise ReportError.
    """
    if df.empty:
        raise ReportError(f"{run.folder}: the run has no evaluated candidates; expected a run "
                          "written by 'synth design'")
    if ids:
        ids = list(dict.fromkeys(int(i) for i in ids))
        if len(ids) > MAX_CANDIDATES:
            raise ReportError(f"{len(ids)} candidate ids given; a report overlays at most "
                              f"{MAX_CANDIDATES} (one colour each)")
        picks = [(cid, _role_of(find_row(run, df, cid))) for cid in ids]
    else:
        picks = choose_front(df, list(run.spec.objectives))
    spec = run.spec
    out = []
    for k, (cid, role) in enumerate(picks):
        row = find_row(run, df, cid)
        c = controller_of(run, row)
        rec = check_controller(spec.plant, c, dict(spec.requirements), spec.options.settling_band,
                               spec.options.pade_order, models=spec.models)
        steps = None
        if rec["internally_stable"]:
            try:
                r = step_responses(spec.plant, c.num[None, :], c.den[None, :], spec.options.pade_order)
                steps = StepSeries(r.t[0], r.y[0], r.final[0])
            except ValueError:
                steps = None
        out.append(Candidate(cid, role, k, int(row["rank"]), c, rec, steps, cancelled_roots(spec.plant, c)))
    return out

