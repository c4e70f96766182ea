"""One candidate in full: a JSON-ready record and its plain-text rendering.

Used by ``synth check`` (and by any command that shows a single design). The
record is built from the evaluator's row plus the exact certificate; nothing is
recomputed approximately here.
"""

from __future__ import annotations

import math
import textwrap
from typing import Any, Mapping

import numpy as np

from . import CAUTION
from .lti import TransferFunction, format_poly
from .requirements import REQUIREMENTS, requirement_value


def jsonable(x: Any) -> Any:
    """numpy/complex/inf-aware conversion to JSON types; infinities as "inf"/"-inf", NaN as null."""
    if isinstance(x, dict):
        return {str(k): jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple, np.ndarray)):
        return [jsonable(v) for v in x]
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    if isinstance(x, (complex, np.complexfloating)):
        return [jsonable(float(x.real)), jsonable(float(x.imag))]
    if isinstance(x, (float, np.floating)):
        x = float(x)
        if math.isnan(x):
            return None
        if math.isinf(x):
            return "inf" if x > 0 else "-inf"
        return x
    return x


def _confirmed_loop_roots(plant: TransferFunction, controller: TransferFunction, row) -> int:
    """The evaluator's count of loop roots in the region of interest where the argument
    principle confirms it, else -1 (not counted)."""
    from .evaluate import delay
    a, b = delay.split(plant.num, plant.den, controller.num[None, :], controller.den[None, :])
    starts = np.asarray(row["closed_loop_poles"], complex)[None, :]
    lr = delay.loop_roots(a, b, plant.delay, starts, count=True)
    if lr.counted[0] != int(row["loop_roots_counted"]):
        return -1
    return int(delay.confirmed_count(a, b, plant.delay, lr)[0])


def check_controller(plant: TransferFunction, controller: TransferFunction,
                     requirements: Mapping[str, float], settling_band: float = 0.02,
                     pade_order: int = 6, models=None) -> dict:
    """Evaluate one controller against the requirements and certify it exactly.

    Returns a record: every metric, ``requirements: {key: {value, limit, slack, met}}``,
    ``controller`` (gain, zeros, poles, numerator, denominator), ``certificate``,
    ``robust_stable``. With a non-trivial ``models`` (:class:`synth.models.ModelSet`) the
    requirement values are the worst case over the models, each naming the model that
    sets it, and ``models``, ``robust_certificate`` are added (see :func:`robust_record`).
    """
    from .evaluate import EvalOptions, METRICS, evaluate_controllers, stability, delay   # heavy: import on use
    from .evaluate.core import EXTRA_FREQUENCIES
    opts = EvalOptions(settling_band=settling_band, pade_order=pade_order)
    row = evaluate_controllers(plant, controller.num[None, :], controller.den[None, :],
                               requirements, opts).iloc[0]
    stable = bool(row["internally_stable"])
    if plant.delay:
        dcert = delay.certificate(plant.num, plant.den, controller.num, controller.den, plant.delay)
        cert = {"hurwitz": dcert["stable"] is True, "decay_rate_certified": None,
                "poles": np.asarray(row["closed_loop_poles"], complex)}
        cert["poles"] = cert["poles"][~np.isnan(cert["poles"])]
    else:
        char = stability.characteristic(plant.num, plant.den, controller.num[None, :], controller.den[None, :])[0]
        cert = stability.certificate(char, requirements.get("min_decay_rate"))
    certified = stable and cert["hurwitz"]
    rec: dict[str, Any] = {}
    for m in METRICS:
        rec[m] = row[m]
    for m in EXTRA_FREQUENCIES:      # where margins and peaks occur, rad/s (for plots)
        rec[m] = row[m]
    rec["certified"] = certified
    rec["closed_loop_poles"] = sorted(cert["poles"], key=lambda z: (-z.real, z.imag))
    rec["pade_order"] = int(row["pade_order"])
    if plant.delay:
        rec["loop_roots_counted"] = _confirmed_loop_roots(plant, controller, row) if stable else -1
        rec["time_horizon_cut"] = bool(row["time_horizon_cut"])
    reqs = {}
    for key, limit in requirements.items():
        req = REQUIREMENTS[key]
        reqs[key] = {"value": float(requirement_value(req, row.to_dict())),
                     "limit": float(limit),
                     "slack": float(row[f"slack_{key}"]),
                     "met": bool(row[f"met_{key}"])}
    rec["requirements"] = reqs
    rec["feasible"] = bool(row["feasible"])
    rec["controller"] = controller_record(controller)
    rec["robust_stable"] = certified
    if plant.delay:
        text = (f"dead time {plant.delay:g} s, Delta(s) = Dp Dc + Np Nc e^(-{plant.delay:g} s): {dcert['text']}")
    else:
        text = cert["text"]
    rec["certificate"] = {"text": text, "routh_hurwitz": cert["hurwitz"],
                          "decay_rate_certified": cert["decay_rate_certified"]}
    if models is not None and not models.trivial:
        rec = robust_record(rec, models, controller, requirements, opts)
    return rec


