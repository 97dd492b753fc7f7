"""Flap servo model: linear response, limits, backlash, jam and electrical power.

External references used below:
- REFERENCES §9: second-order position servo G = w_n^2/(s^2 + 2 zeta w_n s + w_n^2) and
  pure delay exp(-s tau_d) (Franklin, Powell & Emami-Naeini; Ogata; from memory), check
  values #23 and the 10 ms dead-time value are [derived] regression values there.
- scipy.signal (lti.step, freqresp) as an independent reference implementation.
- REFERENCES §9 DC-motor relations, check #30 [derived]: K_t = 0.02, R = 2, tau = 0.01 N m,
  omega = 10 rad/s -> I = 0.5 A, V = 1.2 V, P = 0.60 W.
"""
from __future__ import annotations

import cmath
import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import signal

from flapctl.errors import ProfileError
from sim.servo import ServoModel, ServoParams, frequency_response, motor_operating_point, phase_lag_deg

DT = 1e-3


def linear_params(**changes: object) -> ServoParams:
    """A servo whose limits never bind for small commands (the linear part alone)."""
    base = ServoParams(
        travel_deg=1000.0, rate_limit_deg_s=1e6, dead_time_s=0.0, natural_freq_hz=10.0,
        damping=0.7, kt_nm_a=0.02, resistance_ohm=2.0, gear_ratio=1.0, gear_efficiency=1.0,
        flap_inertia_kg_m2=1e-7, flap_friction_nm_s=0.0, supply_v=1e4, current_limit_a=1e4,
    )
    return replace(base, **changes)


def rig_params(**changes: object) -> ServoParams:
    """A plausible geared flap servo for a flume rig."""
    base = ServoParams(
        travel_deg=30.0, rate_limit_deg_s=400.0, dead_time_s=0.004, natural_freq_hz=8.0,
        damping=0.7, kt_nm_a=0.02, resistance_ohm=2.0, gear_ratio=50.0, gear_efficiency=0.7,
        flap_inertia_kg_m2=2e-5, flap_friction_nm_s=1e-3, supply_v=12.0, current_limit_a=1.0,
        quiescent_w=0.1,
    )
    return replace(base, **changes)


def run(model: ServoModel, commands_deg: list[float], hinge) -> dict[str, np.ndarray]:
    """Step through commands; ``hinge`` maps the flap angle (rad) to the hinge moment (N m)."""
    out = {k: [] for k in ("angle", "rate", "motor", "current", "voltage", "power")}
    for c in commands_deg:
        model.step(c, hinge(math.radians(model.angle_deg)))
        out["angle"].append(model.angle_deg)
        out["rate"].append(model.rate_deg_s)
        out["motor"].append(model.motor_angle_deg)
        out["current"].append(model.current_a)
        out["voltage"].append(model.voltage_v)
        out["power"].append(model.power_w)
    return {k: np.asarray(v) for k, v in out.items()}


def no_load(_angle_rad: float) -> float:
    return 0.0


# ---------------------------------------------------------------- frequency response
def test_second_order_phase_and_gain_check_23() -> None:
    # REFERENCES §9 check #23 [derived]: w_n = 2 pi 10, zeta = 0.7, 2 Hz -> -16.260 deg, |G| = 1.0000
    p = linear_params()
    g = frequency_response(p, 2.0)
    assert math.degrees(cmath.phase(g)) == pytest.approx(-16.260, abs=1e-3)
    assert abs(g) == pytest.approx(1.0000, abs=1e-4)
    assert phase_lag_deg(p, 2.0) == pytest.approx(16.260, abs=1e-3)


def test_dead_time_phase_check() -> None:
    # REFERENCES §9 [derived]: tau_d = 10 ms at 2 Hz -> -7.200 deg, |G| = 1 (pure delay)
    p0 = linear_params()
    p = linear_params(dead_time_s=0.010)
    extra = cmath.phase(frequency_response(p, 2.0) / frequency_response(p0, 2.0))
    assert math.degrees(extra) == pytest.approx(-7.200, abs=1e-3)
    assert abs(frequency_response(p, 2.0)) == pytest.approx(abs(frequency_response(p0, 2.0)), rel=1e-12)
    assert phase_lag_deg(p, 2.0) == pytest.approx(16.260 + 7.200, abs=2e-3)


