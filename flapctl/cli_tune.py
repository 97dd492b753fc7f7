"""The ``flapctl tune`` command group: excite, identify, lead, ilc and sweep.

``register(subparsers)`` adds the group to the main parser.  Each command function takes the
argparse namespace and returns an exit status; user errors raise FlapctlError subclasses (the
main entry point prints them).  Output files are never overwritten, except the sweep's plots,
which are redrawn from its results file on every (resumed) run.
"""
from __future__ import annotations

import argparse
import sys
import logging
import math
import os
from pathlib import Path

import numpy as np

from .console import Progress, table
from .errors import ProfileError

__all__ = ["register", "cmd_excite", "cmd_identify", "cmd_lead", "cmd_ilc", "cmd_sweep", "EXCITE_FORMAT"]

log = logging.getLogger(__name__)

EXCITE_FORMAT = "flapctl-servo-record-1"
_TWO_PI = 2.0 * math.pi


# --------------------------------------------------------------------------- helpers
def _new_file(path: str | Path, what: str, suffixes: tuple[str, ...] = ()) -> Path:
    out = Path(path)
    if suffixes and out.suffix.lower() not in suffixes:
        raise ProfileError(str(out), what, str(out), "a file name ending in " + " or ".join(suffixes))
    if out.exists():
        raise ProfileError(str(out), what, str(out), "a path that does not exist yet (files are never overwritten)")
    out.parent.mkdir(parents=True, exist_ok=True)
    return out


def _blade(profile, blade: int, source: str) -> int:
    if not 0 <= blade < profile.blades:
        raise ProfileError(source, "--blade", blade, f"a blade index 0..{profile.blades - 1}")
    return blade


def _numbers(text: str, option: str) -> list[float]:
    """'7:9:0.5' (start:stop:step, inclusive) or '7,7.5,8' -> floats."""
    try:
        if ":" in text:
            a, b, c = (float(v) for v in text.split(":"))
            if not (c > 0 and b >= a):
                raise ValueError
            n = int(math.floor((b - a) / c + 1e-9)) + 1
            return [round(a + k * c, 10) for k in range(n)]
        values = [float(v) for v in text.split(",") if v.strip()]
        if not values:
            raise ValueError
        return values
    except ValueError:
        raise ProfileError("command line", option, text, "START:STOP:STEP or a comma list of numbers") from None


def _dt(profile) -> float:
    return 1.0 / profile.control.rate_hz


# --------------------------------------------------------------------------- excite
def _signal(args: argparse.Namespace, t: np.ndarray) -> tuple[np.ndarray, str]:
    from .tune import excite
    amp = args.amplitude
    if args.signal == "step":
        start = 0.1 * float(t[-1])
        return excite.step(t, amp, start_s=start), f"step of {amp:g} deg at {start:g} s"
    f0, f1 = args.f0, args.f1
    if not 0.0 < f0 < f1:
        raise ProfileError("command line", "--f0/--f1", (f0, f1), "0 < f0 < f1 (Hz)")
    if args.signal == "chirp":
        return excite.chirp(t, f0, f1, amp), f"linear chirp {f0:g}-{f1:g} Hz, {amp:g} deg"
    freqs = np.geomspace(f0, f1, 12).tolist()
    return excite.multisine(t, freqs, amp), f"multisine of 12 tones {f0:g}-{f1:g} Hz, peak {amp:g} deg"


def _excite_ports(profile, args, dt):
    """(ports, clock, backend) to excite through: the SIL rig, a bridge, or the profile's CAN bus."""
    from .clock import VirtualClock

    if args.bridge:
        from .ports.bridge import BridgeClock, BridgeOptions, BridgePorts
        from .schema import load_section
        opts = load_section(BridgeOptions, {"endpoint": args.bridge}, "command line", "--bridge")
        ports = BridgePorts(profile, options=opts)
        return ports, BridgeClock(ports), f"bridge:{args.bridge}"
    if args.rig:
        if profile.bus.backend != "can":
            raise ProfileError(profile.source, "bus.backend", profile.bus.backend,
                               '"can" for --rig (or use --bridge ENDPOINT)')
        from .ports.can import CanPorts
        from .rtclock import RealtimeClock
        clock = RealtimeClock(int(round(dt * 1e9)))
        return CanPorts(profile, clock=clock), clock, "can"
    from .ports import backend_class
    rig = backend_class("sim", profile.source).for_profile(profile, dt, flow_m_s=args.flow,
                                                           initial_speed_rad_s=0.0)
    return rig, VirtualClock(int(round(dt * 1e9)), rig.step), f"sim (flow {args.flow:g} m/s)"