def robust_record(rec: dict, models, controller: TransferFunction, requirements: Mapping[str, float],
                  opts: EvalOptions) -> dict:
    """Extend a nominal check record over a model set: each model's requirement values, the worst case
    (and the model that sets it) per requirement, ``robust_stable`` and its certificate.

    Stability: nominal and variants as for a single plant (exact Routh; Nyquist with dead
    time), the coefficient box by the generalized Kharitonov theorem
    (:func:`synth.evaluate.robust.box_certificate`). Performance: judged on the listed
    models only (vertices and interior samples): sampled, not certified.
    """
    from .evaluate.robust import CERTIFICATE_METHOD, box_certificate
    from .evaluate import METRICS, EvalOptions, evaluate_controllers, stability   # heavy: import on use
    from .evaluate.core import EXTRA_FREQUENCIES
    opts = EvalOptions(settling_band=opts.settling_band, pade_order=opts.pade_order, certify=True)
    per_model = []
    for m in models.members:
        row = (evaluate_controllers(m.plant, controller.num[None, :], controller.den[None, :], requirements, opts)
               .iloc[0])
        vals = {k: float(requirement_value(REQUIREMENTS[k], row.to_dict())) for k in requirements}
        per_model.append({"name": m.name, "kind": m.kind, "stable": bool(row["internally_stable"]),
                          "certified": bool(row["certified"]), "values": vals,
                          "slack": {k: float(row[f"slack_{k}"]) for k in requirements},
                          "numerator": list(m.plant.num), "denominator": list(m.plant.den),
                          "delay_s": m.plant.delay})
    reqs = {}
    for key, limit in requirements.items():
        j = min(range(len(per_model)), key=lambda i: per_model[i]["slack"][key])
        s = per_model[j]["slack"][key]
        tol = 1e-9 * max(abs(float(limit)), abs(s), 1e-12)
        ties = [i for i, p in enumerate(per_model) if abs(p["slack"][key] - s) <= tol] if np.isfinite(s) else [j]
        name = per_model[ties[0]]["name"] + (f" (tied with {len(ties) - 1} other models)" if len(ties) > 1 else "")
        reqs[key] = {"value": per_model[ties[0]]["values"][key], "limit": float(limit), "slack": s, "met": s >= 0,
                     "worst_model": name, "worst_model_name": per_model[ties[0]]["name"],
                     "nominal_value": per_model[0]["values"][key]}
    texts, destab = [], None
    bad_variant = [p["name"] for p in per_model if p["kind"] == "variant" and not (p["stable"] and p["certified"])]
    ok = bool(rec["certified"]) and not bad_variant
    texts.append("nominal: " + ("certified stable" if rec["certified"] else "NOT certified stable"))
    if models.variants:
        texts.append("variants: " + ("all certified stable (exact Routh-Hurwitz; Nyquist with dead time)"
                                     if not bad_variant else f"NOT stable: {', '.join(bad_variant)}"))
        if bad_variant and destab is None:
            destab = {"model": f"variant {bad_variant[0]}"}
    box = None
    if models.box is not None and models.box.k:
        box = box_certificate(models.box, controller.num, controller.den)
        ok &= box["robust_stable"]
        texts.append("coefficient box: " + box["text"])
        if not box["robust_stable"] and destab is None:
            destab = box["destabilising"]
    rec = dict(rec)
    rec["requirements"] = reqs
    rec["robust_stable"] = bool(ok)
    rec["feasible"] = bool(ok and all(r["met"] for r in reqs.values()))
    rec["models"] = per_model
    rec["model_set"] = models.describe()
    rec["robust_certificate"] = {"robust_stable": bool(ok), "text": "; ".join(texts),
                                 "method": CERTIFICATE_METHOD if box is not None else
                                 "exact Routh-Hurwitz per model (no coefficient box)",
                                 "destabilising": destab,
                                 "performance": f"worst case over the {len(per_model)} listed models: sampled "
                                                "inside the box, not certified"}
    return rec


