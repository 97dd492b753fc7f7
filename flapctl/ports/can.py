"""Servos (and optionally the I/O box) on a CAN bus, through python-can.

The frames are data: ``[bus.options]`` of a profile with ``backend = "can"`` holds the python-can
``interface``, ``channel`` and ``bitrate`` (handed to :func:`can.Bus` unchanged, so any python-can
interface works), and :class:`~flapctl.ports.canframe.FrameLayout` tables for every frame:

* ``setpoint_frames``: either one grouped frame with signals ``angle_deg_0`` .. ``angle_deg_<N-1>``
  (one per blade) or one frame per servo, in blade order, each with the single signal ``angle_deg``.
* ``telemetry_frames``: one per servo, in blade order: ``angle_deg`` and optionally ``current_a``,
  ``voltage_v`` (required when the profile says the servo ``reports_power``).
* ``io_frames`` (optional): signals ``counts``, ``torque_nm``, ``flow_m_s`` and optionally
  ``index_latch`` + ``index_events`` and ``thrust_n``, spread over one or more frames.
* ``brake_frame`` (optional): one signal ``command`` in drive units
  (``torque_nm * brake.command_per_nm + brake.command_offset``).
* ``heartbeat_frame``: ``arbitration_id``, ``extended_id``, ``period_ms`` and the servos'
  ``watchdog_ms``; the data byte is a counter modulo 256.

When the I/O or the brake is not on CAN, :class:`CanPorts` takes another ports object (``io``) that
reads encoder, torque and flow and drives the brake.

Timing has no thread: each ``read()`` drains the receive queue without blocking (a bounded number
of frames) and keeps the newest frame of each kind; ``heartbeat()``, which a live controller calls
once per tick, sends the heartbeat frame every ``period_ms`` worth of ticks.  Time is the controller's tick time (``clock.now_s()`` when a clock
is given, else reads x tick period), so lockstep runs behave exactly like paced ones.

Errors are typed: send failures and bus-off raise :class:`CanBusError` (a ``BusError``), a send
that times out and telemetry older than ``telemetry_timeout_ms`` raise :class:`CanTimeout` (a
``BusTimeout``), each carrying the frame id and the servo.  Values a layout cannot carry raise the
codec's ``EncodeError`` unchanged.
"""
from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import can

from ..clock import Clock
from ..errors import BusError, BusTimeout, ProfileError
from ..profile import Profile
from ..schema import load_section, num, text
from .base import RigPorts, Sample
from .canframe import FrameLayout, SignalLayout, bus_load_report, worst_case_frame_bits

__all__ = [
    "CanOptions", "HeartbeatOptions", "CanConfig", "CanPorts", "CanBusError", "CanTimeout",
    "load_can_config", "open_bus", "bus_load_lines", "IO_SIGNALS", "TELEMETRY_SIGNALS",
]

log = logging.getLogger(__name__)

_OPTIONS_KEY = "bus.options"
_EXTENDED_FLAG = 1 << 29
IO_SIGNALS = ("counts", "index_latch", "index_events", "torque_nm", "flow_m_s", "thrust_n")
TELEMETRY_SIGNALS = ("angle_deg", "current_a", "voltage_v")
_IO_REQUIRED = ("counts", "torque_nm", "flow_m_s")
_COUNTER_SIGNALS = ("counts", "index_latch", "index_events")


# ------------------------------------------------------------------------------------- errors

class CanBusError(BusError):
    """Sending failed or the controller went bus-off; ``arbitration_id`` and ``servo`` say where."""

    def __init__(self, message: str, *, arbitration_id: int | None = None,
                 servo: int | None = None) -> None:
        super().__init__(message)
        self.arbitration_id = arbitration_id
        self.servo = servo


class CanTimeout(BusTimeout):
    """A send timed out, or a frame was not received in time (``age_s`` since the last one)."""

    def __init__(self, message: str, *, arbitration_id: int | None = None,
                 servo: int | None = None, age_s: float | None = None) -> None:
        super().__init__(message)
        self.arbitration_id = arbitration_id
        self.servo = servo
        self.age_s = age_s


# ------------------------------------------------------------------------------------ options

