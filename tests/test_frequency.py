"""Frequency-domain metrics against an independent dense evaluation with local refinement.

The reference (tests/_oracles.py) evaluates L(jw) with numpy.polyval on a dense
logarithmic grid (20 000 points or more), refines every peak with
scipy.optimize.minimize_scalar and every crossing with scipy.optimize.brentq.
Definitions follow DESIGN.md: phase margin the smallest over all gain crossovers,
delay margin the smallest (phase margin / crossover), gain margins the nearest
critical gains k = -1/L(jw) above and below 1, bandwidth the first frequency where
|T| falls to |T(0)|/sqrt(2).
"""

from __future__ import annotations

import sys
from functools import lru_cache
from pathlib import Path

import mpmath
import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from scipy import integrate

sys.path.insert(0, str(Path(__file__).parent))
from _oracles import char_poly, mp_roots, reference_metrics  # noqa: E402

from synth.evaluate import evaluate_controllers  # noqa: E402
from synth.lti import TransferFunction  # noqa: E402

HYP = settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
REL = 1e-6


def synth_row(pn, pd, cn, cd, delay=0.0):
    df = evaluate_controllers(TransferFunction(pn, pd, delay), np.atleast_2d(np.asarray(cn, float)),
                              np.atleast_2d(np.asarray(cd, float)))
    return df.iloc[0]


def synth_rows(pn, pd, cns, cds, delay=0.0):
    """One batched call (dead-time evaluation is the slow path, so batch it)."""
    return evaluate_controllers(TransferFunction(pn, pd, delay), np.asarray(cns, float), np.asarray(cds, float))


def db(k):
    return 20 * np.log10(k) if k > 0 else -np.inf


def close(a, b, rel=REL, abs_=0.0):
    if np.isinf(a) or np.isinf(b):
        return a == b
    return abs(a - b) <= rel * abs(b) + abs_


def check_against_reference(row, ref, rel=REL, check_peak_freqs=True):
    """Every frequency metric of a synth row against the reference dictionary."""
    pairs = [("sensitivity_peak", "Ms"), ("complementary_peak", "Mt"),
             ("disturbance_gain_peak", "PS_peak"), ("control_gain_peak", "CS_peak"),
             ("phase_margin_rad_s", "w_pm"), ("delay_margin_s", "dm"),
             ("crossover_rad_s", "w_max_crossover"), ("bandwidth_rad_s", "bandwidth")]
    for col, key in pairs:
        if key in ("w_pm", "w_max_crossover") and np.isnan(ref[key]):
            assert np.isnan(row[col]), col
            continue
        assert close(row[col], ref[key], rel), (col, row[col], ref[key])
    assert close(row["phase_margin_deg"], ref["pm"], rel, abs_=1e-7), (row["phase_margin_deg"], ref["pm"])
    assert close(row["gain_margin_db"], db(ref["gm"]), rel, abs_=1e-8), (row["gain_margin_db"], db(ref["gm"]))
    assert close(row["gain_margin_low_db"], db(ref["gm_low"]), rel, abs_=1e-8), \
        (row["gain_margin_low_db"], db(ref["gm_low"]))
    # the phase-crossover frequencies of both gain margins (NaN when there is no margin)
    for col, key in (("gain_margin_rad_s", "w_gm"), ("gain_margin_low_rad_s", "w_gm_low")):
        if np.isnan(ref[key]):
            assert np.isnan(row[col]), (col, row[col])
        else:
            assert close(row[col], ref[key], rel, abs_=1e-12), (col, row[col], ref[key])
    if check_peak_freqs:
        # a smooth maximum fixes its location only to ~sqrt(machine eps): check instead that
        # the reference |S|, |T| at synth's frequency is the peak value (1e-9), and the
        # location to 1e-4; a peak at w = 0 or w = inf is checked by the end it sits at
        for col, key, fn in (("sensitivity_peak_rad_s", "w_Ms", "S"), ("complementary_peak_rad_s", "w_Mt", "T")):
            w, wr = row[col], ref[key]
            if wr <= ref["lo"]:
                assert w <= ref["lo"], (col, w, wr)
            elif wr >= ref["hi"]:
                assert w >= ref["hi"], (col, w, wr)
            else:
                assert ref[fn](np.array([w]))[0] == pytest.approx(row[col.replace("_rad_s", "")], rel=1e-9)
                ends = ref[fn](np.array([ref["lo"], ref["hi"]]))
                if row[col.replace("_rad_s", "")] > 1.001 * ends.max():     # a genuine interior peak
                    assert w == pytest.approx(wr, rel=1e-4)


