"""Blade-element relations of a straight-bladed cross-flow rotor (REFERENCES §2, §4, §6.3).

Conventions:

* Frame: x downstream, z up the shaft; the rotor turns counter-clockwise seen from above.
* Azimuth theta (rad): 0 with the blade at (0, +R) moving into the flow (-x); the blade sits at
  (-R sin theta, R cos theta).  Upstream half 0 < theta < pi.
* ``v_local`` V is the local streamwise speed at the blade (m/s), ``omega_r`` the blade speed
  omega R (m/s).  W_t = omega R + V cos theta, W_n = V sin theta, phi = atan2(W_n, W_t).
* Preset pitch beta (rad) positive = leading edge rotated outward (toe-out); alpha = phi - beta,
  plus the flow-curvature virtual incidence (omega c/W)(3/4 - x_p/c) when ``curvature`` is on.
* Flap delta (rad) positive = lift-increasing in the positive-alpha sense.
* C_t = C_l sin phi - C_d cos phi (positive = driving), C_n = C_l cos phi + C_d sin phi
  (positive toward the axis); streamwise force F_x = q c (C_n sin theta - C_t cos theta)
  (positive downstream); torque per span R F_t + q c^2 C_m,p with the pitching moment about the
  pivot C_m,p = C_m,c/4 + (x_p/c - 1/4)(C_l cos alpha + C_d sin alpha), nose-up positive;
  q = rho W^2 / 2.  The chord-normal resolution uses the geometric alpha = phi - beta.
* Hinge moment H = C_h q c_f^2 x span, positive in the +delta sense (§4).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from flapctl.errors import ProfileError
from sim.dynstall import DynamicStallState, gormont_berg_bound
from sim.polar import BoundPolar, PolarGrid, SectionPolar

__all__ = ["RotorGeometry", "BladeElementResult", "blade_element", "blade_element_bound",
           "blade_loads_scalar",
           "curvature_incidence"]


@dataclass(frozen=True)
class RotorGeometry:
    """Straight-bladed rotor: N blades of chord c and span H at pivot radius R.

    ``preset_pitch_rad`` positive toe-out; ``pivot_chord_fraction`` x_p/c from the leading
    edge; ``flap_chord_ratio`` c_f/c.
    """

    blades: int
    radius_m: float
    span_m: float
    chord_m: float
    preset_pitch_rad: float
    pivot_chord_fraction: float
    flap_chord_ratio: float

    def __post_init__(self) -> None:
        if not (isinstance(self.blades, int) and 1 <= self.blades <= 12):
            raise ProfileError("geometry", "geometry.blades", self.blades, "an integer 1..12")
        for key in ("radius_m", "span_m", "chord_m"):
            v = getattr(self, key)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0.0):
                raise ProfileError("geometry", f"geometry.{key}", v, "a positive length in m")
        if not self.chord_m < self.radius_m:
            raise ProfileError("geometry", "geometry.chord_m", self.chord_m,
                               f"a chord below the radius {self.radius_m} m")
        if not (isinstance(self.preset_pitch_rad, (int, float))
                and abs(self.preset_pitch_rad) < math.radians(30.0)):
            raise ProfileError("geometry", "geometry.preset_pitch_rad", self.preset_pitch_rad,
                               "|preset pitch| < 30 deg")
        if not (isinstance(self.pivot_chord_fraction, (int, float))
                and 0.0 <= self.pivot_chord_fraction <= 1.0):
            raise ProfileError("geometry", "geometry.pivot_chord_fraction",
                               self.pivot_chord_fraction, "a chord fraction in [0, 1]")
        if not (isinstance(self.flap_chord_ratio, (int, float))
                and 0.0 <= self.flap_chord_ratio < 1.0):
            raise ProfileError("geometry", "geometry.flap_chord_ratio", self.flap_chord_ratio,
                               "a chord fraction in [0, 1)")

    @property
    def swept_area_m2(self) -> float:
        """Frontal area 2RH (m^2)."""
        return 2.0 * self.radius_m * self.span_m

    @property
    def solidity(self) -> float:
        """Solidity N c/(2 pi R) (fraction of the circumference occupied by chord)."""
        return self.blades * self.chord_m / (2.0 * math.pi * self.radius_m)


@dataclass(frozen=True)
class BladeElementResult:
    """Blade-element quantities (arrays, broadcast shape of the inputs).

    Angles in rad, speeds m/s, forces per unit span N/m, torque per span N m/m, hinge
    moment per span N m/m (positive +delta sense).
    """

    phi: np.ndarray
    alpha: np.ndarray
    w: np.ndarray
    cl: np.ndarray
    cd: np.ndarray
    ct: np.ndarray
    cn: np.ndarray
    cm_pivot: np.ndarray
    ch: np.ndarray
    tangential_n_m: np.ndarray
    normal_n_m: np.ndarray
    torque_nm_m: np.ndarray
    streamwise_n_m: np.ndarray
    hinge_nm_m: np.ndarray


def curvature_incidence(omega_rad_s: np.ndarray | float, chord: float, w: np.ndarray | float,
                        pivot_fraction: float) -> np.ndarray:
    """Flow-curvature virtual incidence (omega c / W)(3/4 - x_p/c), rad (§6.3)."""
    return omega_rad_s * chord / w * (0.75 - pivot_fraction)


def blade_element(theta: np.ndarray | float, omega_r: np.ndarray | float,
                  v_local: np.ndarray | float, beta: float, delta: np.ndarray | float,
                  polar: SectionPolar, re: np.ndarray | float, chord: float, radius: float,
                  pivot_fraction: float, curvature: bool, *, rho: float,
                  alpha_dot: np.ndarray | None = None) -> BladeElementResult:
    """Vectorised blade-element evaluation (numpy broadcasting over all array inputs).

    ``omega_r`` blade speed omega R (m/s), ``v_local`` V (m/s), ``re`` chord Reynolds
    number, ``rho`` kg/m^3.  ``alpha_dot`` (rad/s), when given, applies Gormont-Berg dynamic
    stall (needs ``polar.thickness_ratio``).
    """
    return blade_element_bound(theta, omega_r, v_local, beta, polar.at(delta, re), chord, radius,
                               pivot_fraction, curvature, rho=rho, alpha_dot=alpha_dot)


def blade_element_bound(theta: np.ndarray | float, omega_r: np.ndarray | float,
                        v_local: np.ndarray | float, beta: float, bound: BoundPolar,
                        chord: float, radius: float, pivot_fraction: float, curvature: bool, *,
                        rho: float, alpha_dot: np.ndarray | None = None) -> BladeElementResult:
    """:func:`blade_element` with the polar already bound to its flap deflection and Re."""
    theta = np.asarray(theta, dtype=float)
    omega_r = np.asarray(omega_r, dtype=float)
    v = np.asarray(v_local, dtype=float)
    st, ctheta = np.sin(theta), np.cos(theta)
    wt = omega_r + v * ctheta
    wn = v * st
    w2 = wt * wt + wn * wn
    w = np.sqrt(w2)
    phi = np.arctan2(wn, wt)
    alpha_geo = phi - beta
    alpha = alpha_geo
    w_safe = np.maximum(w, 1e-12)
    if curvature:
        alpha = alpha + omega_r / radius * chord / w_safe * (0.75 - pivot_fraction)
    if alpha_dot is None:
        cl, cd, cm, ch = bound.coefficients(alpha)
    else:
        cl, cd, cm, ch = gormont_berg_bound(bound, alpha, alpha_dot, chord, w)
    sphi = np.where(w > 0.0, wn / w_safe, 0.0)
    cphi = np.where(w > 0.0, wt / w_safe, 1.0)
    ct = cl * sphi - cd * cphi
    cn = cl * cphi + cd * sphi
    cm_p = cm + (pivot_fraction - 0.25) * (cl * np.cos(alpha_geo) + cd * np.sin(alpha_geo))
    q = 0.5 * rho * w2
    qc = q * chord
    ft = qc * ct
    fn = qc * cn
    torque = radius * ft + qc * chord * cm_p
    fx = qc * (cn * st - ct * ctheta)
    cf = bound.flap_chord_ratio * chord
    hinge = ch * q * cf * cf
    return BladeElementResult(phi, alpha, w, cl, cd, ct, cn, cm_p, ch, ft, fn, torque, fx, hinge)


def blade_loads_scalar(grid: PolarGrid, theta: float, omega: float, v_local: float, beta: float,
                       delta: float, chord: float, radius: float, span: float,
                       pivot_fraction: float, flap_chord_ratio: float, rho: float,
                       curvature: bool, dyn: DynamicStallState | None = None, dt: float = 0.0
                       ) -> tuple[float, float, float, float, float]:
    """Pure-Python loads on one blade from a :class:`PolarGrid`.

    Returns ``(torque_nm, hinge_moment_nm, streamwise_force_n, alpha_rad, w_m_s)`` for the
    whole span; ``omega`` in rad/s, ``v_local`` m/s.  With ``dyn`` the per-blade dynamic-stall
    state is advanced by ``dt`` seconds.
    """
    st = math.sin(theta)
    ctheta = math.cos(theta)
    wt = omega * radius + v_local * ctheta
    wn = v_local * st
    w2 = wt * wt + wn * wn
    if w2 <= 1e-24:
        return 0.0, 0.0, 0.0, 0.0, 0.0
    w = math.sqrt(w2)
    alpha_geo = math.atan2(wn, wt) - beta
    alpha = alpha_geo
    if curvature:
        alpha += omega * chord / w * (0.75 - pivot_fraction)
    if dyn is None:
        cl, cd, cm, ch = grid.lookup(alpha, delta)
    else:
        cl, cd, cm, ch = dyn.coefficients(grid, alpha, delta, w, dt)
    sphi = wn / w
    cphi = wt / w
    ct = cl * sphi - cd * cphi
    cn = cl * cphi + cd * sphi
    cm_p = cm + (pivot_fraction - 0.25) * (cl * math.cos(alpha_geo) + cd * math.sin(alpha_geo))
    qc = 0.5 * rho * w2 * chord * span
    cf = flap_chord_ratio * chord
    return ((radius * ct + chord * cm_p) * qc,
            ch * 0.5 * rho * w2 * cf * cf * span,
            qc * (cn * st - ct * ctheta),
            alpha, w)
