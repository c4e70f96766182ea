"""Published PID tuning rules and model reduction, as pure functions (yardsticks for benchmarks).

Every rule returns parallel-form gains ``Gains(kp, ki, kd, tf)`` for synth's PID family
``kp + ki/s + kd s/(tf s + 1)`` (:class:`synth.structures.Family`), usable as
``Family("pid").params_from_pid(*gains)`` or, for PI rules (``kd = tf = 0``),
``Family("pi").params_from_pid(kp, ki)``. :func:`pid_polynomials` gives the controller
polynomials for :func:`synth.evaluate.evaluate_controllers` directly (also when
``kp = 0``, the pure integral controller SIMC gives for a pure dead time, which the log10
parameters of a family cannot hold).

Sources (the formulas are implemented from these papers; nothing is taken from a
control-design or PID-tuning package):

* SIMC and the half rule: S. Skogestad, "Simple analytic rules for model reduction and
  PID controller tuning", J. Process Control 13 (2003) 291-309.
* AMIGO: K. J. Astrom, T. Hagglund, "Revisiting the Ziegler-Nichols step response method
  for PID control", J. Process Control 14 (2004) 635-650.
* Ziegler-Nichols frequency-response method: J. G. Ziegler, N. B. Nichols, "Optimum
  settings for automatic controllers", Trans. ASME 64 (1942) 759-768.
* Method of areas (FOPDT fit when the half rule does not apply): K. J. Astrom,
  T. Hagglund, *PID Controllers: Theory, Design and Tuning*, 2nd ed., ISA 1995, sec. 2.7.

Derivative filter: a rule that gives an unfiltered derivative ``Td`` gets
``tf = Td/10`` where ``Td = kd/kp`` is the derivative time of the parallel (ideal)
form, i.e. the filter constant N = kd/(kp tf) = 10 (a usual choice, Astrom & Hagglund
2006 give N = 2..20; synth's PID space spans N = 2..100). The filter slightly changes
the loop the rule was derived for; the benchmarks evaluate the filtered controller.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from scipy.linalg import expm
from scipy.optimize import brentq

from .lti import TransferFunction

DERIVATIVE_FILTER_N = 10.0
_REAL_TOL = 1e-7           # |Im r| <= tol * max(1, |r|): the root is real
_ZERO_TOL = 1e-10          # |r| <= tol: the root is at s = 0
MAX_HALF_RULE_ITER = 100   # fixed-point iterations on theta for rules T1-T3
CLUSTER_TOL = 0.05         # roots this close (relative) are one multiple root


class Gains(NamedTuple):
    """Parallel-form PID gains: C(s) = kp + ki/s + kd s/(tf s + 1) (kd = tf = 0 for PI)."""

    kp: float
    ki: float
    kd: float = 0.0
    tf: float = 0.0


class Model(NamedTuple):
    """Reduced model k e^(-theta s)/((tau1 s + 1)(tau2 s + 1)).

    ``tau1 = inf`` marks an integrating model k' e^(-theta s)/(s (tau2 s + 1)), with ``k``
    then the integrating (velocity) gain k'. ``tau2 = 0`` for a first-order model.
    """

    k: float
    tau1: float
    tau2: float
    theta: float


# ------------------------------------------------------------------ form conversions
def pid_polynomials(g: Gains) -> tuple[np.ndarray, np.ndarray]:
    """Numerator and denominator of kp + ki/s + kd s/(tf s + 1), synth's PID layout."""
    kp, ki, kd, tf = (float(x) for x in g)
    if kd == 0.0:
        return np.array([kp, ki]), np.array([1.0, 0.0])
    return np.array([kp * tf + kd, kp + ki * tf, ki]), np.array([tf, 1.0, 0.0])


def from_ideal(kc: float, ti: float, td: float = 0.0, n: float = DERIVATIVE_FILTER_N) -> Gains:
    """Ideal (ISA) form Kc (1 + 1/(Ti s) + Td s) -> parallel gains, filter tf = Td/n."""
    if td == 0.0:
        return Gains(kc, kc / ti)
    return Gains(kc, kc / ti, kc * td, td / n)


