"""The ``flapctl`` command.

Subcommands: ``check`` (validate a profile, print derived quantities), ``run`` (one run on the
SIL rig, logged), ``demo`` (baseline versus morphing on the demo flume rig), ``bench`` (what the
tick costs on this PC), ``safety`` (the cautions).  Errors in input files print one line naming
the file, key and value, and exit with status 2.
"""
from __future__ import annotations

import argparse
import datetime as _dt
import logging
import math
import sys
from pathlib import Path

from . import __version__
from .console import SAFETY_NOTICE, SAFETY_SHORT, Progress, table
from .errors import FlapctlError

__all__ = ["main", "build_parser"]

log = logging.getLogger("flapctl")
PACKAGE_DIR = Path(__file__).resolve().parent
DEMO_PROFILE = "demo_flume_3blade.toml"
DEMO_SCHEDULE = "schedules/demo_morph.toml"


def _data_path(name: str) -> Path:
    """A demo file: from the source checkout's hw_profiles/, else the installed copy."""
    for base in (PACKAGE_DIR.parent / "hw_profiles", PACKAGE_DIR / "data" / "hw_profiles"):
        p = base / name
        if p.exists():
            return p
    raise FlapctlError(f"demo file {name} not found (looked in hw_profiles/ and the installed package)")


# -- check -------------------------------------------------------------------------------------
def cmd_check(args: argparse.Namespace) -> int:
    from .derived import rig_figures, schedule_demand
    from .profile import load_profile, profile_keys
    from .schedule import Schedule

    if args.keys:
        print("\n".join(profile_keys()))
        return 0
    if args.profile is None:
        raise FlapctlError("check: give a PROFILE (or --keys to list every profile key)")
    profile = load_profile(args.profile)
    fig = rig_figures(profile, tsr=args.tsr)
    g = profile.geometry
    print(f"profile {profile.source}: {profile.name} -- valid (schema_version {profile.schema_version})")
    if profile.description:
        print(f"  {profile.description}")
    rows = [
        ("blades N, radius R, span H, chord c", f"{g.blades}, {g.radius_m:g} m, {g.span_m:g} m, {g.chord_m:g} m"),
        ("section, flap chord ratio, preset pitch", f"{g.section}, {g.flap_chord_ratio:g}, {g.preset_pitch_deg:+g} deg (toe-out +)"),
        ("swept area A = 2 R H", f"{fig.swept_area_m2:.4f} m^2"),
        ("solidity N c / R", f"{fig.solidity_nc_r:.4f}"),
        ("solidity N c / D", f"{fig.solidity_nc_d:.4f}"),
        ("solidity N c / (2 pi R)", f"{fig.solidity_nc_2pir:.4f}"),
        (f"fluid ({fig.fluid.medium}, {fig.fluid.temperature_c:g} degC) density", f"{fig.fluid.density_kg_m3:.3f} kg/m^3"),
        ("dynamic viscosity", f"{fig.fluid.viscosity_pa_s:.4e} Pa s"),
        ("kinematic viscosity", f"{fig.fluid.kinematic_viscosity_m2_s:.4e} m^2/s"),
        ("design flow speed U", f"{fig.design_speed_m_s:g} m/s"),
        ("available fluid power 1/2 rho A U^3", f"{fig.available_power_w:.3f} W"),
        ("design TSR", f"{fig.design_tsr:g}"),
        ("rotor speed at design TSR", f"{fig.rotor_speed_rad_s:.3f} rad/s = {fig.rotor_speed_rpm:.1f} rpm = {fig.rotor_frequency_hz:.3f} Hz"),
        ("chord Reynolds number TSR U c / nu", f"{fig.chord_reynolds:.3e}"),
        ("diameter Reynolds number U D / nu", f"{fig.diameter_reynolds:.3e}"),
    ]
    if fig.blockage_ratio is not None:
        rows.append(("blockage ratio A / A_channel", f"{fig.blockage_ratio:.4f}"))
    rows += [
        ("speed limit, TSR limit", f"{profile.limits.max_speed_rpm:g} rpm, {profile.limits.max_tsr:g}"),
        ("controller rate, bus backend", f"{profile.control.rate_hz:g} Hz, {profile.bus.backend}"),
    ]
    width = max(len(r[0]) for r in rows)
    for k, v in rows:
        print(f"  {k.ljust(width)}  {v}")
    status = 0
    if profile.bus.backend == "can":
        from .ports.can import bus_load_lines
        for line in bus_load_lines(profile):
            print(f"  {line}")
    elif profile.bus.backend == "bridge":
        from .ports.bridge import bridge_options
        opts = bridge_options(profile)
        print(f"  bridge endpoint {opts.endpoint} ({opts.mode}), timeout {opts.timeout_ms:g} ms, "
              f"watchdog {opts.watchdog_ms:g} ms")
    if args.schedule:
        schedule = Schedule.load(args.schedule, profile.blades)
        schedule.check_travel([s.travel_deg for s in profile.servos])
        print(f"schedule {schedule.source}: valid"
              + (f", TSR axis {list(schedule.tsr_axis)}" if schedule.tsr_axis else ""))
        demand = schedule_demand(profile, schedule, tsr=args.tsr)
        print(table(["blade", "peak rate deg/s", "rate limit deg/s", "peak deflection deg", "travel deg", "verdict"],
                    [[str(d.blade), f"{d.peak_rate_deg_s:.1f}", f"{d.rate_limit_deg_s:.1f}",
                      f"{d.peak_deflection_deg:.2f}", f"{d.travel_deg:.1f}",
                      "ok" if d.rate_ok and d.travel_ok else "INFEASIBLE"] for d in demand]))
        bad = [d for d in demand if not d.rate_ok]
        if bad:
            status = 1
            for d in bad:
                print(f"WARNING: blade {d.blade}: the schedule demands {d.peak_rate_deg_s:.0f} deg/s at TSR "
                      f"{fig.design_tsr:g}, above the servo rate limit {d.rate_limit_deg_s:.0f} deg/s: the flap "
                      "cannot follow it (lower the amplitude or the TSR, or use a faster servo)")
    return status


