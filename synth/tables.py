"""Plain-text and JSON renderings of ranked candidates (terminal 100 columns wide).

Both renderings start from the same JSON row records (:func:`records`): the first
rows of a table carry the exact certificate (re-evaluated from their parameters by
:func:`synth.runs.recheck` and stored in the run when the search ended), so what the
engineer reads is what the exact evaluator says about that design. Rendering needs
neither pandas nor the evaluator, so a stored table prints at once.
"""

from __future__ import annotations

import itertools
import json
import math
import textwrap

import numpy as np

from . import CAUTION
from .describe import fmt_num
from .metric_names import METRICS
from .requirements import REQUIREMENTS, requirement_value
from .runs import Run, TableView, conflicts, family_of

WIDTH = 100
FALLOUT_LINES = 15
SHORT = {"settling_time_s": "settling_s", "disturbance_peak": "load_peak", "control_peak": "u_peak",
         "disturbance_iae": "load_iae", "disturbance_settling_time_s": "load_settle_s", "overshoot_pct": "overshoot_%",
         "control_gain_peak": "noise_gain", "sensitivity_peak": "Ms", "complementary_peak": "Mt"}


def _zp(run: Run, rows):
    """Gains (N,) and zeros and poles of each row's controller: (N, k) complex arrays for a
    lead-lag family (the same roots as Family.gain_zeros_poles, without its per-row loop),
    lists of arrays otherwise."""
    fam = family_of(run)
    p = rows[fam.names].to_numpy(float)
    if fam.kind == "lead-lag" and len(p):
        zc = [c for _, c, _ in fam.pairs]
        pc = [c for _, _, c in fam.pairs]
        zeros = -(10.0 ** p[:, zc]).astype(complex)          # as Family.gain_zeros_poles, -0j included
        poles = np.hstack([-(10.0 ** p[:, pc]), np.zeros((len(p), int(fam.integrator)))]).astype(complex)
        return fam.sign * 10.0 ** p[:, 0], zeros, poles
    return fam.gain_zeros_poles(p)


def _column(values) -> list:
    """A numeric column as JSON values: NaN -> None, +-inf -> "inf"/"-inf"."""
    a = np.asarray(values)
    if a.dtype == bool:
        return a.tolist()
    if a.dtype.kind in "iu":
        return a.tolist()
    if a.dtype.kind != "f":
        return [v if isinstance(v, str) else (None if v is None else v) for v in a.tolist()]
    out = a.tolist()
    for k in np.flatnonzero(~np.isfinite(a)):
        x = out[k]
        out[k] = None if math.isnan(x) else ("inf" if x > 0 else "-inf")
    return out


def _roots(rows_of_roots) -> list:
    return [[[float(z.real), float(z.imag)] for z in r] for r in rows_of_roots]


def records(run: Run, rows, details: bool = False) -> list[dict]:
    """JSON row records of ``rows`` as given (no evaluation here), in their order: id, rank,
    feasible, knee, controller (gain, zeros, poles), with ``details`` the PID forms or the
    stage activity (:func:`synth.describe.structure_details`), and every metric, then the requirements
    with value, limit, slack and met. ``closed_loop_poles`` is None for rows that were not
    re-evaluated with the certificate (the search stores no poles). Built column-wise so
    that a whole run of tens of thousands of rows converts in about a second."""
    if rows.empty:
        return []
    n = len(rows)
    gains, zeros, poles = _zp(run, rows)
    cols: dict[str, list] = {
        "id": rows["id"].astype(int).tolist(), "rank": rows["rank"].astype(int).tolist(),
        "feasible": rows["feasible"].astype(bool).tolist(),
        "knee": rows["knee"].astype(bool).tolist() if "knee" in rows else [False] * n}
    ctrl = [{"gain": g, "zeros": z, "poles": p}
            for g, z, p in zip(_column(gains), _roots(zeros), _roots(poles))]
    for m in METRICS:
        if m == "closed_loop_poles":
            cols[m] = (_roots([np.asarray(v)[~np.isnan(v)] for v in rows[m]]) if m in rows else [None] * n)
        elif m in ("internally_stable", "certified"):
            cols[m] = rows[m].astype(bool).tolist()
        elif m == "hidden_modes":
            cols[m] = ["" if v is None else str(v) for v in rows[m].tolist()]
        else:
            cols[m] = _column(rows[m].to_numpy(float))
    cols["robust_stable"] = _robust_column(rows).tolist()    # worst case over a model set
    reqs = {}
    for k, lim in run.spec.requirements.items():
        reqs[k] = (_column(requirement_value(REQUIREMENTS[k], rows)), _column(np.full(n, float(lim))),
                   _column(rows[f"slack_{k}"].to_numpy(float)), rows[f"met_{k}"].astype(bool).tolist())
    extra = _details(run, rows) if details else [{}] * n
    out = []
    keys = list(cols)
    for i in range(n):
        obj = {"id": cols["id"][i], "rank": cols["rank"][i], "feasible": cols["feasible"][i],
               "knee": cols["knee"][i], "controller": ctrl[i]}
        d = extra[i]
        if "pid_forms" in d:
            obj["pid_forms"] = {k: v for k, v in d["pid_forms"].items() if k != "text"}
        if "stages" in d:
            obj["stages"] = d["stages"]
        for m in keys[4:]:
            obj[m] = cols[m][i]
        obj["requirements"] = {k: {"value": v[0][i], "limit": v[1][i], "slack": v[2][i], "met": v[3][i]}
                               for k, v in reqs.items()}
        out.append(obj)
    return out


