"""RotorAero: the aerodynamic (hydrodynamic) model the SIL rig uses.

Conventions (REFERENCES §2): the rotor azimuth theta (rad) is that of blade 0; blade i sits
at theta + 2 pi i / N.  ``steady`` tabulates loads against the rotor azimuth; ``blade_loads``
and flap schedules take the blade's own azimuth.  theta = 0 with the blade moving straight into the flow; preset
pitch positive toe-out; alpha = phi - beta; flap deflection positive = lift-increasing in the
positive-alpha sense.  Torque positive in the direction of rotation (N m), hinge moment
positive in the +delta sense (N m), streamwise force positive downstream (N).  TSR
lambda = omega R / U.  Cp and Ct use the frontal area 2RH.

Two uses:

* ``steady(tsr, flow)``: induction from the streamtube model, then blade elements on a fine
  azimuth grid (numpy).
* time domain: ``refresh(tsr, flow, flap)`` solves (or reuses) the induction, then every tick
  ``blade_loads(...)`` gives one blade's loads in pure Python from a :class:`PolarGrid` at the
  operating point's chord Reynolds number U sqrt(1 + lambda^2) c / nu (set by ``refresh``;
  re-gridded only when it moves by more than 10 %), with per-blade dynamic-stall state when
  enabled.  Before the first ``refresh``
  the velocity ratio is 1 (no induction).
"""
from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from flapctl.errors import ProfileError
from sim.blade import RotorGeometry, blade_element, blade_loads_scalar
from sim.dynstall import DynamicStallState, gormont_gammas
from sim.polar import RE_MIN, PolarGrid, SectionPolar
from sim.streamtube import (StreamtubeSolution, operating_reynolds, solve_dmst,
                            solve_no_induction, solve_single_streamtube)

__all__ = ["RotorGeometry", "RotorAero", "InductionSolution", "SteadyResult", "INDUCTION_MODELS"]

log = logging.getLogger(__name__)

InductionSolution = StreamtubeSolution
"""The cached induction of one operating point (see :class:`sim.streamtube.StreamtubeSolution`)."""

INDUCTION_MODELS = ("dmst", "single", "none")

FlapSchedule = Callable[[np.ndarray, int], np.ndarray]
"""Flap deflection (rad) of blade ``i`` at that blade's azimuth(s) theta (rad)."""

_TWO_PI = 2.0 * math.pi


@dataclass(frozen=True)
class SteadyResult:
    """Periodic steady state of one operating point.

    ``theta``: rotor azimuths (rad, blade 0), ``torque_nm`` / ``hinge_nm`` / ``streamwise_n``:
    per blade, shape (blades, n_azimuth); ``rotor_torque_nm`` their sum over blades.
    """

    tsr: float
    flow_m_s: float
    cp: float
    ct: float
    mean_torque_nm: float
    theta: np.ndarray
    torque_nm: np.ndarray
    hinge_nm: np.ndarray
    streamwise_n: np.ndarray
    rotor_torque_nm: np.ndarray
    valid: bool
    reason: str
    induction: InductionSolution


