"""Frequency-response figures: open-loop magnitude/phase and the complex plane (Figures 4 and 5)."""

from __future__ import annotations

import math

import numpy as np

from ..lti import TransferFunction
from .candidates import Candidate
from .plotdata import Bound, Curve, Disc, FigureData, Mark, Panel, Points, _cand_name, _f, _finite, _ylim


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
