"""Dead-time step responses (synth.evaluate.delay_time) against an independent solution
of the delay differential equation, closed forms and published values.

Oracle (written here, independent of synth): the method of steps (Bellman & Cooke,
*Differential-Difference Equations*, 1963) with scipy.integrate.solve_ivp (DOP853,
rtol 1e-11) on each dead-time interval [j theta, (j+1) theta], the delayed plant input
read from the previous intervals' dense outputs; plant and controller realised by
scipy.signal.tf2ss. Peaks by scipy.optimize.minimize_scalar around the largest
sample, integrals by scipy.integrate.quad per interval.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, optimize, signal

import synth.evaluate.delay_time as dt

from synth.evaluate.delay_time import delay_integral, delay_step_responses, delay_time_metrics


# ------------------------------------------------------------------ independent oracle
class DDELoop:
    """Unit reference (r) or load (d, at the plant input, before the dead time) step of the
    loop y = P0(s) e^(-theta s) (u + d), u = C(s)(r - y), by the method of steps."""

    def __init__(self, pn, pd, theta, cn, cd, r, d, horizon):
        self.th, self.r, self.d = theta, r, d
        self.P = signal.tf2ss(pn, pd)
        self.C = signal.tf2ss(cn, cd)
        self.np_ = self.P[0].shape[0]
        self.segs = []
        n = self.np_ + self.C[0].shape[0]
        x0 = np.zeros(n)
        j = 0
        while j * theta < horizon:
            sol = integrate.solve_ivp(lambda t, x, j=j: self._rhs(t, x, j), (j * theta, (j + 1) * theta), x0,
                                      method="DOP853", rtol=1e-11, atol=1e-14, dense_output=True)
            assert sol.success
            self.segs.append(sol.sol)
            x0 = sol.y[:, -1]
            j += 1

    def _j(self, t):
        return min(max(int(t // self.th), 0), len(self.segs) - 1)

    def s(self, t, j):
        """Plant input at t in interval j: v(t - theta) from interval j - 1, v = u + d; zero in
        interval 0 (at rest before t = 0)."""
        if j == 0:
            return 0.0
        return self.u(t - self.th, j - 1) + self.d

    def y(self, t, j=None, x=None):
        j = self._j(t) if j is None else j
        x = self.segs[j](t) if x is None else x
        return float((self.P[2] @ x[:self.np_])[0] + self.P[3][0, 0] * self.s(t, j))

    def u(self, t, j=None, x=None):
        j = self._j(t) if j is None else j
        x = self.segs[j](t) if x is None else x
        e = self.r - self.y(t, j, x)
        return float((self.C[2] @ x[self.np_:])[0] + self.C[3][0, 0] * e)

    def _rhs(self, t, x, j):
        Ap, Bp, _, _ = self.P
        Ac, Bc, _, _ = self.C
        s = self.s(t, j)
        y = float((self.P[2] @ x[:self.np_])[0] + self.P[3][0, 0] * s)
        dxp = Ap @ x[:self.np_] + Bp[:, 0] * s
        dxc = Ac @ x[self.np_:] + Bc[:, 0] * (self.r - y)
        return np.concatenate([dxp, dxc])


def oracle_peak(f, t):
    """max |f| on the samples t, refined by minimize_scalar on the neighbouring intervals."""
    v = np.array([abs(f(x)) for x in t])
    k = int(np.argmax(v))
    best = v[k]
    for a, b in ((t[max(k - 1, 0)], t[k]), (t[k], t[min(k + 1, len(t) - 1)])):
        if b > a:
            res = optimize.minimize_scalar(lambda x: -abs(f(x)), bounds=(a, b), method="bounded",
                                           options={"xatol": 1e-12})
            best = max(best, -res.fun)
    return best


def oracle_iae(loop, horizon, signed=False):
    """sum over dead-time intervals of quad(|y|) (or y), split where y changes sign."""
    th, total = loop.th, 0.0
    for j in range(int(np.ceil(horizon / th))):
        a, b = j * th, min((j + 1) * th, horizon)
        f = (lambda x: loop.y(x)) if signed else (lambda x: abs(loop.y(x)))
        val, _ = integrate.quad(f, a + 1e-14, b - 1e-14, limit=400, epsabs=1e-13, epsrel=1e-12)
        total += val
    return total


def pade_decay(pn, pd, theta, cn, cd, order=10):
    """Decay rate of the loop's rightmost roots from a high-order Padé model (horizon only)."""
    from synth.lti import pade
    qn, qd = pade(theta, order)
    char = np.polyadd(np.polymul(np.polymul(pd, qd), cd), np.polymul(np.polymul(pn, qn), cn))
    return float(-np.roots(char).real.max())


