"""Streamtube momentum models of rotor induction (REFERENCES §3).

Conventions as in :mod:`sim.blade` (azimuth theta, toe-out beta, alpha = phi - beta, flap
delta lift-increasing).  Induction factor a: V = (1 - a) V_in at a disc.

* :func:`solve_dmst` - double-multiple streamtube (Paraschivoiu 1981, NASA CP-2185): each tube
  at upstream azimuth theta (tube midpoints (k + 1/2) pi/n) holds an upstream disc
  (V_u = (1 - a_u) U), an equilibrium speed V_e = (1 - 2 a_u) U and a downstream disc at
  2 pi - theta (V_d = (1 - a_d) V_e).  Per disc the blade-element thrust
  C_T,BE = (c/(2 pi R)) sum_blades (W/V_in)^2 (C_n sin theta - C_t cos theta)/|sin theta|
  equals the momentum thrust C_T,mom(a).  Roots by bracketing: a scan over a in [-0.5, 0.99],
  the lowest sign change at or above a = 0 (the nearest one below 0 when the disc pushes the
  flow forward), then Illinois false position vectorised across tubes (same bracket-and-refine
  role as Brent's method).  Tubes without a root take the scan value of smallest residual.
  Within ``edge_deg`` of the rotor edges, where the 1/|sin theta| term makes the blade-element
  thrust singular, a is capped at ``EDGE_CAP`` (these tubes carry little power); capped tubes
  are reported.  Any other upstream a_u >= 0.5 (V_e <= 0) makes the point invalid, with a
  reason.
* :func:`solve_single_streamtube` - Templin 1974: one a from the rotor-averaged streamwise force.
* Chord Reynolds number of an operating point: U sqrt(1 + lambda^2) c / nu, the rms relative
  speed over a revolution without induction ([derived] from (W/U)^2 = 1 + 2 lambda cos theta
  + lambda^2).
"""
from __future__ import annotations

import logging
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

from flapctl.errors import ProfileError
from sim.blade import BladeElementResult, RotorGeometry, blade_element_bound
from sim.polar import SectionPolar

__all__ = ["momentum_ct", "actuator_disc_cp", "StreamtubeSolution", "solve_dmst",
           "solve_single_streamtube", "solve_no_induction", "alpha_rate", "operating_reynolds", "FlapInput",
           "CORRECTIONS",
           "EDGE_CAP"]

log = logging.getLogger(__name__)

CORRECTIONS = ("none", "glauert", "buhl")
EDGE_CAP = 0.45
"""Largest induction given to an edge tube that has no momentum root."""

FlapInput = Callable[[np.ndarray, int], np.ndarray] | Sequence[Callable[[np.ndarray], np.ndarray]] | None
"""Flap deflection (rad) vs blade azimuth: f(theta, blade) or one g(theta) per blade, or None."""

_SCAN = np.unique(np.r_[np.linspace(-0.5, 0.95, 30), 0.99])
_I0 = int(np.argmin(np.abs(_SCAN)))


def momentum_ct(a: np.ndarray | float, correction: str = "buhl") -> np.ndarray:
    """Momentum thrust coefficient of a disc vs induction a.

    "none": 4a(1 - a); "glauert": Glauert's empirical curve 4a[1 - (5 - 3a)a/4] for a > 1/3
    (ARC R&M 1111, from memory); "buhl": 8/9 - 4a/9 + 14a^2/9 for a > 0.4 (NREL/TP-500-36834,
    F = 1, from memory).
    """
    a = np.asarray(a, dtype=float)
    ideal = 4.0 * a * (1.0 - a)
    if correction == "none":
        return ideal
    if correction == "glauert":
        return np.where(a > 1.0 / 3.0, 4.0 * a * (1.0 - 0.25 * (5.0 - 3.0 * a) * a), ideal)
    if correction == "buhl":
        return np.where(a > 0.4, 8.0 / 9.0 - 4.0 / 9.0 * a + 14.0 / 9.0 * a * a, ideal)
    raise ProfileError("induction", "induction.correction", correction,
                       "one of " + ", ".join(CORRECTIONS))


