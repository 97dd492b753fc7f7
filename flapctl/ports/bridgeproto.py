"""The bridge protocol, version 1: MessagePack maps over ZeroMQ (docs/bridge-protocol.md).

:func:`decode` turns one frame into a plain ``dict`` after complete, strict validation: exactly
the keys of its type, the right types, finite numbers, array lengths equal to the agreed blade
count and counter values inside the counter's range.  Anything else raises
:class:`ProtocolError` naming the message type, the key, the value and what was expected; no
other exception escapes, whatever the bytes.  :func:`encode` validates the same way, then packs.

Hot-path helpers (:class:`SetpointEncoder`, :class:`ReadingsEncoder`, :func:`fill_sample`) reuse
their dicts and do only the checks the peer would otherwise reject.

Units are those of the document: degrees for flaps, N m, N, m/s, A, V, seconds / ms / ns as named.
"""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import msgpack

from ..errors import BusError
from .base import Sample

__all__ = [
    "PROTO", "SUPPORTED_PROTOS", "MAX_FRAME_BYTES", "MESSAGE_TYPES", "MODES", "CAPABILITIES",
    "ERROR_CODES", "MAX_BLADES", "ProtocolError", "VersionError", "RigShape", "encode", "decode",
    "validate", "hello", "welcome", "error", "bye", "SetpointEncoder", "ReadingsEncoder",
    "fill_sample",
]

PROTO = 1
SUPPORTED_PROTOS = (1,)
MAX_FRAME_BYTES = 4096
MAX_BLADES = 12
MESSAGE_TYPES = ("hello", "welcome", "readings", "command", "step", "error", "bye")
MODES = ("lockstep", "free")
CAPABILITIES = ("lockstep", "free", "index", "thrust", "servo_power")
ERROR_CODES = ("version", "mode", "shape_mismatch", "bad_message", "unknown_type", "no_session",
               "busy", "stale_seq", "safe_latched", "internal")
SEQ_MAX = 2**63 - 1
HEARTBEAT_MODULUS = 2**32
_NAN = float("nan")


class ProtocolError(BusError):
    """A bridge message is malformed: ``msg_type``, ``field``, ``value`` and ``expected`` say how."""

    def __init__(self, msg_type: str, field: str, value: object, expected: str) -> None:
        self.msg_type = msg_type
        self.field = field
        self.value = value
        self.expected = expected
        shown = repr(value)
        if len(shown) > 80:
            shown = shown[:77] + "..."
        super().__init__(f"bridge message {msg_type!r}: {field} = {shown}: expected {expected}")


class VersionError(ProtocolError):
    """A ``hello`` or ``welcome`` in a protocol version this side does not speak."""


@dataclass(frozen=True)
class RigShape:
    """What both ends must agree on: blade count and encoder counter."""

    blades: int
    counts_per_rev: int
    counter_bits: int

    @property
    def counts_modulus(self) -> int:
        return 1 << self.counter_bits


# ---------------------------------------------------------------------------------- checks
# Each check is ``check(msg_type, key, value, shape) -> value`` (floats come back as float).

def _int(lo: int, hi: int):
    expected = f"an integer in [{lo}, {hi}]"

    def check(t: str, k: str, v: object, shape: RigShape | None) -> int:
        if v.__class__ is not int or not lo <= v <= hi:
            raise ProtocolError(t, k, v, expected)
        return v
    return check


def _float(lo: float = -math.inf, hi: float = math.inf, lo_open: bool = False):
    expected = "a finite number" + (f" {'>' if lo_open else '>='} {lo:g}" if lo > -math.inf else "") \
        + (f" <= {hi:g}" if hi < math.inf else "")

    def check(t: str, k: str, v: object, shape: RigShape | None) -> float:
        c = v.__class__
        if c is not float and c is not int:
            raise ProtocolError(t, k, v, expected)
        f = float(v)
        if f - f != 0.0 or not (lo < f if lo_open else lo <= f) or not f <= hi:   # NaN, inf
            raise ProtocolError(t, k, v, expected)
        return f
    return check


def _str(max_len: int, choices: tuple[str, ...] = ()):
    expected = ("one of " + ", ".join(map(repr, choices))) if choices \
        else f"a string of at most {max_len} characters"

    def check(t: str, k: str, v: object, shape: RigShape | None) -> str:
        if v.__class__ is not str or len(v) > max_len or (choices and v not in choices):
            raise ProtocolError(t, k, v, expected)
        return v
    return check


def _bool(t: str, k: str, v: object, shape: RigShape | None) -> bool:
    if v is not True and v is not False:
        raise ProtocolError(t, k, v, "true or false")
    return v


