"""CSV export of a design and its reader.

References: pandas.read_csv and csv.reader, both with their defaults, as the independent
readers of the file (RFC 4180: Shafranovich, IETF RFC 4180, 2005);
synth.describe.check_controller re-run on the re-imported design as the reference for
the metrics; synth.discrete.tustin / discrete_loop (tested against scipy in
test_discrete.py) for the discrete rows; Ogata, *Modern Control Engineering*, 5th ed.,
ex. 7-26 (REFERENCES.md, recomputed: crossover 8.89 rad/s) as the worked design.
"""

from __future__ import annotations

import csv
import math
import os

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from synth import CAUTION
from synth.describe import check_controller, controller_record
from synth.discrete import discrete_loop, tustin, zoh
from synth.export import COLUMNS, SECTIONS, ExportError, export_design, item, read_design
from synth.lti import TransferFunction
from synth.requirements import REQUIREMENTS

OGATA_G = TransferFunction([4.0], [1.0, 2.0, 0.0])
OGATA_C = TransferFunction(41.7 * np.array([1.0, 4.41]), [1.0, 18.4])
REQS = {"min_phase_margin_deg": 45.0, "max_overshoot_pct": 30.0, "max_settling_time_s": 0.5,
        "min_gain_margin_db": 6.0}


@pytest.fixture(scope="module")
def ogata_record():
    return check_controller(OGATA_G, OGATA_C, REQS)


def _export(tmp_path, rec, name="ogata.csv", **kw):
    path = tmp_path / name
    export_design(path, OGATA_G, OGATA_C, rec, "Ogata 7-26 lead, #1", REQS, **kw)
    return path


def test_csv_reads_with_pandas_and_has_every_section(tmp_path, ogata_record):
    path = _export(tmp_path, ogata_record, sample_time=0.01)
    df = pd.read_csv(path)
    assert list(df.columns) == COLUMNS
    assert set(df["section"]) == set(SECTIONS)
    for col in ("index", "value", "imag", "limit", "slack", "met"):
        assert df[col].dtype.kind == "f", col          # numeric columns stay numeric for pandas
    # the caution is the first data row; no comment lines
    assert df.iloc[0]["section"] == "caution" and df.iloc[0]["note"] == CAUTION
    caution = df[df.section == "caution"]
    assert list(caution["note"]) == [CAUTION]
    assert not any(line.startswith("#") for line in path.read_text().splitlines())
    # the spec name with a comma and a '#' survives pandas' comment handling
    assert df[(df.section == "design") & (df.name == "spec_name")]["note"].item() == "Ogata 7-26 lead, #1"
    # infinities come back as floats
    gm = df[(df.section == "metric") & (df.name == "gain_margin_db")]["value"].item()
    assert gm == math.inf


def test_csv_module_reads_it_with_defaults_every_row_the_same_width(tmp_path, ogata_record):
    # reference: Python's csv.reader with its default dialect (RFC 4180 quoting); a file whose
    # text holds commas, quotes and '#' in a field must still give one field count everywhere
    path = tmp_path / "w.csv"
    export_design(path, OGATA_G, OGATA_C, ogata_record, 'Ogata, "7-26" #1', REQS, sample_time=0.01)
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == COLUMNS
    assert {len(r) for r in rows} == {len(COLUMNS)}
    assert rows[1][:2] == ["caution", "caution"] and rows[1][-1] == CAUTION
    names = {(r[0], r[1]): r for r in rows[1:]}
    assert names[("design", "spec_name")][-1] == 'Ogata, "7-26" #1'
    assert names[("design", "export_format")][3] == "2"
    assert path.read_bytes().count(b"\r\n") == len(rows)      # RFC 4180: CRLF after every record
    df = pd.read_csv(path)
    assert df.shape == (len(rows) - 1, len(COLUMNS))


def test_export_has_the_users_permissions_and_takes_extra_items(tmp_path, ogata_record):
    old = os.umask(0o022)
    try:
        path = tmp_path / "p.csv"
        export_design(path, OGATA_G, OGATA_C, ogata_record, "x", REQS,
                      extra_items=[item("model_set", "models", value=3, note="invented")])
    finally:
        os.umask(old)
    assert (path.stat().st_mode & 0o777) == 0o644
    df = pd.read_csv(path)
    assert df[df.section == "model_set"]["value"].item() == 3
    with pytest.raises(ExportError, match="fields"):
        export_design(tmp_path / "q.csv", OGATA_G, OGATA_C, ogata_record, "x", REQS, extra_items=[["a", "b"]])


