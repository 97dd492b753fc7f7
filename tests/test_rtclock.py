"""The real-time clock: absolute deadlines, overrun counting and tripping, the real-time knobs.

No timing is asserted: only lower bounds that the sleep itself guarantees (a sleep of d never
returns before d has passed, Python docs of ``time.sleep``), exact integer deadlines, and counts
that follow from them.  Loops are bounded to a few ticks.
"""
from __future__ import annotations

import gc
import json
import logging
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from flapctl.errors import ProfileError, SafetyTrip
from flapctl.rtclock import (NsHistogram, OverrunPolicy, RealtimeClock, RealtimeOptions,
                             RealtimeState, apply_realtime, default_spin_margin_ns,
                             restore_realtime)

ROOT = Path(__file__).resolve().parent.parent
MS = 1_000_000


def test_spin_margin_scales_with_the_period():
    # the margins of PITFALLS.md ("Real time on Linux", measured on these machines):
    # ~150 us at 1 kHz, ~50 us at 2-5 kHz, never more than 20 % of the period
    assert default_spin_margin_ns(1_000_000) == 150_000
    assert default_spin_margin_ns(500_000) == 50_000
    assert default_spin_margin_ns(200_000) == 40_000          # 20 % cap at 5 kHz
    for rate_hz in (50, 100, 500, 1000, 1500, 2000, 5000, 10000, 20000):
        period = int(1e9 / rate_hz)
        assert 0 < default_spin_margin_ns(period) <= period // 5


def test_deadlines_stay_on_the_grid_after_a_pause():
    period = 2 * MS
    clock = RealtimeClock(period, policy=OverrunPolicy(trip_after_consecutive=None))
    assert clock.start() == 0
    wakes, returned = [], []
    for k in range(1, 4):
        returned.append(clock.wait())
        wakes.append(clock.wake_ns)
    time.sleep(0.012)                        # the injected pause: 6 periods
    for k in range(4, 12):
        returned.append(clock.wait())
        wakes.append(clock.wake_ns)
        if k == 4:
            after_pause = clock.lateness_ns
    # deadlines are k * period exactly: the grid never moved
    assert returned == [k * period for k in range(1, 12)]
    assert clock.due_ns - clock.t0_ns == 11 * period
    # no tick ever started before its deadline
    assert all(w >= clock.t0_ns + k * period for k, w in zip(range(1, 12), wakes))
    # the tick after the pause is late by at least pause - one period (a clock that re-based its
    # deadline on "now" would report ~0 here), and it is counted as an overrun
    assert after_pause >= 12 * MS - period
    assert clock.overruns >= 1 and clock.late >= clock.overruns
    st = clock.stats()
    assert st["ticks"] == 11 and st["lateness_max_us"] >= (12 * MS - period) * 1e-3


def test_trip_after_k_consecutive_overruns(caplog):
    period = 1 * MS
    clock = RealtimeClock(period, policy=OverrunPolicy(warn_after=1, trip_after_consecutive=3))
    clock.start()
    caplog.set_level(logging.WARNING, logger="flapctl.rtclock")
    with pytest.raises(SafetyTrip) as info:
        for _ in range(10):                  # bounded: the trip comes at the third tick
            time.sleep(0.003)                # the tick body overruns: 3 periods of work
            clock.wait()
    assert info.value.reason == "loop_overrun"
    assert "3 consecutive" in info.value.detail
    assert clock.ticks == 3 and clock.overruns == 3 and clock.consecutive_overruns == 3
    warnings = [r for r in caplog.records if "overrun" in r.getMessage()]
    assert 1 <= len(warnings) < 3            # rate-limited: at most one a second


def test_no_trip_without_a_limit():
    policy = OverrunPolicy(warn_after=None, trip_after_consecutive=None)
    clock = RealtimeClock(1 * MS, policy=policy)
    clock.start()
    for _ in range(3):
        time.sleep(0.003)
        clock.wait()
    assert clock.overruns == 3 and clock.max_consecutive_overruns == 3


def test_histogram_quantiles_match_numpy():
    # reference: numpy.quantile(method="inverted_cdf"), the empirical-distribution quantile;
    # the histogram gives the upper edge of the bin holding it (1 us / 50 us / 5 ms bins)
    rng = np.random.default_rng(7)
    values = np.concatenate([rng.integers(0, 3_000, 5000), rng.integers(0, 1_900_000, 3000),
                             rng.integers(2_000_000, 90_000_000, 500),
                             rng.integers(102_000_000, 2_000_000_000, 50)])
    h = NsHistogram()
    for v in values.tolist():
        h.add(v)
    assert h.count == len(values) and h.max_ns == values.max()
    for q in (0.1, 0.5, 0.9, 0.99, 0.999, 1.0):
        exact = int(np.quantile(values, q, method="inverted_cdf"))
        width = 1_000 if exact < 2_000_000 else (50_000 if exact < 102_000_000 else 5_000_000)
        got = h.quantile_ns(q)
        assert exact <= got <= exact + width, (q, exact, got)
    h.clear()
    assert h.count == 0 and h.quantile_ns(0.5) == 0


