"""Shared fixtures: the demo profiles and schedules of the repository."""
from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PROFILES = ROOT / "hw_profiles"


@pytest.fixture
def flume_path() -> Path:
    return PROFILES / "demo_flume_3blade.toml"


@pytest.fixture
def tunnel_path() -> Path:
    return PROFILES / "demo_tunnel_2blade.toml"


@pytest.fixture
def flume(flume_path):
    from flapctl.profile import load_profile
    return load_profile(flume_path)


@pytest.fixture
def morph_schedule_path() -> Path:
    return PROFILES / "schedules" / "demo_morph.toml"