def test_layout_1_files_with_comment_lines_still_read(tmp_path, ogata_record):
    path = _export(tmp_path, ogata_record)
    old = tmp_path / "old.csv"
    old.write_text("# synth design export\n# caution ...\n" + path.read_text())
    back = read_design(old)
    np.testing.assert_array_equal(back["controller"].num, OGATA_C.num)


def test_requirement_rows_match_the_record(tmp_path, ogata_record):
    df = pd.read_csv(_export(tmp_path, ogata_record))
    req = df[df.section == "requirement"].set_index("name")
    assert list(req.index) == list(REQS)
    for key, r in ogata_record["requirements"].items():
        row = req.loc[key]
        assert row["value"] == r["value"] and row["limit"] == r["limit"] and row["slack"] == r["slack"]
        assert bool(row["met"]) == r["met"]
        assert (row["unit"] if isinstance(row["unit"], str) else "") == REQUIREMENTS[key].unit
    # the worked design fails the settling-time requirement (0.62 s > 0.5 s): a 0 must be written
    assert req.loc["max_settling_time_s", "met"] == 0


def test_metric_and_controller_rows(tmp_path, ogata_record):
    df = pd.read_csv(_export(tmp_path, ogata_record))
    met = df[df.section == "metric"].set_index("name")
    for name in ("phase_margin_deg", "crossover_rad_s", "sensitivity_peak", "velocity_constant"):
        assert met.loc[name, "value"] == ogata_record[name]
    assert met.loc["crossover_rad_s", "unit"] == "rad/s"
    ctl = df[df.section == "controller"]
    num = ctl[ctl.name == "numerator"].sort_values("index", ascending=False)["value"].to_numpy()
    np.testing.assert_array_equal(num, OGATA_C.num)
    zero = ctl[ctl.name == "zero"]
    assert zero["value"].item() == pytest.approx(-4.41) and zero["imag"].item() == 0.0
    assert ctl[ctl.name == "gain"]["value"].item() == 41.7
    cl = df[df.section == "closed_loop_pole"]
    np.testing.assert_allclose(np.sort_complex(cl["value"].to_numpy() + 1j * cl["imag"].to_numpy()),
                               np.sort_complex(np.array(ogata_record["closed_loop_poles"])))


def _same(a, b):
    if isinstance(a, str) or isinstance(b, str):
        return a == b
    if isinstance(a, (bool, np.bool_)) or isinstance(b, (bool, np.bool_)):
        return bool(a) == bool(b)
    a, b = float(a), float(b)
    if math.isnan(a) or math.isnan(b):
        return math.isnan(a) and math.isnan(b)
    if math.isinf(a) or math.isinf(b):
        return a == b
    return abs(a - b) <= 1e-9 * max(abs(a), abs(b), 1e-300)


@pytest.mark.parametrize("case", ["ogata", "dead_time"])
def test_round_trip_reproduces_metrics(tmp_path, case):
    # reference: check_controller re-run on the plant, controller and requirements read back
    if case == "ogata":
        plant, c, reqs, band = OGATA_G, OGATA_C, REQS, None
    else:
        plant = TransferFunction([1.0], [2.0, 1.0], delay=0.7)
        c = TransferFunction([0.9, 0.6], [1.0, 0.0])
        reqs, band = {"max_sensitivity_peak": 1.6, "min_delay_margin_s": 0.3}, 0.05
    rec = check_controller(plant, c, reqs, settling_band=band or 0.02)
    path = tmp_path / f"{case}.csv"
    export_design(path, plant, c, rec, case, reqs, sample_time=0.05, settling_band=band)
    back = read_design(path)
    np.testing.assert_array_equal(back["controller"].num, c.num)
    np.testing.assert_array_equal(back["plant"].den, plant.den)
    assert back["plant"].delay == plant.delay
    assert back["requirements"] == reqs
    pade = back["metrics"]["pade_order"] or 6
    again = check_controller(back["plant"], back["controller"], back["requirements"],
                             settling_band=back["settling_band"] or 0.02, pade_order=pade)
    compared = 0
    for name, v in back["metrics"].items():
        assert _same(v, again[name]), (name, v, again[name])
        compared += 1
    assert compared >= 25
    for key, r in again["requirements"].items():
        assert _same(r["value"], rec["requirements"][key]["value"])


