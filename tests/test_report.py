"""The design report (synth.report and ``synth report``).

References: html.parser (Python standard library) as the independent reader of the
page; base64/PNG signature (PNG specification, ISO/IEC 15948, section 5.2); the
evaluator's own outputs (synth.evaluate.step_responses, synth.describe.check_controller)
as the reference for every drawn number, since the report must not compute its own;
closed-form geometry for the allowed pole region (damping sector half-angle
acos(zeta), common practice) and for |1 + L| = 1/|S| (definition of S). The browser
test renders the page with a headless Chromium when /usr/bin/chromium exists.
"""

from __future__ import annotations

import base64
import itertools
import math
import os
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from synth import CAUTION
from synth.cli import app
from synth.describe import check_controller
from synth.evaluate import step_responses
from synth.lti import TransferFunction
from synth.report import (FIGURE_KEYS, METRIC_AXIS, Candidate, ReportError, cancelled_roots, choose_front,
                          loop_response, pole_map_data, render_figure, report_data, write_outputs, roots_text)
from synth.runs import open_run, ranked, run_search, settings_from
from synth.spec import parse_spec

# An invented unstable levitation-like plant: poles at +20, -20, -500 (s^-1), gain 40000.
SPEC = """
name = "report-levitator"
[plant]
poles = [20, -20, -500]
gain = 40000
[controller]
kind = "lead-lag"
stages = ["lead", "lead"]
frequency_range_rad_s = [1, 5000]
[requirements]
min_damping = 0.3
min_decay_rate = 5
max_overshoot_pct = 30
max_settling_time_s = 0.5
max_rise_time_s = 0.1
max_disturbance_peak = 0.25
max_control_peak = 400
min_phase_margin_deg = 30
min_gain_margin_db = 4
max_sensitivity_peak = 2.2
[objectives]
minimize = ["settling_time_s", "disturbance_peak", "control_peak"]
"""


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    spec = parse_spec(SPEC, "report-levitator.toml")
    folder = tmp_path_factory.mktemp("report") / "run"
    return run_search(spec, SPEC, out=folder, settings=settings_from(spec, 1500, 4.0, 0))


@pytest.fixture(scope="module")
def data(run):
    return report_data(run)


@pytest.fixture(scope="module")
def built(run, tmp_path_factory):
    """The report written through the CLI, with the PNG files."""
    out = tmp_path_factory.mktemp("built")
    html_path, png_dir = out / "r.html", out / "png"
    res = CliRunner().invoke(app, ["report", str(run.folder), "-o", str(html_path), "--png", str(png_dir)])
    assert res.exit_code == 0, res.output
    return html_path, png_dir


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.imgs, self.scripts, self.links, self.tables, self.text = [], 0, [], {}, []
        self._table = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.imgs.append(a.get("src", ""))
        if tag == "script":
            self.scripts += 1
        for k in ("href", "src"):
            if k in a and tag != "img":
                self.links.append(a[k])
        if tag == "table" and "data-candidate" in a:
            self._table = int(a["data-candidate"])
            self.tables[self._table] = []

    def handle_endtag(self, tag):
        if tag == "table":
            self._table = None

    def handle_data(self, d):
        self.text.append(d)
        if self._table is not None:
            self.tables[self._table].append(d.strip())


def _panel(data, key, i=0):
    return next(f for f in data.figures if f.key == key).panels[i]


# ------------------------------------------------------------------ the page
def test_report_builds_parses_and_embeds_one_image_per_figure(built, data):
    html_path, png_dir = built
    page = _Page()
    page.feed(html_path.read_text(encoding="utf-8"))
    page.close()
    assert len(page.imgs) == 7 == len(FIGURE_KEYS)
    for src in page.imgs:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    assert page.scripts == 0 and page.links == []          # no JavaScript, nothing fetched
    text = " ".join(page.text)
    assert CAUTION in text
    for c in data.candidates:                               # each candidate's requirement table
        cells = page.tables[c.cid]
        for key, r in c.record["requirements"].items():
            assert key in cells
        assert c.record["certificate"]["text"] in text
        assert roots_text(c.controller) in text
    assert sorted(p.name for p in png_dir.iterdir()) == sorted(f"{i}-{k}.png" for i, k in
                                                                 enumerate(FIGURE_KEYS, 1))
    assert not [p for p in html_path.parent.iterdir() if p.name.endswith(".tmp")]


