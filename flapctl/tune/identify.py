"""Flap-servo identification: dead time, second-order dynamics and rate limit from a record.

Model structure (REFERENCES section 9, the same as :class:`sim.servo.ServoModel`): the command is
held over each tick (zero-order hold), delayed by the dead time tau_d, passed through
omega_n^2 / (s^2 + 2 zeta omega_n s + omega_n^2), then the flap rate is clamped at the rate limit.
The dead time is a continuous parameter: with tau_d = (m + phi) dt (m whole ticks, 0 <= phi < 1)
the delayed held command switches inside each tick, and the exact discretisation is

    x[k+1] = Phi x[k] + Gamma_a u[k-m-1] + Gamma_b u[k-m]
    Gamma_b = int_0^{(1-phi) dt} e^{A s} ds B,   Gamma_a = e^{A (1-phi) dt} int_0^{phi dt} e^{A s} ds B

(the modified z-transform of a delayed ZOH system, e.g. Astrom & Wittenmark, Computer-Controlled
Systems, from memory).  For tau_d a whole number of ticks it equals the SIL model exactly.

Record convention (as :func:`flapctl.tune.excite.excite_sil` and the rig log): ``feedback_deg[k]``
is the flap angle at t_k, read before command k is applied.  The servo is taken to be at rest at
``feedback_deg[0]`` with every earlier command equal to it.

Fitting: a coarse grid over natural frequency, damping and whole-tick dead times (the dead-time
axis evaluated at once by cross-correlation) gives the starting point; scipy.optimize.least_squares
refines (tau_d, f_n, zeta).  If the measured peak flap rate stays clearly below what the fitted
linear model predicts, the rate limit is added as a fourth parameter (started at the measured peak
slope) and kept if it explains the record better; otherwise it is reported as "not reached".
Standard errors come from the Jacobian, s^2 (J^T J)^-1 with s^2 = SSR/(n - p); they assume white
residuals and are optimistic when the residual is mostly model error.
"""
from __future__ import annotations

import logging
import math
import re
import tomllib
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure
from scipy.optimize import least_squares
from scipy.signal import correlate, lfilter

from flapctl.errors import ProfileError
from flapctl.profile import load_profile
from sim.servo import ServoParams

__all__ = ["ServoFit", "identify", "simulate_servo", "fit_figure", "write_profile_with_fit"]

log = logging.getLogger(__name__)

_SOURCE = "identify"
_DAMPING_GRID = (0.3, 0.5, 0.7, 0.9, 1.2, 1.7)
_FREQ_GRID_POINTS = 32
_DAMPING_BOUNDS = (0.05, 5.0)        # the profile's accepted damping range
_SATURATION_MARGIN = 1.02            # model peak slope above measured peak by this -> try a rate limit
_RATE_MODEL_GAIN = 0.7               # keep the rate limit if it cuts the residual RMS below this fraction


