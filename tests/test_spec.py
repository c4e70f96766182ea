"""Tests for synth.spec: loading, validation messages, tighten and the TOML round trip."""

import dataclasses
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from synth.requirements import REQUIREMENTS
from synth.spec import (OBJECTIVE_METRICS, ControllerSpec, Options, SpecError, _requirement_bounds,
                        load_spec, parse_spec)

SPECS = Path(__file__).resolve().parent.parent / "specs"
EXAMPLES = sorted(SPECS.glob("*.toml"))
SRC = "bad.toml"
PLANT = "[plant]\nnumerator = [1]\ndenominator = [1, 1]\n"


def spec_error(text: str, source: str = SRC) -> str:
    """The SpecError message for ``text``; fails the test when no SpecError is raised."""
    with pytest.raises(SpecError) as info:
        parse_spec(text, source)
    msg = str(info.value)
    assert msg.startswith(f"{source}: "), msg
    assert "expected" in msg, msg
    return msg


# -------------------------------------------------------------- example specs
def test_there_are_at_least_four_examples():
    names = {p.name for p in EXAMPLES}
    assert {"maglev_carriage.toml", "camera_gimbal.toml", "heated_tank.toml", "buck_converter.toml"} <= names


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_example_loads(path):
    spec = load_spec(path)
    assert spec.name == path.stem
    assert spec.source == str(path)
    assert spec.warnings == ()
    assert spec.plant.is_proper
    assert spec.requirements, "an example should state some requirements"
    lines = path.read_text().splitlines()
    header = "\n".join(line for line in lines[:next(i for i, x in enumerate(lines) if not x.startswith("#")
                                                     and x.strip())])
    assert lines[0].startswith("#") and "INVENTED" in lines[0] and "no real product" in lines[0]
    assert "Safety:" in header and "Plant:" in header


def test_examples_use_all_three_plant_forms():
    forms = set()
    for path in EXAMPLES:
        plant = tomllib.loads(path.read_text())["plant"]
        forms |= {k for k in ("numerator", "zeros", "transfer") if k in plant}
    assert forms == {"numerator", "zeros", "transfer"}


def test_example_plants_have_the_documented_coefficients():
    maglev = load_spec(SPECS / "maglev_carriage.toml").plant
    # reference: numpy.poly (monic polynomial from roots)
    np.testing.assert_allclose(maglev.den, np.poly([20, -20, -500]), rtol=1e-14)
    np.testing.assert_allclose(maglev.num, [2e6])
    tank = load_spec(SPECS / "heated_tank.toml").plant
    # reference: hand reading of 1.8*exp(-4*s)/(60*s + 1)
    np.testing.assert_allclose(tank.num, [1.8])
    np.testing.assert_allclose(tank.den, [60, 1])
    assert tank.delay == 4.0
    assert load_spec(SPECS / "heated_tank.toml").controller == ControllerSpec(
        kind="pid", stages=(), integrator=False, frequency_range_rad_s=(0.001, 10.0), gain_range=(0.01, 100.0))


# -------------------------------------------------------------- plant forms
def test_roots_form_with_complex_pairs():
    spec = parse_spec("[plant]\nzeros = [-3]\npoles = [[-1, 2], [-1, -2], -5]\ngain = 4\n")
    # reference: hand expansion 4 (s + 3) / ((s^2 + 2 s + 5)(s + 5)) = (4 s + 12) / (s^3 + 7 s^2 + 15 s + 25)
    np.testing.assert_allclose(spec.plant.num, [4, 12], rtol=1e-14)
    np.testing.assert_allclose(spec.plant.den, [1, 7, 15, 25], rtol=1e-14)


def test_transfer_delay_adds_to_delay_s():
    spec = parse_spec('[plant]\ntransfer = "exp(-0.5*s)/(s+1)"\ndelay_s = 0.25\n')
    assert spec.plant.delay == 0.75   # reference: 0.5 + 0.25 by hand (exact in binary)


def test_plant_is_kept_unreduced_and_stable_hidden_mode_warns():
    spec = parse_spec('[plant]\ntransfer = "(s+2)/((s+2)*(s+3))"\n', "tank.toml")
    np.testing.assert_allclose(spec.plant.den, [1, 5, 6])   # reference: hand expansion (s+2)(s+3)
    assert len(spec.warnings) == 1
    w = spec.warnings[0]
    assert w.startswith("tank.toml: [plant].transfer") and "s=-2" in w and "hidden mode" in w


