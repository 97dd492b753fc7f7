"""Test campaigns: a plan of set points and modes, run point by point into one HDF5 file.

A *plan* (TOML, ``schema_version = 1``) lists the set points (TSR, optionally flow speeds), the
modes (one baseline with the flaps neutral, one or more flap schedules each with its phase lead),
the dwell in whole revolutions, the settling criterion, the number of repeats, the order of the
runs and the abort rules.  One *point* is one run of one mode at one set point in one block; a
*block* runs every mode once at one set point.  ``order = "interleaved"`` alternates the mode
order from block to block (A B | B A | A B ...), ``"randomised"`` shuffles each block with the
plan's seed; either way slow drift of flow speed and temperature falls on both modes alike and
the paired analysis cancels it (REFERENCES section 8).

Settling is judged on the per-revolution record: the point is settled at the end of the first
``settling.revolutions`` consecutive whole revolutions whose mean TSR lies within
``settling.band_rel`` of the set point, no later than ``settling.timeout_s``; the next
``run.dwell_revolutions`` revolutions are the point's data.  Each run lasts the timeout plus
the dwell (plus one revolution), so a settled point always has its full dwell.

On the SIL rig the plan's ``[drift]`` section gives the mean flow speed and the water
temperature a seeded random walk from run to run (relative flow steps, temperature steps in
kelvin); the true values used are recorded with each point.

The campaign file (HDF5) holds the plan, profile and schedule texts and a plan hash in its
attributes and one group per point under ``/points``; each point group is flushed when it is
complete and carries ``complete = True`` last.  Running the same plan on an existing file
resumes it: complete points are kept, an incomplete one is deleted and run again.  A file
written for another plan (other hash) is never touched.

The per-point runner is an argument (default :func:`sil_point`, a lockstep SIL run through
:func:`flapctl.runner.run_sil`), so that other backends can run the same campaign code.
"""
from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import json
import logging
import math
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from . import __version__
from .analysis.phase import hydrodynamic_torque, phase_average
from .derived import blockage_ratio_of
from .energy import RevolutionRecord, summarise
from .errors import FlapctlError, ProfileError
from .lead import LeadModel
from .profile import Profile
from .runlog import open_run, revolution_dtype
from .schedule import Schedule
from .schema import choice, load_document, num, read_toml, text

__all__ = [
    "CAMPAIGN_FORMAT", "PHASE_BINS", "PLAN_SCHEMA_VERSION", "CampaignError", "CampaignAborted",
    "Plan", "SetPoints", "ModeSpec", "RunSettings", "Settling", "AbortRules", "Drift",
    "AnalysisSettings", "PointSpec", "PointData", "CampaignSummary", "load_plan", "parse_plan",
    "plan_hash", "expand_points", "settle_index", "sil_point", "run_campaign",
]

log = logging.getLogger(__name__)

CAMPAIGN_FORMAT = "flapctl-campaign-1"
PLAN_SCHEMA_VERSION = 1
#: Azimuth bins of the phase averages (5 degrees each).
PHASE_BINS = 72


class CampaignError(FlapctlError):
    """A campaign cannot be run or resumed (file of another plan, not a campaign file...)."""


class CampaignAborted(CampaignError):
    """An abort rule of the plan stopped the campaign; the points so far are in the file."""


# ---------------------------------------------------------------------------------------------
# The plan
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True, kw_only=True)
class SetPoints:
    tsr: tuple[float, ...] = ()
    flow_m_s: tuple[float, ...] = ()

    def _validate(self, source: str, prefix: str) -> None:
        if not self.tsr:
            raise ProfileError(source, f"{prefix}.tsr", list(self.tsr), "at least one TSR set point")
        for i, v in enumerate(self.tsr):
            if not 0.1 <= v <= 10.0:
                raise ProfileError(source, f"{prefix}.tsr[{i}]", v, "a TSR from 0.1 to 10")
        for i, v in enumerate(self.flow_m_s):
            if not 0.01 <= v <= 50.0:
                raise ProfileError(source, f"{prefix}.flow_m_s[{i}]", v, "a flow speed from 0.01 to 50 m/s")


