"""CAN frame layouts and bus timing: published frame lengths, independent byte packing, python-can."""
from __future__ import annotations

import copy
import math
import pickle
import struct

import can
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from flapctl.errors import ProfileError
from flapctl.ports.canframe import (
    BusLoadReport,
    DecodeError,
    EncodeError,
    FrameLayout,
    SignalLayout,
    bus_load,
    bus_load_report,
    frame_time_s,
    worst_case_frame_bits,
)

PROPERTY_SETTINGS = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
STRUCT_CODES = {(8, False): "B", (8, True): "b", (16, False): "H", (16, True): "h",
                (32, False): "I", (32, True): "i"}


# ------------------------------------------------------------------------------------ bus timing

# Davis, Burns, Bril & Lukkien 2007 worst-case frame lengths (REFERENCES §11 table).
@pytest.mark.parametrize(
    ("dlc", "standard_bits", "extended_bits"),
    [(0, 55, 80), (4, 95, 120), (8, 135, 160)],
)
def test_worst_case_frame_bits_table(dlc: int, standard_bits: int, extended_bits: int) -> None:
    assert worst_case_frame_bits(dlc, False) == standard_bits
    assert worst_case_frame_bits(dlc, True) == extended_bits


def test_worst_case_8_byte_standard_frame_spelled_out() -> None:
    # 64 + 47 + floor((34 + 64 - 1) / 4) bits for 8 bytes, 11-bit id (REFERENCES §11, Davis et al. 2007).
    assert worst_case_frame_bits(8, False) == 64 + 47 + (34 + 64 - 1) // 4


def test_frame_time_check_value_27() -> None:
    # Check value #27: 8 bytes, 11-bit id, 500 kbit/s -> 135 bits, 270 us (Davis et al. 2007).
    assert frame_time_s(8, False, 500_000) == pytest.approx(270e-6, rel=1e-12)


@pytest.mark.parametrize(
    ("bitrate", "time_us"), [(125_000, 1080.0), (250_000, 540.0), (1_000_000, 135.0)],
)
def test_frame_time_other_bitrates(bitrate: int, time_us: float) -> None:
    # REFERENCES §11, 8-byte 11-bit frame at other bit rates ([derived]: regression values).
    assert frame_time_s(8, False, bitrate) * 1e6 == pytest.approx(time_us, rel=1e-12)


def test_bus_load_four_nodes_at_1khz() -> None:
    # REFERENCES §11: 4 nodes x 8-byte frames at 1 kHz on 1 Mbit/s -> U = 54 % (Davis et al. 2007).
    frames = [(8, False, 1000.0)] * 4
    assert bus_load(frames, 1_000_000) == pytest.approx(0.54, rel=1e-12)
    report = bus_load_report(frames, 1_000_000)
    assert isinstance(report, BusLoadReport)
    assert report.load == pytest.approx(0.54, rel=1e-12)
    assert report.warning == ""


def test_bus_load_report_warns_above_70_percent() -> None:
    # 6 x 135 bits at 1 kHz on 1 Mbit/s = 81 %: above the 70 % design limit (REFERENCES §11,
    # "common design target <= 50-70 %", common practice, no source).
    report = bus_load_report([(8, False, 1000.0)] * 6, 1_000_000)
    assert report.load == pytest.approx(0.81, rel=1e-12)
    assert "81.0%" in report.warning and "70%" in report.warning
    overloaded = bus_load_report([(8, True, 1000.0)] * 8, 1_000_000)
    assert overloaded.load == pytest.approx(1.28, rel=1e-12)
    assert "overloaded" in overloaded.warning
    stricter = bus_load_report([(8, False, 1000.0)] * 4, 1_000_000, warn_above=0.5)
    assert stricter.warning != ""


def test_bus_load_mixed_frames_sum() -> None:
    # U = sum(C_i / T_i): hand sum 95 * 500 + 160 * 200 + 55 * 100 bit/s over 250 kbit/s.
    frames = [(4, False, 500.0), (8, True, 200.0), (0, False, 100.0)]
    assert bus_load(frames, 250_000) == pytest.approx((95 * 500 + 160 * 200 + 55 * 100) / 250_000, rel=1e-12)
    assert bus_load([], 250_000) == 0.0