@pytest.mark.parametrize("key, value", [("fifo_priority", 0), ("fifo_priority", 100),
                                        ("fifo_priority", True), ("cpu", -1),
                                        ("timer_slack_ns", 0), ("mlockall", 1)])
def test_bad_options_name_the_key(key, value):
    with pytest.raises(ProfileError) as info:
        RealtimeOptions(**{key: value}, source="rig.toml")
    assert info.value.key == key and info.value.value == value and "rig.toml" in str(info.value)


def test_bad_policy_names_the_key():
    with pytest.raises(ProfileError, match="trip_after_consecutive"):
        OverrunPolicy(trip_after_consecutive=0)


@pytest.mark.skipif(not hasattr(os, "sched_setscheduler"), reason="no POSIX real-time scheduling")
def test_apply_realtime_works_and_is_undone():
    before_policy = os.sched_getscheduler(0)
    before_cpus = os.sched_getaffinity(0)
    cpu = min(before_cpus)
    state = RealtimeState()
    try:
        msgs = apply_realtime(RealtimeOptions(fifo_priority=10, cpu=cpu, mlockall=True,
                                              freeze_gc=True, timer_slack_ns=1), state)
        assert len(msgs) == 5 and all(isinstance(m, str) and m for m in msgs)
        assert not gc.isenabled()
        if os.geteuid() == 0:                  # root (as on the test machines): all knobs work
            reset_on_fork = getattr(os, "SCHED_RESET_ON_FORK", 0)
            assert os.sched_getscheduler(0) & ~reset_on_fork == os.SCHED_FIFO
            assert os.sched_getaffinity(0) == {cpu}
            assert any("memory locked" in m for m in msgs)
        else:
            assert any("not permitted" in m or "failed" in m for m in msgs)
    finally:
        undo = restore_realtime(state)
    assert undo and gc.isenabled()
    assert os.sched_getscheduler(0) == before_policy
    assert os.sched_getaffinity(0) == before_cpus


def test_invalid_cpu_falls_back_with_a_message():
    before = os.sched_getaffinity(0)
    state = RealtimeState()
    msgs = apply_realtime(RealtimeOptions(cpu=4095, timer_slack_ns=None), state)
    assert len(msgs) == 1 and "cpu 4095" in msgs[0] and "unchanged" in msgs[0]
    assert os.sched_getaffinity(0) == before and state.affinity is None
    restore_realtime(state)


@pytest.mark.skipif(os.geteuid() != 0, reason="needs root to drop to an unprivileged user")
def test_unprivileged_process_falls_back_and_never_raises():
    # a real process that gives up root (and the real-time rlimits) before asking for the knobs
    code = (
        "import json, os, resource\n"
        "from flapctl.rtclock import RealtimeOptions, apply_realtime\n"
        "resource.setrlimit(resource.RLIMIT_RTPRIO, (0, 0))\n"
        "resource.setrlimit(resource.RLIMIT_MEMLOCK, (65536, 65536))\n"
        "os.setgid(65534); os.setuid(65534)\n"
        "msgs = apply_realtime(RealtimeOptions(fifo_priority=50, mlockall=True, cpu=4095))\n"
        "print(json.dumps([msgs, os.sched_getscheduler(0) == os.SCHED_OTHER]))\n")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60, env=env, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    msgs, still_other = json.loads(done.stdout)
    assert still_other
    text = " | ".join(msgs)
    assert "SCHED_FIFO 50: not permitted" in text and "staying SCHED_OTHER" in text
    assert "mlockall: failed" in text and "cpu 4095: cannot pin" in text


def test_clock_applies_options_on_start_and_undoes_them_on_close():
    clock = RealtimeClock(1 * MS, options=RealtimeOptions(freeze_gc=True, timer_slack_ns=1))
    clock.start()
    try:
        assert not gc.isenabled() and len(clock.messages) == 2
        clock.wait()
    finally:
        clock.close()
    assert gc.isenabled() and clock.restore_messages
    clock.close()                                  # idempotent
    assert gc.isenabled()
