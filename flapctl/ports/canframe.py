"""CAN frame layouts (servo set-points, telemetry) described as data, and CAN bus load.

A :class:`FrameLayout` maps named physical signals to byte-aligned integer fields of a classical
CAN data frame: ``physical = raw * scale + offset``.  Encoding rounds to the nearest raw value and
rejects NaN, infinities and values outside the representable range (it never wraps and never
clips).  It runs every tick, so each layout compiles a straight-line encoder around one
:class:`struct.Struct` when all its signals share a byte order, lie in byte order and none is 24 bits
wide, and around per-signal packers otherwise.

Bus timing follows the worst-case classical-CAN frame length of Davis, Burns, Bril & Lukkien 2007
(Real-Time Systems 35:239): C = g + 8 s + 13 + floor((g + 8 s - 1) / 4) bits, g = 34 for 11-bit
identifiers and 54 for 29-bit identifiers, s = data bytes.  Bit rates are in bit/s, times in s,
rates in Hz, loads as fractions of the bus capacity.
"""
from __future__ import annotations

import math
import struct
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field

from flapctl.errors import FlapctlError, ProfileError

__all__ = [
    "EncodeError",
    "DecodeError",
    "SignalLayout",
    "FrameLayout",
    "BusLoadReport",
    "worst_case_frame_bits",
    "frame_time_s",
    "bus_load",
    "bus_load_report",
    "BUS_LOAD_WARN_FRACTION",
]

BUS_LOAD_WARN_FRACTION = 0.70
_MAX_STANDARD_ID = 0x7FF
_MAX_EXTENDED_ID = 0x1FFF_FFFF
_WIDTHS_BITS = (8, 16, 24, 32)
_BYTE_ORDERS = ("little", "big")
_STRUCT_CODES = {(8, False): "B", (8, True): "b", (16, False): "H", (16, True): "h",
                 (32, False): "I", (32, True): "i"}
_SIGNAL_KEYS = ("name", "byte_offset", "width_bits", "signed", "byte_order", "scale", "offset")
_SIGNAL_REQUIRED = ("name", "byte_offset", "width_bits", "signed", "byte_order", "scale")
_FRAME_KEYS = ("arbitration_id", "extended_id", "dlc", "signals")


class EncodeError(FlapctlError, ValueError):
    """A physical value cannot be put into a frame (NaN, out of range, wrong type, missing)."""


class DecodeError(FlapctlError, ValueError):
    """Received frame data do not fit the layout (wrong length)."""


def _is_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_real(value: object) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _check_signal_fields(
    name: object, byte_offset: object, width_bits: object, signed: object,
    byte_order: object, scale: object, offset: object, source: str, key: str,
) -> None:
    """Raise ProfileError for the first invalid field of one signal (``key`` = its path)."""
    if not isinstance(name, str) or not name:
        raise ProfileError(source, f"{key}.name", name, "a non-empty string")
    if not _is_int(byte_offset) or not 0 <= byte_offset <= 7:
        raise ProfileError(source, f"{key}.byte_offset", byte_offset, "an integer 0..7")
    if not _is_int(width_bits) or width_bits not in _WIDTHS_BITS:
        raise ProfileError(source, f"{key}.width_bits", width_bits, "one of 8, 16, 24, 32")
    if not isinstance(signed, bool):
        raise ProfileError(source, f"{key}.signed", signed, "true or false")
    if not isinstance(byte_order, str) or byte_order not in _BYTE_ORDERS:
        raise ProfileError(source, f"{key}.byte_order", byte_order, '"little" or "big"')
    if not _is_real(scale) or not math.isfinite(scale) or scale == 0:
        raise ProfileError(source, f"{key}.scale", scale, "a finite non-zero number")
    if not _is_real(offset) or not math.isfinite(offset):
        raise ProfileError(source, f"{key}.offset", offset, "a finite number")
    low, high = _physical_range(width_bits, signed, scale, offset)
    if math.ulp(max(abs(low), abs(high))) > abs(scale) * 1e-6:
        raise ProfileError(source, f"{key}.offset", offset,
                           f"an offset whose magnitude float64 resolves to 1e-6 of scale = {scale!r}")