@pytest.mark.parametrize(
    ("call", "key"),
    [
        (lambda: worst_case_frame_bits(9, False), "dlc"),
        (lambda: worst_case_frame_bits(-1, False), "dlc"),
        (lambda: worst_case_frame_bits(8, 1), "extended_id"),
        (lambda: frame_time_s(8, False, 0), "bitrate"),
        (lambda: frame_time_s(8, False, float("inf")), "bitrate"),
        (lambda: bus_load([(8, False, -1.0)], 500_000), "frames[0].rate_hz"),
        (lambda: bus_load([(8, False, 1.0), (12, False, 1.0)], 500_000), "frames[1].dlc"),
        (lambda: bus_load([(8, False)], 500_000), "frames[0]"),
        (lambda: bus_load_report([(8, False, 1.0)], 500_000, warn_above=0.0), "warn_above"),
    ],
)
def test_timing_input_errors(call, key: str) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(ProfileError) as caught:
        call()
    assert caught.value.key == key


# ------------------------------------------------------------------------------ hand-made layout

def setpoint_mapping() -> dict:
    """Three flap set-points, int16 little-endian, 0.01 deg per count (common practice, no source)."""
    return {
        "arbitration_id": 0x201,
        "extended_id": False,
        "dlc": 6,
        "signals": [
            {"name": "blade1_deg", "byte_offset": 0, "width_bits": 16, "signed": True,
             "byte_order": "little", "scale": 0.01},
            {"name": "blade2_deg", "byte_offset": 2, "width_bits": 16, "signed": True,
             "byte_order": "little", "scale": 0.01},
            {"name": "blade3_deg", "byte_offset": 4, "width_bits": 16, "signed": True,
             "byte_order": "little", "scale": 0.01},
        ],
    }


def test_setpoint_frame_by_hand() -> None:
    layout = FrameLayout.from_mapping(setpoint_mapping(), "rig.toml", "bus.can.setpoint_frame")
    # Hand packing: 12.34 deg -> 1234 = 0x04D2; -5 deg -> -500 = 0xFE0C; 0 -> 0 (two's complement, LE).
    data = layout.encode({"blade1_deg": 12.34, "blade2_deg": -5.0, "blade3_deg": 0.0})
    assert data == bytes([0xD2, 0x04, 0x0C, 0xFE, 0x00, 0x00])
    assert layout.encode([12.34, -5.0, 0.0]) == data
    assert layout.encode((12.34, -5.0, 0)) == data
    decoded = layout.decode(data)
    assert list(decoded) == ["blade1_deg", "blade2_deg", "blade3_deg"]
    assert decoded["blade1_deg"] == pytest.approx(12.34, abs=1e-12)
    assert decoded["blade2_deg"] == pytest.approx(-5.0, abs=1e-12)
    assert layout.names == ("blade1_deg", "blade2_deg", "blade3_deg")


def test_telemetry_frame_mixed_orders_and_24_bit() -> None:
    layout = FrameLayout(
        0x181, False, 8,
        (SignalLayout("angle_deg", 0, 24, True, "big", 0.001),
         SignalLayout("current_a", 3, 16, False, "little", 0.001, -30.0),
         SignalLayout("voltage_v", 5, 8, False, "little", 0.1)),
    )
    data = layout.encode({"angle_deg": -1.5, "current_a": 1.25, "voltage_v": 24.0})
    # Hand packing: -1500 as 24-bit big-endian = FF FA 24; (1.25 + 30) / 0.001 = 31250 = 0x7A12 LE;
    # 240 = 0xF0; bytes 6..7 unused (zero).
    assert data == bytes([0xFF, 0xFA, 0x24, 0x12, 0x7A, 0xF0, 0x00, 0x00])
    decoded = layout.decode(bytearray(data))
    assert decoded["current_a"] == pytest.approx(1.25, abs=1e-9)
    assert decoded["angle_deg"] == pytest.approx(-1.5, abs=1e-12)


def test_signals_out_of_byte_order_use_separate_packers() -> None:
    layout = FrameLayout(0x10, False, 3, (SignalLayout("b", 2, 8, False, "little", 1.0),
                                          SignalLayout("a", 0, 16, False, "big", 1.0)))
    assert layout.encode([7, 0x0102]) == bytes([0x01, 0x02, 0x07])
    assert layout.decode(bytes([0x01, 0x02, 0x07])) == {"b": 7.0, "a": 258.0}


