"""Model validation: re-run the SIL rig at a logged run's conditions and compare.

The run log (``flapctl.runlog``) carries the TSR set point, the schedule text, the seed and the
duration in its attributes and the measured flow per tick.  :func:`compare_run` runs the SIL
rig at that TSR, the log's mean measured flow and the same schedule (phase lead from the
profile's [control]: the log keeps only its description), then compares the phase-averaged
hydrodynamic torque Q_h = Q_meas + J domega/dt (72 azimuth bins) and Cp over whole
revolutions after the settling time.  :func:`comparison_figure` overlays the two.
"""
from __future__ import annotations

import math
import tempfile
from dataclasses import dataclass
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from flapctl.errors import FlapctlError  # noqa: E402
from flapctl.profile import Profile  # noqa: E402
from flapctl.runlog import RunData, open_run  # noqa: E402
from flapctl.schedule import Schedule  # noqa: E402

from .phase import hydrodynamic_torque, phase_average  # noqa: E402

__all__ = ["ComparisonResult", "compare_run", "comparison_figure"]

BINS = 72


@dataclass(frozen=True)
class ComparisonResult:
    """Measured versus simulated at one run's conditions.

    Torque arrays are per azimuth bin (N m); ``torque_rms_diff_nm`` and
    ``torque_mean_diff_nm`` are simulated minus measured over the bins; Cp over whole
    revolutions after ``settle_s``.
    """
    run_path: Path
    tsr: float
    flow_m_s: float
    azimuth_deg: np.ndarray
    torque_measured_nm: np.ndarray
    torque_simulated_nm: np.ndarray
    torque_rms_diff_nm: float
    torque_mean_diff_nm: float
    torque_correlation: float
    cp_gross_measured: float
    cp_gross_simulated: float
    cp_net_measured: float
    cp_net_simulated: float

    @property
    def cp_gross_diff(self) -> float:
        return self.cp_gross_simulated - self.cp_gross_measured

    @property
    def cp_net_diff(self) -> float:
        return self.cp_net_simulated - self.cp_net_measured


def _schedule_of(run: RunData, blades: int) -> Schedule:
    src = str(run.attrs.get("schedule_source", ""))
    text = str(run.attrs.get("schedule_text", ""))
    if src == "<neutral>" or not text:
        return Schedule.neutral(blades)
    fmt = "csv" if src.lower().endswith(".csv") else "toml"
    return Schedule.parse(text, fmt, blades, source=f"{run.path}:schedule_text")


def _phase_torque(run: RunData, inertia: float, t_from_s: float) -> np.ndarray:
    tk = run.ticks[run.ticks["t_s"] >= t_from_s]
    if tk.size < 3:
        raise FlapctlError(f"{run.path}: fewer than 3 ticks after {t_from_s:g} s: nothing to compare")
    qh = hydrodynamic_torque(tk["t_s"], tk["speed_rad_s"], tk["torque_nm"], inertia)
    return phase_average(tk["azimuth_deg"], qh, BINS).mean


def _cp(run: RunData, t_from_s: float) -> tuple[float, float]:
    rv = run.revolutions[run.revolutions["t_start_s"] >= t_from_s]
    if rv.size == 0:
        return math.nan, math.nan
    es, ef = rv["shaft_energy_j"].sum(), rv["fluid_energy_j"].sum()
    ea = rv["servo_energy_j"].sum()
    return float(es / ef), float((es - ea) / ef)


def compare_run(run_h5: str | Path, profile: Profile, settle_s: float = 3.0,
                seed: int | None = None) -> ComparisonResult:
    """Re-run the SIL rig at the conditions of ``run_h5`` and compare torque and Cp.

    ``seed`` is the SIL seed of the re-run (default: one more than the logged seed, so the
    turbulence and sensor noise differ from a logged SIL run).
    """
    from flapctl.runner import run_sil

    run = open_run(run_h5)
    a = run.attrs
    if "tsr_setpoint" not in a:
        raise FlapctlError(f"{run.path}: the log has no tsr_setpoint attribute: cannot re-run it")
    tsr = float(a["tsr_setpoint"])
    tk = run.ticks[run.ticks["t_s"] >= settle_s]
    if tk.size < 3:
        raise FlapctlError(f"{run.path}: fewer than 3 ticks after {settle_s:g} s: nothing to compare")
    flow = float(np.mean(tk["flow_m_s"]))
    duration = float(a.get("duration_s", run.ticks["t_s"][-1]))
    logged_seed = int(a.get("seed", profile.sim.seed))
    sched = _schedule_of(run, profile.blades)
    with tempfile.TemporaryDirectory(prefix="flapctl-compare-") as tmp:
        out = Path(tmp) / "sim.h5"
        run_sil(profile, sched, tsr=tsr, duration_s=duration, out=out, flow_m_s=flow,
                settle_s=settle_s, seed=logged_seed + 1 if seed is None else seed,
                label=f"model check of {run.path.name}")
        sim = open_run(out)
    inertia = profile.rotor.inertia_kg_m2
    qm = _phase_torque(run, inertia, settle_s)
    qs = _phase_torque(sim, inertia, settle_s)
    ok = np.isfinite(qm) & np.isfinite(qs)
    d = qs[ok] - qm[ok]
    corr = float(np.corrcoef(qm[ok], qs[ok])[0, 1]) if ok.sum() > 2 else math.nan
    cgm, cnm = _cp(run, settle_s)
    cgs, cns = _cp(sim, settle_s)
    return ComparisonResult(
        run_path=run.path, tsr=tsr, flow_m_s=flow,
        azimuth_deg=(np.arange(BINS) + 0.5) * 360.0 / BINS, torque_measured_nm=qm,
        torque_simulated_nm=qs, torque_rms_diff_nm=float(np.sqrt(np.mean(d * d))),
        torque_mean_diff_nm=float(np.mean(d)), torque_correlation=corr,
        cp_gross_measured=cgm, cp_gross_simulated=cgs, cp_net_measured=cnm, cp_net_simulated=cns)


def comparison_figure(c: ComparisonResult):
    """Measured and simulated phase-averaged torque versus azimuth, with the Cp numbers."""
    fig, ax = plt.subplots(figsize=(8, 4.5))
    ax.plot(c.azimuth_deg, c.torque_measured_nm, label="measured (log)")
    ax.plot(c.azimuth_deg, c.torque_simulated_nm, "--", label="SIL model")
    ax.set_xlabel("azimuth of blade 0 (deg)")
    ax.set_ylabel("hydrodynamic torque (N m)")
    ax.set_title(f"TSR {c.tsr:g}, U {c.flow_m_s:.3f} m/s: Cp gross {c.cp_gross_measured:.4f} "
                 f"(log) vs {c.cp_gross_simulated:.4f} (model); torque RMS diff "
                 f"{c.torque_rms_diff_nm:.4f} N m", fontsize=9)
    ax.grid(True, alpha=0.3)
    ax.legend()
    fig.tight_layout()
    return fig

