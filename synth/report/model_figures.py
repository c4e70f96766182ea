"""Report figures for a model set: response envelopes over all models and their pole map.

Plot data only (:class:`synth.report.FigureData`); drawing is the report's own
:func:`synth.report.render_figure`. Every curve comes from the evaluator: step
responses from :func:`synth.evaluate.step_responses` on each model (dead time by
the evaluator's Padé approximant, order reported), open-loop magnitude from the
exact frequency response ``plant(jw) * controller(jw)`` (dead time exact), poles
from the batched companion eigenvalues of each model's unreduced characteristic
polynomial. Envelopes are the pointwise minimum and maximum over the models after
linear interpolation onto one time grid (for display only); the model that sets
the worst overshoot (step) and the worst sensitivity peak (frequency) is drawn
and named. Performance inside a coefficient box is sampled; the figure says so.
"""

from __future__ import annotations

import numpy as np

from ..evaluate import step_responses
from ..evaluate import stability

ENVELOPE_POINTS = 600


def _worst(rec: dict, key_metric: str) -> str | None:
    """Name of the model with the largest value of a requirement's metric in a robust check record."""
    models = rec.get("models") or []
    best, name = -np.inf, None
    for m in models:
        for k, v in m["values"].items():
            if k.endswith(key_metric) and v is not None and np.isfinite(v) and v > best:
                best, name = v, m["name"]
    return name


def _step_values(model_set, controller, pade_order):
    out = []
    for m in model_set.members:
        try:
            r = step_responses(m.plant, controller.num[None, :], controller.den[None, :], pade_order)
        except ValueError:
            out.append((m, None, None))
            continue
        out.append((m, r.t[0], r.y[0][:, 0]))   # reference -> y
    return out


def model_set_figures(cands, model_set, requirements: dict, pade_order: int, freq_range) -> list:
    """FigureData for the first candidate of a report: step envelope, |L| envelope, pole map of all models."""
    from .plotdata import Curve, FigureData, Panel, Points
    if not cands or model_set is None or model_set.trivial:
        return []
    c = cands[0]
    ctrl = c.controller
    rec = c.record
    steps = _step_values(model_set, ctrl, pade_order)
    unstable = [m.name for m, t, _ in steps if t is None]
    t_end = max((t[-1] for _, t, _ in steps if t is not None), default=1.0)
    if c.steps is not None:
        t_end = min(t_end, 3.0 * float(c.steps.t[-1]))
    tg = np.linspace(0.0, t_end, ENVELOPE_POINTS)
    ys = np.array([np.interp(tg, t, y, right=y[-1]) for _, t, y in steps if t is not None])
    worst_step = _worst(rec, "overshoot_pct") or _worst(rec, "settling_time_s")
    step_panel = Panel(title="reference step, all models", xlabel="time (s)", ylabel="output y")
    if ys.size:
        step_panel.curves += [Curve("envelope over the models (min / max)", tg, ys.min(axis=0), None, dash="dashed",
                                    width=1.2),
                              Curve(None, tg, ys.max(axis=0), None, dash="dashed", width=1.2)]
    for m, t, y in steps:
        if m.kind == "nominal" and t is not None:
            step_panel.curves.append(Curve(f"#{c.cid} nominal", t, y, c.index, c.cid))
        if worst_step and m.name == worst_step and t is not None and m.kind != "nominal":
            step_panel.curves.append(Curve(f"#{c.cid} worst case: {m.name}", t, y, (c.index + 1) % 7, c.cid,
                                           width=1.6))
    if unstable:
        step_panel.notes.append(f"unstable: {', '.join(unstable[:3])}{' ...' if len(unstable) > 3 else ''}")
    step_panel.xlim = (0.0, t_end)

    lo, hi = freq_range
    w = np.logspace(np.log10(lo), np.log10(hi), 400)
    mags = np.array([np.abs(m.plant(1j * w) * ctrl(1j * w)) for m in model_set.members])
    freq_panel = Panel(title="open-loop gain |L(jw)|, all models", xlabel="frequency (rad/s)", ylabel="|L|",
                       xscale="log", yscale="log")
    freq_panel.curves += [Curve("envelope over the models (min / max)", w, mags.min(axis=0), None, dash="dashed",
                                width=1.2),
                          Curve(None, w, mags.max(axis=0), None, dash="dashed", width=1.2),
                          Curve(f"#{c.cid} nominal", w, mags[0], c.index, c.cid)]
    worst_ms = _worst(rec, "sensitivity_peak")
    names = [m.name for m in model_set.members]
    if worst_ms and worst_ms in names and worst_ms != "nominal":
        freq_panel.curves.append(Curve(f"#{c.cid} worst sensitivity peak: {worst_ms}", w, mags[names.index(worst_ms)],
                                       (c.index + 1) % 7, c.cid, width=1.6))
    freq_panel.curves.append(Curve("|L| = 1", w, np.ones_like(w), None, dash="dotted", width=1.0))

    pole_panel = Panel(title="closed-loop poles, all models", xlabel="real part (1/s)", ylabel="imaginary part (rad/s)")
    colors = {"nominal": "#000000", "variant": "#D55E00", "vertex": "#0072B2", "sample": "#9a9a9a"}
    markers = {"nominal": "o", "variant": "s", "vertex": "x", "sample": "."}
    span = []
    for kind in ("sample", "vertex", "variant", "nominal"):
        pts = []
        for m in model_set.members:
            if m.kind != kind:
                continue
            rp = m.plant.with_pade(pade_order) if m.plant.delay else m.plant
            ch = stability.characteristic(rp.num, rp.den, ctrl.num[None, :], ctrl.den[None, :])
            p = stability.closed_loop_poles(ch)[0]
            pts.append(p[~np.isnan(p)])
            if not m.plant.delay:
                span.append(np.abs(p[~np.isnan(p)]).max(initial=0.0))
        if pts:
            p = np.concatenate(pts)
            pole_panel.points.append(Points(f"{kind} model poles", p.real, p.imag, "model_pole",
                                            marker=markers[kind], color=colors[kind], size=18 if kind != "nominal" else 30))
    if span and any(m.plant.delay for m in model_set.members):   # Padé poles of dead-time models: off-scale
        r = 1.15 * max(span)
        pole_panel.xlim, pole_panel.ylim = (-r, 0.1 * r), (-r, r)
        pole_panel.notes.append(f"Padé poles of dead-time models beyond |s| = {r:.3g} not shown")
    note = ("stability over the coefficient box certified (generalized Kharitonov); these curves sample it"
            if model_set.box is not None and model_set.box.k else "every model shown")
    cap = (f"Candidate #{c.cid} on {model_set.describe()}. Dashed grey: pointwise min and max over the models "
           f"(responses interpolated onto one grid for display); coloured: nominal and the model that sets the "
           f"worst case. {note}. Robust stability: {'yes' if rec.get('robust_stable') else 'NO'}.")
    return [FigureData("model-set", f"Model set: responses and poles of candidate #{c.cid}", cap,
                       [step_panel, freq_panel, pole_panel], grid=(1, 3), size=(15.0, 5.2))]
