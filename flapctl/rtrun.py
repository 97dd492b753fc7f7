"""Real-time runs: the same Controller as in lockstep SIL, paced by the wall clock.

``run_realtime`` drives a rig (any :class:`~flapctl.ports.base.RigPorts`) with the
:class:`~flapctl.rtclock.RealtimeClock` and writes the log through a
:class:`~flapctl.logproc.ProcessRunLog`, so the loop's process never touches HDF5.  Order of
events: the writer process is started first (it must not inherit the real-time priority or the
CPU pin), then the clock applies the real-time options when the run starts, and undoes them
before the summary is written and the log closed.

Every exit path -- the end of the run, a trip, a log failure, a bus error, Ctrl-C -- commands the
safe state (flaps neutral, brake holding), closes the clock, the log and (by default) the ports.
A trip (overrun, interlock) ends the run in FAULT and is reported in the outcome; a Ctrl-C ends it
with ``interrupted=True``; any other flapctl error is raised after everything is closed.

``run_paced_sil`` runs the in-process SIL rig on the same clock, stepped by one period right after
each wake-up and before the controller's tick.  The model's own occasional long steps (induction
re-solves, polar-grid rebuilds) then appear as lateness, so its default overrun policy counts
and warns but does not trip.
"""
from __future__ import annotations

import json
import logging
import os
import sys
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from .errors import FlapctlError, ProfileError
from .lead import LeadModel
from .logproc import ProcessRunLog
from .ports import backend_class
from .ports.base import RigPorts
from .profile import Profile
from .rtclock import OverrunPolicy, RealtimeClock, RealtimeOptions
from .runner import RunOutcome, settle_revolutions, summary_dict
from .schedule import Schedule
from .scheduler import Controller

__all__ = ["RealtimeOutcome", "run_realtime", "run_paced_sil", "period_ns_for"]

log = logging.getLogger(__name__)


@dataclass
class RealtimeOutcome(RunOutcome):
    """A :class:`~flapctl.runner.RunOutcome` plus what the real-time clock saw."""

    clock_stats: dict[str, Any] = field(default_factory=dict)
    realtime_messages: list[str] = field(default_factory=list)
    interrupted: bool = False


def period_ns_for(profile: Profile, rate_hz: float | None) -> int:
    """The tick period in integer ns: ``rate_hz`` or the profile's ``control.rate_hz``."""
    rate = profile.control.rate_hz if rate_hz is None else rate_hz
    if isinstance(rate, bool) or not isinstance(rate, (int, float)) or not 1.0 <= rate <= 20_000.0:
        raise ProfileError(profile.source, "control.rate_hz", rate, "a rate 1..20000 Hz")
    return int(round(1e9 / rate))


def _metadata(profile: Profile, schedule: Schedule, backend: str, *, tsr: float,
              duration_s: float, period_ns: int, lead: LeadModel, density_kg_m3: float,
              options: RealtimeOptions | None, policy: OverrunPolicy, label: str,
              extra: dict[str, Any]) -> dict[str, Any]:
    meta = {
        "label": label, "backend": backend, "profile_name": profile.name,
        "profile_source": profile.source, "profile_text": profile.text,
        "schedule_source": schedule.source, "schedule_text": schedule.text,
        "tsr_setpoint": tsr, "duration_s": duration_s, "rate_hz": 1e9 / period_ns,
        "lead": lead.describe(), "density_kg_m3": density_kg_m3,
        "realtime_options": json.dumps(asdict(options) if options is not None else None),
        "overrun_policy": json.dumps(asdict(policy)),
        "command_line": " ".join(sys.argv),
    }
    meta.update(extra)
    return meta


def _pin_writer_away(runlog: ProcessRunLog | None, options: RealtimeOptions | None) -> None:
    """Keep the writer process off the loop's CPU when the loop is pinned."""
    if runlog is None or options is None or options.cpu is None or runlog.writer_pid is None:
        return
    try:
        others = os.sched_getaffinity(0) - {options.cpu}
        if others:
            os.sched_setaffinity(runlog.writer_pid, others)
    except (OSError, AttributeError) as exc:
        log.info("could not move the run log writer off cpu %d (%s)", options.cpu, exc)


