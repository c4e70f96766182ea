"""PID forms and inactive stages in `synth table`, `synth show` and their JSON.

Reference: the family's own controller coefficients (synth.structures.Family.controllers,
checked against hand expansion in test_structures.py): the parallel PID gains shown
must expand to exactly those coefficients.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from typer.testing import CliRunner

from synth.cli import app
from synth.runs import family_of, ranked, run_search, settings_from, table_view
from synth.spec import parse_spec
from synth.tables import _inactive_lines, json_rows, ranked_text

SPEC = """
name = "pid-output"   # invented second-order plant
[plant]
poles = [-1, -3]
gain = 3
[controller]
kind = "pid"
[requirements]
max_overshoot_pct = 15
max_settling_time_s = 4
[objectives]
minimize = ["settling_time_s", "control_peak"]
"""


@pytest.fixture(scope="module")
def pid_run(tmp_path_factory):
    spec = parse_spec(SPEC, "pid-output.toml")
    return run_search(spec, SPEC, out=tmp_path_factory.mktemp("pid") / "run", settings=settings_from(spec, 250, 4.0, 0))


def test_table_and_json_give_the_pid_forms(pid_run):
    df = ranked(pid_run)
    text = ranked_text(pid_run, table_view(pid_run, 5))
    assert "PID settings" in text and "Ti s" in text and "K'" in text
    rows = json_rows(pid_run, df, 5)
    fam = family_of(pid_run)
    for r, (_, row) in zip(rows, df.head(5).iterrows()):
        pa = r["pid_forms"]["parallel"]
        num, den = fam.controllers(np.array([[row[n] for n in fam.names]]))
        np.testing.assert_allclose([pa["kp"] * pa["tf_s"] + pa["kd"], pa["kp"] + pa["ki"] * pa["tf_s"], pa["ki"]],
                                   num[0], rtol=1e-12)
        assert r["pid_forms"]["standard"]["kc"] == pa["kp"]
        assert any(line.lstrip().startswith(str(r["id"])) for line in text.splitlines())


def test_show_gives_the_pid_forms(pid_run):
    cid = int(ranked(pid_run)["id"].iloc[0])
    res = CliRunner().invoke(app, ["show", str(pid_run.folder), str(cid), "--json"])
    assert res.exit_code == 0, res.output
    rec = json.loads(res.output)
    assert set(rec["pid_forms"]) >= {"parallel", "standard", "series", "text"}
    res = CliRunner().invoke(app, ["show", str(pid_run.folder), str(cid)])
    assert "parallel  C(s) = kp + ki/s" in res.output and "standard  C(s) = Kc" in res.output


def test_inactive_stage_lines():
    rows = [{"id": 7, "stages": [{"stage": 1, "role": "lead", "zero_rad_s": 30.0, "pole_rad_s": 300.0, "active": True,
                            "reason": ""},
                           {"stage": 2, "role": "lead", "zero_rad_s": 9950.0, "pole_rad_s": 10000.0,
                            "active": False, "reason": "zero/pole ratio within 2 % of 1"}]}, {"id": 8, "stages": []}]
    lines = _inactive_lines(rows)
    assert len(lines) == 1 and lines[0].startswith("   ~ #7 stage 2") and "-9.95e3" in lines[0]
