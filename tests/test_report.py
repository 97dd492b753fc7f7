"""A tiny SIL campaign end to end: campaign -> analyze -> report and CLI; model comparison."""
from __future__ import annotations

import argparse
import csv
import tomllib
from pathlib import Path

import pytest

from flapctl.analysis.campaign_analysis import VERDICTS, analyze
from flapctl.analysis.compare import compare_run, comparison_figure
from flapctl.analysis.report import new_folder, write_report
from flapctl.campaign import parse_plan, run_campaign
from flapctl.cli_campaign import CliError, register

ROOT = Path(__file__).resolve().parent.parent
SCHEDULE = ROOT / "hw_profiles" / "schedules" / "demo_morph.toml"

PLAN = f"""
schema_version = 1
name = "tiny-e2e"
[setpoints]
tsr = [2.5, 3.0]
[[modes]]
name = "fixed"
kind = "baseline"
[[modes]]
name = "morph"
kind = "schedule"
schedule = "{SCHEDULE}"
[run]
dwell_revolutions = 6
repeats = 1
seed = 9
[settling]
band_rel = 0.03
revolutions = 2
timeout_s = 5.0
"""


@pytest.fixture(scope="module")
def campaign_file(tmp_path_factory):
    from flapctl.profile import load_profile
    profile = load_profile(ROOT / "hw_profiles" / "demo_flume_3blade.toml")
    out = tmp_path_factory.mktemp("e2e") / "tiny.h5"
    run_campaign(parse_plan(tomllib.loads(PLAN), "<tiny-e2e>", PLAN), profile, out)
    return out


def _parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="flapctl")
    register(ap.add_subparsers(dest="command", required=True))
    return ap


def test_analyze_gives_a_verdict_per_tsr(campaign_file):
    res = analyze(campaign_file)
    assert sorted(g.tsr_setpoint for g in res.gains) == [2.5, 3.0]
    assert all(g.verdict in VERDICTS for g in res.gains)
    for p in res.points:
        assert p.cp_net_lo < p.cp_net < p.cp_net_hi
        assert 0.0 < p.cp_gross < res.cp_bound
        # SIL servo power is telemetry: morph spends actuator energy, the baseline hardly any
        assert (p.cp_actuator > 1e-4) == (p.mode == "morph")
        assert p.thrust_source == "measured"           # the SIL rig reports its streamwise force
        assert p.cp_gross_corrected < p.cp_gross       # blockage B = 0.2 inflates Cp


def test_report_files_and_html(campaign_file, tmp_path):
    res = analyze(campaign_file)
    paths = write_report(res, tmp_path / "rep")
    page = paths["html"].read_text(encoding="utf-8")
    assert "Verdict per TSR" in page
    assert any(f">{v}<" in page for v in VERDICTS)
    assert page.count("data:image/png;base64,") == 3 + 2       # 3 figures + a polar per TSR
    assert "Fieller 1954" in page and "JCGM 100:2008" in page
    with paths["csv"].open(encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 4 and {r["mode"] for r in rows} == {"fixed", "morph"}
    again = new_folder(tmp_path / "rep")               # never overwrites: a new folder
    assert again == tmp_path / "rep-2" and paths["html"].exists()


def test_cli_analyze_and_report(campaign_file, tmp_path, capsys):
    ap = _parser()
    args = ap.parse_args(["analyze", str(campaign_file), "--csv", str(tmp_path / "s.csv")])
    assert args.func(args) == 0
    out = capsys.readouterr().out
    assert "verdict" in out and (tmp_path / "s.csv").exists()
    args = ap.parse_args(["analyze", str(campaign_file), "--csv", str(tmp_path / "s.csv")])
    with pytest.raises(CliError, match="never overwrites"):
        args.func(args)
    args = ap.parse_args(["report", str(campaign_file), "--out-dir", str(tmp_path / "r")])
    assert args.func(args) == 0
    assert (tmp_path / "r" / "report.html").exists()


def test_compare_overlays_a_logged_sil_run(tmp_path, flume):
    from flapctl.runner import run_sil
    from flapctl.schedule import Schedule
    sched = Schedule.load(SCHEDULE, flume.blades)
    log = tmp_path / "run.h5"
    run_sil(flume, sched, tsr=2.5, duration_s=6.0, out=log, seed=4)
    other = compare_run(log, flume, settle_s=2.0)        # other seed: other noise, same physics
    # the model at the logged conditions: same torque shape and Cp within a few per cent
    assert 0.0 < other.torque_rms_diff_nm < 0.1 * float(abs(other.torque_measured_nm).max())
    assert other.torque_correlation > 0.9
    assert abs(other.cp_gross_diff) < 0.05 * other.cp_gross_measured
    fig = comparison_figure(other)
    assert len(fig.axes[0].lines) == 2