def _details(run: Run, rows) -> list[dict]:
    """Per row: ``pid_forms`` (PID/PI) or ``stages`` (lead-lag), see synth.describe.structure_details."""
    from .describe import structure_details
    fam = family_of(run)
    P = rows[fam.names].to_numpy(float)
    return [structure_details(fam, P[i], r) for i, r in enumerate(rows.to_dict("records"))]


def _robust_column(rows) -> np.ndarray:
    """``robust_stable`` of each row (stability over the whole model set; without a model set
    the loop's own verdict: certified if re-evaluated, else the screening verdict)."""
    if "robust_stable" in rows:
        return rows["robust_stable"].to_numpy(bool)
    return rows["certified"].to_numpy(bool)


def _json_column(values) -> list[str]:
    """A column as JSON texts, exactly as :func:`json.dumps` writes :func:`_column`'s values."""
    a = np.asarray(values)
    if a.dtype == bool:
        return ["true" if v else "false" for v in a.tolist()]
    if a.dtype.kind in "iu":
        return [str(v) for v in a.tolist()]
    if a.dtype.kind != "f":
        return [json.dumps(v) for v in _column(a)]
    out = list(map(float.__repr__, a.tolist()))
    bad = ~np.isfinite(a)
    if bad.any():
        for k in np.flatnonzero(np.isnan(a)).tolist():
            out[k] = "null"
        for k in np.flatnonzero(np.isposinf(a)).tolist():
            out[k] = '"inf"'
        for k in np.flatnonzero(np.isneginf(a)).tolist():
            out[k] = '"-inf"'
    return out


def _json_roots(rows_of_roots) -> list[str]:
    """Lists of roots as JSON texts ``[[re, im], ...]`` (column-wise when every row has as many)."""
    sizes = {rows_of_roots.shape[1]} if isinstance(rows_of_roots, np.ndarray) else {len(r) for r in rows_of_roots}
    if len(sizes) != 1:
        return [json.dumps(r) for r in _roots(rows_of_roots)]
    k = sizes.pop()
    if k == 0:
        return ["[]"] * len(rows_of_roots)
    z = rows_of_roots if isinstance(rows_of_roots, np.ndarray) else \
        np.asarray([np.asarray(r, dtype=complex) for r in rows_of_roots]).reshape(len(rows_of_roots), k)
    parts = []
    for j in range(k):
        parts += [itertools.repeat("[" if j == 0 else ", "), itertools.repeat("["),
                  _json_column(z[:, j].real), itertools.repeat(", "), _json_column(z[:, j].imag),
                  itertools.repeat("]")]
    parts.append(itertools.repeat("]"))
    return ["".join(t) for t in zip(*parts)]