# ------------------------------------------------------------------ random loops
@st.composite
def stable_loops(draw):
    """Random rational loops: 1-3 real plant poles (one possibly unstable) and possibly a
    complex pair, an optional LHP or RHP zero, a lead/lag controller with 0-2 stages and an
    optional integrator; kept only when closed-loop stable with a clear margin (numpy roots)."""
    lf = st.floats(-1.0, 1.0)
    poles = [-10 ** draw(lf) for _ in range(draw(st.integers(1, 3)))]
    if draw(st.booleans()) and draw(st.booleans()):
        poles[0] = 10 ** draw(st.floats(-1, 0))
    if draw(st.booleans()):
        wn, z = 10 ** draw(lf), draw(st.floats(0.05, 0.9))
        poles += [wn * complex(-z, np.sqrt(1 - z * z)), wn * complex(-z, -np.sqrt(1 - z * z))]
    pd = np.real(np.poly(poles))
    zeros = [draw(st.sampled_from([-1.0, 1.0])) * 10 ** draw(st.floats(0, 1))] if draw(st.booleans()) else []
    assume(all(abs(z - p) > 1e-3 for z in zeros for p in poles))       # no exact pole-zero cancellation
    pn = 10 ** draw(st.floats(-0.5, 1.0)) * np.atleast_1d(np.real(np.poly(zeros)))
    cn, cd = np.array([10 ** draw(st.floats(-1.0, 1.5))]), np.array([1.0])
    for _ in range(draw(st.integers(0, 2))):
        cn = np.polymul(cn, [1.0, 10 ** draw(lf)])
        cd = np.polymul(cd, [1.0, 10 ** draw(st.floats(-1.0, 1.5))])
    if draw(st.booleans()):
        cd = np.polymul(cd, [1.0, 0.0])
    r = np.roots(char_poly(pn, pd, cn, cd))
    assume(np.max(r.real) < -1e-3)
    # exclude degenerate loops: |L| = 1 at w = 0 or w = inf (a crossover at an end)
    nl, dl = np.polymul(pn, cn), np.polymul(pd, cd)
    if dl[-1] != 0:
        assume(abs(abs(nl[-1] / dl[-1]) - 1) > 1e-3)
    if nl.size == dl.size:
        assume(abs(abs(nl[0] / dl[0]) - 1) > 1e-3)
    return pn, pd, cn, cd


@HYP
@given(stable_loops())
def test_rational_metrics_match_dense_refined_reference(loop):
    pn, pd, cn, cd = loop
    row = synth_row(pn, pd, cn, cd)
    assert row["internally_stable"]
    check_against_reference(row, reference_metrics(pn, pd, cn, cd))


@HYP
@given(stable_loops())
def test_gain_margins_are_where_closed_loop_roots_cross(loop):
    # independent of any frequency response: the loop with gain k stays stable for k
    # strictly inside (k_low, k_high) and loses stability just outside (numpy roots)
    pn, pd, cn, cd = loop
    row = synth_row(pn, pd, cn, cd)
    def max_re(k):
        return np.max(np.roots(char_poly(pn, pd, k * cn, cd)).real)
    for col, inside, outside in (("gain_margin_db", 1 - 1e-6, 1 + 1e-5), ("gain_margin_low_db", 1 + 1e-6, 1 - 1e-5)):
        if np.isfinite(row[col]):
            k = 10 ** (row[col] / 20)
            for f in np.linspace(1, k, 7)[1:-1] if col == "gain_margin_db" else np.linspace(k, 1, 7)[1:-1]:
                assert max_re(f) < 0
            assert max_re(k * inside) < 0 < max_re(k * outside)