def actuator_disc_cp(a: np.ndarray | float) -> np.ndarray:
    """Power coefficient 4a(1 - a)^2 of an ideal actuator disc (Betz 1920)."""
    a = np.asarray(a, dtype=float)
    return 4.0 * a * (1.0 - a) ** 2


def operating_reynolds(tsr: float, flow_m_s: float, chord_m: float, nu_m2_s: float) -> float:
    """Chord Reynolds number U sqrt(1 + tsr^2) c / nu of an operating point."""
    return abs(flow_m_s) * math.sqrt(1.0 + tsr * tsr) * chord_m / nu_m2_s


def alpha_rate(theta: np.ndarray, omega: float, radius: float, v: np.ndarray, chord: float,
               pivot_fraction: float, curvature: bool) -> np.ndarray:
    """d alpha/dt (rad/s) of a blade at azimuth theta with the local speed V held constant.

    [derived] from §2: d phi/d theta = V (omega R cos theta + V)/W^2 and
    dW/d theta = -V omega R sin theta / W, so the curvature term K/W (K = omega c (3/4 - x_p/c))
    adds K V omega R sin theta / W^3.
    """
    wr = omega * radius
    wt = wr + v * np.cos(theta)
    w2 = np.maximum(wt * wt + (v * np.sin(theta)) ** 2, 1e-18)
    rate = v * (wr * np.cos(theta) + v) / w2
    if curvature:
        k = omega * chord * (0.75 - pivot_fraction)
        rate = rate + k * v * wr * np.sin(theta) / (w2 * np.sqrt(w2))
    return omega * rate


@dataclass(frozen=True)
class StreamtubeSolution:
    """Induction and loads at azimuth midpoints ``theta`` (rad, ascending over [0, 2 pi)).

    ``a``: induction at each azimuth (upstream discs relative to U, downstream discs relative
    to V_e); ``a_up``/``a_down``: the two halves (``a_down[m]`` at ``theta[n + m]``);
    ``velocity_ratio``: V/U at each azimuth; ``torque_nm`` / ``streamwise_n``: whole-span
    torque and streamwise force of blade i when it is at theta, shape (blades, 2n);
    ``capped``: azimuths whose disc had no momentum root or was held at the edge cap.
    ``cp``, ``ct`` on 2RH and U; ``valid`` False with a ``reason`` outside model validity.
    """

    theta: np.ndarray
    a: np.ndarray
    a_up: np.ndarray
    a_down: np.ndarray
    velocity_ratio: np.ndarray
    torque_nm: np.ndarray
    streamwise_n: np.ndarray
    alpha: np.ndarray
    mean_torque_nm: float
    cp: float
    ct: float
    tsr: float
    flow_m_s: float
    valid: bool
    reason: str
    capped: np.ndarray


