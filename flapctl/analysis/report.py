"""Campaign report: PNG figures, one self-contained HTML page and a CSV summary.

Figures (matplotlib, Agg): Cp-TSR gross and net with their intervals per mode; net gain versus
TSR with its interval; energy ledger bars (shaft, actuator, net energy per point); polar plots
of the phase-averaged hydrodynamic torque and of flap tracking (measured and commanded, per
blade).  The HTML page embeds the images as base64, the verdict table, the energy-audit flags
in red and the method text with its sources.  Nothing is ever overwritten: the report goes
into a new folder (``out_dir``, or ``out_dir-2``, ``out_dir-3``... when that exists).
"""
from __future__ import annotations

import base64
import csv
import html
import logging
import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from flapctl.errors import FlapctlError  # noqa: E402

from .campaign_analysis import CampaignResult  # noqa: E402

__all__ = ["ReportError", "new_folder", "figures", "write_csv", "write_report"]

log = logging.getLogger(__name__)
_MAX_FOLDERS = 1000


class ReportError(FlapctlError, OSError):
    """The report folder cannot be created."""


def new_folder(out_dir: str | Path) -> Path:
    """Create and return ``out_dir``, or the first free ``out_dir-N`` (never an existing one)."""
    base = Path(out_dir)
    for n in range(1, _MAX_FOLDERS + 1):
        cand = base if n == 1 else base.with_name(f"{base.name}-{n}")
        try:
            cand.mkdir(parents=True, exist_ok=False)
            return cand
        except FileExistsError:
            continue
        except OSError as exc:
            raise ReportError(f"{cand}: cannot create the report folder ({exc})") from exc
    raise ReportError(f"{base}: {_MAX_FOLDERS} report folders exist already; choose another --out-dir")


def _fmt(x: float, nd: int = 4) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{x:.{nd}f}"


def _cp_figure(result: CampaignResult):
    fig, (axg, axn) = plt.subplots(1, 2, figsize=(11, 4.5), sharey=True)
    for m in result.modes:
        pts = sorted((p for p in result.points if p.mode == m["name"]), key=lambda p: p.tsr_setpoint)
        if not pts:
            continue
        x = [p.mean_tsr for p in pts]
        for ax, mid, lo, hi in ((axg, [p.cp_gross for p in pts], [p.cp_gross_lo for p in pts],
                                 [p.cp_gross_hi for p in pts]),
                                (axn, [p.cp_net for p in pts], [p.cp_net_lo for p in pts],
                                 [p.cp_net_hi for p in pts])):
            yerr = np.array([np.subtract(mid, lo), np.subtract(hi, mid)])
            ax.errorbar(x, mid, yerr=yerr, marker="o", capsize=4, label=f"{m['name']} ({m['kind']})")
        if result.binned and m["name"] in result.bins:
            b = [bb for bb in result.bins[m["name"]] if bb.n > 0]
            axn.plot([bb.x_mean for bb in b], [bb.mean for bb in b], ":", label=f"{m['name']} (bins)")
    pct = int(round(result.level * 100))
    axg.set_title(f"Cp gross, {pct} % intervals")
    axn.set_title(f"Cp net (after actuator energy), {pct} % intervals")
    for ax in (axg, axn):
        ax.set_xlabel("TSR (measured, uncorrected)")
        ax.grid(True, alpha=0.3)
        ax.legend()
    axg.set_ylabel("Cp")
    fig.tight_layout()
    return fig


