"""CSV export of one chosen design, continuous and discrete, and its reader.

One plain RFC 4180 file (Shafranovich, "Common Format and MIME Type for CSV Files",
IETF RFC 4180, 2005): the header row first, then one quantity per row, every row with
the same ten fields, CRLF line ends, fields quoted only when they hold a comma, a
quote, a ``#`` or surrounding spaces. ``pandas.read_csv(path)``, Python's
``csv.reader`` and spreadsheets read it with their defaults. There are no comment
lines: the CAUTION text of :mod:`synth` is the first data row.

Columns
-------
``section``  which block the row belongs to (below)
``name``     the quantity (a requirement key, a metric name, ``zero``, ``b``, ...)
``index``    integer position where one is needed: the power of s for continuous
             coefficients, the delay k of z^-k for discrete coefficients, the running
             number of a zero, pole, stage or closed-loop pole; empty otherwise
``value``    the number (full float64 precision; ``inf``/``-inf`` for unbounded
             quantities, empty where undefined or for text rows); booleans as 1/0;
             for complex numbers the real part
``imag``     imaginary part of a zero or pole; empty otherwise
``limit``    requirement limit (requirement rows only)
``slack``    requirement slack in the requirement's unit, positive when met
``met``      1 when the requirement is met, 0 when not (requirement rows only)
``unit``     unit of ``value`` (``s``, ``rad/s``, ``deg``, ``dB``, ``%``, ...), empty if none
``note``     text: the spec name, the structure, methods, warnings, meanings

Sections
--------
``caution``           the CAUTION text of :mod:`synth` (name ``caution``, in ``note``)
``design``            ``export_format`` (value: the layout version, 2), ``spec_name`` and
                      ``structure`` (text in ``note``), ``controller``
                      and ``plant`` (the transfer functions as text), ``certificate``
                      (value 1/0: exact Routh-Hurwitz verdict; the text in ``note``),
                      ``settling_band`` when given, ``synth_version``
``plant``             the plant model the design was evaluated on: ``numerator`` and
                      ``denominator`` rows (index = power of s) and ``delay_s``
``requirement``       one row per requirement: name = spec key, value, limit, slack, met,
                      unit; the meaning in ``note``
``metric``            every scalar metric of the check record (booleans as 1/0 with a
                      note; ``hidden_modes`` as text in ``note``)
``controller``        ``gain`` (the zero/pole/gain k), ``zero`` and ``pole`` rows
                      (value = real part, imag = imaginary part), ``numerator`` and
                      ``denominator`` rows (index = power of s), ``delay_s``
``closed_loop_pole``  the closed-loop poles (value, imag; damping and |s| in ``note``)
``discrete``          with a sample time only: ``sample_time_s``, ``method`` (in
                      ``note``: ``tustin`` or ``zoh``), ``prewarp_rad_s`` (empty when
                      not pre-warped), ``b`` and ``a`` rows (index = delay i of z^-i, so
                      u[k] = sum_i b_i e[k-i] - sum_{i>=1} a_i u[k-i], with a_0 = 1 and
                      e = reference - measurement) and the ``difference_equation`` as text
``discrete_check``    the ZOH-sampled plant under the discrete controller
                      (:func:`synth.discrete.discrete_loop`): ``stable`` (1/0),
                      ``spectral_radius``, ``gain_margin_db``, ``gain_margin_low_db``,
                      ``phase_margin_deg``, ``crossover_rad_s``, ``wc_times_T``, ``pole``
                      rows (z-plane closed-loop poles) and ``warning`` rows (text)
``pid_parallel``      PID/PI designs: ``kp``, ``ki`` [1/s], ``kd`` [s], ``tf_s`` (derivative filter)
``pid_standard``      ``kc``, ``ti_s``, ``td_s``, ``n`` (filter factor Td/Tf)
``pid_series``        ``k``, ``ti_s``, ``td_s``, ``tf_s``; one ``unavailable`` row (reason in
                      ``note``) when the zeros are complex or the design is a PI
``stage``             lead-lag designs: per stage (index = stage number) ``zero`` and
                      ``pole`` corner magnitudes [rad/s] and ``active`` (1/0, the rule in ``note``)
``incremental``       with a sample time and integral action: the velocity form
                      du[k] = sum_i b_i e[k-i] - sum_{i>=1} a_i du[k-i], u[k] = u[k-1] + du[k]
                      (``b``, ``a`` rows, index = delay) and its ``equation`` as text

Every row is made by :func:`item`, the one row helper; a caller adds its own rows
(e.g. for a set of plant models) by passing ``extra_items`` built with it to
:func:`export_design`.

The write is atomic: a temporary file in the destination folder, then ``os.replace``.
Any failure raises :class:`ExportError` naming the path and leaves nothing behind.
"""