class _Disc:
    """Blade-element thrust of the discs of one rotor half, vectorised over tubes."""

    def __init__(self, geometry: RotorGeometry, polar: SectionPolar, theta: np.ndarray,
                 deltas: np.ndarray, weights: np.ndarray, omega: float, re: float, rho: float,
                 curvature: bool, dynamic_stall: bool) -> None:
        self.g = geometry
        self.theta = theta
        self.sin_t = np.sin(theta)
        self.cos_t = np.cos(theta)
        # a constant flap row binds as a scalar: cheaper to evaluate
        self.bounds = [polar.at(float(row[0]) if np.all(row == row[0]) else row, re)
                       for row in deltas]
        self.weights = weights
        self.omega = omega
        self.rho = rho
        self.curvature = curvature
        self.dynamic_stall = dynamic_stall
        self.scale = geometry.chord_m / (2.0 * math.pi * geometry.radius_m) / np.abs(self.sin_t)

    def elements(self, v: np.ndarray, row: int) -> BladeElementResult:
        """Blade elements of flap row ``row`` at local speed ``v`` (m/s, shape (..., n))."""
        g = self.g
        omega_r = self.omega * g.radius_m
        alpha_dot = None
        if self.dynamic_stall:
            alpha_dot = alpha_rate(self.theta, self.omega, g.radius_m, v, g.chord_m,
                                   g.pivot_chord_fraction, self.curvature)
        return blade_element_bound(self.theta, omega_r, v, g.preset_pitch_rad, self.bounds[row],
                                   g.chord_m, g.radius_m, g.pivot_chord_fraction, self.curvature,
                                   rho=self.rho, alpha_dot=alpha_dot)

    def ct_be(self, a: np.ndarray, v_in: np.ndarray) -> np.ndarray:
        """C_T,BE at induction ``a`` (shape (..., n)) for inflow speeds ``v_in`` (n,)."""
        v = (1.0 - a) * v_in
        if self.dynamic_stall:
            total = 0.0
            for row, wgt in enumerate(self.weights):
                r = self.elements(v, row)
                total = total + wgt * r.w**2 * (r.cn * self.sin_t - r.ct * self.cos_t)
            return self.scale * total / (v_in * v_in)
        # lean path: only lift and drag are needed for the thrust
        g = self.g
        wt = self.omega * g.radius_m + v * self.cos_t
        wn = v * self.sin_t
        w2 = wt * wt + wn * wn
        alpha = np.arctan2(wn, wt) - g.preset_pitch_rad
        if self.curvature:
            alpha = alpha + self.omega * g.chord_m * (0.75 - g.pivot_chord_fraction) / np.sqrt(w2)
        # W^2 (C_n sin th - C_t cos th) with C_n, C_t from phi: W^2 C_n = W (cl wt + cd wn),
        # W^2 C_t = W (cl wn - cd wt)
        total = 0.0
        for row, wgt in enumerate(self.weights):
            cl, cd = self.bounds[row].lift_drag(alpha)
            total = total + wgt * ((cl * wt + cd * wn) * self.sin_t - (cl * wn - cd * wt) * self.cos_t)
        return self.scale * np.sqrt(w2) * total / (v_in * v_in)