def test_encode_rejects_bad_values() -> None:
    layout = FrameLayout.from_mapping(setpoint_mapping(), "rig.toml", "bus.can.setpoint_frame")
    high = 32767 * 0.01
    for bad in (float("nan"), float("inf"), -float("inf"), math.nextafter(high, math.inf), 400.0, -327.69):
        with pytest.raises(EncodeError) as caught:
            layout.encode([0.0, bad, 0.0])
        assert "'blade2_deg'" in str(caught.value) and repr(bad) in str(caught.value)
        assert "[-327.68, 327.67]" in str(caught.value)
    assert layout.encode([0.0, high, 0.0])[2:4] == (32767).to_bytes(2, "little")
    for bad_values in ([0.0, 1.0], {"blade1_deg": 0.0, "blade2_deg": 0.0},
                       {"blade1_deg": 0.0, "blade2_deg": 0.0, "blade9_deg": 0.0}, {0.0, 1.0, 2.0}, "abc"):
        with pytest.raises(EncodeError):
            layout.encode(bad_values)  # type: ignore[arg-type]
    with pytest.raises(EncodeError, match="'blade3_deg' = None"):
        layout.encode([0.0, 0.0, None])  # type: ignore[list-item]
    assert issubclass(EncodeError, ValueError)


def test_decode_rejects_wrong_length() -> None:
    layout = FrameLayout.from_mapping(setpoint_mapping(), "rig.toml", "bus.can.setpoint_frame")
    with pytest.raises(DecodeError, match="5 data bytes, expected dlc = 6"):
        layout.decode(bytes(5))


def test_empty_layout_is_a_zero_filled_frame() -> None:
    sync = FrameLayout(0x080, False, 0, ())
    assert sync.encode(()) == b"" and sync.decode(b"") == {}
    padded = FrameLayout(0x080, False, 2, ())
    assert padded.encode({}) == b"\x00\x00"


# ------------------------------------------------------------------------------- profile errors

def _mutated(path: tuple, value: object, delete: bool = False) -> dict:
    mapping = copy.deepcopy(setpoint_mapping())
    target = mapping
    for part in path[:-1]:
        target = target[part]
    if delete:
        del target[path[-1]]
    else:
        target[path[-1]] = value
    return mapping


@pytest.mark.parametrize(
    ("path", "value", "delete", "key", "shown"),
    [
        (("colour",), "red", False, "bus.can.setpoint_frame.colour", "red"),
        (("signals", 1, "width_bits"), 12, False, "bus.can.setpoint_frame.signals[1].width_bits", 12),
        (("signals", 1, "width_bits"), "16", False, "bus.can.setpoint_frame.signals[1].width_bits", "16"),
        (("signals", 1, "width_bits"), 32, False, "bus.can.setpoint_frame.signals[2].byte_offset", 4),
        (("signals", 2, "width_bits"), 32, False, "bus.can.setpoint_frame.signals[2].width_bits", 32),
        (("signals", 2, "byte_offset"), 1, False, "bus.can.setpoint_frame.signals[2].byte_offset", 1),
        (("signals", 0, "signed"), "yes", False, "bus.can.setpoint_frame.signals[0].signed", "yes"),
        (("signals", 0, "byte_order"), "intel", False, "bus.can.setpoint_frame.signals[0].byte_order", "intel"),
        (("signals", 0, "scale"), 0.0, False, "bus.can.setpoint_frame.signals[0].scale", 0.0),
        (("signals", 0, "scale"), True, False, "bus.can.setpoint_frame.signals[0].scale", True),
        (("signals", 0, "offset"), 1e15, False, "bus.can.setpoint_frame.signals[0].offset", 1e15),
        (("signals", 0, "units"), "deg", False, "bus.can.setpoint_frame.signals[0].units", "deg"),
        (("signals", 0, "scale"), None, True, "bus.can.setpoint_frame.signals[0].scale", None),
        (("signals", 2, "name"), "blade1_deg", False, "bus.can.setpoint_frame.signals[2].name", "blade1_deg"),
        (("signals", 1), "angle", False, "bus.can.setpoint_frame.signals[1]", "angle"),
        (("signals",), {"name": "x"}, False, "bus.can.setpoint_frame.signals", {"name": "x"}),
        (("arbitration_id",), 0x800, False, "bus.can.setpoint_frame.arbitration_id", 0x800),
        (("arbitration_id",), -1, False, "bus.can.setpoint_frame.arbitration_id", -1),
        (("arbitration_id",), "0x201", False, "bus.can.setpoint_frame.arbitration_id", "0x201"),
        (("extended_id",), "false", False, "bus.can.setpoint_frame.extended_id", "false"),
        (("extended_id",), None, True, "bus.can.setpoint_frame.extended_id", None),
        (("dlc",), 9, False, "bus.can.setpoint_frame.dlc", 9),
        (("dlc",), 4, False, "bus.can.setpoint_frame.signals[2].width_bits", 16),
    ],
)
def test_from_mapping_errors(path: tuple, value: object, delete: bool, key: str, shown: object) -> None:
    with pytest.raises(ProfileError) as caught:
        FrameLayout.from_mapping(_mutated(path, value, delete), "hw_profiles/flume.toml",
                                 "bus.can.setpoint_frame")
    error = caught.value
    assert (error.source, error.key) == ("hw_profiles/flume.toml", key)
    assert repr(error.value) == repr(shown)
    assert str(error).startswith(f"hw_profiles/flume.toml: {key} = ")