@HYP
@given(stable_loops())
def test_sensitivity_peak_bounds_the_margins(loop):
    # |1 + L| >= 1/Ms everywhere, so GM >= Ms/(Ms-1), the lower gain margin
    # k_low <= Ms/(Ms+1) and PM >= 2 arcsin(1/(2 Ms)) (closed form, REFERENCES.md "Ms bounds
    # the margins"; the lower-gain bound follows from the same circle |1 + L| >= 1/Ms).
    pn, pd, cn, cd = loop
    row = synth_row(pn, pd, cn, cd)
    ms = row["sensitivity_peak"]
    if ms > 1:
        assert 10 ** (row["gain_margin_db"] / 20) >= ms / (ms - 1) * (1 - 1e-9)
    if np.isfinite(row["gain_margin_low_db"]):
        assert 10 ** (row["gain_margin_low_db"] / 20) <= ms / (ms + 1) * (1 + 1e-9)
    if np.isfinite(row["phase_margin_deg"]):
        # at a crossover |1 + L| = 2 sin(|PM|/2): the bound holds for |PM|
        assert abs(row["phase_margin_deg"]) >= np.degrees(2 * np.arcsin(1 / (2 * ms))) - 1e-7


def test_ms_bound_table_from_references():
    # REFERENCES.md [recomputed]: Ms 1.2 -> GM 6.0, PM 49.2; 1.4 -> 3.5, 41.8; 1.6 -> 2.67, 36.4; 2.0 -> 2.0, 29.0
    for ms, gm, pm in ((1.2, 6.0, 49.2), (1.4, 3.5, 41.8), (1.6, 2.67, 36.4), (2.0, 2.0, 29.0)):
        assert ms / (ms - 1) == pytest.approx(gm, abs=0.005)
        assert np.degrees(2 * np.arcsin(1 / (2 * ms))) == pytest.approx(pm, abs=0.05)


# ------------------------------------------------------------------ grid failure
def test_lightly_damped_loop_grid_misreads_ms():
    # G = w0^2/((s+1)(s^2 + 2 zeta w0 s + w0^2)) (Astrom & Hagglund benchmark 9 shape, here
    # with zeta = 0.005, w0 = 5) and C = 0.3/s: the resonant |S| peak is narrower than the
    # spacing of a 400-point log grid on [1e-2, 1e2] rad/s.
    pn, pd = [25.0], np.polymul([1.0, 1.0], [1.0, 0.05, 25.0])
    cn, cd = [0.3], [1.0, 0.0]
    ref = reference_metrics(pn, pd, cn, cd)
    grid = ref["S"](np.geomspace(1e-2, 1e2, 400)).max()
    assert grid < 0.9 * ref["Ms"]                      # the coarse grid is off by > 10 %
    row = synth_row(pn, pd, cn, cd)
    assert row["sensitivity_peak"] == pytest.approx(ref["Ms"], rel=REL)
    assert row["sensitivity_peak_rad_s"] == pytest.approx(ref["w_Ms"], rel=1e-5)
    check_against_reference(row, ref)


