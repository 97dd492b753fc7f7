"""Iterative learning control of the flap schedule across revolutions, indexed by azimuth.

Spatial ILC (REFERENCES section 9): a trial is one revolution, a sample is one azimuth bin of
the blade's own azimuth, so a change of rotor speed does not break the alignment.  After each
revolution j the correction u (deg per bin, added to the scheduled command) is updated with
the Q-filtered P-type law

    u_{j+1}(n) = Q[ u_j(n) + gamma e_j(n + d) ]          (bins taken modulo the bin count)

where e = schedule - measured flap (deg, averaged over each bin), gamma the learning gain and d
the phase lead in bins.  Q is a zero-phase low-pass applied in the FFT domain over the periodic
revolution: harmonics 0..q_cutoff_harmonic pass with gain 1, higher ones are removed.

Convergence (Arimoto, Kawamura & Miyazaki 1984; Bristow, Tharayil & Alleyne 2006, from memory):
with the servo in periodic steady state, harmonic k of the correction evolves by the factor
Q_k (1 - gamma e^{j 2 pi k d / N} P_k), P_k = G(j k Omega) B_k, where B_k = sinc^3(k / N) is the
bin average (a box, sinc) times the linear interpolation of the correction between bin centres
(a triangle, sinc^2), both zero-phase.  Learning is enabled only when
sup_k |Q_k (1 - gamma e^{j 2 pi k d / N} P_k)| < 1 at every rotor speed of interest.

Bin n covers own azimuth [n, n + 1) * 2 pi / N; its centre is (n + 1/2) 2 pi / N.
"""
from __future__ import annotations

import json
import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from flapctl.errors import FlapctlError, ProfileError
from flapctl.tune.leaddesign import ServoLike
from flapctl.tune.leaddesign import servo_response as _response_of

__all__ = [
    "ILCConvergenceError", "LearningDisabled", "ConvergenceReport", "q_gains", "zero_phase_lowpass",
    "learning_update", "convergence_check", "BinAccumulator", "AzimuthILC",
]

log = logging.getLogger(__name__)

_SOURCE = "ilc"
_TWO_PI = 2.0 * math.pi
_FORMAT = "flapctl-azimuth-ilc"
_VERSION = 1


class ILCConvergenceError(ProfileError):
    """The learning gain, lead and Q filter fail the convergence check for this servo and speed."""


class LearningDisabled(FlapctlError, RuntimeError):
    """update() was called while learning is not enabled (run enable() with the servo response first)."""


def _int(key: str, value: object, low: int, high: int | None = None, source: str = _SOURCE) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < low or (high is not None and value > high):
        expected = f"an integer >= {low}" if high is None else f"an integer {low}..{high}"
        raise ProfileError(source, key, value, expected)
    return value


def _float(key: str, value: object, source: str = _SOURCE) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ProfileError(source, key, value, "a finite number")
    return float(value)


