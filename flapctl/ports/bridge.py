"""The rig through an I/O bridge (or the SIL server process) over pyzmq: docs/bridge-protocol.md.

:class:`BridgePorts` connects a DEALER socket to the bridge's ROUTER, opens a session
(``hello`` / ``welcome``, rig shape checked both ways) and then implements the rig ports:

* ``command_flaps`` / ``command_brake`` only buffer; the tick's set-points go out once per tick:
  as the ``step`` request in lockstep mode (:meth:`BridgePorts.step`), as one ``command`` in
  free-running mode (:meth:`BridgePorts.flush`).  :class:`BridgeClock` does either from its
  ``wait()``, so :meth:`flapctl.scheduler.Controller.run_for` runs unchanged.
* ``read()`` returns the newest readings: in lockstep those of the last step, in free mode the
  newest of all queued (older ones are dropped, newest-value semantics).
* Every wait is bounded by ``timeout_ms`` and raises :class:`~flapctl.errors.BusTimeout`; an
  ``error`` from the bridge raises :class:`BridgeError`; a rig-shape mismatch raises
  :class:`~flapctl.errors.ProfileError` naming the profile key.
* ``close()`` sends the safe set-points (flaps 0 deg, brake at the profile's hold torque) and
  ``bye``, then closes the socket with a bounded linger (idempotent).

Options come from the profile's ``[bus] options`` table (``backend = "bridge"``), validated
strictly with key paths ``bus.options.<key>``; an ``endpoint`` given directly (the command
line's ``--bridge``) overrides the profile's.
"""
from __future__ import annotations

import dataclasses
import logging
import math
import re
import time
from collections.abc import Sequence
from dataclasses import dataclass

import zmq

from ..clock import Clock
from ..errors import BusError, BusTimeout, ProfileError
from ..profile import Profile
from ..schema import choice, load_section, num, text
from . import bridgeproto as bp
from .base import RigPorts, Sample

__all__ = ["BridgeOptions", "BridgeError", "BridgePorts", "BridgeClock", "bridge_options",
           "check_endpoint"]

log = logging.getLogger(__name__)

_ENDPOINT_RE = re.compile(r"^tcp://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9](?:[A-Za-z0-9.\-]*[A-Za-z0-9])?):(\d{1,5})$")
# bridge field at fault -> profile key that holds our side of it
_PROFILE_KEYS = {"blades": "geometry.blades", "counts_per_rev": "encoder.counts_per_rev",
                 "counter_bits": "encoder.counter_bits", "period_ns": "control.rate_hz"}
_DRAIN_MAX = 10_000        # messages read per drain at most (bounds the loop)


def check_endpoint(value: object, source: str, key: str) -> str:
    """``tcp://HOST:PORT`` with a port in 1..65535, else ProfileError(source, key, ...)."""
    expected = "an endpoint tcp://HOST:PORT (e.g. tcp://127.0.0.1:5790), port 1..65535"
    if not isinstance(value, str):
        raise ProfileError(source, key, value, expected)
    m = _ENDPOINT_RE.match(value)
    if m is None or not 1 <= int(m.group(2)) <= 65535:
        raise ProfileError(source, key, value, expected)
    return value


@dataclass(frozen=True, kw_only=True)
class BridgeOptions:
    """``[bus] options`` of a bridge rig."""

    endpoint: str = text(doc="tcp://HOST:PORT where the bridge listens")
    mode: str = choice("lockstep", "free", default="lockstep",
                       doc="lockstep (simulated plant steps per tick) or free-running")
    timeout_ms: float = num(1.0, 60_000.0, default=1000.0,
                            doc="longest wait for an answer or for fresh readings")
    watchdog_ms: float = num(1.0, 60_000.0, default=200.0,
                             doc="bridge goes safe when no command arrives for this long")

    def _validate(self, source: str, prefix: str) -> None:
        check_endpoint(self.endpoint, source, f"{prefix}.endpoint" if prefix else "endpoint")


def bridge_options(profile: Profile, endpoint: str | None = None) -> BridgeOptions:
    """Options from ``profile.bus.options``; ``endpoint`` (from the command line) overrides."""
    raw = dict(profile.bus.options)
    if endpoint is not None:
        raw["endpoint"] = check_endpoint(endpoint, "command line", "--bridge")
    return load_section(BridgeOptions, raw, profile.source, "bus.options")


class BridgeError(BusError):
    """The bridge answered ``error``: ``code``, ``field`` and ``text`` as it sent them."""

    def __init__(self, endpoint: str, code: str, text: str, field: str = "") -> None:
        self.endpoint = endpoint
        self.code = code
        self.text = text
        self.field = field
        where = f" (field {field})" if field else ""
        super().__init__(f"bridge {endpoint} refused: {code}{where}: {text}")


