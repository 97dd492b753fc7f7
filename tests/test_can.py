"""CAN backend and CAN servo emulator: python-can's virtual bus in-process, udp_multicast across
processes inside a private network namespace.

References: frame lengths and bus load from Davis, Burns, Bril & Lukkien 2007 (REFERENCES §11);
byte layouts checked with the standard library's ``struct``; everything else against the same
controller driving the in-process SIL ports directly (a regression reference, not a published
value).
"""
from __future__ import annotations

import json
import math
import os
import select
import shutil
import struct
import subprocess
import sys
import tomllib
import uuid
from pathlib import Path

import can
import pytest

from flapctl.clock import VirtualClock
from flapctl.errors import BusError, BusTimeout, ProfileError
from flapctl.fluid import fluid_properties
from flapctl.ports.can import CanBusError, CanPorts, CanTimeout, bus_load_lines, load_can_config
from flapctl.ports.canframe import EncodeError
from flapctl.profile import parse_profile
from flapctl.schedule import Schedule
from flapctl.scheduler import Controller
from flapctl.supervisor import State
from sim.canservo import CanServoEmulator, build_rig

ROOT = Path(__file__).resolve().parent.parent
CAN_PROFILE = ROOT / "hw_profiles" / "demo_flume_can.toml"
MORPH = ROOT / "hw_profiles" / "schedules" / "demo_morph.toml"
DENSITY = fluid_properties("water", 20.0).density_kg_m3   # the demo flume's water (ledger only)
FLOW = 0.6


def _data() -> dict:
    return tomllib.loads(CAN_PROFILE.read_text(encoding="utf-8"))


def _profile(data: dict | None = None):
    return parse_profile(_data() if data is None else data, str(CAN_PROFILE))


def _channel() -> str:
    return f"flapctl-test-{uuid.uuid4().hex}"


def _monitor(channel: str, rx_queue_size: int = 0) -> can.BusABC:
    return can.Bus(interface="virtual", channel=channel, rx_queue_size=rx_queue_size)


def _drain(bus: can.BusABC, limit: int = 10_000) -> list[can.Message]:
    out = []
    for _ in range(limit):
        msg = bus.recv(0.0)
        if msg is None:
            break
        out.append(msg)
    return out


class Lockstep:
    """CanPorts + emulator + Controller on one virtual channel, stepped by a VirtualClock."""

    def __init__(self, profile, schedule, *, seed: int = 3, with_io: bool = False) -> None:
        self.channel = _channel()
        self.rig = build_rig(profile, flow_m_s=FLOW, tsr=profile.fluid.design_tsr, seed=seed)
        self.period_ns = int(round(1e9 / profile.control.rate_hz))
        self.clock = VirtualClock(self.period_ns, self._plant)
        self.ports = CanPorts(profile, clock=self.clock, channel=self.channel,
                              io=self.rig if with_io else None)
        self.emulator = CanServoEmulator(profile, self.rig, channel=self.channel)
        self.ctl = Controller(profile, schedule, self.ports, self.clock, tsr=profile.fluid.design_tsr,
                              density_kg_m3=DENSITY, listeners=(self._listen,))
        self.plant_hooks: list = []
        self.tick_hooks: list = []
        self.replying = True

    def _plant(self, dt_s: float) -> None:
        if self.replying:
            self.emulator.step(dt_s)
        else:
            self.rig.step(dt_s)
        for hook in self.plant_hooks:
            hook()

    def _listen(self, ctl, sample) -> None:
        for hook in self.tick_hooks:
            hook(sample)

    def close(self) -> None:
        self.ports.close()
        self.emulator.close()
        self.rig.close()


def _direct_run(profile, schedule, ticks: int, every: int, seed: int) -> list[float]:
    """The same controller on the SIL rig's own ports: true TSR every ``every`` ticks."""
    rig = build_rig(profile, flow_m_s=FLOW, tsr=profile.fluid.design_tsr, seed=seed)
    clock = VirtualClock(int(round(1e9 / profile.control.rate_hz)), rig.step)
    ctl = Controller(profile, schedule, rig, clock, tsr=profile.fluid.design_tsr, density_kg_m3=DENSITY)
    out = []
    clock.start()
    ctl.command("arm")
    ctl.command("start")
    for k in range(ticks):
        ctl.run_once()
        clock.wait()
        if k % every == 0:
            out.append(rig.speed_rad_s * profile.geometry.radius_m / rig.flow_m_s)
    rig.close()
    assert ctl.supervisor.state == State.RUNNING, ctl.supervisor.trips
    return out