def test_extended_id_range() -> None:
    mapping = setpoint_mapping()
    mapping["extended_id"] = True
    mapping["arbitration_id"] = 0x1FFF_FFFF
    assert FrameLayout.from_mapping(mapping, "rig.toml", "f").arbitration_id == 0x1FFF_FFFF
    mapping["arbitration_id"] = 0x2000_0000
    with pytest.raises(ProfileError, match="29-bit"):
        FrameLayout.from_mapping(mapping, "rig.toml", "f")


def test_layout_pickles_and_copies() -> None:
    layout = FrameLayout.from_mapping(setpoint_mapping(), "rig.toml", "bus.can.setpoint_frame")
    for twin in (pickle.loads(pickle.dumps(layout)), copy.deepcopy(layout)):
        assert twin == layout and hash(twin) == hash(layout)
        assert twin.encode([1.0, 2.0, 3.0]) == layout.encode([1.0, 2.0, 3.0])


def test_names_with_quotes_are_safe() -> None:
    name = "it's \"odd\"\n"
    layout = FrameLayout(0x20, False, 1, (SignalLayout(name, 0, 8, False, "little", 1.0),))
    assert layout.encode({name: 5}) == b"\x05"
    assert layout.decode(b"\x05") == {name: 5.0}


def test_direct_construction_is_validated() -> None:
    with pytest.raises(ProfileError):
        SignalLayout("x", 8, 8, False, "little", 1.0)
    with pytest.raises(ProfileError):
        FrameLayout(0x100, False, 2, (SignalLayout("x", 1, 16, False, "little", 1.0),))
    with pytest.raises(ProfileError):
        FrameLayout(0x100, False, 2, [SignalLayout("x", 0, 16, False, "little", 1.0)])  # type: ignore[arg-type]


@given(st.booleans(), st.integers(-4, 0x2000_0004))
@settings(max_examples=200, deadline=None)
def test_id_limits_agree_with_python_can(extended: bool, arbitration_id: int) -> None:
    # Reference library: python-can's Message(check=True) id validation (11-bit / 29-bit).
    try:
        can.Message(arbitration_id=arbitration_id, is_extended_id=extended, data=b"", check=True)
        reference_ok = True
    except ValueError:
        reference_ok = False
    mapping = {"arbitration_id": arbitration_id, "extended_id": extended, "dlc": 0, "signals": []}
    try:
        FrameLayout.from_mapping(mapping, "rig.toml", "f")
        ours_ok = True
    except ProfileError:
        ours_ok = False
    assert ours_ok == reference_ok


# ---------------------------------------------------------------------- property tests, random layouts

