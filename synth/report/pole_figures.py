"""The closed-loop pole map with the allowed region and hidden modes (Figure 6)."""

from __future__ import annotations

import math

import numpy as np

from ..describe import fmt_complex
from ..lti import TransferFunction
from .candidates import Candidate
from .plotdata import FigureData, Mark, Panel, Points, Region, _f
from .style import MARKERS


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
        from ..evaluate.delay import DOMINANCE
        cap += (f" With the plant's dead time {plant.delay:g} s the points are the rightmost roots of the "
                f"quasi-polynomial (Newton on it; their number right of -{DOMINANCE:g} x decay rate counted by a "
                "crossing count), not poles of an approximant.")
    return FigureData("closed-loop-poles", "6. Closed-loop pole map", cap, panels, grid=(1, len(panels)),
                      size=(11.0, 7.6), figure_legend=True)
