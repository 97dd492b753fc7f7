"""Parameter sweeps of lockstep SIL runs on a local process pool or a Dask cluster.

A sweep spec (strict TOML, ``schema_version = 1``) names a rig profile and a flap schedule
(paths relative to the spec file), the base operating point, the run length and the parameters
to vary::

    schema_version = 1
    name = "lead-and-amplitude"
    profile = "../demo_flume_3blade.toml"
    schedule = "../schedules/demo_morph.toml"
    objective = "cp_net"              # maximised; "tracking_rms" is minimised

    [base]                            # every key optional; defaults from the profile
    tsr = 2.5
    flow_m_s = 0.6

    [run]
    revolutions = 20                  # whole revolutions after settling (or seconds = 20.0)
    settle_s = 3.0
    seed = 1
    seeds = "common"                  # every case the same SIL seed, or "per_case"

    [search]
    method = "grid"                   # "random" (n, seed) or "optimize" (n = case budget)

    [vary.lead_dead_time_s]
    min = 0.0
    max = 0.06
    steps = 7
    [vary.amplitude_scale]
    values = [0.5, 1.0, 1.5]

Parameters (:data:`PARAMETERS`): ``lead_deg`` (constant lead angle, deg), ``lead_dead_time_s``
(lead = speed x time, s; both combine as lead = angle + omega tau, :class:`flapctl.lead.LeadModel`),
``amplitude_scale`` (schedule deflections multiplied by this), ``preset_pitch_deg`` (toe-out +)
and ``tsr`` (the brake loop's set point).

One case is one lockstep run (:func:`flapctl.runner.run_sil`) giving one result row: the
parameters, Cp gross and net, shaft and actuator power over whole revolutions after settling,
the tracking error, the mean TSR and speed, and the trips.  Tracking error: the measured flap
minus the scheduled (amplitude-scaled) flap at the blade's measured azimuth, RMS over all
blades and ticks of the whole revolutions (``tracking_rms_deg``, the quantity a lead reduces);
``command_rms_deg`` is commanded minus measured flap over the same ticks.

Results go to ``results.csv`` in the output folder, one flushed row per finished case, after
a header comment holding the SHA-256 of the spec, profile and schedule texts.  A rerun skips
every case whose key is already in the file (resume) and refuses a file made by another spec.
Each case is a pure function of the spec and its parameters (fixed seeds), so the pool and a
Dask cluster give the same table.
"""
from __future__ import annotations

import contextlib
import csv
import functools
import hashlib
import io
import itertools
import json
import logging
import math
import os
import tempfile
import tomllib
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from flapctl.errors import FlapctlError, ProfileError
from flapctl.schema import choice, load_section, num, text

__all__ = [
    "PARAMETERS", "COLUMNS", "RESULTS_NAME", "WORKER_ENV", "VaryRange", "BasePoint", "RunLength", "Search",
    "SweepSpec", "CaseJob", "SweepResult", "load_spec", "case_key", "spec_cases", "scaled_schedule",
    "run_case", "run_sweep", "read_results", "result_figures",
]

log = logging.getLogger(__name__)

_SCHEMA_VERSION = 1
_FORMAT_LINE = "# flapctl sweep results"
_HASH_PREFIX = "# spec_sha256: "
RESULTS_NAME = "results.csv"
_REFERENCE_POINTS = 720          # azimuth samples of the amplitude-scaled schedule (0.5 deg)
_TWO_PI = 2.0 * math.pi

# parameter name -> (low, high, unit text) of the accepted values
PARAMETERS: dict[str, tuple[float, float, str]] = {
    "lead_deg": (-90.0, 90.0, "deg"),
    "lead_dead_time_s": (0.0, 1.0, "s"),
    "amplitude_scale": (0.0, 5.0, "x schedule"),
    "preset_pitch_deg": (-20.0, 20.0, "deg"),
    "tsr": (0.05, 10.0, ""),
}

# result columns and their types, in file order
COLUMNS: tuple[tuple[str, type], ...] = (
    ("key", str), ("tsr", float), ("amplitude_scale", float), ("lead_deg", float),
    ("lead_dead_time_s", float), ("preset_pitch_deg", float), ("seed", int),
    ("revolutions", int), ("mean_tsr", float), ("mean_speed_rad_s", float), ("mean_flow_m_s", float),
    ("cp_gross", float), ("cp_net", float), ("shaft_power_w", float), ("actuator_power_w", float),
    ("tracking_rms_deg", float), ("command_rms_deg", float), ("trips", int), ("trip_reasons", str),
    ("final_state", str),
)
_NAMES = tuple(name for name, _ in COLUMNS)

