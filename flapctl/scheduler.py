"""The controller tick: estimate, lead, look up, limit, command, brake, book, check, log.

One :class:`Controller` runs the same code on every backend: the ports hide whether water or
the SIL model turns the rotor, and the clock hides whether time is virtual (lockstep) or the
wall clock.  The hot path works on plain floats and preallocated lists (no numpy, no
allocation beyond the log row).

Blade i sits at azimuth theta_i = theta + i 360/N (theta = blade 0, REFERENCES section 2).
Each tick the command for blade i is the schedule at theta_i + lead(omega), clamped to the
blade's travel and slewed at most ``min(control.slew_limit_deg_s, servo rate limit)``.
"""
from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable

from .brake import BrakeLoop
from .clock import Clock
from .energy import EnergyLedger, RunEnergy, ServoPowerEstimator
from .errors import FlapctlError, RunLogError, SafetyTrip
from .estimate import AzimuthEstimator
from .lead import LeadModel
from .ports.base import RigPorts
from .profile import Profile
from .schedule import Schedule
from .supervisor import State, Supervisor

__all__ = ["Controller"]

log = logging.getLogger(__name__)
TWO_PI = 2.0 * math.pi
# enum members as module constants: State.X is an attribute lookup of about 0.2 us on the hot path
_SAFE, _ARMED, _RUNNING, _STOPPING, _FAULT = (State.SAFE, State.ARMED, State.RUNNING, State.STOPPING,
                                               State.FAULT)


