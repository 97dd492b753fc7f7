"""The real-time bench: can this PC run the controller at a given rate?

Runs the code of a real-time run (``run_realtime``: the Controller, the RealtimeClock with the
requested real-time options, the writer-process run log to a temporary file) for ``seconds``
and reports, as plain figures:

* tick cost: from the clock's wake-up to the end of ``Controller.run_once`` (read, estimate,
  lead, look-up, limits, command, brake, ledger, log hand-off), measured inside the paced loop,
  so caches are as cold as they will be on the rig;
* wake-up lateness: p50, p99, p99.9, max;
* late ticks (more than half a period late) and overruns (more than one period late);
* a verdict: "holds N Hz" when at most 0.1 % of the ticks were late, no run of overruns reached
  the default trip limit (:class:`~flapctl.rtclock.OverrunPolicy`) and the p99 tick cost is
  within half a period (isolated overruns, e.g. virtual-machine stalls, are counted in the
  verdict, not hidden); "does not hold N Hz" otherwise, with the reasons.

The rotor seen by the controller is a recording: the SIL rig is first run in lockstep with the
same controller, and the paced run replays the samples it read (:class:`RecordedRig`).  The
controller is deterministic given its samples, so it issues the same commands, while the
model's own cost (which runs on the rig in water, not on the rig PC) stays out of the figures;
the model's step cost is reported separately for paced SIL.
"""
from __future__ import annotations

import logging
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path

from .clock import VirtualClock
from .ports import backend_class
from .ports.base import RigPorts, Sample
from .profile import Profile
from .rtclock import NsHistogram, OverrunPolicy, RealtimeOptions
from .rtrun import period_ns_for, run_realtime
from .schedule import Schedule
from .scheduler import Controller

__all__ = ["RecordedRig", "record_sil", "rt_bench"]

log = logging.getLogger(__name__)


class RecordedRig(RigPorts):
    """Ports that replay recorded samples, one per ``read()``; commands are kept, not acted on.

    After the last recorded sample the last one is repeated.  ``samples`` holds the recording,
    ``flap_cmd_deg`` / ``brake_cmd_nm`` the latest commands and ``commands`` counts flap commands.
    """

    def __init__(self, samples: Sequence[Sample], brake_hold_nm: float,
                 reports_servo_power: bool = False) -> None:
        if not samples:
            raise ValueError("RecordedRig needs at least one recorded sample")
        blades = len(samples[0].flap_deg)
        super().__init__(blades, brake_hold_nm)
        self.reports_servo_power = reports_servo_power
        self.samples = list(samples)
        self._k = 0
        self._sample = Sample(blades)
        self.flap_cmd_deg = [0.0] * blades
        self.brake_cmd_nm = 0.0
        self.commands = 0

    def read(self) -> Sample:
        src = self.samples[self._k]
        if self._k < len(self.samples) - 1:
            self._k += 1
        self._sample.copy_from(src)
        return self._sample

    def command_flaps(self, flap_deg: Sequence[float]) -> None:
        cmd = self.flap_cmd_deg
        for i in range(self.blades):
            cmd[i] = flap_deg[i]
        self.commands += 1

    def command_brake(self, torque_nm: float) -> None:
        self.brake_cmd_nm = torque_nm

    def _release(self) -> None:
        """Nothing to release: the recording stays readable."""


def record_sil(profile: Profile, schedule: Schedule, *, rate_hz: float, seconds: float,
               tsr: float, seed: int | None = None) -> tuple[RecordedRig, NsHistogram, float]:
    """Run the SIL rig in lockstep with the controller; return (replay ports, model step cost
    histogram, fluid density)."""
    period_ns = period_ns_for(profile, rate_hz)
    rig = backend_class("sim", profile.source).for_profile(profile, period_ns * 1e-9, tsr=tsr,
                                                           seed=seed)
    fluid = rig.fluid
    step_cost = NsHistogram()
    clock_ns = time.perf_counter_ns

    def timed_step(dt_s: float) -> None:
        t0 = clock_ns()
        rig.step(dt_s)
        step_cost.add(clock_ns() - t0)

    samples: list[Sample] = []
    ctl = Controller(profile, schedule, rig, VirtualClock(period_ns, timed_step), tsr=tsr,
                     density_kg_m3=fluid.density_kg_m3,
                     listeners=(lambda _ctl, s: samples.append(s.copy()),))
    try:
        ctl.run_for(seconds + 2 * period_ns * 1e-9)
    finally:
        rig.close()
    return (RecordedRig(samples, rig.brake_hold_nm, rig.reports_servo_power), step_cost,
            fluid.density_kg_m3)


