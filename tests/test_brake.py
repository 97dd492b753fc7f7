"""Brake loop on simple-pid: holds TSR on a rotor model, bumpless start, output limits."""
from __future__ import annotations

import pytest

from flapctl.brake import BrakeLoop


def _loop():
    return BrakeLoop("tsr", kp_nm_s=0.05, ki_nm=0.25, kd_nm_s2=0.0, min_torque_nm=0.0,
                     max_torque_nm=1.5, radius_m=0.15, flow_filter_s=0.5)


def _simulate(loop, seconds, q_aero=lambda w: 0.6 - 0.03 * w, j=0.02, w0=6.0, dt=0.01, flow=0.6):
    w = w0
    out = []
    for _ in range(int(seconds / dt)):
        b = loop.update(w, flow, dt)
        w += dt * (q_aero(w) - b) / j
        out.append((w, b))
    return out


def test_holds_tsr_setpoint():
    # rotor J dw/dt = Q_aero(w) - Q_brake; steady state w = TSR U / R (integral action: common
    # practice, no source)
    loop = _loop()
    loop.set_tsr(2.0)
    loop.start(6.0, 0.6, 0.0)
    hist = _simulate(loop, 20.0)
    w_end = hist[-1][0]
    assert w_end == pytest.approx(2.0 * 0.6 / 0.15, rel=0.01)


def test_bumpless_start():
    loop = _loop()
    loop.set_tsr(2.0)
    loop.start(7.0, 0.6, 0.3)          # 1 rad/s below target, 0.3 N m applied
    first = loop.update(7.0, 0.6, 0.01)
    assert first == pytest.approx(0.3, abs=0.01)


def test_output_limits_and_no_windup():
    loop = _loop()
    loop.set_tsr(2.0)
    loop.start(30.0, 0.6, 0.0)
    # rotor far too fast for a long time: the brake saturates at max, the integral does not wind up
    for _ in range(2000):
        b = loop.update(30.0, 0.6, 0.01)
    assert b == 1.5
    # once the rotor is slow, the brake comes off within a few steps, not after a long unwind
    for k in range(20):
        b = loop.update(2.0, 0.6, 0.01)
    assert b < 1.5


def test_inactive_until_started():
    loop = _loop()
    assert not loop.active
    assert loop.update(5.0, 0.6, 0.01) == 0.0
