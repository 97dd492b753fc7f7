"""The bridge protocol, the bridge backend and the SIL server process.

Protocol checks run in-process; everything else talks over real ZeroMQ sockets on 127.0.0.1 to
``python -m sim.server`` subprocesses (ports picked by the server: ``tcp://127.0.0.1:*``).  Every
wait is bounded in count and in time; nothing sleeps.

External references: MessagePack's own round trip (msgpack.packb / unpackb) is the reference for
the encoding; the lockstep run over the bridge is checked against the in-process lockstep SIL
(``Controller`` + ``VirtualRig`` + ``VirtualClock``), which it must reproduce exactly.
"""
from __future__ import annotations

import math
import os
import select
import signal
import subprocess
import sys
import time
from pathlib import Path

import msgpack
import pytest
import zmq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from flapctl.clock import VirtualClock
from flapctl.errors import BusError, BusTimeout, ProfileError
from flapctl.fluid import fluid_properties
from flapctl.ports import bridgeproto as bp
from flapctl.ports.base import Sample
from flapctl.ports.bridge import (BridgeClock, BridgeError, BridgeOptions, BridgePorts,
                                  bridge_options, check_endpoint)
from flapctl.profile import parse_profile
from flapctl.schedule import Schedule
from flapctl.scheduler import Controller

ROOT = Path(__file__).resolve().parent.parent
SHAPE = bp.RigShape(3, 4096, 32)
READY_TIMEOUT_S = 30.0


# ------------------------------------------------------------------------------ messages
def _valid_messages() -> dict[str, dict]:
    return {
        "hello": {"type": "hello", "proto": 1, "mode": "lockstep", "blades": 3,
                  "counts_per_rev": 4096, "counter_bits": 32, "period_ns": 1_000_000,
                  "watchdog_ms": 200.0, "client": "test"},
        "welcome": {"type": "welcome", "proto": 1, "mode": "free", "blades": 3,
                    "counts_per_rev": 4096, "counter_bits": 32, "period_ns": 1_000_000,
                    "watchdog_ms": 50.0, "capabilities": ["free", "index", "future-thing"],
                    "name": "bridge"},
        "readings": {"type": "readings", "seq": 7, "ack": -1, "t_s": 0.125, "counts": 2**32 - 1,
                     "index_latch": None, "index_events": 0, "torque_nm": -0.25, "flow_m_s": 0.6,
                     "thrust_n": None, "flap_deg": [1.5, -2.0, 0.0], "servo_current_a": [],
                     "servo_voltage_v": [], "brake_nm": 0.4, "safe": False},
        "command": {"type": "command", "seq": 0, "flap_deg": [0.0, 5.0, -5.0], "brake_nm": 0.0,
                    "heartbeat": 2**32 - 1},
        "step": {"type": "step", "seq": 12, "flap_deg": [0.1, 0.2, 0.3], "brake_nm": 1.25,
                 "heartbeat": 3},
        "error": {"type": "error", "code": "busy", "text": "another session", "field": "",
                  "seq": -1},
        "bye": {"type": "bye"},
    }


@pytest.mark.parametrize("kind", bp.MESSAGE_TYPES)
def test_every_message_type_round_trips(kind):
    msg = _valid_messages()[kind]
    frame = bp.encode(msg, SHAPE)
    assert msgpack.unpackb(frame, raw=False) == msg          # plain MessagePack map on the wire
    assert bp.decode(frame, SHAPE) == msg


def test_integers_are_accepted_as_numbers_and_come_back_as_floats():
    msg = _valid_messages()["step"]
    msg["flap_deg"] = [1, 0, -2]
    msg["brake_nm"] = 1
    out = bp.decode(msgpack.packb(msg), SHAPE)
    assert out["flap_deg"] == [1.0, 0.0, -2.0] and all(type(x) is float for x in out["flap_deg"])
    assert type(out["brake_nm"]) is float


def test_builders_produce_valid_frames():
    h = bp.decode(bp.hello(mode="free", shape=SHAPE, period_ns=500_000, watchdog_ms=20.0, client="x"))
    assert (h["type"], h["proto"], h["blades"], h["period_ns"]) == ("hello", 1, 3, 500_000)
    w = bp.decode(bp.welcome(mode="lockstep", shape=SHAPE, period_ns=1_000_000, watchdog_ms=20.0,
                             capabilities=("lockstep",), name="n"))
    assert w["capabilities"] == ["lockstep"]
    e = bp.decode(bp.error("internal", "x" * 1000, "f", 4))
    assert len(e["text"]) == 400 and e["seq"] == 4
    assert bp.decode(bp.bye()) == {"type": "bye"}


