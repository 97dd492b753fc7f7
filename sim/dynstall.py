"""Dynamic stall: Gormont's model with Berg's modification (REFERENCES §6.1).

Gormont 1973 (USAAMRDL TR 72-67), low-Mach form of Strickland, Webster & Nguyen 1979,
Berg 1983; described in Paraschivoiu 2002 (all from memory).  Angles in rad, alpha as in
:mod:`sim.polar` (positive = flow from the outer side), alpha_dot in rad/s, W in m/s, chord m.

* Reference angle on |alpha|: |alpha_ref| = |alpha| - K1 gamma sqrt|c alpha_dot/(2W)|,
  K1 = +1 while |alpha| grows (stall delayed), -0.5 while it shrinks (stall held on).
* gamma_L = 1.4 - 6(0.06 - t/c), gamma_D = 1 - 2.5(0.06 - t/c).
* cl_dyn = m (alpha - alpha_0), m = min[cl_st(alpha_ref,L)/(alpha_ref,L - alpha_0), cap]
  with cap = the static stall secant cl_st(alpha_ss)/(alpha_ss - alpha_0) (as described by
  Paraschivoiu 2002, from memory), raised to the static secant at alpha where that is steeper
  so that alpha_dot = 0 returns the static polar on a rounded lift curve (common practice, no
  source); alpha_ref,L is kept at least 1 deg from alpha_0 (no 0/0).  cd, cm and ch are taken
  at alpha_ref,D.
* Berg: C = C_st + w (C_dyn - C_st), w = (A_M a_ss - |alpha|)/(A_M a_ss - a_ss) clipped to
  [0, 1] (the clip at 1 below stall is common practice, no source), A_M = 6, a_ss the static
  stall angle on the side of alpha.

:func:`gormont_berg` is stateless and vectorised (alpha_dot given, e.g. d alpha/d theta x
omega in the steady streamtube model); :class:`DynamicStallState` keeps one blade's previous
alpha for the time-domain rig and works on pure-Python scalars with a PolarGrid.
"""
from __future__ import annotations

import math

import numpy as np

from flapctl.errors import ProfileError
from sim.polar import BoundPolar, PolarGrid, SectionPolar

__all__ = ["gormont_gammas", "berg_weight", "reference_angles", "gormont_berg", "gormont_berg_bound",
           "gormont_berg_scalar", "DynamicStallState", "A_M"]

A_M = 6.0
"""Berg's blending constant A_M (from memory)."""

_EPS = math.radians(1.0)


def gormont_gammas(thickness_ratio: float) -> tuple[float, float]:
    """(gamma_L, gamma_D) of the low-Mach Gormont model for thickness ratio t/c."""
    if not (isinstance(thickness_ratio, (int, float)) and 0.0 < thickness_ratio < 0.5):
        raise ProfileError("polar", "polar.thickness_ratio", thickness_ratio,
                           "a thickness ratio in (0, 0.5) for dynamic stall")
    return 1.4 - 6.0 * (0.06 - thickness_ratio), 1.0 - 2.5 * (0.06 - thickness_ratio)


def berg_weight(alpha_abs: np.ndarray | float, alpha_ss: np.ndarray | float,
                a_m: float = A_M) -> np.ndarray:
    """Berg's blending weight of the dynamic correction, in [0, 1]."""
    a_ss = np.asarray(alpha_ss, dtype=float)
    return np.clip((a_m * a_ss - np.asarray(alpha_abs, dtype=float)) / ((a_m - 1.0) * a_ss),
                   0.0, 1.0)


