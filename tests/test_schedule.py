"""Flap schedule tables: formats, round trips, exact evaluation, the fine table, validation."""
from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from flapctl.errors import ProfileError, ScheduleError
from flapctl.schedule import Schedule, ScheduleTable

DEMO = Path(__file__).resolve().parent.parent / "hw_profiles" / "schedules"
RNG_SEED = 20261201
# Azimuths spanning several turns both ways: the hot path must accept any real angle.
WIDE = np.random.default_rng(RNG_SEED).uniform(-20.0, 20.0, 4000)

SHARED_CSV = """# a comment line
azimuth_deg,flap_deg
0,0.0
45,3.5
90,10.0
135,6.0
180,0.5
240,-4.0
270,-6.0
315,-2.25
"""

PER_BLADE_TSR_CSV = """tsr,azimuth_deg,flap0_deg,flap1_deg,flap2_deg
1.5,0,0,1,2
1.5,100,8,7,6
1.5,200,-3,-2,-1
1.5,300,1,0,-1
2.5,10,0.5,0.25,0
2.5,130,9,8.5,8
2.5,250,-6,-5,-4.5
"""

PER_BLADE_TOML = """schema_version = 1
interpolation = "spline"

[[table]]
azimuth_deg = [0.0, 60.0, 120.0, 180.0, 240.0, 300.0]
flap_deg = [
  [0.0, 6.0, 8.0, 1.0, -5.0, -3.0],
  [1.0, 5.0, 7.5, 0.0, -6.0, -2.0],
  [0.5, 5.5, 9.0, 2.0, -4.0, -2.5],
]
"""

FOURIER_TOML = """schema_version = 1

[[fourier]]
tsr = 2.0
mean_deg = [0.5, 0.0, -0.5]
cos_deg = [[1.0, -0.5], [0.0], [0.25, 0.0, 0.125]]
sin_deg = [[8.0], [7.0, 1.0], [6.0, 0.0, -0.75]]

[[fourier]]
tsr = 3.0
mean_deg = 0.0
cos_deg = [0.0, -1.0]
sin_deg = [5.0]
"""


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def same_everywhere(a: Schedule, b: Schedule, tsrs: list[float | None]) -> None:
    for tsr in tsrs:
        for blade in range(a.blades):
            np.testing.assert_array_equal(a.evaluate(WIDE, blade, tsr), b.evaluate(WIDE, blade, tsr))


def fourier_sum(theta: float, mean: float, cos: list[float], sin: list[float]) -> float:
    """delta = mean + sum a_n cos(n theta) + b_n sin(n theta), term by term (common practice, no source)."""
    total = mean
    for n, a in enumerate(cos, start=1):
        total += a * math.cos(n * theta)
    for n, b in enumerate(sin, start=1):
        total += b * math.sin(n * theta)
    return total


# --------------------------------------------------------------------------- demo files
def test_demo_csv_moves_flap_inward_upstream_and_outward_downstream() -> None:
    s = Schedule.load(DEMO / "demo_morph.csv", blades=3)
    assert s.tsr_axis is None and s.form == "table" and s.interpolation == "linear"
    up, down = s.evaluate(np.radians([90.0, 270.0]), blade=0)
    assert up == pytest.approx(-8.0) and down == pytest.approx(8.0)
    s.check_travel([8.0, 8.0, 8.0])
    assert "Invented demo data" in s.text


def test_demo_toml_has_a_tsr_axis_and_the_same_signs() -> None:
    s = Schedule.load(DEMO / "demo_morph.toml", blades=3)
    assert s.tsr_axis == (2.0, 2.5, 3.0) and s.form == "fourier"
    for tsr in (1.5, 2.0, 2.25, 2.5, 3.0):
        up, down = s.evaluate(np.radians([90.0, 270.0]), blade=1, tsr=tsr)
        assert up < -5.0 and down > 5.0
    s.check_travel([8.0, 8.0, 8.0])
    assert "Invented demo data" in s.text


# --------------------------------------------------------------------------- round trips
def test_csv_to_toml_round_trip_is_exact(tmp_path: Path) -> None:
    path = write(tmp_path, "shared.csv", SHARED_CSV)
    a = Schedule.load(path, blades=3)
    assert a.text == SHARED_CSV
    b = Schedule.load(write(tmp_path, "again.toml", a.to_toml()), blades=3)
    same_everywhere(a, b, [None])
    assert b.to_toml().splitlines()[1:] == a.to_toml().splitlines()[1:]


