"""CanServoEmulator: the servos and the I/O box of a CAN rig, answering on a python-can bus.

It reads the same ``[bus.options]`` frame layouts as :class:`flapctl.ports.can.CanPorts` and uses
the SIL rig (:class:`sim.rig.VirtualRig`) for the physics.  One :meth:`~CanServoEmulator.step`:

1. drain the bus: the newest set-point of each servo, the newest brake command, heartbeats;
2. watchdog: without a heartbeat for ``heartbeat_frame.watchdog_ms`` (and before the first one)
   the servos command neutral and the brake drive its holding torque (``brake.hold_torque_nm``);
   set-points received meanwhile are ignored; the next heartbeat ends the safe state;
3. advance the rig by one period;
4. reply: one telemetry frame per servo and every I/O frame, from the rig's state.

Values the frames cannot carry saturate at the layout's range, as an ADC or a servo's own
encoder would; counters wrap at the field width.  Lockstep: pass :meth:`step` as the
:class:`flapctl.clock.VirtualClock`'s plant step.  As a process, paced in real time::

    python -m sim.canservo --profile P --interface udp_multicast --channel 239.74.163.2 --port N

prints one ``ready`` line when the bus is open and one JSON summary line when it stops (after
``--duration-s`` or on SIGTERM / SIGINT).
"""
from __future__ import annotations

import argparse
import json
import logging
import math
import signal
import sys
import time
from collections.abc import Sequence

import can

from flapctl.errors import FlapctlError
from flapctl.ports.can import CanConfig, load_can_config, open_bus
from flapctl.ports.canframe import FrameLayout
from flapctl.profile import Profile, load_profile

from .rig import VirtualRig

__all__ = ["CanServoEmulator", "build_rig", "run_paced", "build_parser", "main"]

log = logging.getLogger(__name__)
_EXTENDED_FLAG = 1 << 29


def _key(layout: FrameLayout) -> int:
    return layout.arbitration_id | (_EXTENDED_FLAG if layout.extended_id else 0)


def build_rig(profile: Profile, *, flow_m_s: float | None = None, tsr: float | None = None,
              seed: int | None = None) -> VirtualRig:
    """The SIL rig at one operating point: flow (m/s, default the design speed) and initial TSR."""
    period_ns = int(round(1e9 / profile.control.rate_hz))
    return VirtualRig.for_profile(profile, period_ns * 1e-9, flow_m_s=flow_m_s, tsr=tsr, seed=seed)


class _Encoder:
    """Precompiled reply of one frame: which value goes to each signal, saturated or wrapped."""

    def __init__(self, layout: FrameLayout) -> None:
        self.layout = layout
        self.ranges = []
        for s in layout.signals:
            lo, hi = s.physical_range
            self.ranges.append((lo, hi, (1 << s.width_bits) if s.name in ("counts", "index_latch",
                                                                          "index_events") else 0))
        self.values = [0.0] * len(layout.signals)

    def encode(self, values: Sequence[float]) -> bytes:
        out = self.values
        for k, value in enumerate(values):
            lo, hi, modulus = self.ranges[k]
            if modulus:
                value = int(value) % modulus
            elif not value >= lo:          # NaN saturates low, like a dead sensor
                value = lo
            elif value > hi:
                value = hi
            out[k] = value
        return self.layout.encode(out)


