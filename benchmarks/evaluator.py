"""Speed and agreement of synth's batched loop evaluator against per-candidate references.

Run:  python benchmarks/evaluator.py [--n N] [--quick]

Scenario (invented): the open-loop unstable plant P(s) = 200/((s - 2)(s + 5)(s + 20))
under two lead stages, C(s) = K (s + z1)(s + z2)/((s + p1)(s + p2)), so the
characteristic polynomial has order 5. Parameters are log-uniform: log10 K in
[-1, 3], log10 corners in [-2, 3]; only admissible lead stages (zero < pole) are kept.

Three ways of computing the same metrics, side by side on the same candidates:

(a) naive reference, one candidate at a time: np.roots for the closed-loop poles,
    three scipy.signal.step calls on a fixed uniform time grid, a logspace
    frequency grid for margins and the sensitivity peak;
(b) synth, batched: the screening path (controllers -> characteristic polynomial ->
    poles -> stable/damping/decay) and the full metric set (synth.evaluate.evaluate);
(c) an accurate independent reference, used only for the agreement check: poles of
    the characteristic polynomial built and solved in 40-digit arithmetic (mpmath);
    step responses from scipy.signal.lsim on a fine piecewise-uniform grid (segments
    doubling in length, each step short enough for 64 samples per period of every
    oscillatory mode still alive), every extremum and crossing refined by scipy.optimize.minimize_scalar / brentq on the exact
    zero-order-hold solution between samples; frequency metrics from the
    zero/pole product form of L(jw) on a dense grid (plus clusters at the
    closed-loop pole frequencies), refined by brentq / minimize_scalar.

Poles are compared after optimal matching (sorted pairs can mis-pair conjugates);
relative differences are |synth - ref| / max(|ref|, floor), the settling time is
judged in samples of the reference grid.

BLAS/OpenMP are pinned to one thread for the whole run. Speeds are printed
beside their targets; nothing here asserts on timing.
"""

from __future__ import annotations

import argparse
import datetime
import os
import platform
import sys
import time
from dataclasses import dataclass

import mpmath
import numpy as np
import pandas as pd
import scipy
import scipy.linalg as sla
import scipy.optimize as sopt
import scipy.signal as sig
from threadpoolctl import threadpool_info, threadpool_limits

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from synth.evaluate import evaluate, step_responses  # noqa: E402
from synth.evaluate import delay, delay_time, frequency, stability  # noqa: E402
from synth.lti import pade  # noqa: E402
from synth.lti import TransferFunction  # noqa: E402
from synth.structures import Family  # noqa: E402
from _machine import cpu_model  # noqa: E402  (sibling module; scripts run as files)

# ------------------------------------------------------------------ scenario
PLANT_GAIN = 200.0
PLANT_POLES = (2.0, -5.0, -20.0)
PLANT = TransferFunction.from_roots([], list(PLANT_POLES), PLANT_GAIN)
FAMILY = Family(stages=("lead", "lead"))
GAIN_RANGE = (-1.0, 3.0)       # log10 K
CORNER_RANGE = (-2.0, 3.0)     # log10 rad/s
BAND = 0.02                    # settling band (synth's default)

# dead-time section: the same plant and candidates with a dead time (invented)
DELAY_S = 0.02
DELAY_PLANT = TransferFunction(PLANT.num, PLANT.den, DELAY_S)
TARGET_DELAY_SCREEN = 20_000
TARGET_DELAY_FULL = 1_000
# a process loop (invented, the heated-tank example's plant): 1.8 e^(-4 s)/(60 s + 1) under
# filtered PIDs, log10 kp in [-2, 1.5], ki in [-4, 0], kd in [-2, 2], tf in [-3, 1] (s)
PROCESS_PLANT = TransferFunction(np.array([1.8]), np.array([60.0, 1.0]), 4.0)
PROCESS_FAMILY = Family(kind="pid")
PROCESS_RANGES = ((-2.0, 1.5), (-4.0, 0.0), (-2.0, 2.0), (-3.0, 1.0))

# naive reference (a)
NAIVE_TIME_POINTS = 1000       # uniform samples on [0, HORIZON/decay]
NAIVE_FREQ = np.logspace(-3, 4, 400)
HORIZON_DECAYS = 14.0          # same horizon rule as synth: e^-14 of the slowest mode

# accurate reference (c)
REF_HORIZON_DECAYS = 20.0
REF_SEGMENT_SAMPLES = 256      # samples per doubling segment of the time axis
REF_SAMPLES_PER_PERIOD = 64    # while an oscillatory mode is alive (|e^{Re p t}| > 1e-9)
REF_MAX_SAMPLES = 2_000_000    # per candidate; a capped grid is reported
REF_FREQ = np.logspace(-5, 6, 22_001)
MP_DIGITS = 40

# speed targets (printed beside the measurements, never asserted)
TARGET_SCREEN = 200_000
TARGET_FULL = 3_000
TARGET_RATIO = 50.0
TARGET_REL = 1e-6

# agreement: metric -> floor of the denominator of the relative difference
# (|synth - ref| / max(|ref|, floor)); a floor only where the metric's own unit makes
# "relative" meaningless near zero (overshoot in %, margins in deg and dB).
AGREEMENT_METRICS = {
    "closed_loop_poles": 0.0,
    "min_damping": 0.0,
    "decay_rate": 0.0,
    "overshoot_pct": 1.0,
    "settling_time_s": 0.0,
    "rise_time_s": 0.0,
    "disturbance_peak": 0.0,
    "control_peak": 0.0,
    "sensitivity_peak": 0.0,
    "phase_margin_deg": 1.0,
    "gain_margin_db": 1.0,
    "gain_margin_low_db": 1.0,
    "crossover_rad_s": 0.0,
}


