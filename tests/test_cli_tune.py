"""The ``tune`` commands end to end on the demo flume profile (SIL servo, no mocks)."""
from __future__ import annotations

import argparse
import re
from pathlib import Path

import h5py
import pytest

from flapctl import cli_tune
from flapctl.errors import ProfileError
from flapctl.profile import load_profile
from flapctl.tune.ilc import AzimuthILC

ROOT = Path(__file__).resolve().parent.parent
PROFILE = ROOT / "hw_profiles" / "demo_flume_3blade.toml"
SCHEDULE = ROOT / "hw_profiles" / "schedules" / "demo_morph.toml"


def _run(*argv: str) -> int:
    parser = argparse.ArgumentParser(prog="flapctl")
    sub = parser.add_subparsers(dest="command", required=True)
    cli_tune.register(sub)
    args = parser.parse_args(["tune", *argv])
    return args.func(args)


def test_excite_then_identify_recovers_the_profile_servo(tmp_path, capsys):
    log = tmp_path / "step.h5"
    assert _run("excite", str(PROFILE), "--blade", "1", "--signal", "step", "--out", str(log)) == 0
    with h5py.File(log, "r") as f:
        assert set(f) == {"t_s", "command_deg", "feedback_deg", "current_a", "voltage_v"}
        assert f["t_s"].shape == (4000,)
    new = tmp_path / "identified.toml"
    png = tmp_path / "fit.png"
    assert _run("identify", str(log), "--profile", str(PROFILE), "--write-profile", str(new),
                "--plot", str(png)) == 0
    out = capsys.readouterr().out
    dead_ms = float(re.search(r"dead time \(ms\)\s+([\d.]+)", out).group(1))
    fn_hz = float(re.search(r"natural frequency \(Hz\)\s+([\d.]+)", out).group(1))
    servo = load_profile(PROFILE).servos[1]          # the data the SIL servo was built from
    assert abs(dead_ms * 1e-3 - servo.dead_time_s) <= 0.10 * servo.dead_time_s
    assert abs(fn_hz - servo.natural_freq_hz) <= 0.10 * servo.natural_freq_hz
    written = load_profile(new).servos[1]
    assert abs(written.dead_time_s - servo.dead_time_s) <= 0.10 * servo.dead_time_s
    assert png.stat().st_size > 1000
    with pytest.raises(ProfileError):            # never overwrite the record
        _run("excite", str(PROFILE), "--blade", "1", "--signal", "step", "--out", str(log))


def test_excite_rejects_a_bad_blade(tmp_path):
    with pytest.raises(ProfileError) as err:
        _run("excite", str(PROFILE), "--blade", "3", "--signal", "chirp", "--out", str(tmp_path / "x.h5"))
    assert err.value.key == "--blade"


def test_lead_predicts_less_error_than_no_lead(tmp_path, capsys):
    out = tmp_path / "lead.csv"
    assert _run("lead", str(PROFILE), str(SCHEDULE), "--method", "dead_time", "--out", str(out)) == 0
    text = capsys.readouterr().out
    line = next(ln for ln in text.splitlines() if ln.startswith("over the speeds:"))
    values = {k: float(v) for k, v in re.findall(r"(\w+) ([\d.]+) deg", line)}
    assert set(values) == {"none", "angle", "dead_time", "harmonic"}
    for method in ("angle", "dead_time", "harmonic"):
        assert values[method] < values["none"]
    rows = out.read_text(encoding="utf-8").splitlines()
    assert rows[1] == "speed_rad_s,lead_deg" and len(rows) == 2 + 5


def test_lead_harmonic_writes_a_schedule(tmp_path):
    from flapctl.schedule import Schedule
    out = tmp_path / "pre.toml"
    assert _run("lead", str(PROFILE), str(SCHEDULE), "--method", "harmonic", "--speeds", "7,7.5,8",
                "--out", str(out)) == 0
    sched = Schedule.load(out, 3)
    assert sched.tsr_axis is not None and len(sched.tsr_axis) == 3


def test_ilc_reduces_the_error_and_saves(tmp_path, capsys):
    out = tmp_path / "ilc.json"
    assert _run("ilc", str(PROFILE), str(SCHEDULE), "--revolutions", "4", "--out", str(out)) == 0
    text = capsys.readouterr().out
    first, last = (float(v) for v in re.search(r"error ([\d.]+) -> ([\d.]+) deg", text).groups())
    assert last < 0.5 * first
    learner = AzimuthILC.load(out)
    assert learner.revolutions == 4 and learner.bins == 72


def test_sweep_command_runs_and_resumes(tmp_path, capsys):
    spec = tmp_path / "tiny.toml"
    spec.write_text(f"""\
schema_version = 1
name = "tiny"
profile = "{PROFILE.as_posix()}"
schedule = "{SCHEDULE.as_posix()}"
[run]
revolutions = 1
settle_s = 0.0
[vary.amplitude_scale]
values = [0.5, 1.0]
""", encoding="utf-8")
    out = tmp_path / "out"
    assert _run("sweep", str(spec), "--workers", "2", "--out-dir", str(out)) == 0
    text = capsys.readouterr().out
    assert "2 cases in" in text and "(2 run now, 0 already there)" in text
    assert (out / "results.csv").exists() and (out / "tracking_vs_speed.png").exists()
    assert _run("sweep", str(spec), "--workers", "2", "--out-dir", str(out)) == 0
    assert "(0 run now, 2 already there)" in capsys.readouterr().out


def test_excite_runs_over_the_bridge_the_same_way(tmp_path):
    # the rig path: the same excitation through BridgePorts against the SIL server process
    import subprocess
    import sys
    proc = subprocess.Popen([sys.executable, "-m", "sim.server", "--profile", str(PROFILE), "--bind",
                             "tcp://127.0.0.1:*"], stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                            text=True)
    try:
        ready = proc.stdout.readline().split()
        assert ready and ready[0] == "ready", ready
        log = tmp_path / "bridge.h5"
        assert _run("excite", str(PROFILE), "--blade", "0", "--signal", "chirp", "--f0", "0.5",
                    "--f1", "8", "--seconds", "2", "--bridge", ready[1], "--out", str(log)) == 0
        with h5py.File(log, "r") as f:
            assert f.attrs["backend"].startswith("bridge:")
            fb = f["feedback_deg"][:]
        assert 3.0 < abs(fb).max() <= 5.5          # the flap followed a 5 deg chirp
    finally:
        proc.terminate()
        proc.wait(timeout=20)