# set in pool workers before numpy is imported there (BLAS threads oversubscribe small machines)
WORKER_ENV = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


# --------------------------------------------------------------------------- the spec
@dataclass(frozen=True, kw_only=True)
class VaryRange:
    """One varied parameter: explicit ``values``, or ``min``/``max`` (with ``steps`` for a grid)."""

    values: tuple[float, ...] | None = None
    min: float | None = num(default=None)
    max: float | None = num(default=None)
    steps: int | None = num(2, 10000, default=None, doc="grid points from min to max inclusive")

    def _validate(self, source: str, prefix: str) -> None:
        if self.values is not None:
            if self.min is not None or self.max is not None or self.steps is not None:
                raise ProfileError(source, f"{prefix}.values", list(self.values),
                                   "either values = [...] or min/max (and steps), not both")
            if not self.values:
                raise ProfileError(source, f"{prefix}.values", [], "one or more values")
            return
        if self.min is None or self.max is None:
            raise ProfileError(source, f"{prefix}.{'min' if self.min is None else 'max'}", "<missing>",
                               "values = [...] or both min and max")
        if not self.max > self.min:
            raise ProfileError(source, f"{prefix}.max", self.max, f"a number above min = {self.min!r}")


@dataclass(frozen=True, kw_only=True)
class BasePoint:
    """The operating point every case starts from (None: the profile's value)."""

    tsr: float | None = num(0.05, 10.0, default=None, doc="brake set point")
    flow_m_s: float | None = num(0.0, 20.0, lo_open=True, default=None, doc="mean flow speed")
    lead_deg: float | None = num(-90.0, 90.0, default=None)
    lead_dead_time_s: float | None = num(0.0, 1.0, default=None)
    amplitude_scale: float = num(0.0, 5.0, default=1.0)
    preset_pitch_deg: float | None = num(-20.0, 20.0, default=None)


@dataclass(frozen=True, kw_only=True)
class RunLength:
    revolutions: int | None = num(1, 100000, default=None, doc="whole revolutions after settling")
    seconds: float | None = num(0.0, 1e5, lo_open=True, default=None, doc="simulated run length")
    settle_s: float = num(0.0, 1e4, default=3.0, doc="left out of the results")
    seed: int = num(0, 2**31 - 1, default=1)
    seeds: str = choice("common", "per_case", default="common",
                        doc="one SIL seed for all cases (common random numbers) or one per case key")

    def _validate(self, source: str, prefix: str) -> None:
        if (self.revolutions is None) == (self.seconds is None):
            raise ProfileError(source, f"{prefix}.revolutions", self.revolutions,
                               "exactly one of revolutions or seconds")


@dataclass(frozen=True, kw_only=True)
class Search:
    method: str = choice("grid", "random", "optimize", default="grid")
    n: int | None = num(1, 1000000, default=None, doc="random: cases; optimize: case budget")
    seed: int = num(0, 2**31 - 1, default=0)
    algorithm: str = choice("differential-evolution", "nelder-mead", default="differential-evolution")


@dataclass(frozen=True, kw_only=True)
class _SpecFile:
    schema_version: int
    name: str = text()
    profile: str = text()
    schedule: str = text()
    objective: str = choice("cp_net", "tracking_rms", default="cp_net")
    base: BasePoint = field(default_factory=BasePoint)
    run: RunLength | None = None
    search: Search = field(default_factory=Search)
    vary: dict = field(default_factory=dict)


@dataclass(frozen=True)
class SweepSpec:
    """A loaded, checked sweep spec with paths resolved and defaults filled from the profile."""

    source: str
    name: str
    profile_path: str
    schedule_path: str
    objective: str
    base: dict[str, float]                 # every parameter's base value
    flow_m_s: float
    run: RunLength
    search: Search
    vary: dict[str, VaryRange]             # in spec order
    sha256: str

    @property
    def maximise(self) -> bool:
        return self.objective == "cp_net"

    @property
    def objective_column(self) -> str:
        return "cp_net" if self.objective == "cp_net" else "tracking_rms_deg"


def _check_param_value(source: str, key: str, value: float, name: str) -> None:
    lo, hi, unit = PARAMETERS[name]
    if not lo <= value <= hi:
        raise ProfileError(source, key, value, f"a value in [{lo:g}, {hi:g}] {unit}".rstrip())


