"""Lead design: make each blade's measured flap follow its schedule at every rotor speed.

At a constant rotor speed Omega (rad/s) the schedule delta_ref(theta) is periodic in azimuth,
so the steady flap response is fixed harmonic by harmonic by the servo's frequency response:
harmonic k of the command, C_k, comes out as G(j k Omega) C_k.  Three compensations:

(a) constant lead angle phi: command delta_ref(theta + phi); C_k = R_k e^{j k phi};
(b) dead-time lead tau: phi = Omega tau (exact for a pure delay, REFERENCES section 9 step 4);
(c) harmonic inverse pre-compensation (REFERENCES section 9 steps 1-4): sample delta_ref on M
    uniform azimuth points, FFT to R_k, U_k = R_k / G(j k Omega) for k <= K with |1/G| capped,
    drop (or pass) harmonics above K, inverse FFT; check travel and rate dδ/dt = Omega dδ/dθ.

The tracking error is delta(theta) - delta_ref(theta) at the same azimuth; its RMS over a
revolution follows from Parseval over the harmonics.  ``tick_s`` > 0 adds the zero-order hold of
a controller that samples the schedule once per tick, (1 - e^{-j w h}) / (j w h).

Angles at the boundary in degrees (azimuth, lead, flap), speeds in rad/s, times in seconds.
A positive lead looks the schedule up ahead of the blade's azimuth.
"""
from __future__ import annotations

import logging
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.optimize import minimize_scalar

from flapctl.errors import ProfileError
from flapctl.schedule import Schedule
from flapctl.tune.identify import ServoFit
from sim.servo import ServoModel, ServoParams, frequency_response

__all__ = [
    "ServoLike", "servo_response", "reference_samples", "predicted_tracking_rms", "simulated_tracking_rms",
    "LeadFit", "constant_lead", "dead_time_lead", "lead_table", "write_lead_table",
    "LimitViolation", "Precompensation", "precompensate",
]

log = logging.getLogger(__name__)

_SOURCE = "leaddesign"
_TWO_PI = 2.0 * math.pi

ServoLike = ServoParams | ServoFit | Callable[[np.ndarray], np.ndarray]


# --------------------------------------------------------------------------- responses
def servo_response(servo: ServoLike, tick_s: float = 0.0) -> Callable[[np.ndarray], np.ndarray]:
    """A vectorised G(freq_hz) -> complex array from ServoParams, a ServoFit or such a callable.

    ``tick_s`` > 0 multiplies by the zero-order hold (1 - e^{-j w h}) / (j w h).
    """
    if isinstance(servo, ServoParams):
        def base(f: np.ndarray) -> np.ndarray:
            flat = np.asarray(f, dtype=float)
            return np.array([frequency_response(servo, float(x)) for x in flat.ravel()],
                            dtype=complex).reshape(flat.shape)
    elif isinstance(servo, ServoFit):
        base = servo.frequency_response
    elif callable(servo):
        base = servo
    else:
        raise ProfileError(_SOURCE, "servo", servo, "ServoParams, a ServoFit or a callable G(freq_hz)")
    h = _non_negative("tick_s", tick_s)
    if h == 0.0:
        return lambda f: np.asarray(base(np.asarray(f, dtype=float)), dtype=complex)

    def held(f: np.ndarray) -> np.ndarray:
        freq = np.asarray(f, dtype=float)
        wh = _TWO_PI * freq * h
        safe = np.where(wh == 0.0, 1.0, wh)
        zoh = np.where(wh == 0.0, 1.0 + 0j, (1.0 - np.exp(-1j * safe)) / (1j * safe))
        return np.asarray(base(freq), dtype=complex) * zoh
    return held


def _non_negative(key: str, value: object) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value < 0.0:
        raise ProfileError(_SOURCE, key, value, "a finite number >= 0")
    return float(value)