def test_stable_complex_hidden_pair_warns_once():
    spec = parse_spec("[plant]\nzeros = [[-1, 2], [-1, -2]]\npoles = [[-1, 2], [-1, -2], -4]\ngain = 1\n")
    assert len(spec.warnings) == 1 and "s=-1+2j" in spec.warnings[0]


@pytest.mark.parametrize("plant, key, root", [
    ('transfer = "(s-1)/((s-1)*(s+2))"', "transfer", "s=1"),
    ("numerator = [1, 0]\ndenominator = [1, 1, 0]", "numerator", "s=0"),
    ("zeros = [[0, 3], [0, -3]]\npoles = [[0, 3], [0, -3], -1]\ngain = 2", "gain", "s=0+3j"),
    # (s - 1000) against (s - 1000.0005)(s + 1): 5e-7 relative, inside the 1e-6 tolerance
    ("numerator = [1, -1000]\ndenominator = [1, -999.0005, -1000.0005]", "numerator", "s=1000"),
    # (s - 0.5) against (s - 0.5000005)(s + 1): 5e-7 absolute, inside 1e-6 * max(1, |r|)
    ("numerator = [1, -0.5]\ndenominator = [1, 0.4999995, -0.5000005]", "numerator", "s=0.5"),
])
def test_unstable_hidden_mode_is_an_error(plant, key, root):
    msg = spec_error(f"[plant]\n{plant}\n")
    assert f"[plant].{key}" in msg and "no controller can stabilise this plant" in msg
    assert f"share the root {root}" in msg and "unstable hidden mode" in msg


@pytest.mark.parametrize("numerator, denominator", [
    ("[1, -1000]", "[1, -999.002, -1000.002]"),   # s=1000 vs s=1000.002: 2e-6 relative
    ("[1, -0.5]", "[1, 0.499998, -0.500002]"),     # s=0.5 vs s=0.500002: 2e-6 absolute
    ("[1, 2]", "[1, 3.00002, 2.00002]"),           # s=-2 vs s=-2.00002, stable: no warning either
])
def test_roots_outside_tolerance_are_not_shared(numerator, denominator):
    # reference: hand expansion of (s - a)(s + 1) = s^2 + (1 - a) s - a
    spec = parse_spec(f"[plant]\nnumerator = {numerator}\ndenominator = {denominator}\n")
    assert spec.warnings == ()