def _gain_figure(result: CampaignResult):
    fig, ax = plt.subplots(figsize=(7, 4.5))
    for m in result.modes:
        gs = sorted((g for g in result.gains if g.mode == m["name"]), key=lambda g: g.tsr_setpoint)
        if not gs:
            continue
        x = np.array([g.tsr_setpoint for g in gs])
        y = np.array([g.gain for g in gs]) * 100
        lo = np.array([g.lo if math.isfinite(g.lo) else np.nan for g in gs]) * 100
        hi = np.array([g.hi if math.isfinite(g.hi) else np.nan for g in gs]) * 100
        ax.errorbar(x, y, yerr=[y - lo, hi - y], marker="s", capsize=5,
                    label=f"{m['name']} vs baseline (Fieller)")
        dlo = np.array([g.delta_lo for g in gs]) * 100
        dhi = np.array([g.delta_hi for g in gs]) * 100
        ax.errorbar(x + 0.03, y, yerr=[y - dlo, dhi - y], fmt="none", capsize=3, alpha=0.5,
                    label=f"{m['name']} (delta method)")
    ax.axhline(0.0, color="k", lw=0.8)
    ax.set_xlabel("TSR set point")
    ax.set_ylabel("net gain (%)")
    ax.set_title(f"Net gain of morphing over fixed blades, {int(round(result.level * 100))} % intervals")
    ax.grid(True, alpha=0.3)
    ax.legend()
    fig.tight_layout()
    return fig


def _ledger_figure(result: CampaignResult):
    pts = sorted(result.points, key=lambda p: (p.tsr_setpoint, p.mode))
    fig, ax = plt.subplots(figsize=(max(6, 1.1 * len(pts)), 4.5))
    x = np.arange(len(pts))
    w = 0.27
    shaft = [p.shaft_energy_j for p in pts]
    act = [p.actuator_energy_j for p in pts]
    net = [p.shaft_energy_j - p.actuator_energy_j for p in pts]
    ax.bar(x - w, shaft, w, label="shaft")
    ax.bar(x, act, w, label="actuator (electrical)")
    ax.bar(x + w, net, w, label="net")
    ax.set_xticks(x, [f"{p.tsr_setpoint:g}\n{p.mode}" for p in pts])
    ax.set_ylabel("energy over the dwell revolutions (J)")
    ax.set_title("Energy ledger per point")
    ax.legend()
    ax.grid(True, axis="y", alpha=0.3)
    fig.tight_layout()
    return fig


def _polar_figure(result: CampaignResult, tsr: float):
    pts = [p for p in result.points if p.tsr_setpoint == tsr and p.phase]
    blades = max((p.phase["flap_deg"].shape[1] for p in pts if "flap_deg" in p.phase), default=0)
    fig = plt.figure(figsize=(4 * (1 + blades), 4.2))
    ax = fig.add_subplot(1, 1 + blades, 1, projection="polar")
    for p in pts:
        th = np.radians(p.phase["azimuth_deg"])
        q = p.phase["torque_nm"]
        ax.plot(np.append(th, th[0]), np.append(q, q[0]), label=p.mode)
    ax.set_title(f"torque (N m), TSR {tsr:g}", fontsize=9)
    ax.legend(fontsize=7, loc="lower left")
    for i in range(blades):
        axb = fig.add_subplot(1, 1 + blades, 2 + i, projection="polar")
        for p in pts:
            if p.kind == "baseline" or "flap_deg" not in p.phase:
                continue
            th = np.radians(p.phase["azimuth_deg"])
            for key, style in (("flap_deg", "-"), ("flap_cmd_deg", "--")):
                v = p.phase[key][:, i]
                axb.plot(np.append(th, th[0]), np.append(v, v[0]), style,
                         label=f"{p.mode} {'measured' if key == 'flap_deg' else 'commanded'}")
        axb.set_title(f"blade {i} flap (deg) vs own azimuth", fontsize=9)
        axb.legend(fontsize=7, loc="lower left")
    fig.subplots_adjust(left=0.04, right=0.97, wspace=0.35)     # tight_layout is slow on polar axes
    return fig


