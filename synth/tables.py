"""Plain-text and JSON renderings of ranked candidates (terminal 100 columns wide).

Every row that is shown is first re-evaluated from its parameters with the exact
certificate (:func:`synth.runs.recheck`), so what the engineer reads is what the
exact evaluator says about that design.
"""

from __future__ import annotations

import textwrap

import numpy as np
import pandas as pd

from . import CAUTION
from .describe import fmt_complex, fmt_num
from .evaluate import METRICS
from .requirements import REQUIREMENTS, requirement_value
from .runs import Run, conflicts, family_of, recheck

WIDTH = 100
FALLOUT_LINES = 15
SHORT = {"settling_time_s": "settling_s", "disturbance_peak": "load_peak", "control_peak": "u_peak",
         "disturbance_iae": "load_iae", "disturbance_settling_time_s": "load_settle_s", "overshoot_pct": "overshoot_%",
         "control_gain_peak": "noise_gain", "sensitivity_peak": "Ms", "complementary_peak": "Mt"}


def _zp(run: Run, rows: pd.DataFrame):
    fam = family_of(run)
    gains, zeros, poles = fam.gain_zeros_poles(rows[fam.names].to_numpy(float))
    return gains, zeros, poles


def json_rows(run: Run, df: pd.DataFrame, n: int) -> list[dict]:
    """Row objects, best first: id, rank, feasible, certified, controller and every metric."""
    rows = recheck(run, df.head(n))
    if rows.empty:
        return []
    gains, zeros, poles = _zp(run, rows)
    out = []
    for i, (_, r) in enumerate(rows.iterrows()):
        obj = {"id": int(r["id"]), "rank": int(r["rank"]), "feasible": bool(r["feasible"]),
               "knee": bool(r.get("knee", False)),
               "controller": {"gain": float(gains[i]), "zeros": list(zeros[i]), "poles": list(poles[i])}}
        for m in METRICS:
            v = r[m]
            obj[m] = list(v[~np.isnan(v)]) if m == "closed_loop_poles" else v
        obj["robust_stable"] = bool(r.get("robust_stable", r["certified"]))   # worst case over a model set
        obj["requirements"] = {
            k: {"value": float(requirement_value(REQUIREMENTS[k], r.to_dict())), "limit": float(lim),
                "slack": float(r[f"slack_{k}"]), "met": bool(r[f"met_{k}"])}
            for k, lim in run.spec.requirements.items()}
        out.append(obj)
    return out


def _short(x: float) -> str:
    """3 significant digits, compact exponent: -6.91e3 rather than -6.91e+03."""
    t = f"{x:.3g}"
    if "e" in t:
        m, e = t.split("e")
        t = f"{m}e{int(e)}"
    return t


def _roots_text(roots) -> str:
    out = []
    for z in roots:
        if abs(z.imag) <= 1e-12 * max(1.0, abs(z)):
            out.append(_short(z.real))
        else:
            out.append(f"{_short(z.real)}{'+' if z.imag >= 0 else '-'}j{_short(abs(z.imag))}")
    return ",".join(out) or "-"


def ranked_text(run: Run, df: pd.DataFrame, n: int) -> str:
    """The ranked table: designs with their objectives, then requirement values with slack."""
    rows = recheck(run, df.head(n))
    lines = [f"{run.manifest.get('family', '')} on {run.spec.name}: {len(df)} candidates, "
             f"{int(df['feasible'].sum()) if len(df) else 0} feasible", ""]
    if run.spec.models is not None:   # values are worst cases; stability certified over the box
        lines[-1:] = [f"worst case over {run.spec.models.describe()}; stability certified, performance "
                      "sampled", ""]
    if rows.empty:
        return "\n".join(lines + ["(no candidates)"])
    objs = list(run.spec.objectives)
    gains, zeros, poles = _zp(run, rows)
    head = f"{'rank':>5} {'id':>7}  {'gain':>9}  {'zeros':<17} {'poles':<17}"
    for o in objs:
        head += f" {SHORT.get(o, o)[:11]:>11}"
    lines.append(head)
    for i, (_, r) in enumerate(rows.iterrows()):
        mark = "*" if r.get("knee", False) else (" " if r["feasible"] else "x")
        cert = "" if (r["certified"] or not r["feasible"]) else " (uncertified)"
        if run.spec.models is not None and not bool(r.get("robust_stable", True)):
            cert += " (not robustly stable)"
        z, p = _roots_text(zeros[i]), _roots_text(poles[i])
        line = f"{int(r['rank']):>4}{mark} {int(r['id']):>7}  {fmt_num(gains[i], 4):>9}  {z[:17]:<17} {p[:17]:<17}"
        for o in objs:
            line += f" {fmt_num(r[o], 4):>11}"
        lines.append(line + cert)
    lines.append("   * knee of the front   x infeasible (ranked by total normalised violation)")
    reqs = dict(run.spec.requirements)
    if reqs:
        k = min(len(rows), 5)
        lines += ["", "requirement values (slack) of the first rows"]
        head = f"{'requirement':<30}{'limit':>9}"
        for _, r in rows.head(k).iterrows():
            head += f"{'#' + str(int(r['id'])):>12}"
        lines.append(head)
        for key, lim in reqs.items():
            req = REQUIREMENTS[key]
            line = f"{key[:30]:<30}{fmt_num(lim, 4):>9}"
            for _, r in rows.head(k).iterrows():
                v = float(requirement_value(req, r.to_dict()))
                flag = "" if r[f"met_{key}"] else "!"
                line += f"{fmt_num(v, 4) + flag:>12}"
            lines.append(line)
        lines.append("   ! requirement not met; slack per requirement: 'synth show RUN ID'")
    return "\n".join(lines)