def _execute(profile: Profile, schedule: Schedule, ports: RigPorts, clock: RealtimeClock, *,
             tsr: float, duration_s: float, out: str | Path | None, density_kg_m3: float,
             lead: LeadModel, options: RealtimeOptions | None, policy: OverrunPolicy,
             meta: dict[str, Any], settle_flow_m_s: float, settle_s: float,
             progress: Callable[[float], None] | None, chunk_rows: int | None,
             listeners: tuple[Callable, ...], close_ports: bool, rig: object,
             attach=None, start: bool = True) -> RealtimeOutcome:
    runlog = None
    ctl = None
    detach = None
    interrupted = False
    try:
        if out is not None:
            runlog = ProcessRunLog(out, profile.blades, meta, chunk_rows=chunk_rows or 250)
            _pin_writer_away(runlog, options)
        ctl = Controller(profile, schedule, ports, clock, tsr=tsr, density_kg_m3=density_kg_m3,
                         lead=lead, runlog=runlog, listeners=listeners)
        detach = attach(ctl) if attach is not None else None
        try:
            ctl.run_for(duration_s, progress=progress, start=start)
        except KeyboardInterrupt:
            interrupted = True
            ctl.supervisor.trip(ctl.t_s, "operator_interrupt", "Ctrl-C during the run")
            ports.safe()
        finally:
            if detach is not None:
                detach()
    except BaseException:
        _finish(ctl, ports, clock, runlog, profile, tsr, settle_flow_m_s, settle_s, False,
                close_ports, quiet=True)
        raise
    summary, stats, messages = _finish(ctl, ports, clock, runlog, profile, tsr, settle_flow_m_s,
                                       settle_s, interrupted, close_ports, quiet=False)
    return RealtimeOutcome(Path(out) if out is not None else None, summary, ctl.supervisor.state,
                           list(ctl.supervisor.trips), ctl, rig, clock_stats=stats,
                           realtime_messages=messages, interrupted=interrupted)


def _finish(ctl: Controller | None, ports: RigPorts, clock: RealtimeClock,
            runlog: ProcessRunLog | None, profile: Profile, tsr: float, flow_m_s: float,
            settle_s: float, interrupted: bool, close_ports: bool, quiet: bool):
    """Safe state, clock restored, summary written, log and ports closed -- in that order.

    With ``quiet`` (an exception is on its way out) every step is attempted and failures are
    logged instead of raised, so the original exception is the one the caller sees.
    """
    try:
        ports.safe()
    except Exception:  # the transport may be the thing that failed; closing still matters
        log.exception("commanding the safe state at the end of the run failed")
    clock.close()
    stats = clock.stats()
    messages = list(clock.messages)
    summary = None
    try:
        if ctl is not None:
            skip = settle_revolutions(profile, tsr, flow_m_s, settle_s)
            summary = ctl.summary(skip)
            if runlog is not None and not runlog.closed:
                t_s = ctl.t_s
                runlog.event(t_s, "clock", json.dumps(stats))
                if interrupted:
                    runlog.event(t_s, "interrupt", "run stopped by Ctrl-C")
                record = summary_dict(summary)
                record["clock"] = stats
                record["realtime_messages"] = messages
                record["realtime_restored"] = list(clock.restore_messages)
                record["interrupted"] = interrupted
                record["trips"] = [list(t) for t in ctl.supervisor.trips]
                runlog.set_summary(record)
    except FlapctlError:
        if not quiet:
            raise
        log.exception("writing the run summary failed")
    finally:
        try:
            if runlog is not None:
                runlog.close()
        except FlapctlError:
            if not quiet:
                raise
            log.exception("closing the run log failed")
        finally:
            if close_ports:
                ports.close()
    return summary, stats, messages


