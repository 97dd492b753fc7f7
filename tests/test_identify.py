"""Excitation signals and flap-servo identification.

External references used below:
- scipy.signal.chirp (linear and logarithmic sweeps) as the reference for our chirp.
- scipy.signal.lsim on a fine grid as the reference for the fractional dead-time discretisation.
- Schroeder 1970, IEEE Trans. Inf. Theory 16(1):85-89 (from memory): Schroeder phases give a
  crest factor well below that of a zero-phase multisine (sqrt(2K) for K equal cosines).
- sim.servo.ServoModel (the SIL servo, a separate implementation of REFERENCES section 9) produces
  every record; identification must recover its true parameters (brief: within 10 %).
"""
from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from matplotlib.figure import Figure
from scipy import signal

from flapctl.errors import ProfileError
from flapctl.profile import load_profile
from flapctl.tune.excite import chirp, excite_sil, multisine, step
from flapctl.tune.identify import ServoFit, fit_figure, identify, simulate_servo, write_profile_with_fit
from sim.servo import ServoParams, motor_operating_point

DT = 1e-3


def servo(**changes: object) -> ServoParams:
    """Brief's test servo: 30 ms dead time, 4 Hz, zeta 0.7; electrical limits never bind."""
    base = ServoParams(
        travel_deg=30.0, rate_limit_deg_s=300.0, dead_time_s=0.030, natural_freq_hz=4.0, damping=0.7,
        kt_nm_a=0.02, resistance_ohm=2.0, gear_ratio=50.0, gear_efficiency=0.7, flap_inertia_kg_m2=2e-6,
        flap_friction_nm_s=1e-4, supply_v=24.0, current_limit_a=5.0)
    return replace(base, **changes)


def chirp_record(params: ServoParams, amplitude_deg: float = 5.0, seconds: float = 4.0):
    t = np.arange(int(seconds / DT)) * DT
    return excite_sil(params, chirp(t, 0.2, 10.0, amplitude_deg), DT)


# --------------------------------------------------------------------------- signals
@pytest.mark.parametrize("method", ["linear", "log"])
def test_chirp_matches_scipy(method: str) -> None:
    t = np.arange(3000) * DT
    ours = chirp(t, 0.5, 12.0, 4.0, duration_s=2.5, method=method, offset_deg=1.0)
    # scipy.signal.chirp is cos(phase + phi), phi in degrees: phi = -90 gives our sine
    ref = 1.0 + 4.0 * signal.chirp(t, f0=0.5, t1=2.5, f1=12.0, method="logarithmic" if method == "log"
                                   else "linear", phi=-90.0)
    np.testing.assert_allclose(ours, ref, atol=1e-9)
    assert ours[0] == pytest.approx(1.0)        # starts at the offset: no kick


def test_step_levels() -> None:
    t = np.arange(10) * 0.1
    out = step(t, 3.0, start_s=0.45, offset_deg=-1.0)
    np.testing.assert_array_equal(out, [-1.0] * 5 + [2.0] * 5)


def test_multisine_schroeder_spectrum_and_crest() -> None:
    t = np.arange(10000) * DT                  # 10 s: whole periods of every 0.1 Hz multiple
    freqs = [0.5 * k for k in range(1, 11)]
    x = multisine(t, freqs, 6.0)
    assert np.max(np.abs(x)) == pytest.approx(6.0)
    spectrum = np.abs(np.fft.rfft(x)) / t.size * 2.0
    lines = [int(round(f * 10.0)) for f in freqs]
    np.testing.assert_allclose(spectrum[lines], spectrum[lines[0]], rtol=1e-9)   # equal amplitudes
    others = np.delete(spectrum, lines)
    assert np.max(others) < 1e-9 * spectrum[lines[0]]
    crest = np.max(np.abs(x)) / np.sqrt(np.mean(x * x))
    zero_phase_crest = math.sqrt(2 * len(freqs))          # K equal cosines in phase
    assert crest < 2.0 < zero_phase_crest                  # Schroeder 1970 (from memory): about 1.4-1.8


def test_signal_bad_input_names_key() -> None:
    with pytest.raises(ProfileError) as info:
        chirp(np.arange(10) * DT, 1.0, 2.0, 1.0, method="cubic")
    assert info.value.key == "method"
    with pytest.raises(ProfileError) as info:
        multisine(np.arange(10) * DT, [1.0, -2.0], 1.0)
    assert info.value.key == "freqs_hz[1]"


