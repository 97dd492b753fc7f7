"""Brake, shaft encoder, torque sensor and flow models for the software-in-the-loop rig.

Each model is built from a frozen parameter dataclass, keeps plain-float state, is stepped
once per tick (pure Python, no numpy) and draws its randomness from its own
``random.Random(seed)``, re-seeded by ``reset()`` so that a run repeats exactly.

Units: torques in N m, angles in radians inside (degrees only where a name says so), speeds
in m/s, times in s.  Brake torque is a magnitude (>= 0) that opposes the rotation; the rotor
model applies its sign.  Shaft torque readings keep the sign of the true torque.
"""
from __future__ import annotations

import math
import random
from dataclasses import dataclass, field

from flapctl.errors import ProfileError

__all__ = [
    "BrakeParams",
    "BrakeModel",
    "EncoderParams",
    "EncoderModel",
    "TorqueSensorParams",
    "TorqueSensor",
    "FlowParams",
    "FlowModel",
    "FlowSensorParams",
    "FlowSensor",
]

_TWO_PI = 2.0 * math.pi
_INF = math.inf
_POSITIVE = "a finite number > 0"
_NON_NEGATIVE = "a finite number >= 0"


def _fail(params: object, name: str, value: object, expected: str) -> None:
    key = getattr(params, "key")
    raise ProfileError(getattr(params, "source"), f"{key}.{name}" if key else name, value, expected)


def _number(params: object, name: str, low: float, low_open: bool, expected: str,
            high: float = _INF) -> None:
    """Raise ProfileError unless ``params.name`` is a finite real in [low, high] (low open if asked)."""
    value = getattr(params, name)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) \
            or value < low or value > high or (low_open and value == low):
        _fail(params, name, value, expected)


def _integer(params: object, name: str, low: int, high: float, expected: str) -> None:
    value = getattr(params, name)
    if isinstance(value, bool) or not isinstance(value, int) or value < low or value > high:
        _fail(params, name, value, expected)


def _runtime_dt(params: object, dt_s: float) -> float:
    """Validate a tick length given to ``step``; returns it as float."""
    if isinstance(dt_s, bool) or not isinstance(dt_s, (int, float)) or not math.isfinite(dt_s) \
            or dt_s <= 0.0:
        _fail(params, "step.dt_s", dt_s, _POSITIVE)
    return float(dt_s)


# ---------------------------------------------------------------------------- brake
@dataclass(frozen=True, kw_only=True)
class BrakeParams:
    """Load brake: first-order lag of time constant ``time_constant_s`` (0 = none), then saturation."""

    max_torque_nm: float
    min_torque_nm: float = 0.0
    time_constant_s: float
    source: str = field(default="<BrakeParams>", compare=False, repr=False)
    key: str = field(default="brake", compare=False, repr=False)

    def __post_init__(self) -> None:
        _number(self, "max_torque_nm", 0.0, True, _POSITIVE)
        _number(self, "min_torque_nm", 0.0, False,
                f"a finite number in [0, {self.max_torque_nm:g}] (at most max_torque_nm)",
                self.max_torque_nm)
        _number(self, "time_constant_s", 0.0, False, _NON_NEGATIVE)