@dataclass(frozen=True, kw_only=True)
class HeartbeatOptions:
    """The controller's heartbeat frame and the servos' watchdog that expects it."""

    arbitration_id: int = num(0, 0x1FFF_FFFF, doc="heartbeat frame id")
    extended_id: bool = False
    period_ms: float = num(0.0, 10_000.0, lo_open=True, doc="heartbeat period (whole control ticks)")
    watchdog_ms: float = num(0.0, 60_000.0, lo_open=True,
                             doc="servos go to the safe state after this long without heartbeat")

    def _validate(self, source: str, prefix: str) -> None:
        # Two heartbeat periods before a trip, so one lost frame is tolerated
        # (common practice, no source).
        if self.watchdog_ms < 2.0 * self.period_ms:
            raise ProfileError(source, f"{prefix}.watchdog_ms", self.watchdog_ms,
                               f">= 2 x period_ms ({2.0 * self.period_ms:g} ms)")


@dataclass(frozen=True, kw_only=True)
class CanOptions:
    """``[bus.options]`` of a CAN profile, before the frame tables are compiled."""

    interface: str = text(doc="python-can interface, e.g. 'socketcan', 'pcan', 'virtual'")
    channel: str = text(doc="python-can channel, e.g. 'can0'")
    bitrate: int = num(10_000, 1_000_000, doc="nominal bit rate, bit/s (classical CAN)")
    port: int | None = num(1, 65535, default=None, doc="UDP port (udp_multicast interface only)")
    send_timeout_ms: float = num(0.0, 1000.0, lo_open=True, default=1.0,
                                 doc="longest a send may block")
    telemetry_timeout_ms: float = num(0.0, 60_000.0, lo_open=True, default=50.0,
                                      doc="BusTimeout when a servo or I/O frame is older")
    max_frames_per_read: int = num(1, 100_000, default=256,
                                   doc="most frames drained from the receive queue per read")
    setpoint_frames: tuple[dict, ...] = field(default=())
    telemetry_frames: tuple[dict, ...] = field(default=())
    io_frames: tuple[dict, ...] = field(default=())
    brake_frame: dict | None = None
    heartbeat_frame: HeartbeatOptions | None = None

    def _validate(self, source: str, prefix: str) -> None:
        for key in ("setpoint_frames", "telemetry_frames"):
            if not getattr(self, key):
                raise ProfileError(source, f"{prefix}.{key}", "<missing>",
                                   "a non-empty array of frame tables")
        if self.heartbeat_frame is None:
            raise ProfileError(source, f"{prefix}.heartbeat_frame", "<missing>",
                               "a table with arbitration_id, extended_id, period_ms, watchdog_ms")


# ------------------------------------------------------------------------------- compiled config

@dataclass(frozen=True)
class CanConfig:
    """Options with every frame compiled and cross-checked against the profile.

    ``setpoint_slots[i]`` = (frame index, signal position) of blade ``i``'s set-point;
    ``heartbeat_ticks`` is the heartbeat period and ``brake_ticks`` the brake loop period in
    control ticks, ``tick_s`` the control period in s.
    """

    options: CanOptions
    source: str
    blades: int
    tick_s: float
    setpoints: tuple[FrameLayout, ...]
    setpoint_slots: tuple[tuple[int, int], ...]
    telemetry: tuple[FrameLayout, ...]
    io: tuple[FrameLayout, ...]
    brake: FrameLayout | None
    heartbeat: FrameLayout
    heartbeat_ticks: int
    watchdog_s: float
    brake_per_nm: float
    brake_offset: float
    reports_power: bool
    brake_ticks: int = 1

    @property
    def grouped(self) -> bool:
        """True when one frame carries every blade's set-point."""
        return len(self.setpoints) == 1 and self.blades > 1

    @property
    def io_on_can(self) -> bool:
        return bool(self.io)

    @property
    def brake_on_can(self) -> bool:
        return self.brake is not None

    def frames(self) -> list[tuple[str, FrameLayout, float]]:
        """Every periodic frame with a label and its rate in Hz (for bus load)."""
        rate = 1.0 / self.tick_s
        out = [(f"set-point {self._label(i, len(self.setpoints))}", f, rate)
               for i, f in enumerate(self.setpoints)]
        out += [(f"telemetry servo {i}", f, rate) for i, f in enumerate(self.telemetry)]
        out += [(f"io {i}", f, rate) for i, f in enumerate(self.io)]
        if self.brake is not None:
            out.append(("brake", self.brake, rate / self.brake_ticks))
        out.append(("heartbeat", self.heartbeat, rate / self.heartbeat_ticks))
        return out

    def _label(self, index: int, count: int) -> str:
        return "all servos" if count == 1 and self.blades > 1 else f"servo {index}"