def figures(result: CampaignResult) -> dict[str, object]:
    """All report figures by file stem (matplotlib Figures; the caller saves or closes them)."""
    out = {"cp_tsr": _cp_figure(result), "net_gain": _gain_figure(result),
           "energy_ledger": _ledger_figure(result)}
    for tsr in sorted({p.tsr_setpoint for p in result.points}):
        out[f"polar_tsr_{tsr:g}".replace(".", "p")] = _polar_figure(result, tsr)
    return out


_CSV_FIELDS = ("tsr_setpoint", "flow_setpoint_m_s", "mode", "kind", "n_runs", "n_revolutions",
               "mean_tsr", "mean_flow_m_s", "cp_gross", "cp_gross_lo", "cp_gross_hi", "cp_actuator",
               "cp_net", "cp_net_lo", "cp_net_hi", "cp_net_u_a", "cp_net_u_b", "cp_net_dof",
               "batch_size", "n_batches", "lag1_autocorr", "shaft_power_w", "actuator_power_w",
               "ct", "thrust_source", "cp_gross_corrected", "cp_net_corrected", "tsr_corrected")


def write_csv(result: CampaignResult, path: str | Path) -> Path:
    """One row per set point and mode, with the gain columns on the schedule modes' rows."""
    path = Path(path)
    gains = {(g.tsr_setpoint, g.flow_setpoint_m_s, g.mode): g for g in result.gains}
    try:
        fh = path.open("x", newline="", encoding="utf-8")
    except FileExistsError as exc:
        raise ReportError(f"{path}: exists already; flapctl never overwrites it") from exc
    with fh:
        w = csv.writer(fh)
        w.writerow(list(_CSV_FIELDS) + ["gain", "gain_lo", "gain_hi", "gain_delta_lo",
                                        "gain_delta_hi", "verdict", "flags"])
        for p in result.points:
            g = gains.get((p.tsr_setpoint, p.flow_setpoint_m_s, p.mode))
            extra = ["", "", "", "", "", "", ""] if g is None else \
                [g.gain, g.lo, g.hi, g.delta_lo, g.delta_hi, g.verdict, ""]
            extra[-1] = " | ".join(p.flags)
            w.writerow([getattr(p, k) for k in _CSV_FIELDS] + extra)
    return path


def _png_b64(path: Path) -> str:
    return base64.b64encode(path.read_bytes()).decode("ascii")


