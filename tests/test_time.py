"""Step responses and time-domain metrics against scipy.signal and closed forms.

Closed-loop transfer functions are built independently with numpy polynomial algebra
(tests/_oracles.closed_loop): T = PC/(1+PC) reference -> y, PS = P/(1+PC) load at the
plant input -> y, CS = C/(1+PC) reference -> u, all over Delta = Pd Cd + Pn Cn.
scipy.signal.lsim on scipy's own realisation gives the reference responses.
Definitions (DESIGN.md): 2 % settling band, 10-90 % rise time, overshoot relative to the
final value, disturbance peak max |y| for a unit load step at the plant input.
"""

from __future__ import annotations

import sys
from pathlib import Path

import mpmath
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

sys.path.insert(0, str(Path(__file__).parent))
from _oracles import closed_loop, scipy_step  # noqa: E402

from synth.evaluate import EvalOptions, evaluate_controllers  # noqa: E402
from synth.evaluate import time as tm  # noqa: E402
from synth.evaluate.time import exact_integral, simulate  # noqa: E402
from synth.lti import TransferFunction  # noqa: E402

RESPONSES = ("T", "PS", "CS")

LOOPS = {
    # Ogata, Modern Control Engineering 5th ed., ex. 7-26 (lead)
    "ogata_lead": ([4.0], [1.0, 2.0, 0.0], [41.7, 41.7 * 4.41], [1.0, 18.4]),
    # unstable plant with integral lead (REFERENCES.md)
    "unstable_integral_lead": ([1.0], [1.0, -1.0], [4.0, 2.0], [0.05, 1.0, 0.0]),
    # Ogata ex. 7-27 (lag): a slow dipole pole
    "ogata_lag": ([1.0], np.polymul([1.0, 1.0, 0.0], [0.5, 1.0]), [50.0, 5.0], [100.0, 1.0]),
    # PID with derivative filter on 1/(s+1)^3 (Astrom & Hagglund benchmark 1, n = 3)
    "pid_benchmark1": ([1.0], [1.0, 3.0, 3.0, 1.0], np.array([1.0 * 0.1 + 1.0, 1.0 + 0.5 * 0.1, 0.5]),
                       [0.1, 1.0, 0.0]),
    # root-locus breakaway of K/(s(s+1)(s+2)): K = 2/(3 sqrt 3) = 0.38490, double pole at
    # -1 + 1/sqrt(3) (REFERENCES.md [recomputed, exact])
    "repeated_pole": ([1.0], [1.0, 3.0, 2.0, 0.0], [2 / (3 * np.sqrt(3))], [1.0]),
    # biproper loop: direct feedthrough, y(0+) = T(inf) = 1/2
    "biproper": ([1.0, 3.0], [1.0, 1.0], [1.0], [1.0]),
    # RHP zero with Ziegler-Nichols PI (Skogestad & Postlethwaite 2005, sec. 2.4)
    "rhp_zero_zn_pi": (3 * np.array([-2.0, 1.0]), np.polymul([5.0, 1.0], [10.0, 1.0]),
                       [1.14, 1.14 / 12.7], [1.0, 0.0]),
}


def synth_responses(pn, pd, cn, cd):
    """synth.evaluate.time.simulate fed with independently built polynomials."""
    cl = closed_loop(pn, pd, cn, cd)
    delta = cl["T"][1]
    roots = np.roots(delta)
    assert np.max(roots.real) < 0
    w0 = float(np.exp(np.mean(np.log(np.abs(roots)))))
    decay = float(-np.max(roots.real))
    nums = [np.atleast_2d(cl[k][0]) for k in RESPONSES]
    return simulate(delta[None], nums, np.array([w0]), np.array([decay])), cl


def row(pn, pd, cn, cd, requirements=None):
    df = evaluate_controllers(TransferFunction(pn, pd), np.atleast_2d(np.asarray(cn, float)),
                              np.atleast_2d(np.asarray(cd, float)), requirements or {})
    return df.iloc[0]