class BrakeModel:
    """Brake torque (N m, magnitude opposing rotation) following a command through a lag.

    The lag state follows the command exactly for a command held over the tick
    (y += (1 - exp(-dt/T)) (u - y)); the output is the state clipped to
    [min_torque_nm, max_torque_nm].  Setting ``failed`` drops the torque to 0 at once and
    empties the lag, so the brake restarts from zero when ``failed`` is cleared.
    """

    __slots__ = ("params", "failed", "torque_nm", "_y", "_dt", "_alpha")

    def __init__(self, params: BrakeParams) -> None:
        self.params = params
        self._dt = -1.0
        self._alpha = 1.0
        self.reset()

    def reset(self) -> None:
        """Lag state and output to zero, ``failed`` cleared."""
        self._y = 0.0
        self.torque_nm = 0.0
        self.failed = False

    def step(self, dt_s: float, command_nm: float) -> float:
        """Advance by ``dt_s`` with ``command_nm`` held over the tick; returns the brake torque (N m)."""
        if dt_s != self._dt:
            self._set_dt(dt_s)
        if not -_INF < command_nm < _INF:
            raise ProfileError(self.params.source, f"{self.params.key}.step.command_nm",
                               command_nm, "a finite number")
        if self.failed:
            self._y = 0.0
            self.torque_nm = 0.0
            return 0.0
        y = self._y + self._alpha * (command_nm - self._y)
        self._y = y
        p = self.params
        if y > p.max_torque_nm:
            y = p.max_torque_nm
        elif y < p.min_torque_nm:
            y = p.min_torque_nm
        self.torque_nm = y
        return y

    def _set_dt(self, dt_s: float) -> None:
        dt = _runtime_dt(self.params, dt_s)
        tc = self.params.time_constant_s
        self._alpha = 1.0 if tc == 0.0 else -math.expm1(-dt / tc)
        self._dt = dt


# ---------------------------------------------------------------------------- encoder
@dataclass(frozen=True, kw_only=True)
class EncoderParams:
    """Quadrature shaft encoder with a hardware counter.

    ``counts_per_rev`` is after 4x decoding; ``index_offset_deg`` is the true shaft angle of
    the index pulse; ``missed_count_prob`` is the chance that any one edge is not counted.
    """

    counts_per_rev: int
    counter_bits: int = 32
    index_offset_deg: float = 0.0
    missed_count_prob: float = 0.0
    seed: int = 0
    source: str = field(default="<EncoderParams>", compare=False, repr=False)
    key: str = field(default="encoder", compare=False, repr=False)

    def __post_init__(self) -> None:
        _integer(self, "counts_per_rev", 1, _INF, "an integer >= 1")
        _integer(self, "counter_bits", 8, 64, "an integer in [8, 64]")
        _number(self, "index_offset_deg", 0.0, False, "a number in [0, 360)", 360.0)
        if self.index_offset_deg == 360.0:
            _fail(self, "index_offset_deg", self.index_offset_deg, "a number in [0, 360)")
        _number(self, "missed_count_prob", 0.0, False, "a number in [0, 1)", 1.0)
        if self.missed_count_prob == 1.0:
            _fail(self, "missed_count_prob", self.missed_count_prob, "a number in [0, 1)")
        _integer(self, "seed", 0, _INF, "an integer >= 0")