from __future__ import annotations

import csv
import math
import os
import tempfile
from typing import Any, Mapping, Sequence

import numpy as np

from . import CAUTION, __version__
from .discrete import as_pair, discrete_loop, tustin, zoh
from .incremental import incremental_equation, incremental_form
from .lti import TransferFunction, format_poly
from .requirements import REQUIREMENTS

COLUMNS = ["section", "name", "index", "value", "imag", "limit", "slack", "met", "unit", "note"]
SECTIONS = ["caution", "design", "plant", "requirement", "metric", "controller", "closed_loop_pole",
            "discrete", "discrete_check"]
OPTIONAL_SECTIONS = ["pid_parallel", "pid_standard", "pid_series", "stage", "incremental"]
EXPORT_FORMAT = 2       # 1: '#' comment lines before the header; 2: plain RFC 4180, header first
METHODS = ("tustin", "zoh")
SLOW_SAMPLING = 0.3     # w_c T above which sampling counts as slow (common-practice rule of thumb)

_NESTED = {"requirements", "controller", "certificate", "closed_loop_poles", "pid_forms", "stages", "model_set"}
_BOOL_NOTE = "boolean: 1 yes, 0 no"


class ExportError(Exception):
    """A design could not be exported or read back; the message names the file and the problem."""


# ------------------------------------------------------------------ units
def metric_unit(name: str) -> str:
    """Unit of a metric, from the naming convention of the evaluator (units are in the names)."""
    special = {"decay_rate": "1/s", "velocity_constant": "1/s", "acceleration_constant": "1/s^2",
               "ramp_error": "s", "disturbance_iae": "s"}
    if name in special:
        return special[name]
    for suffix, unit in (("_rad_s", "rad/s"), ("_deg", "deg"), ("_db", "dB"), ("_pct", "%"), ("_s", "s")):
        if name.endswith(suffix):
            return unit
    return ""


# ----------------------------------------------------------------- writing
def _num(x: Any) -> str:
    """Exact text of a number: repr of the float64 (round-trips), inf/-inf, empty for NaN/None."""
    if x is None:
        return ""
    if isinstance(x, (bool, np.bool_)):
        return "1" if x else "0"
    if isinstance(x, (int, np.integer)):
        return str(int(x))
    x = float(x)
    if math.isnan(x):
        return ""
    return repr(x)


def _field(s: str) -> str:
    """CSV field, quoted when it holds a comma, quote, '#' (pandas' comment character) or edge spaces."""
    if any(ch in s for ch in ',"#\r\n') or s != s.strip():
        return '"' + s.replace('"', '""') + '"'
    return s


def item(section: str, name: str, index: int | None = None, value: Any = None, imag: Any = None,
         limit: Any = None, slack: Any = None, met: Any = None, unit: str = "", note: str = "") -> list[str]:
    """One row of the export, its fields as text in :data:`COLUMNS` order (numbers exact, note on one line)."""
    return [section, name, "" if index is None else str(int(index)), _num(value), _num(imag), _num(limit),
            _num(slack), _num(met), unit, " ".join(str(note).split())]


def _poly_rows(section: str, name: str, p, unit: str = "") -> list[list[str]]:
    """Coefficient rows of a polynomial in s, index = power of s."""
    p = np.asarray(p, dtype=float)
    n = p.size - 1
    return [item(section, name, n - i, c, unit=unit) for i, c in enumerate(p)]


def _structure_text(c: TransferFunction) -> str:
    z, p = c.zeros, c.poles
    integ = int(np.sum(np.abs(p) == 0.0)) if p.size else 0
    parts = [f"{z.size} zero{'s' if z.size != 1 else ''}", f"{p.size} pole{'s' if p.size != 1 else ''}"]
    if integ:
        parts.append("integrator" if integ == 1 else f"{integ} integrators")
    return ", ".join(parts)


def _tf_text(tf: TransferFunction, var: str = "s") -> str:
    d = f" * exp(-{tf.delay:.6g} s)" if tf.delay else ""
    return f"({format_poly(tf.num, var)}) / ({format_poly(tf.den, var)}){d}"