def test_per_blade_csv_with_tsr_round_trips(tmp_path: Path) -> None:
    a = Schedule.load(write(tmp_path, "tsr.csv", PER_BLADE_TSR_CSV), blades=3)
    assert a.tsr_axis == (1.5, 2.5)
    b = Schedule.load(write(tmp_path, "tsr.toml", a.to_toml()), blades=3)
    assert b.tsr_axis == a.tsr_axis
    same_everywhere(a, b, [1.0, 1.5, 1.9, 2.5, 4.0])


def test_per_blade_spline_toml_round_trips(tmp_path: Path) -> None:
    a = Schedule.load(write(tmp_path, "pb.toml", PER_BLADE_TOML), blades=3)
    b = Schedule.parse(a.to_toml(), "toml", blades=3)
    assert b.interpolation == "spline"
    same_everywhere(a, b, [None])
    # The interpolation argument overrides the file's choice.
    assert Schedule.load(tmp_path / "pb.toml", blades=3, interpolation="linear").interpolation == "linear"


def test_fourier_toml_round_trips_in_fourier_form() -> None:
    a = Schedule.parse(FOURIER_TOML, "toml", blades=3, source="fourier.toml")
    b = Schedule.parse(a.to_toml(), "toml", blades=3)
    assert b.form == "fourier" and b.tsr_axis == (2.0, 3.0)
    same_everywhere(a, b, [1.0, 2.0, 2.4, 3.0, 5.0])


@settings(max_examples=60, deadline=None)
@given(
    azimuths=st.lists(st.floats(0.0, 359.99), min_size=3, max_size=20, unique=True),
    values=st.lists(st.floats(-30.0, 30.0), min_size=20, max_size=20),
    spline=st.booleans(),
)
def test_from_arrays_round_trips_through_toml(azimuths: list[float], values: list[float], spline: bool) -> None:
    az = sorted(azimuths)
    gaps = np.diff(az + [az[0] + 360.0])
    assume(bool(np.all(gaps > 1e-6) and np.all(gaps < 180.0)))
    a = Schedule.from_arrays(az, values[: len(az)], blades=2, interpolation="spline" if spline else "linear")
    b = Schedule.parse(a.to_toml(), "toml", blades=2)
    same_everywhere(a, b, [None])


def test_neutral_is_zero_everywhere() -> None:
    s = Schedule.neutral(4)
    assert s.blades == 4
    assert np.all(s.evaluate(WIDE, 3) == 0.0)
    table = s.table()
    assert all(table.at(b, x) == 0.0 for b in range(4) for x in WIDE[:100].tolist())
    assert Schedule.parse(s.text, "toml", 4).form == "table"


# --------------------------------------------------------------------------- exact evaluation
def test_fourier_matches_the_closed_form_sum() -> None:
    s = Schedule.parse(FOURIER_TOML, "toml", blades=3)
    coeffs = [(0.5, [1.0, -0.5], [8.0]), (0.0, [0.0], [7.0, 1.0]), (-0.5, [0.25, 0.0, 0.125], [6.0, 0.0, -0.75])]
    for blade, (mean, cos, sin) in enumerate(coeffs):
        got = s.evaluate(WIDE[:500], blade, tsr=2.0)
        want = [fourier_sum(x, mean, cos, sin) for x in WIDE[:500].tolist()]
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)


def test_linear_table_is_exact_at_the_knots_and_between_them() -> None:
    s = Schedule.parse(SHARED_CSV, "csv", blades=3)
    # midway between 90 deg (10.0) and 135 deg (6.0) a straight line gives 8.0 (arithmetic)
    got = s.evaluate(np.radians([90.0, 112.5, 112.5 + 360.0, 112.5 - 720.0]), 2)
    np.testing.assert_allclose(got, [10.0, 8.0, 8.0, 8.0], atol=1e-12)
    # across 360/0: between 315 deg (-2.25) and 360 deg (0.0)
    assert s.evaluate(np.radians(337.5), 0) == pytest.approx(-1.125, abs=1e-12)


