"""The design report: one self-contained HTML page for chosen candidates of a run.

Seven figures (embedded as base64 PNG; no network, no JavaScript), then each
candidate's requirement table, certificate, controller in zero/pole/gain form and
the safety caution. Optionally the figures as PNG files too.

Two layers, kept apart so that tests can check the numbers without pixels:

* plot data: small pure functions (``reference_step_data`` ... ``tradeoff_data``)
  that return :class:`FigureData` built only from the evaluator's own results:
  the sampled step responses of :func:`synth.evaluate.step_responses`, the metric
  record of :func:`synth.describe.check_controller` (margins, crossover and peak
  frequencies, certified closed-loop poles), the hidden-mode test of
  :func:`synth.evaluate.stability.hidden_mode_mask` and the exact frequency
  response ``plant(jw) * controller(jw)``. Nothing is re-measured from a plot grid;
  a marker is placed at the frequency the evaluator reported and its label carries
  the evaluator's number;
* drawing: :func:`render_figure` turns a FigureData into a matplotlib Figure
  (Agg canvas, no pyplot state), :func:`html_page` assembles the page and
  :func:`write_outputs` stages every file in its folder and renames it into place,
  so a failure leaves nothing half-written.

Candidates are told apart by colour (the colour-blind-safe palette of Okabe & Ito,
"Color Universal Design", 2008, without its yellow, which is unreadable on white
paper) AND by line style and marker, so the figures also read in grey print.
Requirement limits are drawn in grey; the forbidden side is hatched.
"""

from __future__ import annotations

import base64
import html
import io
import itertools
import math
import os
import re
import tempfile
import textwrap
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from . import CAUTION, __version__
from .describe import check_controller, fmt_complex, fmt_num, verdict_text
from .evaluate import step_responses
from .evaluate.delay import DOMINANCE
from .evaluate.stability import hidden_mode_mask
from .evaluate.time import HORIZON_DECAYS
from .lti import TransferFunction, poly_from_roots
from .requirements import REQUIREMENTS
from .runs import Run, controller_of, find_row, ranked

FRONT_SIZE = 5            # candidates chosen automatically: knee + extreme of each objective
MAX_CANDIDATES = 7        # one palette colour each
DPI = 110

# Okabe & Ito (2008), yellow left out; then line styles and markers per candidate
PALETTE = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000")
DASHES = ("solid", (0, (7, 2.5)), (0, (1.2, 1.6)), (0, (7, 2, 1.5, 2)), (0, (12, 3)),
          (0, (4, 1.5, 1.2, 1.5, 1.2, 1.5)), (0, (3, 3)))
MARKERS = ("o", "s", "^", "v", "P", "X", "*")
LIMIT_COLOR = "#4d4d4d"
FORBIDDEN_FACE = "#d4d4d4"
ALLOWED_FACE = "#bfe3d6"

FIGURE_KEYS = ("reference-step", "load-step", "control-signal", "loop-frequency-response",
               "loop-complex-plane", "closed-loop-poles", "trade-off")

# axis labels with units, for the objectives of the trade-off view
METRIC_AXIS = {
    "settling_time_s": "settling time [s]",
    "rise_time_s": "rise time (10-90 %) [s]",
    "overshoot_pct": "overshoot [%]",
    "steady_state_error": "steady-state error [per unit reference]",
    "disturbance_peak": "load-step peak |y| [output units per unit load]",
    "disturbance_settling_time_s": "load-step settling time [s]",
    "disturbance_iae": "load-step IAE [output units x s]",
    "control_peak": "control peak |u| [actuator units per unit reference]",
    "sensitivity_peak": "sensitivity peak Ms [-]",
    "complementary_peak": "complementary peak Mt [-]",
    "disturbance_gain_peak": "peak |P S| [output per load units]",
    "control_gain_peak": "peak |C S| [actuator per output units]",
    "bandwidth_rad_s": "closed-loop bandwidth [rad/s]",
    "controller_hf_gain": "controller high-frequency gain |C(inf)| [actuator per output units]",
}


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
                               spec.options.pade_order)
        steps = None
        if rec["internally_stable"]:
            try:
                r = step_responses(spec.plant, c.num[None, :], c.den[None, :], spec.options.pade_order)
                steps = StepSeries(r.t[0], r.y[0], r.final[0])
            except ValueError:
                steps = None
        out.append(Candidate(cid, role, k, int(row["rank"]), c, rec, steps, cancelled_roots(spec.plant, c)))
    return out


# ================================================================== plot data
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


def _time_window(cands: list[Candidate], metric: str | None, limit: float | None) -> float:
    """Shown time span: 1.6 x the longest finite settling time or 1.2 x its limit, within the grids."""
    stable = [c for c in cands if c.steps is not None]
    if not stable:
        return 1.0
    ends = max(float(c.steps.t[-1]) for c in stable)
    vals = [1.6 * float(c.record[metric]) for c in stable if metric and _finite(c.record[metric])
            and float(c.record[metric]) > 0]
    if _finite(limit) and float(limit) > 0:
        vals.append(1.2 * float(limit))
    if not vals:
        return ends
    return min(max(vals), ends)


def _windowed(c: Candidate, t_end: float, col: int) -> tuple[np.ndarray, np.ndarray]:
    t = c.steps.t
    k = int(np.searchsorted(t, t_end, side="right"))
    k = min(max(k + 1, 2), t.size)
    tt, yy = t[:k], c.steps.y[:k, col]
    decay = float(c.record["decay_rate"])
    full = _finite(decay) and decay > 0 and t[-1] >= 0.999 * HORIZON_DECAYS / decay
    if tt[-1] < t_end and full:   # past the evaluator's full horizon the response equals its final value
        tt, yy = np.append(tt, t_end), np.append(yy, c.steps.final[col])
    return tt, yy


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


def _same_finals(cands: list[Candidate], col: int = 0, rel: float = 1e-3) -> bool:
    f = [float(c.steps.final[col]) for c in cands if c.steps is not None]
    return all(abs(x - f[0]) <= rel * max(abs(f[0]), 1e-12) for x in f) if f else True


