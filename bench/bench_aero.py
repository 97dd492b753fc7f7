"""Speed figures of the aerodynamic model (printed, never asserted).

* DMST solve of one operating point, 36 tubes per half (target <= 2 ms);
* blade-element evaluations per second in batch (target >= 1e6);
* microseconds per RotorAero.blade_loads call (time domain, pure Python; target <= 5 us);
* PolarGrid lookup and build times.

Run: python bench/bench_aero.py
"""
from __future__ import annotations

import math
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from sim.aero import RotorAero, RotorGeometry  # noqa: E402
from sim.blade import blade_element  # noqa: E402
from sim.polar import ThinSectionPolar  # noqa: E402
from sim.streamtube import solve_dmst  # noqa: E402

RHO, NU, U = 998.21, 1.0034e-6, 0.5
DEG = math.pi / 180.0
GEOMETRY = RotorGeometry(3, 0.15, 0.25, 0.05, 5 * DEG, 0.25, 0.25)


def _timed(fn, repeats: int) -> tuple[float, float]:
    """(median, minimum) wall time of ``fn`` in seconds."""
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), min(times)


def main() -> None:
    polar = ThinSectionPolar(0.21, 0.25, aspect_ratio=5.0)
    sched = lambda th, i: 6 * DEG * np.sin(th)   # noqa: E731

    for label, flap, ds in (("no flap", None, False), ("flap schedule", sched, False),
                            ("dynamic stall", None, True)):
        med, best = _timed(lambda: solve_dmst(GEOMETRY, polar, RHO, NU, 2.0, U, flap=flap,
                                              dynamic_stall=ds), 40)
        print(f"DMST one operating point, 36 tubes/half, {label:14s}: median {med * 1e3:6.2f} ms,"
              f" min {best * 1e3:6.2f} ms")

    n = 200_000
    theta = np.linspace(0.0, 2 * math.pi, n)
    t, _ = _timed(lambda: blade_element(theta, 1.0, 0.45, 5 * DEG, 0.05, polar, 6e4, 0.05, 0.15,
                                        0.25, True, rho=RHO), 5)
    print(f"blade-element batch of {n}: {t * 1e3:7.2f} ms -> {n / t:,.0f} evaluations/s")

    t0 = time.perf_counter()
    grid = polar.grid(6e4)
    print(f"PolarGrid build (1441 x 161): {(time.perf_counter() - t0) * 1e3:7.1f} ms")
    m = 200_000
    t0 = time.perf_counter()
    for k in range(m):
        grid.lookup(0.001 * (k % 3000) - 1.5, 0.1)
    print(f"PolarGrid.lookup: {(time.perf_counter() - t0) / m * 1e6:6.2f} us/call")

    aero = RotorAero(GEOMETRY, polar, RHO, NU)
    aero.refresh(2.0, U, None)
    omega = 2.0 * U / GEOMETRY.radius_m
    aero.blade_loads(0, 0.0, omega, U, 0.0, 1e-3)       # build the grid outside the timing
    for label, rig in (("static", aero),
                       ("dynamic stall", RotorAero(GEOMETRY, polar, RHO, NU, dynamic_stall=True))):
        rig.refresh(2.0, U, None)
        rig.blade_loads(0, 0.0, omega, U, 0.0, 1e-3)
        calls = 60_000
        dth = omega * 1e-3
        t0 = time.perf_counter()
        for k in range(calls // 3):
            th = k * dth
            rig.blade_loads(0, th, omega, U, 0.05, 1e-3)
            rig.blade_loads(1, th + 2.0944, omega, U, 0.05, 1e-3)
            rig.blade_loads(2, th + 4.1888, omega, U, 0.05, 1e-3)
        print(f"RotorAero.blade_loads ({label:13s}): "
              f"{(time.perf_counter() - t0) / calls * 1e6:6.2f} us/call")


if __name__ == "__main__":
    main()