def _start(ctl: Controller) -> None:
    ctl.clock.start()
    ctl.command("arm")
    ctl.command("start")


def _quantize(value: float, scale: float) -> float:
    return round(value / scale) * scale


# ------------------------------------------------------------------------- profile and bus load

def test_demo_bus_load_follows_davis_frame_lengths() -> None:
    # Worst-case bits C = g + 8 s + 13 + floor((g + 8 s - 1) / 4), g = 34 for 11-bit ids
    # (Davis et al. 2007, REFERENCES §11): 6 B -> 115, 5 B -> 105, 8 B -> 135, 2 B -> 75, 1 B -> 65.
    # Per second at 1 kHz: set-point 115k + 3 telemetry 315k + io 135k + 105k, brake and
    # heartbeat at 100 Hz 7.5k + 6.5k = 684 kbit of 1 Mbit/s.
    lines = bus_load_lines(_profile())
    assert "total worst-case load 68.4%" in lines[-1]
    assert not any(line.startswith("WARNING") for line in lines)
    data = _data()
    for frame in data["bus"]["options"]["telemetry_frames"]:   # voltage as int16: 6 B -> 115 bits
        frame["dlc"] = 6
        frame["signals"][2].update(width_bits=16, scale=0.001)
    lines = bus_load_lines(_profile(data))
    assert "total worst-case load 71.4%" in lines[-2]
    assert lines[-1].startswith("WARNING") and "71.4%" in lines[-1]


def test_demo_layouts_match_struct_packing() -> None:
    # Independent packing with the standard library's struct (little-endian int16 / uint32).
    config = load_can_config(_profile())
    assert config.grouped and config.heartbeat_ticks == 10 and config.reports_power
    assert config.setpoints[0].encode([1.5, -2.25, 20.0]) == struct.pack("<hhh", 150, -225, 2000)
    io = config.io[0].decode(struct.pack("<IhH", 0xFFFF_FFFF, -12345, 6000))
    assert io == {"counts": 0xFFFF_FFFF, "torque_nm": pytest.approx(-1.2345), "flow_m_s": pytest.approx(0.6)}


def _set(path: str, value):
    def change(data: dict) -> None:
        node = data
        keys = path.split(".")
        for key in keys[:-1]:
            node = node[int(key)] if key.isdigit() else node[key]
        last = keys[-1]
        node[int(last) if last.isdigit() else last] = value
    return change


@pytest.mark.parametrize(("change", "key"), [
    (_set("bus.options.bitrate", "fast"), "bus.options.bitrate"),
    (_set("bus.options.bitrate", 2_000_000), "bus.options.bitrate"),
    (_set("bus.options.speed", 1), "bus.options.speed"),
    (_set("bus.options.setpoint_frames.0.signals.1.scale", 0.0001),
     "bus.options.setpoint_frames[0].signals[1].scale"),
    (_set("bus.options.setpoint_frames.0.signals.2.name", "angle_deg_7"),
     "bus.options.setpoint_frames[0].signals[2].name"),
    (_set("bus.options.telemetry_frames.1.arbitration_id", 0x181),
     "bus.options.telemetry_frames[1].arbitration_id"),
    (_set("bus.options.io_frames.0.signals.0.width_bits", 16),
     "bus.options.io_frames[0].signals[0].width_bits"),
    (_set("bus.options.io_frames.0.signals.1.name", "thrust_n"), "bus.options.io_frames"),
    (_set("bus.options.heartbeat_frame.period_ms", 1.5), "bus.options.heartbeat_frame.period_ms"),
    (_set("bus.options.heartbeat_frame.watchdog_ms", 15.0), "bus.options.heartbeat_frame.watchdog_ms"),
    (_set("bus.options.brake_frame.signals.0.scale", 0.00001),
     "bus.options.brake_frame.signals[0].scale"),
])
def test_bad_options_name_the_key(change, key: str) -> None:
    data = _data()
    change(data)
    with pytest.raises(ProfileError) as info:
        load_can_config(_profile(data))
    assert info.value.key == key
    assert info.value.source == str(CAN_PROFILE)