def fine_step(num, den, horizon, n=100001):
    t = np.linspace(0.0, horizon, n)
    _, y = signal.step((num, den), T=t)
    return t, y


# ------------------------------------------------------------------ raw responses
@pytest.mark.parametrize("name", list(LOOPS))
def test_step_responses_match_scipy_lsim(name):
    r, cl = synth_responses(*LOOPS[name])
    t = r.t[0]
    assert t[0] == 0.0 and np.all(np.diff(t) > 0)
    for i, key in enumerate(RESPONSES):
        num, den = cl[key]
        ref = scipy_step(num, den, t)
        scale = np.max(np.abs(ref))
        np.testing.assert_allclose(r.y[0, :, i], ref, rtol=0, atol=1e-6 * scale, err_msg=key)
        # final values: num(0)/den(0) (final-value theorem)
        assert r.final[0, i] == pytest.approx(num[-1] / den[-1], rel=1e-9, abs=1e-12)
        # exact derivatives: the step response of s*num/den, where that is proper
        if len(np.trim_zeros(num, "f")) < len(den):
            dref = scipy_step(np.polymul(num, [1.0, 0.0]), den, t)
            np.testing.assert_allclose(r.dy[0, 1:, i], dref[1:], rtol=0,
                                       atol=1e-6 * np.max(np.abs(dref)), err_msg=key)


def test_horizon_covers_the_slow_dipole():
    # the response must have settled at the horizon: |y(t_end) - final| < 1e-5 (scipy)
    r, cl = synth_responses(*LOOPS["ogata_lag"])
    ref = scipy_step(*cl["T"], r.t[0])
    assert abs(ref[-1] - 1.0) < 1e-5


def test_repeated_pole_loop_poles_and_response():
    pn, pd, cn, cd = LOOPS["repeated_pole"]
    rw = row(pn, pd, cn, cd)
    assert rw["internally_stable"]
    poles = rw["closed_loop_poles"]
    pb = -1 + 1 / np.sqrt(3)
    near = np.sort(np.abs(poles - pb))
    assert near[1] < 1e-6                         # a double root: float error ~ sqrt(eps)
    assert np.min(np.abs(poles - (-1 - 2 / np.sqrt(3)))) < 1e-9   # third root: sum of roots = -3
    # monotone (critically damped dominant pair, real third pole): no overshoot
    t, y = fine_step(*closed_loop(pn, pd, cn, cd)["T"], 60.0)
    assert np.all(np.diff(y) >= -1e-12)
    assert rw["overshoot_pct"] == 0.0


# ------------------------------------------------------------------ metrics vs closed forms
@pytest.mark.parametrize("zeta, published", [(0.5, 16.3), (0.6, 9.5), (0.7, 4.6)])
def test_second_order_overshoot(zeta, published):
    # T = wn^2/(s^2 + 2 zeta wn s + wn^2) from G = 1/(s(s + 2 zeta wn)), C = wn^2:
    # overshoot = exp(-pi zeta / sqrt(1 - zeta^2)) (Franklin, Powell & Emami-Naeini,
    # *Feedback Control of Dynamic Systems*; REFERENCES.md closed-form laws)
    wn = 2.0
    rw = row([1.0], [1.0, 2 * zeta * wn, 0.0], [wn ** 2], [1.0])
    exact = 100 * np.exp(-np.pi * zeta / np.sqrt(1 - zeta ** 2))
    assert exact == pytest.approx(published, abs=0.05)
    assert rw["overshoot_pct"] == pytest.approx(exact, rel=1e-5)
    assert rw["min_damping"] == pytest.approx(zeta, rel=1e-12)
    assert rw["decay_rate"] == pytest.approx(zeta * wn, rel=1e-12)
    assert rw["steady_state_error"] == pytest.approx(0.0, abs=1e-12)


def _ref_settling(t, y, final, band):
    out = np.flatnonzero(np.abs(y - final) > band)
    return t[out[-1]] if out.size else 0.0


def _ref_crossing(t, y, level):
    k = int(np.argmax(y >= level))
    return t[k]


