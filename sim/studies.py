"""Steady studies of the SIL rotor model: Cp-TSR curve, best fixed pitch, independence study.

These evaluate the model's periodic steady state (:meth:`sim.aero.RotorAero.steady`): induction
from the streamtube model, blade elements around the revolution, the flap following the
schedule exactly (no servo lag: the servo is a time-domain matter).
"""
from __future__ import annotations

import dataclasses
import math
import time
from dataclasses import dataclass

import numpy as np

from flapctl.profile import Profile

from .aero import RotorAero
from .polar import ThinSectionPolar
from .rig import rotor_geometry

__all__ = ["CurvePoint", "model_for", "flap_function", "sweep_tsr", "pitch_sweep", "convergence",
           "ConvergenceRow"]


@dataclass(frozen=True)
class CurvePoint:
    tsr: float
    cp: float
    ct: float
    peak_torque_nm: float
    valid: bool
    reason: str


def model_for(profile: Profile, density_kg_m3: float, nu_m2_s: float, *, pitch_deg: float | None = None,
              induction: str | None = None, n_tubes: int = 36) -> RotorAero:
    g = profile.geometry
    geom = rotor_geometry(profile)
    if pitch_deg is not None:
        geom = dataclasses.replace(geom, preset_pitch_rad=math.radians(pitch_deg))
    sim = profile.sim
    return RotorAero(geom, ThinSectionPolar(g.thickness_ratio, g.flap_chord_ratio), density_kg_m3,
                     nu_m2_s, induction=induction or sim.induction, n_tubes=n_tubes,
                     curvature=sim.flow_curvature, dynamic_stall=sim.dynamic_stall,
                     strut_drag_factor=profile.rotor.strut_drag_factor(g.radius_m, density_kg_m3))


def flap_function(schedule, tsr: float):
    """The schedule as the model's flap callable (radians, blade's own azimuth)."""
    if schedule is None:
        return None
    key = tsr if schedule.tsr_axis else None
    return lambda theta, blade: np.radians(schedule.evaluate(theta, blade, key))


def sweep_tsr(model: RotorAero, flow_m_s: float, tsrs, schedule=None, n_azimuth: int = 360,
              progress=None) -> list[CurvePoint]:
    out = []
    tsrs = list(tsrs)
    for k, tsr in enumerate(tsrs):
        r = model.steady(float(tsr), flow_m_s, flap_function(schedule, tsr), n_azimuth=n_azimuth)
        out.append(CurvePoint(float(tsr), r.cp, r.ct, float(np.max(np.abs(r.rotor_torque_nm))),
                              r.valid, r.reason))
        if progress is not None:
            progress((k + 1) / len(tsrs))
    return out


def pitch_sweep(profile: Profile, density_kg_m3: float, nu_m2_s: float, flow_m_s: float, pitches,
                tsrs, progress=None) -> dict[float, list[CurvePoint]]:
    """Cp-TSR curve for each fixed preset pitch (flaps neutral)."""
    result = {}
    pitches = list(pitches)
    for k, p in enumerate(pitches):
        model = model_for(profile, density_kg_m3, nu_m2_s, pitch_deg=float(p))
        result[float(p)] = sweep_tsr(model, flow_m_s, tsrs)
        if progress is not None:
            progress((k + 1) / len(pitches))
    return result


@dataclass(frozen=True)
class ConvergenceRow:
    azimuth_step_deg: float
    tubes_per_half: int
    cp: float
    peak_torque_nm: float
    solve_ms: float


def convergence(profile: Profile, density_kg_m3: float, nu_m2_s: float, tsr: float, flow_m_s: float,
                steps_deg=(4.0, 2.0, 1.0, 0.5), tubes=(9, 18, 36, 72, 144), schedule=None,
                progress=None) -> list[ConvergenceRow]:
    """Cp and peak torque versus azimuth step (blade-element grid) and streamtube count."""
    rows = []
    total = len(steps_deg) * len(tubes)
    k = 0
    for n_t in tubes:
        for step in steps_deg:
            model = model_for(profile, density_kg_m3, nu_m2_s, n_tubes=n_t)   # fresh: no cache
            t0 = time.perf_counter()
            r = model.steady(tsr, flow_m_s, flap_function(schedule, tsr),
                             n_azimuth=int(round(360.0 / step)))
            rows.append(ConvergenceRow(step, n_t, r.cp, float(np.max(np.abs(r.rotor_torque_nm))),
                                       (time.perf_counter() - t0) * 1e3))
            k += 1
            if progress is not None:
                progress(k / total)
    return rows
