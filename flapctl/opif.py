"""The operator interface: commands in (ROUTER), telemetry out (PUB), over pyzmq.

A rig runs with people beside it: the operator commands the run and sees it live, and nobody else
on the lab network may command it.  Hence:

* An endpoint on loopback (``127.0.0.1``, ``localhost``, ``::1``) or ``ipc://`` may run without
  CURVE (anyone logged in on the controller PC can then command the rig).  Any other endpoint
  needs CURVE: the server's secret key file and a directory of authorised client public keys
  (:mod:`flapctl.keys`); without them :class:`OperatorInterface` refuses to start.
* Authentication is ZAP (ZeroMQ RFC 27) answered in the controller's own tick: a client whose
  public key is not in the directory is denied during the handshake and never reaches the
  command socket; a client without keys fails the handshake.  Both are logged (and appended to
  the run log as ``operator_reject`` events), rate-limited.
* No extra Python thread in the loop process: the interface is a controller listener, called
  after every tick, that answers pending ZAP requests, handles at most
  ``max_messages_per_tick`` commands without blocking, and publishes decimated telemetry.
  A command takes effect from the next tick on.

Time base: the heartbeat timeout and telemetry decimation run on the controller's time (sample
time ``t_s``, tick count), which is wall time on a rig and virtual time in lockstep SIL.  When
``heartbeat_timeout_s`` is set and the rig is ARMED or RUNNING, no valid operator message for
longer than that trips ``operator_heartbeat`` through the supervisor.

Telemetry frames are ``b"live " + msgpack`` (every ``rate/telemetry_hz`` ticks) and
``b"revolution " + msgpack`` (each closed revolution), see :mod:`flapctl.opmsg`.  They are
single-part so that a subscriber may set ``CONFLATE`` on a socket subscribed to ``live`` only
(latest value, :class:`flapctl.watch.TelemetrySubscriber`); PUB drops at its high-water mark and
late subscribers miss earlier frames, so nothing that must arrive goes over PUB (the run log
keeps everything).
"""
from __future__ import annotations

import collections
import ipaddress
import itertools
import logging
import math
import re
import time
from pathlib import Path

import zmq
from zmq.utils.monitor import recv_monitor_message

from .errors import FlapctlError, ProfileError, ScheduleError
from .keys import load_authorized_keys, load_public_key, load_secret_key
from .lead import LeadModel
from .opmsg import (DEFAULT_COMMAND_ENDPOINT, DEFAULT_TELEMETRY_ENDPOINT, MAX_MESSAGE_BYTES,
                    Command, OperatorMessageError, Reply, decode_command, decode_reply,
                    encode_command, encode_live, encode_reply, encode_revolution, peek_seq)
from .schedule import Schedule
from .supervisor import State

__all__ = ["OperatorInterface", "OperatorClient", "OperatorInterfaceError", "InsecureEndpointError",
           "OperatorTimeout", "endpoint_is_local", "DEFAULT_COMMAND_ENDPOINT",
           "DEFAULT_TELEMETRY_ENDPOINT"]

log = logging.getLogger(__name__)

_SOURCE = "operator interface"
_ZAP_ENDPOINT = "inproc://zeromq.zap.01"
_ZAP_DOMAIN = "flapctl"
_HANDSHAKE_FAILURES = (zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
                       | zmq.EVENT_HANDSHAKE_FAILED_AUTH)
_REJECT_LOG_EVERY_S = 5.0        # repeated rejections of one kind are summarised this often
_ENDPOINT_RE = re.compile(r"(?P<transport>[a-z]+)://(?P<address>.+)\Z")


class OperatorInterfaceError(FlapctlError, OSError):
    """The operator interface could not start (an endpoint cannot be bound, CURVE missing)."""


class InsecureEndpointError(FlapctlError, PermissionError):
    """An endpoint reachable from the network was asked for without CURVE keys."""


class OperatorTimeout(FlapctlError, TimeoutError):
    """No reply from the controller within the client's timeout."""