def _frame(mapping: object, source: str, key: str) -> FrameLayout:
    if not isinstance(mapping, Mapping):
        raise ProfileError(source, key, mapping, "a frame table")
    return FrameLayout.from_mapping(dict(mapping), source, key)


def _signal_index(layout: FrameLayout, name: str) -> int:
    return layout.names.index(name)


def _check_covers(layout: FrameLayout, name: str, low: float, high: float,
                  source: str, key: str, what: str) -> None:
    """The signal's representable range must hold [low, high]."""
    index = _signal_index(layout, name)
    lo, hi = layout.signals[index].physical_range
    if lo > low or hi < high:
        raise ProfileError(source, f"{key}.signals[{index}].scale", layout.signals[index].scale,
                           f"a scale and offset whose range [{lo:g}, {hi:g}] covers {what} "
                           f"[{low:g}, {high:g}]")


def _check_names(layout: FrameLayout, allowed: Sequence[str], required: Sequence[str],
                 source: str, key: str) -> None:
    for index, name in enumerate(layout.names):
        if name not in allowed:
            raise ProfileError(source, f"{key}.signals[{index}].name", name,
                               "one of " + ", ".join(map(repr, allowed)))
    for name in required:
        if name not in layout.names:
            raise ProfileError(source, f"{key}.signals", list(layout.names),
                               f"a signal named {name!r}")


def _compile_setpoints(opts: CanOptions, profile: Profile, source: str
                       ) -> tuple[tuple[FrameLayout, ...], tuple[tuple[int, int], ...]]:
    n = profile.blades
    key = f"{_OPTIONS_KEY}.setpoint_frames"
    layouts = tuple(_frame(m, source, f"{key}[{i}]") for i, m in enumerate(opts.setpoint_frames))
    if len(layouts) == 1 and n > 1:
        names = [f"angle_deg_{i}" for i in range(n)]
        _check_names(layouts[0], names, names, source, f"{key}[0]")
        slots = tuple((0, _signal_index(layouts[0], name)) for name in names)
    elif len(layouts) == n:
        for i, layout in enumerate(layouts):
            _check_names(layout, ("angle_deg",), ("angle_deg",), source, f"{key}[{i}]")
        slots = tuple((i, 0) for i in range(n))
    else:
        raise ProfileError(source, key, f"{len(layouts)} frames",
                           f"one grouped frame or one frame per servo ({n})")
    for i, (frame_index, _) in enumerate(slots):
        travel = profile.servos[i].travel_deg
        name = layouts[frame_index].names[slots[i][1]]
        _check_covers(layouts[frame_index], name, -travel, travel, source,
                      f"{key}[{frame_index}]", f"servos[{i}] travel")
    return layouts, slots


def _compile_telemetry(opts: CanOptions, profile: Profile, source: str) -> tuple[FrameLayout, ...]:
    key = f"{_OPTIONS_KEY}.telemetry_frames"
    n = profile.blades
    if len(opts.telemetry_frames) != n:
        raise ProfileError(source, key, f"{len(opts.telemetry_frames)} frames",
                           f"one telemetry frame per servo ({n}), in blade order")
    layouts = []
    for i, mapping in enumerate(opts.telemetry_frames):
        layout = _frame(mapping, source, f"{key}[{i}]")
        required = ("angle_deg", "current_a", "voltage_v") if profile.servos[i].reports_power \
            else ("angle_deg",)
        _check_names(layout, TELEMETRY_SIGNALS, required, source, f"{key}[{i}]")
        travel = profile.servos[i].travel_deg
        _check_covers(layout, "angle_deg", -travel, travel, source, f"{key}[{i}]",
                      f"servos[{i}] travel")
        layouts.append(layout)
    return tuple(layouts)