def test_discrete_rows(tmp_path, ogata_record):
    T = 0.01
    path = _export(tmp_path, ogata_record, sample_time=T)
    df = pd.read_csv(path)
    d = df[df.section == "discrete"].set_index("name")
    assert d.loc["sample_time_s", "value"] == T
    assert d.loc["method", "note"] == "tustin"
    wc = ogata_record["crossover_rad_s"]
    assert d.loc["prewarp_rad_s", "value"] == wc
    assert wc == pytest.approx(8.89, abs=0.01)      # Ogata ex. 7-26, REFERENCES.md (recomputed)
    b, a = tustin(OGATA_C, T, prewarp_rad_s=wc)
    back = read_design(path)["discrete"]
    np.testing.assert_array_equal(back["b"], b)
    np.testing.assert_array_equal(back["a"], a)
    assert back["T"] == T and back["method"] == "tustin" and back["prewarp_rad_s"] == wc
    # discrete_check agrees with discrete_loop; a fast sample time gives no warning
    chk = df[df.section == "discrete_check"].set_index("name")
    loop = discrete_loop(OGATA_G, b, a, T)
    assert chk.loc["stable", "value"] == 1.0 and loop["stable"]
    assert chk.loc["phase_margin_deg", "value"] == loop["phase_margin_deg"]
    assert chk.loc["gain_margin_low_db", "value"] == -math.inf
    assert "warning" not in chk.index


def test_slow_and_unstable_sampling_are_flagged(tmp_path, ogata_record):
    # w_c T = 8.89 * 0.3 = 2.7 > 0.3; Tustin at T = 0.3 s loses stability (test_discrete.py)
    path = _export(tmp_path, ogata_record, sample_time=0.3, prewarp=False)
    df = pd.read_csv(path)
    chk = df[df.section == "discrete_check"]
    assert chk[chk.name == "stable"]["value"].item() == 0.0
    notes = " ".join(chk[chk.name == "warning"]["note"])
    assert "NOT stable" in notes and "rule of thumb" in notes and "common-practice" in notes
    d = df[df.section == "discrete"].set_index("name")
    assert math.isnan(d.loc["prewarp_rad_s", "value"])
    b, a = tustin(OGATA_C, 0.3)
    np.testing.assert_array_equal(read_design(path)["discrete"]["b"], b)


def test_zoh_method(tmp_path, ogata_record):
    path = _export(tmp_path, ogata_record, sample_time=0.02, method="zoh")
    back = read_design(path)["discrete"]
    b, a = zoh(OGATA_C, 0.02)
    np.testing.assert_array_equal(back["b"], b)
    np.testing.assert_array_equal(back["a"], a)
    assert back["method"] == "zoh" and back["prewarp_rad_s"] is None


def test_no_sample_time_means_no_discrete_sections(tmp_path, ogata_record):
    df = pd.read_csv(_export(tmp_path, ogata_record))
    assert not {"discrete", "discrete_check"} & set(df.section)
    assert read_design(tmp_path / "ogata.csv")["discrete"] is None


@pytest.mark.parametrize("where", ["missing_folder", "is_directory", "under_a_file"])
def test_unwritable_path_raises_and_leaves_nothing(tmp_path, ogata_record, where):
    (tmp_path / "plain.txt").write_text("x")
    (tmp_path / "adir").mkdir()
    target = {"missing_folder": tmp_path / "no" / "such" / "d.csv",
              "is_directory": tmp_path / "adir",
              "under_a_file": tmp_path / "plain.txt" / "d.csv"}[where]
    before = sorted(p.name for p in tmp_path.rglob("*"))
    with pytest.raises(ExportError, match=str(target).replace("\\", "\\\\")):
        export_design(target, OGATA_G, OGATA_C, ogata_record, "x", REQS, sample_time=0.01)
    assert sorted(p.name for p in tmp_path.rglob("*")) == before
    assert (tmp_path / "plain.txt").read_text() == "x"


@pytest.mark.parametrize("kw,msg", [
    ({"sample_time": -0.1}, "sample_time"),
    ({"sample_time": 0.01, "method": "euler"}, "method"),
])
def test_bad_options_raise_and_write_nothing(tmp_path, ogata_record, kw, msg):
    path = tmp_path / "d.csv"
    with pytest.raises(ExportError, match=msg):
        export_design(path, OGATA_G, OGATA_C, ogata_record, "x", REQS, **kw)
    assert not path.exists() and not os.listdir(tmp_path)


def test_requirements_must_match_the_record(tmp_path, ogata_record):
    with pytest.raises(ExportError, match="max_overshoot_pct"):
        export_design(tmp_path / "d.csv", OGATA_G, OGATA_C, ogata_record, "x",
                      {**REQS, "max_overshoot_pct": 10.0})
    with pytest.raises(ExportError, match="different controller"):
        export_design(tmp_path / "d.csv", OGATA_G, OGATA_C * 2.0, ogata_record, "x", REQS)
    assert not os.listdir(tmp_path)


def test_existing_file_is_replaced_whole(tmp_path, ogata_record):
    path = tmp_path / "d.csv"
    path.write_text("old contents\n")
    export_design(path, OGATA_G, OGATA_C, ogata_record, "x", REQS)
    assert "old contents" not in path.read_text()
    assert os.listdir(tmp_path) == ["d.csv"]


