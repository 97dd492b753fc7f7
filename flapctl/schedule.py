"""Flap schedules: each blade's flap deflection as a periodic function of its own azimuth.

Conventions (REFERENCES.md section 2)
-------------------------------------
* Azimuth theta: degrees in files, radians in code.  theta = 0 when the blade is at
  (x, y) = (0, +R) moving straight into the flow; theta grows in the direction of rotation;
  0 < theta < 180 deg is the upstream half, 180 < theta < 360 deg the downstream half.
* Blade i of N sits at theta_i = theta + i * 360/N, theta being the rotor (blade 0) azimuth.
  Every schedule value is a function of the blade's *own* azimuth theta_i: a shared column
  therefore gives blade i the same curve as blade 0, offset by i * 360/N in rotor azimuth.
* Flap deflection delta in degrees; positive = trailing edge moved to the side from which
  positive-alpha flow arrives (the outer side), i.e. the side that adds lift in the
  positive-alpha sense.

File formats (flapctl's own)
----------------------------
CSV (suffix ``.csv``).  Lines starting with ``#`` and blank lines are ignored.  The first other
line is the header, one of::

    azimuth_deg,flap_deg                          one column shared by all blades
    azimuth_deg,flap0_deg,flap1_deg,...           one column per blade, exactly N of them
    tsr,azimuth_deg,...                           either form with a leading TSR column

Each data row holds plain decimal numbers.  With a ``tsr`` column, consecutive rows with the same
TSR form one group, each group a full revolution; groups appear in strictly increasing TSR.
Interpolation is linear unless ``load(..., interpolation="spline")``.

TOML (suffix ``.toml``)::

    schema_version = 1
    interpolation = "linear"          # or "spline"; optional, default "linear"

    [[table]]                         # one or more; tsr on all of them or on none (then one)
    tsr = 2.0
    azimuth_deg = [0.0, 30.0, ...]
    flap_deg = [0.0, 5.0, ...]        # shared, or [[...], [...], [...]] one list per blade

or, instead of ``[[table]]``, ``[fourier]`` (one) or ``[[fourier]]`` (several, with ``tsr``)::

    [fourier]
    mean_deg = 1.0                    # or one value per blade: [m0, m1, m2]
    cos_deg = [a1, a2, ...]           # or one list per blade; optional
    sin_deg = [b1, b2, ...]           # or one list per blade; optional

meaning delta(theta) = mean + sum_n a_n cos(n theta) + b_n sin(n theta).  Unknown keys are errors.

Validation (every failure raises ScheduleError naming the file, the key or "row N, column C", the
value and what was expected): all numbers finite; azimuths strictly increasing in [0, 360) with
at least 3 points and every gap, including the one across 360/0, below 180 deg; one value per
azimuth point; per-blade column count equal to the rotor's blade count; TSR values positive and
strictly increasing.  Between TSR entries the deflection is interpolated linearly in TSR and
clamped at the ends of the TSR axis.
"""
from __future__ import annotations

import bisect
import logging
import math
import numbers
import re
import tomllib
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.optimize import minimize_scalar

from flapctl.errors import ScheduleError

__all__ = ["Schedule", "ScheduleTable", "INTERPOLATIONS"]

_log = logging.getLogger(__name__)

INTERPOLATIONS = ("linear", "spline")
_TWO_PI = 2.0 * math.pi
_DEG = math.pi / 180.0
_PEAK_SAMPLES = 3600          # dense azimuth samples used to locate peaks before refinement
_ON_GRID = 1e-9               # knots closer than this (in fine cells) to a grid point lie on it
_NUMBER_RE = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?\Z")
_TOML_TOP = ("schema_version", "interpolation", "table", "fourier")
_TABLE_KEYS = ("tsr", "azimuth_deg", "flap_deg")
_FOURIER_KEYS = ("tsr", "mean_deg", "cos_deg", "sin_deg")
_HEADER_EXPECTED = ("a header 'azimuth_deg,flap_deg' or 'azimuth_deg,flap0_deg,...,flapN-1_deg', "
                    "optionally after a leading 'tsr' column")


