"""Fault injection: every fault ends in the safe state with the right reason and the data intact.

The matrix (tests/fault_matrix.py) injects each fault kind into the lockstep SIL rig at t = 4 s
of a morphing run on the demo flume rig.  For each: the trip reason is one of the expected ones,
it comes within the stated bound after the fault starts, the flap commands ramp to neutral at the
safe rate and the brake goes to its holding torque, the state is latched FAULT, and the run log holds
every tick from the start to the end of the run (none lost around the trip).
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import sys, pathlib
sys.path.insert(0, str(pathlib.Path(__file__).parent))
from fault_matrix import FAULT_AT_S, MATRIX, RUN_S, run_fault
from flapctl.errors import ProfileError
from flapctl.runlog import open_run
from flapctl.schedule import Schedule
from flapctl.supervisor import State
from sim.faults import KINDS, parse_scenario


@pytest.fixture(scope="module")
def morph(flume_module):
    from conftest import PROFILES
    return Schedule.load(PROFILES / "schedules" / "demo_morph.toml", 3)


@pytest.fixture(scope="module")
def flume_module():
    from conftest import PROFILES
    from flapctl.profile import load_profile
    return load_profile(PROFILES / "demo_flume_3blade.toml")


def test_matrix_covers_every_kind():
    assert {m[0] for m in MATRIX} == set(KINDS)


@pytest.mark.parametrize("kind, extra, reasons, bound_s", MATRIX, ids=[m[0] for m in MATRIX])
def test_fault_ends_safe(flume_module, morph, tmp_path, kind, extra, reasons, bound_s):
    profile = flume_module
    out = tmp_path / f"{kind}.h5"
    outcome = run_fault(profile, morph, kind, extra, out)
    assert outcome.state == State.FAULT
    t_trip, reason, detail = outcome.trips[0]
    assert reason in reasons, (reason, detail)
    assert FAULT_AT_S <= t_trip <= FAULT_AT_S + bound_s, (t_trip, detail)
    run = open_run(out)
    tk = run.ticks
    # every tick is in the log, before and after the trip
    assert len(tk) == int(round(RUN_S * profile.control.rate_hz))
    assert np.allclose(np.diff(tk["t_s"]), 1.0 / profile.control.rate_hz)
    after = tk[tk["t_s"] > t_trip]
    assert np.all(after["state"] == int(State.FAULT))
    # flaps commanded to neutral at the safe ramp (half the servo rate limit)
    ramp_s = max(s.travel_deg for s in profile.servos) / (0.5 * min(s.rate_limit_deg_s for s in profile.servos))
    settled = after[after["t_s"] > t_trip + ramp_s + 0.01]
    assert len(settled) > 0 and np.all(settled["flap_cmd_deg"] == 0.0)
    step = np.abs(np.diff(after["flap_cmd_deg"], axis=0))
    assert np.all(step <= 0.5 * profile.servos[0].rate_limit_deg_s / profile.control.rate_hz + 1e-5)   # float32 log
    # brake ramps to its holding torque (controlled stop) within 2 s of full range + loop period
    hold = profile.brake.hold_torque_nm
    late = after[after["t_s"] > t_trip + 2.1]
    if len(late):
        assert np.allclose(late["brake_nm"], hold)
    events = [e[2].decode() if isinstance(e[2], bytes) else e[2] for e in run.events]
    assert any(f"trip {reason}" in e for e in events)


def test_no_fault_no_trip(flume_module, morph):
    from flapctl.runner import run_sil
    outcome = run_sil(flume_module, morph, tsr=2.5, duration_s=RUN_S, out=None, settle_s=1.0)
    assert outcome.state == State.RUNNING and not outcome.trips


def test_scenario_errors_name_the_key():
    with pytest.raises(ProfileError, match=r"fault\[0\]\.blade"):
        parse_scenario({"schema_version": 1, "name": "x",
                        "fault": [{"kind": "servo_jam", "at_s": 1.0}]}, "s.toml")
    with pytest.raises(ProfileError, match=r"fault\[0\]\.percent"):
        parse_scenario({"schema_version": 1, "name": "x",
                        "fault": [{"kind": "bus_outage", "at_s": 1.0, "percent": 5}]}, "s.toml")
    with pytest.raises(ProfileError, match="at_s"):
        parse_scenario({"schema_version": 1, "name": "x",
                        "fault": [{"kind": "bus_outage"}]}, "s.toml")
    with pytest.raises(ProfileError, match=r"fault\[0\]\.blade"):
        parse_scenario({"schema_version": 1, "name": "x",
                        "fault": [{"kind": "servo_jam", "at_s": 1.0, "blade": 5}]}, "s.toml", blades=3)


_values = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True),
                    st.text(max_size=8), st.lists(st.integers(), max_size=3))


@settings(max_examples=200, deadline=None)
@given(st.dictionaries(st.sampled_from(["kind", "at_s", "at_revolution", "duration_s", "percent",
                                        "latency_s", "counts", "blade", "factor", "sensor", "bogus"]),
                       st.one_of(_values, st.sampled_from(sorted(KINDS))), max_size=6),
       st.one_of(st.just(1), _values))
def test_scenario_parser_never_crashes(fault, version):
    # any mapping gives a valid scenario or a ProfileError naming what was wrong, never a traceback
    try:
        parse_scenario({"schema_version": version, "name": "p", "fault": [fault]}, "p.toml", blades=3)
    except ProfileError as exc:
        assert "p.toml" in str(exc)