class BridgePorts(RigPorts):
    """Rig ports over the bridge protocol.  Connects and opens the session on construction.

    ``options`` (or ``profile.bus.options``) configure it; ``endpoint`` overrides theirs.  After the
    handshake: ``welcome`` (the bridge's message), ``watchdog_ms`` in force, ``bridge_period_ns``;
    per readings: ``readings_seq``, ``ack`` (newest set-points the bridge applied), ``bridge_safe``,
    ``bridge_brake_nm``; lockstep: ``round_trip_ns`` of the latest step.  ``context`` shares a
    ZeroMQ context (it is then not terminated on close).
    """

    def __init__(self, profile: Profile, *, options: BridgeOptions | None = None,
                 endpoint: str | None = None, client: str = "flapctl",
                 context: zmq.Context | None = None) -> None:
        if options is None:
            options = bridge_options(profile, endpoint)
        elif endpoint is not None:
            options = dataclasses.replace(options,
                                          endpoint=check_endpoint(endpoint, "command line", "--bridge"))
        super().__init__(profile.blades, profile.brake.hold_torque_nm)
        self._closed = True          # until the session is open (no warning if the handshake fails)
        self.profile = profile
        self.options = options
        self.endpoint = options.endpoint
        self.mode = options.mode
        self.timeout_ns = int(options.timeout_ms * 1e6)
        self.period_ns = int(round(1e9 / profile.control.rate_hz))
        enc = profile.encoder
        self.shape = bp.RigShape(profile.blades, enc.counts_per_rev, enc.counter_bits)
        self._sample = Sample(profile.blades)
        self._flaps = [0.0] * profile.blades
        self._brake_nm = 0.0            # as the controller assumes at start (it commands changes only)
        self._dirty = False
        self.heartbeat_count = 0         # advanced by heartbeat() once per live tick
        self._enc = bp.SetpointEncoder(profile.blades)
        self._last: dict | None = None  # newest readings message
        self._rx_ns = 0                  # monotonic ns when it arrived
        self.readings_seq = -1
        self.ack = -1
        self.bridge_safe = True
        self.bridge_brake_nm = 0.0
        self.round_trip_ns = 0           # of the latest lockstep step
        self.waited = False              # the latest wait_readings() had to block
        self.welcome: dict = {}
        self._own_ctx = context is None
        self._ctx = zmq.Context() if context is None else context
        self._sock = self._ctx.socket(zmq.DEALER)
        self._sock.setsockopt(zmq.LINGER, int(min(options.timeout_ms, 500.0)))
        self._sock.setsockopt(zmq.RCVHWM, 10_000)
        try:
            self._sock.connect(self.endpoint)
            self._handshake(client)
        except BaseException:
            self._close_socket()
            raise
        self._closed = False

    # -- session --------------------------------------------------------------------------
    def _handshake(self, client: str) -> None:
        self._send(bp.hello(mode=self.mode, shape=self.shape, period_ns=self.period_ns,
                            watchdog_ms=self.options.watchdog_ms, client=client))
        deadline = time.monotonic_ns() + self.timeout_ns
        msg = self._recv(deadline, "welcome", handshake=True)
        if msg["type"] != "welcome":
            raise bp.ProtocolError(msg["type"], "type", msg["type"], "'welcome' in answer to 'hello'")
        self._check_welcome(msg)
        self.welcome = msg
        caps = set(msg["capabilities"])
        wants_power = all(s.reports_power for s in self.profile.servos)
        if wants_power and "servo_power" not in caps:
            raise ProfileError(self.profile.source, "servos[0].reports_power", True,
                               f"false: the bridge {self.endpoint} does not report servo power")
        self.reports_servo_power = wants_power
        self.watchdog_ms = msg["watchdog_ms"]
        self.bridge_period_ns = msg["period_ns"]
        if self.watchdog_ms != self.options.watchdog_ms:
            log.warning("bridge %s runs its watchdog at %g ms (asked for %g ms)", self.endpoint,
                        self.watchdog_ms, self.options.watchdog_ms)
        while True:    # the readings that follows welcome (bounded by the deadline)
            msg = self._recv(deadline, "readings")
            if msg["type"] == "readings":
                self._take(msg)
                return

    def _check_welcome(self, msg: dict) -> None:
        if msg["mode"] != self.mode:
            raise BridgeError(self.endpoint, "mode", f"asked for {self.mode}, granted {msg['mode']}", "mode")
        mine = {"blades": self.shape.blades, "counts_per_rev": self.shape.counts_per_rev,
                "counter_bits": self.shape.counter_bits}
        if self.mode == "lockstep":
            mine["period_ns"] = self.period_ns
        for field, ours in mine.items():
            if msg[field] != ours:
                self._mismatch(field, f"bridge has {field} = {msg[field]}")

    def _mismatch(self, field: str, detail: str) -> None:
        key = _PROFILE_KEYS.get(field)
        if key is None:
            raise BridgeError(self.endpoint, "shape_mismatch", detail, field)
        section, _, name = key.partition(".")
        value = getattr(getattr(self.profile, section), name)
        raise ProfileError(self.profile.source, key, value,
                           f"the rig behind the bridge {self.endpoint} ({detail})")

    # -- transport ------------------------------------------------------------------------
    def _send(self, frame: bytes) -> None:
        try:
            self._sock.send(frame, zmq.DONTWAIT)
        except zmq.Again:
            raise BusTimeout(f"bridge {self.endpoint}: send queue full (bridge not reading)") from None
        except zmq.ZMQError as exc:
            raise BusError(f"bridge {self.endpoint}: send failed: {exc}") from exc

    def _recv(self, deadline_ns: int, waiting_for: str, handshake: bool = False) -> dict:
        """The next message before ``deadline_ns`` (monotonic), validated; errors raise."""
        sock = self._sock
        while True:
            try:
                frame = sock.recv(zmq.DONTWAIT)
            except zmq.Again:
                left_ms = (deadline_ns - time.monotonic_ns()) / 1e6
                if left_ms <= 0.0 or not sock.poll(max(1, math.ceil(left_ms)), zmq.POLLIN):
                    if time.monotonic_ns() >= deadline_ns:
                        raise BusTimeout(f"bridge {self.endpoint}: no {waiting_for} within "
                                         f"{self.options.timeout_ms:g} ms (is the bridge running?)") from None
                continue
            msg = bp.decode(frame, None if handshake else self.shape)
            if msg["type"] == "error":
                self._refused(msg)
            return msg

    def _refused(self, msg: dict) -> None:
        if msg["code"] == "shape_mismatch" and msg["field"] in _PROFILE_KEYS:
            self._mismatch(msg["field"], msg["text"])
        raise BridgeError(self.endpoint, msg["code"], msg["text"], msg["field"])

    def _take(self, msg: dict) -> None:
        self._last = msg
        self._rx_ns = time.monotonic_ns()
        self.readings_seq = msg["seq"]
        self.ack = msg["ack"]
        self.bridge_safe = msg["safe"]
        self.bridge_brake_nm = msg["brake_nm"]
        bp.fill_sample(msg, self._sample)

    def _drain(self) -> int:
        """Read every queued message; keep the newest readings.  Returns how many readings came."""
        sock, shape = self._sock, self.shape
        newest = None
        count = 0
        for _ in range(_DRAIN_MAX):
            try:
                frame = sock.recv(zmq.DONTWAIT)
            except zmq.Again:
                break
            msg = bp.decode(frame, shape)
            t = msg["type"]
            if t == "readings":
                count += 1
                if newest is None or msg["seq"] > newest["seq"]:
                    newest = msg
            elif t == "error":
                self._refused(msg)
            else:
                raise bp.ProtocolError(t, "type", t, "'readings' or 'error' during a session")
        if newest is not None:
            self._take(newest)
        return count

    # -- ticks ----------------------------------------------------------------------------
    def step(self) -> None:
        """Lockstep: send this tick's set-points as ``step``; wait for the readings it answers."""
        t0 = time.monotonic_ns()
        self._send(self._enc.pack("step", self._flaps, self._brake_nm, self.heartbeat_count))
        self._dirty = False
        seq = self._enc.seq
        deadline = t0 + self.timeout_ns
        while True:
            msg = self._recv(deadline, f"readings for step {seq}")
            if msg["type"] == "readings":
                if msg["ack"] == seq:
                    self._take(msg)
                    self.round_trip_ns = time.monotonic_ns() - t0
                    return
                if msg["ack"] > seq:
                    raise bp.ProtocolError("readings", "ack", msg["ack"], f"at most {seq}")
            else:
                raise bp.ProtocolError(msg["type"], "type", msg["type"], "'readings' answering 'step'")

    def flush(self) -> None:
        """Send the buffered set-points as one ``command`` now.

        The bridge's watchdog is fed only if :meth:`heartbeat` was called since the last message.
        """
        self._send(self._enc.pack("command", self._flaps, self._brake_nm, self.heartbeat_count))
        self._dirty = False

    def wait_readings(self, after_seq: int) -> int:
        """Free mode: block until readings newer than ``after_seq`` arrive; the newest seq.

        ``waited`` tells afterwards whether it had to block (the readings were not yet there).
        """
        deadline = time.monotonic_ns() + self.timeout_ns
        self._drain()
        self.waited = self.readings_seq <= after_seq
        while self.readings_seq <= after_seq:
            left_ms = (deadline - time.monotonic_ns()) / 1e6
            if left_ms <= 0.0:
                raise BusTimeout(f"bridge {self.endpoint}: no readings within "
                                 f"{self.options.timeout_ms:g} ms")
            if self._sock.poll(max(1, math.ceil(left_ms)), zmq.POLLIN):
                self._drain()
        return self.readings_seq

    @property
    def sample(self) -> Sample:
        """The newest readings as received (no draining, no flushing)."""
        return self._sample

    # -- ports ----------------------------------------------------------------------------
    def read(self) -> Sample:
        if self.mode == "free":
            if self._dirty:          # set-points left from a tick not ended by BridgeClock
                self.flush()
            self._drain()
            age_ns = time.monotonic_ns() - self._rx_ns
            if age_ns > self.timeout_ns:
                raise BusTimeout(f"bridge {self.endpoint}: newest readings are {age_ns / 1e6:.0f} ms "
                                 f"old (limit {self.options.timeout_ms:g} ms)")
            self._sample.telemetry_age_s = age_ns * 1e-9
        return self._sample

    def command_flaps(self, flap_deg: Sequence[float]) -> None:
        flaps = self._flaps
        for i in range(self.blades):
            flaps[i] = flap_deg[i]
        self._dirty = True

    def command_brake(self, torque_nm: float) -> None:
        self._brake_nm = torque_nm
        self._dirty = True

    def heartbeat(self) -> None:
        """This tick is alive: advance the counter that the next message carries.

        The controller calls it every tick except in FAULT; a silent controller keeps sending the
        same value, so the bridge's watchdog expires and the bridge goes safe by itself.
        """
        self.heartbeat_count = (self.heartbeat_count + 1) % bp.HEARTBEAT_MODULUS

    def safe(self) -> None:
        super().safe()
        self.flush()

    def _release(self) -> None:
        try:
            self._send(bp.bye())
        except BusError:
            log.warning("bridge %s: could not send bye", self.endpoint)
        self._close_socket()

    def _close_socket(self) -> None:
        sock = getattr(self, "_sock", None)
        if sock is not None and not sock.closed:
            sock.close()
        if self._own_ctx and not self._ctx.closed:
            self._ctx.term()