def _strs(max_items: int, max_len: int):
    def check(t: str, k: str, v: object, shape: RigShape | None) -> list[str]:
        if v.__class__ is not list or len(v) > max_items:
            raise ProtocolError(t, k, v, f"an array of at most {max_items} strings")
        for i, s in enumerate(v):
            if s.__class__ is not str or len(s) > max_len:
                raise ProtocolError(t, f"{k}[{i}]", s, f"a string of at most {max_len} characters")
        return v
    return check


def _floats(may_be_empty: bool):
    """Per-blade array: N finite numbers (N from the shape, else 1..MAX_BLADES), or [] if allowed."""

    def check(t: str, k: str, v: object, shape: RigShape | None) -> list[float]:
        if v.__class__ is not list:
            raise ProtocolError(t, k, v, "an array of finite numbers, one per blade")
        n = len(v)
        if not (n == 0 and may_be_empty):
            if shape is not None:
                if n != shape.blades:
                    raise ProtocolError(t, k, f"{n} entries", f"{shape.blades} entries, one per blade"
                                        + (" (or none)" if may_be_empty else ""))
            elif not 1 <= n <= MAX_BLADES:
                raise ProtocolError(t, k, f"{n} entries", f"1 to {MAX_BLADES} entries, one per blade")
        for i in range(n):
            x = v[i]
            c = x.__class__
            if c is float:
                if x - x != 0.0:          # NaN or infinite
                    raise ProtocolError(t, f"{k}[{i}]", x, "a finite number")
            elif c is int:
                v[i] = float(x)
            else:
                raise ProtocolError(t, f"{k}[{i}]", x, "a finite number")
        return v
    return check


def _counter(nil_ok: bool):
    def check(t: str, k: str, v: object, shape: RigShape | None) -> int | None:
        if v is None and nil_ok:
            return None
        hi = (shape.counts_modulus if shape is not None else 1 << 64) - 1
        if v.__class__ is not int or not 0 <= v <= hi:
            raise ProtocolError(t, k, v, f"an integer counter value in [0, {hi}]"
                                + (" or nil" if nil_ok else ""))
        return v
    return check


def _float_or_nil():
    inner = _float()

    def check(t: str, k: str, v: object, shape: RigShape | None) -> float | None:
        if v is None:
            return None
        try:
            return inner(t, k, v, shape)
        except ProtocolError:
            raise ProtocolError(t, k, v, "a finite number or nil") from None
    return check


_SHAPE_FIELDS = {
    "blades": _int(1, MAX_BLADES),
    "counts_per_rev": _int(4, 1 << 24),
    "counter_bits": _int(8, 64),
    "period_ns": _int(10_000, 1_000_000_000),
    "watchdog_ms": _float(0.0, 60_000.0, lo_open=True),
}
_SETPOINTS = {
    "seq": _int(0, SEQ_MAX),
    "flap_deg": _floats(may_be_empty=False),
    "brake_nm": _float(0.0),
    "heartbeat": _int(0, HEARTBEAT_MODULUS - 1),
}
SPECS: dict[str, dict] = {
    "hello": {"proto": _int(1, 1 << 31), "mode": _str(16, MODES), **_SHAPE_FIELDS,
              "client": _str(200)},
    "welcome": {"proto": _int(1, 1 << 31), "mode": _str(16, MODES), **_SHAPE_FIELDS,
                "capabilities": _strs(32, 32), "name": _str(200)},
    "readings": {
        "seq": _int(0, SEQ_MAX), "ack": _int(-1, SEQ_MAX), "t_s": _float(),
        "counts": _counter(False), "index_latch": _counter(True), "index_events": _int(0, SEQ_MAX),
        "torque_nm": _float(), "flow_m_s": _float(), "thrust_n": _float_or_nil(),
        "flap_deg": _floats(False), "servo_current_a": _floats(True), "servo_voltage_v": _floats(True),
        "brake_nm": _float(0.0), "safe": _bool,
    },
    "command": _SETPOINTS,
    "step": _SETPOINTS,
    "error": {"code": _str(32), "text": _str(400), "field": _str(64), "seq": _int(-1, SEQ_MAX)},
    "bye": {},
}
_KEYS = {t: frozenset(spec) | {"type"} for t, spec in SPECS.items()}
_ITEMS = {t: tuple(spec.items()) for t, spec in SPECS.items()}
_PER_BLADE = ("flap_deg", "servo_current_a", "servo_voltage_v")