def from_series(kc: float, ti: float, td: float, n: float = DERIVATIVE_FILTER_N) -> Gains:
    """Series (interacting) form Kc (1 + 1/(Ti s))(1 + Td s) -> parallel gains.

    Expanding: Kc (1 + Td/Ti) + Kc/(Ti s) + Kc Td s, so kp = Kc (1 + Td/Ti), ki = Kc/Ti,
    kd = Kc Td; then tf = (kd/kp)/n (filter on the parallel form's derivative time).
    """
    if td == 0.0:
        return Gains(kc, kc / ti)
    kp = kc * (1.0 + td / ti)
    kd = kc * td
    return Gains(kp, kc / ti, kd, kd / kp / n)


# ------------------------------------------------------------------ SIMC (Skogestad 2003)
def _tauc(theta: float, tauc: float | None) -> float:
    tc = theta if tauc is None else float(tauc)
    if not tc + theta > 0:
        raise ValueError("SIMC needs tauc + theta > 0 (the default tauc = theta is 0 for a model "
                         "without dead time: choose tauc > 0)")
    return tc


def simc_pi(k: float, tau1: float, theta: float, tauc: float | None = None) -> Gains:
    """SIMC PI for k e^(-theta s)/(tau1 s + 1): Kc = tau1/(k (tauc + theta)),
    Ti = min(tau1, 4 (tauc + theta)), default tauc = theta (Skogestad 2003).

    ``tau1 = 0`` (pure dead time) gives the pure integral controller ki = 1/(k (tauc + theta))
    (the limit of Kc/Ti), ``kp = 0``; ``tau1 = inf`` is the integrating model, see
    :func:`simc_integrating`.
    """
    if math.isinf(tau1):
        return simc_integrating(k, theta, tauc)
    tc = _tauc(theta, tauc)
    if tau1 == 0.0:
        return Gains(0.0, 1.0 / (k * (tc + theta)))
    kc = tau1 / (k * (tc + theta))
    ti = min(tau1, 4.0 * (tc + theta))
    return Gains(kc, kc / ti)


def simc_integrating(k_int: float, theta: float, tauc: float | None = None) -> Gains:
    """SIMC PI for an integrating process k' e^(-theta s)/s: Kc = 1/(k' (tauc + theta)),
    Ti = 4 (tauc + theta), default tauc = theta (Skogestad 2003)."""
    tc = _tauc(theta, tauc)
    kc = 1.0 / (k_int * (tc + theta))
    return Gains(kc, kc / (4.0 * (tc + theta)))


def simc_pid_series(k: float, tau1: float, tau2: float, theta: float, tauc: float | None = None,
                    n: float = DERIVATIVE_FILTER_N) -> Gains:
    """SIMC PID for k e^(-theta s)/((tau1 s + 1)(tau2 s + 1)), tau1 >= tau2 (Skogestad 2003).

    Series form Kc = tau1/(k (tauc + theta)), Ti = min(tau1, 4 (tauc + theta)), Td = tau2,
    converted to synth's parallel form with a derivative filter tf = (kd/kp)/n
    (:func:`from_series`). ``tau1 = inf``: the integrating model k' e^(-theta s)/(s (tau2 s + 1))
    with Kc = 1/(k' (tauc + theta)), Ti = 4 (tauc + theta), Td = tau2, the tau1 -> inf limit of
    the same rule. ``tau2 = 0`` gives the PI rule.
    """
    if tau2 > tau1:
        tau1, tau2 = tau2, tau1
    tc = _tauc(theta, tauc)
    if math.isinf(tau1):
        kc, ti = 1.0 / (k * (tc + theta)), 4.0 * (tc + theta)
    else:
        kc, ti = tau1 / (k * (tc + theta)), min(tau1, 4.0 * (tc + theta))
    return from_series(kc, ti, tau2, n)