def test_default_selection_is_knee_and_objective_extremes(run, data):
    df = ranked(run)
    front = df[df["feasible"] & (df["front"] == 0)]
    ids = [c.cid for c in data.candidates]
    assert 1 <= len(ids) <= 5 and len(set(ids)) == len(ids)
    assert int(front[front["knee"]]["id"].iloc[0]) in ids
    for obj in run.spec.objectives:
        best = front[obj].min()
        assert any(math.isclose(c.record[obj], best, rel_tol=1e-9) for c in data.candidates), obj


def test_no_feasible_candidate_falls_back_to_least_violating(run):
    df = ranked(run).copy()
    df["feasible"] = False
    df["front"] = -1
    df["knee"] = False
    picks = choose_front(df, run.spec.objectives)
    finite = df[np.isfinite(df["violation"].to_numpy(float))]
    assert [p[0] for p in picks] == [int(i) for i in finite["id"].head(5)]
    assert all("none feasible" in p[1] for p in picks)


# ------------------------------------------------------------------ time plots
def test_reference_step_bounds_carry_the_spec_numbers(run, data):
    reqs = run.spec.requirements
    p = _panel(data, "reference-step")
    final = p.params["final"]
    b = {x.kind: x for x in p.bounds}
    assert math.isclose(b["overshoot"].value, final * (1 + reqs["max_overshoot_pct"] / 100), rel_tol=1e-12)
    band = run.spec.options.settling_band
    assert math.isclose(b["settling_upper"].value, final * (1 + band), rel_tol=1e-12)
    assert math.isclose(b["settling_lower"].value, final * (1 - band), rel_tol=1e-12)
    assert b["settling_upper"].x0 == reqs["max_settling_time_s"] == b["settling_time_limit"].value
    assert b["overshoot"].forbidden == "above" and b["settling_lower"].forbidden == "below"
    rise = next(m for m in p.marks if m.kind == "rise_time_limit")
    assert rise.value == reqs["max_rise_time_s"] and math.isclose(rise.x2 - rise.x, reqs["max_rise_time_s"])
    assert "30 %" in b["overshoot"].label and "0.5 s" in b["settling_upper"].label


def test_step_curves_are_the_evaluators_samples(run, data):
    p = _panel(data, "reference-step")
    for c in data.candidates:
        r = step_responses(run.spec.plant, c.controller.num[None, :], c.controller.den[None, :],
                           run.spec.options.pade_order)
        curve = next(cv for cv in p.curves if cv.cid == c.cid)
        k = min(curve.x.size, r.t.shape[1])
        np.testing.assert_array_equal(curve.x[:k], r.t[0, :k])
        scale = r.final[0, 0] if p.params["normalised"] else 1.0
        np.testing.assert_allclose(curve.y[:k], r.y[0, :k, 0] / scale, rtol=1e-12, atol=0)
        # the legend carries the evaluator's metrics
        assert f"overshoot {c.record['overshoot_pct']:.3g} %" in curve.label


@pytest.mark.parametrize("key,req,col", [("load-step", "max_disturbance_peak", 1),
                                         ("control-signal", "max_control_peak", 2)])
def test_peak_limits_are_drawn_both_ways(run, data, key, req, col):
    p = _panel(data, key)
    lim = run.spec.requirements[req]
    vals = sorted((b.value, b.forbidden) for b in p.bounds)
    assert vals == [(-lim, "below"), (lim, "above")]
    for c in data.candidates:
        curve = next(cv for cv in p.curves if cv.cid == c.cid)
        k = min(curve.x.size, c.steps.t.size)
        np.testing.assert_array_equal(curve.y[:k], c.steps.y[:k, col])


