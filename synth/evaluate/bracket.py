"""Bracketed one-dimensional solvers, batched: many independent brackets advance together,
one vectorised evaluation of the function per step (no loop per entry).

The function is called as F(idx, x): its value for the entries ``idx`` at the points x
(1-D arrays of equal length), so that entries that have converged drop out."""

from __future__ import annotations

import numpy as np

ILLINOIS_STEPS = 10   # Illinois steps before bisection finishes the brackets still wide


def illinois_root(F, a, b, fa, fb, tol: float, iters: int = 60) -> np.ndarray:
    """A sign change of F inside each bracket [a, b] with values fa, fb of opposite signs.

    ILLINOIS_STEPS of the Illinois method (regula falsi that halves the value at the end kept
    twice, so that both ends converge: superlinear, and the root stays bracketed; Dowell &
    Jarratt, BIT 11, 1971), then bisection of the brackets still wider than ``tol``, at most
    ``iters`` halvings. Returns the midpoints of the final brackets."""
    a, b, fa, fb = (np.array(z, float) for z in (a, b, fa, fb))
    every = np.arange(a.size)
    for _ in range(ILLINOIS_STEPS):
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            x = b - fb * (b - a) / (fb - fa)
        lo, hi = np.minimum(a, b), np.maximum(a, b)
        x = np.where((x > lo) & (x < hi), x, 0.5 * (a + b))       # a secant outside: bisect
        fx = F(every, x)
        flip = np.sign(fx) != np.sign(fb)                         # the root lies between x and b
        a, fa = np.where(flip, b, a), np.where(flip, fb, 0.5 * fa)
        b, fb = x, fx
        exact = fx == 0
        a, fa = np.where(exact, x, a), np.where(exact, 0.0, fa)
    todo = np.flatnonzero(np.abs(b - a) > tol)
    for _ in range(iters):
        if todo.size == 0:
            break
        mid = 0.5 * (a[todo] + b[todo])
        fm = F(todo, mid)
        same = np.sign(fm) == np.sign(fb[todo])
        b[todo] = np.where(same, mid, b[todo])
        fb[todo] = np.where(same, fm, fb[todo])
        a[todo] = np.where(same, a[todo], mid)
        todo = todo[np.abs(b[todo] - a[todo]) > tol]
    return 0.5 * (a + b)


_CGOLD = 0.5 * (3.0 - np.sqrt(5.0))


def brent_minimize(F, a, x, b, fx, tol, iters: int = 60):
    """Minimum of F(idx, x) (the function of entries idx at points x) inside brackets [a, b]
    (arrays, all entries together) from interior points x with known values fx: Brent's method (parabolic steps through the three best points,
    golden-section steps where a parabola is not trusted; R. P. Brent, *Algorithms for
    Minimization without Derivatives*, 1973, ch. 5), one batched evaluation of F per step.
    An entry stops once its bracket is within about 4 ``tol`` (absolute in x). Returns (x, F(x))."""
    a, b, x, fx = (np.array(z, float) for z in (a, b, x, fx))
    w, v, fw, fv = x.copy(), x.copy(), fx.copy(), fx.copy()
    d = np.zeros_like(x)
    e = np.zeros_like(x)
    act = np.arange(x.size)
    for _ in range(iters):
        m = 0.5 * (a + b)
        tol2 = 2 * tol
        act = act[np.abs(x[act] - m[act]) > tol2 - 0.5 * (b[act] - a[act])]
        if act.size == 0:
            break
        A, B, X, W, V = a[act], b[act], x[act], w[act], v[act]
        FX, FW, FV, D, Ee, M = fx[act], fw[act], fv[act], d[act], e[act], m[act]
        with np.errstate(invalid="ignore", over="ignore"):
            r = (X - W) * (FX - FV)
            q = (X - V) * (FX - FW)
            p = (X - V) * q - (X - W) * r
            q = 2 * (q - r)
            p = np.where(q > 0, -p, p)
            q = np.abs(q)
            para = (np.abs(Ee) > tol) & (np.abs(p) < np.abs(0.5 * q * Ee)) & (p > q * (A - X)) & (p < q * (B - X))
            dp = np.where(para, p / np.where(q != 0, q, 1.0), 0.0)
        u = X + dp
        near_end = para & ((u - A < tol2) | (B - u < tol2))
        dp = np.where(near_end, np.where(M >= X, tol, -tol), dp)
        eg = np.where(X >= M, A - X, B - X)                  # golden section into the larger part
        e_new = np.where(para, D, eg)
        d_new = np.where(para, dp, _CGOLD * eg)
        u = X + np.where(np.abs(d_new) >= tol, d_new, np.where(d_new >= 0, tol, -tol))
        fu = F(act, u)
        better = fu <= FX
        A2 = np.where(better, np.where(u >= X, X, A), np.where(u < X, u, A))
        B2 = np.where(better, np.where(u >= X, B, X), np.where(u < X, B, u))
        to_w = ~better & ((fu <= FW) | (W == X))
        to_v = ~better & ~to_w & ((fu <= FV) | (V == X) | (V == W))
        a[act], b[act] = A2, B2
        v[act] = np.where(better | to_w, W, np.where(to_v, u, V))
        fv[act] = np.where(better | to_w, FW, np.where(to_v, fu, FV))
        w[act] = np.where(better, X, np.where(to_w, u, W))
        fw[act] = np.where(better, FX, np.where(to_w, fu, FW))
        x[act] = np.where(better, u, X)
        fx[act] = np.where(better, fu, FX)
        d[act], e[act] = d_new, e_new
    return x, fx
