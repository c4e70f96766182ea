"""Plant model sets: the nominal model, named variants and a box of coefficient intervals.

A :class:`ModelSet` is what a spec's ``[plant]``, ``[plant.intervals]`` and
``[[plant.variants]]`` describe. Stability over the whole coefficient box is
certified exactly elsewhere (:mod:`synth.evaluate.robust`, generalized Kharitonov
theorem); performance is judged on a finite, deterministic list of models
(:meth:`ModelSet.models`): the nominal, each variant, the box's vertices and
``samples`` interior points. Performance inside the box is therefore *sampled*,
while stability over the box is *certified*.

Vertices: all 2^k corners for k <= ``FULL_VERTICES_MAX_K`` interval coefficients;
above that, a stated deterministic subset: the 16 Kharitonov vertex pairs
(Kharitonov 1978, the corners that bound the value set at every frequency), the
all-low and all-high corners, the corner of smallest |DC gain|, and
scrambled-Sobol corners (Owen 1998; scipy.stats.qmc, seed 0) up to
``SUBSET_VERTICES`` corners. Interior samples: scrambled Sobol points (seed 1).

The parsing helpers at the end are used by :mod:`synth.spec` and raise its
:class:`~synth.spec.SpecError` through the reader, so messages name the file and key.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from fractions import Fraction
from functools import cached_property

import numpy as np

from .lti import TransferFunction, poly_from_roots

FULL_VERTICES_MAX_K = 6        # 2^6 = 64 corners at most in full
SUBSET_VERTICES = 64           # corners kept above that
DEFAULT_SAMPLES = 64
MAX_SAMPLES = 4096
VARIANT_KEYS = ("name", "numerator", "denominator", "zeros", "poles", "gain", "transfer", "delay_s")

# Kharitonov's patterns over ascending powers a0, a1, a2, a3 (period 4); 0 = low end, 1 = high end.
# Numbering as in Bhattacharyya, Chapellat & Keel, *Robust Control: The Parametric Approach*, 1995, sec. 5.
KHARITONOV_PATTERNS = ((0, 0, 1, 1), (0, 1, 1, 0), (1, 0, 0, 1), (1, 1, 0, 0))


@dataclass(frozen=True)
class Model:
    """One member of the evaluated list: ``kind`` is nominal | variant | vertex | sample."""

    name: str
    plant: TransferFunction
    kind: str


@dataclass(frozen=True, eq=False)
class CoefficientBox:
    """Independent intervals [lo, hi] of the plant coefficients (descending powers of s).

    ``num_*`` and ``den_*`` have the lengths of the nominal numerator and denominator
    lists as written in the spec. ``origin`` says how the box was obtained
    ("coefficients", or "roots" when real-root and gain intervals were enclosed by
    interval arithmetic, a sound but conservative box).
    """

    num_lo: np.ndarray
    num_hi: np.ndarray
    den_lo: np.ndarray
    den_hi: np.ndarray
    origin: str = "coefficients"

    def __post_init__(self):
        for k in ("num_lo", "num_hi", "den_lo", "den_hi"):
            a = np.array(getattr(self, k), dtype=float)
            a.flags.writeable = False
            object.__setattr__(self, k, a)

    def __eq__(self, other):
        return (isinstance(other, CoefficientBox)
                and all(np.array_equal(getattr(self, k), getattr(other, k))
                        for k in ("num_lo", "num_hi", "den_lo", "den_hi")))

    __hash__ = None

    @property
    def lo(self) -> np.ndarray:
        return np.concatenate([self.num_lo, self.den_lo])

    @property
    def hi(self) -> np.ndarray:
        return np.concatenate([self.num_hi, self.den_hi])

    @property
    def free(self) -> np.ndarray:
        """Indices (into num then den) of the coefficients with lo < hi."""
        return np.flatnonzero(self.lo < self.hi)

    @property
    def k(self) -> int:
        return int(self.free.size)

    def split(self, coeffs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        m = self.num_lo.size
        return coeffs[:m], coeffs[m:]

    def point(self, coeffs: np.ndarray) -> TransferFunction:
        n, d = self.split(np.asarray(coeffs, float))
        return TransferFunction(n, d)

    def corner(self, bits) -> np.ndarray:
        """Coefficients of the corner with ``bits`` (0 = low, 1 = high) over the free coefficients."""
        c = self.lo.copy()
        hi = self.hi
        f = self.free
        b = np.asarray(bits, bool)
        c[f[b]] = hi[f[b]]
        return c

    def describe(self) -> str:
        def one(lo, hi):
            return "[" + ", ".join(f"{a:g}" if a == b else f"[{a:g}, {b:g}]" for a, b in zip(lo, hi)) + "]"
        text = f"numerator {one(self.num_lo, self.num_hi)}, denominator {one(self.den_lo, self.den_hi)}"
        if self.origin == "roots":
            text += " (enclosing coefficient box of the root and gain intervals, by interval arithmetic: sound, conservative)"
        return text


def kharitonov_vertices(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """The four Kharitonov polynomials of the interval polynomial [lo, hi] (descending), shape (4, n).

    Kharitonov, *Differential Equations* 14, 1978; numbering of Bhattacharyya,
    Chapellat & Keel 1995: ascending-power patterns (lo,lo,hi,hi), (lo,hi,hi,lo),
    (hi,lo,lo,hi), (hi,hi,lo,lo), repeated with period 4.
    """
    lo, hi = np.asarray(lo, float)[::-1], np.asarray(hi, float)[::-1]
    out = np.empty((4, lo.size))
    for i, pat in enumerate(KHARITONOV_PATTERNS):
        sel = np.array([pat[j % 4] for j in range(lo.size)], bool)
        out[i] = np.where(sel, hi, lo)
    return out[:, ::-1]


@dataclass(frozen=True, eq=False)
class ModelSet:
    """Nominal plant, named variants and an optional coefficient box, with ``samples`` interior points."""

    nominal: TransferFunction
    variants: tuple[tuple[str, TransferFunction], ...] = ()
    box: CoefficientBox | None = None
    samples: int = DEFAULT_SAMPLES
    notes: tuple[str, ...] = field(default=())

    def __eq__(self, other):
        if not isinstance(other, ModelSet):
            return NotImplemented

        def same(a: TransferFunction, b: TransferFunction):
            return np.array_equal(a.num, b.num) and np.array_equal(a.den, b.den) and a.delay == b.delay
        return (same(self.nominal, other.nominal) and len(self.variants) == len(other.variants)
                and all(n1 == n2 and same(t1, t2) for (n1, t1), (n2, t2) in zip(self.variants, other.variants))
                and self.box == other.box and self.samples == other.samples)

    __hash__ = None

    @property
    def trivial(self) -> bool:
        """Only the nominal model (no variants, no interval of positive width)."""
        return not self.variants and (self.box is None or self.box.k == 0)

    # ------------------------------------------------------------ members
    def vertex_bits(self) -> tuple[np.ndarray, str]:
        """(bits (V, k), how they were chosen) for the box's corners (see the module docstring)."""
        b = self.box
        if b is None or b.k == 0:
            return np.zeros((0, 0), bool), "no interval coefficients"
        k = b.k
        if k <= FULL_VERTICES_MAX_K:
            grid = ((np.arange(2 ** k)[:, None] >> np.arange(k - 1, -1, -1)) & 1).astype(bool)
            return grid, f"all {2 ** k} vertices of the {k} interval coefficients"
        rows = []
        f = b.free
        m = b.num_lo.size
        kn = kharitonov_vertices(b.num_lo, b.num_hi)
        kd = kharitonov_vertices(b.den_lo, b.den_hi)
        hi = b.hi
        for i in range(4):
            for j in range(4):
                c = np.concatenate([kn[i], kd[j]])
                rows.append(c[f] == hi[f])
        rows.append(np.zeros(k, bool))
        rows.append(np.ones(k, bool))
        dc = np.zeros(k, bool)          # smallest |N(0)| / largest |D(0)| corner
        for idx, pos in ((m - 1, False), (b.lo.size - 1, True)):
            where = np.flatnonzero(f == idx)
            if where.size:
                big_hi = abs(hi[idx]) >= abs(b.lo[idx])
                dc[where[0]] = big_hi if pos else not big_hi
        rows.append(dc)
        from scipy.stats import qmc          # on use: scipy.stats costs ~1 s to import
        sob = qmc.Sobol(k, scramble=True, seed=0).random(2 * SUBSET_VERTICES) >= 0.5
        rows += list(sob)
        uniq, seen = [], set()
        for r in rows:
            key = r.tobytes()
            if key not in seen:
                seen.add(key)
                uniq.append(r)
            if len(uniq) >= SUBSET_VERTICES:
                break
        return (np.array(uniq), f"{len(uniq)} of the 2^{k} vertices (deterministic subset: the 16 Kharitonov "
                f"vertex pairs, all-low, all-high, the smallest-DC-gain corner, then scrambled-Sobol corners, seed 0)")

    def sample_points(self) -> np.ndarray:
        """(samples, n) interior coefficient vectors: scrambled Sobol points in the box (seed 1)."""
        b = self.box
        if b is None or b.k == 0 or self.samples == 0:
            return np.zeros((0, 0))
        from scipy.stats import qmc
        u = qmc.Sobol(b.k, scramble=True, seed=1).random_base2(int(math.ceil(math.log2(self.samples))))
        u = u[: self.samples]
        c = np.tile(b.lo, (self.samples, 1))
        f = b.free
        c[:, f] = b.lo[f] + u * (b.hi[f] - b.lo[f])
        return c

    @cached_property
    def members(self) -> tuple[Model, ...]:
        """The evaluated list: nominal, variants, vertices, interior samples (in that order)."""
        out = [Model("nominal", self.nominal, "nominal")]
        out += [Model(n, tf, "variant") for n, tf in self.variants]
        if self.box is not None and self.box.k:
            bits, _ = self.vertex_bits()
            for r in bits:
                out.append(Model("vertex " + "".join("1" if x else "0" for x in r),
                                 self.box.point(self.box.corner(r)), "vertex"))
            for i, c in enumerate(self.sample_points()):
                out.append(Model(f"sample {i + 1}", self.box.point(c), "sample"))
        return tuple(out)

    def models(self) -> tuple[Model, ...]:
        return self.members

    def describe(self) -> str:
        """One paragraph for exports, reports and ``show``."""
        parts = [f"{len(self.members)} models: nominal"]
        if self.variants:
            parts.append(f"{len(self.variants)} variant{'s' if len(self.variants) > 1 else ''} "
                         f"({', '.join(n for n, _ in self.variants)})")
        if self.box is not None and self.box.k:
            _, how = self.vertex_bits()
            parts.append(how + " (named by bits, 1 = high end, over the interval coefficients: numerator "
                         "then denominator, descending powers)")
            parts.append(f"{self.samples} interior samples (scrambled Sobol, seed 1)")
        text = ", ".join(parts)
        if self.box is not None and self.box.k:
            text += f"; coefficient box: {self.box.describe()}"
        return text