def _raw_range(width_bits: int, signed: bool) -> tuple[int, int]:
    if signed:
        half = 1 << (width_bits - 1)
        return -half, half - 1
    return 0, (1 << width_bits) - 1


def _physical_range(width_bits: int, signed: bool, scale: float, offset: float) -> tuple[float, float]:
    raw_lo, raw_hi = _raw_range(width_bits, signed)
    a = raw_lo * scale + offset
    b = raw_hi * scale + offset
    return (a, b) if a <= b else (b, a)


@dataclass(frozen=True)
class SignalLayout:
    """One byte-aligned integer field of a frame; ``physical = raw * scale + offset``.

    ``byte_offset`` is the first byte (0..7), ``width_bits`` 8/16/24/32, ``signed`` selects
    two's complement, ``byte_order`` "little" (Intel) or "big" (Motorola).  ``scale`` may be
    negative; the name carries the physical unit (``angle_deg``, ``current_a``).
    """

    name: str
    byte_offset: int
    width_bits: int
    signed: bool
    byte_order: str
    scale: float
    offset: float = 0.0

    def __post_init__(self) -> None:
        _check_signal_fields(self.name, self.byte_offset, self.width_bits, self.signed,
                             self.byte_order, self.scale, self.offset,
                             "<SignalLayout>", f"SignalLayout({self.name!r})")

    @property
    def width_bytes(self) -> int:
        """Field width in bytes."""
        return self.width_bits // 8

    @property
    def raw_range(self) -> tuple[int, int]:
        """Smallest and largest raw integer."""
        return _raw_range(self.width_bits, self.signed)

    @property
    def physical_range(self) -> tuple[float, float]:
        """Smallest and largest representable physical value (order fixed for negative scale)."""
        return _physical_range(self.width_bits, self.signed, self.scale, self.offset)


def _check_frame(
    arbitration_id: object, extended_id: object, dlc: object,
    signals: Sequence[SignalLayout], source: str, key: str,
) -> None:
    """Raise ProfileError for an invalid id, dlc, or for signals that overlap or pass the dlc."""
    if not isinstance(extended_id, bool):
        raise ProfileError(source, f"{key}.extended_id", extended_id, "true or false")
    if extended_id:
        limit, kind, setting = _MAX_EXTENDED_ID, "a 29-bit", "true"
    else:
        limit, kind, setting = _MAX_STANDARD_ID, "an 11-bit", "false"
    if not _is_int(arbitration_id) or not 0 <= arbitration_id <= limit:
        raise ProfileError(source, f"{key}.arbitration_id", arbitration_id,
                           f"an integer 0..0x{limit:X} for {kind} id (extended_id = {setting})")
    if not _is_int(dlc) or not 0 <= dlc <= 8:
        raise ProfileError(source, f"{key}.dlc", dlc, "an integer 0..8")
    owner: dict[int, int] = {}
    names: dict[str, int] = {}
    for index, signal in enumerate(signals):
        path = f"{key}.signals[{index}]"
        if not isinstance(signal, SignalLayout):
            raise ProfileError(source, path, signal, "a SignalLayout")
        if signal.name in names:
            raise ProfileError(source, f"{path}.name", signal.name,
                               f"a name unique in the frame (signals[{names[signal.name]}] has it)")
        names[signal.name] = index
        end = signal.byte_offset + signal.width_bytes
        if end > dlc:
            raise ProfileError(source, f"{path}.width_bits", signal.width_bits,
                               f"a field ending within dlc = {dlc} bytes (byte_offset = "
                               f"{signal.byte_offset}, so at most {8 * (dlc - signal.byte_offset)} bits)")
        for byte in range(signal.byte_offset, end):
            if byte in owner:
                other = signals[owner[byte]]
                last = other.byte_offset + other.width_bytes - 1
                raise ProfileError(source, f"{path}.byte_offset", signal.byte_offset,
                                   f"a field not overlapping signals[{owner[byte]}] {other.name!r} "
                                   f"(bytes {other.byte_offset}..{last})")
            owner[byte] = index