def structure_details(family, params, record: Mapping) -> dict:
    """What the family's parameters say beyond the transfer function, for show and export.

    ``pid_forms`` (PID/PI families): the parallel, standard and series forms
    (:mod:`synth.pid_forms`) with their text; ``stages`` (lead-lag families): each stage's
    corners and whether it is active (:mod:`synth.stages`, crossover region from the
    record's ``phase_margin_rad_s`` and ``crossover_rad_s``). Empty for other families.
    """
    from .pid_forms import forms_from_params, forms_text
    from .stages import stage_infos
    p = np.asarray(params, float).ravel()
    out: dict[str, Any] = {}
    if family.kind in ("pid", "pi"):
        f = forms_from_params(family.kind, p, family.sign)
        out["pid_forms"] = dict(f.as_dict(), text=forms_text(f))
    elif family.kind == "lead-lag" and family.pairs:
        out["stages"] = [s.as_dict() for s in stage_infos(family, p, record.get("phase_margin_rad_s", np.nan),
                                                           record.get("crossover_rad_s", np.nan))]
    return out


def controller_record(c: TransferFunction) -> dict:
    return {"gain": c.gain, "zeros": list(c.zeros), "poles": list(c.poles),
            "numerator": list(c.num), "denominator": list(c.den)}


# ------------------------------------------------------------------ text
_GROUPS = [
    ("Closed-loop poles", ["min_damping", "decay_rate"]),
    ("Reference step", ["settling_time_s", "overshoot_pct", "rise_time_s", "steady_state_error", "control_peak"]),
    ("Load step at the plant input", ["disturbance_peak", "disturbance_settling_time_s",
                                      "disturbance_steady_state", "disturbance_iae"]),
    ("Margins", ["gain_margin_db", "gain_margin_low_db", "phase_margin_deg", "delay_margin_s", "crossover_rad_s"]),
    ("Closed-loop peaks", ["sensitivity_peak", "complementary_peak", "disturbance_gain_peak",
                           "control_gain_peak", "bandwidth_rad_s"]),
    ("Static constants", ["position_constant", "velocity_constant", "acceleration_constant", "ramp_error"]),
]
_TIME_FIGURES = _GROUPS[1][1] + _GROUPS[2][1]     # from the step responses


def fmt_num(x: Any, digits: int = 5) -> str:
    if x is None:
        return "-"
    if isinstance(x, (bool, np.bool_)):
        return "yes" if x else "no"
    x = float(x)
    if math.isnan(x):
        return "-"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return f"{x:.{digits}g}"


def fmt_complex(z: complex, digits: int = 5) -> str:
    if abs(z.imag) <= 1e-12 * max(1.0, abs(z)):
        return fmt_num(z.real, digits)
    return f"{z.real:.{digits}g} {'+' if z.imag >= 0 else '-'} j{abs(z.imag):.{digits}g}"


def verdict_text(rec: dict) -> str:
    """The stability verdict of a check record in plain words, naming any hidden mode."""
    if rec["internally_stable"]:
        verdict = "internally stable" + (" (certified)" if rec["certified"] else " (NOT certified)")
    else:
        verdict = "NOT internally stable"
    if rec["hidden_modes"]:
        verdict += f": hidden mode, {rec['hidden_modes']}"
    return verdict