def _difference_equation(b: np.ndarray, a: np.ndarray) -> str:
    terms = [f"{-c:+.8g} u[k-{k}]" for k, c in enumerate(a) if k > 0 and c != 0]
    terms += [f"{c:+.8g} e[k{'-' + str(k) if k else ''}]" for k, c in enumerate(b) if c != 0]
    rhs = " ".join(terms) if terms else "0"
    return (f"u[k] = {rhs}   (e = reference - measurement, u = controller output; "
            "coefficients rounded here, exact in the b and a rows)")


def export_design(path, plant: TransferFunction, controller: TransferFunction, record: Mapping,
                  spec_name: str, requirements: Mapping[str, float], sample_time: float | None = None,
                  method: str = "tustin", prewarp: bool = True, *, structure: str | None = None,
                  settling_band: float | None = None, extra_items: Sequence[list[str]] = ()) -> None:
    """Write one design to a CSV file (format in the module docstring); atomic.

    ``record`` is the dict of :func:`synth.describe.check_controller` for this plant,
    controller and requirements. With ``sample_time`` (seconds) the controller is
    discretised by ``method`` (``"tustin"``, pre-warped at the crossover
    ``record["crossover_rad_s"]`` when ``prewarp`` and that frequency is finite and
    below the Nyquist frequency; or ``"zoh"``) and the sampled loop is checked.
    ``structure`` (e.g. ``Family.describe()``) and ``settling_band`` are recorded when
    given. ``extra_items`` (rows made by :func:`item`) are written after the
    closed-loop poles. Raises :class:`ExportError` naming the path on any problem.
    """
    path = os.fspath(path)
    rows = _design_rows(path, plant, controller, record, spec_name, requirements, sample_time, method,
                        prewarp, structure, settling_band, extra_items)
    _atomic_write(path, rows)


