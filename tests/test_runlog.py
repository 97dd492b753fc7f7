"""The HDF5 run log: readable back, never overwrites, survives kill -9 up to the last flush."""
from __future__ import annotations

import signal
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from flapctl.errors import RunLogError
from flapctl.runlog import RunLog, open_run


def _row(k, n=3):
    return (k * 1e-3, k, 0.1 * k, 8.0, 2.0, 0.6, 0.2, float('nan'), 0.1, 2, (1.0,) * n, (0.9,) * n, (0.2,) * n, 0.0, 5.0)


def test_round_trip(tmp_path):
    path = tmp_path / "run.h5"
    log = RunLog(path, 3, {"profile_text": "x = 1", "tsr_setpoint": 2.0}, chunk_rows=100)
    for k in range(250):
        log.append_tick(_row(k))
    log.event(0.1, "state", "SAFE -> ARMED")
    log.set_summary({"cp_gross": 0.2})
    log.close()
    run = open_run(path)
    assert len(run.ticks) == 250 and run.ticks["counts"][-1] == 249
    assert run.ticks["flap_cmd_deg"].shape == (250, 3)
    assert run.attrs["profile_text"] == "x = 1" and run.summary["cp_gross"] == 0.2
    assert run.events["kind"][0] in (b"state", "state")


def test_never_overwrites(tmp_path):
    path = tmp_path / "run.h5"
    path.write_bytes(b"precious")
    with pytest.raises(RunLogError, match="exists already"):
        RunLog(path, 3, {})
    assert path.read_bytes() == b"precious"


def test_kill_9_keeps_flushed_rows(tmp_path):
    # a real subprocess writes rows with a flush every 100, reports what is flushed, and is killed
    path = tmp_path / "killed.h5"
    code = textwrap.dedent(f"""
        import sys
        from flapctl.runlog import RunLog
        log = RunLog({str(path)!r}, 3, {{}}, chunk_rows=100)
        row = (0.0, 0, 0.0, 8.0, 2.0, 0.6, 0.2, float('nan'), 0.1, 2, (1.0,)*3, (0.9,)*3, (0.2,)*3, 0.0, 5.0)
        for k in range(1_000_000):
            log.append_tick(row)
            if log.rows_written >= 1000 and k % 100 == 50:
                print(log.rows_written, flush=True)
                sys.stdin.readline()          # wait here until killed
    """)
    proc = subprocess.Popen([sys.executable, "-c", code], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True)
    try:
        flushed = int(proc.stdout.readline())
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=20)
    run = open_run(path)
    assert len(run.ticks) == flushed >= 1000
    assert np.all(run.ticks["speed_rad_s"] == 8.0)


def test_write_error_is_a_runlog_error(tmp_path):
    path = tmp_path / "run.h5"
    log = RunLog(path, 3, {}, chunk_rows=10)
    log._f.close()                    # the file goes away under the writer
    with pytest.raises(RunLogError, match="writing the run log failed"):
        for k in range(20):
            log.append_tick(_row(k))