def pade_roots(pn, pd, theta, cn, cd, order=10):
    from synth.lti import pade
    qn, qd = pade(theta, order)
    char = np.polyadd(np.polymul(np.polymul(pd, qd), cd), np.polymul(np.polymul(pn, qn), cn))
    return np.roots(char)


def synth_pieces(pn, pd, theta, cn, cd, tail=False):
    """synth's responses; with ``tail`` the Padé roots start the residue tail after the head."""
    decay = pade_decay(pn, pd, theta, cn, cd)
    starts = pade_roots(pn, pd, theta, cn, cd)[None, :] if tail else None
    r = delay_step_responses(np.asarray(pn, float), np.asarray(pd, float), np.atleast_2d(cn),
                             np.atleast_2d(cd), theta, np.array([decay]), starts=starts)
    return r, decay


def values_at(r, ts, o, row=0):
    """synth's piecewise polynomial of response ``o`` at times ts (inside its steps)."""
    k = np.searchsorted(r.t[row], ts + 1e-9 * r.h[row, 0], side="right") - 1   # a grid point: the step after it
    sig = (ts - r.t[row, k]) / r.h[row, k]
    return np.array([np.polyval(r.coef[row, kk, o][::-1], s) for kk, s in zip(k, sig)])


LOOPS = {
    # SIMC PI on e^-s/(1+0.1s) and e^-s/(1+s) (Skogestad, J. Process Control 13, 2003; REFERENCES.md)
    "simc_fast_lag": ([1.0], [0.1, 1.0], 1.0, [0.05 * 0.1, 0.05], [0.1, 0.0]),
    "simc_unit_lag": ([1.0], [1.0, 1.0], 1.0, [0.5, 0.5], [1.0, 0.0]),
    # PI on 2 e^-0.4s/(3s+1) (issue 8)
    "pi_slow_lag": ([2.0], [3.0, 1.0], 0.4, [1.5 * 2.0, 1.5], [2.0, 0.0]),
    # unstable plant e^-0.2s/(s-1) under PI (stable: Padé-10 roots, checked below)
    "unstable_pi": ([1.0], [1.0, -1.0], 0.2, [2.0, 0.5], [1.0, 0.0]),
    # integrating plant e^-0.3s/(s(s+1)) under a lead stage 0.8(s+1)/(0.2s+1)
    "integrating_lead": ([1.0], [1.0, 1.0, 0.0], 0.3, [0.8, 0.8], [0.2, 1.0]),
    # second-order plant with a biproper plant zero and a PI-lead controller
    "biproper_plant_lead": ([0.5, 1.0], [1.0, 1.4, 1.0], 0.7, [0.6, 0.9, 0.3], [0.5, 1.0, 0.0]),
}