def reference_step_data(cands: list[Candidate], requirements: dict, settling_band: float) -> FigureData:
    """Figure 1: reference step responses with overshoot limit, settling band and rise-time limit.

    The bounds are relative to the final value, as the evaluator judges them. When the
    candidates share one final value the output is drawn as it is, with bounds at
    final * (1 + max_overshoot_pct/100) and final * (1 +- settling_band); when they differ
    (no integral action) each output is drawn divided by its own exact final value, so one
    set of bounds (final = 1) applies to all; ``panel.params`` says which.
    """
    os_lim = requirements.get("max_overshoot_pct")
    ts_lim = requirements.get("max_settling_time_s")
    tr_lim = requirements.get("max_rise_time_s")
    t_end = _time_window(cands, "settling_time_s", ts_lim)
    stable = [c for c in cands if c.steps is not None]
    normalised = not _same_finals(stable)
    final = 1.0 if normalised else (float(stable[0].steps.final[0]) if stable else 1.0)
    ylabel = ("normalised output y(t) / y(\u221e) [-]" if normalised else "output y [plant output units]")
    p = Panel("Unit reference step: output" + (" divided by its final value" if normalised else " y(t)"),
              "time t [s]", ylabel, xlim=(0.0, t_end),
              params={"normalised": normalised, "final": final, "t_end": t_end})
    ys: list[float] = [0.0, final]
    for c in stable:
        t, y = _windowed(c, t_end, 0)
        r = c.record
        fc = float(c.steps.final[0])
        if normalised:
            y = y / fc if fc != 0 else y
        tail = f"; final value {_f(fc)}" if normalised else ""
        p.curves.append(Curve(f"{_cand_name(c)}: overshoot {_f(r['overshoot_pct'], 3)} %, settling "
                              f"{_f(r['settling_time_s'], 3)} s, rise {_f(r['rise_time_s'], 3)} s{tail}",
                              t, y, c.index, c.cid))
        ys += [float(np.nanmin(y)), float(np.nanmax(y))]
    if stable and final != 0.0:
        what = "1" if normalised else _f(final)
        p.bounds.append(Bound("", "final_value", final, 0.0, t_end, "", f"final value {what}"))
        if os_lim is not None:
            v = final * (1.0 + float(os_lim) / 100.0)
            p.bounds.append(Bound("max_overshoot_pct", "overshoot", v, 0.0, t_end,
                                  "above" if final > 0 else "below",
                                  f"overshoot limit {float(os_lim):g} %: {_f(v)}"))
            ys.append(v)
        if ts_lim is not None:
            a, b = final * (1 + settling_band), final * (1 - settling_band)
            hi, lo = max(a, b), min(a, b)
            p.bounds.append(Bound("max_settling_time_s", "settling_upper", hi, float(ts_lim), t_end, "above",
                                  f"settling band {_f(lo)} to {_f(hi)} (\u00b1{100 * settling_band:g} %) "
                                  f"after the settling-time limit {float(ts_lim):g} s"))
            p.bounds.append(Bound("max_settling_time_s", "settling_lower", lo, float(ts_lim), t_end, "below", None))
            p.bounds.append(Bound("max_settling_time_s", "settling_time_limit", float(ts_lim), lo, hi, "", None,
                                  vertical=True))
        if tr_lim is not None:
            p.marks.append(Mark("rise_time_limit", 0.0, 0.5 * final, float(tr_lim),
                                f"rise-time limit {float(tr_lim):g} s (10\u219290 % of final)",
                                x2=float(tr_lim), y2=0.5 * final))
    p.ylim = _ylim(ys)
    p.notes += _no_steps_note(cands)
    cap = ("Unit step of the reference, sampled exactly (zero-order-hold matrix exponential) on the "
           f"evaluator's own time grid; beyond the grid's end ({HORIZON_DECAYS:g} time constants of the "
           f"slowest closed-loop pole, where the transient has decayed by e^-{HORIZON_DECAYS:g}) a curve is held "
           "at its exact final value. Grey hatching marks where the output would "
           "violate a requirement: above the overshoot limit, and outside the settling band after the "
           "settling-time limit. The bar from t = 0 has the length of the allowed 10-90 % rise time.")
    if normalised:
        cap += (" The candidates settle to different final values (no integral action), so each output is "
                "divided by its own final value (listed in the legend) and the bounds apply to all.")
    return FigureData("reference-step", "1. Reference step response", cap, [p])


def _peak_figure(cands, requirements, key: str, col: int, metric: str, t_end: float, title: str,
                 ylabel: str, noun: str, fig_key: str, fig_title: str, caption: str) -> FigureData:
    lim = requirements.get(key)
    p = Panel(title, "time t [s]", ylabel, xlim=(0.0, t_end))
    ys: list[float] = [0.0]
    for c in cands:
        if c.steps is None:
            continue
        t, y = _windowed(c, t_end, col)
        extra = ""
        if metric == "disturbance_peak":
            extra = f", settling {_f(c.record['disturbance_settling_time_s'], 3)} s"
        p.curves.append(Curve(f"{_cand_name(c)}: peak |{noun}| {_f(c.record[metric], 4)}{extra}",
                              t, y, c.index, c.cid))
        ys += [float(np.nanmin(y)), float(np.nanmax(y))]
    if lim is not None:
        v = float(lim)
        p.bounds.append(Bound(key, "peak_upper", v, 0.0, t_end, "above",
                              f"limit |{noun}| \u2264 {v:g}"))
        p.bounds.append(Bound(key, "peak_lower", -v, 0.0, t_end, "below", None))
        ys += [v, -v]
    p.ylim = _ylim(ys)
    p.notes += _no_steps_note(cands)
    return FigureData(fig_key, fig_title, caption, [p])


def load_step_data(cands: list[Candidate], requirements: dict) -> FigureData:
    """Figure 2: output after a unit load step at the plant input, with the +- peak limit."""
    t_end = _time_window(cands, "disturbance_settling_time_s", None)
    ref_end = _time_window(cands, "settling_time_s", requirements.get("max_settling_time_s"))
    if not any(c.steps is not None and _finite(c.record["disturbance_settling_time_s"]) for c in cands):
        t_end = ref_end
    return _peak_figure(cands, requirements, "max_disturbance_peak", 1, "disturbance_peak", t_end,
                        "Unit load step at the plant input: output y(t)", "output y [plant output units]",
                        "y", "load-step", "2. Load-disturbance step response",
                        "Output after a unit step disturbance entering at the plant input (reference at zero), "
                        "on the evaluator's time grid. Grey hatching: |y| above the disturbance-peak limit.")


def control_signal_data(cands: list[Candidate], requirements: dict) -> FigureData:
    """Figure 3: control signal for the unit reference step, with the +- control-peak limit."""
    t_end = _time_window(cands, "settling_time_s", requirements.get("max_settling_time_s"))
    return _peak_figure(cands, requirements, "max_control_peak", 2, "control_peak", t_end,
                        "Unit reference step: control signal u(t)", "control u [actuator units]", "u",
                        "control-signal", "3. Control signal for the reference step",
                        "Actuator command for the unit reference step of Figure 1 (same time axis). "
                        "A proper compensator jumps to its high-frequency gain at t = 0+. Grey hatching: "
                        "|u| above the control-peak limit. Saturation is not modelled.")


# -------------------------------------------------------------- frequency
def _special_frequencies(rec: dict) -> list[float]:
    keys = ("phase_margin_rad_s", "crossover_rad_s", "gain_margin_rad_s", "gain_margin_low_rad_s",
            "sensitivity_peak_rad_s")
    return [float(rec[k]) for k in keys if _finite(rec.get(k)) and float(rec[k]) > 0]


def frequency_grid(cands: list[Candidate], plant: TransferFunction, freq_range=None,
                   points: int = 1600) -> np.ndarray:
    """Log-spaced grid (rad/s) over the corners of plant and controllers, the controller
    range and every evaluator frequency, which are inserted exactly."""
    mags, special = [], []
    for r in list(plant.zeros) + list(plant.poles):
        if abs(r) > 0:
            mags.append(abs(r))
    for c in cands:
        for r in list(c.controller.zeros) + list(c.controller.poles):
            if abs(r) > 0:
                mags.append(abs(r))
        special += _special_frequencies(c.record)
    if freq_range:
        mags += [float(freq_range[0]), float(freq_range[1])]
    mags += special
    if not mags:
        mags = [1.0]
    lo, hi = min(mags) / 10.0, max(mags) * 10.0
    if plant.delay:
        hi = min(hi, max(10.0 / plant.delay, 3.0 * max(special or [lo])))   # phase -wT: keep it legible
        points = int(min(20000, max(points, 2.2 * plant.delay * hi * np.log(hi / lo))))
    lo = max(lo, hi * 1e-8)
    w = np.logspace(np.log10(lo), np.log10(hi), points)
    return np.unique(np.concatenate([w, [s for s in special if lo <= s <= hi]]))


def loop_response(plant: TransferFunction, controller: TransferFunction, w: np.ndarray) -> np.ndarray:
    """Exact open-loop frequency response L(jw) = plant(jw) controller(jw), dead time included."""
    s = 1j * np.asarray(w, float)
    return plant(s) * controller(s)


