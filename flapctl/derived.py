"""Derived quantities a rig operator looks at before a run (``flapctl check``).

Definitions from REFERENCES section 1: swept area A = 2 R H, available power 1/2 rho A U^3,
solidity in its three conventions (always labelled), rotor speed omega = TSR U / R, chord
Reynolds number Re_c = TSR U c / nu (blade speed) and diameter Reynolds number Re_D = U D / nu.
With a schedule: the peak flap rate it demands at the design TSR, max |d delta/d theta| x omega,
against each servo's rate limit.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from .fluid import FluidProperties, fluid_properties
from .profile import Profile

__all__ = ["RigFigures", "ServoDemand", "rig_figures", "schedule_demand", "blockage_ratio_of"]


@dataclass(frozen=True)
class RigFigures:
    swept_area_m2: float
    solidity_nc_r: float
    solidity_nc_d: float
    solidity_nc_2pir: float
    fluid: FluidProperties
    design_speed_m_s: float
    design_tsr: float
    available_power_w: float
    rotor_speed_rad_s: float
    rotor_speed_rpm: float
    rotor_frequency_hz: float
    chord_reynolds: float
    diameter_reynolds: float
    blockage_ratio: float | None


@dataclass(frozen=True)
class ServoDemand:
    blade: int
    peak_rate_deg_s: float
    rate_limit_deg_s: float
    peak_deflection_deg: float
    travel_deg: float

    @property
    def rate_ok(self) -> bool:
        return self.peak_rate_deg_s <= self.rate_limit_deg_s

    @property
    def travel_ok(self) -> bool:
        return self.peak_deflection_deg <= self.travel_deg


def blockage_ratio_of(profile: Profile) -> float | None:
    g, ch = profile.geometry, profile.channel
    if ch is None:
        return None
    return 2.0 * g.radius_m * g.span_m / (ch.width_m * ch.depth_m)


def rig_figures(profile: Profile, tsr: float | None = None, flow_m_s: float | None = None) -> RigFigures:
    g, f = profile.geometry, profile.fluid
    tsr = f.design_tsr if tsr is None else tsr
    u = f.design_speed_m_s if flow_m_s is None else flow_m_s
    fluid = fluid_properties(f.medium, f.temperature_c, f.pressure_pa)
    area = 2.0 * g.radius_m * g.span_m
    omega = tsr * u / g.radius_m
    nc = g.blades * g.chord_m
    return RigFigures(
        swept_area_m2=area, solidity_nc_r=nc / g.radius_m, solidity_nc_d=nc / (2.0 * g.radius_m),
        solidity_nc_2pir=nc / (2.0 * math.pi * g.radius_m), fluid=fluid, design_speed_m_s=u,
        design_tsr=tsr, available_power_w=0.5 * fluid.density_kg_m3 * area * u ** 3,
        rotor_speed_rad_s=omega, rotor_speed_rpm=omega * 30.0 / math.pi,
        rotor_frequency_hz=omega / (2.0 * math.pi),
        chord_reynolds=tsr * u * g.chord_m / fluid.kinematic_viscosity_m2_s,
        diameter_reynolds=u * 2.0 * g.radius_m / fluid.kinematic_viscosity_m2_s,
        blockage_ratio=blockage_ratio_of(profile))


def schedule_demand(profile: Profile, schedule, tsr: float | None = None,
                    flow_m_s: float | None = None) -> list[ServoDemand]:
    """Peak flap rate and deflection each servo must deliver for ``schedule`` at ``tsr``."""
    f = profile.fluid
    tsr = f.design_tsr if tsr is None else tsr
    u = f.design_speed_m_s if flow_m_s is None else flow_m_s
    omega = tsr * u / profile.geometry.radius_m
    key = tsr if schedule.tsr_axis else None
    slopes = schedule.peak_slope_deg_per_rad(key)
    table = schedule.table(key)
    out = []
    for i, servo in enumerate(profile.servos):
        peak = max(abs(table.at(i, math.radians(a * 0.25))) for a in range(1440))
        out.append(ServoDemand(blade=i, peak_rate_deg_s=slopes[i] * omega,
                               rate_limit_deg_s=servo.rate_limit_deg_s, peak_deflection_deg=peak,
                               travel_deg=servo.travel_deg))
    return out