def _design_rows(path, plant, controller, record, spec_name, requirements, sample_time, method, prewarp,
                 structure, settling_band, extra_items=()) -> list[list[str]]:
    where = f"export to {path}"
    if not isinstance(plant, TransferFunction) or not isinstance(controller, TransferFunction):
        raise ExportError(f"{where}: plant and controller must be synth.lti.TransferFunction objects")
    for key in ("requirements", "controller", "closed_loop_poles"):
        if key not in record:
            raise ExportError(f"{where}: the record has no {key!r} entry; pass the dict returned by "
                              "synth.describe.check_controller")
    rec_c = record["controller"]
    if (not np.array_equal(np.asarray(rec_c["numerator"], float), controller.num)
            or not np.array_equal(np.asarray(rec_c["denominator"], float), controller.den)):
        raise ExportError(f"{where}: the record was computed for a different controller "
                          f"({rec_c['numerator']} / {rec_c['denominator']}) than the one given ({controller!r})")

    rows: list[list[str]] = [item("caution", "caution", note=CAUTION)]

    # design
    cert = record.get("certificate", {}) or {}
    rows += [
        item("design", "export_format", value=EXPORT_FORMAT,
             note="plain RFC 4180 CSV, header row first; columns in the synth README"),
        item("design", "spec_name", note=spec_name),
        item("design", "structure", note=structure if structure else _structure_text(controller)),
        item("design", "controller", note="C(s) = " + _tf_text(controller)),
        item("design", "plant", note="P(s) = " + _tf_text(plant)),
    ]
    if cert:
        rows.append(item("design", "certificate", value=bool(cert.get("routh_hurwitz")), note=cert.get("text", "")))
    if "robust_certificate" in record:   # a model set: what was checked, and how stability was proved
        rc = record["robust_certificate"]
        rows.append(item("design", "model_set", note=record.get("model_set", "")))
        rows.append(item("design", "robust_certificate", value=bool(rc["robust_stable"]),
                         note=f"{rc['method']}; {rc['text']}; {rc['performance']}"))
    if settling_band is not None:
        rows.append(item("design", "settling_band", value=settling_band,
                         note="settling band as a fraction of the final value"))
    rows.append(item("design", "synth_version", note=__version__))

    # plant
    rows += _poly_rows("plant", "numerator", plant.num)
    rows += _poly_rows("plant", "denominator", plant.den)
    rows.append(item("plant", "delay_s", value=plant.delay, unit="s"))

    # requirements
    rec_req = record["requirements"]
    for key, limit in requirements.items():
        if key not in REQUIREMENTS:
            raise ExportError(f"{where}: unknown requirement {key!r}; expected one of {sorted(REQUIREMENTS)}")
        if key not in rec_req:
            raise ExportError(f"{where}: requirement {key!r} is not in the record; run check_controller "
                              "with the same requirements")
        r = rec_req[key]
        if float(r["limit"]) != float(limit):
            raise ExportError(f"{where}: requirement {key!r} has limit {limit!r} but the record was checked "
                              f"against {r['limit']!r}")
        req = REQUIREMENTS[key]
        rows.append(item("requirement", key, value=r["value"], limit=r["limit"], slack=r["slack"],
                         met=bool(r["met"]), unit=req.unit, note=req.meaning))

    # metrics: every scalar of the record
    for name, v in record.items():
        if name in _NESTED or isinstance(v, (dict, list, tuple, np.ndarray)):
            continue
        if isinstance(v, (bool, np.bool_)):
            rows.append(item("metric", name, value=bool(v), note=_BOOL_NOTE))
        elif isinstance(v, str):
            rows.append(item("metric", name, note=v))
        elif v is None or isinstance(v, (int, float, np.integer, np.floating)):
            rows.append(item("metric", name, value=v, unit=metric_unit(name)))

    # controller
    rows.append(item("controller", "gain", value=controller.gain, note="k of k prod(s - z_i) / prod(s - p_i)"))
    for i, z in enumerate(controller.zeros):
        rows.append(item("controller", "zero", i, z.real, z.imag, unit="rad/s"))
    for i, p in enumerate(controller.poles):
        rows.append(item("controller", "pole", i, p.real, p.imag, unit="rad/s"))
    rows += _poly_rows("controller", "numerator", controller.num)
    rows += _poly_rows("controller", "denominator", controller.den)
    rows.append(item("controller", "delay_s", value=controller.delay, unit="s"))

    # closed-loop poles
    pade = record.get("pade_order", 0)
    for i, p in enumerate(record["closed_loop_poles"]):
        p = complex(p)
        mag = abs(p)
        zeta = -p.real / mag if mag > 0 else 1.0
        note = f"damping {zeta:.4g}, |s| {mag:.6g} rad/s" + (f"; Pade order {pade} for the dead time" if pade else "")
        rows.append(item("closed_loop_pole", "pole", i, p.real, p.imag, unit="rad/s", note=note))

    rows += _structure_rows(record)
    for r in extra_items:
        if len(r) != len(COLUMNS):
            raise ExportError(f"{where}: an extra row has {len(r)} fields; expected {len(COLUMNS)} (make it with item())")
        rows.append(list(r))
    if sample_time is not None:
        rows += _discrete_rows(where, plant, controller, record, sample_time, method, prewarp)
    return rows


_PID_ROWS = {
    "pid_parallel": ("C(s) = kp + ki/s + kd s/(Tf s + 1)",
                     [("kp", "kp", ""), ("ki", "ki", "1/s"), ("kd", "kd", "s"), ("tf_s", "tf_s", "s")]),
    "pid_standard": ("C(s) = Kc (1 + 1/(Ti s) + Td s/(1 + s Td/N)); Kc = kp, Ti = kp/ki, Td = kd/kp, N = Td/Tf",
                     [("kc", "kc", ""), ("ti_s", "ti_s", "s"), ("td_s", "td_s", "s"), ("n", "n", "")]),
    "pid_series": ("C(s) = K' (1 + 1/(Ti' s)) (1 + Td' s)/(1 + Tf s)",
                   [("k", "k", ""), ("ti_s", "ti_s", "s"), ("td_s", "td_s", "s"), ("tf_s", "tf_s", "s")]),
}


def _structure_rows(record: Mapping) -> list[list[str]]:
    """PID forms (synth.pid_forms; Astrom & Hagglund 2006, ch. 3) and stage activity (synth.stages)."""
    rows: list[list[str]] = []
    f = record.get("pid_forms")
    if f:
        for section, (formula, names) in _PID_ROWS.items():
            values = f.get(section.split("_", 1)[1])
            if values is None:
                rows.append(item(section, "unavailable", note=f.get("series_note", "")))
                continue
            for key, name, unit in names:
                if key in values:
                    rows.append(item(section, name, value=values[key], unit=unit, note=formula))
    for st in record.get("stages") or []:
        i = int(st["stage"])
        rows.append(item("stage", "zero", i, st["zero_rad_s"], unit="rad/s",
                         note=f"{st['role']} stage (s + zero)/(s + pole): corner magnitude, root at -zero"))
        rows.append(item("stage", "pole", i, st["pole_rad_s"], unit="rad/s", note="corner magnitude, root at -pole"))
        rows.append(item("stage", "active", i, bool(st["active"]),
                         note=("active; " if st["active"] else "INACTIVE: " + st["reason"] + "; ") + _BOOL_NOTE))
    return rows


