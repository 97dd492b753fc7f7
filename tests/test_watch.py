"""The live view: render() as a pure function, and watch() against a real interface in SIL."""
from __future__ import annotations

import io
import math
import threading
import time

import pytest
import zmq

from flapctl.clock import VirtualClock
from flapctl.errors import ProfileError
from flapctl.fluid import fluid_properties
from flapctl.opif import OperatorInterface
from flapctl.opmsg import decode_telemetry, encode_live, encode_revolution
from flapctl.ports import backend_class
from flapctl.profile import load_profile
from flapctl.schedule import Schedule
from flapctl.scheduler import Controller
from flapctl.watch import TelemetrySubscriber, new_view, render, update_view, watch

ANY_PORT = "tcp://127.0.0.1:*"


def _decoded(frame: bytes) -> dict:
    return decode_telemetry(frame)[1]


LIVE = _decoded(encode_live(12.345, 12345, "RUNNING", 123.45, 2.071, 2.2, 0.612, 1.2345, 1.2, 0.2871,
                            [0.1234, 0.5678, 0.9012], [4.5, -3.25, 0.0], [4.25, -3.0, 0.125],
                            (3.5, "overspeed_rpm", "rotor speed 201.0 rpm above 200.0")))
REV = _decoded(encode_revolution(17, 10.0, 0.75, 2.013, 121.0, 0.6, 0.3012, 0.2789, 5.5, 0.4321,
                                 [0.1, 0.2, 0.1321]))


def test_render_shows_the_numbers():
    view = new_view("tcp://127.0.0.1:47211")
    update_view(view, "live", LIVE)
    update_view(view, "revolution", REV)
    text = render(view)
    for piece in ("RUNNING", "12.345", "123.45 rpm", "TSR 2.071", "(set 2.200)", "0.612 m/s",
                  "1.2345 N m", "Cp gross (inst) 0.287", "revolution #17", "Cp gross 0.3012",
                  "Cp net 0.2789", "actuators 0.432 W", "+4.500", "-3.250", "+0.125", "0.5678",
                  "overspeed_rpm", "rotor speed 201.0 rpm above 200.0", "tcp://127.0.0.1:47211"):
        assert piece in text, piece
    assert "\x1b" not in text                     # terminal codes are added by watch() only
    assert render(view) == text                   # pure: same view, same text


def test_render_before_data_and_when_stale():
    view = new_view("e")
    text = render(view)
    assert "waiting for telemetry" in text and "none closed yet" in text and "trips: none" in text
    update_view(view, "live", LIVE)
    view["age_s"] = 4.2
    assert "no telemetry for 4.2 s" in render(view)
    nan_live = dict(LIVE, cp_gross_inst=math.nan)
    update_view(view, "live", nan_live)
    assert "Cp gross (inst) nan" in render(view)


def test_trips_are_collected_once_each():
    view = new_view("e")
    for _ in range(3):
        update_view(view, "live", LIVE)
    assert len(view["trips"]) == 1
    second = dict(LIVE, last_trip={"t_s": 9.0, "reason": "operator_heartbeat", "detail": "silent"})
    update_view(view, "live", second)
    assert [t["reason"] for t in view["trips"]] == ["overspeed_rpm", "operator_heartbeat"]
    assert "operator_heartbeat: silent" in render(view)


def test_subscriber_skips_malformed_frames():
    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.linger = 0
    port = pub.bind_to_random_port("tcp://127.0.0.1")
    got = []
    try:
        with TelemetrySubscriber(f"tcp://127.0.0.1:{port}") as sub:
            frame = encode_revolution(1, 0.0, 1.0, 2.0, 100.0, 0.6, 0.3, 0.28, 1.0, 0.1, [0.05, 0.05])
            for _ in range(500):                  # bounded: until the subscription has propagated
                pub.send(b"revolution \xc1garbage")
                pub.send(frame)
                got += sub.poll(2)
                if got and sub.invalid:
                    break
            assert sub.invalid >= 1
            assert all(topic == "revolution" and msg["index"] == 1 for topic, msg in got)
    finally:
        pub.close()
        ctx.term()


def test_watch_rejects_a_bad_duration():
    with pytest.raises(ProfileError, match="duration_s"):
        watch("tcp://127.0.0.1:1", duration_s=-1.0, stream=io.StringIO())


# --------------------------------------------------------------------------- against a live rig
class _Ticker:
    """The rig loop in a thread, bounded in ticks and wall time (lockstep SIL)."""

    def __init__(self, profile_path) -> None:
        p = load_profile(profile_path)
        f = p.fluid
        fluid = fluid_properties(f.medium, f.temperature_c, f.pressure_pa)
        period_ns = int(round(1e9 / p.control.rate_hz))
        self.rig = backend_class("sim")(p, density_kg_m3=fluid.density_kg_m3,
                                        viscosity_m2_s=fluid.kinematic_viscosity_m2_s,
                                        dt_s=period_ns * 1e-9)
        self.clock = VirtualClock(period_ns, self.rig.step)
        self.ctl = Controller(p, Schedule.neutral(p.blades), self.rig, self.clock,
                              tsr=f.design_tsr, density_kg_m3=fluid.density_kg_m3)
        self.oi = OperatorInterface(self.ctl, ANY_PORT, ANY_PORT)
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run)

    def _run(self) -> None:
        self.clock.start()
        self.ctl.command("arm")
        self.ctl.command("start")
        end = time.monotonic() + 10.0
        for _ in range(20000):
            if self.stop.is_set() or time.monotonic() > end:
                return
            self.ctl.run_once()
            self.clock.wait()

    def __enter__(self) -> "_Ticker":
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop.set()
        self.thread.join(15.0)
        self.oi.close()
        self.rig.close()


class _Terminal(io.StringIO):
    """A text buffer that says it is a terminal (so watch redraws in place)."""

    def isatty(self) -> bool:
        return True


def test_watch_once_shows_the_running_rig(tunnel_path):
    out = io.StringIO()
    with _Ticker(tunnel_path) as t:
        view = watch(t.oi.telemetry_address, duration_s=5.0, stream=out, once=True)
    assert view["live"] is not None and view["live"]["state"] == "RUNNING"
    text = out.getvalue()
    assert "state RUNNING" in text and "rpm" in text and f"{view['live']['rpm']:8.2f}" in text
    assert text.count("flapctl watch") == 1 and "\x1b" not in text


def test_watch_redraws_on_a_terminal_until_the_duration(tunnel_path):
    out = _Terminal()
    with _Ticker(tunnel_path) as t:
        t0 = time.monotonic()
        view = watch(t.oi.telemetry_address, duration_s=0.4, stream=out, refresh_hz=20.0)
        elapsed = time.monotonic() - t0
    assert elapsed < 5.0
    text = out.getvalue()
    assert text.startswith("\x1b[H\x1b[J") and text.count("\x1b[H\x1b[J") >= 2
    assert view["live"] is not None
