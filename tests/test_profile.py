"""Rig profiles: the demo profiles load; bad input is rejected naming file, key path and value."""
from __future__ import annotations

import tomllib

import pytest

from flapctl.errors import ProfileError
from flapctl.profile import parse_profile, profile_keys, load_profile


def _data(path):
    return tomllib.loads(path.read_text())


def test_demo_profiles_load(flume_path, tunnel_path):
    flume = load_profile(flume_path)
    tunnel = load_profile(tunnel_path)
    assert flume.blades == 3 and len(flume.servos) == 3 and flume.fluid.medium == "water"
    assert tunnel.blades == 2 and tunnel.fluid.medium == "air"
    assert flume.geometry.thickness_ratio == pytest.approx(0.21)
    assert flume.text.startswith("#") and flume.source.endswith("demo_flume_3blade.toml")


def _expect_error(data, key_fragment, source="rig.toml"):
    with pytest.raises(ProfileError) as info:
        parse_profile(data, source)
    msg = str(info.value)
    assert source in msg and key_fragment in msg, msg
    return info.value


def test_typo_in_key_is_rejected_with_path(flume_path):
    data = _data(flume_path)
    data["geometry"]["radius_mm"] = data["geometry"].pop("radius_m")
    err = _expect_error(data, "geometry.radius_mm")
    assert "allowed" in err.expected and "radius_m" in err.expected


def test_negative_radius_is_rejected(flume_path):
    data = _data(flume_path)
    data["geometry"]["radius_m"] = -0.15
    err = _expect_error(data, "geometry.radius_m")
    assert err.value == -0.15 and "> 0" in err.expected


def test_nested_servo_key_path(flume_path):
    data = _data(flume_path)
    data["servos"][2]["electrical"]["gear_efficiency"] = 1.5
    _expect_error(data, "servos[2].electrical.gear_efficiency")


def test_wrong_type_string_for_number(flume_path):
    data = _data(flume_path)
    data["encoder"]["counts_per_rev"] = "4096"
    err = _expect_error(data, "encoder.counts_per_rev")
    assert "integer" in err.expected


def test_bool_is_not_a_number(flume_path):
    data = _data(flume_path)
    data["rotor"]["inertia_kg_m2"] = True
    _expect_error(data, "rotor.inertia_kg_m2")


def test_missing_section_and_key(flume_path):
    data = _data(flume_path)
    del data["brake"]
    _expect_error(data, "brake")
    data = _data(flume_path)
    del data["fluid"]["design_speed_m_s"]
    err = _expect_error(data, "fluid.design_speed_m_s")
    assert err.value == "<missing>"


def test_servo_count_must_match_blades(flume_path):
    data = _data(flume_path)
    data["servos"].pop()
    _expect_error(data, "servos")


def test_schema_version_checked(flume_path):
    data = _data(flume_path)
    data["schema_version"] = 2
    _expect_error(data, "schema_version")


def test_unknown_choice(flume_path):
    data = _data(flume_path)
    data["fluid"]["medium"] = "oil"
    err = _expect_error(data, "fluid.medium")
    assert "'water'" in err.expected


def test_section_name_checked(flume_path):
    data = _data(flume_path)
    data["geometry"]["section"] = "NACA 2412"
    _expect_error(data, "geometry.section")


def test_hold_torque_above_max(flume_path):
    data = _data(flume_path)
    data["brake"]["hold_torque_nm"] = 99.0
    _expect_error(data, "brake.hold_torque_nm")


def test_file_errors(tmp_path):
    with pytest.raises(ProfileError, match="readable UTF-8 file"):
        load_profile(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("schema_version = 1\n[geometry\n")
    with pytest.raises(ProfileError, match="bad.toml.*valid TOML"):
        load_profile(bad)


def test_keys_reference_lists_every_section():
    keys = "\n".join(profile_keys())
    for key in ("geometry.radius_m", "servos[].electrical.kt_nm_a", "brake.loop.ki_nm",
                "sensors.torque.range_nm", "limits.max_tsr", "bus.backend"):
        assert key in keys


def test_can_demo_profile_is_the_flume_rig_on_can(flume_path):
    # the CAN demo describes the same rig as the flume demo; only name, description and bus differ
    from dataclasses import replace
    flume = load_profile(flume_path)
    can = load_profile(flume_path.parent / "demo_flume_can.toml")
    assert can.bus.backend == "can"
    same = replace(can, name=flume.name, description=flume.description, bus=flume.bus)
    assert same == flume


# -- property tests: the profile loader never crashes, whatever it is given -------------------
from hypothesis import given, settings, strategies as st  # noqa: E402

_leaf = st.one_of(st.none(), st.booleans(), st.integers(-10**9, 10**9), st.floats(allow_nan=True),
                  st.text(max_size=10), st.lists(st.integers(0, 5), max_size=3))


@settings(max_examples=150, deadline=None)
@given(section=st.sampled_from(["geometry", "rotor", "fluid", "encoder", "brake", "limits", "control",
                                "sensors", "bus", "sim", "channel"]),
       key=st.text(min_size=1, max_size=20), value=_leaf)
def test_any_key_change_gives_profile_error_or_profile(section, key, value):
    # hypothesis changes one key of a valid profile to anything; the loader must answer with a
    # valid profile or a ProfileError that names the file -- never another exception
    from conftest import PROFILES
    data = _data(PROFILES / "demo_flume_3blade.toml")
    target = data.setdefault(section, {})
    if isinstance(target, dict):
        keys = list(target)
        chosen = keys[hash(key) % len(keys)] if keys and hash(key) % 2 else key
        target[chosen] = value
    try:
        parse_profile(data, "prop.toml")
    except ProfileError as exc:
        assert "prop.toml" in str(exc)


@settings(max_examples=100, deadline=None)
@given(st.text(max_size=200))
def test_any_text_gives_profile_error(text):
    import tempfile
    from pathlib import Path
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "rig.toml"
        path.write_text(text, encoding="utf-8")
        try:
            load_profile(path)
        except ProfileError as exc:
            assert "rig.toml" in str(exc)