def test_telemetry_without_power_signals_rejected_when_servos_report_power() -> None:
    data = _data()
    frame = data["bus"]["options"]["telemetry_frames"][2]
    frame["signals"] = frame["signals"][:2]
    with pytest.raises(ProfileError) as info:
        load_can_config(_profile(data))
    assert info.value.key == "bus.options.telemetry_frames[2].signals"
    assert "voltage_v" in info.value.expected


# ------------------------------------------------------------------------------ lockstep loops

def _per_servo_extended(data: dict) -> None:
    """One set-point frame per servo with 29-bit ids instead of the grouped frame."""
    data["bus"]["options"]["setpoint_frames"] = [
        {"arbitration_id": 0x1800_0100 + i, "extended_id": True, "dlc": 2,
         "signals": [{"name": "angle_deg", "byte_offset": 0, "width_bits": 16, "signed": True,
                      "byte_order": "big", "scale": 0.01}]} for i in range(3)]


@pytest.mark.parametrize("layout", ["grouped", "per_servo_extended"])
def test_flaps_follow_commands_through_the_bus(layout: str) -> None:
    data = _data()
    if layout == "per_servo_extended":
        _per_servo_extended(data)
    profile = _profile(data)
    run = Lockstep(profile, Schedule.load(MORPH, 3))
    rig, emulator, ctl = run.rig, run.emulator, run.ctl
    worst = {"setpoint": 0.0, "angle": 0.0, "current": 0.0, "voltage": 0.0}
    moved = [0.0, 0.0, 0.0]

    def after_tick(sample) -> None:
        # the telemetry read this tick is the rig's state after the last step, quantized
        for i, servo in enumerate(rig.servos):
            worst["angle"] = max(worst["angle"], abs(sample.flap_deg[i] - servo.angle_deg))
            worst["current"] = max(worst["current"], abs(sample.servo_current_a[i] - servo.current_a))
            worst["voltage"] = max(worst["voltage"], abs(sample.servo_voltage_v[i] - servo.voltage_v))
            moved[i] = max(moved[i], abs(sample.flap_deg[i]))

    def after_step() -> None:
        # the set-points the servos applied are the controller's commands of this tick, quantized
        for i in range(3):
            worst["setpoint"] = max(worst["setpoint"],
                                    abs(emulator.flap_command_deg[i] - _quantize(ctl.cmd[i], 0.01)))

    run.tick_hooks.append(after_tick)
    run.plant_hooks.append(after_step)
    try:
        state = ctl.run_for(0.4)
    finally:
        run.close()
    assert state == State.RUNNING and not ctl.supervisor.trips
    assert worst["setpoint"] < 1e-9
    assert worst["angle"] <= 0.005 + 1e-9          # half of 0.01 deg per bit
    assert worst["current"] <= 0.0005 + 1e-9       # half of 1 mA
    assert worst["voltage"] <= 0.05 + 1e-9         # half of 0.1 V
    assert min(moved) > 2.0                        # the morph schedule really moved every flap
    assert emulator.setpoints_received == 400 * len(profile.bus.options["setpoint_frames"])
    assert emulator.watchdog_trips == 0 and not emulator.safe


def test_rotor_speed_over_the_bus_tracks_the_direct_ports_run() -> None:
    # Regression reference: the same controller, schedule and seed on the SIL rig's own ports.
    # The bus adds one tick of telemetry delay and the frames' quantization, nothing else.
    data = _data()
    data["control"]["rate_hz"] = 500.0        # 2 s of rotor time in 1000 ticks
    profile = _profile(data)
    schedule = Schedule.load(MORPH, 3)
    ticks, every = 1000, 50
    reference = _direct_run(profile, schedule, ticks, every, seed=3)
    run = Lockstep(profile, schedule, seed=3)
    over_bus = []
    brake_error = [0.0]
    count = [0]

    def after_step() -> None:
        if count[0] % every == 0:
            over_bus.append(run.rig.speed_rad_s * profile.geometry.radius_m / run.rig.flow_m_s)
        brake_error[0] = max(brake_error[0], abs(run.emulator.brake_command_nm - run.ctl.brake_nm))
        count[0] += 1

    run.plant_hooks.append(after_step)
    # The brake drive holds its safe-state torque until commanded; the controller only sends a
    # brake frame when its output changes, so release it first as the SIL rig starts released.
    run.ports.command_brake(0.0)
    try:
        state = run.ctl.run_for(ticks / profile.control.rate_hz)
    finally:
        run.close()
    assert state == State.RUNNING and not run.ctl.supervisor.trips
    assert len(over_bus) == len(reference) == ticks // every
    diffs = [abs(a - b) for a, b in zip(over_bus, reference)]
    assert max(diffs) < 0.1, diffs                 # 0.05 seen: frame quantization only
    assert sum(diffs) / len(diffs) < 0.03, diffs
    assert min(over_bus) > 0.2                     # the rotor kept turning under brake control
    # brake command in drive units at 0.1 mV per bit, 3.333 V per N m: 1.5e-5 N m per half bit
    assert brake_error[0] < 2e-5
    assert run.emulator.heartbeats == ticks // run.ports.config.heartbeat_ticks == 200