def test_frequency_response_matches_scipy() -> None:
    # Reference library: scipy.signal.lti(...).freqresp for the second order, times exp(-j w tau_d)
    p = linear_params(natural_freq_hz=6.0, damping=0.45, dead_time_s=0.012)
    wn = 2 * math.pi * 6.0
    freqs = np.array([0.1, 1.0, 3.0, 6.0, 9.0, 20.0])
    _, h = signal.lti([wn**2], [1.0, 2 * 0.45 * wn, wn**2]).freqresp(w=2 * np.pi * freqs)
    h = h * np.exp(-1j * 2 * np.pi * freqs * 0.012)
    for f, ref in zip(freqs, h):
        assert frequency_response(p, float(f)) == pytest.approx(complex(ref), rel=1e-10, abs=1e-12)
        lag = phase_lag_deg(p, float(f))
        assert cmath.exp(-1j * math.radians(lag)) == pytest.approx(ref / abs(ref), abs=1e-9)


# ---------------------------------------------------------------- time domain, linear part
def test_step_response_matches_scipy_step() -> None:
    # Reference library: scipy.signal.lti.step of w_n^2/(s^2 + 2 zeta w_n s + w_n^2).
    p = linear_params()
    model = ServoModel(p, DT)
    n = 300
    got = run(model, [5.0] * n, no_load)["angle"]
    wn = 2 * math.pi * 10.0
    t = DT * np.arange(0, n + 1)           # the state after tick k is at t = (k + 1) dt
    _, y = signal.lti([wn**2], [1.0, 2 * 0.7 * wn, wn**2]).step(T=t)
    np.testing.assert_allclose(got, 5.0 * y[1:], atol=1e-7)
    assert model.limited is False


def test_dead_time_delays_by_whole_ticks() -> None:
    # Pure delay: the response is the undelayed one shifted by tau_d / dt ticks.
    fast = ServoModel(linear_params(), DT)
    slow = ServoModel(linear_params(dead_time_s=0.010), DT)
    assert slow.dead_time_steps == 10
    a = run(fast, [3.0] * 200, no_load)["angle"]
    b = run(slow, [3.0] * 210, no_load)["angle"]
    assert np.all(b[:10] == 0.0)
    np.testing.assert_allclose(b[10:], a, atol=1e-12)


def test_sinusoid_phase_matches_frequency_response() -> None:
    # The time-domain model against its own linear transfer function (REFERENCES §9 formulas);
    # fine tick so the zero-order hold adds < 0.04 deg.
    dt = 1e-4
    f = 2.0
    p = linear_params(dead_time_s=0.010)
    model = ServoModel(p, dt)
    n = int(round(1.25 / dt))
    cmd = [math.sin(2 * math.pi * f * k * dt) for k in range(n)]
    y = run(model, cmd, no_load)["angle"]
    keep = slice(int(round(0.25 / dt)), n)          # two whole periods after the transient
    t = dt * (np.arange(n) + 1.0)
    c = np.exp(-1j * 2 * np.pi * f * t[keep])
    est = 2 * np.mean(y[keep] * c) / (2 * np.mean(np.sin(2 * np.pi * f * t[keep]) * c))
    g = frequency_response(p, f)
    assert math.degrees(cmath.phase(est)) == pytest.approx(math.degrees(cmath.phase(g)), abs=0.05)
    assert abs(est) == pytest.approx(abs(g), rel=1e-3)


# ---------------------------------------------------------------- limits
def test_rate_limit_respected_and_reached() -> None:
    p = linear_params(rate_limit_deg_s=100.0)
    out = run(ServoModel(p, DT), [25.0] * 600, no_load)
    assert np.max(np.abs(out["rate"])) <= 100.0 * (1 + 1e-12)
    assert np.max(np.abs(out["rate"])) == pytest.approx(100.0, rel=1e-12)
    # 25 deg at 100 deg/s: no earlier than 0.25 s
    assert np.argmax(out["angle"] >= 24.9) * DT >= 0.24
    assert out["angle"][-1] == pytest.approx(25.0, abs=1e-3)