def _html(result: CampaignResult, images: dict[str, Path]) -> str:
    e = html.escape
    pct = int(round(result.level * 100))
    rows = []
    for g in sorted(result.gains, key=lambda g: (g.flow_setpoint_m_s, g.tsr_setpoint, g.mode)):
        colour = {"gain": "#1a7f37", "loss": "#b00020"}.get(g.verdict, "#555")
        rows.append(
            f"<tr><td>{g.tsr_setpoint:g}</td><td>{g.flow_setpoint_m_s:g}</td><td>{e(g.mode)}</td>"
            f"<td>{g.gain * 100:+.2f} %</td><td>[{g.lo * 100:+.2f}, {g.hi * 100:+.2f}] %</td>"
            f"<td>[{g.delta_lo * 100:+.2f}, {g.delta_hi * 100:+.2f}] %</td>"
            f"<td>{_fmt(g.gain_corrected * 100, 2)} %</td><td>{g.n_pairs} ({g.n_blocks} blocks, "
            f"{g.batch_size} rev/batch)</td><td>{_fmt(g.lag1_autocorr, 2)}</td>"
            f"<td style='color:{colour};font-weight:bold' class='verdict'>{e(g.verdict)}</td>"
            f"<td>{e('; '.join(g.notes))}</td></tr>")
    prow = []
    for p in sorted(result.points, key=lambda p: (p.flow_setpoint_m_s, p.tsr_setpoint, p.mode)):
        style = " style='color:#b00020'" if p.flags else ""
        prow.append(
            f"<tr{style}><td>{p.tsr_setpoint:g}</td><td>{e(p.mode)}</td><td>{p.n_runs}/{p.n_revolutions}</td>"
            f"<td>{_fmt(p.mean_tsr, 3)}</td><td>{_fmt(p.cp_gross)}</td>"
            f"<td>{_fmt(p.cp_net)} [{_fmt(p.cp_net_lo)}, {_fmt(p.cp_net_hi)}]</td>"
            f"<td>{_fmt(p.cp_actuator, 5)}</td><td>{_fmt(p.lag1_autocorr, 2)} (m = {p.batch_size})</td>"
            f"<td>{_fmt(p.ct, 3)} ({e(p.thrust_source)})</td><td>{_fmt(p.cp_gross_corrected)}</td>"
            f"<td>{_fmt(p.cp_net_corrected)}</td><td>{_fmt(p.tsr_corrected, 3)}</td></tr>")
    flags = "".join(f"<li>{e(fl)}</li>" for fl in result.flags) or "<li>none</li>"
    excl = "".join(f"<li>{e(x)}</li>" for x in result.excluded) or "<li>none</li>"
    imgs = "".join(f"<figure><img alt='{e(k)}' src='data:image/png;base64,{_png_b64(v)}'/>"
                   f"<figcaption>{e(k)}</figcaption></figure>" for k, v in images.items())
    bl = "open flow (no channel in the profile)" if result.blockage_ratio is None else \
        f"B = {result.blockage_ratio:.4f}; Cp bound (16/27)/(1-B)^2 = {result.cp_bound:.4f}"
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>Campaign {e(result.plan_name)}</title>
<style>body{{font-family:sans-serif;margin:2em;max-width:1200px}} table{{border-collapse:collapse}}
td,th{{border:1px solid #ccc;padding:3px 6px;font-size:90%}} img{{max-width:100%}}
.flags li{{color:#b00020;font-weight:bold}}</style></head><body>
<h1>Campaign {e(result.plan_name)}: net gain of morphing over fixed blades</h1>
<p>Rig profile {e(result.profile_name)}; file {e(str(result.path))}; {result.points_stored} of
{result.points_total} points stored. Blockage: {e(bl)}.</p>
<h2>Verdict per TSR ({pct} % intervals)</h2>
<table><tr><th>TSR</th><th>U (m/s)</th><th>mode</th><th>net gain</th><th>Fieller</th><th>delta method</th>
<th>gain, blockage-corrected</th><th>pairs</th><th>r1 of pairs</th><th>verdict</th><th>notes</th></tr>
{''.join(rows)}</table>
<h2>Energy audit flags</h2><ul class="flags">{flags}</ul>
<h2>Points</h2>
<table><tr><th>TSR</th><th>mode</th><th>runs/revs</th><th>TSR meas.</th><th>Cp gross</th>
<th>Cp net [{pct} %]</th><th>Cp actuator</th><th>r1 batch means</th><th>C_T (source)</th>
<th>Cp gross corr.</th><th>Cp net corr.</th><th>TSR corr.</th></tr>{''.join(prow)}</table>
<p>Points left out: </p><ul>{excl}</ul>
<h2>Figures</h2>{imgs}
<h2>Method and sources</h2><p>{e(result.method)}</p>
</body></html>
"""


def write_report(result: CampaignResult, out_dir: str | Path) -> dict[str, Path]:
    """Write the PNG figures, ``report.html`` and ``summary.csv`` into a new folder."""
    folder = new_folder(out_dir)
    paths: dict[str, Path] = {}
    for stem, fig in figures(result).items():
        p = folder / f"{stem}.png"
        try:
            fig.savefig(p, dpi=72)
        finally:
            plt.close(fig)
        paths[stem] = p
    images = dict(paths)
    paths["csv"] = write_csv(result, folder / "summary.csv")
    page = folder / "report.html"
    with page.open("x", encoding="utf-8") as fh:
        fh.write(_html(result, images))
    paths["html"] = page
    paths["folder"] = folder
    log.info("report written to %s", folder)
    return paths