class BridgeClock(Clock):
    """Paces the controller by the bridge.

    Lockstep: ``wait()`` performs the ``step`` round trip (virtual time; lateness 0).  Free mode:
    ``wait()`` sends the tick's ``command`` and blocks until newer readings arrive.  The bridge's
    schedule is taken from the ticks where the controller had to wait (it was on time: lateness 0,
    the schedule is re-anchored there); when the readings were already queued, lateness is the wall
    time past that schedule.  A gap in readings ``seq`` counts the missed periods as overruns.
    Free mode needs the bridge's period equal to the profile's.
    """

    def __init__(self, ports: BridgePorts) -> None:
        if ports.mode == "free" and ports.bridge_period_ns != ports.period_ns:
            raise ProfileError(ports.profile.source, "control.rate_hz", ports.profile.control.rate_hz,
                               f"the readings rate of the bridge {ports.endpoint} "
                               f"({1e9 / ports.bridge_period_ns:g} Hz) to be paced by it")
        super().__init__(ports.period_ns)
        self.ports = ports
        self._anchor_ns = 0          # wall time of tick 0 on the bridge's schedule
        self._seq = 0

    def start(self) -> int:
        self.ticks = 0
        self.lateness_ns = 0
        self.overruns = 0
        self.ports.read()
        self._anchor_ns = time.monotonic_ns()
        self._seq = self.ports.readings_seq
        return 0

    def wait(self) -> int:
        p = self.ports
        if p.mode == "lockstep":
            p.step()
            self.ticks += 1
            return self.ticks * self.period_ns
        p.flush()
        seq = p.wait_readings(self._seq)
        gap = seq - self._seq - 1
        if gap > 0:
            self.overruns += gap
        self._seq = seq
        self.ticks += gap + 1
        due = self._anchor_ns + self.ticks * self.period_ns
        now = time.monotonic_ns()
        if p.waited or now < due:
            self._anchor_ns = now - self.ticks * self.period_ns
            self.lateness_ns = 0
        else:
            self.lateness_ns = now - due
        return self.ticks * self.period_ns