def test_io_and_brake_off_the_bus_come_from_the_io_ports() -> None:
    data = _data()
    del data["bus"]["options"]["io_frames"]
    del data["bus"]["options"]["brake_frame"]
    profile = _profile(data)
    with pytest.raises(ProfileError) as info:
        CanPorts(profile, channel=_channel())
    assert info.value.key == "bus.options.io_frames"
    run = Lockstep(profile, Schedule.neutral(3), with_io=True)
    seen = []
    run.tick_hooks.append(lambda s: seen.append((s.counts, run.rig.read().counts, s.torque_nm)))
    try:
        run.ctl.run_for(0.1)
        run.ports.command_brake(0.7)
        assert run.rig._brake_cmd == 0.7
    finally:
        run.close()
    assert all(a == b for a, b, _ in seen)
    assert seen[-1][0] != seen[0][0]


# ------------------------------------------------------------------------------------- errors

def test_telemetry_loss_raises_bus_timeout_and_goes_safe() -> None:
    profile = _profile()
    run = Lockstep(profile, Schedule.load(MORPH, 3))
    monitor = _monitor(run.channel)
    stop_at = 100
    count = [0]

    def after_step() -> None:
        count[0] += 1
        if count[0] == stop_at:
            run.replying = False               # servos and I/O box fall silent

    run.plant_hooks.append(after_step)
    try:
        with pytest.raises(BusTimeout) as info:
            run.ctl.run_for(1.0)
        frames = _drain(monitor)
    finally:
        monitor.shutdown()
        run.close()
    exc = info.value
    assert isinstance(exc, CanTimeout) and isinstance(exc, TimeoutError)
    assert exc.servo == 0 and exc.arbitration_id == 0x181
    assert exc.age_s == pytest.approx(0.0505, abs=0.001)   # telemetry_timeout_ms = 50, 1 ms ticks
    assert "servo 0" in str(exc) and "ms" in str(exc)
    assert run.ctl.supervisor.state == State.FAULT
    # the last set-point frame before closing is neutral, the last brake frame the holding torque
    setpoints = [m for m in frames if m.arbitration_id == 0x200]
    brakes = [m for m in frames if m.arbitration_id == 0x301]
    assert bytes(setpoints[-1].data) == struct.pack("<hhh", 0, 0, 0)
    assert struct.unpack("<H", bytes(brakes[-1].data))[0] == round(1.0 * 3.333 / 0.0001)


def test_out_of_range_setpoint_is_rejected_unwrapped_and_nothing_sent() -> None:
    for layout in ("grouped", "per_servo_extended"):
        data = _data()
        if layout == "per_servo_extended":
            _per_servo_extended(data)
        channel = _channel()
        monitor = _monitor(channel)
        ports = CanPorts(_profile(data), channel=channel)
        try:
            for bad in ([0.0, 0.0, 400.0], [0.0, 0.0, math.nan], [math.inf, 0.0, 0.0]):
                with pytest.raises(EncodeError) as info:
                    ports.command_flaps(bad)
                assert not isinstance(info.value, BusError)
                assert _drain(monitor) == []
            ports.command_flaps([1.0, 2.0, 3.0])
            assert len(_drain(monitor)) == (1 if layout == "grouped" else 3)
        finally:
            ports.close()
            monitor.shutdown()


