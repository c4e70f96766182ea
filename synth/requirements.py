"""The requirement vocabulary: each spec key, the metric it bounds, and its sense.

This table is the single contract between the spec file, the evaluator's slack
columns, ranking and the CLI. Slack is in the requirement's own unit and
positive when the requirement is met: ``value - limit`` for a ``min_`` key,
``limit - value`` for a ``max_`` key.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Requirement:
    key: str          # spec key, e.g. "max_overshoot_pct"
    metric: str       # evaluator column it bounds
    sense: str        # "min" (value >= limit) or "max" (value <= limit)
    unit: str
    meaning: str


REQUIREMENTS: dict[str, Requirement] = {r.key: r for r in [
    Requirement("min_damping", "min_damping", "min", "", "smallest closed-loop damping ratio"),
    Requirement("min_decay_rate", "decay_rate", "min", "1/s", "all closed-loop poles left of -value"),
    Requirement("max_settling_time_s", "settling_time_s", "max", "s", "reference-step settling time"),
    Requirement("max_overshoot_pct", "overshoot_pct", "max", "%", "reference-step overshoot"),
    Requirement("max_rise_time_s", "rise_time_s", "max", "s", "reference-step 10-90 % rise time"),
    Requirement("max_steady_state_error", "steady_state_error", "max", "", "|error| after a unit reference step"),
    Requirement("max_disturbance_peak", "disturbance_peak", "max", "", "peak |y| after a unit load step at the plant input"),
    Requirement("max_disturbance_settling_time_s", "disturbance_settling_time_s", "max", "s",
                "load-step response settling time"),
    Requirement("max_disturbance_iae", "disturbance_iae", "max", "s", "integral of |y| after a unit load step"),
    Requirement("max_control_peak", "control_peak", "max", "", "peak |u| for a unit reference step"),
    Requirement("min_gain_margin_db", "gain_margin_db", "min", "dB",
                "distance to instability in loop gain, both directions (see gain_margin_low_db)"),
    Requirement("min_phase_margin_deg", "phase_margin_deg", "min", "deg", "smallest phase margin over all crossovers"),
    Requirement("min_delay_margin_s", "delay_margin_s", "min", "s", "extra dead time the loop tolerates"),
    Requirement("max_sensitivity_peak", "sensitivity_peak", "max", "", "peak |S|, S = 1/(1+L)"),
    Requirement("max_complementary_peak", "complementary_peak", "max", "", "peak |T|, T = L/(1+L)"),
    Requirement("max_noise_gain", "control_gain_peak", "max", "", "peak |C S|: sensor noise to actuator"),
    Requirement("max_disturbance_gain_peak", "disturbance_gain_peak", "max", "", "peak |P S|: load to output"),
    Requirement("min_position_constant", "position_constant", "min", "", "Kp = L(0)"),
    Requirement("min_velocity_constant", "velocity_constant", "min", "1/s", "Kv = lim s L(s)"),
    Requirement("min_acceleration_constant", "acceleration_constant", "min", "1/s^2", "Ka = lim s^2 L(s)"),
    Requirement("max_ramp_error", "ramp_error", "max", "s", "steady-state error for a unit ramp reference"),
    Requirement("min_bandwidth_rad_s", "bandwidth_rad_s", "min", "rad/s", "closed-loop -3 dB bandwidth"),
    Requirement("max_bandwidth_rad_s", "bandwidth_rad_s", "max", "rad/s", "closed-loop -3 dB bandwidth"),
]}


def requirement_value(req: Requirement, metrics) -> np.ndarray:
    """The value a requirement is judged on, from a metrics mapping or DataFrame.

    The gain margin is judged on both ends of the stabilising gain interval:
    ``min(gain_margin_db, -gain_margin_low_db)``, so an open-loop unstable loop
    needs room to lose gain as well as to gain it.
    """
    v = np.asarray(metrics[req.metric], dtype=float)
    if req.key == "min_gain_margin_db":
        v = np.minimum(v, -np.asarray(metrics["gain_margin_low_db"], dtype=float))
    return v


def slack(req: Requirement, value, limit: float) -> np.ndarray:
    """Slack in the requirement's unit; -inf where the value is undefined (unstable loop)."""
    value = np.asarray(value, dtype=float)
    with np.errstate(invalid="ignore"):
        s = value - limit if req.sense == "min" else limit - value
    return np.where(np.isnan(s), -np.inf, s)
