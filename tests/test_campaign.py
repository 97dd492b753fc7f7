"""Campaign plans, point order, HDF5 layout and resuming after an interruption (real SIL runs)."""
from __future__ import annotations

import hashlib
import tomllib
from pathlib import Path

import h5py
import pytest

from flapctl.campaign import (CAMPAIGN_FORMAT, PHASE_BINS, CampaignError, expand_points, load_plan,
                              parse_plan, run_campaign, sil_point)
from flapctl.errors import ProfileError

ROOT = Path(__file__).resolve().parent.parent
SCHEDULE = ROOT / "hw_profiles" / "schedules" / "demo_morph.toml"

TINY = f"""
schema_version = 1
name = "tiny"
[setpoints]
tsr = [2.5, 3.0]
[[modes]]
name = "fixed"
kind = "baseline"
[[modes]]
name = "morph"
kind = "schedule"
schedule = "{SCHEDULE}"
[run]
dwell_revolutions = 6
repeats = 1
order = "interleaved"
seed = 3
[settling]
band_rel = 0.03
revolutions = 2
timeout_s = 5.0
[drift]
flow_step_rel = 0.004
temperature_step_c = 0.1
"""


def tiny_plan(text: str = TINY):
    return parse_plan(tomllib.loads(text), "<tiny>", text)


class Interrupt(Exception):
    """Raised from the progress callback to cut the campaign short."""


def test_demo_plan_loads_and_orders_abba(flume):
    plan = load_plan(ROOT / "hw_profiles" / "plans" / "demo_plan.toml")
    pts = expand_points(plan, flume)
    assert len(pts) == 3 * 2 * 2
    # interleaved A B | B A at each set point
    assert [p.mode for p in pts[:4]] == ["fixed", "morph", "morph", "fixed"]
    assert [p.block for p in pts[:4]] == [0, 0, 1, 1]
    # the drift walk is recorded and deterministic for the seed
    again = expand_points(plan, flume)
    assert [p.flow_true_m_s for p in pts] == [p.flow_true_m_s for p in again]
    assert len({round(p.flow_true_m_s, 9) for p in pts}) > 1


def test_randomised_order_is_seeded(flume):
    text = TINY.replace('order = "interleaved"', 'order = "randomised"').replace("repeats = 1", "repeats = 6")
    a = [p.mode for p in expand_points(tiny_plan(text), flume)]
    b = [p.mode for p in expand_points(tiny_plan(text), flume)]
    assert a == b
    assert sorted(a[:2]) == ["fixed", "morph"]     # every block runs every mode once


@pytest.mark.parametrize("edit, key", [
    (("dwell_revolutions = 6", "dwell_revolutions = 6\ndwell_s = 3"), "run.dwell_s"),
    (('kind = "schedule"', 'kind = "baseline"'), "modes[1].schedule"),
    (('order = "interleaved"', 'order = "zigzag"'), "run.order"),
    (("tsr = [2.5, 3.0]", "tsr = [2.5, 30.0]"), "setpoints.tsr[1]"),
])
def test_plan_errors_name_the_key(edit, key):
    with pytest.raises(ProfileError) as exc:
        tiny_plan(TINY.replace(*edit))
    assert exc.value.key == key
    assert exc.value.source == "<tiny>"


@pytest.fixture(scope="module")
def interrupted_then_resumed(tmp_path_factory):
    from flapctl.profile import load_profile
    profile = load_profile(ROOT / "hw_profiles" / "demo_flume_3blade.toml")
    plan = tiny_plan()
    out = tmp_path_factory.mktemp("campaign") / "tiny.h5"
    calls: list[str] = []

    def counting_runner(prof, schedule, spec, lead, progress):
        calls.append(spec.name)
        return sil_point(prof, schedule, spec, lead, progress)

    def stop_in_third(spec, total, fraction):
        if spec.index == 2 and fraction > 0.5:
            raise Interrupt("operator pressed stop")

    with pytest.raises(Interrupt):
        run_campaign(plan, profile, out, progress=stop_in_third, point_runner=counting_runner)
    with h5py.File(out, "r") as f:
        first = {n: bool(f["points"][n].attrs["complete"]) for n in f["points"]}
    first_calls = list(calls)
    calls.clear()
    summary = run_campaign(plan, profile, out, point_runner=counting_runner)
    return profile, plan, out, first, first_calls, list(calls), summary


def test_interrupt_leaves_two_points_and_an_incomplete_one(interrupted_then_resumed):
    _, _, _, first, first_calls, _, _ = interrupted_then_resumed
    assert first_calls == ["p0000", "p0001", "p0002"]
    assert first == {"p0000": True, "p0001": True, "p0002": False}


def test_resume_redoes_only_the_unfinished_points(interrupted_then_resumed):
    _, _, out, _, _, second_calls, summary = interrupted_then_resumed
    assert second_calls == ["p0002", "p0003"]
    assert summary.kept == ("p0000", "p0001")
    assert summary.discarded == ("p0002",)
    assert summary.ran == ("p0002", "p0003")
    with h5py.File(out, "r") as f:
        assert sorted(f["points"]) == ["p0000", "p0001", "p0002", "p0003"]
        assert all(bool(f["points"][n].attrs["complete"]) for n in f["points"])


def test_file_layout(interrupted_then_resumed):
    profile, plan, out, *_ = interrupted_then_resumed
    with h5py.File(out, "r") as f:
        assert f.attrs["format"] == CAMPAIGN_FORMAT
        assert f.attrs["plan_text"] == plan.text
        assert f.attrs["profile_text"] == profile.text
        g = f["points"]["p0001"]
        assert g.attrs["mode"] == "morph" and g.attrs["status"] == "ok"
        assert int(g["used"][:].sum()) == plan.run.dwell_revolutions
        assert g["phase"]["torque_nm"].shape == (PHASE_BINS,)
        assert g["phase"]["flap_deg"].shape == (PHASE_BINS, profile.blades)
        # the true drifted conditions are recorded beside the set point
        assert g.attrs["flow_true_m_s"] != g.attrs["flow_setpoint_m_s"]
        # the used revolutions follow the settling window and meet the band
        revs = g["revolutions"][:][g["used"][:]]
        assert all(abs(revs["mean_tsr"] / g.attrs["tsr"] - 1.0) < 0.1)


def test_other_plan_never_overwrites(interrupted_then_resumed):
    profile, _, out, *_ = interrupted_then_resumed
    before = hashlib.sha256(out.read_bytes()).hexdigest()
    other = tiny_plan(TINY.replace("seed = 3", "seed = 4"))
    with pytest.raises(CampaignError, match="never overwritten"):
        run_campaign(other, profile, out)
    assert hashlib.sha256(out.read_bytes()).hexdigest() == before


def test_not_a_campaign_file_is_refused(tmp_path, flume):
    path = tmp_path / "other.h5"
    with h5py.File(path, "x") as f:
        f.attrs["format"] = "something-else"
    with pytest.raises(CampaignError, match="not a flapctl campaign file"):
        run_campaign(tiny_plan(), flume, path)