# ------------------------------------------------------------------ machine
def machine_lines() -> list[str]:
    """nproc, CPU model, library versions, date and the thread pools in effect."""
    cpu = cpu_model()
    pools = ", ".join(f"{p['internal_api']}={p['num_threads']}" for p in threadpool_info()) or "none found"
    return [
        f"date     {datetime.datetime.now().astimezone().isoformat(timespec='seconds')}",
        f"machine  nproc={len(os.sched_getaffinity(0))}  cpu={cpu}  {platform.system()} {platform.machine()}",
        f"python   {platform.python_version()}  numpy {np.__version__}  scipy {scipy.__version__}  "
        f"pandas {pd.__version__}  mpmath {mpmath.__version__}",
        f"threads  BLAS/OpenMP pinned to 1 thread for the whole run (threadpoolctl): {pools}",
        f"load     {load_average()} (1/5/15 min; above nproc means other work shares the cores)",
    ]


def load_average() -> str:
    """The 1/5/15-minute load averages, as printed by uptime."""
    try:
        return " ".join(f"{x:.2f}" for x in os.getloadavg())
    except OSError:
        return "unknown"


# ------------------------------------------------------------------ candidates
def sample_batch(rng: np.random.Generator, n: int) -> np.ndarray:
    """n admissible two-lead parameter vectors (log-uniform gain and corners)."""
    out, have = [], 0
    while have < n:
        m = 4 * (n - have) + 16
        p = np.column_stack([rng.uniform(*GAIN_RANGE, m), rng.uniform(*CORNER_RANGE, (m, 4))])
        p = p[FAMILY.admissible(p)]
        out.append(p)
        have += len(p)
    return np.concatenate(out)[:n]


def sample_stable(rng: np.random.Generator, n: int) -> np.ndarray:
    """n admissible candidates whose closed loop is stable (resampled, screened by synth)."""
    out, have = [], 0
    while have < n:
        p = sample_batch(rng, 50_000)
        stable, _, _ = synth_screen(p)
        out.append(p[stable])
        have += int(stable.sum())
    return np.concatenate(out)[:n]