# -- run ---------------------------------------------------------------------------------------
def _load_run_inputs(profile_path: str, schedule_path: str | None):
    from .profile import load_profile
    from .schedule import Schedule

    profile = load_profile(profile_path)
    if schedule_path:
        schedule = Schedule.load(schedule_path, profile.blades)
    else:
        schedule = Schedule.neutral(profile.blades)
    schedule.check_travel([s.travel_deg for s in profile.servos])
    return profile, schedule


def _summary_rows(label: str, s) -> list[str]:
    return [label, f"{s.mean_tsr:.3f}", f"{s.revolutions}", f"{s.shaft_power_w:.4f}",
            f"{s.actuator_power_w:.4f}", f"{s.cp_gross:.4f}", f"{s.cp_net:.4f}"]


SUMMARY_HEADERS = ["run", "TSR", "revs", "shaft W", "actuator W", "Cp gross", "Cp net"]


def _rt_options(args):
    from .rtclock import RealtimeOptions

    if args.fifo is None and args.cpu is None and not args.mlock and not args.freeze_gc:
        return None
    return RealtimeOptions(fifo_priority=args.fifo, cpu=args.cpu, mlockall=args.mlock,
                           freeze_gc=args.freeze_gc)


def _operator_attach(args):
    """An attach hook that serves the operator interface on the controller, or None."""
    if not args.operator:
        return None
    from .opif import OperatorInterface

    def attach(ctl):
        opif = OperatorInterface(ctl, command_endpoint=args.command_bind,
                                 telemetry_endpoint=args.telemetry_bind,
                                 curve_server_secret=args.server_secret,
                                 authorized_clients_dir=args.clients_dir,
                                 heartbeat_timeout_s=args.operator_heartbeat)
        print(f"operator interface: commands on {opif.command_address}, telemetry on "
              f"{opif.telemetry_address} (`flapctl watch {opif.telemetry_address}`)", file=sys.stderr)
        return opif.close
    return attach


def _learning_attach(args, profile, tsr):
    """An attach hook that plugs per-blade ILC into the controller, or None."""
    if not (args.ilc or args.ilc_load):
        return None
    from .tune.ilc_loop import LoopLearning

    omega = tsr * (args.flow or profile.fluid.design_speed_m_s) / profile.geometry.radius_m
    learning = LoopLearning.for_profile(profile, omega, gamma=args.ilc_gamma, load=args.ilc_load)
    if args.ilc_freeze:
        learning.freeze()

    def attach(ctl):
        ctl.set_learning(learning)

        def detach():
            for i, h in enumerate(learning.history):
                finite = [v for v in h if v == v]
                if finite:
                    print(f"learning, blade {i}: RMS error {finite[0]:.3f} deg in its first revolution, "
                          f"{finite[-1]:.3f} deg in its last ({len(finite)} revolutions)", file=sys.stderr)
            if args.ilc_save:
                for path in learning.save(args.ilc_save):
                    print(f"learned correction saved: {path}", file=sys.stderr)
        return detach
    return attach