# ------------------------------------------------------------------ parsing (used by synth.spec)
def _interval(reader, value, table, key, nominal: float) -> tuple[float, float]:
    """A plain number (fixed, must equal the nominal) or [lo, hi] with lo <= hi containing the nominal."""
    if isinstance(value, list):
        if len(value) != 2:
            raise reader.error(table, key, f"got a list of {len(value)} items", "[low, high] or a plain number")
        lo, hi = (reader.number(v, table, f"{key}[{i}]") for i, v in enumerate(value))
        if lo > hi:
            raise reader.error(table, key, f"got [{lo:g}, {hi:g}] with low > high", "[low, high] with low <= high")
        if not lo <= nominal <= hi:
            raise reader.error(table, key, f"the nominal value {nominal:g} is outside [{lo:g}, {hi:g}]",
                               "an interval containing the nominal value from [plant]")
        return lo, hi
    x = reader.number(value, table, key)
    if x != nominal:
        raise reader.error(table, key, f"the plain number {x:g} differs from the nominal {nominal:g}",
                           "the nominal value (a fixed coefficient) or an interval [low, high]")
    return x, x


def _interval_list(reader, value, table, key, nominal: list) -> tuple[np.ndarray, np.ndarray]:
    if not isinstance(value, list):
        raise reader.error(table, key, "got " + type(value).__name__, f"a list of {len(nominal)} entries")
    if len(value) != len(nominal):
        raise reader.error(table, key, f"got {len(value)} entries for {len(nominal)} nominal values",
                           f"one entry per [plant].{key} value ({len(nominal)}), a number or [low, high]")
    pairs = [_interval(reader, v, table, f"{key}[{i}]", float(n)) for i, (v, n) in enumerate(zip(value, nominal))]
    return np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])