# ------------------------------------------------------------------ frequency plots
def test_margin_marks_sit_where_the_evaluator_put_them(run, data):
    fig = next(f for f in data.figures if f.key == "loop-frequency-response")
    mag, pha = fig.panels
    plant = run.spec.plant
    for c in data.candidates:
        r = c.record
        pm = next(m for m in pha.marks if m.cid == c.cid and m.kind == "phase_margin")
        assert pm.value == r["phase_margin_deg"] and pm.freq_rad_s == r["phase_margin_rad_s"]
        assert math.isclose(pm.y2 - pm.y, r["phase_margin_deg"], abs_tol=1e-9)
        assert math.isclose((pm.y + 180.0) % 360.0, 0.0, abs_tol=1e-6) or \
            math.isclose((pm.y + 180.0) % 360.0, 360.0, abs_tol=1e-6)      # bar starts on the phase of -1
        assert f"PM {r['phase_margin_deg']:.3g}" in pm.text
        wc = next(m for m in mag.marks if m.cid == c.cid and m.kind == "crossover")
        assert abs(wc.y) < 1e-6                                           # |L(j wc)| = 1 exactly there
        for kind, key in (("gain_margin", "gain_margin_db"), ("gain_margin_low", "gain_margin_low_db")):
            if not math.isfinite(r[key]):
                continue
            gm = next(m for m in mag.marks if m.cid == c.cid and m.kind == kind)
            assert gm.value == r[key] and f"{r[key]:+.3g} dB" in gm.text and gm.y2 == 0.0
            w = r[key.replace("_db", "_rad_s")]
            if w > 0 and math.isfinite(w):      # bar from the exact loop gain at the phase crossover
                L = loop_response(plant, c.controller, np.array([w]))[0]
                assert math.isclose(gm.y, 20 * math.log10(abs(L)), abs_tol=1e-9)
                assert math.isclose(gm.y, -r[key], abs_tol=1e-5)
            else:
                assert gm.y == -r[key]


def test_complex_plane_disc_and_closest_approach(run, data):
    p = _panel(data, "loop-complex-plane")
    ms_lim = run.spec.requirements["max_sensitivity_peak"]
    (disc,) = p.discs
    assert disc.center == -1 and math.isclose(disc.radius, 1 / ms_lim) and f"{ms_lim:g}" in disc.label
    for c in data.candidates:
        m = next(m for m in p.marks if m.cid == c.cid)
        assert (m.x, m.y) == (-1.0, 0.0)
        assert math.isclose(math.hypot(m.x2 + 1.0, m.y2), 1.0 / c.record["sensitivity_peak"], rel_tol=1e-6)
        assert m.freq_rad_s == c.record["sensitivity_peak_rad_s"]


def test_pole_map_region_and_roots(run, data):
    fig = next(f for f in data.figures if f.key == "closed-loop-poles")
    reqs = run.spec.requirements
    for p in fig.panels:
        (reg,) = p.regions
        assert reg.params["min_damping"] == reqs["min_damping"]
        assert reg.params["min_decay_rate"] == reqs["min_decay_rate"]
        assert math.isclose(reg.params["half_angle_deg"], math.degrees(math.acos(reqs["min_damping"])))
        # the sector edge passes through the decay line at Im = alpha * tan(half-angle)
        assert math.isclose(reg.x[0], -reqs["min_decay_rate"])
        assert math.isclose(reg.y[0], reqs["min_decay_rate"] * math.tan(math.acos(reqs["min_damping"])))
        kinds = {pt.kind for pt in p.points}
        assert {"plant_pole", "controller_pole", "controller_zero", "closed_loop_pole"} <= kinds
        for c in data.candidates:
            pts = next(pt for pt in p.points if pt.kind == "closed_loop_pole" and pt.cid == c.cid)
            np.testing.assert_array_equal(pts.x + 1j * pts.y, np.asarray(c.record["closed_loop_poles"]))
    plant = next(pt for pt in fig.panels[0].points if pt.kind == "plant_pole")
    assert sorted(plant.x) == pytest.approx([-500, -20, 20])