def cmd_excite(args: argparse.Namespace) -> int:
    """Drive one servo of the rig (or the SIL rig) through an excitation signal; write the record."""
    import h5py

    from .console import SAFETY_NOTICE, SAFETY_SHORT
    from .profile import load_profile
    from .tune.excite import excite_ports

    profile = load_profile(args.profile)
    blade = _blade(profile, args.blade, profile.source)
    if not args.seconds > 0.0:
        raise ProfileError("command line", "--seconds", args.seconds, "a record length > 0 s")
    if abs(args.amplitude) > profile.servos[blade].travel_deg:
        raise ProfileError("command line", "--amplitude", args.amplitude,
                           f"at most the servo's travel {profile.servos[blade].travel_deg:g} deg")
    out = _new_file(args.out, "--out", (".h5", ".hdf5"))
    dt = _dt(profile)
    t = np.arange(int(round(args.seconds / dt))) * dt
    signal, description = _signal(args, t)
    ports, clock, backend = _excite_ports(profile, args, dt)
    print(SAFETY_NOTICE if not backend.startswith("sim") else SAFETY_SHORT, file=sys.stderr)
    try:
        tt, cmd, fb, cur, volt = excite_ports(ports, clock, blade, signal, profile.brake.hold_torque_nm)
    finally:
        ports.close()
        clock.close()
    tt = tt - tt[0]
    with h5py.File(out, "x") as f:
        for name, data in (("t_s", tt), ("command_deg", cmd), ("feedback_deg", fb), ("current_a", cur),
                           ("voltage_v", volt)):
            f.create_dataset(name, data=data)
        f.attrs.update({"format": EXCITE_FORMAT, "dt_s": dt, "blade": blade, "signal": description,
                        "profile_source": profile.source, "profile_text": profile.text, "backend": backend})
    print(f"{profile.name}, blade {blade} ({backend}, rotor held by the brake): {description}, "
          f"{tt.size} ticks of {dt * 1e3:g} ms")
    peak_i = np.nanmax(np.abs(cur)) if np.any(np.isfinite(cur)) else float("nan")
    print(f"peak flap {np.max(np.abs(fb)):.2f} deg, peak current {peak_i:.3f} A")
    print(f"record: {out}")
    return 0


# --------------------------------------------------------------------------- identify
def _read_record(path: str) -> dict:
    import h5py
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("format") != EXCITE_FORMAT:
                raise ProfileError(path, "format", f.attrs.get("format"), f"{EXCITE_FORMAT!r} (from `tune excite`)")
            return {"t": f["t_s"][:], "command": f["command_deg"][:], "feedback": f["feedback_deg"][:],
                    "dt": float(f.attrs["dt_s"]), "blade": int(f.attrs["blade"]),
                    "signal": str(f.attrs["signal"])}
    except OSError as exc:
        raise ProfileError(path, "<file>", path, f"a readable HDF5 servo record ({exc})") from None


def cmd_identify(args: argparse.Namespace) -> int:
    """Fit the servo model to a record; optionally plot it and write a NEW profile with the fit."""
    from .tune.identify import fit_figure, identify, write_profile_with_fit

    rec = _read_record(args.log)
    fit = identify(rec["t"], rec["command"], rec["feedback"], rec["dt"])
    print(f"record {args.log}: {rec['signal']}, {rec['t'].size} samples")
    print(table(["quantity", "value", "std. error"], [
        ["dead time (ms)", f"{fit.dead_time_s * 1e3:.3f}", f"{fit.dead_time_se_s * 1e3:.3f}"],
        ["natural frequency (Hz)", f"{fit.natural_freq_hz:.3f}", f"{fit.natural_freq_se_hz:.3f}"],
        ["damping", f"{fit.damping:.4f}", f"{fit.damping_se:.4f}"],
        ["rate limit (deg/s)", "not reached" if fit.rate_limit_deg_s is None else f"{fit.rate_limit_deg_s:.1f}",
         "" if fit.rate_limit_se_deg_s is None else f"{fit.rate_limit_se_deg_s:.1f}"],
    ]))
    print(f"residual {fit.residual_rms_deg:.4f} deg RMS (peak flap rate {fit.peak_rate_deg_s:.1f} deg/s)")
    if args.plot:
        png = _new_file(args.plot, "--plot", (".png",))
        fit_figure(rec["t"], rec["command"], rec["feedback"], fit).savefig(png, dpi=100)
        print(f"plot: {png}")
    if args.write_profile:
        if not args.profile:
            raise ProfileError("command line", "--write-profile", args.write_profile,
                               "--profile PROFILE as well (the profile to copy)")
        blade = rec["blade"] if args.blade is None else args.blade
        out = write_profile_with_fit(args.profile, blade, fit, args.write_profile)
        print(f"new profile with blade {blade}'s identified servo: {out}")
    return 0