@pytest.mark.parametrize("name, horizon", [
    ("zeta_0.5", 12.0), ("zeta_0.7", 12.0), ("zeta_0.05", 100.0), ("ogata_lead", 3.0), ("ogata_lag", 80.0),
    ("unstable_integral_lead", 20.0), ("rhp_zero_zn_pi", 250.0)])
def test_settling_rise_and_peaks_within_one_reference_sample(name, horizon):
    if name.startswith("zeta"):
        z, wn = float(name.split("_")[1]), 2.0
        loop = ([1.0], [1.0, 2 * z * wn, 0.0], [wn ** 2], [1.0])
    else:
        loop = LOOPS[name]
    rw = row(*loop)
    cl = closed_loop(*loop)
    n = 60001
    t, y = fine_step(*cl["T"], horizon, n)
    dt = t[1]
    yf = cl["T"][0][-1] / cl["T"][1][-1]
    assert abs(y[-1] - yf) < 1e-3 * abs(yf)            # the fine grid covers the transient
    ts = _ref_settling(t, y, yf, 0.02 * abs(yf))
    assert ts - 1e-12 <= rw["settling_time_s"] <= ts + dt + 1e-12
    tr = _ref_crossing(t, y, 0.9 * yf) - _ref_crossing(t, y, 0.1 * yf)
    assert rw["rise_time_s"] == pytest.approx(tr, abs=dt)
    # peaks: the grid maximum is low by at most one sample's change; synth's refined
    # maximum agrees with the exact one to 1e-6 of the response scale
    def check_peak(value, yy):
        m = np.abs(yy).max()
        assert m - 1e-6 * m <= value <= m + np.abs(np.diff(yy)).max() + 1e-6 * m

    check_peak(yf * (1 + rw["overshoot_pct"] / 100), y)
    # load step at the plant input: peak |y|, and settling with a band of 2 % of that peak
    # (synth's definition of disturbance_settling_time_s, time.py)
    _, yd = fine_step(*cl["PS"], horizon, n)
    check_peak(rw["disturbance_peak"], yd)
    ydf = cl["PS"][0][-1] / cl["PS"][1][-1]
    tds = _ref_settling(t, yd, ydf, 0.02 * rw["disturbance_peak"])
    assert tds - 1e-12 <= rw["disturbance_settling_time_s"] <= tds + dt + 1e-12
    assert rw["disturbance_steady_state"] == pytest.approx(ydf, rel=1e-9, abs=1e-12)
    # reference -> control
    _, yu = fine_step(*cl["CS"], horizon, n)
    check_peak(rw["control_peak"], yu)


def test_control_peak_of_lead_is_initial_value():
    # u(0+) = lim s->inf C/(1+L) = 41.7 for a strictly proper plant (initial-value theorem)
    rw = row(*LOOPS["ogata_lead"])
    assert rw["control_peak"] == pytest.approx(41.7, rel=1e-12)


def test_type_zero_steady_state_error():
    # G = 1/((s+1)(s+2)), C = 5: Kp = 2.5, e_ss = 1/(1 + Kp) (final-value theorem)
    rw = row([1.0], [1.0, 3.0, 2.0], [5.0], [1.0])
    assert rw["position_constant"] == pytest.approx(2.5, rel=1e-14)
    assert rw["steady_state_error"] == pytest.approx(1 / 3.5, rel=1e-9)
    assert rw["overshoot_pct"] >= 0 and np.isfinite(rw["settling_time_s"])


# ------------------------------------------------------------------ load disturbances
@pytest.mark.parametrize("pn, pd, kp, ki", [
    ([1.0], [1.0, 2.0, 1.0], 1.0, 0.5),
    ([2.0], [3.0, 1.0], 0.8, 0.4),
    (3 * np.array([-2.0, 1.0]), np.polymul([5.0, 1.0], [10.0, 1.0]), 1.14, 1.14 / 12.7),
])
def test_integrated_error_of_pi_loop_is_one_over_ki(pn, pd, kp, ki):
    # IE = int y dt = 1/ki for a unit load step at the plant input under PI control
    # (Astrom & Hagglund, *Advanced PID Control*, ISA 2006; value from memory -- it is the
    # final-value theorem applied to P/(s(1+PC)))
    r, _ = synth_responses(pn, pd, [kp, ki], [1.0, 0.0])
    ie = exact_integral(r, 1)[0]
    assert ie == pytest.approx(1.0 / ki, rel=1e-5)