def _speeds(omega_rad_s: object) -> np.ndarray:
    w = np.atleast_1d(np.asarray(omega_rad_s, dtype=float))
    if w.ndim != 1 or w.size == 0 or not np.all(np.isfinite(w)) or np.any(w <= 0.0):
        raise ProfileError(_SOURCE, "omega_rad_s", omega_rad_s, "one or more finite rotor speeds > 0 rad/s")
    return w


def _tsr_list(tsr: float | Sequence[float] | None, n: int) -> list[float | None]:
    if tsr is None or isinstance(tsr, (int, float)):
        return [tsr] * n
    values = list(tsr)
    if len(values) != n:
        raise ProfileError(_SOURCE, "tsr", values, f"one TSR or {n} TSRs, one per rotor speed")
    return values


def _samples(samples: object) -> int:
    if isinstance(samples, bool) or not isinstance(samples, int) or samples < 8:
        raise ProfileError(_SOURCE, "samples", samples, "an integer number of azimuth points >= 8")
    return samples


def reference_samples(schedule: Schedule, blade: int, tsr: float | None, samples: int) -> np.ndarray:
    """The blade's schedule (deg) at its own azimuths 2 pi j / samples, j = 0..samples-1."""
    theta = np.arange(_samples(samples)) * (_TWO_PI / samples)
    return schedule.evaluate(theta, blade, tsr)


def _harmonic_response(g: Callable[[np.ndarray], np.ndarray], omega: float, count: int) -> np.ndarray:
    """G(j k omega) for k = 0..count-1."""
    return g(np.arange(count) * (omega / _TWO_PI))


