"""Page assembly: the figures of a run's chosen candidates and the self-contained HTML page."""

from __future__ import annotations

import base64
import html
import time
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from .. import CAUTION, __version__
from ..evaluate.delay import DOMINANCE
from ..describe import fmt_complex, fmt_num, verdict_text
from ..lti import TransferFunction
from ..requirements import REQUIREMENTS
from ..runs import Run, ranked
from .candidates import Candidate, load_candidates
from .frequency_figures import complex_plane_data, loop_frequency_data
from .plotdata import FigureData
from .pole_figures import pole_map_data
from .style import PALETTE
from .time_figures import control_signal_data, load_step_data, reference_step_data
from .tradeoff_figures import tradeoff_data


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
    from .model_figures import model_set_figures      # model sets: envelopes and pole map of all models
    figs += model_set_figures(cands, spec.models, reqs, spec.options.pade_order, fr)
    return ReportData(run, df, cands, figs)


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
               + (f"{rec['loop_roots_counted']} counted in Re s > -{DOMINANCE:g} x decay rate by two "
                  "independent counts)</h3>" if rec.get("loop_roots_counted", -1) >= 0
                  else f"not counted in Re s > -{DOMINANCE:g} x decay rate)</h3>")
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