# --------------------------------------------------------------------------- lead
def cmd_lead(args: argparse.Namespace) -> int:
    """Predicted tracking error for each lead design vs no lead; write the chosen one."""
    from .profile import load_profile
    from .schedule import Schedule
    from sim.rig import servo_params
    from .tune.leaddesign import constant_lead, dead_time_lead, lead_table, precompensate, write_lead_table

    profile = load_profile(args.profile)
    schedule = Schedule.load(args.schedule, profile.blades)
    blade = _blade(profile, args.blade, profile.source)
    servo = servo_params(profile.servos[blade])
    f = profile.fluid
    radius = profile.geometry.radius_m
    design = f.design_tsr * f.design_speed_m_s / radius
    speeds = (_numbers(args.speeds, "--speeds") if args.speeds
              else np.round(np.linspace(0.8 * design, 1.2 * design, 5), 4).tolist())
    if any(not (s > 0.0) for s in speeds) or any(b <= a for a, b in zip(speeds, speeds[1:])):
        raise ProfileError("command line", "--speeds", speeds, "strictly increasing rotor speeds > 0 rad/s")
    tsrs = [w * radius / f.design_speed_m_s for w in speeds] if schedule.tsr_axis else None
    tick = _dt(profile)
    angle = constant_lead(schedule, servo, speeds, tsr=tsrs, tick_s=tick)
    dead = dead_time_lead(schedule, servo, speeds, tsr=tsrs, tick_s=tick)
    per_speed = lead_table(schedule, servo, speeds, tsr=tsrs, tick_s=tick)
    pre = precompensate(schedule, servo, speeds, f.design_speed_m_s, radius, tick_s=tick)
    harmonic = np.sqrt(np.mean(pre.rms_deg ** 2, axis=1))
    rows = []
    for k, w in enumerate(speeds):
        rows.append([f"{w:.3f}", f"{angle.rms_none_deg[k]:.3f}", f"{angle.rms_deg[k]:.3f}",
                     f"{per_speed.rms_deg[k]:.3f}", f"{dead.rms_deg[k]:.3f}", f"{harmonic[k]:.3f}",
                     f"{per_speed.lead_deg[k]:.2f}"])
    print(f"{profile.name}, servo of blade {blade}, schedule {Path(schedule.source).name}: predicted RMS "
          f"tracking error (deg), linear servo model with the {tick * 1e3:g} ms tick's hold")
    print(table(["speed rad/s", "no lead", f"angle {angle.lead_deg[0]:.1f} deg", "angle table",
                 f"dead time {dead.dead_time_s * 1e3:.1f} ms", "harmonic", "best lead deg"], rows))

    def mean(values) -> float:
        return float(np.sqrt(np.mean(np.square(values))))
    summary = {"none": mean(angle.rms_none_deg), "angle": mean(angle.rms_deg),
               "dead_time": mean(dead.rms_deg), "harmonic": mean(harmonic)}
    print("over the speeds: " + ", ".join(f"{k} {v:.4f} deg" for k, v in summary.items()))
    print(f"method {args.method}: {summary[args.method]:.4f} deg against {summary['none']:.4f} deg with no lead")
    for v in pre.violations:
        print(f"NOTE (harmonic): {v}")
    if args.out:
        if args.method == "harmonic":
            out = pre.write_toml(_new_file(args.out, "--out", (".toml",)))
            print(f"pre-compensated schedule: {out}")
        else:
            fit = per_speed if args.method == "angle" else dead
            out = write_lead_table(_new_file(args.out, "--out", (".csv",)), fit.speeds_rad_s, fit.lead_deg)
            print(f"lead table: {out}")
    return 0