def test_setpoint_encoder_counts_and_checks():
    enc = bp.SetpointEncoder(3)
    a = bp.decode(enc.pack("command", [1.0, 2.0, 3.0], 0.5, 9), SHAPE)
    b = bp.decode(enc.pack("step", (4, 5, 6), 0, 9), SHAPE)
    assert (a["seq"], b["seq"]) == (0, 1)
    assert a["flap_deg"] == [1.0, 2.0, 3.0] and b["flap_deg"] == [4.0, 5.0, 6.0]
    assert b["type"] == "step" and b["heartbeat"] == 9
    with pytest.raises(bp.ProtocolError) as info:
        enc.pack("command", [0.0, math.nan, 0.0], 0.0, 1)
    assert info.value.field == "flap_deg[1]"
    with pytest.raises(bp.ProtocolError) as info:
        enc.pack("command", [0.0] * 3, -1.0, 1)
    assert info.value.field == "brake_nm"
    with pytest.raises(bp.ProtocolError) as info:
        enc.pack("command", [0.0] * 3, 0.0, 2**32)
    assert info.value.field == "heartbeat"
    assert enc.seq == 1                      # refused messages use no sequence number


@pytest.mark.parametrize("power", [False, True])
def test_readings_encoder_and_fill_sample_reproduce_a_sample(power):
    s = Sample(3)
    s.t_s, s.counts, s.index_latch, s.index_events = 1.5, 123456, 4000, 2
    s.torque_nm, s.flow_m_s, s.thrust_n = 0.31, 0.59, 12.5
    s.flap_deg = [1.0, -2.5, 3.25]
    s.servo_current_a = [0.1, 0.2, 0.3] if power else [math.nan] * 3
    s.servo_voltage_v = [7.0, 7.1, 7.2] if power else [math.nan] * 3
    enc = bp.ReadingsEncoder(3, thrust=False, servo_power=power)
    msg = bp.decode(enc.pack(s, 41, 0.75, True), SHAPE)
    assert (msg["seq"], msg["ack"], msg["brake_nm"], msg["safe"]) == (0, 41, 0.75, True)
    assert msg["thrust_n"] is None                    # no thrust capability -> nil
    out = Sample(3)
    bp.fill_sample(msg, out)
    assert (out.t_s, out.counts, out.index_latch, out.index_events) == (1.5, 123456, 4000, 2)
    assert (out.torque_nm, out.flow_m_s, out.flap_deg) == (0.31, 0.59, [1.0, -2.5, 3.25])
    assert math.isnan(out.thrust_n)
    if power:
        assert out.servo_current_a == [0.1, 0.2, 0.3] and out.servo_voltage_v == [7.0, 7.1, 7.2]
    else:
        assert all(math.isnan(x) for x in out.servo_current_a + out.servo_voltage_v)
    assert bp.decode(enc.pack(s, 42, 0.0, False), SHAPE)["seq"] == 1


def test_readings_encoder_sends_nil_and_empty_for_missing_sensors():
    s = Sample(3)                                  # thrust and servo telemetry NaN: not fitted
    enc = bp.ReadingsEncoder(3, thrust=True, servo_power=True)
    msg = bp.decode(enc.pack(s, -1, 0.0, True), SHAPE)
    assert msg["thrust_n"] is None
    assert msg["servo_current_a"] == [] and msg["servo_voltage_v"] == []


def _mutated(kind: str, key: str, value: object) -> bytes:
    msg = _valid_messages()[kind]
    msg[key] = value
    return msgpack.packb(msg, use_bin_type=True)


BAD_CASES = [
    # (frame, message type named, field named)
    (_mutated("command", "seq", True), "command", "seq"),                  # bool is not an int
    (_mutated("command", "seq", -1), "command", "seq"),
    (_mutated("command", "flap_deg", [0.0, math.nan, 0.0]), "command", "flap_deg[1]"),
    (_mutated("command", "flap_deg", [0.0, math.inf, 0.0]), "command", "flap_deg[1]"),
    (_mutated("command", "flap_deg", [0.0, 0.0]), "command", "flap_deg"),    # 2 entries, 3 blades
    (_mutated("command", "flap_deg", [0.0, "1", 0.0]), "command", "flap_deg[1]"),
    (_mutated("command", "brake_nm", -0.1), "command", "brake_nm"),
    (_mutated("command", "heartbeat", 2**32), "command", "heartbeat"),
    (_mutated("step", "brake_nm", None), "step", "brake_nm"),
    (_mutated("readings", "counts", 2**32), "readings", "counts"),          # beyond a 32-bit counter
    (_mutated("readings", "index_latch", -1), "readings", "index_latch"),
    (_mutated("readings", "t_s", math.nan), "readings", "t_s"),
    (_mutated("readings", "thrust_n", math.inf), "readings", "thrust_n"),
    (_mutated("readings", "servo_current_a", [1.0, 1.0, 1.0]), "readings", "servo_voltage_v"),
    (_mutated("readings", "safe", 1), "readings", "safe"),
    (_mutated("hello", "mode", "turbo"), "hello", "mode"),
    (_mutated("hello", "blades", 13), "hello", "blades"),
    (_mutated("hello", "client", b"bytes"), "hello", "client"),
    (_mutated("welcome", "capabilities", "free"), "welcome", "capabilities"),
    (_mutated("welcome", "watchdog_ms", 0.0), "welcome", "watchdog_ms"),
    (_mutated("error", "text", 5), "error", "text"),
    (_mutated("bye", "extra", 1), "bye", "extra"),                           # unknown key
    (msgpack.packb({"type": "command", "seq": 0, "flap_deg": [0.0] * 3, "brake_nm": 0.0}),
     "command", "heartbeat"),                                                # missing key
    (msgpack.packb({"type": "reset"}), "?", "type"),                         # unknown type
    (msgpack.packb({"seq": 1}), "?", "type"),
    (msgpack.packb([1, 2, 3]), "?", "<message>"),
    (msgpack.packb({1: 2}), "?", "<frame>"),                                 # non-string map key
    (msgpack.packb(msgpack.ExtType(5, b"x")), "?", "<frame>"),
    (msgpack.packb(_valid_messages()["bye"]) + b"\x00", "?", "<frame>"),     # trailing bytes
    (msgpack.packb(_valid_messages()["step"])[:-3], "?", "<frame>"),         # truncated
    (b"", "?", "<frame>"),
    (b"\x81" + b"\xa4type" + b"\xa3bye" * 2000, "?", "<frame>"),             # over 4096 bytes
]