# -------------------------------------------------------------- validation rules
# Each row: the TOML text and the words the message must contain (the key, and what is wrong).
BAD = {
    "toml syntax": ("[plant\nnumerator = [1]\n", ["TOML syntax error", "line 1"]),
    "toml syntax line": (PLANT + "x = = 1\n", ["TOML syntax error", "line 4"]),
    "unknown table": (PLANT + "[plants]\n", ["plants:", "unknown top-level", "did you mean 'plant'"]),
    "unknown top-level key": ("nam = 'x'\n" + PLANT, ["nam:", "unknown top-level"]),
    "missing plant": ("name = 'x'\n", ["[plant]", "missing"]),
    "plant not a table": ("plant = 3\n", ["plant:", "got 3"]),
    "unknown plant key": (PLANT + "dead_time = 1\n", ["[plant].dead_time", "unknown key"]),
    "unknown controller key": (PLANT + "[controller]\nstage = ['lead']\n",
                               ["[controller].stage", "did you mean 'stages'"]),
    "unknown requirement": (PLANT + "[requirements]\nmax_overshoot = 5\n",
                            ["[requirements].max_overshoot", "did you mean 'max_overshoot_pct'"]),
    "unknown option": (PLANT + "[options]\nband = 0.1\n", ["[options].band", "unknown key"]),
    "unknown objectives key": (PLANT + "[objectives]\nmaximize = []\n", ["[objectives].maximize"]),
    "unknown search key": (PLANT + "[search]\nbudgets = 3\n", ["[search].budgets"]),
    "name type": ("name = 3\n" + PLANT, ["name:", "got 3", "string"]),
    "string for number": (PLANT + "[requirements]\nmax_overshoot_pct = '10'\n",
                          ["[requirements].max_overshoot_pct", "got the string '10'"]),
    "bool for number": (PLANT + "[requirements]\nmax_overshoot_pct = true\n",
                        ["[requirements].max_overshoot_pct", "boolean"]),
    "bool coefficient": ("[plant]\nnumerator = [true]\ndenominator = [1, 1]\n", ["[plant].numerator[0]", "boolean"]),
    "bool gain": ("[plant]\npoles = [-1]\ngain = false\n", ["[plant].gain", "boolean"]),
    "integrator type": (PLANT + "[controller]\nintegrator = 1\n", ["[controller].integrator", "true or false"]),
    "pade float": (PLANT + "[options]\npade_order = 6.0\n", ["[options].pade_order", "integer"]),
    "pade bool": (PLANT + "[options]\npade_order = true\n", ["[options].pade_order", "boolean"]),
    "budget float": (PLANT + "[search]\nbudget = 1.5\n", ["[search].budget", "integer"]),
    "kind type": (PLANT + "[controller]\nkind = 'PID'\n", ["[controller].kind", "lead-lag, pid, pi"]),
    "stages type": (PLANT + "[controller]\nstages = 'lead'\n", ["[controller].stages", "list"]),
    "transfer type": ("[plant]\ntransfer = 3\n", ["[plant].transfer", "string"]),
    "requirement nan": (PLANT + "[requirements]\nmax_overshoot_pct = nan\n",
                        ["[requirements].max_overshoot_pct", "not finite", "a finite number >= 0"]),
    "requirement inf": (PLANT + "[requirements]\nmin_phase_margin_deg = inf\n",
                        ["[requirements].min_phase_margin_deg", "not finite"]),
    "coefficient nan": ("[plant]\nnumerator = [nan]\ndenominator = [1, 1]\n", ["[plant].numerator[0]", "not finite"]),
    "root inf": ("[plant]\npoles = [-inf]\ngain = 1\n", ["[plant].poles[0]", "not finite"]),
    "delay inf": (PLANT + "delay_s = inf\n", ["[plant].delay_s", "not finite"]),
    "frequency inf": (PLANT + "[controller]\nfrequency_range_rad_s = [0.1, inf]\n",
                      ["[controller].frequency_range_rad_s[1]", "not finite"]),
    "time limit nan": (PLANT + "[search]\ntime_limit_s = nan\n", ["[search].time_limit_s", "not finite"]),
    "negative settling time": (PLANT + "[requirements]\nmax_settling_time_s = -1\n",
                               ["[requirements].max_settling_time_s", "got -1"]),
    "zero settling time": (PLANT + "[requirements]\nmax_settling_time_s = 0\n",
                           ["[requirements].max_settling_time_s", "> 0"]),
    "negative delay margin": (PLANT + "[requirements]\nmin_delay_margin_s = -0.1\n",
                              ["[requirements].min_delay_margin_s", ">= 0"]),
    "negative time limit": (PLANT + "[search]\ntime_limit_s = -1\n", ["[search].time_limit_s", "> 0"]),
    "negative delay": (PLANT + "delay_s = -0.5\n", ["[plant].delay_s", ">= 0"]),
    "negative decay rate": (PLANT + "[requirements]\nmin_decay_rate = -1\n", ["[requirements].min_decay_rate"]),
    "negative bandwidth": (PLANT + "[requirements]\nmin_bandwidth_rad_s = -1\n",
                           ["[requirements].min_bandwidth_rad_s"]),
    "zero max bandwidth": (PLANT + "[requirements]\nmax_bandwidth_rad_s = 0\n",
                           ["[requirements].max_bandwidth_rad_s", "> 0"]),
    "negative noise gain": (PLANT + "[requirements]\nmax_noise_gain = -1\n", ["[requirements].max_noise_gain"]),
    "negative velocity constant": (PLANT + "[requirements]\nmin_velocity_constant = -1\n",
                                   ["[requirements].min_velocity_constant"]),
    "negative overshoot": (PLANT + "[requirements]\nmax_overshoot_pct = -5\n", ["[requirements].max_overshoot_pct"]),
    "phase margin 180": (PLANT + "[requirements]\nmin_phase_margin_deg = 180\n",
                         ["[requirements].min_phase_margin_deg", "[0, 180)"]),
    "negative gain range": (PLANT + "[controller]\ngain_range = [-1, 1]\n",
                            ["[controller].gain_range", "0 < low < high"]),
    "gain range reversed": (PLANT + "[controller]\ngain_range = [10, 1]\n", ["[controller].gain_range"]),
    "damping high": (PLANT + "[requirements]\nmin_damping = 1.5\n", ["[requirements].min_damping", "[0, 1]"]),
    "damping low": (PLANT + "[requirements]\nmin_damping = -0.1\n", ["[requirements].min_damping", "[0, 1]"]),
    "band zero": (PLANT + "[options]\nsettling_band = 0\n", ["[options].settling_band", "(0, 0.5)"]),
    "band half": (PLANT + "[options]\nsettling_band = 0.5\n", ["[options].settling_band", "(0, 0.5)"]),
    "band in requirements": (PLANT + "[requirements]\nsettling_band = 0.7\n",
                             ["[requirements].settling_band", "(0, 0.5)"]),
    "band twice": (PLANT + "[requirements]\nsettling_band = 0.05\n[options]\nsettling_band = 0.02\n",
                   ["[requirements].settling_band", "also given in [options]"]),
    "bandwidth order": (PLANT + "[requirements]\nmin_bandwidth_rad_s = 10\nmax_bandwidth_rad_s = 5\n",
                        ["[requirements].min_bandwidth_rad_s", "exceeds max_bandwidth_rad_s"]),
    "improper numerator": ("[plant]\nnumerator = [1, 2, 3]\ndenominator = [1, 1]\n",
                           ["[plant].numerator", "improper"]),
    "improper zeros": ("[plant]\nzeros = [-1, -2]\npoles = [-3]\ngain = 1\n", ["[plant].zeros", "improper"]),
    "improper transfer": ('[plant]\ntransfer = "s^2/(s+1)"\n', ["[plant].transfer", "improper"]),
    "zero numerator": ("[plant]\nnumerator = [0, 0]\ndenominator = [1, 1]\n", ["[plant].numerator", "zero"]),
    "zero denominator": ("[plant]\nnumerator = [1]\ndenominator = [0, 0]\n", ["[plant].denominator", "zero"]),
    "zero gain": ("[plant]\npoles = [-1]\ngain = 0\n", ["[plant].gain", "non-zero gain"]),
    "zero transfer": ('[plant]\ntransfer = "0*s/(s+1)"\n', ["[plant].transfer", "zero"]),
    "empty numerator": ("[plant]\nnumerator = []\ndenominator = [1, 1]\n", ["[plant].numerator", "empty list"]),
    "empty denominator": ("[plant]\nnumerator = [1]\ndenominator = []\n", ["[plant].denominator", "empty list"]),
    "missing denominator": ("[plant]\nnumerator = [1]\n", ["[plant].denominator", "missing"]),
    "missing gain": ("[plant]\npoles = [-1]\n", ["[plant].gain", "missing"]),
    "two forms": ('[plant]\nnumerator = [1]\ndenominator = [1, 1]\ntransfer = "1/(s+1)"\n',
                  ["[plant].numerator/denominator/transfer", "given together", "exactly one"]),
    "no form": ("[plant]\ndelay_s = 1\n", ["[plant]:", "no plant form"]),
    "bad transfer": ('[plant]\ntransfer = "1/(s+1"\n', ["[plant].transfer", "at position 7"]),
    "transfer eval attempt": ('[plant]\ntransfer = "__import__(\'os\')"\n', ["[plant].transfer", "unknown name"]),
    "unpaired complex root": ("[plant]\npoles = [[-1, 2], -3]\ngain = 1\n",
                              ["[plant].poles", "no conjugate partner [-1, -2]"]),
    "root triple": ("[plant]\npoles = [[-1, 2, 3]]\ngain = 1\n", ["[plant].poles[0]", "[re, im]"]),
    "frequency reversed": (PLANT + "[controller]\nfrequency_range_rad_s = [10, 1]\n",
                           ["[controller].frequency_range_rad_s", "0 < low < high"]),
    "frequency zero": (PLANT + "[controller]\nfrequency_range_rad_s = [0, 1]\n",
                       ["[controller].frequency_range_rad_s"]),
    "frequency equal": (PLANT + "[controller]\nfrequency_range_rad_s = [1, 1]\n",
                        ["[controller].frequency_range_rad_s"]),
    "frequency length": (PLANT + "[controller]\nfrequency_range_rad_s = [1]\n",
                         ["[controller].frequency_range_rad_s", "1 item;"]),
    "unknown stage": (PLANT + "[controller]\nstages = ['lead', 'leed']\n", ["[controller].stages[1]", "'leed'"]),
    "stage ratio": (PLANT + "[controller]\nmax_stage_ratio = 1\n", ["[controller].max_stage_ratio", "> 1"]),
    "unknown objective": (PLANT + "[objectives]\nminimize = ['settling_time']\n",
                          ["[objectives].minimize[0]", "did you mean 'settling_time_s'"]),
    "duplicate objective": (PLANT + "[objectives]\nminimize = ['control_peak', 'control_peak']\n",
                            ["[objectives].minimize[1]", "twice"]),
    "objective requirement key": (PLANT + "[objectives]\nminimize = ['max_control_peak']\n",
                                  ["[objectives].minimize[0]"]),
    "pade low": (PLANT + "[options]\npade_order = 0\n", ["[options].pade_order", "1..20"]),
    "pade high": (PLANT + "[options]\npade_order = 21\n", ["[options].pade_order", "1..20"]),
    "budget zero": (PLANT + "[search]\nbudget = 0\n", ["[search].budget", ">= 1"]),
    "seed negative": (PLANT + "[search]\nseed = -1\n", ["[search].seed", ">= 0"]),
}


