"""Energy ledger: shaft, actuator and fluid energy per revolution and per run.

Definitions (REFERENCES section 1 and 9):

* shaft energy    E_s = integral of Q omega dt, Q the measured shaft torque (torque sensor,
  between rotor and brake), omega the estimated speed;
* servo energy    E_a = sum over servos of integral of P_el dt, with P_el = V I from the servo's
  telemetry when it reports it (clipped at zero unless the drive regenerates), otherwise
  estimated from the servo's electrical model in the profile (marked ``estimated``);
* fluid energy    E_f = integral of 1/2 rho A U^3 dt, A = 2 R H: C_P uses <U^3>, not <U>^3;
* C_P,gross = E_s / E_f and C_P,net = (E_s - E_a) / E_f over whole revolutions.

A C_P above the Betz limit 16/27 (Betz 1920) is flagged, never silently reported.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

__all__ = ["BETZ_LIMIT", "RevolutionRecord", "RunEnergy", "EnergyLedger", "ServoPowerEstimator"]

BETZ_LIMIT = 16.0 / 27.0


class ServoPowerEstimator:
    """Electrical power of one servo from its measured motion and its electrical model.

    Used when the servo does not report voltage and current.  The hinge moment is not known to
    the controller, so the estimate covers inertia, friction, copper and quiescent losses only
    and is a lower bound; results using it are marked ``estimated``.
    """

    __slots__ = ("_el", "_prev_deg", "_rate", "_tau", "power_w")

    def __init__(self, electrical, filter_s: float = 0.005) -> None:
        self._el = electrical
        self._prev_deg: float | None = None
        self._rate = 0.0
        self._tau = filter_s
        self.power_w = electrical.quiescent_w

    def update(self, flap_deg: float, dt_s: float) -> float:
        el = self._el
        if self._prev_deg is None:
            self._prev_deg = flap_deg
            return self.power_w
        raw_rate = math.radians(flap_deg - self._prev_deg) / dt_s
        self._prev_deg = flap_deg
        prev_rate = self._rate
        self._rate += (raw_rate - self._rate) * min(1.0, dt_s / self._tau)
        accel = (self._rate - prev_rate) / dt_s
        hinge_torque = el.flap_inertia_kg_m2 * accel + el.flap_friction_nm_s * self._rate
        driving = hinge_torque * self._rate >= 0.0
        motor_torque = hinge_torque / (el.gear_ratio * el.gear_efficiency) if driving \
            else hinge_torque * el.gear_efficiency / el.gear_ratio
        current = motor_torque / el.kt_nm_a
        motor_speed = el.gear_ratio * self._rate
        p = el.resistance_ohm * current * current + el.kt_nm_a * motor_speed * current
        if not el.regenerative and p < 0.0:
            p = 0.0
        self.power_w = p + el.quiescent_w
        return self.power_w


class _EnergyRatios:
    """Cp gross / net from a record's shaft, servo and fluid energies."""

    shaft_energy_j: float
    servo_energy_j: tuple[float, ...]
    fluid_energy_j: float

    @property
    def actuator_energy_j(self) -> float:
        return sum(self.servo_energy_j)

    @property
    def cp_gross(self) -> float:
        return self.shaft_energy_j / self.fluid_energy_j if self.fluid_energy_j > 0 else float("nan")

    @property
    def cp_net(self) -> float:
        if self.fluid_energy_j <= 0:
            return float("nan")
        return (self.shaft_energy_j - self.actuator_energy_j) / self.fluid_energy_j


@dataclass(frozen=True)
class RevolutionRecord(_EnergyRatios):
    """Energy of one whole revolution."""
    index: int
    t_start_s: float
    duration_s: float
    mean_speed_rad_s: float
    mean_tsr: float
    mean_flow_m_s: float
    shaft_energy_j: float
    servo_energy_j: tuple[float, ...]
    fluid_energy_j: float


@dataclass(frozen=True)
class RunEnergy(_EnergyRatios):
    """Totals over whole revolutions of a run (after the settling revolutions)."""
    revolutions: int
    duration_s: float
    shaft_energy_j: float
    servo_energy_j: tuple[float, ...]
    fluid_energy_j: float
    mean_tsr: float
    mean_speed_rad_s: float
    mean_flow_m_s: float
    servo_power_estimated: bool
    flags: tuple[str, ...] = field(default=())


    @property
    def shaft_power_w(self) -> float:
        return self.shaft_energy_j / self.duration_s if self.duration_s > 0 else float("nan")

    @property
    def actuator_power_w(self) -> float:
        return self.actuator_energy_j / self.duration_s if self.duration_s > 0 else float("nan")



