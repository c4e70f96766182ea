"""The requirements file: a TOML description of the plant, controller structure and goals.

:func:`load_spec` reads and validates a file into a frozen :class:`Spec`. Every
problem becomes a :class:`SpecError` whose message names the file, the table and
the key, says what was wrong and what was expected, so a user can fix the file
without reading code. See ``specs/*.toml`` for examples.
"""

from __future__ import annotations

import difflib
import math
import numbers
import tomllib
from collections import Counter
from dataclasses import dataclass, field, replace
from pathlib import Path
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

from synth.expr import ExpressionError, parse_rational
from synth.lti import TransferFunction, poly_from_roots
from synth.models import DEFAULT_SAMPLES, MAX_SAMPLES, ModelSet, models_toml, parse_models
from synth.requirements import REQUIREMENTS

CONTROLLER_KINDS = ("lead-lag", "pid", "pi")
STAGE_KINDS = ("lead", "lag", "lead-lag")
#: Evaluator metric names an objective may minimise.
OBJECTIVE_METRICS = (
    "settling_time_s", "overshoot_pct", "rise_time_s", "steady_state_error", "disturbance_peak",
    "disturbance_settling_time_s", "disturbance_iae", "control_peak", "sensitivity_peak",
    "complementary_peak", "disturbance_gain_peak", "control_gain_peak", "bandwidth_rad_s",
    "controller_hf_gain",
)
DEFAULT_OBJECTIVES = ("settling_time_s", "disturbance_peak", "control_peak")
SEARCH_DEFAULTS = MappingProxyType({"budget": 20000, "time_limit_s": 30.0, "seed": 0})
HIDDEN_MODE_REL_TOL = 1e-6
COEFFICIENT_RANGE = (1e-80, 1e80)   # plant coefficients / largest denominator coefficient

_TABLE_KEYS = {
    "plant": ("numerator", "denominator", "zeros", "poles", "gain", "transfer", "delay_s", "intervals", "variants"),
    "controller": ("kind", "stages", "integrator", "frequency_range_rad_s", "max_stage_ratio", "gain_range"),
    "requirements": tuple(REQUIREMENTS) + ("settling_band",),
    "options": ("settling_band", "pade_order", "robust_samples"),
    "objectives": ("minimize",),
    "search": ("budget", "time_limit_s", "seed"),
}
_PLANT_FORMS = {
    "numerator/denominator": ("numerator", "denominator"),
    "zeros/poles/gain": ("zeros", "poles", "gain"),
    "transfer": ("transfer",),
}


class SpecError(Exception):
    """A problem in a requirements file; the message is ready to show to the user."""


@dataclass(frozen=True)
class ControllerSpec:
    """The compensator structure to search: kind, lead/lag stages, optional integrator, ranges."""

    kind: str = "lead-lag"
    stages: tuple[str, ...] = ("lead",)
    integrator: bool = False
    frequency_range_rad_s: tuple[float, float] = (0.01, 1000.0)
    max_stage_ratio: float | None = None
    gain_range: tuple[float, float] | None = None


@dataclass(frozen=True)
class Options:
    """Evaluation settings: settling band (fraction of final value) and Padé order for dead time."""

    settling_band: float = 0.02
    pade_order: int = 6
    robust_samples: int = DEFAULT_SAMPLES     # interior samples of a coefficient box (synth.models)