def test_excite_sil_hinge_load_sets_holding_current() -> None:
    # a constant hinge moment H = +0.02 N m with the flap at rest: the gear carries tau_h = -H, so
    # I = tau_h eta / (N K_t) when holding or tau_h / (N eta K_t) when driving (REFERENCES section 9
    # gear relations, through sim.servo.motor_operating_point); which one follows the sign of the
    # residual rate at rest, so either is accepted.  Without the load the current is zero.
    params = servo()
    t = np.arange(1500) * DT
    _, _, fb, current, _ = excite_sil(params, step(t, 4.0, start_s=0.1), DT,
                                      hinge_moment_fn=lambda t_s, flap_deg: 0.02)
    branches = [motor_operating_point(params, -0.02, rate)[0] for rate in (1e-9, -1e-9)]
    assert fb[-1] == pytest.approx(4.0, abs=1e-6)
    assert min(abs(current[-1] - i) for i in branches) < 1e-6
    _, _, _, unloaded, _ = excite_sil(params, step(t, 4.0, start_s=0.1), DT)
    assert abs(unloaded[-1]) < 1e-6


# --------------------------------------------------------------------------- model
def test_model_equals_sil_servo_for_whole_tick_dead_time() -> None:
    params = servo(rate_limit_deg_s=60.0)
    t, cmd, fb, current, voltage = chirp_record(params)
    assert current.shape == voltage.shape == fb.shape
    assert np.max(np.abs(np.diff(fb))) / DT <= 60.0 + 1e-6        # rate limit acted
    limited = simulate_servo(cmd, DT, 0.030, 4.0, 0.7, 60.0, float(fb[0]))
    np.testing.assert_allclose(limited, fb, atol=1e-9)
    linear_servo = servo(rate_limit_deg_s=1e4)
    _, _, fb_lin, _, _ = chirp_record(linear_servo)
    np.testing.assert_allclose(simulate_servo(cmd, DT, 0.030, 4.0, 0.7, None, float(fb_lin[0])), fb_lin, atol=1e-9)


def test_fractional_dead_time_matches_continuous_lsim() -> None:
    # held command delayed by 12.4 ms (12.4 ticks) through w_n^2/(s^2 + 2 zeta w_n s + w_n^2)
    rng = np.random.default_rng(3)
    cmd = np.repeat(rng.normal(0.0, 2.0, 20), 10)      # 200 ticks of held steps
    tau, fn, zeta = 0.0124, 6.0, 0.5
    ours = simulate_servo(cmd, DT, tau, fn, zeta, None, 0.0)
    sub = 200                                           # reference grid: 5 us
    fine_t = np.arange(cmd.size * sub) * (DT / sub)
    index = np.floor((fine_t - tau) / DT + 1e-9).astype(int)
    u_fine = np.where(index >= 0, cmd[np.clip(index, 0, cmd.size - 1)], 0.0)
    wn = 2.0 * math.pi * fn
    _, y_fine, _ = signal.lsim(signal.lti([wn * wn], [1.0, 2.0 * zeta * wn, wn * wn]), u_fine, fine_t)
    np.testing.assert_allclose(ours, y_fine[::sub], atol=2e-3 * np.max(np.abs(cmd)))


# --------------------------------------------------------------------------- identification
def test_chirp_identification_recovers_servo_with_noise() -> None:
    t, cmd, fb, _, _ = chirp_record(servo())
    rng = np.random.default_rng(7)
    noisy = fb + rng.normal(0.0, 0.02, fb.size)          # 0.02 deg RMS sensor noise
    fit = identify(t, cmd, noisy, DT)
    assert fit.dead_time_s == pytest.approx(0.030, rel=0.10)
    assert fit.natural_freq_hz == pytest.approx(4.0, rel=0.10)
    assert fit.damping == pytest.approx(0.7, rel=0.10)
    assert fit.rate_limit_deg_s is None and not fit.rate_limit_reached
    assert "not reached" in fit.rate_limit_text()
    assert fit.residual_rms_deg == pytest.approx(0.02, rel=0.15)   # the noise is what is left
    assert fit.n_samples == t.size
    for value, se, true in ((fit.dead_time_s, fit.dead_time_se_s, 0.030),
                            (fit.natural_freq_hz, fit.natural_freq_se_hz, 4.0),
                            (fit.damping, fit.damping_se, 0.7)):
        assert 0.0 < se and abs(value - true) < 5.0 * se     # white noise: the s.e. is honest


def test_step_identification() -> None:
    t = np.arange(2000) * DT
    _, cmd, fb, _, _ = excite_sil(servo(), step(t, 6.0, start_s=0.2), DT)
    fit = identify(t, cmd, fb, DT)
    assert fit.dead_time_s == pytest.approx(0.030, rel=0.02)
    assert fit.natural_freq_hz == pytest.approx(4.0, rel=0.02)
    assert fit.damping == pytest.approx(0.7, rel=0.02)


def test_rate_limit_identified_when_reached() -> None:
    t, cmd, fb, _, _ = chirp_record(servo(rate_limit_deg_s=60.0))
    fit = identify(t, cmd, fb, DT)
    assert fit.rate_limit_reached
    assert fit.rate_limit_deg_s == pytest.approx(60.0, rel=0.02)
    assert fit.dead_time_s == pytest.approx(0.030, rel=0.05)
    assert fit.natural_freq_hz == pytest.approx(4.0, rel=0.05)
    assert fit.damping == pytest.approx(0.7, rel=0.05)