# ------------------------------------------------------------------ plant inspection
def _roots(p: np.ndarray) -> np.ndarray:
    """Roots of a polynomial with repeated roots merged: a multiple root comes out of
    np.roots as a small cluster (spread ~ eps^(1/m) for multiplicity m, about 2 % for an
    8-fold root), whose mean is accurate. Roots closer than CLUSTER_TOL (relative) are
    grouped; a group whose mean is real becomes that real root repeated."""
    p = np.trim_zeros(np.asarray(p, float), "f")
    if p.size <= 1:
        return np.zeros(0, complex)
    r = np.roots(p)
    n = r.size
    group = list(range(n))

    def find(i):
        while group[i] != i:
            group[i] = group[group[i]]
            i = group[i]
        return i
    for i in range(n):
        for j in range(i + 1, n):
            if abs(r[i] - r[j]) <= CLUSTER_TOL * max(abs(r[i]), abs(r[j])):
                group[find(i)] = find(j)
    out = r.astype(complex).copy()
    roots_of = {}
    for i in range(n):
        roots_of.setdefault(find(i), []).append(i)
    for members in roots_of.values():
        if len(members) > 1:
            mu = r[members].mean()
            if abs(mu.imag) <= _REAL_TOL * max(1.0, abs(mu)):
                out[members] = mu.real
    return out


def _split_roots(roots: np.ndarray, what: str) -> tuple[int, list[float], list[float]]:
    """(count at s = 0, real LHP roots, real RHP roots); complex roots raise ValueError."""
    at0, lhp, rhp = 0, [], []
    for r in roots:
        if abs(r) <= _ZERO_TOL:
            at0 += 1
        elif abs(r.imag) > _REAL_TOL * max(1.0, abs(r)):
            raise ValueError(f"the half rule needs real {what}; the plant has the complex {what[:-1]} "
                             f"{r.real:.4g}{r.imag:+.4g}j (use fopdt_fit, which falls back to the "
                             "method of areas)")
        elif r.real < 0:
            lhp.append(float(r.real))
        else:
            rhp.append(float(r.real))
    return at0, lhp, rhp


def _low_frequency_gain(plant: TransferFunction, integrators: int) -> float:
    """G(0), or lim s G(s) for one pole at the origin (from the lowest non-zero coefficients)."""
    num, den = plant.num, plant.den
    return float(num[-1] / den[den.size - 1 - integrators])


# ------------------------------------------------------------------ half rule
def _numerator_rule(t0: float, tau0: float, theta: float) -> tuple[float, float | None, str]:
    """Skogestad (2003) rules T1-T3 for (T0 s + 1)/(tau0 s + 1), T0 > 0 [value from memory]:

    T1  T0 >= tau0 >= theta        -> T0/tau0
    T1a T0 >= theta >= tau0        -> T0/theta
    T1b theta >= T0 >= tau0        -> 1
    T2  tau0 >= T0 >= 5 theta      -> T0/tau0
    T3  T0 <= tau~0 = min(tau0, 5 theta) -> (tau~0/tau0)/((tau~0 - T0) s + 1)

    Returns (gain factor, new lag time constant or None, rule name).
    """
    if t0 >= tau0:
        if tau0 >= theta:
            return t0 / tau0, None, "T1"
        if t0 >= theta:
            return t0 / theta, None, "T1a"
        return 1.0, None, "T1b"
    if t0 >= 5.0 * theta:
        return t0 / tau0, None, "T2"
    tt = min(tau0, 5.0 * theta)
    return tt / tau0, tt - t0, "T3"


def _reduce(lags: list[float], integrating: bool, theta0: float, order: int) -> tuple[float, float, float]:
    """Half rule on sorted-descending lags: (tau1, tau2, theta)."""
    lags = sorted(lags, reverse=True)
    keep = (order - 1) if integrating else order      # finite lags kept (integrator is tau1 = inf)
    kept = lags[:keep]
    rest = lags[keep:]
    theta = theta0
    if rest:
        half = rest[0] / 2.0                        # the largest neglected lag is split in two
        theta += half + sum(rest[1:])
        if kept:
            kept[-1] += half
    if integrating:
        return math.inf, (kept[0] if kept else 0.0), theta
    kept = sorted(kept, reverse=True) + [0.0, 0.0]
    return kept[0], kept[1], theta


