"""Operator messages: versioned msgpack schemas for commands, replies and telemetry.

Every message is one msgpack map with string keys (never pickle) and ``"v": PROTOCOL_VERSION``.

Commands (operator -> controller), ``{"v": 1, "cmd": NAME, "seq": N, ...fields}``:

=================  ==========================================================================
``arm``            SAFE -> ARMED (brake loop holds the set point, flaps neutral)
``start``          ARMED -> RUNNING (schedule active)
``stop``           ARMED / RUNNING -> STOPPING (controlled stop)
``acknowledge``    FAULT -> SAFE (clears the latched trip)
``set_tsr``        ``value``: TSR set point of the brake loop, 0 < value <= 20
``load_schedule``  ``path``: schedule file (.csv / .toml) on the controller PC
``set_lead``       ``mode``: "none" | "angle" | "dead_time"; ``angle_deg`` in [-180, 180]
                   (required for "angle", optional for "dead_time", absent for "none");
                   ``dead_time_s`` in [0, 0.5] (required for "dead_time", absent otherwise)
``heartbeat``      the operator is present (any valid command also counts)
``status``         ask for a status map
=================  ==========================================================================

``seq`` is the client's sequence number (integer 0 .. 2**53), echoed in the reply.

Replies (controller -> operator), ``{"v": 1, "seq": N | None, "reply": KIND, "state": NAME,
"reason": TEXT, "status": MAP | None}`` with KIND ``ok`` (applied), ``refused`` (valid but not
allowed now, ``reason`` says why) or ``error`` (malformed, ``reason`` names the field and value).

Telemetry (published), one frame ``TOPIC + b" " + msgpack``: ``live`` (decimated snapshot of
the tick) and ``revolution`` (one per closed revolution).  Angles in degrees, powers in W,
speeds in rpm at this boundary (units in the key names).

Validation is strict: an unknown command, a missing or extra field, a wrong type (``bool`` is
never a number), a non-finite or out-of-range value raise :class:`OperatorMessageError` naming the
field and the value.  Decoding never raises anything else, whatever the bytes.
"""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import msgpack

from .errors import FlapctlError

__all__ = [
    "PROTOCOL_VERSION", "DEFAULT_COMMAND_ENDPOINT", "DEFAULT_TELEMETRY_ENDPOINT", "COMMANDS", "REPLIES", "LEAD_MODES", "TOPICS", "MAX_MESSAGE_BYTES",
    "OperatorMessageError", "Command", "Reply",
    "encode_command", "decode_command", "peek_seq", "encode_reply", "decode_reply",
    "encode_live", "encode_revolution", "decode_telemetry", "LIVE_FIELDS", "REVOLUTION_FIELDS",
]

PROTOCOL_VERSION = 1
DEFAULT_COMMAND_ENDPOINT = "tcp://127.0.0.1:47210"
DEFAULT_TELEMETRY_ENDPOINT = "tcp://127.0.0.1:47211"
MAX_MESSAGE_BYTES = 65536          # larger messages are refused by the sockets themselves
MAX_SEQ = 2 ** 53
MAX_PATH_CHARS = 4096
LEAD_MODES = ("none", "angle", "dead_time")
REPLIES = ("ok", "refused", "error")
TOPICS = ("live", "revolution")


class OperatorMessageError(FlapctlError, ValueError):
    """A malformed operator or telemetry message; ``field`` and ``value`` say what was wrong."""

    def __init__(self, field_name: str, value: object, expected: str) -> None:
        self.field = field_name
        self.value = value
        self.expected = expected
        shown = repr(value)
        if len(shown) > 80:
            shown = shown[:77] + "..."
        super().__init__(f"{field_name} = {shown}: expected {expected}")


# --------------------------------------------------------------------------- field rules
@dataclass(frozen=True)
class _Num:
    lo: float
    hi: float
    lo_open: bool = False

    def check(self, key: str, value: object) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise OperatorMessageError(key, value, f"a number {self.text()}")
        v = float(value)
        if not math.isfinite(v):
            raise OperatorMessageError(key, value, "a finite number")
        if (v <= self.lo if self.lo_open else v < self.lo) or v > self.hi:
            raise OperatorMessageError(key, value, f"a number {self.text()}")
        return v

    def text(self) -> str:
        return f"{'>' if self.lo_open else '>='} {self.lo:g} and <= {self.hi:g}"