class EnergyLedger:
    """Books energy every tick and closes a :class:`RevolutionRecord` at each azimuth wrap.

    ``on_revolution`` (if given) is called with each closed record: the run log listens here.
    """

    def __init__(self, blades: int, density_kg_m3: float, area_m2: float, radius_m: float,
                 servo_power_estimated: bool, on_revolution=None) -> None:
        self.blades = blades
        self._half_rho_a = 0.5 * density_kg_m3 * area_m2
        self._radius = radius_m
        self.servo_power_estimated = servo_power_estimated
        self.on_revolution = on_revolution
        self.records: list[RevolutionRecord] = []
        self._started = False          # first wrap opens the first whole revolution
        self._prev_az = None
        self._reset_acc(0.0)

    def _reset_acc(self, t_s: float) -> None:
        self._t0 = t_s
        self._dur = 0.0
        self._es = 0.0
        self._ef = 0.0
        self._ea = [0.0] * self.blades
        self._sum_w = 0.0
        self._sum_u = 0.0

    def add(self, t_s: float, dt_s: float, azimuth_rad: float, speed_rad_s: float,
            torque_nm: float, flow_m_s: float, servo_power_w) -> None:
        """Book one tick.  ``servo_power_w`` is a sequence, one value per blade."""
        prev = self._prev_az
        self._prev_az = azimuth_rad
        if prev is not None and azimuth_rad < prev - math.pi:   # forward wrap through 0
            if self._started:
                self._close(t_s)
            self._started = True
            self._reset_acc(t_s)
        self._dur += dt_s
        self._es += torque_nm * speed_rad_s * dt_s
        self._ef += self._half_rho_a * flow_m_s * flow_m_s * flow_m_s * dt_s
        ea = self._ea
        for i in range(self.blades):
            ea[i] += servo_power_w[i] * dt_s
        self._sum_w += speed_rad_s * dt_s
        self._sum_u += flow_m_s * dt_s

    def _close(self, t_s: float) -> None:
        dur = self._dur
        if dur <= 0:
            return
        mean_w = self._sum_w / dur
        mean_u = self._sum_u / dur
        rec = RevolutionRecord(
            index=len(self.records), t_start_s=self._t0, duration_s=dur, mean_speed_rad_s=mean_w,
            mean_tsr=mean_w * self._radius / mean_u if mean_u > 0 else float("nan"),
            mean_flow_m_s=mean_u, shaft_energy_j=self._es, servo_energy_j=tuple(self._ea),
            fluid_energy_j=self._ef)
        self.records.append(rec)
        if self.on_revolution is not None:
            self.on_revolution(rec)

    def summary(self, skip_revolutions: int = 0) -> RunEnergy:
        """Totals over the whole revolutions after the first ``skip_revolutions``."""
        recs = self.records[skip_revolutions:]
        return summarise(recs, self.blades, self.servo_power_estimated)


def summarise(recs, blades: int, servo_power_estimated: bool) -> RunEnergy:
    """Totals of a list of revolution records, with the energy audit flags."""
    dur = sum(r.duration_s for r in recs)
    es = sum(r.shaft_energy_j for r in recs)
    ef = sum(r.fluid_energy_j for r in recs)
    ea = tuple(sum(r.servo_energy_j[i] for r in recs) for i in range(blades))
    if dur > 0:
        mean_w = sum(r.mean_speed_rad_s * r.duration_s for r in recs) / dur
        mean_u = sum(r.mean_flow_m_s * r.duration_s for r in recs) / dur
        mean_tsr = sum(r.mean_tsr * r.duration_s for r in recs) / dur
    else:
        mean_w = mean_u = mean_tsr = float("nan")
    flags = []
    if not recs:
        flags.append("no whole revolution recorded")
    elif ef > 0 and es / ef > BETZ_LIMIT:
        flags.append(f"Cp gross {es / ef:.3f} is above the Betz limit 16/27 = {BETZ_LIMIT:.3f}: "
                     "check blockage, torque calibration and flow speed")
    if recs and sum(ea) > es:
        flags.append("actuator energy exceeds shaft energy: net power is negative")
    if servo_power_estimated:
        flags.append("servo energy estimated from the electrical model (no telemetry): a lower bound")
    return RunEnergy(revolutions=len(recs), duration_s=dur, shaft_energy_j=es, servo_energy_j=ea,
                     fluid_energy_j=ef, mean_tsr=mean_tsr, mean_speed_rad_s=mean_w,
                     mean_flow_m_s=mean_u, servo_power_estimated=servo_power_estimated,
                     flags=tuple(flags))
