"""Classical first guesses computed from the requirements, before any random search.

Two textbook constructions, each over a small grid of targets:

* frequency response: pick a crossover w_c, supply the phase needed for the
  phase-margin target with lead stages (largest lead of one stage at
  sin(phi) = (a - 1)/(a + 1), zero w_c/sqrt(a), pole w_c sqrt(a)), put lag stages
  a decade below w_c, and set the gain for |L(j w_c)| = 1. A second placement
  uses each lag as a roll-off: its pole below w_c and its zero at the largest
  admissible ratio above, so the loop gain keeps falling through and past the
  crossover (gain stabilisation of a lightly damped mode above it, common
  practice); the lead stages then make up the lag's phase at w_c;
* root locus: place dominant poles s_d for the damping and settling targets,
  meet the angle condition with the lead stages and the magnitude condition
  with the gain.

Both are standard (Ogata, *Modern Control Engineering*, 5th ed. 2010, ch. 6-7;
Franklin, Powell & Emami-Naeini, *Feedback Control of Dynamic Systems*, ch. 5-6).
PID/PI seeds set the integral and derivative corners relative to w_c and the
gain from the magnitude condition. Seeds are a few hundred parameter vectors;
their construction is not in the hot path.
"""

from __future__ import annotations

import numpy as np

from ..lti import TransferFunction
from .space import Space

MAX_STAGE_LEAD_DEG = 70.0
LAG_SPACING = 10.0          # lag zero a decade below the crossover (common practice)
LAG_RATIO = 10.0
ROLL_OFF_BELOW = (3.0, 10.0)   # roll-off lag: pole this factor below the crossover


def _phase(plant: TransferFunction, s: np.ndarray) -> np.ndarray:
    """Continuous (unwrapped) phase of the plant at points s, from its zeros and poles, radians."""
    s = np.asarray(s, complex)
    ph = np.zeros(s.shape)
    for z in plant.zeros:
        ph += np.angle(s - z)
    for p in plant.poles:
        ph -= np.angle(s - p)
    ph -= plant.delay * s.imag
    if plant.gain < 0:
        ph += np.pi
    return ph


def _unit_loop_gain(plant: TransferFunction, fam, p: np.ndarray, s: complex) -> np.ndarray | None:
    """Set the gain parameter so that |L(s)| = 1 at the point s (magnitude condition)."""
    p = p.copy()
    p[0] = 0.0
    num, den = fam.controllers(p[None, :])
    mag = abs(np.polyval(num[0], s) / np.polyval(den[0], s) * plant(s))
    if not np.isfinite(mag) or mag == 0:
        return None
    p[0] = -np.log10(mag)
    return p


def _target_damping(req: dict) -> float:
    z = req.get("min_damping", 0.0)
    os_ = req.get("max_overshoot_pct")
    if os_ is not None and os_ > 0:
        lnr = np.log(os_ / 100.0)
        z = max(z, -lnr / np.sqrt(np.pi ** 2 + lnr ** 2))   # second-order overshoot law, inverted
    elif os_ is not None:
        z = max(z, 0.9)
    return float(np.clip(max(z, 0.45) + 0.05, 0.3, 0.95))


def frequency_seeds(plant: TransferFunction, space: Space, req: dict, n_w: int = 24) -> np.ndarray:
    """Lead/lag designs from the phase-margin condition over a grid of crossovers."""
    fam = space.family
    f0, f1 = space.log_freq
    wcs = np.logspace(f0 + 0.3, f1 - 0.3, n_w)
    pm_req = req.get("min_phase_margin_deg", 45.0)
    lead_cols = [(zc, pc) for role, zc, pc in fam.pairs if role == "lead"]
    lag_cols = [(zc, pc) for role, zc, pc in fam.pairs if role == "lag"]
    out = []
    placements = [("classical", 0.0)] + ([("roll-off", q) for q in ROLL_OFF_BELOW] if lag_cols else [])
    for wc, (place, q), pm in ((w, pl, m) for w in wcs for pl in placements
                              for m in (pm_req + 5, pm_req + 15, pm_req + 30)):
        sp = _phase(plant * fam.sign, np.array([1j * wc]))[0]
        if place == "classical":
            lag_phase = -np.radians(6) * len(lag_cols)
            lag_corners = (wc / LAG_SPACING, wc / LAG_SPACING / LAG_RATIO)
        else:
            pole = wc / q
            zero = min(pole * 10 ** space.log_ratio, 10 ** space.log_freq[1])
            lag_phase = (np.arctan(wc / zero) - np.arctan(wc / pole)) * len(lag_cols)
            lag_corners = (zero, pole)
        need = np.radians(pm) - (np.pi + sp) + np.radians(90 * fam.integrator) - lag_phase
        need = (need + np.pi) % (2 * np.pi) - np.pi
        p = np.zeros(fam.dim)
        if lead_cols:
            each = need / len(lead_cols)
            if each > np.radians(MAX_STAGE_LEAD_DEG):
                continue
            each = max(each, np.radians(3.0))
            a = (1 + np.sin(each)) / (1 - np.sin(each))
            for zc, pc in lead_cols:
                p[zc], p[pc] = np.log10(wc / np.sqrt(a)), np.log10(wc * np.sqrt(a))
        elif need > np.radians(10):
            continue
        for zc, pc in lag_cols:
            p[zc], p[pc] = np.log10(lag_corners[0]), np.log10(lag_corners[1])
        p = _unit_loop_gain(plant, fam, p, 1j * wc)
        if p is not None:
            out.append(p)
    return np.array(out).reshape(-1, fam.dim)