def half_rule(plant: TransferFunction, order: int = 2) -> Model:
    """Skogestad's half rule (J. Process Control 13, 2003): reduce a plant with real LHP poles
    (at most one pole at s = 0), real zeros and dead time to k e^(-theta s)/((tau1 s+1)(tau2 s+1)).

    * RHP zeros (-T s + 1) become dead time e^(-T s) (inverse response time added to theta);
    * LHP zeros (T0 s + 1) are cancelled against the closest larger lag (else the closest
      smaller one) by rules T1-T3 (:func:`_numerator_rule`), which depend on the final
      effective delay theta: iterated from theta of the plant without its LHP zeros until the
      rule choices repeat;
    * the largest neglected lag is split in two: half to the smallest kept time constant,
      half to theta; the other neglected lags go to theta whole.

    ``order = 1`` returns tau2 = 0. A pole at s = 0 is the kept "infinite" time constant:
    tau1 = inf and ``k`` is the integrating gain k' (for order 2, tau2 is the largest lag plus
    half the next). Raises ValueError for complex or RHP poles, complex zeros, zeros at s = 0
    or more than one pole at s = 0.
    """
    if order not in (1, 2):
        raise ValueError("order must be 1 or 2")
    n_int, lhp_p, rhp_p = _split_roots(_roots(plant.den), "poles")
    if rhp_p:
        raise ValueError(f"the half rule needs a stable plant; it has RHP poles {rhp_p}")
    if n_int > 1:
        raise ValueError("the half rule here handles at most one pole at s = 0")
    z0, lhp_z, rhp_z = _split_roots(_roots(plant.num), "zeros")
    if z0:
        raise ValueError("the plant has a zero at s = 0 (no steady-state gain)")
    integrating = n_int == 1
    k = _low_frequency_gain(plant, n_int)
    lags0 = [-1.0 / p for p in lhp_p]
    theta0 = plant.delay + sum(1.0 / z for z in rhp_z)
    t0s = sorted((-1.0 / z for z in lhp_z), reverse=True)

    _, _, theta = _reduce(lags0, integrating, theta0, order)   # first estimate: LHP zeros ignored
    for _ in range(MAX_HALF_RULE_ITER):
        lags, created, gain = list(lags0), [], 1.0
        for t0 in t0s:                      # each zero against a lag of the plant itself
            if not lags:
                raise ValueError("an LHP zero has no lag left to cancel against")
            larger = [t for t in lags if t >= t0]
            tau0 = min(larger) if larger else max(lags)
            lags.remove(tau0)
            fac, new, _ = _numerator_rule(t0, tau0, theta)
            gain *= fac
            if new is not None and new > 0:
                created.append(new)
        lags += created
        tau1, tau2, new_theta = _reduce(lags, integrating, theta0, order)
        done = abs(new_theta - theta) <= 1e-12 * max(1.0, theta)
        theta = new_theta
        if done or not t0s:
            break
    return Model(k * gain, tau1, tau2, theta)


# ------------------------------------------------------------------ FOPDT for AMIGO
def _impulse_at(num: np.ndarray, den: np.ndarray, t: float) -> float:
    """Impulse response of a strictly proper num/den at time t (exact: matrix exponential)."""
    den = np.trim_zeros(np.asarray(den, float), "f")
    num = np.trim_zeros(np.asarray(num, float), "f")
    num, den = num / den[0], den / den[0]
    n = den.size - 1
    num = np.pad(num, (n - num.size, 0))
    a = np.zeros((n, n))
    a[0, :] = -den[1:]
    a[np.arange(1, n), np.arange(n - 1)] = 1.0
    b = np.zeros(n)
    b[0] = 1.0
    return float(num @ (expm(a * t) @ b))