# ------------------------------------------------------------------ closed-form results
def test_bode_sensitivity_integral():
    # int_0^inf ln|S(jw)| dw = pi * sum of unstable open-loop poles for relative degree >= 2
    # (Bode 1945; Freudenberg & Looze, IEEE TAC 1985; value from memory). G = 1/(s-1),
    # C = 4(s+0.5)/(s(0.05s+1)): one unstable pole at 1, so the integral is pi.
    pn, pd = [1.0], [1.0, -1.0]
    cn, cd = [4.0, 2.0], [0.05, 1.0, 0.0]
    row = synth_row(pn, pd, cn, cd)
    assert row["internally_stable"]
    nl, dl = np.polymul(pn, cn), np.polymul(pd, cd)

    def ln_s(w):
        jw = 1j * w
        return np.log(np.abs(np.polyval(dl, jw) / (np.polyval(dl, jw) + np.polyval(nl, jw))))

    pieces = [(0, 1), (1, 10), (10, 100), (100, 1e3), (1e3, np.inf)]
    total = sum(integrate.quad(ln_s, a, b, limit=400, epsabs=1e-13, epsrel=1e-10)[0] for a, b in pieces)
    assert total == pytest.approx(np.pi, rel=1e-9)
    # the same |S| gives synth's sensitivity peak
    w = np.geomspace(1e-2, 1e3, 200001)
    assert row["sensitivity_peak"] == pytest.approx(np.exp(ln_s(w)).max(), rel=1e-6)


def test_critical_gain_of_third_order_type_one_loop():
    # K/(s(s+1)(s+2)): Delta = s^3 + 3s^2 + 2s + K; Routh gives K = 6 with poles +-j sqrt(2)
    # (closed form, REFERENCES.md [recomputed, exact]); so with K = 1 the gain margin is 6.
    pd = [1.0, 3.0, 2.0, 0.0]
    row = synth_row([1.0], pd, [1.0], [1.0])
    assert row["gain_margin_db"] == pytest.approx(20 * np.log10(6.0), rel=1e-12)
    assert row["gain_margin_low_db"] == -np.inf
    assert row["gain_margin_rad_s"] == pytest.approx(np.sqrt(2), rel=1e-12)
    assert np.isnan(row["gain_margin_low_rad_s"])
    # the phase crossover: at K = 6 two closed-loop poles sit at +-j sqrt(2)
    poles = synth_row([1.0], pd, [6.0], [1.0])["closed_loop_poles"]
    assert np.min(np.abs(poles - 1j * np.sqrt(2))) < 1e-9
    assert np.min(np.abs(poles + 1j * np.sqrt(2))) < 1e-9
    assert synth_row([1.0], pd, [6.0 * (1 - 1e-6)], [1.0])["internally_stable"]
    assert not synth_row([1.0], pd, [6.0 * (1 + 1e-6)], [1.0])["internally_stable"]
    ref = reference_metrics([1.0], pd, [1.0], [1.0])
    assert ref["w_gm"] == pytest.approx(np.sqrt(2), rel=1e-12)


@pytest.mark.parametrize("k", [2.0, 20.0, 100.0])
def test_conditionally_stable_benchmark(k):
    # Astrom & Hagglund benchmark 8, (s+6)^2/(s(s+1)^2(s+36)), with gain k: conditionally
    # stable (stable for small and for large gains, unstable between). Verdict: mpmath roots;
    # metrics: the dense reference; the lower gain margin: numpy roots either side of it.
    pn, pd = np.poly([-6.0, -6.0]), np.polymul([1.0, 0.0], np.polymul(np.poly([-1.0, -1.0]), [1.0, 36.0]))
    truth = bool(np.all(mp_roots(char_poly(pn, pd, [k], [1.0])).real < 0))
    assert truth == (k != 20.0)
    row = synth_row(pn, pd, [k], [1.0])
    assert bool(row["internally_stable"]) == truth
    if truth:
        check_against_reference(row, reference_metrics(pn, pd, [k], [1.0]))
    if k == 100.0:
        kl = 10 ** (row["gain_margin_low_db"] / 20)
        assert row["gain_margin_db"] == np.inf and 0 < kl < 1
        def max_re(g):
            return np.max(np.roots(char_poly(pn, pd, [g * k], [1.0])).real)
        assert max_re(kl * (1 + 1e-6)) < 0 < max_re(kl * (1 - 1e-5))


