"""Flap servo electromechanics for the software-in-the-loop rig.

One :class:`ServoModel` per flap, stepped at a fixed tick.  The command path is

    command -> dead-time FIFO -> second-order position response (omega_n, zeta)
            -> rate clamp -> travel clamp -> motor torque / current / voltage limits
            -> backlash between the gear output ("motor side") and the flap

and the electrical side follows from the load the flap really carries:

    tau_h = J d2delta/dt2 + b ddelta/dt - H          torque the gear must put on the flap
    tau_m = tau_h / (N eta)   when driving (tau_h * ddelta/dt > 0)
    tau_m = tau_h * eta / N   when back-driven or holding
    omega_m = N ddelta/dt,  I = tau_m / K_t,  V = R I + K_e omega_m   (K_e = K_t in SI)
    P = V I + P_quiescent     (V I clipped at 0 when the driver cannot regenerate)

(REFERENCES §9; standard DC-motor and gear-train relations.)  When the current or the
supply voltage would be exceeded, the driver delivers the nearest admissible current and
the flap acceleration follows from the torque balance, so a heavy hinge load really slows
the flap.  The electrical equation uses the motor speed at the end of the tick (implicit,
so the torque-speed limit stays stable however small the inertia); the second-order response is the exact zero-order-hold discretisation, so without limits
the sampled response equals the continuous one at the tick instants.

Sign conventions: flap deflection delta and its rate are positive in the +delta sense of
REFERENCES §2 (trailing edge toward the outer side); the aerodynamic hinge moment H is
positive when it pushes the flap toward +delta; current, voltage and motor speed are
positive when the motor drives the flap toward +delta.  Boundaries are in degrees, newton
metres, amperes, volts and watts; the state inside is in radians.

Backlash: the flap sits in a gap of ``backlash_deg`` around the gear output.  In contact
the gear can only push (never pull) the flap: resting at delta = x - gap/2 (flap behind the
gear output x) it can only push toward +delta, at delta = x + gap/2 only toward -delta; out of contact the flap moves under its own
inertia, friction and the hinge moment, and the motor carries no load (the whole inertia
and friction are lumped at the flap).  Contact closes inelastically.  The motor side is
limited to +-(travel - backlash/2), so the flap never leaves +-travel.
"""
from __future__ import annotations

import cmath
import logging
import math
from dataclasses import dataclass, field

from scipy.linalg import expm

from flapctl.errors import ProfileError

__all__ = [
    "ServoParams",
    "ServoModel",
    "frequency_response",
    "phase_lag_deg",
    "motor_operating_point",
]

log = logging.getLogger(__name__)

_RAD = math.pi / 180.0
_DEG = 180.0 / math.pi
_INF = math.inf


def _check_number(params: object, name: str, low: float, high: float,
                  low_open: bool, high_open: bool, expected: str) -> None:
    """Raise ProfileError unless ``params.name`` is a finite real number in the range."""
    value = getattr(params, name)
    source = getattr(params, "source")
    key = getattr(params, "key")
    path = f"{key}.{name}" if key else name
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ProfileError(source, path, value, expected)
    if value < low or value > high or (low_open and value == low) or (high_open and value == high):
        raise ProfileError(source, path, value, expected)


