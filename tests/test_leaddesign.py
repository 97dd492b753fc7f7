"""Lead design: constant lead, dead-time lead, lead table and harmonic inverse pre-compensation.

External references used below:
- REFERENCES section 9 [derived] check values (regression values): 2nd order f_n = 10 Hz,
  zeta = 0.7 at 2 Hz -> -16.260 deg, |G| = 1.0000; tau_d = 10 ms at 2 Hz -> -7.200 deg; for a pure
  delay the pre-compensation is the azimuth advance Omega tau_d (1 Hz, 30 ms -> 10.8 deg).
- scipy.signal.freqresp of the second-order transfer function as the reference response.
- Sinusoid through a linear system (any control text, from memory): A sin(theta) leaves an error
  of amplitude A |G - 1|, RMS A |G - 1| / sqrt(2).
- sim.servo.ServoModel (separate time-domain implementation with rate, travel and electrical
  limits) is the time-domain check of every predicted error.
"""
from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import signal

from flapctl.errors import ProfileError
from flapctl.lead import LeadModel
from flapctl.schedule import Schedule
from flapctl.tune.leaddesign import (
    constant_lead, dead_time_lead, lead_table, precompensate, predicted_tracking_rms, servo_response,
    simulated_tracking_rms, write_lead_table,
)
from sim.servo import ServoParams

DT = 1e-3
OMEGA = 2.0 * math.pi * 1.5            # brief: rotor at 1.5 Hz
FLOW_M_S = 0.6
RADIUS_M = 0.15


def servo(**changes: object) -> ServoParams:
    """Brief's servo: 30 ms dead time, 4 Hz, zeta 0.7 (a lag of ~48 deg at 1.5 Hz)."""
    base = ServoParams(
        travel_deg=30.0, rate_limit_deg_s=400.0, dead_time_s=0.030, natural_freq_hz=4.0, damping=0.7,
        kt_nm_a=0.02, resistance_ohm=2.0, gear_ratio=50.0, gear_efficiency=0.7, flap_inertia_kg_m2=2e-6,
        flap_friction_nm_s=1e-4, supply_v=24.0, current_limit_a=5.0)
    return replace(base, **changes)


def schedule(blades: int = 3) -> Schedule:
    """Three harmonics, peak |delta| = 10 deg (spline through 5 deg points)."""
    az = np.arange(0.0, 360.0, 5.0)
    th = np.radians(az)
    flap = 8.0 * np.sin(th) + 2.5 * np.sin(2.0 * th - 0.6) + 1.0 * np.cos(3.0 * th)
    dense = np.linspace(0.0, 2.0 * math.pi, 3601)
    peak = np.max(np.abs(8.0 * np.sin(dense) + 2.5 * np.sin(2.0 * dense - 0.6) + np.cos(3.0 * dense)))
    return Schedule.from_arrays(az, flap * (10.0 / peak), blades, interpolation="spline")


def test_servo_response_reference_values() -> None:
    p = servo(natural_freq_hz=10.0, damping=0.7, dead_time_s=0.0)
    g = servo_response(p)(np.array([2.0]))[0]
    assert math.degrees(np.angle(g)) == pytest.approx(-16.260, abs=1e-3)   # REFERENCES section 9 [derived]
    assert abs(g) == pytest.approx(1.0000, abs=1e-4)
    g_delay = servo_response(servo(natural_freq_hz=10.0, dead_time_s=0.010))(np.array([2.0]))[0]
    assert math.degrees(np.angle(g_delay / g)) == pytest.approx(-7.200, abs=1e-9)
    wn = 2.0 * math.pi * 4.0
    freqs = np.array([0.5, 1.5, 3.0, 7.0])
    _, ref = signal.freqresp(signal.lti([wn * wn], [1.0, 1.4 * wn, wn * wn]), 2.0 * math.pi * freqs)
    ours = servo_response(servo(dead_time_s=0.0))(freqs)
    np.testing.assert_allclose(ours, ref, rtol=1e-12)
    # the zero-order hold factor at w h = pi is 2/pi in magnitude and -90 deg in phase
    held = servo_response(servo(dead_time_s=0.0), tick_s=DT)(np.array([500.0]))[0]
    bare = servo_response(servo(dead_time_s=0.0))(np.array([500.0]))[0]
    assert held / bare == pytest.approx(complex(0.0, -2.0 / math.pi), abs=1e-12)


