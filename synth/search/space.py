"""The search space: a unit cube decoded into admissible compensator parameters.

Every point u in [0, 1]^d decodes to an admissible parameter vector of the
family (lead stages keep zero < pole, lag stages zero > pole, stage ratios within
``max_stage_ratio``), so samplers never waste evaluations on inadmissible
points. Necessary conditions derived from the requirements (final- and
initial-value theorems, static error constants) shrink the gain range before any
search and are reported in plain words.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..lti import TransferFunction
from ..structures import Family

DEFAULT_MAX_RATIO = 1000.0        # pole/zero ratio bound of one stage when the spec gives none
PID_FILTER_RANGE = (2.0, 100.0)   # derivative filter N = kd/(kp tf), common practice


@dataclass(frozen=True)
class Space:
    """Decoder from the unit cube to family parameters, with the bounds that shaped it."""

    family: Family
    log_gain: tuple[float, float]          # log10 of |K| (lead-lag) or kp (pid/pi)
    log_freq: tuple[float, float]          # log10 of the frequency range, rad/s
    log_ratio: float                       # log10 of the largest stage ratio
    notes: tuple[str, ...] = ()
    infeasible: tuple[str, ...] = ()       # necessary conditions that cannot be met at all
    low_gain_min: float | None = None      # log10 lower bound on the low-frequency gain K prod(z/p)
    hf_gain_max: float | None = None       # log10 upper bound on the high-frequency gain C(inf)

    @property
    def dim(self) -> int:
        return self.family.dim

    def decode(self, u: np.ndarray) -> np.ndarray:
        """Map (N, d) unit-cube points to (N, d) admissible parameter vectors.

        Corners are decoded first; the gain coordinate then spans only the gains
        that meet the low-frequency gain bound for those corners, so the bound
        shapes the space instead of rejecting samples.
        """
        u = np.clip(np.atleast_2d(np.asarray(u, float)), 0.0, 1.0)
        f0, f1 = self.log_freq
        out = np.zeros_like(u)
        fam = self.family
        if fam.kind == "lead-lag":
            for role, zc, pc in fam.pairs:
                r = self.log_ratio * u[:, pc]                  # stage ratio, log10
                c = (f0 + r / 2) + (f1 - f0 - r) * u[:, zc]    # centre, kept inside the range
                lo, hi = c - r / 2, c + r / 2
                out[:, zc], out[:, pc] = (lo, hi) if role == "lead" else (hi, lo)
        else:
            out[:, 1] = f0 + (f1 - f0) * u[:, 1]               # log10(ki/kp) for now
            if fam.kind == "pid":
                out[:, 2] = -(f0 + (f1 - f0) * u[:, 2])        # log10(kd/kp) = -log10(w_d)
                n0, n1 = np.log10(PID_FILTER_RANGE)
                out[:, 3] = out[:, 2] - (n0 + (n1 - n0) * u[:, 3])   # log10(tf) = log10(kd/kp / N)
        glo, ghi = self._gain_span(out)
        out[:, 0] = glo + (ghi - glo) * u[:, 0]
        if fam.kind != "lead-lag":
            out[:, 1:] += out[:, :1]                            # ratios to kp -> absolute gains
            if fam.kind == "pid":
                out[:, 3] -= out[:, 0]                          # tf carries no kp
        return out

    def _gain_span(self, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Per-row range of the gain coordinate given decoded corners (ratios to kp for pid/pi)."""
        g0, g1 = self.log_gain
        lo = np.full(p.shape[0], g0)
        hi = np.full(p.shape[0], g1)
        if self.low_gain_min is not None:
            if self.family.kind == "lead-lag":
                shift = sum(p[:, zc] - p[:, pc] for _, zc, pc in self.family.pairs) if self.family.pairs else 0.0
            else:
                shift = p[:, 1]                                 # ki = kp * (ki/kp)
            lo = np.maximum(lo, self.low_gain_min - shift)
        return np.minimum(lo, hi), hi

    def encode(self, params: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`decode` (clipped into the cube) for seeds given as parameters."""
        p = np.atleast_2d(np.asarray(params, float))
        f0, f1 = self.log_freq
        u = np.zeros_like(p)
        rel = p.copy()
        fam = self.family
        if fam.kind == "lead-lag":
            for role, zc, pc in fam.pairs:
                lo = np.minimum(p[:, zc], p[:, pc])
                hi = np.maximum(p[:, zc], p[:, pc])
                r = hi - lo
                u[:, pc] = r / max(self.log_ratio, 1e-12)
                span = f1 - f0 - r
                u[:, zc] = np.where(span > 1e-12, (lo - f0) / np.where(span > 1e-12, span, 1.0), 0.5)
        else:
            rel[:, 1] = p[:, 1] - p[:, 0]
            u[:, 1] = (rel[:, 1] - f0) / (f1 - f0)
            if fam.kind == "pid":
                rel[:, 2] = p[:, 2] - p[:, 0]
                rel[:, 3] = p[:, 3]
                u[:, 2] = (-rel[:, 2] - f0) / (f1 - f0)
                n0, n1 = np.log10(PID_FILTER_RANGE)
                u[:, 3] = (rel[:, 2] - p[:, 3] - n0) / (n1 - n0)
        glo, ghi = self._gain_span(rel)
        u[:, 0] = (p[:, 0] - glo) / np.maximum(ghi - glo, 1e-12)
        return np.clip(u, 0.0, 1.0)

    def prefilter(self, params: np.ndarray) -> np.ndarray:
        """Mask of parameter rows meeting the low-/high-frequency gain bounds (cheap, exact)."""
        p = np.atleast_2d(params)
        ok = np.ones(p.shape[0], bool)
        if self.low_gain_min is not None:
            ok &= low_frequency_gain(self.family, p) >= self.low_gain_min - 1e-12
        if self.hf_gain_max is not None:
            ok &= high_frequency_gain(self.family, p) <= self.hf_gain_max + 1e-12
        return ok


def low_frequency_gain(family: Family, p: np.ndarray) -> np.ndarray:
    """log10 of the controller's low-frequency gain: K prod(z/p) (lead-lag) or ki (pid/pi)."""
    if family.kind == "lead-lag":
        g = p[:, 0].copy()
        for _, zc, pc in family.pairs:
            g += p[:, zc] - p[:, pc]
        return g
    return p[:, 1]


def high_frequency_gain(family: Family, p: np.ndarray) -> np.ndarray:
    """log10 of |C(inf)|: K for a proper lead-lag, kp + kd/tf for the filtered PID, kp for PI."""
    if family.kind == "lead-lag":
        return p[:, 0]
    if family.kind == "pid":
        return np.log10(10 ** p[:, 0] + 10 ** (p[:, 2] - p[:, 3]))
    return p[:, 0]


def gain_sign(plant: TransferFunction) -> tuple[float, str]:
    """Sign of the controller gain from a necessary condition for stability.

    With the denominator's leading coefficient positive, every coefficient of a
    Hurwitz characteristic polynomial is positive (Stodola's condition), and its
    constant term is Dp(0)Dc(0) + K Np(0) Nc(0); for every family here the gain
    sign that can satisfy this with a usable gain is sign(Np(0)) — also when the
    plant or controller has a pole at the origin or an odd number of real RHP poles.
    """
    num = plant.num / plant.den[0]
    n0 = num[-1]
    if n0 == 0:
        n0 = num[np.flatnonzero(num)[-1]]
        return float(np.sign(n0)), "plant has a zero at s = 0: gain sign taken from its lowest non-zero coefficient"
    return float(np.sign(n0)), ""


def build_space(plant: TransferFunction, controller, requirements: dict) -> Space:
    """Family and bounds from the spec's [controller] table, the plant and the requirements.

    ``controller`` is a :class:`synth.spec.ControllerSpec`. Bounds applied:
    gain range from the plant's gain over the frequency range (or ``gain_range``);
    ``max_control_peak`` caps |C(inf)| (initial-value theorem: u(0+) = C(inf) for a
    unit reference step on a strictly proper plant); steady-state error, velocity
    and position constants and the load-step steady state give a lower bound on
    the low-frequency gain (final-value theorem).
    """
    sign, sign_note = gain_sign(plant)
    fam = Family(kind=controller.kind, stages=tuple(controller.stages), integrator=controller.integrator,
                 sign=sign)
    lo, hi = controller.frequency_range_rad_s
    f0, f1 = np.log10(lo), np.log10(hi)
    ratio = controller.max_stage_ratio or min(DEFAULT_MAX_RATIO, hi / lo)
    notes = [sign_note] if sign_note else []
    notes.append(f"controller gain sign {'+' if sign > 0 else '-'} (Stodola: all coefficients of "
                 "a Hurwitz polynomial share one sign)")
    if controller.gain_range:
        g0, g1 = np.log10(controller.gain_range)
    else:
        w = np.logspace(f0, f1, 200)
        mag = np.abs(plant(1j * w))
        mag = mag[np.isfinite(mag) & (mag > 0)]
        inv = -np.log10(mag) if mag.size else np.array([0.0])
        g0, g1 = inv.min() - 2, inv.max() + 2
        g1 = min(g1, g0 + 14)
    strictly_proper = plant.relative_degree >= 1
    infeasible: list[str] = []
    hf_max = None
    umax = requirements.get("max_control_peak")
    # a proper controller with C(inf) != 0 jumps to u(0+) = C(inf); with an integrator it starts at 0
    biproper = not (fam.kind == "lead-lag" and fam.integrator)
    if umax is not None and strictly_proper and biproper:
        hf_max = np.log10(umax)
        if fam.kind == "lead-lag" and hf_max < g1:
            g1 = hf_max
            notes.append(f"max_control_peak = {umax:g}: |K| <= {umax:g} (initial-value theorem, "
                         "u(0+) = K for a unit reference step)")
        elif fam.kind != "lead-lag":
            notes.append(f"max_control_peak = {umax:g}: |C(inf)| <= {umax:g} (initial-value theorem)")
            g1 = min(g1, hf_max)
    low_min, why = _low_gain_bound(plant, fam, requirements)
    if why:
        notes.append(why)
    if low_min == np.inf:
        infeasible.append(why)
        low_min = None
    if g0 >= g1:
        g0 = g1 - 1.0
    return Space(family=fam, log_gain=(float(g0), float(g1)), log_freq=(float(f0), float(f1)),
                 log_ratio=float(np.log10(ratio)), notes=tuple(notes), infeasible=tuple(infeasible),
                 low_gain_min=low_min, hf_gain_max=hf_max if fam.kind != "lead-lag" else None)


def _plant_type(plant: TransferFunction) -> tuple[int, float]:
    """Number of poles at the origin (net of zeros there) and the coefficient ratio after removing them."""
    num, den = plant.num, plant.den
    tn = int(np.argmax(num[::-1] != 0))
    td = int(np.argmax(den[::-1] != 0))
    return td - tn, float(num[num.size - 1 - tn] / den[den.size - 1 - td])


def _low_gain_bound(plant: TransferFunction, fam: Family, req: dict) -> tuple[float | None, str]:
    """log10 lower bound on the controller's low-frequency gain from static requirements."""
    ptype, pk = _plant_type(plant)
    ctype = 1 if (fam.integrator or fam.kind in ("pid", "pi")) else 0
    ltype = ptype + ctype
    bounds, why = [], []

    def need(kmin: float, label: str):
        # loop constant = ctrl_low_gain * |pk|  >=  kmin
        if kmin > 0:
            bounds.append(np.log10(kmin / abs(pk)))
            why.append(label)

    e = req.get("max_steady_state_error")
    if e is not None and ltype == 0:
        if e <= 0:
            return np.inf, ("max_steady_state_error = 0 needs integral action: neither the plant nor "
                            "the controller family has a pole at s = 0 (final-value theorem)")
        need(1.0 / e - 1.0, f"max_steady_state_error = {e:g} needs Kp >= {1 / e - 1:g} (final-value theorem)")
    kp = req.get("min_position_constant")
    if kp is not None and ltype == 0:
        need(kp, f"min_position_constant = {kp:g} bounds the low-frequency gain")
    kv = req.get("min_velocity_constant")
    if kv is not None:
        if ltype == 0:
            return np.inf, "min_velocity_constant needs a type-1 loop: add an integrator (final-value theorem)"
        if ltype == 1:
            need(kv, f"min_velocity_constant = {kv:g} bounds the low-frequency gain (Kv = lim s L(s))")
    re_ = req.get("max_ramp_error")
    if re_ is not None:
        if ltype == 0:
            return np.inf, "max_ramp_error needs a type-1 loop: add an integrator (final-value theorem)"
        if ltype == 1 and re_ > 0:
            need(1.0 / re_, f"max_ramp_error = {re_:g} needs Kv >= {1 / re_:g} (final-value theorem)")
        elif ltype == 1:
            return np.inf, "max_ramp_error = 0 needs a type-2 loop (final-value theorem)"
    ka = req.get("min_acceleration_constant")
    if ka is not None:
        if ltype < 2:
            return np.inf, "min_acceleration_constant needs a type-2 loop (final-value theorem)"
        if ltype == 2:
            need(ka, f"min_acceleration_constant = {ka:g} bounds the low-frequency gain")
    dpk = req.get("max_disturbance_peak")
    if dpk is not None and ctype == 0 and ptype == 0:
        # steady load response P(0)/(1 + L(0)) must stay below the peak limit
        need(max(abs(pk) / dpk - 1.0, 0.0), f"max_disturbance_peak = {dpk:g} bounds the low-frequency gain "
             "(final-value theorem on the load-step response)")
    if not bounds:
        return None, ""
    return float(max(bounds)), "; ".join(why)


def build_space_models(models, controller, requirements: dict) -> Space:
    """:func:`build_space` for a model set: the necessary conditions must hold for every model.

    ``models`` is a :class:`synth.models.ModelSet`. The space is the nominal's with
    the low-frequency gain bound raised to the largest bound over the variants and
    the box's vertices (the smallest |DC gain| of a box is at a vertex), the
    infeasibilities of all of them, and a note when the gain sign of some model
    differs from the nominal's (Stodola's condition then cannot hold for all with
    one fixed-sign compensator of the usual structure).
    """
    from dataclasses import replace
    base = build_space(models.nominal, controller, requirements)
    others = [m for m in models.members[1:] if m.kind in ("variant", "vertex")]
    low = base.low_gain_min
    notes, infeasible = list(base.notes), list(base.infeasible)
    flipped = []
    for m in others:
        if gain_sign(m.plant)[0] != base.family.sign:
            flipped.append(m.name)
        b, why = _low_gain_bound(m.plant, base.family, requirements)
        if b == np.inf:
            if why not in infeasible:
                infeasible.append(f"{m.name}: {why}")
        elif b is not None and (low is None or b > low):
            low = b
    if low is not None and low != base.low_gain_min:
        notes.append(f"low-frequency gain bound raised to 10^{low:.3g} so that it holds for every model "
                     "(final-value theorem on the model with the smallest |DC gain|)")
    if flipped:
        notes.append(f"the plant's DC-gain sign differs from the nominal on {len(flipped)} model(s) "
                     f"({', '.join(flipped[:4])}{', ...' if len(flipped) > 4 else ''}): one fixed-sign gain may not "
                     "stabilise them all (Stodola's condition)")
    return replace(base, low_gain_min=low, notes=tuple(notes), infeasible=tuple(infeasible))
