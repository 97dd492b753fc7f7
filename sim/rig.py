"""VirtualRig: the software-in-the-loop rig behind flapctl's ports.

Composes the rotor (inertia, bearing friction), the aerodynamic model (:mod:`sim.aero`), one
servo per blade (:mod:`sim.servo`), the brake, encoder, torque sensor and flow
(:mod:`sim.drives`).  It implements :class:`flapctl.ports.base.RigPorts`, so the controller
cannot tell it from a rig; ``step(dt)`` advances the physics and is what a
:class:`~flapctl.clock.VirtualClock` calls in lockstep.

Rotor: J dw/dt = sum of blade torques - brake torque - friction.  The step is semi-implicit
(speed first, then angle with the new speed) and every torque is booked with the mid-step speed
(w_old + w_new)/2, so the energy books balance exactly: aerodynamic work = change of kinetic
energy + brake work + friction work (``energy`` attribute).

The torque sensor sits between rotor and brake: it reads the brake's reaction torque (so
bearing friction upstream of it lowers the measured power, as on a real rig).
"""
from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from dataclasses import dataclass

from flapctl.fluid import fluid_properties
from flapctl.ports.base import RigPorts, Sample
from flapctl.profile import Profile

from .aero import RotorAero, RotorGeometry
from .drives import (BrakeModel, BrakeParams, EncoderModel, EncoderParams, FlowModel, FlowParams,
                     FlowSensor, FlowSensorParams, TorqueSensor, TorqueSensorParams)
from .polar import ThinSectionPolar
from .servo import ServoModel, ServoParams

__all__ = ["VirtualRig", "EnergyBooks", "servo_params", "rotor_geometry"]

TWO_PI = 2.0 * math.pi


def servo_params(servo) -> ServoParams:
    """The SIL servo model's parameters from one profile [[servos]] entry."""
    el = servo.electrical
    return ServoParams(
        travel_deg=servo.travel_deg, rate_limit_deg_s=servo.rate_limit_deg_s,
        dead_time_s=servo.dead_time_s, natural_freq_hz=servo.natural_freq_hz,
        damping=servo.damping, backlash_deg=servo.backlash_deg, kt_nm_a=el.kt_nm_a,
        resistance_ohm=el.resistance_ohm, gear_ratio=el.gear_ratio,
        gear_efficiency=el.gear_efficiency, flap_inertia_kg_m2=el.flap_inertia_kg_m2,
        flap_friction_nm_s=el.flap_friction_nm_s, supply_v=el.supply_v,
        current_limit_a=el.current_limit_a, quiescent_w=el.quiescent_w,
        regenerative=el.regenerative)


def rotor_geometry(profile: Profile) -> RotorGeometry:
    g = profile.geometry
    return RotorGeometry(blades=g.blades, radius_m=g.radius_m, span_m=g.span_m, chord_m=g.chord_m,
                         preset_pitch_rad=math.radians(g.preset_pitch_deg),
                         pivot_chord_fraction=g.pivot_chord_fraction,
                         flap_chord_ratio=g.flap_chord_ratio)


@dataclass
class EnergyBooks:
    """Exact energy bookkeeping of the rotor (J)."""
    aero_j: float = 0.0
    brake_j: float = 0.0
    friction_j: float = 0.0
    kinetic_start_j: float = 0.0
    kinetic_j: float = 0.0

    @property
    def imbalance_j(self) -> float:
        return self.aero_j - (self.kinetic_j - self.kinetic_start_j) - self.brake_j - self.friction_j