@dataclass(frozen=True, kw_only=True)
class ModeSpec:
    name: str = text(doc="short mode name, used in tables and plots")
    kind: str = choice("baseline", "schedule", doc="baseline = flaps neutral")
    schedule: str | None = text(default=None, doc="schedule file, relative to the plan file")
    lead_mode: str | None = choice("none", "angle", "dead_time", default=None,
                                   doc="phase lead; default: the profile's [control]")
    lead_deg: float = num(-90.0, 90.0, default=0.0)
    lead_dead_time_s: float = num(0.0, 1.0, default=0.0)

    def _validate(self, source: str, prefix: str) -> None:
        if self.kind == "schedule" and self.schedule is None:
            raise ProfileError(source, f"{prefix}.schedule", "<missing>", "a schedule file for kind = 'schedule'")
        if self.kind == "baseline" and self.schedule is not None:
            raise ProfileError(source, f"{prefix}.schedule", self.schedule,
                               "no schedule for kind = 'baseline' (flaps neutral)")
        if not self.name.replace("-", "").replace("_", "").isalnum():
            raise ProfileError(source, f"{prefix}.name", self.name, "letters, digits, '-' and '_' only")


@dataclass(frozen=True, kw_only=True)
class RunSettings:
    dwell_revolutions: int = num(2, 100000, doc="whole revolutions recorded per point")
    repeats: int = num(1, 1000, default=1, doc="blocks per set point")
    order: str = choice("interleaved", "randomised", default="interleaved")
    seed: int = num(0, 2**31 - 1, default=1, doc="seeds the order, the drift and the SIL runs")


@dataclass(frozen=True, kw_only=True)
class Settling:
    band_rel: float = num(0.0, 0.5, lo_open=True, default=0.02, doc="mean TSR within this fraction")
    revolutions: int = num(1, 1000, default=3, doc="consecutive revolutions in the band")
    timeout_s: float = num(0.0, 3600.0, lo_open=True, default=10.0)


@dataclass(frozen=True, kw_only=True)
class AbortRules:
    on_trip: str = choice("stop", "skip", default="stop", doc="stop the campaign or skip the point")
    on_unsettled: str = choice("stop", "skip", "keep", default="skip",
                               doc="keep = use the revolutions after the timeout, flagged")


@dataclass(frozen=True, kw_only=True)
class Drift:
    flow_step_rel: float = num(0.0, 0.2, default=0.0, doc="std of the relative flow step per run (SIL)")
    temperature_step_c: float = num(0.0, 5.0, default=0.0, doc="std of the temperature step per run (SIL)")


@dataclass(frozen=True, kw_only=True)
class AnalysisSettings:
    level: float = num(0.5, 0.999, default=0.95, doc="coverage probability of the intervals")
    actuator_uncertainty_rel: float = num(0.0, 1.0, default=0.02,
                                          doc="type-B relative standard uncertainty of servo power")
    tsr_bin_width: float = num(0.01, 1.0, default=0.1)


