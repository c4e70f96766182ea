"""Time-response figures: reference step, load step and control signal (Figures 1 to 3)."""

from __future__ import annotations

import numpy as np

from ..evaluate.time import HORIZON_DECAYS
from .candidates import Candidate
from .plotdata import Bound, Curve, FigureData, Mark, Panel, _cand_name, _f, _finite, _no_steps_note, _ylim


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