def test_frequency_response_and_servo_params() -> None:
    fit = ServoFit(0.01, 10.0, 0.7, None, 0.0, 100, DT, 50.0, 0.0, 0.0, 0.0, None)
    g = fit.frequency_response(np.array([2.0]))[0]
    # REFERENCES section 9 [derived]: 2nd order 10 Hz, zeta 0.7 at 2 Hz -> -16.260 deg, plus 10 ms -> -7.200 deg
    assert math.degrees(np.angle(g)) == pytest.approx(-16.260 - 7.200, abs=1e-3)
    assert abs(g) == pytest.approx(1.0000, abs=1e-4)
    p = fit.servo_params(servo())
    assert (p.dead_time_s, p.natural_freq_hz, p.damping, p.rate_limit_deg_s) == (0.01, 10.0, 0.7, 300.0)


def test_fit_figure() -> None:
    t, cmd, fb, _, _ = chirp_record(servo(), seconds=1.0)
    fit = identify(t, cmd, fb, DT)
    fig = fit_figure(t, cmd, fb, fit)
    assert isinstance(fig, Figure)
    top, bottom = fig.axes
    assert len(top.lines) == 3 and len(bottom.lines) == 1
    assert np.max(np.abs(bottom.lines[0].get_ydata())) < 1e-6      # exact model: residual ~ 0


def test_identify_bad_input() -> None:
    t = np.arange(100) * DT
    with pytest.raises(ProfileError) as info:
        identify(t, np.zeros(100), np.zeros(99), DT)
    assert info.value.key == "feedback_deg"
    with pytest.raises(ProfileError) as info:
        identify(t, np.zeros(100), np.zeros(100), DT)
    assert info.value.key == "command_deg"
    bad_t = t.copy()
    bad_t[40] += 0.5 * DT
    with pytest.raises(ProfileError) as info:
        identify(bad_t, np.sin(t), np.sin(t), DT)
    assert info.value.key == "t[40]"


# --------------------------------------------------------------------------- profile output
def _fit() -> ServoFit:
    return ServoFit(0.0312, 4.05, 0.69, 61.5, 0.01, 4000, DT, 61.5, 1e-4, 0.01, 0.002, 0.3)


def test_write_profile_with_fit(flume_path, tmp_path) -> None:
    out = tmp_path / "fitted.toml"
    write_profile_with_fit(flume_path, 1, _fit(), out)
    original = load_profile(flume_path)
    written = load_profile(out)
    s = written.servos[1]
    assert (s.dead_time_s, s.natural_freq_hz, s.damping, s.rate_limit_deg_s) == (0.0312, 4.05, 0.69, 61.5)
    assert written.servos[0] == original.servos[0] and written.servos[2] == original.servos[2]
    assert s.electrical == original.servos[1].electrical and s.travel_deg == original.servos[1].travel_deg
    text = out.read_text()
    source_lines = flume_path.read_text().splitlines()
    comments = [line for line in source_lines if line.lstrip().startswith("#")]
    assert comments and all(line in text.splitlines() for line in comments)   # comments kept
    assert len(text.splitlines()) >= len(source_lines)
    assert text.count("identified, s.e.") == 4
    no_rate = replace(_fit(), rate_limit_deg_s=None, rate_limit_se_deg_s=None)
    write_profile_with_fit(flume_path, 2, no_rate, tmp_path / "no_rate.toml")
    again = load_profile(tmp_path / "no_rate.toml")
    assert again.servos[2].rate_limit_deg_s == original.servos[2].rate_limit_deg_s
    assert (tmp_path / "no_rate.toml").read_text().count("identified, s.e.") == 3


def test_write_profile_refusals(flume_path, tmp_path) -> None:
    with pytest.raises(ProfileError) as info:
        write_profile_with_fit(flume_path, 0, _fit(), flume_path)
    assert info.value.key == "out_path"
    existing = tmp_path / "there.toml"
    existing.write_text("keep me\n")
    with pytest.raises(ProfileError):
        write_profile_with_fit(flume_path, 0, _fit(), existing)
    assert existing.read_text() == "keep me\n"
    with pytest.raises(ProfileError) as info:
        write_profile_with_fit(flume_path, 3, _fit(), tmp_path / "new.toml")
    assert info.value.key == "blade" and not (tmp_path / "new.toml").exists()
    out_of_range = replace(_fit(), damping=9.0)                    # profile accepts 0.05..5
    with pytest.raises(ProfileError):
        write_profile_with_fit(flume_path, 0, out_of_range, tmp_path / "bad.toml")
    assert not (tmp_path / "bad.toml").exists()