class CanServoEmulator:
    """Servos and I/O box on a python-can bus, with the SIL rig for physics.

    ``interface``, ``channel`` and ``port`` override the profile's bus options.  The first
    telemetry and I/O frames go out on construction, so a controller already on the bus has data
    at its first read.  Attributes for
    tests and reports: ``safe`` (watchdog state), ``watchdog_trips``, ``heartbeats``,
    ``setpoints_received``, ``flap_command_deg`` (the set-points applied), ``brake_command_nm``.
    """

    def __init__(self, profile: Profile, rig: VirtualRig, *, interface: str | None = None,
                 channel: str | None = None, port: int | None = None) -> None:
        self.profile = profile
        self.rig = rig
        self.config: CanConfig = load_can_config(profile)
        c = self.config
        n = profile.blades
        self.dt_s = rig.dt
        self._hold_nm = profile.brake.hold_torque_nm
        self._setpoint_slot = {_key(f): k for k, f in enumerate(c.setpoints)}
        self._setpoint_data: list[bytes | bytearray | None] = [None] * len(c.setpoints)
        self._brake_key = _key(c.brake) if c.brake is not None else -1
        self._brake_data: bytes | bytearray | None = None
        self._heartbeat_key = _key(c.heartbeat)
        self._telemetry = [_Encoder(f) for f in c.telemetry]
        self._io = [_Encoder(f) for f in c.io]
        self._send_timeout_s = c.options.send_timeout_ms * 1e-3
        self.flap_command_deg = [0.0] * n
        self.brake_command_nm = self._hold_nm
        self.safe = True
        self.watchdog_trips = 0
        self.heartbeats = 0
        self.setpoints_received = 0
        self.steps = 0
        self._last_heartbeat_s: float | None = None
        self._closed = False
        self.bus = open_bus(c.options, interface=interface, channel=channel, port=port)
        self.reply()                  # like a node booting: state is on the bus before the first tick

    # -- one period ----------------------------------------------------------------------------
    def step(self, dt_s: float | None = None) -> None:
        """Receive, advance the rig by ``dt_s`` (default: the rig's period), reply."""
        self.receive()
        self.rig.step(self.dt_s if dt_s is None else dt_s)
        self.steps += 1
        self.reply()

    def receive(self) -> None:
        """Drain the bus, run the watchdog, apply the newest set-points and brake command."""
        recv = self.bus.recv
        got_setpoint = False
        for _ in range(self.config.options.max_frames_per_read):
            msg = recv(0.0)
            if msg is None:
                break
            if msg.is_error_frame or msg.is_remote_frame:
                continue
            key = msg.arbitration_id | (_EXTENDED_FLAG if msg.is_extended_id else 0)
            slot = self._setpoint_slot.get(key)
            if slot is not None:
                self._setpoint_data[slot] = msg.data
                self.setpoints_received += 1
                got_setpoint = True
            elif key == self._heartbeat_key:
                self.heartbeats += 1
                self._last_heartbeat_s = self.rig.t_s
            elif key == self._brake_key:
                self._brake_data = msg.data
        self._watchdog()
        if self.safe:
            return
        if got_setpoint:
            self._apply_setpoints()
        if self._brake_data is not None:
            c = self.config
            command = c.brake.decode(self._brake_data)["command"]
            self.brake_command_nm = (command - c.brake_offset) / c.brake_per_nm
            self.rig.command_brake(self.brake_command_nm)
            self._brake_data = None

    def _apply_setpoints(self) -> None:
        c = self.config
        decoded = [f.decode(d) if d is not None else None for f, d in zip(c.setpoints, self._setpoint_data)]
        cmd = self.flap_command_deg
        for i, (frame_index, position) in enumerate(c.setpoint_slots):
            values = decoded[frame_index]
            if values is not None:
                cmd[i] = values[c.setpoints[frame_index].names[position]]
        self._setpoint_data = [None] * len(c.setpoints)
        self.rig.command_flaps(cmd)

    def _watchdog(self) -> None:
        last = self._last_heartbeat_s
        alive = last is not None and self.rig.t_s - last <= self.config.watchdog_s + 1e-9
        if alive and self.safe:
            self.safe = False
            log.info("heartbeat present at t = %.3f s: servos follow set-points", self.rig.t_s)
        elif not alive and not self.safe:
            self.safe = True
            self.watchdog_trips += 1
            log.warning("no heartbeat for %.1f ms at t = %.3f s: servos and brake go safe",
                        (self.rig.t_s - last) * 1e3, self.rig.t_s)
        if self.safe:
            self._setpoint_data = [None] * len(self.config.setpoints)
            self._brake_data = None
            cmd = self.flap_command_deg
            for i in range(len(cmd)):
                cmd[i] = 0.0
            self.rig.command_flaps(cmd)
            if self.config.brake is not None:
                self.brake_command_nm = self._hold_nm
                self.rig.command_brake(self._hold_nm)

    def reply(self) -> None:
        """Send one telemetry frame per servo and every I/O frame."""
        rig = self.rig
        for i, enc in enumerate(self._telemetry):
            servo = rig.servos[i]
            values = [servo.angle_deg if name == "angle_deg" else
                      (servo.current_a if name == "current_a" else servo.voltage_v)
                      for name in enc.layout.names]
            self._send(enc.layout, enc.encode(values))
        if self._io:
            s = rig.read()
            source = {"counts": s.counts, "index_latch": s.index_latch or 0,
                      "index_events": s.index_events, "torque_nm": s.torque_nm,
                      "flow_m_s": s.flow_m_s, "thrust_n": s.thrust_n}
            for enc in self._io:
                self._send(enc.layout, enc.encode([source[name] for name in enc.layout.names]))

    def _send(self, layout: FrameLayout, data: bytes) -> None:
        msg = can.Message(arbitration_id=layout.arbitration_id, is_extended_id=layout.extended_id,
                          data=data, check=True)
        self.bus.send(msg, timeout=self._send_timeout_s)

    # -- lifecycle ------------------------------------------------------------------------------
    def close(self) -> None:
        """Shut the bus down (idempotent)."""
        if self._closed:
            return
        self._closed = True
        self.bus.shutdown()

    def __enter__(self) -> "CanServoEmulator":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def summary(self) -> dict:
        """Counters of the run so far (JSON-friendly)."""
        return {"steps": self.steps, "t_s": self.rig.t_s, "heartbeats": self.heartbeats,
                "setpoints_received": self.setpoints_received, "watchdog_trips": self.watchdog_trips,
                "safe": self.safe, "flap_deg": [s.angle_deg for s in self.rig.servos],
                "flap_command_deg": list(self.flap_command_deg)}