def areas_fit(plant: TransferFunction) -> tuple[float, float, float]:
    """FOPDT (K, T, L) by the method of areas (Astrom & Hagglund 1995, sec. 2.7).

    K = G(0); T_ar = L + T = -G'(0)/G(0) (the average residence time, exact from the
    polynomials); T = e A1/K with A1 the integral of the step response over [0, T_ar]
    (exact, matrix exponential); L = T_ar - T. Needs an open-loop stable plant with
    G(0) != 0. Raises ValueError when the fitted L is not positive.
    """
    num, den = np.asarray(plant.num, float), np.asarray(plant.den, float)
    if np.any(_roots(den).real >= -_ZERO_TOL):
        raise ValueError("the method of areas needs an open-loop stable plant")
    K = float(num[-1] / den[-1])
    d1 = den[-2] if den.size > 1 else 0.0
    n1 = num[-2] if num.size > 1 else 0.0
    tar = d1 / den[-1] - n1 / num[-1] + plant.delay
    rt = tar - plant.delay
    a1 = _impulse_at(num, np.polymul(den, [1.0, 0.0, 0.0]), rt) if rt > 0 else 0.0
    T = math.e * a1 / K
    L = tar - T
    if not L > 0:
        raise ValueError(f"method of areas: fitted dead time L = {L:.4g} is not positive")
    return K, T, L


def fopdt_fit(plant: TransferFunction) -> tuple[float, float, float]:
    """First-order-plus-dead-time model (K, T, L) of a plant, for AMIGO.

    Choice: Skogestad's first-order half-rule model (:func:`half_rule` with order 1) when it
    applies (real poles and zeros, stable or one pole at s = 0: then T = inf and K is the
    integrating gain); otherwise (complex poles, e.g. a lightly damped resonance) the
    method of areas (:func:`areas_fit`). AMIGO was derived with FOPDT models fitted to step
    responses (Astrom & Hagglund 2004); the half rule is a different, analytic fit, so AMIGO
    results here are "AMIGO on the half-rule model".
    """
    try:
        m = half_rule(plant, order=1)
        return m.k, m.tau1, m.theta
    except ValueError:
        return areas_fit(plant)


# ------------------------------------------------------------------ AMIGO (Astrom & Hagglund 2004)
def amigo_pi(K: float, T: float, L: float) -> Gains:
    """AMIGO PI for K e^(-L s)/(T s + 1) [formulas as recalled in REFERENCES.md]:
    Kc = 0.15/K + (0.35 - L T/(L + T)^2) T/(K L), Ti = 0.35 L + 13 L T^2/(T^2 + 12 L T + 7 L^2).

    ``T = inf`` (integrating model, K the integrating gain k'): the T -> inf limit,
    Kc = 0.35/(k' L), Ti = 13.35 L.
    """
    if not L > 0:
        raise ValueError("AMIGO needs a dead time L > 0")
    if math.isinf(T):
        kc, ti = 0.35 / (K * L), 13.35 * L
    else:
        kc = 0.15 / K + (0.35 - L * T / (L + T) ** 2) * T / (K * L)
        ti = 0.35 * L + 13.0 * L * T ** 2 / (T ** 2 + 12.0 * L * T + 7.0 * L ** 2)
    return Gains(kc, kc / ti)


def amigo_pid(K: float, T: float, L: float, n: float = DERIVATIVE_FILTER_N) -> Gains:
    """AMIGO PID for K e^(-L s)/(T s + 1) [formulas as recalled in REFERENCES.md]:
    Kc = (0.2 + 0.45 T/L)/K, Ti = L (0.4 L + 0.8 T)/(L + 0.1 T), Td = 0.5 L T/(0.3 L + T),
    ideal form, derivative filter tf = Td/n.

    ``T = inf``: the T -> inf limit, Kc = 0.45/(k' L), Ti = 8 L, Td = 0.5 L.
    """
    if not L > 0:
        raise ValueError("AMIGO needs a dead time L > 0")
    if math.isinf(T):
        kc, ti, td = 0.45 / (K * L), 8.0 * L, 0.5 * L
    else:
        kc = (0.2 + 0.45 * T / L) / K
        ti = L * (0.4 * L + 0.8 * T) / (L + 0.1 * T)
        td = 0.5 * L * T / (0.3 * L + T)
    return from_ideal(kc, ti, td, n)