def test_iae_equals_ie_for_a_non_oscillating_load_response():
    pn, pd, cn, cd = [1.0], [1.0, 1.0], [0.5, 0.1], [1.0, 0.0]
    cl = closed_loop(pn, pd, cn, cd)
    t, yd = fine_step(*cl["PS"], 200.0, 20001)
    assert yd.min() >= -1e-12                          # the load response never changes sign (scipy)
    rw = row(pn, pd, cn, cd)
    assert rw["disturbance_iae"] == pytest.approx(1 / 0.1, rel=1e-5)


def test_disturbance_iae_infinite_with_nonzero_final_value():
    # type-1 plant, controller without integral action: y(inf) = 1/C(0) after a load step
    rw = row(*LOOPS["ogata_lead"])
    c0 = 41.7 * 4.41 / 18.4
    assert rw["disturbance_steady_state"] == pytest.approx(1 / c0, rel=1e-9)
    assert rw["disturbance_iae"] == np.inf


def test_dead_time_loop_time_figures_come_from_the_delay_equation():
    # SIMC PI on e^-s/(s+1) under a unit load step at the plant input: IAE 2.03500, peak |y|
    # 0.72428 (shared/REFERENCES.md, recomputed by the method of steps with solve_ivp, rtol
    # 1e-11). The figures are those of the delay loop itself, whatever Padé order is set
    # (the approximant only starts the loop-root search).
    pn, pd, cn, cd = [1.0], [1.0, 1.0], [0.5, 0.5], [1.0, 0.0]
    rows = [evaluate_controllers(TransferFunction(pn, pd, 1.0), [cn], [cd], {}, EvalOptions(pade_order=k)).iloc[0]
            for k in (2, 6)]
    for rw in rows:
        assert rw["disturbance_iae"] == pytest.approx(2.03500, rel=2e-5)
        assert rw["disturbance_peak"] == pytest.approx(0.72428, rel=2e-5)
    assert rows[0]["settling_time_s"] == pytest.approx(rows[1]["settling_time_s"], rel=1e-9)


# ------------------------------------------------------------------ unstable candidates
def test_unstable_candidate_has_nan_time_metrics_and_fails_everything():
    # K/(s(s+1)(s+5)) with K = 100: poles 0.612 +- j3.670 (REFERENCES.md [recomputed])
    req = {"max_settling_time_s": 100.0, "max_overshoot_pct": 100.0, "min_phase_margin_deg": -90.0,
           "min_gain_margin_db": -60.0, "max_sensitivity_peak": 1e6, "max_disturbance_peak": 1e6,
           "max_control_peak": 1e6, "min_damping": -1.0, "max_disturbance_iae": 1e9}
    rw = row([100.0], np.polymul([1.0, 1.0, 0.0], [1.0, 5.0]), [1.0], [1.0], req)
    assert not rw["internally_stable"] and not rw["feasible"]
    for col in ("settling_time_s", "overshoot_pct", "rise_time_s", "steady_state_error", "disturbance_peak",
                "disturbance_settling_time_s", "disturbance_iae", "control_peak", "phase_margin_deg",
                "gain_margin_db", "sensitivity_peak"):
        assert np.isnan(rw[col]), col
    for key in req:      # even the loosest limits fail on an unstable loop
        assert rw[f"slack_{key}"] == -np.inf and not rw[f"met_{key}"], key