def test_hidden_mode_is_highlighted():
    plant = TransferFunction.from_roots([], [20.0, -20.0, -500.0], 40000.0)
    ctrl = TransferFunction.from_roots([20.0], [-100.0], 50.0)     # zero on the unstable plant pole
    rec = check_controller(plant, ctrl, {"min_damping": 0.3})
    assert not rec["internally_stable"] and "cancels unstable plant pole" in rec["hidden_modes"]
    assert cancelled_roots(plant, ctrl) == [pytest.approx(20.0)]
    cand = Candidate(7, "given", 0, 1, ctrl, rec, None, cancelled_roots(plant, ctrl))
    fd = pole_map_data([cand], plant, {"min_damping": 0.3})
    hid = [pt for p in fd.panels for pt in p.points if pt.kind == "hidden_mode"]
    assert hid and all(pt.x[0] == pytest.approx(20.0) and pt.y[0] == 0.0 for pt in hid)
    assert any("NOT internally stable" in n for n in fd.panels[0].notes)
    # the cancelled pole stays in the closed loop (unreduced characteristic polynomial)
    assert np.min(np.abs(np.asarray(rec["closed_loop_poles"]) - 20.0)) < 1e-6
    fig = render_figure(fd)
    assert any("hidden mode" in t.get_text() for ax in fig.axes for t in ax.texts)
    assert cancelled_roots(plant, TransferFunction.from_roots([-5.0], [-100.0], 50.0)) == []


def test_tradeoff_view_every_pair_front_highlighted(run, data):
    fig = next(f for f in data.figures if f.key == "trade-off")
    objs = list(run.spec.objectives)
    assert [(p.xlabel, p.ylabel) for p in fig.panels] == [
        (METRIC_AXIS[a], METRIC_AXIS[b]) for a, b in itertools.combinations(objs, 2)]
    df = ranked(run)
    nfront = int((df["feasible"] & (df["front"] == 0)).sum())
    for p in fig.panels:
        front = next(pt for pt in p.points if pt.kind == "front")
        assert front.x.size == nfront
        chosen = [pt for pt in p.points if pt.kind == "chosen"]
        assert sorted(pt.cid for pt in chosen) == sorted(c.cid for c in data.candidates)
        assert all(pt.texts == [f"#{pt.cid}"] for pt in chosen)
        inf = next(pt for pt in p.points if pt.kind == "infeasible")
        assert inf.alpha < 0.5


def test_every_objective_has_an_axis_label_with_units():
    from synth.spec import OBJECTIVE_METRICS
    assert set(OBJECTIVE_METRICS) <= set(METRIC_AXIS)
    assert all(label.endswith("]") for label in METRIC_AXIS.values())


def test_artists_carry_the_numbers(run, data):
    """The drawn matplotlib artists, not only the plot data, carry spec and evaluator numbers."""
    fd = next(f for f in data.figures if f.key == "reference-step")
    fig = render_figure(fd)
    ax = fig.axes[0]
    ov = next(b for b in fd.panels[0].bounds if b.kind == "overshoot")
    assert any(np.allclose(line.get_ydata(), ov.value) for line in ax.lines)
    assert any(t.get_text().startswith("rise-time limit 0.1 s") for t in ax.texts)
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert any("overshoot limit 30 %" in s for s in labels)
    fd4 = next(f for f in data.figures if f.key == "loop-frequency-response")
    fig4 = render_figure(fd4)
    texts = [t.get_text() for a in fig4.axes for t in a.texts]
    for c in data.candidates:
        assert f"{c.tag} PM {c.record['phase_margin_deg']:.3g}\u00b0" in texts
    # candidates differ by colour AND line style
    # (Line2D keeps the dash pattern it draws with in _unscaled_dash_pattern: offset, on/off lengths)
    styles = {(line.get_color(), str(line._unscaled_dash_pattern)) for line in fig.axes[0].lines
              if line.get_label().startswith("#")}
    assert len({s[0] for s in styles}) == len(styles) == len({s[1] for s in styles}) == len(data.candidates)


