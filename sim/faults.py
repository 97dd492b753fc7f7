"""Scripted faults for the SIL rig, from a scenario file (TOML).

A scenario lists faults, each starting at a time (``at_s``) or at a revolution of the rotor
(``at_revolution``), lasting ``duration_s`` (default: to the end of the run)::

    schema_version = 1
    name = "jammed flap on blade 1"

    [[fault]]
    kind = "servo_jam"
    at_s = 6.0
    blade = 1

Kinds and their own keys:

=================== =========================================================================
frame_loss          ``percent``: each bus frame (set-point or telemetry) lost with this chance
bus_outage          every bus frame lost (servos fall back to their own watchdog)
latency_spike       servo telemetry arrives ``latency_s`` late (stale readings)
encoder_glitch      the encoder counter jumps by ``counts``
lost_index          index pulses are not seen
servo_jam           ``blade``: the flap stops moving
flow_surge          the mean flow speed is multiplied by ``factor``
sensor_nan          ``sensor`` ("torque" | "flow") reads NaN
sensor_saturation   ``sensor`` reads its full range
brake_failure       the brake gives no torque
=================== =========================================================================
"""
from __future__ import annotations

import math
import random
from dataclasses import dataclass
from pathlib import Path

from flapctl.errors import ProfileError
from flapctl.schema import choice, load_section, num, read_toml, text

__all__ = ["KINDS", "Fault", "Scenario", "load_scenario", "parse_scenario", "FaultInjector"]

KINDS = {
    "frame_loss": {"percent"},
    "bus_outage": set(),
    "latency_spike": {"latency_s"},
    "encoder_glitch": {"counts"},
    "lost_index": set(),
    "servo_jam": {"blade"},
    "flow_surge": {"factor"},
    "sensor_nan": {"sensor"},
    "sensor_saturation": {"sensor"},
    "brake_failure": set(),
}
_OPTIONAL = {"at_s", "at_revolution", "duration_s", "kind"}


@dataclass(frozen=True, kw_only=True)
class Fault:
    kind: str = choice(*KINDS)
    at_s: float | None = num(0.0, 1e7, default=None)
    at_revolution: int | None = num(0, 10**9, default=None)
    duration_s: float | None = num(0.0, 1e7, lo_open=True, default=None)
    percent: float | None = num(0.0, 100.0, lo_open=True, default=None)
    latency_s: float | None = num(0.0, 60.0, lo_open=True, default=None)
    counts: int | None = num(-(1 << 30), 1 << 30, default=None)
    blade: int | None = num(0, 11, default=None)
    factor: float | None = num(0.0, 20.0, lo_open=True, default=None)
    sensor: str | None = choice("torque", "flow", default=None)

    def _validate(self, source: str, prefix: str) -> None:
        if (self.at_s is None) == (self.at_revolution is None):
            raise ProfileError(source, f"{prefix}.at_s", self.at_s,
                               "exactly one of at_s or at_revolution")
        needed = KINDS[self.kind]
        for key in ("percent", "latency_s", "counts", "blade", "factor", "sensor"):
            value = getattr(self, key)
            if key in needed and value is None:
                raise ProfileError(source, f"{prefix}.{key}", "<missing>",
                                   f"a value: fault kind {self.kind!r} needs {', '.join(sorted(needed))}")
            if key not in needed and value is not None:
                raise ProfileError(source, f"{prefix}.{key}", value,
                                   f"no such key for fault kind {self.kind!r}"
                                   + (f" (it takes {', '.join(sorted(needed))})" if needed else ""))
        if self.kind == "encoder_glitch" and self.counts == 0:
            raise ProfileError(source, f"{prefix}.counts", 0, "a non-zero count jump")


@dataclass(frozen=True, kw_only=True)
class Scenario:
    schema_version: int = num(1, 1)
    name: str = text()
    description: str = text(default="", nonempty=False)
    seed: int = num(0, 2**31 - 1, default=7)
    fault: tuple[Fault, ...] = ()

    def _validate(self, source: str, prefix: str) -> None:
        if not self.fault:
            raise ProfileError(source, "fault", "<missing>", "at least one [[fault]] entry")


