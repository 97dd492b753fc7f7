"""The SIL rig in its own process, behind the bridge protocol (docs/bridge-protocol.md).

    python -m sim.server --profile P [--bind tcp://127.0.0.1:PORT] [--mode lockstep|free]
                         [--rate HZ] [--seed N] [--flow M_S] [--tsr X]

A :class:`~sim.rig.VirtualRig` runs behind a ROUTER socket, exactly as a rig's I/O bridge would:

* lockstep: each ``step`` applies its set-points, advances the rig one period, answers ``readings``;
* free: the rig is paced in real time by absolute monotonic-ns deadlines (sleep, then spin the last
  ~100-200 us), sampled and published every period; the newest ``command`` is applied at each
  period.  The rig stands still until the first ``hello`` and then runs for good.  When a step
  starts more than one period late (a slow model step, a stalled machine) the deadline is
  re-anchored rather than caught up, so the plant's time (``t_s``) stretches instead of the
  controller receiving a burst; such periods and the time slipped are counted and reported.

The watchdog puts the rig in its safe state (flaps 0 deg, brake at the profile's hold torque) and
latches it until a new ``hello``; the time the model itself takes to step is not counted against
the controller (a real plant does not stall).  The server binds 127.0.0.1 by default (``tcp://127.0.0.1:*``
picks a free port), prints ``ready <endpoint>`` on stdout once listening, and shuts down cleanly
on SIGTERM / SIGINT (rig safe, socket closed, one summary line on stderr).
"""
from __future__ import annotations

import argparse
import ctypes
import logging
import signal
import sys
import time
from dataclasses import dataclass

import zmq

from flapctl.errors import FlapctlError
from flapctl.ports import bridgeproto as bp
from flapctl.profile import Profile, load_profile

from .rig import VirtualRig

__all__ = ["ServerStats", "BridgeServer", "build_rig", "main", "DEFAULT_BIND"]

log = logging.getLogger(__name__)
DEFAULT_BIND = "tcp://127.0.0.1:5790"
WATCHDOG_MIN_MS = 2.0
WATCHDOG_MAX_MS = 10_000.0
_IDLE_POLL_MS = 50          # how often an idle server looks at its stop flag
_RECV_MAX = 256             # messages handled per period at most (free mode)
_LOOPBACK = ("127.0.0.1", "localhost", "[::1]")


@dataclass
class ServerStats:
    """What happened, printed at exit."""
    steps: int = 0
    sessions: int = 0
    refused: int = 0
    bad_messages: int = 0
    watchdog_trips: int = 0
    late_periods: int = 0          # free mode: periods that started more than one period late
    slipped_ns: int = 0            # free mode: wall time the plant fell behind (deadline re-anchored)
    max_lateness_ns: int = 0


def build_rig(profile: Profile, period_ns: int, *, seed: int | None, flow_m_s: float | None,
              tsr: float | None) -> VirtualRig:
    """The SIL rig exactly as :func:`flapctl.runner.run_sil` builds it (same fluid, seed, start)."""
    return VirtualRig.for_profile(profile, period_ns * 1e-9, flow_m_s=flow_m_s, tsr=tsr, seed=seed)