@pytest.mark.parametrize("case", list(BAD), ids=list(BAD))
def test_validation_error_names_file_and_key(case):
    text, words = BAD[case]
    msg = spec_error(text)
    for w in words:
        assert w in msg, f"{w!r} not in {msg!r}"


def test_good_base_text_is_valid():
    """The base of the BAD cases is itself valid, so each failure is due to its own change."""
    spec = parse_spec(PLANT)
    assert spec.name == "spec" and spec.controller == ControllerSpec() and spec.options == Options()
    assert dict(spec.search) == {"budget": 20000, "time_limit_s": 30.0, "seed": 0}


def test_settling_band_in_requirements_moves_to_options():
    spec = parse_spec(PLANT + "[requirements]\nsettling_band = 0.05\nmax_overshoot_pct = 10\n")
    assert spec.options.settling_band == 0.05
    assert dict(spec.requirements) == {"max_overshoot_pct": 10.0}


def test_pid_ignores_stages_with_a_warning():
    spec = parse_spec(PLANT + "[controller]\nkind = 'pi'\nstages = ['lead']\n")
    assert spec.controller.stages == ()
    assert any("[controller].stages" in w for w in spec.warnings)
    assert parse_spec(PLANT + "[controller]\nkind = 'pid'\n").warnings == ()


