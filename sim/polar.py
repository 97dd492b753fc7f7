"""Section polars of a blade with a plain trailing-edge flap.

Conventions (REFERENCES section 2 and 4):

* ``alpha`` is the angle of attack in radians, positive when the relative flow arrives from
  the outer side of the rotor circle; inputs are wrapped to [-pi, pi).
* ``delta`` is the flap deflection in radians, positive = trailing edge moved toward the
  pressure side of positive-alpha flow, i.e. lift-increasing in the positive-alpha sense.
* ``cl``, ``cd`` are lift (normal to the relative wind) and drag (along it) coefficients,
  ``cm`` the pitching-moment coefficient about the quarter chord, positive nose-up in the
  positive-alpha sense, ``ch`` the flap hinge-moment coefficient ``H / (0.5 rho W^2 c_f^2)``,
  positive in the +delta sense (trailing edge driven further toward +delta).
* ``re`` is the chord Reynolds number.

Two polar sources share one interface: :class:`ThinSectionPolar`, a built-in plausibility
model of the symmetric NACA 4-digit family, and :class:`TablePolar`, user tables read from
CSV.  Both offer ``coefficients(alpha_rad, delta_rad, re)`` (numpy, broadcasting) and
``grid(re)``, a :class:`PolarGrid` precomputed at one Reynolds number whose ``lookup`` is
pure Python for the time-domain rig.
"""
from __future__ import annotations

import csv
import math
import re as _re
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

import numpy as np
from scipy.interpolate import RegularGridInterpolator

from flapctl.errors import ProfileError

__all__ = [
    "naca4_thickness",
    "thickness_from_section",
    "FlapDerivatives",
    "glauert_flap",
    "flap_effectiveness_factor",
    "viterna_corrigan",
    "SectionPolar",
    "BoundPolar",
    "ThinSectionPolar",
    "TablePolar",
    "PolarGrid",
    "RE_MIN",
    "RE_MAX",
]

RE_MIN = 1.0e4
"""Lowest Reynolds number of the built-in fits; lower values are evaluated at RE_MIN."""
RE_MAX = 1.0e6
"""Highest Reynolds number of the built-in fits; higher values are evaluated at RE_MAX."""

_PI = math.pi
_TWO_PI = 2.0 * math.pi
_HALF_PI = 0.5 * math.pi
_DEG = math.pi / 180.0


def _wrap(alpha: np.ndarray) -> np.ndarray:
    """Wrap angles (rad) to [-pi, pi)."""
    return np.mod(alpha + _PI, _TWO_PI) - _PI


def _smoothstep(s: np.ndarray) -> np.ndarray:
    """C1 ramp from 0 (s <= 0) to 1 (s >= 1)."""
    s = np.clip(s, 0.0, 1.0)
    return s * s * (3.0 - 2.0 * s)


def _sigmoid(x: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-x))


# --------------------------------------------------------------------------- geometry

def naca4_thickness(x: np.ndarray | float, t: float, closed_te: bool = False) -> np.ndarray:
    """Half-thickness y_t/c of a NACA 4-digit section at chord fraction ``x`` (0..1).

    y_t = 5t[0.2969 sqrt(x) - 0.1260x - 0.3516x^2 + 0.2843x^3 - a4 x^4], a4 = 0.1015
    (open trailing edge) or 0.1036 (closed); Jacobs, Ward & Pinkerton 1933, NACA Report 460.
    """
    x = np.asarray(x, dtype=float)
    a4 = 0.1036 if closed_te else 0.1015
    return 5.0 * t * (0.2969 * np.sqrt(x) - 0.1260 * x - 0.3516 * x**2 + 0.2843 * x**3 - a4 * x**4)


_SECTION_RE = _re.compile(r"^\s*NACA\s*-?\s*00(\d\d)\s*$", _re.IGNORECASE)


def thickness_from_section(name: str) -> float:
    """Thickness ratio t/c of a symmetric NACA 4-digit section name ("NACA 0021" -> 0.21)."""
    match = _SECTION_RE.match(name) if isinstance(name, str) else None
    if match is None or int(match.group(1)) == 0:
        raise ProfileError("section", "geometry.section", name,
                           "a symmetric NACA 4-digit section such as 'NACA 0018'")
    return int(match.group(1)) / 100.0


# --------------------------------------------------------------------------- flap theory

@dataclass(frozen=True)
class FlapDerivatives:
    """Thin-airfoil (Glauert) plain-flap results, all per radian.

    ``theta_f``: hinge position in the chordwise angle (cos theta_f = 2E - 1);
    ``tau``: flap effectiveness d(alpha_L0)/d(delta) in magnitude;
    ``dcl_ddelta``, ``dcm_ddelta``: lift and quarter-chord moment slopes;
    ``ch_alpha``, ``ch_delta``: hinge-moment derivatives (coefficient on c_f^2).
    """

    theta_f: float
    tau: float
    dcl_ddelta: float
    dcm_ddelta: float
    ch_alpha: float
    ch_delta: float


def glauert_flap(flap_chord_ratio: float) -> FlapDerivatives:
    """Glauert plain-flap derivatives for flap-chord ratio E = c_f/c (0 < E < 1), REFERENCES §4."""
    e = flap_chord_ratio
    if not (isinstance(e, (int, float)) and 0.0 < e < 1.0):
        raise ProfileError("flap", "geometry.flap_chord_ratio", e, "a number in (0, 1)")
    th = math.acos(2.0 * e - 1.0)
    s, c = math.sin(th), math.cos(th)
    tau = 1.0 - (th - s) / _PI
    dcl = 2.0 * (_PI - th + s)
    dcm = -0.5 * s * (1.0 - c)
    ch_a = -((_PI - th) * (c - 0.5) + s * (1.0 - 0.5 * c)) / e**2
    ch_d = -((1.0 - math.cos(2.0 * th)) - 2.0 * (_PI - th) ** 2 * (1.0 - 2.0 * c)
             + 4.0 * (_PI - th) * s) / (4.0 * _PI * e**2)
    return FlapDerivatives(th, tau, dcl, dcm, ch_a, ch_d)