def unwrapped_phase_deg(L: np.ndarray) -> np.ndarray:
    """Continuous phase in degrees along the grid, starting in (-270, 90] at its lowest frequency."""
    ph = np.degrees(np.unwrap(np.angle(L)))
    k = math.ceil((ph[0] - 90.0) / 360.0)
    return ph - 360.0 * k


def _at(w: np.ndarray, freq: float) -> int:
    return int(np.argmin(np.abs(w - freq)))


def _gm_text(gm: float) -> str:
    return f"{gm:+.3g} dB"


def loop_frequency_data(cands: list[Candidate], plant: TransferFunction, requirements: dict,
                        freq_range=None) -> FigureData:
    """Figure 4: |L(jw)| in dB and arg L(jw) in degrees, with crossover and margins marked."""
    w = frequency_grid(cands, plant, freq_range)
    mag = Panel("Open-loop gain |L(j\u03c9)|", "", "magnitude |L(j\u03c9)| [dB]", xscale="log",
                xlim=(float(w[0]), float(w[-1])))
    pha = Panel("Open-loop phase arg L(j\u03c9)", "frequency \u03c9 [rad/s]", "phase arg L(j\u03c9) [deg]",
                xscale="log", xlim=(float(w[0]), float(w[-1])))
    mag.bounds.append(Bound("", "unity_gain", 0.0, float(w[0]), float(w[-1]), "", "|L| = 1 (0 dB)"))
    refs: dict[float, float] = {}
    pm_lim = requirements.get("min_phase_margin_deg")
    mags_all, ph_all = [0.0], []
    for c in cands:
        L = loop_response(plant, c.controller, w)
        with np.errstate(divide="ignore"):
            db = 20.0 * np.log10(np.abs(L))
        ph = unwrapped_phase_deg(L)
        r = c.record
        pm, wpm, wc = r["phase_margin_deg"], r["phase_margin_rad_s"], r["crossover_rad_s"]
        gm, wgm = r["gain_margin_db"], r["gain_margin_rad_s"]
        gml, wgml = r["gain_margin_low_db"], r["gain_margin_low_rad_s"]
        parts = []
        if _finite(wc):
            parts.append(f"\u03c9c {_f(wc, 3)} rad/s")
        if _finite(pm):
            parts.append(f"PM {_f(pm, 3)}\u00b0")
        gms = [_gm_text(g) for g in (gm, gml) if _finite(g)]
        parts.append("GM " + " / ".join(gms) if gms else "GM unbounded")
        label = f"{_cand_name(c)}: " + ", ".join(parts)
        mag.curves.append(Curve(label, w, db, c.index, c.cid))
        pha.curves.append(Curve(None, w, ph, c.index, c.cid))
        mags_all += list(db[np.isfinite(db)])
        ph_all += list(ph)
        # crossover(s): the one with the smallest phase margin, and the highest one
        for f, what in ((wpm, "crossover_pm"), (wc, "crossover")):
            if not _finite(f) or f <= 0:
                continue
            if what == "crossover" and _finite(wpm) and abs(f - wpm) <= 1e-9 * f:
                continue
            k = _at(w, f)
            mag.marks.append(Mark("crossover", float(w[k]), float(db[k]), float(f),
                                  f"{c.tag} \u03c9c {_f(f, 3)} rad/s", cid=c.cid, style=c.index,
                                  freq_rad_s=float(f)))
        if _finite(pm) and _finite(wpm) and wpm > 0:
            k = _at(w, wpm)
            ref = float(ph[k]) - float(pm)
            refs.setdefault(round(ref, 6), ref)
            pha.marks.append(Mark("phase_margin", float(w[k]), ref, float(pm), f"{c.tag} PM {_f(pm, 3)}\u00b0",
                                  x2=float(w[k]), y2=float(ph[k]), cid=c.cid, style=c.index,
                                  freq_rad_s=float(wpm)))
        for g, f, kind in ((gm, wgm, "gain_margin"), (gml, wgml, "gain_margin_low")):
            if not _finite(g):
                continue
            f = float(f) if f is not None else math.nan
            if _finite(f) and f > 0 and w[0] <= f <= w[-1]:
                k = _at(w, f)
                x, y, where = float(w[k]), float(db[k]), f"at {_f(f, 3)} rad/s"
            else:   # the stabilising gain interval ends at w -> 0 or w -> inf: draw at the axis end
                at_zero = f == 0      # nudged apart per candidate so that the bars do not overlap
                x = float(w[0]) * 1.15 ** (c.index + 1) if at_zero else float(w[-1]) / 1.15 ** (c.index + 1)
                y, where = -float(g), ("as \u03c9 \u2192 0" if at_zero else "as \u03c9 \u2192 \u221e")
            mag.marks.append(Mark(kind, x, y, float(g), f"{c.tag} GM {_gm_text(g)} {where}", x2=x, y2=0.0,
                                  cid=c.cid, style=c.index, freq_rad_s=f))
    for ref in refs.values():
        pha.bounds.append(Bound("", "critical_phase", ref, float(w[0]), float(w[-1]), "",
                                f"{ref:.0f}\u00b0 (phase of -1)"))
        if pm_lim is not None:
            pha.bounds.append(Bound("min_phase_margin_deg", "phase_margin_limit", ref + float(pm_lim),
                                    float(w[0]), float(w[-1]), "",
                                    f"phase-margin limit {float(pm_lim):g}\u00b0: {ref + float(pm_lim):.0f}\u00b0"))
            ph_all.append(ref + float(pm_lim))
        ph_all.append(ref)
    if mags_all:
        lo, hi = np.percentile(mags_all, [0.5, 99.5]) if len(mags_all) > 10 else (min(mags_all), max(mags_all))
        lo = max(lo, -max(60.0, 1.5 * abs(hi)))     # the roll-off far below 0 dB says little
        mag.ylim = _ylim([lo, hi, 0.0] + [m.y for m in mag.marks], 0.06)
    if ph_all:
        pha.ylim = _ylim(ph_all, 0.06)
    mag.notes += [f"{c.tag}: no gain crossover" for c in cands if not _finite(c.record["crossover_rad_s"])]
    cap = ("Exact open-loop frequency response L(j\u03c9) = P(j\u03c9) C(j\u03c9)"
           + (f" (dead time {plant.delay:g} s exact)" if plant.delay else "")
           + ". Markers sit at the frequencies the evaluator found from polynomial roots: the gain "
             "crossover \u03c9c (on 0 dB), the phase margin PM (bar from the phase of -1 up to the loop "
             "phase at the crossover with the smallest margin) and the gain margins GM (bar from the loop "
             "gain to 0 dB at the phase crossovers ending the stabilising gain interval; a negative GM is "
             "how far the gain may fall, as for an open-loop unstable plant).")
    return FigureData("loop-frequency-response", "4. Open-loop magnitude and phase", cap, [mag, pha],
                      grid=(2, 1), size=(11.0, 8.6), sharex=True)


