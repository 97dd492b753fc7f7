"""Encoder counts to azimuth and speed (REFERENCES section 10)."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from flapctl.estimate import AzimuthEstimator, observer_gains

CPR = 4096
DT = 1e-3


def _est(bits=32, bw=15.0, zeta=0.9, offset=0.0):
    return AzimuthEstimator(CPR, bits, offset, bw, zeta, DT)


def test_gains_from_natural_frequency():
    # Kp = 2 zeta w_n, Ki = w_n^2 (REFERENCES sec. 10, PLL design; from memory for the citation)
    kp, ki = observer_gains(10.0, 0.707)
    wn = 2 * math.pi * 10
    assert kp == pytest.approx(2 * 0.707 * wn) and ki == pytest.approx(wn * wn)


def test_speed_step_matches_continuous_transfer_function():
    # The observer's speed estimate follows (Kp s + Ki)/(s^2 + Kp s + Ki) applied to the true speed
    # (REFERENCES sec. 10); scipy.signal.lsim of that transfer function is the reference.
    est = _est(bw=10.0, zeta=0.9)
    n = 1500
    t = np.arange(n) * DT
    omega = np.where(t >= 0.1, 8.0, 0.0)
    angle = np.concatenate([[0.0], np.cumsum(omega[:-1]) * DT])
    got = []
    for a in angle:
        counts = int(math.floor(a / (2 * math.pi) * CPR))
        est.update(counts % (1 << 32), None, 0)
        got.append(est.speed_rad_s)
    kp, ki = est.kp, est.ki
    _, ref, _ = signal.lsim(signal.lti([kp, ki], [1, kp, ki]), omega, t)
    got = np.array(got)
    # quantisation of 4096 counts/rev and forward Euler: within 3 % of the step after it settles
    assert np.max(np.abs(got[300:] - ref[300:])) < 0.03 * 8.0 + 2 * math.pi / CPR / DT * 0.2
    assert abs(np.mean(got[-200:]) - 8.0) < 0.05           # type-2 loop: no steady-state error


def test_counter_wrap_is_unwrapped():
    est = _est(bits=16)
    mod = 1 << 16
    start = mod - 50
    for k in range(200):            # 200 counts forward through the 16-bit wrap
        est.update((start + k) % mod, None, 0)
    assert est.total == 199
    assert est.azimuth_rad == pytest.approx(199 * 2 * math.pi / CPR)


def test_index_homes_azimuth_and_counts_errors():
    est = _est(offset=30.0)
    raw0 = 1000
    est.update(raw0, None, 0)
    assert not est.homed
    est.update(raw0 + 10, raw0 + 5, 1)            # index seen 5 counts ago
    assert est.homed
    assert est.azimuth_rad == pytest.approx(math.radians(30.0) + 5 * 2 * math.pi / CPR)
    est.update(raw0 + 5 + CPR, raw0 + 5 + CPR, 2)  # exactly one revolution later: fine
    assert est.index_errors == 0
    est.update(raw0 + 5 + 2 * CPR - 7, raw0 + 5 + 2 * CPR - 7, 3)   # 7 counts lost
    assert est.index_errors == 1 and est.last_index_error_counts == -7
    # re-homed: at the index the azimuth is the offset again
    assert est.azimuth_rad == pytest.approx(math.radians(30.0))


def test_bandwidth_too_high_for_tick_is_rejected():
    with pytest.raises(ValueError, match="observer_bandwidth_hz"):
        AzimuthEstimator(CPR, 32, 0.0, 200.0, 0.9, DT)


def test_missing_index_is_counted():
    # an index pulse must come once per revolution (REFERENCES sec. 10); none for 1.5 rev is an error
    est = _est()
    est.update(0, None, 0)
    est.update(10, 5, 1)
    assert est.index_errors == 0
    for k in range(1, 40):
        est.update(10 + k * 100, 5, 1)          # 3900 counts on, same single index event
    assert est.index_errors == 0                 # still within 1.5 revolutions of the index
    for k in range(40, 80):
        est.update(10 + k * 100, 5, 1)
    assert est.index_errors == 1


def test_observer_uses_the_real_gap_between_readings():
    # constant speed 8 rad/s; every 10th reading is lost (the next one comes 2 ticks later)
    est = _est(bw=10.0)
    angle, t = 0.0, 0.0
    for k in range(3000):
        step = 2 if k % 10 == 9 else 1
        t += step * DT
        angle = 8.0 * t
        est.update(int(angle / (2 * math.pi) * CPR), None, 0, step * DT if step > 1 else None)
    assert est.speed_rad_s == pytest.approx(8.0, rel=0.02)
