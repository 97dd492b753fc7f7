"""Parameter sweeps: spec checking, pool and Dask giving the same table, resume, optimisation.

The 50-case sweep uses very short cases (one whole revolution, no settling) on the demo flume
rig run at a 500 Hz tick, so that the whole file stays well under a minute on 2 cores.
"""
from __future__ import annotations

import math
import shutil
from pathlib import Path

import numpy as np
import pytest

from flapctl.errors import ProfileError
from flapctl.tune.sweep import (COLUMNS, RESULTS_NAME, load_spec, read_results, run_sweep,
                                spec_cases)

ROOT = Path(__file__).resolve().parent.parent
PROFILE = ROOT / "hw_profiles" / "demo_flume_3blade.toml"
SCHEDULE = ROOT / "hw_profiles" / "schedules" / "demo_morph.toml"

SPEC_50 = """\
schema_version = 1
name = "fifty"
profile = "{profile}"
schedule = "{schedule}"
objective = "cp_net"
[base]
tsr = 2.5
lead_deg = 0.0
[run]
revolutions = 1
settle_s = 0.0
seed = 3
[search]
method = "grid"
[vary.lead_dead_time_s]
min = 0.0
max = 0.06
steps = 10
[vary.amplitude_scale]
values = [0.5, 0.75, 1.0, 1.25, 1.5]
"""


@pytest.fixture(scope="module")
def work(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("sweep")
    text = PROFILE.read_text(encoding="utf-8").replace("rate_hz = 1000.0", "rate_hz = 500.0")
    assert "rate_hz = 500.0" in text
    (d / "fast.toml").write_text(text, encoding="utf-8")
    (d / "spec50.toml").write_text(SPEC_50.format(profile="fast.toml", schedule=SCHEDULE.as_posix()),
                                   encoding="utf-8")
    return d


@pytest.fixture(scope="module")
def full(work) -> dict:
    """The uninterrupted 50-case sweep on a local pool of 2 processes."""
    calls = []
    result = run_sweep(work / "spec50.toml", work / "pool", workers=2, progress=calls.append)
    return {"result": result, "progress": calls, "lines": _data_lines(result.csv_path)}


def _data_lines(path: Path) -> list[str]:
    """The result rows of a CSV as text, sorted by case key (the first column)."""
    lines = [ln for ln in path.read_text(encoding="utf-8").splitlines() if ln and not ln.startswith("#")]
    return sorted(lines[1:])


def _spec(tmp_path: Path, body: str) -> Path:
    path = tmp_path / "spec.toml"
    path.write_text(body, encoding="utf-8")
    return path


# --------------------------------------------------------------------------- spec checking
@pytest.mark.parametrize("old, new, key", [
    ("steps = 10", "stepz = 10", "vary.lead_dead_time_s.stepz"),
    ("max = 0.06", "max = 1.5", "vary.lead_dead_time_s.max"),
    ("[vary.amplitude_scale]", "[vary.rotor_speed]", "vary.rotor_speed"),
    ("revolutions = 1", "revolutions = 1\nseconds = 2.0", "run.revolutions"),
    ("schema_version = 1", "schema_version = 2", "schema_version"),
    ('objective = "cp_net"', 'objective = "cp"', "objective"),
    ("steps = 10\n", "", "vary.lead_dead_time_s.steps"),
])
def test_bad_spec_names_key(tmp_path, old, new, key):
    body = SPEC_50.format(profile=PROFILE.as_posix(), schedule=SCHEDULE.as_posix())
    assert old in body
    with pytest.raises(ProfileError) as err:
        load_spec(_spec(tmp_path, body.replace(old, new, 1)))
    assert err.value.key == key
    assert err.value.source.endswith("spec.toml")


def test_random_cases_are_reproducible_and_in_range(tmp_path):
    body = SPEC_50.format(profile=PROFILE.as_posix(), schedule=SCHEDULE.as_posix()).replace(
        'method = "grid"', 'method = "random"\nn = 20\nseed = 11')
    spec = load_spec(_spec(tmp_path, body))
    a = spec_cases(spec)
    b = spec_cases(load_spec(_spec(tmp_path, body)))
    assert [j.key for j in a] == [j.key for j in b]
    assert 1 < len(a) <= 20
    assert all(0.0 <= j.lead_dead_time_s <= 0.06 for j in a)
    assert all(j.amplitude_scale in (0.5, 0.75, 1.0, 1.25, 1.5) for j in a)
    assert all(j.seed == 3 and j.tsr == 2.5 and j.preset_pitch_deg == 10.0 for j in a)


# --------------------------------------------------------------------------- the pool
def test_pool_sweep_writes_one_row_per_case(full):
    result = full["result"]
    assert result.ran == 50 and result.reused == 0
    assert len(result.rows) == 50 and len(full["lines"]) == 50
    assert len({r["key"] for r in result.rows}) == 50
    assert full["progress"][-1] == 1.0 and len(full["progress"]) == 50
    header = result.csv_path.read_text(encoding="utf-8").splitlines()
    assert header[1] == f"# spec_sha256: {result.spec.sha256}"
    assert header[3] == ",".join(name for name, _ in COLUMNS)
    for r in result.rows:
        assert r["revolutions"] == 1 and r["trips"] == 0 and r["final_state"] == "RUNNING"
        assert 0.0 < r["cp_net"] < r["cp_gross"] < 16.0 / 27.0     # Betz limit (Betz 1920)
        assert r["actuator_power_w"] > 0.0
    for p in result.plots:
        assert p.stat().st_size > 1000
    assert {p.name for p in result.plots} == {"cp_net_vs_lead.png", "tracking_vs_speed.png",
                                              "objective_vs_parameters.png"}


def test_best_tracking_lead_matches_harmonic_lead_design(full):
    """The grid lead with the least tracking error sits at the dead-time lead that the harmonic
    method predicts for this servo (REFERENCES section 9: lead = Omega tau), within one grid step."""
    from flapctl.profile import load_profile
    from flapctl.schedule import Schedule
    from flapctl.tune.leaddesign import dead_time_lead
    from sim.rig import servo_params

    rows = full["result"].rows
    work = full["result"].csv_path.parent.parent
    profile = load_profile(work / "fast.toml")
    speed = float(np.mean([r["mean_speed_rad_s"] for r in rows]))
    tsr = speed * profile.geometry.radius_m / profile.fluid.design_speed_m_s
    sched = Schedule.load(SCHEDULE, profile.blades)
    tau = dead_time_lead(sched, servo_params(profile.servos[0]), [speed], tsr=[tsr],
                         tick_s=1.0 / profile.control.rate_hz).dead_time_s
    step = 0.06 / 9
    for amp in (0.5, 1.0, 1.5):
        sel = [r for r in rows if r["amplitude_scale"] == amp]
        best = min(sel, key=lambda r: r["tracking_rms_deg"])
        assert abs(best["lead_dead_time_s"] - tau) <= step + 1e-9, (amp, best["lead_dead_time_s"], tau)
        worst = max(sel, key=lambda r: r["tracking_rms_deg"])
        assert worst["lead_dead_time_s"] == 0.0          # no lead tracks worst


# --------------------------------------------------------------------------- Dask
def test_dask_cluster_gives_the_same_table(full, work):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address="127.0.0.1:0") as cluster:
        result = run_sweep(work / "spec50.toml", work / "dask", workers=50,
                           scheduler=cluster.scheduler_address, plots=False)
    assert result.ran == 50
    assert _data_lines(result.csv_path) == full["lines"]