@dataclass(frozen=True, kw_only=True)
class Plan:
    schema_version: int
    name: str = text()
    description: str = text(default="", nonempty=False)
    setpoints: SetPoints = None  # type: ignore[assignment]
    modes: tuple[ModeSpec, ...] = ()
    run: RunSettings = None  # type: ignore[assignment]
    settling: Settling = field(default_factory=Settling)
    abort: AbortRules = field(default_factory=AbortRules)
    drift: Drift = field(default_factory=Drift)
    analysis: AnalysisSettings = field(default_factory=AnalysisSettings)
    source: str = field(default="<memory>", compare=False, init=False)
    text: str = field(default="", compare=False, repr=False, init=False)

    def _validate(self, source: str, prefix: str) -> None:
        for key in ("setpoints", "run"):
            if getattr(self, key) is None:
                raise ProfileError(source, key, "<missing>", f"a [{key}] table")
        baselines = [m for m in self.modes if m.kind == "baseline"]
        if len(baselines) != 1:
            raise ProfileError(source, "modes", f"{len(baselines)} baseline modes",
                               "exactly one [[modes]] entry with kind = 'baseline'")
        if len(self.modes) < 2:
            raise ProfileError(source, "modes", f"{len(self.modes)} modes",
                               "a baseline and at least one schedule mode")
        names = [m.name for m in self.modes]
        for i, n in enumerate(names):
            if n in names[:i]:
                raise ProfileError(source, f"modes[{i}].name", n, "a mode name used once")

    @property
    def baseline(self) -> ModeSpec:
        return next(m for m in self.modes if m.kind == "baseline")


def parse_plan(data: dict, source: str = "<memory>", text_: str = "") -> Plan:
    """Validate an already-parsed plan mapping."""
    return load_document(Plan, data, source, text_, PLAN_SCHEMA_VERSION, "plan")


def load_plan(path: str | Path) -> Plan:
    """Read and validate a campaign plan file."""
    data, raw = read_toml(path)
    return parse_plan(data, str(path), raw)


def _load_schedules(plan: Plan, profile: Profile) -> dict[str, Schedule]:
    base_dir = Path(plan.source).parent if plan.source != "<memory>" else Path.cwd()
    out = {}
    for i, m in enumerate(plan.modes):
        if m.kind == "baseline":
            out[m.name] = Schedule.neutral(profile.blades)
            continue
        path = Path(m.schedule)
        if not path.is_absolute():
            path = base_dir / path
        if not path.exists():
            raise ProfileError(plan.source, f"modes[{i}].schedule", m.schedule,
                               f"an existing schedule file (looked at {path})")
        sched = Schedule.load(path, profile.blades)
        sched.check_travel([s.travel_deg for s in profile.servos])
        out[m.name] = sched
    return out


def _lead_of(mode: ModeSpec, profile: Profile) -> LeadModel:
    if mode.lead_mode is None:
        return LeadModel.from_control(profile.control)
    return LeadModel(mode.lead_mode, mode.lead_deg, mode.lead_dead_time_s)


def plan_hash(plan: Plan, profile: Profile, schedules: dict[str, Schedule]) -> str:
    """SHA-256 of the plan, profile and schedule texts: identifies the campaign for resuming."""
    h = hashlib.sha256()
    for part in [plan.text, profile.text] + [schedules[k].text for k in sorted(schedules)]:
        h.update(part.encode("utf-8"))
        h.update(b"\0")
    return h.hexdigest()


# ---------------------------------------------------------------------------------------------
# Points
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class PointSpec:
    """One run of the campaign: set point, mode, place in the order, the true conditions."""
    index: int
    tsr: float
    flow_setpoint_m_s: float
    mode: str
    block: int
    order_in_block: int
    repeat: int
    seed: int
    flow_true_m_s: float
    temperature_true_c: float
    duration_s: float

    @property
    def name(self) -> str:
        return f"p{self.index:04d}"

    @property
    def label(self) -> str:
        return f"TSR {self.tsr:g} U {self.flow_setpoint_m_s:g} m/s {self.mode} block {self.block}"