def test_empty_stages_are_allowed():
    assert parse_spec(PLANT + "[controller]\nstages = []\n").controller.stages == ()


def test_load_spec_errors_name_the_file(tmp_path):
    missing = tmp_path / "nope.toml"
    with pytest.raises(SpecError, match="nope.toml: cannot read"):
        load_spec(missing)
    bad = tmp_path / "latin1.toml"
    bad.write_bytes(b"name = '\xe9'\n")
    with pytest.raises(SpecError, match="latin1.toml: byte 8 is not valid UTF-8"):
        load_spec(bad)
    bad.write_text(PLANT + "[requirements]\nmin_damping = 2\n")
    with pytest.raises(SpecError, match=r"latin1.toml: \[requirements\].min_damping"):
        load_spec(bad)


def test_name_defaults_to_file_stem(tmp_path):
    p = tmp_path / "my_loop.toml"
    p.write_text(PLANT)
    assert load_spec(p).name == "my_loop"


def test_spec_is_read_only():
    spec = parse_spec(PLANT + "[requirements]\nmax_overshoot_pct = 10\n")
    with pytest.raises(TypeError):
        spec.requirements["max_overshoot_pct"] = 1.0
    with pytest.raises(TypeError):
        spec.search["budget"] = 1
    with pytest.raises(dataclasses.FrozenInstanceError):
        spec.name = "x"


# -------------------------------------------------------------- tighten
def test_tighten_returns_new_spec_and_keeps_the_old_one():
    spec = load_spec(SPECS / "camera_gimbal.toml")
    before = dict(spec.requirements)
    tighter = spec.tighten({"max_overshoot_pct": 5, "min_damping": 0.6, "settling_band": 0.01})
    assert tighter is not spec
    assert dict(spec.requirements) == before and spec.options.settling_band == 0.02
    assert tighter.requirements["max_overshoot_pct"] == 5.0 and tighter.requirements["min_damping"] == 0.6
    assert tighter.options.settling_band == 0.01
    assert tighter.plant is spec.plant and tighter.source == spec.source
    assert tighter != spec