def root_locus_seeds(plant: TransferFunction, space: Space, req: dict, n_w: int = 16) -> np.ndarray:
    """Lead designs from the angle and magnitude conditions at desired dominant poles."""
    fam = space.family
    lead_cols = [(zc, pc) for role, zc, pc in fam.pairs if role == "lead"]
    lag_cols = [(zc, pc) for role, zc, pc in fam.pairs if role == "lag"]
    zeta = _target_damping(req)
    sig_min = req.get("min_decay_rate", 0.0)
    ts = req.get("max_settling_time_s")
    if ts:
        sig_min = max(sig_min, 4.0 / ts)                 # 2 % settling estimate 4/(zeta wn)
    f0, f1 = space.log_freq
    sigmas = np.logspace(max(f0, np.log10(max(sig_min, 1e-12) * 1.1)), f1 - 0.5, n_w) if sig_min else \
        np.logspace(f0 + 0.3, f1 - 0.5, n_w)
    out = []
    for sig in sigmas:
        sd = sig * (-1 + 1j * np.tan(np.arccos(zeta)))
        base = np.zeros(fam.dim)
        for zc, pc in lag_cols:
            z = sig / LAG_SPACING
            base[zc], base[pc] = np.log10(z), np.log10(z / LAG_RATIO)
        num, den = fam.controllers(base[None, :])
        ang = _phase(plant * fam.sign, np.array([sd]))[0] + np.angle(np.polyval(num[0], sd) / np.polyval(den[0], sd))
        need = (np.pi - ang) % (2 * np.pi)
        need = need - 2 * np.pi if need > np.pi else need
        for zfac in (0.3, 0.7, 1.0, 1.5, 3.0):
            p = base.copy()
            ok = True
            if lead_cols:
                each = need / len(lead_cols)
                if not (0 < each < np.radians(80)):
                    ok = False
                for zc, pc in lead_cols:
                    z = zfac * sig
                    th = np.angle(sd + z) - each
                    if not (0 < th < np.pi):
                        ok = False
                        break
                    pole = sd.imag / np.tan(th) - sd.real
                    if pole <= z:
                        ok = False
                        break
                    p[zc], p[pc] = np.log10(z), np.log10(pole)
            elif abs(need) > np.radians(5):
                ok = False
            if not ok:
                continue
            p = _unit_loop_gain(plant, fam, p, sd)
            if p is not None:
                out.append(p)
    return np.array(out).reshape(-1, fam.dim)


def pid_seeds(plant: TransferFunction, space: Space, req: dict, n_w: int = 20) -> np.ndarray:
    """PI/PID designs: corners placed relative to a grid of crossovers, gain from |L(j w_c)| = 1."""
    fam = space.family
    f0, f1 = space.log_freq
    out = []
    for wc in np.logspace(f0 + 0.3, f1 - 0.3, n_w):
        pmag = abs(plant(1j * wc))
        if not np.isfinite(pmag) or pmag == 0:
            continue
        for r in (2.0, 4.0, 8.0):
            wi = wc / r
            if fam.kind == "pi":
                cmag = abs(1 + wi / (1j * wc))
                kp = 1 / (pmag * cmag)
                out.append([np.log10(kp), np.log10(kp * wi)])
                continue
            for m in (0.5, 1.0, 2.0):
                wd = wc * m
                nfilt = 10.0
                td = 1 / wd
                tf = td / nfilt
                cmag = abs(1 + wi / (1j * wc) + 1j * wc * td / (1 + 1j * wc * tf))
                kp = 1 / (pmag * cmag)
                out.append([np.log10(kp), np.log10(kp * wi), np.log10(kp * td), np.log10(tf)])
    return np.array(out).reshape(-1, fam.dim)


def seeds(plant: TransferFunction, space: Space, req: dict) -> np.ndarray:
    """All classical seeds for the family, mapped through the search box (admissible, in bounds)."""
    if space.family.kind == "lead-lag":
        raw = np.vstack([frequency_seeds(plant, space, req), root_locus_seeds(plant, space, req)])
    else:
        raw = pid_seeds(plant, space, req)
    raw = raw[np.all(np.isfinite(raw), axis=1)]
    if raw.size == 0:
        return raw.reshape(0, space.dim)
    return space.decode(space.encode(raw))
