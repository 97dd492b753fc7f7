"""Iterative learning control in the running controller, one learner per blade.

The controller asks this object for a correction at each tick and shows it every measured flap
angle; after each of a blade's revolutions the learner updates that blade's correction
(:class:`flapctl.tune.ilc.AzimuthILC`, P-type with a zero-phase Q filter, convergence checked
before learning is enabled).  Indexing (spatial ILC, REFERENCES section 9):

    command_i(theta)  = schedule_i(theta + lead) + c_i(theta)
    error_i(theta)    = schedule_i(theta) - measured_i(theta)
    c_i(k) <- Q[c_i(k) + gamma * e_i(k + lead_bins)]        once per revolution of blade i

where theta is blade i's own azimuth.  Works the same on the rig and on the SIL rig (it only sees
the controller's commands and the servo feedback).
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path

from .ilc import AzimuthILC, BinAccumulator

__all__ = ["LoopLearning"]


class LoopLearning:
    """Per-blade azimuth ILC plugged into :class:`flapctl.scheduler.Controller`."""

    def __init__(self, learners: Sequence[AzimuthILC]) -> None:
        self.learners = list(learners)
        self._acc = [BinAccumulator(lr.bins) for lr in self.learners]
        self._prev = [None] * len(self.learners)
        self.table = None                  # the controller's schedule table (set by the controller)
        self.history: list[list[float]] = [[] for _ in self.learners]   # error RMS per revolution

    @classmethod
    def for_profile(cls, profile, omega_rad_s: float, *, bins: int = 72, gamma: float = 0.5,
                    lead_bins: int | None = None, q_cutoff_harmonic: int = 5,
                    limit_deg: float | None = None, load: str | Path | None = None) -> "LoopLearning":
        """One learner per blade, checked for convergence against each blade's servo model."""
        from sim.rig import servo_params     # the profile's servo as the model the check needs

        learners = []
        for i, servo in enumerate(profile.servos):
            if load is not None:
                # PATH as saved by save(): PATH.blade<i>.json per blade, else one file for all
                lp = Path(load)
                per_blade = lp.with_name(f"{lp.stem}.blade{i}{lp.suffix or '.json'}")
                lr = AzimuthILC.load(per_blade if per_blade.exists() else lp)
            else:
                if lead_bins is None:
                    # the servo's phase lag at the rotor frequency, in bins
                    from sim.servo import phase_lag_deg
                    lag = phase_lag_deg(servo_params(servo), omega_rad_s / (2 * math.pi))
                    lead = int(round(lag / 360.0 * bins))
                else:
                    lead = lead_bins
                lr = AzimuthILC(bins, gamma, lead, q_cutoff_harmonic, limit_deg)
            lr.enable(servo_params(servo), [0.8 * omega_rad_s, omega_rad_s, 1.2 * omega_rad_s],
                      tick_s=1.0 / profile.control.rate_hz)
            learners.append(lr)
        return cls(learners)

    def freeze(self) -> None:
        for lr in self.learners:
            lr.freeze()

    def correction(self, blade: int, azimuth_rad: float) -> float:
        return self.learners[blade].correction_at(azimuth_rad)

    def observe(self, blade: int, azimuth_rad: float, measured_deg: float) -> None:
        """One tick's feedback of ``blade`` at its own azimuth; closes its revolution at the wrap."""
        az = azimuth_rad % (2 * math.pi)
        prev = self._prev[blade]
        self._prev[blade] = az
        acc = self._acc[blade]
        if prev is not None and az < prev - math.pi:
            self.history[blade].append(self.learners[blade].last_error_rms_deg)
            self.learners[blade].update(acc.means())
            acc.clear()
        acc.add(az, self.table.at(blade, az) - measured_deg)

    def save(self, path: str | Path) -> list[Path]:
        """Save each blade's learner as PATH with the blade index before the suffix."""
        path = Path(path)
        return [lr.save(path.with_name(f"{path.stem}.blade{i}{path.suffix or '.json'}"))
                for i, lr in enumerate(self.learners)]