def load_spec(path: str | Path) -> SweepSpec:
    """Read and check a sweep spec; ProfileError names the file, key path, value and expectation."""
    from flapctl.profile import load_profile
    from flapctl.schedule import Schedule

    src = Path(path)
    source = str(src)
    try:
        raw = src.read_text(encoding="utf-8")
    except OSError as exc:
        raise ProfileError(source, "<file>", source, f"a readable file ({exc.strerror})") from None
    try:
        data = tomllib.loads(raw)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(source, "<syntax>", str(exc), "valid TOML") from None
    version = data.get("schema_version", "<missing>")
    if isinstance(version, bool) or version != _SCHEMA_VERSION:
        raise ProfileError(source, "schema_version", version, f"{_SCHEMA_VERSION} (the only version read)")
    spec = load_section(_SpecFile, data, source)
    if spec.run is None:
        raise ProfileError(source, "run", "<missing>", "a [run] table with revolutions or seconds")
    if not spec.vary:
        raise ProfileError(source, "vary", "<missing>", "a [vary.NAME] table for one or more of "
                           + ", ".join(PARAMETERS))
    vary: dict[str, VaryRange] = {}
    for name, table in spec.vary.items():
        if name not in PARAMETERS:
            raise ProfileError(source, f"vary.{name}", table, "a parameter, one of " + ", ".join(PARAMETERS))
        rng = load_section(VaryRange, table, source, f"vary.{name}")
        points = rng.values if rng.values is not None else (rng.min, rng.max)
        keys = ([f"vary.{name}.values[{j}]" for j in range(len(points))] if rng.values is not None
                else [f"vary.{name}.min", f"vary.{name}.max"])
        for key, value in zip(keys, points):
            _check_param_value(source, key, value, name)
        if spec.search.method == "grid" and rng.values is None and rng.steps is None:
            raise ProfileError(source, f"vary.{name}.steps", "<missing>",
                               "an integer >= 2 (grid points from min to max) for search.method = 'grid'")
        if spec.search.method == "optimize" and rng.values is not None:
            raise ProfileError(source, f"vary.{name}.values", list(rng.values),
                               "min and max (a continuous range) for search.method = 'optimize'")
        vary[name] = rng
    if spec.search.method in ("random", "optimize") and spec.search.n is None:
        raise ProfileError(source, "search.n", "<missing>",
                           "the number of cases (random) or the case budget (optimize)")
    if spec.search.method == "optimize" and spec.search.algorithm == "differential-evolution" \
            and spec.search.n < 10:
        raise ProfileError(source, "search.n", spec.search.n,
                           "a case budget >= 10 for differential evolution (two generations of 5)")
    here = src.resolve().parent
    profile_path = (here / spec.profile).resolve()
    schedule_path = (here / spec.schedule).resolve()
    profile = load_profile(profile_path)
    schedule = Schedule.load(schedule_path, profile.blades)
    c = profile.control
    b = spec.base
    base = {
        "tsr": profile.fluid.design_tsr if b.tsr is None else b.tsr,
        "amplitude_scale": b.amplitude_scale,
        "lead_deg": (c.lead_deg if c.lead_mode in ("angle", "dead_time") else 0.0) if b.lead_deg is None
        else b.lead_deg,
        "lead_dead_time_s": (c.lead_dead_time_s if c.lead_mode == "dead_time" else 0.0)
        if b.lead_dead_time_s is None else b.lead_dead_time_s,
        "preset_pitch_deg": profile.geometry.preset_pitch_deg if b.preset_pitch_deg is None
        else b.preset_pitch_deg,
    }
    flow = profile.fluid.design_speed_m_s if b.flow_m_s is None else b.flow_m_s
    digest = hashlib.sha256()
    digest.update(json.dumps(data, sort_keys=True, default=str).encode())
    digest.update(b"\0" + profile.text.encode())
    digest.update(b"\0" + schedule.text.encode())
    return SweepSpec(source, spec.name, str(profile_path), str(schedule_path), spec.objective, base, flow,
                     spec.run, spec.search, vary, digest.hexdigest())


# --------------------------------------------------------------------------- cases
@dataclass(frozen=True)
class CaseJob:
    """Everything one SIL case needs (plain data, picklable for pool and Dask workers)."""

    key: str
    profile_path: str
    schedule_path: str
    tsr: float
    amplitude_scale: float
    lead_deg: float
    lead_dead_time_s: float
    preset_pitch_deg: float
    flow_m_s: float
    revolutions: int | None
    seconds: float | None
    settle_s: float
    seed: int


def _round(value: float) -> float:
    """Parameter values are kept to 10 significant digits so keys read back exactly."""
    return float(f"{float(value):.10g}")