@dataclass(frozen=True)
class ServoFit:
    """Identified servo (units in the names; standard errors ``*_se*`` from the Jacobian).

    ``rate_limit_deg_s`` is None when the record never reached the rate limit ("not reached");
    ``peak_rate_deg_s`` is the largest measured flap rate either way.
    """

    dead_time_s: float
    natural_freq_hz: float
    damping: float
    rate_limit_deg_s: float | None
    residual_rms_deg: float
    n_samples: int
    dt_s: float
    peak_rate_deg_s: float
    dead_time_se_s: float
    natural_freq_se_hz: float
    damping_se: float
    rate_limit_se_deg_s: float | None

    @property
    def rate_limit_reached(self) -> bool:
        return self.rate_limit_deg_s is not None

    def rate_limit_text(self) -> str:
        if self.rate_limit_deg_s is None:
            return f"not reached (peak flap rate {self.peak_rate_deg_s:.1f} deg/s)"
        return f"{self.rate_limit_deg_s:.1f} +- {self.rate_limit_se_deg_s:.1f} deg/s"

    def describe(self) -> str:
        return (f"dead time {self.dead_time_s * 1e3:.2f} +- {self.dead_time_se_s * 1e3:.2f} ms, "
                f"natural frequency {self.natural_freq_hz:.3f} +- {self.natural_freq_se_hz:.3f} Hz, "
                f"damping {self.damping:.3f} +- {self.damping_se:.3f}, rate limit {self.rate_limit_text()}, "
                f"residual {self.residual_rms_deg:.4f} deg RMS over {self.n_samples} samples")

    def frequency_response(self, freq_hz: object) -> np.ndarray:
        """Linear G(j 2 pi f) = exp(-j w tau_d) w_n^2 / (w_n^2 - w^2 + 2 j zeta w_n w) (no limits)."""
        w = 2.0 * math.pi * np.asarray(freq_hz, dtype=float)
        wn = 2.0 * math.pi * self.natural_freq_hz
        return wn * wn / (wn * wn - w * w + 2j * self.damping * wn * w) * np.exp(-1j * w * self.dead_time_s)

    def simulate(self, command_deg: object, initial_deg: float | None = None) -> np.ndarray:
        """Flap angle (deg) at each tick for a command record, by the identified model."""
        cmd = np.asarray(command_deg, dtype=float)
        y0 = float(cmd[0]) if initial_deg is None else float(initial_deg)
        return simulate_servo(cmd, self.dt_s, self.dead_time_s, self.natural_freq_hz, self.damping,
                              self.rate_limit_deg_s, y0)

    def servo_params(self, base: ServoParams) -> ServoParams:
        """``base`` with the identified dead time, natural frequency, damping (and rate limit if reached)."""
        changes: dict[str, float] = {"dead_time_s": self.dead_time_s, "natural_freq_hz": self.natural_freq_hz,
                                     "damping": self.damping}
        if self.rate_limit_deg_s is not None:
            changes["rate_limit_deg_s"] = self.rate_limit_deg_s
        return replace(base, **changes)


# --------------------------------------------------------------------------- model
def _expm(m: np.ndarray) -> np.ndarray:
    """Matrix exponential of a small matrix: scaling and squaring of a 16-term Taylor series.

    Called hundreds of times per fit on 3x3 matrices, where this is far cheaper than a general
    Pade routine; with the scaled norm <= 1/4 the series is accurate to rounding.
    """
    norm = float(np.max(np.sum(np.abs(m), axis=1)))
    squarings = max(0, int(math.ceil(math.log2(norm / 0.25)))) if norm > 0.25 else 0
    x = m / (2.0 ** squarings)
    eye = np.eye(m.shape[0])
    out = eye.copy()
    for j in range(16, 0, -1):          # Horner: I + x/1 (I + x/2 (I + ...))
        out = eye + (x @ out) / j
    for _ in range(squarings):
        out = out @ out
    return out


def _discretise(dt: float, tau: float, fn: float, zeta: float) -> tuple[int, np.ndarray, np.ndarray, np.ndarray]:
    """(m, Phi, Gamma_a, Gamma_b) of the delayed-ZOH second-order model (see module docstring)."""
    wn = 2.0 * math.pi * fn
    aug = np.zeros((3, 3))
    aug[0, 1] = 1.0
    aug[1, 0] = -wn * wn
    aug[1, 1] = -2.0 * zeta * wn
    aug[1, 2] = wn * wn
    steps = tau / dt
    m = int(math.floor(steps + 1e-12))
    phi = min(max(steps - m, 0.0), 1.0)
    late = _expm(aug * ((1.0 - phi) * dt))
    early = _expm(aug * (phi * dt))
    Phi = late[:2, :2] @ early[:2, :2]
    gamma_b = late[:2, 2].copy()
    gamma_a = late[:2, :2] @ early[:2, 2]
    return m, Phi, gamma_a, gamma_b