def _combine(*hooks):
    hooks = [h for h in hooks if h is not None]
    if not hooks:
        return None

    def attach(ctl):
        undo = [h(ctl) for h in hooks]
        return lambda: [u() for u in reversed(undo) if u is not None]
    return attach


def cmd_run(args: argparse.Namespace) -> int:
    from .fluid import fluid_properties

    profile, schedule = _load_run_inputs(args.profile, args.schedule)
    backend = "bridge" if args.bridge else profile.bus.backend
    hardware = backend != "sim"
    print(SAFETY_NOTICE if hardware else SAFETY_SHORT, file=sys.stderr)
    tsr = profile.fluid.design_tsr if args.tsr is None else args.tsr
    f = profile.fluid
    fluid = fluid_properties(f.medium, f.temperature_c, f.pressure_pa, source=profile.source)
    faults = None
    if args.faults:
        if backend != "sim" or args.realtime:
            raise FlapctlError("--faults injects faults into the embedded SIL rig: use it with a "
                               "profile whose bus.backend is \"sim\", without --bridge or --realtime")
        from sim.faults import load_scenario
        faults = load_scenario(args.faults, profile.blades)
    attach = _combine(_operator_attach(args), _learning_attach(args, profile, tsr))
    start = not args.operator
    label = Path(args.out).stem
    progress = Progress(f"{label:>10}")
    if backend == "sim" and not args.realtime:
        out = run_sil_from_args(profile, schedule, tsr, args, args.out, label, faults=faults,
                                attach=attach, start=start)
    elif backend == "sim":
        from .rtrun import run_paced_sil
        out = run_paced_sil(profile, schedule, tsr=tsr, duration_s=args.duration, out=args.out,
                            flow_m_s=args.flow, options=_rt_options(args), seed=args.seed,
                            lead=_lead(args),
                            settle_s=args.settle, progress=progress, label=label, attach=attach,
                            start=start)
    elif backend == "bridge":
        import dataclasses

        from .ports.bridge import BridgeClock, BridgeOptions, BridgePorts, bridge_options
        from .schema import load_section
        if profile.bus.backend == "bridge":
            opts = bridge_options(profile, args.bridge)
        else:    # a profile of another backend driven over the bridge: the endpoint alone
            opts = load_section(BridgeOptions, {"endpoint": args.bridge}, "command line", "--bridge")
        if args.realtime:
            opts = dataclasses.replace(opts, mode="free")
        ports = BridgePorts(profile, options=opts)
        from .runner import run_with_ports
        # both modes are paced by the bridge itself (lockstep: a step per tick; free: its readings)
        out = run_with_ports(profile, schedule, ports, BridgeClock(ports), tsr=tsr,
                             duration_s=args.duration, out=args.out,
                             density_kg_m3=fluid.density_kg_m3, flow_m_s=args.flow,
                             settle_s=args.settle, progress=progress, label=label,
                             lead=_lead(args),
                             backend=f"bridge:{ports.mode}:{ports.endpoint}", attach=attach,
                             start=start)
    else:   # can
        from .ports.can import CanPorts
        from .rtrun import run_realtime
        out = run_realtime(profile, schedule, CanPorts(profile), tsr=tsr, duration_s=args.duration,
                           out=args.out, density_kg_m3=fluid.density_kg_m3,
                           options=_rt_options(args), settle_s=args.settle, progress=progress,
                           label=label, attach=attach, start=start, lead=_lead(args))
    s = out.summary
    print(table(SUMMARY_HEADERS, [_summary_rows(Path(args.out).name, s)]))
    for flag in s.flags:
        print(f"NOTE: {flag}")
    stats = getattr(out, "clock_stats", None)
    if stats:
        print(f"clock: {stats.get('late', 0)} late ticks ({stats.get('late_pct', 0):.3f} %), "
              f"{stats.get('overruns', 0)} overruns, p99 lateness {stats.get('lateness_p99_us', float('nan')):.1f} us, max {stats.get('lateness_max_us', float('nan')):.0f} us")
    print(f"final state {out.state.name}; run log {args.out}")
    for t, reason, detail in out.trips:
        print(f"TRIP at {t:.3f} s: {reason}: {detail}")
    return 0 if not out.trips else 3