def case_key(params: Mapping[str, float], names: Sequence[str]) -> str:
    """``name=value;...`` over the varied parameters, values as Python float repr."""
    return ";".join(f"{n}={_round(params[n])!r}" for n in names)


def _job(spec: SweepSpec, params: Mapping[str, float]) -> CaseJob:
    values = dict(spec.base)
    values.update({k: _round(v) for k, v in params.items()})
    key = case_key(values, list(spec.vary))
    if spec.run.seeds == "common":
        seed = spec.run.seed
    else:
        seed = int(hashlib.sha256(f"{spec.run.seed}:{key}".encode()).hexdigest()[:8], 16) % (2**31 - 1)
    return CaseJob(key, spec.profile_path, spec.schedule_path, values["tsr"], values["amplitude_scale"],
                   values["lead_deg"], values["lead_dead_time_s"], values["preset_pitch_deg"], spec.flow_m_s,
                   spec.run.revolutions, spec.run.seconds, spec.run.settle_s, seed)


def _grid_values(rng: VaryRange) -> list[float]:
    if rng.values is not None:
        return [float(v) for v in rng.values]
    return [_round(v) for v in np.linspace(rng.min, rng.max, rng.steps)]


def spec_cases(spec: SweepSpec) -> list[CaseJob]:
    """The cases of a grid or random search, in a fixed order, without duplicate keys."""
    names = list(spec.vary)
    if spec.search.method == "grid":
        combos = itertools.product(*(_grid_values(spec.vary[n]) for n in names))
        points = [dict(zip(names, c)) for c in combos]
    elif spec.search.method == "random":
        rng = np.random.default_rng(spec.search.seed)
        points = []
        for _ in range(spec.search.n):
            p = {}
            for n in names:
                r = spec.vary[n]
                if r.values is not None:
                    p[n] = float(r.values[int(rng.integers(len(r.values)))])
                else:
                    p[n] = _round(float(rng.uniform(r.min, r.max)))
            points.append(p)
    else:
        raise ProfileError(spec.source, "search.method", spec.search.method,
                           "'grid' or 'random' (an optimisation chooses its cases as it goes)")
    jobs, seen = [], set()
    for p in points:
        job = _job(spec, p)
        if job.key not in seen:
            seen.add(job.key)
            jobs.append(job)
    return jobs


# --------------------------------------------------------------------------- one case
@functools.lru_cache(maxsize=8)
def _inputs(profile_path: str, schedule_path: str):
    from flapctl.profile import load_profile
    from flapctl.schedule import Schedule
    profile = load_profile(profile_path)
    return profile, Schedule.load(schedule_path, profile.blades)


def _with_pitch(profile, pitch_deg: float):
    if pitch_deg == profile.geometry.preset_pitch_deg:
        return profile
    new = replace(profile, geometry=replace(profile.geometry, preset_pitch_deg=pitch_deg))
    object.__setattr__(new, "source", profile.source)     # init=False fields are not copied
    object.__setattr__(new, "text", profile.text)
    return new


def scaled_schedule(schedule, amplitude_scale: float, tsr: float):
    """The schedule at ``tsr`` (if it has a TSR axis) times ``amplitude_scale``, as a linear table.

    Sampled on 720 azimuth points (0.5 deg); for a first-harmonic schedule of 8 deg the linear
    interpolation error is below 1e-4 deg.
    """
    from flapctl.schedule import Schedule
    theta = np.arange(_REFERENCE_POINTS) * (_TWO_PI / _REFERENCE_POINTS)
    at = tsr if schedule.tsr_axis is not None else None
    flap = [(schedule.evaluate(theta, b, at) * amplitude_scale).tolist() for b in range(schedule.blades)]
    az = (np.arange(_REFERENCE_POINTS) * (360.0 / _REFERENCE_POINTS)).tolist()
    return Schedule.from_arrays(az, flap, schedule.blades,
                                source=f"{schedule.source} x {amplitude_scale:g} at TSR {tsr:g}")