class RotorAero:
    """Rotor loads from a section polar and a streamtube induction model."""

    def __init__(self, geometry: RotorGeometry, polar: SectionPolar, rho_kg_m3: float,
                 nu_m2_s: float, induction: str = "dmst", n_tubes: int = 36,
                 curvature: bool = True, dynamic_stall: bool = False,
                 momentum_correction: str = "buhl", strut_drag_factor: float = 0.0) -> None:
        """``strut_drag_factor`` k: parasitic torque of the support struts, Q = -k w|w| (N m)."""
        if induction not in INDUCTION_MODELS:
            raise ProfileError("aero", "induction", induction,
                               "one of " + ", ".join(INDUCTION_MODELS))
        for key, v in (("fluid.rho_kg_m3", rho_kg_m3), ("fluid.nu_m2_s", nu_m2_s)):
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0.0):
                raise ProfileError("aero", key, v, "a positive finite number")
        if dynamic_stall:
            gormont_gammas(polar.thickness_ratio)
        self.geometry = geometry
        self.strut_drag_factor = float(strut_drag_factor)
        self.polar = polar
        self.rho = float(rho_kg_m3)
        self.nu = float(nu_m2_s)
        self.induction = induction
        self.n_tubes = n_tubes
        self.curvature = bool(curvature)
        self.dynamic_stall = bool(dynamic_stall)
        self.momentum_correction = momentum_correction
        self._solution: InductionSolution | None = None
        self._key: tuple[float, float, object] | None = None
        self._ratio: list[float] = [1.0, 1.0]
        self._n_ratio = 1
        self._grid: PolarGrid | None = None
        self._dyn = ([DynamicStallState(geometry.chord_m, polar.thickness_ratio)
                      for _ in range(geometry.blades)] if dynamic_stall else None)
        self._offsets = [_TWO_PI * i / geometry.blades for i in range(geometry.blades)]

    # induction --------------------------------------------------------------------------
    def _solve(self, tsr: float, flow_m_s: float, flap_rad: FlapSchedule | None
               ) -> InductionSolution:
        g, args = self.geometry, (self.polar, self.rho, self.nu, tsr, flow_m_s, flap_rad)
        if self.induction == "dmst":
            return solve_dmst(g, *args, n_tubes=self.n_tubes, curvature=self.curvature,
                              dynamic_stall=self.dynamic_stall,
                              correction=self.momentum_correction)
        if self.induction == "single":
            return solve_single_streamtube(g, *args, n_azimuth=2 * self.n_tubes,
                                           curvature=self.curvature,
                                           dynamic_stall=self.dynamic_stall,
                                           correction=self.momentum_correction)
        return solve_no_induction(g, *args, n_azimuth=2 * self.n_tubes,
                                  curvature=self.curvature, dynamic_stall=self.dynamic_stall)

    def refresh(self, tsr: float, flow_m_s: float, flap_rad: FlapSchedule | None
                ) -> InductionSolution:
        """Induction for these conditions; reuses the cached solution when tsr and flow are
        within 1 % of the cached ones and ``flap_rad`` is the same callable (or both None)."""
        key = self._key
        if (key is not None and key[2] is flap_rad and abs(tsr - key[0]) <= 0.01 * abs(key[0])
                and abs(flow_m_s - key[1]) <= 0.01 * abs(key[1])):
            return self._solution
        sol = self._solve(tsr, flow_m_s, flap_rad)
        # the polar grid follows the operating point's Reynolds number (as in ``steady``), not the
        # instantaneous one: the torque ripple would otherwise flip grids within a revolution
        self._re_op = operating_reynolds(tsr, flow_m_s, self.geometry.chord_m, self.nu)
        self.grid_for(self._re_op)
        if not sol.valid:
            log.debug("induction outside validity at tsr=%.3f: %s", tsr, sol.reason)
        self._solution = sol
        self._key = (float(tsr), float(flow_m_s), flap_rad)
        ratio = sol.velocity_ratio.tolist()
        self._ratio = ratio + ratio[:1]
        self._n_ratio = len(ratio)
        return sol

    @property
    def solution(self) -> InductionSolution | None:
        """The cached induction solution (None before the first refresh)."""
        return self._solution

    def velocity_ratio(self, theta_rad: float) -> float:
        """V/U at azimuth ``theta_rad`` from the cached solution (periodic linear; pure Python)."""
        n = self._n_ratio
        x = theta_rad * n / _TWO_PI - 0.5          # solution azimuths are cell midpoints
        if x < 0.0 or x >= n:
            x %= n
        i = int(x)
        f = x - i
        r = self._ratio
        return r[i] + f * (r[i + 1] - r[i])

    # time domain ------------------------------------------------------------------------
    def grid_for(self, re: float) -> PolarGrid:
        """The PolarGrid in use, rebuilt when ``re`` differs from its Re by more than 10 %."""
        re = max(re, RE_MIN)
        grid = self._grid
        if grid is None or abs(re - grid.re) > 0.1 * grid.re:
            # quantised to steps of about 1 % so that nearby operating points share a grid
            re_q = 10.0 ** (round(math.log10(re) * 200.0) / 200.0)
            log.debug("polar grid at Re = %.4g (for %.4g)", re_q, re)
            grid = self._grid = self.polar.grid(re_q, alpha_step_deg=0.5, delta_step_deg=0.5,
                                                delta_max_deg=30.0)
        return grid

    def blade_loads(self, blade: int, theta_rad: float, omega_rad_s: float, flow_m_s: float,
                    delta_rad: float, dt_s: float) -> tuple[float, float, float]:
        """(torque_nm, hinge_moment_nm, streamwise_force_n) of ``blade`` at its own azimuth
        ``theta_rad`` (blade i sits at rotor azimuth + 2 pi i/N), shaft speed ``omega_rad_s``,
        flow ``flow_m_s``, flap ``delta_rad``; ``dt_s`` since this blade's previous call (dynamic
        stall state is kept per blade)."""
        g = self.geometry
        theta = theta_rad
        grid = self._grid
        if grid is None:
            re = math.sqrt((omega_rad_s * g.radius_m) ** 2 + flow_m_s * flow_m_s) * g.chord_m / self.nu
            grid = self.grid_for(re)
        v = flow_m_s * self.velocity_ratio(theta)
        dyn = self._dyn[blade] if self._dyn is not None else None
        out = blade_loads_scalar(grid, theta, omega_rad_s, v, g.preset_pitch_rad, delta_rad,
                                 g.chord_m, g.radius_m, g.span_m, g.pivot_chord_fraction,
                                 g.flap_chord_ratio, self.rho, self.curvature, dyn, dt_s)
        return out[0], out[1], out[2]

    def reset_dynamic_state(self) -> None:
        """Forget every blade's dynamic-stall history."""
        for d in self._dyn or ():
            d.reset()

    # steady -----------------------------------------------------------------------------
    def steady(self, tsr: float, flow_m_s: float, flap_rad: FlapSchedule | None = None,
               n_azimuth: int = 360) -> SteadyResult:
        """Cp, Ct, mean torque and per-blade loads vs azimuth at one operating point."""
        if not (isinstance(n_azimuth, int) and n_azimuth >= 8):
            raise ProfileError("aero", "n_azimuth", n_azimuth, "an integer >= 8")
        sol = self.refresh(tsr, flow_m_s, flap_rad)
        g = self.geometry
        theta = np.arange(n_azimuth) * _TWO_PI / n_azimuth
        omega = tsr * flow_m_s / g.radius_m
        re = operating_reynolds(tsr, flow_m_s, g.chord_m, self.nu)
        ref = np.r_[sol.theta, sol.theta[0] + _TWO_PI]
        vr = np.r_[sol.velocity_ratio, sol.velocity_ratio[0]]
        torque, hinge, fx = [], [], []
        step = _TWO_PI / n_azimuth
        for i in range(g.blades):
            th = np.mod(theta + self._offsets[i], _TWO_PI)
            v = flow_m_s * np.interp(np.where(th < ref[0], th + _TWO_PI, th), ref, vr)
            delta = (np.broadcast_to(np.asarray(flap_rad(th, i), dtype=float), th.shape)
                     if flap_rad is not None else 0.0)
            args = (th, omega * g.radius_m, v, g.preset_pitch_rad, delta, self.polar, re,
                    g.chord_m, g.radius_m, g.pivot_chord_fraction, self.curvature)
            r = blade_element(*args, rho=self.rho)
            if self.dynamic_stall:
                # alpha_dot by periodic central differences of alpha(theta), as in the time domain
                d_al = (np.roll(r.alpha, -1) - np.roll(r.alpha, 1) + np.pi) % _TWO_PI - np.pi
                r = blade_element(*args, rho=self.rho, alpha_dot=omega * d_al / (2.0 * step))
            torque.append(r.torque_nm_m * g.span_m)
            hinge.append(r.hinge_nm_m * g.span_m)
            fx.append(r.streamwise_n_m * g.span_m)
        torque_a, hinge_a, fx_a = np.array(torque), np.array(hinge), np.array(fx)
        rotor = torque_a.sum(axis=0)
        mean_q = float(rotor.mean())
        qa = 0.5 * self.rho * g.swept_area_m2 * flow_m_s**2
        mean_q -= self.strut_drag_factor * omega * abs(omega)      # support struts
        rotor = rotor - self.strut_drag_factor * omega * abs(omega)
        return SteadyResult(float(tsr), float(flow_m_s), mean_q * omega / (qa * flow_m_s),
                            float(fx_a.sum(axis=0).mean()) / qa, mean_q, theta, torque_a, hinge_a,
                            fx_a, rotor, sol.valid, sol.reason, sol)