@pytest.mark.parametrize("name", list(LOOPS))
def test_responses_match_method_of_steps(name):
    pn, pd, theta, cn, cd = LOOPS[name]
    r, decay = synth_pieces(pn, pd, theta, cn, cd)
    assert decay > 0
    assert r.truncation[0] < 1e-10
    horizon = min(r.t[0, -1], 12 * theta + 10.0 / decay)
    ref = DDELoop(pn, pd, theta, cn, cd, 1.0, 0.0, horizon)
    load = DDELoop(pn, pd, theta, cn, cd, 0.0, 1.0, horizon)
    # compare at points strictly inside the steps (no jump ambiguity) over the horizon
    ts = np.linspace(0.013 * theta, horizon * 0.999, 157)
    yr, yd, yu = (values_at(r, ts, o) for o in range(3))
    oy = np.array([ref.y(t) for t in ts])
    od = np.array([load.y(t) for t in ts])
    ou = np.array([ref.u(t) for t in ts])
    for mine, theirs, lab in ((yr, oy, "r->y"), (yd, od, "d->y"), (yu, ou, "r->u")):
        scale = np.abs(theirs).max()
        np.testing.assert_allclose(mine, theirs, rtol=0, atol=1e-8 * scale, err_msg=lab)


@pytest.mark.parametrize("name, iae, peak", [
    ("simc_fast_lag", 2.16755, 0.99995),   # REFERENCES.md, recomputed (method of steps, solve_ivp)
    ("simc_unit_lag", 2.03500, 0.72428),
])
def test_simc_load_iae_and_peak(name, iae, peak):
    pn, pd, theta, cn, cd = LOOPS[name]
    decay = pade_decay(pn, pd, theta, cn, cd)
    m = delay_time_metrics(pn, pd, np.atleast_2d(cn), np.atleast_2d(cd), theta, np.array([decay]), 0.02)
    assert m["disturbance_iae"][0] == pytest.approx(iae, abs=6e-6)
    assert m["disturbance_peak"][0] == pytest.approx(peak, abs=6e-6)
    # and against the oracle itself to 1e-7 (oracle horizon 30 decays: tail below 1e-12)
    load = DDELoop(pn, pd, theta, cn, cd, 0.0, 1.0, 30 / decay)
    assert m["disturbance_iae"][0] == pytest.approx(oracle_iae(load, 30 / decay), rel=1e-7)
    tt = np.linspace(0, 6 * theta, 601)
    assert m["disturbance_peak"][0] == pytest.approx(oracle_peak(load.y, tt), rel=1e-7)


def test_control_peak_of_pi_on_slow_lag():
    # issue 8: 2 e^-0.4s/(3s+1) with 1.5(2s+1)/(2s): control peak 1.800 (the PI output ramps
    # for the whole dead time before feedback arrives: u(0.4) = 1.5 (1 + 0.4/2) = 1.8)
    pn, pd, theta, cn, cd = LOOPS["pi_slow_lag"]
    decay = pade_decay(pn, pd, theta, cn, cd)
    m = delay_time_metrics(pn, pd, np.atleast_2d(cn), np.atleast_2d(cd), theta, np.array([decay]), 0.02)
    assert m["control_peak"][0] == pytest.approx(1.5 * (1 + 0.4 / 2), rel=1e-9)