def format_record(rec: dict, title: str = "") -> str:
    """Plain-text rendering of a check record, for a terminal 100 columns wide."""
    out = []
    if title:
        out += [title, "=" * min(len(title), 100)]
    c = rec["controller"]
    out.append(f"controller  C(s) = ({format_poly(c['numerator'])}) / ({format_poly(c['denominator'])})")
    out.append(f"            gain {fmt_num(c['gain'])}, zeros [{', '.join(fmt_complex(z) for z in c['zeros'])}], "
               f"poles [{', '.join(fmt_complex(p) for p in c['poles'])}]")
    for line in (rec.get("pid_forms") or {}).get("text", []):    # the form's formula, then its settings
        head, _, values = line.partition(": ")
        out.append(" " * 12 + head)
        if values:
            out += textwrap.wrap(values, 100, initial_indent=" " * 22, subsequent_indent=" " * 22)
    for st in rec.get("stages") or []:
        state = "active" if st["active"] else f"INACTIVE ({st['reason']})"
        out.append(f"            stage {st['stage']} {st['role']}: zero -{fmt_num(st['zero_rad_s'])}, "
                   f"pole -{fmt_num(st['pole_rad_s'])} rad/s, {state}")
    out.append("")
    out.append(f"verdict     {verdict_text(rec)}")
    met = [r["met"] for r in rec["requirements"].values()]
    if met:
        out.append(f"            {sum(met)} of {len(met)} requirements met"
                   + ("" if all(met) else f"; failing: {', '.join(k for k, r in rec['requirements'].items() if not r['met'])}"))
    out.append(f"certificate {rec['certificate']['text']}")
    out.append("")
    if "models" in rec:
        out += _models_text(rec)
    if rec["requirements"]:
        out.append(f"{'requirement':<34}{'value':>12}{'limit':>12}{'slack':>12}  met")
        for key, r in rec["requirements"].items():
            unit = REQUIREMENTS[key].unit
            out.append(f"{key:<34}{fmt_num(r['value']):>12}{fmt_num(r['limit']):>12}{fmt_num(r['slack']):>12}  "
                       f"{'yes' if r['met'] else 'NO'}{'  [' + unit + ']' if unit else ''}")
        out.append("")
    for head, keys in _GROUPS:
        out.append(head)
        for k in keys:
            out.append(f"  {k:<32}{fmt_num(rec[k]):>14}")
    if rec.get("time_horizon_cut"):
        from .evaluate.delay_time import HORIZON_DECAYS, MAX_INTERVALS     # heavy: import on use
        unknown = [k for k in _TIME_FIGURES if rec[k] == math.inf]
        out += textwrap.wrap(
            f"note: the delay equation was solved for {MAX_INTERVALS:,} steps, short of the horizon of "
            f"{HORIZON_DECAYS:g} decays of the slowest mode; a figure reads inf where no bound on the rest of the response could establish it"
            + (f" ({', '.join(unknown)})" if unknown else "") + ".", 100)
    out.append("")
    poles = rec["closed_loop_poles"]
    if rec["pade_order"]:
        from .evaluate import delay        # heavy: import on use
        counted = rec.get("loop_roots_counted", -1)
        out.append(f"loop roots: the {len(poles)} roots of the quasi-polynomial Dp Dc + Np Nc e^(-theta s) "
                   f"with Re s > -{delay.DOMINANCE:g} x decay rate (Newton on the quasi-polynomial; "
                   + (f"{counted} counted there twice, by the crossing count of the shifted quasi-polynomial "
                      "and by the argument principle on a contour around the region; floating point)"
                      if counted >= 0 else "not counted: the two counts did not both settle and agree)"))
    else:
        out.append(f"closed-loop poles ({len(poles)})")
    for p in poles:
        mag = abs(p)
        zeta = -p.real / mag if mag > 0 else 1.0
        out.append(f"  {fmt_complex(p, 8):>34}   damping {zeta:8.4f}   |s| {mag:10.5g} rad/s")
    out.append("")
    out += textwrap.wrap(CAUTION, 100)
    return "\n".join(out)


def _models_text(rec: dict) -> list[str]:
    """The model-set part of a record: robust verdict, worst cases and each model's values."""
    rc = rec["robust_certificate"]
    out = textwrap.wrap(f"{'ROBUSTLY STABLE' if rec['robust_stable'] else 'NOT robustly stable'} over "
                        f"{rec['model_set']}", 100, initial_indent="robust      ", subsequent_indent="            ")
    out += textwrap.wrap(rc["text"], 100, initial_indent="            ", subsequent_indent="            ")
    if rc.get("destabilising"):
        d = rc["destabilising"]
        out.append(f"            destabilising model: {d['model']}"
                   + (f"  N = {d['numerator']}, D = {d['denominator']}" if "numerator" in d else ""))
    out += textwrap.wrap(f"{rc['performance']}; requirement values below are worst cases", 100,
                         initial_indent="            ", subsequent_indent="            ")
    out.append("")
    keys = list(rec["requirements"])
    if keys:
        out.append(f"{'worst case':<34}{'value':>12}{'nominal':>12}  set by")
        for k in keys:
            r = rec["requirements"][k]
            out.append(f"{k:<34}{fmt_num(r['value']):>12}{fmt_num(r['nominal_value']):>12}  {r['worst_model']}")
        out.append("")
        short = [k.replace("max_", "").replace("min_", "")[:11] for k in keys]
        out.append(f"{'model':<22}{'stable':>7}" + "".join(f"{s:>12}" for s in short))
        for m in rec["models"]:
            out.append(f"{m['name'][:22]:<22}{('yes' if m['stable'] else 'NO'):>7}"
                       + "".join(f"{fmt_num(m['values'][k]):>12}" for k in keys))
        out.append("")
    return out
