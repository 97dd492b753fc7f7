"""Rig profiles: the description of one rig, loaded strictly from TOML.

A profile (``hw_profiles/*.toml``) holds geometry, fluid, encoder, one servo per blade, brake,
sensors, limits, control settings and the bus backend.  Units are in the key names.  Loading
rejects unknown keys, wrong types, missing keys and out-of-range values with a
:class:`~flapctl.errors.ProfileError` that names the file, the dotted key path, the value and
what was expected.  ``flapctl check --keys`` prints every key with its range.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import ProfileError
from .schema import choice, describe, load_document, num, read_toml, text

__all__ = [
    "SCHEMA_VERSION", "Profile", "Geometry", "Rotor", "Fluid", "Channel", "Encoder", "Servo",
    "ServoElectrical", "Brake", "BrakeLoop", "TorqueSensor", "FlowSensor", "Sensors", "Limits",
    "Control", "Bus", "SimSettings", "load_profile", "parse_profile", "profile_keys",
]

SCHEMA_VERSION = 1
_SECTION_RE = re.compile(r"^NACA ?00(\d\d)$")


@dataclass(frozen=True, kw_only=True)
class Geometry:
    blades: int = num(1, 12, doc="blade count N")
    radius_m: float = num(0.0, 5.0, lo_open=True, doc="blade (pivot) radius R")
    span_m: float = num(0.0, 20.0, lo_open=True, doc="blade span H")
    chord_m: float = num(0.0, 2.0, lo_open=True, doc="blade chord c")
    section: str = text(doc="symmetric NACA 4-digit section, e.g. 'NACA 0021'")
    flap_chord_ratio: float = num(0.0, 0.6, lo_open=True, doc="flap chord / chord")
    preset_pitch_deg: float = num(-20.0, 20.0, doc="positive = leading edge outward (toe-out)")
    pivot_chord_fraction: float = num(0.0, 1.0, default=0.25, doc="mount point from the LE / chord")

    def _validate(self, source: str, prefix: str) -> None:
        if not _SECTION_RE.match(self.section.strip().upper()):
            raise ProfileError(source, f"{prefix}.section", self.section,
                               "a symmetric NACA 4-digit section such as 'NACA 0021'")
        if self.chord_m >= self.radius_m * 2.0:
            raise ProfileError(source, f"{prefix}.chord_m", self.chord_m,
                               f"a chord smaller than the diameter {2 * self.radius_m:g} m")

    @property
    def thickness_ratio(self) -> float:
        return int(_SECTION_RE.match(self.section.strip().upper()).group(1)) / 100.0


@dataclass(frozen=True, kw_only=True)
class Rotor:
    inertia_kg_m2: float = num(0.0, 1e3, lo_open=True, doc="rotor + shaft + brake inertia")
    coulomb_friction_nm: float = num(0.0, 100.0, default=0.0, doc="bearing friction torque")
    viscous_friction_nm_s: float = num(0.0, 100.0, default=0.0, doc="bearing viscous torque per rad/s")
    struts: int = num(0, 48, default=0, doc="support struts (arms) turning in the flow, all blades")
    strut_chord_m: float = num(0.0, 2.0, default=0.0, doc="strut chord (streamwise width)")
    strut_drag_coefficient: float = num(0.0, 2.0, default=0.0, doc="strut section drag coefficient")

    def strut_drag_factor(self, radius_m: float, density_kg_m3: float) -> float:
        """k in Q = k w|w|: the struts' drag torque, each strut a radial arm from 0 to R meeting
        the relative speed w r (flow neglected): Q = N 1/2 rho C_d c w^2 R^4 / 4."""
        return (self.struts * 0.5 * density_kg_m3 * self.strut_drag_coefficient * self.strut_chord_m
                * radius_m ** 4 / 4.0)


@dataclass(frozen=True, kw_only=True)
class Fluid:
    medium: str = choice("water", "air")
    temperature_c: float = num(-20.0, 60.0)
    pressure_pa: float = num(5e4, 1.2e5, default=101325.0, doc="absolute (air density)")
    design_speed_m_s: float = num(0.0, 50.0, lo_open=True, doc="design free-stream speed U")
    design_tsr: float = num(0.0, 10.0, lo_open=True, doc="design tip speed ratio")

    def _validate(self, source: str, prefix: str) -> None:
        if self.medium == "water" and not 0.0 <= self.temperature_c <= 40.0:
            raise ProfileError(source, f"{prefix}.temperature_c", self.temperature_c,
                               "0 to 40 degC for fresh water")


@dataclass(frozen=True, kw_only=True)
class Channel:
    width_m: float = num(0.0, 100.0, lo_open=True)
    depth_m: float = num(0.0, 100.0, lo_open=True, doc="water depth, or tunnel height")


@dataclass(frozen=True, kw_only=True)
class Encoder:
    counts_per_rev: int = num(4, 1 << 24, doc="after 4x quadrature decoding")
    counter_bits: int = num(8, 64, default=32, doc="hardware counter width (wraps)")
    index_offset_deg: float = num(0.0, 360.0, default=0.0, hi_open=True,
                                  doc="azimuth (REFERENCES sec. 2) at the index pulse")
    observer_bandwidth_hz: float = num(0.0, 1e4, lo_open=True, default=20.0,
                                       doc="angle-tracking observer natural frequency")
    observer_damping: float = num(0.1, 3.0, default=0.9)


@dataclass(frozen=True, kw_only=True)
class ServoElectrical:
    kt_nm_a: float = num(0.0, 10.0, lo_open=True, doc="motor torque constant (= Ke in SI)")
    resistance_ohm: float = num(0.0, 1e3, lo_open=True, doc="winding resistance")
    gear_ratio: float = num(1.0, 1e4, doc="motor turns per flap turn")
    gear_efficiency: float = num(0.0, 1.0, lo_open=True)
    flap_inertia_kg_m2: float = num(0.0, 10.0, lo_open=True, doc="flap + gear at the hinge")
    flap_friction_nm_s: float = num(0.0, 10.0, default=0.0, doc="viscous friction at the hinge")
    supply_v: float = num(0.0, 100.0, lo_open=True)
    current_limit_a: float = num(0.0, 100.0, lo_open=True)
    quiescent_w: float = num(0.0, 100.0, default=0.0, doc="driver electronics at rest")
    regenerative: bool = False


@dataclass(frozen=True, kw_only=True)
class Servo:
    travel_deg: float = num(0.0, 60.0, lo_open=True, doc="symmetric travel limit +-")
    rate_limit_deg_s: float = num(0.0, 1e5, lo_open=True)
    dead_time_s: float = num(0.0, 1.0, default=0.0)
    natural_freq_hz: float = num(0.0, 1e3, lo_open=True, doc="second-order position response")
    damping: float = num(0.05, 5.0, default=0.7)
    backlash_deg: float = num(0.0, 10.0, default=0.0)
    reports_power: bool = False
    electrical: ServoElectrical = field(default=None)  # type: ignore[assignment]

    def _validate(self, source: str, prefix: str) -> None:
        if self.electrical is None:
            raise ProfileError(source, f"{prefix}.electrical", "<missing>",
                               "a table with the servo's electrical model")


@dataclass(frozen=True, kw_only=True)
class BrakeLoop:
    mode: str = choice("tsr", "speed", default="tsr", doc="hold TSR (from measured flow) or speed")
    kp_nm_s: float = num(0.0, 1e3, default=0.05, doc="brake N m per rad/s of speed error")
    ki_nm: float = num(0.0, 1e4, default=0.2, doc="brake N m per rad of integrated error")
    kd_nm_s2: float = num(0.0, 1e3, default=0.0)
    period_ticks: int = num(1, 1000, default=10, doc="run the loop every k ticks")
    flow_filter_s: float = num(0.0, 60.0, default=0.5, doc="low-pass time constant on flow")


@dataclass(frozen=True, kw_only=True)
class Brake:
    max_torque_nm: float = num(0.0, 1e4, lo_open=True)
    min_torque_nm: float = num(0.0, 1e4, default=0.0)
    hold_torque_nm: float = num(0.0, 1e4, doc="torque applied in the safe state")
    time_constant_s: float = num(0.0, 10.0, default=0.01)
    command_per_nm: float = num(0.0, 1e6, lo_open=True, default=1.0,
                                doc="drive command units per N m (e.g. V/N m)")
    command_offset: float = num(-1e6, 1e6, default=0.0)
    loop: BrakeLoop = field(default_factory=BrakeLoop)

    def _validate(self, source: str, prefix: str) -> None:
        for key in ("min_torque_nm", "hold_torque_nm"):
            if getattr(self, key) > self.max_torque_nm:
                raise ProfileError(source, f"{prefix}.{key}", getattr(self, key),
                                   f"<= max_torque_nm ({self.max_torque_nm:g})")


@dataclass(frozen=True, kw_only=True)
class TorqueSensor:
    range_nm: float = num(0.0, 1e5, lo_open=True)
    noise_nm: float = num(0.0, 1e3, default=0.0, doc="rms noise (SIL)")
    bandwidth_hz: float = num(0.0, 1e5, lo_open=True, default=200.0)
    offset_nm: float = num(-1e3, 1e3, default=0.0, doc="zero offset (SIL)")
    uncertainty_rel: float = num(0.0, 1.0, default=0.005, doc="type-B relative standard uncertainty")


@dataclass(frozen=True, kw_only=True)
class FlowSensor:
    range_m_s: float = num(0.0, 100.0, lo_open=True)
    noise_m_s: float = num(0.0, 10.0, default=0.0, doc="rms noise (SIL)")
    uncertainty_rel: float = num(0.0, 1.0, default=0.01, doc="type-B relative standard uncertainty")


@dataclass(frozen=True, kw_only=True)
class Sensors:
    torque: TorqueSensor
    flow: FlowSensor
    speed_uncertainty_rel: float = num(0.0, 1.0, default=0.001)


@dataclass(frozen=True, kw_only=True)
class Limits:
    max_speed_rpm: float = num(0.0, 1e5, lo_open=True)
    max_tsr: float = num(0.0, 20.0, lo_open=True)
    tracking_error_deg: float = num(0.0, 90.0, lo_open=True, default=8.0,
                                    doc="flap |command - feedback| that trips when held for the window")
    tracking_window_s: float = num(0.0, 10.0, lo_open=True, default=0.25)
    servo_current_a: float = num(0.0, 1e3, lo_open=True, default=1e3,
                                 doc="trip above this servo current (when servos report it)")
    encoder_jump_deg: float = num(0.0, 360.0, lo_open=True, default=20.0,
                                  doc="largest plausible azimuth step in one tick")
    index_errors: int = num(0, 1000, default=0, doc="index mismatches tolerated before a trip")
    telemetry_timeout_s: float = num(0.0, 10.0, lo_open=True, default=0.05,
                                     doc="servo telemetry older than this trips")
    overrun_trip_consecutive: int = num(1, 100000, default=5,
                                        doc="consecutive loop overruns that trip (real-time runs)")
    stop_category: str = choice("controlled", "hold", default="controlled",
                                doc="on a trip: ramp the brake to hold (controlled) or hold at once")


@dataclass(frozen=True, kw_only=True)
class Control:
    rate_hz: float = num(10.0, 20000.0, default=1000.0, doc="controller tick rate")
    lead_mode: str = choice("none", "angle", "dead_time", default="dead_time",
                            doc="phase lead: fixed angle, or dead time x speed")
    lead_deg: float = num(-90.0, 90.0, default=0.0, doc="constant lead angle")
    lead_dead_time_s: float = num(0.0, 1.0, default=0.0, doc="lead as a time (turned into angle)")
    slew_limit_deg_s: float = num(0.0, 1e5, lo_open=True, default=1e5,
                                  doc="command slew limit (clamped to each servo's rate limit)")
    trigger: str = choice("rate", "azimuth", default="rate",
                          doc="send flap commands every tick, or at each azimuth step")
    azimuth_step_deg: float = num(0.1, 90.0, default=1.0,
                                  doc="azimuth trigger: one command per step of predicted azimuth")
    max_command_rate_hz: float = num(1.0, 20000.0, default=500.0,
                                     doc="azimuth trigger: at most this many commands per second")


@dataclass(frozen=True, kw_only=True)
class Bus:
    backend: str = choice("sim", "can", "bridge", default="sim")
    options: dict = field(default_factory=dict)  # validated by the backend itself


@dataclass(frozen=True, kw_only=True)
class SimSettings:
    seed: int = num(0, 2**31 - 1, default=1)
    turbulence_intensity: float = num(0.0, 0.5, default=0.02)
    integral_time_s: float = num(0.0, 100.0, lo_open=True, default=0.5)
    induction: str = choice("dmst", "single", "none", default="single")
    dynamic_stall: bool = False
    flow_curvature: bool = True


@dataclass(frozen=True, kw_only=True)
class Profile:
    schema_version: int
    name: str = text()
    geometry: Geometry = None  # type: ignore[assignment]
    rotor: Rotor = None  # type: ignore[assignment]
    fluid: Fluid = None  # type: ignore[assignment]
    encoder: Encoder = None  # type: ignore[assignment]
    servos: tuple[Servo, ...] = ()
    brake: Brake = None  # type: ignore[assignment]
    sensors: Sensors = None  # type: ignore[assignment]
    limits: Limits = None  # type: ignore[assignment]
    description: str = text(default="", nonempty=False)
    channel: Channel | None = None
    control: Control = field(default_factory=Control)
    bus: Bus = field(default_factory=Bus)
    sim: SimSettings = field(default_factory=SimSettings)
    source: str = field(default="<memory>", compare=False, init=False)
    text: str = field(default="", compare=False, repr=False, init=False)

    def _validate(self, source: str, prefix: str) -> None:
        for key in ("geometry", "rotor", "fluid", "encoder", "brake", "sensors", "limits"):
            if getattr(self, key) is None:
                raise ProfileError(source, key, "<missing>", f"a [{key}] table")
        if len(self.servos) != self.geometry.blades:
            raise ProfileError(source, "servos", f"{len(self.servos)} entries",
                               f"one [[servos]] entry per blade ({self.geometry.blades})")

    @property
    def blades(self) -> int:
        return self.geometry.blades


def parse_profile(data: dict[str, Any], source: str = "<memory>", text_: str = "") -> Profile:
    """Validate an already-parsed TOML mapping."""
    return load_document(Profile, data, source, text_, SCHEMA_VERSION, "profile")


def load_profile(path: str | Path) -> Profile:
    """Read and validate a rig profile file."""
    data, raw = read_toml(path)
    return parse_profile(data, str(path), raw)


def profile_keys() -> list[str]:
    """Every profile key with its type, range and meaning."""
    return describe(Profile)