def test_spline_reproduces_a_pure_sinusoid() -> None:
    # A periodic cubic spline interpolant converges at O(h^4) (de Boor, A Practical Guide to
    # Splines, from memory), with |error| <= 5/384 h^4 max|f''''| (Hall & Meyer 1976,
    # J. Approx. Theory 16, from memory).  With 24 points (h = 15 deg) and A = 10 deg: < 1e-3 deg.
    amp = 10.0
    theta = np.linspace(-7.0, 7.0, 3001)
    errors = []
    for points in (12, 24, 48):
        az = np.arange(points) * 360.0 / points
        s = Schedule.from_arrays(az, amp * np.sin(np.radians(az)), blades=1, interpolation="spline")
        err = np.max(np.abs(s.evaluate(theta, 0) - amp * np.sin(theta)))
        h = math.radians(360.0 / points)
        assert err <= 5.0 / 384.0 * h**4 * amp
        errors.append(err)
    assert errors[1] < 1e-3
    assert 12.0 < errors[0] / errors[1] < 20.0 and 12.0 < errors[1] / errors[2] < 20.0


def test_shared_column_offsets_the_blades_by_360_over_n() -> None:
    # delta(theta_i) with theta_i = theta + i*360/N (REFERENCES.md section 2).
    s = Schedule.parse("schema_version = 1\n[fourier]\nmean_deg = 0.0\nsin_deg = [10.0]\n", "toml", blades=3)
    rotor = WIDE[:300]
    table = s.table()
    for blade in range(3):
        own = rotor + blade * 2.0 * math.pi / 3.0
        np.testing.assert_allclose(s.evaluate(own, blade), 10.0 * np.sin(own), atol=1e-12)
        got = [table.at_rotor(blade, x) for x in rotor.tolist()]
        np.testing.assert_allclose(got, 10.0 * np.sin(own), atol=1e-3)
    # One shared column means the same curve for every blade at its own azimuth.
    c = Schedule.parse(SHARED_CSV, "csv", blades=3)
    np.testing.assert_array_equal(c.evaluate(WIDE, 0), c.evaluate(WIDE, 2))


def test_tsr_interpolation_is_linear_midway_and_clamped_at_the_ends() -> None:
    # Linear interpolation in TSR, clamped at the axis ends (common practice, no source).
    az = np.arange(0.0, 360.0, 20.0)
    base = np.sin(np.radians(az))
    s = Schedule.from_arrays(az, [4.0 * base, 8.0 * base], blades=3, tsr=[2.0, 3.0])
    theta = np.radians(az)
    np.testing.assert_allclose(s.evaluate(theta, 1, tsr=2.5), 6.0 * base, atol=1e-12)
    np.testing.assert_allclose(s.evaluate(theta, 1, tsr=2.25), 5.0 * base, atol=1e-12)
    np.testing.assert_allclose(s.evaluate(theta, 1, tsr=0.5), 4.0 * base, atol=1e-12)
    np.testing.assert_allclose(s.evaluate(theta, 1, tsr=7.0), 8.0 * base, atol=1e-12)
    table = s.table(tsr=2.5)
    assert table.tsr == 2.5
    np.testing.assert_allclose([table.at(0, x) for x in theta.tolist()], 6.0 * base, atol=1e-12)
    with pytest.raises(ScheduleError, match="tsr"):
        s.evaluate(theta, 0)


def test_peak_slope_of_a_sinusoid_is_amplitude_times_harmonic() -> None:
    # d/dtheta [A sin(k theta)] = A k cos(k theta): peak A k (calculus).
    amp, k = 10.0, 3
    fourier = Schedule.parse(f"schema_version = 1\n[fourier]\nmean_deg = 1.0\nsin_deg = [0.0, 0.0, {amp}]\n",
                             "toml", blades=2)
    assert fourier.peak_slope_deg_per_rad() == pytest.approx([amp * k] * 2, rel=1e-9)
    az = np.arange(0.0, 360.0, 5.0)
    spline = Schedule.from_arrays(az, amp * np.sin(k * np.radians(az)), blades=1, interpolation="spline")
    # |f' - s'| <= h^3/24 max|f''''| (Hall & Meyer 1976, J. Approx. Theory 16, from memory).
    bound = math.radians(5.0) ** 3 / 24.0 * amp * k**4
    assert spline.peak_slope_deg_per_rad()[0] == pytest.approx(amp * k, abs=bound)
    # Linear on a grid symmetric about the zero crossing at 0: the steepest chord spans (-h/2, h/2),
    # slope A sin(k h/2)/(h/2) (calculus).
    h = math.radians(6.0)
    centred = np.arange(3.0, 360.0, 6.0)
    linear = Schedule.from_arrays(centred, amp * np.sin(k * np.radians(centred)), blades=1)
    assert linear.peak_slope_deg_per_rad()[0] == pytest.approx(amp * math.sin(k * h / 2) / (h / 2), rel=1e-12)