@pytest.mark.parametrize("K, tau, theta, kc", [(1.0, 1.0, 1.0, 0.5), (2.0, 0.5, 0.3, 0.4), (0.7, 3.0, 2.0, 1.2)])
def test_fopdt_p_control_closed_form(K, tau, theta, kc):
    # First-order plus dead time K e^{-theta s}/(tau s + 1) under P control kc, unit reference
    # step, method of steps by hand: y = 0 on [0, theta); on [theta, 2 theta] the plant sees
    # u = kc: y = a (1 - e^{-t'/tau}), a = K kc, t' = t - theta; on [2 theta, 3 theta] it sees
    # kc (1 - y(t - theta)) = kc (1 - a + a e^{-t''/tau}), t'' = t - 2 theta, so
    # y = y(2 theta) e^{-t''/tau} + a (1 - a)(1 - e^{-t''/tau}) + a^2 (t''/tau) e^{-t''/tau}
    # (the response of 1/(tau s + 1) to e^{-t/tau} is (t/tau) e^{-t/tau}). Load step: y =
    # K (1 - e^{-t'/tau}) on [theta, 2 theta].
    a = K * kc
    r, _ = synth_pieces([K], [tau, 1.0], theta, [kc], [1.0])
    ts = np.linspace(0, 3 * theta, 301)[1:-1]
    y, yd, u = (values_at(r, ts, o) for o in range(3))
    t1, t2 = ts - theta, ts - 2 * theta
    y2 = a * (1 - np.exp(-theta / tau))
    exact = np.where(ts < theta, 0.0, np.where(ts < 2 * theta, a * (1 - np.exp(-t1 / tau)),
                     y2 * np.exp(-t2 / tau) + a * (1 - a) * (1 - np.exp(-t2 / tau))
                     + a * a * (t2 / tau) * np.exp(-t2 / tau)))
    np.testing.assert_allclose(y, exact, rtol=0, atol=1e-12 * max(1.0, a))
    np.testing.assert_allclose(u[ts < 2 * theta], kc * (1 - exact[ts < 2 * theta]), rtol=0, atol=1e-12)
    sel = ts < 2 * theta
    exact_d = np.where(ts < theta, 0.0, K * (1 - np.exp(-t1 / tau)))
    np.testing.assert_allclose(yd[sel], exact_d[sel], rtol=0, atol=1e-12 * K)


@pytest.mark.parametrize("name", ["simc_fast_lag", "simc_unit_lag", "pi_slow_lag", "unstable_pi"])
def test_integrated_error_is_one_over_ki(name):
    # IE = int y dt = 1/ki for a unit load step under PI control (Astrom & Hagglund, Advanced
    # PID Control, ISA 2006, value from memory: the final-value theorem on P/(s(1 + PC)))
    pn, pd, theta, cn, cd = LOOPS[name]
    ki = cn[-1] / cd[0]
    r, _ = synth_pieces(pn, pd, theta, cn, cd)
    assert delay_integral(r, 1)[0] == pytest.approx(1.0 / ki, rel=1e-5)


@pytest.mark.parametrize("name", ["unstable_pi", "integrating_lead", "biproper_plant_lead", "pi_slow_lag"])
def test_metrics_against_oracle(name):
    pn, pd, theta, cn, cd = LOOPS[name]
    decay = pade_decay(pn, pd, theta, cn, cd)
    m = delay_time_metrics(pn, pd, np.atleast_2d(cn), np.atleast_2d(cd), theta, np.array([decay]), 0.02)
    horizon = 24 / decay
    ref = DDELoop(pn, pd, theta, cn, cd, 1.0, 0.0, horizon)
    load = DDELoop(pn, pd, theta, cn, cd, 0.0, 1.0, horizon)
    tt = np.linspace(0, horizon, 4001)[:-1]
    yf = np.polyval(pn, 0) * np.polyval(cn, 0) / (np.polyval(pd, 0) * np.polyval(cd, 0) + np.polyval(pn, 0) * np.polyval(cn, 0))
    peak = oracle_peak(ref.y, tt)
    over = max(0.0, (peak - abs(yf)) / abs(yf) * 100)
    assert m["overshoot_pct"][0] == pytest.approx(over, rel=1e-7, abs=1e-7)
    assert m["disturbance_peak"][0] == pytest.approx(oracle_peak(load.y, tt), rel=1e-7)
    assert m["control_peak"][0] == pytest.approx(max(oracle_peak(ref.u, tt), abs(ref.u(horizon))), rel=1e-7)
    # settling: last exit from the 2 % band, refined by brentq on the oracle
    yv = np.array([ref.y(t) for t in tt])
    out = np.flatnonzero(np.abs(yv - yf) > 0.02 * abs(yf))
    j = out[-1]
    ts = optimize.brentq(lambda t: abs(ref.y(t) - yf) - 0.02 * abs(yf), tt[j], tt[j + 1], xtol=1e-13)
    assert m["settling_time_s"][0] == pytest.approx(ts, rel=1e-7)
    # rise time 10-90 %
    def first(level):
        i = int(np.argmax(np.sign(yf) * yv >= level))
        return optimize.brentq(lambda t: np.sign(yf) * ref.y(t) - level, tt[i - 1], tt[i], xtol=1e-13)
    tr = first(0.9 * abs(yf)) - first(0.1 * abs(yf))
    assert m["rise_time_s"][0] == pytest.approx(tr, rel=1e-7)
    if np.polyval(cd, 0) == 0:     # integral action: the load is rejected, IAE finite
        assert m["disturbance_iae"][0] == pytest.approx(oracle_iae(load, horizon), rel=1e-6)


