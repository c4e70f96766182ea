"""The evaluator's metric columns, in table order.

One list shared by the evaluator (``synth.evaluate.METRICS``) and the renderers
(``synth.tables``, ``synth.runs``), kept here so that printing a stored table
needs neither the evaluator nor pandas.
"""

METRICS = [
    "internally_stable", "hidden_modes", "closed_loop_poles", "min_damping", "decay_rate",
    "settling_time_s", "overshoot_pct", "rise_time_s", "steady_state_error",
    "disturbance_peak", "disturbance_settling_time_s", "disturbance_steady_state", "disturbance_iae",
    "control_peak", "gain_margin_db", "gain_margin_low_db", "phase_margin_deg", "delay_margin_s",
    "crossover_rad_s", "sensitivity_peak", "complementary_peak", "disturbance_gain_peak",
    "control_gain_peak", "bandwidth_rad_s", "position_constant", "velocity_constant",
    "acceleration_constant", "ramp_error", "certified",
]