def endpoint_is_local(endpoint: str) -> bool:
    """True for ``tcp://`` on a loopback address or ``localhost``, and for ``ipc://``/``inproc://``."""
    m = _ENDPOINT_RE.match(endpoint)
    if m is None:
        return False
    transport, address = m["transport"], m["address"]
    if transport in ("ipc", "inproc"):
        return True
    if transport != "tcp":
        return False
    host, sep, _port = address.rpartition(":")
    if not sep:
        return False
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:          # "*", an interface name or a host name: reachable from outside
        return False


# --------------------------------------------------------------------------- authentication
class _CurveGate:
    """A ZAP handler (RFC 27) admitting only the CURVE public keys of one directory.

    Served without a thread: ``service()`` answers the pending requests and returns.
    """

    def __init__(self, context: zmq.Context, authorized: dict[bytes, str], on_deny) -> None:
        self.authorized = {zmq.utils.z85.decode(k): name for k, name in authorized.items()}
        self._on_deny = on_deny
        self.socket = context.socket(zmq.REP)
        self.socket.linger = 0
        self.socket.bind(_ZAP_ENDPOINT)

    def service(self, limit: int = 8) -> None:
        sock = self.socket
        for _ in range(limit):
            if not sock.getsockopt(zmq.EVENTS) & zmq.POLLIN:
                return
            try:
                msg = sock.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return
            sock.send_multipart(self._answer(msg))

    def _answer(self, msg: list[bytes]) -> list[bytes]:
        if len(msg) < 6:
            request_id = msg[1] if len(msg) > 1 else b""
            return [b"1.0", request_id, b"400", b"malformed ZAP request", b"", b""]
        version, request_id, _domain, address, _identity, mechanism, *credentials = msg
        if version != b"1.0":
            return [b"1.0", request_id, b"400", b"unsupported ZAP version", b"", b""]
        peer = address.decode("ascii", "replace")
        if mechanism != b"CURVE" or len(credentials) != 1 or len(credentials[0]) != 32:
            self._on_deny("handshake", f"mechanism {mechanism.decode('ascii', 'replace')} from {peer}")
            return [b"1.0", request_id, b"400", b"CURVE required", b"", b""]
        name = self.authorized.get(credentials[0])
        if name is None:
            key = zmq.utils.z85.encode(credentials[0]).decode()
            self._on_deny("unknown_key", f"CURVE key {key} from {peer} is not authorised")
            return [b"1.0", request_id, b"400", b"key not authorised", b"", b""]
        return [b"1.0", request_id, b"200", b"OK", name.encode(), b""]

    def close(self) -> None:
        self.socket.close(linger=0)


