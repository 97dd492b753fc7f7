"""Encoder counts to rotor azimuth and speed.

Azimuth follows REFERENCES section 2 (theta = 0 with blade 0 at (0, +R) moving into the flow,
growing in the direction of rotation); the profile's ``encoder.index_offset_deg`` is the azimuth
at which the index pulse fires.

* Counts: the raw hardware counter (4x quadrature decoding) wraps modulo ``2**counter_bits``;
  each new reading is turned into a signed step, so the estimator keeps an unbounded count.
* Index: the count latched at each index pulse homes the azimuth.  Successive latches must be
  exactly one revolution (``counts_per_rev``) apart; anything else is counted as an index error
  (lost counts, a missed or spurious index) for the supervisor.
* Speed: an angle-tracking observer (a type-2 phase-locked loop, REFERENCES section 10):
  ``e = theta_meas - theta_hat``, ``omega_hat = Kp e + Ki integral(e)``, ``theta_hat' = omega_hat``
  with ``Kp = 2 zeta w_n``, ``Ki = w_n**2``; closed loop (Kp s + Ki)/(s^2 + Kp s + Ki).
  Forward-Euler discretisation; ``w_n * dt`` must stay small (< 0.3, ideally < 0.1).
"""
from __future__ import annotations

import math

__all__ = ["AzimuthEstimator", "observer_gains"]

TWO_PI = 2.0 * math.pi


def observer_gains(bandwidth_hz: float, damping: float) -> tuple[float, float]:
    """(Kp, Ki) of the angle-tracking observer for natural frequency ``bandwidth_hz``."""
    wn = TWO_PI * bandwidth_hz
    return 2.0 * damping * wn, wn * wn


class AzimuthEstimator:
    """Azimuth (rad, wrapped to [0, 2 pi)) and speed (rad/s) from quadrature counts."""

    def __init__(self, counts_per_rev: int, counter_bits: int, index_offset_deg: float,
                 bandwidth_hz: float, damping: float, dt_s: float) -> None:
        wn_dt = TWO_PI * bandwidth_hz * dt_s
        if wn_dt > 0.3:
            raise ValueError(
                f"encoder.observer_bandwidth_hz = {bandwidth_hz:g} is too high for a {dt_s * 1e3:g} ms "
                f"tick (w_n dt = {wn_dt:.2f}; keep it below 0.3, ideally 0.1)")
        self.cpr = int(counts_per_rev)
        self._missing_after = self.cpr + self.cpr // 2
        self._mod = 1 << int(counter_bits)
        self._half = self._mod >> 1
        self._rad_per_count = TWO_PI / self.cpr
        self._offset_rad = math.radians(index_offset_deg)
        self.kp, self.ki = observer_gains(bandwidth_hz, damping)
        self.dt = dt_s
        # start-up window: a tenth of the observer's time constant, at least two ticks
        self._start_ticks = max(2, int(round(0.1 / (TWO_PI * bandwidth_hz) / dt_s)) + 2, int(0.01 / dt_s))
        self.reset()

    def reset(self) -> None:
        self._raw: int | None = None
        self.total = 0                    # unbounded signed count since start
        self._home_total = 0              # total count at the last index pulse
        self._last_index_total: int | None = None
        self._index_events = 0
        self.homed = False
        self.index_errors = 0             # index pulses not exactly one revolution apart
        self.last_index_error_counts = 0
        self.max_step_counts = 0          # largest single-tick count step seen
        self.last_step_counts = 0
        self.angle_rad = self._offset_rad  # unwrapped measured angle
        self.azimuth_rad = self._offset_rad % TWO_PI
        self.theta_hat = self.angle_rad
        self.speed_rad_s = 0.0
        self._integ = 0.0
        self._start_total = 0
        self._ticks = 0
        self.ready = False                # speed known (after the start-up window)

    def update(self, counts: int, index_latch: int | None, index_events: int,
               dt_s: float | None = None) -> None:
        """Advance one tick with the newest counter reading.

        ``dt_s`` is the time since the previous reading when it is not the nominal tick (a
        free-running bridge that dropped a readings message, say); default the nominal tick.
        """
        raw = counts
        if self._raw is None:
            step = 0
        else:
            step = (raw - self._raw) % self._mod
            if step >= self._half:
                step -= self._mod
        self._raw = raw
        total = self.total + step
        self.total = total
        self.last_step_counts = step
        if abs(step) > self.max_step_counts:
            self.max_step_counts = abs(step)
        if index_events != self._index_events and index_latch is not None:
            self._index_events = index_events
            back = (raw - index_latch) % self._mod
            if back >= self._half:
                back -= self._mod
            at_index = total - back
            if self._last_index_total is not None:
                apart = abs(at_index - self._last_index_total)
                if apart != self.cpr:
                    self.index_errors += 1
                    self.last_index_error_counts = apart - self.cpr
            self._last_index_total = at_index
            if not self.homed:
                # first index: home, keeping the unwrapped angle continuous for the observer
                old = self._offset_rad + (total - self._home_total) * self._rad_per_count
                self._home_total = at_index
                self.homed = True
                self.theta_hat += self._offset_rad + (total - at_index) * self._rad_per_count - old
            else:
                # re-home: snap the azimuth back to the index by the counts gained or lost
                err = (at_index - self._home_total) % self.cpr
                if err > self.cpr // 2:
                    err -= self.cpr
                self._home_total += err
        elif self._last_index_total is not None and abs(total - self._last_index_total) > self._missing_after:
            # one and a half revolutions without an index pulse: the index was lost
            self.index_errors += 1
            self.last_index_error_counts = total - self._last_index_total
            self._last_index_total = total - self.cpr if total > self._last_index_total else total + self.cpr
        angle = self._offset_rad + (total - self._home_total) * self._rad_per_count
        self.angle_rad = angle
        self.azimuth_rad = angle % TWO_PI
        # start-up: average speed by count differencing over a short window, then hand the
        # observer a matching state, so that it starts without a transient
        if not self.ready:
            self._ticks += 1
            if self._ticks == 1:
                self._start_total = total
            self.theta_hat = angle
            if self._ticks > 1:
                self.speed_rad_s = (total - self._start_total) * self._rad_per_count / (
                    (self._ticks - 1) * self.dt)
            if self._ticks > self._start_ticks:
                self._integ = self.speed_rad_s
                self.ready = True
            return
        dt = self.dt if dt_s is None or not dt_s > 0.0 else dt_s
        self.theta_hat += self.speed_rad_s * dt      # predict to this reading, then correct
        e = angle - self.theta_hat
        self._integ += self.ki * e * dt
        self.speed_rad_s = self.kp * e + self._integ