def test_flap_rate_is_slope_times_shaft_speed() -> None:
    # REFERENCES.md section 9: A = 20 deg at 2 Hz needs 251 deg/s [derived: regression value].
    s = Schedule.parse("schema_version = 1\n[fourier]\nmean_deg = 0.0\nsin_deg = [20.0]\n", "toml", blades=3)
    omega_rad_s = 2.0 * math.pi * 2.0
    assert s.peak_slope_deg_per_rad()[0] * omega_rad_s == pytest.approx(251.3, abs=0.05)


# --------------------------------------------------------------------------- the fine table
def test_fine_table_matches_evaluate_for_linear_with_knots_off_the_grid() -> None:
    rng = np.random.default_rng(RNG_SEED)
    az1 = np.sort(rng.uniform(0.0, 360.0, 40))
    az2 = np.sort(rng.uniform(0.0, 360.0, 25))
    flap1 = rng.uniform(-12.0, 12.0, (3, 40))
    flap2 = rng.uniform(-12.0, 12.0, (3, 25))
    s = Schedule.from_arrays([az1, az2], [flap1, flap2], blades=3, tsr=[1.8, 2.6])
    for tsr in (1.0, 2.05, 2.6):
        table = s.table(tsr)
        for blade in range(3):
            got = np.array([table.at(blade, x) for x in WIDE.tolist()])
            assert np.max(np.abs(got - s.evaluate(WIDE, blade, tsr))) <= 1e-3
            knots = np.radians(az1)
            got = np.array([table.at(blade, x) for x in knots.tolist()])
            assert np.max(np.abs(got - s.evaluate(knots, blade, tsr))) <= 1e-3


@pytest.mark.parametrize("text, fmt", [(PER_BLADE_TOML, "toml"), (FOURIER_TOML, "toml")])
def test_fine_table_matches_evaluate_for_smooth_schedules(text: str, fmt: str) -> None:
    s = Schedule.parse(text, fmt, blades=3)
    tsr = 2.3 if s.tsr_axis else None
    table = s.table(tsr)
    assert isinstance(table, ScheduleTable) and table.resolution_deg == pytest.approx(0.1)
    for blade in range(3):
        got = np.array([table.at(blade, x) for x in WIDE.tolist()])
        assert np.max(np.abs(got - s.evaluate(WIDE, blade, tsr))) <= 1e-3


def test_fine_table_accepts_any_real_azimuth_and_returns_floats() -> None:
    s = Schedule.parse(SHARED_CSV, "csv", blades=3)
    table = s.table(resolution_deg=0.5)
    for x in (0.0, -1e-18, 2.0 * math.pi, -2.0 * math.pi, 1e4 + 0.3, -123.456):
        got = table.at(1, x)
        assert type(got) is float
        assert got == pytest.approx(float(s.evaluate(x, 1)), abs=1e-6)
    for bad in (math.nan, math.inf):
        with pytest.raises(ScheduleError, match="azimuth_rad"):
            table.at(0, bad)
    with pytest.raises(ScheduleError, match="resolution_deg"):
        s.table(resolution_deg=0.0)


# --------------------------------------------------------------------------- shift and travel
@pytest.mark.parametrize("text, fmt", [(SHARED_CSV, "csv"), (PER_BLADE_TOML, "toml"), (FOURIER_TOML, "toml")])
@pytest.mark.parametrize("lead_deg", [10.8, -47.25, 400.0])
def test_shifted_schedule_is_the_original_read_ahead(text: str, fmt: str, lead_deg: float) -> None:
    # 10.8 deg = Omega*tau_d for 1 Hz and 30 ms (REFERENCES.md section 9, [derived]).
    s = Schedule.parse(text, fmt, blades=3)
    tsr = 2.5 if s.tsr_axis else None
    lead = math.radians(lead_deg)
    t = s.shifted(lead_deg)
    assert t.form == s.form and t.tsr_axis == s.tsr_axis
    for blade in range(3):
        np.testing.assert_allclose(t.evaluate(WIDE, blade, tsr), s.evaluate(WIDE + lead, blade, tsr),
                                   rtol=0, atol=1e-9)
    same_everywhere(t, Schedule.parse(t.to_toml(), "toml", blades=3), [tsr])


