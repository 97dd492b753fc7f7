"""The fault matrix: every fault kind of sim.faults, what must trip, and how soon.

Shared by tests/test_faults.py (assertions) and bench/bench_faults.py (figures).  Each entry:
(kind, extra keys of the [[fault]] table, acceptable trip reasons, bound in seconds from the
moment the fault starts to the trip).  The bounds follow from the profile's limits
(telemetry_timeout_s 0.05 s, tracking 8 deg for 0.25 s, encoder jump 20 deg, max TSR 3.6,
max speed 110 rpm) plus the physics needed to reach them.
"""
from __future__ import annotations

FAULT_AT_S = 4.0
RUN_S = 7.0

MATRIX = [
    ("frame_loss", {"percent": 99.0}, {"telemetry_timeout"}, 0.5),
    ("bus_outage", {}, {"telemetry_timeout"}, 0.06),
    ("latency_spike", {"latency_s": 0.2}, {"telemetry_timeout"}, 0.06),
    ("encoder_glitch", {"counts": 1000}, {"encoder_jump"}, 0.003),
    ("lost_index", {}, {"encoder_index"}, 1.6 * 0.84 + 0.1),
    ("servo_jam", {"blade": 1}, {"flap_tracking", "servo_overcurrent"}, 1.0),
    ("flow_surge", {"factor": 1.8}, {"overspeed_rpm", "overspeed_tsr", "flow_sensor"}, 3.0),
    ("sensor_nan", {"sensor": "torque"}, {"torque_sensor"}, 0.003),
    ("sensor_saturation", {"sensor": "flow"}, {"flow_sensor"}, 0.003),
    ("brake_failure", {}, {"overspeed_tsr", "overspeed_rpm"}, 3.0),
]


def scenario_for(kind: str, extra: dict):
    from sim.faults import parse_scenario
    return parse_scenario({"schema_version": 1, "name": f"matrix: {kind}",
                           "fault": [{"kind": kind, "at_s": FAULT_AT_S, **extra}]}, f"<matrix {kind}>")


def run_fault(profile, schedule, kind: str, extra: dict, out):
    from flapctl.runner import run_sil
    sc = scenario_for(kind, extra)
    outcome = run_sil(profile, schedule, tsr=profile.fluid.design_tsr, duration_s=RUN_S, out=out,
                      settle_s=1.0, faults=sc)
    return outcome