def test_read_design_errors_name_the_file(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("a,b\n1,2\n")
    with pytest.raises(ExportError, match="bad.csv"):
        read_design(bad)
    with pytest.raises(ExportError, match="missing.csv"):
        read_design(tmp_path / "missing.csv")


# any float64 mantissa (0.1 + 0.2, subnormal-free awkward values) over a realistic range of magnitudes
coef = st.floats(allow_nan=False, allow_infinity=False, min_value=-1e6, max_value=1e6, allow_subnormal=False).filter(
    lambda x: x == 0.0 or abs(x) >= 1e-6)


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(coef, min_size=1, max_size=5), st.lists(coef, min_size=1, max_size=5),
       st.floats(min_value=1e-6, max_value=1e6))
def test_controller_coefficients_round_trip_exactly(tmp_path, num, den, lead):
    # reference: the coefficients themselves (repr of a float64 is exact)
    den = [lead] + den
    c = TransferFunction(num, den)
    rec = {"requirements": {}, "controller": controller_record(c), "closed_loop_poles": []}
    path = tmp_path / "c.csv"
    export_design(path, OGATA_G, c, rec, "coefficients", {})
    back = read_design(path)["controller"]
    np.testing.assert_array_equal(back.num, c.num)
    np.testing.assert_array_equal(back.den, c.den)
    # pandas reads the same numbers (its own float parser, exact for repr strings)
    df = pd.read_csv(path)
    got = df[(df.section == "controller") & (df.name == "denominator")].sort_values("index", ascending=False)
    np.testing.assert_array_equal(got["value"].to_numpy(), c.den)


def test_pid_forms_stages_and_velocity_form_rows(tmp_path):
    # reference: the parallel-form coefficients of the family (synth.structures) and
    # scipy.signal.lfilter for the position form of the exported discrete controller
    from scipy import signal

    from synth.describe import structure_details
    from synth.structures import Family
    fam = Family(kind="pid")
    params = np.log10([6.85, 7.07, 0.83, 0.0121])
    num, den = fam.controllers(params[None, :])
    c = TransferFunction(num[0], den[0])
    plant = TransferFunction([3.0], [1.0, 4.0, 3.0])
    rec = check_controller(plant, c, {"max_overshoot_pct": 15.0})
    rec.update(structure_details(fam, params, rec))
    path = tmp_path / "pid.csv"
    export_design(path, plant, c, rec, "pid", {"max_overshoot_pct": 15.0}, sample_time=0.01)
    back = read_design(path)
    par = back["pid_forms"]["pid_parallel"]
    kp, ki, kd, tf = par["kp"], par["ki"], par["kd"], par["tf_s"]
    np.testing.assert_allclose([kp * tf + kd, kp + ki * tf, ki], num[0], rtol=1e-14)
    std = back["pid_forms"]["pid_standard"]
    assert std["ti_s"] == pytest.approx(kp / ki, rel=1e-14) and std["n"] == pytest.approx(kd / kp / tf, rel=1e-14)
    assert set(back["pid_forms"]["pid_series"]) == {"k", "ti_s", "td_s", "tf_s"}
    inc = back["incremental"]
    b, a = back["discrete"]["b"], back["discrete"]["a"]
    e = np.random.default_rng(3).normal(size=100)
    u = np.cumsum(signal.lfilter(inc["b"], inc["a"], e))        # u[k] = u[k-1] + du[k]
    np.testing.assert_allclose(u, signal.lfilter(b, a, e), rtol=1e-9, atol=1e-9 * np.abs(u).max())
    df = pd.read_csv(path)
    assert {"pid_parallel", "pid_standard", "pid_series", "incremental"} <= set(df.section)

    # a lead-lag design with an inactive second stage (ratio 1.005, issue 11)
    fam = Family(stages=("lead", "lead"))
    params = np.array([1.5, np.log10(5.0), np.log10(40.0), np.log10(9950.0), np.log10(10000.0)])
    num, den = fam.controllers(params[None, :])
    c = TransferFunction(num[0], den[0])
    rec = check_controller(OGATA_G, c, {})
    rec.update(structure_details(fam, params, rec))
    path = tmp_path / "ll.csv"
    export_design(path, OGATA_G, c, rec, "lead-lead", {})
    st = read_design(path)["stages"]
    assert [s["active"] for s in st] == [True, False]
    assert st[1]["zero_rad_s"] == pytest.approx(9950.0)
    df = pd.read_csv(path)
    note = df[(df.section == "stage") & (df.name == "active") & (df["index"] == 2)]["note"].item()
    assert "INACTIVE" in note and "2 %" in note