def test_negative_dc_loop_gain_margin_at_zero_frequency():
    # L = -0.5/(s+1): Delta_k = s + 1 - 0.5 k, the pole crosses at s = 0 when k = 2 (closed form)
    row = synth_row([1.0], [1.0, 1.0], [-0.5], [1.0])
    assert row["gain_margin_db"] == pytest.approx(20 * np.log10(2.0), rel=1e-12)
    assert row["gain_margin_rad_s"] == 0.0
    assert row["gain_margin_low_db"] == -np.inf


def test_delay_margin_rotates_the_crossover_onto_minus_one():
    # L(jw) exp(-j w DM) = -1 at the crossover that sets the delay margin (definition)
    for pn, pd, cn, cd in (([4.0], [1.0, 2.0, 0.0], [41.7, 41.7 * 4.41], [1.0, 18.4]),
                           ([1.0], [1.0, -1.0], [4.0, 2.0], [0.05, 1.0, 0.0]),
                           ([1.0], [1.0, 1.0, 0.0], [5.0, 10.0], [0.1, 1.0])):
        row = synth_row(pn, pd, cn, cd)
        ref = reference_metrics(pn, pd, cn, cd)
        wc = ref["gain_crossovers"]
        lw = ref["L"](wc) * np.exp(-1j * wc * row["delay_margin_s"])
        assert np.min(np.abs(lw + 1)) < 1e-7


# ------------------------------------------------------------------ dead time
DELAY_LOOPS = {
    # SIMC (Skogestad, J. Process Control 13, 2003) on a pure delay: C = 1/(2 theta s)
    "simc_pure_delay": ([1.0], [1.0], 1.0, [0.5], [1.0, 0.0]),
    # SIMC on the integrating process e^-s/s: Kc = 0.5, tauI = 8
    "simc_integrating": ([1.0], [1.0, 0.0], 1.0, [0.5, 0.0625], [1.0, 0.0]),
    # PI on e^-s/(1+s) (Astrom & Hagglund benchmark 4, T = 1): SIMC and AMIGO settings
    "simc_fopdt_T1": ([1.0], [1.0, 1.0], 1.0, [0.5, 0.5], [1.0, 0.0]),
    "amigo_fopdt_T1": ([1.0], [1.0, 1.0], 1.0, [0.25, 0.25], [1.0, 0.0]),
    "simc_fopdt_T10": ([1.0], [10.0, 1.0], 1.0, [5.0, 5.0 / 8.0], [1.0, 0.0]),
    # lead compensator on a second-order plant with dead time
    "lead_sopdt": ([2.0], [1.0, 3.0, 2.0], 0.2, [3.0, 3.0], [0.2, 1.0]),
    # PI on a pure delay: a biproper delayed loop
    "pi_pure_delay": ([1.0], [1.0], 1.0, [0.2, 0.3], [1.0, 0.0]),
}


NYQUIST_GAINS = (0.3, 0.8, 1.2, 1.45, 1.7, 2.2, 3.0)
NYQUIST_TI = (1.0, 0.5, 3.0)
EXTRA_ROWS = {   # further controllers evaluated in the same batch as a named plant
    "fopdt_T1": [([kc, kc / ti], [1.0, 0.0]) for ti in NYQUIST_TI for kc in NYQUIST_GAINS]
                + [([0.5, 1e-5], [1.0, 0.0])],
    "pure_delay": [([1.5], [1.0, 0.0]), ([1.65], [1.0, 0.0])],
}
PLANT_OF = {"simc_pure_delay": "pure_delay", "pi_pure_delay": "pure_delay",
            "simc_fopdt_T1": "fopdt_T1", "amigo_fopdt_T1": "fopdt_T1"}