def _linear_response(u: np.ndarray, dt: float, tau: float, fn: float, zeta: float) -> np.ndarray:
    """Deviation response y[k] (state at t_k) to deviation commands u, zero initial state."""
    m, Phi, ga, gb = _discretise(dt, tau, fn, zeta)
    cb = Phi[0, 1] * gb[1] - Phi[1, 1] * gb[0]
    ca = Phi[0, 1] * ga[1] - Phi[1, 1] * ga[0]
    b = np.zeros(m + 4)
    b[m + 1] = gb[0]
    b[m + 2] = cb + ga[0]
    b[m + 3] = ca
    a = np.array([1.0, -(Phi[0, 0] + Phi[1, 1]), Phi[0, 0] * Phi[1, 1] - Phi[0, 1] * Phi[1, 0]])
    return lfilter(b, a, u)


def _limited_response(u: np.ndarray, dt: float, tau: float, fn: float, zeta: float, rate: float) -> np.ndarray:
    """As :func:`_linear_response` with the flap rate clamped at ``rate`` (deg/s) like ServoModel."""
    m, Phi, ga, gb = _discretise(dt, tau, fn, zeta)
    p11, p12, p21, p22 = float(Phi[0, 0]), float(Phi[0, 1]), float(Phi[1, 0]), float(Phi[1, 1])
    a0, a1, b0, b1 = float(ga[0]), float(ga[1]), float(gb[0]), float(gb[1])
    n = u.size
    padded = [0.0] * (m + 1) + u.tolist()
    out = [0.0] * n
    x = v = 0.0
    half = 0.5 * dt
    for k in range(n):
        out[k] = x
        ua = padded[k]          # u[k - m - 1]
        ub = padded[k + 1]      # u[k - m]
        xn = p11 * x + p12 * v + a0 * ua + b0 * ub
        vn = p21 * x + p22 * v + a1 * ua + b1 * ub
        if vn > rate or vn < -rate:
            vn = rate if vn > 0.0 else -rate
            xn = x + half * (v + vn)
        x, v = xn, vn
    return np.asarray(out)


def simulate_servo(command_deg: object, dt_s: float, dead_time_s: float, natural_freq_hz: float,
                   damping: float, rate_limit_deg_s: float | None = None, initial_deg: float = 0.0) -> np.ndarray:
    """Flap angle (deg) at t_k = k dt for commands held over each tick, servo at rest at ``initial_deg``."""
    cmd = np.asarray(command_deg, dtype=float) - initial_deg
    if rate_limit_deg_s is None:
        y = _linear_response(cmd, dt_s, dead_time_s, natural_freq_hz, damping)
    else:
        y = _limited_response(cmd, dt_s, dead_time_s, natural_freq_hz, damping, rate_limit_deg_s)
    return y + initial_deg


def _peak_slope(y: np.ndarray, dt: float) -> float:
    """Largest |dy/dt| (deg/s) by the 4-tick central difference (exact on a constant-rate ramp)."""
    if y.size < 5:
        return float(np.max(np.abs(np.diff(y)))) / dt if y.size > 1 else 0.0
    return float(np.max(np.abs(y[4:] - y[:-4]))) / (4.0 * dt)


