"""Analysis of a campaign file: Cp with intervals, net gain with its interval, the verdict.

Per set point and mode (REFERENCES sections 7 and 8):

* C_P,gross, actuator C_P and C_P,net over the dwell revolutions of every run of that mode;
  the type-A standard uncertainty of the mean from batch means over whole revolutions
  (Schmeiser 1982; :func:`flapctl.analysis.stats.auto_batch_means`, which enlarges the batches
  until the batch means' lag-1 autocorrelation is within +/-0.2), combined with the sensors'
  type-B uncertainties from the profile (GUM, JCGM 100:2008):
  u_B(C_P,net)**2 = C_P,gross**2 (u_Q**2 + u_w**2) + C_P,act**2 u_act**2 + 9 C_P,net**2 u_U**2,
  Welch-Satterthwaite degrees of freedom, expanded with a Student-t coverage factor.
* Net gain G = C_P,net,morph / C_P,net,base - 1 of each schedule over the baseline, from pairs
  of batch means taken inside the same interleaved block (a morph run and the base run next to
  it), :func:`flapctl.analysis.stats.paired_gain` with Fieller's interval (verdict) and the
  delta method beside it; the common type-B terms enter through ``CommonTypeB`` (the flow
  meter's scale cancels in the ratio, the torque and speed scale only on the actuator share).
  Pair residuals e = a - R b in time order are checked for lag-1 autocorrelation (batches
  enlarged when |r1| > 0.2), and a one-way analysis of variance of the residuals over blocks
  tests for drift that the pairing did not cancel; when it is significant at 5 % the pairs
  are pooled to one per block (block means, fewer degrees of freedom) and the result says so.
* Blockage (profile with a [channel]): LMADT correction (Barnsley & Wellicome 1990; Garrett &
  Cummins 2007) with C_T from the logged streamwise force when the file has it ("measured"),
  else from the ideal confined disc that produces the measured C_P ("estimated", a lower bound
  of the thrust, hence of the correction).
* Energy audit: C_P above (16/27)/(1 - B)**2 (confined; 16/27 in open flow), corrected C_P
  above 16/27, or actuator energy above shaft energy is flagged.
* Method of bins in TSR (in the spirit of IEC TS 62600-200) on the per-revolution values; used
  for the curves when the achieved TSR scatters by more than half a bin around the set points.
"""
from __future__ import annotations

import json
import logging
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np
from scipy import optimize as _opt
from scipy import stats as _sps

from flapctl.derived import blockage_ratio_of
from flapctl.energy import BETZ_LIMIT
from flapctl.errors import FlapctlError
from flapctl.fluid import fluid_properties
from flapctl.profile import Profile, parse_profile

from . import blockage as _blk
from .bins import Bin, bin_by
from .stats import (MIN_BATCHES, R1_LIMIT, CommonTypeB, auto_batch_means, coverage_factor,
                    lag_autocorr, paired_gain, welch_satterthwaite)

__all__ = [
    "CampaignFileError", "RunRecord", "ModeStats", "GainStats", "CampaignResult", "read_runs",
    "gain_from_runs", "analyze", "VERDICTS", "METHOD_TEXT",
]

log = logging.getLogger(__name__)

VERDICTS = ("gain", "no detectable gain", "loss")
#: Significance level of the block-effect test (common practice, no source).
BLOCK_TEST_ALPHA = 0.05

METHOD_TEXT = (
    "Cp gross = shaft energy / fluid energy and Cp net = (shaft - actuator electrical energy) / fluid "
    "energy over whole revolutions, fluid energy = integral of 1/2 rho A U^3 dt (REFERENCES s.1). "
    "Type-A uncertainty of each mean from batch means of whole revolutions, batches enlarged until "
    "the lag-1 autocorrelation of the batch means is within +/-0.2 (Schmeiser 1982, Operations "
    "Research 30(3):556-568; Law & Kelton). Type-B uncertainties of torque, speed and flow sensors "
    "from the rig profile, combined by the GUM law of propagation with Welch-Satterthwaite degrees of "
    "freedom and a Student-t coverage factor (JCGM 100:2008). Net gain = Cp net (schedule) / Cp net "
    "(baseline) - 1 from pairs of batch means of interleaved blocks; interval by Fieller's theorem "
    "(Fieller 1954, J. R. Stat. Soc. B 16:175-185), delta method beside it. Verdict 'gain' when the "
    "whole interval is above 0, 'loss' when it is below 0, else 'no detectable gain'. Blockage: "
    "linear momentum actuator-disc theory in a channel (Barnsley & Wellicome 1990; Bahaj et al. 2007; "
    "Garrett & Cummins 2007, J. Fluid Mech. 588), bound (16/27)/(1-B)^2. Method of bins in TSR in the "
    "spirit of IEC TS 62600-200:2013.")