def _lead(args):
    if getattr(args, "lead_table", None):
        from .lead import load_lead_table
        return load_lead_table(args.lead_table)
    return None


def run_sil_from_args(profile, schedule, tsr, args, out_path, label, faults=None, attach=None,
                      start=True):
    from .runner import run_sil

    return run_sil(profile, schedule, tsr=tsr, duration_s=args.duration, out=out_path,
                   flow_m_s=args.flow, settle_s=args.settle, seed=args.seed,
                   progress=Progress(f"{label:>10}"), label=label, faults=faults, attach=attach,
                   start=start, lead=_lead(args))


# -- demo --------------------------------------------------------------------------------------
def cmd_demo(args: argparse.Namespace) -> int:
    from .fluid import fluid_properties
    from .plots import azimuth_figure
    from .runlog import open_run
    from .schedule import Schedule

    print(SAFETY_SHORT, file=sys.stderr)
    profile_path = args.profile or str(_data_path(DEMO_PROFILE))
    schedule_path = args.schedule or str(_data_path(DEMO_SCHEDULE))
    profile, schedule = _load_run_inputs(profile_path, schedule_path)
    neutral = Schedule.neutral(profile.blades)
    stamp = _dt.datetime.now().strftime("%Y%m%d-%H%M%S")
    out_dir = Path(args.out_dir) if args.out_dir else Path(f"flapctl-demo-{stamp}")
    out_dir.mkdir(parents=True, exist_ok=True)
    tsr = profile.fluid.design_tsr if args.tsr is None else args.tsr
    print(f"demo on {profile.name} ({profile.source}) at TSR {tsr:g}, U = "
          f"{profile.fluid.design_speed_m_s:g} m/s, {args.duration:g} s per run (SIL rig, lockstep)")
    base = run_sil_from_args(profile, neutral, tsr, args, out_dir / "baseline.h5", "baseline")
    morph = run_sil_from_args(profile, schedule, tsr, args, out_dir / "morphing.h5", "morphing")
    b, m = base.summary, morph.summary
    gain = m.cp_net / b.cp_net - 1.0 if b.cp_net > 0 else float("nan")
    print()
    print(table(SUMMARY_HEADERS + ["net gain"],
                [_summary_rows("baseline (flaps neutral)", b) + ["--"],
                 _summary_rows(f"morphing ({Path(schedule.source).name})", m) + [f"{gain * 100:+.1f} %"]]))
    print("Cp net = (shaft energy - servo electrical energy) / (1/2 rho A U^3 t) over whole revolutions, "
          f"after {args.settle:g} s of settling.")
    for label, s in (("baseline", b), ("morphing", m)):
        for flag in s.flags:
            print(f"NOTE ({label}): {flag}")
    print("One seeded run per mode: this table alone does not say how sure the gain is; "
          "see the campaign tools for intervals.")
    f = profile.fluid
    fluid = fluid_properties(f.medium, f.temperature_c, f.pressure_pa)
    g = profile.geometry
    fig = azimuth_figure([("baseline", open_run(base.path)), ("morphing", open_run(morph.path))],
                         profile.rotor.inertia_kg_m2, 2 * g.radius_m * g.span_m, fluid.density_kg_m3,
                         t_from_s=args.settle)
    png = out_dir / "demo_azimuth.png"
    fig.savefig(png, dpi=110)
    print(f"run logs: {base.path}, {morph.path}\nplot: {png}")
    return 0