# --------------------------------------------------------------------------- ilc
def _ilc_lead_bins(servo, gamma: float, q_cut: int, omega: float, bins: int, tick: float):
    from .tune.ilc import convergence_check
    best = None
    for d in range(0, bins // 4 + 1):
        rep = convergence_check(servo, gamma, d, q_cut, omega, bins, tick)
        if best is None or rep.sup_gain < best[1].sup_gain:
            best = (d, rep)
    return best


def cmd_ilc(args: argparse.Namespace) -> int:
    """Azimuth ILC of one blade's flap on the SIL servo at the design speed; save the correction."""
    from .profile import load_profile
    from .schedule import Schedule
    from sim.rig import servo_params
    from sim.servo import ServoModel
    from .tune.ilc import AzimuthILC, BinAccumulator

    profile = load_profile(args.profile)
    schedule = Schedule.load(args.schedule, profile.blades)
    blade = _blade(profile, args.blade, profile.source)
    if args.revolutions < 1:
        raise ProfileError("command line", "--revolutions", args.revolutions, "an integer >= 1")
    out = _new_file(args.out, "--out", (".json",)) if args.out else None
    params = servo_params(profile.servos[blade])
    f = profile.fluid
    omega = f.design_tsr * f.design_speed_m_s / profile.geometry.radius_m
    tsr = f.design_tsr if schedule.tsr_axis else None
    dt = _dt(profile)
    bins, gamma, q_cut = args.bins, args.gamma, args.q_cutoff
    lead_bins, report = _ilc_lead_bins(params, gamma, q_cut, omega, bins, dt)
    ilc = AzimuthILC(bins, gamma, lead_bins, q_cut, limit_deg=params.travel_deg)
    ilc.enable(params, omega, dt)
    print(f"{profile.name}, blade {blade} at {omega:.3f} rad/s: {bins} bins, gamma {gamma:g}, "
          f"lead {lead_bins} bins, Q cutoff harmonic {q_cut}; {report.describe()}")
    model = ServoModel(params, dt)
    limit = params.travel_deg - 0.5 * params.backlash_deg
    acc = BinAccumulator(bins)
    step = omega * dt
    model.reset(float(schedule.evaluate(0.0, blade, tsr)))
    ticks = int(math.ceil(_TWO_PI / step))
    # the schedule on the tick azimuths of one revolution (the speed is constant)
    ref = schedule.evaluate(np.arange(ticks + 1) * step, blade, tsr).tolist()
    rows = []
    for rev in range(args.revolutions):     # each revolution restarts at azimuth 0
        for k in range(ticks):
            a = k * step
            if a >= _TWO_PI:
                break
            acc.add(a, ref[k] - model.angle_deg)
            c = ref[k] + ilc.correction_at(a)
            model.step(max(-limit, min(limit, c)), 0.0)
        errors = acc.means()
        acc.clear()
        ilc.update(errors)
        rows.append([str(rev + 1), f"{ilc.last_error_rms_deg:.4f}",
                     f"{max(abs(v) for v in ilc.correction_deg):.3f}"])
    print(table(["revolution", "RMS error deg", "peak correction deg"], rows))
    first, last = float(rows[0][1]), float(rows[-1][1])
    print(f"error {first:.4f} -> {last:.4f} deg RMS over {args.revolutions} revolutions")
    if out is not None:
        ilc.save(out)
        print(f"corrections: {out}")
    return 0


# --------------------------------------------------------------------------- sweep
def cmd_sweep(args: argparse.Namespace) -> int:
    """Run or resume a parameter sweep (process pool, or a Dask cluster with --scheduler)."""
    from .tune.sweep import load_spec, run_sweep

    spec = load_spec(args.spec)
    out_dir = Path(args.out_dir) if args.out_dir else Path(f"sweep_{spec.name}")
    where = (f"Dask cluster {args.scheduler}" if args.scheduler
             else f"{args.workers or os.cpu_count() or 1} local processes")
    print(f"sweep {spec.name} ({spec.search.method}, objective {spec.objective}) on {where}; results in {out_dir}")
    result = run_sweep(spec, out_dir, workers=args.workers, scheduler=args.scheduler,
                       progress=Progress("  cases"))
    col = spec.objective_column
    names = list(spec.vary)
    ranked = sorted((r for r in result.rows if math.isfinite(r[col])), key=lambda r: r[col],
                    reverse=spec.maximise)[:10]
    print(table(names + ["cp_gross", "cp_net", "actuator W", "tracking deg", "mean TSR", "trips"],
                [[f"{r[n]:g}" for n in names] + [f"{r['cp_gross']:.4f}", f"{r['cp_net']:.4f}",
                                                 f"{r['actuator_power_w']:.4f}", f"{r['tracking_rms_deg']:.3f}",
                                                 f"{r['mean_tsr']:.3f}", str(r["trips"])] for r in ranked]))
    print(f"{len(result.rows)} cases in {result.csv_path} ({result.ran} run now, {result.reused} already there)")
    if result.best is not None:
        print(f"best {col}: {result.best[col]:.4f} at {result.best['key']}")
    tripped = [r["key"] for r in result.rows if r["trips"]]
    if tripped:
        print(f"NOTE: {len(tripped)} cases tripped an interlock, e.g. {tripped[0]}")
    for p in result.plots:
        print(f"plot: {p}")
    return 0


# --------------------------------------------------------------------------- parser
def register(subparsers) -> argparse.ArgumentParser:
    """Add ``tune`` and its sub-commands to the main parser's subparsers."""
    p = subparsers.add_parser("tune", help="servo identification, lead design, ILC and parameter sweeps")
    sub = p.add_subparsers(dest="tune_command", required=True, metavar="STEP")

    q = sub.add_parser("excite", help="drive one servo with a test signal and record it (SIL rig, bridge or CAN)")
    q.add_argument("profile", metavar="PROFILE")
    q.add_argument("--blade", type=int, required=True, metavar="N")
    q.add_argument("--signal", choices=("step", "chirp", "multisine"), required=True)
    q.add_argument("--amplitude", type=float, default=5.0, metavar="DEG", help="step size or peak (deg)")
    q.add_argument("--f0", type=float, default=0.5, metavar="HZ", help="lowest frequency (chirp, multisine)")
    q.add_argument("--f1", type=float, default=20.0, metavar="HZ", help="highest frequency")
    q.add_argument("--seconds", type=float, default=4.0, metavar="S", help="record length")
    q.add_argument("--out", required=True, metavar="LOG.h5", help="record to create (never overwritten)")
    q.add_argument("--bridge", metavar="ENDPOINT", help="excite through an I/O bridge (or `python -m sim.server`)")
    q.add_argument("--rig", action="store_true", help="excite on the rig through the profile's CAN bus")
    q.add_argument("--flow", type=float, default=0.0, metavar="M_S",
                   help="SIL rig: flow speed during the test (default 0: still fluid, no hinge load)")
    q.set_defaults(func=cmd_excite)

    q = sub.add_parser("identify", help="fit dead time, natural frequency, damping and rate limit")
    q.add_argument("log", metavar="LOG.h5")
    q.add_argument("--profile", metavar="P", help="profile to copy with the fit (--write-profile)")
    q.add_argument("--blade", type=int, default=None, metavar="N", help="servo to replace (default: the record's)")
    q.add_argument("--write-profile", metavar="NEW.toml", help="write a new profile with the identified servo")
    q.add_argument("--plot", metavar="PNG")
    q.set_defaults(func=cmd_identify)

    q = sub.add_parser("lead", help="lead designs and their predicted tracking error")
    q.add_argument("profile", metavar="PROFILE")
    q.add_argument("schedule", metavar="SCHEDULE")
    q.add_argument("--blade", type=int, default=0, metavar="N", help="whose servo (default 0)")
    q.add_argument("--speeds", metavar="LIST", help="rotor speeds in rad/s, START:STOP:STEP or a comma list "
                   "(default: 0.8 to 1.2 x the design speed)")
    q.add_argument("--method", choices=("angle", "dead_time", "harmonic"), default="dead_time")
    q.add_argument("--out", metavar="FILE", help="lead table .csv (angle, dead_time) or schedule .toml (harmonic)")
    q.set_defaults(func=cmd_lead)

    q = sub.add_parser("ilc", help="learn an azimuth correction on the SIL servo at the design speed")
    q.add_argument("profile", metavar="PROFILE")
    q.add_argument("schedule", metavar="SCHEDULE")
    q.add_argument("--blade", type=int, default=0, metavar="N")
    q.add_argument("--revolutions", type=int, default=10, metavar="N")
    q.add_argument("--bins", type=int, default=72, metavar="N", help="azimuth bins per revolution")
    q.add_argument("--gamma", type=float, default=0.5, help="learning gain")
    q.add_argument("--q-cutoff", type=int, default=6, metavar="K", help="highest harmonic learnt")
    q.add_argument("--out", metavar="FILE.json", help="save the learnt correction (new file)")
    q.set_defaults(func=cmd_ilc)

    q = sub.add_parser("sweep", help="parameter sweep of SIL runs (resumable; pool or Dask)")
    q.add_argument("spec", metavar="SPEC.toml")
    q.add_argument("--workers", type=int, default=None, metavar="N",
                   help="local processes (default: one per CPU); with --scheduler the most cases "
                   "queued at once (default: all)")
    q.add_argument("--scheduler", metavar="ADDR", help="Dask scheduler, e.g. tcp://127.0.0.1:8786")
    q.add_argument("--out-dir", metavar="DIR", help="results folder (default sweep_NAME); rerun to resume")
    q.set_defaults(func=cmd_sweep)
    return p