@lru_cache(maxsize=None)
def plant_batch(key):
    """Every controller on one dead-time plant in one batched evaluation (the dead-time
    path costs ~1 s a call, nearly independent of the batch size)."""
    names = [n for n in DELAY_LOOPS if PLANT_OF.get(n, n) == key]
    pn, pd, theta = DELAY_LOOPS[names[0]][:3]
    ctrls = [DELAY_LOOPS[n][3:] for n in names] + EXTRA_ROWS.get(key, [])
    width = max(max(len(c[0]), len(c[1])) for c in ctrls)
    pad = lambda p: np.pad(np.asarray(p, float), (width - len(p), 0))  # noqa: E731
    df = synth_rows(pn, pd, [pad(c[0]) for c in ctrls], [pad(c[1]) for c in ctrls], theta)
    return names, df


def delay_row(name):
    names, df = plant_batch(PLANT_OF.get(name, name))
    return df.iloc[names.index(name)]


def extra_rows(key):
    names, df = plant_batch(key)
    return df.iloc[len(names):].reset_index(drop=True)


@pytest.mark.parametrize("name", list(DELAY_LOOPS))
def test_delay_metrics_match_dense_refined_reference(name):
    pn, pd, theta, cn, cd = DELAY_LOOPS[name]
    row = delay_row(name)
    assert row["internally_stable"]
    assert row["pade_order"] == 6
    ref = reference_metrics(pn, pd, cn, cd, delay=theta, n=200000)
    check_against_reference(row, ref, check_peak_freqs=False)


@pytest.mark.parametrize("name, gm, pm, ms", [
    # REFERENCES.md (SIMC, Skogestad 2003) published GM 3.14, PM 61.4, Ms 1.59 and
    # GM 2.96, PM 46.9, Ms 1.70 [memory; recomputed agrees]
    ("simc_pure_delay", 3.14, 61.4, 1.59),
    ("simc_integrating", 2.96, 46.9, 1.70),
    # REFERENCES.md recomputed PI table on e^-s/(1+sT)
    ("simc_fopdt_T1", 3.14, 61.4, 1.59),
    ("amigo_fopdt_T1", 6.28, 75.7, 1.25),
    ("simc_fopdt_T10", 3.11, 58.3, 1.61),
])
def test_simc_and_amigo_published_margins(name, gm, pm, ms):
    row = delay_row(name)
    assert 10 ** (row["gain_margin_db"] / 20) == pytest.approx(gm, abs=0.005)
    assert row["phase_margin_deg"] == pytest.approx(pm, abs=0.05)
    assert row["sensitivity_peak"] == pytest.approx(ms, abs=0.005)


@lru_cache(maxsize=None)
def _pade12(theta):
    """[12/12] Padé approximant of exp(-theta s) from its Taylor series (mpmath.pade, 60 digits)."""
    with mpmath.workdps(60):
        tay = [(-mpmath.mpf(theta)) ** k / mpmath.factorial(k) for k in range(25)]
        p, q = mpmath.pade(tay, 12, 12)
        return np.array([float(x / q[0]) for x in p[::-1]]), np.array([float(x / q[0]) for x in q[::-1]])


def _pade12_verdict(pn, pd, theta, cn, cd):
    """Stability of the loop with exp(-theta s) replaced by its [12/12] Padé approximant
    (roots by numpy)."""
    pn12, pd12 = _pade12(theta)
    r = np.roots(char_poly(np.polymul(pn, pn12), np.polymul(pd, pd12), cn, cd))
    return bool(np.max(r.real) < 0), float(np.max(r.real))


@pytest.mark.parametrize("ti", NYQUIST_TI)
def test_nyquist_verdict_matches_high_order_pade(ti):
    # PI kc (1 + 1/(ti s)) on e^-s/(s+1) across gains spanning stable and unstable
    # (for ti = 1 the loop is kc e^-s/s, critical gain pi/2, closed form)
    verdicts = []
    for kc in NYQUIST_GAINS:
        truth, margin = _pade12_verdict([1.0], [1.0, 1.0], 1.0, [kc, kc / ti], [1.0, 0.0])
        assert abs(margin) > 1e-3                     # far enough from the boundary to be clear
        verdicts.append(truth)
    assert True in verdicts and False in verdicts
    j = NYQUIST_TI.index(ti) * len(NYQUIST_GAINS)
    df = extra_rows("fopdt_T1").iloc[j:j + len(NYQUIST_GAINS)]
    np.testing.assert_array_equal(df["internally_stable"].to_numpy(bool), verdicts)