# --------------------------------------------------------------------------- fitting
def _check_record(t: object, command_deg: object, feedback_deg: object, dt_s: object) -> tuple[np.ndarray, np.ndarray, float]:
    if isinstance(dt_s, bool) or not isinstance(dt_s, (int, float)) or not math.isfinite(dt_s) or dt_s <= 0.0:
        raise ProfileError(_SOURCE, "dt_s", dt_s, "a tick period > 0 s")
    arrays = []
    for name, value in (("t", t), ("command_deg", command_deg), ("feedback_deg", feedback_deg)):
        try:
            arr = np.asarray(value, dtype=float)
        except (TypeError, ValueError):
            raise ProfileError(_SOURCE, name, value, "a 1-D array of finite numbers") from None
        if arr.ndim != 1 or not np.all(np.isfinite(arr)):
            raise ProfileError(_SOURCE, name, value, "a 1-D array of finite numbers")
        arrays.append(arr)
    tt, u, y = arrays
    if not (tt.size == u.size == y.size):
        raise ProfileError(_SOURCE, "feedback_deg", f"lengths {tt.size}, {u.size}, {y.size}",
                           "t, command_deg and feedback_deg of equal length")
    if u.size < 50:
        raise ProfileError(_SOURCE, "command_deg", f"{u.size} samples", "a record of at least 50 ticks")
    steps = np.diff(tt)
    if np.any(np.abs(steps - dt_s) > 1e-3 * dt_s + 1e-9):
        bad = int(np.argmax(np.abs(steps - dt_s) > 1e-3 * dt_s + 1e-9))
        raise ProfileError(_SOURCE, f"t[{bad + 1}]", float(tt[bad + 1]),
                           f"uniform time points {dt_s!r} s apart (one sample per tick)")
    if float(np.ptp(u)) == 0.0:
        raise ProfileError(_SOURCE, "command_deg", "a constant command", "a command that moves the servo")
    return u, y, float(dt_s)