def records_json(run: Run, rows) -> list[str]:
    """The JSON texts of :func:`records` (``json.dumps`` of each, byte for byte), built column by
    column without the per-row dictionaries: what ``table --json --all`` streams."""
    if rows.empty:
        return []
    n = len(rows)
    gains, zeros, poles = _zp(run, rows)
    rep = itertools.repeat
    knee = rows["knee"].to_numpy(bool) if "knee" in rows else np.zeros(n, bool)
    parts = [rep('{"id": '), _json_column(rows["id"].to_numpy().astype(np.int64)),
             rep(', "rank": '), _json_column(rows["rank"].to_numpy().astype(np.int64)),
             rep(', "feasible": '), _json_column(rows["feasible"].to_numpy(bool)),
             rep(', "knee": '), _json_column(knee),
             rep(', "controller": {"gain": '), _json_column(np.asarray(gains, float)),
             rep(', "zeros": '), _json_roots(zeros), rep(', "poles": '), _json_roots(poles), rep("}")]
    for m in METRICS:
        parts.append(rep(f", {json.dumps(m)}: "))
        if m == "closed_loop_poles":
            parts.append(_json_roots([np.asarray(v)[~np.isnan(v)] for v in rows[m]]) if m in rows
                         else rep("null"))
        elif m in ("internally_stable", "certified"):
            parts.append(_json_column(rows[m].to_numpy(bool)))
        elif m == "hidden_modes":
            parts.append([json.dumps("" if v is None else str(v)) for v in rows[m].tolist()])
        else:
            parts.append(_json_column(rows[m].to_numpy(float)))
    parts += [rep(', "robust_stable": '), _json_column(_robust_column(rows))]
    parts.append(rep(', "requirements": {'))
    for i, (k, lim) in enumerate(run.spec.requirements.items()):
        parts += [rep((", " if i else "") + f'{json.dumps(k)}: {{"value": '),
                  _json_column(requirement_value(REQUIREMENTS[k], rows)),
                  rep(', "limit": ' + _json_column(np.array([float(lim)]))[0] + ', "slack": '),
                  _json_column(rows[f"slack_{k}"].to_numpy(float)), rep(', "met": '),
                  _json_column(rows[f"met_{k}"].to_numpy(bool)), rep("}")]
    parts.append(rep("}}"))
    return ["".join(t) for t in zip(*parts)]


def json_rows(run: Run, df, n: int) -> list[dict]:
    """Row objects of the first ``n`` rows of a ranked table, best first, with certificates."""
    from .runs import recheck
    return records(run, recheck(run, df.head(n)), details=True)


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
        z = complex(*z) if isinstance(z, (list, tuple)) else complex(z)
        if abs(z.imag) <= 1e-12 * max(1.0, abs(z)):
            out.append(_short(z.real))
        else:
            out.append(f"{_short(z.real)}{'+' if z.imag >= 0 else '-'}j{_short(abs(z.imag))}")
    return ",".join(out) or "-"


def ranked_text(run: Run, view: TableView) -> str:
    """The ranked table: designs with their objectives, then requirement values with slack."""
    rows = list(view.records)
    lines = [f"{run.manifest.get('family', '')} on {run.spec.name}: {view.total} candidates, "
             f"{view.feasible} feasible", ""]
    if run.spec.models is not None:   # values are worst cases; stability certified over the box
        lines[-1:] = [f"worst case over {run.spec.models.describe()}; stability certified, performance "
                      "sampled", ""]
    if not rows:
        return "\n".join(lines + ["(no candidates)"])
    objs = list(run.spec.objectives)
    head = f"{'rank':>5} {'id':>7}  {'gain':>9}  {'zeros':<17} {'poles':<17}"
    for o in objs:
        head += f" {SHORT.get(o, o)[:11]:>11}"
    lines.append(head)
    for r in rows:
        mark = "*" if r.get("knee", False) else (" " if r["feasible"] else "x")
        cert = "" if (r["certified"] or not r["feasible"]) else " (uncertified)"
        if run.spec.models is not None and not bool(r.get("robust_stable", True)):
            cert += " (not robustly stable)"
        c = r["controller"]
        z, p = _roots_text(c["zeros"]), _roots_text(c["poles"])
        idtext = str(int(r["id"])) + ("~" if _inactive(r) else "")
        line = f"{int(r['rank']):>4}{mark} {idtext:>7}  {fmt_num(c['gain'], 4):>9}  {z[:17]:<17} {p[:17]:<17}"
        for o in objs:
            line += f" {fmt_num(r[o], 4):>11}"
        lines.append(line + cert)
    lines.append("   * knee of the front   x infeasible (ranked by total normalised violation)"
                 + ("   ~ inactive stage" if any(_inactive(r) for r in rows) else ""))
    lines += _inactive_lines(rows)
    lines += _pid_lines(rows)
    reqs = dict(run.spec.requirements)
    if reqs:
        first = rows[:5]
        lines += ["", "requirement values (slack) of the first rows"]
        head = f"{'requirement':<30}{'limit':>9}"
        for r in first:
            head += f"{'#' + str(int(r['id'])):>12}"
        lines.append(head)
        for key, lim in reqs.items():
            line = f"{key[:30]:<30}{fmt_num(lim, 4):>9}"
            for r in first:
                q = r["requirements"][key]
                flag = "" if q["met"] else "!"
                line += f"{fmt_num(q['value'], 4) + flag:>12}"
            lines.append(line)
        lines.append("   ! requirement not met; slack per requirement: 'synth show RUN ID'")
    return "\n".join(lines)