@dataclass(frozen=True)
class _Field:
    """Precompiled per-signal data used on the hot path."""

    name: str
    low: float
    high: float
    offset: float
    scale: float
    start: int
    stop: int
    byte_order: str
    signed: bool
    packer: struct.Struct | None  # None for 24-bit fields


@dataclass(frozen=True)
class FrameLayout:
    """Layout of one classical CAN data frame: id, id kind, data length and signals.

    ``arbitration_id`` 0..0x7FF (11-bit) or 0..0x1FFFFFFF (``extended_id``); ``dlc`` 0..8
    data bytes.  Bytes not covered by a signal are sent as zero and ignored on decode.
    """

    arbitration_id: int
    extended_id: bool
    dlc: int
    signals: tuple[SignalLayout, ...]
    _fields: tuple[_Field, ...] = field(init=False, repr=False, compare=False)
    _names: tuple[str, ...] = field(init=False, repr=False, compare=False)
    _frame_struct: struct.Struct | None = field(init=False, repr=False, compare=False)
    _encoder: Callable[[Mapping[str, float] | Sequence[float]], bytes] = field(
        init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not isinstance(self.signals, tuple):
            raise ProfileError("<FrameLayout>", "FrameLayout.signals", self.signals,
                               "a tuple of SignalLayout")
        _check_frame(self.arbitration_id, self.extended_id, self.dlc, self.signals,
                     "<FrameLayout>", "FrameLayout")
        fields = tuple(_compile_field(s) for s in self.signals)
        object.__setattr__(self, "_fields", fields)
        object.__setattr__(self, "_names", tuple(s.name for s in self.signals))
        object.__setattr__(self, "_frame_struct", _compile_frame_struct(self.signals, self.dlc))
        object.__setattr__(self, "_encoder", _build_encoder(self))

    def __reduce__(self) -> tuple[type[FrameLayout], tuple[int, bool, int, tuple[SignalLayout, ...]]]:
        """Pickle by the four layout fields; the compiled encoder is rebuilt on load."""
        return (type(self), (self.arbitration_id, self.extended_id, self.dlc, self.signals))

    @property
    def names(self) -> tuple[str, ...]:
        """Signal names in layout order (the order a sequence passed to :meth:`encode` follows)."""
        return self._names

    def encode(self, values: Mapping[str, float] | Sequence[float]) -> bytes:
        """Frame data (``dlc`` bytes) for physical ``values``, by name or in layout order.

        Raises :class:`EncodeError` naming the signal, the value and the representable range
        for NaN, infinite, non-numeric or out-of-range values, and for missing or extra names.
        """
        return self._encoder(values)

    def decode(self, data: bytes | bytearray | memoryview) -> dict[str, float]:
        """Physical values by signal name from frame data of exactly ``dlc`` bytes."""
        if len(data) != self.dlc:
            raise DecodeError(f"frame 0x{self.arbitration_id:X}: {len(data)} data bytes, "
                              f"expected dlc = {self.dlc}")
        frame_struct = self._frame_struct
        if frame_struct is not None:
            raws: Sequence[int] = frame_struct.unpack(data)
        else:
            raws = [f.packer.unpack_from(data, f.start)[0] if f.packer is not None
                    else int.from_bytes(data[f.start:f.stop], f.byte_order, signed=f.signed)
                    for f in self._fields]
        return {f.name: raw * f.scale + f.offset for f, raw in zip(self._fields, raws)}

    @classmethod
    def from_mapping(cls, mapping: dict, source: str, key: str) -> "FrameLayout":
        """Build a layout from a profile table, strictly.

        Keys: ``arbitration_id`` (int), ``extended_id`` (bool), ``dlc`` (int), ``signals`` (list
        of tables with ``name``, ``byte_offset``, ``width_bits``, ``signed``, ``byte_order``,
        ``scale`` and optional ``offset``).  Unknown or missing keys, wrong types, overlapping
        signals, signals beyond ``dlc`` and ids too wide raise ProfileError naming ``source``
        and the dotted key path below ``key``.
        """
        _check_keys(mapping, _FRAME_KEYS, _FRAME_KEYS, source, key)
        raw_signals = mapping["signals"]
        if not isinstance(raw_signals, (list, tuple)):
            raise ProfileError(source, f"{key}.signals", raw_signals, "a list of signal tables")
        signals = []
        for index, entry in enumerate(raw_signals):
            path = f"{key}.signals[{index}]"
            _check_keys(entry, _SIGNAL_KEYS, _SIGNAL_REQUIRED, source, path)
            values = [entry.get(k, 0.0) for k in _SIGNAL_KEYS]
            _check_signal_fields(*values, source=source, key=path)
            signals.append(SignalLayout(*values))
        _check_frame(mapping["arbitration_id"], mapping["extended_id"], mapping["dlc"],
                     signals, source, key)
        return cls(mapping["arbitration_id"], mapping["extended_id"], mapping["dlc"], tuple(signals))

    def _fail_value(self, index: int, value: object) -> None:
        f = self._fields[index]
        raise EncodeError(f"frame 0x{self.arbitration_id:X}: signal {f.name!r} = {value!r}: expected "
                          f"a finite number in the representable range [{f.low!r}, {f.high!r}]")

    def _fail_type(self, ordered: tuple[object, ...]) -> None:
        for index, value in enumerate(ordered):
            if not _is_real(value) or not (self._fields[index].low <= value <= self._fields[index].high):
                self._fail_value(index, value)
        raise EncodeError(f"frame 0x{self.arbitration_id:X}: values {ordered!r} cannot be encoded")

    def _fail_count(self, values: Sequence[float]) -> None:
        raise EncodeError(f"frame 0x{self.arbitration_id:X}: {len(values)} values given, "
                          f"expected {len(self._names)} for {list(self._names)}")

    def _in_layout_order(self, values: object) -> Sequence[float]:
        """Values of a mapping (exactly the layout's names) or of another sequence, in layout order."""
        if isinstance(values, Mapping):
            if len(values) != len(self._names):
                self._fail_names(values)
            try:
                return [values[name] for name in self._names]
            except KeyError:
                self._fail_names(values)
        if isinstance(values, Sequence) and not isinstance(values, (str, bytes, bytearray)):
            return values
        raise EncodeError(f"frame 0x{self.arbitration_id:X}: values = {values!r}: expected a mapping of "
                          f"signal name to value or a sequence in the order {list(self._names)}")

    def _fail_names(self, values: Mapping[str, float]) -> None:
        missing = [n for n in self._names if n not in values]
        extra = [n for n in values if n not in self._names]
        raise EncodeError(f"frame 0x{self.arbitration_id:X}: signals missing {missing}, unknown {extra}; "
                          f"expected exactly {list(self._names)}")


def _check_keys(entry: object, allowed: tuple[str, ...], required: tuple[str, ...],
                source: str, key: str) -> None:
    if not isinstance(entry, Mapping):
        raise ProfileError(source, key, entry, "a table")
    for name in entry:
        if name not in allowed:
            raise ProfileError(source, f"{key}.{name}", entry[name],
                               f"no such key (allowed: {', '.join(allowed)})")
    for name in required:
        if name not in entry:
            raise ProfileError(source, f"{key}.{name}", None, "a value (required key is missing)")


def _compile_field(signal: SignalLayout) -> _Field:
    low, high = signal.physical_range
    code = _STRUCT_CODES.get((signal.width_bits, signal.signed))
    prefix = "<" if signal.byte_order == "little" else ">"
    return _Field(
        name=signal.name, low=low, high=high, offset=float(signal.offset),
        scale=float(signal.scale),
        start=signal.byte_offset, stop=signal.byte_offset + signal.width_bytes,
        byte_order=signal.byte_order, signed=signal.signed,
        packer=struct.Struct(prefix + code) if code is not None else None,
    )


def _compile_frame_struct(signals: Sequence[SignalLayout], dlc: int) -> struct.Struct | None:
    """One Struct for the whole frame, or None when byte orders mix or a field is 24 bits."""
    orders = {s.byte_order for s in signals}
    if len(orders) > 1 or any(s.width_bits == 24 for s in signals):
        return None
    prefix = "<" if orders == {"little"} or not orders else ">"
    parts = []
    position = 0
    for signal in signals:
        if signal.byte_offset < position:  # layout order differs from byte order
            return None
        if signal.byte_offset > position:
            parts.append(f"{signal.byte_offset - position}x")
        parts.append(_STRUCT_CODES[(signal.width_bits, signal.signed)])
        position = signal.byte_offset + signal.width_bytes
    if dlc > position:
        parts.append(f"{dlc - position}x")
    return struct.Struct(prefix + "".join(parts))


def _raw_expression(index: int, f: _Field) -> str:
    """Source text computing the rounded raw value of ``v{index}`` (constants as exact literals)."""
    shifted = f"v{index}" if f.offset == 0.0 else f"(v{index} - ({f.offset!r}))"
    return f"round({shifted} / ({f.scale!r}))"


def _build_encoder(layout: FrameLayout) -> Callable[[Mapping[str, float] | Sequence[float]], bytes]:
    """Generate a straight-line encoder specialised to ``layout`` (no per-signal loop).

    The range limits, scales and offsets are written into the source as ``repr`` literals, which
    round-trip floats exactly; the signal names as ``repr`` string literals.
    """
    fields = layout._fields
    count = len(fields)
    names = ", ".join(f"v{i}" for i in range(count))
    lines = [
        "def encode(values):",
        "    kind = type(values)",
        "    if kind is dict:",
        f"        if len(values) != {count}:",
        "            fail_names(values)",
    ]
    if count:
        lines.append("        try:")
        lines += [f"            v{i} = values[{f.name!r}]" for i, f in enumerate(fields)]
        lines += ["        except KeyError:", "            fail_names(values)"]
    lines += [
        "    else:",
        "        if kind is not tuple and kind is not list:",
        "            values = in_layout_order(values)",
        f"        if len(values) != {count}:",
        "            fail_count(values)",
    ]
    if count:
        lines.append(f"        {names}, = values")
    lines.append("    try:")
    for i, f in enumerate(fields):
        lines += [f"        if not ({f.low!r} <= v{i} <= {f.high!r}):", f"            fail_value({i}, v{i})"]
    namespace: dict[str, object] = {
        "in_layout_order": layout._in_layout_order, "fail_count": layout._fail_count,
        "fail_names": layout._fail_names,
        "fail_value": layout._fail_value, "fail_type": layout._fail_type,
    }
    if layout._frame_struct is not None:
        namespace["pack"] = layout._frame_struct.pack
        raws = ", ".join(_raw_expression(i, f) for i, f in enumerate(fields))
        lines.append(f"        return pack({raws})")
    else:
        lines.append(f"        buffer = bytearray({layout.dlc})")
        for i, f in enumerate(fields):
            if f.packer is not None:
                namespace[f"pack_into_{i}"] = f.packer.pack_into
                lines.append(f"        pack_into_{i}(buffer, {f.start}, {_raw_expression(i, f)})")
            else:
                lines.append(f"        buffer[{f.start}:{f.stop}] = {_raw_expression(i, f)}.to_bytes("
                             f"{f.stop - f.start}, {f.byte_order!r}, signed={f.signed!r})")
        lines.append("        return bytes(buffer)")
    lines += ["    except TypeError:", f"        fail_type(({names}{',' if count else ''}))",
              "    raise EncodeError('values cannot be encoded')"]
    namespace["EncodeError"] = EncodeError
    # The source holds only validated numbers, byte offsets and repr() literals.
    exec("\n".join(lines), namespace)
    return namespace["encode"]  # type: ignore[return-value]


# ---------------------------------------------------------------------------- bus timing and load

_TIMING_SOURCE = "<can bus timing>"


def _check_dlc_id(dlc: object, extended_id: object, key: str) -> None:
    if not _is_int(dlc) or not 0 <= dlc <= 8:
        raise ProfileError(_TIMING_SOURCE, f"{key}dlc", dlc, "an integer 0..8")
    if not isinstance(extended_id, bool):
        raise ProfileError(_TIMING_SOURCE, f"{key}extended_id", extended_id, "true or false")


def _check_positive(value: object, key: str, unit: str) -> float:
    if not _is_real(value) or not math.isfinite(value) or value <= 0:
        raise ProfileError(_TIMING_SOURCE, key, value, f"a finite number > 0 ({unit})")
    return float(value)


def worst_case_frame_bits(dlc: int, extended_id: bool) -> int:
    """Worst-case length in bits of a classical CAN data frame with ``dlc`` bytes, stuff bits
    and the 3-bit interframe space included (Davis et al. 2007)."""
    _check_dlc_id(dlc, extended_id, "")
    g = 54 if extended_id else 34
    return g + 8 * dlc + 13 + (g + 8 * dlc - 1) // 4


def frame_time_s(dlc: int, extended_id: bool, bitrate: float) -> float:
    """Worst-case transmission time in s of one frame at ``bitrate`` bit/s."""
    rate = _check_positive(bitrate, "bitrate", "bit/s")
    return worst_case_frame_bits(dlc, extended_id) / rate


def bus_load(frames: Iterable[tuple[int, bool, float]], bitrate: float) -> float:
    """Worst-case bus load U = sum(C_i / T_i) as a fraction of capacity.

    ``frames`` holds (dlc, extended_id, rate_hz) per periodic frame stream.  The result is not
    clipped: above 1.0 the bus cannot carry the traffic.
    """
    rate = _check_positive(bitrate, "bitrate", "bit/s")
    total_bits_s = 0.0
    for index, entry in enumerate(frames):
        if not isinstance(entry, (tuple, list)) or len(entry) != 3:
            raise ProfileError(_TIMING_SOURCE, f"frames[{index}]", entry, "(dlc, extended_id, rate_hz)")
        dlc, extended_id, rate_hz = entry
        _check_dlc_id(dlc, extended_id, f"frames[{index}].")
        if not _is_real(rate_hz) or not math.isfinite(rate_hz) or rate_hz < 0:
            raise ProfileError(_TIMING_SOURCE, f"frames[{index}].rate_hz", rate_hz,
                               "a finite number >= 0 (Hz)")
        total_bits_s += worst_case_frame_bits(dlc, extended_id) * rate_hz
    return total_bits_s / rate


@dataclass(frozen=True)
class BusLoadReport:
    """Worst-case bus load (fraction), the warning threshold, and a warning ("" when below it)."""

    load: float
    warn_above: float
    bitrate: float
    warning: str


def bus_load_report(frames: Iterable[tuple[int, bool, float]], bitrate: float,
                    warn_above: float = BUS_LOAD_WARN_FRACTION) -> BusLoadReport:
    """:func:`bus_load` with a warning text when the load exceeds ``warn_above`` (default 0.70)."""
    threshold = _check_positive(warn_above, "warn_above", "fraction of bus capacity")
    load = bus_load(frames, bitrate)
    warning = ""
    if load > 1.0:
        warning = (f"CAN bus overloaded: worst-case load {load:.1%} at {bitrate:g} bit/s exceeds "
                   f"the bus capacity; frames will be delayed without bound")
    elif load > threshold:
        warning = (f"CAN bus load {load:.1%} at {bitrate:g} bit/s is above {threshold:.0%}: "
                   f"lower frame rates, group signals into fewer frames or raise the bit rate")
    return BusLoadReport(load=load, warn_above=threshold, bitrate=float(bitrate), warning=warning)