def _discrete_rows(where, plant, controller, record, sample_time, method, prewarp) -> list[list[str]]:
    try:
        T = float(sample_time)
    except (TypeError, ValueError):
        raise ExportError(f"{where}: sample_time must be a number of seconds, got {sample_time!r}") from None
    if not math.isfinite(T) or T <= 0:
        raise ExportError(f"{where}: sample_time must be a positive, finite number of seconds, got {sample_time!r}")
    if method not in METHODS:
        raise ExportError(f"{where}: method must be one of {METHODS}, got {method!r}")
    rows: list[list[str]] = []
    wc = float(record.get("crossover_rad_s", np.nan))
    w_pre = None
    pre_note = "not pre-warped"
    if method == "tustin" and prewarp:
        if math.isfinite(wc) and 0 < wc * T < math.pi:
            w_pre = wc
            pre_note = "pre-warped at the continuous gain crossover: the discrete response equals C(j w) there"
        elif math.isfinite(wc) and wc > 0:
            pre_note = (f"NOT pre-warped: the crossover {wc:.6g} rad/s is at or above the Nyquist frequency "
                        f"pi/T = {math.pi / T:.6g} rad/s")
        else:
            pre_note = "NOT pre-warped: the design has no finite gain crossover"
    elif method == "zoh":
        pre_note = "zero-order-hold equivalent: no pre-warping"
    try:
        b, a = tustin(controller, T, w_pre) if method == "tustin" else zoh(controller, T)
        loop = discrete_loop(plant, b, a, T)
    except ValueError as exc:
        raise ExportError(f"{where}: cannot discretise the controller with {method} at T = {T:g} s: {exc}") from exc
    meth_note = {"tustin": "bilinear (Tustin 1947) substitution s = c (z - 1)/(z + 1); "
                           "c = 2/T, or w/tan(w T/2) when pre-warped",
                 "zoh": "zero-order-hold (step-invariant) equivalent of the controller"}[method]
    rows += [
        item("discrete", "sample_time_s", value=T, unit="s"),
        item("discrete", "method", note=method),
        item("discrete", "method_detail", note=meth_note),
        item("discrete", "prewarp_rad_s", value=w_pre, unit="rad/s", note=pre_note),
    ]
    rows += [item("discrete", "b", k, c, note="coefficient of e[k-index]" if k == 0 else "")
             for k, c in enumerate(b)]
    rows += [item("discrete", "a", k, c, note="coefficient of u[k-index]; a_0 = 1" if k == 0 else "")
             for k, c in enumerate(a)]
    rows.append(item("discrete", "difference_equation", note=_difference_equation(b, a)))
    inc = incremental_form(b, a)
    if inc is not None:
        bv, av = inc
        rows += [item("incremental", "b", k, c, note="coefficient of e[k-index] in du[k]" if k == 0 else "")
                 for k, c in enumerate(bv)]
        rows += [item("incremental", "a", k, c, note="coefficient of du[k-index]; a_0 = 1" if k == 0 else "")
                 for k, c in enumerate(av)]
        rows.append(item("incremental", "equation", note=incremental_equation(bv, av)
                         + "; velocity form of the same controller (synth.incremental)"))

    sec = "discrete_check"
    rows += [
        item(sec, "stable", value=loop["stable"],
             note="ZOH-sampled plant (dead time exact) under this discrete controller: every closed-loop pole "
                  "strictly inside the unit circle (exact test); " + _BOOL_NOTE),
        item(sec, "spectral_radius", value=loop["spectral_radius"], note="largest |z| of the closed-loop poles"),
        item(sec, "gain_margin_db", value=loop["gain_margin_db"], unit="dB"),
        item(sec, "gain_margin_low_db", value=loop["gain_margin_low_db"], unit="dB"),
        item(sec, "phase_margin_deg", value=loop["phase_margin_deg"], unit="deg"),
        item(sec, "crossover_rad_s", value=loop["crossover_rad_s"], unit="rad/s"),
    ]
    wct = wc * T if math.isfinite(wc) else loop["crossover_rad_s"] * T
    rows.append(item(sec, "wc_times_T", value=wct, unit="rad",
                     note="continuous gain crossover times the sample time"))
    for i, p in enumerate(loop["poles"]):
        rows.append(item(sec, "pole", i, p.real, p.imag, note=f"|z| {abs(p):.6g}"))
    if not loop["stable"]:
        rows.append(item(sec, "warning", note=(
            f"the sampled loop is NOT stable at T = {T:g} s (spectral radius {loop['spectral_radius']:.6g}); "
            "do not implement this discrete controller; sample faster or redesign")))
    if math.isfinite(wct) and wct > SLOW_SAMPLING:
        rows.append(item(sec, "warning", note=(
            f"w_c*T = {wct:.3g} > {SLOW_SAMPLING}: sampling is slow relative to the crossover; the discrete "
            "loop departs from the continuous design (a common-practice rule of thumb, not a hard limit; "
            "check the discrete margins above)")))
    return rows