def validate(msg: object, shape: RigShape | None = None) -> dict:
    """Check ``msg`` against its type's schema (in place: integers in float fields become floats).

    ``shape`` fixes the blade count and counter width of per-blade arrays and counter values;
    without it arrays must just be 1..12 long and consistent with each other.
    """
    if msg.__class__ is not dict:
        raise ProtocolError("?", "<message>", type(msg).__name__, "a map with string keys")
    t = msg.get("type")
    if t.__class__ is not str or t not in _KEYS:
        raise ProtocolError("?", "type", t, "one of " + ", ".join(map(repr, MESSAGE_TYPES)))
    if t == "hello" or t == "welcome":
        proto = msg.get("proto")
        if proto.__class__ is int and proto not in SUPPORTED_PROTOS:
            raise VersionError(t, "proto", proto, "a supported version: "
                               + ", ".join(map(str, SUPPORTED_PROTOS)))
    if msg.keys() != _KEYS[t]:
        keys = _KEYS[t]
        for k in msg:
            if k not in keys:
                raise ProtocolError(t, str(k) if k.__class__ is str else repr(k), msg[k],
                                    "no such key; allowed: " + ", ".join(sorted(keys)))
        missing = sorted(keys - msg.keys())
        raise ProtocolError(t, missing[0], "<missing>", "a required key")
    for k, check in _ITEMS[t]:
        msg[k] = check(t, k, msg[k], shape)
    if shape is None and "flap_deg" in msg:
        n = len(msg["flap_deg"])
        for k in _PER_BLADE[1:]:
            if k in msg and len(msg[k]) not in (0, n):
                raise ProtocolError(t, k, f"{len(msg[k])} entries", f"{n} entries like flap_deg, or none")
    if t == "readings" and (len(msg["servo_current_a"]) == 0) != (len(msg["servo_voltage_v"]) == 0):
        raise ProtocolError(t, "servo_voltage_v", f"{len(msg['servo_voltage_v'])} entries",
                            "as many entries as servo_current_a (both per blade, or both empty)")
    return msg


def decode(frame: object, shape: RigShape | None = None) -> dict:
    """One frame -> a validated message dict; :class:`ProtocolError` for anything malformed."""
    if not isinstance(frame, (bytes, bytearray, memoryview)):
        raise ProtocolError("?", "<frame>", type(frame).__name__, "bytes")
    n = len(frame)
    if n > MAX_FRAME_BYTES:
        raise ProtocolError("?", "<frame>", f"{n} bytes", f"at most {MAX_FRAME_BYTES} bytes")
    try:
        msg = msgpack.unpackb(frame, raw=False, strict_map_key=True, use_list=True,
                              ext_hook=_reject_ext)
    except ProtocolError:
        raise
    except (ValueError, TypeError, OverflowError, RecursionError) as exc:  # ExtraData, FormatError, ...
        raise ProtocolError("?", "<frame>", bytes(frame[:16]),
                            f"one MessagePack map ({type(exc).__name__}: {exc})") from None
    return validate(msg, shape)


def _reject_ext(code: int, data: bytes) -> object:
    raise ProtocolError("?", "<frame>", f"ext type {code}", "no MessagePack extension types")


def encode(msg: Mapping, shape: RigShape | None = None) -> bytes:
    """Validate a message (a copy; the argument is not changed) and pack it."""
    if not isinstance(msg, Mapping):
        raise ProtocolError("?", "<message>", type(msg).__name__, "a map with string keys")
    plain = {k: (list(v) if isinstance(v, (list, tuple)) else v) for k, v in msg.items()}
    return msgpack.packb(validate(plain, shape), use_bin_type=True)


# -------------------------------------------------------------------------------- builders
def hello(*, mode: str, shape: RigShape, period_ns: int, watchdog_ms: float, client: str) -> bytes:
    return encode({"type": "hello", "proto": PROTO, "mode": mode, "blades": shape.blades,
                   "counts_per_rev": shape.counts_per_rev, "counter_bits": shape.counter_bits,
                   "period_ns": period_ns, "watchdog_ms": watchdog_ms, "client": client})


def welcome(*, mode: str, shape: RigShape, period_ns: int, watchdog_ms: float,
            capabilities: Sequence[str], name: str) -> bytes:
    return encode({"type": "welcome", "proto": PROTO, "mode": mode, "blades": shape.blades,
                   "counts_per_rev": shape.counts_per_rev, "counter_bits": shape.counter_bits,
                   "period_ns": period_ns, "watchdog_ms": watchdog_ms,
                   "capabilities": list(capabilities), "name": name})


def error(code: str, text: str, field: str = "", seq: int = -1) -> bytes:
    """An ``error`` message; ``text`` is cut to the 400 characters the schema allows."""
    return encode({"type": "error", "code": code, "text": text[:400], "field": field[:64],
                   "seq": seq})


def bye() -> bytes:
    return encode({"type": "bye"})


