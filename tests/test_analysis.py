"""Campaign-level checks of the analysis: calibrated gain intervals, blockage bound, energy audit.

The interval formulas themselves (Fieller 1954, GUM examples) are checked in tests/test_stats.py.
"""
from __future__ import annotations

import math
import tomllib
from pathlib import Path

import h5py
import numpy as np
import pytest

from flapctl.analysis import blockage
from flapctl.analysis.campaign_analysis import analyze, gain_from_runs
from flapctl.analysis.stats import lag_autocorr
from flapctl.campaign import PointData, parse_plan, run_campaign
from flapctl.energy import BETZ_LIMIT, RevolutionRecord
from flapctl.fluid import fluid_properties
from flapctl.runlog import tick_dtype

ROOT = Path(__file__).resolve().parent.parent
SCHEDULE = ROOT / "hw_profiles" / "schedules" / "demo_morph.toml"


# ---------------------------------------------------------------------------------------------
# Coverage of the gain interval on synthetic campaigns matched to the SIL rig
# ---------------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def sil_noise():
    """What the SIL rig shows: per-revolution relative scatter and lag-1 autocorrelation of
    Cp net, its relative trend per revolution inside a run, and the relative change of Cp net
    per relative change of the mean flow (how a flow drift reaches Cp at a set TSR)."""
    from flapctl.profile import load_profile
    from flapctl.runner import run_sil
    from flapctl.schedule import Schedule
    profile = load_profile(ROOT / "hw_profiles" / "demo_flume_3blade.toml")
    sched = Schedule.load(SCHEDULE, profile.blades)
    means = {}
    for u in (0.57, 0.63):
        out = run_sil(profile, sched, tsr=2.5, duration_s=14.0, out=None, seed=5, flow_m_s=u)
        cp = np.array([r.cp_net for r in out.controller.ledger.records[4:]])
        means[u] = cp
    cp = means[0.63]
    slope = np.polyfit(np.arange(cp.size), cp / cp.mean(), 1)[0]
    sens = (means[0.63].mean() / means[0.57].mean() - 1.0) / (0.63 / 0.57 - 1.0)
    return (float(cp.std(ddof=1) / cp.mean()), float(lag_autocorr(cp, 1)), cp.size,
            float(slope), float(sens))


def _ar1(rng, n, phi, sd):
    e = rng.standard_normal(n) * sd * math.sqrt(1.0 - phi * phi)
    x = np.empty(n)
    x[0] = rng.standard_normal() * sd
    for i in range(1, n):
        x[i] = phi * x[i - 1] + e[i]
    return x


def test_gain_interval_covers_the_true_gain(sil_noise):
    rel_sd, r1, nrev, slope, sens = sil_noise
    assert nrev >= 10
    assert 0.0 < rel_sd < 0.2            # the SIL rig is noisy but producing
    phi = min(max(r1, 0.0), 0.8)
    rel_sd = max(rel_sd, 0.01)
    base_cp, true_gain = 0.30, 0.10
    blocks, dwell = 2, 20                # the demo plan: A B | B A, 20 revolutions per point
    # run-to-run drift: the demo plan's flow walk (0.4 % per run) reaching Cp through the SIL's
    # sensitivity, taken at least 0.5 (conservative), plus the within-run trend the SIL shows
    drift_step = 0.004 * max(abs(sens), 0.5)
    hits = 0
    seeds = 300
    for seed in range(seeds):
        rng = np.random.default_rng(1000 + seed)
        walk = np.cumsum(rng.standard_normal(2 * blocks) * drift_step)
        trend = np.arange(dwell) * max(abs(slope), 1e-4)
        morph, base = [], []
        for j in range(blocks):
            order = ("m", "b") if j % 2 == 0 else ("b", "m")
            for k, mode in enumerate(order):
                d = walk[2 * j + k]
                true = base_cp * (1.0 + true_gain) if mode == "m" else base_cp
                rec = true * (1.0 + d + trend) + true * _ar1(rng, dwell, phi, rel_sd)
                (morph if mode == "m" else base).append(rec)
        fie, dlt, _ = gain_from_runs(morph, base, level=0.95)
        hits += fie.lo <= true_gain <= fie.hi
    coverage = hits / seeds
    # requirement of the campaign design: >= 90 % of nominal-95 % intervals cover the truth
    assert coverage >= 0.90, coverage


def test_delta_and_fieller_agree_for_a_well_determined_baseline():
    rng = np.random.default_rng(2)
    morph = [0.33 + 0.003 * rng.standard_normal(20) for _ in range(3)]
    base = [0.30 + 0.003 * rng.standard_normal(20) for _ in range(3)]
    fie, dlt, det = gain_from_runs(morph, base)
    # Fieller's interval tends to the delta-method one when g = t^2 v_bb / b^2 -> 0 (Fieller 1954)
    assert fie.g < 0.01
    assert fie.lo == pytest.approx(dlt.lo, abs=2e-3) and fie.hi == pytest.approx(dlt.hi, abs=2e-3)
    assert fie.verdict == "gain" and det["n_blocks"] == 3


# ---------------------------------------------------------------------------------------------
# An ideal confined actuator disc as the rig: campaign-level blockage and audit checks
# ---------------------------------------------------------------------------------------------

