"""Plot-data records shared by every figure family, and small formatting helpers.

A figure is a :class:`FigureData` of :class:`Panel` s holding curves, requirement
bounds, labelled marks, point sets, shaded regions and discs; all numbers come from
the evaluator, so tests check them without pixels.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..describe import fmt_num
from .candidates import Candidate


@dataclass
class Curve:
    """A line; ``style`` is a candidate's style index, None for a neutral grey line."""
    label: str | None
    x: np.ndarray
    y: np.ndarray
    style: int | None = None
    cid: int | None = None
    width: float = 2.0
    alpha: float = 1.0
    dash: object = None            # neutral lines: matplotlib dash spec
    arrow_at: int | None = None    # sample index where a direction arrow is drawn


@dataclass
class Bound:
    """A requirement limit y = value for x0 <= x <= x1 (or x = value if ``vertical``).

    ``forbidden`` is the side that violates it ('above', 'below', 'left', 'right')
    or '' for a reference line. Limits are shared by all candidates and drawn in grey."""
    key: str
    kind: str
    value: float
    x0: float
    x1: float
    forbidden: str
    label: str | None
    vertical: bool = False


@dataclass
class Mark:
    """A point (x, y), or a segment to (x2, y2), labelled with an evaluator or spec number."""
    kind: str
    x: float
    y: float
    value: float
    text: str
    x2: float | None = None
    y2: float | None = None
    cid: int | None = None
    style: int | None = None
    freq_rad_s: float | None = None


@dataclass
class Points:
    label: str | None
    x: np.ndarray
    y: np.ndarray
    kind: str
    marker: str = "o"
    style: int | None = None
    color: str | None = None
    size: float = 30.0
    filled: bool = True
    alpha: float = 1.0
    texts: list[str] | None = None
    cid: int | None = None


@dataclass
class Region:
    """A shaded polygon ('allowed' or 'forbidden') with the numbers that define it."""
    kind: str
    label: str
    x: np.ndarray
    y: np.ndarray
    params: dict = field(default_factory=dict)


@dataclass
class Disc:
    kind: str
    center: complex
    radius: float
    label: str
    params: dict = field(default_factory=dict)


@dataclass
class Panel:
    title: str
    xlabel: str
    ylabel: str
    xscale: str = "linear"
    yscale: str = "linear"
    xlim: tuple | None = None
    ylim: tuple | None = None
    equal: bool = False
    curves: list[Curve] = field(default_factory=list)
    bounds: list[Bound] = field(default_factory=list)
    marks: list[Mark] = field(default_factory=list)
    points: list[Points] = field(default_factory=list)
    regions: list[Region] = field(default_factory=list)
    discs: list[Disc] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    params: dict = field(default_factory=dict)
    legend: str = "none"           # 'right': beside the axes; 'none': in the figure legend


@dataclass
class FigureData:
    key: str
    title: str
    caption: str
    panels: list[Panel]
    grid: tuple[int, int] = (1, 1)
    size: tuple[float, float] = (11.0, 6.0)
    sharex: bool = False
    figure_legend: bool = True     # one legend under the panels


def _f(x, d: int = 4) -> str:
    return fmt_num(x, d)


def _finite(x) -> bool:
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def _ylim(values: list[float], pad: float = 0.08) -> tuple[float, float]:
    v = np.asarray([x for x in values if _finite(x)], float)
    if v.size == 0:
        return (-1.0, 1.0)
    lo, hi = float(v.min()), float(v.max())
    span = hi - lo if hi > lo else max(abs(hi), 1.0)
    return (lo - pad * span, hi + pad * span)


def _no_steps_note(cands: list[Candidate]) -> list[str]:
    bad = [c.tag for c in cands if c.steps is None]
    if not bad:
        return []
    return [f"{', '.join(bad)}: not internally stable, no step response"]


def _cand_name(c: Candidate) -> str:
    return f"{c.tag} ({c.role})" if c.role else c.tag


