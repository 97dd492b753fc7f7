"""Time from each fault to the safe command, on the lockstep SIL rig (prints figures).

    python bench/bench_faults.py

For every fault kind of the matrix in tests/fault_matrix.py: the tick at which the fault starts,
the tick of the trip (FAULT latched and the flaps start their ramp to neutral on that same tick),
the time in between, and when the flap commands reach neutral.
"""
from __future__ import annotations

import pathlib
import sys
import tempfile

ROOT = pathlib.Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from fault_matrix import FAULT_AT_S, MATRIX, run_fault  # noqa: E402

from flapctl.profile import load_profile  # noqa: E402
from flapctl.runlog import open_run  # noqa: E402
from flapctl.schedule import Schedule  # noqa: E402


def main() -> None:
    profile = load_profile(ROOT / "hw_profiles" / "demo_flume_3blade.toml")
    schedule = Schedule.load(ROOT / "hw_profiles" / "schedules" / "demo_morph.toml", 3)
    dt = 1.0 / profile.control.rate_hz
    print(f"{'fault':<18} {'reason':<18} {'ticks':>6} {'ms':>8} {'flaps neutral after ms':>23}")
    with tempfile.TemporaryDirectory() as tmp:
        for kind, extra, _reasons, _bound in MATRIX:
            out = pathlib.Path(tmp) / f"{kind}.h5"
            outcome = run_fault(profile, schedule, kind, extra, out)
            if not outcome.trips:
                print(f"{kind:<18} {'(no trip)':<18}")
                continue
            t_trip, reason, _ = outcome.trips[0]
            tk = open_run(out).ticks
            after = tk[tk["t_s"] >= t_trip]
            zero = after[(after["flap_cmd_deg"] == 0.0).all(axis=1)]
            t_zero = zero["t_s"][0] if len(zero) else float("nan")
            ticks = int(round((t_trip - FAULT_AT_S) / dt))
            print(f"{kind:<18} {reason:<18} {ticks:>6d} {(t_trip - FAULT_AT_S) * 1e3:>8.1f} "
                  f"{(t_zero - t_trip) * 1e3:>23.1f}")


if __name__ == "__main__":
    main()