def _compile_io(opts: CanOptions, profile: Profile, source: str) -> tuple[FrameLayout, ...]:
    key = f"{_OPTIONS_KEY}.io_frames"
    layouts = tuple(_frame(m, source, f"{key}[{i}]") for i, m in enumerate(opts.io_frames))
    if not layouts:
        return layouts
    seen: dict[str, int] = {}
    for i, layout in enumerate(layouts):
        _check_names(layout, IO_SIGNALS, (), source, f"{key}[{i}]")
        for j, name in enumerate(layout.names):
            if name in seen:
                raise ProfileError(source, f"{key}[{i}].signals[{j}].name", name,
                                   f"a signal not already in io_frames[{seen[name]}]")
            seen[name] = i
            signal = layout.signals[j]
            if name in _COUNTER_SIGNALS:
                _check_counter(signal, name, profile, source, f"{key}[{i}].signals[{j}]")
    for name in _IO_REQUIRED:
        if name not in seen:
            raise ProfileError(source, key, sorted(seen), f"a signal named {name!r} in one of the frames")
    if ("index_latch" in seen) != ("index_events" in seen):
        raise ProfileError(source, key, sorted(seen), "index_latch and index_events together or neither")
    torque = profile.sensors.torque.range_nm
    flow = profile.sensors.flow.range_m_s
    for name, low, high, what in (("torque_nm", -torque, torque, "the torque sensor range"),
                                  ("flow_m_s", 0.0, flow, "the flow sensor range")):
        i = seen[name]
        _check_covers(layouts[i], name, low, high, source, f"{key}[{i}]", what)
    return layouts


def _check_counter(signal: SignalLayout, name: str, profile: Profile, source: str, key: str) -> None:
    """Counters travel as raw unsigned integers; the encoder counter keeps its width (it wraps)."""
    if signal.signed or signal.scale != 1 or signal.offset != 0:
        raise ProfileError(source, f"{key}.scale", signal.scale,
                           f"{name}: an unsigned field with scale = 1 and offset = 0 (a raw counter)")
    bits = profile.encoder.counter_bits
    if name != "index_events" and signal.width_bits != bits:
        raise ProfileError(source, f"{key}.width_bits", signal.width_bits,
                           f"{name}: encoder.counter_bits = {bits} (the counter wraps at 2**{bits})")


def _compile_brake(opts: CanOptions, profile: Profile, source: str) -> FrameLayout | None:
    if opts.brake_frame is None:
        return None
    key = f"{_OPTIONS_KEY}.brake_frame"
    layout = _frame(opts.brake_frame, source, key)
    _check_names(layout, ("command",), ("command",), source, key)
    b = profile.brake
    ends = sorted((b.command_offset + b.min_torque_nm * b.command_per_nm,
                   b.command_offset + b.max_torque_nm * b.command_per_nm))
    _check_covers(layout, "command", ends[0], ends[1], source, key, "the brake command range")
    return layout


def _compile_heartbeat(hb: HeartbeatOptions, tick_s: float, source: str) -> tuple[FrameLayout, int]:
    key = f"{_OPTIONS_KEY}.heartbeat_frame"
    layout = FrameLayout.from_mapping({
        "arbitration_id": hb.arbitration_id, "extended_id": hb.extended_id, "dlc": 1,
        "signals": [{"name": "counter", "byte_offset": 0, "width_bits": 8, "signed": False,
                     "byte_order": "little", "scale": 1.0}]}, source, key)
    ticks = round(hb.period_ms * 1e-3 / tick_s)
    if ticks < 1 or abs(ticks * tick_s - hb.period_ms * 1e-3) > 1e-6 * hb.period_ms * 1e-3:
        raise ProfileError(source, f"{key}.period_ms", hb.period_ms,
                           f"a whole number (>= 1) of control ticks of {tick_s * 1e3:g} ms")
    return layout, ticks


def _check_unique_ids(config_frames: list[tuple[str, FrameLayout]], source: str) -> None:
    owner: dict[int, str] = {}
    for key, layout in config_frames:
        ident = layout.arbitration_id | (_EXTENDED_FLAG if layout.extended_id else 0)
        if ident in owner:
            raise ProfileError(source, f"{key}.arbitration_id", layout.arbitration_id,
                               f"an id not already used by {owner[ident]}")
        owner[ident] = key