def test_leading_zero_padding_does_not_change_time_metrics():
    # C = 1/(s+1) written as (0 s^2 + 0 s + 1)/(0 s^2 + s + 1): the same controller
    # (regression: the simulation once divided by the zero leading coefficient)
    G = TransferFunction([1.0], [1.0, 1.0])
    a = evaluate_controllers(G, [[1.0]], [[1.0, 1.0]]).iloc[0]
    b = evaluate_controllers(G, [[0.0, 0.0, 1.0]], [[0.0, 1.0, 1.0]]).iloc[0]
    for col in ("settling_time_s", "rise_time_s", "overshoot_pct", "disturbance_peak", "control_peak"):
        assert b[col] == pytest.approx(a[col], rel=1e-9), col


def test_step_responses_helper_matches_scipy():
    # synth.evaluate.step_responses (the evaluator's own samples, for plots) vs scipy lsim
    from synth.evaluate import step_responses
    pn, pd, cn, cd = LOOPS["unstable_integral_lead"]
    r = step_responses(TransferFunction(pn, pd), [cn], [cd])
    cl = closed_loop(pn, pd, cn, cd)
    for i, key in enumerate(RESPONSES):
        ref = scipy_step(*cl[key], r.t[0])
        np.testing.assert_allclose(r.y[0, :, i], ref, rtol=0, atol=1e-6 * np.abs(ref).max(), err_msg=key)
    with pytest.raises(ValueError):
        step_responses(TransferFunction([100.0], np.polymul([1.0, 1.0, 0.0], [1.0, 5.0])), [[1.0]], [[1.0]])


@settings(max_examples=200, deadline=None)
@given(st.lists(st.floats(-10, 10), min_size=4, max_size=4))
def test_cubic_top_is_the_largest_value_of_the_cubic(v):
    # the largest value on [0, 1] of the Hermite cubic against np.roots of its derivative
    # (numpy, outside synth) and a dense grid: the maximum of a cubic on an interval is at an
    # end or at a real stationary point inside
    y0, y1, d0, d1 = v
    c = np.array([2 * y0 + d0 - 2 * y1 + d1, -3 * y0 - 2 * d0 + 3 * y1 - d1, d0, y0])
    stat = [r.real for r in np.roots(np.polyder(c)) if abs(r.imag) < 1e-12 and 0 <= r.real <= 1] if c[0] or c[1] else []
    ref = max(np.polyval(c, np.array([0.0, 1.0, *stat])))
    dense = np.polyval(c, np.linspace(0, 1, 20001)).max()
    got = tm.cubic_top(np.array(y0), np.array(y1), np.array(d0), np.array(d1))
    scale = max(1.0, np.abs(v).max())
    assert got >= dense - 1e-12 * scale
    assert abs(got - ref) <= 1e-9 * scale


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(0.01, 100), st.floats(0.02, 1.0)), min_size=1, max_size=4))
def test_growing_step_keeps_every_alive_mode_resolved_and_grows_as_far_as_allowed(modes):
    # plan(): each segment's step resolves every mode still alive at the segment's start
    # (step * |p| <= RESOLUTION while sigma * t < ALIVE_DECAYS), and doubling it once more
    # would break that rule unless the growth is already at its cap
    poles = np.array([[-z * w + 1j * w * np.sqrt(1 - z * z) for w, z in modes]])
    sig, mag = -poles.real[0], np.abs(poles[0])
    decay = sig.min()
    t_end = np.array([tm.HORIZON_DECAYS / decay])
    h0, growth, nseg = tm.plan(poles, t_end)
    h, t = h0[0], tm.FIRST_SEGMENT * h0[0]
    assert h * mag.max() <= tm.RESOLUTION * (1 + 1e-12) or h == t_end[0] / tm.FIRST_SEGMENT
    for d in growth[0, :nseg[0]]:
        alive = sig * t < tm.ALIVE_DECAYS
        hreq = (tm.RESOLUTION / mag[alive]).min() if alive.any() else np.inf
        h *= 2.0 ** d
        assert h <= hreq * (1 + 1e-12) or d == 0
        assert d == tm.MAX_GROWTH or 2 * h > hreq
        t += tm.SEGMENT_SAMPLES * h
    assert t >= t_end[0] or nseg[0] == growth.shape[1]