@dataclass(frozen=True, kw_only=True)
class ServoParams:
    """Parameters of one flap servo (units in the names; angles in degrees).

    ``source`` and ``key`` say where the values came from (file and dotted key path of the
    servo's table) so that a bad value is reported there.
    """

    travel_deg: float
    rate_limit_deg_s: float
    dead_time_s: float
    natural_freq_hz: float
    damping: float
    backlash_deg: float = 0.0
    kt_nm_a: float
    resistance_ohm: float
    gear_ratio: float
    gear_efficiency: float
    flap_inertia_kg_m2: float
    flap_friction_nm_s: float
    supply_v: float
    current_limit_a: float
    quiescent_w: float = 0.0
    regenerative: bool = False
    source: str = field(default="<ServoParams>", compare=False, repr=False)
    key: str = field(default="servo", compare=False, repr=False)

    def __post_init__(self) -> None:
        positive = "a finite number > 0"
        non_negative = "a finite number >= 0"
        for name in ("travel_deg", "rate_limit_deg_s", "natural_freq_hz", "damping",
                     "kt_nm_a", "resistance_ohm", "gear_ratio", "flap_inertia_kg_m2",
                     "supply_v", "current_limit_a"):
            _check_number(self, name, 0.0, _INF, True, False, positive)
        for name in ("dead_time_s", "flap_friction_nm_s", "quiescent_w"):
            _check_number(self, name, 0.0, _INF, False, False, non_negative)
        _check_number(self, "gear_efficiency", 0.0, 1.0, True, False, "a number in (0, 1]")
        _check_number(self, "backlash_deg", 0.0, 2.0 * self.travel_deg, False, True,
                      f"a number in [0, {2.0 * self.travel_deg:g}) (below twice the travel)")
        if not isinstance(self.regenerative, bool):
            path = f"{self.key}.regenerative" if self.key else "regenerative"
            raise ProfileError(self.source, path, self.regenerative, "true or false")


def _check_frequency(freq_hz: float) -> float:
    if isinstance(freq_hz, bool) or not isinstance(freq_hz, (int, float)) \
            or not math.isfinite(freq_hz) or freq_hz < 0.0:
        raise ProfileError("frequency_response", "freq_hz", freq_hz, "a finite number >= 0")
    return float(freq_hz)


def frequency_response(params: ServoParams, freq_hz: float) -> complex:
    """Linear part of the servo, G(j omega) = exp(-j omega tau_d) omega_n^2 / (s^2 + 2 zeta omega_n s + omega_n^2).

    Rate, travel, current and voltage limits and backlash are left out; the dead time is the
    continuous ``dead_time_s`` (the time-domain model rounds it to whole ticks).
    """
    w = 2.0 * math.pi * _check_frequency(freq_hz)
    wn = 2.0 * math.pi * params.natural_freq_hz
    r = w / wn
    second_order = 1.0 / complex(1.0 - r * r, 2.0 * params.damping * r)
    return second_order * cmath.exp(complex(0.0, -w * params.dead_time_s))


def phase_lag_deg(params: ServoParams, freq_hz: float) -> float:
    """Phase lag of the linear servo at ``freq_hz`` in degrees, positive when the flap lags.

    Unwrapped: atan2(2 zeta r, 1 - r^2) (0..180 deg) plus 360 f tau_d, so it may exceed 180.
    """
    f = _check_frequency(freq_hz)
    r = f / params.natural_freq_hz
    second_order = math.degrees(math.atan2(2.0 * params.damping * r, 1.0 - r * r))
    return second_order + 360.0 * f * params.dead_time_s


def motor_operating_point(params: ServoParams, hinge_torque_nm: float,
                          flap_rate_rad_s: float) -> tuple[float, float, float]:
    """Current (A), terminal voltage (V) and electrical power (W) for a hinge torque and rate.

    ``hinge_torque_nm`` is the torque the gear puts on the flap (J ddot + b dot - H), positive
    toward +delta; the gear is driving when torque and rate have the same sign, else it is
    back-driven (or holding).  No current or voltage limit is applied here.  The power
    includes the quiescent power and is clipped as in the model when not regenerative.
    """
    n, eta, kt = params.gear_ratio, params.gear_efficiency, params.kt_nm_a
    if hinge_torque_nm * flap_rate_rad_s > 0.0:
        motor_torque = hinge_torque_nm / (n * eta)
    else:
        motor_torque = hinge_torque_nm * eta / n
    current = motor_torque / kt
    voltage = params.resistance_ohm * current + kt * n * flap_rate_rad_s
    power = voltage * current
    if not params.regenerative and power < 0.0:
        power = 0.0
    return current, voltage, power + params.quiescent_w