# -- sim studies -------------------------------------------------------------------------------
def _floats(text: str, name: str) -> list[float]:
    """'1.0:3.5:0.25' (start:stop:step, inclusive) or '1,1.5,2'."""
    try:
        if ":" in text:
            a, b, c = (float(v) for v in text.split(":"))
            if c <= 0 or b < a:
                raise ValueError
            n = int(math.floor((b - a) / c + 1e-9)) + 1
            return [round(a + k * c, 10) for k in range(n)]
        return [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise FlapctlError(f"--{name} = {text!r}: expected START:STOP:STEP or a comma list of numbers")


def _sim_setup(args):
    from .fluid import fluid_properties
    from .profile import load_profile
    from .schedule import Schedule

    profile = load_profile(args.profile)
    f = profile.fluid
    fluid = fluid_properties(f.medium, f.temperature_c, f.pressure_pa, source=profile.source)
    schedule = Schedule.load(args.schedule, profile.blades) if getattr(args, "schedule", None) else None
    flow = f.design_speed_m_s if args.flow is None else args.flow
    return profile, fluid, schedule, flow


def _out_png(args, default: str) -> Path:
    out = Path(args.out or default)
    if out.exists():
        raise FlapctlError(f"{out}: exists already; give another --out (files are never overwritten)")
    out.parent.mkdir(parents=True, exist_ok=True)
    return out


def _save_png(args, fig, default: str) -> Path:
    """Write ``fig`` to --out (or ``default``), never over an existing file, and say where."""
    out = _out_png(args, default)
    fig.savefig(out, dpi=110)
    print(f"plot: {out}")
    return out


def cmd_sim_sweep_tsr(args: argparse.Namespace) -> int:
    import matplotlib.pyplot as plt
    from sim.studies import model_for, sweep_tsr

    profile, fluid, schedule, flow = _sim_setup(args)
    tsrs = _floats(args.tsr, "tsr")
    model = model_for(profile, fluid.density_kg_m3, fluid.kinematic_viscosity_m2_s,
                      induction=args.induction)
    fixed = sweep_tsr(model, flow, tsrs, progress=Progress("  fixed"))
    curves = [("fixed flaps (neutral)", fixed)]
    if schedule is not None:
        curves.append((f"schedule {Path(schedule.source).name}",
                       sweep_tsr(model, flow, tsrs, schedule, progress=Progress("  sched"))))
    headers = ["TSR"] + [f"Cp {name}" for name, _ in curves]
    rows = []
    for k, tsr in enumerate(tsrs):
        rows.append([f"{tsr:.2f}"] + [f"{c[k].cp:.4f}" + ("" if c[k].valid else " *") for _, c in curves])
    print(f"steady Cp-TSR of the SIL model ({model.induction}, {profile.name}, U = {flow:g} m/s, "
          f"pitch {profile.geometry.preset_pitch_deg:+g} deg)")
    print(table(headers, rows))
    if any(not p.valid for _, c in curves for p in c):
        print("* outside the streamtube model's validity (upwind induction >= 0.5): read with care")
    for name, c in curves:
        best = max(c, key=lambda p: p.cp)
        print(f"peak Cp {best.cp:.4f} at TSR {best.tsr:.2f} ({name})")
    fig, ax = plt.subplots(figsize=(7, 4.5))
    for name, c in curves:
        ax.plot([p.tsr for p in c], [p.cp for p in c], "o-", label=name, ms=3)
        bad = [p for p in c if not p.valid]
        if bad:
            ax.plot([p.tsr for p in bad], [p.cp for p in bad], "rx", ms=7)
    ax.axhline(0, color="0.6", lw=0.8)
    ax.set_xlabel("TSR")
    ax.set_ylabel("Cp (steady, model)")
    ax.set_title(f"{profile.name}: Cp versus TSR ({model.induction}); x = outside model validity")
    ax.grid(alpha=0.3)
    ax.legend()
    _save_png(args, fig, f"cp_tsr_{profile.name}.png")
    return 0


def cmd_sim_pitch_sweep(args: argparse.Namespace) -> int:
    import matplotlib.pyplot as plt
    from sim.studies import pitch_sweep

    profile, fluid, _, flow = _sim_setup(args)
    pitches = _floats(args.pitch, "pitch")
    tsrs = _floats(args.tsr, "tsr")
    res = pitch_sweep(profile, fluid.density_kg_m3, fluid.kinematic_viscosity_m2_s, flow, pitches,
                      tsrs, progress=Progress("  pitch"))
    rows = []
    best_overall = None
    for p, curve in res.items():
        best = max(curve, key=lambda c: c.cp)
        rows.append([f"{p:+.1f}", f"{best.cp:.4f}", f"{best.tsr:.2f}"])
        if best_overall is None or best.cp > best_overall[1].cp:
            best_overall = (p, best)
    print(f"peak Cp versus fixed preset pitch (toe-out +), flaps neutral, {profile.name}, U = {flow:g} m/s")
    print(table(["pitch deg", "peak Cp", "at TSR"], rows))
    print(f"best fixed pitch: {best_overall[0]:+.1f} deg (Cp {best_overall[1].cp:.4f} at TSR "
          f"{best_overall[1].tsr:.2f})")
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(11, 4.5))
    for p, curve in res.items():
        a1.plot([c.tsr for c in curve], [c.cp for c in curve], label=f"{p:+.0f} deg")
    a1.set_xlabel("TSR"); a1.set_ylabel("Cp"); a1.grid(alpha=0.3); a1.legend(fontsize=7)
    a1.axhline(0, color="0.6", lw=0.8)
    a2.plot(list(res), [max(c.cp for c in curve) for curve in res.values()], "o-")
    a2.set_xlabel("preset pitch (deg, toe-out +)"); a2.set_ylabel("peak Cp"); a2.grid(alpha=0.3)
    fig.suptitle(f"{profile.name}: best fixed pitch")
    fig.tight_layout()
    _save_png(args, fig, f"pitch_sweep_{profile.name}.png")
    return 0


