"""Compensator families: parameter vectors <-> controller polynomials, batched.

A lead-lag family is C(s) = sign * K * prod_i (s + z_i)/(s + p_i) * (1/s if integral),
with parameters log10 K and, per stage, log10 z and log10 p in rad/s. A lead stage
has z < p (phase lead), a lag stage z > p; a lead-lag stage is a lead followed by
a lag. The PID family is C(s) = sign * (kp + ki/s + kd s/(tf s + 1)) (parallel form
with a first-order derivative filter, Astrom & Hagglund, *Advanced PID Control*,
ISA 2006), parameters log10 of kp, ki, kd, tf; the PI family drops kd and tf.

The high-frequency gain of a proper lead-lag controller is sign*K, so u(0+) = K for
a unit reference step (initial-value theorem).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .lti import batch_conv

STAGE_KINDS = ("lead", "lag", "lead-lag")


@dataclass(frozen=True)
class Family:
    """A compensator structure; maps (N, d) parameter arrays to N controllers."""

    kind: str = "lead-lag"             # "lead-lag" | "pid" | "pi"
    stages: tuple[str, ...] = ("lead",)
    integrator: bool = False
    sign: float = 1.0

    def __post_init__(self):
        if self.kind not in ("lead-lag", "pid", "pi"):
            raise ValueError(f"unknown compensator kind {self.kind!r}")
        bad = [s for s in self.stages if s not in STAGE_KINDS]
        if self.kind == "lead-lag" and bad:
            raise ValueError(f"unknown stage kind(s) {bad}; expected one of {STAGE_KINDS}")
        if self.sign not in (1.0, -1.0):
            raise ValueError("sign must be +1 or -1")
        if self.kind != "lead-lag":
            object.__setattr__(self, "stages", ())

    # ------------------------------------------------------------- layout
    @property
    def pairs(self) -> list[tuple[str, int, int]]:
        """(role, zero column, pole column) for each zero/pole pair, role 'lead' or 'lag'."""
        out, col = [], 1
        for st in self.stages:
            roles = ("lead", "lag") if st == "lead-lag" else (st,)
            for r in roles:
                out.append((r, col, col + 1))
                col += 2
        return out

    @property
    def names(self) -> list[str]:
        if self.kind == "pid":
            return ["log10_kp", "log10_ki", "log10_kd", "log10_tf"]
        if self.kind == "pi":
            return ["log10_kp", "log10_ki"]
        names = ["log10_gain"]
        for i, (role, _, _) in enumerate(self.pairs, start=1):
            names += [f"{role}{i}_log10_zero", f"{role}{i}_log10_pole"]
        return names

    @property
    def dim(self) -> int:
        return len(self.names)

    def describe(self) -> str:
        if self.kind != "lead-lag":
            return self.kind.upper() + (" with derivative filter" if self.kind == "pid" else "")
        parts = list(self.stages) + (["integrator"] if self.integrator else [])
        return " + ".join(parts) if parts else "gain"

    # ------------------------------------------------------------ mapping
    def admissible(self, params: np.ndarray) -> np.ndarray:
        """Boolean mask: lead stages have zero < pole, lag stages zero > pole."""
        p = np.atleast_2d(params)
        ok = np.all(np.isfinite(p), axis=1)
        for role, zc, pc in self.pairs:
            ok &= (p[:, zc] < p[:, pc]) if role == "lead" else (p[:, zc] > p[:, pc])
        return ok

    def controllers(self, params: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Numerator (N, m) and denominator (N, n) coefficients, gain and sign included."""
        p = np.atleast_2d(np.asarray(params, dtype=float))
        if p.shape[1] != self.dim:
            raise ValueError(f"expected {self.dim} parameters {self.names}, got {p.shape[1]}")
        n = p.shape[0]
        if self.kind == "pid":
            kp, ki, kd, tf = (10.0 ** p[:, j] for j in range(4))
            num = np.stack([kp * tf + kd, kp + ki * tf, ki], axis=1)
            den = np.stack([tf, np.ones(n), np.zeros(n)], axis=1)
            return self.sign * num, den
        if self.kind == "pi":
            kp, ki = 10.0 ** p[:, 0], 10.0 ** p[:, 1]
            return self.sign * np.stack([kp, ki], axis=1), np.tile([1.0, 0.0], (n, 1))
        num = np.ones((n, 1))
        den = np.ones((n, 1))
        for _, zc, pc in self.pairs:
            num = batch_conv(num, np.stack([np.ones(n), 10.0 ** p[:, zc]], axis=1))
            den = batch_conv(den, np.stack([np.ones(n), 10.0 ** p[:, pc]], axis=1))
        if self.integrator:
            den = np.pad(den, ((0, 0), (0, 1)))
        return self.sign * 10.0 ** p[:, :1] * num, den

    def gain_zeros_poles(self, params: np.ndarray) -> tuple[np.ndarray, list[np.ndarray], list[np.ndarray]]:
        """Gains (N,), zeros and poles (lists of 1-D complex arrays) of each controller."""
        p = np.atleast_2d(params)
        if self.kind != "lead-lag":
            num, den = self.controllers(p)
            gains = num[:, 0] / den[:, 0]
            zeros = [np.roots(r) for r in num]
            poles = [np.roots(r) for r in den]
            return gains, zeros, poles
        gains = self.sign * 10.0 ** p[:, 0]
        zc = [c for _, c, _ in self.pairs]
        pc = [c for _, _, c in self.pairs]
        zeros = [-(10.0 ** row[zc]).astype(complex) for row in p]
        poles = [np.concatenate([-(10.0 ** row[pc]), [0.0] * self.integrator]).astype(complex) for row in p]
        return gains, zeros, poles

    def params_from_roots(self, gain: float, zeros, poles) -> np.ndarray:
        """Inverse map for the lead-lag family: gain K and stage corner frequencies z_i, p_i
        (positive, rad/s, in stage order; the integrator pole is implied) -> parameter vector."""
        if self.kind != "lead-lag":
            raise ValueError("params_from_roots applies to lead-lag families; use params_from_pid")
        if np.sign(gain) != self.sign:
            raise ValueError("gain sign does not match the family's sign")
        zeros, poles = np.asarray(zeros, float), np.asarray(poles, float)
        if zeros.size != len(self.pairs) or poles.size != len(self.pairs):
            raise ValueError(f"expected {len(self.pairs)} zeros and poles")
        out = [np.log10(abs(gain))]
        for z, q in zip(zeros, poles):
            out += [np.log10(z), np.log10(q)]
        return np.array(out)

    def params_from_pid(self, kp: float, ki: float, kd: float = 0.0, tf: float = 0.0) -> np.ndarray:
        """Inverse map for PID/PI families from parallel-form gains (magnitudes)."""
        if self.kind == "pi":
            return np.log10([kp, ki])
        if self.kind == "pid":
            return np.log10([kp, ki, kd, tf])
        raise ValueError("params_from_pid applies to pid/pi families")