# --------------------------------------------------------------------------- the server
class OperatorInterface:
    """Operator commands and live telemetry for one :class:`~flapctl.scheduler.Controller`.

    Attaches itself as a controller listener (``listener(controller, sample)`` after each tick);
    ``close()`` detaches it and closes every socket (idempotent).  ``command_address`` and
    ``telemetry_address`` are the bound endpoints (useful with port ``*``).

    The sockets are polled every ``rate/poll_hz`` ticks (5 ticks at 1 kHz: a poll costs a few
    microseconds, an idle tick well under one); telemetry goes out every ``rate/telemetry_hz``
    ticks.  How commands apply:

    * ``arm``/``start``/``stop``/``acknowledge`` go to ``controller.command``; a transition the
      supervisor does not allow now is ``refused`` with the state named.
    * ``set_tsr`` needs a TSR-holding brake loop and a value below ``limits.max_tsr``; with a
      TSR-dependent schedule the controller rebuilds its fine table inside the tick (one long tick).
    * ``set_lead`` replaces ``controller.lead`` (the slew limit keeps the step bounded).
    * ``load_schedule`` only in SAFE or ARMED (flaps neutral): the file is loaded, its travel
      checked against every servo and its fine table built before ``controller.schedule`` and
      ``controller.table`` are replaced; any ScheduleError is ``refused`` with its message.
    """

    def __init__(self, controller, command_endpoint: str = DEFAULT_COMMAND_ENDPOINT,
                 telemetry_endpoint: str = DEFAULT_TELEMETRY_ENDPOINT,
                 curve_server_secret: str | Path | None = None,
                 authorized_clients_dir: str | Path | None = None, telemetry_hz: float = 20.0,
                 heartbeat_timeout_s: float | None = None, *, max_messages_per_tick: int = 4,
                 poll_hz: float = 200.0) -> None:
        self._closed = True
        self.controller = controller
        rate_hz = 1.0 / controller.dt
        if isinstance(telemetry_hz, bool) or not isinstance(telemetry_hz, (int, float)) \
                or not math.isfinite(telemetry_hz) or not 0.0 < telemetry_hz <= rate_hz:
            raise ProfileError(_SOURCE, "telemetry_hz", telemetry_hz,
                               f"a rate > 0 and <= the control rate {rate_hz:g} Hz")
        if heartbeat_timeout_s is not None and (
                isinstance(heartbeat_timeout_s, bool) or not isinstance(heartbeat_timeout_s, (int, float))
                or not math.isfinite(heartbeat_timeout_s) or heartbeat_timeout_s < 2.0 * controller.dt):
            raise ProfileError(_SOURCE, "heartbeat_timeout_s", heartbeat_timeout_s,
                               f"None or a time >= two ticks ({2.0 * controller.dt:g} s)")
        if isinstance(poll_hz, bool) or not isinstance(poll_hz, (int, float)) \
                or not math.isfinite(poll_hz) or not 0.0 < poll_hz <= rate_hz:
            raise ProfileError(_SOURCE, "poll_hz", poll_hz,
                               f"a rate > 0 and <= the control rate {rate_hz:g} Hz")
        if isinstance(max_messages_per_tick, bool) or not isinstance(max_messages_per_tick, int) \
                or not 1 <= max_messages_per_tick <= 64:
            raise ProfileError(_SOURCE, "max_messages_per_tick", max_messages_per_tick, "an integer 1..64")
        self.curve = self._check_security(command_endpoint, telemetry_endpoint,
                                          curve_server_secret, authorized_clients_dir)
        self.telemetry_every = max(1, int(round(rate_hz / telemetry_hz)))
        self.poll_every = max(1, int(round(rate_hz / poll_hz)))
        self.heartbeat_timeout_s = heartbeat_timeout_s
        self.max_messages_per_tick = max_messages_per_tick
        self.last_operator_s = controller.t_s
        self.rejected = 0
        self.rejections: collections.deque[tuple[float, str, str]] = collections.deque(maxlen=100)
        self._reject_log: dict[str, list[float]] = {}
        self._revolutions_sent = len(controller.ledger.records)
        self._half_rho_a = controller.ledger._half_rho_a
        self._travel = [s.travel_deg for s in controller.profile.servos]
        self._tsr_hold = controller.profile.brake.loop.mode == "tsr"
        self._ctx = zmq.Context()
        self._gate: _CurveGate | None = None
        self._monitors: list[zmq.Socket] = []
        self._commands: zmq.Socket | None = None
        self._telemetry: zmq.Socket | None = None
        try:
            self._open(command_endpoint, telemetry_endpoint)
        except BaseException:
            self._close_sockets()
            raise
        self._closed = False
        controller.add_listener(self)
        log.info("operator interface: commands on %s, telemetry on %s (%s)", self.command_address,
                 self.telemetry_address, "CURVE" if self.curve else "loopback, no CURVE")

    # -- start-up ---------------------------------------------------------------------------
    def _check_security(self, command_endpoint: str, telemetry_endpoint: str,
                        secret: str | Path | None, clients: str | Path | None):
        for key, ep in (("command_endpoint", command_endpoint), ("telemetry_endpoint", telemetry_endpoint)):
            if not isinstance(ep, str) or _ENDPOINT_RE.match(ep) is None:
                raise ProfileError(_SOURCE, key, ep, "a ZeroMQ endpoint such as tcp://127.0.0.1:47210")
        if (secret is None) != (clients is None):
            given, missing = (("curve_server_secret", "authorized_clients_dir") if clients is None
                              else ("authorized_clients_dir", "curve_server_secret"))
            raise ProfileError(_SOURCE, missing, None, f"given together with {given} (CURVE needs both)")
        if secret is None:
            for ep in (command_endpoint, telemetry_endpoint):
                if not endpoint_is_local(ep):
                    raise InsecureEndpointError(
                        f"refusing to bind {ep} without CURVE: an endpoint reachable from the network "
                        "needs curve_server_secret (the server's .key_secret file) and "
                        "authorized_clients_dir (the authorised operators' .key files); "
                        "make them with `flapctl keys DIR --name NAME`, or bind 127.0.0.1")
            return None
        if not zmq.has("curve"):
            raise OperatorInterfaceError("this libzmq was built without CURVE: cannot secure the endpoints")
        public, private = load_secret_key(secret)
        return public, private, load_authorized_keys(clients)

    def _open(self, command_endpoint: str, telemetry_endpoint: str) -> None:
        ctx = self._ctx
        if self.curve is not None:      # the ZAP handler must exist before any socket binds
            self._gate = _CurveGate(ctx, self.curve[2], self._reject_now)
        cmd = self._commands = ctx.socket(zmq.ROUTER)
        pub = self._telemetry = ctx.socket(zmq.PUB)
        cmd.linger = 100
        pub.linger = 0
        cmd.maxmsgsize = MAX_MESSAGE_BYTES
        cmd.rcvhwm = cmd.sndhwm = 64
        pub.sndhwm = 1000
        for sock in (cmd, pub):
            if self.curve is not None:
                sock.curve_server = True
                sock.curve_publickey, sock.curve_secretkey = self.curve[0], self.curve[1]
                sock.zap_domain = _ZAP_DOMAIN.encode()
            mon = sock.get_monitor_socket(_HANDSHAKE_FAILURES)
            mon.linger = 0
            self._monitors.append(mon)
        for sock, ep in ((cmd, command_endpoint), (pub, telemetry_endpoint)):
            try:
                sock.bind(ep)
            except zmq.ZMQError as exc:
                raise OperatorInterfaceError(f"cannot bind {ep}: {exc}") from None
        self.command_address = cmd.get(zmq.LAST_ENDPOINT).decode()
        self.telemetry_address = pub.get(zmq.LAST_ENDPOINT).decode()

    # -- the listener ---------------------------------------------------------------------------
    def __call__(self, controller, sample) -> None:
        """Called after each tick: authenticate, take commands, watch the heartbeat, publish."""
        if self._closed:
            return
        t = controller.t_s
        tick = controller.tick
        if tick % self.poll_every == 0:
            self._poll(controller, t)
        timeout = self.heartbeat_timeout_s
        if timeout is not None and t - self.last_operator_s > timeout:
            state = controller.supervisor.state
            if state == State.ARMED or state == State.RUNNING:
                controller.supervisor.trip(t, "operator_heartbeat",
                                           f"no operator message for {t - self.last_operator_s:.3f} s "
                                           f"(timeout {timeout:g} s)")
        if tick % self.telemetry_every == 0:
            self._publish_live(controller, sample)
        records = controller.ledger.records
        while self._revolutions_sent < len(records):
            self._publish_revolution(records[self._revolutions_sent])
            self._revolutions_sent += 1

    def _poll(self, controller, t: float) -> None:
        """Answer ZAP requests, read socket events, handle up to a few commands; never blocks."""
        if self._gate is not None:
            self._gate.service()
        for mon in self._monitors:
            if mon.getsockopt(zmq.EVENTS) & zmq.POLLIN:
                self._drain_monitor(mon, t)
        cmd = self._commands
        for _ in range(self.max_messages_per_tick):
            if not cmd.getsockopt(zmq.EVENTS) & zmq.POLLIN:
                return
            try:
                frames = cmd.recv_multipart(zmq.NOBLOCK, copy=False)
            except zmq.Again:
                return
            self._handle(controller, t, frames)

    # -- commands -----------------------------------------------------------------------------
    def _handle(self, controller, t: float, frames: list) -> None:
        ident = frames[0].bytes
        body = frames[1:]
        envelope: list[bytes] = []
        if len(body) == 2 and len(body[0].bytes) == 0:     # a REQ-style empty delimiter
            envelope, body = [b""], body[1:]
        user = "local"
        if self.curve is not None:
            try:
                user = frames[-1].get("User-Id")
            except zmq.ZMQError:
                user = "?"
        if len(body) != 1:
            self._reject(t, "malformed", f"{len(body)} frames from {user}")
            self._reply(ident, envelope, None, "error", controller,
                        f"message = {len(body)} frames: expected one msgpack frame")
            return
        data = body[0].bytes
        try:
            command = decode_command(data)
        except OperatorMessageError as exc:
            self._reject(t, "malformed", f"from {user}: {exc}")
            self._reply(ident, envelope, peek_seq(data), "error", controller, str(exc))
            return
        self.last_operator_s = t
        kind, reason, status = self._apply(controller, t, command, user)
        if command.name not in ("heartbeat", "status"):
            args = " ".join(f"{k}={v!r}" for k, v in command.fields.items())
            detail = f"{command.name}{' ' + args if args else ''} by {user}: {kind}" + (
                f" ({reason})" if reason else "")
            log.info("t=%.3f s operator %s", t, detail)
            if controller.runlog is not None:
                controller.runlog.event(t, "operator", detail)
        self._reply(ident, envelope, command.seq, kind, controller, reason, status)

    def _apply(self, controller, t: float, command: Command, user: str) -> tuple[str, str, dict | None]:
        name, f = command.name, command.fields
        state = controller.supervisor.state
        if name in ("arm", "start", "stop", "acknowledge"):
            if controller.command(name, f"operator {user}"):
                return "ok", "", None
            return "refused", f"{name} is not allowed in state {state.name}", None
        if name == "heartbeat":
            return "ok", "", None
        if name == "status":
            return "ok", "", self.status()
        if name == "set_tsr":
            value = f["value"]
            if not self._tsr_hold:
                return "refused", "the brake loop holds speed, not TSR (profile brake.loop.mode)", None
            limit = controller.profile.limits.max_tsr
            if value >= limit:
                return "refused", f"TSR {value:g} is not below the TSR limit {limit:g}", None
            controller.set_tsr(value)
            return "ok", "", None
        if name == "set_lead":
            controller.lead = LeadModel(f["mode"], f.get("angle_deg", 0.0), f.get("dead_time_s", 0.0))
            return "ok", "", None
        # load_schedule: parsed and checked completely before anything is replaced
        if state not in (State.SAFE, State.ARMED):
            return "refused", f"load_schedule needs flaps neutral (SAFE or ARMED), not {state.name}", None
        try:
            schedule = Schedule.load(f["path"], controller.blades)
            schedule.check_travel(self._travel)
            table = schedule.table(controller.brake.tsr_setpoint if schedule.tsr_axis else None)
        except ScheduleError as exc:
            return "refused", str(exc), None
        controller.schedule, controller.table = schedule, table
        return "ok", "", None

    def status(self) -> dict:
        """A status map (what the ``status`` command returns)."""
        c = self.controller
        trips = [[t, r, d] for t, r, d in c.supervisor.trips[-5:]]
        return {"t_s": c.t_s, "state": c.supervisor.state.name, "tsr": c.tsr,
                "tsr_setpoint": c.brake.tsr_setpoint,
                "rpm": c.estimator.speed_rad_s * 30.0 / math.pi, "flow_m_s": c.flow_m_s,
                "lead": c.lead.describe(), "schedule": c.schedule.source,
                "revolutions": len(c.ledger.records), "trips": trips,
                "heartbeat_timeout_s": self.heartbeat_timeout_s, "curve": self.curve is not None}

    def _reply(self, ident: bytes, envelope: list[bytes], seq: int | None, kind: str, controller,
               reason: str = "", status: dict | None = None) -> None:
        data = encode_reply(seq, kind, controller.supervisor.state.name, reason, status)
        try:
            self._commands.send_multipart([ident, *envelope, data], zmq.NOBLOCK)
        except zmq.ZMQError as exc:      # peer gone or its queue full: the reply is dropped
            log.warning("operator reply to %r dropped: %s", ident, exc)

    # -- rejections -------------------------------------------------------------------------------
    def _reject_now(self, kind: str, detail: str) -> None:
        self._reject(self.controller.t_s, kind, detail)

    def _reject(self, t: float, kind: str, detail: str) -> None:
        """Count, keep, log and book a rejected connection or message (rate-limited per kind)."""
        self.rejected += 1
        self.rejections.append((t, kind, detail))
        entry = self._reject_log.get(kind)
        if entry is not None and t - entry[0] < _REJECT_LOG_EVERY_S:
            entry[1] += 1
            return
        more = f" ({int(entry[1])} more since t={entry[0]:.3f} s)" if entry is not None and entry[1] else ""
        self._reject_log[kind] = [t, 0]
        log.warning("t=%.3f s operator interface rejected (%s): %s%s", t, kind, detail, more)
        if self.controller.runlog is not None:
            self.controller.runlog.event(t, "operator_reject", f"{kind}: {detail}{more}")

    def _drain_monitor(self, mon: zmq.Socket, t: float) -> None:
        for _ in range(16):
            try:
                event = recv_monitor_message(mon, zmq.NOBLOCK)
            except zmq.Again:
                return
            except zmq.ZMQError:
                return
            name = {zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL: "no detail",
                    zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL: "protocol",
                    zmq.EVENT_HANDSHAKE_FAILED_AUTH: "authentication"}.get(event["event"], str(event["event"]))
            endpoint = event.get("endpoint", b"")
            if isinstance(endpoint, bytes):
                endpoint = endpoint.decode("ascii", "replace")
            self._reject(t, "handshake", f"handshake failed ({name}, code {event['value']}) on {endpoint}")

    # -- telemetry ------------------------------------------------------------------------------------
    def _publish_live(self, c, sample) -> None:
        omega = c.estimator.speed_rad_s
        u = c.flow_m_s
        fluid_w = self._half_rho_a * u * u * u
        cp = sample.torque_nm * omega / fluid_w if fluid_w > 0.0 else math.nan
        trips = c.supervisor.trips
        frame = encode_live(c.t_s, c.tick, c.supervisor.state.name, omega * 30.0 / math.pi, c.tsr,
                            c.brake.tsr_setpoint, u, sample.torque_nm, c.brake_nm, cp, c.power,
                            c.cmd, sample.flap_deg, trips[-1] if trips else None)
        self._send_telemetry(frame)

    def _publish_revolution(self, rec) -> None:
        dur = rec.duration_s
        frame = encode_revolution(
            rec.index, rec.t_start_s, dur, rec.mean_tsr, rec.mean_speed_rad_s * 30.0 / math.pi,
            rec.mean_flow_m_s, rec.cp_gross, rec.cp_net, rec.shaft_energy_j / dur,
            rec.actuator_energy_j / dur, [e / dur for e in rec.servo_energy_j])
        self._send_telemetry(frame)

    def _send_telemetry(self, frame: bytes) -> None:
        try:
            self._telemetry.send(frame, zmq.NOBLOCK)
        except zmq.ZMQError as exc:      # PUB drops rather than blocks; anything else is logged
            log.debug("telemetry frame dropped: %s", exc)

    # -- lifecycle ------------------------------------------------------------------------------------
    def _close_sockets(self) -> None:
        for sock in (self._commands, self._telemetry):
            if sock is not None:
                try:
                    sock.disable_monitor()
                except zmq.ZMQError:
                    pass
        for mon in self._monitors:
            mon.close(linger=0)
        self._monitors = []
        for sock in (self._commands, self._telemetry):
            if sock is not None:
                sock.close()
        self._commands = self._telemetry = None
        if self._gate is not None:
            self._gate.close()
            self._gate = None
        self._ctx.term()

    def close(self) -> None:
        """Detach from the controller and close every socket (idempotent)."""
        if self._closed:
            return
        self._closed = True
        c = self.controller
        c.remove_listener(self)
        self._close_sockets()

    @property
    def closed(self) -> bool:
        return self._closed

    def __enter__(self) -> "OperatorInterface":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