class EncoderModel:
    """Shaft encoder and counter (REFERENCES §10).

    The ideal count is floor(theta / q), q = 2 pi / counts_per_rev, for the unwrapped true
    shaft angle theta (the counter reads 0 at theta = 0).  ``counts`` is the counter register:
    ideal count plus accumulated errors (injected glitches minus missed edges), wrapped modulo
    2**counter_bits like hardware.  The index pulse fires whenever theta crosses
    index_offset + 2 pi k in either direction; the counter value at that instant is latched
    in ``index_latch`` and ``index_events`` counts the pulses (several if one tick spans
    several turns).  Errors made during a tick are booked at its end.
    """

    __slots__ = ("params", "counts", "index_latch", "index_events", "_mask", "_scale",
                 "_cpr", "_off", "_off_counts", "_n", "_rev", "_err", "_suppressed",
                 "_p_miss", "_log_keep", "_until_miss", "_rng")

    def __init__(self, params: EncoderParams, initial_angle_rad: float = 0.0) -> None:
        self.params = params
        self._cpr = params.counts_per_rev
        self._mask = (1 << params.counter_bits) - 1
        self._scale = params.counts_per_rev / _TWO_PI
        self._off = math.radians(params.index_offset_deg)
        self._off_counts = math.floor(self._off * self._scale)
        self._p_miss = params.missed_count_prob
        self._log_keep = math.log1p(-self._p_miss) if self._p_miss > 0.0 else 0.0
        self.reset(initial_angle_rad)

    @property
    def resolution_rad(self) -> float:
        """Quantisation step q = 2 pi / counts_per_rev, radians."""
        return _TWO_PI / self._cpr

    @property
    def count_error(self) -> int:
        """Counts the register is off from the ideal count (glitches minus missed edges)."""
        return self._err

    @property
    def index_suppressed(self) -> bool:
        return self._suppressed

    def reset(self, angle_rad: float = 0.0) -> None:
        """Shaft at ``angle_rad``: counter at its ideal value, no errors, no index seen, rng re-seeded."""
        if not -_INF < angle_rad < _INF:
            raise ProfileError(self.params.source, f"{self.params.key}.reset.angle_rad",
                               angle_rad, "a finite number")
        self._rng = random.Random(self.params.seed)
        self._n = math.floor(angle_rad * self._scale)
        self._rev = math.floor((angle_rad - self._off) / _TWO_PI)
        self._err = 0
        self._suppressed = False
        self.counts = self._n & self._mask
        self.index_latch: int | None = None
        self.index_events = 0
        self._until_miss = self._draw_gap()

    def step(self, true_angle_rad: float) -> None:
        """Sample the counter at the true (unwrapped) shaft angle, radians."""
        if not -_INF < true_angle_rad < _INF:
            raise ProfileError(self.params.source, f"{self.params.key}.step.true_angle_rad",
                               true_angle_rad, "a finite number")
        n = math.floor(true_angle_rad * self._scale)
        dn = n - self._n
        if dn and self._p_miss > 0.0:
            missed = self._missed(dn if dn > 0 else -dn)
            self._err -= missed if dn > 0 else -missed
        self._n = n
        rev = math.floor((true_angle_rad - self._off) / _TWO_PI)
        if rev != self._rev:
            if not self._suppressed:
                k = rev if rev > self._rev else self._rev
                self.index_events += abs(rev - self._rev)
                self.index_latch = (k * self._cpr + self._off_counts + self._err) & self._mask
            self._rev = rev
        self.counts = (n + self._err) & self._mask

    def inject_glitch(self, n_counts: int) -> None:
        """Make the counter jump by ``n_counts`` (either sign), as electrical noise would."""
        if isinstance(n_counts, bool) or not isinstance(n_counts, int):
            raise ProfileError(self.params.source, f"{self.params.key}.inject_glitch.n_counts",
                               n_counts, "an integer")
        self._err += n_counts
        self.counts = (self._n + self._err) & self._mask

    def suppress_index(self, suppressed: bool = True) -> None:
        """Stop (or, with False, resume) detecting the index pulse."""
        if not isinstance(suppressed, bool):
            raise ProfileError(self.params.source, f"{self.params.key}.suppress_index.suppressed",
                               suppressed, "true or false")
        self._suppressed = suppressed

    def _draw_gap(self) -> int:
        """Edges counted before the next missed one (geometric, P(miss) = p per edge)."""
        if self._p_miss == 0.0:
            return 0
        return int(math.log(1.0 - self._rng.random()) / self._log_keep)

    def _missed(self, edges: int) -> int:
        missed = 0
        left = self._until_miss
        while edges > left:
            edges -= left + 1
            missed += 1
            left = self._draw_gap()
        self._until_miss = left - edges
        return missed


# ---------------------------------------------------------------------------- torque sensor
@dataclass(frozen=True, kw_only=True)
class TorqueSensorParams:
    """In-line shaft torque sensor: range +-range_nm, rms noise, first-order bandwidth, offset."""

    range_nm: float
    noise_nm: float
    bandwidth_hz: float
    offset_nm: float = 0.0
    seed: int = 0
    source: str = field(default="<TorqueSensorParams>", compare=False, repr=False)
    key: str = field(default="torque_sensor", compare=False, repr=False)

    def __post_init__(self) -> None:
        _number(self, "range_nm", 0.0, True, _POSITIVE)
        _number(self, "noise_nm", 0.0, False, _NON_NEGATIVE)
        _number(self, "bandwidth_hz", 0.0, True, _POSITIVE)
        _number(self, "offset_nm", -_INF, False, "a finite number")
        _integer(self, "seed", 0, _INF, "an integer >= 0")


