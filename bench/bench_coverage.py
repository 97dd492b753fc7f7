"""Coverage of the net-gain interval in real SIL campaigns (printed, never asserted).

1. Reference ("true") net gain at one TSR: long baseline and morph runs, several seeds each,
   pooled energies (noise averages out; the drift of a campaign is absent).
2. ``--seeds`` campaigns of the demo plan reduced to that TSR, each with another plan seed (so
   other drift walks and other rig noise), analysed with flapctl.analysis.campaign_analysis.
3. Prints the fraction of 95 % Fieller intervals (and delta-method intervals) covering the
   reference, with a binomial standard error.  At about 2 s of CPU per 20 s run, 20 seeds of
   4 runs take a few minutes on 2 cores.

Run: python bench/bench_coverage.py [--seeds 20] [--tsr 2.5] [--ref-runs 16] [--ref-seconds 40]

The reference needs many turbulence seeds: single 60 s runs of the demo rig give gains from about
10 % to 14 % (the baseline Cp moves a few per cent with the turbulence realisation), so a reference
from 4 seeds can sit 1-2 % off and make good intervals look like misses.
"""
from __future__ import annotations

import argparse
import math
import re
import sys
import tempfile
import time
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from flapctl.analysis.campaign_analysis import analyze  # noqa: E402
from flapctl.campaign import parse_plan, run_campaign  # noqa: E402
from flapctl.profile import load_profile  # noqa: E402
from flapctl.runner import run_sil  # noqa: E402
from flapctl.schedule import Schedule  # noqa: E402

PLAN = ROOT / "hw_profiles" / "plans" / "demo_plan.toml"
PROFILE = ROOT / "hw_profiles" / "demo_flume_3blade.toml"
SCHEDULE = ROOT / "hw_profiles" / "schedules" / "demo_morph.toml"


def reference_gain(profile, tsr: float, runs: int, seconds: float) -> float:
    morph = Schedule.load(SCHEDULE, profile.blades)
    base = Schedule.neutral(profile.blades)
    tot = {}
    for name, sched in (("base", base), ("morph", morph)):
        es = ea = ef = 0.0
        for k in range(runs):
            out = run_sil(profile, sched, tsr=tsr, duration_s=seconds, out=None,
                          seed=50_000 + 17 * k, settle_s=8.0)
            s = out.summary
            es += s.shaft_energy_j
            ea += s.actuator_energy_j
            ef += s.fluid_energy_j
        tot[name] = (es - ea) / ef
    return tot["morph"] / tot["base"] - 1.0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=20)
    ap.add_argument("--tsr", type=float, default=2.5)
    ap.add_argument("--ref-runs", type=int, default=16)
    ap.add_argument("--ref-seconds", type=float, default=40.0)
    args = ap.parse_args()
    profile = load_profile(PROFILE)
    t0 = time.process_time()
    ref = reference_gain(profile, args.tsr, args.ref_runs, args.ref_seconds)
    print(f"reference net gain at TSR {args.tsr:g}: {ref * 100:+.2f} % "
          f"({args.ref_runs} x {args.ref_seconds:g} s per mode, {time.process_time() - t0:.1f} s CPU)")
    text0 = PLAN.read_text(encoding="utf-8")
    text0 = re.sub(r"^tsr = \[.*?\]", f"tsr = [{args.tsr}]", text0, flags=re.M)
    text0 = text0.replace('"../schedules/demo_morph.toml"', f'"{SCHEDULE}"')
    hits_f = hits_d = done = 0
    with tempfile.TemporaryDirectory(prefix="flapctl-coverage-") as tmp:
        for k in range(args.seeds):
            text = re.sub(r"^seed = \d+", f"seed = {1000 + k}", text0, flags=re.M)
            plan = parse_plan(tomllib.loads(text), f"<coverage seed {1000 + k}>", text)
            out = Path(tmp) / f"c{k}.h5"
            run_campaign(plan, profile, out)
            res = analyze(out)
            if not res.gains:
                print(f"seed {1000 + k}: no gain interval ({'; '.join(res.excluded)})")
                continue
            g = res.gains[0]
            done += 1
            hits_f += g.lo <= ref <= g.hi
            hits_d += g.delta_lo <= ref <= g.delta_hi
            print(f"seed {1000 + k}: gain {g.gain * 100:+.2f} % Fieller [{g.lo * 100:+.2f}, "
                  f"{g.hi * 100:+.2f}] % pairs {g.n_pairs} pooled {g.pooled_to_blocks} "
                  f"-> {'covers' if g.lo <= ref <= g.hi else 'MISSES'}", flush=True)
    if done:
        for name, hits in (("Fieller", hits_f), ("delta", hits_d)):
            p = hits / done
            print(f"{name} coverage {p * 100:.1f} % of {done} campaigns "
                  f"(binomial SE {100 * math.sqrt(p * (1 - p) / done):.1f} %)")
    print(f"total CPU {time.process_time() - t0:.1f} s")


if __name__ == "__main__":
    main()