def _parseval_weights(samples: int) -> np.ndarray:
    """Weights turning |rfft|^2 into the mean square of the real signal."""
    w = np.full(samples // 2 + 1, 2.0)
    w[0] = 1.0
    if samples % 2 == 0:
        w[-1] = 1.0
    return w / (samples * samples)


def _rms_of_harmonics(spectrum: np.ndarray, samples: int) -> np.ndarray:
    """RMS (deg) of the real signal(s) whose rfft over ``samples`` points is ``spectrum`` (last axis)."""
    return np.sqrt(np.sum(np.abs(spectrum) ** 2 * _parseval_weights(samples), axis=-1))


# --------------------------------------------------------------------------- tracking error
def predicted_tracking_rms(schedule: Schedule, servo: ServoLike, omega_rad_s: float,
                           command: float | Schedule = 0.0, *, blade: int = 0, tsr: float | None = None,
                           command_tsr: float | None = None, samples: int = 360, tick_s: float = 0.0) -> float:
    """Steady periodic RMS tracking error (deg) through the linear servo response, analytically.

    ``command`` is a lead angle in degrees (command = schedule at theta + lead) or a command
    schedule (e.g. pre-compensated) evaluated at ``command_tsr`` (default ``tsr``).
    """
    omega = float(_speeds(omega_rad_s)[0])
    g = servo_response(servo, tick_s)
    ref = reference_samples(schedule, blade, tsr, samples)
    r = np.fft.rfft(ref)
    k = np.arange(r.size)
    if isinstance(command, Schedule):
        c = np.fft.rfft(reference_samples(command, blade, tsr if command_tsr is None else command_tsr, samples))
    else:
        c = r * np.exp(1j * k * math.radians(float(command)))
    err = _harmonic_response(g, omega, r.size) * c - r
    return float(_rms_of_harmonics(err, samples))


def simulated_tracking_rms(schedule: Schedule, servo_params: ServoParams, omega_rad_s: float,
                           command: float | Schedule = 0.0, *, blade: int = 0, tsr: float | None = None,
                           command_tsr: float | None = None, dt_s: float = 1e-3, revolutions: int = 3,
                           settle_revolutions: int = 2) -> float:
    """RMS tracking error (deg) in the time domain through :class:`sim.servo.ServoModel`.

    The blade turns at constant ``omega_rad_s``; each tick the flap angle is read (before the
    tick's command acts, as on the rig), compared with the schedule at the blade's azimuth, and
    the command for that azimuth applied.  Rate, travel and electrical limits all act.  The
    error is taken over ``revolutions`` after ``settle_revolutions``.
    """
    omega = float(_speeds(omega_rad_s)[0])
    if isinstance(revolutions, bool) or not isinstance(revolutions, int) or revolutions < 1:
        raise ProfileError(_SOURCE, "revolutions", revolutions, "an integer >= 1")
    if isinstance(settle_revolutions, bool) or not isinstance(settle_revolutions, int) or settle_revolutions < 0:
        raise ProfileError(_SOURCE, "settle_revolutions", settle_revolutions, "an integer >= 0")
    period = _TWO_PI / omega
    start = int(math.ceil(settle_revolutions * period / dt_s))
    n = start + int(math.ceil(revolutions * period / dt_s))
    theta = omega * dt_s * np.arange(n)
    ref = schedule.evaluate(theta, blade, tsr)
    if isinstance(command, Schedule):
        cmd = command.evaluate(theta, blade, tsr if command_tsr is None else command_tsr)
    else:
        cmd = schedule.evaluate(theta + math.radians(float(command)), blade, tsr)
    limit = servo_params.travel_deg - 0.5 * servo_params.backlash_deg
    cmd = np.clip(cmd, -limit, limit)
    model = ServoModel(servo_params, dt_s)
    model.reset(float(cmd[0]))
    angle = np.empty(n)
    for k, c in enumerate(cmd.tolist()):
        angle[k] = model.angle_deg
        model.step(c, 0.0)
    err = angle[start:] - ref[start:]
    return float(np.sqrt(np.mean(err * err)))


# --------------------------------------------------------------------------- leads
@dataclass(frozen=True)
class LeadFit:
    """A lead design over a speed range.

    ``lead_deg`` holds the lead at each speed in ``speeds_rad_s`` (constant for (a), Omega tau for
    (b), per-speed optimum for the table); ``rms_deg`` the predicted RMS tracking error at each
    speed (mean over blades in the square), ``rms_none_deg`` the same with no lead.
    ``dead_time_s`` is tau for design (b), else None.
    """

    speeds_rad_s: tuple[float, ...]
    lead_deg: tuple[float, ...]
    rms_deg: tuple[float, ...]
    rms_none_deg: tuple[float, ...]
    dead_time_s: float | None = None


def _responses(servo: ServoLike | Sequence[ServoLike], blades: int, tick_s: float) -> list[Callable]:
    if isinstance(servo, (list, tuple)):
        if len(servo) != blades:
            raise ProfileError(_SOURCE, "servo", f"{len(servo)} servos", f"one servo or {blades}, one per blade")
        return [servo_response(s, tick_s) for s in servo]
    g = servo_response(servo, tick_s)
    return [g] * blades


class _Cost:
    """Mean-square tracking error per speed as a vectorised function of the lead per speed."""

    def __init__(self, schedule: Schedule, servo: ServoLike | Sequence[ServoLike], speeds: np.ndarray,
                 tsr: float | Sequence[float] | None, samples: int, tick_s: float) -> None:
        self.speeds = speeds
        tsrs = _tsr_list(tsr, speeds.size)
        gs = _responses(servo, schedule.blades, tick_s)
        self.samples = _samples(samples)
        self.k = np.arange(samples // 2 + 1)
        self.w = _parseval_weights(samples)
        # R[s, b, k] and G[s, b, k]
        self.r = np.array([[np.fft.rfft(reference_samples(schedule, b, tsrs[s], samples))
                            for b in range(schedule.blades)] for s in range(speeds.size)])
        self.g = np.array([[_harmonic_response(gs[b], float(speeds[s]), self.k.size)
                            for b in range(schedule.blades)] for s in range(speeds.size)])

    def mean_square(self, lead_rad: np.ndarray) -> np.ndarray:
        """Mean over blades of the mean-square error; ``lead_rad`` shape (..., n_speeds)."""
        lead = np.asarray(lead_rad, dtype=float)[..., :, None, None]
        err = (self.g * np.exp(1j * self.k * lead) - 1.0) * self.r
        return np.mean(np.sum(np.abs(err) ** 2 * self.w, axis=-1), axis=-1)

    def fit(self, leads_rad: np.ndarray, tau: float | None) -> LeadFit:
        ms = self.mean_square(leads_rad)
        none = self.mean_square(np.zeros(self.speeds.size))
        return LeadFit(tuple(self.speeds.tolist()), tuple(np.degrees(leads_rad).tolist()),
                       tuple(np.sqrt(ms).tolist()), tuple(np.sqrt(none).tolist()), tau)


def _refine(fn: Callable[[float], float], grid: np.ndarray) -> float:
    """Minimum of a scalar function: best grid point, then bounded Brent search around it."""
    values = np.array([fn(float(x)) for x in grid])
    j = int(np.argmin(values))
    lo = float(grid[max(j - 1, 0)])
    hi = float(grid[min(j + 1, grid.size - 1)])
    if hi <= lo:
        return float(grid[j])
    res = minimize_scalar(fn, bounds=(lo, hi), method="bounded", options={"xatol": 1e-10})
    return float(res.x) if res.fun <= values[j] else float(grid[j])


def constant_lead(schedule: Schedule, servo: ServoLike | Sequence[ServoLike], omega_rad_s: object, *,
                  tsr: float | Sequence[float] | None = None, samples: int = 360, tick_s: float = 0.0) -> LeadFit:
    """(a) The single lead angle minimising the RMS tracking error over the speeds (all blades)."""
    cost = _Cost(schedule, servo, _speeds(omega_rad_s), tsr, samples, tick_s)
    n = cost.speeds.size
    grid = np.radians(np.arange(-180.0, 180.0, 0.5))
    total = cost.mean_square(np.repeat(grid[:, None], n, axis=1)).sum(axis=-1)
    j = int(np.argmin(total))

    def f(x: float) -> float:
        return float(cost.mean_square(np.full(n, x)).sum())
    best = _refine(f, grid[max(j - 2, 0):j + 3])
    return cost.fit(np.full(n, best), None)


def dead_time_lead(schedule: Schedule, servo: ServoLike | Sequence[ServoLike], omega_rad_s: object, *,
                   tsr: float | Sequence[float] | None = None, samples: int = 360, tick_s: float = 0.0,
                   max_dead_time_s: float | None = None) -> LeadFit:
    """(b) The equivalent time tau (lead = Omega tau) minimising the RMS error over the speeds."""
    cost = _Cost(schedule, servo, _speeds(omega_rad_s), tsr, samples, tick_s)
    speeds = cost.speeds
    tau_max = math.pi / float(speeds.min()) if max_dead_time_s is None else _non_negative("max_dead_time_s",
                                                                                          max_dead_time_s)
    grid = np.linspace(0.0, tau_max, 1441)
    total = cost.mean_square(grid[:, None] * speeds[None, :]).sum(axis=-1)
    j = int(np.argmin(total))

    def f(x: float) -> float:
        return float(cost.mean_square(x * speeds).sum())
    tau = _refine(f, grid[max(j - 2, 0):j + 3])
    return cost.fit(tau * speeds, tau)


def lead_table(schedule: Schedule, servo: ServoLike | Sequence[ServoLike], omega_rad_s: object, *,
               tsr: float | Sequence[float] | None = None, samples: int = 360, tick_s: float = 0.0) -> LeadFit:
    """The best constant lead at each speed separately: a lead table versus rotor speed."""
    speeds = _speeds(omega_rad_s)
    tsrs = _tsr_list(tsr, speeds.size)
    leads = [constant_lead(schedule, servo, [float(w)], tsr=tsrs[s], samples=samples, tick_s=tick_s).lead_deg[0]
             for s, w in enumerate(speeds)]
    cost = _Cost(schedule, servo, speeds, tsr, samples, tick_s)
    return cost.fit(np.radians(leads), None)


def write_lead_table(path: str | Path, speeds_rad_s: Sequence[float], lead_deg: Sequence[float]) -> Path:
    """Write a new CSV ``speed_rad_s,lead_deg`` (speeds strictly increasing); refuses to overwrite."""
    speeds = [float(v) for v in speeds_rad_s]
    leads = [float(v) for v in lead_deg]
    out = Path(path)
    if len(speeds) != len(leads) or not speeds:
        raise ProfileError(str(out), "lead_deg", f"{len(leads)} leads for {len(speeds)} speeds",
                           "one lead per rotor speed, at least one")
    for j, (a, b) in enumerate(zip(speeds, speeds[1:])):
        if not b > a:
            raise ProfileError(str(out), f"speed_rad_s[{j + 1}]", b, f"a speed above {a!r} (strictly increasing)")
    if not all(math.isfinite(v) for v in speeds + leads):
        raise ProfileError(str(out), "lead_deg", leads, "finite numbers")
    if out.exists():
        raise ProfileError(str(out), "path", str(out), "a path that does not exist yet (no overwrite)")
    with open(out, "x", encoding="utf-8", newline="\n") as fh:
        fh.write("# phase lead versus rotor speed (lead > 0: schedule looked up ahead of the blade)\n")
        fh.write("speed_rad_s,lead_deg\n")
        for s, d in zip(speeds, leads):
            fh.write(f"{s!r},{d!r}\n")
    return out


# --------------------------------------------------------------------------- pre-compensation
@dataclass(frozen=True)
class LimitViolation:
    """A pre-compensated command that leaves the linear range: ``kind`` "travel" (deg) or "rate" (deg/s)."""

    kind: str
    blade: int
    speed_rad_s: float
    value: float
    limit: float

    def __str__(self) -> str:
        unit = "deg" if self.kind == "travel" else "deg/s"
        return (f"blade {self.blade} at {self.speed_rad_s:.3f} rad/s: peak {self.kind} {self.value:.1f} {unit} "
                f"exceeds {self.limit:.1f} {unit}")


@dataclass(frozen=True)
class Precompensation:
    """Harmonic inverse pre-compensation over a speed range.

    ``schedule`` is the command schedule with a TSR axis (one table per speed, TSR = Omega R / U);
    ``commands_deg`` its samples, shape (speeds, blades, samples); ``rms_deg`` and ``rms_none_deg``
    the predicted RMS tracking errors (speeds, blades) with the pre-compensation and with no lead.
    """

    schedule: Schedule
    speeds_rad_s: tuple[float, ...]
    tsr: tuple[float, ...]
    commands_deg: np.ndarray
    rms_deg: np.ndarray
    rms_none_deg: np.ndarray
    violations: tuple[LimitViolation, ...]

    def write_toml(self, path: str | Path) -> Path:
        """Write the command schedule with Schedule.to_toml() to a NEW file."""
        out = Path(path)
        if out.suffix.lower() != ".toml":
            raise ProfileError(str(out), "path", str(out), "a .toml file name")
        if out.exists():
            raise ProfileError(str(out), "path", str(out), "a path that does not exist yet (no overwrite)")
        with open(out, "x", encoding="utf-8", newline="\n") as fh:
            fh.write(self.schedule.to_toml())
        return out


def precompensate(schedule: Schedule, servo: ServoLike | Sequence[ServoLike], omega_rad_s: object,
                  flow_m_s: float, radius_m: float, *, harmonics: int = 10, gain_cap: float = 3.0,
                  samples: int = 360, travel_deg: float | None = None, rate_limit_deg_s: float | None = None,
                  beyond: str = "drop", tick_s: float = 0.0) -> Precompensation:
    """(c) Harmonic inverse pre-compensation of every blade's schedule at each rotor speed.

    The reference at speed Omega is the schedule at TSR = Omega ``radius_m`` / ``flow_m_s`` (a
    schedule without TSR axis is the same at all speeds).  Harmonics 0..``harmonics`` are divided
    by G(j k Omega) with |1/G| capped at ``gain_cap``; higher ones are dropped (``beyond="drop"``)
    or passed unchanged (``"pass"``).  Travel (deg) and rate (deg/s) limits default to the servo's
    when it is a ServoParams; violations are reported (and logged), not raised.
    """
    speeds = _speeds(omega_rad_s)
    if np.any(np.diff(speeds) <= 0.0):
        raise ProfileError(_SOURCE, "omega_rad_s", speeds.tolist(), "strictly increasing rotor speeds")
    flow = _non_negative("flow_m_s", flow_m_s)
    radius = _non_negative("radius_m", radius_m)
    if flow == 0.0 or radius == 0.0:
        raise ProfileError(_SOURCE, "flow_m_s" if flow == 0.0 else "radius_m", 0.0, "a value > 0")
    if isinstance(harmonics, bool) or not isinstance(harmonics, int) or not 0 <= harmonics < samples // 2:
        raise ProfileError(_SOURCE, "harmonics", harmonics, f"an integer 0..{samples // 2 - 1}")
    cap = _non_negative("gain_cap", gain_cap)
    if cap < 1.0:
        raise ProfileError(_SOURCE, "gain_cap", gain_cap, "a cap on |1/G| >= 1")
    if beyond not in ("drop", "pass"):
        raise ProfileError(_SOURCE, "beyond", beyond, '"drop" or "pass"')
    servos = list(servo) if isinstance(servo, (list, tuple)) else [servo] * schedule.blades
    gs = _responses(servo, schedule.blades, tick_s)
    travel = [travel_deg if travel_deg is not None else (s.travel_deg if isinstance(s, ServoParams) else None)
              for s in servos]
    rates = [rate_limit_deg_s if rate_limit_deg_s is not None else
             (s.rate_limit_deg_s if isinstance(s, ServoParams) else getattr(s, "rate_limit_deg_s", None))
             for s in servos]
    m = _samples(samples)
    k = np.arange(m // 2 + 1)
    tsrs = (speeds * radius / flow).tolist()
    commands = np.empty((speeds.size, schedule.blades, m))
    rms = np.empty((speeds.size, schedule.blades))
    rms_none = np.empty_like(rms)
    violations: list[LimitViolation] = []
    for s, omega in enumerate(speeds.tolist()):
        ref_tsr = tsrs[s] if schedule.tsr_axis is not None else None
        for b in range(schedule.blades):
            r = np.fft.rfft(reference_samples(schedule, b, ref_tsr, m))
            g = _harmonic_response(gs[b], omega, k.size)
            inv = 1.0 / g
            mag = np.abs(inv)
            inv = np.where(mag > cap, inv * (cap / np.where(mag > 0.0, mag, 1.0)), inv)
            u = np.where(k <= harmonics, r * inv, r if beyond == "pass" else 0.0)
            commands[s, b] = np.fft.irfft(u, m)
            rms[s, b] = _rms_of_harmonics(g * u - r, m)
            rms_none[s, b] = _rms_of_harmonics(g * r - r, m)
            fine = 8
            peak = float(np.max(np.abs(np.fft.irfft(u, fine * m)))) * fine
            slope = float(np.max(np.abs(np.fft.irfft(1j * k * u, fine * m)))) * fine   # deg per rad
            if travel[b] is not None and peak > travel[b]:
                violations.append(LimitViolation("travel", b, omega, peak, float(travel[b])))
            if rates[b] is not None and slope * omega > rates[b]:
                violations.append(LimitViolation("rate", b, omega, slope * omega, float(rates[b])))
    for v in violations:
        log.warning("pre-compensation leaves the linear range: %s", v)
    azimuth = (np.arange(m) * (360.0 / m)).tolist()
    table = Schedule.from_arrays(azimuth, [commands[s].tolist() for s in range(speeds.size)], schedule.blades,
                                 tsr=tsrs, interpolation="spline",
                                 source=f"{schedule.source} pre-compensated (K = {harmonics}, cap {cap:g})")
    return Precompensation(table, tuple(speeds.tolist()), tuple(tsrs), commands, rms, rms_none, tuple(violations))