@dataclass(frozen=True, eq=False)
class Spec:
    """A validated requirements file. ``requirements`` and ``search`` are read-only mappings.

    Equality compares the content (name, plant coefficients and dead time,
    controller, requirements, options, objectives, search) but not ``source`` or
    ``warnings``, which describe where and how the text was read.
    """

    name: str
    plant: TransferFunction
    controller: ControllerSpec
    requirements: Mapping[str, float]
    options: Options
    source: str
    warnings: tuple[str, ...]
    objectives: tuple[str, ...] = DEFAULT_OBJECTIVES
    search: Mapping[str, Any] = field(default_factory=lambda: SEARCH_DEFAULTS)
    models: ModelSet | None = None        # nominal, variants, coefficient box (None: the nominal only)

    def __eq__(self, other):
        if not isinstance(other, Spec):
            return NotImplemented
        a, b = self.plant, other.plant
        return (self.name == other.name
                and np.array_equal(a.num, b.num) and np.array_equal(a.den, b.den) and a.delay == b.delay
                and self.controller == other.controller
                and dict(self.requirements) == dict(other.requirements)
                and self.options == other.options
                and self.objectives == other.objectives
                and dict(self.search) == dict(other.search)
                and (self.models or ModelSet(a)) == (other.models or ModelSet(b)))

    __hash__ = None

    def tighten(self, changes: Mapping[str, float]) -> "Spec":
        """A new Spec with requirement values replaced or added, validated as in a file.

        ``settling_band`` is accepted here too and goes to :class:`Options`. The
        original Spec is never changed.
        """
        reader = _Reader(self.source)
        reqs, options = dict(self.requirements), self.options
        for key, value in dict(changes).items():
            if key == "settling_band":
                options = replace(options, settling_band=reader.settling_band(value, "requirements"))
            else:
                reqs[key] = reader.requirement(key, value)
        reader.check_bandwidth_order(reqs)
        return replace(self, requirements=MappingProxyType(reqs), options=options)

    def to_toml(self) -> str:
        """TOML text that :func:`parse_spec` reads back to an equal Spec (plant as unreduced polynomials)."""
        c = self.controller
        plant = {"numerator": [float(x) for x in self.plant.num],
                 "denominator": [float(x) for x in self.plant.den]}
        if self.plant.delay:
            plant["delay_s"] = self.plant.delay
        intervals, variants = models_toml(self.models) if self.models is not None else (None, [])
        if intervals is not None:   # the box is written over the nominal's full coefficient lists
            plant["numerator"] = [0.0] * (len(intervals["numerator"]) - len(plant["numerator"])) + plant["numerator"]
            plant["denominator"] = ([0.0] * (len(intervals["denominator"]) - len(plant["denominator"]))
                                    + plant["denominator"])
        controller = {"kind": c.kind, "stages": list(c.stages), "integrator": c.integrator,
                      "frequency_range_rad_s": list(c.frequency_range_rad_s)}
        if c.max_stage_ratio is not None:
            controller["max_stage_ratio"] = c.max_stage_ratio
        if c.gain_range is not None:
            controller["gain_range"] = list(c.gain_range)
        tables = {
            "plant": plant,
            "controller": controller,
            "requirements": dict(self.requirements),
            "options": {"settling_band": self.options.settling_band, "pade_order": self.options.pade_order,
                        **({"robust_samples": self.options.robust_samples}
                           if self.options.robust_samples != DEFAULT_SAMPLES else {})},
            "objectives": {"minimize": list(self.objectives)},
            "search": dict(self.search),
        }
        origin = "".join(ch if ch.isprintable() else "?" for ch in self.source)   # keep the comment one line
        lines = [f"# requirements written by synth from {origin}", f"name = {_toml_value(self.name)}"]
        for table, items in tables.items():
            lines += ["", f"[{table}]"] + [f"{k} = {_toml_value(v)}" for k, v in items.items()]
            if table == "plant" and intervals is not None:
                lines += ["", "[plant.intervals]"] + [f"{k} = {_toml_value(v)}" for k, v in intervals.items()]
            for v in variants if table == "plant" else ():
                lines += ["", "[[plant.variants]]"] + [f"{k} = {_toml_value(x)}" for k, x in v.items()]
        return "\n".join(lines) + "\n"