def expand_points(plan: Plan, profile: Profile) -> list[PointSpec]:
    """The campaign's runs in execution order, with the drift walk (deterministic for the seed)."""
    rng = np.random.default_rng(plan.run.seed)
    flows = plan.setpoints.flow_m_s or (profile.fluid.design_speed_m_s,)
    modes = [m.name for m in plan.modes]
    reps = plan.run.repeats
    settle = plan.settling
    g = profile.geometry
    walk_u = 0.0
    walk_t = 0.0
    points = []
    block = 0
    for u in flows:
        for tsr in plan.setpoints.tsr:
            rev_s = 2.0 * math.pi * g.radius_m / (tsr * u)
            duration = settle.timeout_s + (plan.run.dwell_revolutions + 1.5) * rev_s
            for r in range(reps):
                if plan.run.order == "interleaved":
                    order = modes if block % 2 == 0 else modes[::-1]
                else:
                    order = [modes[i] for i in rng.permutation(len(modes))]
                for j, name in enumerate(order):
                    walk_u += plan.drift.flow_step_rel * float(rng.standard_normal())
                    walk_t += plan.drift.temperature_step_c * float(rng.standard_normal())
                    idx = len(points)
                    points.append(PointSpec(
                        index=idx, tsr=float(tsr), flow_setpoint_m_s=float(u), mode=name,
                        block=block, order_in_block=j, repeat=r,
                        seed=(plan.run.seed * 7919 + 101 * idx) % (2**31 - 1000),
                        flow_true_m_s=float(u) * (1.0 + walk_u),
                        temperature_true_c=profile.fluid.temperature_c + walk_t,
                        duration_s=duration))
                block += 1
    return points


@dataclass
class PointData:
    """What a per-point runner returns.

    ``revolutions``: every whole revolution of the run (energy ledger); ``thrust_n``: mean
    streamwise force per revolution when the rig measures it (None otherwise); ``ticks``: the
    per-tick table of the run log (:func:`flapctl.runlog.tick_dtype`); ``state``: the
    supervisor state at the end (name); ``trips``: (t_s, reason, detail) of every trip.
    """
    revolutions: list[RevolutionRecord]
    thrust_n: np.ndarray | None
    ticks: np.ndarray
    state: str
    trips: list[tuple[float, str, str]]
    servo_power_estimated: bool


PointRunner = Callable[[Profile, Schedule, PointSpec, LeadModel, Callable[[float], None] | None],
                       PointData]


def sil_point(profile: Profile, schedule: Schedule, spec: PointSpec, lead: LeadModel,
              progress: Callable[[float], None] | None) -> PointData:
    """Run one point as a lockstep SIL run (:func:`flapctl.runner.run_sil`) and read its log back.

    ``thrust_n``: the mean streamwise force of each whole revolution from the log's
    ``thrust_n`` column (the SIL rig reports it like a streamwise load cell); None when the log
    has no finite thrust.
    """
    from .runner import run_sil

    with tempfile.TemporaryDirectory(prefix="flapctl-point-") as tmp:
        out = Path(tmp) / f"{spec.name}.h5"
        outcome = run_sil(profile, schedule, tsr=spec.tsr, duration_s=spec.duration_s, out=out,
                          flow_m_s=spec.flow_true_m_s, settle_s=0.0, lead=lead, seed=spec.seed,
                          progress=progress, label=spec.label)
        run = open_run(out)
    recs = list(outcome.controller.ledger.records)
    thrust = _revolution_means(run.ticks, recs, "thrust_n")
    return PointData(revolutions=recs, thrust_n=thrust, ticks=run.ticks, state=outcome.state.name,
                     trips=[(float(t), str(r), str(d)) for t, r, d in outcome.trips],
                     servo_power_estimated=outcome.controller.ledger.servo_power_estimated)


def _revolution_means(ticks: np.ndarray, recs: list[RevolutionRecord], field: str) -> np.ndarray | None:
    """Mean of a tick column over each whole revolution; None when the column is absent or NaN."""
    if field not in (ticks.dtype.names or ()):
        return None
    t = ticks["t_s"]
    values = ticks[field].astype(float)
    out = []
    for r in recs:
        sel = (t >= r.t_start_s - 1e-9) & (t < r.t_start_s + r.duration_s - 1e-9)
        out.append(float(np.mean(values[sel])) if np.any(sel) else float("nan"))
    arr = np.asarray(out)
    return arr if len(arr) and np.all(np.isfinite(arr)) else None