def design_summary(run: Run, df: pd.DataFrame, top: int) -> str:
    """What a design run found: bounds applied, counts, the table, conflicts when infeasible."""
    m = run.manifest
    lines = [f"run folder: {run.folder}"]
    t = (m.get("timings") or [{}])[-1]
    ff = t.get("first_feasible_s")
    lines.append(f"search: {t.get('evaluated', 0)} evaluations in {fmt_num(t.get('wall_s'), 3)} s; first "
                 f"feasible design after {fmt_num(ff, 3) + ' s' if ff is not None else 'none found'}")
    for note in m.get("bounds_applied", []):
        lines += textwrap.wrap("bound: " + note, WIDTH, subsequent_indent="       ")
    for note in m.get("infeasible_by_construction", []):
        lines += textwrap.wrap("CANNOT BE MET: " + note, WIDTH, subsequent_indent="       ")
    lines.append("")
    lines.append(ranked_text(run, df, top))
    if len(df) == 0 or not df["feasible"].any():
        lines += ["", "No candidate meets all requirements. The rows above violate the least."]
        lines.append("Requirements in conflict (best value reached when that requirement alone is dropped):")
        for c in conflicts(run):
            best = c["best_value_when_dropped"]
            lines.append(f"  {c['requirement']:<32} limit {fmt_num(c['limit'], 4):>9}   "
                         + (f"best {fmt_num(best, 4)} among {c['candidates_meeting_others']} candidates "
                            "meeting the others" if best is not None else "no candidate meets the others either"))
        for note in fundamental_limits(run):
            lines += textwrap.wrap("limit: " + note, WIDTH, subsequent_indent="       ")
    lines += [""] + textwrap.wrap(CAUTION, WIDTH)
    return "\n".join(lines)


def fundamental_limits(run: Run) -> list[str]:
    """Published limits that apply to the plant (Skogestad & Postlethwaite 2005, ch. 5)."""
    from .limits import plant_limits
    return plant_limits(run.spec.plant, dict(run.spec.requirements))


def fallout_text(before: pd.DataFrame, after: pd.DataFrame, requirements: dict) -> str:
    """Which former front members are no longer feasible under the new requirements, and why."""
    if before.empty:
        return "the archive is empty"
    front = before[before["feasible"] & (before["front"] == 0)]
    nf_after = int(after["feasible"].sum()) if len(after) else 0
    lines = [f"re-ranked {len(after)} stored candidates under the new requirements: {nf_after} feasible "
             f"(was {int(before['feasible'].sum())})"]
    now = after.set_index("id")
    out = []
    for cid in front["id"]:
        r = now.loc[cid]
        if bool(r["feasible"]):
            continue
        why = [f"{k} ({fmt_num(float(requirement_value(REQUIREMENTS[k], r.to_dict())), 4)} vs "
               f"{fmt_num(v, 4)})" for k, v in requirements.items() if not bool(r[f"met_{k}"])]
        out.append(f"  #{int(cid)} falls out: {', '.join(why) or 'undefined metric'}")
    lines.append(f"{len(out)} of {len(front)} former front members fall out" + (":" if out else ""))
    shown = out[:FALLOUT_LINES]
    if len(out) > FALLOUT_LINES:
        shown.append(f"  ... and {len(out) - FALLOUT_LINES} more")
    return "\n".join(lines + shown)
