"""Density and viscosity of the working fluid: fresh water (flumes) or dry air (tunnels).

Water, 0-40 degC, 50-120 kPa:
    density from Tanaka, Girard, Davis, Peuto & Bignell 2001, "Recommended table for the density
    of water between 0 degC and 40 degC based on recent experimental reports", Metrologia 38:301,
    for air-free water of standard isotopic composition (SMOW) on ITS-90, with the paper's
    compressibility factor for pressures other than 101 325 Pa (constants from memory).  Dissolved
    air lowers the density by about 4 ppm, which is ignored.
    Dynamic viscosity from the IAPWS Formulation 2008 (Huber et al. 2009, J. Phys. Chem. Ref. Data
    38:101), terms mu0 * mu1; the critical enhancement mu2 is 1 in this range.  The density it
    needs is the one above.

Dry air, -20..60 degC, 50-120 kPa:
    ideal gas rho = p / (R T), R = 287.05287 J/(kg K) (ISO 2533:1975), Sutherland viscosity
    mu = beta T^1.5 / (T + S), beta = 1.458e-6 kg/(m s K^0.5), S = 110.4 K.

Temperatures cross this boundary in degC (``temperature_c``), pressures in Pa; kelvin is used
inside.  Out-of-range input raises :class:`flapctl.errors.ProfileError`.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from flapctl.errors import ProfileError

__all__ = [
    "FluidProperties",
    "fluid_properties",
    "water_density_kg_m3",
    "water_viscosity_pa_s",
    "iapws2008_viscosity_pa_s",
    "air_density_kg_m3",
    "air_viscosity_pa_s",
    "WATER_TEMPERATURE_RANGE_C",
    "AIR_TEMPERATURE_RANGE_C",
    "PRESSURE_RANGE_PA",
    "R_AIR_J_KG_K",
]

KELVIN_OFFSET_K = 273.15
STANDARD_PRESSURE_PA = 101325.0

WATER_TEMPERATURE_RANGE_C = (0.0, 40.0)
AIR_TEMPERATURE_RANGE_C = (-20.0, 60.0)
PRESSURE_RANGE_PA = (50_000.0, 120_000.0)

# ISO 2533:1975 specific gas constant of dry air.
R_AIR_J_KG_K = 287.05287
# Sutherland constants as used by ISO 2533 / ICAO Doc 7488.
SUTHERLAND_BETA = 1.458e-6  # kg/(m s K^0.5)
SUTHERLAND_S_K = 110.4

# Tanaka et al. 2001, eq. (1) and table 1 (from memory); t in degC.
_TANAKA_A1_C = -3.983035
_TANAKA_A2_C = 301.797
_TANAKA_A3_C2 = 522528.9
_TANAKA_A4_C = 69.34881
_TANAKA_A5_KG_M3 = 999.974950
# Tanaka et al. 2001, compressibility factor 1 + (k0 + k1 t + k2 t^2) (p - 101325 Pa) (from memory).
_TANAKA_K0 = 50.74e-11  # 1/Pa
_TANAKA_K1 = -0.326e-11  # 1/(Pa degC)
_TANAKA_K2 = 0.00416e-11  # 1/(Pa degC^2)

# IAPWS 2008 viscosity (Huber et al. 2009): reference constants and coefficients.
_IAPWS_TC_K = 647.096
_IAPWS_RHOC_KG_M3 = 322.0
_IAPWS_MU_REF_PA_S = 1.0e-6
_IAPWS_H0 = (1.67752, 2.20462, 0.6366564, -0.241605)
# H1[i][j], i = 0..5 (powers of 1/Tr - 1), j = 0..6 (powers of rho_r - 1); Huber et al. 2009 table 2.
_IAPWS_H1 = (
    (5.20094e-1, 2.22531e-1, -2.81378e-1, 1.61913e-1, -3.25372e-2, 0.0, 0.0),
    (8.50895e-2, 9.99115e-1, -9.06851e-1, 2.57399e-1, 0.0, 0.0, 0.0),
    (-1.08374, 1.88797, -7.72479e-1, 0.0, 0.0, 0.0, 0.0),
    (-2.89555e-1, 1.26613, -4.89837e-1, 0.0, 6.98452e-2, 0.0, -4.35673e-3),
    (0.0, 0.0, -2.57040e-1, 0.0, 0.0, 8.72102e-3, 0.0),
    (0.0, 1.20573e-1, 0.0, 0.0, 0.0, 0.0, -5.93264e-4),
)

Medium = Literal["water", "air"]
_SOURCE = "<fluid_properties>"


@dataclass(frozen=True)
class FluidProperties:
    """State of the working fluid.

    ``medium`` is "water" or "air"; ``temperature_c`` in degC; ``pressure_pa`` absolute, Pa;
    ``density_kg_m3``; ``viscosity_pa_s`` dynamic; ``kinematic_viscosity_m2_s`` = mu / rho.
    """

    medium: str
    temperature_c: float
    pressure_pa: float
    density_kg_m3: float
    viscosity_pa_s: float
    kinematic_viscosity_m2_s: float


def _check_number(value: object, low: float, high: float, unit: str, source: str, key: str) -> float:
    """Return ``value`` as float if it is a real number in [low, high], else raise ProfileError."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ProfileError(source, key, value, f"a number in {unit}")
    number = float(value)
    if not (low <= number <= high):
        raise ProfileError(source, key, value, f"a number in [{low:g}, {high:g}] {unit}")
    return number


