"""Azimuth-indexed iterative learning control.

External references used below:
- Arimoto, Kawamura & Miyazaki 1984 and Bristow, Tharayil & Alleyne 2006 (from memory, REFERENCES
  section 9): P-type ILC, lifted form e_{j+1} = (I - gamma P) e_j, Q-filtered robust convergence
  ||Q(1 - gamma e^{jwd} P)|| < 1.  The lifted matrices are built here independently, the plant
  column by simulating sim.servo.ServoModel, and their spectral radius (numpy.linalg.eigvals) is
  compared with the harmonic-wise check.  A circulant matrix has the DFT of its first column as
  eigenvalues (Gray, "Toeplitz and circulant matrices", from memory).
- Zero phase of the Q filter is checked numerically: its impulse response is even.
- Closed-loop learning runs through sim.servo.ServoModel in lockstep (brief: RMS error below 5 %
  of the 10 deg schedule amplitude within 20 revolutions).
"""
from __future__ import annotations

import json
import math
from dataclasses import replace

import numpy as np
import pytest

from flapctl.errors import ProfileError
from flapctl.schedule import Schedule
from flapctl.tune.ilc import (
    AzimuthILC, BinAccumulator, ILCConvergenceError, LearningDisabled, convergence_check, learning_update,
    zero_phase_lowpass,
)
from sim.servo import ServoModel, ServoParams

DT = 1e-3
OMEGA = 2.0 * math.pi * 1.5
BINS = 72


def servo(**changes: object) -> ServoParams:
    """Brief's servo: 30 ms dead time, 4 Hz, zeta 0.7."""
    base = ServoParams(
        travel_deg=30.0, rate_limit_deg_s=400.0, dead_time_s=0.030, natural_freq_hz=4.0, damping=0.7,
        kt_nm_a=0.02, resistance_ohm=2.0, gear_ratio=50.0, gear_efficiency=0.7, flap_inertia_kg_m2=2e-6,
        flap_friction_nm_s=1e-4, supply_v=24.0, current_limit_a=5.0)
    return replace(base, **changes)


def schedule() -> Schedule:
    """Three harmonics scaled to a peak |delta| of 10 deg."""
    az = np.arange(0.0, 360.0, 5.0)
    dense = np.linspace(0.0, 2.0 * math.pi, 3601)

    def shape(th: np.ndarray) -> np.ndarray:
        return 8.0 * np.sin(th) + 2.5 * np.sin(2.0 * th - 0.6) + np.cos(3.0 * th)
    return Schedule.from_arrays(az, shape(np.radians(az)) * (10.0 / np.max(np.abs(shape(dense)))), 1,
                                interpolation="spline")


def run_revolutions(ilc: AzimuthILC, revolutions: int, update=None) -> list[float]:
    """Lockstep: constant speed, command = schedule + correction; RMS bin error per revolution.

    ``update(error_bins)`` replaces ilc.update when given (to run a law the learner refuses).
    """
    table = schedule().table(None, 0.1)
    model = ServoModel(servo(), DT)
    model.reset(table.at(0, 0.0))
    acc = BinAccumulator(ilc.bins)
    history: list[float] = []
    step = OMEGA * DT
    max_ticks = int(revolutions * 2.0 * math.pi / step) + 10
    for k in range(max_ticks):
        theta = step * k
        if theta >= 2.0 * math.pi * (len(history) + 1):
            errors = acc.means()
            acc.clear()
            history.append(float(np.sqrt(np.mean(np.square(errors)))))
            (update or ilc.update)(errors)
            if len(history) == revolutions:
                break
        ref = table.at(0, theta)
        acc.add(theta, ref - model.angle_deg)
        model.step(ref + ilc.correction_at(theta), 0.0)
    return history


def test_q_filter_is_zero_phase() -> None:
    impulse = np.zeros(BINS)
    impulse[0] = 1.0
    h = zero_phase_lowpass(impulse, 6)
    np.testing.assert_allclose(h, np.roll(h[::-1], 1), atol=1e-15)      # h[n] = h[-n]: zero phase
    n = np.arange(BINS)
    low = np.cos(2.0 * math.pi * 4 * n / BINS + 0.3)
    high = np.sin(2.0 * math.pi * 9 * n / BINS)
    np.testing.assert_allclose(zero_phase_lowpass(low + high, 6), low, atol=1e-12)   # no shift, no loss


