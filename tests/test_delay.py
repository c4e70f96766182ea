"""Dead-time loops: crossing count, delay margin, quasi-polynomial roots, certificate.

Outside references: Bellman & Cooke, *Differential-Difference Equations* (1963) for
k e^{-theta s}/s under P control (stable iff 0 < k theta < pi/2, delay margin
pi/(2k) - theta; value from memory); an independent dense Nyquist count written here
(Nyquist 1932: Z = P + clockwise encirclements of 0 by 1 + L along the imaginary axis);
Cooke & van den Driessche (Funkcialaj Ekvacioj 29, 1986) for stability switches;
mpmath (findroot, 40-digit evaluation) for the roots.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from synth.evaluate import EvalOptions, delay, evaluate_controllers
from synth.evaluate import stability
from synth.lti import TransferFunction, batch_roots


# ------------------------------------------------------------------ independent oracle
def nyquist_rhp(a: np.ndarray, b: np.ndarray, theta: float) -> tuple[int, float]:
    """Roots of A + B e^{-theta s} in Re s > 0 by the Nyquist criterion on a dense grid
    (A without imaginary-axis roots, deg B < deg A). Returns (Z, min |1 + L| on the grid)."""
    P = int(np.sum(np.roots(a).real > 0))
    probe = np.geomspace(1e-3, 1e7, 4000)
    lmag = np.abs(np.polyval(b, 1j * probe) / np.polyval(a, 1j * probe))
    big = np.flatnonzero(lmag >= 0.25)
    w1 = 2.0 * probe[big[-1]] if big.size else 1.0
    dw = min(0.02 / theta, 0.002)
    w = np.concatenate([np.arange(0.0, w1, dw), np.geomspace(w1, 1e7, 20000)])
    F = 1 + np.polyval(b, 1j * w) * np.exp(-1j * w * theta) / np.polyval(a, 1j * w)
    ph = np.unwrap(np.angle(F))
    ncw = -2 * (ph[-1] - ph[0]) / (2 * np.pi)
    return int(round(P + ncw)), float(np.abs(F).min())


def random_loop(seed: int):
    rng = np.random.default_rng(seed)
    na = int(rng.integers(1, 5))
    roots = []
    while len(roots) < na:
        re = rng.uniform(0.05, 3.0) * rng.choice([-1, -1, -1, 1])
        if len(roots) <= na - 2 and rng.random() < 0.5:
            im = rng.uniform(0.1, 3.0)
            roots += [complex(re, im), complex(re, -im)]
        else:
            roots.append(complex(re, 0))
    a = np.real(np.poly(roots))
    nb = int(rng.integers(0, na))
    b = np.real(np.poly(rng.uniform(-3, 3, nb))) if nb else np.ones(1)
    b = b * 10 ** rng.uniform(-1.3, 0.7) * rng.choice([-1, 1])
    theta = float(10 ** rng.uniform(-1.3, 0.7))
    return a, b, theta


def _ab(a, b):
    m = max(a.size, b.size)
    return np.pad(a, (m - a.size, 0))[None, :], np.pad(b, (m - b.size, 0))[None, :]


# ------------------------------------------------------------------ closed forms
@pytest.mark.parametrize("k,theta", [(0.5, 1.0), (1.0, 1.0), (1.5, 1.0), (1.6, 1.0), (2.0, 1.0), (0.2, 7.0),
                                     (3.0, 0.5), (3.2, 0.5)])
def test_integrator_with_delay_under_p_control(k, theta):
    # Bellman & Cooke 1963 (value from memory): s + k e^{-theta s} is stable iff 0 < k theta < pi/2,
    # with delay margin pi/(2k) - theta
    plant = TransferFunction([1.0], [1.0, 0.0], theta)
    df = evaluate_controllers(plant, [[k]], [[1.0]])
    expect = k * theta < np.pi / 2
    assert bool(df["internally_stable"][0]) == expect
    cert = delay.certificate([1.0], [1.0, 0.0], [k], [1.0], theta)
    assert cert["stable"] == expect
    if expect:
        assert df["delay_margin_s"][0] == pytest.approx(np.pi / (2 * k) - theta, rel=1e-9)
        assert cert["delay_margin_s"] == pytest.approx(np.pi / (2 * k) - theta, rel=1e-12)
        assert "0 root(s) in Re s >= 0" in cert["text"] and "Sturm" in cert["text"]
    else:
        assert cert["rhp_roots"] >= 2


def test_stability_switches():
    # Cooke & van den Driessche 1986: with two crossing frequencies the loop can be stable,
    # unstable and stable again as the delay grows. A = s^2 + 0.1 s + 1, B = 0.5:
    # W(x) = (1 - x)^2 + 0.01 x - 0.25 has roots x = (1.99 -+ sqrt(1.99^2 - 3))/2, one crossing each way.
    a, b = np.array([[1.0, 0.1, 1.0]]), np.array([[0.0, 0.0, 0.5]])
    thetas = np.linspace(0.05, 40.0, 400)
    ours = np.array([delay.rhp_count(a, b, t)[1][0] for t in thetas])
    ref = np.array([nyquist_rhp(a[0], b[0, -1:], t)[0] for t in thetas[::8]])
    assert np.array_equal(ours[::8], ref)
    st_ = ours == 0
    switches = np.flatnonzero(st_[1:] != st_[:-1])
    assert st_[0] and len(switches) >= 3          # stable -> unstable -> stable -> ...
    c = delay.crossings(a, b)
    dirs = sorted(zip(c.w[0][~np.isnan(c.w[0])], c.direction[0][~np.isnan(c.w[0])]))
    assert [d for _, d in dirs] == [-1.0, 1.0]
    assert [w for w, _ in dirs] == pytest.approx(np.sqrt([(1.99 - np.sqrt(1.99 ** 2 - 3)) / 2, (1.99 + np.sqrt(1.99 ** 2 - 3)) / 2]), rel=1e-9)


def test_neutral_loops():
    # deg B = deg A: finitely many RHP roots only for |b_lead| < |a_lead| (Hale & Verduyn Lunel 1993, ch. 9)
    a, b = np.array([[1.0, 1.0]]), np.array([[0.5, 0.0]])      # s + 1 + 0.5 s e^{-s}: W = 0.75 x + 1 > 0
    stable, z, _, dm = delay.rhp_count(a, b, 1.0)
    assert stable[0] and z[0] == 0 and np.isinf(dm[0])
    cert = delay.certificate([0.5, 0.0], [1.0], [1.0], [1.0, 1.0], 1.0)
    assert cert["stable"] is True and "neutral" in cert["text"]
    for lead in (1.0, 2.0):
        a, b = np.array([[1.0, 1.0]]), np.array([[lead, 0.3]])
        assert not delay.rhp_count(a, b, 1.0)[0][0]
        assert delay.certificate([lead, 0.3], [1.0], [1.0], [1.0, 1.0], 1.0)["stable"] is False


# ------------------------------------------------------------------ crossing count vs Nyquist
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(st.integers(0, 2 ** 32 - 1))
def test_crossing_count_matches_dense_nyquist(seed):
    a, b, theta = random_loop(seed)
    A, B = _ab(a, b)
    stable, z, c, _ = delay.rhp_count(A, B, theta)
    # keep away from critical delays and near-axis roots, where both counts are ill-conditioned
    with np.errstate(invalid="ignore"):
        frac = np.mod(c.w * theta - c.phi, 2 * np.pi)
    assume(np.all(np.isnan(frac) | (np.minimum(frac, 2 * np.pi - frac) > 1e-3)))
    zr, fmin = nyquist_rhp(a, b, theta)
    assume(fmin > 1e-3)
    assert z[0] == zr
    assert stable[0] == (zr == 0)


@settings(max_examples=15, deadline=None)
@given(st.integers(0, 2 ** 32 - 1))
def test_exact_certificate_matches_float_count(seed):
    a, b, theta = random_loop(seed)
    A, B = _ab(a, b)
    _, z, c, dm = delay.rhp_count(A, B, theta)
    with np.errstate(invalid="ignore"):
        frac = np.mod(c.w * theta - c.phi, 2 * np.pi)
    assume(np.all(np.isnan(frac) | (np.minimum(frac, 2 * np.pi - frac) > 1e-6)))
    cert = delay.certificate(b, [1.0], [1.0], a, theta)
    assert cert["rhp_roots"] == z[0]
    if z[0] == 0:
        assert cert["delay_margin_s"] == pytest.approx(dm[0], rel=1e-7)


# ------------------------------------------------------------------ roots
def _mp_delta(a, b, theta, s):
    s = mpmath.mpc(s)
    return mpmath.polyval([mpmath.mpf(x) for x in a], s) + \
        mpmath.polyval([mpmath.mpf(x) for x in b], s) * mpmath.exp(-mpmath.mpf(theta) * s)


@pytest.mark.parametrize("seed", range(8))
def test_newton_roots_are_roots_and_counted(seed):
    # FOPDT plant under PI control, roots started from the Padé roots
    rng = np.random.default_rng(seed)
    tau, theta, kg = rng.uniform(0.2, 5), rng.uniform(0.1, 3), rng.uniform(0.3, 3)
    kp = rng.uniform(0.1, 0.6) * tau / (kg * theta)
    ti = rng.uniform(0.5, 2) * min(tau, 4 * theta)
    plant = TransferFunction([kg], [tau, 1.0], theta)
    nc, dc = np.array([[kp * ti, kp]]), np.array([[ti, 0.0]])
    a, b = delay.split(plant.num, plant.den, nc, dc)
    rp = plant.with_pade(6)
    starts = batch_roots(stability.characteristic(rp.num, rp.den, nc, dc))
    lr = delay.loop_roots(a, b, theta, starts)
    roots = lr.roots[0][~np.isnan(lr.roots[0])]
    assert roots.size >= 1 and lr.counted[0] == lr.found[0] == roots.size
    with mpmath.workdps(40):
        for r in roots:
            # |Delta| ~ 0 at 40 digits, relative to the size of its terms
            val = abs(_mp_delta(a[0], b[0], theta, r))
            size = abs(mpmath.polyval([mpmath.mpf(abs(x)) for x in a[0]], abs(r))) + 1
            assert float(val / size) < 1e-10
            # mpmath's own Newton/secant from our root lands on the same root
            r2 = mpmath.findroot(lambda s: _mp_delta(a[0], b[0], theta, s), mpmath.mpc(r))
            assert abs(complex(r2) - r) <= 1e-9 * max(abs(r), 1.0)
    assert lr.decay[0] == pytest.approx(-roots.real.max(), rel=1e-12)


def test_argument_count_against_mpmath_search():
    # count the roots of s^2 + 0.1 s + 1 + 0.5 e^{-3 s} with Re s > -0.4 independently: mpmath findroot
    # from a dense grid of starts in the bounded region (root_bound), distinct roots only
    a, b, theta = np.array([[1.0, 0.1, 1.0]]), np.array([[0.0, 0.0, 0.5]]), 3.0
    sigma = np.array([0.4])
    bound = delay.root_bound(a, b, theta, sigma)
    count, ok = delay.argument_count(a, b, theta, sigma, bound)
    assert ok[0]
    found = []
    R = float(bound[0])
    with mpmath.workdps(30):
        for x in np.linspace(-0.4, R, 12):
            for y in np.linspace(-R, R, 60):
                try:
                    r = complex(mpmath.findroot(lambda s: _mp_delta(a[0], b[0], theta, s), mpmath.mpc(x, y)))
                except (ValueError, ZeroDivisionError):
                    continue
                if r.real > -0.4 and abs(r) < R and all(abs(r - q) > 1e-6 for q in found):
                    found.append(r)
    assert count[0] == len(found)
    lr = delay.loop_roots(a, b, theta, np.array([[-0.05 + 1j, -0.05 - 1j]]))
    assert lr.counted[0] == lr.found[0]


def test_root_bound_holds():
    # no root of Delta with Re s >= -sigma outside |s| < R (checked on random points)
    a, b, theta = np.array([[1.0, 3.0, 2.0]]), np.array([[0.0, 4.0, 1.0]]), 0.7
    sigma = np.array([2.0])
    R = delay.root_bound(a, b, theta, sigma)[0]
    rng = np.random.default_rng(0)
    s = (-sigma[0] + rng.uniform(0, 50, 5000)) + 1j * rng.uniform(-50, 50, 5000)
    s = s[np.abs(s) >= R]
    f = np.polyval(a[0], s) + np.polyval(b[0], s) * np.exp(-theta * s)
    lower = np.abs(np.polyval(a[0], s)) - np.abs(np.polyval(b[0], s)) * np.exp(theta * sigma[0])
    assert np.all(lower > 0) and np.all(np.abs(f) > 0)


# ------------------------------------------------------------------ evaluator
def test_evaluator_margins_from_crossings():
    # FOPDT + PI: phase margin and delay margin from the gain crossover found independently
    # (scipy.optimize.brentq on |L(jw)| = 1)
    from scipy.optimize import brentq
    plant = TransferFunction([0.8], [1.0, 1.0], 1.5)
    kp, ti = 0.4, 1.2
    nc, dc = np.array([[kp * ti, kp]]), np.array([[ti, 0.0]])
    df = evaluate_controllers(plant, nc, dc, options=EvalOptions(certify=True))
    L = lambda w: 0.8 * np.polyval(nc[0], 1j * w) / np.polyval(np.polymul(dc[0], [1, 1]), 1j * w) * np.exp(-1.5j * w)
    wc = brentq(lambda w: abs(L(w)) - 1, 1e-3, 10)
    pm = np.degrees(np.angle(-L(wc)))
    assert df["crossover_rad_s"][0] == pytest.approx(wc, rel=1e-9)
    assert df["phase_margin_deg"][0] == pytest.approx(pm, rel=1e-9)
    assert df["delay_margin_s"][0] == pytest.approx(np.radians(pm) / wc, rel=1e-9)
    assert bool(df["certified"][0]) and df["loop_roots_counted"][0] >= 1
    # the roots stored are roots of the quasi-polynomial
    r = np.asarray(df["closed_loop_poles"][0])
    r = r[~np.isnan(r)]
    a, b = delay.split(plant.num, plant.den, nc, dc)
    val = np.polyval(a[0], r) + np.polyval(b[0], r) * np.exp(-1.5 * r)
    assert np.all(np.abs(val) < 1e-9 * (1 + np.abs(np.polyval(np.abs(a[0]), np.abs(r)))))


@settings(max_examples=30, deadline=None)
@given(st.integers(0, 2 ** 32 - 1))
def test_shifted_crossing_count_matches_argument_principle(seed):
    # two independent counts of the roots with Re s > -sigma: the crossing count of the shifted
    # quasi-polynomial and the winding number of Delta on a rectangle (argument principle)
    a, b, theta = random_loop(seed)
    A, B = _ab(a, b)
    sigma = np.array([float(np.random.default_rng(seed).uniform(0.1, 2.0))])
    n1 = delay.count_right_of(A, B, theta, sigma)
    n2, ok = delay.argument_count(A, B, theta, sigma, delay.root_bound(A, B, theta, sigma))
    assume(n1[0] >= 0 and ok[0])
    assert n1[0] == n2[0]


def test_shift_rows_against_numpy():
    # p(z - sigma) by composition with numpy.polynomial (independent)
    p = np.array([[2.0, -3.0, 0.5, 7.0], [1.0, 0.0, 0.0, -1.0]])
    sig = np.array([0.7, -2.5])
    got = delay.shift_rows(p, sig)
    for i in range(2):
        ref = np.polynomial.Polynomial(p[i][::-1])(np.polynomial.Polynomial([-sig[i], 1.0]))
        assert np.allclose(got[i], ref.coef[::-1], rtol=1e-13, atol=1e-12)


def test_common_imaginary_axis_factor_is_not_stable():
    # A and B share the factor s^2 + 1: Delta(+-j) = 0 for every delay (a fixed root on the axis)
    f = np.array([1.0, 0.0, 1.0])
    a = np.polymul(f, [1.0, 2.0])[None, :]
    b = np.pad(np.polymul(f, [0.5]), (1, 0))[None, :]
    assert not delay.rhp_count(a, b, 0.3)[0][0]


@given(st.lists(st.tuples(st.floats(-50.0, 5.0), st.floats(-50.0, 50.0)), min_size=1, max_size=12),
       st.lists(st.integers(0, 11), max_size=6), st.floats(-1e-9, 1e-9))
@settings(max_examples=200, deadline=None)
def test_dedupe_roots_keeps_one_of_each_cluster(points, copies, jitter):
    """dedupe_roots against the definition checked pair by pair in plain Python: a root is
    dropped exactly where an earlier one (in the rightmost-first order) lies within
    rel * max(|s|, 1) of it; NaN entries stay NaN."""
    from synth.evaluate.delay import dedupe_roots
    s = [complex(a, b) for a, b in points]
    s += [s[i % len(s)] * (1 + jitter) for i in copies]          # near-copies of some roots
    row = np.array([s + [complex(np.nan, 0.0)]])
    got = dedupe_roots(row)[0]
    order = sorted(range(len(s)), key=lambda i: -s[i].real)        # stable, like the function
    kept = []
    for pos, i in enumerate(order):
        earlier = [s[j] for j in order[:pos]]
        dup = any(abs(s[i] - e) <= 1e-7 * max(abs(s[i]), 1.0) for e in earlier)
        kept.append(np.nan if dup else s[i])
    ref = np.array(kept + [complex(np.nan, 0.0)])
    assert np.array_equal(np.isnan(got), np.isnan(ref))
    np.testing.assert_array_equal(got[~np.isnan(got)], ref[~np.isnan(ref)])


def test_confirmed_count_needs_both_counts_to_agree():
    # s^2 + 0.1 s + 1 + 0.5 e^{-3 s}: the crossing count of loop_roots is confirmed by the
    # winding number (argument principle), and a count the contour does not confirm reads -1
    import dataclasses
    a, b, theta = np.array([[1.0, 0.1, 1.0]]), np.array([[0.0, 0.0, 0.5]]), 3.0
    lr = delay.loop_roots(a, b, theta, np.roots([1.0, 0.1, 1.5])[None, :], count=True)
    assert lr.counted[0] >= 0
    wind, ok = delay.argument_count(a, b, theta, lr.sigma, delay.root_bound(a, b, theta, lr.sigma))
    assert ok[0] and delay.confirmed_count(a, b, theta, lr)[0] == wind[0] == lr.counted[0]
    wrong = dataclasses.replace(lr, counted=lr.counted + 2)
    assert delay.confirmed_count(a, b, theta, wrong)[0] == -1


def test_check_reports_a_confirmed_loop_root_count():
    # exp(-s)/(0.1 s + 1) under the SIMC PI 0.05 (0.1 s + 1)/(0.1 s) (Skogestad, J. Process
    # Control 13, 2003): the loop is 0.5 e^{-s}/s, a Bellman-Cooke loop with k theta = 0.5 < pi/2
    from synth.describe import check_controller
    from synth.lti import TransferFunction
    plant = TransferFunction([1.0], [0.1, 1.0], delay=1.0)
    rec = check_controller(plant, TransferFunction([0.005, 0.05], [0.1, 0.0]), {})
    assert rec["certified"] and rec["loop_roots_counted"] == len(rec["closed_loop_poles"]) >= 1
