"""A long lockstep SIL run: memory growth and run-log size (prints figures).

    python bench/bench_soak.py [SECONDS]      (default 3600 simulated seconds)

Runs the demo flume rig with the demo schedule, logging to HDF5, and samples the process's
resident memory (from /proc/self/status) every simulated minute.
"""
from __future__ import annotations

import os
import pathlib
import sys
import tempfile
import time

ROOT = pathlib.Path(__file__).resolve().parent.parent

from flapctl.profile import load_profile  # noqa: E402
from flapctl.runner import run_sil  # noqa: E402
from flapctl.schedule import Schedule  # noqa: E402


def rss_mb() -> float:
    for line in pathlib.Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024.0
    return float("nan")


def main() -> None:
    seconds = float(sys.argv[1]) if len(sys.argv) > 1 else 3600.0
    profile = load_profile(ROOT / "hw_profiles" / "demo_flume_3blade.toml")
    schedule = Schedule.load(ROOT / "hw_profiles" / "schedules" / "demo_morph.toml", 3)
    samples = []
    t0 = time.perf_counter()

    def progress(fraction: float) -> None:
        samples.append((fraction * seconds, rss_mb()))

    with tempfile.TemporaryDirectory() as tmp:
        out = pathlib.Path(tmp) / "soak.h5"
        run_sil(profile, schedule, tsr=2.5, duration_s=seconds, out=out, progress=progress)
        size = os.path.getsize(out)
    wall = time.perf_counter() - t0
    first = next((m for t, m in samples if t >= min(60.0, seconds / 10)), samples[0][1])
    last = samples[-1][1]
    print(f"soak: {seconds:g} s simulated in {wall:.0f} s wall ({seconds / wall:.1f}x real time)")
    print(f"resident memory: {first:.1f} MB after warm-up, {last:.1f} MB at the end "
          f"(growth {last - first:+.2f} MB)")
    print(f"run log: {size / 1e6:.1f} MB for {seconds:g} s = {size / 1e6 * 3600 / seconds:.0f} MB per hour")


if __name__ == "__main__":
    main()