def test_given_ids_are_overlaid(run, tmp_path):
    df = ranked(run)
    ids = [int(df["id"].iloc[0]), int(df["id"].iloc[-1])]
    d = report_data(run, ids)
    assert [c.cid for c in d.candidates] == ids
    out = tmp_path / "two.html"
    res = CliRunner().invoke(app, ["report", str(run.folder), *map(str, ids), "-o", str(out)])
    assert res.exit_code == 0, res.output
    page = _Page()
    page.feed(out.read_text(encoding="utf-8"))
    assert sorted(page.tables) == sorted(ids) and len(page.imgs) == 7


# ------------------------------------------------------------------ bad input
def _no_report_files(folder: Path) -> bool:
    return not [p for p in folder.iterdir() if p.name.startswith("report") or p.name.endswith(".tmp")]


def test_unknown_run_exits_2(tmp_path):
    res = CliRunner().invoke(app, ["report", str(tmp_path / "nowhere")])
    assert res.exit_code == 2
    assert "not a synth run folder" in res.output and "Traceback" not in res.output
    assert list(tmp_path.iterdir()) == []


def test_unknown_id_exits_2_and_writes_nothing(run):
    res = CliRunner().invoke(app, ["report", str(run.folder), "999999"])
    assert res.exit_code == 2
    assert "no candidate with id 999999" in res.output
    assert _no_report_files(run.folder)


@pytest.mark.parametrize("where", ["missing-folder", "parent-is-file", "is-a-folder", "png-is-file"])
def test_unwritable_output_exits_2_and_writes_nothing(run, tmp_path, where):
    blocker = tmp_path / "file.txt"
    blocker.write_text("x")
    args = {"missing-folder": ["-o", str(tmp_path / "no" / "such" / "r.html")],
            "parent-is-file": ["-o", str(blocker / "r.html")],
            "is-a-folder": ["-o", str(tmp_path)],
            "png-is-file": ["-o", str(tmp_path / "r.html"), "--png", str(blocker)]}[where]
    res = CliRunner().invoke(app, ["report", str(run.folder), *args])
    assert res.exit_code == 2, res.output
    assert res.output.startswith("error: ") and "Traceback" not in res.output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["file.txt"]
    assert _no_report_files(run.folder)


def test_failed_staging_leaves_nothing(tmp_path):
    """A failure while writing the PNG files removes the staged HTML too (nothing half-written)."""
    blocker = tmp_path / "file.txt"
    blocker.write_text("x")
    with pytest.raises(ReportError):
        write_outputs("<html></html>", tmp_path / "r.html", [b"png"] * 7, blocker / "png")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["file.txt"]


def test_too_many_ids_is_a_user_error(run):
    ids = [str(i) for i in ranked(run)["id"].head(9)]
    res = CliRunner().invoke(app, ["report", str(run.folder), *ids])
    assert res.exit_code == 2 and "at most 7" in res.output


# ------------------------------------------------------------------ in a browser
CHROMIUM = "/usr/bin/chromium"


@pytest.mark.skipif(not os.path.exists(CHROMIUM),
                    reason="/usr/bin/chromium not installed (apt-get install chromium); browser rendering not checked")
def test_page_renders_in_a_headless_browser(built, tmp_path):
    import matplotlib.image as mpimg
    html_path, _ = built
    shot = tmp_path / "shot.png"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1200,3000",
           html_path.resolve().as_uri()]
    try:
        subprocess.run(cmd, capture_output=True, timeout=120, check=False)
    except subprocess.TimeoutExpired:
        pytest.skip("headless chromium did not finish within 120 s")
    assert shot.exists(), "chromium wrote no screenshot"
    img = mpimg.imread(str(shot))
    assert img.shape[0] >= 2900 and img.shape[1] >= 1100
    grey = img[..., :3].mean(axis=2)
    assert grey.var() > 0.01                    # not a blank page
    # the figures are there: some rows below the header carry plot ink
    assert (grey[600:] < 0.5).mean() > 0.005