@pytest.mark.parametrize("frame,msg_type,field", BAD_CASES,
                         ids=[f"{i}-{t}-{f}" for i, (_, t, f) in enumerate(BAD_CASES)])
def test_malformed_messages_name_type_and_field(frame, msg_type, field):
    with pytest.raises(bp.ProtocolError) as info:
        bp.decode(frame, SHAPE)
    err = info.value
    assert (err.msg_type, err.field) == (msg_type, field)
    assert isinstance(err, BusError) and field in str(err)


def test_a_later_protocol_version_is_told_apart_from_a_bad_message():
    later = {"type": "hello", "proto": 2, "some_new_key": 1}         # v2 may carry other keys
    with pytest.raises(bp.VersionError) as info:
        bp.decode(msgpack.packb(later))
    assert info.value.field == "proto"


def test_decode_refuses_what_is_not_bytes():
    with pytest.raises(bp.ProtocolError):
        bp.decode("a str", SHAPE)          # type: ignore[arg-type]


_PACKABLE = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**63), 2**64 - 1) | st.floats()
    | st.text(max_size=12) | st.binary(max_size=12),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=12), inner, max_size=4),
    max_leaves=10)
_FUZZ = settings(max_examples=75, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _decode_or_protocol_error(frame: bytes) -> None:
    try:
        msg = bp.decode(frame, SHAPE)
    except bp.ProtocolError:
        return
    assert msg["type"] in bp.MESSAGE_TYPES


@_FUZZ
@given(st.binary(max_size=300))
def test_property_random_bytes_never_crash(frame):
    _decode_or_protocol_error(frame)


@_FUZZ
@given(_PACKABLE)
def test_property_random_structures_never_crash(value):
    _decode_or_protocol_error(msgpack.packb(value, use_bin_type=True))


@_FUZZ
@given(st.sampled_from(bp.MESSAGE_TYPES), st.data())
def test_property_one_field_replaced_gives_protocol_error_or_valid(kind, data):
    msg = _valid_messages()[kind]
    if len(msg) == 1:
        return
    key = data.draw(st.sampled_from(sorted(k for k in msg if k != "type")))
    msg[key] = data.draw(_PACKABLE)
    _decode_or_protocol_error(msgpack.packb(msg, use_bin_type=True))


@_FUZZ
@given(st.sampled_from(bp.MESSAGE_TYPES), st.data())
def test_property_missing_or_unknown_key_is_named(kind, data):
    msg = _valid_messages()[kind]
    if data.draw(st.booleans()) and len(msg) > 1:
        key = data.draw(st.sampled_from(sorted(k for k in msg if k != "type")))
        del msg[key]
    else:
        key = data.draw(st.text(min_size=1, max_size=12).filter(lambda k: k not in msg))
        msg[key] = data.draw(_PACKABLE)
    with pytest.raises(bp.ProtocolError) as info:
        bp.decode(msgpack.packb(msg, use_bin_type=True), SHAPE)
    assert info.value.field == key and info.value.msg_type == kind


@_FUZZ
@given(st.sampled_from(bp.MESSAGE_TYPES), st.data())
def test_property_truncated_valid_frames_give_protocol_error(kind, data):
    frame = bp.encode(_valid_messages()[kind], SHAPE)
    cut = data.draw(st.integers(0, len(frame) - 1))
    with pytest.raises(bp.ProtocolError):
        bp.decode(frame[:cut], SHAPE)


# ------------------------------------------------------------------------------- options
def _profile_with_bus(flume_path: Path, options: str):
    text = flume_path.read_text(encoding="utf-8").replace(
        '[bus]\nbackend = "sim"', f'[bus]\nbackend = "bridge"\noptions = {options}')
    assert 'backend = "bridge"' in text
    import tomllib
    return parse_profile(tomllib.loads(text), "bridge_rig.toml", text)


def test_options_are_read_strictly_from_the_profile(flume_path):
    p = _profile_with_bus(flume_path, '{ endpoint = "tcp://127.0.0.1:6001", mode = "free", timeout_ms = 50 }')
    o = bridge_options(p)
    assert (o.endpoint, o.mode, o.timeout_ms, o.watchdog_ms) == ("tcp://127.0.0.1:6001", "free", 50.0, 200.0)
    assert bridge_options(p, "tcp://[::1]:7000").endpoint == "tcp://[::1]:7000"    # --bridge wins


@pytest.mark.parametrize("options,key", [
    ('{ endpoint = "udp://127.0.0.1:6001" }', "bus.options.endpoint"),
    ('{ endpoint = "tcp://127.0.0.1:70000" }', "bus.options.endpoint"),
    ('{ endpoint = "tcp://127.0.0.1" }', "bus.options.endpoint"),
    ('{ endpoint = "tcp://127.0.0.1:6001", mode = "fast" }', "bus.options.mode"),
    ('{ endpoint = "tcp://127.0.0.1:6001", timeout_ms = 0 }', "bus.options.timeout_ms"),
    ('{ endpoint = "tcp://127.0.0.1:6001", watchdog = 5 }', "bus.options.watchdog"),
    ('{ mode = "free" }', "bus.options.endpoint"),
])
def test_bad_options_name_the_key(flume_path, options, key):
    p = _profile_with_bus(flume_path, options)
    with pytest.raises(ProfileError) as info:
        bridge_options(p)
    assert info.value.key == key and info.value.source == "bridge_rig.toml"


def test_a_bad_command_line_endpoint_is_named(flume_path):
    p = _profile_with_bus(flume_path, '{ endpoint = "tcp://127.0.0.1:6001" }')
    with pytest.raises(ProfileError) as info:
        bridge_options(p, "tcp://*:6001")
    assert (info.value.source, info.value.key) == ("command line", "--bridge")
    assert check_endpoint("tcp://rig-bridge.local:5790", "x", "y") == "tcp://rig-bridge.local:5790"


def test_nobody_listening_is_a_bus_timeout(flume):
    with zmq.Context() as ctx, ctx.socket(zmq.ROUTER) as probe:  # find a free port, then free it
        probe.setsockopt(zmq.LINGER, 0)
        probe.bind("tcp://127.0.0.1:*")
        endpoint = probe.getsockopt_string(zmq.LAST_ENDPOINT)
        probe.unbind(endpoint)
    t0 = time.monotonic()
    with pytest.raises(BusTimeout):
        BridgePorts(flume, options=BridgeOptions(endpoint=endpoint, timeout_ms=100.0))
    assert time.monotonic() - t0 < 10.0


# ------------------------------------------------------------------------- server process
class Server:
    """``python -m sim.server`` as a subprocess, bound to a free port on 127.0.0.1.

    ``start()`` launches it; ``wait_ready()`` reads its ``ready <endpoint>`` line (time-limited).
    """

    def __init__(self, profile: Path, mode: str, log_path: Path, *extra: str) -> None:
        self._log = open(log_path, "wb")
        self.log_path = log_path
        self.endpoint = ""
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "sim.server", "--profile", str(profile), "--mode", mode,
             "--bind", "tcp://127.0.0.1:*", *extra],
            cwd=ROOT, stdout=subprocess.PIPE, stderr=self._log,
            env={**os.environ, "PYTHONPATH": str(ROOT), "OPENBLAS_NUM_THREADS": "1"})

    def wait_ready(self) -> "Server":
        if self.endpoint:
            return self
        fd = self.proc.stdout.fileno()
        buf = b""
        deadline = time.monotonic() + READY_TIMEOUT_S
        for _ in range(10_000):
            left = deadline - time.monotonic()
            if left <= 0 or self.proc.poll() is not None:
                break
            ready, _, _ = select.select([fd], [], [], left)
            if ready:
                chunk = os.read(fd, 4096)
                if not chunk:
                    break
                buf += chunk
                if b"\n" in buf:
                    line = buf.split(b"\n", 1)[0].decode()
                    assert line.startswith("ready tcp://127.0.0.1:"), line
                    self.endpoint = line.split()[1]
                    return self
        raise RuntimeError(f"sim.server did not print 'ready' in {READY_TIMEOUT_S} s: {self.stderr()}")

    def stop(self, sig: int = signal.SIGTERM) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=10)
        if not self.proc.stdout.closed:
            self.proc.stdout.close()
        if not self._log.closed:
            self._log.close()
        return self.proc.returncode

    def stderr(self) -> str:
        if not self._log.closed:
            self._log.flush()
        return self.log_path.read_text(errors="replace")


