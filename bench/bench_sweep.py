"""Sweep throughput: cases per minute on a local pool, and the Dask speed-up with 2 workers over 1.

Cases are lockstep SIL runs of 20 whole revolutions (after 3 s of settling) on the demo flume rig,
varying the lead dead time.  Prints figures; asserts nothing.  A few tens of cases are measured
and the time for 200 is extrapolated from them (stated in the output).

    python bench/bench_sweep.py [--cases 24] [--dask-cases 12] [--workers 2]
"""
from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PROFILE = ROOT / "hw_profiles" / "demo_flume_3blade.toml"
SCHEDULE = ROOT / "hw_profiles" / "schedules" / "demo_morph.toml"

SPEC = """\
schema_version = 1
name = "bench-{tag}"
profile = "{profile}"
schedule = "{schedule}"
[base]
tsr = 2.5
[run]
revolutions = 20
settle_s = 3.0
[vary.lead_dead_time_s]
min = 0.0
max = 0.06
steps = {cases}
"""


def _spec(folder: Path, tag: str, cases: int) -> Path:
    path = folder / f"{tag}.toml"
    path.write_text(SPEC.format(tag=tag, profile=PROFILE.as_posix(), schedule=SCHEDULE.as_posix(),
                                cases=cases), encoding="utf-8")
    return path


def main() -> None:
    from flapctl.tune.sweep import run_sweep

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", type=int, default=24, help="cases on the local pool")
    ap.add_argument("--dask-cases", type=int, default=12, help="cases on each Dask cluster")
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()
    print(f"machine: {os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.2f} at start")
    with tempfile.TemporaryDirectory(prefix="flapctl-bench-sweep-") as tmp:
        d = Path(tmp)
        t0 = time.perf_counter()
        res = run_sweep(_spec(d, "pool", args.cases), d / "pool", workers=args.workers, plots=False)
        wall = time.perf_counter() - t0
        per_min = res.ran / wall * 60.0
        print(f"pool, {args.workers} processes: {res.ran} cases of 20 revolutions in {wall:.1f} s "
              f"(pool start-up included) = {per_min:.1f} cases/min")
        print(f"  extrapolated from these {res.ran} cases: 200 cases in {200 / per_min:.1f} min "
              f"(target < 5 min)")
        try:
            from distributed import LocalCluster
        except ImportError:
            print("dask/distributed not installed: Dask speed-up not measured")
            return
        times = {}
        for n in (1, 2):
            with LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                              dashboard_address="127.0.0.1:0") as cluster:
                t0 = time.perf_counter()
                res = run_sweep(_spec(d, f"dask{n}", args.dask_cases), d / f"dask{n}",
                                workers=args.dask_cases, scheduler=cluster.scheduler_address, plots=False)
                times[n] = time.perf_counter() - t0
            print(f"Dask, {n} worker(s): {res.ran} cases in {times[n]:.1f} s "
                  f"({res.ran / times[n] * 60.0:.1f} cases/min; cluster start-up excluded)")
        print(f"Dask speed-up, 2 workers over 1: {times[1] / times[2]:.2f}x (target >= 1.7x)")
    print(f"load average {os.getloadavg()[0]:.2f} at the end (other work on the machine slows every figure)")


if __name__ == "__main__":
    main()