def run_case(job: CaseJob) -> dict[str, Any]:
    """One lockstep SIL run -> one result row (a dict over :data:`COLUMNS`)."""
    from flapctl.energy import summarise
    from flapctl.lead import LeadModel
    from flapctl.runlog import open_run
    from flapctl.runner import run_sil, settle_revolutions
    from flapctl.supervisor import State

    base_profile, base_schedule = _inputs(job.profile_path, job.schedule_path)
    profile = _with_pitch(base_profile, job.preset_pitch_deg)
    schedule = scaled_schedule(base_schedule, job.amplitude_scale, job.tsr)
    lead = LeadModel("dead_time", angle_deg=job.lead_deg, dead_time_s=job.lead_dead_time_s)
    rev_s = _TWO_PI * profile.geometry.radius_m / (job.tsr * job.flow_m_s)
    skip = settle_revolutions(profile, job.tsr, job.flow_m_s, job.settle_s)
    duration = job.seconds if job.seconds is not None else (skip + job.revolutions + 1.25) * rev_s
    with tempfile.TemporaryDirectory(prefix="flapctl-case-") as tmp:
        out = run_sil(profile, schedule, tsr=job.tsr, duration_s=duration, out=Path(tmp) / "case.h5",
                      flow_m_s=job.flow_m_s, settle_s=job.settle_s, lead=lead, seed=job.seed, label=job.key)
        ticks = open_run(out.path).ticks
    records = out.controller.ledger.records[skip:]
    if job.revolutions is not None:
        records = records[:job.revolutions]
    summary = summarise(records, profile.blades, out.summary.servo_power_estimated)
    tracking = command = math.nan
    if records:
        dt = 1.0 / profile.control.rate_hz
        t0 = records[0].t_start_s
        t1 = records[-1].t_start_s + records[-1].duration_s - 0.5 * dt
        sel = ticks[(ticks["t_s"] >= t0) & (ticks["t_s"] < t1) & (ticks["state"] == int(State.RUNNING))]
        if sel.size:
            theta = np.radians(sel["azimuth_deg"])
            n = profile.blades
            ref = np.stack([schedule.evaluate(theta + i * _TWO_PI / n, i) for i in range(n)], axis=1)
            meas = sel["flap_deg"]
            tracking = float(np.sqrt(np.mean((meas - ref) ** 2)))
            command = float(np.sqrt(np.mean((sel["flap_cmd_deg"] - meas) ** 2)))
    return {
        "key": job.key, "tsr": job.tsr, "amplitude_scale": job.amplitude_scale, "lead_deg": job.lead_deg,
        "lead_dead_time_s": job.lead_dead_time_s, "preset_pitch_deg": job.preset_pitch_deg, "seed": job.seed,
        "revolutions": summary.revolutions, "mean_tsr": summary.mean_tsr,
        "mean_speed_rad_s": summary.mean_speed_rad_s, "mean_flow_m_s": summary.mean_flow_m_s,
        "cp_gross": summary.cp_gross, "cp_net": summary.cp_net, "shaft_power_w": summary.shaft_power_w,
        "actuator_power_w": summary.actuator_power_w, "tracking_rms_deg": tracking,
        "command_rms_deg": command, "trips": len(out.trips),
        "trip_reasons": "|".join(str(t[1]) for t in out.trips), "final_state": out.state.name,
    }


# --------------------------------------------------------------------------- the results file
def _format(value: Any) -> str:
    if isinstance(value, float):
        return repr(value)
    return str(value)


def _parse_row(values: list[str], source: str, line: int) -> dict[str, Any]:
    row: dict[str, Any] = {}
    for (name, tp), cell in zip(COLUMNS, values):
        try:
            row[name] = tp(cell)
        except ValueError:
            raise ProfileError(source, f"row {line}, column {name}", cell, f"a {tp.__name__}") from None
    return row


def read_results(path: str | Path, sha256: str | None = None) -> list[dict[str, Any]]:
    """Rows of a results file (a torn last line from a killed writer is dropped).

    With ``sha256`` given, a file written for another spec raises ProfileError.
    """
    src = str(path)
    text_ = Path(path).read_text(encoding="utf-8")
    lines = text_.split("\n")
    if not text_.endswith("\n"):
        lines = lines[:-1]          # torn last line
    if not lines or lines[0] != _FORMAT_LINE:
        raise ProfileError(src, "line 1", lines[0] if lines else "", f"{_FORMAT_LINE!r} (a flapctl sweep file)")
    found = lines[1][len(_HASH_PREFIX):] if len(lines) > 1 and lines[1].startswith(_HASH_PREFIX) else "<missing>"
    if sha256 is not None and found != sha256:
        raise ProfileError(src, "spec_sha256", found,
                           f"{sha256} (this spec); the file holds results of another spec, profile or "
                           "schedule: use another --out-dir")
    rows = []
    header_seen = False
    for number, line in enumerate(lines, start=1):
        if not line or line.startswith("#"):
            continue
        values = next(csv.reader([line]))
        if not header_seen:
            if tuple(values) != _NAMES:
                raise ProfileError(src, f"row {number} (header)", line, ",".join(_NAMES))
            header_seen = True
            continue
        if len(values) != len(COLUMNS):
            raise ProfileError(src, f"row {number}", line, f"{len(COLUMNS)} comma-separated values")
        rows.append(_parse_row(values, src, number))
    return rows


