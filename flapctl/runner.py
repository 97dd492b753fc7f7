"""Putting a run together: profile + schedule + ports + clock + log -> controller -> summary.

``run_sil`` runs the controller in lockstep against the embedded SIL rig: a
:class:`~flapctl.clock.VirtualClock` steps the rig one period after every tick, so a run goes as
fast as the CPU allows and is exactly repeatable for a given seed.
"""
from __future__ import annotations

import logging
import math
import sys
from dataclasses import dataclass
from pathlib import Path

from .clock import VirtualClock
from .energy import RunEnergy
from .lead import LeadModel
from .ports import backend_class
from .profile import Profile
from .runlog import RunLog
from .schedule import Schedule
from .scheduler import Controller
from .supervisor import State

__all__ = ["RunOutcome", "run_sil", "run_with_ports", "summary_dict", "settle_revolutions"]

log = logging.getLogger(__name__)


@dataclass
class RunOutcome:
    path: Path | None
    summary: RunEnergy
    state: State
    trips: list
    controller: Controller
    rig: object


def _injector(scenario):
    if scenario is None:
        return None
    from sim.faults import FaultInjector   # the SIL rig's own fault injection
    return FaultInjector(scenario)


def settle_revolutions(profile: Profile, tsr: float, flow_m_s: float, settle_s: float) -> int:
    """Whole revolutions in ``settle_s`` at this operating point (skipped in the summary)."""
    rev_s = 2.0 * math.pi * profile.geometry.radius_m / (tsr * flow_m_s)
    return int(math.ceil(settle_s / rev_s))


def summary_dict(summary: RunEnergy) -> dict:
    return {
        "revolutions": summary.revolutions, "duration_s": summary.duration_s,
        "mean_tsr": summary.mean_tsr, "mean_speed_rad_s": summary.mean_speed_rad_s,
        "mean_flow_m_s": summary.mean_flow_m_s, "shaft_energy_j": summary.shaft_energy_j,
        "servo_energy_j": list(summary.servo_energy_j), "fluid_energy_j": summary.fluid_energy_j,
        "shaft_power_w": summary.shaft_power_w, "actuator_power_w": summary.actuator_power_w,
        "cp_gross": summary.cp_gross, "cp_net": summary.cp_net,
        "servo_power_estimated": summary.servo_power_estimated, "flags": list(summary.flags),
    }


def run_sil(profile: Profile, schedule: Schedule, *, tsr: float, duration_s: float,
            out: str | Path | None, flow_m_s: float | None = None, settle_s: float = 3.0,
            lead: LeadModel | None = None, seed: int | None = None, progress=None,
            label: str = "", chunk_rows: int | None = None, faults=None, attach=None,
            start: bool = True) -> RunOutcome:
    """Run the controller in lockstep against the SIL rig; write ``out`` when given.

    ``faults`` is a fault scenario (``sim.faults.Scenario``) to inject into the rig.
    """
    u = profile.fluid.design_speed_m_s if flow_m_s is None else flow_m_s
    period_ns = int(round(1e9 / profile.control.rate_hz))
    rig = backend_class("sim", profile.source).for_profile(
        profile, period_ns * 1e-9, flow_m_s=u, tsr=tsr, seed=seed, faults=_injector(faults))
    fluid = rig.fluid
    extra = {"seed": profile.sim.seed if seed is None else seed,
             "kinematic_viscosity_m2_s": fluid.kinematic_viscosity_m2_s,
             "fault_scenario": faults.name if faults is not None else ""}
    return run_with_ports(profile, schedule, rig, VirtualClock(period_ns, rig.step), tsr=tsr,
                          duration_s=duration_s, out=out, density_kg_m3=fluid.density_kg_m3,
                          flow_m_s=u, settle_s=settle_s, lead=lead, progress=progress, label=label,
                          chunk_rows=chunk_rows, backend="sim-lockstep", extra=extra,
                          attach=attach, start=start)


def run_with_ports(profile: Profile, schedule: Schedule, ports, clock, *, tsr: float,
                   duration_s: float, out: str | Path | None, density_kg_m3: float,
                   flow_m_s: float | None = None, settle_s: float = 3.0,
                   lead: LeadModel | None = None, progress=None, label: str = "",
                   chunk_rows: int | None = None, backend: str = "", extra: dict | None = None,
                   attach=None, start: bool = True) -> RunOutcome:
    """The controller on any ports and clock, logged to ``out`` (HDF5) when given.

    ``attach(controller)`` (optional) is called before the first tick and may return a
    function that is called after the last (an operator interface, say); ``start`` False
    leaves arming and starting to the operator.
    """
    u = profile.fluid.design_speed_m_s if flow_m_s is None else flow_m_s
    lead = lead if lead is not None else LeadModel.from_control(profile.control)
    runlog = None
    if out is not None:
        meta = {
            "label": label, "backend": backend or type(ports).__name__,
            "profile_name": profile.name, "profile_source": profile.source,
            "profile_text": profile.text, "schedule_source": schedule.source,
            "schedule_text": schedule.text, "tsr_setpoint": tsr, "flow_setpoint_m_s": u,
            "duration_s": duration_s, "rate_hz": 1e9 / clock.period_ns, "lead": lead.describe(),
            "density_kg_m3": density_kg_m3, "command_line": " ".join(sys.argv),
            **(extra or {}),
        }
        runlog = RunLog(out, profile.blades, meta,
                        chunk_rows=chunk_rows or int(round(1e9 / clock.period_ns)))
    ctl = Controller(profile, schedule, ports, clock, tsr=tsr, density_kg_m3=density_kg_m3,
                     lead=lead, runlog=runlog)
    detach = attach(ctl) if attach is not None else None
    try:
        state = ctl.run_for(duration_s, progress=progress, start=start)
    finally:
        if detach is not None:
            detach()
        skip = settle_revolutions(profile, tsr, u, settle_s)
        summary = ctl.summary(skip)
        if runlog is not None:
            try:
                runlog.set_summary(summary_dict(summary))
            finally:
                runlog.close()
        ports.close()
    return RunOutcome(Path(out) if out else None, summary, state, list(ctl.supervisor.trips), ctl, ports)
