"""Drawing: a FigureData becomes a matplotlib Figure (Agg canvas, no pyplot state) or PNG bytes."""

from __future__ import annotations

import io
import re
import textwrap
from dataclasses import dataclass

import numpy as np

from .. import __version__
from .plotdata import FigureData, Mark, Panel, Points
from .style import ALLOWED_FACE, DASHES, DPI, FORBIDDEN_FACE, LIMIT_COLOR, MARKERS, PALETTE


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
