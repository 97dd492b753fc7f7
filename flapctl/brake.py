"""Rotor speed / TSR hold through the brake, on simple-pid.

The brake is the rotor's load: more brake torque slows the rotor.  The loop holds either a TSR
set point (target speed = TSR x filtered measured flow / R) or a rotor speed set point.

simple-pid is used as it is documented, with the traps of our PITFALLS notes handled here:
``sample_time=None`` and an explicit ``dt`` on every call (no wall-clock reads inside control
code); gains negated because a positive speed error (too slow) needs *less* brake; the output
clamped to the brake's torque range, which also clamps the integral (anti-windup);
derivative on measurement (simple-pid's default); proportional on error.  ``start()`` is
bumpless: it seeds the integral so that the first output equals the torque being applied.
"""
from __future__ import annotations

import math

from simple_pid import PID

__all__ = ["BrakeLoop"]


def _no_wall_clock() -> float:
    """simple-pid reads ``time_fn`` on every call even with an explicit dt; keep it off the wall clock."""
    return 0.0


class BrakeLoop:
    """Brake torque (N m) from rotor speed (rad/s) and flow speed (m/s)."""

    def __init__(self, mode: str, kp_nm_s: float, ki_nm: float, kd_nm_s2: float,
                 min_torque_nm: float, max_torque_nm: float, radius_m: float,
                 flow_filter_s: float) -> None:
        if mode not in ("tsr", "speed"):
            raise ValueError(f"brake loop mode {mode!r}: expected 'tsr' or 'speed'")
        self.mode = mode
        self.radius_m = radius_m
        self.flow_filter_s = flow_filter_s
        self.kp = kp_nm_s
        self.limits = (min_torque_nm, max_torque_nm)
        self._pid = PID(-kp_nm_s, -ki_nm, -kd_nm_s2, setpoint=0.0, sample_time=None,
                        output_limits=self.limits, auto_mode=False, time_fn=_no_wall_clock)
        self.tsr_setpoint = 0.0
        self.speed_setpoint_rad_s = 0.0
        self.flow_filtered_m_s = float("nan")
        self.output_nm = min_torque_nm
        self.target_rad_s = 0.0

    @classmethod
    def from_profile(cls, profile) -> "BrakeLoop":
        loop, brake = profile.brake.loop, profile.brake
        return cls(loop.mode, loop.kp_nm_s, loop.ki_nm, loop.kd_nm_s2, brake.min_torque_nm,
                   brake.max_torque_nm, profile.geometry.radius_m, loop.flow_filter_s)

    @property
    def active(self) -> bool:
        return self._pid.auto_mode

    def set_tsr(self, tsr: float) -> None:
        self.tsr_setpoint = float(tsr)

    def set_speed(self, speed_rad_s: float) -> None:
        self.speed_setpoint_rad_s = float(speed_rad_s)

    def _filter_flow(self, flow_m_s: float, dt_s: float) -> float:
        f = self.flow_filtered_m_s
        if not math.isfinite(f) or self.flow_filter_s <= 0.0:
            f = flow_m_s
        else:
            f += (flow_m_s - f) * min(1.0, dt_s / self.flow_filter_s)
        self.flow_filtered_m_s = f
        return f

    def _target(self, flow_m_s: float, dt_s: float) -> float:
        flow = self._filter_flow(flow_m_s, dt_s)
        if self.mode == "tsr":
            return self.tsr_setpoint * flow / self.radius_m
        return self.speed_setpoint_rad_s

    def start(self, speed_rad_s: float, flow_m_s: float, applied_nm: float) -> None:
        """Engage the loop without a bump in the brake torque."""
        self.target_rad_s = self._target(flow_m_s, 0.0)
        error = self.target_rad_s - speed_rad_s
        self._pid.setpoint = self.target_rad_s
        # output = -kp * error + integral  ->  integral = applied + kp * error
        self._pid.set_auto_mode(True, last_output=applied_nm + self.kp * error)
        self.output_nm = applied_nm

    def stop(self) -> None:
        self._pid.set_auto_mode(False)

    def update(self, speed_rad_s: float, flow_m_s: float, dt_s: float) -> float:
        """One loop step of length ``dt_s``; returns the brake torque command."""
        target = self._target(flow_m_s, dt_s)
        self.target_rad_s = target
        if not self._pid.auto_mode:
            return self.output_nm
        self._pid.setpoint = target
        self.output_nm = self._pid(speed_rad_s, dt=dt_s)
        return self.output_nm
