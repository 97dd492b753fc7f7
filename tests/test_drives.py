"""Brake, encoder, torque sensor and flow models.

External references used below:
- First-order lag 1/(1 + sT): step response 1 - exp(-t/T), |H(j omega_c)| = 1/sqrt(2) and
  phase -45 deg at omega_c = 1/T (standard results); scipy.signal as a reference library.
- Ornstein-Uhlenbeck process: stationary variance sigma^2 and autocorrelation exp(-tau/T)
  (Uhlenbeck & Ornstein 1930, "On the theory of the Brownian motion", Phys. Rev. 36;
  from memory).  Sample-statistic tolerances use the usual large-sample standard errors.
- Quadrature encoder: q = 2 pi / CPR, index-to-index count difference exactly CPR
  (REFERENCES §10); a hardware counter wraps modulo 2**bits (common practice, no source).
- Missed edges as independent Bernoulli trials: binomial mean n p, variance n p (1 - p)
  (standard result).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import signal

from flapctl.errors import ProfileError
from sim.drives import (
    BrakeModel, BrakeParams, EncoderModel, EncoderParams, FlowModel, FlowParams, FlowSensor,
    FlowSensorParams, TorqueSensor, TorqueSensorParams,
)

DT = 1e-3


# ---------------------------------------------------------------- brake
def test_brake_lag_matches_first_order_step_response() -> None:
    # scipy.signal.lti([1], [T, 1]).step as the reference for the exact first-order lag
    brake = BrakeModel(BrakeParams(max_torque_nm=2.0, time_constant_s=0.05))
    n = 300
    got = np.array([brake.step(DT, 1.5) for _ in range(n)])
    _, y = signal.lti([1.0], [0.05, 1.0]).step(T=DT * np.arange(n + 1))
    np.testing.assert_allclose(got, 1.5 * y[1:], atol=1e-12)
    assert brake.torque_nm == got[-1]


def test_brake_saturates_and_keeps_minimum_torque() -> None:
    brake = BrakeModel(BrakeParams(max_torque_nm=2.0, min_torque_nm=0.05, time_constant_s=0.02))
    high = [brake.step(DT, 5.0) for _ in range(400)]
    assert max(high) == 2.0 and high[-1] == 2.0
    # 1 - exp(-t/T) of 5 N m passes 2 N m at t = -T ln(1 - 2/5)
    first = next(k for k, v in enumerate(high) if v >= 2.0)
    assert (first + 1) * DT == pytest.approx(-0.02 * math.log(1 - 2.0 / 5.0), abs=DT)
    low = [brake.step(DT, -1.0) for _ in range(400)]
    assert min(low) == 0.05 and low[-1] == 0.05


def test_brake_without_lag_and_failure() -> None:
    brake = BrakeModel(BrakeParams(max_torque_nm=1.0, time_constant_s=0.0))
    assert brake.step(DT, 0.4) == 0.4
    brake.failed = True
    assert brake.step(DT, 0.8) == 0.0 and brake.torque_nm == 0.0
    brake.failed = False
    assert brake.step(DT, 0.8) == 0.8


def test_brake_lag_independent_of_tick() -> None:
    # exact discretisation: the same time reached with different ticks gives the same torque
    coarse = BrakeModel(BrakeParams(max_torque_nm=2.0, time_constant_s=0.05))
    fine = BrakeModel(BrakeParams(max_torque_nm=2.0, time_constant_s=0.05))
    for _ in range(10):
        coarse.step(0.01, 1.0)
    for _ in range(100):
        fine.step(0.001, 1.0)
    assert coarse.torque_nm == pytest.approx(fine.torque_nm, rel=1e-12)
    assert coarse.torque_nm == pytest.approx(1.0 - math.exp(-0.1 / 0.05), rel=1e-12)


# ---------------------------------------------------------------- encoder
@settings(max_examples=200, deadline=None)
@given(angle=st.floats(min_value=-200.0, max_value=200.0, allow_nan=False),
       cpr=st.sampled_from([4, 1000, 4096, 10000]))
def test_encoder_quantisation(angle: float, cpr: int) -> None:
    # REFERENCES §10: counts = floor(theta / q), q = 2 pi / CPR; the register is unsigned 32-bit
    x = angle * cpr / (2 * math.pi)
    # within rounding of a count edge, two float evaluations of theta/q may floor differently
    assume(abs(x - round(x)) > 1e-9)
    enc = EncoderModel(EncoderParams(counts_per_rev=cpr))
    enc.step(angle)
    n = math.floor(x)
    assert enc.counts == n % 2**32
    assert enc.resolution_rad == pytest.approx(2 * math.pi / cpr)
    ideal = (n + 0.5) * enc.resolution_rad
    enc.step(ideal)
    assert enc.counts == n % 2**32


def test_encoder_counter_wraps_at_counter_bits() -> None:
    enc = EncoderModel(EncoderParams(counts_per_rev=4096, counter_bits=16))
    q = 2 * math.pi / 4096
    seen = []
    for k in range(65530, 65545):               # 16 revolutions are 65536 counts
        enc.step((k + 0.5) * q)
        seen.append(enc.counts)
    assert seen == [k % 65536 for k in range(65530, 65545)]
    enc.step(-0.5 * q)                           # below zero: two's-complement style
    assert enc.counts == 65535


@pytest.mark.parametrize("direction", [1.0, -1.0])
def test_index_latch_differences_are_exactly_cpr(direction: float) -> None:
    # REFERENCES §10: counts at successive index pulses differ by exactly CPR; offset 37.5 deg,
    # a 16-bit counter so that the register wraps during the run (differences modulo 2**16).
    cpr = 4096
    enc = EncoderModel(EncoderParams(counts_per_rev=cpr, counter_bits=16, index_offset_deg=37.5))
    latches = []
    step = direction * 0.0123
    for k in range(1, 20 * 512):                # 20 revolutions at 0.0123 rad per tick
        enc.step(k * step)
        if enc.index_latch is not None and (not latches or enc.index_latch != latches[-1]):
            latches.append(enc.index_latch)
    assert enc.index_events == len(latches) == 20
    diffs = {(b - a) % 2**16 for a, b in zip(latches, latches[1:])}
    assert diffs == {int(direction * cpr) % 2**16}
    # the latched count is the count of the index position, whichever way it was crossed
    assert latches[0] == (math.floor(math.radians(37.5) / (2 * math.pi / cpr))
                          + (0 if direction > 0 else -cpr)) % 2**16


def test_index_fires_in_both_directions_at_the_same_count() -> None:
    enc = EncoderModel(EncoderParams(counts_per_rev=1000, index_offset_deg=90.0))
    enc.step(math.radians(89.0))
    assert enc.index_events == 0 and enc.index_latch is None
    enc.step(math.radians(91.0))
    up = enc.index_latch
    enc.step(math.radians(89.5))
    assert enc.index_events == 2 and enc.index_latch == up == 250
    enc.step(math.radians(89.5 + 3 * 360.0))     # one tick spanning three index pulses
    assert enc.index_events == 5 and enc.index_latch == 250 + 2000


def test_missed_counts_are_binomial_and_show_at_the_index() -> None:
    cpr, p, revs = 1000, 0.02, 20
    enc = EncoderModel(EncoderParams(counts_per_rev=cpr, missed_count_prob=p, seed=7))
    latches = []
    for k in range(1, revs * 100 + 1):           # 10 counts per tick
        angle = k * 2 * math.pi / 100 + 1e-9
        enc.step(angle)
        if enc.index_latch is not None and (not latches or enc.index_latch != latches[-1]):
            latches.append(enc.index_latch)
    missed = -enc.count_error
    edges = cpr * revs
    mean, sd = edges * p, math.sqrt(edges * p * (1 - p))
    assert abs(missed - mean) < 5 * sd
    diffs = [b - a for a, b in zip(latches, latches[1:])]
    assert all(d <= cpr for d in diffs) and any(d < cpr for d in diffs)
    assert enc.counts == (math.floor(angle * cpr / (2 * math.pi)) - missed) % 2**32


def test_glitch_and_suppressed_index() -> None:
    cpr = 2048
    enc = EncoderModel(EncoderParams(counts_per_rev=cpr))
    latches = []
    for k in range(1, 3 * 400 + 1):
        if k == 500:
            enc.inject_glitch(7)
        enc.step(k * 2 * math.pi / 400 + 1e-6)
        if enc.index_latch is not None and (not latches or enc.index_latch != latches[-1]):
            latches.append(enc.index_latch)
    assert [b - a for a, b in zip(latches, latches[1:])] == [cpr + 7, cpr]
    assert enc.count_error == 7
    enc.suppress_index()
    events = enc.index_events
    for k in range(1, 601):                      # on to 4.5 revolutions, past one index
        enc.step(3 * 2 * math.pi + k * 2 * math.pi / 400)
    assert enc.index_events == events and enc.index_suppressed
    enc.suppress_index(False)
    enc.step(5 * 2 * math.pi + 0.1)
    assert enc.index_events == events + 1


# ---------------------------------------------------------------- torque sensor
def tone_gain(sensor: TorqueSensor, freq_hz: float, dt: float, settle_s: float, periods: int) -> complex:
    n_settle = int(round(settle_s / dt))
    n = int(round(periods / freq_hz / dt))
    out, ref = [], []
    for k in range(n_settle + n):
        x = math.sin(2 * math.pi * freq_hz * k * dt)
        y = sensor.step(dt, x)
        if k >= n_settle:
            out.append(y)
            ref.append(x)
    t = dt * np.arange(n_settle, n_settle + n)
    c = np.exp(-1j * 2 * np.pi * freq_hz * t)
    return complex(np.sum(np.asarray(out) * c) / np.sum(np.asarray(ref) * c))


def test_torque_sensor_minus_3db_at_bandwidth() -> None:
    # first-order low-pass: |H| = 1/sqrt(2), phase -45 deg at f_c (standard result);
    # fine tick so the hold adds < 0.1 deg of phase
    sensor = TorqueSensor(TorqueSensorParams(range_nm=10.0, noise_nm=0.0, bandwidth_hz=10.0))
    g = tone_gain(sensor, 10.0, 1e-4, 0.2, 4)
    assert 20 * math.log10(abs(g)) == pytest.approx(-3.0103, abs=0.01)
    assert math.degrees(np.angle(g)) == pytest.approx(-45.0, abs=0.2)
    sensor.reset()
    g_low = tone_gain(sensor, 0.5, 1e-3, 0.2, 2)
    assert abs(g_low) == pytest.approx(1 / math.sqrt(1 + 0.05**2), rel=1e-3)


def test_torque_sensor_offset_noise_and_range() -> None:
    sensor = TorqueSensor(TorqueSensorParams(range_nm=2.0, noise_nm=0.02, bandwidth_hz=200.0,
                                             offset_nm=0.1, seed=3))
    n = 20000
    r = np.array([sensor.step(DT, 0.5) for _ in range(n)])[100:]
    # sample mean and std: standard errors 0.02/sqrt(n) and 0.02/sqrt(2n)
    assert np.mean(r) == pytest.approx(0.6, abs=5 * 0.02 / math.sqrt(r.size))
    assert np.std(r) == pytest.approx(0.02, rel=5 / math.sqrt(2 * r.size))
    over = [sensor.step(DT, 5.0) for _ in range(200)]
    assert max(over) == 2.0 and over[-1] == 2.0
    under = [sensor.step(DT, -5.0) for _ in range(200)]
    assert min(under) == -2.0


# ---------------------------------------------------------------- flow
def acf(x: np.ndarray, lags: list[int]) -> list[float]:
    x = x - x.mean()
    f = np.fft.rfft(x, 2 * x.size)
    r = np.fft.irfft(f * np.conj(f))[: x.size] / np.arange(x.size, 0, -1)
    return [float(r[k] / r[0]) for k in lags]


def test_flow_ou_std_and_integral_time_scale() -> None:
    # Uhlenbeck & Ornstein 1930: std = I * mean, autocorrelation exp(-tau/T)
    mean, ti, T = 0.6, 0.08, 0.5
    flow = FlowModel(FlowParams(mean_m_s=mean, turbulence_intensity=ti, integral_time_s=T, seed=11))
    dt = T / 10
    n = 200_000                                  # 20,000 integral times
    u = np.array([flow.step(dt) for _ in range(n)])
    # std of the sample std ~ sqrt(T / L) = 0.7 %; of the mean ~ sigma sqrt(2 T / L)
    assert np.std(u) == pytest.approx(ti * mean, rel=0.03)
    assert np.mean(u) == pytest.approx(mean, abs=5 * ti * mean * math.sqrt(2 / 20_000))
    rho1 = acf(u, [1])[0]
    assert -dt / math.log(rho1) == pytest.approx(T, rel=0.03)
    for lag, r in zip((5, 10, 20), acf(u, [5, 10, 20])):
        assert r == pytest.approx(math.exp(-lag * dt / T), abs=0.03)


def test_flow_ou_exact_at_a_coarse_tick() -> None:
    # exact discretisation: lag-one correlation is exp(-dt/T) even for dt = T (Euler would give 0)
    flow = FlowModel(FlowParams(mean_m_s=1.0, turbulence_intensity=0.1, integral_time_s=0.2, seed=5))
    u = np.array([flow.step(0.2) for _ in range(50_000)])
    assert acf(u, [1])[0] == pytest.approx(math.exp(-1.0), abs=0.02)
    assert np.std(u) == pytest.approx(0.1, rel=0.03)


def test_flow_mean_setting_and_surge() -> None:
    flow = FlowModel(FlowParams(mean_m_s=0.5, turbulence_intensity=0.0, integral_time_s=1.0))
    assert flow.step(DT) == 0.5
    flow.surge(1.4, 0.1)
    during = [flow.step(DT) for _ in range(100)]
    assert during == pytest.approx([0.7] * 100) and not flow.surge_active
    assert flow.step(DT) == 0.5
    flow.mean_m_s = 0.8
    assert flow.step(DT) == 0.8 and flow.mean_m_s == 0.8
    flow.reset()
    assert flow.mean_m_s == 0.5


def test_flow_rms_follows_mean() -> None:
    a = FlowModel(FlowParams(mean_m_s=0.5, turbulence_intensity=0.1, integral_time_s=0.3, seed=2))
    b = FlowModel(FlowParams(mean_m_s=0.5, turbulence_intensity=0.1, integral_time_s=0.3, seed=2))
    b.mean_m_s = 1.0
    ua = np.array([a.step(DT) for _ in range(500)])
    ub = np.array([b.step(DT) for _ in range(500)])
    np.testing.assert_allclose(ub - 1.0, 2.0 * (ua - 0.5), atol=1e-12)


def test_flow_sensor_noise_and_range() -> None:
    sensor = FlowSensor(FlowSensorParams(range_m_s=1.5, noise_m_s=0.01, seed=4))
    r = np.array([sensor.step(0.7) for _ in range(20000)])
    assert np.mean(r) == pytest.approx(0.7, abs=5 * 0.01 / math.sqrt(r.size))
    assert np.std(r) == pytest.approx(0.01, rel=5 / math.sqrt(2 * r.size))
    assert sensor.step(3.0) == 1.5 and sensor.step(-3.0) == -1.5


# ---------------------------------------------------------------- determinism
@pytest.mark.parametrize("kind", ["flow", "torque", "flow_sensor", "encoder"])
def test_same_seed_same_series_different_seed_differs(kind: str) -> None:
    def build(seed: int):
        if kind == "flow":
            m = FlowModel(FlowParams(mean_m_s=0.5, turbulence_intensity=0.1, integral_time_s=0.2, seed=seed))
            return m, lambda: m.step(DT)
        if kind == "torque":
            m = TorqueSensor(TorqueSensorParams(range_nm=5.0, noise_nm=0.05, bandwidth_hz=50.0, seed=seed))
            return m, lambda: m.step(DT, 1.0)
        if kind == "flow_sensor":
            m = FlowSensor(FlowSensorParams(range_m_s=2.0, noise_m_s=0.02, seed=seed))
            return m, lambda: m.step(0.5)
        m = EncoderModel(EncoderParams(counts_per_rev=500, missed_count_prob=0.05, seed=seed))
        state = {"k": 0}

        def tick() -> int:
            state["k"] += 1
            m.step(state["k"] * 0.1)
            return m.counts
        return m, tick

    def take(pair, n: int = 400) -> list:
        return [pair[1]() for _ in range(n)]

    a, b, c = build(1), build(1), build(2)
    sa, sb, sc = take(a), take(b), take(c)
    assert sa == sb
    assert sa != sc
    if kind != "encoder":                         # reset re-seeds and starts over
        a[0].reset()
        assert take(a) == sa


# ---------------------------------------------------------------- bad input
def test_bad_parameters_name_source_and_key() -> None:
    with pytest.raises(ProfileError) as err:
        EncoderParams(counts_per_rev=0, source="rig.toml", key="encoder")
    assert (err.value.source, err.value.key, err.value.value) == ("rig.toml", "encoder.counts_per_rev", 0)
    with pytest.raises(ProfileError) as err:
        BrakeParams(max_torque_nm=1.0, min_torque_nm=2.0, time_constant_s=0.1)
    assert err.value.key == "brake.min_torque_nm"
    with pytest.raises(ProfileError):
        EncoderParams(counts_per_rev=1024, counter_bits=70)
    with pytest.raises(ProfileError):
        EncoderParams(counts_per_rev=1024.0)
    with pytest.raises(ProfileError):
        EncoderParams(counts_per_rev=1024, missed_count_prob=1.0)
    with pytest.raises(ProfileError):
        TorqueSensorParams(range_nm=1.0, noise_nm=-0.1, bandwidth_hz=10.0)
    with pytest.raises(ProfileError):
        FlowParams(mean_m_s=0.5, turbulence_intensity=0.1, integral_time_s=0.0)
    with pytest.raises(ProfileError):
        FlowSensorParams(range_m_s=float("nan"), noise_m_s=0.0)


def test_bad_runtime_input_raises() -> None:
    brake = BrakeModel(BrakeParams(max_torque_nm=1.0, time_constant_s=0.1))
    with pytest.raises(ProfileError) as err:
        brake.step(-1e-3, 0.5)
    assert err.value.key == "brake.step.dt_s"
    with pytest.raises(ProfileError):
        brake.step(DT, float("nan"))
    flow = FlowModel(FlowParams(mean_m_s=0.5, turbulence_intensity=0.1, integral_time_s=0.2))
    with pytest.raises(ProfileError):
        flow.mean_m_s = -1.0
    with pytest.raises(ProfileError):
        flow.surge(1.2, 0.0)
    enc = EncoderModel(EncoderParams(counts_per_rev=100))
    with pytest.raises(ProfileError):
        enc.step(float("inf"))
    with pytest.raises(ProfileError):
        enc.inject_glitch(1.5)