def test_check_travel_names_the_blade_and_azimuth() -> None:
    s = Schedule.load(DEMO / "demo_morph.csv", blades=3)
    with pytest.raises(ScheduleError) as err:
        s.check_travel([12.0, 7.5, 12.0])
    assert err.value.key.startswith("blade 1, azimuth 90.00")
    assert err.value.value == pytest.approx(-8.0)
    assert "demo_morph.csv" in str(err.value)
    with pytest.raises(ScheduleError, match="travel_deg"):
        s.check_travel([12.0, 12.0])


def test_check_travel_sees_spline_overshoot_between_points() -> None:
    az, flap = [0.0, 90.0, 180.0, 270.0], [10.0, 10.0, -10.0, -10.0]
    Schedule.from_arrays(az, flap, blades=1).check_travel([10.0])          # linear: peak at the points
    spline = Schedule.from_arrays(az, flap, blades=1, interpolation="spline")
    with pytest.raises(ScheduleError, match="blade 0"):
        spline.check_travel([10.0])
    # A shifted sinusoid of amplitude 10: its peak lies between samples, found to 1e-9.
    s = Schedule.parse("schema_version = 1\n[fourier]\nmean_deg = 0.0\ncos_deg = [6.0]\nsin_deg = [8.0]\n",
                       "toml", blades=1)
    s.check_travel([10.0 + 1e-9])
    with pytest.raises(ScheduleError):
        s.check_travel([10.0 - 1e-6])


# --------------------------------------------------------------------------- validation
CSV_CASES = [
    ("nonfinite", "azimuth_deg,flap_deg\n0,1\n120,nan\n240,0\n", "row 3, column 2 (flap_deg)"),
    ("overflow", "azimuth_deg,flap_deg\n0,1\n120,1e999\n240,0\n", "row 3, column 2 (flap_deg)"),
    ("not a number", "azimuth_deg,flap_deg\n0,1\n120,five\n240,0\n", "row 3, column 2 (flap_deg)"),
    ("not increasing", "azimuth_deg,flap_deg\n0,1\n150,2\n100,0\n", "row 4, column 1 (azimuth_deg)"),
    ("repeated", "azimuth_deg,flap_deg\n0,1\n120,2\n120,0\n", "row 4, column 1 (azimuth_deg)"),
    ("at 360", "azimuth_deg,flap_deg\n0,1\n120,2\n360,0\n", "row 4, column 1 (azimuth_deg)"),
    ("negative", "azimuth_deg,flap_deg\n-10,1\n120,2\n240,0\n", "row 2, column 1 (azimuth_deg)"),
    ("too few", "azimuth_deg,flap_deg\n0,1\n179,2\n", "rows"),
    ("gap", "azimuth_deg,flap_deg\n0,1\n10,2\n200,0\n300,0\n", "row 4, column 1 (azimuth_deg)"),
    ("wrap gap", "azimuth_deg,flap_deg\n0,1\n90,2\n170,0\n", "row 2, column 1 (azimuth_deg)"),
    ("columns", "azimuth_deg,flap_deg\n0,1\n120,2,3\n240,0\n", "row 3"),
    ("blade count", "azimuth_deg,flap0_deg,flap1_deg\n0,1,1\n120,2,2\n240,0,0\n", "row 1 (header)"),
    ("header", "angle,flap_deg\n0,1\n120,2\n240,0\n", "row 1 (header)"),
    ("empty", "# only a comment\n", "header"),
    ("no rows", "azimuth_deg,flap_deg\n", "rows"),
    ("tsr order", "tsr,azimuth_deg,flap_deg\n2,0,1\n2,120,1\n2,240,1\n1.5,0,1\n1.5,120,1\n1.5,240,1\n",
     "row 5, column 1 (tsr)"),
    ("tsr back", "tsr,azimuth_deg,flap_deg\n2,0,1\n2,120,1\n3,240,1\n2,300,1\n", "row 5, column 1 (tsr)"),
    ("tsr zero", "tsr,azimuth_deg,flap_deg\n0,0,1\n0,120,1\n0,240,1\n", "row 2, column 1 (tsr)"),
    ("tsr group short", "tsr,azimuth_deg,flap_deg\n2,0,1\n2,120,1\n2,240,1\n3,0,1\n3,120,1\n",
     "rows 5..6 (tsr = 3.0)"),
    ("comment rows count", "# c\n\nazimuth_deg,flap_deg\n# c\n0,1\n120,inf\n240,0\n",
     "row 6, column 2 (flap_deg)"),
]