def cmd_sim_convergence(args: argparse.Namespace) -> int:
    import matplotlib.pyplot as plt
    from sim.studies import convergence

    profile, fluid, schedule, flow = _sim_setup(args)
    tsr = profile.fluid.design_tsr if args.tsr is None else float(args.tsr)
    steps = _floats(args.steps, "steps")
    tubes = [int(v) for v in _floats(args.tubes, "tubes")]
    rows = convergence(profile, fluid.density_kg_m3, fluid.kinematic_viscosity_m2_s, tsr, flow,
                       steps, tubes, schedule, progress=Progress("  conv"))
    ref = rows[-1] if rows else None
    for r in rows:
        if r.azimuth_step_deg == min(steps) and r.tubes_per_half == max(tubes):
            ref = r
    print(f"independence study at TSR {tsr:g}, U = {flow:g} m/s ({profile.sim.induction} induction; "
          f"reference: {ref.azimuth_step_deg:g} deg, {ref.tubes_per_half} tubes per half)")
    print(table(["step deg", "tubes/half", "Cp", "dCp vs ref %", "peak torque N m", "dQ %", "solve ms"],
                [[f"{r.azimuth_step_deg:g}", str(r.tubes_per_half), f"{r.cp:.5f}",
                  f"{(r.cp / ref.cp - 1) * 100:+.3f}", f"{r.peak_torque_nm:.4f}",
                  f"{(r.peak_torque_nm / ref.peak_torque_nm - 1) * 100:+.3f}", f"{r.solve_ms:.1f}"]
                 for r in rows]))
    ok = [r for r in rows if abs(r.cp / ref.cp - 1) < 0.001 and abs(r.peak_torque_nm / ref.peak_torque_nm - 1) < 0.005]
    if ok:
        cheapest = min(ok, key=lambda r: r.solve_ms)
        print(f"cheapest setting within 0.1 % Cp and 0.5 % peak torque of the reference: "
              f"{cheapest.azimuth_step_deg:g} deg, {cheapest.tubes_per_half} tubes per half "
              f"({cheapest.solve_ms:.1f} ms); the SIL rig uses 36 tubes per half (5 deg)")
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(11, 4.5))
    for n_t in tubes:
        sel = [r for r in rows if r.tubes_per_half == n_t]
        a1.plot([r.azimuth_step_deg for r in sel], [r.cp for r in sel], "o-", label=f"{n_t} tubes/half")
        a2.plot([r.azimuth_step_deg for r in sel], [r.peak_torque_nm for r in sel], "o-", label=f"{n_t}")
    for a, lab in ((a1, "Cp"), (a2, "peak rotor torque (N m)")):
        a.set_xscale("log"); a.invert_xaxis(); a.set_xlabel("azimuth step (deg)"); a.set_ylabel(lab)
        a.grid(alpha=0.3)
    a1.legend(fontsize=8)
    fig.suptitle(f"{profile.name}: model independence study at TSR {tsr:g}")
    fig.tight_layout()
    _save_png(args, fig, f"convergence_{profile.name}.png")
    return 0


# -- bench -------------------------------------------------------------------------------------
def cmd_bench(args: argparse.Namespace) -> int:
    from .bench import run_bench

    profile_path = args.profile or str(_data_path(DEMO_PROFILE))
    schedule_path = args.schedule or str(_data_path(DEMO_SCHEDULE))
    profile, schedule = _load_run_inputs(profile_path, schedule_path)
    if args.realtime:
        from .rtbench import rt_bench
        print(SAFETY_SHORT, file=sys.stderr)
        print(rt_bench(profile, schedule, args.rate, args.seconds, _rt_options(args)))
        return 0
    print(run_bench(profile, schedule, rate_hz=args.rate, seconds=args.seconds))
    return 0


def cmd_keys(args: argparse.Namespace) -> int:
    from .keys import make_keypair

    public, secret = make_keypair(args.directory, args.name)
    print(f"public key {public} (give it to the other side), secret key {secret} (keep it private)")
    return 0