class CampaignFileError(FlapctlError, OSError):
    """The file is not a readable campaign file."""


@dataclass(frozen=True)
class RunRecord:
    """The dwell revolutions of one stored point (one run)."""
    name: str
    index: int
    tsr_setpoint: float
    flow_setpoint_m_s: float
    mode: str
    block: int
    status: str
    note: str
    temperature_c: float
    revolutions: np.ndarray          # revolution_dtype rows actually used
    thrust_n: np.ndarray | None      # per used revolution, when measured
    phase: dict[str, np.ndarray]
    flags: tuple[str, ...]


@dataclass(frozen=True)
class ModeStats:
    """One mode at one set point: means, expanded intervals (at ``level``) and the audit."""
    tsr_setpoint: float
    flow_setpoint_m_s: float
    mode: str
    kind: str
    n_runs: int
    n_revolutions: int
    mean_tsr: float
    mean_flow_m_s: float
    cp_gross: float
    cp_gross_u: float
    cp_actuator: float
    actuator_power_w: float
    shaft_power_w: float
    cp_net: float
    cp_net_u_a: float
    cp_net_u_b: float
    cp_net_u_c: float
    cp_net_dof: float
    cp_net_lo: float
    cp_net_hi: float
    cp_gross_lo: float
    cp_gross_hi: float
    batch_size: int
    n_batches: int
    lag1_autocorr: float
    batch_warning: str | None
    shaft_energy_j: float
    actuator_energy_j: float
    fluid_energy_j: float
    ct: float
    thrust_source: str
    cp_gross_corrected: float
    cp_net_corrected: float
    tsr_corrected: float
    speed_ratio: float
    flags: tuple[str, ...]
    phase: dict[str, np.ndarray] = field(repr=False, compare=False)


@dataclass(frozen=True)
class GainStats:
    """Net gain of one schedule mode over the baseline at one set point."""
    tsr_setpoint: float
    flow_setpoint_m_s: float
    mode: str
    gain: float
    lo: float
    hi: float
    kind: str
    delta_lo: float
    delta_hi: float
    dof: float
    n_pairs: int
    n_blocks: int
    batch_size: int
    lag1_autocorr: float
    block_test_p: float
    pooled_to_blocks: bool
    verdict: str
    gain_corrected: float
    notes: tuple[str, ...]


@dataclass(frozen=True)
class CampaignResult:
    path: Path
    plan_name: str
    profile_name: str
    level: float
    blockage_ratio: float | None
    cp_bound: float
    modes: tuple[dict, ...]
    points: tuple[ModeStats, ...]
    gains: tuple[GainStats, ...]
    bins: dict[str, list[Bin]]
    binned: bool
    flags: tuple[str, ...]
    excluded: tuple[str, ...]
    method: str
    points_total: int
    points_stored: int


# ---------------------------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------------------------

def _attr_str(v) -> str:
    return v.decode() if isinstance(v, bytes) else str(v)


def read_runs(f: h5py.File) -> tuple[list[RunRecord], list[str]]:
    """Every complete point with its used revolutions; second list: names of points left out."""
    runs, excluded = [], []
    for name in sorted(f["points"]):
        g = f["points"][name]
        a = g.attrs
        if not bool(a.get("complete", False)):
            excluded.append(f"{name}: incomplete")
            continue
        status = _attr_str(a["status"])
        if status not in ("ok", "unsettled"):
            excluded.append(f"{name}: {status} ({_attr_str(a.get('note', ''))})")
            continue
        used = g["used"][:]
        revs = g["revolutions"][:][used]
        if revs.size < 2:
            excluded.append(f"{name}: fewer than 2 dwell revolutions")
            continue
        thrust = g["thrust_n"][:][used] if "thrust_n" in g else None
        phase = {k: g["phase"][k][:] for k in g["phase"]} if "phase" in g else {}
        summary = json.loads(_attr_str(a.get("summary", "{}")) or "{}")
        # the run summary's open-flow Betz check is replaced by the blockage-aware audit here
        flags = [fl for fl in summary.get("flags", []) if "is above the Betz limit" not in fl]
        if status == "unsettled":
            flags.append(f"{name}: {_attr_str(a.get('note', ''))}")
        runs.append(RunRecord(
            name=name, index=int(a["index"]), tsr_setpoint=float(a["tsr"]),
            flow_setpoint_m_s=float(a["flow_setpoint_m_s"]), mode=_attr_str(a["mode"]),
            block=int(a["block"]), status=status, note=_attr_str(a.get("note", "")),
            temperature_c=float(a["temperature_true_c"]), revolutions=revs, thrust_n=thrust,
            phase=phase, flags=tuple(flags)))
    runs.sort(key=lambda r: r.index)
    return runs, excluded


