"""Rational transfer functions with optional dead time.

Polynomials are numpy arrays of coefficients in descending powers of s. Nothing
here cancels common factors unless :meth:`TransferFunction.cancel_common_factors` is called:
the evaluator needs the unreduced numerator and denominator to see hidden modes.
Batched helpers act on 2-D arrays, one polynomial per row.
"""

from __future__ import annotations

from dataclasses import dataclass
from math import comb, factorial

import numpy as np


# ---------------------------------------------------------------- polynomials
def trim(p) -> np.ndarray:
    """Drop leading zero coefficients (keeps at least one coefficient)."""
    p = np.atleast_1d(np.asarray(p, dtype=float))
    nz = np.flatnonzero(p != 0.0)
    return p[nz[0]:].copy() if nz.size else np.zeros(1)


def polyadd(a, b) -> np.ndarray:
    """Sum of two polynomials of any lengths (descending coefficients)."""
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    n = max(a.size, b.size)
    return np.pad(a, (n - a.size, 0)) + np.pad(b, (n - b.size, 0))


def batch_conv(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise polynomial products of two batches (or one batch and one 1-D polynomial).

    ``a`` is (N, m) or (m,), ``b`` is (N, k) or (k,); the result is (N, m+k-1).
    The loop runs over the shorter coefficient axis, never over candidates.
    """
    a2, b2 = np.atleast_2d(a), np.atleast_2d(b)
    if a2.shape[1] < b2.shape[1]:
        a2, b2 = b2, a2
    n = max(a2.shape[0], b2.shape[0])
    m, k = a2.shape[1], b2.shape[1]
    out = np.zeros((n, m + k - 1), dtype=np.result_type(a2, b2))
    for j in range(k):
        out[:, j:j + m] += b2[:, j:j + 1] * a2
    return out


def batch_add(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise sum of two batches of polynomials, right-aligned."""
    a2, b2 = np.atleast_2d(a), np.atleast_2d(b)
    n = max(a2.shape[1], b2.shape[1])
    a2 = np.pad(a2, ((0, 0), (n - a2.shape[1], 0)))
    b2 = np.pad(b2, ((0, 0), (n - b2.shape[1], 0)))
    return a2 + b2


def batch_polyval(p: np.ndarray, x) -> np.ndarray:
    """Horner evaluation of each row of ``p`` (N, m) at ``x`` (N,) or (N, K) or scalar."""
    p = np.atleast_2d(p)
    x = np.asarray(x)
    if x.ndim == 2:
        cols = [p[:, j:j + 1] for j in range(p.shape[1])]
    else:
        cols = [p[:, j] for j in range(p.shape[1])]
    out = np.empty(np.broadcast_shapes(cols[0].shape, x.shape), dtype=np.result_type(p, x, float))
    out[...] = cols[0]
    for c in cols[1:]:            # in place: no temporaries on large (N, K) grids
        out *= x
        out += c
    return out


def batch_roots(p: np.ndarray) -> np.ndarray:
    """Roots of every row of ``p`` (N, m) as an (N, m-1) complex array padded with NaN.

    Rows are grouped by their effective degree (leading zeros dropped, exact zero
    test) and each group goes through one batched companion-matrix eigenvalue call.
    """
    p = np.atleast_2d(np.asarray(p, dtype=float))
    n, m = p.shape
    out = np.full((n, max(m - 1, 0)), np.nan + 0j)
    if m <= 1:
        return out
    nz = p != 0.0
    first = np.where(nz.any(axis=1), nz.argmax(axis=1), m - 1)
    for f in np.unique(first):
        rows = np.flatnonzero(first == f)
        deg = m - 1 - f
        if deg == 0:
            continue
        c = p[rows, f:]
        comp = np.zeros((rows.size, deg, deg))
        comp[:, 0, :] = -c[:, 1:] / c[:, :1]
        if deg > 1:
            comp[:, np.arange(1, deg), np.arange(deg - 1)] = 1.0
        out[rows, :deg] = np.linalg.eigvals(comp)
    return out


def poly_from_roots(roots) -> np.ndarray:
    """Real monic polynomial with the given roots (complex roots must come in conjugate pairs)."""
    roots = np.asarray(roots, dtype=complex)
    p = np.poly(roots) if roots.size else np.ones(1)
    return np.real_if_close(p, tol=1e6).real.astype(float)


def pade(delay: float, order: int) -> tuple[np.ndarray, np.ndarray]:
    """Diagonal Padé approximant of exp(-delay*s) of the given order.

    Coefficients c_k = (2n-k)! n! / ((2n)! k! (n-k)!) (Baker & Graves-Morris,
    *Padé Approximants*, 1996): numerator sum c_k (-delay s)^k, denominator
    sum c_k (delay s)^k. Returns (numerator, denominator), descending powers.
    """
    if order < 0:
        raise ValueError("Padé order must be >= 0")
    if delay == 0.0 or order == 0:
        return np.ones(1), np.ones(1)
    n = order
    c = np.array([factorial(2 * n - k) * factorial(n) / (factorial(2 * n) * factorial(k) * factorial(n - k))
                  for k in range(n + 1)])
    num = np.array([c[k] * (-delay) ** k for k in range(n + 1)])[::-1]
    den = np.array([c[k] * delay ** k for k in range(n + 1)])[::-1]
    return num, den


def shift_poly(p, alpha: float) -> np.ndarray:
    """Coefficients of p(s - alpha) (Taylor shift), descending powers."""
    p = np.asarray(p, dtype=float)
    n = p.size - 1
    out = np.zeros(n + 1)
    for i, c in enumerate(p):
        k = n - i  # c * (s - alpha)^k
        for j in range(k + 1):
            out[n - j] += c * comb(k, j) * (-alpha) ** (k - j)
    return out


# ---------------------------------------------------------- transfer function
@dataclass(frozen=True, eq=False)
class TransferFunction:
    """G(s) = num(s)/den(s) * exp(-delay*s); coefficients in descending powers of s.

    Frozen so that a plant or controller can be shared without copies. Arithmetic
    never cancels common factors.
    """

    num: np.ndarray
    den: np.ndarray
    delay: float = 0.0

    def __post_init__(self):
        num, den = trim(self.num), trim(self.den)
        if not np.all(np.isfinite(num)) or not np.all(np.isfinite(den)):
            raise ValueError("transfer-function coefficients must be finite")
        if not np.any(den):
            raise ValueError("denominator is the zero polynomial")
        if self.delay < 0 or not np.isfinite(self.delay):
            raise ValueError("dead time must be finite and >= 0")
        num.flags.writeable = False
        den.flags.writeable = False
        object.__setattr__(self, "num", num)
        object.__setattr__(self, "den", den)
        object.__setattr__(self, "delay", float(self.delay))

    # construction ---------------------------------------------------------
    @classmethod
    def from_roots(cls, zeros, poles, gain: float, delay: float = 0.0) -> "TransferFunction":
        """k * prod(s - z) / prod(s - p) * exp(-delay s)."""
        return cls(gain * poly_from_roots(zeros), poly_from_roots(poles), delay)

    @classmethod
    def constant(cls, k: float) -> "TransferFunction":
        return cls(np.array([float(k)]), np.ones(1))

    # properties -----------------------------------------------------------
    @property
    def zeros(self) -> np.ndarray:
        return np.roots(self.num) if self.num.size > 1 and np.any(self.num) else np.zeros(0, complex)

    @property
    def poles(self) -> np.ndarray:
        return np.roots(self.den) if self.den.size > 1 else np.zeros(0, complex)

    @property
    def gain(self) -> float:
        """k of the zero/pole/gain form: ratio of leading coefficients."""
        return float(self.num[0] / self.den[0]) if np.any(self.num) else 0.0

    @property
    def relative_degree(self) -> int:
        return (self.den.size - 1) - (self.num.size - 1)

    @property
    def is_proper(self) -> bool:
        return self.relative_degree >= 0

    def dc_gain(self) -> float:
        """G(0); +-inf when the denominator vanishes at s = 0."""
        d0, n0 = self.den[-1], self.num[-1]
        if d0 == 0.0:
            return np.inf * np.sign(n0) if n0 != 0 else np.nan
        return float(n0 / d0)

    # arithmetic -----------------------------------------------------------
    def __mul__(self, other: "TransferFunction | float") -> "TransferFunction":
        if not isinstance(other, TransferFunction):
            return TransferFunction(self.num * float(other), self.den, self.delay)
        return TransferFunction(np.polymul(self.num, other.num), np.polymul(self.den, other.den),
                                self.delay + other.delay)

    __rmul__ = __mul__

    def feedback(self, other: "TransferFunction | None" = None, sign: int = -1) -> "TransferFunction":
        """Closed loop G/(1 - sign*G*H) (negative feedback by default), unreduced.

        Rational loops only: with dead time the closed loop is not rational.
        """
        h = other if other is not None else TransferFunction.constant(1.0)
        if self.delay or h.delay:
            raise ValueError("feedback of a loop with dead time is not rational; use a Padé approximant")
        num = np.polymul(self.num, h.den)
        den = polyadd(np.polymul(self.den, h.den), -sign * np.polymul(self.num, h.num))
        return TransferFunction(num, den)

    def __call__(self, s) -> np.ndarray:
        """Frequency response at complex points ``s`` (any shape), dead time included."""
        s = np.asarray(s, dtype=complex)
        val = np.polyval(self.num, s) / np.polyval(self.den, s)
        if self.delay:
            val = val * np.exp(-self.delay * s)
        return val

    def with_pade(self, order: int) -> "TransferFunction":
        """Rational approximation: dead time replaced by a Padé approximant of ``order``."""
        if not self.delay:
            return self
        pn, pd = pade(self.delay, order)
        return TransferFunction(np.polymul(self.num, pn), np.polymul(self.den, pd))

    def cancel_common_factors(self, tol: float = 1e-8) -> "TransferFunction":
        """Cancel numerator/denominator roots closer than ``tol`` (relative). Only when asked."""
        z, p = list(self.zeros), list(self.poles)
        keep_z = []
        for zi in z:
            j = next((j for j, pj in enumerate(p) if abs(pj - zi) <= tol * max(1.0, abs(zi))), None)
            if j is None:
                keep_z.append(zi)
            else:
                p.pop(j)
        k = self.gain
        return TransferFunction.from_roots(keep_z, p, k, self.delay)

    def __repr__(self) -> str:  # compact, for error messages and debugging
        d = f", delay={self.delay:g}" if self.delay else ""
        return f"TransferFunction(num={self.num.tolist()}, den={self.den.tolist()}{d})"


def format_poly(p, var: str = "s", digits: int = 6) -> str:
    """Human-readable polynomial, e.g. '2 s^2 + 3 s + 1'."""
    p = trim(p)
    n = p.size - 1
    terms = []
    for i, c in enumerate(p):
        if c == 0:
            continue
        k = n - i
        mag = f"{abs(c):.{digits}g}"
        if k == 0:
            t = mag
        else:
            pw = var if k == 1 else f"{var}^{k}"
            t = pw if mag == "1" else f"{mag} {pw}"
        terms.append(("-" if c < 0 else "+", t))
    if not terms:
        return "0"
    s = ("-" if terms[0][0] == "-" else "") + terms[0][1]
    for sg, t in terms[1:]:
        s += f" {sg} {t}"
    return s