def complex_plane_data(cands: list[Candidate], plant: TransferFunction, requirements: dict,
                       freq_range=None, half_width: float = 2.2) -> FigureData:
    """Figure 5: L(jw) in the complex plane around -1, forbidden disc and closest approach."""
    w = frequency_grid(cands, plant, freq_range, points=4000)
    ms_lim = requirements.get("max_sensitivity_peak")
    dists = [1.0 / float(c.record["sensitivity_peak"]) for c in cands if _finite(c.record["sensitivity_peak"])
             and float(c.record["sensitivity_peak"]) > 0]
    hw = max(half_width, 1.3 * max(dists, default=0.0))
    xlim, ylim = (-1.0 - hw, -1.0 + hw), (-hw, hw)
    p = Panel("Open-loop response L(j\u03c9) near the critical point -1", "real part Re L [-]",
              "imaginary part Im L [-]", xlim=xlim, ylim=ylim, equal=True, legend="none")
    th = np.linspace(0, 2 * np.pi, 361)
    p.curves.append(Curve("|L| = 1", np.cos(th), np.sin(th), width=0.9, dash=(0, (2, 2))))
    if ms_lim is not None:
        r = 1.0 / float(ms_lim)
        p.discs.append(Disc("forbidden", -1.0 + 0j, r,
                            f"forbidden disc |1 + L| < 1/{float(ms_lim):g} = {_f(r, 3)} (Ms \u2264 {float(ms_lim):g})",
                            {"max_sensitivity_peak": float(ms_lim), "radius": r}))
    for c in cands:
        L = loop_response(plant, c.controller, w)
        x, y = L.real, L.imag
        arrow = _arrow_index(x, y, xlim, ylim)
        ms, wms = c.record["sensitivity_peak"], c.record["sensitivity_peak_rad_s"]
        label = f"{_cand_name(c)}: Ms {_f(ms, 3)}" + (f", closest |1 + L| = {_f(1 / ms, 3)}" if _finite(ms) else "")
        p.curves.append(Curve(label, x, y, c.index, c.cid, arrow_at=arrow))
        p.curves.append(Curve(None, x, -y, c.index, c.cid, width=0.9, alpha=0.45))
        if _finite(ms) and _finite(wms):
            Lw = complex(loop_response(plant, c.controller, np.array([float(wms)]))[0])
            p.marks.append(Mark("closest_approach", -1.0, 0.0, 1.0 / float(ms),
                                f"{c.tag} 1/Ms = {_f(1 / float(ms), 3)} at {_f(wms, 3)} rad/s",
                                x2=Lw.real, y2=Lw.imag, cid=c.cid, style=c.index, freq_rad_s=float(wms)))
    p.points.append(Points("critical point -1", np.array([-1.0]), np.array([0.0]), "critical",
                           marker="+", color="#000000", size=160))
    cap = ("The open-loop response for \u03c9 > 0 (arrow: increasing \u03c9; thin line: \u03c9 < 0, the "
           "mirror image). The distance from -1 to the curve is |1 + L| = 1/|S|; its minimum 1/Ms is drawn "
           "at the frequency where the evaluator found the sensitivity peak Ms.")
    if ms_lim is not None:
        cap += " The grey disc is the region the curve must not enter for the sensitivity-peak limit."
    return FigureData("loop-complex-plane", "5. Open loop in the complex plane", cap, [p], size=(11.0, 8.6),
                      figure_legend=True)


def _arrow_index(x: np.ndarray, y: np.ndarray, xlim, ylim) -> int | None:
    """Sample halfway along the visible arc length of a curve (for a direction arrow)."""
    vis = (x > xlim[0]) & (x < xlim[1]) & (y > ylim[0]) & (y < ylim[1])
    idx = np.flatnonzero(vis[:-1] & vis[1:])
    if idx.size < 2:
        return None
    seg = np.hypot(np.diff(x)[idx], np.diff(y)[idx])
    cum = np.cumsum(seg)
    return int(idx[np.searchsorted(cum, 0.5 * cum[-1])])


def _allowed_region(zeta: float | None, alpha: float | None, x_far: float) -> Region | None:
    """Polygon {Re s <= -alpha, damping >= zeta} out to Re s = x_far (< 0)."""
    if zeta is None and alpha is None:
        return None
    z = min(max(float(zeta), 0.0), 1.0) if zeta is not None else 0.0
    a = max(float(alpha), 0.0) if alpha is not None else 0.0
    half = math.acos(z)                      # half-angle of the sector from the negative real axis
    big = abs(x_far)
    if z <= 0.0:                             # no sector: half-plane left of -a
        xs = np.array([-a, -a, -big, -big])
        ys = np.array([big * 50, -big * 50, -big * 50, big * 50])
    else:
        tn = math.tan(half)
        xs = np.array([-a, -big, -big, -a])
        ys = np.array([a * tn, big * tn, -big * tn, -a * tn])
    parts = []
    if zeta is not None:
        parts.append(f"damping \u2265 {float(zeta):g} (sector half-angle {math.degrees(half):.1f}\u00b0)")
    if alpha is not None:
        parts.append(f"decay rate \u2265 {float(alpha):g} 1/s (Re s \u2264 -{float(alpha):g})")
    return Region("allowed", "allowed region: " + ", ".join(parts), xs, ys,
                  {"min_damping": zeta, "min_decay_rate": alpha, "half_angle_deg": math.degrees(half)})


def pole_map_data(cands: list[Candidate], plant: TransferFunction, requirements: dict) -> FigureData:
    """Figure 6: closed-loop poles (certified roots), plant and controller roots, allowed region,
    hidden modes; a full view and a view of the dominant region."""
    zeta, alpha = requirements.get("min_damping"), requirements.get("min_decay_rate")
    pp, pz = np.asarray(plant.poles, complex), np.asarray(plant.zeros, complex)
    allpts = list(pp) + list(pz)
    clp = {}
    for c in cands:
        clp[c.cid] = np.asarray(c.record["closed_loop_poles"], complex)
        allpts += list(clp[c.cid]) + list(c.controller.poles) + list(c.controller.zeros)
    allpts = np.asarray(allpts, complex) if allpts else np.zeros(1, complex)
    # full view
    xr = [float(allpts.real.min()), float(allpts.real.max()), 0.0]
    xspan = max(xr) - min(xr) or 1.0
    full_x = (min(xr) - 0.08 * xspan, max(xr) + 0.08 * xspan)
    full_h = max(float(np.abs(allpts.imag).max()) * 1.2, 0.3 * (full_x[1] - full_x[0]))
    # close-up: out to the slowest closed-loop pole of every candidate, the decay-rate line and
    # any plant root on or right of the imaginary axis, with room around them
    anchors = [float(np.min(np.abs(v))) for v in clp.values() if v.size]
    anchors += [abs(complex(r)) for r in list(pp) + list(pz) if r.real >= 0]
    anchors.append(float(alpha or 0.0))
    base = max(max(anchors), 1e-9)
    near = allpts[np.abs(allpts) <= 2.5 * base]
    R = 1.2 * max(float(np.abs(near).max()) if near.size else base, 2.0 * float(alpha or 0.0), base)
    right = max(0.3 * R, 1.25 * float(near.real.max()) if near.size else 0.0)
    views = [("All roots", full_x, (-full_h, full_h), False)]
    if R < 0.5 * max(abs(full_x[0]), abs(full_x[1])):     # a close-up only when it shows more
        views.append((f"Close-up of the slow roots (|s| \u2264 {_f(R, 3)} rad/s)", (-R, right), (-R, R), True))
    panels = []
    for title, xl, yl, equal in views:
        p = Panel(title, "real part Re s [1/s]", "imaginary part Im s [rad/s]", xlim=xl, ylim=yl,
                  equal=equal, legend="none")
        reg = _allowed_region(zeta, alpha, 100.0 * (xl[1] - xl[0]) + 100.0 * abs(xl[0]))
        if reg is not None:
            p.regions.append(reg)
        if pp.size:
            p.points.append(Points("plant pole", pp.real, pp.imag, "plant_pole", marker="x", color="#000000",
                                   size=110))
        if pz.size:
            p.points.append(Points("plant zero", pz.real, pz.imag, "plant_zero", marker="o", color="#000000",
                                   size=110, filled=False))
        for c in cands:
            cp, cz = np.asarray(c.controller.poles, complex), np.asarray(c.controller.zeros, complex)
            if cp.size:
                p.points.append(Points(f"{c.tag} controller pole", cp.real, cp.imag, "controller_pole", marker="+",
                                       style=c.index, size=120, cid=c.cid))
            if cz.size:
                p.points.append(Points(f"{c.tag} controller zero", cz.real, cz.imag, "controller_zero", marker="s",
                                       style=c.index, size=60, filled=False, cid=c.cid))
            cl = clp[c.cid]
            zmin = c.record["min_damping"]
            p.points.append(Points(f"{c.tag} closed loop: damping {_f(zmin, 3)}, decay "
                                   f"{_f(c.record['decay_rate'], 3)} 1/s", cl.real, cl.imag, "closed_loop_pole",
                                   marker=MARKERS[c.index % len(MARKERS)], style=c.index, size=55, cid=c.cid))
            if c.hidden_at:
                h = np.asarray(c.hidden_at, complex)
                p.points.append(Points(f"{c.tag} hidden mode (cancelled): {c.record['hidden_modes']}", h.real,
                                       h.imag, "hidden_mode", marker="o", color="#D55E00", size=520, filled=False,
                                       cid=c.cid))
                for z in h:
                    if z.imag >= 0:
                        p.marks.append(Mark("hidden_mode", float(z.real), float(z.imag), float(z.real),
                                            f"{c.tag} hidden mode s = {fmt_complex(z, 4)}", cid=c.cid,
                                            style=c.index))
        panels.append(p)
    panels[0].notes += [f"{c.tag}: NOT internally stable" for c in cands if not c.record["internally_stable"]]
    cap = ("Closed-loop poles are the roots of the unreduced characteristic polynomial (high-precision "
           "root finder, the certificate's roots); nothing is cancelled before the test, so a controller "
           "zero on an unstable plant pole leaves that pole in the closed loop, ringed as a hidden mode. "
           "Shaded: where the requirements allow closed-loop poles.")
    if plant.delay:
        cap += (f" With the plant's dead time {plant.delay:g} s the points are the rightmost roots of the "
                f"quasi-polynomial (Newton on it; their number right of -{DOMINANCE:g} x decay rate counted by a "
                "crossing count), not poles of an approximant.")
    return FigureData("closed-loop-poles", "6. Closed-loop pole map", cap, panels, grid=(1, len(panels)),
                      size=(11.0, 7.6), figure_legend=True)


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