# ------------------------------------------------------------------ loading
def load_spec(path) -> Spec:
    """Read and validate a TOML requirements file."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as e:
        raise SpecError(f"{path}: cannot read the file ({e.strerror or e}); "
                        "expected a readable TOML requirements file") from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        raise SpecError(f"{path}: byte {e.start} is not valid UTF-8; expected a UTF-8 text file") from None
    return parse_spec(text, source=str(path))


def parse_spec(text: str, source: str = "<string>") -> Spec:
    """Validate TOML text into a Spec; ``source`` names the file in error messages."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise SpecError(f"{source}: TOML syntax error: {e}; expected valid TOML") from None
    return _Reader(source).spec(doc)


# ------------------------------------------------------------------ validation
def _got(value) -> str:
    """Short description of a bad value for error messages."""
    if isinstance(value, bool):
        return f"got {str(value).lower()} (a boolean)"
    if isinstance(value, str):
        return f"got the string {value[:40]!r}"
    if isinstance(value, dict):
        return "got a table"
    if isinstance(value, list):
        return "got a list"
    if isinstance(value, numbers.Real):
        return f"got {value!r}"
    return f"got a {type(value).__name__}"


def _is_number(value) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, (bool, np.bool_))


def _fmt_root(r: complex) -> str:
    """Root for messages; parts below the matching tolerance are rounding noise and shown as 0."""
    tol = HIDDEN_MODE_REL_TOL * max(1.0, abs(r))
    re, im = (x if abs(x) > tol else 0.0 for x in (r.real, r.imag))
    return f"{re:.6g}" if im == 0.0 else f"{re:.6g}{im:+.6g}j"


def _shared_roots(num: np.ndarray, den: np.ndarray) -> list[complex]:
    """Roots common to numerator and denominator (one-to-one, relative tolerance on max(1, |r|))."""
    if num.size < 2 or den.size < 2:
        return []
    poles = list(np.roots(den))
    shared = []
    for z in np.roots(num):
        if not poles:
            break
        dist = np.abs(np.asarray(poles) - z)
        j = int(np.argmin(dist))
        if dist[j] <= HIDDEN_MODE_REL_TOL * max(1.0, abs(z)):
            shared.append(complex((z + poles.pop(j)) / 2))
    return shared


def _bounds_text(lo, lo_open, hi, hi_open) -> str:
    if hi == math.inf:
        return f"a number {'>' if lo_open else '>='} {lo:g}"
    return f"a number in {'(' if lo_open else '['}{lo:g}, {hi:g}{')' if hi_open else ']'}"


def _requirement_bounds(key: str) -> tuple[float, bool, float, bool]:
    """(low, low_open, high, high_open) of the values a requirement may take."""
    if key == "min_damping":
        return 0.0, False, 1.0, False
    if key == "min_phase_margin_deg":
        return 0.0, False, 180.0, True
    if key.startswith("max_") and (key.endswith("_s") or key.endswith("_peak") or key.endswith("_gain")
                                   or key == "max_bandwidth_rad_s"):
        return 0.0, True, math.inf, False   # a zero limit on a time, peak or bandwidth cannot be met
    return 0.0, False, math.inf, False


