"""Excitation signals for flap-servo identification, and the software-in-the-loop drive.

The signal functions are pure functions of a time vector ``t_s`` (seconds) and return the flap
command in degrees, one value per time point.  They are the same on the rig and in SIL: the rig
path sends them through the ports tick by tick, :func:`excite_sil` sends them through one
:class:`sim.servo.ServoModel`.

Sign convention: commands and feedback are flap deflections in degrees, positive in the +delta
sense of the profile (REFERENCES section 2).
"""
from __future__ import annotations

import logging
import math
from collections.abc import Callable, Sequence

import numpy as np

from flapctl.errors import ProfileError
from sim.servo import ServoModel, ServoParams

__all__ = ["step", "chirp", "multisine", "excite_sil", "excite_ports", "CHIRP_METHODS"]

log = logging.getLogger(__name__)

CHIRP_METHODS = ("linear", "log")


def _finite(source: str, key: str, value: object, positive: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)):
        raise ProfileError(source, key, value, "a finite number" + (" > 0" if positive else ""))
    out = float(value)
    if not math.isfinite(out) or (positive and out <= 0.0):
        raise ProfileError(source, key, value, "a finite number" + (" > 0" if positive else ""))
    return out


def _times(source: str, t_s: object) -> np.ndarray:
    try:
        t = np.asarray(t_s, dtype=float)
    except (TypeError, ValueError):
        raise ProfileError(source, "t_s", t_s, "a 1-D array of finite times in seconds") from None
    if t.ndim != 1 or t.size == 0 or not np.all(np.isfinite(t)):
        raise ProfileError(source, "t_s", t_s, "a non-empty 1-D array of finite times in seconds")
    return t


def step(t_s: object, amplitude_deg: float, start_s: float = 0.0, offset_deg: float = 0.0) -> np.ndarray:
    """Step command: ``offset_deg`` before ``start_s``, ``offset_deg + amplitude_deg`` from it on (deg)."""
    t = _times("step", t_s)
    a = _finite("step", "amplitude_deg", amplitude_deg)
    t0 = _finite("step", "start_s", start_s)
    off = _finite("step", "offset_deg", offset_deg)
    return np.where(t >= t0, off + a, off)


def chirp(t_s: object, f0_hz: float, f1_hz: float, amplitude_deg: float, duration_s: float | None = None,
          method: str = "linear", offset_deg: float = 0.0) -> np.ndarray:
    """Swept sine ``offset + A sin(phi(t))`` from ``f0_hz`` at t = 0 to ``f1_hz`` at ``duration_s``.

    ``linear``: phi = 2 pi (f0 t + (f1 - f0) t^2 / (2 T)); ``log`` (exponential sweep, f0, f1 > 0):
    phi = 2 pi f0 T (k^(t/T) - 1) / ln k with k = f1/f0.  The instantaneous frequency
    dphi/dt / 2 pi is f0 at t = 0 and f1 at t = T; the sweep continues past T with the same law.
    The sine starts at zero, so a servo at rest at ``offset_deg`` is not kicked.  ``duration_s``
    defaults to the last time point.
    """
    t = _times("chirp", t_s)
    f0 = _finite("chirp", "f0_hz", f0_hz)
    f1 = _finite("chirp", "f1_hz", f1_hz)
    a = _finite("chirp", "amplitude_deg", amplitude_deg)
    off = _finite("chirp", "offset_deg", offset_deg)
    span = float(t[-1]) if duration_s is None else _finite("chirp", "duration_s", duration_s, positive=True)
    if span <= 0.0:
        raise ProfileError("chirp", "duration_s", span, "a sweep duration > 0 s")
    if method not in CHIRP_METHODS:
        raise ProfileError("chirp", "method", method, f"one of {CHIRP_METHODS}")
    if f0 < 0.0 or f1 < 0.0:
        raise ProfileError("chirp", "f0_hz" if f0 < 0.0 else "f1_hz", f0 if f0 < 0.0 else f1,
                           "a frequency >= 0 Hz")
    if method == "linear":
        phase = 2.0 * math.pi * (f0 * t + 0.5 * (f1 - f0) * t * t / span)
    else:
        if f0 <= 0.0 or f1 <= 0.0:
            raise ProfileError("chirp", "f0_hz" if f0 <= 0.0 else "f1_hz", f0 if f0 <= 0.0 else f1,
                               "a frequency > 0 Hz for a log sweep")
        if f0 == f1:
            phase = 2.0 * math.pi * f0 * t
        else:
            k = f1 / f0
            phase = 2.0 * math.pi * f0 * span * (np.power(k, t / span) - 1.0) / math.log(k)
    return off + a * np.sin(phase)