def load_can_config(profile: Profile) -> CanConfig:
    """Validate ``profile.bus.options`` as CAN options and compile every frame layout."""
    source = profile.source
    opts = load_section(CanOptions, profile.bus.options, source, _OPTIONS_KEY)
    tick_s = 1.0 / profile.control.rate_hz
    setpoints, slots = _compile_setpoints(opts, profile, source)
    telemetry = _compile_telemetry(opts, profile, source)
    io = _compile_io(opts, profile, source)
    brake = _compile_brake(opts, profile, source)
    heartbeat, hb_ticks = _compile_heartbeat(opts.heartbeat_frame, tick_s, source)
    key = _OPTIONS_KEY
    _check_unique_ids(
        [(f"{key}.setpoint_frames[{i}]", f) for i, f in enumerate(setpoints)]
        + [(f"{key}.telemetry_frames[{i}]", f) for i, f in enumerate(telemetry)]
        + [(f"{key}.io_frames[{i}]", f) for i, f in enumerate(io)]
        + ([(f"{key}.brake_frame", brake)] if brake is not None else [])
        + [(f"{key}.heartbeat_frame", heartbeat)], source)
    b = profile.brake
    return CanConfig(
        options=opts, source=source, blades=profile.blades, tick_s=tick_s, setpoints=setpoints,
        setpoint_slots=slots, telemetry=telemetry, io=io, brake=brake, heartbeat=heartbeat,
        heartbeat_ticks=hb_ticks, watchdog_s=opts.heartbeat_frame.watchdog_ms * 1e-3,
        brake_per_nm=b.command_per_nm, brake_offset=b.command_offset,
        reports_power=all(s.reports_power for s in profile.servos),
        brake_ticks=b.loop.period_ticks)


def open_bus(options: CanOptions, *, interface: str | None = None, channel: str | None = None,
             port: int | None = None) -> can.BusABC:
    """``can.Bus`` from the options; ``interface``/``channel``/``port`` override them when given."""
    interface = options.interface if interface is None else interface
    channel = options.channel if channel is None else channel
    port = options.port if port is None else port
    try:
        if port is None:
            return can.Bus(interface=interface, channel=channel, bitrate=options.bitrate)
        return can.Bus(interface=interface, channel=channel, bitrate=options.bitrate, port=port)
    except (can.CanError, OSError, ValueError, ImportError) as exc:
        raise CanBusError(f"cannot open CAN interface {interface!r} channel {channel!r}: {exc}") from exc


# ---------------------------------------------------------------------------------- bus load

def bus_load_lines(profile: Profile) -> list[str]:
    """Worst-case bus load of every periodic frame at ``control.rate_hz`` (Davis et al. 2007).

    Set-points, servo telemetry and I/O frames go once per tick, the brake frame once per brake
    loop period, the heartbeat at its period.  The last line is a warning above 70 %.
    """
    config = load_can_config(profile)
    bitrate = config.options.bitrate
    rows = config.frames()
    lines = [f"CAN bus {bitrate / 1000:g} kbit/s, worst-case frame lengths (Davis et al. 2007), "
             f"control rate {profile.control.rate_hz:g} Hz:"]
    for label, layout, rate_hz in rows:
        bits = worst_case_frame_bits(layout.dlc, layout.extended_id)
        share = bits * rate_hz / bitrate
        kind = "29-bit" if layout.extended_id else "11-bit"
        lines.append(f"  {label:<22} id 0x{layout.arbitration_id:X} {kind} {layout.dlc} B "
                     f"{bits:3d} bits x {rate_hz:g} Hz = {share:6.1%}")
    report = bus_load_report([(f.dlc, f.extended_id, r) for _, f, r in rows], bitrate)
    lines.append(f"  total worst-case load {report.load:.1%} (warning above {report.warn_above:.0%})")
    if report.warning:
        lines.append(f"WARNING: {report.warning}")
    return lines


# ------------------------------------------------------------------------------------ the ports