class SetpointEncoder:
    """Packs ``command`` / ``step`` messages for one session without re-validating the layout.

    ``seq`` starts at 0 and advances by one per message; ``heartbeat`` is the controller's alive
    counter as the caller keeps it.  Non-finite set-points, negative brake torques and heartbeat
    values outside 0..2^32-1 raise :class:`ProtocolError` here, before sending.
    """

    def __init__(self, blades: int) -> None:
        self.blades = blades
        self.seq = -1
        self._flaps = [0.0] * blades
        self._msg = {"type": "command", "seq": 0, "flap_deg": self._flaps, "brake_nm": 0.0,
                     "heartbeat": 0}
        self._pack = msgpack.Packer(use_bin_type=True).pack

    def pack(self, kind: str, flap_deg: Sequence[float], brake_nm: float, heartbeat: int) -> bytes:
        flaps = self._flaps
        for i in range(self.blades):
            x = flap_deg[i]
            if x - x != 0.0:
                raise ProtocolError(kind, f"flap_deg[{i}]", x, "a finite number")
            flaps[i] = float(x)
        if not 0.0 <= brake_nm < math.inf:
            raise ProtocolError(kind, "brake_nm", brake_nm, "a finite number >= 0")
        if heartbeat.__class__ is not int or not 0 <= heartbeat < HEARTBEAT_MODULUS:
            raise ProtocolError(kind, "heartbeat", heartbeat, f"an integer in [0, {HEARTBEAT_MODULUS - 1}]")
        self.seq += 1
        m = self._msg
        m["type"] = kind
        m["seq"] = self.seq
        m["brake_nm"] = float(brake_nm)
        m["heartbeat"] = heartbeat
        return self._pack(m)


class ReadingsEncoder:
    """Packs ``readings`` from a :class:`~flapctl.ports.base.Sample` (the bridge side).

    A NaN thrust (no load cell) goes out as nil, NaN servo telemetry as empty arrays.
    """

    def __init__(self, blades: int, *, thrust: bool, servo_power: bool) -> None:
        self.seq = -1
        self._thrust = thrust
        self._power = servo_power
        self._msg: dict = {"type": "readings", "seq": 0, "ack": -1, "t_s": 0.0, "counts": 0,
                           "index_latch": None, "index_events": 0, "torque_nm": 0.0,
                           "flow_m_s": 0.0, "thrust_n": None, "flap_deg": [0.0] * blades,
                           "servo_current_a": [0.0] * blades if servo_power else [],
                           "servo_voltage_v": [0.0] * blades if servo_power else [],
                           "brake_nm": 0.0, "safe": True}
        self._pack = msgpack.Packer(use_bin_type=True).pack

    def reset(self) -> None:
        """Start a new session: the next readings has ``seq`` 0."""
        self.seq = -1

    def pack(self, s: Sample, ack: int, brake_nm: float, safe: bool) -> bytes:
        self.seq += 1
        m = self._msg
        m["seq"] = self.seq
        m["ack"] = ack
        m["t_s"] = s.t_s
        m["counts"] = s.counts
        m["index_latch"] = s.index_latch
        m["index_events"] = s.index_events
        m["torque_nm"] = s.torque_nm
        m["flow_m_s"] = s.flow_m_s
        thrust = s.thrust_n
        m["thrust_n"] = thrust if self._thrust and thrust - thrust == 0.0 else None   # NaN -> nil
        m["flap_deg"][:] = s.flap_deg
        if self._power:
            amps, volts = s.servo_current_a, s.servo_voltage_v
            if all(x - x == 0.0 for x in amps) and all(x - x == 0.0 for x in volts):
                m["servo_current_a"] = list(amps)
                m["servo_voltage_v"] = list(volts)
            else:                         # not reported this sample: send none rather than NaN
                m["servo_current_a"] = []
                m["servo_voltage_v"] = []
        m["brake_nm"] = brake_nm
        m["safe"] = safe
        return self._pack(m)


def fill_sample(msg: dict, sample: Sample) -> None:
    """Copy a validated ``readings`` into ``sample`` in place (nil / empty -> NaN)."""
    sample.t_s = msg["t_s"]
    sample.counts = msg["counts"]
    sample.index_latch = msg["index_latch"]
    sample.index_events = msg["index_events"]
    sample.torque_nm = msg["torque_nm"]
    sample.flow_m_s = msg["flow_m_s"]
    thrust = msg["thrust_n"]
    sample.thrust_n = _NAN if thrust is None else thrust
    sample.flap_deg[:] = msg["flap_deg"]
    amps, volts = msg["servo_current_a"], msg["servo_voltage_v"]
    if amps:
        sample.servo_current_a[:] = amps
        sample.servo_voltage_v[:] = volts
