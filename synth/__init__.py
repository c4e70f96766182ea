"""synth: constraint-driven automatic compensator synthesis for SISO loops."""

__version__ = "0.1.0"

CAUTION = (
    "CAUTION: a design is only as good as the plant model behind it. Check actuator "
    "saturation, sampling, sensor noise and model uncertainty; test on hardware with "
    "limits and an emergency stop; follow the applicable functional-safety standards, "
    "local codes and licensed engineering review before use."
)