@pytest.mark.parametrize("changes, words", [
    ({"max_overshoot": 5}, ["[requirements].max_overshoot", "unknown requirement"]),
    ({"min_damping": 2}, ["[requirements].min_damping", "[0, 1]"]),
    ({"max_settling_time_s": True}, ["[requirements].max_settling_time_s", "boolean"]),
    ({"max_settling_time_s": math.nan}, ["[requirements].max_settling_time_s", "not finite"]),
    ({"min_bandwidth_rad_s": 100, "max_bandwidth_rad_s": 1}, ["[requirements].min_bandwidth_rad_s"]),
    ({"settling_band": 0.9}, ["[requirements].settling_band"]),
])
def test_tighten_validates_like_a_file(changes, words):
    spec = load_spec(SPECS / "camera_gimbal.toml")
    with pytest.raises(SpecError) as info:
        spec.tighten(changes)
    msg = str(info.value)
    assert msg.startswith(f"{spec.source}: ")
    for w in words:
        assert w in msg
    assert spec == load_spec(SPECS / "camera_gimbal.toml")


# -------------------------------------------------------------- to_toml round trip
@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_examples_round_trip(path):
    spec = load_spec(path)
    again = parse_spec(spec.to_toml())
    assert again == spec
    # reference: numpy.array_equal on the coefficients, exact (floats written with repr)
    assert np.array_equal(again.plant.num, spec.plant.num) and np.array_equal(again.plant.den, spec.plant.den)
    assert again.plant.delay == spec.plant.delay


def _value_for(key: str):
    lo, lo_open, hi, hi_open = _requirement_bounds(key)
    top = 1e6 if hi == math.inf else hi
    return st.floats(lo, top, exclude_min=lo_open, exclude_max=hi_open and hi != math.inf,
                     allow_nan=False, allow_infinity=False)


requirement_sets = st.fixed_dictionaries({}, optional={k: _value_for(k) for k in REQUIREMENTS}).filter(
    lambda d: d.get("min_bandwidth_rad_s", 0) <= d.get("max_bandwidth_rad_s", math.inf))


@settings(max_examples=150, deadline=None)
@given(reqs=requirement_sets,
       band=st.floats(1e-6, 0.5, exclude_max=True),
       name=st.text(st.characters(exclude_categories=("Cs",)), min_size=1, max_size=12).filter(str.strip),
       path=st.sampled_from(EXAMPLES), seed=st.integers(0, 2**62))
def test_to_toml_round_trip(reqs, band, name, path, seed):
    base = load_spec(path)
    spec = dataclasses.replace(base.tighten({**reqs, "settling_band": band}), name=name,
                               search={**base.search, "seed": seed})
    again = parse_spec(spec.to_toml())
    assert again == spec
    assert dict(again.requirements) == dict(spec.requirements)   # bit-exact float values


def test_to_toml_survives_odd_source_names():
    spec = parse_spec(PLANT, source="odd\nname.toml")
    assert parse_spec(spec.to_toml()) == spec


def test_equality_sees_changes():
    """The round-trip comparison can fail: any content change makes specs unequal."""
    spec = load_spec(SPECS / "maglev_carriage.toml")
    assert spec != spec.tighten({"max_overshoot_pct": 29.999999})
    assert spec != dataclasses.replace(spec, objectives=("settling_time_s",))
    assert spec != spec.tighten({"settling_band": 0.03})
    assert spec != dataclasses.replace(spec, options=Options(pade_order=7))
    assert spec != dataclasses.replace(spec, controller=dataclasses.replace(spec.controller, integrator=True))
    assert spec != dataclasses.replace(spec, search={**spec.search, "budget": 1})
    assert spec != dataclasses.replace(spec, name="other")
    assert spec != parse_spec(spec.to_toml().replace("[controller]", "delay_s = 0.001\n\n[controller]"))
    assert spec == dataclasses.replace(spec, source="elsewhere.toml", warnings=("w",))   # not content
    assert spec != parse_spec(spec.to_toml().replace("2000000.0", "2000000.0000001"))


def test_objectives_default_and_custom():
    assert parse_spec(PLANT).objectives == ("settling_time_s", "disturbance_peak", "control_peak")
    spec = parse_spec(PLANT + "[objectives]\nminimize = ['overshoot_pct', 'bandwidth_rad_s']\n")
    assert spec.objectives == ("overshoot_pct", "bandwidth_rad_s")
    assert set(spec.objectives) <= set(OBJECTIVE_METRICS)