@dataclass
class ReportData:
    run: Run
    table: pd.DataFrame
    candidates: list[Candidate]
    figures: list[FigureData]


def report_data(run: Run, ids: Sequence[int] | None = None) -> ReportData:
    """Everything the report shows, computed (no drawing, no files)."""
    df = ranked(run)
    cands = load_candidates(run, df, ids)
    spec = run.spec
    reqs = dict(spec.requirements)
    fr = spec.controller.frequency_range_rad_s
    figs = [reference_step_data(cands, reqs, spec.options.settling_band),
            load_step_data(cands, reqs),
            control_signal_data(cands, reqs),
            loop_frequency_data(cands, spec.plant, reqs, fr),
            complex_plane_data(cands, spec.plant, reqs, fr),
            pole_map_data(cands, spec.plant, reqs),
            tradeoff_data(df, list(spec.objectives), cands)]
    return ReportData(run, df, cands, figs)


# ================================================================== drawing
RC = {"font.size": 10, "axes.titlesize": 11, "axes.labelsize": 10, "legend.fontsize": 8.5,
      "xtick.labelsize": 9, "ytick.labelsize": 9, "axes.spines.top": False, "axes.spines.right": False,
      "axes.grid": True, "grid.color": "#e3e3e3", "grid.linewidth": 0.7, "axes.edgecolor": "#333333",
      "hatch.color": "#8f8f8f", "hatch.linewidth": 0.6, "font.family": "DejaVu Sans"}
LINE_MARKERS = ("x", "+", "|", "_", "1", "2", "3", "4")


@dataclass
class _Label:
    text: str
    xy: tuple[float, float]
    color: str
    bold: bool = False


def _color(style: int | None, fallback: str = LIMIT_COLOR) -> str:
    return PALETTE[style % len(PALETTE)] if style is not None else fallback


def _dash(style: int | None):
    return DASHES[style % len(DASHES)] if style is not None else "solid"


def _draw_bounds(ax, panel: Panel) -> None:
    ylo, yhi = panel.ylim if panel.ylim else ax.get_ylim()
    for b in panel.bounds:
        if b.vertical:
            ax.plot([b.value, b.value], [b.x0, b.x1], color=LIMIT_COLOR, lw=1.3, zorder=2)
            continue
        ls, lw = "solid", 1.3
        if b.kind in ("final_value", "critical_phase", "unity_gain"):
            ls, lw = (0, (1, 2)), 1.0
        elif b.kind == "phase_margin_limit":
            ls = (0, (5, 2))
        ax.plot([b.x0, b.x1], [b.value, b.value], color=LIMIT_COLOR, lw=lw, ls=ls, label=b.label, zorder=2)
        if b.forbidden in ("above", "below"):
            edge = yhi if b.forbidden == "above" else ylo
            if (edge - b.value) * (1 if b.forbidden == "above" else -1) > 0:
                ax.fill_between([b.x0, b.x1], [b.value] * 2, [edge] * 2, facecolor=FORBIDDEN_FACE,
                                edgecolor="#9a9a9a", hatch="///", lw=0, alpha=0.55, zorder=1)


def _draw_mark(ax, m: Mark, labels: list[_Label]) -> None:
    """The geometry of a mark now; its text is placed later, clear of the other labels."""
    if m.kind == "rise_time_limit":      # a ruler from t = 0 with the allowed duration
        ax.plot([m.x, m.x2], [m.y, m.y2], color=LIMIT_COLOR, lw=2.2, solid_capstyle="butt", zorder=5)
        for xe in (m.x, m.x2):
            ax.plot([xe], [m.y], marker="|", ms=12, mew=2, color=LIMIT_COLOR, zorder=6)
        labels.append(_Label(m.text, (m.x2, m.y2), LIMIT_COLOR))
        return
    col = _color(m.style, "#000000")
    mk = MARKERS[m.style % len(MARKERS)] if m.style is not None else "o"
    if m.x2 is not None:
        ax.plot([m.x, m.x2], [m.y, m.y2], color=col, lw=2.6, solid_capstyle="butt", zorder=5)
        ax.plot([m.x2], [m.y2], marker=mk, ms=6, color=col, mec="#000000", mew=0.6, zorder=6)
        labels.append(_Label(m.text, (m.x2, m.y2), col))
    else:
        ax.plot([m.x], [m.y], marker=mk, ms=7, color=col, mec="#000000", mew=0.7, zorder=6)
        labels.append(_Label(m.text, (m.x, m.y), col))


def _label_offsets():
    """Candidate text offsets (points) around an anchor, nearest first."""
    out = []
    for r in range(0, 16):
        for dy in ((8,) if r == 0 else (8 + 13 * r, 8 - 13 * r - 10)):
            for dx in (9, -9):
                out.append((dx, dy))
    return out