def test_batch_of_mixed_controllers_equals_one_at_a_time():
    # batching (grouping by grid, padding) must not change any row
    pn, pd, theta = [1.0], [1.0, 1.0], 1.0
    cn = np.array([[0.0, 0.5, 0.5], [0.0, 0.3, 0.2], [0.6, 0.9, 0.3], [0.0, 0.0, 0.4]])
    cd = np.array([[0.0, 1.0, 0.0], [0.0, 1.0, 0.0], [0.5, 1.0, 0.0], [0.0, 0.0, 1.0]])
    decay = np.array([pade_decay(pn, pd, theta, np.trim_zeros(a, "f"), np.trim_zeros(b, "f")) for a, b in zip(cn, cd)])
    allm = delay_time_metrics(pn, pd, cn, cd, theta, decay, 0.02)
    for i in range(4):
        one = delay_time_metrics(pn, pd, cn[i:i + 1], cd[i:i + 1], theta, decay[i:i + 1], 0.02)
        for key, v in one.items():
            assert allm[key][i] == pytest.approx(v[0], rel=1e-12, abs=1e-300) or (np.isinf(v[0]) and np.isinf(allm[key][i])), key


# ------------------------------------------------------------------ residue tail
# A PI with a slow zero on e^-0.5s/(s+1) (invented): a slow closed-loop root near -0.02 sets a
# horizon of ~1,000 s, far past the method of steps' head of 128 dead times (64 s).
SLOW = ([1.0], [1.0, 1.0], 0.5, [0.6, 0.6 * 0.05], [1.0, 0.0])


def test_residue_tail_takes_over_and_matches_the_oracle():
    pn, pd, theta, cn, cd = SLOW
    r, decay = synth_pieces(pn, pd, theta, cn, cd, tail=True)
    assert r.t[0, -1] >= 19.9 / decay                   # covers the whole horizon
    assert r.h[0].max() > 10 * r.h[0].min()             # the tail's steps grew
    head_end = r.t[0][np.argmax(r.h[0] != r.h[0, 0])]
    assert head_end < 100.0                             # the tail took over after the head
    horizon = head_end + 60.0                           # oracle across the switch and 60 s beyond
    ref = DDELoop(pn, pd, theta, cn, cd, 1.0, 0.0, horizon)
    load = DDELoop(pn, pd, theta, cn, cd, 0.0, 1.0, horizon)
    ts = np.linspace(0.5 * head_end, horizon * 0.999, 211)
    for o, f in ((0, ref.y), (1, load.y), (2, ref.u)):
        theirs = np.array([f(t) for t in ts])
        scale = max(np.abs(theirs).max(), 1e-3)
        np.testing.assert_allclose(values_at(r, ts, o), theirs, rtol=0, atol=1e-8 * scale)