class TorqueSensor:
    """Reading = LP(true) + offset + N(0, noise^2), clipped to +-range (N m).

    LP is the first-order low-pass 1/(1 + s/omega_c), omega_c = 2 pi bandwidth_hz, in its
    exact discretisation for an input held over the tick; it starts at 0 after reset.
    """

    __slots__ = ("params", "reading_nm", "_y", "_dt", "_alpha", "_rng", "_gauss")

    def __init__(self, params: TorqueSensorParams) -> None:
        self.params = params
        self._dt = -1.0
        self._alpha = 1.0
        self.reset()

    def reset(self) -> None:
        """Filter state to zero, rng re-seeded."""
        self._y = 0.0
        self.reading_nm = 0.0
        self._rng = random.Random(self.params.seed)
        self._gauss = self._rng.gauss

    def step(self, dt_s: float, true_torque_nm: float) -> float:
        """Advance by ``dt_s`` with the true shaft torque held over the tick; returns the reading (N m)."""
        if dt_s != self._dt:
            self._set_dt(dt_s)
        if not -_INF < true_torque_nm < _INF:
            raise ProfileError(self.params.source, f"{self.params.key}.step.true_torque_nm",
                               true_torque_nm, "a finite number")
        y = self._y + self._alpha * (true_torque_nm - self._y)
        self._y = y
        p = self.params
        r = y + p.offset_nm
        if p.noise_nm:
            r += self._gauss(0.0, p.noise_nm)
        if r > p.range_nm:
            r = p.range_nm
        elif r < -p.range_nm:
            r = -p.range_nm
        self.reading_nm = r
        return r

    def _set_dt(self, dt_s: float) -> None:
        dt = _runtime_dt(self.params, dt_s)
        self._alpha = -math.expm1(-dt * _TWO_PI * self.params.bandwidth_hz)
        self._dt = dt


# ---------------------------------------------------------------------------- flow
@dataclass(frozen=True, kw_only=True)
class FlowParams:
    """Free-stream speed: mean plus a turbulent fluctuation of rms I*mean and integral time T."""

    mean_m_s: float
    turbulence_intensity: float
    integral_time_s: float
    seed: int = 0
    source: str = field(default="<FlowParams>", compare=False, repr=False)
    key: str = field(default="flow", compare=False, repr=False)

    def __post_init__(self) -> None:
        _number(self, "mean_m_s", 0.0, False, _NON_NEGATIVE)
        _number(self, "turbulence_intensity", 0.0, False, _NON_NEGATIVE)
        _number(self, "integral_time_s", 0.0, True, _POSITIVE)
        _integer(self, "seed", 0, _INF, "an integer >= 0")