def test_integral_only_loop_on_pure_delay_critical_gain():
    # ki e^-s / s: phase crossover at pi/2, critical gain ki = pi/2 (closed form)
    df = extra_rows("pure_delay")
    assert df["internally_stable"].tolist() == [True, False]
    assert 10 ** (df["gain_margin_db"][0] / 20) == pytest.approx(np.pi / 3, rel=1e-9)
    assert 10 ** (delay_row("simc_pure_delay")["gain_margin_db"] / 20) == pytest.approx(np.pi, rel=1e-9)


# ------------------------------------------------------------------ dead-time regressions and bugs
def test_short_dead_time_loop_is_stable():
    # e^{-0.05 s}/(s+1) with PI (s+1)/s: L = e^{-0.05 s}/s, PM = 90 - 2.9 deg; stable
    # (crossover 1 rad/s, critical gain pi/(2*0.05) = 31.4 >> 1; closed form)
    # (regression: the well-posedness test once compared the Padé-6 leading coefficient with
    # the largest coefficient and rejected this loop)
    truth, _ = _pade12_verdict([1.0], [1.0, 1.0], 0.05, [1.0, 1.0], [1.0, 0.0])
    assert truth
    row = synth_row([1.0], [1.0, 1.0], [1.0, 1.0], [1.0, 0.0], 0.05)
    assert bool(row["internally_stable"]) is True
    assert row["phase_margin_rad_s"] == pytest.approx(1.0, rel=1e-9)
    assert row["phase_margin_deg"] == pytest.approx(90 - np.degrees(0.05), rel=1e-9)
    assert 10 ** (row["gain_margin_db"] / 20) == pytest.approx(np.pi / (2 * 0.05), rel=1e-6)


def test_delay_peaks_include_the_low_frequency_limit():
    # G = 0.4 e^{-0.3 s}/(s^2+17s+70), C = 0.9 + 0.012/s: type-1 loop, so |T(0)| = 1 and
    # |CS(0)| = 1/|G(0)| = 175 (final-value limits); the sup can only be larger.
    pn, pd, theta, cn, cd = [0.4], [1.0, 17.0, 70.0], 0.3, [0.9, 0.012], [1.0, 0.0]
    row = synth_row(pn, pd, cn, cd, theta)
    assert row["internally_stable"]
    ref = reference_metrics(pn, pd, cn, cd, delay=theta, n=200000)
    assert ref["Mt"] == pytest.approx(1.0, rel=1e-9) and ref["CS_peak"] == pytest.approx(175.0, rel=1e-9)
    assert row["complementary_peak"] == pytest.approx(1.0, rel=REL)
    assert row["control_gain_peak"] == pytest.approx(175.0, rel=REL)


def test_biproper_delay_loop_sensitivity_peak():
    pn, pd, theta, cn, cd = [0.7775], [1.0], 1.968, [1.0223, 0.01567], [1.0, 0.0]
    row = synth_row(pn, pd, cn, cd, theta)
    ref = reference_metrics(pn, pd, cn, cd, delay=theta, n=400000)
    assert row["sensitivity_peak"] == pytest.approx(ref["Ms"], rel=REL)


def test_slow_stable_delay_loop_not_rejected():
    # e^-s/(s+1) with PI 0.5 + 1e-5/s: slow closed-loop pole near -6.7e-6, all others well damped
    truth, _ = _pade12_verdict([1.0], [1.0, 1.0], 1.0, [0.5, 1e-5], [1.0, 0.0])
    assert truth
    assert bool(extra_rows("fopdt_T1")["internally_stable"].iloc[-1]) is True