def _bracket(g: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Scan index of the chosen sign change per tube (row of g over _SCAN) and found mask."""
    pos = g > 0.0
    change = pos[:, :-1] != pos[:, 1:]
    idx = np.arange(change.shape[1])
    up = change & (idx >= _I0)[None, :]
    down = change & (idx < _I0)[None, :]
    first_up = np.argmax(up, axis=1)
    last_down = change.shape[1] - 1 - np.argmax(down[:, ::-1], axis=1)
    use_down = g[:, _I0] < 0.0
    found = np.where(use_down, down.any(axis=1), up.any(axis=1))
    return np.where(use_down, last_down, first_up), found


def _illinois(f: Callable[[np.ndarray], np.ndarray], lo: np.ndarray, hi: np.ndarray,
              glo: np.ndarray, ghi: np.ndarray, tol: float = 1e-8, max_iter: int = 60
              ) -> np.ndarray:
    """Vectorised Illinois false position on brackets [lo, hi] with g(lo) g(hi) <= 0."""
    lo, hi, glo, ghi = lo.copy(), hi.copy(), glo.copy(), ghi.copy()
    moved_lo = np.zeros(lo.shape, dtype=bool)
    moved_hi = np.zeros(lo.shape, dtype=bool)
    x_old = lo.copy()
    x = lo
    for _ in range(max_iter):
        den = ghi - glo
        den[den == 0.0] = 1e-300
        x = hi - ghi * (hi - lo) / den
        gx = f(x)
        left = (gx > 0.0) == (glo > 0.0)          # root in [x, hi]: move lo
        right = ~left
        # Illinois: halve the stale end's residual when the same end moves twice in a row
        ghi[left & moved_lo] *= 0.5
        glo[right & moved_hi] *= 0.5
        np.copyto(lo, x, where=left)
        np.copyto(glo, gx, where=left)
        np.copyto(hi, x, where=right)
        np.copyto(ghi, gx, where=right)
        moved_lo, moved_hi = left, right
        if np.all((np.abs(x - x_old) < tol) | (gx == 0.0)):
            break
        x_old = x
    return x


def _solve_half(disc: _Disc, v_in: np.ndarray, correction: str, edge: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    """Induction of every disc of one half; returns (a, capped)."""
    n = v_in.size
    scan = np.broadcast_to(_SCAN[:, None], (_SCAN.size, n))
    g = (disc.ct_be(scan, v_in) - momentum_ct(scan, correction)).T
    k, found = _bracket(g)
    rows = np.arange(n)
    lo = np.where(found, _SCAN[k], 0.0)
    hi = np.where(found, _SCAN[k + 1], 0.0)
    glo = np.where(found, g[rows, k], -1.0)
    ghi = np.where(found, g[rows, k + 1], 1.0)

    def resid(x: np.ndarray) -> np.ndarray:
        return disc.ct_be(x, v_in) - momentum_ct(x, correction)

    a = _illinois(resid, lo, hi, glo, ghi) if found.any() else np.zeros(n)
    miss = ~found
    if miss.any():
        a[miss] = _SCAN[np.argmin(np.abs(g[miss]), axis=1)]
    over = edge & (a > EDGE_CAP)
    a[over] = EDGE_CAP
    return a, miss | over


def _check_inputs(tsr: float, flow_m_s: float, n_tubes: int, rho: float, nu: float) -> None:
    if not (isinstance(tsr, (int, float)) and math.isfinite(tsr) and tsr > 0.0):
        raise ProfileError("operating point", "tsr", tsr, "a positive finite tip-speed ratio")
    if not (isinstance(flow_m_s, (int, float)) and math.isfinite(flow_m_s) and flow_m_s > 0.0):
        raise ProfileError("operating point", "flow_m_s", flow_m_s, "a positive flow speed")
    if not (isinstance(n_tubes, int) and 4 <= n_tubes <= 2000):
        raise ProfileError("induction", "induction.n_tubes", n_tubes, "an integer 4..2000")
    if not (rho > 0.0 and nu > 0.0):
        raise ProfileError("fluid", "fluid", (rho, nu), "positive density and viscosity")


def _loads(disc: "_Disc", v: np.ndarray, row_of_blade: list[int], span: float
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Whole-span torque, streamwise force and alpha per blade at the disc's azimuths."""
    per_row = [disc.elements(v, r) for r in range(len(disc.bounds))]
    torque = np.array([per_row[r].torque_nm_m * span for r in row_of_blade])
    fx = np.array([per_row[r].streamwise_n_m * span for r in row_of_blade])
    alpha = np.array([per_row[r].alpha for r in row_of_blade])
    return torque, fx, alpha


def _blade_rows(flap: FlapInput, theta: np.ndarray, blades: int
                ) -> tuple[np.ndarray, np.ndarray, list[int]]:
    """Distinct flap rows (rad) at the azimuths, blades per row, and each blade's row."""
    if flap is None:
        return np.zeros((1, theta.size)), np.array([float(blades)]), [0] * blades
    if callable(flap):
        per = [np.asarray(flap(theta, i), dtype=float) for i in range(blades)]
    else:
        funcs = list(flap)
        if len(funcs) != blades or not all(callable(f) for f in funcs):
            raise ProfileError("flap", "flap", flap,
                               f"a callable f(theta, blade) or {blades} callables g(theta)")
        per = [np.asarray(f(theta), dtype=float) for f in funcs]
    rows: list[np.ndarray] = []
    counts: list[float] = []
    index: list[int] = []
    for i, p in enumerate(per):
        p = np.broadcast_to(p, theta.shape)
        if not np.all(np.isfinite(p)):
            raise ProfileError("flap", f"flap[{i}]", p[~np.isfinite(p)][0],
                               "finite deflections in rad")
        for k, u in enumerate(rows):
            if np.array_equal(u, p):
                counts[k] += 1.0
                index.append(k)
                break
        else:
            rows.append(np.array(p))
            counts.append(1.0)
            index.append(len(rows) - 1)
    return np.array(rows), np.array(counts), index


def solve_dmst(geometry: RotorGeometry, polar: SectionPolar, rho: float, nu: float, tsr: float,
               flow_m_s: float, flap: FlapInput = None, n_tubes: int = 36,
               curvature: bool = True, dynamic_stall: bool = False, correction: str = "buhl",
               edge_deg: float = 5.0) -> StreamtubeSolution:
    """Double-multiple streamtube solution of one operating point (see module docstring).

    ``rho`` kg/m^3, ``nu`` m^2/s, ``flow_m_s`` free-stream speed, ``n_tubes`` per half.
    """
    _check_inputs(tsr, flow_m_s, n_tubes, rho, nu)
    momentum_ct(0.0, correction)
    n = n_tubes
    theta = (np.arange(2 * n) + 0.5) * math.pi / n
    rows, counts, row_of_blade = _blade_rows(flap, theta, geometry.blades)
    omega = tsr * flow_m_s / geometry.radius_m
    re = operating_reynolds(tsr, flow_m_s, geometry.chord_m, nu)
    edge = np.abs(np.sin(theta)) < math.sin(math.radians(edge_deg))
    up = slice(0, n)
    dn = slice(n, 2 * n)
    disc_u = _Disc(geometry, polar, theta[up], rows[:, up], counts, omega, re, rho, curvature,
                   dynamic_stall)
    a_u, cap_u = _solve_half(disc_u, np.full(n, flow_m_s), correction, edge[up])
    v_e = (1.0 - 2.0 * a_u[::-1]) * flow_m_s      # paired with downstream azimuths ascending
    bad = v_e <= 0.0
    disc_d = _Disc(geometry, polar, theta[dn], rows[:, dn], counts, omega, re, rho, curvature,
                   dynamic_stall)
    a_d, cap_d = _solve_half(disc_d, np.where(bad, 1e-6 * flow_m_s, v_e), correction, edge[dn])
    a_d = np.where(bad, 0.0, a_d)
    v = np.concatenate([(1.0 - a_u) * flow_m_s, np.where(bad, 0.0, (1.0 - a_d) * v_e)])
    load_u = _loads(disc_u, v[up], row_of_blade, geometry.span_m)
    load_d = _loads(disc_d, v[dn], row_of_blade, geometry.span_m)
    torque, fx, alpha = (np.concatenate([lu, ld], axis=1) for lu, ld in zip(load_u, load_d))
    capped = np.concatenate([cap_u, cap_d])
    valid, reason = True, ""
    if np.any(a_u >= 0.5):
        valid = False
        worst = float(np.max(a_u))
        reason = (f"upstream induction a_u = {worst:.3f} >= 0.5 at "
                  f"{int(np.sum(a_u >= 0.5))} of {n} tubes: no flow behind the upstream disc")
        log.debug("DMST point outside validity: tsr=%.3f %s", tsr, reason)
    return _finish(geometry, rho, tsr, flow_m_s, omega, theta, np.concatenate([a_u, a_d]),
                   a_u, a_d, v / flow_m_s, torque, fx, alpha, valid, reason, capped)


def _finish(geometry: RotorGeometry, rho: float, tsr: float, flow: float, omega: float,
            theta: np.ndarray, a: np.ndarray, a_u: np.ndarray, a_d: np.ndarray,
            ratio: np.ndarray, torque: np.ndarray, fx: np.ndarray, alpha: np.ndarray,
            valid: bool, reason: str, capped: np.ndarray) -> StreamtubeSolution:
    mean_q = float(np.sum(np.mean(torque, axis=1)))
    mean_fx = float(np.sum(np.mean(fx, axis=1)))
    qa = 0.5 * rho * geometry.swept_area_m2 * flow * flow
    return StreamtubeSolution(theta, a, a_u, a_d, ratio, torque, fx, alpha, mean_q,
                              mean_q * omega / (qa * flow), mean_fx / qa, float(tsr), float(flow),
                              valid, reason, capped)


def solve_single_streamtube(geometry: RotorGeometry, polar: SectionPolar, rho: float, nu: float,
                            tsr: float, flow_m_s: float, flap: FlapInput = None,
                            n_azimuth: int = 72, curvature: bool = True,
                            dynamic_stall: bool = False, correction: str = "buhl"
                            ) -> StreamtubeSolution:
    """Templin single streamtube: one induction a for the whole rotor.

    The rotor-averaged streamwise force coefficient F_x/(0.5 rho 2RH U^2) at V = (1 - a) U
    equals C_T,mom(a); lowest root at or above 0 by scan and :func:`scipy.optimize.brentq`.
    """
    _check_inputs(tsr, flow_m_s, max(n_azimuth // 2, 4), rho, nu)
    momentum_ct(0.0, correction)
    theta = (np.arange(n_azimuth) + 0.5) * 2.0 * math.pi / n_azimuth
    rows, _, row_of_blade = _blade_rows(flap, theta, geometry.blades)
    omega = tsr * flow_m_s / geometry.radius_m
    re = operating_reynolds(tsr, flow_m_s, geometry.chord_m, nu)
    qa = 0.5 * rho * geometry.swept_area_m2 * flow_m_s**2
    disc = _Disc(geometry, polar, theta, rows, np.ones(len(rows)), omega, re, rho, curvature,
                 dynamic_stall)

    def resid(a: float) -> float:
        v = np.full(theta.shape, (1.0 - a) * flow_m_s)
        _, fx, _ = _loads(disc, v, row_of_blade, geometry.span_m)
        return float(np.sum(np.mean(fx, axis=1)) / qa - momentum_ct(a, correction))

    g = np.array([[resid(float(x)) for x in _SCAN]])
    k, found = _bracket(g)
    if found[0]:
        a = brentq(resid, float(_SCAN[k[0]]), float(_SCAN[k[0] + 1]), xtol=1e-12)
    else:
        a = float(_SCAN[np.argmin(np.abs(g[0]))])
    v = np.full(theta.shape, (1.0 - a) * flow_m_s)
    torque, fx, alpha = _loads(disc, v, row_of_blade, geometry.span_m)
    valid = a < 0.5
    reason = "" if valid else f"rotor induction a = {a:.3f} >= 0.5: momentum theory invalid"
    a_arr = np.full(theta.shape, a)
    return _finish(geometry, rho, tsr, flow_m_s, omega, theta, a_arr, a_arr, a_arr,
                   v / flow_m_s, torque, fx, alpha, valid, reason,
                   np.full(theta.shape, not found[0]))


def solve_no_induction(geometry: RotorGeometry, polar: SectionPolar, rho: float, nu: float,
                       tsr: float, flow_m_s: float, flap: FlapInput = None, n_azimuth: int = 72,
                       curvature: bool = True, dynamic_stall: bool = False) -> StreamtubeSolution:
    """Loads with the free stream at every azimuth (a = 0): the no-induction bound."""
    _check_inputs(tsr, flow_m_s, max(n_azimuth // 2, 4), rho, nu)
    theta = (np.arange(n_azimuth) + 0.5) * 2.0 * math.pi / n_azimuth
    rows, _, row_of_blade = _blade_rows(flap, theta, geometry.blades)
    omega = tsr * flow_m_s / geometry.radius_m
    re = operating_reynolds(tsr, flow_m_s, geometry.chord_m, nu)
    disc = _Disc(geometry, polar, theta, rows, np.ones(len(rows)), omega, re, rho, curvature,
                 dynamic_stall)
    v = np.full(theta.shape, float(flow_m_s))
    torque, fx, alpha = _loads(disc, v, row_of_blade, geometry.span_m)
    zero = np.zeros(theta.shape)
    return _finish(geometry, rho, tsr, flow_m_s, omega, theta, zero, zero, zero,
                   np.ones(theta.shape), torque, fx, alpha, True, "", np.zeros(theta.shape, bool))