# ---------------------------------------------------------------------------------------------
# Gain from paired runs (the core the coverage check exercises)
# ---------------------------------------------------------------------------------------------

def _pairs(morph_runs: list[np.ndarray], base_runs: list[np.ndarray], m: int
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Batch means of size ``m`` paired inside each block; the trailing revolutions are used."""
    ma, ba, blk = [], [], []
    for j, (a, b) in enumerate(zip(morph_runs, base_runs)):
        k = min(len(a), len(b)) // m
        if k < 1:
            continue
        ma.extend(np.asarray(a[len(a) - k * m:]).reshape(k, m).mean(axis=1))
        ba.extend(np.asarray(b[len(b) - k * m:]).reshape(k, m).mean(axis=1))
        blk.extend([j] * k)
    return np.asarray(ma), np.asarray(ba), np.asarray(blk)


def _block_test(resid: np.ndarray, blk: np.ndarray) -> float:
    """p-value of the one-way ANOVA F test of a block effect on the pair residuals."""
    groups = [resid[blk == j] for j in np.unique(blk)]
    if len(groups) < 2 or any(len(g) < 2 for g in groups):
        return math.nan
    if all(np.ptp(g) == 0.0 for g in groups):
        return math.nan
    return float(_sps.f_oneway(*groups).pvalue)


def gain_from_runs(morph_runs: list[np.ndarray], base_runs: list[np.ndarray],
                   level: float = 0.95, type_b: CommonTypeB | None = None,
                   batch_size: int | None = None) -> tuple[object, object, dict]:
    """Net gain of morph over base from per-revolution C_P,net of runs paired by block.

    ``morph_runs[j]`` and ``base_runs[j]`` are the revolution values of the two runs of block
    j.  Batches of m revolutions (m from 1, enlarged by about a quarter while the pair
    residuals' |r1| > 0.2 and at least 10 pairs remain; or ``batch_size``) are paired inside
    each block.  Returns (Fieller GainResult, delta GainResult, details) with details keys
    ``batch_size``, ``n_blocks``, ``lag1_autocorr``, ``block_test_p``, ``pooled_to_blocks``,
    ``notes``.
    """
    if len(morph_runs) != len(base_runs) or not morph_runs:
        raise FlapctlError(f"gain_from_runs: {len(morph_runs)} morph runs and {len(base_runs)} "
                           "base runs: expected the same number (one pair per block), at least 1")
    notes = []
    m = 1 if batch_size is None else max(1, int(batch_size))
    while True:
        ma, ba, blk = _pairs(morph_runs, base_runs, m)
        if ma.size < 2 or batch_size is not None:
            break
        r = ma.mean() / ba.mean() if ba.mean() != 0 else math.nan
        resid = ma - r * ba
        r1 = lag_autocorr(resid, 1) if np.ptp(resid) > 0 else math.nan
        nxt = m + max(1, m // 4)
        # enlarge while the residuals are correlated and >= MIN_BATCHES pairs remain
        if math.isnan(r1) or abs(r1) <= R1_LIMIT or _pairs(morph_runs, base_runs, nxt)[0].size < MIN_BATCHES:
            break
        m = nxt
    r = ma.mean() / ba.mean()
    resid = ma - r * ba
    r1 = lag_autocorr(resid, 1) if np.ptp(resid) > 0 else math.nan
    if not math.isnan(r1) and abs(r1) > R1_LIMIT:
        notes.append(f"pair residuals keep lag-1 autocorrelation {r1:+.2f} with batches of {m} "
                     "revolutions (larger batches would leave fewer than "
                     f"{MIN_BATCHES} pairs)")
    p_block = _block_test(resid, blk)
    pooled = False
    n_blocks = len(np.unique(blk))
    if not math.isnan(p_block) and p_block < BLOCK_TEST_ALPHA:
        if n_blocks >= 2:
            pooled = True
            ma = np.array([ma[blk == j].mean() for j in np.unique(blk)])
            ba = np.array([ba[blk == j].mean() for j in np.unique(blk)])
            notes.append(f"block effect on the pairs (F test p = {p_block:.3f}): drift not cancelled "
                         f"inside blocks; pooled to {n_blocks} block means")
    fie = paired_gain(ma, ba, level=level, method="fieller", type_b=type_b)
    dlt = paired_gain(ma, ba, level=level, method="delta", type_b=type_b)
    details = {"batch_size": m, "n_blocks": n_blocks, "lag1_autocorr": r1,
               "block_test_p": p_block, "pooled_to_blocks": pooled, "notes": tuple(notes)}
    return fie, dlt, details


# ---------------------------------------------------------------------------------------------
# Per mode
# ---------------------------------------------------------------------------------------------

def _estimated_ct(cp: float, B: float) -> float:
    """C_T of the ideal confined disc (light-loading branch, a_w in [1/3, 1]) giving ``cp``."""
    if cp <= 0.0:
        return 0.0
    top = _blk.lmadt_state(B, 1.0 / 3.0)
    if cp >= top.cp:
        return top.ct
    aw = _opt.brentq(lambda x: _blk.lmadt_state(B, x).cp - cp, 1.0 / 3.0, 1.0, xtol=1e-13)
    return _blk.lmadt_state(B, aw).ct


def _mode_stats(runs: list[RunRecord], kind: str, profile: Profile, B: float | None,
                level: float, act_rel: float) -> ModeStats:
    revs = np.concatenate([r.revolutions for r in runs])
    es = float(revs["shaft_energy_j"].sum())
    ea = float(revs["servo_energy_j"].sum())
    ef = float(revs["fluid_energy_j"].sum())
    dur = float(revs["duration_s"].sum())
    cpg, cpn = es / ef, (es - ea) / ef
    cpa = ea / ef
    per_rev = revs["cp_net"]
    bm = auto_batch_means(per_rev, min_batches=min(10, max(2, per_rev.size // 2)))
    s = profile.sensors
    u_q, u_w, u_u = s.torque.uncertainty_rel, s.speed_uncertainty_rel, s.flow.uncertainty_rel
    u_b = math.sqrt(cpg ** 2 * (u_q ** 2 + u_w ** 2) + (cpa * act_rel) ** 2 + 9.0 * cpn ** 2 * u_u ** 2)
    u_bg = abs(cpg) * math.sqrt(u_q ** 2 + u_w ** 2 + 9.0 * u_u ** 2)
    u_a = bm.se
    u_c = math.hypot(u_a, u_b)
    dof = welch_satterthwaite([1.0, 1.0], [u_a, u_b], [float(bm.dof), math.inf])
    k = coverage_factor(dof, level)
    bmg = auto_batch_means(revs["cp_gross"], min_batches=min(10, max(2, per_rev.size // 2)))
    u_cg = math.hypot(bmg.se, u_bg)
    kg = coverage_factor(welch_satterthwaite([1.0, 1.0], [bmg.se, u_bg], [float(bmg.dof), math.inf]), level)
    mean_tsr = float(np.sum(revs["mean_tsr"] * revs["duration_s"]) / dur)
    mean_u = float(np.sum(revs["mean_flow_m_s"] * revs["duration_s"]) / dur)
    flags = []
    for r in runs:
        flags.extend(r.flags)
    g = profile.geometry
    area = 2.0 * g.radius_m * g.span_m
    # thrust coefficient
    temps = [r.temperature_c for r in runs]
    rho = fluid_properties(profile.fluid.medium, float(np.mean(temps)), profile.fluid.pressure_pa,
                           source=profile.source).density_kg_m3
    measured = [r for r in runs if r.thrust_n is not None and np.all(np.isfinite(r.thrust_n))]
    ct = math.nan
    thrust_source = "none"
    if len(measured) == len(runs):
        fx = np.concatenate([r.thrust_n for r in runs])
        ct = float(np.sum(fx * revs["duration_s"]) / dur) / (0.5 * rho * area * mean_u ** 2)
        thrust_source = "measured"
    cpg_c = cpn_c = tsr_c = ratio = math.nan
    bound = BETZ_LIMIT
    if B is not None:
        bound = _blk.max_cp_confined(B)
        if thrust_source != "measured":
            ct = _estimated_ct(cpg, B)
            thrust_source = "estimated"
        try:
            corr = _blk.correct(cpg, mean_tsr, ct, B, thrust_source)
            ratio = corr.speed_ratio
            cpg_c, tsr_c = corr.cp_f, corr.tsr_f
            cpn_c = cpn / ratio ** 3
        except _blk.BlockageError as exc:
            flags.append(f"blockage correction failed: {exc}")
    tag = f"TSR {runs[0].tsr_setpoint:g} {runs[0].mode}"
    tol = 1e-9
    if cpg > bound + tol:
        what = f"(16/27)/(1-B)^2 = {bound:.4f} (confined, B = {B:.3f})" if B is not None \
            else f"the Betz limit 16/27 = {bound:.4f}"
        flags.append(f"{tag}: Cp gross {cpg:.4f} is above {what}: check torque calibration, "
                     "flow speed and blockage")
    if B is not None and math.isfinite(cpg_c) and cpg_c > BETZ_LIMIT + tol:
        flags.append(f"{tag}: blockage-corrected Cp {cpg_c:.4f} is above the Betz limit 16/27")
    if ea > es:
        flags.append(f"{tag}: actuator energy {ea:.3g} J exceeds shaft energy {es:.3g} J")
    phase = _mean_phase(runs)
    return ModeStats(
        tsr_setpoint=runs[0].tsr_setpoint, flow_setpoint_m_s=runs[0].flow_setpoint_m_s,
        mode=runs[0].mode, kind=kind, n_runs=len(runs), n_revolutions=int(revs.size),
        mean_tsr=mean_tsr, mean_flow_m_s=mean_u, cp_gross=cpg, cp_gross_u=u_cg, cp_actuator=cpa,
        actuator_power_w=ea / dur, shaft_power_w=es / dur, cp_net=cpn, cp_net_u_a=u_a,
        cp_net_u_b=u_b, cp_net_u_c=u_c, cp_net_dof=dof, cp_net_lo=cpn - k * u_c,
        cp_net_hi=cpn + k * u_c, cp_gross_lo=cpg - kg * u_cg, cp_gross_hi=cpg + kg * u_cg,
        batch_size=bm.batch_size, n_batches=bm.n_batches, lag1_autocorr=bm.lag1_autocorr,
        batch_warning=bm.warning, shaft_energy_j=es, actuator_energy_j=ea, fluid_energy_j=ef,
        ct=ct, thrust_source=thrust_source, cp_gross_corrected=cpg_c, cp_net_corrected=cpn_c,
        tsr_corrected=tsr_c, speed_ratio=ratio, flags=tuple(dict.fromkeys(flags)), phase=phase)


def _mean_phase(runs: list[RunRecord]) -> dict[str, np.ndarray]:
    keys = set.intersection(*(set(r.phase) for r in runs)) if runs else set()
    out = {}
    for k in keys:
        arrs = [r.phase[k] for r in runs]
        stack = np.stack(arrs)
        if k == "azimuth_deg":
            out[k] = arrs[0]
        elif np.isfinite(stack).any(axis=0).all():
            out[k] = np.nanmean(stack, axis=0)
        else:
            out[k] = np.full(stack.shape[1:], np.nan)    # no tick data in any run
    return out


# ---------------------------------------------------------------------------------------------
# The whole campaign
# ---------------------------------------------------------------------------------------------

def analyze(campaign_h5: str | Path) -> CampaignResult:
    """Analyse a campaign file written by :func:`flapctl.campaign.run_campaign`."""
    path = Path(campaign_h5)
    try:
        f = h5py.File(path, "r")
    except OSError as exc:
        raise CampaignFileError(f"{path}: cannot read the campaign file ({exc})") from exc
    with f:
        from flapctl.campaign import CAMPAIGN_FORMAT
        if f.attrs.get("format") != CAMPAIGN_FORMAT:
            raise CampaignFileError(f"{path}: not a flapctl campaign file "
                                    f"(format {f.attrs.get('format')!r})")
        a = f.attrs
        ptext = _attr_str(a["profile_text"])
        profile = parse_profile(tomllib.loads(ptext), _attr_str(a["profile_source"]), ptext)
        modes = tuple(json.loads(_attr_str(a["modes"])))
        settings = json.loads(_attr_str(a["analysis"]))
        runs, excluded = read_runs(f)
        plan_name = _attr_str(a["plan_name"])
        total = int(a["points_total"])
        stored = len(f["points"])
    level = float(settings["level"])
    act_rel = float(settings["actuator_uncertainty_rel"])
    width = float(settings["tsr_bin_width"])
    B = blockage_ratio_of(profile)
    base = next(m["name"] for m in modes if m["kind"] == "baseline")
    keys = sorted({(r.flow_setpoint_m_s, r.tsr_setpoint) for r in runs})
    points: list[ModeStats] = []
    gains: list[GainStats] = []
    flags: list[str] = []
    s = profile.sensors
    rel_shaft = math.hypot(s.torque.uncertainty_rel, s.speed_uncertainty_rel)
    for (u, tsr) in keys:
        here = [r for r in runs if r.tsr_setpoint == tsr and r.flow_setpoint_m_s == u]
        stats_here = {}
        for m in modes:
            mr = [r for r in here if r.mode == m["name"]]
            if not mr:
                continue
            st = _mode_stats(mr, m["kind"], profile, B, level, act_rel)
            stats_here[m["name"]] = st
            points.append(st)
            flags.extend(st.flags)
        if base not in stats_here:
            continue
        for m in modes:
            if m["kind"] == "baseline" or m["name"] not in stats_here:
                continue
            gs = _gain(here, m["name"], base, stats_here, level, act_rel, rel_shaft, tsr, u)
            if gs is not None:
                gains.append(gs)
    # method of bins over TSR, per mode
    bins: dict[str, list[Bin]] = {}
    scatter = False
    for m in modes:
        mr = [r for r in runs if r.mode == m["name"]]
        if not mr:
            continue
        x = np.concatenate([r.revolutions["mean_tsr"] for r in mr])
        y = np.concatenate([r.revolutions["cp_net"] for r in mr])
        bins[m["name"]] = bin_by(x, y, width=width, min_count=10)
        for r in mr:
            t = float(np.mean(r.revolutions["mean_tsr"]))
            if abs(t - r.tsr_setpoint) > 0.5 * width:
                scatter = True
    unfinished = total - sum(1 for _ in runs) - len(excluded)
    if unfinished > 0:
        flags.append(f"campaign incomplete: {unfinished} of {total} points not run yet")
    return CampaignResult(
        path=path, plan_name=plan_name, profile_name=profile.name, level=level, blockage_ratio=B,
        cp_bound=_blk.max_cp_confined(B) if B is not None else BETZ_LIMIT, modes=modes,
        points=tuple(points), gains=tuple(gains), bins=bins, binned=scatter,
        flags=tuple(dict.fromkeys(flags)), excluded=tuple(excluded), method=METHOD_TEXT,
        points_total=total, points_stored=stored)


def _gain(here: list[RunRecord], mode: str, base: str, stats_here: dict[str, ModeStats],
          level: float, act_rel: float, rel_shaft: float, tsr: float, u: float) -> GainStats | None:
    morph_runs, base_runs = [], []
    for blk in sorted({r.block for r in here}):
        a = [r for r in here if r.block == blk and r.mode == mode]
        b = [r for r in here if r.block == blk and r.mode == base]
        if a and b:
            morph_runs.append(a[0].revolutions["cp_net"])
            base_runs.append(b[0].revolutions["cp_net"])
    if not morph_runs:
        return None
    ms, bs = stats_here[mode], stats_here[base]
    tb = CommonTypeB(rel_u_shaft=rel_shaft, actuator_cp=max(ms.cp_actuator, 0.0),
                     rel_u_actuator=act_rel)
    try:
        fie, dlt, det = gain_from_runs(morph_runs, base_runs, level=level, type_b=tb)
    except FlapctlError as exc:
        log.warning("TSR %g %s: no gain interval: %s", tsr, mode, exc)
        return None
    corr = math.nan
    if math.isfinite(ms.cp_net_corrected) and math.isfinite(bs.cp_net_corrected) and bs.cp_net_corrected > 0:
        corr = ms.cp_net_corrected / bs.cp_net_corrected - 1.0
    notes = list(det["notes"])
    if fie.kind != "bounded":
        notes.append(f"Fieller set {fie.kind}: the baseline Cp is not significantly above zero")
    return GainStats(
        tsr_setpoint=tsr, flow_setpoint_m_s=u, mode=mode, gain=fie.gain, lo=fie.lo, hi=fie.hi,
        kind=fie.kind, delta_lo=dlt.lo, delta_hi=dlt.hi, dof=fie.dof, n_pairs=fie.n_pairs,
        n_blocks=det["n_blocks"], batch_size=det["batch_size"], lag1_autocorr=det["lag1_autocorr"],
        block_test_p=det["block_test_p"], pooled_to_blocks=det["pooled_to_blocks"],
        verdict=fie.verdict, gain_corrected=corr, notes=tuple(notes))