def test_send_failures_are_bus_errors_carrying_the_frame() -> None:
    channel = _channel()
    stuck = _monitor(channel, rx_queue_size=1)      # a receiver that never reads
    ports = CanPorts(_profile(), channel=channel)
    try:
        ports.command_brake(0.5)                     # fills the receiver's one-frame queue
        with pytest.raises(BusError) as info:
            ports.command_flaps([0.0, 0.0, 0.0])     # python-can: CanOperationError after the timeout
        assert isinstance(info.value, CanBusError) and not isinstance(info.value, BusTimeout)
        assert info.value.arbitration_id == 0x200
        assert isinstance(info.value.__cause__, can.CanError)
    finally:
        stuck.shutdown()
        ports.close()
    assert ports.closed
    ports.close()                                    # idempotent
    with pytest.raises(CanBusError):
        ports.command_flaps([0.0, 0.0, 0.0])         # the bus is shut down


def test_close_sends_the_safe_state_once() -> None:
    channel = _channel()
    monitor = _monitor(channel)
    ports = CanPorts(_profile(), channel=channel)
    ports.command_flaps([5.0, -5.0, 10.0])
    _drain(monitor)
    ports.close()
    ports.close()
    frames = _drain(monitor)
    monitor.shutdown()
    assert [m.arbitration_id for m in frames] == [0x200, 0x301]
    assert bytes(frames[0].data) == struct.pack("<hhh", 0, 0, 0)
    assert struct.unpack("<H", bytes(frames[1].data))[0] == round(1.0 * 3.333 / 0.0001)
    assert all(not m.is_extended_id and m.dlc == len(m.data) for m in frames)


# ----------------------------------------------------------------------- heartbeat and watchdog

def test_heartbeat_period_and_servo_watchdog() -> None:
    profile = _profile()
    run = Lockstep(profile, Schedule.load(MORPH, 3))
    monitor = _monitor(run.channel)
    ticks_with_heartbeat: list[tuple[int, int]] = []
    tick = [0]

    def after_tick(sample) -> None:
        for msg in _drain(monitor):
            if msg.arbitration_id == 0x010:
                assert not msg.is_extended_id and msg.dlc == 1
                ticks_with_heartbeat.append((tick[0], msg.data[0]))
        tick[0] += 1

    run.tick_hooks.append(after_tick)
    try:
        run.ctl.run_for(0.3)
        assert not run.emulator.safe and run.emulator.watchdog_trips == 0
        # the controller stops ticking (hung); the rig keeps running
        steps = 0
        for steps in range(1, 200):
            run.emulator.step()
            if run.emulator.safe:
                break
    finally:
        monitor.shutdown()
        run.close()
    # period_ms = 10 at 1 kHz: every 10th tick from tick 0, counter byte 0, 1, 2, ...
    assert [t for t, _ in ticks_with_heartbeat] == list(range(0, 300, 10))
    assert [c for _, c in ticks_with_heartbeat] == list(range(30))
    # last heartbeat at tick 290 (t = 0.290 s); watchdog 50 ms: safe at the step starting at
    # t = 0.341 s, after which the rig stands at 0.342 s
    assert run.emulator.watchdog_trips == 1
    assert run.rig.t_s == pytest.approx(0.342, abs=1e-6)
    assert steps < 60
    assert run.emulator.flap_command_deg == [0.0, 0.0, 0.0]
    assert run.emulator.brake_command_nm == profile.brake.hold_torque_nm


# ------------------------------------------------------------------- two processes, udp_multicast

GROUP = "239.74.163.2"

DRIVER = r"""
import json, sys, time
import can
from flapctl.ports.can import CanPorts
from flapctl.profile import load_profile

profile = load_profile(sys.argv[1])
port = int(sys.argv[2])
ticks = int(sys.argv[3])
ports = CanPorts(profile)
io_id = ports.config.io[0].arbitration_id
sync = can.Bus(interface="udp_multicast", channel=profile.bus.options["channel"], port=port,
               can_filters=[{"can_id": io_id, "can_mask": 0x7FF, "extended": False}])
first, second = [5.0, -3.0, 8.0], [-6.0, 2.0, 0.0]
ends = {}
deadline = time.monotonic() + 20.0
done = 0
try:
    # one tick per I/O frame of the emulator: its step is this loop's clock (no sleeping)
    while done < ticks and time.monotonic() < deadline:
        if sync.recv(timeout=0.5) is None:
            continue
        sample = ports.read()
        target = first if done < ticks // 2 else second
        ports.command_flaps(target)
        ports.heartbeat()
        done += 1
        if done in (ticks // 2, ticks):
            ends[done] = list(sample.flap_deg)
finally:
    sync.shutdown()
    ports.close()
print(json.dumps({"ticks": done, "ends": ends, "heartbeats": ports.heartbeats_sent}), flush=True)
"""