@st.composite
def layouts(draw: st.DrawFn) -> FrameLayout:
    """Random valid layouts: 1..8 data bytes, non-overlapping fields with gaps, any order."""
    dlc = draw(st.integers(1, 8))
    extended = draw(st.booleans())
    arbitration_id = draw(st.integers(0, 0x1FFF_FFFF if extended else 0x7FF))
    signals = []
    position = 0
    for index in range(8):  # at most 8 one-byte fields fit
        if position >= dlc:
            break
        start = position + draw(st.integers(0, dlc - position - 1))
        width_bits = draw(st.sampled_from([w for w in (8, 16, 24, 32) if w // 8 <= dlc - start]))
        magnitude = draw(st.floats(1e-4, 100.0))
        scale = magnitude if draw(st.booleans()) else -magnitude
        offset = draw(st.one_of(st.just(0.0), st.floats(-1000.0, 1000.0)))
        signals.append(SignalLayout(f"s{index}", start, width_bits, draw(st.booleans()),
                                    draw(st.sampled_from(["little", "big"])), scale, offset))
        position = start + width_bits // 8
        if draw(st.booleans()):
            break
    ordered = draw(st.permutations(signals))
    return FrameLayout(arbitration_id, extended, dlc, tuple(ordered))


def reference_bytes(layout: FrameLayout, raws: list[int]) -> bytes:
    """Frame data built independently with int.to_bytes (two's complement, per-signal order)."""
    data = bytearray(layout.dlc)
    for signal, raw in zip(layout.signals, raws):
        data[signal.byte_offset:signal.byte_offset + signal.width_bits // 8] = raw.to_bytes(
            signal.width_bits // 8, signal.byte_order, signed=signal.signed)
    return bytes(data)


def struct_bytes(layout: FrameLayout, raws: list[int]) -> bytes:
    """The same with struct.pack_into per field (8/16/32 bits) as a second reference."""
    data = bytearray(layout.dlc)
    for signal, raw in zip(layout.signals, raws):
        if signal.width_bits == 24:
            unsigned = raw & 0xFFFFFF
            octets = [unsigned & 0xFF, (unsigned >> 8) & 0xFF, unsigned >> 16]
            if signal.byte_order == "big":
                octets.reverse()
            data[signal.byte_offset:signal.byte_offset + 3] = bytes(octets)
        else:
            prefix = "<" if signal.byte_order == "little" else ">"
            struct.pack_into(prefix + STRUCT_CODES[(signal.width_bits, signal.signed)], data,
                             signal.byte_offset, raw)
    return bytes(data)


@given(st.data())
@PROPERTY_SETTINGS
def test_raw_values_encode_like_independent_packers(data: st.DataObject) -> None:
    layout = data.draw(layouts())
    raws = [data.draw(st.integers(*signal.raw_range)) for signal in layout.signals]
    physical = [raw * signal.scale + signal.offset for signal, raw in zip(layout.signals, raws)]
    encoded = layout.encode(physical)
    assert encoded == reference_bytes(layout, raws) == struct_bytes(layout, raws)
    assert layout.encode(dict(zip(layout.names, physical))) == encoded
    # Reference library: python-can accepts the frame as a valid classical CAN frame.
    message = can.Message(arbitration_id=layout.arbitration_id, is_extended_id=layout.extended_id,
                          data=encoded, check=True)
    assert message.dlc == layout.dlc
    decoded = layout.decode(message.data)
    for signal, value in zip(layout.signals, physical):
        assert decoded[signal.name] == pytest.approx(value, rel=1e-12, abs=1e-9 * abs(signal.scale))


@given(st.data())
@PROPERTY_SETTINGS
def test_representable_values_survive_round_trip(data: st.DataObject) -> None:
    layout = data.draw(layouts())
    values = {}
    for signal in layout.signals:
        low, high = signal.physical_range
        values[signal.name] = data.draw(st.floats(low, high))
    decoded = layout.decode(layout.encode(values))
    assert set(decoded) == set(values)
    for signal in layout.signals:
        # Rounding to the nearest count: error at most scale/2 (plus float64 slack).
        assert abs(decoded[signal.name] - values[signal.name]) <= abs(signal.scale) * (0.5 + 1e-6)


@given(st.data())
@PROPERTY_SETTINGS
def test_out_of_range_values_are_rejected_not_wrapped(data: st.DataObject) -> None:
    layout = data.draw(layouts())
    values = [0.5 * (s.physical_range[0] + s.physical_range[1]) for s in layout.signals]
    index = data.draw(st.integers(0, len(values) - 1))
    low, high = layout.signals[index].physical_range
    step = abs(layout.signals[index].scale)
    bad = data.draw(st.sampled_from([
        math.nextafter(high, math.inf), math.nextafter(low, -math.inf), high + step, low - step,
        high + 1e6 * step, float("nan"), float("inf"), -float("inf"),
    ]))
    values[index] = bad
    with pytest.raises(EncodeError) as caught:
        layout.encode(values)
    assert repr(layout.signals[index].name) in str(caught.value)
    assert repr(bad) in str(caught.value)


@given(layouts())
@PROPERTY_SETTINGS
def test_from_mapping_rebuilds_equal_layout(layout: FrameLayout) -> None:
    mapping = {
        "arbitration_id": layout.arbitration_id, "extended_id": layout.extended_id, "dlc": layout.dlc,
        "signals": [{"name": s.name, "byte_offset": s.byte_offset, "width_bits": s.width_bits,
                     "signed": s.signed, "byte_order": s.byte_order, "scale": s.scale, "offset": s.offset}
                    for s in layout.signals],
    }
    assert FrameLayout.from_mapping(mapping, "rig.toml", "bus.can.frame") == layout
