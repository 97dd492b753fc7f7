"""Lockstep round trip per tick across processes over the bridge protocol (tcp://127.0.0.1).

    python bench/bench_bridge.py [--profile P] [--ticks N] [--paced-hz HZ]

Starts ``python -m sim.server`` in lockstep mode on a free loopback port, opens a session with
:class:`flapctl.ports.bridge.BridgePorts` and times ``step()`` (send ``step``, the server applies it,
advances the VirtualRig one period, answers ``readings``; the reply decoded and validated):

* tight: steps back to back;
* paced: one step per period of a 1 kHz (or ``--paced-hz``) absolute-deadline loop, as a real-time
  controller would issue them (caches go cold between ticks).

It also times the rig's own step in-process, because that sits inside every round trip, and a raw
DEALER/ROUTER echo of the same frame sizes (the transport alone).  Prints figures; asserts nothing.
"""
from __future__ import annotations

import argparse
import os
import select
import statistics
import subprocess
import sys
import time
from pathlib import Path

import zmq

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from flapctl.ports import bridgeproto as bp  # noqa: E402
from flapctl.ports.bridge import BridgeOptions, BridgePorts  # noqa: E402
from flapctl.profile import load_profile  # noqa: E402
from sim.server import build_rig  # noqa: E402


def _figures(name: str, ns: list[int]) -> None:
    us = sorted(x / 1e3 for x in ns)
    n = len(us)
    print(f"{name:<34} n={n:5d}  median {statistics.median(us):8.1f} us  "
          f"p90 {us[int(0.90 * (n - 1))]:8.1f} us  p99 {us[int(0.99 * (n - 1))]:8.1f} us  "
          f"max {us[-1]:9.1f} us")


def _start_server(profile: str) -> tuple[subprocess.Popen, str]:
    proc = subprocess.Popen([sys.executable, "-m", "sim.server", "--profile", profile, "--mode",
                             "lockstep", "--bind", "tcp://127.0.0.1:*"], cwd=ROOT,
                            stdout=subprocess.PIPE, env={**os.environ, "PYTHONPATH": str(ROOT)})
    ready, _, _ = select.select([proc.stdout], [], [], 60.0)
    line = proc.stdout.readline().decode() if ready else ""
    if not line.startswith("ready "):
        proc.kill()
        raise SystemExit(f"sim.server did not start: {line!r}")
    return proc, line.split()[1]


def _sleep_until(due_ns: int) -> None:
    left = due_ns - time.monotonic_ns() - 150_000
    if left > 0:
        time.sleep(left * 1e-9)
    while time.monotonic_ns() < due_ns:
        pass


def bench_steps(ports: BridgePorts, ticks: int, paced_hz: float | None) -> list[int]:
    out = []
    period = int(1e9 / paced_hz) if paced_hz else 0
    due = time.monotonic_ns()
    for k in range(ticks):
        ports.command_flaps([0.5 * (k % 7)] * ports.blades)
        ports.heartbeat()
        ports.step()
        out.append(ports.round_trip_ns)
        if period:
            due += period
            _sleep_until(due)
    return out


def bench_rig_step(profile_path: str, ticks: int) -> list[int]:
    profile = load_profile(profile_path)
    rig = build_rig(profile, int(round(1e9 / profile.control.rate_hz)), seed=None, flow_m_s=None, tsr=None)
    dt = rig.dt
    out = []
    for _ in range(ticks):
        t0 = time.perf_counter_ns()
        rig.step(dt)
        out.append(time.perf_counter_ns() - t0)
    rig.close()
    return out


def bench_raw_echo(ticks: int, blades: int) -> list[int]:
    """The transport alone: DEALER here -> ROUTER echo in a child process, same frame size."""
    code = ("import zmq,sys\nc=zmq.Context();s=c.socket(zmq.ROUTER);s.setsockopt(zmq.LINGER,0)\n"
            "s.bind('tcp://127.0.0.1:*');print(s.getsockopt_string(zmq.LAST_ENDPOINT),flush=True)\n"
            "while True:\n f=s.recv_multipart()\n if f[1]==b'q': break\n s.send_multipart(f)\n")
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE)
    endpoint = proc.stdout.readline().decode().strip()
    ctx = zmq.Context()
    sock = ctx.socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    sock.connect(endpoint)
    enc = bp.SetpointEncoder(blades)
    frame = enc.pack("step", [1.0] * blades, 0.5, 1)
    out = []
    for _ in range(ticks):
        t0 = time.monotonic_ns()
        sock.send(frame)
        if not sock.poll(5000):
            break
        sock.recv()
        out.append(time.monotonic_ns() - t0)
    sock.send(b"q")
    sock.close()
    ctx.term()
    proc.wait(10)
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--profile", default=str(ROOT / "hw_profiles" / "demo_flume_3blade.toml"))
    ap.add_argument("--ticks", type=int, default=3000)
    ap.add_argument("--paced-hz", type=float, default=1000.0)
    args = ap.parse_args()
    profile = load_profile(args.profile)
    print(f"profile {args.profile}: {profile.blades} blades, {profile.control.rate_hz:g} Hz; "
          f"{os.cpu_count()} CPUs; load average {os.getloadavg()[0]:.2f}")
    _figures("raw zmq echo (transport only)", bench_raw_echo(args.ticks, profile.blades))
    _figures("rig.step in-process", bench_rig_step(args.profile, args.ticks))
    proc, endpoint = _start_server(args.profile)
    try:
        ports = BridgePorts(profile, options=BridgeOptions(endpoint=endpoint, watchdog_ms=10_000.0,
                                                           timeout_ms=10_000.0))
        with ports:
            bench_steps(ports, 200, None)                          # warm up (first steps are slow)
            _figures("lockstep step round trip, tight", bench_steps(ports, args.ticks, None))
            _figures(f"lockstep step round trip, {args.paced_hz:g} Hz",
                     bench_steps(ports, args.ticks, args.paced_hz))
    finally:
        proc.terminate()
        proc.wait(10)
    return 0


if __name__ == "__main__":
    sys.exit(main())