@pytest.mark.parametrize("target", [60.0, -60.0])
def test_travel_respected(target: float) -> None:
    p = rig_params(travel_deg=30.0)
    out = run(ServoModel(p, DT), [target] * 800, no_load)
    assert np.max(np.abs(out["angle"])) <= 30.0 + 1e-9
    assert out["angle"][-1] == pytest.approx(math.copysign(30.0, target), abs=1e-9)


def test_travel_respected_by_flap_with_backlash() -> None:
    p = rig_params(travel_deg=20.0, backlash_deg=2.0)
    push = lambda _a: 0.05                      # hinge moment toward +delta
    out = run(ServoModel(p, DT), [40.0] * 800, push)
    assert np.max(out["angle"]) <= 20.0 + 1e-9
    assert out["angle"][-1] == pytest.approx(20.0, abs=1e-9)
    assert out["motor"][-1] == pytest.approx(19.0, abs=1e-9)


def test_current_and_voltage_limits_hold_and_load_slows_flap() -> None:
    # Rate limit above the motor's no-load speed, so the supply and current limits decide.
    p = rig_params(rate_limit_deg_s=1500.0, flap_inertia_kg_m2=2e-4, travel_deg=90.0)
    n_eta_kt = p.gear_ratio * p.gear_efficiency * p.kt_nm_a
    times = []
    for h in (0.0, -0.3, -0.6):               # opposing hinge moment, N m (drive stall: 0.7 N m)
        model = ServoModel(p, DT)
        out = run(model, [85.0] * 600, lambda _a, h=h: h)
        assert np.max(np.abs(out["current"])) <= p.current_limit_a + 1e-12
        assert np.max(np.abs(out["voltage"])) <= p.supply_v + 1e-12
        times.append(np.nonzero(out["angle"] >= 15.0)[0][0] * DT)
        # top speed on the DC motor's torque-speed line (REFERENCES §9, V = R I + K_e omega_m
        # with I = (b omega - H) / (N eta K_t) and omega_m = N omega, driving, at V = V_supply)
        top = (p.supply_v + p.resistance_ohm * h / n_eta_kt) / (
            p.resistance_ohm * p.flap_friction_nm_s / n_eta_kt + p.kt_nm_a * p.gear_ratio)
        assert math.radians(np.max(out["rate"])) == pytest.approx(top, rel=1e-9)
    assert times[0] < times[1] < times[2]


def test_load_beyond_drive_torque_stalls_and_beyond_holding_torque_back_drives() -> None:
    # Drive capacity I_max K_t N eta = 0.7 N m; holding capacity I_max K_t N / eta = 1.43 N m.
    p = rig_params()
    stall = run(ServoModel(p, DT), [20.0] * 500, lambda _a: -1.0)
    assert np.max(np.abs(stall["angle"])) < 0.01
    assert stall["current"][-1] == pytest.approx(p.current_limit_a)
    back = run(ServoModel(p, DT), [20.0] * 1500, lambda _a: -2.0)
    assert back["angle"][-1] == pytest.approx(-30.0)
    assert np.max(np.abs(back["voltage"])) <= p.supply_v + 1e-12


# ---------------------------------------------------------------- electrical
def test_dc_motor_check_30_operating_point() -> None:
    # REFERENCES §9 check #30 [derived]: K_t = 0.02, R = 2, tau = 0.01, omega = 10 rad/s
    p = linear_params(kt_nm_a=0.02, resistance_ohm=2.0, gear_ratio=1.0, gear_efficiency=1.0)
    i, v, pw = motor_operating_point(p, 0.01, 10.0)
    assert i == pytest.approx(0.5, abs=1e-12)
    assert v == pytest.approx(1.2, abs=1e-12)
    assert pw == pytest.approx(0.60, abs=1e-12)