@dataclass(frozen=True)
class _Str:
    choices: tuple[str, ...] = ()
    max_chars: int = 256

    def check(self, key: str, value: object) -> str:
        if not isinstance(value, str):
            raise OperatorMessageError(key, value, "a string")
        if self.choices and value not in self.choices:
            raise OperatorMessageError(key, value, "one of " + ", ".join(map(repr, self.choices)))
        if not value.strip() or "\x00" in value or len(value) > self.max_chars:
            raise OperatorMessageError(key, value, f"a non-empty string without NUL, "
                                                   f"at most {self.max_chars} characters")
        return value


_TSR = _Num(0.0, 20.0, lo_open=True)
_ANGLE = _Num(-180.0, 180.0)
_DEAD_TIME = _Num(0.0, 0.5)
_PATH = _Str(max_chars=MAX_PATH_CHARS)
_MODE = _Str(LEAD_MODES)

#: per command: field name -> (rule, required)
_SCHEMAS: dict[str, dict[str, tuple[Any, bool]]] = {
    "arm": {}, "start": {}, "stop": {}, "acknowledge": {}, "heartbeat": {}, "status": {},
    "set_tsr": {"value": (_TSR, True)},
    "load_schedule": {"path": (_PATH, True)},
    "set_lead": {"mode": (_MODE, True), "angle_deg": (_ANGLE, False), "dead_time_s": (_DEAD_TIME, False)},
}
COMMANDS = tuple(_SCHEMAS)
_ENVELOPE = ("v", "cmd", "seq")


@dataclass(frozen=True)
class Command:
    """A validated command: ``name``, the client's ``seq`` and the checked ``fields``."""
    name: str
    seq: int
    fields: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Reply:
    """A validated reply (``kind`` is "ok", "refused" or "error")."""
    seq: int | None
    kind: str
    state: str
    reason: str = ""
    status: Mapping[str, Any] | None = None

    @property
    def ok(self) -> bool:
        return self.kind == "ok"


# --------------------------------------------------------------------------- helpers
def _unpack(data: object) -> dict[str, Any]:
    """Untrusted bytes -> a map with string keys, or OperatorMessageError (never another error)."""
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise OperatorMessageError("message", type(data).__name__, "bytes")
    if len(data) > MAX_MESSAGE_BYTES:
        raise OperatorMessageError("message", f"{len(data)} bytes", f"at most {MAX_MESSAGE_BYTES} bytes")
    try:
        obj = msgpack.unpackb(bytes(data), raw=False, strict_map_key=True, use_list=True)
    except Exception as exc:  # untrusted input: any decoder failure is a malformed message
        raise OperatorMessageError("message", bytes(data[:24]), f"one msgpack map ({type(exc).__name__})") from None
    if not isinstance(obj, dict):
        raise OperatorMessageError("message", obj, "a msgpack map")
    for key in obj:
        if not isinstance(key, str):
            raise OperatorMessageError("message key", key, "string keys")
    return obj


def _pack(obj: Mapping[str, Any]) -> bytes:
    return msgpack.packb(obj, use_bin_type=True)


def _version(obj: Mapping[str, Any]) -> None:
    v = obj.get("v", "<missing>")
    if isinstance(v, bool) or v != PROTOCOL_VERSION:
        raise OperatorMessageError("v", v, f"protocol version {PROTOCOL_VERSION}")


def _seq(value: object, key: str = "seq") -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value <= MAX_SEQ:
        raise OperatorMessageError(key, value, f"an integer 0..{MAX_SEQ}")
    return value


def _check_fields(name: str, given: Mapping[str, Any]) -> dict[str, Any]:
    schema = _SCHEMAS[name]
    for key in given:
        if key not in schema:
            allowed = ", ".join(schema) if schema else "none"
            raise OperatorMessageError(f"{name}.{key}", given[key], f"no such field (allowed: {allowed})")
    out: dict[str, Any] = {}
    for key, (rule, required) in schema.items():
        if key not in given:
            if required:
                raise OperatorMessageError(f"{name}.{key}", "<missing>", "a required field")
            continue
        out[key] = rule.check(f"{name}.{key}", given[key])
    if name == "set_lead":
        mode = out["mode"]
        if mode == "none":
            for key in ("angle_deg", "dead_time_s"):
                if key in out:
                    raise OperatorMessageError(f"set_lead.{key}", out[key], "no such field with mode 'none'")
        elif mode == "angle":
            if "angle_deg" not in out:
                raise OperatorMessageError("set_lead.angle_deg", "<missing>", "a required field with mode 'angle'")
            if "dead_time_s" in out:
                raise OperatorMessageError("set_lead.dead_time_s", out["dead_time_s"],
                                           "no such field with mode 'angle'")
        elif "dead_time_s" not in out:
            raise OperatorMessageError("set_lead.dead_time_s", "<missing>",
                                       "a required field with mode 'dead_time'")
    return out