class _ResultsFile:
    """Appends one flushed CSV row per finished case."""

    def __init__(self, path: Path, spec: SweepSpec) -> None:
        self.path = path
        self.rows: dict[str, dict[str, Any]] = {}
        if path.exists():
            raw = path.read_bytes()
            if raw and not raw.endswith(b"\n"):           # a torn row from a killed writer
                with open(path, "r+b") as fh:
                    fh.truncate(raw.rfind(b"\n") + 1)
                log.warning("%s: dropped a torn last line", path)
            for row in read_results(path, spec.sha256):
                self.rows[row["key"]] = row
            self._fh = open(path, "a", encoding="utf-8", newline="")
        else:
            path.parent.mkdir(parents=True, exist_ok=True)
            self._fh = open(path, "x", encoding="utf-8", newline="")
            self._fh.write(f"{_FORMAT_LINE}\n{_HASH_PREFIX}{spec.sha256}\n# spec: {spec.name} "
                           f"({Path(spec.source).name}); objective {spec.objective}\n")
            self._write(list(_NAMES))
        self._fh.flush()

    def _write(self, cells: list[str]) -> None:
        buf = io.StringIO()
        csv.writer(buf, lineterminator="\n").writerow(cells)
        self._fh.write(buf.getvalue())

    def add(self, row: dict[str, Any]) -> None:
        self._write([_format(row[n]) for n in _NAMES])
        self._fh.flush()
        os.fsync(self._fh.fileno())
        self.rows[row["key"]] = row

    def close(self) -> None:
        self._fh.close()


# --------------------------------------------------------------------------- executors
@contextlib.contextmanager
def _worker_environment() -> Iterator[None]:
    """WORKER_ENV in os.environ while the pool lives: spawned workers inherit it before numpy loads."""
    saved = {k: os.environ.get(k) for k in WORKER_ENV}
    os.environ.update(WORKER_ENV)
    try:
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def _worker_init() -> None:
    for k, v in WORKER_ENV.items():
        os.environ.setdefault(k, v)
    logging.basicConfig(level=logging.WARNING)


class _PoolBackend:
    """A local ProcessPoolExecutor with the "spawn" context."""

    def __init__(self, workers: int) -> None:
        self.workers = workers

    def __enter__(self) -> "_PoolBackend":
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor
        self._env = _worker_environment()
        self._env.__enter__()
        self._ex = ProcessPoolExecutor(self.workers, mp_context=multiprocessing.get_context("spawn"),
                                       initializer=_worker_init)
        return self

    def run(self, jobs: Sequence[CaseJob]) -> Iterator[tuple[CaseJob, dict[str, Any]]]:
        from concurrent.futures import as_completed
        futures = {self._ex.submit(run_case, j): j for j in jobs}
        try:
            for fut in as_completed(futures):
                yield futures[fut], fut.result()
        finally:
            for fut in futures:
                fut.cancel()

    def __exit__(self, *exc: object) -> None:
        try:
            self._ex.shutdown(wait=True, cancel_futures=True)
        finally:
            self._env.__exit__(None, None, None)