class FlowModel:
    """Free-stream speed U(t) = U_mean (1 + I z(t)) in m/s.

    z is a unit-variance Ornstein-Uhlenbeck process with autocorrelation exp(-tau/T),
    advanced exactly: z <- rho z + sqrt(1 - rho^2) xi, rho = exp(-dt/T), xi ~ N(0, 1); it
    starts from its stationary distribution.  ``mean_m_s`` may be set at any time (the rms
    follows it); :meth:`surge` multiplies the mean by a factor for a while (fault scripts).
    """

    __slots__ = ("params", "speed_m_s", "_mean", "_ti", "_z", "_dt", "_rho", "_sig",
                 "_rng", "_gauss", "_factor", "_surge_left")

    def __init__(self, params: FlowParams) -> None:
        self.params = params
        self._ti = params.turbulence_intensity
        self._dt = -1.0
        self._rho = 1.0
        self._sig = 0.0
        self.reset()

    @property
    def mean_m_s(self) -> float:
        """Mean free-stream speed without any surge, m/s."""
        return self._mean

    @mean_m_s.setter
    def mean_m_s(self, value: float) -> None:
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value) or value < 0.0:
            raise ProfileError(self.params.source, f"{self.params.key}.mean_m_s", value,
                               _NON_NEGATIVE)
        self._mean = float(value)

    @property
    def surge_active(self) -> bool:
        return self._surge_left > 0.0

    def reset(self) -> None:
        """Mean back to the parameter, surge cleared, rng re-seeded, z drawn from N(0, 1)."""
        self._mean = float(self.params.mean_m_s)
        self._rng = random.Random(self.params.seed)
        self._gauss = self._rng.gauss
        self._z = self._gauss(0.0, 1.0)
        self._factor = 1.0
        self._surge_left = 0.0
        self.speed_m_s = self._mean * (1.0 + self._ti * self._z)

    def surge(self, factor: float, duration_s: float) -> None:
        """Multiply the mean speed by ``factor`` (>= 0) for the next ``duration_s`` seconds of steps."""
        for name, value in (("factor", factor), ("duration_s", duration_s)):
            if isinstance(value, bool) or not isinstance(value, (int, float)) \
                    or not math.isfinite(value) or value < 0.0 or (name == "duration_s" and value == 0.0):
                raise ProfileError(self.params.source, f"{self.params.key}.surge.{name}", value,
                                   _NON_NEGATIVE if name == "factor" else _POSITIVE)
        self._factor = float(factor)
        self._surge_left = float(duration_s)

    def step(self, dt_s: float) -> float:
        """Advance by ``dt_s``; returns the free-stream speed at the end of the tick (m/s)."""
        if dt_s != self._dt:
            self._set_dt(dt_s)
        z = self._rho * self._z + self._sig * self._gauss(0.0, 1.0)
        self._z = z
        m = self._mean
        if self._surge_left > 0.0:
            m *= self._factor
            self._surge_left -= dt_s
        u = m * (1.0 + self._ti * z)
        self.speed_m_s = u
        return u

    def _set_dt(self, dt_s: float) -> None:
        dt = _runtime_dt(self.params, dt_s)
        self._rho = math.exp(-dt / self.params.integral_time_s)
        self._sig = math.sqrt(-math.expm1(-2.0 * dt / self.params.integral_time_s))
        self._dt = dt


@dataclass(frozen=True, kw_only=True)
class FlowSensorParams:
    """Flow meter: range +-range_m_s and rms noise noise_m_s."""

    range_m_s: float
    noise_m_s: float
    seed: int = 0
    source: str = field(default="<FlowSensorParams>", compare=False, repr=False)
    key: str = field(default="flow_sensor", compare=False, repr=False)

    def __post_init__(self) -> None:
        _number(self, "range_m_s", 0.0, True, _POSITIVE)
        _number(self, "noise_m_s", 0.0, False, _NON_NEGATIVE)
        _integer(self, "seed", 0, _INF, "an integer >= 0")


class FlowSensor:
    """Reading = true speed + N(0, noise^2), clipped to +-range (m/s)."""

    __slots__ = ("params", "reading_m_s", "_rng", "_gauss")

    def __init__(self, params: FlowSensorParams) -> None:
        self.params = params
        self.reset()

    def reset(self) -> None:
        """Reading to zero, rng re-seeded."""
        self._rng = random.Random(self.params.seed)
        self._gauss = self._rng.gauss
        self.reading_m_s = 0.0

    def step(self, true_speed_m_s: float) -> float:
        """Return (and keep in ``reading_m_s``) one reading of the true speed (m/s)."""
        if not -_INF < true_speed_m_s < _INF:
            raise ProfileError(self.params.source, f"{self.params.key}.step.true_speed_m_s",
                               true_speed_m_s, "a finite number")
        p = self.params
        r = true_speed_m_s
        if p.noise_m_s:
            r += self._gauss(0.0, p.noise_m_s)
        if r > p.range_m_s:
            r = p.range_m_s
        elif r < -p.range_m_s:
            r = -p.range_m_s
        self.reading_m_s = r
        return r