def settle_index(recs: list[RevolutionRecord], tsr: float, settling: Settling) -> int | None:
    """Index of the first revolution after the settling window, or None if not settled in time."""
    k = settling.revolutions
    run = 0
    for i, r in enumerate(recs):
        ok = math.isfinite(r.mean_tsr) and abs(r.mean_tsr / tsr - 1.0) <= settling.band_rel
        run = run + 1 if ok else 0
        if r.t_start_s + r.duration_s > settling.timeout_s:
            return i + 1 if run >= k else None
        if run >= k:
            return i + 1
    return None


def _with_temperature(profile: Profile, temperature_c: float) -> Profile:
    if temperature_c == profile.fluid.temperature_c:
        return profile
    fluid = dataclasses.replace(profile.fluid, temperature_c=temperature_c)
    p = dataclasses.replace(profile, fluid=fluid)
    object.__setattr__(p, "source", profile.source)
    object.__setattr__(p, "text", profile.text)
    return p


# ---------------------------------------------------------------------------------------------
# Writing the file
# ---------------------------------------------------------------------------------------------

def _rev_rows(recs: list[RevolutionRecord], blades: int) -> np.ndarray:
    return np.array([(r.index, r.t_start_s, r.duration_s, r.mean_speed_rad_s, r.mean_tsr,
                      r.mean_flow_m_s, r.shaft_energy_j, r.servo_energy_j, r.fluid_energy_j,
                      r.cp_gross, r.cp_net) for r in recs], dtype=revolution_dtype(blades))


def _write_phase(grp: h5py.Group, ticks: np.ndarray, t0: float, t1: float, profile: Profile) -> None:
    ph = grp.create_group("phase")
    n = profile.blades
    sel = ticks[(ticks["t_s"] >= t0) & (ticks["t_s"] < t1)] if ticks.size else ticks
    ph.attrs["bins"] = PHASE_BINS
    ph.attrs["torque"] = "hydrodynamic torque Q_meas + J domega/dt versus rotor (blade 0) azimuth"
    ph.attrs["per_blade"] = "flap and servo power versus each blade's own azimuth"
    centres = (np.arange(PHASE_BINS) + 0.5) * 360.0 / PHASE_BINS
    ph.create_dataset("azimuth_deg", data=centres)
    if sel.size < 3:
        nan1, nan2 = np.full(PHASE_BINS, np.nan), np.full((PHASE_BINS, n), np.nan)
        for key, val in (("torque_nm", nan1), ("torque_std_nm", nan1), ("flap_deg", nan2),
                         ("flap_cmd_deg", nan2), ("servo_power_w", nan2)):
            ph.create_dataset(key, data=val)
        return
    qh = hydrodynamic_torque(sel["t_s"], sel["speed_rad_s"], sel["torque_nm"],
                             profile.rotor.inertia_kg_m2)
    pa = phase_average(sel["azimuth_deg"], qh, PHASE_BINS)
    ph.create_dataset("torque_nm", data=pa.mean)
    ph.create_dataset("torque_std_nm", data=pa.std)
    for key in ("flap_deg", "flap_cmd_deg", "servo_power_w"):
        out = np.empty((PHASE_BINS, n))
        for i in range(n):
            own = sel["azimuth_deg"] + i * 360.0 / n
            out[:, i] = phase_average(own, sel[key][:, i], PHASE_BINS).mean
        ph.create_dataset(key, data=out)


