"""Figures.  Functions return matplotlib Figures; only the CLI saves files."""
from __future__ import annotations

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .analysis.phase import hydrodynamic_torque, phase_average  # noqa: E402
from .runlog import RunData  # noqa: E402

__all__ = ["instantaneous_cp", "azimuth_figure"]


def instantaneous_cp(run: RunData, inertia_kg_m2: float, area_m2: float, density_kg_m3: float,
                     t_from_s: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """(azimuth_deg, Cp) per tick from the hydrodynamic torque, after ``t_from_s``."""
    tk = run.ticks
    keep = tk["t_s"] >= t_from_s
    qh = hydrodynamic_torque(tk["t_s"], tk["speed_rad_s"], tk["torque_nm"], inertia_kg_m2)
    u = tk["flow_m_s"]
    cp = qh * tk["speed_rad_s"] / (0.5 * density_kg_m3 * area_m2 * np.maximum(u, 1e-9) ** 3)
    return tk["azimuth_deg"][keep], cp[keep]


def azimuth_figure(runs: list[tuple[str, RunData]], inertia_kg_m2: float, area_m2: float,
                   density_kg_m3: float, t_from_s: float = 0.0, bins: int = 72):
    """Phase-averaged Cp and blade-0 flap angle versus azimuth, one line per run."""
    fig, (ax_cp, ax_flap) = plt.subplots(2, 1, figsize=(8, 7), sharex=True)
    for label, run in runs:
        az, cp = instantaneous_cp(run, inertia_kg_m2, area_m2, density_kg_m3, t_from_s)
        pa = phase_average(az, cp, bins)
        ax_cp.plot(pa.centres_deg, pa.mean, label=f"{label} (mean Cp {np.nanmean(cp):.3f})")
        tk = run.ticks[run.ticks["t_s"] >= t_from_s]
        cmd = phase_average(tk["azimuth_deg"], tk["flap_cmd_deg"][:, 0], bins)
        meas = phase_average(tk["azimuth_deg"], tk["flap_deg"][:, 0], bins)
        line, = ax_flap.plot(meas.centres_deg, meas.mean, label=f"{label}: measured")
        ax_flap.plot(cmd.centres_deg, cmd.mean, "--", color=line.get_color(), label=f"{label}: commanded")
    ax_cp.set_ylabel("Cp (phase-averaged, rotor)")
    ax_cp.axhline(0.0, color="0.6", lw=0.8)
    ax_cp.legend(fontsize=8)
    ax_cp.grid(alpha=0.3)
    ax_cp.set_title("Rotor Cp and blade 0 flap deflection versus azimuth of blade 0")
    ax_flap.set_ylabel("flap deflection, blade 0 (deg)")
    ax_flap.set_xlabel("azimuth of blade 0 (deg; 0 = moving into the flow, 90 = most upstream)")
    ax_flap.set_xlim(0, 360)
    ax_flap.set_xticks(range(0, 361, 45))
    ax_flap.grid(alpha=0.3)
    ax_flap.legend(fontsize=8)
    fig.tight_layout()
    return fig