def _inactive(r: dict) -> bool:
    return any(not s["active"] for s in r.get("stages") or [])


def _inactive_lines(rows: list[dict]) -> list[str]:
    """One line per row with an inactive stage: which stage and which rule (synth.stages)."""
    out = []
    for r in rows:
        for s in r.get("stages") or []:
            if not s["active"]:
                out += textwrap.wrap(f"#{int(r['id'])} stage {s['stage']} ({s['role']}, zero -{_short(s['zero_rad_s'])}, "
                                     f"pole -{_short(s['pole_rad_s'])}) inactive: {s['reason']}", WIDTH,
                                     initial_indent="   ~ ", subsequent_indent="     ")
    return out


def _pid_lines(rows: list[dict]) -> list[str]:
    """PID/PI settings of the shown rows in the parallel, standard and series forms (synth.pid_forms)."""
    forms = [r.get("pid_forms") for r in rows]
    if not forms or forms[0] is None:
        return []
    g = lambda x: "-" if x is None else _short(float(x))     # noqa: E731
    if forms[0]["kind"] == "pi":
        lines = ["", "PI settings: parallel kp + ki/s; standard Kc (1 + 1/(Ti s)) with Kc = kp",
                 f"{'id':>7}{'kp':>10}{'ki 1/s':>10}{'Ti s':>10}"]
        for r, f in zip(rows, forms):
            lines.append(f"{int(r['id']):>7}{g(f['parallel']['kp']):>10}{g(f['parallel']['ki']):>10}"
                         f"{g(f['standard']['ti_s']):>10}")
        return lines
    lines = ["", "PID settings: parallel kp + ki/s + kd s/(Tf s + 1); standard Kc (1 + 1/(Ti s) + Td s/(1 + s Td/N)),",
             "Kc = kp; series K' (1 + 1/(Ti' s)) (1 + Td' s)/(1 + Tf s) ('-': complex zeros, no series form)",
             "".join(h.rjust(9 if k else 7) for k, h in enumerate(
                 ["id", "kp", "ki 1/s", "kd s", "Tf s", "Ti s", "Td s", "N", "K'", "Ti' s", "Td' s"]))]
    for r, f in zip(rows, forms):
        pa, st, se = f["parallel"], f["standard"], f["series"] or {}
        lines.append(f"{int(r['id']):>7}{g(pa['kp']):>9}{g(pa['ki']):>9}{g(pa['kd']):>9}{g(pa['tf_s']):>9}"
                     f"{g(st['ti_s']):>9}{g(st['td_s']):>9}{g(st['n']):>9}{g(se.get('k')):>9}"
                     f"{g(se.get('ti_s')):>9}{g(se.get('td_s')):>9}")
    return lines


def design_summary(run: Run, view: TableView) -> str:
    """What a design run found: bounds applied, counts, the table, conflicts when infeasible."""
    m = run.manifest
    lines = [f"run folder: {run.folder}"]
    t = (m.get("timings") or [{}])[-1]
    ff = t.get("first_feasible_s")
    rk = f" (ranking and certificates {fmt_num(t['ranking_s'], 3)} s of it)" if "ranking_s" in t else ""
    lines.append(f"search: {t.get('evaluated', 0)} evaluations in {fmt_num(t.get('wall_s'), 3)} s{rk}; first "
                 f"feasible design after {fmt_num(ff, 3) + ' s' if ff is not None else 'none found'}")
    for note in m.get("bounds_applied", []):
        lines += textwrap.wrap("bound: " + note, WIDTH, subsequent_indent="       ")
    for note in m.get("infeasible_by_construction", []):
        lines += textwrap.wrap("CANNOT BE MET: " + note, WIDTH, subsequent_indent="       ")
    lines.append("")
    lines.append(ranked_text(run, view))
    if view.total == 0 or not view.feasible:
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


def fallout_text(before, after, requirements: dict) -> str:
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
        if cid not in now.index:      # merged into a less-violating near-copy when re-ranked
            out.append(f"  #{int(cid)} falls out: infeasible, a near-copy of a less-violating design")
            continue
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