class _DaskBackend:
    """A dask.distributed cluster at ``address``: one case per task, at most ``in_flight`` queued."""

    def __init__(self, address: str, in_flight: int | None, tag: str) -> None:
        self.address = address
        self.in_flight = in_flight
        self.tag = tag

    def __enter__(self) -> "_DaskBackend":
        try:
            from distributed import Client
        except ImportError:
            raise FlapctlError("--scheduler needs the optional packages dask and distributed "
                               "(pip install 'flapctl[sweep]')") from None
        try:
            self._client = Client(self.address, timeout="15s", set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise FlapctlError(f"cannot reach the Dask scheduler at {self.address}: {exc}") from None
        return self

    def run(self, jobs: Sequence[CaseJob]) -> Iterator[tuple[CaseJob, dict[str, Any]]]:
        from distributed import as_completed
        pending = iter(jobs)
        limit = self.in_flight or len(jobs)
        owner: dict[str, CaseJob] = {}

        def submit(job: CaseJob):
            name = hashlib.sha256(f"{self.tag}:{job.key}".encode()).hexdigest()[:24]
            fut = self._client.submit(run_case, job, key=f"flapctl-case-{name}", pure=False)
            owner[fut.key] = job
            return fut

        first = [submit(j) for j in itertools.islice(pending, limit)]
        queue = as_completed(first, loop=self._client.loop)
        live = set(first)
        try:
            for fut in queue:
                live.discard(fut)
                row = fut.result()
                fut.release()
                nxt = next(pending, None)
                if nxt is not None:
                    new = submit(nxt)
                    live.add(new)
                    queue.add(new)
                yield owner[fut.key], row
        finally:
            if live:
                self._client.cancel(list(live))

    def __exit__(self, *exc: object) -> None:
        self._client.close()


# --------------------------------------------------------------------------- the sweep
@dataclass
class SweepResult:
    """Outcome of :func:`run_sweep`: rows sorted by key, counts, the best row and the plots."""

    csv_path: Path
    rows: list[dict[str, Any]]
    ran: int
    reused: int
    best: dict[str, Any] | None
    plots: list[Path]
    spec: SweepSpec


class _Evaluator:
    """Runs cases not yet in the results file, appends their rows and reports progress."""

    def __init__(self, spec: SweepSpec, results: _ResultsFile, backend, total: int,
                 progress: Callable[[float], None] | None) -> None:
        self.spec = spec
        self.results = results
        self.backend = backend
        self.total = max(total, 1)
        self.progress = progress
        self.done = 0
        self.ran = 0
        self.reused = 0

    def _tick(self) -> None:
        self.done += 1
        if self.progress is not None:
            self.progress(min(self.done / self.total, 1.0))

    def evaluate(self, jobs: Sequence[CaseJob]) -> list[dict[str, Any]]:
        missing, seen = [], set()
        for j in jobs:
            if j.key in self.results.rows:
                self.reused += 1
                self._tick()
            elif j.key not in seen:
                seen.add(j.key)
                missing.append(j)
        for _job_done, row in self.backend.run(missing) if missing else ():
            self.results.add(row)
            self.ran += 1
            self._tick()
        return [self.results.rows[j.key] for j in jobs]

    def cost(self, row: Mapping[str, Any]) -> float:
        value = float(row[self.spec.objective_column])
        if not math.isfinite(value):
            return 1e6
        return -value if self.spec.maximise else value


def _optimise(spec: SweepSpec, ev: _Evaluator) -> None:
    from scipy.optimize import differential_evolution, minimize

    names = list(spec.vary)
    lo = np.array([spec.vary[n].min for n in names])
    hi = np.array([spec.vary[n].max for n in names])
    budget = spec.search.n

    def params(x: np.ndarray) -> dict[str, float]:
        u = np.clip(np.asarray(x, dtype=float), 0.0, 1.0)
        return {n: _round(v) for n, v in zip(names, lo + u * (hi - lo))}

    if spec.search.algorithm == "nelder-mead":
        count = [0]

        def f(x: np.ndarray) -> float:
            count[0] += 1
            return ev.cost(ev.evaluate([_job(spec, params(x))])[0])
        minimize(f, np.full(len(names), 0.5), method="Nelder-Mead", bounds=[(0.0, 1.0)] * len(names),
                 options={"maxfev": budget, "xatol": 1e-3, "fatol": 1e-6})
        return
    dim = len(names)
    multiplier = max(1, min(15, budget // (4 * dim)))
    population = max(5, multiplier * dim)
    generations = max(1, budget // population - 1)

    def batch(_func: object, xs: Iterable[np.ndarray]) -> list[float]:
        rows = ev.evaluate([_job(spec, params(x)) for x in xs])
        return [ev.cost(r) for r in rows]

    differential_evolution(lambda x: 0.0, [(0.0, 1.0)] * dim, maxiter=generations, popsize=multiplier,
                           seed=spec.search.seed, polish=False, updating="deferred", workers=batch,
                           init="latinhypercube", tol=0.0)


def run_sweep(spec: SweepSpec | str | Path, out_dir: str | Path, *, workers: int | None = None,
              scheduler: str | None = None, progress: Callable[[float], None] | None = None,
              plots: bool = True) -> SweepResult:
    """Run (or resume) a sweep; ``scheduler`` "tcp://HOST:PORT" runs the cases on a Dask cluster.

    ``workers``: pool processes (default: the CPU count), or with Dask the most cases queued at
    once (default: all).  ``progress`` is
    called with the finished fraction after each case (its row is on disk by then).
    """
    if not isinstance(spec, SweepSpec):
        spec = load_spec(spec)
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise ProfileError("command line", "--workers", workers, "an integer >= 1")
    out = Path(out_dir)
    results = _ResultsFile(out / RESULTS_NAME, spec)
    reused_before = len(results.rows)
    try:
        backend = (_DaskBackend(scheduler, workers, spec.sha256) if scheduler
                   else _PoolBackend(workers or os.cpu_count() or 1))
        jobs = spec_cases(spec) if spec.search.method != "optimize" else []
        total = len(jobs) if jobs else spec.search.n
        ev = _Evaluator(spec, results, backend, total, progress)
        if spec.search.method != "optimize" and all(j.key in results.rows for j in jobs):
            ev.evaluate(jobs)                 # all done already: no workers needed
        else:
            with backend:
                if spec.search.method == "optimize":
                    _optimise(spec, ev)
                else:
                    ev.evaluate(jobs)
    finally:
        results.close()
    rows = sorted(results.rows.values(), key=lambda r: r["key"])
    col = spec.objective_column
    finite = [r for r in rows if math.isfinite(r[col])]
    best = (max if spec.maximise else min)(finite, key=lambda r: r[col]) if finite else None
    paths = []
    if plots and rows:
        for name, fig in result_figures(spec, rows).items():
            path = out / name
            fig.savefig(path, dpi=100)
            paths.append(path)
    log.info("sweep %s: %d cases run, %d reused from %s", spec.name, ev.ran, reused_before, results.path)
    return SweepResult(results.path, rows, ev.ran, ev.reused, best, paths, spec)


# --------------------------------------------------------------------------- plots
def result_figures(spec: SweepSpec, rows: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """Figures (matplotlib Figure, not shown) named by their PNG file name.

    * ``cp_net_vs_lead.png`` when a lead is varied: Cp net against the lead, one line per value
      of the other varied parameters;
    * ``tracking_vs_speed.png``: RMS tracking error against the mean rotor speed;
    * ``objective_vs_parameters.png``: the objective against each varied parameter.
    """
    from matplotlib.figure import Figure

    names = list(spec.vary)
    figs: dict[str, Any] = {}
    leads = [n for n in ("lead_dead_time_s", "lead_deg") if n in names]
    if leads:
        lead = leads[0]
        scale = 1e3 if lead == "lead_dead_time_s" else 1.0
        others = [n for n in names if n != lead]
        fig = Figure(figsize=(7.0, 4.5))
        ax = fig.subplots()
        groups: dict[tuple, list] = {}
        for r in rows:
            groups.setdefault(tuple(r[n] for n in others), []).append(r)
        for gkey, grp in sorted(groups.items()):
            grp = sorted(grp, key=lambda r: r[lead])
            label = ", ".join(f"{n} {v:g}" for n, v in zip(others, gkey)) or None
            ax.plot([r[lead] * scale for r in grp], [r["cp_net"] for r in grp],
                    "o-" if spec.search.method == "grid" else "o", ms=3, label=label)
        ax.set_xlabel("lead dead time (ms)" if lead == "lead_dead_time_s" else "lead angle (deg)")
        ax.set_ylabel("Cp net")
        ax.set_title(f"{spec.name}: Cp net versus lead", fontsize=10)
        ax.grid(alpha=0.3)
        if len(groups) > 1 and len(groups) <= 12:
            ax.legend(fontsize=7)
        fig.tight_layout()
        figs["cp_net_vs_lead.png"] = fig
    fig = Figure(figsize=(7.0, 4.5))
    ax = fig.subplots()
    colour_by = leads[0] if leads else names[0]
    sc = ax.scatter([r["mean_speed_rad_s"] for r in rows], [r["tracking_rms_deg"] for r in rows],
                    c=[r[colour_by] for r in rows], s=14, cmap="viridis")
    fig.colorbar(sc, ax=ax, label=colour_by)
    ax.set_xlabel("mean rotor speed (rad/s)")
    ax.set_ylabel("RMS tracking error (deg)")
    ax.set_title(f"{spec.name}: flap tracking error versus rotor speed", fontsize=10)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    figs["tracking_vs_speed.png"] = fig
    col = spec.objective_column
    fig = Figure(figsize=(4.0 * len(names) + 1.0, 4.0))
    axes = np.atleast_1d(fig.subplots(1, len(names), squeeze=False)[0])
    for ax, n in zip(axes, names):
        ax.plot([r[n] for r in rows], [r[col] for r in rows], "o", ms=3)
        ax.set_xlabel(n)
        ax.set_ylabel(col)
        ax.grid(alpha=0.3)
    fig.suptitle(f"{spec.name}: {col} ({'maximised' if spec.maximise else 'minimised'})", fontsize=10)
    fig.tight_layout()
    figs["objective_vs_parameters.png"] = fig
    return figs