def _grid_start(u: np.ndarray, y: np.ndarray, dt: float, tau_max: float, f_lo: float, f_hi: float
                ) -> tuple[float, float, float]:
    """Best (tau, f_n, zeta) over a grid; whole-tick dead times all at once by cross-correlation."""
    n = y.size
    m_max = max(0, min(int(tau_max / dt), n // 2))
    yy = float(y @ y)
    best = (math.inf, 0.0, 1.0, 0.7)
    for fn in np.geomspace(f_lo, f_hi, _FREQ_GRID_POINTS):
        for zeta in _DAMPING_GRID:
            y0 = _linear_response(u, dt, 0.0, float(fn), zeta)
            cross = correlate(y, y0, mode="full", method="fft")[n - 1:n + m_max]
            energy = np.cumsum(y0 * y0)[::-1][:m_max + 1]      # sum of y0[:n-m]^2 for m = 0..m_max
            ssr = yy - 2.0 * cross + energy
            m = int(np.argmin(ssr))
            if ssr[m] < best[0]:
                best = (float(ssr[m]), m * dt, float(fn), zeta)
    return best[1], best[2], best[3]


def _standard_errors(jac: np.ndarray, residual: np.ndarray, n_params: int) -> np.ndarray:
    dof = max(residual.size - n_params, 1)
    s2 = float(residual @ residual) / dof
    cov = np.linalg.pinv(jac.T @ jac) * s2
    return np.sqrt(np.clip(np.diag(cov), 0.0, None))


def identify(t: object, command_deg: object, feedback_deg: object, dt_s: float) -> ServoFit:
    """Fit dead time, natural frequency, damping and (if reached) rate limit to one servo record.

    ``t`` (s), ``command_deg`` and ``feedback_deg`` (deg) are equal-length arrays at ticks of
    ``dt_s``; ``feedback_deg[k]`` is the flap angle at t_k (before command k acts).
    """
    u_abs, y_abs, dt = _check_record(t, command_deg, feedback_deg, dt_s)
    y_init = float(y_abs[0])
    u = u_abs - y_init
    y = y_abs - y_init
    n = y.size
    span = n * dt
    tau_max = min(1.0, 0.25 * span)
    f_lo = max(0.05, 2.0 / span)
    f_hi = 0.1 / dt
    tau0, fn0, zeta0 = _grid_start(u, y, dt, tau_max, f_lo, f_hi)
    log.debug("grid start: tau %.4g s, f_n %.4g Hz, zeta %.3g", tau0, fn0, zeta0)
    lo = [0.0, 0.5 * f_lo, _DAMPING_BOUNDS[0]]
    hi = [tau_max, 0.45 / dt, _DAMPING_BOUNDS[1]]
    x0 = np.clip([tau0 + 0.5 * dt if tau0 + 0.5 * dt < tau_max else tau0, fn0, zeta0], lo, hi)

    def linear_residual(p: np.ndarray) -> np.ndarray:
        return _linear_response(u, dt, p[0], p[1], p[2]) - y

    fit = least_squares(linear_residual, x0, bounds=(lo, hi), x_scale=[dt, fn0, 0.1], method="trf")
    params = fit.x
    residual = fit.fun
    jac = fit.jac
    peak = _peak_slope(y, dt)
    model_peak = _peak_slope(residual + y, dt)
    rate: float | None = None
    rate_se: float | None = None
    if peak > 0.0 and model_peak > _SATURATION_MARGIN * peak:
        def limited_residual(p: np.ndarray) -> np.ndarray:
            return _limited_response(u, dt, p[0], p[1], p[2], p[3]) - y

        lo4 = lo + [0.5 * peak]
        hi4 = hi + [2.0 * peak]
        x4 = np.clip(np.append(params, peak), lo4, hi4)
        fit4 = least_squares(limited_residual, x4, bounds=(lo4, hi4),
                             x_scale=[dt, params[1], 0.1, 0.05 * peak], method="trf")
        rms_lin = math.sqrt(float(residual @ residual) / n)
        rms_lim = math.sqrt(float(fit4.fun @ fit4.fun) / n)
        log.debug("rate-limit model: residual %.4g deg vs linear %.4g deg", rms_lim, rms_lin)
        if rms_lim < _RATE_MODEL_GAIN * rms_lin:
            params, residual, jac = fit4.x, fit4.fun, fit4.jac
            rate = float(params[3])
    se = _standard_errors(jac, residual, params.size)
    if rate is not None:
        rate_se = float(se[3])
    result = ServoFit(
        dead_time_s=float(params[0]), natural_freq_hz=float(params[1]), damping=float(params[2]),
        rate_limit_deg_s=rate, residual_rms_deg=math.sqrt(float(residual @ residual) / n), n_samples=n,
        dt_s=dt, peak_rate_deg_s=peak, dead_time_se_s=float(se[0]), natural_freq_se_hz=float(se[1]),
        damping_se=float(se[2]), rate_limit_se_deg_s=rate_se)
    log.info("servo fit: %s", result.describe())
    return result


# --------------------------------------------------------------------------- figure
def fit_figure(t: object, command_deg: object, feedback_deg: object, fit: ServoFit) -> Figure:
    """Measured vs fitted flap angle (with the command) and the residual, as a Figure (not shown)."""
    tt = np.asarray(t, dtype=float)
    cmd = np.asarray(command_deg, dtype=float)
    meas = np.asarray(feedback_deg, dtype=float)
    model = fit.simulate(cmd, float(meas[0]))
    fig = Figure(figsize=(8.0, 5.5))
    top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=(3, 1))
    top.plot(tt, cmd, color="0.7", lw=0.8, label="command")
    top.plot(tt, meas, lw=1.0, label="measured")
    top.plot(tt, model, lw=1.0, ls="--", label="fitted model")
    top.set_ylabel("flap deflection (deg)")
    top.set_title(f"servo fit: tau_d {fit.dead_time_s * 1e3:.1f} ms, f_n {fit.natural_freq_hz:.2f} Hz, "
                  f"zeta {fit.damping:.2f}, rate limit {fit.rate_limit_text()}", fontsize=9)
    top.legend(loc="upper right", fontsize=8)
    bottom.plot(tt, meas - model, lw=0.8, color="C3")
    bottom.set_ylabel("residual (deg)")
    bottom.set_xlabel("time (s)")
    fig.tight_layout()
    return fig


# --------------------------------------------------------------------------- profile output
_HEADER = re.compile(r"^\s*\[\[?\s*([A-Za-z0-9_.\-\"' ]+?)\s*\]\]?\s*(#.*)?$")
_KEYS = ("dead_time_s", "natural_freq_hz", "damping", "rate_limit_deg_s")


def _servo_block(lines: list[str], blade: int, source: str) -> tuple[int, int]:
    """(header line, end line) of the ``blade``-th [[servos]] table, sub-tables excluded."""
    count = -1
    start = None
    for i, line in enumerate(lines):
        match = _HEADER.match(line)
        if not match:
            continue
        name = match.group(1).replace(" ", "")
        if start is not None:
            return start, i
        if line.lstrip().startswith("[[") and name == "servos":
            count += 1
            if count == blade:
                start = i
    if start is None:
        raise ProfileError(source, "servos", f"{count + 1} [[servos]] headers",
                           f"a [[servos]] table for blade {blade} written as a [[servos]] header")
    return start, len(lines)


def _edit_servo(text: str, blade: int, values: dict[str, tuple[float, str]], source: str) -> str:
    lines = text.splitlines(keepends=True)
    start, end = _servo_block(lines, blade, source)
    missing = dict(values)
    for i in range(start + 1, end):
        for key, (value, note) in values.items():
            match = re.match(rf"^(\s*{key}\s*=\s*)([^#\r\n]*?)(\s*#[^\r\n]*)?(\r?\n?)$", lines[i])
            if match:
                lines[i] = f"{match.group(1)}{value!r}  # {note}{match.group(4)}"
                missing.pop(key, None)
    newline = "\r\n" if lines[start].endswith("\r\n") else "\n"
    inserts = [f"{key} = {value!r}  # {note}{newline}" for key, (value, note) in missing.items()]
    lines[start + 1:start + 1] = inserts
    return "".join(lines)


def write_profile_with_fit(profile_path: str | Path, blade: int, fit: ServoFit, out_path: str | Path) -> Path:
    """Write a NEW profile at ``out_path``: ``profile_path`` with ``blade``'s servo dynamics replaced.

    The text is edited in place (comments and layout kept): dead_time_s, natural_freq_hz, damping
    and, when reached, rate_limit_deg_s of the blade's [[servos]] table.  Refuses an existing
    ``out_path`` or ``out_path`` == ``profile_path``.  The new file is loaded back with
    :func:`flapctl.profile.load_profile` and checked; on failure it is removed and the error raised.
    """
    src = Path(profile_path)
    out = Path(out_path)
    if src.resolve() == out.resolve():
        raise ProfileError(str(out), "out_path", str(out), "a new file, not the source profile itself")
    if out.exists():
        raise ProfileError(str(out), "out_path", str(out), "a path that does not exist yet (no overwrite)")
    profile = load_profile(src)
    if isinstance(blade, bool) or not isinstance(blade, int) or not 0 <= blade < profile.blades:
        raise ProfileError(str(src), "blade", blade, f"a blade index 0..{profile.blades - 1}")
    values: dict[str, tuple[float, str]] = {
        "dead_time_s": (round(fit.dead_time_s, 6), f"identified, s.e. {fit.dead_time_se_s:.2g} s"),
        "natural_freq_hz": (round(fit.natural_freq_hz, 4), f"identified, s.e. {fit.natural_freq_se_hz:.2g} Hz"),
        "damping": (round(fit.damping, 4), f"identified, s.e. {fit.damping_se:.2g}"),
    }
    if fit.rate_limit_deg_s is not None:
        values["rate_limit_deg_s"] = (round(fit.rate_limit_deg_s, 2),
                                      f"identified, s.e. {fit.rate_limit_se_deg_s:.2g} deg/s")
    new_text = _edit_servo(profile.text, blade, values, str(src))
    try:
        tomllib.loads(new_text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(str(src), f"servos[{blade}]", str(exc), "a servo table the fit can be written into") from None
    with open(out, "x", encoding="utf-8", newline="") as fh:
        fh.write(new_text)
    try:
        written = load_profile(out)
        servo = written.servos[blade]
        for key, (value, _) in values.items():
            if getattr(servo, key) != value:
                raise ProfileError(str(out), f"servos[{blade}].{key}", getattr(servo, key),
                                   f"the identified value {value!r}")
    except ProfileError:
        out.unlink()
        raise
    log.info("wrote %s: blade %d servo from the fit (%s)", out, blade, fit.describe())
    return out