# --------------------------------------------------------------------------- commands
def encode_command(name: str, seq: int, fields: Mapping[str, Any] | None = None) -> bytes:
    """Validate and encode a command (raises OperatorMessageError before anything is sent)."""
    if name not in _SCHEMAS:
        raise OperatorMessageError("cmd", name, "one of " + ", ".join(COMMANDS))
    checked = _check_fields(name, dict(fields or {}))
    return _pack({"v": PROTOCOL_VERSION, "cmd": name, "seq": _seq(seq), **checked})


def decode_command(data: object) -> Command:
    """Decode and validate one command message from untrusted bytes."""
    obj = _unpack(data)
    _version(obj)
    name = obj.get("cmd", "<missing>")
    if not isinstance(name, str) or name not in _SCHEMAS:
        raise OperatorMessageError("cmd", name, "one of " + ", ".join(COMMANDS))
    seq = _seq(obj.get("seq", "<missing>"))
    given = {k: v for k, v in obj.items() if k not in _ENVELOPE}
    return Command(name, seq, _check_fields(name, given))


def peek_seq(data: object) -> int | None:
    """The ``seq`` of a message that failed validation, when it can be read (for the reply)."""
    try:
        obj = _unpack(data)
        return _seq(obj.get("seq"))
    except OperatorMessageError:
        return None


# --------------------------------------------------------------------------- replies
def encode_reply(seq: int | None, kind: str, state: str, reason: str = "",
                 status: Mapping[str, Any] | None = None) -> bytes:
    if kind not in REPLIES:
        raise OperatorMessageError("reply", kind, "one of " + ", ".join(REPLIES))
    return _pack({"v": PROTOCOL_VERSION, "seq": seq, "reply": kind, "state": state,
                  "reason": reason, "status": None if status is None else dict(status)})


def decode_reply(data: object) -> Reply:
    obj = _unpack(data)
    _version(obj)
    expected = {"v", "seq", "reply", "state", "reason", "status"}
    for key in obj:
        if key not in expected:
            raise OperatorMessageError(key, obj[key], "no such field in a reply")
    for key in expected:
        if key not in obj:
            raise OperatorMessageError(key, "<missing>", "a required field of a reply")
    seq = None if obj["seq"] is None else _seq(obj["seq"])
    kind = obj["reply"]
    if kind not in REPLIES:
        raise OperatorMessageError("reply", kind, "one of " + ", ".join(REPLIES))
    for key in ("state", "reason"):
        if not isinstance(obj[key], str):
            raise OperatorMessageError(key, obj[key], "a string")
    status = obj["status"]
    if status is not None and not isinstance(status, dict):
        raise OperatorMessageError("status", status, "a map or nil")
    return Reply(seq, kind, obj["state"], obj["reason"], status)


# --------------------------------------------------------------------------- telemetry
#: field -> kind: "f" float (NaN allowed), "i" int, "s" str, "lf" list of floats, "trip" nil|map
LIVE_FIELDS = {
    "t_s": "f", "tick": "i", "state": "s", "rpm": "f", "tsr": "f", "tsr_setpoint": "f",
    "flow_m_s": "f", "torque_nm": "f", "brake_nm": "f", "cp_gross_inst": "f",
    "servo_power_w": "lf", "flap_cmd_deg": "lf", "flap_meas_deg": "lf", "last_trip": "trip",
}
REVOLUTION_FIELDS = {
    "index": "i", "t_start_s": "f", "duration_s": "f", "tsr": "f", "rpm": "f", "flow_m_s": "f",
    "cp_gross": "f", "cp_net": "f", "shaft_power_w": "f", "actuator_power_w": "f",
    "servo_power_w": "lf",
}
_TELEMETRY = {"live": LIVE_FIELDS, "revolution": REVOLUTION_FIELDS}