def reference_angles(alpha: np.ndarray | float, alpha_dot: np.ndarray | float, chord: float,
                     w: np.ndarray | float, gamma_l: float, gamma_d: float
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Gormont reference angles (alpha_ref,L, alpha_ref,D), rad."""
    alpha = np.asarray(alpha, dtype=float)
    alpha_dot = np.asarray(alpha_dot, dtype=float)
    root = np.sqrt(np.abs(chord * alpha_dot / (2.0 * np.maximum(w, 1e-9))))
    k1 = np.where(alpha * alpha_dot > 0.0, 1.0, -0.5)
    sgn = np.sign(alpha)
    return alpha - sgn * k1 * gamma_l * root, alpha - sgn * k1 * gamma_d * root


def gormont_berg(polar: SectionPolar, alpha: np.ndarray | float, alpha_dot: np.ndarray | float,
                 delta: np.ndarray | float, re: np.ndarray | float, chord: float,
                 w: np.ndarray | float, a_m: float = A_M
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Dynamic (cl, cd, cm_c4, ch) from a static polar at flap ``delta`` and ``re``; vectorised."""
    return gormont_berg_bound(polar.at(delta, re), alpha, alpha_dot, chord, w, a_m)


def gormont_berg_bound(bound: BoundPolar, alpha: np.ndarray | float,
                       alpha_dot: np.ndarray | float, chord: float, w: np.ndarray | float,
                       a_m: float = A_M) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`gormont_berg` on a polar already bound to its flap deflection and Re."""
    gl, gd = gormont_gammas(bound.thickness_ratio)
    alpha = np.asarray(alpha, dtype=float)
    ref_l, ref_d = reference_angles(alpha, alpha_dot, chord, w, gl, gd)
    a0 = bound.alpha0
    off = ref_l - a0
    off = np.where(off >= 0.0, np.maximum(off, _EPS), np.minimum(off, -_EPS))
    cl_ref = bound.coefficients(a0 + off)[0]
    cl_p, cl_n = bound.stall_lift()
    above = alpha >= a0
    m_ss = np.where(above, cl_p / (bound.stall_p - a0), cl_n / (bound.stall_n - a0))
    _, cd_dyn, cm_dyn, ch_dyn = bound.coefficients(ref_d)
    cl, cd, cm, ch = bound.coefficients(alpha)
    x = alpha - a0
    far = np.abs(x) > _EPS
    m_st = np.where(far, cl / np.where(far, x, 1.0), np.inf)
    cl_dyn = np.minimum(cl_ref / off, np.maximum(m_ss, m_st)) * x
    wgt = berg_weight(np.abs(alpha), np.where(alpha >= 0.0, bound.stall_p, -bound.stall_n), a_m)
    return (cl + wgt * (cl_dyn - cl), cd + wgt * (cd_dyn - cd), cm + wgt * (cm_dyn - cm),
            ch + wgt * (ch_dyn - ch))


def gormont_berg_scalar(grid: PolarGrid, alpha: float, alpha_dot: float, delta: float,
                        chord: float, w: float, gamma_l: float, gamma_d: float,
                        a_m: float = A_M) -> tuple[float, float, float, float]:
    """Pure-Python twin of :func:`gormont_berg` on a :class:`PolarGrid`."""
    cl, cd, cm, ch = grid.lookup(alpha, delta)
    a0, sp, sn = grid.angles(delta)
    x = abs(alpha)
    a_ss = sp if alpha >= 0.0 else -sn
    wgt = (a_m * a_ss - x) / ((a_m - 1.0) * a_ss)
    if wgt <= 0.0 or alpha_dot == 0.0:
        return cl, cd, cm, ch
    if wgt > 1.0:
        wgt = 1.0
    root = math.sqrt(abs(chord * alpha_dot / (2.0 * w))) if w > 1e-9 else 0.0
    k1 = 1.0 if alpha * alpha_dot > 0.0 else -0.5
    sgn = 1.0 if alpha > 0.0 else (-1.0 if alpha < 0.0 else 0.0)
    off = alpha - sgn * k1 * gamma_l * root - a0
    if 0.0 <= off < _EPS:
        off = _EPS
    elif -_EPS < off < 0.0:
        off = -_EPS
    s_ss = sp if alpha >= a0 else sn
    m = grid.lookup(a0 + off, delta)[0] / off
    cap = grid.lookup(s_ss, delta)[0] / (s_ss - a0)
    x = alpha - a0
    if abs(x) > _EPS:
        m_st = cl / x
        if m_st > cap:
            cap = m_st
        if m > cap:
            m = cap
    cl_dyn = m * x
    _, cd_dyn, cm_dyn, ch_dyn = grid.lookup(alpha - sgn * k1 * gamma_d * root, delta)
    return (cl + wgt * (cl_dyn - cl), cd + wgt * (cd_dyn - cd), cm + wgt * (cm_dyn - cm),
            ch + wgt * (ch_dyn - ch))


class DynamicStallState:
    """One blade's dynamic-stall memory for the time domain (alpha_dot from consecutive steps).

    The first call after construction or :meth:`reset`, or a call with ``dt <= 0``, returns
    the static polar (alpha_dot taken as 0).
    """

    __slots__ = ("chord", "gamma_l", "gamma_d", "a_m", "_prev")

    def __init__(self, chord: float, thickness_ratio: float, a_m: float = A_M) -> None:
        self.chord = float(chord)
        self.gamma_l, self.gamma_d = gormont_gammas(thickness_ratio)
        self.a_m = float(a_m)
        self._prev: float | None = None

    def reset(self) -> None:
        """Forget the previous angle of attack."""
        self._prev = None

    def coefficients(self, grid: PolarGrid, alpha: float, delta: float, w: float, dt: float
                     ) -> tuple[float, float, float, float]:
        """Dynamic (cl, cd, cm_c4, ch) at this step; ``dt`` in seconds since the last call."""
        prev = self._prev
        self._prev = alpha
        if prev is None or dt <= 0.0:
            return grid.lookup(alpha, delta)
        d = alpha - prev
        if d > math.pi:
            d -= 2.0 * math.pi
        elif d < -math.pi:
            d += 2.0 * math.pi
        return gormont_berg_scalar(grid, alpha, d / dt, delta, self.chord, w,
                                   self.gamma_l, self.gamma_d, self.a_m)