class ServoModel:
    """Time-domain flap servo at a fixed tick ``dt_s`` (seconds).

    After each :meth:`step` read ``angle_deg`` and ``rate_deg_s`` (the flap), ``current_a``,
    ``voltage_v`` and ``power_w`` (electrical input incl. quiescent power), ``energy_j``
    (integral of power since reset), ``motor_angle_deg`` (gear output) and ``limited``
    (True when current or voltage limited the motion this tick).  Set ``jammed`` to freeze
    the flap: it holds still while the driver pushes the limit current.
    """

    __slots__ = (
        "params", "jammed", "limited", "energy_j", "_dt", "_fifo", "_fifo_pos", "_fifo_len",
        "_p11", "_p12", "_p21", "_p22", "_rate_max", "_travel", "_half", "_j", "_j_eff",
        "_b", "_n", "_eta", "_kt", "_ken", "_r", "_vs", "_imax", "_c_drive", "_c_back",
        "_beta_drive", "_beta_back", "_pq",
        "_regen", "_x", "_v", "_d", "_dd", "_side", "_i", "_u", "_p",
    )

    def __init__(self, params: ServoParams, dt_s: float) -> None:
        if isinstance(dt_s, bool) or not isinstance(dt_s, (int, float)) \
                or not math.isfinite(dt_s) or dt_s <= 0.0:
            raise ProfileError(params.source, f"{params.key}.dt_s", dt_s, "a finite number > 0")
        self.params = params
        self._dt = float(dt_s)
        wn = 2.0 * math.pi * params.natural_freq_hz
        zeta = params.damping
        phi = expm([[0.0, dt_s], [-wn * wn * dt_s, -2.0 * zeta * wn * dt_s]])
        self._p11, self._p12 = float(phi[0, 0]), float(phi[0, 1])
        self._p21, self._p22 = float(phi[1, 0]), float(phi[1, 1])
        steps = int(round(params.dead_time_s / dt_s))
        if abs(steps * dt_s - params.dead_time_s) > 1e-3 * dt_s:
            log.warning("%s: dead time %.6g s is not a whole number of %.6g s ticks; using %d ticks",
                        params.key, params.dead_time_s, dt_s, steps)
        self._fifo_len = steps
        self._fifo = [0.0] * steps
        self._fifo_pos = 0
        self._rate_max = params.rate_limit_deg_s * _RAD
        self._half = 0.5 * params.backlash_deg * _RAD
        self._travel = params.travel_deg * _RAD - self._half
        self._j = params.flap_inertia_kg_m2
        self._b = params.flap_friction_nm_s
        self._j_eff = self._j + self._b * dt_s
        self._n = params.gear_ratio
        self._eta = params.gear_efficiency
        self._kt = params.kt_nm_a
        self._r = params.resistance_ohm
        self._vs = params.supply_v
        self._imax = params.current_limit_a
        self._c_drive = 1.0 / (self._n * self._eta * self._kt)
        self._c_back = self._eta / (self._n * self._kt)
        self._ken = self._kt * self._n
        # end-of-tick rate per ampere: dv = dt * (N eta or N / eta) * K_t * I / (J + b dt)
        self._beta_drive = dt_s * self._n * self._eta * self._kt / self._j_eff
        self._beta_back = dt_s * self._n / self._eta * self._kt / self._j_eff
        self._pq = params.quiescent_w
        self._regen = params.regenerative
        self.reset(0.0)

    # ------------------------------------------------------------------ state read-out
    @property
    def angle_deg(self) -> float:
        """Flap deflection, degrees."""
        return self._d * _DEG

    @property
    def rate_deg_s(self) -> float:
        """Flap deflection rate, degrees per second."""
        return self._dd * _DEG

    @property
    def motor_angle_deg(self) -> float:
        """Gear output angle (flap scale, before the backlash), degrees."""
        return self._x * _DEG

    @property
    def current_a(self) -> float:
        """Motor current, amperes."""
        return self._i

    @property
    def voltage_v(self) -> float:
        """Motor terminal voltage, volts (|V| <= supply)."""
        return self._u

    @property
    def power_w(self) -> float:
        """Electrical input power incl. quiescent power, watts."""
        return self._p

    @property
    def dead_time_steps(self) -> int:
        """Dead time in whole ticks as simulated."""
        return self._fifo_len

    # ------------------------------------------------------------------ lifecycle
    def reset(self, angle_deg: float = 0.0) -> None:
        """Put flap and gear at rest at ``angle_deg``, fill the dead-time FIFO with it, clear energy and jam."""
        if isinstance(angle_deg, bool) or not isinstance(angle_deg, (int, float)) \
                or not math.isfinite(angle_deg) or abs(angle_deg * _RAD) > self._travel + 1e-12:
            limit = self._travel * _DEG
            raise ProfileError(self.params.source, f"{self.params.key}.reset.angle_deg", angle_deg,
                               f"a finite number within +-{limit:g} deg")
        a = angle_deg * _RAD
        self._x = self._d = a
        self._v = self._dd = 0.0
        self._side = 0
        self._fifo[:] = [a] * self._fifo_len
        self._fifo_pos = 0
        self._i = self._u = 0.0
        self._p = self._pq
        self.energy_j = 0.0
        self.jammed = False
        self.limited = False

    # ------------------------------------------------------------------ one tick
    def step(self, command_deg: float, hinge_moment_nm: float) -> None:
        """Advance one tick with the flap command (deg) and the aerodynamic hinge moment (N m, + toward +delta)."""
        if not (-_INF < command_deg < _INF and -_INF < hinge_moment_nm < _INF):
            self._reject(command_deg, hinge_moment_nm)
        cmd = command_deg * _RAD
        if self._fifo_len:
            k = self._fifo_pos
            fifo = self._fifo
            u = fifo[k]
            fifo[k] = cmd
            k += 1
            self._fifo_pos = 0 if k == self._fifo_len else k
        else:
            u = cmd
        if self.jammed:
            self._step_jammed(u)
            return
        dt = self._dt
        x = self._x
        v = self._v
        h = hinge_moment_nm
        # second-order position response (exact ZOH), then rate and travel clamps
        e = x - u
        xn = u + self._p11 * e + self._p12 * v
        vn = self._p21 * e + self._p22 * v
        rmax = self._rate_max
        if vn > rmax or vn < -rmax:
            vn = rmax if vn > 0.0 else -rmax
            xn = x + 0.5 * (v + vn) * dt
        tmax = self._travel
        if xn > tmax or xn < -tmax:
            xn = tmax if xn > 0.0 else -tmax
            if vn * xn > 0.0:
                vn = 0.0
        ken = self._ken
        half = self._half
        side = self._side
        self.limited = False
        if half == 0.0 or side != 0:
            a = (vn - v) / dt
            tau = self._j * a + self._b * vn - h
            if half != 0.0 and side * tau > 0.0:
                side = 0          # the gear would have to pull: the flap leaves it
                i = 0.0
            else:
                i = tau * (self._c_drive if tau * vn > 0.0 else self._c_back)
                volt = self._r * i + ken * vn
                if not (-self._imax <= i <= self._imax and -self._vs <= volt <= self._vs):
                    i, vn = self._limit(i, v, h)
                    xn = x + 0.5 * (v + vn) * dt
                    if xn > tmax or xn < -tmax:
                        xn = tmax if xn > 0.0 else -tmax
                        if vn * xn > 0.0:
                            vn = 0.0
                    self.limited = True
        else:
            i = 0.0
        self._side = side
        if side != 0 or half == 0.0:
            self._d = xn + side * half
            self._dd = vn
        else:
            self._free_flap(xn, vn, h)
        self._x = xn
        self._v = vn
        volt = self._r * i + ken * vn
        if volt > self._vs or volt < -self._vs:
            i, volt = self._rail(ken * vn)
        self._i = i
        self._u = volt
        p = volt * i
        if p < 0.0 and not self._regen:
            p = 0.0
        p += self._pq
        self._p = p
        self.energy_j += p * dt

    # ------------------------------------------------------------------ helpers
    def _reject(self, command_deg: float, hinge_moment_nm: float) -> None:
        name, value = ("command_deg", command_deg) if not (-_INF < command_deg < _INF) \
            else ("hinge_moment_nm", hinge_moment_nm)
        raise ProfileError(self.params.source, f"{self.params.key}.step.{name}", value,
                           "a finite number")

    def _rail(self, kew: float) -> tuple[float, float]:
        """Back-EMF ``kew`` (V) beyond the supply: freewheel diodes clamp the terminal to a rail."""
        volt = self._vs if kew > 0.0 else -self._vs
        return (volt - kew) / self._r, volt

    def _limit(self, i_des: float, v: float, h: float) -> tuple[float, float]:
        """Nearest admissible current to ``i_des`` and the end-of-tick flap rate it produces (rad/s).

        With the current I the flap rate after the tick is v_n = alpha + beta I (beta for the
        driving or the back-driven gear), and V = R I + K_e N v_n must stay within the supply,
        so each gear branch admits an interval of I.  The branch must agree with the sign of
        I v_n; when neither does, the gear friction holds the flap at rest for this tick.
        """
        alpha = v + self._dt * (h - self._b * v) / self._j_eff
        base = self._ken * alpha
        beta = self._beta_drive
        i = self._admissible(i_des, base, beta)
        vn = alpha + beta * i
        if i * vn > 0.0:
            return i, vn
        beta = self._beta_back
        i = self._admissible(i_des, base, beta)
        vn = alpha + beta * i
        if i * vn <= 0.0:
            return i, vn
        cap = min(self._imax, self._vs / self._r)
        return (cap if i_des > cap else (-cap if i_des < -cap else i_des)), 0.0

    def _admissible(self, i_des: float, base: float, beta: float) -> float:
        """Clamp ``i_des`` to the current limit and to |R I + K_e N (alpha + beta I)| <= V_s.

        If the back-EMF alone exceeds the supply, the freewheel diodes hold the terminal at a
        rail and the current leaves the limit: the rail's current is returned.
        """
        den = self._r + self._ken * beta
        v_lo = (-self._vs - base) / den
        v_hi = (self._vs - base) / den
        imax = self._imax
        if v_hi < -imax:
            return v_hi
        if v_lo > imax:
            return v_lo
        lo = v_lo if v_lo > -imax else -imax
        hi = v_hi if v_hi < imax else imax
        return lo if i_des < lo else (hi if i_des > hi else i_des)

    def _free_flap(self, xn: float, vn: float, h: float) -> None:
        """Flap out of contact: J ddot = H - b dot (semi-implicit Euler), then close the gap if reached."""
        dt = self._dt
        dd = (self._dd + dt * h / self._j) / (1.0 + dt * self._b / self._j)
        d = self._d + dd * dt
        half = self._half
        gap = d - xn
        if gap >= half:
            d, dd, self._side = xn + half, vn, 1
        elif gap <= -half:
            d, dd, self._side = xn - half, vn, -1
        self._d = d
        self._dd = dd

    def _step_jammed(self, u: float) -> None:
        """Flap and gear held still; the driver pushes the largest current toward the command."""
        self._v = self._dd = 0.0
        err = u - self._x
        i_mag = min(self._imax, self._vs / self._r)
        i = i_mag if err > 0.0 else (-i_mag if err < 0.0 else 0.0)
        volt = self._r * i
        self._i = i
        self._u = volt
        self._p = volt * i + self._pq
        self.limited = True
        self.energy_j += self._p * self._dt
