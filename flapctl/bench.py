"""``flapctl bench``: what one controller tick costs on this PC, and how fast lockstep SIL runs.

Uses the same code as ``flapctl run``: the real Controller against the SIL rig's ports.
(a) tick cost: ``Controller.run_once`` alone (read, estimate, lead, lookup, limits, command,
brake loop, ledger, log row), timed with ``perf_counter_ns`` around each call while the SIL rig
steps between ticks -- so caches are as warm as in lockstep, not as cold as in a paced loop;
(b) the lockstep real-time factor: simulated seconds per wall-clock second of a whole run,
rig physics included, without the HDF5 log.
"""
from __future__ import annotations

import statistics
import time

from .clock import VirtualClock
from .ports import backend_class
from .profile import Profile
from .scheduler import Controller

__all__ = ["run_bench", "tick_costs"]


def _build(profile: Profile, schedule, rate_hz: float):
    period_ns = int(round(1e9 / rate_hz))
    rig = backend_class("sim").for_profile(profile, period_ns * 1e-9)
    clock = VirtualClock(period_ns, rig.step)
    ctl = Controller(profile, schedule, rig, clock, tsr=profile.fluid.design_tsr,
                     density_kg_m3=rig.fluid.density_kg_m3)
    return rig, clock, ctl


def tick_costs(profile: Profile, schedule, rate_hz: float, ticks: int) -> list[float]:
    """Per-tick controller cost in microseconds (the rig's physics step excluded)."""
    rig, clock, ctl = _build(profile, schedule, rate_hz)
    clock.start()
    ctl.command("arm")
    ctl.command("start")
    costs = []
    pc = time.perf_counter_ns
    for _ in range(ticks):
        t0 = pc()
        ctl.run_once()
        costs.append((pc() - t0) * 1e-3)
        clock.wait()
    rig.close()
    return costs


def _pct(values: list[float], q: float) -> float:
    s = sorted(values)
    return s[min(len(s) - 1, int(q * len(s)))]


def run_bench(profile: Profile, schedule, rate_hz: float = 1000.0, seconds: float = 60.0) -> str:
    ticks = int(rate_hz * min(seconds, 10.0))
    costs = tick_costs(profile, schedule, rate_hz, ticks)
    rig, clock, ctl = _build(profile, schedule, rate_hz)
    t0 = time.perf_counter()
    ctl.run_for(seconds)
    wall = time.perf_counter() - t0
    rig.close()
    rtf = seconds / wall
    lines = [
        f"flapctl bench: {profile.name}, {profile.blades} blades, {rate_hz:g} Hz, schedule {schedule.source}",
        f"(a) controller tick cost over {ticks} ticks (lockstep, SIL ports): "
        f"median {statistics.median(costs):.2f} us, p99 {_pct(costs, 0.99):.2f} us, max {max(costs):.1f} us",
        f"(b) lockstep SIL, {seconds:g} s simulated at {rate_hz:g} Hz: wall {wall:.2f} s, "
        f"real-time factor {rtf:.1f}x (per tick {wall / (seconds * rate_hz) * 1e6:.1f} us incl. physics)",
    ]
    budget_us = 1e6 / rate_hz
    med = statistics.median(costs)
    verdict = ("OK: the tick uses {:.0%} of its period".format(med / budget_us) if med < 0.3 * budget_us
               else "MARGINAL: the tick uses {:.0%} of its period; lower the rate".format(med / budget_us))
    lines.append(f"verdict: {verdict}")
    return "\n".join(lines)