class VirtualRig(RigPorts):
    """The SIL rig: physics plus the same ports as hardware."""

    reports_servo_power = False

    def __init__(self, profile: Profile, *, density_kg_m3: float, viscosity_m2_s: float,
                 dt_s: float, flow_m_s: float | None = None, initial_speed_rad_s: float | None = None,
                 seed: int | None = None, aero: RotorAero | None = None,
                 faults=None, servo_watchdog_s: float = 0.1) -> None:
        g = profile.geometry
        super().__init__(g.blades, profile.brake.hold_torque_nm)
        self.profile = profile
        self.dt = dt_s
        sim = profile.sim
        seed = sim.seed if seed is None else seed
        u0 = profile.fluid.design_speed_m_s if flow_m_s is None else flow_m_s
        self.aero = aero if aero is not None else RotorAero(
            rotor_geometry(profile), ThinSectionPolar(g.thickness_ratio, g.flap_chord_ratio),
            density_kg_m3, viscosity_m2_s, induction=sim.induction, curvature=sim.flow_curvature,
            dynamic_stall=sim.dynamic_stall,
            strut_drag_factor=profile.rotor.strut_drag_factor(g.radius_m, density_kg_m3))
        self.servos = [ServoModel(servo_params(s), dt_s) for s in profile.servos]
        self.reports_servo_power = all(s.reports_power for s in profile.servos)
        b = profile.brake
        self.brake = BrakeModel(BrakeParams(max_torque_nm=b.max_torque_nm, min_torque_nm=b.min_torque_nm,
                                            time_constant_s=b.time_constant_s))
        e = profile.encoder
        self.encoder = EncoderModel(EncoderParams(counts_per_rev=e.counts_per_rev,
                                                  counter_bits=e.counter_bits,
                                                  index_offset_deg=e.index_offset_deg, seed=seed))
        ts = profile.sensors.torque
        self.torque_sensor = TorqueSensor(TorqueSensorParams(
            range_nm=ts.range_nm, noise_nm=ts.noise_nm, bandwidth_hz=ts.bandwidth_hz,
            offset_nm=ts.offset_nm, seed=seed + 1))
        self.flow = FlowModel(FlowParams(mean_m_s=u0, turbulence_intensity=sim.turbulence_intensity,
                                         integral_time_s=sim.integral_time_s, seed=seed + 2))
        fs = profile.sensors.flow
        self.flow_sensor = FlowSensor(FlowSensorParams(range_m_s=fs.range_m_s, noise_m_s=fs.noise_m_s,
                                                       seed=seed + 3))
        self.inertia = profile.rotor.inertia_kg_m2
        self.coulomb = profile.rotor.coulomb_friction_nm
        self.viscous = profile.rotor.viscous_friction_nm_s
        self.t_s = 0.0
        self.angle_rad = 0.0          # true azimuth of blade 0 (unwrapped)
        if initial_speed_rad_s is None:
            initial_speed_rad_s = profile.fluid.design_tsr * u0 / g.radius_m
        self.speed_rad_s = initial_speed_rad_s
        self.flow_m_s = u0
        self._brake_cmd = 0.0
        self._flap_cmd = [0.0] * g.blades
        self.blade_torque_nm = [0.0] * g.blades
        self.hinge_nm = [0.0] * g.blades
        self.thrust_n = 0.0
        self.energy = EnergyBooks(kinetic_start_j=0.5 * self.inertia * self.speed_rad_s ** 2,
                                  kinetic_j=0.5 * self.inertia * self.speed_rad_s ** 2)
        self.faults = faults
        self.fluid = None              # the FluidProperties used, when built by for_profile()
        self.servo_watchdog_s = servo_watchdog_s
        self._last_command_t = 0.0
        self._sample = Sample(g.blades)
        self._pitch = TWO_PI / g.blades
        nbins = 72
        self._flap_bins = [[0.0] * nbins for _ in range(g.blades)]
        self._flap_count = [[0] * nbins for _ in range(g.blades)]
        self._flap_done: list[list[float]] | None = None   # per-bin means of the last whole revolution
        self._nbins = nbins
        self._aero_key = None
        self._speed_sum = 0.0
        self._speed_n = 0
        self._rev_speed: float | None = None    # mean speed of the last whole revolution
        self._revs_since_solve = 0
        self._rev_seen = 0
        self.encoder.step(self.angle_rad)
        self._refresh_aero()
        self._refresh_every = max(1, int(round(0.05 / dt_s)))
        self._steps = 0
        self._fill_sample()

    @classmethod
    def for_profile(cls, profile: Profile, dt_s: float, *, flow_m_s: float | None = None,
                    tsr: float | None = None, initial_speed_rad_s: float | None = None,
                    seed: int | None = None, faults=None) -> "VirtualRig":
        """The SIL rig of a profile: fluid properties from the profile, mean flow ``flow_m_s``
        (default the design speed), the rotor started at ``initial_speed_rad_s`` or else at
        ``tsr`` (default the design TSR).  ``rig.fluid`` holds the properties used."""
        f = profile.fluid
        fluid = fluid_properties(f.medium, f.temperature_c, f.pressure_pa, source=profile.source)
        u = f.design_speed_m_s if flow_m_s is None else flow_m_s
        if initial_speed_rad_s is None:
            initial_speed_rad_s = (f.design_tsr if tsr is None else tsr) * u / profile.geometry.radius_m
        rig = cls(profile, density_kg_m3=fluid.density_kg_m3,
                  viscosity_m2_s=fluid.kinematic_viscosity_m2_s, dt_s=dt_s, flow_m_s=u,
                  initial_speed_rad_s=initial_speed_rad_s, seed=seed, faults=faults)
        rig.fluid = fluid
        return rig

    # -- ports --------------------------------------------------------------------------------
    def read(self) -> Sample:
        return self._sample

    def command_flaps(self, flap_deg: Sequence[float]) -> None:
        if self.faults is not None and self.faults.drop_command():
            return
        self._last_command_t = self.t_s
        cmd = self._flap_cmd
        for i in range(self.blades):
            cmd[i] = flap_deg[i]

    def command_brake(self, torque_nm: float) -> None:
        if self.faults is not None and self.faults.drop_command():
            return
        self._brake_cmd = torque_nm

    def _release(self) -> None:
        pass

    # -- physics ------------------------------------------------------------------------------
    def _flap_function(self):
        """The flap motion of the last revolution, per blade, as the induction model's input.

        Each blade's measured flap angle is averaged in azimuth bins of its own azimuth while the
        rig runs; the induction is then solved for the flaps as they really moved.
        """
        done = self._flap_done
        if done is None:
            return None
        nb = len(done[0])
        tables = [np.radians(np.array(row + row[:1])) for row in done]
        centres = (np.arange(nb + 1) + 0.5) * TWO_PI / nb

        def flap(theta, blade, _t=tables, _c=centres):
            th = np.mod(np.asarray(theta, dtype=float) - _c[0], TWO_PI) + _c[0]
            return np.interp(th, _c, _t[blade])
        return flap

    def _refresh_aero(self) -> None:
        u = self.flow.mean_m_s
        if u <= 0.0:
            return          # still fluid (a bench test with the flow off): no induction to solve
        # the speed averaged over the revolution so far: the torque ripple is phase-locked to the
        # azimuth, so an instantaneous speed would bias the induction's operating point
        speed = self._rev_speed if self._rev_speed is not None else self.speed_rad_s
        tsr = speed * self.profile.geometry.radius_m / u if u > 0 else 0.0
        if tsr < 0.1:
            # near standstill: induction is negligible; keep the last solution (a stopped rotor
            # still sees the blade-element loads at its own azimuths)
            if getattr(self, "_aero_ready", False):
                return
            tsr = 0.1
        moved = self._flap_done is not None and any(abs(a) > 0.05 for row in self._flap_done for a in row)
        key = self._aero_key
        if key is not None and abs(tsr - key[0]) <= 0.05 * key[0] and abs(u - key[1]) <= 0.05 * key[1] \
                and self._revs_since_solve < 1:
            return      # within a revolution, only a large change of operating point re-solves
        flap = self._flap_function() if moved else None
        self.aero.refresh(tsr, u, flap)
        self._aero_key = (tsr, u)
        self._revs_since_solve = 0
        self._aero_ready = True

    def step(self, dt_s: float) -> None:
        """Advance the rig by ``dt_s`` with the commands last received."""
        if self.faults is not None:
            self.faults.update(self, self.t_s, int(self.angle_rad // TWO_PI))
        if self.t_s - self._last_command_t > self.servo_watchdog_s:
            # the servos' own watchdog: no set-point for too long -> neutral
            for i in range(self.blades):
                self._flap_cmd[i] = 0.0
        u = self.flow.step(dt_s)
        self.flow_m_s = u
        w = self.speed_rad_s
        theta = self.angle_rad
        aero, servos = self.aero, self.servos
        q_aero = 0.0
        fx = 0.0
        pitch = self._pitch
        bt, hinge = self.blade_torque_nm, self.hinge_nm
        kscale = self._nbins / TWO_PI
        for i in range(self.blades):
            servo = servos[i]
            th_i = (theta + i * pitch) % TWO_PI
            ang = servo.angle_deg
            k = int(th_i * kscale)
            if k >= self._nbins:
                k = self._nbins - 1
            self._flap_bins[i][k] += ang
            self._flap_count[i][k] += 1
            q, h, f = aero.blade_loads(i, th_i, w, u, math.radians(ang), dt_s)
            bt[i] = q
            hinge[i] = h
            q_aero += q
            fx += f
            servo.step(self._flap_cmd[i], h)
        self.thrust_n = fx
        q_aero -= aero.strut_drag_factor * w * abs(w)       # support struts
        q_brake = self.brake.step(dt_s, self._brake_cmd)
        # rotor: semi-implicit step; friction opposes motion and cannot reverse it
        q_drive = q_aero - q_brake * (1.0 if w >= 0 else -1.0)
        q_fric = self.coulomb * (1.0 if w > 0 else (-1.0 if w < 0 else 0.0)) + self.viscous * w
        w_new = w + dt_s * (q_drive - q_fric) / self.inertia
        if w > 0 and w_new < 0 or w < 0 and w_new > 0 or (w == 0 and abs(q_drive) <= self.coulomb):
            w_new = 0.0          # stiction: the rotor stops rather than reverses
            q_fric = q_drive             # the friction that held it (stiction)
        w_mid = 0.5 * (w + w_new)
        books = self.energy
        books.aero_j += q_aero * w_mid * dt_s
        books.brake_j += q_brake * abs(w_mid) * dt_s
        books.friction_j += q_fric * w_mid * dt_s
        books.kinetic_j = 0.5 * self.inertia * w_new * w_new
        self.speed_rad_s = w_new
        self.angle_rad = theta + w_new * dt_s
        self.t_s += dt_s
        self.encoder.step(self.angle_rad)
        self._steps += 1
        self._speed_sum += w_new
        self._speed_n += 1
        rev = int(self.angle_rad // TWO_PI)
        if rev != self._rev_seen:
            # a new revolution: keep only the last one's flap averages for the next solve
            self._rev_seen = rev
            self._revs_since_solve += 1
            # a revolution that visited every azimuth bin becomes the flap input of the induction
            if all(all(c) for c in self._flap_count):
                self._flap_done = [[sm / c for sm, c in zip(sums, counts)]
                                   for sums, counts in zip(self._flap_bins, self._flap_count)]
            for i in range(self.blades):
                self._flap_bins[i] = [0.0] * self._nbins
                self._flap_count[i] = [0] * self._nbins
            if self._speed_n:
                self._rev_speed = self._speed_sum / self._speed_n
            self._speed_sum = 0.0
            self._speed_n = 0
            self._refresh_aero()
        elif self._steps % self._refresh_every == 0:
            self._refresh_aero()
        self._brake_torque = q_brake
        self._fill_sample(dt_s)

    def _fill_sample(self, dt_s: float = 0.0) -> None:
        s = self._sample
        s.t_s = self.t_s
        enc = self.encoder
        s.counts = enc.counts
        s.index_latch = enc.index_latch
        s.index_events = enc.index_events
        q_true = getattr(self, "_brake_torque", 0.0)
        s.torque_nm = self.torque_sensor.step(dt_s, q_true) if dt_s > 0 else 0.0
        s.flow_m_s = self.flow_sensor.step(self.flow_m_s)
        s.thrust_n = self.thrust_n
        faults = self.faults
        if faults is not None:
            over = faults.sensor_override
            if over:
                s.torque_nm = over.get("torque", s.torque_nm)
                s.flow_m_s = over.get("flow", s.flow_m_s)
            if faults.latency_s > 0.0 or faults.drop_telemetry():
                s.telemetry_age_s += dt_s       # telemetry stale: keep the old values
                return
        s.telemetry_age_s = 0.0
        power = self.reports_servo_power
        for i, servo in enumerate(self.servos):
            s.flap_deg[i] = servo.angle_deg
            if power:
                s.servo_voltage_v[i] = servo.voltage_v
                s.servo_current_a[i] = servo.current_a