class BridgeServer:
    """One VirtualRig behind a bound ROUTER socket; one controller session at a time."""

    def __init__(self, profile: Profile, rig: VirtualRig, *, bind: str, mode: str,
                 period_ns: int, context: zmq.Context | None = None) -> None:
        self.profile = profile
        self.rig = rig
        self.mode = mode
        self.period_ns = period_ns
        enc = profile.encoder
        self.shape = bp.RigShape(profile.blades, enc.counts_per_rev, enc.counter_bits)
        self.hold_nm = profile.brake.hold_torque_nm
        self.max_brake_nm = profile.brake.max_torque_nm
        self.travel = [s.travel_deg for s in profile.servos]
        self.neutral = [0.0] * profile.blades
        self.capabilities = [mode, "index"] + (["servo_power"] if rig.reports_servo_power else [])
        self.capabilities.append("thrust")
        self.readings = bp.ReadingsEncoder(profile.blades, thrust=True,
                                           servo_power=rig.reports_servo_power)
        self.stats = ServerStats()
        self.stop_requested = False
        # session state
        self.peer: bytes | None = None
        self.watchdog_ns = 0
        self.fed_ns = 0
        self.latched = False
        self.safe = True
        self.last_seq = -1
        self.last_heartbeat: int | None = None
        self.flaps = list(self.neutral)
        self.brake_nm = self.hold_nm
        self.running = False          # free mode: the rig has started to run in real time
        self.failed = False           # the rig model raised: it is not stepped again
        self._own_ctx = context is None
        self.ctx = zmq.Context() if context is None else context
        self.sock = self.ctx.socket(zmq.ROUTER)
        self.sock.setsockopt(zmq.LINGER, 100)
        self.sock.setsockopt(zmq.SNDHWM, 1000)
        self.sock.bind(bind)
        self.endpoint = self.sock.getsockopt_string(zmq.LAST_ENDPOINT)
        self._apply_safe()

    # -- session logic ------------------------------------------------------------------------
    def _apply_safe(self) -> None:
        self.safe = True
        self.flaps[:] = self.neutral
        self.brake_nm = self.hold_nm
        self.rig.command_flaps(self.flaps)
        self.rig.command_brake(self.brake_nm)

    def _send(self, peer: bytes, frame: bytes) -> None:
        try:
            self.sock.send_multipart((peer, frame), zmq.DONTWAIT)
        except zmq.Again:
            log.debug("peer %r not reading; message dropped", peer)

    def _session_alive(self, now_ns: int) -> bool:
        return self.peer is not None and not self.latched and now_ns - self.fed_ns <= self.watchdog_ns

    def check_watchdog(self, now_ns: int) -> None:
        if self.peer is not None and not self.latched and now_ns - self.fed_ns > self.watchdog_ns:
            self.latched = True
            self.stats.watchdog_trips += 1
            self._apply_safe()
            log.warning("watchdog: no command for %.1f ms: safe state latched", self.watchdog_ns / 1e6)

    def handle(self, frames: list[bytes], now_ns: int) -> None:
        """One received multipart message from the ROUTER socket."""
        if len(frames) != 2:
            self.stats.bad_messages += 1
            if frames:
                self._send(frames[0], bp.error("bad_message", f"{len(frames) - 1} payload frames; "
                                               "expected exactly one", "<frame>"))
            return
        peer, frame = frames
        try:
            msg = bp.decode(frame, self.shape)
        except bp.VersionError as exc:
            self.stats.refused += 1
            self._send(peer, bp.error("version", "supported: " + ", ".join(map(str, bp.SUPPORTED_PROTOS))
                                      + f" ({exc})", "proto"))
            return
        except bp.ProtocolError as exc:
            self.stats.bad_messages += 1
            code = "unknown_type" if exc.field == "type" else "bad_message"
            self._send(peer, bp.error(code, str(exc), exc.field))
            return
        t = msg["type"]
        if t == "hello":
            self._hello(peer, msg, now_ns)
        elif t == "command" or t == "step":
            self._setpoints(peer, msg, now_ns)
        elif t == "bye":
            if peer == self.peer:
                self._apply_safe()
                self.peer = None
                log.info("session closed by the controller")
        else:
            self._send(peer, bp.error("bad_message", f"a bridge does not accept {t!r}", "type"))

    def _hello(self, peer: bytes, msg: dict, now_ns: int) -> None:
        if peer != self.peer and self._session_alive(now_ns):
            self.stats.refused += 1
            self._send(peer, bp.error("busy", "another controller has a live session", ""))
            return
        if msg["mode"] != self.mode:
            self.stats.refused += 1
            self._send(peer, bp.error("mode", f"this server runs in {self.mode} mode", "mode"))
            return
        ours_by_field = {"blades": self.shape.blades, "counts_per_rev": self.shape.counts_per_rev,
                         "counter_bits": self.shape.counter_bits}
        if self.mode == "lockstep":          # free mode streams at its own rate
            ours_by_field["period_ns"] = self.period_ns
        for field, ours in ours_by_field.items():
            if msg[field] != ours:
                self.stats.refused += 1
                self._send(peer, bp.error("shape_mismatch", f"controller has {field} = {msg[field]}, "
                                          f"the rig has {field} = {ours}", field))
                return
        wd = min(max(msg["watchdog_ms"], WATCHDOG_MIN_MS), WATCHDOG_MAX_MS)
        self.peer = peer
        self.watchdog_ns = int(wd * 1e6)
        self.fed_ns = now_ns
        self.latched = False
        self.last_seq = -1
        self.last_heartbeat = None
        self._apply_safe()
        self.readings.reset()
        self.stats.sessions += 1
        log.info("session %d opened by %r (%s, watchdog %g ms)", self.stats.sessions, msg["client"],
                 self.mode, wd)
        self._send(peer, bp.welcome(mode=self.mode, shape=self.shape, period_ns=self.period_ns,
                                    watchdog_ms=wd, capabilities=self.capabilities,
                                    name=f"flapctl SIL server: {self.profile.name}"))
        self.running = True
        self._send(peer, self.readings.pack(self.rig.read(), -1, self.brake_nm, self.safe))

    def _setpoints(self, peer: bytes, msg: dict, now_ns: int) -> None:
        t, seq = msg["type"], msg["seq"]
        if peer != self.peer:
            self._send(peer, bp.error("no_session", "send hello first", "", seq))
            return
        if self.latched:
            self._send(peer, bp.error("safe_latched", "the watchdog expired; send hello to reopen",
                                      "", seq))
            return
        if t == "step" and self.mode != "lockstep":
            self._send(peer, bp.error("mode", "step is for lockstep mode; this server runs free",
                                      "type", seq))
            return
        if seq <= self.last_seq:
            if t == "step":
                self._send(peer, bp.error("stale_seq", f"seq {seq} after {self.last_seq}", "seq", seq))
            return
        self.last_seq = seq
        if msg["heartbeat"] != self.last_heartbeat:
            self.last_heartbeat = msg["heartbeat"]
            self.fed_ns = now_ns
        flaps, travel = self.flaps, self.travel
        for i, d in enumerate(msg["flap_deg"]):
            lim = travel[i]
            flaps[i] = lim if d > lim else (-lim if d < -lim else d)
        b = msg["brake_nm"]
        self.brake_nm = b if b < self.max_brake_nm else self.max_brake_nm
        self.safe = False
        self.rig.command_flaps(flaps)
        self.rig.command_brake(self.brake_nm)
        if t == "step":
            if not self._step_rig():
                self._send(peer, bp.error("internal", "the rig model failed; safe state latched",
                                          "", seq))
                return
            self._send(peer, self.readings.pack(self.rig.read(), seq, self.brake_nm, self.safe))

    def _step_rig(self) -> bool:
        """Advance the rig one period; on a model failure latch the safe state and say so."""
        if self.failed:
            return False
        t0 = time.monotonic_ns()
        try:
            self.rig.step(self.period_ns * 1e-9)
        except (FlapctlError, ArithmeticError, ValueError) as exc:
            log.error("rig model failed at t = %.4f s: %s", self.rig.t_s, exc)
            self.failed = True
            self.latched = True
            self._apply_safe()
            return False
        self.stats.steps += 1
        # A model step can take far longer than a period (induction re-solves); a real plant never
        # stalls, so the time the rig took is not counted against the controller's watchdog.
        self.fed_ns += time.monotonic_ns() - t0
        return True

    # -- loops --------------------------------------------------------------------------------
    def serve(self) -> None:
        """Run until :attr:`stop_requested` is set (by a signal handler or the caller)."""
        if self.mode == "lockstep":
            self._serve_lockstep()
        else:
            self._serve_free()

    def _serve_lockstep(self) -> None:
        sock = self.sock
        while not self.stop_requested:
            if sock.poll(_IDLE_POLL_MS, zmq.POLLIN):
                for _ in range(_RECV_MAX):
                    try:
                        frames = sock.recv_multipart(zmq.DONTWAIT)
                    except zmq.Again:
                        break
                    self.check_watchdog(time.monotonic_ns())
                    self.handle(frames, time.monotonic_ns())
            self.check_watchdog(time.monotonic_ns())

    def _drain(self, now_ns: int) -> None:
        sock = self.sock
        for _ in range(_RECV_MAX):
            try:
                frames = sock.recv_multipart(zmq.DONTWAIT)
            except zmq.Again:
                return
            self.handle(frames, now_ns)

    def _serve_free(self) -> None:
        sock, period = self.sock, self.period_ns
        spin_ns = min(200_000, period // 5)
        while not self.stop_requested and not self.running:   # the rig waits for its first hello
            if sock.poll(_IDLE_POLL_MS, zmq.POLLIN):
                self._drain(time.monotonic_ns())
        due = time.monotonic_ns()
        stats = self.stats
        while not self.stop_requested:
            now = time.monotonic_ns()
            late = now - due
            if late > stats.max_lateness_ns:
                stats.max_lateness_ns = late
            if late > period:
                # The model (or the machine) stalled.  Bursting through the missed periods would
                # hand the controller several periods of motion at once; instead the plant's time
                # stretches: re-anchor the deadline, count the slip, keep one step per readings.
                stats.late_periods += 1
                stats.slipped_ns += late
                due = now
            self._drain(now)
            self.check_watchdog(now)
            if not self._step_rig() and self.peer is not None:
                self._send(self.peer, bp.error("internal", "the rig model failed; safe state latched"))
                self.peer = None
            if self.peer is not None:
                self._send(self.peer, self.readings.pack(self.rig.read(), self.last_seq,
                                                         self.brake_nm, self.safe))
            due += period
            _sleep_until(due, spin_ns)

    def close(self) -> None:
        self._apply_safe()
        if not self.sock.closed:
            self.sock.close()
        if self._own_ctx and not self.ctx.closed:
            self.ctx.term()


def _sleep_until(due_ns: int, spin_ns: int) -> None:
    """Sleep until ``spin_ns`` before the deadline, then spin to it (PITFALLS: real time)."""
    left = due_ns - time.monotonic_ns() - spin_ns
    if left > 0:
        time.sleep(left * 1e-9)
    while time.monotonic_ns() < due_ns:
        pass


def _set_timer_slack_ns(ns: int) -> bool:
    """prctl(PR_SET_TIMERSLACK) so that sleeps wake on time (Linux, no root needed)."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(29, ctypes.c_ulong(ns), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m sim.server",
                                description="Run the SIL rig behind the bridge protocol.")
    p.add_argument("--profile", required=True, help="rig profile (TOML)")
    p.add_argument("--bind", default=DEFAULT_BIND,
                   help=f"endpoint to bind (default {DEFAULT_BIND}; tcp://127.0.0.1:* picks a free port)")
    p.add_argument("--mode", choices=bp.MODES, default="lockstep")
    p.add_argument("--rate", type=float, default=None, metavar="HZ",
                   help="plant step / readings rate (default: the profile's control.rate_hz)")
    p.add_argument("--seed", type=int, default=None, help="random seed (default: the profile's)")
    p.add_argument("--flow", type=float, default=None, metavar="M_S", help="mean flow speed")
    p.add_argument("--tsr", type=float, default=None, help="initial tip speed ratio")
    p.add_argument("--verbose", action="store_true", help="log sessions and watchdog trips")
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    logging.basicConfig(level=logging.INFO if args.verbose else logging.WARNING, stream=sys.stderr,
                        format="sim.server: %(levelname)s %(message)s")
    try:
        profile = load_profile(args.profile)
        rate = profile.control.rate_hz if args.rate is None else args.rate
        if not 1.0 <= rate <= 100_000.0:
            raise FlapctlError(f"--rate {rate:g}: expected 1 to 100000 Hz")
        period_ns = int(round(1e9 / rate))
        rig = build_rig(profile, period_ns, seed=args.seed, flow_m_s=args.flow, tsr=args.tsr)
        host = args.bind.split("://", 1)[-1].rsplit(":", 1)[0]
        if host not in _LOOPBACK:
            print(f"sim.server: WARNING: binding {args.bind}, reachable beyond this machine",
                  file=sys.stderr)
        server = BridgeServer(profile, rig, bind=args.bind, mode=args.mode, period_ns=period_ns)
    except (FlapctlError, zmq.ZMQError) as exc:
        print(f"sim.server: error: {exc}", file=sys.stderr)
        return 2

    def stop(signum: int, frame: object) -> None:
        server.stop_requested = True

    signal.signal(signal.SIGTERM, stop)
    signal.signal(signal.SIGINT, stop)
    if args.mode == "free":
        _set_timer_slack_ns(1)
    print(f"ready {server.endpoint}", flush=True)
    try:
        server.serve()
    finally:
        server.close()
        s = server.stats
        print(f"sim.server: stopped: {s.sessions} sessions, {s.steps} steps, {s.refused} refused, "
              f"{s.bad_messages} bad messages, {s.watchdog_trips} watchdog trips, "
              f"{s.late_periods} late periods (slipped {s.slipped_ns / 1e6:.1f} ms), "
              f"max lateness {s.max_lateness_ns / 1e3:.0f} us", file=sys.stderr, flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