LOCKSTEP_SEED = 5
SERVER_ROLES = {   # role -> (mode, extra arguments)
    # the lockstep rig only moves on `step`; the refusal tests never step it, so they share it
    # with the exact-reproduction test in any order
    "lockstep": ("lockstep", ("--seed", str(LOCKSTEP_SEED))),     # starts at the design TSR
    "free_run": ("free", ()),
    "free_watchdog": ("free", ()),
}


@pytest.fixture(scope="module")
def servers(tmp_path_factory):
    """All the test servers, launched together (their start-up overlaps), stopped at the end."""
    root = ROOT / "hw_profiles" / "demo_flume_3blade.toml"
    logs = tmp_path_factory.mktemp("servers")
    started: dict[str, Server] = {}
    try:
        for role, (mode, extra) in SERVER_ROLES.items():
            started[role] = Server(root, mode, logs / f"{role}.log", *extra)
        yield started
    finally:
        for s in started.values():
            s.stop()


def _sine_schedule(blades: int) -> Schedule:
    """delta = -8 sin(theta) deg: a schedule under which the demo SIL rotor keeps its TSR."""
    az = [i * 10.0 for i in range(36)]
    return Schedule.from_arrays(az, [-8.0 * math.sin(math.radians(a)) for a in az], blades,
                                source="<test sine>")