_NO_FLAP = FlapDerivatives(_PI, 0.0, 0.0, 0.0, 0.0, 0.0)


def flap_effectiveness_factor(delta_rad: np.ndarray | float) -> np.ndarray:
    """Empirical large-deflection factor eta_delta multiplying the Glauert flap effectiveness.

    0.85 for |delta| <= 10 deg, a C1 cosine ramp to 0.5 at 50 deg, 0.5 beyond; even in delta.
    Shape after the plain-flap data of Abbott & von Doenhoff 1959, ch. 8 (from memory).
    """
    d = np.abs(np.asarray(delta_rad, dtype=float))
    s = np.clip((d - 10.0 * _DEG) / (40.0 * _DEG), 0.0, 1.0)
    return 0.85 - 0.35 * 0.5 * (1.0 - np.cos(_PI * s))


# --------------------------------------------------------------------------- post stall

def _cd_max(aspect_ratio: float | None) -> float:
    if aspect_ratio is None or aspect_ratio > 50.0:
        return 2.01
    return 1.11 + 0.018 * aspect_ratio


def _vc_constants(alpha_s: np.ndarray, cl_s: np.ndarray, cd_s: np.ndarray, cdm: float
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Viterna-Corrigan A2, B2 for the stall point (alpha_s, cl_s, cd_s)."""
    sin_s, cos_s = np.sin(alpha_s), np.cos(alpha_s)
    return ((cl_s - cdm * sin_s * cos_s) * sin_s / cos_s**2,
            (cd_s - cdm * sin_s**2) / cos_s)


def _vc_core(x: np.ndarray, a_s: np.ndarray, cl_s: np.ndarray, cd_s: np.ndarray,
             a2: np.ndarray, b2: np.ndarray, cdm: float, cd_180: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray]:
    """Viterna-Corrigan on x = |alpha| in [0, pi] (see :func:`viterna_corrigan`); over the
    last alpha_s the drag moves linearly from cd_s to ``cd_180``."""
    back = x > _HALF_PI
    xf = np.maximum(np.where(back, _PI - x, x), a_s)
    sx, cx = np.sin(xf), np.cos(xf)
    cl = cdm * sx * cx + a2 * cx * cx / sx
    cd = cdm * sx * sx + b2 * cx
    cl = np.where(back, -0.7 * cl, cl)
    tail = x > _PI - a_s
    cl = np.where(tail, -0.7 * cl_s * (_PI - x) / a_s, cl)
    cd = np.where(tail, cd_s + (cd_180 - cd_s) * (x - _PI + a_s) / a_s, cd)
    inner = x < a_s
    return np.where(inner, cl_s * x / a_s, cl), np.where(inner, cd_s, cd)


def viterna_corrigan(alpha: np.ndarray | float, alpha_s: np.ndarray | float,
                     cl_s: np.ndarray | float, cd_s: np.ndarray | float,
                     aspect_ratio: float | None) -> tuple[np.ndarray, np.ndarray]:
    """Viterna-Corrigan (NASA CP-2230, 1982) post-stall lift and drag, extended to +-180 deg.

    Stall point (alpha_s > 0, cl_s, cd_s) on the positive side; the negative side mirrors it
    (cl odd, cd even).  For alpha_s <= |alpha| <= 90 deg the published formulas
    cd = cd_max sin^2 a + B2 cos a, cl = cd_max sin a cos a + A2 cos^2 a / sin a; for
    90 deg < |alpha| <= 180 deg - alpha_s, cl = -0.7 cl(180 deg - |alpha|) and
    cd = cd(180 deg - |alpha|); over the last alpha_s before 180 deg cl falls linearly to 0
    and cd = cd_s (common practice, from memory; the flapped polars, whose two sides stall
    differently, blend cd there toward the mean of both sides so that it is continuous at
    180 deg).  Inside |alpha| < alpha_s, where the model
    does not apply, the function returns the secant line cl_s alpha/alpha_s and cd_s so that it
    is defined everywhere; callers supply their own attached polar there.
    ``aspect_ratio`` None means two-dimensional (cd_max = 2.01).
    """
    a = _wrap(np.asarray(alpha, dtype=float))
    a_s = np.asarray(alpha_s, dtype=float)
    cl_s = np.asarray(cl_s, dtype=float)
    cd_s = np.asarray(cd_s, dtype=float)
    cdm = _cd_max(aspect_ratio)
    a2, b2 = _vc_constants(a_s, cl_s, cd_s, cdm)
    cl, cd = _vc_core(np.abs(a), a_s, cl_s, cd_s, a2, b2, cdm, cd_s)
    return np.where(a >= 0.0, cl, -cl), cd


class _StallJoin:
    """Joins an attached polar to Viterna-Corrigan beyond stall angles alpha_n < 0 < alpha_p.

    ``stall_p``/``stall_n`` = (cl, cd, cm, ch) of the attached model at the stall points.
    Moment: the centre of pressure moves from c/4 at stall to c/2 at 90 deg and to 3c/4 at
    180 deg, cm = cm_s(1 - w) - C_N d (common practice, no source).  Hinge moment: blend from
    the attached value at stall to -0.5 C_N (uniform load, resultant at mid flap) over 15 deg
    (common practice, no source).  Continuous at both stall points and at +-180 deg.
    The stall-point constants are computed once; :meth:`apply` only does alpha-dependent work.
    """

    def __init__(self, alpha_p: np.ndarray, alpha_n: np.ndarray, stall_p: tuple[np.ndarray, ...],
                 stall_n: tuple[np.ndarray, ...], aspect_ratio: float | None) -> None:
        self.cdm = _cd_max(aspect_ratio)
        self.alpha_p = np.asarray(alpha_p, dtype=float)
        self.alpha_n = np.asarray(alpha_n, dtype=float)
        self.pos = (self.alpha_p, stall_p[0], stall_p[1], stall_p[2], stall_p[3])
        self.neg = (-self.alpha_n, -stall_n[0], stall_n[1], stall_n[2], stall_n[3])
        self.vc_pos = _vc_constants(self.alpha_p, stall_p[0], stall_p[1], self.cdm)
        self.vc_neg = _vc_constants(-self.alpha_n, -stall_n[0], stall_n[1], self.cdm)
        self.cd_180 = 0.5 * (np.asarray(stall_p[1]) + np.asarray(stall_n[1]))

    def apply_lift_drag(self, alpha: np.ndarray, cl_att: np.ndarray, cd_att: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray]:
        """(cl, cd) only, as in :meth:`apply` (the streamtube residual needs no moments)."""
        pos = alpha > 0.0
        a_s = np.where(pos, self.pos[0], self.neg[0])
        x = np.abs(alpha)
        cl_v, cd_v = _vc_core(x, a_s, np.where(pos, self.pos[1], self.neg[1]),
                              np.where(pos, self.pos[2], self.neg[2]),
                              np.where(pos, self.vc_pos[0], self.vc_neg[0]),
                              np.where(pos, self.vc_pos[1], self.vc_neg[1]), self.cdm,
                              self.cd_180)
        stalled = x > a_s
        return (np.where(stalled, np.where(pos, cl_v, -cl_v), cl_att),
                np.where(stalled, cd_v, cd_att))

    def apply(self, alpha: np.ndarray, attached: tuple[np.ndarray, ...]
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Full (cl, cd, cm, ch) at wrapped ``alpha`` from the attached values there."""
        pos = alpha > 0.0
        a_s, cl_s, cd_s, cm_s, ch_s = (np.where(pos, p, n) for p, n in zip(self.pos, self.neg))
        a2 = np.where(pos, self.vc_pos[0], self.vc_neg[0])
        b2 = np.where(pos, self.vc_pos[1], self.vc_neg[1])
        x = np.abs(alpha)
        cl_v, cd_v = _vc_core(x, a_s, cl_s, cd_s, a2, b2, self.cdm, self.cd_180)
        cl_v = np.where(pos, cl_v, -cl_v)
        cn = cl_v * np.cos(alpha) + cd_v * np.sin(alpha)
        w1 = np.clip((x - a_s) / (_HALF_PI - a_s), 0.0, 1.0)
        d = np.where(x <= _HALF_PI, 0.25 * w1, 0.25 + 0.25 * (x - _HALF_PI) / _HALF_PI)
        cm_v = cm_s * (1.0 - w1) - cn * d
        w2 = _smoothstep((x - a_s) / (15.0 * _DEG))
        ch_v = ch_s * (1.0 - w2) - 0.5 * cn * w2
        stalled = (alpha > self.alpha_p) | (alpha < self.alpha_n)
        return (np.where(stalled, cl_v, attached[0]), np.where(stalled, cd_v, attached[1]),
                np.where(stalled, cm_v, attached[2]), np.where(stalled, ch_v, attached[3]))


class BoundPolar:
    """A polar with flap deflection and Reynolds number fixed (arrays broadcast over alpha).

    ``coefficients(alpha_rad)`` gives (cl, cd, cm_c4, ch); ``alpha0``, ``stall_p``,
    ``stall_n`` hold the zero-lift and stall angles (rad).  Made by ``polar.at(delta, re)``;
    the streamtube solver evaluates many angles of attack at one flap pattern this way.
    """

    def __init__(self, polar: "SectionPolar", delta: np.ndarray, re: np.ndarray | float) -> None:
        self.polar = polar
        self.delta = np.asarray(delta, dtype=float)
        self.re = re
        self.thickness_ratio = polar.thickness_ratio
        self.flap_chord_ratio = polar.flap_chord_ratio
        self.stall_p, self.stall_n = polar.stall_angles_rad(re, self.delta)
        self.alpha0 = polar.zero_lift_angle_rad(self.delta, re)
        self._cl_stall: tuple[np.ndarray, np.ndarray] | None = None

    def stall_lift(self) -> tuple[np.ndarray, np.ndarray]:
        """cl at the positive and negative stall angles."""
        if self._cl_stall is None:
            self._cl_stall = (self.coefficients(self.stall_p)[0],
                              self.coefficients(self.stall_n)[0])
        return self._cl_stall

    def coefficients(self, alpha_rad: np.ndarray) -> tuple[np.ndarray, ...]:
        """(cl, cd, cm_c4, ch) at angle of attack ``alpha_rad``."""
        return self.polar.coefficients(alpha_rad, self.delta, self.re)

    def lift_drag(self, alpha_rad: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(cl, cd) at angle of attack ``alpha_rad``."""
        cl, cd, _, _ = self.coefficients(alpha_rad)
        return cl, cd


class _ThinBound(BoundPolar):
    """:class:`BoundPolar` of :class:`ThinSectionPolar` with all delta/Re work done once."""

    def __init__(self, polar: "ThinSectionPolar", delta: np.ndarray, re: np.ndarray | float
                 ) -> None:
        super().__init__(polar, delta, re)
        slope, a_ss, r, cd0 = polar._re_fits(re)
        d = self.delta
        f = polar.flap
        self._slope, self._a_ss, self._r = slope, a_ss, r
        self._k = 1.0 - r
        self._n = r / (1.0 - r)
        self._cd_base = cd0 + polar.flap_chord_ratio * np.sin(d) ** 2
        self._cm = f.dcm_ddelta * flap_effectiveness_factor(d) * d
        self._cha = f.ch_alpha
        self._chd = f.ch_delta * d
        self._no_flap = polar.flap_chord_ratio == 0.0
        self._a_pos = np.maximum(self.stall_p - self.alpha0, 1e-3)
        self._a_neg = np.maximum(self.alpha0 - self.stall_n, 1e-3)
        self._join = _StallJoin(self.stall_p, self.stall_n, self._attached(self.stall_p),
                                self._attached(self.stall_n), polar.aspect_ratio)

    def _lift(self, x: np.ndarray) -> np.ndarray:
        """Attached lift at x = alpha - alpha_L0; the curve's knee on each side sits at that
        side's stall angle, so a flap that moves the stall angle moves cl_max with it."""
        a_ss = np.where(x >= 0.0, self._a_pos, self._a_neg)
        xc = np.minimum(np.maximum(x, -a_ss), a_ss)
        return self._slope * xc * (1.0 - self._k * np.abs(xc / a_ss) ** self._n)

    def _attached(self, alpha: np.ndarray) -> tuple[np.ndarray, ...]:
        x = alpha - self.alpha0
        cl = self._lift(x)
        cd = self._cd_base + 0.8 * x * x
        cm = self._cm + 0.0 * x
        ch = self._cha * alpha + self._chd
        return cl, cd, cm, ch

    def lift_drag(self, alpha_rad: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        alpha = _wrap(np.asarray(alpha_rad, dtype=float))
        x = alpha - self.alpha0
        return self._join.apply_lift_drag(alpha, self._lift(x), self._cd_base + 0.8 * x * x)

    def coefficients(self, alpha_rad: np.ndarray) -> tuple[np.ndarray, ...]:
        alpha = _wrap(np.asarray(alpha_rad, dtype=float))
        cl, cd, cm, ch = self._join.apply(alpha, self._attached(alpha))
        if self._no_flap:
            ch = np.zeros_like(ch)
        return cl, cd, cm, ch


# --------------------------------------------------------------------------- interface

class SectionPolar(Protocol):
    """What the blade-element code needs from a polar."""

    thickness_ratio: float | None
    flap_chord_ratio: float

    def coefficients(self, alpha_rad: np.ndarray | float, delta_rad: np.ndarray | float,
                     re: np.ndarray | float
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]: ...

    def stall_angles_rad(self, re: np.ndarray | float, delta_rad: np.ndarray | float
                         ) -> tuple[np.ndarray, np.ndarray]: ...

    def zero_lift_angle_rad(self, delta_rad: np.ndarray | float,
                            re: np.ndarray | float | None = None) -> np.ndarray: ...

    def at(self, delta_rad: np.ndarray | float, re: np.ndarray | float) -> "BoundPolar": ...

    def grid(self, re: float, alpha_step_deg: float = 0.25, delta_step_deg: float = 0.5,
             delta_max_deg: float = 40.0) -> "PolarGrid": ...


# --------------------------------------------------------------------------- built-in model

_STALL_SHIFT = 0.5
"""Fraction of the flap's zero-lift-angle shift by which the stall angles move."""


class ThinSectionPolar:
    """Built-in plausibility polar of a symmetric NACA 4-digit section with a plain flap.

    Reynolds-number fits (Re clipped to [1e4, 1e6]; plausibility models shaped after the
    low-Re notes of REFERENCES §5 and Lissaman 1983, from memory, not measurements), with
    L = log10(Re) and s(x) = 1/(1 + e^-x):

    * lift slope a = 2 pi [0.60 + 0.36 s((L - 4.5)/0.45)]  (4.3 /rad at 1e4, 5.5 at 1e5, 6.0 at 1e6);
    * static stall angle (from the zero-lift angle) alpha_ss = 6 deg + 8 deg s((L - 4.7)/0.5);
    * stall sharpness r = cl_max/(a alpha_ss) = 0.68 + 0.16 s((L - 4.6)/0.5), so cl_max ~ 0.41
      at 1e4, 0.84 at 1e5, 0.98 at 2e5, 1.16 at 1e6; the attached curve cl = a x [1 - (1 - r)|x/alpha_ss|^n],
      n = r/(1 - r), x = alpha - alpha_L0, reaches cl_max with zero slope at alpha_ss (softer
      stall at low Re);
    * zero-lift drag: form factor (1 + 2t + 60t^4) (Hoerner, from memory) times twice the
      smooth maximum of the Blasius laminar and Prandtl-Schlichting skin friction, plus a
      laminar-bubble penalty 0.008/(1 + (Re/3e5)^2);
      drag cd = cd0 + 0.8 x^2 + E sin^2(delta) (flap drag, plausibility).

    Flap: zero-lift angle alpha_L0 = -tau eta(delta) delta (Glauert tau = d alpha_L0/d delta,
    eta from :func:`flap_effectiveness_factor`); both stall angles move by half that shift
    (each kept at least 2 deg on its own side of zero), so cl_max on the side the flap helps
    rises by about half the flap's lift increment and falls on the other side; quarter-chord moment
    cm = (dcm/d delta) eta delta; hinge moment ch = C_h_alpha alpha + C_h_delta delta while
    attached.  Beyond stall: Viterna-Corrigan, continuous at the stall points.
    ``flap_chord_ratio`` 0 means an unflapped section.
    """

    def __init__(self, thickness_ratio: float, flap_chord_ratio: float,
                 aspect_ratio: float | None = None) -> None:
        if not (isinstance(thickness_ratio, (int, float)) and 0.04 <= thickness_ratio <= 0.40):
            raise ProfileError("polar", "geometry.thickness_ratio", thickness_ratio,
                               "a thickness ratio in [0.04, 0.40]")
        if not (isinstance(flap_chord_ratio, (int, float)) and 0.0 <= flap_chord_ratio < 1.0):
            raise ProfileError("polar", "geometry.flap_chord_ratio", flap_chord_ratio,
                               "a number in [0, 1)")
        if aspect_ratio is not None and not (isinstance(aspect_ratio, (int, float))
                                             and aspect_ratio > 0.0):
            raise ProfileError("polar", "geometry.aspect_ratio", aspect_ratio,
                               "a positive number or None (two-dimensional)")
        self.thickness_ratio: float | None = float(thickness_ratio)
        self.flap_chord_ratio = float(flap_chord_ratio)
        self.aspect_ratio = aspect_ratio
        self.flap = glauert_flap(flap_chord_ratio) if flap_chord_ratio > 0.0 else _NO_FLAP
        t = self.thickness_ratio
        self._form_factor = 1.0 + 2.0 * t + 60.0 * t**4

    # Reynolds-number fits --------------------------------------------------------------
    def _re_fits(self, re: np.ndarray | float) -> tuple[np.ndarray, ...]:
        lg = np.log10(np.clip(np.asarray(re, dtype=float), RE_MIN, RE_MAX))
        slope = _TWO_PI * (0.60 + 0.36 * _sigmoid((lg - 4.5) / 0.45))
        a_ss = (6.0 + 8.0 * _sigmoid((lg - 4.7) / 0.5)) * _DEG
        r = 0.68 + 0.16 * _sigmoid((lg - 4.6) / 0.5)
        rec = 10.0**lg
        cf_lam = 1.328 / np.sqrt(rec)
        cf_tr = np.maximum(0.455 / lg**2.58 - 1700.0 / rec, 0.0)
        cf = (cf_lam**4 + cf_tr**4) ** 0.25
        cd0 = self._form_factor * 2.0 * cf + 0.008 / (1.0 + (rec / 3.0e5) ** 2)
        return slope, a_ss, r, cd0

    def lift_slope_per_rad(self, re: np.ndarray | float) -> np.ndarray:
        """Attached lift-curve slope at the zero-lift angle (1/rad)."""
        return self._re_fits(re)[0]

    def zero_lift_drag(self, re: np.ndarray | float) -> np.ndarray:
        """Drag coefficient at the zero-lift angle with the flap neutral."""
        return self._re_fits(re)[3]

    def max_lift(self, re: np.ndarray | float) -> np.ndarray:
        """Static cl_max of the unflapped section."""
        slope, a_ss, r, _ = self._re_fits(re)
        return r * slope * a_ss

    def zero_lift_angle_rad(self, delta_rad: np.ndarray | float,
                            re: np.ndarray | float | None = None) -> np.ndarray:
        """alpha_L0 = -tau eta(delta) delta (rad); independent of Re in this model."""
        d = np.asarray(delta_rad, dtype=float)
        return -self.flap.tau * flap_effectiveness_factor(d) * d

    def stall_angles_rad(self, re: np.ndarray | float, delta_rad: np.ndarray | float
                         ) -> tuple[np.ndarray, np.ndarray]:
        """Static stall angles (positive side > 0, negative side < 0), rad."""
        a_ss = self._re_fits(re)[1]
        a0 = self.zero_lift_angle_rad(delta_rad)
        floor, eps = 2.0 * _DEG, 1.0 * _DEG
        # the stall angles move by only part of the zero-lift shift, so a lift-increasing flap
        # raises cl_max on its side by about half its zero-alpha lift increment and a
        # lift-decreasing flap lowers it (plain flaps; plausibility, from memory after Abbott &
        # von Doenhoff ch. 8)
        p = _STALL_SHIFT * a0 + a_ss
        n = _STALL_SHIFT * a0 - a_ss
        p = 0.5 * (p + floor + np.sqrt((p - floor) ** 2 + eps**2))
        n = 0.5 * (n - floor - np.sqrt((n + floor) ** 2 + eps**2))
        return p, n

    def stall_angle_rad(self, re: np.ndarray | float, delta_rad: np.ndarray | float) -> np.ndarray:
        """Static stall angle on the positive-alpha side (rad)."""
        return self.stall_angles_rad(re, delta_rad)[0]

    def at(self, delta_rad: np.ndarray | float, re: np.ndarray | float) -> BoundPolar:
        """This polar at fixed flap deflection(s) and Reynolds number(s)."""
        return _ThinBound(self, np.asarray(delta_rad, dtype=float), re)

    def coefficients(self, alpha_rad: np.ndarray | float, delta_rad: np.ndarray | float,
                     re: np.ndarray | float
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(cl, cd, cm_c4, ch) at alpha (rad), flap delta (rad), chord Reynolds number re."""
        return self.at(delta_rad, re).coefficients(alpha_rad)

    def grid(self, re: float, alpha_step_deg: float = 0.25, delta_step_deg: float = 0.5,
             delta_max_deg: float = 40.0) -> "PolarGrid":
        """Precomputed :class:`PolarGrid` at one Reynolds number (built once per section,
        Reynolds number and resolution in this process, then shared: a grid is read-only)."""
        key = (self.thickness_ratio, self.flap_chord_ratio, self.aspect_ratio, float(re),
               alpha_step_deg, delta_step_deg, delta_max_deg)
        grid = _GRID_CACHE.get(key)
        if grid is None:
            grid = PolarGrid.build(self, re, alpha_step_deg, delta_step_deg, delta_max_deg)
            if len(_GRID_CACHE) >= _GRID_CACHE_SIZE:
                _GRID_CACHE.pop(next(iter(_GRID_CACHE)))
            _GRID_CACHE[key] = grid
        return grid


_GRID_CACHE: dict[tuple, "PolarGrid"] = {}
_GRID_CACHE_SIZE = 8      # the time-domain grid of sim.aero holds about 11 MB


# --------------------------------------------------------------------------- user tables

_REQUIRED = ("alpha_deg", "flap_deg", "re", "cl", "cd", "cm")
_OPTIONAL = ("ch",)


class TablePolar:
    """Polar read from a CSV table with columns alpha_deg, flap_deg, re, cl, cd, cm [, ch].

    The rows must form a rectangular grid (every alpha x flap x re combination exactly once,
    at least two flap values).  Interpolation is linear in alpha, flap angle and log10(Re);
    flap and Re outside the table are held at the nearest edge.  If the alpha column does not
    span -180..180 deg it must end inside (0, 90) deg on the positive side and (-90, 0) deg on
    the negative side; beyond it the polar continues with Viterna-Corrigan from the table edge.
    Without a ``ch`` column the hinge moment comes from the Glauert derivatives of
    ``flap_chord_ratio``.  ``thickness_ratio`` is only needed for dynamic stall.
    """

    def __init__(self, path: str | Path, flap_chord_ratio: float | None = None,
                 aspect_ratio: float | None = None, thickness_ratio: float | None = None) -> None:
        self.path = Path(path)
        self.source = str(self.path)
        self.aspect_ratio = aspect_ratio
        self.thickness_ratio = thickness_ratio
        rows, has_ch = self._read()
        if not has_ch and flap_chord_ratio is None:
            raise ProfileError(self.source, "ch", None,
                               "a 'ch' column, or flap_chord_ratio for Glauert hinge moments")
        self.flap_chord_ratio = float(flap_chord_ratio) if flap_chord_ratio is not None else 0.0
        self.flap = glauert_flap(flap_chord_ratio) if flap_chord_ratio else _NO_FLAP
        self.has_ch = has_ch
        self._build(rows, has_ch)

    # reading ----------------------------------------------------------------------------
    def _read(self) -> tuple[np.ndarray, bool]:
        try:
            text = self.path.read_text(encoding="utf-8")
        except OSError as exc:
            raise ProfileError(self.source, "file", str(exc), "a readable CSV file") from exc
        reader = csv.reader(line for line in text.splitlines()
                            if line.strip() and not line.lstrip().startswith("#"))
        try:
            header = [h.strip() for h in next(reader)]
        except StopIteration:
            raise ProfileError(self.source, "header", "", "a header row") from None
        for name in header:
            if name not in _REQUIRED + _OPTIONAL:
                raise ProfileError(self.source, f"header.{name}", name,
                                   f"one of {', '.join(_REQUIRED + _OPTIONAL)}")
        if len(set(header)) != len(header):
            raise ProfileError(self.source, "header", header, "each column once")
        for name in _REQUIRED:
            if name not in header:
                raise ProfileError(self.source, f"header.{name}", None, "a column named " + name)
        has_ch = "ch" in header
        cols = list(_REQUIRED) + (["ch"] if has_ch else [])
        index = [header.index(c) for c in cols]
        data: list[list[float]] = []
        for row_no, row in enumerate(reader, start=2):
            if len(row) != len(header):
                raise ProfileError(self.source, f"row {row_no}", row,
                                   f"{len(header)} fields")
            values = []
            for col, i in zip(cols, index):
                try:
                    v = float(row[i])
                except ValueError:
                    v = math.nan
                if not math.isfinite(v):
                    raise ProfileError(self.source, f"row {row_no}.{col}", row[i].strip(),
                                       "a finite number")
                values.append(v)
            self._check_row(row_no, values)
            data.append(values)
        if not data:
            raise ProfileError(self.source, "rows", 0, "at least one data row")
        return np.array(data), has_ch

    def _check_row(self, row_no: int, v: list[float]) -> None:
        if not -180.0 <= v[0] <= 180.0:
            raise ProfileError(self.source, f"row {row_no}.alpha_deg", v[0], "-180..180")
        if not -90.0 < v[1] < 90.0:
            raise ProfileError(self.source, f"row {row_no}.flap_deg", v[1], "-90 < flap < 90")
        if v[2] <= 0.0:
            raise ProfileError(self.source, f"row {row_no}.re", v[2], "a positive Reynolds number")
        if v[4] < 0.0:
            raise ProfileError(self.source, f"row {row_no}.cd", v[4], "cd >= 0")

    # grid -------------------------------------------------------------------------------
    def _axis(self, values: np.ndarray, name: str, min_count: int) -> np.ndarray:
        axis = np.unique(values)
        if axis.size < min_count:
            raise ProfileError(self.source, name, axis.tolist(), f"at least {min_count} values")
        return axis

    def _build(self, rows: np.ndarray, has_ch: bool) -> None:
        al = self._axis(rows[:, 0], "alpha_deg", 2)
        fl = self._axis(rows[:, 1], "flap_deg", 2)
        rs = self._axis(rows[:, 2], "re", 1)
        ia = np.searchsorted(al, rows[:, 0])
        jf = np.searchsorted(fl, rows[:, 1])
        kr = np.searchsorted(rs, rows[:, 2])
        count = np.zeros((al.size, fl.size, rs.size), dtype=int)
        np.add.at(count, (ia, jf, kr), 1)
        if np.any(count > 1):
            i, j, k = np.argwhere(count > 1)[0]
            raise ProfileError(self.source, "rows", (al[i], fl[j], rs[k]),
                               "each (alpha_deg, flap_deg, re) combination once")
        if np.any(count == 0):
            i, j, k = np.argwhere(count == 0)[0]
            raise ProfileError(self.source, "rows", (al[i], fl[j], rs[k]),
                               "a rectangular grid (this combination is missing)")
        self._full_circle = al[0] <= -180.0 and al[-1] >= 180.0
        if not self._full_circle and not (0.0 < al[-1] < 90.0 and -90.0 < al[0] < 0.0):
            raise ProfileError(self.source, "alpha_deg", (al[0], al[-1]),
                               "a range -180..180, or ends in (-90, 0) and (0, 90) deg")
        ncoef = 4 if has_ch else 3
        vals = np.zeros((al.size, fl.size, rs.size, ncoef))
        vals[ia, jf, kr, :] = rows[:, 3:3 + ncoef]
        self._alpha_axis = al * _DEG
        self._flap_axis = fl * _DEG
        self._logre_axis = np.log10(rs)
        self._single_re = rs.size == 1
        self._alpha_lim = (al[0] * _DEG, al[-1] * _DEG)
        self._flap_lim = (fl[0] * _DEG, fl[-1] * _DEG)
        self._re_lim = (rs[0], rs[-1])
        axes = (self._alpha_axis, self._flap_axis)
        self._interp = RegularGridInterpolator(
            axes if self._single_re else axes + (self._logre_axis,),
            vals[:, :, 0, :] if self._single_re else vals)
        self._build_angles(vals[..., 0])

    def _build_angles(self, cl: np.ndarray) -> None:
        """Stall angles (cl extremes within +-45 deg) and zero-lift angles per flap and Re."""
        al = self._alpha_axis
        window = np.abs(al) <= 45.0 * _DEG
        aw = al[window]
        clw = cl[window]
        pos = aw[np.argmax(clw, axis=0)]
        neg = aw[np.argmin(clw, axis=0)]
        zero = np.zeros_like(pos)
        for j in range(cl.shape[1]):
            for k in range(cl.shape[2]):
                zero[j, k] = self._zero_crossing(aw, clw[:, j, k], neg[j, k], pos[j, k])
        pos = np.maximum(pos, 0.5 * _DEG)
        neg = np.minimum(neg, -0.5 * _DEG)
        stack = np.stack([pos, neg, zero], axis=-1)
        if self._single_re:
            self._angles = RegularGridInterpolator((self._flap_axis,), stack[:, 0, :])
        else:
            self._angles = RegularGridInterpolator((self._flap_axis, self._logre_axis), stack)

    @staticmethod
    def _zero_crossing(alpha: np.ndarray, cl: np.ndarray, lo: float, hi: float) -> float:
        sel = (alpha >= lo) & (alpha <= hi)
        a, c = alpha[sel], cl[sel]
        for i in range(a.size - 1):
            if c[i] <= 0.0 <= c[i + 1] and c[i + 1] != c[i]:
                return float(a[i] - c[i] * (a[i + 1] - a[i]) / (c[i + 1] - c[i]))
        return float(a[np.argmin(np.abs(c))]) if a.size else 0.0

    def _clamp(self, delta: np.ndarray, re: np.ndarray | float | None) -> tuple[np.ndarray, ...]:
        d = np.clip(delta, *self._flap_lim)
        if re is None:
            re = math.sqrt(self._re_lim[0] * self._re_lim[1])
        lr = np.log10(np.clip(np.asarray(re, dtype=float), *self._re_lim))
        return d, lr

    def _angles_at(self, delta: np.ndarray | float, re: np.ndarray | float | None
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        d, lr = self._clamp(np.asarray(delta, dtype=float), re)
        d, lr = np.broadcast_arrays(d, lr)
        pts = d[..., None] if self._single_re else np.stack([d, lr], axis=-1)
        out = self._angles(pts.reshape(-1, pts.shape[-1])).reshape(d.shape + (3,))
        return out[..., 0], out[..., 1], out[..., 2]

    def stall_angles_rad(self, re: np.ndarray | float, delta_rad: np.ndarray | float
                         ) -> tuple[np.ndarray, np.ndarray]:
        """Angles of the table's cl maximum and minimum within +-45 deg (rad)."""
        p, n, _ = self._angles_at(delta_rad, re)
        return p, n

    def stall_angle_rad(self, re: np.ndarray | float, delta_rad: np.ndarray | float) -> np.ndarray:
        """Static stall angle on the positive-alpha side (rad)."""
        return self.stall_angles_rad(re, delta_rad)[0]

    def zero_lift_angle_rad(self, delta_rad: np.ndarray | float,
                            re: np.ndarray | float | None = None) -> np.ndarray:
        """Zero-lift angle (rad); ``re`` None uses the geometric mean of the table's Re range."""
        return self._angles_at(delta_rad, re)[2]

    def _table(self, alpha: np.ndarray, d: np.ndarray, lr: np.ndarray) -> tuple[np.ndarray, ...]:
        alpha, d, lr = np.broadcast_arrays(alpha, d, lr)
        pts = np.stack([alpha, d] if self._single_re else [alpha, d, lr], axis=-1)
        out = self._interp(pts.reshape(-1, pts.shape[-1])).reshape(alpha.shape + (-1,))
        cl, cd, cm = out[..., 0], out[..., 1], out[..., 2]
        if self.has_ch:
            ch = out[..., 3]
        else:
            ch = self.flap.ch_alpha * alpha + self.flap.ch_delta * d
        return cl, cd, cm, ch

    def coefficients(self, alpha_rad: np.ndarray | float, delta_rad: np.ndarray | float,
                     re: np.ndarray | float
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(cl, cd, cm_c4, ch) at alpha (rad), flap delta (rad), chord Reynolds number re."""
        alpha = _wrap(np.asarray(alpha_rad, dtype=float))
        d, lr = self._clamp(np.asarray(delta_rad, dtype=float), re)
        if self._full_circle:
            return self._table(np.clip(alpha, *self._alpha_lim), d, lr)
        lo, hi = self._alpha_lim
        att = self._table(np.clip(alpha, lo, hi), d, lr)
        if not self.has_ch:
            p, n, _ = self._angles_at(d, 10.0**lr)
            ch_att = self.flap.ch_alpha * np.clip(alpha, n, p) + self.flap.ch_delta * d
            att = (att[0], att[1], att[2], ch_att)
        stall_p = self._table(np.full_like(d, hi), d, lr)
        stall_n = self._table(np.full_like(d, lo), d, lr)
        if not self.has_ch:
            stall_p = stall_p[:3] + (self.flap.ch_alpha * np.minimum(hi, p) + self.flap.ch_delta * d,)
            stall_n = stall_n[:3] + (self.flap.ch_alpha * np.maximum(lo, n) + self.flap.ch_delta * d,)
        return _StallJoin(np.asarray(hi), np.asarray(lo), stall_p, stall_n,
                          self.aspect_ratio).apply(alpha, att)

    def at(self, delta_rad: np.ndarray | float, re: np.ndarray | float) -> BoundPolar:
        """This polar at fixed flap deflection(s) and Reynolds number(s)."""
        return BoundPolar(self, np.asarray(delta_rad, dtype=float), re)

    def grid(self, re: float, alpha_step_deg: float = 0.25, delta_step_deg: float = 0.5,
             delta_max_deg: float = 40.0) -> "PolarGrid":
        """Precomputed :class:`PolarGrid` at one Reynolds number."""
        return PolarGrid.build(self, re, alpha_step_deg, delta_step_deg, delta_max_deg)


# --------------------------------------------------------------------------- lookup grid

class PolarGrid:
    """Polar precomputed at one Reynolds number on alpha in [-180, 180] deg x delta in
    [-delta_max, +delta_max]; :meth:`lookup` is pure-Python bilinear interpolation, O(1).

    Alpha wraps around the circle; delta beyond the grid is held at the edge.  The grid also
    carries the zero-lift and stall angles per delta (:meth:`angles`) for dynamic stall.
    """

    __slots__ = ("re", "alpha_step_rad", "delta_step_rad", "delta_max_rad", "n_alpha", "n_delta",
                 "_t", "_inv_da", "_inv_dd", "_turn", "_row", "_jmax", "_alpha0", "_stall_p",
                 "_stall_n", "thickness_ratio")

    def __init__(self, re: float, alpha_step_deg: float, delta_step_deg: float,
                 delta_max_deg: float, table: np.ndarray, angles: np.ndarray,
                 thickness_ratio: float | None) -> None:
        """``table`` shape (n_delta, n_alpha, 4) of (cl, cd, cm, ch); ``angles`` (n_delta, 3)."""
        self.re = float(re)
        self.n_delta, self.n_alpha = table.shape[0], table.shape[1]
        self.alpha_step_rad = alpha_step_deg * _DEG
        self.delta_step_rad = delta_step_deg * _DEG
        self.delta_max_rad = delta_max_deg * _DEG
        self.thickness_ratio = thickness_ratio
        # a list, not array('d'): indexing a list is about twice as fast (no float boxing); the
        # price is 32 bytes a value, so the time-domain grid is kept coarse enough (sim.aero)
        self._t: list[float] = np.ascontiguousarray(table, dtype=float).ravel().tolist()
        self._inv_da = 1.0 / self.alpha_step_rad
        self._inv_dd = 1.0 / self.delta_step_rad if self.n_delta > 1 else 0.0
        self._turn = float(self.n_alpha - 1)
        self._row = 4 * self.n_alpha
        self._jmax = self.n_delta - 1
        self._alpha0 = angles[:, 0].tolist()
        self._stall_p = angles[:, 1].tolist()
        self._stall_n = angles[:, 2].tolist()

    @staticmethod
    def _steps(alpha_step_deg: float, delta_step_deg: float, delta_max_deg: float
               ) -> tuple[int, int]:
        def count(span: float, step: float, key: str) -> int:
            if not (isinstance(step, (int, float)) and step > 0.0):
                raise ProfileError("polar grid", key, step, "a positive step in degrees")
            n = round(span / step)
            if n < 1 or abs(n * step - span) > 1e-9 * span:
                raise ProfileError("polar grid", key, step, f"a step dividing {span} deg evenly")
            return n
        if not (isinstance(delta_max_deg, (int, float)) and 0.0 < delta_max_deg < 90.0):
            raise ProfileError("polar grid", "delta_max_deg", delta_max_deg, "0 < value < 90")
        return (count(360.0, alpha_step_deg, "alpha_step_deg") + 1,
                2 * count(delta_max_deg, delta_step_deg, "delta_step_deg") + 1)

    @classmethod
    def build(cls, polar: SectionPolar, re: float, alpha_step_deg: float = 0.25,
              delta_step_deg: float = 0.5, delta_max_deg: float = 40.0) -> "PolarGrid":
        """Evaluate ``polar`` at Reynolds number ``re`` on the grid."""
        if not (isinstance(re, (int, float)) and math.isfinite(re) and re > 0.0):
            raise ProfileError("polar grid", "re", re, "a positive finite Reynolds number")
        n_a, n_d = cls._steps(alpha_step_deg, delta_step_deg, delta_max_deg)
        alpha = np.linspace(-_PI, _PI, n_a)
        delta = np.linspace(-delta_max_deg * _DEG, delta_max_deg * _DEG, n_d)
        coef = polar.coefficients(alpha[None, :], delta[:, None], re)
        table = np.stack([np.broadcast_to(c, (n_d, n_a)) for c in coef], axis=-1)
        # the alpha = +pi column repeats -pi: keep the table periodic exactly
        table[:, -1, :] = table[:, 0, :]
        p, n = polar.stall_angles_rad(re, delta)
        a0 = polar.zero_lift_angle_rad(delta, re)
        angles = np.stack([np.broadcast_to(a0, delta.shape), np.broadcast_to(p, delta.shape),
                           np.broadcast_to(n, delta.shape)], axis=-1)
        return cls(re, alpha_step_deg, delta_step_deg, delta_max_deg, table, angles,
                   polar.thickness_ratio)

    def lookup(self, alpha_rad: float, delta_rad: float) -> tuple[float, float, float, float]:
        """(cl, cd, cm_c4, ch) by bilinear interpolation; pure Python scalars."""
        x = (alpha_rad + 3.141592653589793) * self._inv_da
        turn = self._turn
        if x < 0.0 or x >= turn:
            x %= turn
        i = int(x)
        fx = x - i
        y = (delta_rad + self.delta_max_rad) * self._inv_dd
        jmax = self._jmax
        if y <= 0.0:
            j = 0
            fy = 0.0
        elif y >= jmax:
            j = jmax - 1 if jmax > 0 else 0
            fy = 1.0 if jmax > 0 else 0.0
        else:
            j = int(y)
            fy = y - j
        t = self._t
        k = (j * self.n_alpha + i) * 4
        k2 = k + self._row if jmax > 0 else k
        gx = 1.0 - fx
        gy = 1.0 - fy
        w00 = gx * gy
        w10 = fx * gy
        w01 = gx * fy
        w11 = fx * fy
        return (t[k] * w00 + t[k + 4] * w10 + t[k2] * w01 + t[k2 + 4] * w11,
                t[k + 1] * w00 + t[k + 5] * w10 + t[k2 + 1] * w01 + t[k2 + 5] * w11,
                t[k + 2] * w00 + t[k + 6] * w10 + t[k2 + 2] * w01 + t[k2 + 6] * w11,
                t[k + 3] * w00 + t[k + 7] * w10 + t[k2 + 3] * w01 + t[k2 + 7] * w11)

    def angles(self, delta_rad: float) -> tuple[float, float, float]:
        """(zero-lift angle, positive stall angle, negative stall angle) at delta, rad."""
        y = (delta_rad + self.delta_max_rad) * self._inv_dd
        jmax = self._jmax
        if jmax == 0 or y <= 0.0:
            return self._alpha0[0], self._stall_p[0], self._stall_n[0]
        if y >= jmax:
            return self._alpha0[jmax], self._stall_p[jmax], self._stall_n[jmax]
        j = int(y)
        f = y - j
        g = 1.0 - f
        return (self._alpha0[j] * g + self._alpha0[j + 1] * f,
                self._stall_p[j] * g + self._stall_p[j + 1] * f,
                self._stall_n[j] * g + self._stall_n[j + 1] * f)