class Controller:
    """The flap and brake controller of one rig."""

    def __init__(self, profile: Profile, schedule: Schedule, ports: RigPorts, clock: Clock, *,
                 tsr: float, density_kg_m3: float, lead: LeadModel | None = None,
                 runlog=None, listeners: tuple[Callable, ...] = ()) -> None:
        g = profile.geometry
        self.profile = profile
        self.ports = ports
        self.clock = clock
        self.dt = clock.period_s
        self.blades = n = g.blades
        self.lead = lead if lead is not None else LeadModel.from_control(profile.control)
        self.schedule = schedule
        self._tsr_for_table = tsr
        self.table = schedule.table(tsr if schedule.tsr_axis else None)
        self.radius = g.radius_m
        enc = profile.encoder
        self.estimator = AzimuthEstimator(enc.counts_per_rev, enc.counter_bits, enc.index_offset_deg,
                                          enc.observer_bandwidth_hz, enc.observer_damping, self.dt)
        self.brake = BrakeLoop.from_profile(profile)
        self.brake.set_tsr(tsr)
        self.brake_every = profile.brake.loop.period_ticks
        self.brake_nm = 0.0
        self._brake_sent = False      # the first tick always sends a brake command
        self.runlog = runlog
        self.supervisor = Supervisor.from_profile(profile, on_transition=self._on_transition)
        self.reports_power = ports.reports_servo_power
        self.ledger = EnergyLedger(n, density_kg_m3, 2.0 * g.radius_m * g.span_m, g.radius_m,
                                   servo_power_estimated=not self.reports_power,
                                   on_revolution=runlog.append_revolution if runlog else None)
        self._power_est = [ServoPowerEstimator(s.electrical) for s in profile.servos]
        self._regen = [s.electrical.regenerative for s in profile.servos]
        self._travel = [s.travel_deg for s in profile.servos]
        self._slew = [min(profile.control.slew_limit_deg_s, s.rate_limit_deg_s) * self.dt
                      for s in profile.servos]
        # safe-state ramp of the flaps: half the servo rate limit
        self._safe_slew = [0.5 * s.rate_limit_deg_s * self.dt for s in profile.servos]
        self._brake_ramp = profile.brake.max_torque_nm * self.dt / 2.0   # full range in 2 s
        self._hold_at_once = profile.limits.stop_category == "hold"
        self._pitch = TWO_PI / n
        ctl = profile.control
        self._by_azimuth = ctl.trigger == "azimuth"
        self._az_step = math.radians(ctl.azimuth_step_deg)
        self._min_gap_s = 1.0 / ctl.max_command_rate_hz
        self._last_bin = -1
        self._last_send_t = float("-inf")
        self.commands_sent = 0
        self.learning = None        # optional per-blade learning correction (flapctl.tune.ilc_loop)
        self.cmd = [0.0] * n
        self.sent = self.cmd if not self._by_azimuth else [0.0] * n
        self.power = [0.0] * n
        self.tick = 0
        self.t_s = 0.0
        self._last_sample_t = float("-inf")
        self.flow_m_s = 0.0
        self.tsr = 0.0
        self._listeners = listeners
        self.error: FlapctlError | None = None

    # -- operator commands ------------------------------------------------------------------
    def _on_transition(self, t_s: float, old: State, new: State, reason: str) -> None:
        if self.runlog is not None:
            self.runlog.event(t_s, "state", f"{old.name} -> {new.name}: {reason}")
        if new in (State.STOPPING, State.FAULT, State.SAFE):
            self.brake.stop()

    def set_learning(self, learning) -> None:
        """Plug in a learning correction (``correction(blade, az)`` / ``observe(blade, az, deg)``)."""
        if learning is not None:
            learning.table = self.table
        self.learning = learning

    def add_listener(self, listener: Callable) -> None:
        """Call ``listener(controller, sample)`` after every tick (telemetry, operator interface)."""
        self._listeners = (*self._listeners, listener)

    def remove_listener(self, listener: Callable) -> None:
        self._listeners = tuple(x for x in self._listeners if x is not listener)

    def command(self, name: str, reason: str = "operator") -> bool:
        return self.supervisor.command(self.t_s, name, reason)

    def set_tsr(self, tsr: float) -> None:
        self.brake.set_tsr(tsr)
        if self.schedule.tsr_axis:
            self.table = self.schedule.table(tsr)
            if self.learning is not None:
                self.learning.table = self.table

    # -- the tick -----------------------------------------------------------------------------
    def run_once(self) -> None:
        """One tick.  Call after ``clock.wait()``."""
        t0 = time.perf_counter_ns()
        dt = self.dt
        s = self.ports.read()
        est = self.estimator
        gap = s.t_s - self._last_sample_t
        self._last_sample_t = s.t_s
        # readings more than half a tick off the nominal spacing: tell the observer the real dt
        est.update(s.counts, s.index_latch, s.index_events,
                   gap if (gap > 1.5 * dt or 0.0 < gap < 0.5 * dt) else None)
        theta = est.azimuth_rad
        omega = est.speed_rad_s
        flow = s.flow_m_s
        self.flow_m_s = flow
        tsr = omega * self.radius / flow if flow > 1e-9 else 0.0
        self.tsr = tsr
        sup = self.supervisor
        cmd = self.cmd
        n = self.blades
        # the encoder first: a glitch there also shows as a (false) overspeed
        if sup.check_encoder(s.t_s, est.last_step_counts, est.index_errors):
            if sup.check(s.t_s, omega, tsr, s.torque_nm, flow):
                sup.check_servos(s.t_s, dt, cmd, s.flap_deg, s.servo_current_a, s.telemetry_age_s)
        state = sup.state
        if state == _RUNNING:
            lead = self.lead(omega)
            at = self.table.at
            pitch = self._pitch
            travel, slew = self._travel, self._slew
            learn = self.learning
            for i in range(n):
                az_i = theta + i * pitch
                d = at(i, az_i + lead)
                if learn is not None:
                    learn.observe(i, az_i, s.flap_deg[i])
                    d += learn.correction(i, az_i)
                lim = travel[i]
                if d > lim:
                    d = lim
                elif d < -lim:
                    d = -lim
                prev = cmd[i]
                step = slew[i]
                if d > prev + step:
                    d = prev + step
                elif d < prev - step:
                    d = prev - step
                cmd[i] = d
        else:   # every other state drives the flaps to neutral at a safe rate
            slew = self._safe_slew
            for i in range(n):
                prev = cmd[i]
                step = slew[i]
                cmd[i] = prev - step if prev > step else (prev + step if prev < -step else 0.0)
        if self._by_azimuth and state == _RUNNING:
            # azimuth trigger: one command each time the azimuth predicted for the next tick
            # enters a new step, at most max_command_rate_hz (the lookup above has the lead in it)
            b = int((theta + omega * dt) // self._az_step)
            if b != self._last_bin and s.t_s - self._last_send_t >= self._min_gap_s - 1e-12:
                self._last_bin = b
                self._last_send_t = s.t_s
                sent = self.sent
                for i in range(n):
                    sent[i] = cmd[i]
                self.ports.command_flaps(sent)
                self.commands_sent += 1
        else:
            if self._by_azimuth:
                sent = self.sent
                for i in range(n):
                    sent[i] = cmd[i]
            self.ports.command_flaps(cmd)
            self.commands_sent += 1
        if state != _FAULT:
            self.ports.heartbeat()          # a dead or faulted controller goes silent
        if self.tick % self.brake_every == 0:
            if state == _ARMED or state == _RUNNING:
                if not self.brake.active:
                    if est.ready:       # engage once the speed is known: bumpless
                        self.brake.start(omega, flow, self.brake_nm)
                    b = self.brake_nm
                else:
                    b = self.brake.update(omega, flow, dt * self.brake_every)
            elif state == _SAFE:
                b = self.ports.brake_hold_nm
            elif state == _FAULT and self._hold_at_once:
                b = self.ports.brake_hold_nm
            else:   # STOPPING / FAULT: ramp to the holding torque
                hold = self.ports.brake_hold_nm
                step = self._brake_ramp * self.brake_every
                b = self.brake_nm
                b = min(hold, b + step) if b < hold else max(hold, b - step)
                if state == _STOPPING and abs(omega) < 0.05 and all(c == 0.0 for c in cmd):
                    sup.stopped(s.t_s)
            if b != self.brake_nm or not self._brake_sent:
                self.ports.command_brake(b)
                self.brake_nm = b
                self._brake_sent = True
        power = self.power
        if self.reports_power:
            volts, amps, regen = s.servo_voltage_v, s.servo_current_a, self._regen
            for i in range(n):
                p = volts[i] * amps[i]
                power[i] = p if (p > 0.0 or regen[i]) else 0.0
        else:
            flaps, est_p = s.flap_deg, self._power_est
            for i in range(n):
                power[i] = est_p[i].update(flaps[i], dt)
        self.ledger.add(s.t_s, dt, theta, omega, s.torque_nm, flow, power)
        self.t_s = s.t_s
        self.tick += 1
        compute_us = (time.perf_counter_ns() - t0) * 1e-3
        if self.runlog is not None:
            self.runlog.append_tick((
                s.t_s, est.total, math.degrees(theta), omega, tsr, flow, s.torque_nm, s.thrust_n,
                self.brake_nm, state._value_, tuple(self.sent), tuple(s.flap_deg), tuple(power),
                self.clock.lateness_ns * 1e-3, compute_us))
        for listener in self._listeners:
            listener(self, s)

    # -- whole runs ---------------------------------------------------------------------------
    def run_for(self, duration_s: float, *, start: bool = True,
                progress: Callable[[float], None] | None = None) -> State:
        """Run ``duration_s`` seconds of ticks; arm and start first when ``start``.

        Any flapctl error (bus, log write, trip raised by a backend) ends in the safe state:
        flaps to neutral and brake holding, and the error is kept in ``self.error``.
        """
        ticks = int(round(duration_s / self.dt))
        self.clock.start()
        if start:
            self.command("arm", "run start")
            self.command("start", "run start")
        every = max(1, ticks // 100)
        try:
            for k in range(ticks):
                self.run_once()
                if progress is not None and k % every == 0:
                    progress(k / ticks)
                self.clock.wait()
        except RunLogError as exc:
            self.error = exc
            self.supervisor.trip(self.t_s, "runlog_write", str(exc))
            self.ports.safe()
            raise
        except SafetyTrip as exc:
            self.error = exc
            self.supervisor.trip(self.t_s, exc.reason, exc.detail)
            self.ports.safe()
        except FlapctlError as exc:
            self.error = exc
            self.supervisor.trip(self.t_s, type(exc).__name__, str(exc))
            self.ports.safe()
            raise
        if progress is not None:
            progress(1.0)
        return self.supervisor.state

    def summary(self, skip_revolutions: int = 0) -> RunEnergy:
        return self.ledger.summary(skip_revolutions)