def run_realtime(profile: Profile, schedule: Schedule, ports: RigPorts, *, tsr: float,
                 duration_s: float, out: str | Path | None, density_kg_m3: float,
                 rate_hz: float | None = None, options: RealtimeOptions | None = None,
                 policy: OverrunPolicy | None = None, lead: LeadModel | None = None,
                 settle_s: float = 3.0, progress: Callable[[float], None] | None = None,
                 label: str = "", chunk_rows: int | None = None,
                 listeners: tuple[Callable, ...] = (), close_ports: bool = True,
                 attach=None, start: bool = True) -> RealtimeOutcome:
    """Run the controller on ``ports`` in real time for ``duration_s``; log to ``out``.

    ``density_kg_m3`` is the fluid density used for Cp; ``settle_s`` the start-up time left out
    of the summary (at the profile's design flow speed); ``chunk_rows`` the tick rows per batch
    handed to the writer process (default 250: one send of about 100 us per 250 ticks);
    ``listeners`` are called after every tick as ``listener(controller, sample)``; the ports are
    closed at the end unless ``close_ports`` is False.  Returns the outcome with the clock's
    statistics (late ticks, overruns, lateness quantiles), which are also written into the
    log's summary.
    """
    policy = policy if policy is not None else OverrunPolicy()
    period_ns = period_ns_for(profile, rate_hz)
    lead = lead if lead is not None else LeadModel.from_control(profile.control)
    clock = RealtimeClock(period_ns, policy=policy, options=options)
    meta = _metadata(profile, schedule, f"realtime:{type(ports).__name__}", tsr=tsr,
                     duration_s=duration_s, period_ns=period_ns, lead=lead,
                     density_kg_m3=density_kg_m3, options=options, policy=policy, label=label,
                     extra={})
    return _execute(profile, schedule, ports, clock, tsr=tsr, duration_s=duration_s, out=out,
                    density_kg_m3=density_kg_m3, lead=lead, options=options, policy=policy,
                    meta=meta, settle_flow_m_s=profile.fluid.design_speed_m_s, settle_s=settle_s,
                    progress=progress, chunk_rows=chunk_rows, listeners=listeners,
                    close_ports=close_ports, rig=ports, attach=attach, start=start)


def run_paced_sil(profile: Profile, schedule: Schedule, *, tsr: float, duration_s: float,
                  out: str | Path | None, flow_m_s: float | None = None,
                  rate_hz: float | None = None, options: RealtimeOptions | None = None,
                  policy: OverrunPolicy | None = None, lead: LeadModel | None = None,
                  seed: int | None = None, settle_s: float = 3.0,
                  progress: Callable[[float], None] | None = None, label: str = "",
                  chunk_rows: int | None = None,
                  listeners: tuple[Callable, ...] = (), attach=None,
                  start: bool = True) -> RealtimeOutcome:
    """The in-process SIL rig paced by the real-time clock (stepped by dt before each tick).

    Default policy: count and warn, never trip (the model's long steps are not the loop's fault).
    """
    policy = policy if policy is not None else OverrunPolicy(trip_after_consecutive=None)
    period_ns = period_ns_for(profile, rate_hz)
    u = profile.fluid.design_speed_m_s if flow_m_s is None else flow_m_s
    rig = backend_class("sim", profile.source).for_profile(profile, period_ns * 1e-9, flow_m_s=u,
                                                           tsr=tsr, seed=seed)
    fluid = rig.fluid
    lead = lead if lead is not None else LeadModel.from_control(profile.control)
    clock = RealtimeClock(period_ns, policy=policy, options=options, plant_step=rig.step)
    meta = _metadata(profile, schedule, "sim-paced", tsr=tsr, duration_s=duration_s,
                     period_ns=period_ns, lead=lead, density_kg_m3=fluid.density_kg_m3,
                     options=options, policy=policy, label=label,
                     extra={"flow_setpoint_m_s": u,
                            "seed": profile.sim.seed if seed is None else seed,
                            "kinematic_viscosity_m2_s": fluid.kinematic_viscosity_m2_s})
    return _execute(profile, schedule, rig, clock, tsr=tsr, duration_s=duration_s, out=out,
                    density_kg_m3=fluid.density_kg_m3, lead=lead, options=options, policy=policy,
                    meta=meta, settle_flow_m_s=u, settle_s=settle_s, progress=progress,
                    chunk_rows=chunk_rows, listeners=listeners, close_ports=True, rig=rig,
                    attach=attach, start=start)
