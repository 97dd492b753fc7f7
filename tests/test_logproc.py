"""The writer-process run log: a real spawned writer, a real HDF5 file, real failures."""
from __future__ import annotations

import os
import signal

import numpy as np
import pytest

from flapctl.energy import RevolutionRecord
from flapctl.errors import RunLogError
from flapctl.logproc import ProcessRunLog
from flapctl.runlog import open_run


def _row(k, n=3):
    return (k * 1e-3, k, 0.1 * k, 8.0, 2.0, 0.6, 0.2, float('nan'), 0.1, 2, (1.0,) * n, (0.9,) * n, (0.2,) * n,
            3.0, 5.0)


def test_round_trip_through_the_writer_process(tmp_path):
    path = tmp_path / "run.h5"
    log = ProcessRunLog(path, 3, {"profile_text": "x = 1", "tsr_setpoint": 2.0}, chunk_rows=100)
    pid = log.writer_pid
    assert pid is not None and pid != os.getpid()
    for k in range(250):
        log.append_tick(_row(k))
    assert log.rows_sent == 200                  # two whole chunks sent, one send per chunk
    rev = RevolutionRecord(0, 0.0, 0.8, 7.9, 2.0, 0.6, 1.5, (0.01, 0.02, 0.03), 6.0)
    log.append_revolution(rev)
    log.event(0.1, "state", "SAFE -> ARMED")
    log.flush()
    assert log.rows_written == 250               # acknowledged as on disk
    log.set_summary({"cp_gross": 0.25})
    log.close()
    log.close()                                  # idempotent
    assert log._proc.exitcode == 0
    run = open_run(path)
    assert len(run.ticks) == 250
    assert np.array_equal(run.ticks["counts"], np.arange(250))
    assert run.ticks["flap_cmd_deg"].shape == (250, 3)
    assert run.attrs["profile_text"] == "x = 1" and run.summary["cp_gross"] == 0.25
    assert len(run.revolutions) == 1 and run.revolutions["servo_energy_j"][0][2] == 0.03
    assert run.events["kind"][0] in (b"state", "state")


def test_never_overwrites_and_fails_at_once(tmp_path):
    path = tmp_path / "run.h5"
    path.write_bytes(b"precious")
    with pytest.raises(RunLogError, match="exists already"):
        ProcessRunLog(path, 3, {})
    assert path.read_bytes() == b"precious"


def test_writer_that_cannot_create_the_file_fails_the_constructor(tmp_path):
    blocker = tmp_path / "not_a_dir"
    blocker.write_text("a file where a directory should be")
    with pytest.raises(RunLogError, match="not_a_dir"):
        ProcessRunLog(blocker / "run.h5", 3, {})


def test_writer_death_raises_on_the_next_flush(tmp_path):
    path = tmp_path / "run.h5"
    log = ProcessRunLog(path, 3, {}, chunk_rows=50)
    for k in range(100):
        log.append_tick(_row(k))
    log.flush()
    os.kill(log.writer_pid, signal.SIGKILL)
    log._proc.join(timeout=10)
    for k in range(100, 120):
        log.append_tick(_row(k))            # below a chunk: no send, nothing noticed yet
    with pytest.raises(RunLogError) as info:
        log.flush()
    assert str(path) in str(info.value) and "died" in str(info.value)
    assert "killed by signal 9" in str(info.value) and "100 tick rows are safe" in str(info.value)
    with pytest.raises(RunLogError):             # and it stays failed
        log.flush()
    log.close()                                  # no hang, no second error
    assert len(open_run(path).ticks) == 100      # everything flushed before the kill survived


def test_write_error_in_the_writer_is_reported(tmp_path):
    path = tmp_path / "run.h5"
    log = ProcessRunLog(path, 3, {}, chunk_rows=10)
    for k in range(10):
        log.append_tick(_row(k))
    log.flush()
    log.append_tick(("not", "a", "tick", "row"))    # the writer's HDF5 append fails on this
    with pytest.raises(RunLogError, match="writer failed") as info:
        log.flush()
    assert str(path) in str(info.value) and "10 tick rows are safe" in str(info.value)
    log.close()
    assert len(open_run(path).ticks) == 10


def test_old_partial_batches_are_sent(tmp_path):
    # flush_interval_s = 0: every append is older than the interval, so each one is sent
    log = ProcessRunLog(tmp_path / "run.h5", 3, {}, chunk_rows=1000, flush_interval_s=0.0)
    for k in range(5):
        log.append_tick(_row(k))
        assert log.rows_sent == k + 1
    log.close()
    assert log.rows_written == 5
