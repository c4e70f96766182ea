"""synth: constraint-driven automatic compensator synthesis for SISO loops."""

__version__ = "0.1.0"

CAUTION = (
    "CAUTION: a design is only as good as the plant model behind it. Check actuator "
    "saturation, sampling, sensor noise and model uncertainty; test on hardware with "
    "limits and an emergency stop; follow the applicable functional-safety standards, "
    "local codes and licensed engineering review before use."
)

# The Python API (synth.api), loaded on first use so that `import synth` stays light.
_API = ("design", "open_run", "resume", "check", "Design", "SynthError")
__all__ = ["CAUTION", "__version__", *_API]


def __getattr__(name):
    if name in _API:
        from . import api
        return getattr(api, name)
    raise AttributeError(f"module 'synth' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + list(_API))
