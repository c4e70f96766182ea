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
from .evaluate import EvalOptions, METRICS, evaluate_controllers
from .evaluate.core import EXTRA_FREQUENCIES
from .evaluate import delay, stability
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


def check_controller(plant: TransferFunction, controller: TransferFunction,
                     requirements: Mapping[str, float], settling_band: float = 0.02,
                     pade_order: int = 6) -> dict:
    """Evaluate one controller against the requirements and certify it exactly.

    Returns a record: every metric, ``requirements: {key: {value, limit, slack, met}}``,
    ``controller`` (gain, zeros, poles, numerator, denominator), ``certificate``.
    """
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
        rec["loop_roots_counted"] = int(row["loop_roots_counted"])
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
    if plant.delay:
        text = (f"dead time {plant.delay:g} s, Delta(s) = Dp Dc + Np Nc e^(-{plant.delay:g} s): {dcert['text']}")
    else:
        text = cert["text"]
    rec["certificate"] = {"text": text, "routh_hurwitz": cert["hurwitz"],
                          "decay_rate_certified": cert["decay_rate_certified"]}
    return rec


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
    out.append("")
    out.append(f"verdict     {verdict_text(rec)}")
    met = [r["met"] for r in rec["requirements"].values()]
    if met:
        out.append(f"            {sum(met)} of {len(met)} requirements met"
                   + ("" if all(met) else f"; failing: {', '.join(k for k, r in rec['requirements'].items() if not r['met'])}"))
    out.append(f"certificate {rec['certificate']['text']}")
    out.append("")
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
    out.append("")
    poles = rec["closed_loop_poles"]
    if rec["pade_order"]:
        counted = rec.get("loop_roots_counted", -1)
        out.append(f"loop roots: the {len(poles)} roots of the quasi-polynomial Dp Dc + Np Nc e^(-theta s) "
                   f"with Re s > -{delay.DOMINANCE:g} x decay rate (Newton on the quasi-polynomial; "
                   + (f"{counted} counted there by the crossing count of the shifted quasi-polynomial, floating point)"
                      if counted >= 0 else "not counted)"))
    else:
        out.append(f"closed-loop poles ({len(poles)})")
    for p in poles:
        mag = abs(p)
        zeta = -p.real / mag if mag > 0 else 1.0
        out.append(f"  {fmt_complex(p, 8):>34}   damping {zeta:8.4f}   |s| {mag:10.5g} rad/s")
    out.append("")
    out += textwrap.wrap(CAUTION, 100)
    return "\n".join(out)