def test_residue_tail_keeps_the_integral_and_the_metrics():
    # IE = 1/ki over the whole horizon (Astrom & Hagglund 2006, value from memory) with the tail;
    # every metric as from the method of steps alone (checked against the oracle above)
    pn, pd, theta, cn, cd = SLOW
    r, decay = synth_pieces(pn, pd, theta, cn, cd, tail=True)
    assert delay_integral(r, 1)[0] == pytest.approx(cd[0] / cn[-1], rel=1e-7)
    starts = pade_roots(pn, pd, theta, cn, cd)[None, :]
    args = (pn, pd, np.atleast_2d(cn), np.atleast_2d(cd), theta, np.array([decay]), 0.02)
    with_tail, steps_only = delay_time_metrics(*args, starts=starts), delay_time_metrics(*args)
    for key, v in steps_only.items():
        assert with_tail[key][0] == pytest.approx(v[0], rel=1e-8, abs=1e-12), key


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(-3.0, -0.01), st.floats(0.0, 20.0), st.floats(-2.0, 2.0), st.floats(-2.0, 2.0)),
                min_size=1, max_size=5), st.floats(0.0, 50.0))
def test_rest_bounds_dominate_the_expansion_after_the_cut(terms, t_end):
    # triangle inequality: |sum r_k e^(s_k t)| <= sum |r_k| e^(Re s_k t_end) for t >= t_end (checked
    # on a dense grid), and the integral bound is the integral of sum |r_k| e^(Re s_k t) from t_end
    # to infinity (checked by scipy.integrate.quad)
    s = np.array([complex(a, b) for a, b, _, _ in terms])
    r = np.array([complex(c, d) for _, _, c, d in terms])
    res = np.broadcast_to(r, (1, 3, r.size)).copy()
    bound = dt._rest_bounds(res, s[None, :], np.array([t_end]), np.array([1e9]))
    def y(t):
        return abs(np.sum(r * np.exp(s * t)).real)
    ts = t_end + np.linspace(0.0, 40.0 / min(-s.real), 4001)
    assert max(y(t) for t in ts) <= bound[0, 0, 0] * (1 + 1e-12) + 1e-300
    envelope = integrate.quad(lambda t: float(np.sum(np.abs(r) * np.exp(s.real * t))), t_end, np.inf,
                              epsabs=0.0, epsrel=1e-11)[0]
    assert bound[0, 1, 0] == pytest.approx(envelope, rel=1e-8, abs=1e-300)
    assert np.all(dt._rest_bounds(res, s[None, :], np.array([t_end]), np.array([t_end]))[0] == 0.0)


def test_metrics_stand_after_a_cut_only_where_the_rest_cannot_change_them():
    # the same pieces with no rest, a negligible rest and a large rest after the last step
    pn, pd, theta, cn, cd = SLOW
    r, decay = synth_pieces(pn, pd, theta, cn, cd, tail=True)
    K = int(np.sum(r.h[0] > 0))
    args = (r.coef[0, :K], r.h[0, :K], r.t[0, :K], np.array([K]), r.final, 0.02)
    plain = dt.metrics_from_pieces(*args)
    tiny = dt.metrics_from_pieces(*args, rest=np.full((1, 2, 3), 1e-16))
    large = dt.metrics_from_pieces(*args, rest=np.full((1, 2, 3), 10.0))
    assert all(np.array_equal(plain[k], tiny[k], equal_nan=True) for k in plain)
    for k in ("settling_time_s", "overshoot_pct", "disturbance_peak", "disturbance_settling_time_s",
              "disturbance_iae", "control_peak"):
        assert np.isinf(large[k][0]), k
    assert large["rise_time_s"][0] == plain["rise_time_s"][0]      # reached before the cut: it stands