def test_dc_motor_check_30_in_the_time_domain() -> None:
    # Same check through the model: constant flap rate 10 rad/s held by the rate clamp, hinge
    # torque from viscous friction b * rate = 0.001 * 10 = 0.01 N m (REFERENCES §9 check #30).
    p = linear_params(rate_limit_deg_s=math.degrees(10.0), flap_friction_nm_s=0.001,
                      supply_v=24.0, current_limit_a=5.0)
    model = ServoModel(p, DT)
    for _ in range(50):
        model.step(900.0, 0.0)
    assert math.radians(model.rate_deg_s) == pytest.approx(10.0, rel=1e-12)
    assert model.current_a == pytest.approx(0.5, rel=1e-9)
    assert model.voltage_v == pytest.approx(1.2, rel=1e-9)
    assert model.power_w == pytest.approx(0.60, rel=1e-9)


def test_gear_efficiency_driving_and_back_driven() -> None:
    # REFERENCES §9: tau_m = tau_h / (N eta) when driving, tau_h eta / N when back-driven.
    p = linear_params(gear_ratio=10.0, gear_efficiency=0.5)
    i_drive, v_drive, _ = motor_operating_point(p, 0.01, 1.0)
    i_back, v_back, _ = motor_operating_point(p, 0.01, -1.0)
    assert i_drive == pytest.approx(0.01 / (10 * 0.5) / 0.02)
    assert i_back == pytest.approx(0.01 * 0.5 / 10 / 0.02)
    assert v_drive == pytest.approx(2.0 * i_drive + 0.02 * 10 * 1.0)
    assert v_back == pytest.approx(2.0 * i_back - 0.02 * 10 * 1.0)


def test_model_matches_operating_point_with_gear_losses() -> None:
    # Steady rate, constant opposing and assisting hinge moments: the model's electrical state
    # must equal the formula of REFERENCES §9 for the same torque and rate.
    rate = 2.0
    for h in (-0.05, 0.05):
        p = linear_params(rate_limit_deg_s=math.degrees(rate), flap_friction_nm_s=0.002,
                          gear_ratio=20.0, gear_efficiency=0.6, supply_v=24.0, current_limit_a=5.0,
                          regenerative=True)
        model = ServoModel(p, DT)
        for _ in range(60):
            model.step(900.0, h)
        i, v, pw = motor_operating_point(p, 0.002 * rate - h, rate)
        assert model.current_a == pytest.approx(i, rel=1e-9)
        assert model.voltage_v == pytest.approx(v, rel=1e-9)
        assert model.power_w == pytest.approx(pw, rel=1e-9)


def sine(amplitude_deg: float, freq_hz: float, n: int) -> list[float]:
    return [amplitude_deg * math.sin(2 * math.pi * freq_hz * k * DT) for k in range(n)]


def energy(p: ServoParams, commands: list[float], hinge) -> float:
    model = ServoModel(p, DT)
    run(model, commands, hinge)
    return model.energy_j


def test_energy_grows_with_hinge_load() -> None:
    p = rig_params()
    cmd = sine(15.0, 1.0, 2000)
    # aerodynamic hinge stiffness: H = -k delta (C_h_delta < 0, REFERENCES §4), k in N m/rad
    e = [energy(p, cmd, lambda a, k=k: -k * a) for k in (0.0, 0.1, 0.3, 0.6)]
    assert all(e1 < e2 for e1, e2 in zip(e, e[1:]))
    assert e[0] > p.quiescent_w * 2.0           # more than the electronics alone


def test_energy_grows_with_flap_rate() -> None:
    p = rig_params()
    stiff = lambda a: -0.2 * a
    e = [energy(p, sine(10.0, f, 2000), stiff) for f in (0.5, 1.0, 2.0, 3.0)]
    assert all(e1 < e2 for e1, e2 in zip(e, e[1:]))
    e_amp = [energy(p, sine(a, 1.0, 2000), stiff) for a in (5.0, 10.0, 20.0)]
    assert all(e1 < e2 for e1, e2 in zip(e_amp, e_amp[1:]))


def test_energy_is_integral_of_power() -> None:
    p = rig_params()
    model = ServoModel(p, DT)
    out = run(model, sine(12.0, 1.5, 1000), lambda a: -0.2 * a)
    assert model.energy_j == pytest.approx(float(np.sum(out["power"]) * DT), rel=1e-12)