def test_sinusoid_error_formula() -> None:
    sine = Schedule.from_arrays(np.arange(0.0, 360.0, 2.0), 10.0 * np.sin(np.radians(np.arange(0.0, 360.0, 2.0))),
                                1, interpolation="spline")
    g = servo_response(servo())(np.array([1.5]))[0]
    expected = 10.0 * abs(g - 1.0) / math.sqrt(2.0)
    assert predicted_tracking_rms(sine, servo(), OMEGA, 0.0) == pytest.approx(expected, rel=1e-6)


def test_prediction_matches_time_domain() -> None:
    sch = schedule()
    for lead in (0.0, 30.0):
        predicted = predicted_tracking_rms(sch, servo(), OMEGA, lead, blade=1, tick_s=DT)
        simulated = simulated_tracking_rms(sch, servo(), OMEGA, lead, blade=1, dt_s=DT)
        assert simulated == pytest.approx(predicted, rel=0.01)


def test_pure_delay_lead_is_omega_tau() -> None:
    def delay(f: np.ndarray) -> np.ndarray:
        return np.exp(-2j * math.pi * np.asarray(f) * 0.030)
    one_hz = 2.0 * math.pi
    fit = constant_lead(schedule(), delay, [one_hz])
    assert fit.lead_deg[0] == pytest.approx(10.8, abs=1e-4)                   # REFERENCES section 9 [derived]
    assert fit.rms_deg[0] < 1e-5
    speeds = [one_hz, 2.0 * one_hz, 3.0 * one_hz]
    dt_fit = dead_time_lead(schedule(), delay, speeds)
    assert dt_fit.dead_time_s == pytest.approx(0.030, abs=1e-7)
    assert max(dt_fit.rms_deg) < 1e-4


def test_lead_designs_reduce_error_and_lead_table_feeds_lead_model(tmp_path) -> None:
    sch = schedule()
    speeds = [0.7 * OMEGA, OMEGA, 1.3 * OMEGA]
    const = constant_lead(sch, servo(), speeds, tick_s=DT)
    timed = dead_time_lead(sch, servo(), speeds, tick_s=DT)
    table = lead_table(sch, servo(), speeds, tick_s=DT)
    total = {name: sum(r * r for r in fit.rms_deg) for name, fit in
             (("const", const), ("timed", timed), ("table", table))}
    none = sum(r * r for r in const.rms_none_deg)
    assert total["table"] <= total["timed"] * (1 + 1e-9) and total["table"] <= total["const"] * (1 + 1e-9)
    assert total["timed"] < total["const"] < none / 3.0
    # time-domain check of the constant lead at the middle speed
    simulated = simulated_tracking_rms(sch, servo(), OMEGA, const.lead_deg[1], dt_s=DT)
    assert simulated == pytest.approx(const.rms_deg[1], rel=0.02)
    path = write_lead_table(tmp_path / "lead.csv", table.speeds_rad_s, table.lead_deg)
    data = np.loadtxt(path, delimiter=",", skiprows=2)
    np.testing.assert_allclose(data[:, 0], speeds)
    model = LeadModel("table", table_speed_rad_s=data[:, 0].tolist(), table_lead_deg=data[:, 1].tolist())
    assert math.degrees(model(OMEGA)) == pytest.approx(table.lead_deg[1])
    with pytest.raises(ProfileError):
        write_lead_table(path, table.speeds_rad_s, table.lead_deg)           # no overwrite
    with pytest.raises(ProfileError) as info:
        write_lead_table(tmp_path / "bad.csv", [2.0, 1.0], [0.0, 0.0])
    assert info.value.key == "speed_rad_s[1]"