def disc_runner(cp_of_mode: dict, ct_of_mode: dict):
    """A per-point runner for an ideal disc: whole revolutions at exactly the given Cp and C_T."""
    def run(profile, schedule, spec, lead, progress):
        g = profile.geometry
        rho = fluid_properties(profile.fluid.medium, profile.fluid.temperature_c,
                               profile.fluid.pressure_pa).density_kg_m3
        area = 2.0 * g.radius_m * g.span_m
        u = spec.flow_true_m_s
        omega = spec.tsr * u / g.radius_m
        rev_s = 2.0 * math.pi / omega
        ef = 0.5 * rho * area * u ** 3 * rev_s
        n = int(spec.duration_s / rev_s)
        cp = cp_of_mode[spec.mode]
        servo = 0.002 * ef if spec.mode != "fixed" else 0.0
        recs = [RevolutionRecord(index=i, t_start_s=i * rev_s, duration_s=rev_s,
                                 mean_speed_rad_s=omega, mean_tsr=spec.tsr, mean_flow_m_s=u,
                                 shaft_energy_j=cp * ef, servo_energy_j=(servo / 3,) * 3,
                                 fluid_energy_j=ef) for i in range(n)]
        thrust = np.full(n, ct_of_mode[spec.mode] * 0.5 * rho * area * u * u)
        if progress is not None:
            progress(1.0)
        return PointData(revolutions=recs, thrust_n=thrust, ticks=np.zeros(0, tick_dtype(3)),
                         state="RUNNING", trips=[], servo_power_estimated=False)
    return run


DISC_PLAN = f"""
schema_version = 1
name = "ideal-disc"
[setpoints]
tsr = [2.5]
[[modes]]
name = "fixed"
kind = "baseline"
[[modes]]
name = "morph"
kind = "schedule"
schedule = "{SCHEDULE}"
[run]
dwell_revolutions = 12
repeats = 2
[settling]
revolutions = 1
timeout_s = 1.0
"""


@pytest.fixture
def disc_campaign(tmp_path, flume):
    B = 0.2        # the demo flume: 2 R H / (w d) = 2 * 0.2 * 0.3 / (1.0 * 0.6)
    opt = blockage.lmadt_state(B, 1.0 / 3.0)        # the confined optimum, a_w = 1/3
    plan = parse_plan(tomllib.loads(DISC_PLAN), "<disc>", DISC_PLAN)
    out = tmp_path / "disc.h5"
    run_campaign(plan, flume, out, point_runner=disc_runner(
        {"fixed": opt.cp, "morph": opt.cp * 0.9}, {"fixed": opt.ct, "morph": opt.ct * 0.9}))
    return out, B, opt


def test_blockage_bound_and_correction_at_campaign_level(disc_campaign):
    out, B, opt = disc_campaign
    res = analyze(out)
    assert res.blockage_ratio == pytest.approx(B, rel=1e-12)
    # Garrett & Cummins 2007: max Cp (based on U_T) = (16/27)/(1-B)^2 = 0.925926 at B = 0.2
    assert res.cp_bound == pytest.approx((16.0 / 27.0) / (1.0 - B) ** 2, rel=1e-12)
    fixed = next(p for p in res.points if p.mode == "fixed")
    assert fixed.cp_gross == pytest.approx(res.cp_bound, rel=1e-9)
    assert fixed.thrust_source == "measured"
    # the confined optimum maps back to the open-flow Betz optimum (Betz 1920: 16/27, C_T 8/9)
    # LMADT step 2 maps it to an open-flow disc of the same thrust and disc speed; that disc
    # obeys open-flow momentum theory (Betz 1920): C_T = 4a(1-a), C_P = 4a(1-a)^2 with
    # a = 1 - u_t/U_F, and stays below 16/27
    a = 1.0 - opt.a_t / fixed.speed_ratio
    assert fixed.cp_gross_corrected == pytest.approx(4 * a * (1 - a) ** 2, rel=1e-9)
    assert fixed.cp_gross_corrected < BETZ_LIMIT
    assert not any("above" in f for f in res.flags)
    morph = next(g for g in res.gains if g.mode == "morph")
    assert morph.verdict == "loss"           # 0.9 Cp minus actuator energy, no noise


def test_energy_audit_flags_a_doctored_over_betz_point(disc_campaign):
    out, B, _ = disc_campaign
    with h5py.File(out, "r+") as f:           # plant an impossible point: shaft energy x 1.5
        revs = f["points"]["p0000"]["revolutions"]
        data = revs[:]
        data["shaft_energy_j"] *= 1.5
        data["cp_gross"] *= 1.5
        revs[...] = data
    res = analyze(out)
    flagged = [f for f in res.flags if "above (16/27)/(1-B)^2" in f]
    assert flagged and "TSR 2.5 fixed" in flagged[0]
    fixed = next(p for p in res.points if p.mode == "fixed")
    assert fixed.flags and fixed.cp_gross > res.cp_bound     # the point itself carries the flag
    assert not next(p for p in res.points if p.mode == "morph").flags


def test_estimated_thrust_is_marked(tmp_path, flume):
    plan = parse_plan(tomllib.loads(DISC_PLAN), "<disc>", DISC_PLAN)
    out = tmp_path / "est.h5"
    runner = disc_runner({"fixed": 0.3, "morph": 0.33}, {"fixed": 0.8, "morph": 0.85})

    def no_thrust(*args):
        d = runner(*args)
        d.thrust_n = None
        return d
    run_campaign(plan, flume, out, point_runner=no_thrust)
    res = analyze(out)
    p = res.points[0]
    assert p.thrust_source == "estimated"
    # the estimate is the ideal disc that makes this Cp: it reproduces Cp through LMADT
    aw = [a for a in np.linspace(1 / 3, 1, 20001) if abs(blockage.lmadt_state(0.2, a).ct - p.ct) < 1e-4]
    assert aw and blockage.lmadt_state(0.2, aw[0]).cp == pytest.approx(p.cp_gross, rel=2e-3)
    assert p.cp_gross_corrected < p.cp_gross and p.tsr_corrected < p.mean_tsr