def _outward(fr: Fraction, down: bool) -> float:
    """The float nearest to an exact rational, moved one ulp outward when rounding went inward."""
    x = float(fr)
    if down and Fraction(x) > fr:
        x = float(np.nextafter(x, -np.inf))
    elif not down and Fraction(x) < fr:
        x = float(np.nextafter(x, np.inf))
    return x


def interval_poly_product(factors: list[tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
    """Enclosure of the product of interval polynomials (descending), outward rounded.

    Interval arithmetic (Moore, *Interval Analysis*, 1966) carried out exactly in
    rational arithmetic (every float is a dyadic rational), each end point then
    rounded outward to a float, so the true coefficient set lies inside the box and
    exact coefficients (a fixed leading 1) stay exact.
    """
    lo, hi = [Fraction(1)], [Fraction(1)]
    for flo, fhi in factors:
        a = [Fraction(float(x)) for x in flo]
        b = [Fraction(float(x)) for x in fhi]
        n = len(lo) + len(a) - 1
        nlo, nhi = [Fraction(0)] * n, [Fraction(0)] * n
        for i in range(len(lo)):
            for j in range(len(a)):
                prods = [lo[i] * a[j], lo[i] * b[j], hi[i] * a[j], hi[i] * b[j]]
                nlo[i + j] += min(prods)
                nhi[i + j] += max(prods)
        lo, hi = nlo, nhi
    return (np.array([_outward(x, True) for x in lo]), np.array([_outward(x, False) for x in hi]))


def _root_factors(reader, value, table, key, roots_raw: list) -> list[tuple[np.ndarray, np.ndarray]]:
    """Interval factors (s - r) for real roots, fixed quadratics for complex pairs (kept fixed)."""
    if not isinstance(value, list) or len(value) != len(roots_raw):
        got = f"{len(value)} entries" if isinstance(value, list) else _type(value)
        raise reader.error(table, key, f"got {got} for {len(roots_raw)} nominal roots",
                           f"one entry per [plant].{key} root: a number, [low, high] for a real root, "
                           "or the same [re, im] for a complex root (kept fixed)")
    factors, complex_roots = [], []
    for i, (v, r) in enumerate(zip(value, roots_raw)):
        if isinstance(r, list):       # complex nominal root: fixed
            if not isinstance(v, list) or len(v) != 2 or [float(x) for x in v] != [float(x) for x in r]:
                raise reader.error(table, f"{key}[{i}]", "a complex root can only be kept fixed",
                                   f"the nominal [re, im] = {r} (intervals are for real roots)")
            complex_roots.append(complex(float(r[0]), float(r[1])))
            continue
        lo, hi = _interval(reader, v, table, f"{key}[{i}]", float(r))
        factors.append((np.array([1.0, -hi]), np.array([1.0, -lo])))
    upper = [z for z in complex_roots if z.imag > 0]
    for z in upper:
        q = poly_from_roots([z, z.conjugate()])
        factors.append((q, q.copy()))
    return factors


def _type(v) -> str:
    return "a " + type(v).__name__


def parse_models(reader, t: dict, nominal: TransferFunction, samples: int) -> ModelSet:
    """The model set of a [plant] table (already validated as the nominal plant)."""
    notes = []
    box = None
    table = "plant.intervals"
    if "intervals" in t:
        iv = t["intervals"]
        if not isinstance(iv, dict):
            raise reader.error("plant", "intervals", _type(iv), "a table [plant.intervals]")
        if nominal.delay:
            raise reader.error(table, None, "coefficient intervals on a plant with dead time",
                               "a rational nominal plant (model dead-time cases as [[plant.variants]] with delay_s)")
        if "transfer" in t:
            raise reader.error(table, None, "intervals on a transfer = \"...\" plant",
                               "the plant as numerator/denominator or zeros/poles/gain to attach intervals")
        if "numerator" in t:
            allowed = ("numerator", "denominator")
            for k in iv:
                if k not in allowed:
                    raise reader.error(table, k, "unknown key", "numerator and/or denominator")
            num_raw, den_raw = list(t["numerator"]), list(t["denominator"])
            nlo, nhi = (_interval_list(reader, iv["numerator"], table, "numerator", num_raw) if "numerator" in iv
                        else (np.array(num_raw, float), np.array(num_raw, float)))
            dlo, dhi = (_interval_list(reader, iv["denominator"], table, "denominator", den_raw)
                        if "denominator" in iv else (np.array(den_raw, float), np.array(den_raw, float)))
            if nlo.size > dlo.size:
                raise reader.error(table, "numerator", "more numerator than denominator coefficients",
                                   "a proper plant for every coefficient in the box")
            origin = "coefficients"
        else:
            allowed = ("zeros", "poles", "gain")
            for k in iv:
                if k not in allowed:
                    raise reader.error(table, k, "unknown key", "zeros, poles and/or gain")
            g = float(t["gain"])
            glo, ghi = _interval(reader, iv["gain"], table, "gain", g) if "gain" in iv else (g, g)
            zeros_raw, poles_raw = list(t.get("zeros", [])), list(t["poles"])
            zf = (_root_factors(reader, iv["zeros"], table, "zeros", zeros_raw) if "zeros" in iv
                  else [(np.asarray(poly_from_roots(_roots(zeros_raw))),) * 2])
            pf = (_root_factors(reader, iv["poles"], table, "poles", poles_raw) if "poles" in iv
                  else [(np.asarray(poly_from_roots(_roots(poles_raw))),) * 2])
            nlo, nhi = interval_poly_product(zf + [(np.array([glo]), np.array([ghi]))])
            dlo, dhi = interval_poly_product(pf)
            # the nominal (computed in floating point) is a member of the set: keep it inside
            nn = np.pad(nominal.num, (nlo.size - nominal.num.size, 0))
            nlo, nhi = np.minimum(nlo, nn), np.maximum(nhi, nn)
            dd = np.pad(nominal.den, (dlo.size - nominal.den.size, 0))
            dlo, dhi = np.minimum(dlo, dd), np.maximum(dhi, dd)
            origin = "roots"
            notes.append(f"{reader.source}: [plant.intervals]: root and gain intervals converted to an enclosing "
                         "coefficient box by interval arithmetic (sound, conservative: the box may contain "
                         "coefficient combinations no root choice gives)")
        key = "denominator" if origin == "coefficients" else "poles"
        if dlo[0] <= 0 <= dhi[0]:
            raise reader.error(table, key, f"the leading denominator coefficient interval [{dlo[0]:g}, {dhi[0]:g}] "
                               "contains 0 (the plant's order would change inside the box)",
                               "a leading denominator interval that excludes 0")
        box = CoefficientBox(nlo, nhi, dlo, dhi, origin)
    variants = []
    if "variants" in t:
        vs = t["variants"]
        if not isinstance(vs, list) or not all(isinstance(v, dict) for v in vs):
            raise reader.error("plant", "variants", _type(vs), "[[plant.variants]] tables")
        names = {"nominal"}
        for i, v in enumerate(vs):
            where = f"plant.variants[{i}]"
            for k in v:
                if k not in VARIANT_KEYS:
                    raise reader.error(where, k, "unknown key", "one of: " + ", ".join(VARIANT_KEYS))
            name = v.get("name", f"variant-{i + 1}")
            if not isinstance(name, str) or not name.strip():
                raise reader.error(where, "name", "not a non-empty string", "a name such as \"with-actuator-lag\"")
            if name in names:
                raise reader.error(where, "name", f"the name {name!r} is used twice (or is 'nominal')",
                                   "a unique name per variant")
            names.add(name)
            sub = _VariantReader(reader, where)
            tf = sub.plant({k: x for k, x in v.items() if k != "name"})
            reader.warnings.extend(sub.warnings)
            variants.append((name, tf))
    return ModelSet(nominal=nominal, variants=tuple(variants), box=box, samples=samples, notes=tuple(notes))


def _roots(raw: list) -> list[complex]:
    return [complex(float(r[0]), float(r[1])) if isinstance(r, list) else complex(float(r)) for r in raw]


class _VariantReader:
    """Reuses the spec reader's plant validation, naming the variant's table in messages."""

    def __init__(self, reader, where: str):
        from .spec import _Reader

        class _R(_Reader):
            def error(self_, table, key, problem, expected):   # noqa: N805
                return _Reader.error(self_, where if table == "plant" else table, key, problem, expected)
        self._r = _R(reader.source)

    @property
    def warnings(self):
        return self._r.warnings

    def plant(self, t: dict) -> TransferFunction:
        return self._r.plant(t)


def models_toml(ms: ModelSet) -> tuple[dict | None, list[dict]]:
    """([plant.intervals] table as coefficient intervals, [[plant.variants]] tables) for Spec.to_toml."""
    iv = None
    if ms.box is not None:
        def col(lo, hi):
            return [float(a) if a == b else [float(a), float(b)] for a, b in zip(lo, hi)]
        iv = {"numerator": col(ms.box.num_lo, ms.box.num_hi), "denominator": col(ms.box.den_lo, ms.box.den_hi)}
    vs = []
    for name, tf in ms.variants:
        d = {"name": name, "numerator": [float(x) for x in tf.num], "denominator": [float(x) for x in tf.den]}
        if tf.delay:
            d["delay_s"] = tf.delay
        vs.append(d)
    return iv, vs