class CanPorts(RigPorts):
    """Rig ports with the servos (and optionally I/O and brake) on CAN.

    ``clock`` gives the tick time used for telemetry ages (default: reads x tick period).  ``io``
    supplies encoder, torque, flow (when there are no ``io_frames``) and the brake (when there
    is no ``brake_frame``).  ``interface``, ``channel`` and ``port`` override the profile's.
    """

    def __init__(self, profile: Profile, *, clock: Clock | None = None, io: RigPorts | None = None,
                 interface: str | None = None, channel: str | None = None,
                 port: int | None = None) -> None:
        super().__init__(profile.blades, profile.brake.hold_torque_nm)
        self._closed = True           # until the bus is open: close() has nothing to release
        config = load_can_config(profile)
        self.config = config
        source = profile.source
        if (not config.io_on_can or not config.brake_on_can) and io is None:
            missing = "io_frames" if not config.io_on_can else "brake_frame"
            raise ProfileError(source, f"{_OPTIONS_KEY}.{missing}", "<missing>",
                               "the frame(s), or an io ports object for the I/O off the bus")
        self.io = io
        self.reports_servo_power = config.reports_power
        opts = config.options
        self._send_timeout_s = opts.send_timeout_ms * 1e-3
        self._telemetry_timeout_s = opts.telemetry_timeout_ms * 1e-3
        self._max_frames = opts.max_frames_per_read
        self._clock = clock
        self._tick_s = config.tick_s
        self._reads = 0
        self._sample = Sample(self.blades)
        self._build_receive_table()
        self._setpoint_values = [[0.0] * len(f.names) for f in config.setpoints]
        self._heartbeat_count = 0
        self._heartbeat_ticks = config.heartbeat_ticks
        self.heartbeats_sent = 0
        self.error_frames = 0
        self.backlogged_reads = 0      # reads that hit max_frames_per_read
        self._index_seen = False
        self._index_latch_raw: int | None = None
        self.bus = open_bus(opts, interface=interface, channel=channel, port=port)
        self._closed = False
        log.info("CAN ports on %s %s: %d set-point frame(s), %d telemetry, %d io frame(s)",
                 self.bus.__class__.__name__, opts.channel if channel is None else channel,
                 len(config.setpoints), len(config.telemetry), len(config.io))

    def _build_receive_table(self) -> None:
        """One slot per received frame kind: telemetry of servo i is slot i, then io frames."""
        layouts = list(self.config.telemetry) + list(self.config.io)
        self._rx_layouts = layouts
        self._rx_slot = {f.arbitration_id | (_EXTENDED_FLAG if f.extended_id else 0): k
                         for k, f in enumerate(layouts)}
        self._rx_data: list[bytes | bytearray | None] = [None] * len(layouts)
        self._rx_fresh = [False] * len(layouts)
        self._rx_time_s = [0.0] * len(layouts)     # of the newest frame; the first read counts as one
        self._has_current = ["current_a" in f.names for f in self.config.telemetry]
        self._has_voltage = ["voltage_v" in f.names for f in self.config.telemetry]

    # -- time -----------------------------------------------------------------------------------
    def _now_s(self) -> float:
        clock = self._clock
        return clock.now_s() if clock is not None else self._reads * self._tick_s

    # -- receive ------------------------------------------------------------------------------
    def _drain(self) -> None:
        recv = self.bus.recv
        slots = self._rx_slot
        data, fresh = self._rx_data, self._rx_fresh
        try:
            for _ in range(self._max_frames):
                msg = recv(0.0)
                if msg is None:
                    return
                if msg.is_error_frame:
                    self._on_error_frame(msg)
                    continue
                slot = slots.get(msg.arbitration_id | (_EXTENDED_FLAG if msg.is_extended_id else 0))
                if slot is None or msg.is_remote_frame:
                    continue            # our own frames (multicast echo) and other nodes' traffic
                data[slot] = msg.data
                fresh[slot] = True
        except (can.CanError, OSError) as exc:
            raise CanBusError(f"CAN receive failed: {exc}") from exc
        self.backlogged_reads += 1
        log.warning("CAN read stopped after %d frames; the rest waits for the next tick",
                    self._max_frames)

    def _on_error_frame(self, msg: can.Message) -> None:
        self.error_frames += 1
        state = self.bus.state
        if state == can.BusState.ERROR:
            raise CanBusError(f"CAN bus-off (error frame 0x{msg.arbitration_id:X}, "
                              f"{self.error_frames} error frames so far)")
        log.warning("CAN error frame 0x%X (bus state %s)", msg.arbitration_id, state.name)

    def read(self) -> Sample:
        """Drain the bus, check frame ages, decode the newest frames into the Sample."""
        now = self._now_s()
        fresh, data, times = self._rx_fresh, self._rx_data, self._rx_time_s
        if self._reads == 0:          # the first read starts every frame's timeout
            times[:] = [now] * len(times)
        self._reads += 1
        self._drain()
        s = self._sample
        s.t_s = now
        layouts = self._rx_layouts
        n = self.blades
        oldest = 0.0
        for k in range(len(layouts)):
            if fresh[k]:
                fresh[k] = False
                times[k] = now
                values = layouts[k].decode(data[k])
                if k < n:
                    self._apply_telemetry(k, values)
                else:
                    self._apply_io(values)
                continue
            age = now - times[k]
            if age > self._telemetry_timeout_s:
                self._timeout(k, age)
            if k < n and age > oldest:
                oldest = age
        s.telemetry_age_s = oldest
        if self.io is not None and not self.config.io_on_can:
            self._sample.copy_from(self.io.read(), Sample.IO_FIELDS)
        return s

    def _timeout(self, slot: int, age_s: float) -> None:
        layout = self._rx_layouts[slot]
        limit_ms = self._telemetry_timeout_s * 1e3
        if slot < self.blades:
            raise CanTimeout(f"no telemetry from servo {slot} (frame 0x{layout.arbitration_id:X}) "
                             f"for {age_s * 1e3:.1f} ms (limit {limit_ms:g} ms)",
                             arbitration_id=layout.arbitration_id, servo=slot, age_s=age_s)
        raise CanTimeout(f"no I/O frame 0x{layout.arbitration_id:X} (io_frames[{slot - self.blades}]) "
                         f"for {age_s * 1e3:.1f} ms (limit {limit_ms:g} ms)",
                         arbitration_id=layout.arbitration_id, age_s=age_s)

    def _apply_telemetry(self, i: int, values: dict[str, float]) -> None:
        s = self._sample
        s.flap_deg[i] = values["angle_deg"]
        if self._has_current[i]:
            s.servo_current_a[i] = values["current_a"]
        if self._has_voltage[i]:
            s.servo_voltage_v[i] = values["voltage_v"]

    def _apply_io(self, values: dict[str, float]) -> None:
        s = self._sample
        for name, value in values.items():
            if name == "counts":
                s.counts = int(value)
            elif name == "index_events":
                events = int(value)
                self._index_seen = self._index_seen or events != 0
                s.index_events = events
            elif name == "index_latch":
                self._index_latch_raw = int(value)
            elif name == "torque_nm":
                s.torque_nm = value
            elif name == "flow_m_s":
                s.flow_m_s = value
            else:
                s.thrust_n = value
        if self._index_seen:
            s.index_latch = self._index_latch_raw


    # -- send -----------------------------------------------------------------------------------
    def _send(self, layout: FrameLayout, data: bytes, servo: int | None = None) -> None:
        msg = can.Message(arbitration_id=layout.arbitration_id, is_extended_id=layout.extended_id,
                          data=data, check=True)
        try:
            self.bus.send(msg, timeout=self._send_timeout_s)
        except can.CanTimeoutError as exc:
            raise CanTimeout(f"CAN send of frame 0x{layout.arbitration_id:X} timed out after "
                             f"{self._send_timeout_s * 1e3:g} ms",
                             arbitration_id=layout.arbitration_id, servo=servo) from exc
        except (can.CanError, OSError) as exc:
            state = self.bus.state
            what = " (bus-off)" if state == can.BusState.ERROR else ""
            raise CanBusError(f"CAN send of frame 0x{layout.arbitration_id:X} failed{what}: {exc}",
                              arbitration_id=layout.arbitration_id, servo=servo) from exc

    def command_flaps(self, flap_deg: Sequence[float]) -> None:
        """Encode every set-point frame first (EncodeError leaves the bus untouched), then send."""
        values = self._setpoint_values
        for i, (frame_index, position) in enumerate(self.config.setpoint_slots):
            values[frame_index][position] = flap_deg[i]
        layouts = self.config.setpoints
        encoded = [layouts[k].encode(values[k]) for k in range(len(layouts))]
        grouped = self.config.grouped
        for k in range(len(layouts)):
            self._send(layouts[k], encoded[k], None if grouped else k)

    def command_brake(self, torque_nm: float) -> None:
        """Brake torque in N m, sent as ``torque * command_per_nm + command_offset`` drive units."""
        layout = self.config.brake
        if layout is None:
            self.io.command_brake(torque_nm)
            return
        command = torque_nm * self.config.brake_per_nm + self.config.brake_offset
        self._send(layout, layout.encode((command,)))

    def heartbeat(self) -> None:
        """Called once per tick by a live controller: every ``heartbeat_ticks``-th call (the first
        included) sends the heartbeat frame, whose data byte counts heartbeats modulo 256."""
        if self._heartbeat_count:
            self._heartbeat_count -= 1
            return
        layout = self.config.heartbeat
        self._send(layout, layout.encode((self.heartbeats_sent & 0xFF,)))
        self.heartbeats_sent += 1
        self._heartbeat_count = self._heartbeat_ticks - 1

    def _release(self) -> None:
        self.bus.shutdown()           # no heartbeat after this: the servos' watchdogs take over
        log.info("CAN ports closed after %d heartbeats, %d error frames",
                 self.heartbeats_sent, self.error_frames)