TOML_HEAD = 'schema_version = 1\ninterpolation = "linear"\n'
TOML_CASES = [
    ("syntax", "schema_version = = 1\n", "toml"),
    ("unknown top", TOML_HEAD + "colour = 'red'\n[[table]]\nazimuth_deg = [0, 120, 240]\nflap_deg = [0, 1, 2]\n",
     "colour"),
    ("unknown in table", TOML_HEAD + "[[table]]\nazimuth = [0, 120, 240]\nflap_deg = [0, 1, 2]\n", "table[0].azimuth"),
    ("unknown in fourier", TOML_HEAD + "[fourier]\nmean_deg = 1\nphase_deg = 3\n", "fourier.phase_deg"),
    ("no version", "[[table]]\nazimuth_deg = [0, 120, 240]\nflap_deg = [0, 1, 2]\n", "schema_version"),
    ("version 2", "schema_version = 2\n[[table]]\nazimuth_deg = [0, 120, 240]\nflap_deg = [0, 1, 2]\n",
     "schema_version"),
    ("interpolation", "schema_version = 1\ninterpolation = 'cubic'\n[fourier]\nmean_deg = 1\n", "interpolation"),
    ("nan", TOML_HEAD + "[[table]]\nazimuth_deg = [0, 120, 240]\nflap_deg = [0, nan, 2]\n", "table[0].flap_deg[1]"),
    ("inf", TOML_HEAD + "[fourier]\nmean_deg = 1\ncos_deg = [1, -inf]\n", "fourier.cos_deg[1]"),
    ("string", TOML_HEAD + "[[table]]\nazimuth_deg = ['0', 120, 240]\nflap_deg = [0, 1, 2]\n",
     "table[0].azimuth_deg[0]"),
    ("boolean", TOML_HEAD + "[fourier]\nmean_deg = true\n", "fourier.mean_deg"),
    ("order", TOML_HEAD + "[[table]]\nazimuth_deg = [0, 150, 100]\nflap_deg = [0, 1, 2]\n", "table[0].azimuth_deg[2]"),
    ("range", TOML_HEAD + "[[table]]\nazimuth_deg = [0, 120, 400]\nflap_deg = [0, 1, 2]\n", "table[0].azimuth_deg[2]"),
    ("gap", TOML_HEAD + "[[table]]\nazimuth_deg = [0, 10, 20, 200]\nflap_deg = [0, 1, 2, 3]\n",
     "table[0].azimuth_deg[3]"),
    ("too few", TOML_HEAD + "[[table]]\nazimuth_deg = [0, 170]\nflap_deg = [0, 1]\n", "table[0].azimuth_deg"),
    ("length", TOML_HEAD + "[[table]]\nazimuth_deg = [0, 120, 240]\nflap_deg = [0, 1]\n", "table[0].flap_deg"),
    ("per-blade length", TOML_HEAD + "[[table]]\nazimuth_deg = [0, 120, 240]\n"
     "flap_deg = [[0, 1, 2], [0, 1], [0, 1, 2]]\n", "table[0].flap_deg[1]"),
    ("blade count", TOML_HEAD + "[[table]]\nazimuth_deg = [0, 120, 240]\nflap_deg = [[0, 1, 2], [0, 1, 2]]\n",
     "table[0].flap_deg"),
    ("fourier blade count", TOML_HEAD + "[fourier]\nmean_deg = [1, 2]\n", "fourier.mean_deg"),
    ("tsr order", TOML_HEAD + "[[table]]\ntsr = 2.0\nazimuth_deg = [0, 120, 240]\nflap_deg = [0, 1, 2]\n"
     "[[table]]\ntsr = 2.0\nazimuth_deg = [0, 120, 240]\nflap_deg = [0, 1, 2]\n", "table[1].tsr"),
    ("tsr negative", TOML_HEAD + "[[fourier]]\ntsr = -1.0\nmean_deg = 1\n", "fourier[0].tsr"),
    ("tsr missing", TOML_HEAD + "[[fourier]]\ntsr = 1.0\nmean_deg = 1\n[[fourier]]\nmean_deg = 2\n",
     "fourier[1].tsr"),
    ("several without tsr", TOML_HEAD + "[[fourier]]\nmean_deg = 1\n[[fourier]]\nmean_deg = 2\n", "fourier[0].tsr"),
    ("both forms", TOML_HEAD + "[fourier]\nmean_deg = 1\n[[table]]\nazimuth_deg = [0, 120, 240]\n"
     "flap_deg = [0, 1, 2]\n", "table"),
    ("neither", TOML_HEAD, "(top level)"),
    ("no mean", TOML_HEAD + "[fourier]\nsin_deg = [1.0]\n", "fourier.mean_deg"),
    ("table not a table", TOML_HEAD + "table = [1, 2]\n", "table"),
]