def test_convergence_check_matches_lifted_matrix() -> None:
    # 1.25 Hz with 1 ms ticks: 800 ticks per revolution, 10 per bin, so the lifted plant is circulant
    bins, omega = 80, 2.0 * math.pi * 1.25
    probe = AzimuthILC(bins, 1.0, 0, bins // 2)
    pulse = [0.0] * bins
    pulse[0] = 1.0
    probe._set(pulse)              # correction = one bin pulse, interpolated as on the rig
    model = ServoModel(servo(rate_limit_deg_s=1e4), DT)
    model.reset(0.0)
    acc = BinAccumulator(bins)
    for k in range(800 * 6):       # steady periodic response: keep the last revolution
        theta = omega * DT * k
        if k >= 800 * 5:
            acc.add(theta, model.angle_deg)
        model.step(probe.correction_at(theta), 0.0)
    column = np.array(acc.means())
    plant = np.array([np.roll(column, j) for j in range(bins)]).T
    eye = np.eye(bins)
    for gamma, lead, cutoff in ((0.8, 13, 6), (1.0, 13, 10), (3.0, 13, 6), (0.5, 0, 6)):
        q = np.array([zero_phase_lowpass(eye[j], cutoff) for j in range(bins)]).T
        shift = np.roll(eye, -lead, axis=0)                     # (S e)[n] = e[n + d]
        lifted = q @ (eye - gamma * shift @ plant)
        radius = float(np.max(np.abs(np.linalg.eigvals(lifted))))
        report = convergence_check(servo(), gamma, lead, cutoff, omega, bins, tick_s=DT)
        assert report.sup_gain == pytest.approx(radius, rel=0.01)


def test_harmonic_zero_gives_arimoto_condition() -> None:
    # at harmonic 0, G(0) = 1 and the factor is |1 - gamma| (Arimoto 1984: |1 - gamma p_d| < 1)
    report = convergence_check(servo(), 3.0, 10, 0, OMEGA, BINS)
    assert report.sup_gain == pytest.approx(2.0, abs=1e-12) and report.worst_harmonic == 0
    assert not report.converges
    assert convergence_check(servo(), 0.5, 10, 0, OMEGA, BINS).sup_gain == pytest.approx(0.5, abs=1e-12)


def test_learning_reaches_five_percent_within_twenty_revolutions() -> None:
    ilc = AzimuthILC(BINS, 0.7, 9, 5)
    report = ilc.enable(servo(), [0.8 * OMEGA, OMEGA, 1.2 * OMEGA], tick_s=DT)
    assert report.converges and report.sup_gain < 1.0
    history = run_revolutions(ilc, 20)
    first_below = next(j for j, rms in enumerate(history) if rms < 0.5)      # 5 % of 10 deg
    assert first_below < 20
    assert all(rms < 0.5 for rms in history[first_below + 2:])
    assert history[0] > 3.0 and history[-1] < 0.05                           # no lead at the start
    assert ilc.revolutions == 20


def test_diverging_gain_is_refused_and_does_diverge() -> None:
    ilc = AzimuthILC(BINS, 3.0, 10, 6)
    with pytest.raises(ILCConvergenceError) as info:
        ilc.enable(servo(), OMEGA, tick_s=DT)
    assert info.value.key == "gamma" and "learning refused" in str(info.value)
    assert not ilc.enabled
    with pytest.raises(LearningDisabled):
        ilc.update([0.0] * BINS)
    # running the same law anyway (bypassing the learner's refusal) really diverges
    state = {"u": np.zeros(BINS)}

    def forced(errors: list[float]) -> None:
        state["u"] = learning_update(state["u"], errors, 3.0, 10, 6)
        ilc._set(state["u"].tolist())
    history = run_revolutions(ilc, 5, forced)
    assert history[-1] > 3.0 * history[0]
    misaligned = convergence_check(servo(), 0.5, 0, 6, OMEGA, BINS, tick_s=DT)   # no phase lead
    assert not misaligned.converges and misaligned.worst_harmonic > 1


def test_correction_lookup_and_freeze() -> None:
    ilc = AzimuthILC(8, 0.5, 1, 4)
    values = [float(v) for v in range(8)]
    ilc._set(values)
    width = 2.0 * math.pi / 8
    for n in range(8):
        assert ilc.correction_at((n + 0.5) * width) == pytest.approx(values[n])       # bin centres
    assert ilc.correction_at(1.0 * width) == pytest.approx(0.5)                      # between centres
    assert ilc.correction_at(0.0) == pytest.approx(3.5)                              # wraps 7 -> 0
    assert ilc.correction_at(-7.5 * width) == pytest.approx(ilc.correction_at(0.5 * width))
    assert ilc.correction_at(4.0 * math.pi + 2.25 * width) == pytest.approx(1.75)
    ilc.enable(servo(), OMEGA)
    before = ilc.update([1.0] * 8)
    ilc.freeze()
    assert ilc.update([5.0] * 8) == before and ilc.last_error_rms_deg == pytest.approx(5.0)


def test_bin_accumulator_fills_empty_bins() -> None:
    acc = BinAccumulator(4)
    acc.add(0.1, 1.0)
    acc.add(0.2, 3.0)
    acc.add(math.pi + 0.1, 6.0)
    assert acc.means() == pytest.approx([2.0, 4.0, 6.0, 4.0])
    acc.clear()
    with pytest.raises(ProfileError):
        acc.means()


def test_save_and_load(tmp_path) -> None:
    ilc = AzimuthILC(BINS, 0.5, 10, 6, limit_deg=8.0)
    ilc.enable(servo(), OMEGA)
    ilc.update(np.sin(np.arange(BINS) * 2.0 * math.pi / BINS).tolist())
    path = ilc.save(tmp_path / "ilc.json")
    back = AzimuthILC.load(path)
    assert back.correction_deg == ilc.correction_deg and back.revolutions == 1
    assert (back.gamma, back.lead_bins, back.q_cutoff_harmonic, back.limit_deg) == (0.5, 10, 6, 8.0)
    assert not back.enabled
    with pytest.raises(ProfileError):
        ilc.save(path)                                          # no overwrite
    data = json.loads(path.read_text())
    data["correction_deg"][3] = "x"
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps(data))
    with pytest.raises(ProfileError) as info:
        AzimuthILC.load(bad)
    assert info.value.key == "correction_deg[3]" and info.value.source == str(bad)
    data["correction_deg"][3] = 0.0
    data["gain"] = 1.0
    bad.unlink()
    bad.write_text(json.dumps(data))
    with pytest.raises(ProfileError) as info:
        AzimuthILC.load(bad)
    assert info.value.key == "gain"