def roots_of(row: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """Controller gain, zeros and poles of one parameter row (independent of synth)."""
    v = 10.0 ** np.asarray(row, float)
    return v[0], -v[[1, 3]], -v[[2, 4]]


# ------------------------------------------------------------------ (b) synth
def synth_screen(params: np.ndarray):
    """Screening metrics, batched: (stable, min damping, decay rate)."""
    cnum, cden = FAMILY.controllers(params)
    char = stability.characteristic(PLANT.num, PLANT.den, cnum, cden)
    return stability.pole_summary(stability.closed_loop_poles(char))


def synth_full(params: np.ndarray) -> pd.DataFrame:
    """The full metric table from synth.evaluate.evaluate."""
    return evaluate(PLANT, FAMILY, params)


def synth_delay_screen(params: np.ndarray):
    """Dead-time screening, batched: exact crossing-count verdict for every row; Newton roots of the
    quasi-polynomial (from the Padé(6) roots) for damping and decay of the stable rows."""
    cnum, cden = FAMILY.controllers(params)
    pn, pd = pade(DELAY_S, 6)
    return delay.screen(DELAY_PLANT.num, DELAY_PLANT.den, cnum, cden, DELAY_S, pn, pd)


def synth_delay_full(params: np.ndarray) -> pd.DataFrame:
    return evaluate(DELAY_PLANT, FAMILY, params)


def synth_delay_frequency(params: np.ndarray) -> dict:
    """Only the dead-time frequency metrics (crossings + batched grid and refinement)."""
    cnum, cden = FAMILY.controllers(params)
    a, b = delay.split(DELAY_PLANT.num, DELAY_PLANT.den, cnum, cden)
    w0 = delay._scale_of(a, b)
    return frequency.delay_metrics(DELAY_PLANT.num, DELAY_PLANT.den, cnum, cden, DELAY_S, w0)


def delay_section(args, raw: np.ndarray) -> None:
    """Speeds with dead time beside the rational ones, and a consistency check of the verdict:
    a loop stable without delay stays stable with the dead time exactly when its rational delay
    margin (first critical delay, from synth's rational frequency path) exceeds DELAY_S, and the
    remaining margin is the rational one minus DELAY_S."""
    print(f"\ndead time: the same plant and candidates with e^(-{DELAY_S:g} s) (invented); "
          "Delta = Dp Dc + Np Nc e^(-theta s)", flush=True)
    st_d, _, _ = synth_delay_screen(raw)
    stable_d = raw[st_d][:args.stable]
    r = {"rational screening (raw)": rate(synth_screen, raw, args.repeats),
         "dead-time screening (raw)": rate(synth_delay_screen, raw, args.repeats),
         "dead-time screening (stable)": rate(synth_delay_screen, stable_d, args.repeats),
         "dead-time frequency (stable)": rate(synth_delay_frequency, stable_d, args.repeats),
         "dead-time full set (stable)": rate(synth_delay_full, stable_d, args.repeats)}
    print(f"batches: raw {len(raw):,} ({100 * st_d.mean():.1f} % stable with the dead time), stable {len(stable_d):,}")
    print(f"{'':32s}{'synth':>26s}   target (on wall clock)")
    print("-" * 90)
    targets = {"dead-time screening (raw)": TARGET_DELAY_SCREEN, "dead-time screening (stable)": TARGET_DELAY_SCREEN,
               "dead-time full set (stable)": TARGET_DELAY_FULL}
    for k, v in r.items():
        t = targets.get(k)
        print(f"{k:32s}{fmt_rate(v[0]) + ' [' + fmt_rate(v[1]) + ']':>26s}   "
              + (f">= {t:,}/s: {'PASS' if v[0] >= t else 'FAIL'}" if t else ""))
    sub = raw[:args.naive_raw]
    rat = synth_full(sub)
    ded = synth_delay_full(sub)
    ok = rat["internally_stable"].to_numpy(bool)
    expect = ok & (rat["delay_margin_s"].to_numpy() > DELAY_S)
    got = ded["internally_stable"].to_numpy(bool)
    mism = int(np.sum(expect[ok] != got[ok]))
    both = expect & got
    dm = np.abs(ded["delay_margin_s"].to_numpy()[both] - (rat["delay_margin_s"].to_numpy()[both] - DELAY_S))
    rel = float(np.max(dm / rat["delay_margin_s"].to_numpy()[both])) if both.any() else 0.0
    counted = ded["loop_roots_counted"].to_numpy()[got]
    found = np.array([np.sum(~np.isnan(np.asarray(x))) for x in ded["closed_loop_poles"].to_numpy()[got]])
    print(f"verdict vs rational delay margin: {mism} mismatches on {int(ok.sum()):,} delay-free-stable of "
          f"{len(sub):,} raw candidates; delay margin = rational margin - theta to {rel:.2e} relative "
          f"({int(both.sum()):,} loops)")
    print(f"loop roots: counted (shifted crossing count) = found (Newton) on {int(np.sum(counted == found)):,} of "
          f"{int(got.sum()):,} stable loops; undecided counts {int(np.sum(counted < 0))}")
    process_section(args)


def process_section(args) -> None:
    """Full dead-time evaluation on a process loop with a long dead time and filtered PIDs (filter
    poles up to 1,000/s against a 4 s dead time: the graded steps), and the residue tail against
    the method of steps alone on the same loops."""
    rng = np.random.default_rng(7)
    p = np.column_stack([rng.uniform(lo, hi, 4000) for lo, hi in PROCESS_RANGES])
    screen = evaluate(PROCESS_PLANT, PROCESS_FAMILY, p)
    stable = p[screen["internally_stable"].to_numpy(bool)][:args.stable]
    full = rate(lambda q: evaluate(PROCESS_PLANT, PROCESS_FAMILY, q), stable, args.repeats)
    print(f"\nprocess loop: 1.8 e^(-4 s)/(60 s + 1) under filtered PIDs (invented); {len(stable):,} stable loops")
    print(f"{'dead-time full set (stable)':32s}{fmt_rate(full[0]) + ' [' + fmt_rate(full[1]) + ']':>26s}   "
          f">= {TARGET_DELAY_FULL:,}/s: {'PASS' if full[0] >= TARGET_DELAY_FULL else 'FAIL'}")
    sub = stable[:40]
    cnum, cden = PROCESS_FAMILY.controllers(sub)
    rp = PROCESS_PLANT.with_pade(6)
    poles = stability.closed_loop_poles(stability.characteristic(rp.num, rp.den, cnum, cden))
    _, _, dec = stability.pole_summary(poles)
    args_ = (PROCESS_PLANT.num, PROCESS_PLANT.den, cnum, cden, PROCESS_PLANT.delay, dec, 0.02)
    with_tail = delay_time.piecewise(*args_[:6], starts=poles)
    a = delay_time.delay_time_metrics(*args_, starts=poles)
    b = delay_time.delay_time_metrics(*args_)
    steps_only = delay_time.piecewise(*args_[:6])
    covered = np.array([t[-1] + h[-1] for t, h in zip(steps_only.t0, steps_only.h)]) >= 0.999 * 20.0 / dec
    worst = 0.0
    for k in (k for k in a if k != "horizon_cut"):      # the figures (the flag is a bool)
        fin = np.isfinite(a[k]) & np.isfinite(b[k]) & covered
        if fin.any():
            worst = max(worst, float(np.max(np.abs(a[k][fin] - b[k][fin]) / np.maximum(np.abs(b[k][fin]), 1e-9))))
    graded = int(np.sum([np.ptp(h[:int(m)]) > 0 for h, m in zip(with_tail.h, with_tail.m)]))
    print(f"residue tail on {int(with_tail.tail.sum())} of {len(sub)} loops ({graded} with graded steps); time "
          f"metrics with the tail vs the method of steps alone (on the {int(covered.sum())} loops it covers to the "
          f"horizon within {delay_time.MAX_INTERVALS:,} steps): max rel diff {worst:.2e}")


# ------------------------------------------------------------------ (a) naive reference
def naive_loop(row: np.ndarray):
    """Polynomials of one candidate: (Nc, Dc, characteristic, poles, stable, damping, decay)."""
    k, z, p = roots_of(row)
    nc, dc = k * np.poly(z), np.poly(p)
    dp, npl = np.poly(PLANT_POLES), np.array([PLANT_GAIN])
    char = np.polyadd(np.polymul(dp, dc), np.polymul(npl, nc))
    poles = np.roots(char)
    stable = bool(np.all(poles.real < 0))
    damping = float(np.min(-poles.real / np.abs(poles)))
    return nc, dc, char, poles, stable, damping, float(-poles.real.max())


def naive_screen(params: np.ndarray) -> np.ndarray:
    """Per-candidate loop: np.roots and the pole summary only."""
    out = np.empty((len(params), 3))
    for i, row in enumerate(params):
        *_, stable, damping, decay = naive_loop(row)
        out[i] = stable, damping, decay
    return out


def _naive_time(nc, dc, char, decay) -> dict:
    """Three scipy.signal.step calls on a uniform grid; metrics read off the samples."""
    dp, npl = np.poly(PLANT_POLES), np.array([PLANT_GAIN])
    t = np.linspace(0.0, HORIZON_DECAYS / decay, NAIVE_TIME_POINTS)
    _, yr = sig.step((np.polymul(npl, nc), char), T=t)
    _, yd = sig.step((np.polymul(npl, dc), char), T=t)
    _, yu = sig.step((np.polymul(nc, dp), char), T=t)
    yf = np.polyval(np.polymul(npl, nc), 0.0) / np.polyval(char, 0.0)
    sg = 1.0 if yf >= 0 else -1.0
    out_band = np.flatnonzero(np.abs(yr - yf) > BAND * abs(yf))
    settle = 0.0 if out_band.size == 0 else (np.inf if out_band[-1] == t.size - 1 else t[out_band[-1] + 1])
    ys = sg * yr
    t10, t90 = (t[np.argmax(ys >= f * abs(yf))] for f in (0.1, 0.9))
    return {
        "overshoot_pct": max(0.0, (ys.max() - abs(yf)) / abs(yf) * 100),
        "settling_time_s": settle,
        "rise_time_s": t90 - t10,
        "disturbance_peak": np.abs(yd).max(),
        "control_peak": np.abs(yu).max(),
    }


def _naive_frequency(nc, dc) -> dict:
    """Margins and sensitivity peak from a 400-point logspace grid (linear interpolation)."""
    nl, dl = np.polymul([PLANT_GAIN], nc), np.polymul(np.poly(PLANT_POLES), dc)
    w = NAIVE_FREQ
    L = np.polyval(nl, 1j * w) / np.polyval(dl, 1j * w)
    lw, g = np.log(w), np.log(np.abs(L))
    i = np.flatnonzero(np.sign(g[:-1]) != np.sign(g[1:]))
    wg = np.exp(lw[i] - g[i] * (lw[i + 1] - lw[i]) / (g[i + 1] - g[i]))
    lg = np.polyval(nl, 1j * wg) / np.polyval(dl, 1j * wg)
    j = np.flatnonzero((np.sign(L.imag[:-1]) != np.sign(L.imag[1:])) & (L.real[:-1] < 0))
    re = L.real[j] - L.imag[j] * (L.real[j + 1] - L.real[j]) / (L.imag[j + 1] - L.imag[j])
    kc = np.concatenate([-1.0 / re, [-1.0 / L[0].real] if L[0].real < 0 else []])
    up, lo = kc[kc > 1], kc[kc < 1]
    return {
        "phase_margin_deg": np.degrees(np.angle(-lg)).min() if wg.size else np.inf,
        "crossover_rad_s": wg.max() if wg.size else np.nan,
        "gain_margin_db": 20 * np.log10(up.min()) if up.size else np.inf,
        "gain_margin_low_db": 20 * np.log10(lo.max()) if lo.size else -np.inf,
        "sensitivity_peak": np.abs(1.0 / (1.0 + L)).max(),
    }


def naive_full(params: np.ndarray) -> list[dict]:
    """Per-candidate loop: poles, then time and frequency metrics for the stable ones."""
    rows = []
    for row in params:
        nc, dc, char, poles, stable, damping, decay = naive_loop(row)
        m = {"internally_stable": stable, "min_damping": damping, "decay_rate": decay}
        if stable:
            m.update(_naive_time(nc, dc, char, decay))
            m.update(_naive_frequency(nc, dc))
        rows.append(m)
    return rows


# ------------------------------------------------------------------ timing
CPU_WALL: list[tuple[float, float]] = []   # (process CPU s, wall s) of every timed run


def rate(fn, batch: np.ndarray, repeats: int = 1) -> tuple[float, float]:
    """Candidates per second of fn(batch): (best wall-clock rate, best process-CPU rate) of ``repeats`` runs.

    With BLAS pinned to one thread the work is single-threaded, so the CPU-time rate is
    what the wall clock would show on an otherwise idle core.
    """
    wall, cpu = np.inf, np.inf
    for _ in range(repeats):
        c0, t0 = time.process_time(), time.perf_counter()
        fn(batch)
        w, c = time.perf_counter() - t0, time.process_time() - c0
        CPU_WALL.append((c, w))
        wall, cpu = min(wall, w), min(cpu, c)
    return len(batch) / wall, len(batch) / max(cpu, 1e-9)


# ------------------------------------------------------------------ (c) accurate reference
def _mp_poly(roots, gain=1.0) -> list:
    """gain * prod(s - r) in mpmath, descending coefficients."""
    c = [mpmath.mpf(gain)]
    for r in roots:
        c = [a - mpmath.mpf(r) * b for a, b in zip(c + [0], [0] + c)]
    return c


def _mp_add(a, b) -> list:
    n = max(len(a), len(b))
    a, b = [0] * (n - len(a)) + list(a), [0] * (n - len(b)) + list(b)
    return [x + y for x, y in zip(a, b)]


def _mp_mul(a, b) -> list:
    out = [mpmath.mpf(0)] * (len(a) + len(b) - 1)
    for i, x in enumerate(a):
        for j, y in enumerate(b):
            out[i + j] += x * y
    return out


@dataclass
class RefLoop:
    """One candidate's loop polynomials in high precision and its accurate poles."""
    char: np.ndarray          # characteristic polynomial, rounded from 40 digits
    nums: np.ndarray          # (3, n+1): reference->y, load->y, reference->u numerators
    final: np.ndarray         # (3,) DC gains
    poles: np.ndarray         # closed-loop poles (40-digit roots, rounded)


def reference_loop(row: np.ndarray) -> RefLoop:
    """Build Delta = Dp Dc + Np Nc and the three numerators in 40-digit arithmetic."""
    k, z, p = roots_of(row)
    with mpmath.workdps(MP_DIGITS):
        dp, npl = _mp_poly(PLANT_POLES), [mpmath.mpf(PLANT_GAIN)]
        nc, dc = _mp_poly(z, k), _mp_poly(p)
        char = _mp_add(_mp_mul(dp, dc), _mp_mul(npl, nc))
        nums = [_mp_mul(npl, nc), _mp_mul(npl, dc), _mp_mul(nc, dp)]
        final = [n_[-1] / char[-1] for n_ in nums]
        roots = mpmath.polyroots(char, maxsteps=500, extraprec=4 * MP_DIGITS)
        n1 = len(char)
        nums_f = np.array([[0.0] * (n1 - len(q)) + [float(c) for c in q] for q in nums])
        return RefLoop(np.array([float(c) for c in char]), nums_f,
                       np.array([float(f) for f in final]), np.array([complex(r) for r in roots]))


def _time_grid(poles: np.ndarray, decay: float) -> list[tuple[float, float, int]]:
    """Piecewise-uniform grid as (start, step, samples) segments up to REF_HORIZON_DECAYS/decay.

    Segments double in length from 0.05/|fastest pole|; inside each, the step is the
    segment length / REF_SEGMENT_SAMPLES, or shorter so that every oscillatory mode still
    alive at the segment start gets REF_SAMPLES_PER_PERIOD samples per period.
    """
    horizon = REF_HORIZON_DECAYS / decay
    osc = poles[np.abs(poles.imag) > 1e-12 * np.abs(poles)]
    segs, a, b = [], 0.0, 0.05 / np.abs(poles).max()
    while a < horizon:
        b = min(b, horizon)
        h = (b - a) / REF_SEGMENT_SAMPLES
        alive = osc[np.exp(osc.real * a) > 1e-9]
        if alive.size:
            h = min(h, 2 * np.pi / np.abs(alive.imag).max() / REF_SAMPLES_PER_PERIOD)
        m = int(np.ceil((b - a) / h))
        segs.append((a, (b - a) / m, m))
        a, b = b, 2 * b
    return segs


class RefResponse:
    """Reference-step, load-step and control responses of one loop, accurate at any time.

    Realisation: scipy.signal.tf2ss of the three numerators over Delta, diagonally
    balanced (scipy.linalg.matrix_balance). Samples: scipy.signal.lsim segment by
    segment (state carried over). Between samples: the exact zero-order-hold
    solution x(t_k + tau) = Phi(tau) x_k + Gamma(tau) from one matrix exponential.
    """

    def __init__(self, loop: RefLoop, decay: float):
        a, b, c, d = sig.tf2ss(loop.nums, loop.char)
        ab, (sc, _) = sla.matrix_balance(a, permute=False, separate=True)
        self.a, self.b, self.c, self.d = ab, b[:, 0] / sc, c * sc[None, :], d[:, 0]
        self.final = loop.final
        self.n = ab.shape[0]
        segs = _time_grid(loop.poles, decay)
        self.capped = sum(m for *_, m in segs) > REF_MAX_SAMPLES
        if self.capped:
            segs = [(s0, h * m / (REF_MAX_SAMPLES // len(segs)), REF_MAX_SAMPLES // len(segs)) for s0, h, m in segs]
        ts, xs, hs = [np.zeros(1)], [np.zeros((1, self.n))], [np.zeros(1)]
        x0 = np.zeros(self.n)
        for s0, h, m in segs:
            tl = h * np.arange(m + 1)
            _, _, xo = sig.lsim((self.a, self.b[:, None], self.c, self.d[:, None]), np.ones(m + 1), tl, X0=x0)
            xo = xo.reshape(m + 1, self.n)
            ts.append(s0 + tl[1:])
            xs.append(xo[1:])
            hs.append(np.full(m, h))
            x0 = xo[-1]
        self.t, self.x, self.h = np.concatenate(ts), np.concatenate(xs), np.concatenate(hs)
        self.y = self.x @ self.c.T + self.d

    def at(self, t) -> np.ndarray:
        """Outputs (K, 3) at times t (K,), exact ZOH propagation from the previous sample."""
        t = np.atleast_1d(np.asarray(t, float))
        k = np.clip(np.searchsorted(self.t, t, side="right") - 1, 0, self.t.size - 1)
        tau = t - self.t[k]
        m = np.zeros((self.n + 1, self.n + 1))
        m[:self.n, :self.n], m[:self.n, self.n] = self.a, self.b
        e = sla.expm(m[None] * tau[:, None, None])
        x = np.einsum("kij,kj->ki", e[:, :self.n, :self.n], self.x[k]) + e[:, :self.n, self.n]
        return x @ self.c.T + self.d

    def value(self, t: float, j: int, sign: float = 1.0) -> float:
        return sign * float(self.at(t)[0, j])


def _refined_peak(r: RefResponse, j: int, sign: float, candidates: int = 8) -> float:
    """max over time of sign*y_j, refined by bounded Brent next to the largest samples.

    Every local maximum of the samples within 1 % of the sampled range below the largest
    (at most ``candidates`` of them, highest first) is refined: where the envelope of a lightly
    damped mode is flat, neighbouring crests differ by less than the samples' own error
    (~(pi/64)^2/2 of the amplitude at 64 samples per period), so the largest sample need not
    sit next to the highest crest."""
    v = sign * r.y[:, j]
    k0 = int(np.argmax(v))
    inner = np.flatnonzero((v[1:-1] >= v[:-2]) & (v[1:-1] >= v[2:])) + 1
    near = inner[v[inner] >= v[k0] - 1e-2 * (np.ptp(v) + 1e-300)]
    ks = [k0] + [int(k) for k in near[np.argsort(-v[near])][:candidates] if k != k0]
    best = float(v[k0])
    for k in ks:
        lo, hi = r.t[max(k - 1, 0)], r.t[min(k + 1, r.t.size - 1)]
        if hi <= lo:
            continue
        res = sopt.minimize_scalar(lambda t: -r.value(t, j, sign), bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-13 * hi, "maxiter": 200})
        best = max(best, float(v[k]), -float(res.fun))
    return best


def _crossing(r: RefResponse, j: int, k: int, level: float, sign: float = 1.0) -> float:
    """Root of sign*y_j(t) = level in [t_k, t_k+1] by brentq on the exact solution."""
    return sopt.brentq(lambda t: r.value(t, j, sign) - level, r.t[k], r.t[k + 1], xtol=1e-300, rtol=1e-15)


def reference_time(r: RefResponse) -> dict:
    """Overshoot, settling, rise, disturbance and control peaks (DESIGN definitions)."""
    yf = r.final[0]
    sg = -1.0 if yf < 0 else 1.0
    e = r.y[:, 0] - yf
    band = BAND * abs(yf)
    outside = np.flatnonzero(np.abs(e) > band)
    if outside.size == 0:
        settle, h_settle = 0.0, r.h[1]
    elif outside[-1] == r.t.size - 1:
        settle, h_settle = np.inf, r.h[-1]
    else:
        k = int(outside[-1])
        edge = np.sign(e[k]) * band
        settle, h_settle = _crossing(r, 0, k, yf + edge), r.h[k + 1]
    rise = []
    for frac in (0.1, 0.9):
        k = int(np.argmax(sg * r.y[:, 0] >= frac * abs(yf)))
        rise.append(_crossing(r, 0, k - 1, frac * abs(yf), sg))
    peak = _refined_peak(r, 0, sg)
    return {
        "overshoot_pct": max(0.0, (peak - abs(yf)) / abs(yf) * 100),
        "settling_time_s": settle,
        "settling_step_s": h_settle,
        "rise_time_s": rise[1] - rise[0],
        # sup over all t >= 0: a response that creeps up to its final value peaks at t -> inf
        "disturbance_peak": max(_refined_peak(r, 1, 1.0), _refined_peak(r, 1, -1.0), abs(r.final[1])),
        "control_peak": max(_refined_peak(r, 2, 1.0), _refined_peak(r, 2, -1.0), abs(r.final[2])),
    }


def _loop_response(row: np.ndarray):
    """L(jw) from the zero/pole product form (no polynomial expansion)."""
    k, z, p = roots_of(row)
    pp = np.array(PLANT_POLES)

    def loop(w):
        s = 1j * np.asarray(w, float)[..., None]
        return PLANT_GAIN * k * np.prod(s - z, axis=-1) / (np.prod(s - pp, axis=-1) * np.prod(s - p, axis=-1))
    return loop


def _frequency_grid(poles: np.ndarray) -> np.ndarray:
    """Dense log grid plus clusters around each closed-loop pole frequency (sharp peaks of S)."""
    extra = [REF_FREQ]
    for q in poles[poles.imag > 0]:
        extra.append(q.imag + abs(q.real) * np.linspace(-20, 20, 801))
        extra.append([abs(q)])
    w = np.concatenate(extra)
    return np.unique(w[w > 0])


def reference_frequency(row: np.ndarray, poles: np.ndarray) -> dict:
    """Margins, highest crossover, sensitivity peak: dense grid refined by brentq / Brent."""
    loop = _loop_response(row)
    w = _frequency_grid(poles)
    u = np.log(w)
    L = loop(w)
    g = np.log(np.abs(L))
    roots = lambda f, vals: [sopt.brentq(f, u[i], u[i + 1], xtol=1e-15, rtol=1e-15)
                             for i in np.flatnonzero(np.sign(vals[:-1]) * np.sign(vals[1:]) < 0)]
    ug = np.array(roots(lambda x: np.log(abs(loop(np.exp(x))[()])), g))
    lg = loop(np.exp(ug)) if ug.size else np.zeros(0, complex)
    ph = L.imag / np.abs(L)
    up = np.array(roots(lambda x: (lambda v: v.imag / abs(v))(loop(np.exp(x))[()]), ph))
    lp = loop(np.exp(up)) if up.size else np.zeros(0, complex)
    l0 = loop(0.0)[()]
    lreal = np.concatenate([lp.real[lp.real < 0], [l0.real] if l0.real < 0 else []])
    kc = -1.0 / lreal
    above, below = kc[kc > 1], kc[kc < 1]
    s_abs = np.abs(1.0 / (1.0 + L))
    k = int(np.argmax(s_abs))
    res = sopt.minimize_scalar(lambda x: -abs(1.0 / (1.0 + loop(np.exp(x))[()])),
                               bounds=(u[max(k - 1, 0)], u[min(k + 1, u.size - 1)]), method="bounded",
                               options={"xatol": 1e-14, "maxiter": 200})
    ms = max(s_abs[k], -res.fun, abs(1.0 / (1.0 + l0)), 1.0)
    return {
        "phase_margin_deg": np.degrees(np.angle(-lg)).min() if ug.size else np.inf,
        "crossover_rad_s": np.exp(ug).max() if ug.size else np.nan,
        "gain_margin_db": 20 * np.log10(above.min()) if above.size else np.inf,
        "gain_margin_low_db": 20 * np.log10(below.max()) if below.size else -np.inf,
        "sensitivity_peak": ms,
    }


def reference_candidate(row: np.ndarray, synth_t: np.ndarray | None = None) -> dict:
    """All accurate reference metrics of one stable candidate (plus samples at synth's times)."""
    loop = reference_loop(row)
    poles = loop.poles
    decay = -poles.real.max()
    r = RefResponse(loop, decay)
    out = {"closed_loop_poles": poles, "min_damping": np.min(-poles.real / np.abs(poles)),
           "decay_rate": decay, "grid_capped": r.capped, "grid_samples": r.t.size, "final": loop.final}
    out.update(reference_time(r))
    out.update(reference_frequency(row, poles))
    if synth_t is not None:
        out["samples_at_synth_t"] = r.at(synth_t)
    return out


# ------------------------------------------------------------------ agreement
def synth_samples(params: np.ndarray):
    """synth's own sampled responses (times, values), on the grid its metrics come from."""
    cnum, cden = FAMILY.controllers(params)
    r = step_responses(PLANT, cnum, cden)
    return r.t, r.y


def rel_diff(s, r, floor: float) -> float:
    """|s - r| / max(|r|, floor); 0 when both are the same infinity, inf when only one is."""
    s, r = float(s), float(r)
    if np.isnan(s) and np.isnan(r):
        return 0.0
    if np.isinf(s) or np.isinf(r):
        return 0.0 if s == r else np.inf
    if np.isnan(s) or np.isnan(r):
        return np.inf
    return abs(s - r) / max(abs(r), floor, 1e-300)


def pole_diff(ps: np.ndarray, pr: np.ndarray) -> float:
    """Largest |synth pole - reference pole| / |reference pole| after optimal matching."""
    ps = ps[~np.isnan(ps)]
    if ps.size != pr.size:
        return np.inf
    cost = np.abs(ps[:, None] - pr[None, :])
    i, j = sopt.linear_sum_assignment(cost)
    return float(np.max(cost[i, j] / np.abs(pr[j])))


def settling_samples(ts: float, tr: float, ref_step: float, synth_t: np.ndarray) -> tuple[float, float]:
    """|synth - reference| settling time in reference-grid samples and in synth's own samples there."""
    if not (np.isfinite(ts) and np.isfinite(tr)):
        return (0.0, 0.0) if ts == tr else (np.inf, np.inf)
    k = int(np.clip(np.searchsorted(synth_t, tr) - 1, 0, synth_t.size - 2))
    return abs(ts - tr) / ref_step, abs(ts - tr) / (synth_t[k + 1] - synth_t[k])


def resolution(synth_t: np.ndarray, poles: np.ndarray) -> dict:
    """How well synth's time grid resolves the loop: first step x fastest pole magnitude,
    and largest step / shortest oscillation period (both well below 1 when resolved)."""
    h = np.diff(synth_t)
    osc = np.abs(poles.imag[np.abs(poles.imag) > 1e-12 * np.abs(poles)])
    return {"h0_x_pmax": h[0] * np.abs(poles).max(),
            "hmax_per_period": h.max() * osc.max() / (2 * np.pi) if osc.size else 0.0}


def agreement(params: np.ndarray, df: pd.DataFrame, progress: bool = True) -> tuple[pd.DataFrame, list[dict]]:
    """Per-candidate relative differences between synth (df rows) and the accurate reference."""
    st, sy = synth_samples(params)
    rows, refs = [], []
    t0 = time.perf_counter()
    for i, row in enumerate(params):
        ref = reference_candidate(row, st[i])
        s = df.iloc[i]
        d = {m: rel_diff(s[m], ref[m], f) for m, f in AGREEMENT_METRICS.items() if m != "closed_loop_poles"}
        d["closed_loop_poles"] = pole_diff(np.asarray(s["closed_loop_poles"]), ref["closed_loop_poles"])
        d["settling_samples"], d["settling_synth_samples"] = settling_samples(
            s["settling_time_s"], ref["settling_time_s"], ref["settling_step_s"], st[i])
        if ref["grid_capped"]:           # late oscillation not resolved by the reference: no verdict
            d["settling_time_s"] = d["settling_samples"] = d["settling_synth_samples"] = np.nan
        d.update(resolution(st[i], ref["closed_loop_poles"]))
        scale = np.maximum(np.abs(ref["samples_at_synth_t"]).max(axis=0), 1e-300)
        d["samples_at_synth_t"] = float(np.max(np.abs(sy[i] - ref["samples_at_synth_t"]) / scale))
        d["grid_capped"] = ref["grid_capped"]
        rows.append(d)
        refs.append(ref)
        if progress and (i + 1) % 100 == 0:
            print(f"  ... agreement {i + 1}/{len(params)} ({time.perf_counter() - t0:.0f} s)", flush=True)
    return pd.DataFrame(rows), refs


def stability_mismatches(params: np.ndarray, df: pd.DataFrame) -> int:
    """Count raw candidates where synth's internally_stable differs from the 40-digit poles."""
    ref = np.array([bool(np.all(reference_loop(r).poles.real < 0)) for r in params])
    return int(np.sum(ref != df["internally_stable"].to_numpy(bool)))


# ------------------------------------------------------------------ printing
def fmt_rate(x: float) -> str:
    return f"{x:,.0f}/s" if x >= 100 else f"{x:,.1f}/s"


def speed_table(r: dict) -> str:
    """Side-by-side speeds (wall clock; per CPU-second in brackets) with their targets."""
    lines = [f"{'':24s}{'naive (a)':>22s}{'synth (b)':>24s}{'(b)/(a)':>9s}   target (on wall clock)",
             "-" * 118]

    def cell(x):
        return f"{fmt_rate(x[0])} [{fmt_rate(x[1])}]"

    def line(name, a, b, target):
        lines.append(f"{name:24s}{cell(a):>22s}{cell(b):>24s}{b[0] / a[0]:>8.1f}x   {target}")

    ok = lambda c: "PASS" if c else "FAIL"
    sc, st, ns = r["synth_screen"][0], r["synth_stable"][0], r["naive_stable"][0]
    line("screening (raw batch)", r["naive_screen"], r["synth_screen"], f">= {TARGET_SCREEN:,}/s: {ok(sc >= TARGET_SCREEN)}")
    line("full set, raw batch", r["naive_raw"], r["synth_raw"], "(mostly unstable: cheap)")
    line("full set, stable only", r["naive_stable"], r["synth_stable"],
         f">= {TARGET_FULL:,}/s: {ok(st >= TARGET_FULL)}; >= {TARGET_RATIO:.0f}x: {ok(st / ns >= TARGET_RATIO)}")
    return "\n".join(lines)


def agreement_table(d: pd.DataFrame) -> str:
    """metric | max rel diff | target | pass/fail | candidates beyond target | worst candidate."""
    lines = [f"{'metric':22s}{'max rel diff':>14s}{'target':>10s}   {'result':7s}{'beyond':>8s}{'worst #':>9s}",
             "-" * 70]

    def line(name, value, target, ok, beyond, worst, note=""):
        lines.append(f"{name:22s}{value:>14.2e}{target:>10s}   {'pass' if ok else 'FAIL':7s}"
                     f"{beyond:>8d}{worst:>9d}{note}")

    for m, floor in AGREEMENT_METRICS.items():
        v = d[m].to_numpy(float)
        k = int(np.nanargmax(v))
        if m == "settling_time_s":       # judged in samples of the reference grid
            smp = d["settling_samples"].to_numpy(float)
            ks = int(np.nanargmax(smp))
            bad = int(np.sum(smp > 1))
            note = (f"   max {smp[ks]:.3g} reference samples = {d['settling_synth_samples'].iloc[ks]:.3g} "
                    f"synth samples; {int(np.sum(d['settling_synth_samples'] > 1))} beyond 1 synth sample")
            line(m, v[k], "1 sample", bad == 0, bad, ks, note)
            continue
        line(m, v[k], f"{TARGET_REL:.0e}", v[k] <= TARGET_REL, int(np.sum(v > TARGET_REL)), k,
             f"   (denominator floor {floor:g})" if floor else "")
    v = d["samples_at_synth_t"].to_numpy(float)
    k = int(np.nanargmax(v))
    lines.append(f"{'y(t) at synth times':22s}{v[k]:>14.2e}{'(info)':>10s}   {'':7s}{'':8s}{k:>9d}"
                 "   (synth's samples vs exact, rel. to each response's peak)")
    return "\n".join(lines)


def hint(metric: str, d: pd.Series, ref: dict) -> str:
    """What the reference says about a disagreement: where the sup lies, how fine synth's grid is."""
    j = {"disturbance_peak": 1, "control_peak": 2}.get(metric)
    if j is not None and ref[metric] == abs(ref["final"][j]):
        return "reference sup is |final value|, reached as t -> inf"
    return (f"synth grid: first step x |p|max {d['h0_x_pmax']:.3g}, "
            f"max step / shortest period {d['hmax_per_period']:.3g}")


def disagreements(d: pd.DataFrame, params: np.ndarray, df: pd.DataFrame, refs: list[dict]) -> str:
    """Reproducers for every metric beyond its target: the worst candidates' parameters."""
    out = []
    checks = [(m, m, TARGET_REL) for m in AGREEMENT_METRICS if m != "settling_time_s"]
    checks.append(("settling_time_s [reference samples]", "settling_samples", 1.0))
    for label, col, tol in checks:
        v = d[col].to_numpy(float)
        bad = np.flatnonzero(v > tol)
        if not bad.size:
            continue
        worst = bad[np.argsort(-v[bad])][:3]
        metric = "settling_time_s" if col == "settling_samples" else col
        out.append(f"{label}: {bad.size}/{len(v)} candidates beyond target; worst:")
        for k in worst:
            s, r = df.iloc[k][metric], refs[k][metric]
            if metric == "closed_loop_poles":
                s, r = np.sort_complex(np.asarray(s)), np.sort_complex(r)
            out.append(f"  #{k} diff {v[k]:.3e}  synth {s}  reference {r}   [{hint(metric, d.iloc[k], refs[k])}]")
            out.append(f"     params = np.array([{', '.join(repr(float(x)) for x in params[k])}])")
    if not out:
        return "none: every metric within its target"
    out.append("reproduce:  from synth.evaluate import evaluate; from synth.lti import TransferFunction; "
               "from synth.structures import Family")
    out.append("            evaluate(TransferFunction.from_roots([], [2, -5, -20], 200.0), "
               "Family(stages=('lead', 'lead')), params[None]).T")
    return "\n".join(out)


# ------------------------------------------------------------------ main
def parse_args(argv=None) -> argparse.Namespace:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--n", type=int, default=None, help="raw batch size for synth (default 200000; quick 20000)")
    ap.add_argument("--stable", type=int, default=None, help="stable candidates (default 2000; quick 200)")
    ap.add_argument("--agree", type=int, default=None, help="stable candidates in the agreement check "
                    "(default: all of --stable; quick 40)")
    ap.add_argument("--seed", type=int, default=20240611)
    ap.add_argument("--quick", action="store_true", help="small sizes, runs in well under 30 s")
    a = ap.parse_args(argv)
    q = a.quick
    a.n = a.n or (20_000 if q else 200_000)
    a.stable = a.stable or (200 if q else 2_000)
    a.agree = min(a.agree or (40 if q else a.stable), a.stable)
    a.naive_screen = min(a.n, 2_000 if q else 20_000)
    a.naive_raw = min(a.n, 400 if q else 4_000)
    a.naive_stable = min(a.stable, 20 if q else 200)
    a.repeats = 3
    a.naive_repeats = 1 if q else 2
    return a


def main(argv=None) -> None:
    args = parse_args(argv)
    with threadpool_limits(limits=1):
        run(args)


def run(args: argparse.Namespace) -> None:
    print("synth evaluator benchmark" + (" (--quick)" if args.quick else ""))
    print("\n".join(machine_lines()))
    print(f"scenario P(s) = 200/((s-2)(s+5)(s+20)) with two lead stages (5th-order Delta); "
          f"log10 K in {list(GAIN_RANGE)}, log10 corners in {list(CORNER_RANGE)}, admissible only; seed {args.seed}")
    rng = np.random.default_rng(args.seed)
    raw = sample_batch(rng, args.n)
    stable = sample_stable(rng, args.stable)
    synth_full(raw[:200])                         # warm-up (imports, first calls)

    r = {}
    print(f"\ntiming: wall clock, synth best of {args.repeats}, naive best of {args.naive_repeats} "
          "on a subset (per candidate)", flush=True)
    r["synth_screen"] = rate(synth_screen, raw, args.repeats)
    r["synth_raw"] = rate(synth_full, raw, args.repeats)
    r["synth_stable"] = rate(synth_full, stable, args.repeats)
    r["naive_screen"] = rate(naive_screen, raw[:args.naive_screen], args.naive_repeats)
    r["naive_raw"] = rate(naive_full, raw[:args.naive_raw], args.naive_repeats)
    r["naive_stable"] = rate(naive_full, stable[:args.naive_stable], args.naive_repeats)
    frac = float(synth_screen(raw)[0].mean())
    print(f"batches: raw {len(raw):,} ({100 * frac:.1f} % stable), stable {len(stable):,}; naive on "
          f"{args.naive_screen:,} raw (screening), {args.naive_raw:,} raw and {args.naive_stable:,} stable (full)")
    print(f"naive grids: {NAIVE_TIME_POINTS} uniform samples on [0, {HORIZON_DECAYS:g}/decay] per response "
          f"(3 x scipy.signal.step), {NAIVE_FREQ.size}-point logspace 1e-3..1e4 rad/s")
    print()
    print(speed_table(r))
    cpu, wall = np.sum(CPU_WALL, axis=0)
    busy = "; below 100 % means other load shared the cores" if cpu < 0.9 * wall else ""
    print(f"process CPU / wall time over the timed runs: {100 * cpu / wall:.0f} %{busy} (load now {load_average()})")

    print(f"\nagreement on {args.agree:,} stable candidates against the accurate reference "
          f"(40-digit poles; lsim + brentq/Brent in time; dense zero-pole grid + brentq/Brent in frequency)", flush=True)
    sub = stable[:args.agree]
    df = synth_full(sub)
    d, refs = agreement(sub, df, progress=not args.quick)
    mism = stability_mismatches(raw[:args.naive_raw], synth_full(raw[:args.naive_raw]))
    capped = int(d["grid_capped"].sum())
    print(f"reference time grid: {int(np.median([x['grid_samples'] for x in refs])):,} samples median, "
          f"{max(x['grid_samples'] for x in refs):,} max; capped at {REF_MAX_SAMPLES:,} for {capped} "
          "candidates (settling not judged for those)")
    print(agreement_table(d))
    print(f"{'internally_stable':22s}{mism:>14d}{'0':>10s}   {'pass' if mism == 0 else 'FAIL':8s}"
          f"   (mismatches on {args.naive_raw:,} raw candidates vs 40-digit poles)")
    print("\ndisagreements beyond target:")
    print(disagreements(d, sub, df, refs))
    delay_section(args, raw)


if __name__ == "__main__":
    main()