def water_density_kg_m3(temperature_c: float, pressure_pa: float = STANDARD_PRESSURE_PA) -> float:
    """Density of air-free fresh water (Tanaka et al. 2001), kg/m^3.  No range check."""
    t = temperature_c
    rho_atm = _TANAKA_A5_KG_M3 * (
        1.0 - (t + _TANAKA_A1_C) ** 2 * (t + _TANAKA_A2_C) / (_TANAKA_A3_C2 * (t + _TANAKA_A4_C))
    )
    compressibility = _TANAKA_K0 + _TANAKA_K1 * t + _TANAKA_K2 * t * t
    return rho_atm * (1.0 + compressibility * (pressure_pa - STANDARD_PRESSURE_PA))


def iapws2008_viscosity_pa_s(density_kg_m3: float, temperature_k: float) -> float:
    """IAPWS 2008 dynamic viscosity mu0 * mu1 (mu2 = 1), Pa s.  No range check.

    Valid without the critical enhancement away from the critical point, which covers liquid
    water at rig conditions.
    """
    tr = temperature_k / _IAPWS_TC_K
    dr = density_kg_m3 / _IAPWS_RHOC_KG_M3
    denominator = 0.0
    tr_power = 1.0
    for h in _IAPWS_H0:
        denominator += h / tr_power
        tr_power *= tr
    mu0 = 100.0 * math.sqrt(tr) / denominator

    x = 1.0 / tr - 1.0
    y = dr - 1.0
    total = 0.0
    x_power = 1.0
    for row in _IAPWS_H1:
        inner = 0.0
        for h in reversed(row):
            inner = inner * y + h
        total += x_power * inner
        x_power *= x
    mu1 = math.exp(dr * total)
    return mu0 * mu1 * _IAPWS_MU_REF_PA_S


def water_viscosity_pa_s(temperature_c: float, pressure_pa: float = STANDARD_PRESSURE_PA) -> float:
    """Dynamic viscosity of fresh water, Pa s (IAPWS 2008 with the Tanaka density).  No range check."""
    density = water_density_kg_m3(temperature_c, pressure_pa)
    return iapws2008_viscosity_pa_s(density, temperature_c + KELVIN_OFFSET_K)


def air_density_kg_m3(temperature_c: float, pressure_pa: float = STANDARD_PRESSURE_PA) -> float:
    """Dry-air density as an ideal gas, kg/m^3.  No range check."""
    return pressure_pa / (R_AIR_J_KG_K * (temperature_c + KELVIN_OFFSET_K))


def air_viscosity_pa_s(temperature_c: float) -> float:
    """Dry-air dynamic viscosity by Sutherland's law, Pa s.  No range check."""
    temperature_k = temperature_c + KELVIN_OFFSET_K
    return SUTHERLAND_BETA * temperature_k**1.5 / (temperature_k + SUTHERLAND_S_K)


def fluid_properties(
    medium: Medium,
    temperature_c: float,
    pressure_pa: float = STANDARD_PRESSURE_PA,
    *,
    source: str = _SOURCE,
    key: str = "fluid",
) -> FluidProperties:
    """Density and viscosity of ``medium`` ("water" or "air") at ``temperature_c`` and ``pressure_pa``.

    Water accepts 0-40 degC, air -20..60 degC; both 50-120 kPa absolute.  ``source`` and ``key``
    (the dotted key path of the fluid table) name the origin of the values in error messages;
    offending fields are reported as ``key.medium``, ``key.temperature_c``, ``key.pressure_pa``.
    """
    if medium not in ("water", "air"):
        raise ProfileError(source, f"{key}.medium", medium, 'one of "water", "air"')
    pressure = _check_number(pressure_pa, *PRESSURE_RANGE_PA, "Pa (absolute)", source, f"{key}.pressure_pa")
    if medium == "water":
        temperature = _check_number(
            temperature_c, *WATER_TEMPERATURE_RANGE_C, "degC for liquid water", source, f"{key}.temperature_c"
        )
        density = water_density_kg_m3(temperature, pressure)
        viscosity = iapws2008_viscosity_pa_s(density, temperature + KELVIN_OFFSET_K)
    else:
        temperature = _check_number(
            temperature_c, *AIR_TEMPERATURE_RANGE_C, "degC for dry air", source, f"{key}.temperature_c"
        )
        density = air_density_kg_m3(temperature, pressure)
        viscosity = air_viscosity_pa_s(temperature)
    return FluidProperties(
        medium=medium,
        temperature_c=temperature,
        pressure_pa=pressure,
        density_kg_m3=density,
        viscosity_pa_s=viscosity,
        kinematic_viscosity_m2_s=viscosity / density,
    )
