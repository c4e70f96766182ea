"""Discretisation (Tustin, pre-warped Tustin, ZOH with dead time) and the sampled-loop check.

References, named beside each check:
- scipy.signal.cont2discrete ('bilinear', 'zoh') as an independent implementation
  (tests only; synth.discrete does not use scipy.signal);
- scipy.signal.lsim on a fine time grid that contains every switching instant of the
  held, delayed input (exact for piecewise-constant inputs) for the fractional dead time;
- the closed form for 1/(s+1) with a fractional delay (Astrom & Wittenmark,
  *Computer-Controlled Systems*, 3rd ed. 1997, sec. 2.3), derived by hand in the test;
- numpy polymul/polyadd + np.roots for the discrete characteristic polynomial;
- Ogata, *Modern Control Engineering*, 5th ed., ex. 7-26, G = 4/(s(s+2)),
  C = 41.7(s+4.41)/(s+18.4): PM 50.5 deg at 8.89 rad/s, as recomputed in
  /work/shared/REFERENCES.md (the published value is from memory; the recomputed one is tested).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from scipy import signal

from synth.discrete import discrete_loop, schur_stable_exact, tustin, zoh
from synth.lti import TransferFunction

OGATA_G = TransferFunction([4.0], [1.0, 2.0, 0.0])
OGATA_C = TransferFunction(41.7 * np.array([1.0, 4.41]), [1.0, 18.4])
OGATA_PM = 50.5          # deg, REFERENCES.md [recomputed]
OGATA_WC = 8.89          # rad/s, REFERENCES.md [recomputed]

SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
freq = st.floats(min_value=-2.0, max_value=2.0).map(lambda x: 10.0 ** x)       # 0.01 .. 100 rad/s
gain = st.floats(min_value=-1.0, max_value=2.0).map(lambda x: 10.0 ** x)
sample = st.floats(min_value=-3.0, max_value=0.0).map(lambda x: 10.0 ** x)     # 1 ms .. 1 s


# ------------------------------------------------------------ controllers
def lead(k, z, p):
    lo, hi = sorted((z, p))
    return TransferFunction(k * np.array([1.0, lo]), [1.0, hi])


def lag(k, z, p):
    lo, hi = sorted((z, p))
    return TransferFunction(k * np.array([1.0, hi]), [1.0, lo])


def pid_filter(kp, ki, kd, tf):
    # kp + ki/s + kd s/(tf s + 1) over the common denominator s (tf s + 1)
    num = np.polyadd(np.polyadd(kp * np.array([tf, 1.0, 0.0]), ki * np.array([tf, 1.0])), [kd, 0.0, 0.0])
    return TransferFunction(num, [tf, 1.0, 0.0])


def integrator_lead(k, z, p):
    lo, hi = sorted((z, p))
    return TransferFunction(k * np.array([1.0, lo]), np.polymul([1.0, 0.0], [1.0, hi]))


controllers = st.one_of(
    st.builds(lead, gain, freq, freq),
    st.builds(lag, gain, freq, freq),
    st.builds(pid_filter, gain, gain, gain, st.floats(min_value=-3.0, max_value=-0.5).map(lambda x: 10.0 ** x)),
    st.builds(lambda k: TransferFunction([k], [1.0, 0.0]), gain),
    st.builds(integrator_lead, gain, freq, freq),
)


def scipy_tf(sys, T, method, **kw):
    num, den, _ = signal.cont2discrete((sys.num, sys.den), T, method=method, **kw)
    num = np.ravel(num)
    return num / den[0], np.asarray(den) / den[0]


def assert_coeffs(actual, expected, rtol=1e-9):
    actual, expected = np.asarray(actual, float), np.asarray(expected, float)
    n = max(actual.size, expected.size)
    actual = np.pad(actual, (n - actual.size, 0))
    expected = np.pad(expected, (n - expected.size, 0))
    scale = max(np.max(np.abs(expected)), 1e-300)
    np.testing.assert_allclose(actual, expected, rtol=rtol, atol=rtol * scale)


# ---------------------------------------------------------------- Tustin
@SETTINGS
@given(controllers, sample)
def test_tustin_matches_scipy_bilinear(c, T):
    # reference: scipy.signal.cont2discrete(method='bilinear'), s = (2/T)(z-1)/(z+1)
    b, a = tustin(c, T)
    assert a[0] == 1.0 and b.size == a.size
    rb, ra = scipy_tf(c, T, "bilinear")
    assert_coeffs(a, ra)
    assert_coeffs(b, rb)


@SETTINGS
@given(controllers, sample, st.floats(min_value=0.01, max_value=0.95))
def test_tustin_prewarp_matches_response_and_scaled_bilinear(c, T, frac):
    w = frac * math.pi / T
    b, a = tustin(c, T, prewarp_rad_s=w)
    # exact matching at w: C_d(e^{jwT}) = C(jw) (Franklin, Powell & Workman 1998, ch. 6)
    z = np.exp(1j * w * T)
    cd = np.polyval(b, z) / np.polyval(a, z)
    cc = c(1j * w)
    assert abs(cd - cc) <= 1e-8 * max(abs(cc), 1e-300)
    # reference: pre-warped Tustin with c = w/tan(wT/2) is scipy's bilinear map at the period 2/c
    cfac = w / math.tan(w * T / 2)
    rb, ra = scipy_tf(c, 2.0 / cfac, "bilinear")
    assert_coeffs(a, ra)
    assert_coeffs(b, rb)


def test_tustin_without_prewarp_misses_the_response_at_w():
    # the reason for pre-warping: plain Tustin maps w to (2/T) tan(wT/2), so it is off at w
    T, w = 0.1, 20.0
    b, a = tustin(OGATA_C, T)
    z = np.exp(1j * w * T)
    assert abs(np.polyval(b, z) / np.polyval(a, z) - OGATA_C(1j * w)) > 1e-3 * abs(OGATA_C(1j * w))


def test_tustin_options_are_checked():
    with pytest.raises(ValueError, match="sample time"):
        tustin(OGATA_C, 0.0)
    with pytest.raises(ValueError, match="Nyquist"):
        tustin(OGATA_C, 0.1, prewarp_rad_s=40.0)      # pi/T = 31.4 rad/s
    with pytest.raises(ValueError, match="whole number of sample"):
        tustin(TransferFunction([1.0], [1.0, 1.0], delay=0.15), 0.1)


def test_tustin_integer_controller_delay_is_a_z_power():
    # C e^{-2T s} -> C_d(z) z^-2: b shifted right by two, a padded with two zeros
    c = TransferFunction([2.0, 1.0], [1.0, 3.0], delay=0.2)
    b, a = tustin(c, 0.1)
    b0, a0 = tustin(TransferFunction(c.num, c.den), 0.1)
    np.testing.assert_array_equal(b, np.concatenate([[0.0, 0.0], b0]))
    np.testing.assert_array_equal(a, np.concatenate([a0, [0.0, 0.0]]))


# ------------------------------------------------------------------ ZOH
plants = st.one_of(
    st.builds(lambda k, p: TransferFunction([k], [1.0, p]), gain, freq),
    st.builds(lambda k, p: TransferFunction([k], [1.0, p, 0.0]), gain, freq),
    st.builds(lambda k, wn, zeta: TransferFunction([k * wn ** 2], [1.0, 2 * zeta * wn, wn ** 2]),
              gain, freq, st.floats(min_value=0.05, max_value=2.0)),
    st.builds(lambda k, z, p: TransferFunction(k * np.array([1.0, -z]), np.polymul([1.0, p], [1.0, 2 * p])),
              gain, freq, freq),                                                   # RHP zero
    st.builds(lambda k, p: TransferFunction([k], [1.0, -p]), gain, freq),        # unstable
)


@SETTINGS
@given(st.one_of(controllers, plants), sample)
def test_zoh_matches_scipy_zoh(g, T):
    # reference: scipy.signal.cont2discrete(method='zoh')
    # keep e^{pT} representable and the poles distinguishable after sampling
    assume(np.max(np.abs(g.poles)) * T < 30 if g.poles.size else True)
    # scipy's route (tf2ss, expm, ss2tf) loses digits to cancellation when every nonzero pole is
    # far slower than the sample rate; there synth was checked against 50-digit mpmath instead
    # (G = 1e-4/(s^2 + 0.02 s + 1e-4), T = 1 ms: b = [0, 4.99996666679e-11, 4.99993333379e-11])
    nz = np.abs(g.poles[np.abs(g.poles) > 0])
    assume(nz.size == 0 or np.max(nz) * T > 1e-3)
    b, a = zoh(g, T)
    assert a[0] == 1.0 and b.size == a.size
    rb, ra = scipy_tf(g, T, "zoh")
    assert_coeffs(a, ra, rtol=1e-8)
    assert_coeffs(b, rb, rtol=1e-7)


def test_zoh_first_order_fractional_delay_closed_form():
    # independent derivation (Astrom & Wittenmark 1997, sec. 2.3): G = e^{-tau s}/(s+1),
    # tau = l T + tau', 0 < tau' < T:  H(z) = (g0 z + g1) / (z^{l+1} (z - e^{-T})),
    # g0 = 1 - e^{-(T - tau')},  g1 = e^{-(T - tau')} - e^{-T}
    T, tau = 0.1, 0.27
    ell, tp = 2, tau - 0.2
    b, a = zoh(TransferFunction([1.0], [1.0, 1.0], delay=tau), T)
    g0 = 1 - math.exp(-(T - tp))
    g1 = math.exp(-(T - tp)) - math.exp(-T)
    # descending powers of z over z^{l+1}(z - e^{-T}): degree l + 2
    np.testing.assert_allclose(b, [0.0] * (ell + 1) + [g0, g1], rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(a, [1.0, -math.exp(-T)] + [0.0] * (ell + 1), rtol=1e-12, atol=1e-15)


def test_zoh_integer_delay_is_a_z_power():
    # reference: scipy zoh of the delay-free plant times z^-3
    g = TransferFunction([2.0, 1.0], [1.0, 0.7, 3.0], delay=0.3)
    b, a = zoh(g, 0.1)      # 0.3/0.1 = 2.9999999999999996 in floating point: must count as 3
    rb, ra = scipy_tf(TransferFunction(g.num, g.den), 0.1, "zoh")
    assert_coeffs(b[3:], rb)
    np.testing.assert_array_equal(b[:3], 0.0)
    assert_coeffs(a[:-3], ra)
    np.testing.assert_array_equal(a[-3:], 0.0)


def _held_delayed_response(g: TransferFunction, u: np.ndarray, T: float, dt: float = 1e-3) -> np.ndarray:
    """Continuous response at t = kT to the held input u[k], delayed by g.delay (fine-step reference).

    A uniform grid of step ``dt`` with T and the delay both whole multiples of it holds
    every switching instant kT + delay; scipy.signal.lsim with interp=False holds the
    input between grid points, so the simulation is exact for this piecewise-constant input.
    """
    m, d = round(T / dt), round(g.delay / dt)
    assert abs(m * dt - T) < 1e-12 and abs(d * dt - g.delay) < 1e-12
    j = np.arange(u.size * m)
    ut = np.where(j >= d, u[np.clip((j - d) // m, 0, u.size - 1)], 0.0)
    _, y, _ = signal.lsim((g.num, g.den), ut, j * dt, interp=False)
    return y[::m]


@pytest.mark.parametrize("g", [
    TransferFunction([3.0], [1.0, 0.8, 4.0], delay=0.137),               # fractional: 1.37 T
    TransferFunction([1.0, 2.0], [1.0, 3.0, 2.0], delay=0.04),           # below one period
    TransferFunction([2.0, 1.0, 5.0], [1.0, 2.0, 5.0], delay=0.255),     # biproper: direct term delayed
    TransferFunction([1.0], [1.0, 0.5, 0.0], delay=0.31),                # integrating
])
def test_zoh_fractional_delay_against_fine_simulation(g):
    # reference: fine-step lsim of the continuous plant driven by the held, delayed input
    T = 0.1
    rng = np.random.default_rng(7)
    u = rng.normal(size=60)
    b, a = zoh(g, T)
    yd = signal.lfilter(b, a, u)
    yc = _held_delayed_response(g, u, T)
    np.testing.assert_allclose(yd, yc, atol=1e-9 * max(1.0, np.max(np.abs(yc))))


def test_zoh_errors_name_the_problem():
    with pytest.raises(ValueError, match="proper"):
        zoh(TransferFunction([1.0, 0.0], [1.0]), 0.1)
    with pytest.raises(ValueError, match="sample time"):
        zoh(OGATA_G, -1.0)


# ------------------------------------------------------------ sampled loop
def reference_char(plant, b, a, T):
    """Independent characteristic polynomial: scipy zoh plant, numpy polymul/polyadd."""
    num, den, _ = signal.cont2discrete((plant.num, plant.den), T, method="zoh")
    bp, ap = np.ravel(num), np.ravel(den)
    d = int(round(plant.delay / T))       # tests use whole-period plant delays here
    ap = np.concatenate([ap, np.zeros(d)])
    return np.polyadd(np.polymul(a, ap), np.polymul(b, bp))


loop_cases = st.one_of(
    st.tuples(st.just(OGATA_G), st.just(OGATA_C)),
    st.tuples(st.just(TransferFunction([1.0], [1.0, -1.0])),
              st.just(TransferFunction(4 * np.array([1.0, 0.5]), np.polymul([1.0, 0.0], [0.05, 1.0])))),
    st.tuples(st.just(TransferFunction([1.0], np.polymul(np.polymul([1.0, 0.0], [1.0, 1.0]), [1.0, 5.0]))),
              st.just(TransferFunction([10.0], [1.0]))),
)


@SETTINGS
@given(loop_cases, st.floats(min_value=-1.0, max_value=1.0).map(lambda x: 10.0 ** x),
       st.floats(min_value=-3.0, max_value=-0.3).map(lambda x: 10.0 ** x))
def test_loop_verdict_matches_roots_of_independent_char(case, k, T):
    # reference: roots (np.roots) of a_c a_p + b_c b_p built with numpy from scipy's zoh plant
    plant, c = case
    b, a = tustin(c * k, T)
    ref = np.roots(reference_char(plant, b, a, T))
    rho = float(np.max(np.abs(ref)))
    assume(abs(rho - 1.0) > 1e-6)          # verdicts on the circle itself are a rounding question
    out = discrete_loop(plant, b, a, T)
    assert out["stable"] == (rho < 1.0)
    assert out["spectral_radius"] == pytest.approx(rho, rel=1e-6)


def test_ogata_lead_becomes_unstable_when_sampled_slowly():
    # Ogata 5th ed. ex. 7-26 (REFERENCES.md, recomputed): stable in continuous time
    # (closed-loop poles -6.954 +- j8.059, -6.492); Tustin at T = 0.3 s puts a pole outside |z| = 1
    cont = np.roots(np.polyadd(np.polymul(OGATA_G.den, OGATA_C.den), np.polymul(OGATA_G.num, OGATA_C.num)))
    assert np.all(cont.real < 0)
    fast = discrete_loop(OGATA_G, *tustin(OGATA_C, 0.01), 0.01)
    slow = discrete_loop(OGATA_G, *tustin(OGATA_C, 0.3), 0.3)
    assert fast["stable"] and fast["spectral_radius"] < 1
    assert not slow["stable"] and slow["spectral_radius"] > 1
    # the independent roots agree (reference: numpy on scipy's zoh plant)
    ref = np.roots(reference_char(OGATA_G, *tustin(OGATA_C, 0.3), 0.3))
    assert np.max(np.abs(ref)) > 1
    assert math.isnan(slow["phase_margin_deg"]) and math.isnan(slow["gain_margin_db"])


def test_ogata_margins_approach_continuous_as_T_shrinks():
    # continuous: PM 50.5 deg at 8.89 rad/s, GM inf (REFERENCES.md, recomputed for Ogata ex. 7-26).
    # The ZOH adds about wT/2 of phase lag at w (Franklin, Powell & Workman 1998, ch. 6), so
    # PM(T) ~ PM - deg(wc T / 2): the error must shrink with T and follow that estimate.
    errs = []
    for T in (1e-2, 1e-3, 1e-4):
        out = discrete_loop(OGATA_G, *tustin(OGATA_C, T), T)
        assert out["stable"]
        est = OGATA_PM - math.degrees(OGATA_WC * T / 2)
        assert out["phase_margin_deg"] == pytest.approx(est, abs=0.2 * math.degrees(OGATA_WC * T / 2) + 0.01)
        assert out["crossover_rad_s"] == pytest.approx(OGATA_WC, abs=0.01)
        errs.append(abs(out["phase_margin_deg"] - OGATA_PM))
    assert errs[0] > errs[1] > errs[2]
    assert errs[2] < 0.05
    # the sampled loop always has a finite upper gain margin; it grows without bound as T -> 0
    gms = [discrete_loop(OGATA_G, *tustin(OGATA_C, T), T)["gain_margin_db"] for T in (1e-2, 1e-3, 1e-4)]
    assert gms[0] < gms[1] < gms[2] and gms[2] > 60
    assert discrete_loop(OGATA_G, *tustin(OGATA_C, 1e-3), 1e-3)["gain_margin_low_db"] == -math.inf


def test_phase_margin_at_crossover_against_scipy_freqz():
    # reference: |L| = 1 and angle at the reported crossover from scipy.signal.freqz on the
    # controller and on scipy's zoh plant
    T = 0.05
    b, a = tustin(OGATA_C, T, prewarp_rad_s=8.8895)
    out = discrete_loop(OGATA_G, b, a, T)
    w = out["crossover_rad_s"]
    rb, ra = scipy_tf(OGATA_G, T, "zoh")
    _, hc = signal.freqz(b, a, worN=[w * T])
    _, hp = signal.freqz(rb, ra, worN=[w * T])
    L = hc[0] * hp[0]
    assert abs(L) == pytest.approx(1.0, rel=1e-6)
    assert out["phase_margin_deg"] == pytest.approx(math.degrees(np.angle(-L)), abs=1e-6)


@pytest.mark.parametrize("plant,c,T", [
    (OGATA_G, OGATA_C, 0.05),
    (TransferFunction([1.0], np.polymul(np.polymul([1.0, 0.0], [1.0, 1.0]), [1.0, 5.0])),
     TransferFunction([10.0], [1.0]), 0.05),
    (TransferFunction([1.0], [1.0, -1.0]),
     TransferFunction(4 * np.array([1.0, 0.5]), np.polymul([1.0, 0.0], [0.05, 1.0])), 0.02),
])
def test_gain_margins_bound_the_stabilising_interval(plant, c, T):
    # reference: np.roots of the independent characteristic polynomial at gains just inside and
    # just outside each finite end of the reported interval
    b, a = tustin(c, T)
    out = discrete_loop(plant, b, a, T)
    assert out["stable"]

    def rho(k):
        return np.max(np.abs(np.roots(reference_char(plant, k * b, a, T))))

    for key in ("gain_margin_db", "gain_margin_low_db"):
        gm = out[key]
        if math.isfinite(gm):
            k = 10 ** (gm / 20)
            inside, outside = (k * (1 - 1e-5), k * (1 + 1e-5)) if key == "gain_margin_db" else \
                (k * (1 + 1e-5), k * (1 - 1e-5))
            assert rho(inside) < 1 < rho(outside)
    # the lower end of the unstable plant's interval: continuous -11.8 dB (REFERENCES.md, recomputed)
    if plant.den[-1] == -1.0:
        assert out["gain_margin_low_db"] == pytest.approx(-11.8, abs=0.1)


def test_fractional_plant_delay_in_the_loop():
    # e^{-0.25 s}/(s+1) under a PI controller: the verdict equals the roots of the characteristic
    # polynomial built from the closed-form ZOH plant (Astrom & Wittenmark 1997, sec. 2.3)
    T, tau = 0.1, 0.25
    plant = TransferFunction([1.0], [1.0, 1.0], delay=tau)
    e, tp = math.exp(-T), tau - 0.2
    g0, g1 = 1 - math.exp(-(T - tp)), math.exp(-(T - tp)) - e
    bp = np.array([0, 0, 0, g0, g1])
    ap = np.array([1, -e, 0, 0, 0])
    for kp in (0.5, 1.5, 4.0, 8.0):
        c = TransferFunction([kp, kp / 1.0], [1.0, 0.0])
        b, a = tustin(c, T)
        ref = np.roots(np.polyadd(np.polymul(a, ap), np.polymul(b, bp)))
        out = discrete_loop(plant, b, a, T)
        assert out["stable"] == (np.max(np.abs(ref)) < 1)
        np.testing.assert_allclose(np.sort_complex(out["poles"]), np.sort_complex(ref), atol=1e-8)
    # with Ti = 1 the PI zero cancels the plant pole: L ~ kp e^{-0.25 s}/s, stable in continuous
    # time for kp < pi/(2 * 0.25) = 6.28; sampling adds lag, so kp = 4 stays stable and kp = 8 is not
    assert discrete_loop(plant, *tustin(TransferFunction([4.0, 4.0], [1.0, 0.0]), T), T)["stable"]
    assert not discrete_loop(plant, *tustin(TransferFunction([8.0, 8.0], [1.0, 0.0]), T), T)["stable"]


def test_exact_schur_test_on_known_polynomials():
    # reference: roots chosen by hand
    assert schur_stable_exact(np.poly([0.5, -0.9, 0.3 + 0.4j, 0.3 - 0.4j]).real)
    assert not schur_stable_exact(np.poly([0.5, -1.0]).real)          # root at z = -1
    assert not schur_stable_exact(np.poly([0.5, 1.0]).real)           # root at z = 1
    assert not schur_stable_exact(np.poly([1.01, 0.2]).real)
    assert schur_stable_exact([1.0, 0.0, 0.0])                        # double root at 0


def test_loop_rejects_bad_controller_coefficients():
    with pytest.raises(ValueError, match=r"a\[0\]"):
        discrete_loop(OGATA_G, [1.0, 0.5], [0.0, 1.0], 0.1)
    with pytest.raises(ValueError, match="finite"):
        discrete_loop(OGATA_G, [1.0, np.nan], [1.0, 0.5], 0.1)


def test_zoh_of_a_slow_plant_against_high_precision():
    # reference: 50-digit mpmath matrix exponential of the augmented matrix [[A T, B T], [0, 0]]
    # (Van Loan 1978) and num(z) = det(zI - Phi + Gamma C) - det(zI - Phi); scipy loses digits here
    import mpmath as mp
    with mp.workdps(50):
        T = mp.mpf("0.001")
        M = mp.matrix([[-0.02 * T, -1e-4 * T, T], [T, 0, 0], [0, 0, 0]])
        E = mp.expm(M)
        phi, gam = E[0:2, 0:2], E[0:2, 2]
        C = mp.matrix([[0, 1e-4]])

        def num_at(z):
            d = lambda X: X[0, 0] * X[1, 1] - X[0, 1] * X[1, 0]
            return d(z * mp.eye(2) - phi + gam * C) - d(z * mp.eye(2) - phi)
        v0, v1, v2 = num_at(0), num_at(1), num_at(2)
        ref = [float(v1 - (v2 - 2 * v1 + v0) / 2 - v0), float(v0)]
    b, a = zoh(TransferFunction([1e-4], [1.0, 0.02, 1e-4]), 1e-3)
    np.testing.assert_allclose(b[1:], ref, rtol=1e-9)
