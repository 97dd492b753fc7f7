"""Run states and interlocks.

States (REFERENCES section 13 for the stop categories):

* SAFE     -- flaps neutral, brake holding.
* ARMED    -- flaps neutral, brake loop holding the set point; ready to run.
* RUNNING  -- schedule active, brake loop active.
* STOPPING -- controlled stop: flaps ramp to neutral at a safe rate, the brake ramps to its
              holding torque; SAFE once the rotor has stopped.
* FAULT    -- an interlock tripped: the same actions as STOPPING (or an immediate brake hold,
              per the stop category), latched until acknowledged.

Transitions happen only by operator command or interlock, and every one is reported to the
listener (the run log) with time and reason.  This is not a safety function: guarding, a
hard-wired emergency stop and an independent overspeed trip must act without this software.
"""
from __future__ import annotations

import math
from enum import IntEnum

__all__ = ["State", "Supervisor"]


class State(IntEnum):
    SAFE = 0
    ARMED = 1
    RUNNING = 2
    STOPPING = 3
    FAULT = 4


_FAULT = State.FAULT   # module constant: State.FAULT is a slow attribute lookup per tick

_ALLOWED = {
    ("arm", State.SAFE): State.ARMED,
    ("start", State.ARMED): State.RUNNING,
    ("stop", State.ARMED): State.STOPPING,
    ("stop", State.RUNNING): State.STOPPING,
    ("acknowledge", State.FAULT): State.SAFE,
}


class Supervisor:
    """Checks the interlocks every tick and owns the run state."""

    def __init__(self, max_speed_rad_s: float, max_tsr: float, torque_range_nm: float,
                 flow_range_m_s: float, on_transition=None, *, blades: int = 1,
                 tracking_error_deg: float = 1e9, tracking_window_s: float = 1.0,
                 servo_current_a: float = 1e9, encoder_jump_counts: int = 1 << 62,
                 index_errors: int = 0, telemetry_timeout_s: float = 1e9) -> None:
        self.max_speed = max_speed_rad_s
        self.max_tsr = max_tsr
        self.torque_range = torque_range_nm
        self.flow_range = flow_range_m_s
        self.tracking_error_deg = tracking_error_deg
        self.tracking_window_s = tracking_window_s
        self.servo_current_a = servo_current_a
        self.encoder_jump_counts = encoder_jump_counts
        self.index_errors_allowed = index_errors
        self.telemetry_timeout_s = telemetry_timeout_s
        self._track_s = [0.0] * blades
        self.state = State.SAFE
        self.trip_reason = ""
        self.trips: list[tuple[float, str, str]] = []
        self.on_transition = on_transition

    @classmethod
    def from_profile(cls, profile, on_transition=None) -> "Supervisor":
        lim = profile.limits
        jump = int(lim.encoder_jump_deg / 360.0 * profile.encoder.counts_per_rev)
        return cls(lim.max_speed_rpm * math.pi / 30.0, lim.max_tsr,
                   profile.sensors.torque.range_nm, profile.sensors.flow.range_m_s, on_transition,
                   blades=profile.blades, tracking_error_deg=lim.tracking_error_deg,
                   tracking_window_s=lim.tracking_window_s, servo_current_a=lim.servo_current_a,
                   encoder_jump_counts=max(1, jump), index_errors=lim.index_errors,
                   telemetry_timeout_s=lim.telemetry_timeout_s)

    def _go(self, t_s: float, new: State, reason: str) -> None:
        old = self.state
        self.state = new
        if self.on_transition is not None:
            self.on_transition(t_s, old, new, reason)

    def command(self, t_s: float, name: str, reason: str = "operator") -> bool:
        """Apply an operator command; returns False (and changes nothing) when not allowed now."""
        new = _ALLOWED.get((name, self.state))
        if new is None:
            return False
        if name == "acknowledge":
            self.trip_reason = ""
        self._go(t_s, new, f"{name} ({reason})")
        return True

    def stopped(self, t_s: float) -> None:
        """The controlled stop has finished (rotor at rest, flaps neutral)."""
        if self.state == State.STOPPING:
            self._go(t_s, State.SAFE, "stop complete")

    def trip(self, t_s: float, reason: str, detail: str) -> None:
        """Latch FAULT (a second trip while in FAULT is recorded but changes nothing)."""
        self.trips.append((t_s, reason, detail))
        if self.state == State.FAULT:
            return
        self.trip_reason = reason
        self._go(t_s, State.FAULT, f"trip {reason}: {detail}")

    def check(self, t_s: float, speed_rad_s: float, tsr: float, torque_nm: float,
              flow_m_s: float) -> bool:
        """Interlocks of one tick; returns True when everything is within limits."""
        if self.state is _FAULT:
            return False
        # written so that NaN fails every comparison and trips
        if not (abs(torque_nm) < self.torque_range):
            self.trip(t_s, "torque_sensor", f"torque reading {torque_nm!r} N m outside +-{self.torque_range:g}")
            return False
        if not (0.0 <= flow_m_s < self.flow_range):
            self.trip(t_s, "flow_sensor", f"flow reading {flow_m_s!r} m/s outside 0..{self.flow_range:g}")
            return False
        if not (abs(speed_rad_s) <= self.max_speed):
            self.trip(t_s, "overspeed_rpm", f"rotor speed {speed_rad_s * 30 / math.pi:.1f} rpm above "
                      f"{self.max_speed * 30 / math.pi:.1f}")
            return False
        if not (tsr <= self.max_tsr) and flow_m_s > 0.0:
            self.trip(t_s, "overspeed_tsr", f"TSR {tsr:.2f} above {self.max_tsr:g}")
            return False
        return True

    def check_servos(self, t_s: float, dt_s: float, command_deg, feedback_deg, current_a,
                     telemetry_age_s: float) -> bool:
        """Flap tracking (held for the window), over-current, stale telemetry."""
        if self.state is _FAULT:
            return False
        if not (telemetry_age_s <= self.telemetry_timeout_s):
            self.trip(t_s, "telemetry_timeout", f"servo telemetry {telemetry_age_s * 1e3:.0f} ms old "
                      f"(limit {self.telemetry_timeout_s * 1e3:.0f} ms)")
            return False
        track = self._track_s
        for i in range(len(track)):
            err = command_deg[i] - feedback_deg[i]
            if not (-self.tracking_error_deg < err < self.tracking_error_deg):   # NaN trips too
                track[i] += dt_s
                if track[i] >= self.tracking_window_s:
                    self.trip(t_s, "flap_tracking", f"blade {i}: command {command_deg[i]:.2f} deg, "
                              f"feedback {feedback_deg[i]!r} deg for {track[i]:.3f} s")
                    return False
            else:
                track[i] = 0.0
            amps = current_a[i]
            if amps > self.servo_current_a or -amps > self.servo_current_a:
                self.trip(t_s, "servo_overcurrent", f"blade {i}: {amps:.2f} A above "
                          f"{self.servo_current_a:g} A")
                return False
        return True

    def check_encoder(self, t_s: float, step_counts: int, index_errors: int) -> bool:
        """Implausible jumps in one tick and index pulses not one revolution apart."""
        if self.state is _FAULT:
            return False
        if step_counts > self.encoder_jump_counts or -step_counts > self.encoder_jump_counts:
            self.trip(t_s, "encoder_jump", f"{step_counts} counts in one tick (limit "
                      f"{self.encoder_jump_counts})")
            return False
        if index_errors > self.index_errors_allowed:
            self.trip(t_s, "encoder_index", f"{index_errors} index pulse(s) not one revolution apart")
            return False
        return True