@pytest.mark.parametrize("name, text, key", CSV_CASES, ids=[c[0] for c in CSV_CASES])
def test_csv_validation_names_file_and_row(tmp_path: Path, name: str, text: str, key: str) -> None:
    path = write(tmp_path, "bad.csv", text)
    with pytest.raises(ScheduleError) as err:
        Schedule.load(path, blades=3)
    assert err.value.key == key
    assert err.value.source == str(path)
    assert str(path) in str(err.value) and key in str(err.value)


@pytest.mark.parametrize("name, text, key", TOML_CASES, ids=[c[0] for c in TOML_CASES])
def test_toml_validation_names_file_and_key(tmp_path: Path, name: str, text: str, key: str) -> None:
    path = write(tmp_path, "bad.toml", text)
    with pytest.raises(ScheduleError) as err:
        Schedule.load(path, blades=3)
    assert err.value.key == key
    assert str(path) in str(err.value) and key in str(err.value)


def test_file_level_errors_name_the_file(tmp_path: Path) -> None:
    for path, key in ((write(tmp_path, "s.txt", SHARED_CSV), "file suffix"), (tmp_path / "missing.csv", "file")):
        with pytest.raises(ScheduleError) as err:
            Schedule.load(path, blades=3)
        assert err.value.key == key and str(path) in str(err.value)
    raw = tmp_path / "latin1.csv"
    raw.write_bytes(b"azimuth_deg,flap_deg\n0,1\n120,\xe9\n240,0\n")
    with pytest.raises(ScheduleError, match="UTF-8"):
        Schedule.load(raw, blades=3)
    with pytest.raises(ScheduleError, match="blades"):
        Schedule.load(DEMO / "demo_morph.csv", blades=0)
    with pytest.raises(ScheduleError) as err:
        Schedule.load(DEMO / "demo_morph.csv", blades=3, interpolation="cubic")
    assert err.value.key == "interpolation"
    # ScheduleError is a ProfileError and a ValueError, so callers may catch either.
    assert isinstance(err.value, ProfileError) and isinstance(err.value, ValueError)


def test_from_arrays_and_queries_validate_their_arguments() -> None:
    with pytest.raises(ScheduleError) as err:
        Schedule.from_arrays([0, 120, 240], [[0, 1, 2]] * 2, blades=3)
    assert err.value.source == "<arrays>" and err.value.key == "flap_deg"
    with pytest.raises(ScheduleError, match="tsr"):
        Schedule.from_arrays([0, 120, 240], [[0, 1, 2], [0, 1, 2]], blades=1, tsr=[2.0, 1.0])
    with pytest.raises(ScheduleError, match=r"azimuth_deg\[1\]"):
        Schedule.from_arrays([0, math.nan, 240], [0, 1, 2], blades=1)
    s = Schedule.neutral(3)
    for bad in (3, -1, 1.0, True):
        with pytest.raises(ScheduleError, match="blade"):
            s.evaluate(0.0, bad)
    with pytest.raises(ScheduleError, match="theta_rad"):
        s.evaluate([0.0, math.inf], 0)
    with pytest.raises(ScheduleError, match="lead_deg"):
        s.shifted(math.nan)