def _place_labels(ax, labels: list[_Label], obstacles: list) -> None:
    """Greedy placement: each label at the nearest offset whose box stays inside the axes and
    clear of the labels already placed and of the anchors; a thin leader line to its anchor."""
    if not labels:
        return
    from matplotlib.text import Text
    renderer = ax.figure.canvas.get_renderer()
    inside = ax.get_window_extent(renderer)
    taken = list(obstacles)
    for lab in labels:
        best = None
        for dx, dy in _label_offsets():
            ann = ax.annotate(lab.text, xy=lab.xy, xytext=(dx, dy), textcoords="offset points",
                              ha="left" if dx > 0 else "right", va="bottom", fontsize=8.2, color="#000000",
                              fontweight="bold" if lab.bold else "normal", zorder=8, annotation_clip=False,
                              bbox=dict(boxstyle="round,pad=0.2", fc="white", ec=lab.color, lw=1.1, alpha=0.93),
                              arrowprops=dict(arrowstyle="-", color=lab.color, lw=0.8, shrinkA=0, shrinkB=2))
            ann.update_positions(renderer)
            bb = Text.get_window_extent(ann, renderer).padded(3)     # the text box, not its leader line
            ok = (bb.x0 >= inside.x0 and bb.x1 <= inside.x1 and bb.y0 >= inside.y0 and bb.y1 <= inside.y1
                  and not any(bb.overlaps(t) for t in taken))
            if ok:
                best = ann
                taken.append(bb.expanded(1.04, 1.15))
                break
            ann.remove()
        if best is None:   # no free place: nearest offset, may overlap
            ann = ax.annotate(lab.text, xy=lab.xy, xytext=(9, 8), textcoords="offset points", fontsize=8.2,
                              zorder=8, bbox=dict(boxstyle="round,pad=0.2", fc="white", ec=lab.color, lw=1.1,
                                                  alpha=0.93))


def _draw_points(ax, pt: Points, labels: list[_Label]) -> None:
    col = pt.color or _color(pt.style)
    if pt.x.size == 0:
        ax.scatter([], [], s=pt.size, marker=pt.marker, label=pt.label, color=col)
        return
    kw = dict(s=pt.size, marker=pt.marker, alpha=pt.alpha, label=pt.label, zorder=5)
    if pt.marker in LINE_MARKERS:
        kw.update(color=col, linewidths=2.0 if pt.kind != "critical" else 1.6)
    elif pt.filled:
        kw.update(facecolor=col, edgecolor="#000000" if pt.kind in ("closed_loop_pole", "chosen") else "none",
                  linewidths=0.7)
    else:
        kw.update(facecolor="none", edgecolor=col, linewidths=2.2 if pt.kind == "hidden_mode" else 1.4)
    if pt.kind in ("plant_pole", "plant_zero", "chosen", "hidden_mode"):
        kw["zorder"] = 7
    if pt.kind in ("infeasible", "feasible"):
        kw.update(zorder=2, rasterized=True)
    ax.scatter(pt.x, pt.y, **kw)
    for i, t in enumerate(pt.texts or []):
        labels.append(_Label(t, (float(pt.x[i]), float(pt.y[i])), col, bold=True))


def _draw_panel(ax, panel: Panel) -> list[_Label]:
    """Everything but the texts of marks; returns those for :func:`_place_labels`."""
    labels: list[_Label] = []
    ax.set_title(panel.title, loc="left")
    ax.set_xlabel(panel.xlabel)
    ax.set_ylabel(panel.ylabel)
    ax.set_xscale(panel.xscale)
    ax.set_yscale(panel.yscale)
    if panel.xlim:
        ax.set_xlim(*panel.xlim)
    if panel.ylim:
        ax.set_ylim(*panel.ylim)
    for r in panel.regions:
        fc = ALLOWED_FACE if r.kind == "allowed" else FORBIDDEN_FACE
        ax.fill(r.x, r.y, facecolor=fc, edgecolor="#2f7d63", lw=1.2, alpha=0.75, label=r.label, zorder=0)
    for d in panel.discs:
        from matplotlib.patches import Circle
        ax.add_patch(Circle((d.center.real, d.center.imag), d.radius, facecolor=FORBIDDEN_FACE,
                            edgecolor=LIMIT_COLOR, hatch="///", lw=1.2, alpha=0.8, label=d.label, zorder=1))
    _draw_bounds(ax, panel)
    for cv in panel.curves:
        if cv.style is None:
            ax.plot(cv.x, cv.y, color="#7a7a7a", lw=cv.width, ls=cv.dash or "solid", label=cv.label,
                    alpha=cv.alpha, zorder=2)
            continue
        ax.plot(cv.x, cv.y, color=_color(cv.style), ls=_dash(cv.style), lw=cv.width, alpha=cv.alpha,
                label=cv.label, zorder=3 + 0.1 * cv.style)
        if cv.arrow_at is not None:
            i = cv.arrow_at
            ax.annotate("", xy=(cv.x[i + 1], cv.y[i + 1]), xytext=(cv.x[i], cv.y[i]),
                        arrowprops=dict(arrowstyle="-|>", color=_color(cv.style), lw=1.5, mutation_scale=20),
                        zorder=4)
    for pt in panel.points:
        _draw_points(ax, pt, labels)
    for m in panel.marks:
        _draw_mark(ax, m, labels)
    if panel.equal:
        ax.set_aspect("equal", adjustable="box")
    if panel.xlim:
        ax.set_xlim(*panel.xlim)
    if panel.ylim:
        ax.set_ylim(*panel.ylim)
    for i, note in enumerate(panel.notes):
        ax.text(0.99, 0.02 + 0.07 * i, note, transform=ax.transAxes, ha="right", va="bottom", fontsize=9,
                color="#8a1c00", zorder=9, bbox=dict(fc="white", ec="#8a1c00", lw=0.8, boxstyle="round,pad=0.3"))
    if panel.legend == "right":
        handles, names = ax.get_legend_handles_labels()
        if handles:
            ax.legend(handles, names, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False,
                      borderaxespad=0.0, handlelength=3.4)
    return labels


def _wrap_label(text: str, width: int = 60) -> str:
    """Legend text on two lines when long, never splitting a number from its unit."""
    if len(text) <= width + 6:
        return text
    glued = re.sub(r"(?<=\d) (?=[^\s,;:()]{1,5}(?:[\s,;:)]|$))", "\u00a0", text)
    return textwrap.fill(glued, width, subsequent_indent="  ").replace("\u00a0", " ")


def render_figure(fd: FigureData):
    """A matplotlib Figure (Agg canvas, no global pyplot state) for one FigureData.

    Layout is solved once with every artist but the mark texts, then frozen, and the
    texts are placed clear of each other inside their axes."""
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.transforms import Bbox
    with matplotlib.rc_context(RC):
        fig = Figure(figsize=fd.size, dpi=DPI, layout="constrained")
        FigureCanvasAgg(fig)
        rows, cols = fd.grid
        axes = fig.subplots(rows, cols, squeeze=False, sharex=fd.sharex)
        fig.suptitle(fd.title, x=0.01, ha="left", fontsize=13, fontweight="bold")
        flat = list(axes.flat)
        pending = [_draw_panel(ax, panel) for ax, panel in zip(flat, fd.panels)]
        for ax in flat[len(fd.panels):]:
            ax.set_visible(False)
        if fd.figure_legend:
            seen: dict[str, object] = {}
            for ax in flat[:len(fd.panels)]:
                for h, lab in zip(*ax.get_legend_handles_labels()):
                    seen.setdefault(lab, h)
            if seen:      # candidates first, then limits and reference lines
                seen = dict(sorted(seen.items(), key=lambda kv: not kv[0].startswith("#")))
                names = [_wrap_label(k) for k in seen]
                longest = max(len(line) for k in names for line in k.splitlines())
                ncol = 1 if longest > 66 else 2 if longest > 40 else 3
                fig.legend(list(seen.values()), names, loc="outside lower center",
                           ncol=min(ncol, len(seen)), frameon=False, fontsize=8.5, handlelength=3.4)
        fig.get_layout_engine().execute(fig)     # solve the layout once (no rasterising)
        fig.set_layout_engine("none")
        renderer = fig.canvas.get_renderer()
        for ax, labels, panel in zip(flat, pending, fd.panels):
            anchors = [lab.xy for lab in labels]     # keep the anchors and key points visible
            for pt in panel.points:
                if pt.kind in ("critical", "plant_pole", "plant_zero", "closed_loop_pole", "hidden_mode", "chosen"):
                    anchors += list(zip(np.asarray(pt.x, float), np.asarray(pt.y, float)))
            obstacles = []
            for xy in anchors:
                x, y = ax.transData.transform(xy)
                obstacles.append(Bbox([[x - 6, y - 6], [x + 6, y + 6]]))
            for t in ax.texts:
                obstacles.append(t.get_window_extent(renderer))
            _place_labels(ax, labels, obstacles)
    return fig