def cmd_watch(args: argparse.Namespace) -> int:
    from .watch import watch

    client = None
    if args.keys:
        from .keys import load_secret_key
        client = load_secret_key(args.keys)
    watch(args.endpoint, duration_s=args.duration, server_public_key=args.server_key,
          client_keys=client)
    return 0


def cmd_safety(args: argparse.Namespace) -> int:
    print(SAFETY_NOTICE)
    return 0


# -- parser ------------------------------------------------------------------------------------
def _add_run_options(p: argparse.ArgumentParser, duration: float) -> None:
    p.add_argument("--tsr", type=float, default=None, help="TSR set point (default: the profile's design TSR)")
    p.add_argument("--duration", type=float, default=duration, metavar="SECONDS", help="run length (s)")
    p.add_argument("--flow", type=float, default=None, metavar="M_S", help="mean flow speed (default: design)")
    p.add_argument("--settle", type=float, default=5.0, metavar="SECONDS",
                   help="seconds left out of the summary while the rotor settles")
    p.add_argument("--seed", type=int, default=None, help="SIL random seed (default: the profile's)")
    p.add_argument("--lead-table", metavar="CSV",
                   help="phase lead versus rotor speed (speed_rad_s,lead_deg; from `flapctl tune lead`)")


def _add_rt_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("real-time settings (opt-in; each falls back with a message)")
    g.add_argument("--fifo", type=int, default=None, metavar="PRIO", help="SCHED_FIFO priority 1..99")
    g.add_argument("--cpu", type=int, default=None, metavar="N", help="pin the loop to this CPU")
    g.add_argument("--mlock", action="store_true", help="lock the process memory (mlockall)")
    g.add_argument("--freeze-gc", action="store_true", help="freeze and disable the garbage collector in the loop")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="flapctl", description="Controller, SIL rig and analysis for cross-flow turbines with "
        "actively flapped blades.", epilog=SAFETY_SHORT)
    parser.add_argument("--version", action="version", version=f"flapctl {__version__}")
    parser.add_argument("-v", "--verbose", action="store_true", help="log details to stderr")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("check", help="validate a rig profile and print derived quantities")
    p.add_argument("profile", nargs="?", metavar="PROFILE")
    p.add_argument("--schedule", metavar="FILE", help="also check a flap schedule against the servos")
    p.add_argument("--tsr", type=float, default=None, help="TSR for the figures (default: design TSR)")
    p.add_argument("--keys", action="store_true", help="list every profile key with its range")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("run", help="one logged run on the embedded SIL rig")
    p.add_argument("--profile", required=True, metavar="PROFILE")
    p.add_argument("--schedule", metavar="FILE", help="flap schedule (default: flaps neutral)")
    p.add_argument("--out", required=True, metavar="FILE", help="run log to create (HDF5; never overwritten)")
    p.add_argument("--faults", metavar="FILE", help="fault scenario (TOML) to inject into the SIL rig")
    p.add_argument("--bridge", metavar="ENDPOINT",
                   help="drive an I/O bridge or `python -m sim.server` at this zmq endpoint")
    p.add_argument("--realtime", action="store_true",
                   help="pace by the wall clock (the SIL rig in process, or a free-running bridge)")
    _add_rt_options(p)
    g = p.add_argument_group("learning (iterative learning control of each flap)")
    g.add_argument("--ilc", action="store_true", help="learn a per-blade correction revolution by revolution")
    g.add_argument("--ilc-gamma", type=float, default=0.5, metavar="G", help="learning gain (default 0.5)")
    g.add_argument("--ilc-load", metavar="FILE", help="start from corrections saved with --ilc-save (the same FILE)")
    g.add_argument("--ilc-save", metavar="FILE", help="save the learned corrections (one file per blade)")
    g.add_argument("--ilc-freeze", action="store_true", help="apply the loaded correction without learning")
    g = p.add_argument_group("operator interface")
    g.add_argument("--operator", action="store_true",
                   help="serve operator commands and telemetry; the operator arms and starts the run")
    g.add_argument("--command-bind", default="tcp://127.0.0.1:47210", metavar="ENDPOINT")
    g.add_argument("--telemetry-bind", default="tcp://127.0.0.1:47211", metavar="ENDPOINT")
    g.add_argument("--server-secret", metavar="FILE",
                   help="CURVE secret key of this controller (required off 127.0.0.1)")
    g.add_argument("--clients-dir", metavar="DIR", help="public keys of the operators allowed in")
    g.add_argument("--operator-heartbeat", type=float, default=None, metavar="SECONDS",
                   help="trip when the operator is silent this long while armed or running")
    _add_run_options(p, 30.0)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("demo", help="baseline versus morphing schedule on the demo flume rig (SIL)")
    p.add_argument("--profile", metavar="PROFILE", help="rig profile (default: the demo flume rig)")
    p.add_argument("--schedule", metavar="FILE", help="morphing schedule (default: the demo schedule)")
    p.add_argument("--out-dir", metavar="DIR", help="where logs and the plot go (default: a new dated folder)")
    _add_run_options(p, 30.0)
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("sim", help="steady studies of the SIL rotor model (Cp-TSR, pitch, convergence)")
    simsub = p.add_subparsers(dest="sim_command", required=True, metavar="STUDY")
    q = simsub.add_parser("sweep-tsr", help="steady Cp-TSR curve, fixed flaps and optionally a schedule")
    q.add_argument("profile", metavar="PROFILE")
    q.add_argument("--schedule", metavar="FILE")
    q.add_argument("--tsr", default="0.5:4.0:0.25", help="START:STOP:STEP or a list (default 0.5:4.0:0.25)")
    q.add_argument("--induction", choices=("dmst", "single", "none"), default=None,
                   help="induction model (default: the profile's sim.induction)")
    q.add_argument("--flow", type=float, default=None, metavar="M_S")
    q.add_argument("--out", metavar="PNG")
    q.set_defaults(func=cmd_sim_sweep_tsr)
    q = simsub.add_parser("pitch-sweep", help="peak Cp versus fixed preset pitch")
    q.add_argument("profile", metavar="PROFILE")
    q.add_argument("--pitch", default="0:15:1", help="pitches in deg (default 0:15:1)")
    q.add_argument("--tsr", default="1.0:3.5:0.25")
    q.add_argument("--flow", type=float, default=None, metavar="M_S")
    q.add_argument("--out", metavar="PNG")
    q.set_defaults(func=cmd_sim_pitch_sweep)
    q = simsub.add_parser("convergence", help="Cp and peak torque versus azimuth step and tube count")
    q.add_argument("profile", metavar="PROFILE")
    q.add_argument("--schedule", metavar="FILE")
    q.add_argument("--tsr", type=float, default=None)
    q.add_argument("--steps", default="4,2,1,0.5", help="azimuth steps in deg")
    q.add_argument("--tubes", default="9,18,36,72,144", help="streamtubes per half")
    q.add_argument("--flow", type=float, default=None, metavar="M_S")
    q.add_argument("--out", metavar="PNG")
    q.set_defaults(func=cmd_sim_convergence)

    p = sub.add_parser("bench", help="measure the tick cost and the lockstep real-time factor here")
    p.add_argument("--profile", metavar="PROFILE")
    p.add_argument("--schedule", metavar="FILE")
    p.add_argument("--rate", type=float, default=1000.0, metavar="HZ")
    p.add_argument("--seconds", type=float, default=60.0, metavar="N", help="simulated seconds of lockstep")
    p.add_argument("--realtime", action="store_true",
                   help="pace the loop by the wall clock: lateness, late ticks, overruns, verdict")
    _add_rt_options(p)
    p.set_defaults(func=cmd_bench)

    p = sub.add_parser("keys", help="make a CURVE key pair for the operator interface")
    p.add_argument("directory", metavar="DIR")
    p.add_argument("--name", default="operator", help="file name stem (default: operator)")
    p.set_defaults(func=cmd_keys)

    p = sub.add_parser("watch", help="live terminal view of a running controller")
    p.add_argument("endpoint", nargs="?", default="tcp://127.0.0.1:47211", metavar="ENDPOINT")
    p.add_argument("--duration", type=float, default=None, metavar="SECONDS")
    p.add_argument("--server-key", metavar="FILE", help="the controller's CURVE public key")
    p.add_argument("--keys", metavar="FILE", help="this operator's CURVE secret key file")
    p.set_defaults(func=cmd_watch)

    from . import cli_campaign, cli_tune
    cli_tune.register(sub)
    cli_campaign.register(sub)

    p = sub.add_parser("safety", help="print the safety cautions")
    p.set_defaults(func=cmd_safety)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO if args.verbose else logging.WARNING,
                        format="%(levelname)s %(name)s: %(message)s")
    try:
        return args.func(args)
    except FlapctlError as exc:
        print(f"flapctl: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("flapctl: interrupted; logs written so far are kept", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