class _Reader:
    """Validates one parsed TOML document; ``source`` names it in messages, warnings accumulate."""

    def __init__(self, source: str):
        self.source = source
        self.warnings: list[str] = []

    def error(self, table: str | None, key: str | None, problem: str, expected: str) -> SpecError:
        where = key if table is None else f"[{table}]" + (f".{key}" if key else "")
        return SpecError(f"{self.source}: {where}: {problem}; expected {expected}")

    # scalar checks --------------------------------------------------------
    def number(self, value, table, key, lo=-math.inf, lo_open=False, hi=math.inf, hi_open=False) -> float:
        expected = _bounds_text(lo, lo_open, hi, hi_open) if (lo, hi) != (-math.inf, math.inf) else "a number"
        if not _is_number(value):
            raise self.error(table, key, _got(value), expected)
        try:
            x = float(value)
        except OverflowError:
            raise self.error(table, key, f"{value} is too large", expected) from None
        if not math.isfinite(x):
            raise self.error(table, key, f"got {x} (not finite)", expected.replace("a number", "a finite number"))
        if x < lo or (lo_open and x == lo) or x > hi or (hi_open and x == hi):
            raise self.error(table, key, f"got {x:g}", expected)
        return x

    def integer(self, value, table, key, lo: int, hi: int | None = None) -> int:
        expected = f"an integer >= {lo}" if hi is None else f"an integer in {lo}..{hi}"
        if not isinstance(value, numbers.Integral) or isinstance(value, (bool, np.bool_)):
            raise self.error(table, key, _got(value), expected)
        if value < lo or (hi is not None and value > hi):
            raise self.error(table, key, f"got {value}", expected)
        return int(value)

    def number_list(self, value, table, key) -> list[float]:
        expected = "a non-empty list of finite numbers"
        if not isinstance(value, list) or not value:
            raise self.error(table, key, "got an empty list" if value == [] else _got(value), expected)
        return [self.number(v, table, f"{key}[{i}]") for i, v in enumerate(value)]

    def pair(self, value, table, key, what: str) -> tuple[float, float]:
        """Two numbers with 0 < low < high."""
        expected = f"[low, high] with 0 < low < high ({what})"
        if not isinstance(value, list) or len(value) != 2:
            raise self.error(table, key, _got(value) if not isinstance(value, list)
                             else f"got a list of {len(value)} item{'s' if len(value) != 1 else ''}", expected)
        lo, hi = (self.number(v, table, f"{key}[{i}]") for i, v in enumerate(value))
        if not 0 < lo < hi:
            raise self.error(table, key, f"got [{lo:g}, {hi:g}]", expected)
        return lo, hi

    def table(self, doc: dict, name: str) -> dict:
        t = doc.get(name, {})
        if not isinstance(t, dict):
            raise self.error(None, name, _got(t), f"a [{name}] table")
        allowed = _TABLE_KEYS[name]
        for key in t:
            if key not in allowed:
                hint = difflib.get_close_matches(key, allowed, n=1)
                problem = f"unknown key{f' (did you mean {hint[0]!r}?)' if hint else ''}"
                raise self.error(name, key, problem, f"one of: {', '.join(allowed)}")
        return t

    # document -------------------------------------------------------------
    def spec(self, doc: dict) -> Spec:
        allowed = ("name",) + tuple(_TABLE_KEYS)
        for key in doc:
            if key not in allowed:
                hint = difflib.get_close_matches(key, allowed, n=1)
                raise self.error(None, key, "unknown top-level key or table"
                                 + (f" (did you mean {hint[0]!r}?)" if hint else ""),
                                 "name or one of the tables " + ", ".join(f"[{t}]" for t in _TABLE_KEYS))
        if "plant" not in doc:
            raise self.error("plant", None, "missing table", "a [plant] table with one plant form: "
                             "numerator/denominator, zeros/poles/gain or transfer")
        name = doc.get("name", Path(self.source).stem if not self.source.startswith("<") else "spec")
        if not isinstance(name, str) or not name.strip():
            raise self.error(None, "name", _got(name), "a non-empty string")
        plant_table = self.table(doc, "plant")
        plant = self.plant(plant_table)
        controller = self.controller(self.table(doc, "controller"))
        reqs_table, opts_table = self.table(doc, "requirements"), self.table(doc, "options")
        requirements = {k: self.requirement(k, v) for k, v in reqs_table.items() if k != "settling_band"}
        self.check_bandwidth_order(requirements)
        options = self.options(opts_table, reqs_table)
        models = parse_models(self, plant_table, plant, options.robust_samples)
        models = None if models.trivial else models
        objectives = self.objectives(self.table(doc, "objectives"))
        search = self.search(self.table(doc, "search"))
        return Spec(name=name, plant=plant, controller=controller, requirements=MappingProxyType(requirements),
                    options=options, source=self.source, warnings=tuple(self.warnings),
                    objectives=objectives, search=search, models=models)

    # plant ----------------------------------------------------------------
    def plant(self, t: dict) -> TransferFunction:
        given = [form for form, keys in _PLANT_FORMS.items() if any(k in t for k in keys)]
        forms_text = "exactly one plant form: numerator + denominator, zeros + poles + gain, or transfer"
        if len(given) != 1:
            problem = ("no plant form given" if not given else
                       f"{' and '.join(given)} given together")
            raise self.error("plant", None if not given else "/".join(k for f in given for k in _PLANT_FORMS[f]
                                                                         if k in t), problem, forms_text)
        form = given[0]
        for key in _PLANT_FORMS[form]:
            if key not in t and key != "zeros":
                raise self.error("plant", key, f"missing (the {form} form needs it)", forms_text)
        if form == "numerator/denominator":
            num_key = "numerator"
            num = np.array(self.number_list(t["numerator"], "plant", "numerator"))
            den = np.array(self.number_list(t["denominator"], "plant", "denominator"))
            if not np.any(den):
                raise self.error("plant", "denominator", "all coefficients are zero",
                                 "at least one non-zero coefficient")
            tf = TransferFunction(num, den)
        elif form == "zeros/poles/gain":
            zeros = self.roots(t.get("zeros", []), "zeros")
            poles = self.roots(t["poles"], "poles")
            gain = self.number(t["gain"], "plant", "gain")
            num_key = "zeros" if len(zeros) > len(poles) else "gain"
            tf = TransferFunction(gain * poly_from_roots(zeros), poly_from_roots(poles))
        else:
            num_key = "transfer"
            text = t["transfer"]
            if not isinstance(text, str):
                raise self.error("plant", "transfer", _got(text), 'a string such as "2*(s+3)/((s-1)*(s+4))"')
            try:
                tf = parse_rational(text)
            except ExpressionError as e:
                raise self.error("plant", "transfer", str(e),
                                 'a rational expression in s such as "2*(s+3)/((s-1)*(s+4))", '
                                 'optionally times exp(-theta*s)') from None
        if not np.any(tf.num):
            raise self.error("plant", num_key, "the numerator is zero (a plant with no gain)",
                             "a non-zero numerator" if num_key != "gain" else "a non-zero gain")
        if not tf.is_proper:
            raise self.error("plant", num_key, f"the plant is improper (numerator degree {tf.num.size - 1} > "
                             f"denominator degree {tf.den.size - 1})", "at most as many zeros as poles")
        self.coefficient_range(tf, num_key)
        for r in _shared_roots(tf.num, tf.den):
            if r.imag < -HIDDEN_MODE_REL_TOL * max(1.0, abs(r)):
                continue  # reported with its conjugate
            if r.real >= -HIDDEN_MODE_REL_TOL * max(1.0, abs(r)):
                raise self.error("plant", num_key, "no controller can stabilise this plant: its numerator and "
                                 f"denominator share the root s={_fmt_root(r)} (an unstable hidden mode)",
                                 "a plant without a cancelled root at Re(s) >= 0")
            self.warnings.append(f"{self.source}: [plant].{num_key}: numerator and denominator share the "
                                 f"stable root s={_fmt_root(r)} (a hidden mode); the plant is kept unreduced "
                                 "and no controller can move this pole")
        delay = self.number(t.get("delay_s", 0.0), "plant", "delay_s", lo=0.0)
        return TransferFunction(tf.num, tf.den, tf.delay + delay)

    def coefficient_range(self, tf: TransferFunction, key: str) -> None:
        """Refuse coefficients the float64 evaluator cannot handle: after dividing by the largest
        denominator coefficient every non-zero coefficient must lie within 1e-80..1e80, and the
        plant's roots must come out without a floating-point overflow."""
        scale = float(np.max(np.abs(tf.den)))
        coef = np.abs(np.concatenate([tf.num, tf.den])) / scale
        coef = coef[coef > 0]
        lo, hi = float(coef.min()), float(coef.max())
        problem = None
        if not (np.isfinite(scale) and lo >= COEFFICIENT_RANGE[0] and hi <= COEFFICIENT_RANGE[1]):
            problem = (f"coefficients span {lo:.3g} to {hi:.3g} relative to the largest denominator coefficient")
        else:
            try:
                with np.errstate(all="raise"):
                    for p in (tf.num, tf.den):
                        if np.count_nonzero(p) > 1:
                            if not np.all(np.isfinite(np.roots(p))):
                                raise FloatingPointError
            except (FloatingPointError, np.linalg.LinAlgError):
                problem = "the plant's poles and zeros overflow in double precision"
        if problem:
            raise self.error("plant", key, problem,
                             f"coefficients within {COEFFICIENT_RANGE[0]:g}..{COEFFICIENT_RANGE[1]:g} of each other "
                             "(rescale the time unit or the signal units)")

    def roots(self, value, key: str) -> list[complex]:
        """Real roots as numbers, complex roots as [re, im] pairs that come in conjugate pairs."""
        expected = "a list of roots: numbers for real roots, [re, im] pairs for complex ones"
        if not isinstance(value, list):
            raise self.error("plant", key, _got(value), expected)
        roots = []
        for i, v in enumerate(value):
            if isinstance(v, list):
                if len(v) != 2:
                    raise self.error("plant", f"{key}[{i}]", f"got a list of {len(v)} items", "an [re, im] pair")
                roots.append(complex(*(self.number(x, "plant", f"{key}[{i}]") for x in v)))
            else:
                roots.append(complex(self.number(v, "plant", f"{key}[{i}]")))
        count = Counter(r for r in roots if r.imag != 0)
        for r, n in count.items():
            if count.get(r.conjugate(), 0) != n:
                raise self.error("plant", key, f"complex root [{r.real:g}, {r.imag:g}] has no conjugate "
                                 f"partner [{r.real:g}, {-r.imag:g}]", "complex roots in conjugate pairs")
        return roots

    # controller -------------------------------------------------------------
    def controller(self, t: dict) -> ControllerSpec:
        kind = t.get("kind", "lead-lag")
        if kind not in CONTROLLER_KINDS:
            raise self.error("controller", "kind", _got(kind), "one of: " + ", ".join(CONTROLLER_KINDS))
        stages = t.get("stages", list(ControllerSpec.stages))
        if not isinstance(stages, list):
            raise self.error("controller", "stages", _got(stages), "a list such as [\"lead\", \"lag\"]")
        for i, s in enumerate(stages):
            if s not in STAGE_KINDS:
                raise self.error("controller", f"stages[{i}]", _got(s), "one of: " + ", ".join(STAGE_KINDS))
        if kind != "lead-lag":
            if "stages" in t and stages:
                self.warnings.append(f"{self.source}: [controller].stages: ignored for kind {kind!r}")
            stages = []
        integrator = t.get("integrator", False)
        if not isinstance(integrator, bool):
            raise self.error("controller", "integrator", _got(integrator), "true or false")
        freq = self.pair(t.get("frequency_range_rad_s", list(ControllerSpec.frequency_range_rad_s)),
                         "controller", "frequency_range_rad_s", "rad/s")
        ratio = t.get("max_stage_ratio")
        if ratio is not None:
            ratio = self.number(ratio, "controller", "max_stage_ratio", lo=1.0, lo_open=True)
        gains = t.get("gain_range")
        if gains is not None:
            gains = self.pair(gains, "controller", "gain_range", "magnitude of the controller gain")
        return ControllerSpec(kind=kind, stages=tuple(stages), integrator=integrator,
                              frequency_range_rad_s=freq, max_stage_ratio=ratio, gain_range=gains)

    # requirements and options ----------------------------------------------
    def requirement(self, key: str, value) -> float:
        if key not in REQUIREMENTS:
            hint = difflib.get_close_matches(str(key), list(REQUIREMENTS), n=1)
            problem = f"unknown requirement{f' (did you mean {hint[0]!r}?)' if hint else ''}"
            raise self.error("requirements", key, problem, "one of: " + ", ".join(REQUIREMENTS))
        lo, lo_open, hi, hi_open = _requirement_bounds(key)
        return self.number(value, "requirements", key, lo, lo_open, hi, hi_open)

    def check_bandwidth_order(self, reqs: Mapping[str, float]) -> None:
        lo, hi = reqs.get("min_bandwidth_rad_s"), reqs.get("max_bandwidth_rad_s")
        if lo is not None and hi is not None and lo > hi:
            raise self.error("requirements", "min_bandwidth_rad_s",
                             f"{lo:g} exceeds max_bandwidth_rad_s = {hi:g}",
                             "min_bandwidth_rad_s <= max_bandwidth_rad_s")

    def settling_band(self, value, table: str) -> float:
        return self.number(value, table, "settling_band", 0.0, True, 0.5, True)

    def options(self, t: dict, reqs_table: dict) -> Options:
        if "settling_band" in t and "settling_band" in reqs_table:
            raise self.error("requirements", "settling_band", "also given in [options]",
                             "settling_band in one table only")
        band = Options.settling_band
        if "settling_band" in t:
            band = self.settling_band(t["settling_band"], "options")
        elif "settling_band" in reqs_table:
            band = self.settling_band(reqs_table["settling_band"], "requirements")
        order = self.integer(t.get("pade_order", Options.pade_order), "options", "pade_order", 1, 20)
        samples = self.integer(t.get("robust_samples", DEFAULT_SAMPLES), "options", "robust_samples", 0, MAX_SAMPLES)
        return Options(settling_band=band, pade_order=order, robust_samples=samples)

    def objectives(self, t: dict) -> tuple[str, ...]:
        names = t.get("minimize", list(DEFAULT_OBJECTIVES))
        expected = "a list of metric names from: " + ", ".join(OBJECTIVE_METRICS)
        if not isinstance(names, list):
            raise self.error("objectives", "minimize", _got(names), expected)
        for i, n in enumerate(names):
            if n not in OBJECTIVE_METRICS:
                hint = difflib.get_close_matches(str(n), OBJECTIVE_METRICS, n=1)
                problem = _got(n) + (f" (did you mean {hint[0]!r}?)" if hint else "")
                raise self.error("objectives", f"minimize[{i}]", problem, expected)
            if names.index(n) != i:
                raise self.error("objectives", f"minimize[{i}]", f"{n!r} is listed twice", "each metric once")
        return tuple(names)

    def search(self, t: dict) -> Mapping[str, Any]:
        out = dict(SEARCH_DEFAULTS)
        if "budget" in t:
            out["budget"] = self.integer(t["budget"], "search", "budget", 1)
        if "time_limit_s" in t:
            out["time_limit_s"] = self.number(t["time_limit_s"], "search", "time_limit_s", 0.0, True)
        if "seed" in t:
            out["seed"] = self.integer(t["seed"], "search", "seed", 0)
        return MappingProxyType(out)


# ------------------------------------------------------------------ TOML writer
def _toml_value(v) -> str:
    """A TOML literal for the few value types a Spec holds."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, numbers.Integral):
        return str(int(v))
    if isinstance(v, numbers.Real):
        return repr(float(v))
    if isinstance(v, str):
        out = []
        for ch in v:
            if ch in '"\\':
                out.append("\\" + ch)
            elif ord(ch) < 0x20 or ord(ch) == 0x7F:
                out.append(f"\\u{ord(ch):04X}")
            else:
                out.append(ch)
        return '"' + "".join(out) + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} as TOML")