def parse_scenario(data: dict, source: str = "<memory>", blades: int | None = None) -> Scenario:
    if "schema_version" not in data:
        raise ProfileError(source, "schema_version", "<missing>", "schema_version = 1")
    sc = load_section(Scenario, data, source)
    if blades is not None:
        for i, f in enumerate(sc.fault):
            if f.blade is not None and f.blade >= blades:
                raise ProfileError(source, f"fault[{i}].blade", f.blade, f"a blade index 0..{blades - 1}")
    return sc


def load_scenario(path: str | Path, blades: int | None = None) -> Scenario:
    data, _raw = read_toml(path)
    return parse_scenario(data, str(path), blades)


class FaultInjector:
    """Switches the scenario's faults on and off in a VirtualRig as time and revolutions pass.

    The rig asks ``drop_command()`` / ``drop_telemetry()`` per frame and ``stale_telemetry`` per
    tick; the rest acts on the rig's models directly (servo jam, encoder, flow, brake, sensors).
    ``started`` records (t_s, kind) as each fault begins, so tests can measure detection times.
    """

    def __init__(self, scenario: Scenario) -> None:
        self.scenario = scenario
        self._rng = random.Random(scenario.seed)
        self._active: list[tuple[Fault, float]] = []
        self._pending = list(scenario.fault)
        self.started: list[tuple[float, str]] = []
        self.frame_loss = 0.0
        self.outage = False
        self.latency_s = 0.0
        self.sensor_override: dict[str, float] = {}

    def drop_command(self) -> bool:
        return self.outage or (self.frame_loss > 0.0 and self._rng.random() < self.frame_loss)

    def drop_telemetry(self) -> bool:
        return self.drop_command()

    def _due(self, f: Fault, t_s: float, revolutions: int) -> bool:
        return t_s >= f.at_s if f.at_s is not None else revolutions >= f.at_revolution

    def update(self, rig, t_s: float, revolutions: int) -> None:
        """Start and end faults; called by the rig once per step."""
        for f in list(self._pending):
            if self._due(f, t_s, revolutions):
                self._pending.remove(f)
                self._start(rig, f, t_s)
        for f, t0 in list(self._active):
            if f.duration_s is not None and t_s >= t0 + f.duration_s:
                self._active.remove((f, t0))
                self._end(rig, f)

    def _start(self, rig, f: Fault, t_s: float) -> None:
        self.started.append((t_s, f.kind))
        self._active.append((f, t_s))
        k = f.kind
        if k == "frame_loss":
            self.frame_loss = f.percent / 100.0
        elif k == "bus_outage":
            self.outage = True
        elif k == "latency_spike":
            self.latency_s = f.latency_s
        elif k == "encoder_glitch":
            rig.encoder.inject_glitch(f.counts)
        elif k == "lost_index":
            rig.encoder.suppress_index(True)
        elif k == "servo_jam":
            rig.servos[f.blade].jammed = True
        elif k == "flow_surge":
            rig.flow.mean_m_s = rig.flow.mean_m_s * f.factor
        elif k == "sensor_nan":
            self.sensor_override[f.sensor] = math.nan
        elif k == "sensor_saturation":
            rng = rig.profile.sensors
            self.sensor_override[f.sensor] = (rng.torque.range_nm if f.sensor == "torque"
                                              else rng.flow.range_m_s)
        elif k == "brake_failure":
            rig.brake.failed = True

    def _end(self, rig, f: Fault) -> None:
        k = f.kind
        if k == "frame_loss":
            self.frame_loss = 0.0
        elif k == "bus_outage":
            self.outage = False
        elif k == "latency_spike":
            self.latency_s = 0.0
        elif k == "lost_index":
            rig.encoder.suppress_index(False)
        elif k == "servo_jam":
            rig.servos[f.blade].jammed = False
        elif k == "flow_surge":
            rig.flow.mean_m_s = rig.flow.mean_m_s / f.factor
        elif k in ("sensor_nan", "sensor_saturation"):
            self.sensor_override.pop(f.sensor, None)
        elif k == "brake_failure":
            rig.brake.failed = False