# --------------------------------------------------------------------------- resume
class _Interrupt(Exception):
    pass


def test_interrupted_sweep_resumes_without_redoing_cases(full, work):
    """20 of the 50 cases (amplitudes 0.5 and 1.5): a case's row depends only on its parameters,
    so the resumed table must equal those rows of the uninterrupted sweep."""
    spec = work / "spec20.toml"
    spec.write_text((work / "spec50.toml").read_text(encoding="utf-8").replace(
        "values = [0.5, 0.75, 1.0, 1.25, 1.5]", "values = [0.5, 1.5]"), encoding="utf-8")
    expected = [ln for ln in full["lines"] if ";amplitude_scale=0.5," in ln or ";amplitude_scale=1.5," in ln]
    assert len(expected) == 20
    out = work / "resume"
    seen = []

    def stop_after_six(fraction: float) -> None:
        seen.append(fraction)
        if len(seen) == 6:
            raise _Interrupt

    with pytest.raises(_Interrupt):
        run_sweep(spec, out, workers=2, progress=stop_after_six, plots=False)
    done = read_results(out / RESULTS_NAME)
    assert len(done) == 6
    before = {r["key"] for r in done}
    again = run_sweep(spec, out, workers=2, plots=False)
    assert again.reused == 6 and again.ran == 14
    lines = _data_lines(out / RESULTS_NAME)
    assert lines == expected
    keys = [ln.split(",", 1)[0] for ln in lines]
    assert len(keys) == len(set(keys)) == 20 and before <= set(keys)
    third = run_sweep(spec, out, workers=2, plots=False)
    assert third.ran == 0 and third.reused == 20


def test_results_of_another_spec_are_refused(full, work, tmp_path):
    other = work / "spec50.toml"
    body = other.read_text(encoding="utf-8").replace("seed = 3", "seed = 4")
    spec = tmp_path / "other.toml"
    shutil.copy(work / "fast.toml", tmp_path / "fast.toml")
    spec.write_text(body, encoding="utf-8")
    out = tmp_path / "mixed"
    out.mkdir()
    shutil.copy(full["result"].csv_path, out / RESULTS_NAME)
    with pytest.raises(ProfileError) as err:
        run_sweep(spec, out, workers=1, plots=False)
    assert err.value.key == "spec_sha256"


def test_torn_last_line_is_dropped(full, tmp_path):
    path = tmp_path / RESULTS_NAME
    text = full["result"].csv_path.read_text(encoding="utf-8")
    path.write_text(text + "lead_dead_time_s=0.5;amplitude_scale=9.0,2.5,9.0", encoding="utf-8")
    rows = read_results(path, full["result"].spec.sha256)
    assert len(rows) == 50
    assert all(math.isfinite(r["cp_net"]) for r in rows)


# --------------------------------------------------------------------------- optimisation
def test_optimize_stays_within_budget_and_range(work):
    body = SPEC_50.format(profile="fast.toml", schedule=SCHEDULE.as_posix())
    body = body.replace('objective = "cp_net"', 'objective = "tracking_rms"')
    body = body.replace('method = "grid"', 'method = "optimize"\nn = 10\nseed = 2\n'
                        'algorithm = "differential-evolution"')
    body = body.replace("[vary.amplitude_scale]\nvalues = [0.5, 0.75, 1.0, 1.25, 1.5]\n", "")
    spec = work / "opt.toml"
    spec.write_text(body, encoding="utf-8")
    result = run_sweep(spec, work / "opt", workers=2, plots=False)
    assert 5 <= len(result.rows) <= 10
    assert all(0.0 <= r["lead_dead_time_s"] <= 0.06 for r in result.rows)
    best = result.best
    assert best["tracking_rms_deg"] == min(r["tracking_rms_deg"] for r in result.rows)
    # the lag of this servo at the design speed is tens of milliseconds: a lead there beats none
    assert best["lead_dead_time_s"] > 0.01