# --------------------------------------------------------------------------- the client
class OperatorClient:
    """An operator's command connection (DEALER): ``send(command, **fields) -> Reply``.

    With ``server_public_key`` (a ``.key`` file or Z85 bytes) and ``client_keys`` (the operator's
    ``.key_secret`` file, or a (public, secret) Z85 pair) the connection uses CURVE.  Every wait is
    bounded by ``timeout_ms``; after a timeout the socket is recreated so that a late reply to an
    old request can never be taken for the answer to a new one.
    """

    def __init__(self, endpoint: str, server_public_key: str | Path | bytes | None = None,
                 client_keys: str | Path | tuple[bytes, bytes] | None = None,
                 timeout_ms: int = 1000) -> None:
        self._sock: zmq.Socket | None = None
        self._ctx = zmq.Context()
        self._closed = False
        try:
            if isinstance(timeout_ms, bool) or not isinstance(timeout_ms, int) or not 1 <= timeout_ms <= 600_000:
                raise ProfileError("operator client", "timeout_ms", timeout_ms, "an integer 1..600000 ms")
            if (server_public_key is None) != (client_keys is None):
                raise ProfileError("operator client", "client_keys" if client_keys is None else "server_public_key",
                                   None, "given together (CURVE needs the server's public key and the "
                                         "client's key pair)")
            self.endpoint = endpoint
            self.timeout_ms = timeout_ms
            self._server_key = None if server_public_key is None else load_public_key(server_public_key)
            if client_keys is None or isinstance(client_keys, tuple):
                self._client_keys = client_keys
            else:
                self._client_keys = load_secret_key(client_keys)
            self._seq = itertools.count(1)
            self._connect()
        except BaseException:
            self.close()
            raise

    def _connect(self) -> None:
        sock = self._ctx.socket(zmq.DEALER)
        sock.linger = 0
        sock.sndhwm = sock.rcvhwm = 16
        if self._server_key is not None:
            sock.curve_serverkey = self._server_key
            sock.curve_publickey, sock.curve_secretkey = self._client_keys
        sock.connect(self.endpoint)
        self._sock = sock

    def reset(self) -> None:
        """Drop the connection and everything queued on it; connect afresh."""
        if self._sock is not None:
            self._sock.close(linger=0)
        self._connect()

    def submit(self, command: str, **fields: object) -> int:
        """Queue one command without waiting; returns its ``seq`` (fields validated first)."""
        seq = next(self._seq)
        self.submit_raw(encode_command(command, seq, fields))
        return seq

    def submit_raw(self, data: bytes) -> None:
        """Queue raw bytes as one message (for diagnostics and tests of the server's checks)."""
        try:
            self._sock.send_multipart([b"", data], zmq.NOBLOCK)
        except zmq.Again:
            raise OperatorTimeout(f"{self.endpoint}: send queue full (controller not answering)") from None

    def receive(self, seq: int | None, timeout_ms: int) -> Reply | None:
        """The reply to ``seq`` (any reply when None) within ``timeout_ms``, else None.

        Replies to other sequence numbers are skipped; a malformed reply raises
        OperatorMessageError."""
        deadline = time.monotonic() + timeout_ms * 1e-3
        sock = self._sock
        for _ in range(64):            # stale replies are skipped, a bounded number of them
            wait = max(0, int((deadline - time.monotonic()) * 1e3))
            if not sock.poll(wait, zmq.POLLIN):
                return None
            frames = sock.recv_multipart(zmq.NOBLOCK)
            reply = decode_reply(frames[-1])
            if seq is None or reply.seq == seq:
                return reply
            log.debug("skipping a stale reply (seq %s, waiting for %s)", reply.seq, seq)
        return None

    def send(self, command: str, **fields: object) -> Reply:
        """Send one command and wait for its reply; OperatorTimeout after ``timeout_ms``."""
        seq = self.submit(command, **fields)
        reply = self.receive(seq, self.timeout_ms)
        if reply is None:
            self.reset()
            raise OperatorTimeout(f"no reply to {command!r} from {self.endpoint} within {self.timeout_ms} ms")
        return reply

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        if self._sock is not None:
            self._sock.close(linger=0)
            self._sock = None
        self._ctx.term()

    def __enter__(self) -> "OperatorClient":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