def test_constructor_rejects_bad_settings() -> None:
    with pytest.raises(ProfileError) as info:
        AzimuthILC(BINS, 0.5, 10, 40)
    assert info.value.key == "q_cutoff_harmonic"
    with pytest.raises(ProfileError) as info:
        AzimuthILC(2, 0.5, 0, 1)
    assert info.value.key == "bins"
    ilc = AzimuthILC(BINS, 0.5, 10, 6)
    ilc.enable(servo(), OMEGA)
    with pytest.raises(ProfileError) as info:
        ilc.update([0.0] * (BINS - 1))
    assert info.value.key == "measured_error_per_bin"


def test_learning_in_the_running_controller_cuts_tracking_error():
    # ILC inside the real Controller on the lockstep SIL rig, lead switched off so that the learner
    # has to find it: the RMS error (schedule - measured flap) of the last revolutions falls well
    # below the first's and below 5 % of the schedule amplitude (8 deg) (Arimoto et al. 1984;
    # Bristow et al. 2006, from memory)
    from pathlib import Path
    from flapctl.lead import LeadModel
    from flapctl.profile import load_profile
    from flapctl.runner import run_sil
    from flapctl.schedule import Schedule
    from flapctl.tune.ilc_loop import LoopLearning
    root = Path(__file__).resolve().parent.parent / "hw_profiles"
    profile = load_profile(root / "demo_flume_3blade.toml")
    schedule = Schedule.load(root / "schedules" / "demo_morph.toml", 3)
    omega = profile.fluid.design_tsr * profile.fluid.design_speed_m_s / profile.geometry.radius_m
    learning = LoopLearning.for_profile(profile, omega, gamma=0.6)
    out = run_sil(profile, schedule, tsr=2.5, duration_s=18.0, out=None, settle_s=1.0,
                  lead=LeadModel("none"), attach=lambda ctl: ctl.set_learning(learning))
    hist = [h for h in learning.history[0] if h == h]
    assert len(hist) >= 15
    assert hist[-1] < 0.3 * hist[0]
    assert max(hist[-3:]) < 0.05 * 8.0
    assert out.summary.cp_net > 0.25