@given(st.lists(st.floats(-1e3, 1e3), min_size=1, max_size=9), st.floats(1e-4, 1e4))
@settings(max_examples=200, deadline=None)
def test_at_jw_matches_complex_horner(coefs, w):
    """p(jw) from the even/odd split R(w^2) + j w I(w^2) equals numpy.polyval at the complex
    point jw (independent reference: numpy's own complex Horner), to rounding."""
    from synth.evaluate.frequency import at_jw, jw_split
    p = np.array([coefs])
    got = at_jw(jw_split(p), np.array([[w]]))[0, 0]
    ref = np.polyval(p[0], 1j * w)
    scale_ = np.polyval(np.abs(p[0]), w)            # sum |c_k| w^k bounds the rounding
    assert abs(got - ref) <= 1e-13 * max(scale_, 1e-300)


@given(st.lists(st.tuples(st.floats(0.2, 3.0), st.floats(-2.0, 2.0), st.floats(0.05, 1.0)), min_size=1, max_size=4),
       st.floats(-1.0, 1.0))
@settings(max_examples=100, deadline=None)
def test_brent_minimize_agrees_with_scipy_bounded(bumps, x0):
    """Batched Brent minimisation (bracket.brent_minimize) of sums of Gaussian wells on [-3, 3]
    reaches a value no worse than scipy.optimize.minimize_scalar(method="bounded") started from
    the same bracket (an independent implementation of the same published method: Brent,
    *Algorithms for Minimization without Derivatives*, 1973), when both converge to one well."""
    from scipy.optimize import minimize_scalar
    from synth.evaluate.bracket import brent_minimize

    def fun(x):
        return -sum(h * np.exp(-((x - c) / s) ** 2) for h, c, s in bumps)
    # a bracket around the sampled minimum of a fine grid, as _grid_peak uses it
    grid = np.linspace(-3.0, 3.0, 601)
    k = int(np.clip(np.argmin(fun(grid)), 1, 599))
    a, x, b = grid[k - 1], grid[k], grid[k + 1]
    got_x, got_f = brent_minimize(lambda idx, u: fun(u), np.array([a]), np.array([x]), np.array([b]),
                                  np.array([fun(x)]), 1e-10)
    ref = minimize_scalar(fun, bounds=(a, b), method="bounded", options={"xatol": 1e-12})
    assert a <= got_x[0] <= b
    assert got_f[0] == pytest.approx(fun(got_x[0]), abs=0.0)            # the value is F at the returned point
    assert got_f[0] <= ref.fun + 1e-12 * max(1.0, abs(ref.fun))
    assert got_f[0] <= fun(x)                                         # never worse than the start


@given(st.floats(0.05, 20.0), st.floats(0.0, 3.0), st.integers(1, 4))
@settings(max_examples=100, deadline=None)
def test_illinois_crossings_agree_with_brentq(w1, phase, power):
    """Sign changes of g(w) = cos(w/w1 + phase) w^power on a logarithmic grid, refined by the
    Illinois method with a bisection finish (frequency._bisect_crossings), match
    scipy.optimize.brentq on every bracketing grid interval to 1e-13 relative."""
    from scipy.optimize import brentq
    from synth.evaluate.frequency import _bisect_crossings

    def g(w):
        return np.cos(w / w1 + phase) * w ** power
    grid = np.geomspace(1e-3, 20.0 * w1, 400)[None, :]      # spacing below a quarter period: one root per interval
    vals = g(grid)
    got = _bisect_crossings(lambda rows, w: g(w), grid, vals)[0]
    idx = np.flatnonzero(np.sign(vals[0, :-1]) * np.sign(vals[0, 1:]) < 0)
    assume(idx.size > 0)
    ref = np.array([brentq(g, grid[0, i], grid[0, i + 1], xtol=1e-300, rtol=4 * np.finfo(float).eps) for i in idx])
    np.testing.assert_allclose(got[:idx.size], ref, rtol=1e-13)