def _store_point(f: h5py.File, spec: PointSpec, data: PointData | None, status: str,
                 start: int | None, plan: Plan, profile: Profile, note: str) -> None:
    grp = f["points"].require_group(spec.name)
    grp.attrs["complete"] = False
    for key, val in dataclasses.asdict(spec).items():
        grp.attrs[key] = val
    grp.attrs["status"] = status
    grp.attrs["note"] = note
    n = profile.blades
    if data is None:
        grp.attrs["state"] = ""
        grp.attrs["trips"] = "[]"
        grp.create_dataset("revolutions", data=np.zeros(0, dtype=revolution_dtype(n)))
        grp.create_dataset("used", data=np.zeros(0, dtype=bool))
        grp.attrs["summary"] = "{}"
    else:
        recs = data.revolutions
        used = np.zeros(len(recs), dtype=bool)
        if start is not None:
            used[start:start + plan.run.dwell_revolutions] = True
        grp.create_dataset("revolutions", data=_rev_rows(recs, n))
        grp.create_dataset("used", data=used)
        if data.thrust_n is not None:
            grp.create_dataset("thrust_n", data=np.asarray(data.thrust_n, dtype=float))
        grp.attrs["state"] = data.state
        grp.attrs["trips"] = json.dumps(data.trips)
        grp.attrs["servo_power_estimated"] = data.servo_power_estimated
        dwell = [r for r, u in zip(recs, used) if u]
        s = summarise(dwell, n, data.servo_power_estimated)
        from .runner import summary_dict
        grp.attrs["summary"] = json.dumps(summary_dict(s))
        if dwell:
            t0 = dwell[0].t_start_s
            t1 = dwell[-1].t_start_s + dwell[-1].duration_s
        else:
            t0 = t1 = 0.0
        _write_phase(grp, data.ticks, t0, t1, profile)
    f.flush()
    grp.attrs["complete"] = True
    f.flush()


def _open_campaign(out: Path, plan: Plan, profile: Profile, schedules: dict[str, Schedule],
                   digest: str, total: int) -> h5py.File:
    if out.exists():
        try:
            f = h5py.File(out, "r+")
        except OSError as exc:
            raise CampaignError(f"{out}: exists and is not a readable HDF5 file ({exc}); "
                                "choose another output file") from exc
        if f.attrs.get("format") != CAMPAIGN_FORMAT:
            f.close()
            raise CampaignError(f"{out}: exists and is not a flapctl campaign file; "
                                "choose another output file")
        if f.attrs.get("plan_hash") != digest:
            f.close()
            raise CampaignError(f"{out}: holds another campaign (plan, profile or schedules "
                                "differ); it is never overwritten: choose another output file")
        return f
    out.parent.mkdir(parents=True, exist_ok=True)
    f = h5py.File(out, "x")
    a = f.attrs
    a["format"] = CAMPAIGN_FORMAT
    a["software_version"] = __version__
    a["created_utc"] = _dt.datetime.now(_dt.timezone.utc).isoformat()
    a["plan_hash"] = digest
    a["plan_name"] = plan.name
    a["plan_source"] = plan.source
    a["plan_text"] = plan.text
    a["profile_name"] = profile.name
    a["profile_source"] = profile.source
    a["profile_text"] = profile.text
    a["blades"] = profile.blades
    a["points_total"] = total
    bl = blockage_ratio_of(profile)
    a["blockage_ratio"] = math.nan if bl is None else bl
    a["modes"] = json.dumps([{"name": m.name, "kind": m.kind, "lead": _lead_of(m, profile).describe(),
                              "schedule_source": schedules[m.name].source} for m in plan.modes])
    a["schedules"] = json.dumps({k: {"source": s.source, "text": s.text} for k, s in schedules.items()})
    a["analysis"] = json.dumps(dataclasses.asdict(plan.analysis))
    a["settling"] = json.dumps(dataclasses.asdict(plan.settling))
    a["backend"] = "sim-lockstep"
    f.create_group("points")
    f.flush()
    return f


@dataclass(frozen=True)
class CampaignSummary:
    """What :func:`run_campaign` did: points run now, kept from before, skipped, total."""
    path: Path
    total: int
    ran: tuple[str, ...]
    kept: tuple[str, ...]
    skipped: tuple[str, ...]
    discarded: tuple[str, ...]


CampaignProgress = Callable[[PointSpec, int, float], None]


