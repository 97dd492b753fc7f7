"""Fluid properties against IAPWS check values, the iapws reference package and ISO 2533."""
from __future__ import annotations

import dataclasses
import math

import pytest
from iapws import IAPWS95
from iapws._iapws import _Viscosity

from flapctl.errors import ProfileError
from flapctl.fluid import (
    FluidProperties,
    air_viscosity_pa_s,
    fluid_properties,
    iapws2008_viscosity_pa_s,
    water_density_kg_m3,
)


# IAPWS 2008 viscosity check values without critical enhancement: Huber et al. 2009,
# J. Phys. Chem. Ref. Data 38:101, Table 4 (quoted in REFERENCES §12, reproduced there by iapws 1.5.5).
@pytest.mark.parametrize(
    ("density_kg_m3", "temperature_k", "viscosity_upa_s"),
    [(998.0, 298.15, 889.735100), (1200.0, 298.15, 1437.649467)],
)
def test_iapws2008_check_values(density_kg_m3: float, temperature_k: float, viscosity_upa_s: float) -> None:
    mu_upa_s = iapws2008_viscosity_pa_s(density_kg_m3, temperature_k) * 1e6
    assert mu_upa_s == pytest.approx(viscosity_upa_s, abs=5e-7)


def half_last_digit(value: float, significant: int) -> float:
    """Half a unit in the last place of ``value`` written with ``significant`` figures."""
    return 0.5 * 10.0 ** (math.floor(math.log10(abs(value))) - significant + 1)


# REFERENCES §12 table (IAPWS-95 density, IAPWS 2008 viscosity at 101.325 kPa; values computed
# with iapws 1.5.5, so [derived]); rounding of the table sets the tolerances (half a last digit).
@pytest.mark.parametrize(
    ("temperature_c", "density_kg_m3", "viscosity_pa_s", "nu_m2_s"),
    [
        (15.0, 999.10, 1.1376e-3, 1.1386e-6),
        (20.0, 998.21, 1.0016e-3, 1.0034e-6),
        (25.0, 997.05, 8.900e-4, 8.927e-7),
    ],
)
def test_water_table_of_references(temperature_c: float, density_kg_m3: float, viscosity_pa_s: float,
                                   nu_m2_s: float) -> None:
    props = fluid_properties("water", temperature_c)
    assert props.density_kg_m3 == pytest.approx(density_kg_m3, abs=0.005)
    assert props.viscosity_pa_s == pytest.approx(viscosity_pa_s, abs=half_last_digit(viscosity_pa_s, 4))
    assert props.kinematic_viscosity_m2_s == pytest.approx(nu_m2_s, abs=half_last_digit(nu_m2_s, 4))


def test_water_10c_and_check_value_28() -> None:
    # REFERENCES §12 (10 degC line) and check value #28 (20 degC, 4 s.f.), IAPWS-95/2008 [derived].
    cold = fluid_properties("water", 10.0)
    assert cold.density_kg_m3 == pytest.approx(999.70, abs=0.005)
    assert cold.kinematic_viscosity_m2_s == pytest.approx(1.3063e-6, abs=5e-11)
    warm = fluid_properties("water", 20.0)
    assert f"{warm.density_kg_m3:.5g}" == "998.21"
    assert f"{warm.kinematic_viscosity_m2_s:.4e}" == "1.0034e-06"


# Reference library: iapws 1.5.5 IAPWS95 (Wagner & Pruss 2002) with its IAPWS 2008 viscosity.
# IAPWS95 takes T in K and P in MPa and costs about 9 ms a call, so few states are used.
REFERENCE_TEMPERATURES_C = (1.0, 4.0, 8.0, 13.0, 18.0, 23.0, 28.0, 33.0, 37.0, 40.0)


@pytest.fixture(scope="module")
def iapws95_states() -> dict[float, IAPWS95]:
    return {t: IAPWS95(T=t + 273.15, P=0.101325) for t in REFERENCE_TEMPERATURES_C}


@pytest.mark.parametrize("temperature_c", REFERENCE_TEMPERATURES_C)
def test_water_against_iapws95(temperature_c: float, iapws95_states: dict[float, IAPWS95]) -> None:
    reference = iapws95_states[temperature_c]
    props = fluid_properties("water", temperature_c)
    assert props.density_kg_m3 == pytest.approx(reference.rho, rel=1e-4)
    assert props.viscosity_pa_s == pytest.approx(reference.mu, rel=5e-3)
    assert props.kinematic_viscosity_m2_s == pytest.approx(reference.mu / reference.rho, rel=5e-3)


