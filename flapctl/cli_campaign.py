"""Campaign commands of the ``flapctl`` CLI: campaign, analyze, report, compare.

``register(subparsers)`` adds them to the main parser; each command function takes the parsed
arguments and returns an exit status.  User errors raise :class:`~flapctl.errors.FlapctlError`
subclasses, which the main CLI prints as one line.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .console import Progress, table
from .errors import FlapctlError

__all__ = ["register", "cmd_campaign", "cmd_analyze", "cmd_report", "cmd_compare",
           "verdict_table", "CliError"]


class CliError(FlapctlError):
    """A command-line argument is unusable (missing file, existing output...)."""


class _PointProgress:
    """One progress line per point: 'point 3/12 TSR 2.5 ... [####] 40 %'."""

    def __init__(self, stream=None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self._bar: Progress | None = None
        self._name = ""

    def __call__(self, spec, total: int, fraction: float) -> None:
        if spec.name != self._name:
            self._name = spec.name
            self._bar = Progress(f"point {spec.index + 1}/{total} {spec.label}", self.stream)
        self._bar(fraction)


def _existing(path: str, what: str) -> Path:
    p = Path(path)
    if not p.exists():
        raise CliError(f"{what} {p} does not exist")
    return p


def verdict_table(result) -> str:
    """The verdict table (one row per set point and schedule mode) as plain text."""
    rows = []
    for g in sorted(result.gains, key=lambda g: (g.flow_setpoint_m_s, g.tsr_setpoint, g.mode)):
        base = next(p for p in result.points if p.kind == "baseline" and p.tsr_setpoint == g.tsr_setpoint
                    and p.flow_setpoint_m_s == g.flow_setpoint_m_s)
        morph = next(p for p in result.points if p.mode == g.mode and p.tsr_setpoint == g.tsr_setpoint
                     and p.flow_setpoint_m_s == g.flow_setpoint_m_s)
        rows.append([f"{g.tsr_setpoint:g}", f"{g.flow_setpoint_m_s:g}", g.mode,
                     f"{base.cp_net:.4f}", f"{morph.cp_net:.4f}", f"{g.gain * 100:+.2f} %",
                     f"[{g.lo * 100:+.2f}, {g.hi * 100:+.2f}] %",
                     f"[{g.delta_lo * 100:+.2f}, {g.delta_hi * 100:+.2f}] %", str(g.n_pairs), g.verdict])
    pct = int(round(result.level * 100))
    text = table(["TSR", "U m/s", "mode", "Cp net base", "Cp net mode", "gain",
                  f"Fieller {pct} %", f"delta {pct} %", "pairs", "verdict"], rows)
    lines = [text]
    if result.flags:
        lines.append("FLAGS:")
        lines.extend(f"  ! {f}" for f in result.flags)
    if result.excluded:
        lines.append("left out: " + "; ".join(result.excluded))
    return "\n".join(lines)


def cmd_campaign(args: argparse.Namespace) -> int:
    from .campaign import load_plan, run_campaign
    from .profile import load_profile

    plan = load_plan(_existing(args.plan, "plan"))
    profile = load_profile(_existing(args.profile, "profile"))
    progress = None if args.quiet else _PointProgress()
    s = run_campaign(plan, profile, args.out, progress=progress)
    print(f"campaign {plan.name}: {len(s.ran)} points run, {len(s.kept)} kept from before, "
          f"{len(s.skipped)} skipped, {len(s.discarded)} incomplete discarded; file {s.path}")
    return 0


def cmd_analyze(args: argparse.Namespace) -> int:
    from .analysis.campaign_analysis import analyze
    from .analysis.report import write_csv

    result = analyze(_existing(args.campaign, "campaign file"))
    print(verdict_table(result))
    if args.csv:
        if Path(args.csv).exists():
            raise CliError(f"{args.csv} exists already; flapctl never overwrites it")
        print(f"summary written to {write_csv(result, args.csv)}")
    return 0


def cmd_report(args: argparse.Namespace) -> int:
    from .analysis.campaign_analysis import analyze
    from .analysis.report import write_report

    src = _existing(args.campaign, "campaign file")
    result = analyze(src)
    out = args.out_dir or str(src.with_suffix("")) + "_report"
    paths = write_report(result, out)
    print(verdict_table(result))
    print(f"report written to {paths['html']}")
    return 0


def cmd_compare(args: argparse.Namespace) -> int:
    import tomllib

    import matplotlib.pyplot as plt

    from .analysis.compare import compare_run, comparison_figure
    from .profile import load_profile, parse_profile
    from .runlog import open_run

    run = _existing(args.run, "run log")
    if args.profile is None:
        data = open_run(run)
        text = str(data.attrs.get("profile_text", ""))
        if not text:
            raise CliError(f"{run}: the log carries no profile text: give --profile")
        profile = parse_profile(tomllib.loads(text), f"{run}:profile_text", text)
    else:
        profile = load_profile(_existing(args.profile, "profile"))
    c = compare_run(run, profile)
    print(table(["quantity", "log", "SIL model", "model - log"], [
        ["Cp gross", f"{c.cp_gross_measured:.4f}", f"{c.cp_gross_simulated:.4f}", f"{c.cp_gross_diff:+.4f}"],
        ["Cp net", f"{c.cp_net_measured:.4f}", f"{c.cp_net_simulated:.4f}", f"{c.cp_net_diff:+.4f}"],
        ["torque, mean over azimuth (N m)", f"{float(c.torque_measured_nm.mean()):.4f}",
         f"{float(c.torque_simulated_nm.mean()):.4f}", f"{c.torque_mean_diff_nm:+.4f}"],
        ["torque, RMS difference (N m)", "", "", f"{c.torque_rms_diff_nm:.4f}"],
        ["torque, correlation", "", "", f"{c.torque_correlation:.4f}"],
    ]))
    if args.out:
        out = Path(args.out)
        if out.exists():
            raise CliError(f"{out} exists already; flapctl never overwrites it")
        fig = comparison_figure(c)
        try:
            fig.savefig(out, dpi=100)
        finally:
            plt.close(fig)
        print(f"figure written to {out}")
    return 0


def register(subparsers) -> None:
    """Add the campaign commands to the main parser's subparsers."""
    p = subparsers.add_parser("campaign", help="run (or resume) a test campaign plan on the SIL rig")
    p.add_argument("plan", metavar="PLAN", help="campaign plan (TOML)")
    p.add_argument("--profile", required=True, metavar="P", help="rig profile (TOML)")
    p.add_argument("--out", required=True, metavar="FILE.h5",
                   help="campaign file; an existing file of the same plan is resumed")
    p.add_argument("--quiet", action="store_true", help="no progress display")
    p.set_defaults(func=cmd_campaign)

    p = subparsers.add_parser("analyze", help="net-gain verdict table of a campaign file")
    p.add_argument("campaign", metavar="CAMPAIGN.h5")
    p.add_argument("--csv", default=None, metavar="FILE", help="also write the summary as CSV")
    p.set_defaults(func=cmd_analyze)

    p = subparsers.add_parser("report", help="HTML report with figures and CSV of a campaign file")
    p.add_argument("campaign", metavar="CAMPAIGN.h5")
    p.add_argument("--out-dir", default=None, metavar="DIR",
                   help="report folder (a new one; default CAMPAIGN_report)")
    p.set_defaults(func=cmd_report)

    p = subparsers.add_parser("compare", help="re-run the SIL model at a run log's conditions")
    p.add_argument("run", metavar="RUN.h5")
    p.add_argument("--profile", default=None, metavar="P",
                   help="rig profile (default: the one stored in the log)")
    p.add_argument("--out", default=None, metavar="PNG", help="write the overlay figure")
    p.set_defaults(func=cmd_compare)
