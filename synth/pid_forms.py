"""PI/PID parameters as controllers are configured: parallel, standard and series forms.

synth's PID family is the parallel form with a first-order filter on the derivative
term. Industrial controllers are configured in other forms; this module converts
exactly between them (pure functions, no I/O). The formulas follow Astrom & Hagglund,
*Advanced PID Control*, ISA 2006, ch. 3 ("PID Control", the forms of the PID
algorithm: parallel, standard/non-interacting, series/interacting), written from
memory and re-derived here; the tests expand every form to the same transfer function
with sympy.

Parallel (independent gains)::

    C(s) = kp + ki/s + kd s/(Tf s + 1)

Standard (ISA, "ideal", non-interacting) with derivative filter factor N::

    C(s) = Kc (1 + 1/(Ti s) + Td s/(1 + s Td/N))
    Kc = kp,  Ti = kp/ki,  Td = kd/kp,  N = Td/Tf = kd/(kp Tf)

Series (interacting), with the filter on the derivative factor::

    C(s) = K' (1 + 1/(Ti' s)) (1 + Td' s)/(1 + Tf s)

Expanding the series form gives the numerator (K'/Ti')(Ti' Td' s^2 + (Ti' + Td') s + 1)
over s (Tf s + 1); matching it with the parallel numerator
(kp Tf + kd) s^2 + (kp + ki Tf) s + ki gives

    K'/Ti' = ki,  Ti' + Td' = (kp + ki Tf)/ki,  Ti' Td' = (kp Tf + kd)/ki,

so Ti' and Td' are the two roots of x^2 - (Ti' + Td') x + Ti' Td' = 0 (Ti' the larger)
and K' = ki Ti'. The series form exists only when these roots are real, i.e. when the
controller's zeros are real: (kp + ki Tf)^2 >= 4 ki (kp Tf + kd). With Tf = 0 this is
Astrom & Hagglund's condition Ti >= 4 Td, and the relations reduce to theirs:
Kc = K' (Ti' + Td')/Ti', Ti = Ti' + Td', Td = Ti' Td'/(Ti' + Td') (formula from memory).

A PI controller has Kc = kp, Ti = kp/ki; its series form is the same as its standard
form and is not repeated.

Times are in seconds, gains in actuator units per output unit (per second for ki,
times a second for kd). A design of negative sign (reverse acting) has negative
kp, ki, kd, Kc and K'; its times stay positive.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class SeriesForm:
    """C(s) = k (1 + 1/(ti s)) (1 + td s)/(1 + tf s); ti >= td."""
    k: float
    ti: float
    td: float
    tf: float


@dataclass(frozen=True)
class PIDForms:
    """One PI or PID controller in its parallel, standard and (where it exists) series form."""
    kind: str                 # "pi" or "pid"
    kp: float
    ki: float
    kd: float                 # 0 for a PI
    tf: float                 # derivative filter time constant, s (0 for a PI)
    kc: float
    ti: float
    td: float                 # 0 for a PI
    n: float                  # filter factor Td/Tf (inf without filter; nan for a PI)
    series: SeriesForm | None
    series_note: str = ""

    def as_dict(self) -> dict:
        out = {"kind": self.kind,
               "parallel": {"kp": self.kp, "ki": self.ki, "kd": self.kd, "tf_s": self.tf},
               "standard": {"kc": self.kc, "ti_s": self.ti, "td_s": self.td, "n": self.n}}
        if self.kind == "pi":
            out["parallel"] = {"kp": self.kp, "ki": self.ki}
            out["standard"] = {"kc": self.kc, "ti_s": self.ti}
        out["series"] = (None if self.series is None else
                         {"k": self.series.k, "ti_s": self.series.ti, "td_s": self.series.td,
                          "tf_s": self.series.tf})
        out["series_note"] = self.series_note
        return out


def standard_from_parallel(kp: float, ki: float, kd: float = 0.0, tf: float = 0.0) -> tuple[float, float, float, float]:
    """(Kc, Ti, Td, N) of the standard form; N = Td/Tf (inf when Tf = 0). Needs kp != 0, ki != 0."""
    if kp == 0 or ki == 0:
        raise ValueError("the standard form needs a non-zero proportional and integral gain")
    kc, ti, td = kp, kp / ki, kd / kp
    n = td / tf if tf > 0 else math.inf
    return kc, ti, td, n


def parallel_from_standard(kc: float, ti: float, td: float = 0.0, n: float = math.inf) -> tuple[float, float, float, float]:
    """(kp, ki, kd, Tf) of the parallel form; Tf = Td/N (0 when N is infinite)."""
    tf = td / n if math.isfinite(n) and n > 0 else 0.0
    return kc, kc / ti, kc * td, tf


def series_from_parallel(kp: float, ki: float, kd: float, tf: float) -> SeriesForm | None:
    """The series form, or None when the controller's zeros are complex (no real Ti', Td')."""
    if ki == 0:
        return None
    s_sum = (kp + ki * tf) / ki          # Ti' + Td'
    s_prod = (kp * tf + kd) / ki         # Ti' Td'
    disc = s_sum * s_sum - 4.0 * s_prod
    if disc < -1e-10 * s_sum * s_sum:      # a double zero within rounding counts as real
        return None
    root = math.sqrt(max(disc, 0.0))
    ti = 0.5 * (s_sum + root)
    td = s_prod / ti if ti != 0 else 0.0   # the smaller root without cancellation
    return SeriesForm(ki * ti, ti, td, tf)


