"""CAN virtual-bus round trip per tick: what the CAN backend and the servo emulator cost here.

Prints, in microseconds (median and 99th percentile over ``--ticks`` ticks):

* round trip: ``CanPorts.command_flaps`` + ``heartbeat`` -> emulator receive -> emulator reply
  (3 telemetry + 2 I/O frames) -> ``CanPorts.read`` decoding them; the rig's physics excluded;
* the controller's side alone: ``read`` + ``command_flaps`` + ``heartbeat``;
* one whole lockstep tick: ``Controller.run_once`` + emulator step with the SIL rig's physics.

Run: ``python bench/bench_can.py [--profile P] [--ticks N]``.  Figures are printed, never asserted.
"""
from __future__ import annotations

import argparse
import statistics
import sys
import time
import uuid
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from flapctl.clock import VirtualClock  # noqa: E402
from flapctl.fluid import fluid_properties  # noqa: E402
from flapctl.ports.can import CanPorts  # noqa: E402
from flapctl.profile import load_profile  # noqa: E402
from flapctl.schedule import Schedule  # noqa: E402
from flapctl.scheduler import Controller  # noqa: E402
from sim.canservo import CanServoEmulator, build_rig  # noqa: E402


def _figures(label: str, samples_ns: list[int]) -> str:
    us = sorted(x * 1e-3 for x in samples_ns)
    p99 = us[min(len(us) - 1, int(0.99 * len(us)))]
    return f"{label:<52} median {statistics.median(us):7.1f} us   p99 {p99:7.1f} us   (n = {len(us)})"


def bench_round_trip(profile, ticks: int) -> tuple[list[int], list[int]]:
    channel = f"flapctl-bench-{uuid.uuid4().hex}"
    rig = build_rig(profile)
    ports = CanPorts(profile, channel=channel)
    emulator = CanServoEmulator(profile, rig, channel=channel)
    cmd = [1.0, -2.0, 3.0]
    round_trip, ports_side = [], []
    pc = time.perf_counter_ns
    try:
        for k in range(ticks):
            cmd[0] = (k % 200) * 0.05
            t0 = pc()
            ports.command_flaps(cmd)
            ports.heartbeat()
            t1 = pc()
            emulator.receive()
            emulator.reply()
            t2 = pc()
            ports.read()
            t3 = pc()
            round_trip.append(t3 - t0)
            ports_side.append((t1 - t0) + (t3 - t2))
    finally:
        ports.close()
        emulator.close()
        rig.close()
    return round_trip, ports_side


def bench_lockstep(profile, schedule, ticks: int) -> list[int]:
    channel = f"flapctl-bench-{uuid.uuid4().hex}"
    rig = build_rig(profile)
    clock = VirtualClock(int(round(1e9 / profile.control.rate_hz)), lambda dt: None)
    ports = CanPorts(profile, clock=clock, channel=channel)
    emulator = CanServoEmulator(profile, rig, channel=channel)
    ctl = Controller(profile, schedule, ports, clock, tsr=profile.fluid.design_tsr,
                     density_kg_m3=fluid_properties(profile.fluid.medium, profile.fluid.temperature_c,
                                                    profile.fluid.pressure_pa).density_kg_m3)
    out = []
    pc = time.perf_counter_ns
    try:
        clock.start()
        ctl.command("arm")
        ctl.command("start")
        for _ in range(ticks):
            t0 = pc()
            ctl.run_once()
            emulator.step()
            out.append(pc() - t0)
            clock.wait()
    finally:
        ports.close()
        emulator.close()
        rig.close()
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--profile", default=str(ROOT / "hw_profiles" / "demo_flume_can.toml"))
    parser.add_argument("--schedule", default=str(ROOT / "hw_profiles" / "schedules" / "demo_morph.toml"))
    parser.add_argument("--ticks", type=int, default=5000)
    args = parser.parse_args(argv)
    profile = load_profile(args.profile)
    schedule = Schedule.load(args.schedule, profile.blades)
    round_trip, ports_side = bench_round_trip(profile, args.ticks)
    lockstep = bench_lockstep(profile, schedule, min(args.ticks, 2000))
    print(f"profile {profile.name}: {len(profile.bus.options['setpoint_frames'])} set-point frame(s), "
          f"{len(profile.bus.options['telemetry_frames'])} telemetry, "
          f"{len(profile.bus.options.get('io_frames', ()))} io frame(s), python-can virtual bus")
    print(_figures("round trip per tick (no physics)", round_trip))
    print(_figures("controller side: read + command_flaps + heartbeat", ports_side))
    print(_figures("lockstep tick: Controller.run_once + emulator step", lockstep))
    return 0


if __name__ == "__main__":
    sys.exit(main())