def figure_png(fd: FigureData) -> bytes:
    import matplotlib
    fig = render_figure(fd)
    buf = io.BytesIO()
    with matplotlib.rc_context(RC):
        fig.savefig(buf, format="png", dpi=DPI, facecolor="white", metadata={"Software": f"synth {__version__}"})
    return buf.getvalue()


# ================================================================== HTML
def _root_factor(r: complex) -> str:
    if abs(r) == 0:
        return "s"
    return f"(s {'+' if -r.real >= 0 else '-'} {fmt_num(abs(r.real), 5)})"


def roots_text(tf: TransferFunction, name: str = "C") -> str:
    """k (s - z1)... / ((s - p1)...) with conjugate pairs as quadratics, e.g. C(s) = 36.4 (s + 23.1) / (s + 45.9)."""
    def factors(roots) -> list[str]:
        out, done = [], np.zeros(len(roots), bool)
        roots = list(roots)
        for i, r in enumerate(roots):
            if done[i]:
                continue
            done[i] = True
            if abs(r.imag) <= 1e-9 * max(1.0, abs(r)):
                out.append(_root_factor(complex(r.real, 0.0)))
                continue
            j = next((j for j in range(i + 1, len(roots)) if not done[j]
                      and abs(roots[j] - np.conj(r)) <= 1e-6 * abs(r)), None)
            if j is not None:
                done[j] = True
            b, c = -2 * r.real, abs(r) ** 2
            out.append(f"(s\u00b2 {'+' if b >= 0 else '-'} {fmt_num(abs(b), 5)} s + {fmt_num(c, 5)})")
        return out
    z = sorted(tf.zeros, key=lambda x: (abs(x), x.imag))
    p = sorted(tf.poles, key=lambda x: (abs(x), x.imag))
    num = " ".join(factors(z)) or "1"
    den = " ".join(factors(p))
    text = f"{name}(s) = {fmt_num(tf.gain, 6)} \u00b7 {num}"
    if den:
        text += f" / ({den})" if len(factors(p)) > 1 else f" / {den}"
    return text


CSS = """
body{font-family:'DejaVu Sans',Arial,sans-serif;color:#1a1a1a;max-width:1180px;margin:24px auto;padding:0 16px;
line-height:1.4;font-size:14px}
h1{font-size:24px;margin-bottom:4px}h2{font-size:19px;border-bottom:2px solid #444;padding-bottom:3px;margin-top:34px}
h3{font-size:16px;margin:18px 0 6px}
table{border-collapse:collapse;margin:8px 0 14px;font-size:13px}
th,td{border:1px solid #9a9a9a;padding:3px 8px;text-align:left;vertical-align:top}
th{background:#ececec}td.num{text-align:right;font-family:'DejaVu Sans Mono',monospace;white-space:nowrap}
tr.fail td{background:#fbe3d9}tr.fail td.met{font-weight:bold}
.caution{border:2px solid #8a1c00;background:#fff4ef;padding:10px 14px;margin:14px 0;font-weight:bold}
.meta td:first-child{font-weight:bold;background:#f5f5f5}
figure{margin:22px 0;page-break-inside:avoid;break-inside:avoid}
figure img{width:100%;height:auto;border:1px solid #d0d0d0}
figcaption{font-size:13px;color:#333;margin-top:4px}
pre{background:#f5f5f5;border:1px solid #d0d0d0;padding:8px;white-space:pre-wrap;font-size:13px}
.swatch{display:inline-block;width:34px;height:0;border-top-width:4px;vertical-align:middle;margin-right:6px}
section.cand{page-break-before:always;break-before:page}
@media print{body{max-width:none;margin:0}a{color:inherit;text-decoration:none}}
"""

_CSS_DASH = ("solid", "dashed", "dotted", "dashed", "dashed", "dotted", "dashed")   # nearest to DASHES


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _swatch(c: Candidate) -> str:
    """A short line in the candidate's colour and (nearest CSS) dash, as in the figures."""
    i = c.index
    return (f'<span class="swatch" style="border-top-style:{_CSS_DASH[i % len(_CSS_DASH)]};'
            f'border-top-color:{PALETTE[i % len(PALETTE)]}"></span>')


def requirement_table_html(c: Candidate) -> str:
    reqs = c.record["requirements"]
    if not reqs:
        return "<p>The spec sets no requirements.</p>"
    rows = []
    for key, r in reqs.items():
        req = REQUIREMENTS[key]
        cls = "" if r["met"] else ' class="fail"'
        rows.append(f"<tr{cls}><td>{_e(key)}</td><td>{_e(req.meaning)}</td><td>{_e(req.unit or '-')}</td>"
                    f'<td class="num">{_e(fmt_num(r["value"], 5))}</td><td class="num">{_e(fmt_num(r["limit"], 5))}</td>'
                    f'<td class="num">{_e(fmt_num(r["slack"], 5))}</td><td class="met">{"yes" if r["met"] else "NO"}</td></tr>')
    return (f'<table class="req" data-candidate="{c.cid}"><tr><th>requirement</th><th>meaning</th><th>unit</th>'
            "<th>value</th><th>limit</th><th>slack</th><th>met</th></tr>" + "".join(rows) + "</table>")


def _candidate_section(c: Candidate) -> str:
    rec = c.record
    ctrl = rec["controller"]
    verdict = verdict_text(rec)
    met = [r["met"] for r in rec["requirements"].values()]
    metline = (f"{sum(met)} of {len(met)} requirements met" if met else "no requirements")
    poles = rec["closed_loop_poles"]
    prow = "".join(
        f'<tr><td class="num">{_e(fmt_complex(p, 7))}</td><td class="num">'
        f'{_e(fmt_num(-p.real / abs(p) if abs(p) else 1.0, 4))}</td><td class="num">{_e(fmt_num(abs(p), 5))}</td></tr>'
        for p in poles)
    zeros = ", ".join(fmt_complex(z, 6) for z in ctrl["zeros"]) or "none"
    pls = ", ".join(fmt_complex(p, 6) for p in ctrl["poles"]) or "none"
    return (f'<section class="cand" id="candidate-{c.cid}"><h2>{_swatch(c)}Candidate {_e(c.tag)} '
            f"({_e(c.role)}, rank {c.rank})</h2>"
            f"<h3>Controller (zero/pole/gain)</h3><pre>{_e(roots_text(c.controller))}</pre>"
            f"<p>gain k = {_e(fmt_num(ctrl['gain'], 8))}; zeros [{_e(zeros)}] rad/s; poles [{_e(pls)}] rad/s</p>"
            f"<h3>Verdict</h3><p>{_e(verdict)}; {_e(metline)}.</p>"
            f"<h3>Requirements</h3>{requirement_table_html(c)}"
            f'<h3>Certificate</h3><pre class="certificate">{_e(rec["certificate"]["text"])}</pre>'
            + (f"<h3>Loop roots ({len(poles)} roots of the quasi-polynomial with dead time, "
               f"{rec.get('loop_roots_counted', -1)} counted in Re s > -{DOMINANCE:g} x decay rate)</h3>"
               if rec["pade_order"]
               else f"<h3>Closed-loop poles ({len(poles)})</h3>")
            + "<table><tr><th>pole [1/s]</th><th>damping</th><th>|s| [rad/s]</th></tr>" + prow + "</table>"
            f'<p class="caution">{_e(CAUTION)}</p></section>')