def _us(ns: float) -> str:
    return f"{ns * 1e-3:.1f} us"


def rt_bench(profile: Profile, schedule: Schedule, rate_hz: float, seconds: float,
             options: RealtimeOptions | None, *, tsr: float | None = None,
             seed: int | None = None, with_log: bool = True) -> str:
    """Measure the real-time loop at ``rate_hz`` for ``seconds``; return the report text."""
    tsr = profile.fluid.design_tsr if tsr is None else tsr
    period_ns = period_ns_for(profile, rate_hz)
    replay, step_cost, density = record_sil(profile, schedule, rate_hz=rate_hz, seconds=seconds,
                                            tsr=tsr, seed=seed)
    cost = NsHistogram()
    mono = time.monotonic_ns

    def tick_cost(ctl: Controller, _sample: Sample) -> None:
        cost.add(mono() - ctl.clock.wake_ns)

    with tempfile.TemporaryDirectory(prefix="flapctl-rtbench-") as tmp:
        out = Path(tmp) / "bench.h5" if with_log else None
        outcome = run_realtime(profile, schedule, replay, tsr=tsr, duration_s=seconds, out=out,
                               density_kg_m3=density, rate_hz=rate_hz, options=options,
                               policy=OverrunPolicy(trip_after_consecutive=None),
                               label="rt bench", listeners=(tick_cost,))
    st = outcome.clock_stats
    period_us = period_ns * 1e-3
    trip_after = OverrunPolicy().trip_after_consecutive
    reasons = []
    if st["late_pct"] > 0.1:
        reasons.append(f"{st['late_pct']:.2f} % late ticks")
    if trip_after is not None and st["max_consecutive_overruns"] >= trip_after:
        reasons.append(f"{st['max_consecutive_overruns']} overruns in a row would trip a run")
    if cost.quantile_ns(0.99) > period_ns // 2:
        reasons.append("p99 tick cost above half the period")
    if reasons:
        verdict = f"does not hold {rate_hz:g} Hz ({', '.join(reasons)})"
    elif st["overruns"]:
        verdict = (f"holds {rate_hz:g} Hz ({st['overruns']} overruns, longest run "
                   f"{st['max_consecutive_overruns']}, below the trip limit of {trip_after})")
    else:
        verdict = f"holds {rate_hz:g} Hz"
    lines = [
        f"real-time bench: {profile.name}, {profile.blades} blades, {rate_hz:g} Hz "
        f"(period {period_us:.0f} us), {seconds:g} s, {st['ticks']} ticks, "
        f"log {'to a writer process' if with_log else 'off'}",
        "real-time options: " + ("; ".join(outcome.realtime_messages) or "none"),
        f"tick cost (wake-up to end of tick, paced): median {_us(cost.quantile_ns(0.5))}, "
        f"p99 {_us(cost.quantile_ns(0.99))}, max {_us(cost.max_ns)}",
        f"wake-up lateness: p50 {st['lateness_p50_us']:.1f} us, "
        f"p99 {st['lateness_p99_us']:.1f} us, "
        f"p99.9 {st['lateness_p999_us']:.1f} us, max {st['lateness_max_us']:.1f} us "
        f"(spin margin {st['spin_margin_us']:.0f} us)",
        f"late ticks (> half period): {st['late']} ({st['late_pct']:.3f} %); overruns "
        f"(> one period): {st['overruns']}, longest run {st['max_consecutive_overruns']}",
        f"SIL model step (lockstep, counts for paced SIL only): median "
        f"{_us(step_cost.quantile_ns(0.5))}, p99 {_us(step_cost.quantile_ns(0.99))}, "
        f"max {_us(step_cost.max_ns)}",
        f"verdict: {verdict}",
    ]
    return "\n".join(lines)