def _ip(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(["ip", *args], capture_output=True, text=True, timeout=10)


@pytest.fixture
def netns():
    """A private network namespace with only loopback and a route of 239/8 to it."""
    if shutil.which("ip") is None:
        pytest.skip("no `ip` command: cannot create a network namespace for the multicast test")
    if os.geteuid() != 0:
        pytest.skip("not root: cannot create a network namespace for the multicast test")
    name = f"flapctl-test-{uuid.uuid4().hex[:8]}"
    made = _ip("netns", "add", name)
    if made.returncode != 0:
        pytest.skip(f"cannot create network namespace {name}: {made.stderr.strip()}")
    try:
        for args in (("-n", name, "link", "set", "lo", "up"),
                     ("-n", name, "route", "add", "239.0.0.0/8", "dev", "lo")):
            done = _ip(*args)
            if done.returncode != 0:
                pytest.skip(f"cannot set up namespace {name} (ip {' '.join(args)}): {done.stderr.strip()}")
        yield name
    finally:
        _ip("netns", "delete", name)


def _readline(proc: subprocess.Popen, timeout_s: float) -> str:
    ready, _, _ = select.select([proc.stdout], [], [], timeout_s)
    return proc.stdout.readline() if ready else ""


def test_two_processes_over_udp_multicast(netns: str, tmp_path: Path) -> None:
    port = 20000 + uuid.uuid4().int % 40000
    text = CAN_PROFILE.read_text(encoding="utf-8")
    for old, new in (("rate_hz = 1000.0", "rate_hz = 250.0"),    # light enough for 2 processes on 2 cores
                     ('interface = "virtual"', 'interface = "udp_multicast"'),
                     ('channel = "flapctl-demo"', f'channel = "{GROUP}"\nport = {port}'),
                     ("period_ms = 10.0", "period_ms = 8.0"), ("watchdog_ms = 50.0", "watchdog_ms = 40.0")):
        assert text.count(old) == 1
        text = text.replace(old, new)
    path = tmp_path / "udp_profile.toml"
    path.write_text(text, encoding="utf-8")
    env = dict(os.environ, PYTHONPATH=str(ROOT), OPENBLAS_NUM_THREADS="1")
    prefix = ["ip", "netns", "exec", netns, sys.executable]
    emulator = subprocess.Popen(prefix + ["-m", "sim.canservo", "--profile", str(path), "--interface",
                                          "udp_multicast", "--channel", GROUP, "--port", str(port),
                                          "--duration-s", "30"],
                                cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                text=True)
    driver = None
    try:
        ready = _readline(emulator, 15.0)
        assert ready.startswith("ready"), (ready, emulator.poll())
        ticks = 250                                   # 1 s of rig time at 250 Hz
        driver = subprocess.run(prefix + ["-c", DRIVER, str(path), str(port), str(ticks)], cwd=ROOT,
                                env=env, capture_output=True, text=True, timeout=40)
        assert driver.returncode == 0, driver.stderr
        result = json.loads(driver.stdout.strip().splitlines()[-1])
        emulator.terminate()
        out, err = emulator.communicate(timeout=10)
        assert emulator.returncode == 0, err
        summary = json.loads(out.strip().splitlines()[-1])
    finally:
        if emulator.poll() is None:
            emulator.kill()
            emulator.wait(timeout=10)
    assert result["ticks"] == ticks
    assert result["heartbeats"] == math.ceil(ticks / 2)   # every 2nd tick (8 ms at 4 ms ticks)
    # 0.5 s per target: the servos (8 Hz, zeta 0.7, 300 deg/s) settle within backlash and quantization
    for key, target in (("125", [5.0, -3.0, 8.0]), ("250", [-6.0, 2.0, 0.0])):
        for angle, want in zip(result["ends"][key], target):
            assert abs(angle - want) < 0.25, (key, result["ends"])
    assert summary["heartbeats"] >= result["heartbeats"] - 2
    assert summary["setpoints_received"] >= ticks - 2
    assert summary["steps"] > ticks
