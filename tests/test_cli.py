"""The flapctl command as a new user runs it: real subprocesses, real files."""
from __future__ import annotations

import os
import signal
import subprocess
import sys

import numpy as np
import pytest

from conftest import PROFILES, ROOT
from flapctl.runlog import open_run

FLUME = str(PROFILES / "demo_flume_3blade.toml")
TUNNEL = str(PROFILES / "demo_tunnel_2blade.toml")
MORPH = str(PROFILES / "schedules" / "demo_morph.toml")


def flapctl(*args, timeout=240, cwd=None):
    return subprocess.run([sys.executable, "-m", "flapctl.cli", *args], capture_output=True, text=True,
                          timeout=timeout, cwd=cwd or ROOT)


@pytest.mark.parametrize("profile", [FLUME, TUNNEL])
def test_check_prints_derived_quantities(profile):
    r = flapctl("check", profile)
    assert r.returncode == 0, r.stderr
    for label in ("swept area", "N c / R", "N c / D", "N c / (2 pi R)", "density", "viscosity",
                  "available fluid power", "rotor speed at design TSR", "chord Reynolds"):
        assert label in r.stdout


def test_check_flume_numbers():
    # A = 2 R H = 0.12 m^2; N c / R = 0.75 (REFERENCES sec. 1); water 20 degC 998.21 kg/m^3 (IAPWS-95)
    r = flapctl("check", FLUME)
    assert "0.1200 m^2" in r.stdout and "0.7500" in r.stdout and "998.2" in r.stdout


def test_check_with_schedule_and_infeasible_warning(tmp_path):
    r = flapctl("check", FLUME, "--schedule", MORPH)
    assert r.returncode == 0 and "ok" in r.stdout
    fast = tmp_path / "fast.csv"
    fast.write_text("azimuth_deg,flap_deg\n" + "".join(
        f"{a},{15 * np.sin(np.radians(8 * a)):.3f}\n" for a in range(0, 360, 5)))
    r = flapctl("check", FLUME, "--schedule", str(fast))
    assert r.returncode == 1 and "WARNING" in r.stdout and "rate limit" in r.stdout


def test_typo_in_profile_is_named(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(open(FLUME).read().replace("radius_m = 0.20", "radius_mm = 0.20"))
    r = flapctl("check", str(bad))
    assert r.returncode == 2
    assert "bad.toml" in r.stderr and "geometry.radius_mm" in r.stderr and "Traceback" not in r.stderr
    neg = tmp_path / "neg.toml"
    neg.write_text(open(FLUME).read().replace("radius_m = 0.20", "radius_m = -0.20"))
    r = flapctl("check", str(neg))
    assert r.returncode == 2 and "geometry.radius_m = -0.2" in r.stderr


def test_run_writes_a_log_and_refuses_to_overwrite(tmp_path):
    out = tmp_path / "run.h5"
    r = flapctl("run", "--profile", FLUME, "--schedule", MORPH, "--duration", "4", "--settle", "1",
                "--out", str(out))
    assert r.returncode == 0, r.stderr
    assert "Cp net" in r.stdout and "not a safety function" in r.stderr
    assert len(open_run(out).ticks) == 4000
    r = flapctl("run", "--profile", FLUME, "--duration", "1", "--out", str(out))
    assert r.returncode == 2 and "exists already" in r.stderr


def test_demo_prints_table_and_writes_plot(tmp_path):
    r = flapctl("demo", "--duration", "8", "--settle", "3", "--out-dir", str(tmp_path / "d"))
    assert r.returncode == 0, r.stderr
    assert "baseline (flaps neutral)" in r.stdout and "morphing" in r.stdout and "net gain" in r.stdout
    png = tmp_path / "d" / "demo_azimuth.png"
    assert png.exists() and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_run_with_faults_trips(tmp_path):
    out = tmp_path / "jam.h5"
    r = flapctl("run", "--profile", FLUME, "--schedule", MORPH, "--duration", "7", "--settle", "1",
                "--faults", str(PROFILES / "faults" / "demo_servo_jam.toml"), "--out", str(out))
    assert r.returncode == 3 and "TRIP" in r.stdout and "flap_tracking" in r.stdout


def test_kill_9_leaves_a_readable_log(tmp_path):
    # kill -9 a running `flapctl run`: the log stays readable and holds every tick but those after
    # the last flush (at most one second of ticks at the profile's rate)
    out = tmp_path / "killed.h5"
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    proc = subprocess.Popen([sys.executable, "-m", "flapctl.cli", "run", "--profile", FLUME,
                             "--duration", "120", "--out", str(out)], cwd=ROOT, env=env,
                            stderr=subprocess.PIPE, stdout=subprocess.DEVNULL, text=True)
    try:
        for _ in range(50):                       # bounded: progress lines come every 25 %
            line = proc.stderr.readline()
            if " 0 %" in line or "  1 %" in line or line == "":
                break
        # the first progress line comes at tick 0; wait for a later one (non-tty: every 25 %) or
        # for enough time that several flushes happened, bounded by the subprocess timeout below
        line = proc.stderr.readline()
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    run = open_run(out)
    t = run.ticks["t_s"]
    assert len(t) >= 30_000 - 1000                # 25 % of 120 s at 1 kHz, less one flush interval
    assert np.allclose(np.diff(t), 1e-3)


def test_lead_table_from_file_is_used(tmp_path):
    table = tmp_path / "lead.csv"
    table.write_text("# lead versus speed\nspeed_rad_s,lead_deg\n5.0,10\n10.0,20\n")
    out = tmp_path / "lead.h5"
    r = flapctl("run", "--profile", FLUME, "--schedule", MORPH, "--lead-table", str(table),
                "--duration", "3", "--settle", "1", "--out", str(out))
    assert r.returncode == 0, r.stderr
    assert open_run(out).attrs["lead"] == "table of 2 speeds"
    bad = tmp_path / "bad.csv"
    bad.write_text("speed_rad_s,lead_deg\n5.0,10\n4.0,20\n")
    r = flapctl("run", "--profile", FLUME, "--lead-table", str(bad), "--duration", "1",
                "--out", str(tmp_path / "x.h5"))
    assert r.returncode == 2 and "bad.csv: row 3" in r.stderr
