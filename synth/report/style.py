"""Report styling shared by the figure data and the drawing: colours, dashes, markers, axis labels.

Candidates are told apart by colour (the colour-blind-safe palette of Okabe & Ito,
"Color Universal Design", 2008, without its yellow, which is unreadable on white
paper) AND by line style and marker, so the figures also read in grey print.
Requirement limits are drawn in grey; the forbidden side is hatched.
"""

from __future__ import annotations

DPI = 110

# Okabe & Ito (2008), yellow left out; then line styles and markers per candidate
PALETTE = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000")
DASHES = ("solid", (0, (7, 2.5)), (0, (1.2, 1.6)), (0, (7, 2, 1.5, 2)), (0, (12, 3)),
          (0, (4, 1.5, 1.2, 1.5, 1.2, 1.5)), (0, (3, 3)))
MARKERS = ("o", "s", "^", "v", "P", "X", "*")
LIMIT_COLOR = "#4d4d4d"
FORBIDDEN_FACE = "#d4d4d4"
ALLOWED_FACE = "#bfe3d6"

FIGURE_KEYS = ("reference-step", "load-step", "control-signal", "loop-frequency-response",
               "loop-complex-plane", "closed-loop-poles", "trade-off")

# axis labels with units, for the objectives of the trade-off view
METRIC_AXIS = {
    "settling_time_s": "settling time [s]",
    "rise_time_s": "rise time (10-90 %) [s]",
    "overshoot_pct": "overshoot [%]",
    "steady_state_error": "steady-state error [per unit reference]",
    "disturbance_peak": "load-step peak |y| [output units per unit load]",
    "disturbance_settling_time_s": "load-step settling time [s]",
    "disturbance_iae": "load-step IAE [output units x s]",
    "control_peak": "control peak |u| [actuator units per unit reference]",
    "sensitivity_peak": "sensitivity peak Ms [-]",
    "complementary_peak": "complementary peak Mt [-]",
    "disturbance_gain_peak": "peak |P S| [output per load units]",
    "control_gain_peak": "peak |C S| [actuator per output units]",
    "bandwidth_rad_s": "closed-loop bandwidth [rad/s]",
    "controller_hf_gain": "controller high-frequency gain |C(inf)| [actuator per output units]",
}