def test_method_of_steps_cut_short_reports_no_optimistic_figures(monkeypatch):
    # FAST_FILTER without tail starts, its steps capped well before the horizon: the IAE and the
    # settling times cannot be established (inf), the rise time reached early still stands
    pn, pd, theta, cn, cd = FAST_FILTER
    decay = pade_decay(pn, pd, theta, cn, cd)
    args = (np.asarray(pn, float), np.asarray(pd, float), np.atleast_2d(cn), np.atleast_2d(cd), theta,
            np.array([decay]), 0.02)
    full = delay_time_metrics(*args)
    monkeypatch.setattr(dt, "MAX_INTERVALS", 600)
    cut = delay_time_metrics(*args)
    for k in ("disturbance_iae", "settling_time_s", "disturbance_settling_time_s"):
        assert np.isfinite(full[k][0]) and np.isinf(cut[k][0]), k
    assert cut["rise_time_s"][0] == pytest.approx(full["rise_time_s"][0], rel=1e-12)
    assert cut["horizon_cut"][0] and not full["horizon_cut"][0]


def test_residue_tail_refused_when_a_root_is_missing():
    # without the slow root among the starting points the expansion cannot match the head's
    # last dead time: the method of steps must run to the horizon instead
    pn, pd, theta, cn, cd = SLOW
    decay = pade_decay(pn, pd, theta, cn, cd)
    roots = pade_roots(pn, pd, theta, cn, cd)
    starts = roots[np.argsort(roots.real)][None, :-1]   # drop the rightmost (the slow root)
    r = delay_step_responses(np.asarray(pn, float), np.asarray(pd, float), np.atleast_2d(cn),
                             np.atleast_2d(cd), theta, np.array([decay]), starts=starts)
    assert np.all(r.h[0] == r.h[0, 0])


# ------------------------------------------------------------------ graded steps
# PID with a fast derivative filter (Tf = 2 ms, pole at 500 rad/s) on e^-s/(s+1) (invented):
# uniform steps would need 1,024 per dead time; the graded grid is short only after each
# multiple of the dead time, where the filter's transient is excited.
FAST_FILTER = ([1.0], [1.0, 1.0], 1.0,
               list(np.polyadd(np.polymul([0.4, 0.0], [0.002, 1.0]), np.polyadd(np.polymul([0.5], [1.0, 0.0]), [0.3]))),
               list(np.polymul([1.0, 0.0], [0.002, 1.0])))


def test_graded_steps_match_the_oracle():
    pn, pd, theta, cn, cd = FAST_FILTER
    r, decay = synth_pieces(pn, pd, theta, cn, cd)
    h = r.h[0][r.h[0] > 0]
    assert h.min() < theta / 500 and h.max() >= theta / 64 * 0.99     # graded, then uniform
    assert np.sum(r.t[0] < theta) < 200                                # not 1,024 per dead time
    assert r.truncation[0] < 1e-10
    horizon = min(r.t[0, -1], 12 * theta)
    ref = DDELoop(pn, pd, theta, cn, cd, 1.0, 0.0, horizon)
    load = DDELoop(pn, pd, theta, cn, cd, 0.0, 1.0, horizon)
    ts = np.concatenate([np.linspace(0.013, horizon * 0.999, 150),
                         np.arange(1, 10) * theta + 1e-3])             # just after the jumps
    for o, f in ((0, ref.y), (1, load.y), (2, ref.u)):
        theirs = np.array([f(t) for t in ts])
        scale = np.abs(theirs).max()
        np.testing.assert_allclose(values_at(r, ts, o), theirs, rtol=0, atol=1e-8 * scale)


def test_midpoint_taylor_coefficients_change_basis_exactly():
    # the tail's polynomials are expanded about each step's midpoint and written in powers of
    # the local time: sum_i c_i (sigma - 1/2)^i must equal sum_j (c @ _FROM_MID)_j sigma^j
    # (checked against numpy's own polynomial composition)
    rng = np.random.default_rng(3)
    c = rng.normal(size=dt.DEGREE + 1)
    shifted = np.polynomial.Polynomial(c)(np.polynomial.Polynomial([-0.5, 1.0]))   # composition
    np.testing.assert_allclose((c @ dt._FROM_MID), shifted.coef, rtol=1e-13, atol=1e-15)
