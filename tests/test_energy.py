"""Energy ledger: Cp gross / net over whole revolutions, Betz flag."""
from __future__ import annotations

import math

import pytest

from flapctl.energy import BETZ_LIMIT, EnergyLedger


def test_betz_constant():
    # Betz 1920: Cp,max = 16/27
    assert BETZ_LIMIT == pytest.approx(0.592593, abs=1e-6)


def _spin(ledger, torque, flow, omega, servo_w, seconds, dt=1e-3):
    theta = 0.0
    for k in range(int(seconds / dt)):
        ledger.add(k * dt, dt, theta % (2 * math.pi), omega, torque, flow, servo_w)
        theta += omega * dt


def test_cp_of_constant_operation():
    rho, area, r = 998.0, 0.09, 0.15
    led = EnergyLedger(3, rho, area, r, servo_power_estimated=False)
    omega, flow, torque = 8.0, 0.6, 0.2
    _spin(led, torque, flow, omega, [0.1, 0.1, 0.1], 10.0)
    s = led.summary()
    p_avail = 0.5 * rho * area * flow ** 3          # REFERENCES sec. 1
    assert s.revolutions >= 10
    assert s.cp_gross == pytest.approx(torque * omega / p_avail, rel=1e-3)
    assert s.cp_net == pytest.approx((torque * omega - 0.3) / p_avail, rel=1e-3)
    assert s.mean_tsr == pytest.approx(omega * r / flow, rel=1e-6)
    assert not any("Betz" in f for f in s.flags)


def test_over_betz_is_flagged():
    led = EnergyLedger(2, 1.2, 0.1, 0.2, servo_power_estimated=True)
    _spin(led, 0.5, 5.0, 60.0, [0.0, 0.0], 3.0)     # Cp = 30 / 7.5 = 4: impossible
    flags = " ".join(led.summary().flags)
    assert "Betz" in flags and "estimated" in flags


def test_revolution_records_partition_time():
    led = EnergyLedger(3, 998.0, 0.09, 0.15, servo_power_estimated=False)
    _spin(led, 0.2, 0.6, 8.0, [0.0] * 3, 5.0)
    recs = led.records
    assert all(r.duration_s == pytest.approx(2 * math.pi / 8.0, abs=2e-3) for r in recs)
    assert sum(r.cp_gross * r.fluid_energy_j for r in recs) == pytest.approx(
        sum(r.shaft_energy_j for r in recs))