def html_page(data: ReportData, images: list[bytes]) -> str:
    """The complete self-contained page (inline CSS, data: images, no script, no external link)."""
    run, spec, df = data.run, data.run.spec, data.table
    nfeas = int(df["feasible"].sum()) if len(df) else 0
    objs = list(spec.objectives)
    meta = [("spec", spec.name), ("run folder", str(run.folder)),
            ("plant", f"P(s): zeros [{', '.join(fmt_complex(z, 5) for z in spec.plant.zeros) or 'none'}], "
                      f"poles [{', '.join(fmt_complex(p, 5) for p in spec.plant.poles) or 'none'}], "
                      f"gain {fmt_num(spec.plant.gain, 6)}" + (f", dead time {spec.plant.delay:g} s"
                                                              if spec.plant.delay else "")),
            ("compensator family", run.manifest.get("family", "")),
            ("candidates", f"{len(df)} distinct, {nfeas} feasible"),
            ("objectives (minimised)", ", ".join(objs)),
            ("generated", time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()) + f" by synth {__version__}")]
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           f"<title>synth report: {_e(spec.name)}</title><style>{CSS}</style></head><body>",
           f"<h1>Design report: {_e(spec.name)}</h1>",
           '<table class="meta">' + "".join(f"<tr><td>{_e(k)}</td><td>{_e(v)}</td></tr>" for k, v in meta)
           + "</table>", f'<p class="caution">{_e(CAUTION)}</p>']
    if not nfeas:
        out.append("<p><b>No candidate of this run meets every requirement.</b> The report shows the "
                   "least-violating candidates.</p>")
    head = "".join(f"<th>{_e(o)}</th>" for o in objs)
    rows = []
    for c in data.candidates:
        rec = c.record
        cells = "".join(f'<td class="num">{_e(fmt_num(rec.get(o), 4))}</td>' for o in objs)
        rows.append(f'<tr><td style="white-space:nowrap">{_swatch(c)}{_e(c.tag)}</td><td>{_e(c.role)}</td><td class="num">{c.rank}</td>'
                    f"<td>{'yes' if rec['feasible'] else 'no'}</td><td>{'yes' if rec['certified'] else 'no'}</td>"
                    f"{cells}<td>{_e(roots_text(c.controller))}</td></tr>")
    out.append("<h2>Candidates in this report</h2><table class=\"cands\"><tr><th>id</th><th>why shown</th>"
               f"<th>rank</th><th>feasible</th><th>certified</th>{head}<th>controller</th></tr>"
               + "".join(rows) + "</table>")
    out.append("<h2>Figures</h2>")
    for fd, png in zip(data.figures, images):
        b64 = base64.b64encode(png).decode("ascii")
        out.append(f'<figure id="figure-{fd.key}"><img alt="{_e(fd.title)}" src="data:image/png;base64,{b64}">'
                   f"<figcaption><b>{_e(fd.title)}.</b> {_e(fd.caption)}</figcaption></figure>")
    for c in data.candidates:
        out.append(_candidate_section(c))
    out.append(f'<h2>Caution</h2><p class="caution">{_e(CAUTION)}</p></body></html>')
    return "\n".join(out) + "\n"


# ================================================================== files
def _check_destination(path: Path, what: str) -> None:
    if path.exists() and path.is_dir():
        raise ReportError(f"{what} {path}: is a folder; expected a file path such as {path / 'report.html'}")
    parent = path.parent
    if not parent.is_dir():
        raise ReportError(f"{what} {path}: the folder {parent} does not exist; expected an existing folder")
    try:
        fd, tmp = tempfile.mkstemp(dir=parent, prefix=f".{path.name}.", suffix=".tmp")
        os.close(fd)
        os.unlink(tmp)
    except OSError as e:
        raise ReportError(f"{what} {path}: cannot write there ({e.strerror or e}); expected a writable "
                          "location") from None


def _check_png_dir(d: Path) -> None:
    if d.exists() and not d.is_dir():
        raise ReportError(f"--png {d}: exists and is not a folder; expected a folder for the PNG files")
    probe = d if d.exists() else next((p for p in d.parents if p.exists()), Path("."))
    if not probe.is_dir() or not os.access(probe, os.W_OK | os.X_OK):
        raise ReportError(f"--png {d}: cannot write in {probe}; expected a writable folder")


def png_names() -> list[str]:
    return [f"{i}-{k}.png" for i, k in enumerate(FIGURE_KEYS, start=1)]


def write_outputs(html_text: str, html_path: Path, images: list[bytes], png_dir: Path | None) -> list[Path]:
    """Stage every file next to its destination, then rename them into place.

    On any failure the staged files (and a PNG folder this call created) are removed
    and ReportError is raised; nothing is half-written.
    """
    staged: list[tuple[str, Path]] = []
    created_dir = False

    umask = os.umask(0)
    os.umask(umask)

    def stage(dest: Path, data: bytes) -> None:
        fd, tmp = tempfile.mkstemp(dir=dest.parent, prefix=f".{dest.name}.", suffix=".tmp")
        staged.append((tmp, dest))
        with os.fdopen(fd, "wb") as f:
            f.write(data)
        os.chmod(tmp, 0o666 & ~umask)          # mkstemp's 0600 would hide the report from colleagues

    try:
        stage(html_path, html_text.encode("utf-8"))
        if png_dir is not None:
            if not png_dir.exists():
                png_dir.mkdir(parents=True)
                created_dir = True
            for name, data in zip(png_names(), images):
                stage(png_dir / name, data)
    except OSError as e:
        for tmp, _ in staged:
            if os.path.exists(tmp):
                os.unlink(tmp)
        if created_dir:
            try:
                png_dir.rmdir()
            except OSError:
                pass
        where = e.filename or html_path
        raise ReportError(f"{where}: cannot write the report ({e.strerror or e}); expected a writable "
                          "location") from None
    for tmp, dest in staged:
        os.replace(tmp, dest)
    return [dest for _, dest in staged]


def build_report(run: Run, ids: Sequence[int] | None = None, out: Path | None = None,
                 png: Path | None = None) -> Path:
    """Write the report of ``run`` (``ids`` or the front) to ``out`` (default RUN/report.html),
    and the figures as PNG files into ``png`` when given. Returns the HTML path.

    Raises ReportError (bad output path, too many ids, empty run) or ArchiveError
    (unknown id); nothing is written then.
    """
    out = Path(out) if out is not None else Path(run.folder) / "report.html"
    png = Path(png) if png is not None else None
    _check_destination(out, "-o")
    if png is not None:
        _check_png_dir(png)
    data = report_data(run, ids)
    images = [figure_png(fd) for fd in data.figures]
    write_outputs(html_page(data, images), out, images, png)
    return out


__all__ = ["ReportError", "build_report", "report_data", "choose_front", "render_figure",
           "html_page", "write_outputs", "roots_text", "FigureData", "Panel", "Curve", "Bound", "Mark", "Points",
           "Region", "Disc", "Candidate"]