# ----------------------------------------------------------------------------------- process

def run_paced(emulator: CanServoEmulator, duration_s: float | None, stop: list[bool]) -> dict:
    """Step in real time at the rig's period (absolute deadlines) until ``duration_s`` or stop.

    Late steps are counted; a step more than 5 periods late skips ahead (the rig's time stays
    one period per step, so it then falls behind the wall clock, which is counted too).
    """
    period_ns = int(round(emulator.dt_s * 1e9))
    steps = None if duration_s is None else int(math.ceil(duration_s / emulator.dt_s))
    late = skipped = 0
    worst_late_ns = 0
    start = time.monotonic_ns()
    due = start
    k = 0
    while not stop[0] and (steps is None or k < steps):
        now = time.monotonic_ns()
        if now < due:
            time.sleep((due - now) * 1e-9)
            now = time.monotonic_ns()
        lateness = now - due
        if lateness > period_ns:
            late += 1
            worst_late_ns = max(worst_late_ns, lateness)
            if lateness > 5 * period_ns:
                skipped += lateness // period_ns
                due = now
        emulator.step()
        due += period_ns
        k += 1
    out = emulator.summary()
    out.update({"late_steps": late, "skipped_periods": skipped, "worst_late_ms": worst_late_ns * 1e-6,
                "wall_s": (time.monotonic_ns() - start) * 1e-9})
    return out


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m sim.canservo",
                                description="Servos and I/O box of a CAN rig, on the SIL rig's physics, "
                                            "paced in real time.")
    p.add_argument("--profile", required=True, help="rig profile with [bus] backend = \"can\"")
    p.add_argument("--interface", help="python-can interface (default: the profile's)")
    p.add_argument("--channel", help="python-can channel (default: the profile's)")
    p.add_argument("--port", type=int, help="UDP port for udp_multicast (default: the profile's)")
    p.add_argument("--duration-s", type=float, help="stop after this long (default: until a signal)")
    p.add_argument("--flow-m-s", type=float, help="free-stream speed (default: fluid.design_speed_m_s)")
    p.add_argument("--tsr", type=float, help="initial tip speed ratio (default: fluid.design_tsr)")
    p.add_argument("--seed", type=int, help="random seed (default: sim.seed)")
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
    stop = [False]

    def _stop(signum: int, frame: object) -> None:
        stop[0] = True

    signal.signal(signal.SIGTERM, _stop)
    signal.signal(signal.SIGINT, _stop)
    try:
        profile = load_profile(args.profile)
        rig = build_rig(profile, flow_m_s=args.flow_m_s, tsr=args.tsr, seed=args.seed)
        with CanServoEmulator(profile, rig, interface=args.interface, channel=args.channel,
                              port=args.port) as emulator:
            print(f"ready {profile.name} dt={emulator.dt_s:g}s", flush=True)
            summary = run_paced(emulator, args.duration_s, stop)
        rig.close()
    except (FlapctlError, can.CanError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    print(json.dumps(summary), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