@pytest.mark.parametrize("pressure_pa", [50_000.0, 120_000.0])
def test_water_pressure_correction_against_iapws95(pressure_pa: float) -> None:
    # iapws IAPWS95 at 20 degC, pressure converted Pa -> MPa.
    reference = IAPWS95(T=293.15, P=pressure_pa / 1e6)
    assert water_density_kg_m3(20.0, pressure_pa) == pytest.approx(reference.rho, rel=1e-5)


def test_viscosity_formula_matches_iapws_implementation() -> None:
    # Same density fed to iapws' own IAPWS 2008 routine: checks the coefficient table, 0..40 degC.
    for step in range(81):
        temperature_c = 0.5 * step
        density = water_density_kg_m3(temperature_c)
        expected = _Viscosity(density, temperature_c + 273.15)
        assert iapws2008_viscosity_pa_s(density, temperature_c + 273.15) == pytest.approx(expected, rel=1e-12)


def test_water_density_maximum_near_4c() -> None:
    # Density maximum of water at 3.98 degC (Tanaka et al. 2001: a1 = -3.983035 degC, from memory).
    samples = [water_density_kg_m3(3.0 + 0.01 * i) for i in range(201)]
    t_max = 3.0 + 0.01 * samples.index(max(samples))
    assert t_max == pytest.approx(3.98, abs=0.011)


def test_air_iso2533_sea_level() -> None:
    # ISO 2533:1975 standard atmosphere at sea level (REFERENCES §12, check value #29 [derived]).
    props = fluid_properties("air", 15.0, 101325.0)
    assert f"{props.density_kg_m3:.4f}" == "1.2250"
    assert props.viscosity_pa_s == pytest.approx(1.7894e-5, abs=5e-10)
    assert props.kinematic_viscosity_m2_s == pytest.approx(1.4607e-5, abs=5e-10)


def test_air_sutherland_at_0c() -> None:
    # Sutherland law reference value mu = 1.716e-5 Pa s at 273 K (White, Viscous Fluid Flow, from memory).
    assert air_viscosity_pa_s(0.0) == pytest.approx(1.716e-5, rel=1e-3)


def test_air_ideal_gas_scales_with_pressure_and_temperature() -> None:
    # rho = p / (R T), R = 287.05287 J/(kg K) (ISO 2533): at 60 kPa and 40 degC.
    props = fluid_properties("air", 40.0, 60_000.0)
    assert props.density_kg_m3 == pytest.approx(60_000.0 / (287.05287 * 313.15), rel=1e-12)


def test_result_is_frozen_and_complete() -> None:
    props = fluid_properties("water", 20.0)
    assert isinstance(props, FluidProperties)
    assert (props.medium, props.temperature_c, props.pressure_pa) == ("water", 20.0, 101325.0)
    with pytest.raises(dataclasses.FrozenInstanceError):
        props.density_kg_m3 = 1000.0  # type: ignore[misc]


@pytest.mark.parametrize(
    ("medium", "temperature_c", "pressure_pa", "key", "bad"),
    [
        ("water", 40.5, 101325.0, "fluid.temperature_c", 40.5),
        ("water", -1.0, 101325.0, "fluid.temperature_c", -1.0),
        ("water", float("nan"), 101325.0, "fluid.temperature_c", float("nan")),
        ("water", True, 101325.0, "fluid.temperature_c", True),
        ("water", "20", 101325.0, "fluid.temperature_c", "20"),
        ("air", 61.0, 101325.0, "fluid.temperature_c", 61.0),
        ("air", -25.0, 101325.0, "fluid.temperature_c", -25.0),
        ("air", 15.0, 30_000.0, "fluid.pressure_pa", 30_000.0),
        ("water", 15.0, 101.325, "fluid.pressure_pa", 101.325),
        ("oil", 15.0, 101325.0, "fluid.medium", "oil"),
    ],
)
def test_out_of_range_input_is_rejected(medium: str, temperature_c: object, pressure_pa: object,
                                        key: str, bad: object) -> None:
    with pytest.raises(ProfileError) as caught:
        fluid_properties(medium, temperature_c, pressure_pa)  # type: ignore[arg-type]
    assert caught.value.key == key
    assert repr(caught.value.value) == repr(bad)
    assert repr(bad) in str(caught.value)


def test_error_names_profile_file_and_key() -> None:
    with pytest.raises(ProfileError) as caught:
        fluid_properties("water", 55.0, source="hw_profiles/flume.toml", key="fluid")
    assert str(caught.value).startswith("hw_profiles/flume.toml: fluid.temperature_c = 55.0: expected")
    assert "[0, 40]" in caught.value.expected
