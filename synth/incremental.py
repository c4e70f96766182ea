"""The incremental (velocity) form of a discrete controller with integral action.

A discrete controller u[k] = sum_i b_i e[k-i] - sum_{i>=1} a_i u[k-i] (a_0 = 1) with
integral action has a pole at z = 1: a(z^-1) = (1 - z^-1) a'(z^-1). Dividing it out gives
the incremental form used in PLCs and process controllers,

    du[k] = sum_i b_i e[k-i] - sum_{i>=1} a'_i du[k-i],    u[k] = u[k-1] + du[k],

which computes the change of the output each sample; the integrator is the
accumulation u[k-1] + du[k], so output limits and bumpless transfer act on the
accumulated value (Astrom & Hagglund, *Advanced PID Control*, ISA 2006, ch. 3,
"velocity algorithms"; Astrom & Wittenmark, *Computer-Controlled Systems*, 3rd ed.,
1997, ch. 8). Given the same error sequence and zero initial state it produces exactly
the same u as the position form (the tests simulate both).
"""

from __future__ import annotations

import numpy as np

INTEGRATOR_TOL = 1e-9     # |a(1)| relative to sum |a_i| below which z = 1 counts as a pole


def incremental_form(b, a) -> tuple[np.ndarray, np.ndarray] | None:
    """(b, a') of the velocity form, or None when the controller has no pole at z = 1.

    ``b``, ``a``: coefficients in powers of z^-1 with a_0 = 1 (as :func:`synth.discrete.tustin`
    returns). a' = a / (1 - z^-1) by synthetic division: a'_0 = a_0, a'_i = a_i + a'_{i-1};
    the remainder is a(1), which must vanish.
    """
    b = np.asarray(b, float)
    a = np.asarray(a, float)
    if a.size < 2 or a[0] == 0:
        return None
    if abs(a.sum()) > INTEGRATOR_TOL * np.abs(a).sum():
        return None
    ap = np.cumsum(a)[:-1]
    return b.copy(), ap


def incremental_equation(b, ap) -> str:
    """du[k] = ... as text, coefficients rounded (exact values in the export's rows)."""
    terms = [f"{-c:+.8g} du[k-{k}]" for k, c in enumerate(ap) if k > 0 and c != 0]
    terms += [f"{c:+.8g} e[k{'-' + str(k) if k else ''}]" for k, c in enumerate(b) if c != 0]
    return ("du[k] = " + (" ".join(terms) if terms else "0")
            + ";  u[k] = u[k-1] + du[k]   (e = reference - measurement)")