def _check_value(key: str, kind: str, value: object) -> object:
    if kind == "f":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise OperatorMessageError(key, value, "a number (NaN allowed)")
        return float(value)
    if kind == "i":
        if isinstance(value, bool) or not isinstance(value, int):
            raise OperatorMessageError(key, value, "an integer")
        return value
    if kind == "s":
        if not isinstance(value, str):
            raise OperatorMessageError(key, value, "a string")
        return value
    if kind == "lf":
        if not isinstance(value, list) or len(value) > 64:
            raise OperatorMessageError(key, value, "a list of at most 64 numbers")
        return [_check_value(f"{key}[{i}]", "f", v) for i, v in enumerate(value)]
    # "trip": nil or {"t_s": float, "reason": str, "detail": str}
    if value is None:
        return None
    if not isinstance(value, dict) or set(value) != {"t_s", "reason", "detail"}:
        raise OperatorMessageError(key, value, "nil or a map with t_s, reason, detail")
    return {"t_s": _check_value(f"{key}.t_s", "f", value["t_s"]),
            "reason": _check_value(f"{key}.reason", "s", value["reason"]),
            "detail": _check_value(f"{key}.detail", "s", value["detail"])}


def _encode_telemetry(topic: str, values: Mapping[str, Any]) -> bytes:
    return topic.encode() + b" " + _pack({"v": PROTOCOL_VERSION, "kind": topic, **values})


def encode_live(t_s: float, tick: int, state: str, rpm: float, tsr: float, tsr_setpoint: float,
                flow_m_s: float, torque_nm: float, brake_nm: float, cp_gross_inst: float,
                servo_power_w: Sequence[float], flap_cmd_deg: Sequence[float],
                flap_meas_deg: Sequence[float],
                last_trip: tuple[float, str, str] | None) -> bytes:
    """One ``live`` telemetry frame (topic prefix included)."""
    trip = None if last_trip is None else {"t_s": float(last_trip[0]), "reason": str(last_trip[1]),
                                           "detail": str(last_trip[2])}
    return _encode_telemetry("live", {
        "t_s": float(t_s), "tick": int(tick), "state": state, "rpm": float(rpm), "tsr": float(tsr),
        "tsr_setpoint": float(tsr_setpoint), "flow_m_s": float(flow_m_s),
        "torque_nm": float(torque_nm), "brake_nm": float(brake_nm),
        "cp_gross_inst": float(cp_gross_inst), "servo_power_w": [float(p) for p in servo_power_w],
        "flap_cmd_deg": [float(d) for d in flap_cmd_deg],
        "flap_meas_deg": [float(d) for d in flap_meas_deg], "last_trip": trip})


def encode_revolution(index: int, t_start_s: float, duration_s: float, tsr: float, rpm: float,
                      flow_m_s: float, cp_gross: float, cp_net: float, shaft_power_w: float,
                      actuator_power_w: float, servo_power_w: Sequence[float]) -> bytes:
    """One ``revolution`` telemetry frame (topic prefix included)."""
    return _encode_telemetry("revolution", {
        "index": int(index), "t_start_s": float(t_start_s), "duration_s": float(duration_s),
        "tsr": float(tsr), "rpm": float(rpm), "flow_m_s": float(flow_m_s),
        "cp_gross": float(cp_gross), "cp_net": float(cp_net), "shaft_power_w": float(shaft_power_w),
        "actuator_power_w": float(actuator_power_w),
        "servo_power_w": [float(p) for p in servo_power_w]})


def decode_telemetry(frame: object) -> tuple[str, dict[str, Any]]:
    """(topic, validated map) of one telemetry frame; OperatorMessageError if malformed."""
    if not isinstance(frame, (bytes, bytearray, memoryview)):
        raise OperatorMessageError("telemetry", type(frame).__name__, "bytes")
    raw = bytes(frame)
    topic_b, sep, payload = raw.partition(b" ")
    topic = topic_b.decode("ascii", "replace")
    if not sep or topic not in _TELEMETRY:
        raise OperatorMessageError("topic", topic_b[:24], "one of " + ", ".join(TOPICS))
    obj = _unpack(payload)
    _version(obj)
    if obj.get("kind") != topic:
        raise OperatorMessageError("kind", obj.get("kind", "<missing>"), f"{topic!r} (the topic)")
    schema = _TELEMETRY[topic]
    out: dict[str, Any] = {}
    for key, value in obj.items():
        if key in ("v", "kind"):
            continue
        if key not in schema:
            raise OperatorMessageError(f"{topic}.{key}", value, "no such field")
        out[key] = _check_value(f"{topic}.{key}", schema[key], value)
    for key in schema:
        if key not in out:
            raise OperatorMessageError(f"{topic}.{key}", "<missing>", "a required field")
    return topic, out