def _atomic_write(path: str, rows: list[list[str]]) -> None:
    folder = os.path.dirname(os.path.abspath(path))
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=".tmp", dir=folder)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)       # the user's umask, not mkstemp's 0600: colleagues can read it
        with os.fdopen(fd, "w", newline="", encoding="utf-8") as fh:
            for r in [COLUMNS] + rows:
                fh.write(",".join(_field(x) for x in r) + "\r\n")     # RFC 4180: CRLF line ends
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
        tmp = None
    except OSError as exc:
        raise ExportError(f"cannot write the design export {path}: {exc.strerror or exc}") from exc
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass


# ----------------------------------------------------------------- reading
def _read_rows(path: str) -> list[dict[str, str]]:
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            lines = list(fh)
    except UnicodeDecodeError:
        raise ExportError(f"{path}: not a UTF-8 text file; expected a design export written by synth") from None
    except OSError as exc:
        raise ExportError(f"cannot read the design export {path}: {exc.strerror or exc}") from exc
    while lines and lines[0].startswith("#"):     # layout 1 opened with '#' comment lines
        lines.pop(0)
    reader = csv.reader(lines)
    try:
        head = next(reader)
    except StopIteration:
        raise ExportError(f"{path}: empty file; expected a design export written by synth") from None
    if head != COLUMNS:
        raise ExportError(f"{path}: header {head} is not a synth design export; expected columns {COLUMNS}")
    out = []
    for lineno, r in enumerate(reader, start=2):
        if not r:
            continue
        if len(r) != len(COLUMNS):
            raise ExportError(f"{path}: data row {lineno} has {len(r)} fields; expected {len(COLUMNS)}")
        out.append(dict(zip(COLUMNS, r)))
    return out


def _f(path: str, row: dict, col: str = "value") -> float:
    s = row[col]
    if s == "":
        return math.nan
    try:
        return float(s)
    except ValueError:
        raise ExportError(f"{path}: section {row['section']!r}, name {row['name']!r}: column {col!r} "
                          f"holds {s!r}; expected a number") from None


def _poly(path: str, rows: list[dict], section: str, name: str, required: bool = True) -> np.ndarray | None:
    sel = [r for r in rows if r["section"] == section and r["name"] == name]
    if not sel:
        if required:
            raise ExportError(f"{path}: no {section!r} rows named {name!r}; expected a design export written by synth")
        return None
    try:
        idx = [int(r["index"]) for r in sel]
    except ValueError:
        raise ExportError(f"{path}: {section!r} {name!r} rows need an integer index") from None
    if sorted(idx) != list(range(len(idx))):
        raise ExportError(f"{path}: {section!r} {name!r} rows have indices {sorted(idx)}; expected 0..{len(idx) - 1}")
    p = np.zeros(len(idx))
    for i, r in zip(idx, sel):
        p[i] = _f(path, r)
    return p