def test_harmonic_precompensation_cuts_error_threefold_in_time_domain(tmp_path) -> None:
    sch = schedule()
    speeds = [0.8 * OMEGA, OMEGA, 1.2 * OMEGA]
    result = precompensate(sch, servo(), speeds, FLOW_M_S, RADIUS_M, harmonics=6, tick_s=DT)
    assert result.violations == ()
    assert result.tsr == pytest.approx(tuple(w * RADIUS_M / FLOW_M_S for w in speeds))
    assert result.schedule.tsr_axis == pytest.approx(result.tsr)
    middle = result.tsr[1]
    none = simulated_tracking_rms(sch, servo(), OMEGA, 0.0, blade=2, dt_s=DT)
    compensated = simulated_tracking_rms(sch, servo(), OMEGA, result.schedule, blade=2, command_tsr=middle, dt_s=DT)
    assert compensated < none / 3.0
    assert compensated < 0.01 * none          # the schedule has 3 harmonics, all inside K = 6
    assert np.all(result.rms_deg < result.rms_none_deg / 3.0)
    # written with Schedule.to_toml() and read back by our loader
    path = result.write_toml(tmp_path / "precomp.toml")
    loaded = Schedule.load(path, blades=3)
    theta = np.linspace(0.0, 2.0 * math.pi, 50)
    np.testing.assert_allclose(loaded.evaluate(theta, 1, middle), result.schedule.evaluate(theta, 1, middle),
                               atol=1e-12)
    with pytest.raises(ProfileError):
        result.write_toml(path)


def test_gain_cap_and_dropped_harmonics() -> None:
    az = np.arange(0.0, 360.0, 2.0)
    th = np.radians(az)
    sch = Schedule.from_arrays(az, 5.0 * np.sin(th) + 1.0 * np.sin(8.0 * th) + 0.5 * np.sin(12.0 * th), 1,
                               interpolation="spline")
    result = precompensate(sch, servo(), [OMEGA], FLOW_M_S, RADIUS_M, harmonics=8, gain_cap=3.0, samples=180)
    ref = np.fft.rfft(sch.evaluate(np.arange(180) * (2.0 * math.pi / 180), 0))
    cmd = np.fft.rfft(result.commands_deg[0, 0])
    g8 = servo_response(servo())(np.array([8 * 1.5]))[0]
    assert 1.0 / abs(g8) > 3.0                               # 12 Hz is far beyond the 4 Hz servo
    assert abs(cmd[8] / ref[8]) == pytest.approx(3.0, rel=1e-6)
    assert np.angle(cmd[8] / ref[8]) == pytest.approx(np.angle(1.0 / g8), abs=1e-6)   # phase kept
    assert abs(cmd[12]) < 1e-9 * abs(ref[12])                # above K: dropped
    passed = precompensate(sch, servo(), [OMEGA], FLOW_M_S, RADIUS_M, harmonics=8, samples=180, beyond="pass")
    assert np.fft.rfft(passed.commands_deg[0, 0])[12] == pytest.approx(ref[12], rel=1e-9)


def test_limit_violations_reported_and_real() -> None:
    slow = servo(rate_limit_deg_s=100.0)
    result = precompensate(schedule(), slow, [OMEGA], FLOW_M_S, RADIUS_M, harmonics=6, tick_s=DT)
    kinds = {(v.kind, v.blade) for v in result.violations}
    assert kinds == {("rate", 0), ("rate", 1), ("rate", 2)}
    assert all(v.value > v.limit == 100.0 for v in result.violations)
    assert "exceeds 100.0 deg/s" in str(result.violations[0])
    linear_rms = float(result.rms_deg[0, 0])
    # through the rate-limited ServoModel the plant leaves the linear range: error far above prediction
    clipped = simulated_tracking_rms(schedule(), slow, OMEGA, result.schedule, command_tsr=result.tsr[0], dt_s=DT)
    assert clipped > 10.0 * linear_rms + 0.1
    # the command peaks near 10.6 deg although the schedule peaks at 10 deg
    small = precompensate(schedule(), servo(travel_deg=10.3), [OMEGA], FLOW_M_S, RADIUS_M, harmonics=6)
    assert {v.kind for v in small.violations} == {"travel"}
    assert all(10.3 < v.value < 11.0 for v in small.violations)


def test_bad_inputs() -> None:
    with pytest.raises(ProfileError) as info:
        precompensate(schedule(), servo(), [OMEGA, 0.5 * OMEGA], FLOW_M_S, RADIUS_M)
    assert info.value.key == "omega_rad_s"
    with pytest.raises(ProfileError) as info:
        precompensate(schedule(), servo(), [OMEGA], FLOW_M_S, RADIUS_M, gain_cap=0.5)
    assert info.value.key == "gain_cap"
    with pytest.raises(ProfileError) as info:
        constant_lead(schedule(), servo(), [-1.0])
    assert info.value.key == "omega_rad_s"
    with pytest.raises(ProfileError) as info:
        constant_lead(schedule(), [servo(), servo()], [OMEGA])
    assert info.value.key == "servo"