def parallel_from_series(sf: SeriesForm) -> tuple[float, float, float, float]:
    """(kp, ki, kd, Tf) from the series form (inverse of :func:`series_from_parallel`)."""
    ki = sf.k / sf.ti
    kp = ki * (sf.ti + sf.td) - ki * sf.tf
    kd = ki * sf.ti * sf.td - kp * sf.tf
    return kp, ki, kd, sf.tf


def forms(kind: str, kp: float, ki: float, kd: float = 0.0, tf: float = 0.0) -> PIDForms:
    """Every configuration form of a PI (``kind='pi'``) or PID (``'pid'``) in parallel gains."""
    if kind not in ("pi", "pid"):
        raise ValueError(f"kind must be 'pi' or 'pid', got {kind!r}")
    if kind == "pi":
        kc, ti, _, _ = standard_from_parallel(kp, ki)
        return PIDForms("pi", kp, ki, 0.0, 0.0, kc, ti, 0.0, math.nan, None,
                        "a PI controller's series form equals its standard form")
    kc, ti, td, n = standard_from_parallel(kp, ki, kd, tf)
    sf = series_from_parallel(kp, ki, kd, tf)
    note = "" if sf is not None else ("no series form: the controller's zeros are complex "
                                      "((kp + ki Tf)^2 < 4 ki (kp Tf + kd); Ti < 4 Td without filter)")
    return PIDForms("pid", kp, ki, kd, tf, kc, ti, td, n, sf, note)


def forms_from_params(kind: str, params, sign: float = 1.0) -> PIDForms:
    """Forms of one design of synth's PID/PI family (log10 parameters, see synth.structures)."""
    p = 10.0 ** np.asarray(params, float)
    if kind == "pid":
        return forms("pid", sign * p[0], sign * p[1], sign * p[2], float(p[3]))
    return forms("pi", sign * p[0], sign * p[1])


def transfer_coefficients(f: PIDForms) -> tuple[np.ndarray, np.ndarray]:
    """Numerator and denominator (descending powers of s) of the parallel form."""
    if f.kind == "pi":
        return np.array([f.kp, f.ki]), np.array([1.0, 0.0])
    return (np.array([f.kp * f.tf + f.kd, f.kp + f.ki * f.tf, f.ki]), np.array([f.tf, 1.0, 0.0]))


def forms_text(f: PIDForms, digits: int = 6) -> list[str]:
    """The forms as lines of text (for ``synth show`` and the export's notes)."""
    g = lambda x: f"{x:.{digits}g}"        # noqa: E731
    if f.kind == "pi":
        return [f"parallel  C(s) = kp + ki/s: kp {g(f.kp)}, ki {g(f.ki)} 1/s",
                f"standard  C(s) = Kc (1 + 1/(Ti s)): Kc {g(f.kc)}, Ti {g(f.ti)} s",
                f"series    {f.series_note}"]
    out = [f"parallel  C(s) = kp + ki/s + kd s/(Tf s + 1): kp {g(f.kp)}, ki {g(f.ki)} 1/s, "
           f"kd {g(f.kd)} s, Tf {g(f.tf)} s",
           f"standard  C(s) = Kc (1 + 1/(Ti s) + Td s/(1 + s Td/N)): Kc {g(f.kc)}, Ti {g(f.ti)} s, "
           f"Td {g(f.td)} s, N {g(f.n)}"]
    if f.series is not None:
        s = f.series
        out.append(f"series    C(s) = K' (1 + 1/(Ti' s)) (1 + Td' s)/(1 + Tf s): K' {g(s.k)}, Ti' {g(s.ti)} s, "
                   f"Td' {g(s.td)} s, Tf {g(s.tf)} s")
    else:
        out.append(f"series    {f.series_note}")
    return out