def read_design(path) -> dict:
    """Read a file written by :func:`export_design`.

    Returns ``controller`` and ``plant`` (TransferFunction, rebuilt from the coefficient
    rows), ``requirements`` {key: limit}, ``metrics`` {name: value} (booleans as bool,
    text metrics as str), ``discrete`` ({b, a, T, method, prewarp_rad_s}) or None,
    ``discrete_check`` ({name: value}) or None, ``spec_name``, ``structure``,
    ``settling_band`` (None when not recorded), ``pid_forms`` ({section: {name: value}}),
    ``stages`` (list of {stage, zero_rad_s, pole_rad_s, active}), ``incremental``
    ({b, a} of the velocity form), each None when absent, and ``caution``.
    """
    path = os.fspath(path)
    rows = _read_rows(path)

    def tf(section: str) -> TransferFunction:
        num = _poly(path, rows, section, "numerator")[::-1]   # index = power of s -> descending
        den = _poly(path, rows, section, "denominator")[::-1]
        d = [_f(path, r) for r in rows if r["section"] == section and r["name"] == "delay_s"]
        try:
            return TransferFunction(num, den, d[0] if d else 0.0)
        except ValueError as exc:
            raise ExportError(f"{path}: section {section!r}: {exc}") from exc

    def text(section: str, name: str) -> str | None:
        sel = [r["note"] for r in rows if r["section"] == section and r["name"] == name]
        return sel[0] if sel else None

    controller = tf("controller")
    plant = tf("plant") if any(r["section"] == "plant" for r in rows) else None
    requirements = {r["name"]: _f(path, r, "limit") for r in rows if r["section"] == "requirement"}
    metrics: dict[str, Any] = {}
    for r in rows:
        if r["section"] != "metric":
            continue
        if r["value"] == "" and r["note"] and r["note"] != _BOOL_NOTE:
            metrics[r["name"]] = r["note"]
        elif r["note"] == _BOOL_NOTE:
            metrics[r["name"]] = _f(path, r) == 1.0
        elif r["value"] == "" and r["name"] == "hidden_modes":
            metrics[r["name"]] = ""
        elif r["value"].lstrip("+-").isdigit():
            metrics[r["name"]] = int(r["value"])          # integers are written without a decimal point
        else:
            metrics[r["name"]] = _f(path, r)
    discrete = None
    if any(r["section"] == "discrete" for r in rows):
        T = [_f(path, r) for r in rows if r["section"] == "discrete" and r["name"] == "sample_time_s"]
        pre = [_f(path, r) for r in rows if r["section"] == "discrete" and r["name"] == "prewarp_rad_s"]
        b = _poly(path, rows, "discrete", "b")
        a = _poly(path, rows, "discrete", "a")
        try:
            as_pair(b, a)
        except ValueError as exc:
            raise ExportError(f"{path}: section 'discrete': {exc}") from exc
        if not T:
            raise ExportError(f"{path}: section 'discrete' has no sample_time_s row")
        discrete = {"b": b, "a": a, "T": T[0], "method": text("discrete", "method"),
                    "prewarp_rad_s": None if not pre or math.isnan(pre[0]) else pre[0]}
    check = None
    if any(r["section"] == "discrete_check" for r in rows):
        check = {}
        for r in rows:
            if r["section"] == "discrete_check" and r["name"] not in ("pole", "warning"):
                v = _f(path, r)
                check[r["name"]] = (v == 1.0) if r["name"] == "stable" else v
        check["warnings"] = [r["note"] for r in rows if r["section"] == "discrete_check" and r["name"] == "warning"]
    band = [_f(path, r) for r in rows if r["section"] == "design" and r["name"] == "settling_band"]
    pid = {sec: {r["name"]: _f(path, r) for r in rows if r["section"] == sec and r["name"] != "unavailable"}
           for sec in _PID_ROWS if any(r["section"] == sec for r in rows)} or None
    stages = None
    if any(r["section"] == "stage" for r in rows):
        by = {}
        for r in rows:
            if r["section"] == "stage":
                by.setdefault(int(r["index"]), {})[r["name"]] = _f(path, r)
        stages = [{"stage": i, "zero_rad_s": v.get("zero"), "pole_rad_s": v.get("pole"),
                   "active": v.get("active") == 1.0} for i, v in sorted(by.items())]
    incremental = None
    if any(r["section"] == "incremental" for r in rows):
        incremental = {"b": _poly(path, rows, "incremental", "b"), "a": _poly(path, rows, "incremental", "a")}
    return {
        "controller": controller,
        "plant": plant,
        "requirements": requirements,
        "metrics": metrics,
        "discrete": discrete,
        "discrete_check": check,
        "spec_name": text("design", "spec_name"),
        "structure": text("design", "structure"),
        "settling_band": band[0] if band else None,
        "pid_forms": pid,
        "stages": stages,
        "incremental": incremental,
        "caution": text("caution", "caution"),
    }