def run_campaign(plan: Plan, profile: Profile, out_h5: str | Path, *,
                 progress: CampaignProgress | None = None,
                 point_runner: PointRunner = sil_point) -> CampaignSummary:
    """Run (or resume) ``plan`` on ``profile`` and write every point into ``out_h5``.

    ``progress(spec, total, fraction)`` is called during each point (fraction 0..0.99 of the
    run) and with fraction 1.0 once the point is stored.  An exception raised from
    it (or anything else) interrupts the campaign; running again resumes it.
    Raises :class:`CampaignAborted` when an abort rule stops the campaign.
    """
    out = Path(out_h5)
    schedules = _load_schedules(plan, profile)
    digest = plan_hash(plan, profile, schedules)
    points = expand_points(plan, profile)
    modes = {m.name: m for m in plan.modes}
    f = _open_campaign(out, plan, profile, schedules, digest, len(points))
    ran, kept, skipped, discarded = [], [], [], []
    try:
        grp = f["points"]
        for name in list(grp):
            if not bool(grp[name].attrs.get("complete", False)):
                log.info("%s: discarding incomplete point %s", out, name)
                del grp[name]
                discarded.append(name)
        f.flush()
        total = len(points)
        for spec in points:
            if spec.name in grp:
                kept.append(spec.name)
                continue
            mode = modes[spec.mode]
            prof = _with_temperature(profile, spec.temperature_true_c)
            cb = None if progress is None else (lambda x, _s=spec: progress(_s, total, 0.99 * x))
            note = ""
            started = grp.create_group(spec.name)       # marks the point as begun, not complete
            started.attrs["complete"] = False
            started.attrs["status"] = "running"
            f.flush()
            try:
                data = point_runner(prof, schedules[spec.mode], spec, _lead_of(mode, profile), cb)
                error = None
            except FlapctlError as exc:
                data, error = None, exc
            if error is not None or data.trips:
                why = str(error) if error is not None else "; ".join(f"{r}: {d}" for _, r, d in data.trips)
                start = None
                status = "tripped"
                note = why
                _store_point(f, spec, data, status, start, plan, profile, note)
                if plan.abort.on_trip == "stop":
                    raise CampaignAborted(f"{out}: point {spec.name} ({spec.label}) tripped: {why}; "
                                          "campaign stopped (abort.on_trip = 'stop'); fix and run "
                                          "again to resume")
                skipped.append(spec.name)
            else:
                start = settle_index(data.revolutions, spec.tsr, plan.settling)
                status = "ok"
                if start is None:
                    note = (f"not settled within {plan.settling.timeout_s:g} s "
                            f"(band {plan.settling.band_rel:g}, {plan.settling.revolutions} revolutions)")
                    rule = plan.abort.on_unsettled
                    if rule == "keep":
                        status = "unsettled"
                        start = next((i for i, r in enumerate(data.revolutions)
                                      if r.t_start_s >= plan.settling.timeout_s), len(data.revolutions))
                    else:
                        status = "skipped"
                        _store_point(f, spec, data, status, None, plan, profile, note)
                        if rule == "stop":
                            raise CampaignAborted(f"{out}: point {spec.name} ({spec.label}) {note}; "
                                                  "campaign stopped (abort.on_unsettled = 'stop')")
                        skipped.append(spec.name)
                        if progress is not None:
                            progress(spec, total, 1.0)
                        continue
                avail = len(data.revolutions) - start
                if avail < plan.run.dwell_revolutions:
                    note = (note + "; " if note else "") + \
                        f"only {avail} of {plan.run.dwell_revolutions} dwell revolutions"
                _store_point(f, spec, data, status, start, plan, profile, note)
                ran.append(spec.name)
            if progress is not None:
                progress(spec, total, 1.0)
    finally:
        f.close()
    return CampaignSummary(out, len(points), tuple(ran), tuple(kept), tuple(skipped), tuple(discarded))