# ------------------------------------------------------------------ Ziegler-Nichols 1942
def _dc_phase(plant: TransferFunction) -> float:
    """Phase of the low-frequency asymptote: 0 or -pi (sign), minus pi/2 per pole at s = 0."""
    num, den = plant.num, plant.den
    tn = num.size - 1 - np.flatnonzero(num)[-1]
    td = den.size - 1 - np.flatnonzero(den)[-1]
    lo = num[num.size - 1 - tn] / den[den.size - 1 - td]
    return -math.pi / 2 * (td - tn) + (0.0 if lo > 0 else -math.pi)


def _phase_grid(plant: TransferFunction, w: np.ndarray) -> np.ndarray:
    """Continuous phase of G(jw) on an increasing grid (radians): the rational part unwrapped
    from direct polynomial evaluation, anchored at the lowest frequency to the asymptote's
    phase, minus the dead-time phase w*theta (exact)."""
    jw = 1j * w
    ph = np.unwrap(np.angle(np.polyval(plant.num, jw))) - np.unwrap(np.angle(np.polyval(plant.den, jw)))
    ph += 2 * math.pi * round((_dc_phase(plant) - ph[0]) / (2 * math.pi))
    return ph - plant.delay * w


def ultimate(plant: TransferFunction, w_max: float | None = None) -> tuple[float, float]:
    """Exact ultimate gain Ku and period Pu: the first frequency w_u where the phase of an
    open-loop stable (or integrating) plant reaches -180 deg, Ku = 1/|G(j w_u)|, Pu = 2 pi/w_u.

    The phase is the continuous sum of zero, pole and dead-time angles; w_u is bracketed on a
    logarithmic grid and solved by Brent's method to machine precision. Raises ValueError for
    plants with RHP poles or with no phase crossover (infinite ultimate gain).
    """
    poles = _roots(plant.den)
    if np.any(poles.real > _ZERO_TOL):
        raise ValueError("the Ziegler-Nichols frequency method needs an open-loop stable plant")
    mags = [abs(r) for r in np.concatenate([poles, _roots(plant.num)]) if abs(r) > _ZERO_TOL]
    lo = 1e-4 * min(mags + ([1.0 / plant.delay] if plant.delay else []) + [1.0])
    hi = w_max or 1e4 * max(mags + ([1.0 / plant.delay] if plant.delay else []) + [1.0])
    w = np.geomspace(lo, hi, 20000)
    ph = _phase_grid(plant, w)
    f = ph + math.pi
    if f[0] <= 0:
        raise ValueError("the phase starts at or below -180 deg")
    idx = np.flatnonzero((f[:-1] > 0) & (f[1:] <= 0))
    if idx.size == 0:
        raise ValueError("the phase never reaches -180 deg: the ultimate gain is infinite")
    i = idx[0]
    ref = ph[i]

    def phase_near(x: float) -> float:
        # continuous inside the bracket: the phase moves less than pi from the grid value there
        return ref + float(np.angle(complex(plant(1j * x)) * np.exp(-1j * ref)))
    wu = brentq(lambda x: phase_near(x) + math.pi, w[i], w[i + 1], xtol=1e-15,
                rtol=4 * np.finfo(float).eps, maxiter=200)
    ku = 1.0 / abs(complex(plant(1j * wu)))
    return ku, 2.0 * math.pi / wu


def zn_pi(Ku: float, Pu: float) -> Gains:
    """Ziegler-Nichols (1942) frequency-response PI: Kc = 0.45 Ku, Ti = Pu/1.2."""
    return from_ideal(0.45 * Ku, Pu / 1.2)


def zn_pid(Ku: float, Pu: float, n: float = DERIVATIVE_FILTER_N) -> Gains:
    """Ziegler-Nichols (1942) frequency-response PID [value from memory]: Kc = 0.6 Ku,
    Ti = Pu/2, Td = Pu/8 (ideal form), derivative filter tf = Td/n."""
    return from_ideal(0.6 * Ku, Pu / 2.0, Pu / 8.0, n)
