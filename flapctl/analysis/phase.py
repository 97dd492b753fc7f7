"""Phase averaging over azimuth, and hydrodynamic torque from a run log.

The torque sensor reads the torque passed to the brake; the rotor's own torque ripple shows in
its speed.  The hydrodynamic (or aerodynamic) torque is Q_h = Q_meas + J d(omega)/dt (REFERENCES
section 8, lab practice), with d(omega)/dt from the logged speed by a centred difference over a
short window.
"""
from __future__ import annotations

import numpy as np

__all__ = ["phase_average", "hydrodynamic_torque", "PhaseAverage"]


class PhaseAverage:
    """Mean and standard deviation of a quantity in azimuth bins (degrees, bin centres)."""

    def __init__(self, centres_deg: np.ndarray, mean: np.ndarray, std: np.ndarray, count: np.ndarray):
        self.centres_deg = centres_deg
        self.mean = mean
        self.std = std
        self.count = count


def phase_average(azimuth_deg: np.ndarray, values: np.ndarray, bins: int = 72) -> PhaseAverage:
    """Average ``values`` (1-D, or 2-D with one column per blade) in ``bins`` azimuth bins."""
    az = np.mod(np.asarray(azimuth_deg, dtype=float), 360.0)
    idx = np.minimum((az * bins / 360.0).astype(int), bins - 1)
    v = np.asarray(values, dtype=float)
    flat = v.reshape(len(v), -1)
    count = np.bincount(idx, minlength=bins).astype(float)
    safe = np.where(count > 0, count, np.nan)
    mean = np.empty((bins, flat.shape[1]))
    std = np.empty_like(mean)
    for j in range(flat.shape[1]):
        s1 = np.bincount(idx, weights=flat[:, j], minlength=bins)
        s2 = np.bincount(idx, weights=flat[:, j] ** 2, minlength=bins)
        m = s1 / safe
        mean[:, j] = m
        std[:, j] = np.sqrt(np.maximum(s2 / safe - m * m, 0.0))
    centres = (np.arange(bins) + 0.5) * 360.0 / bins
    if v.ndim == 1:
        mean, std = mean[:, 0], std[:, 0]
    return PhaseAverage(centres, mean, std, count)


def hydrodynamic_torque(t_s: np.ndarray, speed_rad_s: np.ndarray, torque_nm: np.ndarray,
                        inertia_kg_m2: float, window_s: float = 0.01) -> np.ndarray:
    """Q_h = Q_meas + J d(omega)/dt, the derivative by a centred difference over ``window_s``."""
    t = np.asarray(t_s, dtype=float)
    w = np.asarray(speed_rad_s, dtype=float)
    if len(t) < 3:
        return np.asarray(torque_nm, dtype=float).copy()
    dt = float(np.median(np.diff(t)))
    h = max(1, int(round(window_s / dt / 2.0)))
    dw = np.empty_like(w)
    dw[h:-h] = (w[2 * h:] - w[:-2 * h]) / (t[2 * h:] - t[:-2 * h])
    dw[:h] = dw[h]
    dw[-h:] = dw[-h - 1]
    return np.asarray(torque_nm, dtype=float) + inertia_kg_m2 * dw
