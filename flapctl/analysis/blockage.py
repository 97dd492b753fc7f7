"""Blockage correction of rotor performance measured in a confined channel.

Linear momentum actuator-disc theory (LMADT) for a disc in a channel with a rigid lid,
uniform inflow and no losses: Barnsley & Wellicome 1990 (closed wind tunnel), as used by
Bahaj, Molland, Chaplin & Batten 2007 (Renew. Energy 32:407-426) for flume tests, and the
same closed-channel theory as Garrett & Cummins 2007 (J. Fluid Mech. 588) (citations from
memory).

Notation (all speeds normalised by the upstream channel speed U_T, coefficients based on
U_T and the rotor frontal area A):

* B = A / A_c, blockage ratio (A_c = channel cross-section, water depth x width);
* a_w = u_w/U_T core-wake speed, a_t = u_t/U_T speed through the rotor, b = u_b/U_T
  bypass speed;
* C_T = b**2 - a_w**2 (thrust), C_P = C_T a_t (power).

Subscript T means "as measured in the tunnel / flume", F "equivalent free (open) flow".
The correction maps (C_P,T, lambda_T, C_T,T) to the open-flow speed U_F that gives the same
rotor speed and thrust: U_F/U_T = a_t + C_T,T/(4 a_t).  Without a streamwise load cell
the thrust must be estimated; the result carries ``thrust_source`` so reports can mark it.
No free-surface deformation is modelled (use it for Froude numbers U/sqrt(g h) below ~0.2).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from scipy import optimize as _opt

from flapctl.errors import FlapctlError, ProfileError

__all__ = [
    "BlockageError",
    "LmadtState",
    "BlockageCorrection",
    "blockage_ratio",
    "lmadt_state",
    "max_cp_confined",
    "max_cp_numeric",
    "correct",
    "pope_harper_speed_ratio",
    "maskell_speed_ratio",
]

_SOURCE = "flapctl.analysis.blockage"
#: Smallest core-wake speed ratio used as the lower end of the root bracket.
_AW_MIN = 1e-12
THRUST_SOURCES = ("measured", "estimated")


class BlockageError(FlapctlError, ValueError):
    """The blockage correction has no solution for the given input.

    ``key`` names the input, ``value`` the offending value, ``expected`` what would have a
    solution.
    """

    def __init__(self, key: str, value: object, expected: str) -> None:
        self.key = key
        self.value = value
        self.expected = expected
        super().__init__(f"{_SOURCE}: {key} = {value!r}: no blockage solution; expected "
                         f"{expected}")


def _bad(func: str, key: str, value: object, expected: str) -> ProfileError:
    return ProfileError(f"{_SOURCE}.{func}", key, value, expected)


def _real(func: str, key: str, value: object) -> float:
    try:
        x = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise _bad(func, key, value, "a real number") from None
    if not math.isfinite(x):
        raise _bad(func, key, value, "a finite real number")
    return x


def _blockage(func: str, B: object) -> float:
    x = _real(func, "B", B)
    if not 0.0 <= x < 1.0:
        raise _bad(func, "B", B, "a blockage ratio 0 <= B < 1")
    return x


def blockage_ratio(frontal_area_m2: float, channel_area_m2: float) -> float:
    """B = A / A_c: rotor frontal area (2 R H for straight blades) over channel section."""
    a = _real("blockage_ratio", "frontal_area_m2", frontal_area_m2)
    ac = _real("blockage_ratio", "channel_area_m2", channel_area_m2)
    if a <= 0.0:
        raise _bad("blockage_ratio", "frontal_area_m2", frontal_area_m2, "an area > 0 m^2")
    if ac <= a:
        raise _bad("blockage_ratio", "channel_area_m2", channel_area_m2,
                   f"a channel section larger than the frontal area {a} m^2")
    return a / ac


@dataclass(frozen=True)
class LmadtState:
    """Flow state of a disc in a channel (speeds over U_T; coefficients based on U_T)."""

    B: float
    a_w: float
    b: float
    a_t: float
    ct: float
    cp: float


def lmadt_state(B: float, a_w: float) -> LmadtState:
    """Closed-form LMADT state for blockage ``B`` and core-wake speed ratio ``a_w``.

    b = [(1 - a_w) + sqrt(B (1 - a_w)**2 + (1 - B)**2 a_w**2)] / (1 - B),
    a_t = a_w (a_w + b) / (2 a_w + b - 1), C_T = b**2 - a_w**2, C_P = C_T a_t.
    ``a_w`` in (0, 1]; a_w = 1 is the unloaded disc.
    """
    bb = _blockage("lmadt_state", B)
    aw = _real("lmadt_state", "a_w", a_w)
    if not 0.0 < aw <= 1.0:
        raise _bad("lmadt_state", "a_w", a_w, "a core-wake speed ratio 0 < a_w <= 1")
    return _state(bb, aw)


def _state(B: float, aw: float) -> LmadtState:
    one = 1.0 - aw
    b = (one + math.sqrt(B * one * one + (1.0 - B) ** 2 * aw * aw)) / (1.0 - B)
    a_t = aw * (aw + b) / (2.0 * aw + b - 1.0)
    ct = b * b - aw * aw
    return LmadtState(B=B, a_w=aw, b=b, a_t=a_t, ct=ct, cp=ct * a_t)


def max_cp_confined(B: float) -> float:
    """Garrett & Cummins 2007 maximum power coefficient (based on U_T): (16/27)/(1 - B)**2."""
    bb = _blockage("max_cp_confined", B)
    return (16.0 / 27.0) / (1.0 - bb) ** 2


def max_cp_numeric(B: float) -> tuple[float, float]:
    """Maximise the closed-form C_P(a_w) numerically; returns (C_P max, a_w at the max)."""
    bb = _blockage("max_cp_numeric", B)
    res = _opt.minimize_scalar(lambda aw: -_state(bb, aw).cp, bounds=(_AW_MIN, 1.0),
                               method="bounded", options={"xatol": 1e-12})
    return float(-res.fun), float(res.x)


@dataclass(frozen=True)
class BlockageCorrection:
    """Open-flow equivalents of a confined measurement.

    ``cp_f``, ``tsr_f``, ``ct_f`` are based on U_F; ``speed_ratio`` = U_F/U_T (>= 1 for a
    loaded rotor); ``a_w``, ``a_t`` the solved channel state; ``thrust_source`` is
    "measured" or "estimated" (how C_T,T was obtained).
    """

    cp_f: float
    tsr_f: float
    ct_f: float
    speed_ratio: float
    a_w: float
    a_t: float
    thrust_source: str


def correct(cp_t: float, tsr_t: float, ct_t: float, B: float,
            thrust_source: str = "measured") -> BlockageCorrection:
    """Correct (C_P,T, lambda_T, C_T,T) measured at blockage ``B`` to open flow.

    1. Solve b(a_w)**2 - a_w**2 = C_T,T for a_w in (0, 1] (C_T is monotonic in a_w).
    2. a_t from the closed form; U_F/U_T = a_t + C_T,T / (4 a_t).
    3. C_P,F = C_P,T (U_T/U_F)**3, lambda_F = lambda_T (U_T/U_F), C_T,F = C_T,T (U_T/U_F)**2.

    Raises :class:`BlockageError` when C_T,T lies outside [0, 1/(1 - sqrt(B))**2), where no
    momentum solution exists.
    """
    cp = _real("correct", "cp_t", cp_t)
    tsr = _real("correct", "tsr_t", tsr_t)
    ct = _real("correct", "ct_t", ct_t)
    bb = _blockage("correct", B)
    if thrust_source not in THRUST_SOURCES:
        raise _bad("correct", "thrust_source", thrust_source, "'measured' or 'estimated'")
    ct_max = _state(bb, _AW_MIN).ct
    if not 0.0 <= ct < ct_max:
        raise BlockageError("ct_t", ct, f"a thrust coefficient 0 <= C_T < {ct_max:.6g} "
                            f"(momentum limit at B = {bb:g})")
    if ct == 0.0:
        aw = 1.0
    else:
        aw = _opt.brentq(lambda x: _state(bb, x).ct - ct, _AW_MIN, 1.0, xtol=1e-14,
                         rtol=1e-14, maxiter=200)
    st = _state(bb, aw)
    ratio = st.a_t + ct / (4.0 * st.a_t)
    return BlockageCorrection(cp_f=cp / ratio ** 3, tsr_f=tsr / ratio, ct_f=ct / ratio ** 2,
                              speed_ratio=ratio, a_w=aw, a_t=st.a_t,
                              thrust_source=thrust_source)


def pope_harper_speed_ratio(B: float) -> float:
    """Quick bluff-body estimate U_F/U_T = 1 + B/4 (solid + wake blockage, Pope & Harper
    1966, *Low-Speed Wind Tunnel Testing*) (from memory).  A sanity bound for B <~ 0.1 only.
    """
    return 1.0 + 0.25 * _blockage("pope_harper_speed_ratio", B)


def maskell_speed_ratio(B: float, ct: float, m: float = 2.5) -> float:
    """Maskell-type estimate U_F/U_T = sqrt(1 + m C_T B) (Maskell 1963, ARC R&M 3400, with
    C_T in place of C_D) (from memory).  ``m`` is empirical; calibrate before use.
    """
    bb = _blockage("maskell_speed_ratio", B)
    c = _real("maskell_speed_ratio", "ct", ct)
    mm = _real("maskell_speed_ratio", "m", m)
    if c < 0.0:
        raise _bad("maskell_speed_ratio", "ct", ct, "a thrust coefficient >= 0")
    if mm <= 0.0:
        raise _bad("maskell_speed_ratio", "m", m, "an empirical constant > 0")
    return math.sqrt(1.0 + mm * c * bb)