def test_no_regeneration_keeps_power_at_or_above_quiescent() -> None:
    # An assisting hinge moment back-drives the motor: V I < 0 for part of each cycle.
    cmd = sine(15.0, 2.0, 1500)
    assist = lambda a: 0.3 * a
    plain = run(ServoModel(rig_params(regenerative=False), DT), cmd, assist)["power"]
    regen = run(ServoModel(rig_params(regenerative=True), DT), cmd, assist)["power"]
    assert np.min(plain) >= 0.1 - 1e-15
    assert np.min(regen) < 0.1 - 1e-3            # the same run does regenerate when allowed


# ---------------------------------------------------------------- backlash, jam, reset
def test_backlash_gap_and_resting_side() -> None:
    # Backlash as a gap the gear output must cross before it drives the flap again
    # (common practice, no source): |flap - gear| <= gap/2, and no load while crossing.
    p = rig_params(backlash_deg=2.0)
    out = run(ServoModel(p, DT), sine(10.0, 1.0, 2000), lambda _a: 0.0)
    gap = out["angle"] - out["motor"]
    assert np.max(np.abs(gap)) <= 1.0 + 1e-9
    assert np.max(gap) > 0.999 and np.min(gap) < -0.999  # the flap rides both faces
    crossing = np.abs(gap) < 0.99
    assert crossing.sum() > 20 and np.all(out["current"][crossing] == 0.0)
    for h, side in ((0.05, 1.0), (-0.05, -1.0)):
        rest = run(ServoModel(p, DT), [5.0] * 800, lambda _a, h=h: h)
        assert rest["angle"][-1] - rest["motor"][-1] == pytest.approx(side, abs=1e-9)


def test_jammed_flap_holds_and_draws_limit_current() -> None:
    p = rig_params()
    model = ServoModel(p, DT)
    run(model, [5.0] * 300, lambda _a: 0.0)
    held = model.angle_deg
    model.jammed = True
    out = run(model, [-10.0] * 100, lambda _a: 0.2)
    assert np.all(out["angle"] == held)
    assert np.all(out["rate"] == 0.0)
    assert out["current"][-1] == pytest.approx(-p.current_limit_a)
    assert out["power"][-1] == pytest.approx(p.resistance_ohm * p.current_limit_a**2 + p.quiescent_w)
    model.jammed = False
    out = run(model, [-10.0] * 600, lambda _a: 0.0)
    assert out["angle"][-1] == pytest.approx(-10.0, abs=1e-2)


def test_reset_restores_rest_state() -> None:
    model = ServoModel(rig_params(), DT)
    run(model, sine(10.0, 2.0, 200), lambda a: -0.1 * a)
    model.jammed = True
    model.reset(4.0)
    assert model.angle_deg == pytest.approx(4.0)
    assert model.rate_deg_s == 0.0 and model.energy_j == 0.0 and not model.jammed
    model.step(4.0, 0.0)                               # FIFO holds the reset angle
    assert model.angle_deg == pytest.approx(4.0)


# ---------------------------------------------------------------- bad input
def test_bad_parameter_names_source_and_key() -> None:
    with pytest.raises(ProfileError) as err:
        rig_params(damping=-0.1, source="rig.toml", key="servos.blade1")
    assert err.value.source == "rig.toml"
    assert err.value.key == "servos.blade1.damping"
    assert err.value.value == -0.1
    with pytest.raises(ProfileError) as err:
        rig_params(gear_efficiency=1.2)
    assert err.value.key == "servo.gear_efficiency"
    with pytest.raises(ProfileError):
        rig_params(backlash_deg=70.0)
    with pytest.raises(ProfileError):
        rig_params(regenerative=1)


def test_bad_runtime_input_raises() -> None:
    model = ServoModel(rig_params(), DT)
    with pytest.raises(ProfileError) as err:
        model.step(float("nan"), 0.0)
    assert err.value.key.endswith("command_deg")
    with pytest.raises(ProfileError):
        model.step(0.0, float("inf"))
    with pytest.raises(ProfileError):
        ServoModel(rig_params(), 0.0)
    with pytest.raises(ProfileError):
        model.reset(45.0)
    with pytest.raises(ProfileError):
        frequency_response(rig_params(), -1.0)