class Recorder:
    def __init__(self) -> None:
        self.rows: list[tuple] = []

    def __call__(self, ctl: Controller, s: Sample) -> None:
        self.rows.append((s.t_s, s.counts, s.torque_nm, s.flow_m_s, tuple(s.flap_deg),
                          tuple(ctl.cmd), ctl.brake_nm, ctl.tsr))


def test_lockstep_sil_over_zmq_reproduces_the_in_process_run(flume, servers):
    tsr, duration_s, seed = flume.fluid.design_tsr, 2.0, LOCKSTEP_SEED
    server = servers["lockstep"].wait_ready()
    schedule = _sine_schedule(flume.blades)
    fluid = fluid_properties(flume.fluid.medium, flume.fluid.temperature_c, flume.fluid.pressure_pa)

    remote = Recorder()
    ports = BridgePorts(flume, options=BridgeOptions(endpoint=server.endpoint, watchdog_ms=5000.0,
                                                     timeout_ms=5000.0))
    with ports:
        clock = BridgeClock(ports)
        ctl = Controller(flume, schedule, ports, clock, tsr=tsr, density_kg_m3=fluid.density_kg_m3,
                         listeners=(remote,))
        state = ctl.run_for(duration_s)
        n = int(round(duration_s * flume.control.rate_hz))
        assert (ports.ack, ports.readings_seq) == (n - 1, n)   # one step per tick, each answered
    assert ctl.error is None and state.name == "RUNNING", ctl.supervisor.trips
    assert ports.closed

    # the same run in-process (the embedded lockstep SIL), same rig construction; its first
    # second must equal the first second over the bridge tick for tick
    from sim.server import build_rig
    rig = build_rig(flume, clock.period_ns, seed=seed, flow_m_s=None, tsr=tsr)
    local = Recorder()
    ctl_local = Controller(flume, schedule, rig, VirtualClock(clock.period_ns, rig.step), tsr=tsr,
                           density_kg_m3=fluid.density_kg_m3, listeners=(local,))
    ctl_local.run_for(duration_s / 2)
    rig.close()

    assert len(remote.rows) == n and len(local.rows) == n // 2
    assert remote.rows[: n // 2] == local.rows          # bit for bit: msgpack float64 is exact
    # the rotor holds its TSR set-point (loosely: the SIL physics, identical in-process, sets how well)
    last = remote.rows[n // 2:]
    mean_tsr = sum(r[7] for r in last) / len(last)
    assert abs(mean_tsr - tsr) < 0.25 * tsr, mean_tsr     # band: common practice, no source
    # the flaps follow the schedule: feedback tracks the command of a few ticks before
    cmd = [r[5][0] for r in last]
    fb = [r[4][0] for r in last]
    best = max(_correlation(cmd[: len(cmd) - lag], fb[lag:]) for lag in range(0, 60, 5))
    assert best > 0.9, best                               # threshold: common practice, no source
    assert max(fb) > 4.0 and min(fb) < -4.0          # amplitude of an 8 deg schedule reaches the flap


def _correlation(a: list[float], b: list[float]) -> float:
    n = len(a)
    ma, mb = sum(a) / n, sum(b) / n
    sab = sum((x - ma) * (y - mb) for x, y in zip(a, b))
    saa = sum((x - ma) ** 2 for x in a)
    sbb = sum((y - mb) ** 2 for y in b)
    return sab / math.sqrt(saa * sbb) if saa > 0 and sbb > 0 else 0.0


def _relaxed_limits(profile_path: Path):
    """The profile with wide interlock limits, for a transport test in real time.

    * The SIL model takes ~80-100 ms for some steps (induction re-solves); paced in real time those
      are true telemetry gaps, which the 50 ms default telemetry limit trips on.
    * When the controller misses one readings (newest-value semantics) the estimator, which
      assumes a fixed tick, sees two periods of counts at once: a speed spike that can cross the
      overspeed limit although the rotor is not overspeeding.
    """
    import tomllib
    text = profile_path.read_text(encoding="utf-8")
    data = tomllib.loads(text)
    data["limits"].update(telemetry_timeout_s=2.0, max_speed_rpm=5000.0, max_tsr=20.0)
    return parse_profile(data, str(profile_path), text)


def test_free_running_sil_over_zmq(flume_path, servers):
    flume = _relaxed_limits(flume_path)
    server = servers["free_run"].wait_ready()
    fluid = fluid_properties(flume.fluid.medium, flume.fluid.temperature_c, flume.fluid.pressure_pa)
    rec = Recorder()
    ports = BridgePorts(flume, options=BridgeOptions(endpoint=server.endpoint, mode="free",
                                                     watchdog_ms=2000.0, timeout_ms=3000.0))
    with ports:
        clock = BridgeClock(ports)
        ctl = Controller(flume, _sine_schedule(flume.blades), ports, clock,
                         tsr=flume.fluid.design_tsr, density_kg_m3=fluid.density_kg_m3,
                         listeners=(rec,))
        state = ctl.run_for(0.4)              # 400 ticks; about a second of wall time here
        assert ctl.error is None and state.name == "RUNNING", ctl.supervisor.trips
        assert len(rec.rows) == 400
        assert ports.readings_seq >= 400
        assert not ports.bridge_safe            # our commands are in force at the bridge
        assert ports.ack > 300                  # and it applied them as they came
        ts = [r[0] for r in rec.rows]
        assert all(b >= a for a, b in zip(ts, ts[1:]))
        assert max(abs(r[4][0]) for r in rec.rows) > 1.0      # the flaps moved on the schedule
    assert ports.closed
    assert server.stop(signal.SIGINT) == 0                   # clean Ctrl-C shutdown
    assert "1 sessions" in server.stderr()


def test_wrong_blade_count_is_refused_with_a_clear_error(tunnel_path, servers):
    from flapctl.profile import load_profile
    server = servers["lockstep"].wait_ready()
    tunnel = load_profile(tunnel_path)                     # 2 blades; the server runs 3
    with pytest.raises(ProfileError) as info:
        BridgePorts(tunnel, options=BridgeOptions(endpoint=server.endpoint, timeout_ms=5000.0))
    err = info.value
    assert (err.source, err.key, err.value) == (str(tunnel_path), "geometry.blades", 2)
    assert "blades = 3" in str(err) and server.endpoint in str(err)


def test_version_busy_and_no_session_are_refused(flume, servers):
    server = servers["lockstep"].wait_ready()
    with zmq.Context() as ctx:
        raw = ctx.socket(zmq.DEALER)
        raw.setsockopt(zmq.LINGER, 0)
        raw.connect(server.endpoint)

        def ask(frame: bytes) -> dict:
            raw.send(frame)
            assert raw.poll(5000), "no answer from sim.server"
            return bp.decode(raw.recv(), SHAPE)

        later = {"type": "hello", "proto": 2, "mode": "lockstep"}
        assert ask(msgpack.packb(later))["code"] == "version"
        assert ask(bp.SetpointEncoder(3).pack("step", [0.0] * 3, 0.0, 1))["code"] == "no_session"
        answer = ask(msgpack.packb({"type": "step", "seq": 0}))
        assert (answer["code"], answer["field"]) == ("bad_message", "brake_nm")
        assert ask(msgpack.packb({"type": "reset"}))["code"] == "unknown_type"

        first = BridgePorts(flume, options=BridgeOptions(endpoint=server.endpoint, timeout_ms=5000.0,
                                                         watchdog_ms=5000.0), context=ctx)
        with first:
            with pytest.raises(BridgeError) as info:
                BridgePorts(flume, options=BridgeOptions(endpoint=server.endpoint, timeout_ms=5000.0),
                            context=ctx)
            assert info.value.code == "busy"
            assert not first.closed and first.welcome["mode"] == "lockstep"
        # after bye, a new controller may open a session
        second = BridgePorts(flume, options=BridgeOptions(endpoint=server.endpoint, timeout_ms=5000.0),
                             context=ctx)
        second.close()
        raw.close()


def test_watchdog_puts_the_bridge_in_its_safe_state(flume, servers):
    server = servers["free_watchdog"].wait_ready()
    hold = flume.brake.hold_torque_nm
    ports = BridgePorts(flume, options=BridgeOptions(endpoint=server.endpoint, mode="free",
                                                     watchdog_ms=300.0, timeout_ms=5000.0))
    try:
        ports.command_flaps([10.0] * flume.blades)
        ports.command_brake(0.0)
        ports.heartbeat()
        ports.flush()
        seq = ports.readings_seq
        deadline = time.monotonic() + 20.0
        moved = False
        for _ in range(20_000):                      # keep the watchdog fed until the flaps move
            seq = ports.wait_readings(seq)
            if min(ports.sample.flap_deg) > 5.0 and not ports.bridge_safe:
                moved = True
                break
            assert time.monotonic() < deadline, "flaps did not move"
            ports.heartbeat()
            ports.flush()
        assert moved and ports.bridge_brake_nm == 0.0
        # now the controller "freezes": commands keep coming, but with the same heartbeat
        ports.flush()
        went_safe = settled = refused = False
        for _ in range(20_000):
            assert time.monotonic() < deadline, "bridge did not go safe"
            try:
                seq = ports.wait_readings(seq)
            except BridgeError as exc:                 # a command that crossed the latch
                assert exc.code == "safe_latched"
                refused = True
                continue
            if ports.bridge_safe:
                went_safe = True
                if max(abs(d) for d in ports.sample.flap_deg) < 0.5:
                    settled = True
                    break
            if not went_safe and not refused:
                ports.flush()                          # same heartbeat value: does not feed it
        assert went_safe and settled
        assert ports.bridge_brake_nm == hold             # brake at the profile's hold torque
        # the safe state is latched: a fresh command is refused until a new hello
        ports.heartbeat()
        ports.flush()
        with pytest.raises(BridgeError) as info:
            for _ in range(20_000):
                seq = ports.wait_readings(seq)
                assert time.monotonic() < deadline
        assert info.value.code == "safe_latched"
    finally:
        ports.close()
    assert server.stop() == 0
    assert "1 watchdog trips" in server.stderr()


# ------------------------------------------- the backend against a minimal scripted bridge
class ScriptedBridge:
    """A minimal bridge on a real ROUTER socket (a thread): welcome, readings, records the rest.

    ``welcome`` overrides fields of the welcome it sends; ``answer_steps`` False leaves steps
    unanswered; ``extra_readings`` readings are sent right after the first one; ``garbage`` is sent
    as the answer to the first step.  The thread owns its own context and socket and stops on
    ``bye``, on :meth:`join` or after 10 s.
    """

    def __init__(self, *, mode: str = "lockstep", welcome: dict | None = None,
                 answer_steps: bool = True, extra_readings: int = 0, garbage: bytes | None = None) -> None:
        import threading
        self.ctx = zmq.Context()
        self.sock = self.ctx.socket(zmq.ROUTER)
        self.sock.setsockopt(zmq.LINGER, 0)
        self.sock.bind("tcp://127.0.0.1:*")
        self.endpoint = self.sock.getsockopt_string(zmq.LAST_ENDPOINT)
        self.mode = mode
        self.welcome = welcome or {}
        self.answer_steps = answer_steps
        self.extra_readings = extra_readings
        self.garbage = garbage
        self.received: list[dict] = []
        self.sample = Sample(3)
        self.sample.counts = 100
        self.sample.servo_current_a = [0.25] * 3
        self.sample.servo_voltage_v = [7.0] * 3
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self) -> None:
        try:
            self._serve()
        finally:
            self.sock.close()
            self.ctx.term()

    def _serve(self) -> None:
        enc = bp.ReadingsEncoder(3, thrust=False, servo_power=True)
        deadline = time.monotonic() + 10.0
        for _ in range(100_000):
            if self.stop.is_set() or time.monotonic() > deadline:
                return
            if not self.sock.poll(20):
                continue
            peer, frame = self.sock.recv_multipart()
            msg = bp.decode(frame, SHAPE if self.received else None)
            self.received.append(msg)
            if msg["type"] == "hello":
                w = {"type": "welcome", "proto": 1, "mode": self.mode, "blades": 3,
                     "counts_per_rev": 4096, "counter_bits": 32, "period_ns": msg["period_ns"],
                     "watchdog_ms": msg["watchdog_ms"], "capabilities": [self.mode, "servo_power"], "name": "scripted"}
                w.update(self.welcome)
                self.sock.send_multipart((peer, bp.encode(w)))
                self.sock.send_multipart((peer, enc.pack(self.sample, -1, 0.0, True)))
                for _k in range(self.extra_readings):
                    self.sample.counts += 5
                    self.sample.t_s += 0.001
                    self.sock.send_multipart((peer, enc.pack(self.sample, -1, 0.0, True)))
            elif msg["type"] == "step" and self.answer_steps:
                if self.garbage is not None:
                    self.sock.send_multipart((peer, self.garbage))
                    continue
                self.sample.t_s += 0.001
                self.sock.send_multipart((peer, enc.pack(self.sample, msg["seq"], msg["brake_nm"], False)))
            elif msg["type"] == "bye":
                return

    def join(self, stop: bool = False) -> list[dict]:
        if stop:
            self.stop.set()
        self.thread.join(timeout=15.0)
        assert not self.thread.is_alive()
        return self.received


@pytest.fixture
def scripted():
    made: list[ScriptedBridge] = []

    def make(**kw) -> ScriptedBridge:
        b = ScriptedBridge(**kw)
        made.append(b)
        return b

    yield make
    for b in made:
        b.join(stop=True)


def _opts(bridge: ScriptedBridge, *, mode: str = "lockstep", timeout_ms: float = 3000.0,
          watchdog_ms: float = 200.0) -> BridgeOptions:
    return BridgeOptions(endpoint=bridge.endpoint, mode=mode, timeout_ms=timeout_ms,
                         watchdog_ms=watchdog_ms)


def test_one_step_per_tick_and_close_sends_safe_then_bye(flume, scripted):
    bridge = scripted()
    ports = BridgePorts(flume, options=_opts(bridge, watchdog_ms=150.0), client="t")
    clock = BridgeClock(ports)
    clock.start()
    ports.command_flaps([5.0, -5.0, 2.5])
    ports.command_brake(0.3)
    ports.heartbeat()
    clock.wait()                              # tick 1: one step carrying the tick's set-points
    ports.command_flaps([6.0, -6.0, 3.0])
    clock.wait()                              # tick 2: a controller that skipped heartbeat()
    assert clock.ticks == 2 and ports.ack == 1 and ports.read().t_s == pytest.approx(0.002)
    ports.close()
    ports.close()                             # idempotent
    got = bridge.join()
    assert [m["type"] for m in got] == ["hello", "step", "step", "command", "bye"]
    hello, s1, s2, safe, _ = got
    assert (hello["blades"], hello["counts_per_rev"], hello["period_ns"], hello["watchdog_ms"],
            hello["client"]) == (3, flume.encoder.counts_per_rev, 1_000_000, 150.0, "t")
    assert (s1["seq"], s1["flap_deg"], s1["brake_nm"], s1["heartbeat"]) == (0, [5.0, -5.0, 2.5], 0.3, 1)
    assert (s2["seq"], s2["flap_deg"], s2["heartbeat"]) == (1, [6.0, -6.0, 3.0], 1)   # not fed
    assert (safe["flap_deg"], safe["brake_nm"]) == ([0.0] * 3, flume.brake.hold_torque_nm)


def test_a_silent_bridge_is_a_bus_timeout(flume, scripted):
    bridge = scripted(answer_steps=False)
    with BridgePorts(flume, options=_opts(bridge, timeout_ms=100.0)) as ports:
        t0 = time.monotonic()
        with pytest.raises(BusTimeout, match="no readings for step 0"):
            ports.step()
        assert time.monotonic() - t0 < 5.0
    bridge.join()


def test_a_welcome_for_another_rig_is_refused(flume, scripted):
    bridge = scripted(welcome={"counts_per_rev": 1024})
    with pytest.raises(ProfileError) as info:
        BridgePorts(flume, options=_opts(bridge))
    assert (info.value.key, info.value.value) == ("encoder.counts_per_rev", flume.encoder.counts_per_rev)
    assert "counts_per_rev = 1024" in str(info.value)


def test_garbage_from_the_bridge_is_a_protocol_error(flume, scripted):
    bridge = scripted(garbage=msgpack.packb({"type": "readings", "seq": "one"}))
    with BridgePorts(flume, options=_opts(bridge)) as ports:
        with pytest.raises(bp.ProtocolError) as info:
            ports.step()
        assert info.value.msg_type == "readings"
    bridge.join()


def test_free_mode_read_keeps_the_newest_readings(flume, scripted):
    bridge = scripted(mode="free", extra_readings=5)
    with BridgePorts(flume, options=_opts(bridge, mode="free")) as ports:
        seq = 0
        for _ in range(1000):                 # all five queued readings arrive within the timeout
            seq = ports.wait_readings(seq)
            if seq == 5:
                break
        s = ports.read()
        assert (ports.readings_seq, s.counts, s.t_s) == (5, 125, pytest.approx(0.005))
        assert s.telemetry_age_s >= 0.0
    bridge.join()


@pytest.mark.parametrize("wants_power", [True, False])
def test_servo_power_capability_is_checked_against_the_profile(flume_path, scripted, wants_power):
    import tomllib
    text = flume_path.read_text(encoding="utf-8")
    data = tomllib.loads(text)
    for servo in data["servos"]:
        servo["reports_power"] = wants_power
    profile = parse_profile(data, str(flume_path), text)
    bridge = scripted(welcome={"capabilities": ["lockstep"]})        # no servo_power
    if wants_power:
        with pytest.raises(ProfileError) as info:
            BridgePorts(profile, options=_opts(bridge))
        assert info.value.key == "servos[0].reports_power"
    else:
        with BridgePorts(profile, options=_opts(bridge)) as ports:
            assert ports.reports_servo_power is False
            assert ports.read().servo_current_a == [0.25] * 3         # passed on all the same