# --------------------------------------------------------------------------- property tests
VALID_CSV = PER_BLADE_TSR_CSV
VALID_TABLE_TOML = (TOML_HEAD + "[[table]]\ntsr = 1.5\nazimuth_deg = [0.0, 120.0, 240.0]\nflap_deg = [1.0, 2.0, 3.0]\n"
                    "[[table]]\ntsr = 2.5\nazimuth_deg = [10.0, 100.0, 200.0, 300.0]\n"
                    "flap_deg = [[1, 2, 3, 4], [0, 0, 0, 0], [5, 6, 7, 8]]\n")


def parse_or_error(text: str, fmt: str) -> Schedule | ScheduleError:
    """Parse; a ScheduleError is returned, any other exception propagates and fails the test."""
    try:
        return Schedule.parse(text, fmt, blades=3, source=f"fuzz.{fmt}")
    except ScheduleError as exc:
        assert exc.source == f"fuzz.{fmt}" and str(exc).startswith(f"fuzz.{fmt}: ")
        return exc


def check_usable(result: Schedule | ScheduleError) -> None:
    if isinstance(result, Schedule):
        tsr = result.tsr_axis[0] if result.tsr_axis else None
        assert np.all(np.isfinite(result.evaluate(WIDE[:50], 2, tsr)))
    else:
        assert isinstance(result, ScheduleError)


def mutate(text: str, edits: list[tuple[int, int, str]]) -> str:
    for position, kind, char in edits:
        p = position % (len(text) + 1)
        if kind == 0:
            text = text[:p] + char + text[p:]
        elif kind == 1:
            text = text[:p] + text[p + 1:]
        else:
            text = text[:p] + char + text[p + 1:]
    return text


EDITS = st.lists(st.tuples(st.integers(0, 10_000), st.integers(0, 2),
                           st.sampled_from(list("0123456789.,-+eE#[]=\"' \n\tnaifx_") + ["\x00", "\u2028"])),
                 min_size=1, max_size=6)
FUZZ = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@FUZZ
@given(text=st.text(max_size=300), fmt=st.sampled_from(["csv", "toml"]))
def test_arbitrary_text_gives_a_schedule_or_a_schedule_error(text: str, fmt: str) -> None:
    check_usable(parse_or_error(text, fmt))


@FUZZ
@given(edits=EDITS, base=st.sampled_from([(VALID_CSV, "csv"), (SHARED_CSV, "csv"), (FOURIER_TOML, "toml"),
                                          (VALID_TABLE_TOML, "toml"), (PER_BLADE_TOML, "toml")]))
def test_mutated_files_give_a_schedule_or_a_schedule_error(edits: list[tuple[int, int, str]],
                                                           base: tuple[str, str]) -> None:
    check_usable(parse_or_error(mutate(base[0], edits), base[1]))


@FUZZ
@given(data=st.data(), bad=st.sampled_from(["nan", "inf", "1e999", "", "five", "0x10", "1,2", "--1"]))
def test_a_bad_csv_cell_is_always_reported_with_its_row(data: st.DataObject, bad: str) -> None:
    lines = VALID_CSV.splitlines()
    row = data.draw(st.integers(2, len(lines)), label="row")
    col = data.draw(st.integers(0, 4), label="column")
    cells = lines[row - 1].split(",")
    cells[col] = bad
    lines[row - 1] = ",".join(cells)
    result = parse_or_error("\n".join(lines) + "\n", "csv")
    assert isinstance(result, ScheduleError)
    assert result.key.startswith(f"row {row}")


@FUZZ
@given(data=st.data(), bad=st.sampled_from(["nan", "inf", "-inf", "'1.0'", "true", "[]", "x", "1979-05-27", "{}"]))
def test_a_bad_toml_number_is_always_a_schedule_error(data: st.DataObject, bad: str) -> None:
    text = VALID_TABLE_TOML
    spans = [m.span() for m in re.finditer(r"(?<![\w.])-?\d+(?:\.\d+)?(?![\w.])", text)]
    start, end = spans[data.draw(st.integers(0, len(spans) - 1), label="number")]
    result = parse_or_error(text[:start] + bad + text[end:], "toml")
    assert isinstance(result, ScheduleError)