def multisine(t_s: object, freqs_hz: Sequence[float], peak_deg: float, offset_deg: float = 0.0) -> np.ndarray:
    """Sum of equal-amplitude sines with Schroeder phases, scaled to a peak of ``peak_deg`` on ``t_s``.

    Component k = 1..K (in the given order) has phase phi_k = -pi k (k - 1) / K (Schroeder 1970,
    IEEE Trans. Inf. Theory 16(1):85-89, from memory), which keeps the crest factor low so the
    servo sees a rich signal without hitting its travel.  ``offset + sum sin(2 pi f_k t + phi_k)``
    is scaled so that max |signal - offset| over ``t_s`` equals ``peak_deg``.
    """
    t = _times("multisine", t_s)
    peak = _finite("multisine", "peak_deg", peak_deg)
    off = _finite("multisine", "offset_deg", offset_deg)
    freqs = [_finite("multisine", f"freqs_hz[{j}]", f, positive=True) for j, f in enumerate(freqs_hz)]
    if not freqs:
        raise ProfileError("multisine", "freqs_hz", list(freqs_hz), "one or more frequencies > 0 Hz")
    n = len(freqs)
    total = np.zeros_like(t)
    for k, f in enumerate(freqs, start=1):
        total += np.sin(2.0 * math.pi * f * t - math.pi * k * (k - 1) / n)
    top = float(np.max(np.abs(total)))
    if top == 0.0:
        raise ProfileError("multisine", "t_s", "all components zero on the time points",
                           "time points where the sines do not all vanish")
    return off + total * (peak / top)


def excite_sil(servo_params: ServoParams, signal: object, dt_s: float,
               hinge_moment_fn: Callable[[float, float], float] | None = None
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Drive one SIL servo through ``signal`` (deg, one command per tick of ``dt_s`` seconds).

    The servo starts at rest at ``signal[0]``.  At tick k (t_k = k dt) the flap angle is read
    first, as the rig controller reads its sample, then command k is applied for one tick; so
    ``feedback_deg[k]`` is the flap angle at t_k, the response to commands 0..k-1.
    ``current_a[k]`` and ``voltage_v[k]`` are the motor current and terminal voltage during
    tick k.  ``hinge_moment_fn(t_s, flap_deg)`` gives the aerodynamic hinge moment (N m,
    positive toward +delta); None means no load.

    Returns (t_s, command_deg, feedback_deg, current_a, voltage_v), all arrays of len(signal).
    """
    cmd = np.asarray(signal, dtype=float)
    if cmd.ndim != 1 or cmd.size == 0 or not np.all(np.isfinite(cmd)):
        raise ProfileError("excite_sil", "signal", signal, "a non-empty 1-D array of finite commands (deg)")
    model = ServoModel(servo_params, dt_s)
    model.reset(float(cmd[0]))
    n = cmd.size
    t = np.arange(n) * float(dt_s)
    feedback = np.empty(n)
    current = np.empty(n)
    voltage = np.empty(n)
    limited = 0
    commands = cmd.tolist()
    times = t.tolist()
    for k in range(n):
        angle = model.angle_deg
        feedback[k] = angle
        h = 0.0 if hinge_moment_fn is None else float(hinge_moment_fn(times[k], angle))
        model.step(commands[k], h)
        current[k] = model.current_a
        voltage[k] = model.voltage_v
        limited += model.limited
    if limited:
        log.info("%s: current or voltage limited the flap on %d of %d ticks", servo_params.key, limited, n)
    return t, cmd.copy(), feedback, current, voltage


def excite_ports(ports, clock, blade: int, signal: object, brake_nm: float
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Drive one blade's flap through ``signal`` (deg per tick) over any rig ports.

    The same code on the rig (CAN or bridge ports, a real-time clock) and on the SIL rig (its
    ports, a virtual clock).  The other flaps are held neutral and the brake at ``brake_nm`` (hold
    the rotor still); the heartbeat is sent every tick.  Feedback k is read before command k is
    sent, as in the controller.  Ends in the safe state.  Returns (t, command, feedback, current,
    voltage); current and voltage are NaN when the servo does not report them.
    """
    cmd_deg = np.asarray(signal, dtype=float)
    if cmd_deg.ndim != 1 or not np.all(np.isfinite(cmd_deg)):
        raise ProfileError("excitation", "signal", "<array>", "a 1-D array of finite flap commands (deg)")
    n = cmd_deg.size
    out = np.empty((5, n))
    command = [0.0] * ports.blades
    clock.start()
    ports.command_brake(brake_nm)
    try:
        for k in range(n):
            s = ports.read()
            out[0, k] = s.t_s
            out[2, k] = s.flap_deg[blade]
            out[3, k] = s.servo_current_a[blade]
            out[4, k] = s.servo_voltage_v[blade]
            command[blade] = float(cmd_deg[k])
            ports.command_flaps(command)
            ports.heartbeat()
            out[1, k] = command[blade]
            clock.wait()
    finally:
        ports.safe()
    return out[0], out[1], out[2], out[3], out[4]