# --------------------------------------------------------------------------- filters and law
def q_gains(bins: int, q_filter: int | Sequence[float]) -> np.ndarray:
    """Zero-phase Q gains per harmonic 0..bins//2: a cutoff harmonic (brick wall) or explicit gains in [0, 1]."""
    n = _int("bins", bins, 4)
    half = n // 2 + 1
    if isinstance(q_filter, (int, np.integer)) and not isinstance(q_filter, bool):
        cutoff = _int("q_cutoff_harmonic", int(q_filter), 0, n // 2)
        return (np.arange(half) <= cutoff).astype(float)
    gains = np.asarray(q_filter, dtype=float)
    if gains.shape != (half,) or not np.all(np.isfinite(gains)) or np.any(gains < 0.0) or np.any(gains > 1.0):
        raise ProfileError(_SOURCE, "q_filter", q_filter,
                           f"a cutoff harmonic or {half} real gains in [0, 1] (harmonics 0..{n // 2})")
    return gains


def zero_phase_lowpass(values: Sequence[float], q_filter: int | Sequence[float]) -> np.ndarray:
    """Q applied to one revolution of bin values (periodic): real gains per harmonic, so zero phase."""
    x = np.asarray(values, dtype=float)
    return np.fft.irfft(np.fft.rfft(x) * q_gains(x.size, q_filter), x.size)


def learning_update(correction: Sequence[float], error: Sequence[float], gamma: float, lead_bins: int,
                    q_filter: int | Sequence[float]) -> np.ndarray:
    """One revolution of the law u <- Q[u + gamma e(n + d)] (pure function, arrays of bins)."""
    u = np.asarray(correction, dtype=float)
    e = np.asarray(error, dtype=float)
    if u.shape != e.shape or u.ndim != 1:
        raise ProfileError(_SOURCE, "error", f"{e.size} bins", f"{u.size} bins, one error per bin")
    return zero_phase_lowpass(u + gamma * np.roll(e, -int(lead_bins)), q_filter)


@dataclass(frozen=True)
class ConvergenceReport:
    """Result of :func:`convergence_check`: the sup gain, where it occurs and the verdict."""

    sup_gain: float
    worst_harmonic: int
    worst_speed_rad_s: float
    converges: bool
    gains: np.ndarray          # |Q (1 - gamma e^{j w d} P)| per speed (rows) and harmonic (columns)

    def describe(self) -> str:
        verdict = "converges" if self.converges else "does NOT converge"
        return (f"sup |Q(1 - gamma e^(jwd) G)| = {self.sup_gain:.4f} at harmonic {self.worst_harmonic}, "
                f"{self.worst_speed_rad_s:.3f} rad/s: {verdict}")


def convergence_check(servo_response: ServoLike, gamma: float, lead_bins: int, q_filter: int | Sequence[float],
                      omega: float | Sequence[float], bins: int = 72, tick_s: float = 0.0) -> ConvergenceReport:
    """sup over harmonics (and speeds) of |Q_k (1 - gamma e^{j 2 pi k d / N} G(j k Omega) B_k)| < 1?

    ``servo_response`` is ServoParams, a ServoFit or a callable G(freq_hz); ``omega`` one rotor
    speed or several (rad/s); ``tick_s`` adds the controller's zero-order hold.
    """
    g = _response_of(servo_response, tick_s)
    n = _int("bins", bins, 4)
    gam = _float("gamma", gamma)
    d = _int("lead_bins", lead_bins, -n, n)
    q = q_gains(n, q_filter)
    speeds = np.atleast_1d(np.asarray(omega, dtype=float))
    if speeds.ndim != 1 or speeds.size == 0 or not np.all(np.isfinite(speeds)) or np.any(speeds <= 0.0):
        raise ProfileError(_SOURCE, "omega", omega, "one or more rotor speeds > 0 rad/s")
    k = np.arange(n // 2 + 1)
    bin_factor = np.sinc(k / n) ** 3
    shift = np.exp(1j * _TWO_PI * k * d / n)
    gains = np.array([np.abs(q * (1.0 - gam * shift * g(k * (w / _TWO_PI)) * bin_factor)) for w in speeds])
    s, h = np.unravel_index(int(np.argmax(gains)), gains.shape)
    sup = float(gains[s, h])
    return ConvergenceReport(sup, int(h), float(speeds[s]), sup < 1.0, gains)


# --------------------------------------------------------------------------- error bins
class BinAccumulator:
    """Averages an error signal into azimuth bins over one revolution; ``add`` is O(1) pure Python."""

    __slots__ = ("bins", "_per_rad", "_sum", "_count")

    def __init__(self, bins: int) -> None:
        self.bins = _int("bins", bins, 4)
        self._per_rad = self.bins / _TWO_PI
        self._sum = [0.0] * self.bins
        self._count = [0] * self.bins

    def add(self, azimuth_rad: float, error_deg: float) -> None:
        """Add one sample of the error (deg) at the blade's own azimuth (rad, any real)."""
        i = int((azimuth_rad * self._per_rad) % self.bins)
        if i == self.bins:          # float rounding of the modulo
            i = 0
        self._sum[i] += error_deg
        self._count[i] += 1

    def means(self) -> list[float]:
        """Mean error per bin; empty bins are filled by periodic linear interpolation of the others."""
        filled = [i for i, c in enumerate(self._count) if c]
        if not filled:
            raise ProfileError(_SOURCE, "bins", "no samples", "at least one error sample in the revolution")
        x = np.array(filled, dtype=float)
        y = np.array([self._sum[i] / self._count[i] for i in filled])
        return np.interp(np.arange(self.bins), x, y, period=self.bins).tolist()

    def clear(self) -> None:
        self._sum = [0.0] * self.bins
        self._count = [0] * self.bins


# --------------------------------------------------------------------------- the learner
class AzimuthILC:
    """Azimuth-indexed learning correction (deg) for one blade's flap command.

    ``bins`` per revolution, learning gain ``gamma``, phase lead ``lead_bins``, Q cutoff
    ``q_cutoff_harmonic`` (harmonics above it removed each revolution), optional symmetric
    ``limit_deg`` on the correction.  Learning starts disabled: :meth:`enable` runs the
    convergence check and refuses (ILCConvergenceError) when it fails.
    """

    def __init__(self, bins: int, gamma: float, lead_bins: int, q_cutoff_harmonic: int,
                 limit_deg: float | None = None) -> None:
        self.bins = _int("bins", bins, 4)
        self.gamma = _float("gamma", gamma)
        self.lead_bins = _int("lead_bins", lead_bins, -self.bins, self.bins)
        self.q_cutoff_harmonic = _int("q_cutoff_harmonic", q_cutoff_harmonic, 0, self.bins // 2)
        if limit_deg is not None and (_float("limit_deg", limit_deg) <= 0.0):
            raise ProfileError(_SOURCE, "limit_deg", limit_deg, "a correction limit > 0 deg, or None")
        self.limit_deg = None if limit_deg is None else float(limit_deg)
        self.enabled = False
        self.frozen = False
        self.revolutions = 0
        self.last_error_rms_deg = math.nan
        self._per_rad = self.bins / _TWO_PI
        self._set([0.0] * self.bins)

    # ---- state
    def _set(self, values: Sequence[float]) -> None:
        self._c = [float(v) for v in values]
        self._ext = self._c + [self._c[0]]

    @property
    def correction_deg(self) -> list[float]:
        """The correction per bin (deg), a copy."""
        return list(self._c)

    def enable(self, servo: ServoLike, omega_rad_s: float | Sequence[float], tick_s: float = 0.0) -> ConvergenceReport:
        """Check convergence for the servo at these speeds; enable learning or raise ILCConvergenceError."""
        report = convergence_check(servo, self.gamma, self.lead_bins, self.q_cutoff_harmonic, omega_rad_s,
                                   self.bins, tick_s)
        if not report.converges:
            self.enabled = False
            raise ILCConvergenceError(
                _SOURCE, "gamma", self.gamma,
                f"a learning gain, lead and Q filter with sup|Q(1 - gamma e^(jwd) G)| < 1; this setting gives "
                f"{report.sup_gain:.3f} at harmonic {report.worst_harmonic} and {report.worst_speed_rad_s:.3f} rad/s "
                f"(lead_bins {self.lead_bins}, q_cutoff_harmonic {self.q_cutoff_harmonic}): learning refused")
        self.enabled = True
        log.info("learning enabled: %s", report.describe())
        return report

    def freeze(self) -> None:
        """Stop learning and keep the current correction (update() then leaves it unchanged)."""
        self.frozen = True

    # ---- per revolution
    def update(self, measured_error_per_bin: Sequence[float]) -> list[float]:
        """After a revolution: error = schedule - measured flap (deg) per bin -> the new correction per bin."""
        e = np.asarray(measured_error_per_bin, dtype=float)
        if e.shape != (self.bins,) or not np.all(np.isfinite(e)):
            raise ProfileError(_SOURCE, "measured_error_per_bin", measured_error_per_bin,
                               f"{self.bins} finite errors in degrees, one per bin")
        self.last_error_rms_deg = float(np.sqrt(np.mean(e * e)))
        if self.frozen:
            return list(self._c)
        if not self.enabled:
            raise LearningDisabled("learning is not enabled: call enable(servo, omega_rad_s) so that the "
                                   "convergence check runs first")
        u = learning_update(self._c, e, self.gamma, self.lead_bins, self.q_cutoff_harmonic)
        if self.limit_deg is not None:
            u = np.clip(u, -self.limit_deg, self.limit_deg)
        self._set(u.tolist())
        self.revolutions += 1
        return list(self._c)

    # ---- hot path
    def correction_at(self, azimuth_rad: float) -> float:
        """Correction (deg) at the blade's own azimuth (rad, any real): linear between bin centres, O(1)."""
        x = (azimuth_rad * self._per_rad - 0.5) % self.bins
        i = int(x)
        if i >= self.bins:
            i = self.bins - 1
        c = self._ext
        return c[i] + (x - i) * (c[i + 1] - c[i])

    # ---- files
    def save(self, path: str | Path) -> Path:
        """Write the learner (settings, counters and correction) as JSON to a NEW file."""
        out = Path(path)
        if out.exists():
            raise ProfileError(str(out), "path", str(out), "a path that does not exist yet (no overwrite)")
        data = {
            "format": _FORMAT, "version": _VERSION, "bins": self.bins, "gamma": self.gamma,
            "lead_bins": self.lead_bins, "q_cutoff_harmonic": self.q_cutoff_harmonic,
            "limit_deg": self.limit_deg, "frozen": self.frozen, "revolutions": self.revolutions,
            "correction_deg": self._c,
        }
        with open(out, "x", encoding="utf-8") as fh:
            json.dump(data, fh, indent=1)
            fh.write("\n")
        return out

    @classmethod
    def load(cls, path: str | Path) -> "AzimuthILC":
        """Read a saved learner; learning starts disabled (re-run enable() for the rig at hand)."""
        src = str(path)
        try:
            data = json.loads(Path(path).read_text(encoding="utf-8"))
        except OSError as exc:
            raise ProfileError(src, "<file>", src, f"a readable file ({exc.strerror})") from None
        except json.JSONDecodeError as exc:
            raise ProfileError(src, "<syntax>", str(exc), "valid JSON") from None
        if not isinstance(data, dict):
            raise ProfileError(src, "<top>", type(data).__name__, "a JSON object")
        keys = ("format", "version", "bins", "gamma", "lead_bins", "q_cutoff_harmonic", "limit_deg",
                "frozen", "revolutions", "correction_deg")
        for key in data:
            if key not in keys:
                raise ProfileError(src, key, data[key], f"one of the keys {keys}")
        for key in keys:
            if key not in data:
                raise ProfileError(src, key, "<missing>", "present")
        if data["format"] != _FORMAT or data["version"] != _VERSION:
            raise ProfileError(src, "format", f"{data['format']!r} v{data['version']!r}",
                               f"{_FORMAT!r} version {_VERSION}")
        limit = data["limit_deg"]
        ilc = cls(_int("bins", data["bins"], 4, source=src), _float("gamma", data["gamma"], src),
                  _int("lead_bins", data["lead_bins"], -data["bins"], data["bins"], src),
                  _int("q_cutoff_harmonic", data["q_cutoff_harmonic"], 0, data["bins"] // 2, src),
                  None if limit is None else _float("limit_deg", limit, src))
        if not isinstance(data["frozen"], bool):
            raise ProfileError(src, "frozen", data["frozen"], "true or false")
        values = data["correction_deg"]
        if not isinstance(values, list) or len(values) != ilc.bins:
            raise ProfileError(src, "correction_deg", values, f"a list of {ilc.bins} numbers")
        ilc._set([_float(f"correction_deg[{j}]", v, src) for j, v in enumerate(values)])
        ilc.frozen = data["frozen"]
        ilc.revolutions = _int("revolutions", data["revolutions"], 0, source=src)
        return ilc
