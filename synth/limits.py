"""Fundamental limits that no stabilising LTI controller can beat.

Interpolation bounds (Skogestad & Postlethwaite, *Multivariable Feedback Control*,
2nd ed. 2005, ch. 5; Zames 1981): S(z) = 1 at a right-half-plane zero z and
T(p) = 1 at a right-half-plane pole p, so by the maximum modulus principle

    ||S||inf >= prod_i |z + conj(p_i)| / |z - p_i|        (one RHP zero z, RHP poles p_i)
    ||T||inf >= prod_j |conj(z_j) + p| / |z_j - p| * e^(p theta)   (one RHP pole p, dead time theta)

and the bandwidth rules of thumb (common practice, same chapter): crossover
below z/2 for a real RHP zero, below 1/theta for dead time, above 2p for a real
RHP pole.
"""

from __future__ import annotations

import numpy as np

from .lti import TransferFunction


def rhp_roots(plant: TransferFunction, tol: float = 1e-9) -> tuple[np.ndarray, np.ndarray]:
    """(RHP zeros, RHP poles) of the plant, open right half plane."""
    z = plant.zeros
    p = plant.poles
    return z[z.real > tol * np.maximum(1, abs(z))], p[p.real > tol * np.maximum(1, abs(p))]


def sensitivity_bound(plant: TransferFunction) -> float:
    """Largest interpolation lower bound on the peak of |S| over the plant's RHP zeros (>= 1)."""
    zs, ps = rhp_roots(plant)
    best = 1.0
    for z in zs:
        b = np.prod([abs(z + np.conj(p)) / abs(z - p) for p in ps]) if len(ps) else 1.0
        best = max(best, float(b))
    return best


def complementary_bound(plant: TransferFunction) -> float | None:
    """Largest interpolation lower bound on the peak of |T| over the plant's RHP poles (>= 1).

    None for a plant without RHP poles: then no bound exists (a small enough gain makes
    |T| as small as one likes), so none is claimed.
    """
    zs, ps = rhp_roots(plant)
    if not len(ps):
        return None
    best = 1.0
    for p in ps:
        b = np.prod([abs(np.conj(z) + p) / abs(z - p) for z in zs]) if len(zs) else 1.0
        best = max(best, float(b * np.exp(p.real * plant.delay)))
    return best


def plant_limits(plant: TransferFunction, requirements: dict) -> list[str]:
    """Plain-words statements of the limits that apply, with the requirement they bound."""
    zs, ps = rhp_roots(plant)
    out = []
    ms = sensitivity_bound(plant)
    if ms > 1.0 + 1e-9:
        lim = requirements.get("max_sensitivity_peak")
        out.append(f"the RHP zero-pole pair bounds the sensitivity peak: Ms >= {ms:.4g} for any stabilising "
                   "controller (Skogestad & Postlethwaite 2005, ch. 5)"
                   + (f"; max_sensitivity_peak = {lim:g} is out of reach" if lim is not None and lim < ms else ""))
    mt = complementary_bound(plant)
    if mt is not None and mt > 1.0 + 1e-9:
        lim = requirements.get("max_complementary_peak")
        out.append(f"the RHP pole(s) bound the complementary sensitivity peak: Mt >= {mt:.4g}"
                   + (f"; max_complementary_peak = {lim:g} is out of reach" if lim is not None and lim < mt else ""))
    for z in zs:
        if abs(z.imag) < 1e-12:
            out.append(f"RHP zero at s = {z.real:.4g}: keep the crossover below about {z.real / 2:.4g} rad/s "
                       "(common practice)")
    for p in ps:
        if abs(p.imag) < 1e-12:
            out.append(f"RHP pole at s = {p.real:.4g}: the crossover must exceed about {2 * p.real:.4g} rad/s "
                       "(common practice)")
    if plant.delay:
        out.append(f"dead time {plant.delay:g} s: keep the crossover below about {1 / plant.delay:.4g} rad/s "
                   "(common practice)")
    return out