# --------------------------------------------------------------------------- validation helpers
def _number(source: str, key: str, value: object) -> float:
    """Return ``value`` as a finite float or raise ScheduleError (booleans are not numbers)."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise ScheduleError(source, key, value, "a finite number")
    try:
        out = float(value)
    except (OverflowError, ValueError):
        raise ScheduleError(source, key, value, "a finite number") from None
    if not math.isfinite(out):
        raise ScheduleError(source, key, value, "a finite number")
    return out


def _numbers(source: str, key: str, value: object) -> list[float]:
    """A TOML-style list of finite numbers; elements are named ``key[j]``."""
    if not isinstance(value, list):
        raise ScheduleError(source, key, value, "a list of finite numbers")
    return [_number(source, f"{key}[{j}]", v) for j, v in enumerate(value)]


def _check_azimuths(source: str, az: Sequence[float], where: Callable[[int], str], whole: str) -> None:
    """Azimuths (deg) strictly increasing in [0, 360), >= 3 points, every gap below 180 deg."""
    if len(az) < 3:
        raise ScheduleError(source, whole, list(az),
                            "at least 3 azimuth points covering one revolution")
    for j, a in enumerate(az):
        if not 0.0 <= a < 360.0:
            raise ScheduleError(source, where(j), a, "an azimuth in [0, 360) degrees")
        if j and a <= az[j - 1]:
            raise ScheduleError(source, where(j), a,
                                f"an azimuth above the previous one ({az[j - 1]!r}): strictly increasing")
        if j and a - az[j - 1] >= 180.0:
            raise ScheduleError(source, where(j), a,
                                f"a gap below 180 deg after the previous azimuth {az[j - 1]!r} "
                                "(points must cover one revolution)")
    if 360.0 - az[-1] + az[0] >= 180.0:
        raise ScheduleError(source, where(0), az[0],
                            f"a gap below 180 deg across 360/0 from the last azimuth {az[-1]!r} "
                            "(points must cover one revolution)")


def _check_tsr(source: str, key: str, tsr: float, previous: float | None) -> None:
    if tsr <= 0.0:
        raise ScheduleError(source, key, tsr, "a TSR > 0")
    if previous is not None and tsr <= previous:
        raise ScheduleError(source, key, tsr,
                            f"a TSR above the previous one ({previous!r}): strictly increasing")


def _check_blades(source: str, blades: object) -> int:
    if isinstance(blades, (bool, np.bool_)) or not isinstance(blades, numbers.Integral) or blades < 1:
        raise ScheduleError(source, "blades", blades, "a whole number of blades >= 1")
    return int(blades)


def _check_interpolation(source: str, key: str, value: object) -> str:
    if value not in INTERPOLATIONS:
        raise ScheduleError(source, key, value, '"linear" or "spline"')
    return str(value)


def _plain(obj: object) -> object:
    """numpy arrays and scalars -> nested Python lists and scalars (for from_arrays)."""
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (list, tuple)):
        return [_plain(o) for o in obj]
    if isinstance(obj, np.generic):
        return obj.item()
    return obj


# --------------------------------------------------------------------------- layers (data)
@dataclass(frozen=True)
class _TableLayer:
    """One revolution of tabulated deflections at one TSR (``tsr`` None: no TSR axis)."""

    tsr: float | None
    azimuth_deg: tuple[float, ...]
    flap_deg: tuple[tuple[float, ...], ...]   # one tuple per blade, each aligned with azimuth_deg
    shared: bool


@dataclass(frozen=True)
class _FourierLayer:
    """Fourier coefficients (deg) per blade at one TSR; cos/sin padded to the same length."""

    tsr: float | None
    mean_deg: tuple[float, ...]
    cos_deg: tuple[tuple[float, ...], ...]
    sin_deg: tuple[tuple[float, ...], ...]
    shared: bool


_Layer = _TableLayer | _FourierLayer


def _table_layer(source: str, tsr: float | None, az_obj: object, az_key: str,
                 flap_obj: object, flap_key: str, blades: int) -> _TableLayer:
    """Validate one tabulated revolution given as plain Python lists."""
    az = _numbers(source, az_key, az_obj)
    _check_azimuths(source, az, lambda j: f"{az_key}[{j}]", az_key)
    if not isinstance(flap_obj, list):
        raise ScheduleError(source, flap_key, flap_obj,
                            "a list of values (shared) or one list per blade")
    per_blade = bool(flap_obj) and all(isinstance(v, list) for v in flap_obj)
    if not per_blade and any(isinstance(v, list) for v in flap_obj):
        raise ScheduleError(source, flap_key, flap_obj,
                            "either a list of numbers (shared) or a list of lists (one per blade)")
    columns = flap_obj if per_blade else [flap_obj]
    keys = [f"{flap_key}[{i}]" for i in range(len(columns))] if per_blade else [flap_key]
    if per_blade and len(columns) != blades:
        raise ScheduleError(source, flap_key, f"{len(columns)} lists",
                            f"{blades} per-blade lists (the rotor has {blades} blades) or one shared list")
    values = []
    for key, column in zip(keys, columns):
        col = _numbers(source, key, column)
        if len(col) != len(az):
            raise ScheduleError(source, key, f"{len(col)} values",
                                f"{len(az)} values, one per {az_key} point")
        values.append(tuple(col))
    if not per_blade:
        values = values * blades
    return _TableLayer(tsr, tuple(az), tuple(values), not per_blade)


def _coefficients(source: str, key: str, value: object, blades: int, scalar: bool) -> list:
    """Shared or per-blade coefficient data -> one entry per blade.

    ``scalar`` True: a number (shared) or a list of numbers (per blade);
    False: a list of numbers (shared) or a list of lists (per blade).
    """
    if scalar:
        if isinstance(value, list):
            if len(value) != blades:
                raise ScheduleError(source, key, f"{len(value)} values",
                                    f"one number (shared) or {blades} numbers, one per blade")
            return _numbers(source, key, value)
        return [_number(source, key, value)] * blades
    if not isinstance(value, list):
        raise ScheduleError(source, key, value, "a list of numbers (shared) or one list per blade")
    if value and all(isinstance(v, list) for v in value):
        if len(value) != blades:
            raise ScheduleError(source, key, f"{len(value)} lists",
                                f"one shared list or {blades} lists, one per blade")
        return [_numbers(source, f"{key}[{i}]", v) for i, v in enumerate(value)]
    return [_numbers(source, key, value)] * blades


def _fourier_layer(source: str, tsr: float | None, mean: object, cos: object, sin: object,
                   prefix: str, blades: int) -> _FourierLayer:
    means = _coefficients(source, f"{prefix}mean_deg", mean, blades, scalar=True)
    cosines = _coefficients(source, f"{prefix}cos_deg", cos, blades, scalar=False)
    sines = _coefficients(source, f"{prefix}sin_deg", sin, blades, scalar=False)
    order = max(len(c) for c in cosines + sines)
    pad = lambda c: tuple(c) + (0.0,) * (order - len(c))  # noqa: E731
    cos_t = tuple(pad(c) for c in cosines)
    sin_t = tuple(pad(s) for s in sines)
    shared = all(m == means[0] for m in means) and len(set(cos_t)) == 1 and len(set(sin_t)) == 1
    return _FourierLayer(tsr, tuple(means), cos_t, sin_t, shared)


# --------------------------------------------------------------------------- parsers
def _parse_csv(text: str, source: str, blades: int) -> list[_TableLayer]:
    header: tuple[int, list[str]] | None = None
    rows: list[tuple[int, list[str]]] = []
    for number, raw in enumerate(text.split("\n"), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        cells = [c.strip() for c in line.split(",")]
        if header is None:
            header = (number, cells)
        else:
            rows.append((number, cells))
    if header is None:
        raise ScheduleError(source, "header", text[:40], _HEADER_EXPECTED)
    header_row, names = header
    has_tsr = bool(names) and names[0] == "tsr"
    body = names[1:] if has_tsr else names
    if len(body) < 2 or body[0] != "azimuth_deg":
        raise ScheduleError(source, f"row {header_row} (header)", ",".join(names), _HEADER_EXPECTED)
    flaps = body[1:]
    shared = flaps == ["flap_deg"]
    if not shared and flaps != [f"flap{i}_deg" for i in range(blades)]:
        if all(re.fullmatch(r"flap\d+_deg", f) for f in flaps):
            expected = (f"{blades} per-blade columns flap0_deg..flap{blades - 1}_deg in order "
                        f"(the rotor has {blades} blades) or one shared flap_deg")
        else:
            expected = _HEADER_EXPECTED
        raise ScheduleError(source, f"row {header_row} (header)", ",".join(names), expected)
    if not rows:
        raise ScheduleError(source, "rows", 0, "at least 3 data rows after the header")
    az_col = 1 if has_tsr else 0
    groups: list[tuple[float | None, list[int], list[list[float]]]] = []
    for number, cells in rows:
        if len(cells) != len(names):
            raise ScheduleError(source, f"row {number}", ",".join(cells),
                                f"{len(names)} comma-separated values ({','.join(names)})")
        values = []
        for c, cell in enumerate(cells):
            where = f"row {number}, column {c + 1} ({names[c]})"
            if not _NUMBER_RE.match(cell):
                raise ScheduleError(source, where, cell, "a finite decimal number")
            values.append(_number(source, where, float(cell)))
        tsr = values[0] if has_tsr else None
        if not groups or tsr != groups[-1][0]:
            if has_tsr:
                _check_tsr(source, f"row {number}, column 1 (tsr)", tsr,
                           groups[-1][0] if groups else None)
            groups.append((tsr, [], []))
        groups[-1][1].append(number)
        groups[-1][2].append(values)
    layers = []
    for tsr, numbers_, values in groups:
        az = [v[az_col] for v in values]
        where = lambda j, n=numbers_: f"row {n[j]}, column {az_col + 1} (azimuth_deg)"  # noqa: E731
        whole = f"rows {numbers_[0]}..{numbers_[-1]} (tsr = {tsr!r})" if has_tsr else "rows"
        _check_azimuths(source, az, where, whole)
        columns = [tuple(v[c] for v in values) for c in range(az_col + 1, len(names))]
        flap = tuple(columns * blades) if shared else tuple(columns)
        layers.append(_TableLayer(tsr, tuple(az), flap, shared))
    return layers


def _parse_toml(text: str, source: str, blades: int) -> tuple[list[_Layer], str]:
    try:
        doc = tomllib.loads(text)
    except (tomllib.TOMLDecodeError, RecursionError) as exc:
        raise ScheduleError(source, "toml", str(exc), "valid TOML 1.0") from None
    for key in doc:
        if key not in _TOML_TOP:
            raise ScheduleError(source, key, doc[key], "one of the keys " + ", ".join(_TOML_TOP))
    version = doc.get("schema_version")
    if type(version) is not int or version != 1:
        raise ScheduleError(source, "schema_version", version, "schema_version = 1")
    interpolation = _check_interpolation(source, "interpolation", doc.get("interpolation", "linear"))
    if ("table" in doc) == ("fourier" in doc):
        raise ScheduleError(source, "table" if "table" in doc else "(top level)",
                            "both [[table]] and [fourier]" if "table" in doc else "neither",
                            "either [[table]] entries or [fourier] entries")
    kind = "table" if "table" in doc else "fourier"
    entries = doc[kind]
    single = isinstance(entries, dict)
    entries = [entries] if single else entries
    if not isinstance(entries, list) or not entries or not all(isinstance(e, dict) for e in entries):
        raise ScheduleError(source, kind, doc[kind], f"one or more [[{kind}]] tables")
    allowed = _TABLE_KEYS if kind == "table" else _FOURIER_KEYS
    with_tsr = ["tsr" in e for e in entries]
    layers: list[_Layer] = []
    previous: float | None = None
    for k, entry in enumerate(entries):
        prefix = f"{kind}." if single else f"{kind}[{k}]."
        for key in entry:
            if key not in allowed:
                raise ScheduleError(source, prefix + key, entry[key], "one of the keys " + ", ".join(allowed))
        if any(with_tsr) and "tsr" not in entry:
            raise ScheduleError(source, prefix + "tsr", None,
                                f"a tsr on every [[{kind}]] entry or on none")
        if not any(with_tsr) and len(entries) > 1:
            raise ScheduleError(source, prefix + "tsr", None,
                                f"a tsr on each of the {len(entries)} [[{kind}]] entries")
        tsr = None
        if "tsr" in entry:
            tsr = _number(source, prefix + "tsr", entry["tsr"])
            _check_tsr(source, prefix + "tsr", tsr, previous)
            previous = tsr
        if kind == "table":
            for key in ("azimuth_deg", "flap_deg"):
                if key not in entry:
                    raise ScheduleError(source, prefix + key, None, f"a {key} list")
            layers.append(_table_layer(source, tsr, entry["azimuth_deg"], prefix + "azimuth_deg",
                                       entry["flap_deg"], prefix + "flap_deg", blades))
        else:
            if "mean_deg" not in entry:
                raise ScheduleError(source, prefix + "mean_deg", None, "a mean_deg value")
            layers.append(_fourier_layer(source, tsr, entry["mean_deg"], entry.get("cos_deg", []),
                                         entry.get("sin_deg", []), prefix, blades))
    return layers, interpolation


# --------------------------------------------------------------------------- curves (numerics)
class _TableCurve:
    """Periodic interpolant through tabulated points; x in radians (any real), values in deg."""

    def __init__(self, azimuth_deg: Sequence[float], flap_deg: Sequence[float], spline: bool) -> None:
        az = np.asarray(azimuth_deg, dtype=float) * _DEG
        val = np.asarray(flap_deg, dtype=float)
        self.knots_rad = az
        self.smooth = spline
        self._x = np.append(az, az[0] + _TWO_PI)
        self._y = np.append(val, val[0])
        self._slopes = np.diff(self._y) / np.diff(self._x)
        self._spline = CubicSpline(self._x, self._y, bc_type="periodic") if spline else None

    def _wrap(self, x: np.ndarray) -> np.ndarray:
        return self._x[0] + np.mod(x - self._x[0], _TWO_PI)

    def value(self, x: np.ndarray) -> np.ndarray:
        xw = self._wrap(x)
        if self._spline is not None:
            return self._spline(xw)
        return np.interp(xw, self._x, self._y)

    def slope(self, x: np.ndarray) -> np.ndarray:
        """d(delta)/d(theta) in deg/rad (for linear: the slope of the segment holding x)."""
        xw = self._wrap(x)
        if self._spline is not None:
            return self._spline(xw, 1)
        idx = np.clip(np.searchsorted(self._x, xw, side="right") - 1, 0, len(self._slopes) - 1)
        return self._slopes[idx]


class _FourierCurve:
    """delta(x) = mean + sum a_n cos(n x) + b_n sin(n x); x in radians, delta in deg."""

    knots_rad = np.empty(0)
    smooth = True

    def __init__(self, mean_deg: float, cos_deg: Sequence[float], sin_deg: Sequence[float]) -> None:
        self._mean = float(mean_deg)
        self._a = np.asarray(cos_deg, dtype=float)
        self._b = np.asarray(sin_deg, dtype=float)
        self._n = np.arange(1, len(self._a) + 1, dtype=float)

    def _phases(self, x: np.ndarray) -> np.ndarray:
        return np.multiply.outer(np.asarray(x, dtype=float), self._n)

    def value(self, x: np.ndarray) -> np.ndarray:
        nx = self._phases(x)
        return self._mean + np.cos(nx) @ self._a + np.sin(nx) @ self._b

    def slope(self, x: np.ndarray) -> np.ndarray:
        nx = self._phases(x)
        return np.cos(nx) @ (self._n * self._b) - np.sin(nx) @ (self._n * self._a)


_Curve = _TableCurve | _FourierCurve


def _build_curves(layer: _Layer, interpolation: str) -> tuple[_Curve, ...]:
    """One curve per blade; a shared layer reuses one curve object for all blades."""
    if isinstance(layer, _TableLayer):
        make = lambda i: _TableCurve(layer.azimuth_deg, layer.flap_deg[i], interpolation == "spline")  # noqa: E731
    else:
        make = lambda i: _FourierCurve(layer.mean_deg[i], layer.cos_deg[i], layer.sin_deg[i])  # noqa: E731
    blades = len(layer.flap_deg) if isinstance(layer, _TableLayer) else len(layer.mean_deg)
    if layer.shared:
        one = make(0)
        return (one,) * blades
    return tuple(make(i) for i in range(blades))


def _peak_abs(fn: Callable[[np.ndarray], np.ndarray], knots_rad: np.ndarray,
              smooth: bool) -> tuple[float, float]:
    """Largest |fn| over one revolution and its azimuth (rad).

    Samples a dense grid that contains every knot and every midpoint between grid points, which
    is exact for piecewise-linear values (peaks at knots) and piecewise-constant slopes; for
    smooth curves the best local maxima are then refined by bounded Brent minimisation.
    """
    base = np.linspace(0.0, _TWO_PI, _PEAK_SAMPLES, endpoint=False)
    pts = np.unique(np.concatenate((base, np.mod(knots_rad, _TWO_PI))))
    ext = np.append(pts, pts[0] + _TWO_PI)
    xs = np.sort(np.concatenate((pts, 0.5 * (ext[:-1] + ext[1:]))))
    ys = np.abs(fn(xs))
    best = int(np.argmax(ys))
    peak, where = float(ys[best]), float(xs[best])
    if smooth:
        local = np.flatnonzero((ys >= np.roll(ys, 1)) & (ys >= np.roll(ys, -1)))
        for j in local[np.argsort(ys[local])[-4:]]:
            lo = xs[j - 1] if j > 0 else xs[-1] - _TWO_PI
            hi = xs[j + 1] if j + 1 < len(xs) else xs[0] + _TWO_PI
            res = minimize_scalar(lambda x: -abs(float(fn(np.array([x]))[0])), bounds=(lo, hi),
                                  method="bounded", options={"xatol": 1e-12})
            if -res.fun > peak:
                peak, where = float(-res.fun), float(res.x)
    return peak, where % _TWO_PI


def _fmt(x: float) -> str:
    """A float as a TOML literal that reads back bit for bit."""
    return repr(float(x))


def _fmt_list(values: Sequence[float]) -> str:
    return "[" + ", ".join(_fmt(v) for v in values) + "]"


# --------------------------------------------------------------------------- the hot-path table
class ScheduleTable:
    """A precomputed fine table of one schedule at ONE TSR: the controller's hot path.

    ``at(blade, azimuth_rad)`` is O(1) pure Python on lists of floats: it wraps the blade's own
    azimuth (radians, any real) onto a uniform grid of ``cells`` steps per revolution and
    interpolates linearly inside the cell.  For linear schedules a cell that holds one schedule
    knot is split at the knot, so the table reproduces the piecewise-linear schedule exactly
    (cells holding two or more knots, i.e. knots closer than the resolution, keep the best single
    split).  For spline and Fourier schedules the error is at most h**2/8 * max|delta''|
    (h = grid step in rad).  ``blade`` must be 0..N-1; it is not checked on this path.
    """

    __slots__ = ("blades", "tsr", "cells", "resolution_deg", "source", "_rows", "_per_rad", "_n",
                 "_offsets")

    def __init__(self, rows: list[list[tuple[float, float, float, float, float]]], tsr: float | None,
                 source: str) -> None:
        self.blades = len(rows)
        self.tsr = tsr
        self.cells = len(rows[0]) - 1
        self.resolution_deg = 360.0 / self.cells
        self.source = source
        self._rows = rows
        self._n = float(self.cells)
        self._per_rad = self.cells / _TWO_PI
        self._offsets = [i * _TWO_PI / self.blades for i in range(self.blades)]

    def at(self, blade: int, azimuth_rad: float) -> float:
        """Flap deflection (deg) of ``blade`` at its own azimuth ``azimuth_rad`` (rad, any real)."""
        try:
            x = (azimuth_rad * self._per_rad) % self._n
            i = int(x)
        except (ValueError, OverflowError, TypeError):
            raise ScheduleError(self.source, "azimuth_rad", azimuth_rad, "a finite angle in radians") from None
        c = self._rows[blade][i]
        f = x - i
        if f < c[2]:
            return c[0] + c[1] * f
        return c[3] + c[4] * (f - c[2])

    def at_rotor(self, blade: int, rotor_azimuth_rad: float) -> float:
        """Deflection (deg) of ``blade`` when blade 0 is at ``rotor_azimuth_rad`` (blade i at +i*2pi/N)."""
        return self.at(blade, rotor_azimuth_rad + self._offsets[blade])

    def __repr__(self) -> str:
        return (f"ScheduleTable(source={self.source!r}, blades={self.blades}, tsr={self.tsr!r}, "
                f"resolution_deg={self.resolution_deg:.6g})")


def _fine_cells(values: np.ndarray, knots_rad: np.ndarray, knot_values: np.ndarray,
                cells: int) -> list[tuple[float, float, float, float, float]]:
    """Cells (v0, s1, k, vk, s2) over a uniform grid: value v0 + s1*f for f < k, else vk + s2*(f-k).

    ``values`` holds the curve at the cells+1 grid points; f is the fraction of the cell (0..1).
    Knots strictly inside a cell split it (piecewise-linear curves only; pass empty knots otherwise).
    """
    v = values.tolist()
    inf = math.inf
    out = [(v[i], v[i + 1] - v[i], inf, 0.0, 0.0) for i in range(cells)]
    inside: dict[int, list[tuple[float, float]]] = {}
    for u, fk in zip((knots_rad * (cells / _TWO_PI)).tolist(), knot_values.tolist()):
        c = int(math.floor(u))
        frac = u - c
        if _ON_GRID < frac < 1.0 - _ON_GRID and 0 <= c < cells:
            inside.setdefault(c, []).append((frac, fk))
    crowded = sum(1 for knots in inside.values() if len(knots) > 1)
    if crowded:
        _log.warning("%d fine-table cells hold two or more schedule knots: features narrower than "
                     "%.4g deg are smoothed in the table", crowded, 360.0 / cells)
    for c, knots in inside.items():
        v0, v1 = v[c], v[c + 1]

        def split(k: float, fk: float) -> tuple[float, float, float, float, float]:
            return (v0, (fk - v0) / k, k, fk, (v1 - fk) / (1.0 - k))

        def worst(cell: tuple[float, float, float, float, float]) -> float:
            return max(abs((cell[0] + cell[1] * k if k < cell[2] else cell[3] + cell[4] * (k - cell[2])) - fk)
                       for k, fk in knots)

        out[c] = min((split(k, fk) for k, fk in knots), key=worst)
    out.append(out[0])   # guards x == cells after float rounding of the modulo
    return out


# --------------------------------------------------------------------------- the schedule
class Schedule:
    """Per-blade periodic flap deflection (deg) versus the blade's own azimuth, optionally per TSR.

    Build with :meth:`load`, :meth:`parse`, :meth:`from_arrays` or :meth:`neutral`.
    Attributes: ``blades``, ``tsr_axis`` (tuple of TSR values or None), ``source`` (file name or a
    description), ``text`` (the original file text, for run logs), ``interpolation`` ("linear" or
    "spline"; not used by Fourier schedules) and ``form`` ("table" or "fourier").
    """

    def __init__(self, layers: Sequence[_Layer], blades: int, interpolation: str, source: str,
                 text: str | None = None) -> None:
        self.blades = blades
        self.interpolation = interpolation
        self.source = source
        self.form = "table" if isinstance(layers[0], _TableLayer) else "fourier"
        self._layers = tuple(layers)
        self.tsr_axis = None if layers[0].tsr is None else tuple(layer.tsr for layer in layers)
        self._curves = tuple(_build_curves(layer, interpolation) for layer in layers)
        self._piecewise = self.form == "table" and interpolation == "linear"
        self.text = self.to_toml() if text is None else text

    # ---- constructors
    @classmethod
    def load(cls, path: str | Path, blades: int, interpolation: str | None = None) -> "Schedule":
        """Read a ``.csv`` or ``.toml`` schedule; ``interpolation`` overrides the file's choice."""
        source = str(path)
        suffix = Path(path).suffix.lower()
        if suffix not in (".csv", ".toml"):
            raise ScheduleError(source, "file suffix", suffix, ".csv or .toml")
        try:
            data = Path(path).read_bytes()
        except OSError as exc:
            raise ScheduleError(source, "file", source, f"a readable file ({exc.strerror or exc})") from None
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise ScheduleError(source, "file", f"byte {exc.start}", "UTF-8 text") from None
        return cls.parse(text, suffix[1:], blades, source=source, interpolation=interpolation)

    @classmethod
    def parse(cls, text: str, fmt: str, blades: int, source: str = "<text>",
              interpolation: str | None = None) -> "Schedule":
        """Parse schedule ``text`` in format ``fmt`` ("csv" or "toml"); ``source`` names it in errors."""
        blades = _check_blades(source, blades)
        if not isinstance(text, str):
            raise ScheduleError(source, "text", type(text).__name__, "the schedule as str")
        if interpolation is not None:
            interpolation = _check_interpolation(source, "interpolation", interpolation)
        body = text[1:] if text.startswith("\ufeff") else text
        if fmt == "csv":
            layers: list[_Layer] = list(_parse_csv(body, source, blades))
            chosen = interpolation or "linear"
        elif fmt == "toml":
            layers, from_file = _parse_toml(body, source, blades)
            chosen = interpolation or from_file
        else:
            raise ScheduleError(source, "format", fmt, '"csv" or "toml"')
        schedule = cls(layers, blades, chosen, source, text)
        _log.debug("loaded %s", schedule)
        return schedule

    @classmethod
    def neutral(cls, blades: int) -> "Schedule":
        """delta = 0 at every azimuth for every blade."""
        return cls.from_arrays([0.0, 120.0, 240.0], [0.0, 0.0, 0.0], blades, source="<neutral>")

    @classmethod
    def from_arrays(cls, azimuth_deg: object, flap_deg: object, blades: int,
                    tsr: Sequence[float] | None = None, interpolation: str = "linear",
                    source: str = "<arrays>") -> "Schedule":
        """Build a table schedule from arrays (degrees).

        Without ``tsr``: ``azimuth_deg`` shape (M,), ``flap_deg`` (M,) shared or (blades, M).
        With ``tsr`` (K values): ``azimuth_deg`` (M,) for every TSR or K grids; ``flap_deg`` K
        entries, each (M,) shared or (blades, M).  Validated like a file.
        """
        blades = _check_blades(source, blades)
        interpolation = _check_interpolation(source, "interpolation", interpolation)
        az, flap = _plain(azimuth_deg), _plain(flap_deg)
        if tsr is None:
            layers = [_table_layer(source, None, az, "azimuth_deg", flap, "flap_deg", blades)]
        else:
            tsrs = _numbers(source, "tsr", _plain(tsr))
            if not tsrs:
                raise ScheduleError(source, "tsr", tsrs, "one or more TSR values, or None")
            if not isinstance(flap, list) or len(flap) != len(tsrs):
                raise ScheduleError(source, "flap_deg", flap, f"{len(tsrs)} entries, one per TSR")
            grids = az if isinstance(az, list) and az and all(isinstance(a, list) for a in az) else None
            if grids is not None and len(grids) != len(tsrs):
                raise ScheduleError(source, "azimuth_deg", az, f"one grid or {len(tsrs)} grids, one per TSR")
            layers = []
            for k, t in enumerate(tsrs):
                _check_tsr(source, f"tsr[{k}]", t, tsrs[k - 1] if k else None)
                grid, key = (grids[k], f"azimuth_deg[{k}]") if grids is not None else (az, "azimuth_deg")
                layers.append(_table_layer(source, t, grid, key, flap[k], f"flap_deg[{k}]", blades))
        return cls(layers, blades, interpolation, source)

    # ---- queries
    def _blade(self, blade: object) -> int:
        if isinstance(blade, (bool, np.bool_)) or not isinstance(blade, numbers.Integral) \
                or not 0 <= blade < self.blades:
            raise ScheduleError(self.source, "blade", blade, f"a blade index 0..{self.blades - 1}")
        return int(blade)

    def _weights(self, tsr: object) -> tuple[tuple[float, int], ...]:
        """(weight, layer index) pairs for linear interpolation in TSR, clamped at the ends."""
        axis = self.tsr_axis
        if axis is None:
            if tsr is not None:
                _number(self.source, "tsr", tsr)
            return ((1.0, 0),)
        if tsr is None:
            raise ScheduleError(self.source, "tsr", None,
                                f"a TSR value (this schedule has the TSR axis {list(axis)})")
        t = _number(self.source, "tsr", tsr)
        if t <= axis[0]:
            return ((1.0, 0),)
        if t >= axis[-1]:
            return ((1.0, len(axis) - 1),)
        k = bisect.bisect_right(axis, t) - 1
        w = (t - axis[k]) / (axis[k + 1] - axis[k])
        return ((1.0 - w, k), (w, k + 1))

    def _blend(self, blade: int, tsr: object, slope: bool) -> tuple[Callable[[np.ndarray], np.ndarray], np.ndarray]:
        weights = self._weights(tsr)
        curves = [(w, self._curves[k][blade]) for w, k in weights]

        def fn(x: np.ndarray) -> np.ndarray:
            return sum(w * (c.slope(x) if slope else c.value(x)) for w, c in curves)

        knots = np.unique(np.concatenate([c.knots_rad for _, c in curves]))
        return fn, knots

    def evaluate(self, theta_rad: object, blade: int, tsr: float | None = None) -> np.ndarray:
        """Exact deflection (deg) of ``blade`` at its own azimuth(s) ``theta_rad`` (rad, any real)."""
        b = self._blade(blade)
        try:
            x = np.asarray(theta_rad, dtype=float)
        except (TypeError, ValueError):
            raise ScheduleError(self.source, "theta_rad", theta_rad, "finite angles in radians") from None
        if not np.all(np.isfinite(x)):
            raise ScheduleError(self.source, "theta_rad", theta_rad, "finite angles in radians")
        fn, _ = self._blend(b, tsr, slope=False)
        return np.asarray(fn(x), dtype=float).reshape(x.shape)

    def peak_slope_deg_per_rad(self, tsr: float | None = None) -> list[float]:
        """max |d delta / d theta| (deg/rad) per blade; the flap rate is this slope times omega."""
        out = []
        for b in range(self.blades):
            fn, knots = self._blend(b, tsr, slope=True)
            out.append(_peak_abs(fn, knots, smooth=not self._piecewise)[0])
        return out

    def check_travel(self, travel_deg: Sequence[float]) -> None:
        """Raise ScheduleError if |delta| of any blade, at any TSR, exceeds that blade's travel (deg).

        Interpolation in TSR is a convex blend, so checking every TSR entry covers all TSRs; spline
        and Fourier overshoot between points is found by dense sampling plus refinement.
        """
        travel = _plain(travel_deg)
        if not isinstance(travel, list) or len(travel) != self.blades:
            raise ScheduleError(self.source, "travel_deg", travel_deg,
                                f"{self.blades} travel limits in degrees, one per blade")
        for i, limit in enumerate(travel):
            limit = _number(self.source, f"travel_deg[{i}]", limit)
            if limit <= 0.0:
                raise ScheduleError(self.source, f"travel_deg[{i}]", limit, "a travel > 0 degrees")
            for layer, curves in zip(self._layers, self._curves):
                c = curves[i]
                peak, where = _peak_abs(c.value, c.knots_rad, smooth=not self._piecewise)
                if peak > limit:
                    at_tsr = "" if layer.tsr is None else f", tsr {layer.tsr!r}"
                    value = float(c.value(np.array([where]))[0])
                    raise ScheduleError(self.source, f"blade {i}{at_tsr}, azimuth {where / _DEG:.2f} deg",
                                        value, f"|flap| <= {limit!r} deg (servo travel of blade {i})")

    def table(self, tsr: float | None = None, resolution_deg: float = 0.1) -> ScheduleTable:
        """Fine table at one TSR for the hot path; grid step 360/ceil(360/resolution_deg) deg."""
        res = _number(self.source, "resolution_deg", resolution_deg)
        if not 1e-4 <= res <= 10.0:
            raise ScheduleError(self.source, "resolution_deg", res, "a resolution in [0.0001, 10] degrees")
        cells = math.ceil(360.0 / res - 1e-9)
        grid = np.arange(cells + 1) * (_TWO_PI / cells)
        rows = []
        for b in range(self.blades):
            fn, knots = self._blend(b, tsr, slope=False)
            if not self._piecewise:
                knots = np.empty(0)
            rows.append(_fine_cells(fn(grid), knots, fn(knots), cells))
        t = None if self.tsr_axis is None else _number(self.source, "tsr", tsr)
        _log.debug("fine table of %s at tsr %s: %d cells per revolution", self.source, t, cells)
        return ScheduleTable(rows, t, self.source)

    # ---- transforms and output
    def shifted(self, lead_deg: float) -> "Schedule":
        """A new schedule with delta_new(theta) = delta(theta + lead) (a pre-compensating phase lead)."""
        lead = _number(self.source, "lead_deg", lead_deg)
        layers: list[_Layer] = []
        for layer in self._layers:
            if isinstance(layer, _TableLayer):
                az = [(a - lead) % 360.0 for a in layer.azimuth_deg]
                az = [a - 360.0 if a >= 360.0 else a for a in az]
                order = sorted(range(len(az)), key=az.__getitem__)
                flap = [[col[j] for j in order] for col in layer.flap_deg]
                new = _table_layer(self.source, layer.tsr, [az[j] for j in order], "azimuth_deg",
                                   flap[0] if layer.shared else flap, "flap_deg", self.blades)
            else:
                cos, sin = [], []
                for a, b in zip(layer.cos_deg, layer.sin_deg):
                    n = np.arange(1, len(a) + 1) * (lead * _DEG)
                    cos.append(tuple((np.multiply(a, np.cos(n)) + np.multiply(b, np.sin(n))).tolist()))
                    sin.append(tuple((np.multiply(b, np.cos(n)) - np.multiply(a, np.sin(n))).tolist()))
                new = _FourierLayer(layer.tsr, layer.mean_deg, tuple(cos), tuple(sin), layer.shared)
            layers.append(new)
        return Schedule(layers, self.blades, self.interpolation, f"{self.source} shifted by {lead!r} deg")

    def to_toml(self) -> str:
        """TOML text in the same form (table or Fourier) that :meth:`parse`/:meth:`load` read back exactly."""
        note = "".join(ch if ch.isprintable() else "?" for ch in self.source)
        lines = [f"# flap schedule ({self.form} form, {self.blades} blades) from {note}",
                 "schema_version = 1", f'interpolation = "{self.interpolation}"']
        for layer in self._layers:
            lines += ["", f"[[{self.form}]]"]
            if layer.tsr is not None:
                lines.append(f"tsr = {_fmt(layer.tsr)}")
            if isinstance(layer, _TableLayer):
                lines.append(f"azimuth_deg = {_fmt_list(layer.azimuth_deg)}")
                cols = [layer.flap_deg[0]] if layer.shared else layer.flap_deg
                lines.append("flap_deg = " + (_fmt_list(cols[0]) if layer.shared else
                                              "[\n" + "".join(f"  {_fmt_list(c)},\n" for c in cols) + "]"))
            elif layer.shared:
                lines += [f"mean_deg = {_fmt(layer.mean_deg[0])}", f"cos_deg = {_fmt_list(layer.cos_deg[0])}",
                          f"sin_deg = {_fmt_list(layer.sin_deg[0])}"]
            else:
                lines.append(f"mean_deg = {_fmt_list(layer.mean_deg)}")
                for key, data in (("cos_deg", layer.cos_deg), ("sin_deg", layer.sin_deg)):
                    lines.append(f"{key} = [" + ", ".join(_fmt_list(c) for c in data) + "]")
        return "\n".join(lines) + "\n"

    def __repr__(self) -> str:
        return (f"Schedule(source={self.source!r}, blades={self.blades}, form={self.form!r}, "
                f"interpolation={self.interpolation!r}, tsr_axis={self.tsr_axis!r})")
