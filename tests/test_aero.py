"""RotorAero: steady performance and the time-domain loads interface."""
from __future__ import annotations

import math

import numpy as np
import pytest

from flapctl.errors import ProfileError
from sim.aero import RotorAero, RotorGeometry
from sim.polar import ThinSectionPolar, thickness_from_section

DEG = math.pi / 180.0
RHO, NU = 998.21, 1.0034e-6      # water 20 C, IAPWS-95/2008 (REFERENCES §12, check #28)
U = 0.5
FLUME = RotorGeometry(blades=3, radius_m=0.15, span_m=0.25, chord_m=0.05,
                      preset_pitch_rad=5 * DEG, pivot_chord_fraction=0.25, flap_chord_ratio=0.25)


@pytest.fixture(scope="module")
def polar():
    return ThinSectionPolar(thickness_from_section("NACA 0021"), 0.25,
                            aspect_ratio=FLUME.span_m / FLUME.chord_m)


@pytest.fixture(scope="module")
def sweep(polar):
    aero = RotorAero(FLUME, polar, RHO, NU)
    tsrs = np.arange(0.5, 6.01, 0.25)
    return tsrs, [aero.steady(float(t), U, n_azimuth=120) for t in tsrs]


def test_peak_cp_plausible(sweep):
    # Flume rigs at Re_c 2e4-8e4: unconfined peak Cp 0.05-0.25 at TSR 1.5-3 (REFERENCES §1, from memory)
    tsrs, res = sweep
    cps = np.array([r.cp for r in res])
    k = int(np.argmax(cps))
    assert 1.5 <= tsrs[k] <= 3.5 and 0.05 <= cps[k] <= 0.35
    assert res[k].valid


def test_cp_below_two_disc_bound_and_runaway(sweep):
    # Newman 1983 (from memory): two discs in tandem, Cp <= 16/25
    tsrs, res = sweep
    cps = np.array([r.cp for r in res])
    assert np.all(cps < 16.0 / 25.0)
    assert cps[-1] < 0.0                                   # runaway: the rotor drags
    assert any(not r.valid and "a_u" in r.reason for r in res)


def test_flap_schedule_changes_cp(polar):
    aero = RotorAero(FLUME, polar, RHO, NU)
    base = aero.steady(1.8, U, n_azimuth=120)
    sched = lambda th, i: -10 * DEG * np.sin(th)
    flapped = aero.steady(1.8, U, sched, n_azimuth=120)
    assert abs(flapped.cp - base.cp) > 1e-3
    # the torque over the revolution changes shape, not only its mean
    assert np.max(np.abs(flapped.rotor_torque_nm - base.rotor_torque_nm)) > 0.05 * np.max(np.abs(base.rotor_torque_nm))
    assert not np.allclose(flapped.hinge_nm, base.hinge_nm)


@pytest.mark.parametrize("dynamic_stall, tol", [(False, 0.01), (True, 0.03)])
def test_time_domain_matches_steady(polar, dynamic_stall, tol):
    aero = RotorAero(FLUME, polar, RHO, NU, dynamic_stall=dynamic_stall)
    tsr = 1.8
    sched = lambda th, i: 5 * DEG * np.cos(th)
    st = aero.steady(tsr, U, sched, n_azimuth=360)
    omega = tsr * U / FLUME.radius_m
    n = 360
    dt = 2 * math.pi / omega / n
    torque = np.zeros(n)
    fx = np.zeros(n)
    for rev in range(2):                       # second revolution has a settled history
        for k in range(n):
            th = k * 2 * math.pi / n
            for b in range(FLUME.blades):
                th_b = th + 2 * math.pi * b / FLUME.blades
                q, h, f = aero.blade_loads(b, th_b, omega, U, 5 * DEG * math.cos(th_b), dt)
                if rev == 1:
                    torque[k] += q
                    fx[k] += f
    assert torque.mean() == pytest.approx(st.mean_torque_nm, rel=tol)
    qa = 0.5 * RHO * FLUME.swept_area_m2 * U**2
    assert fx.mean() / qa == pytest.approx(st.ct, rel=tol)


def test_refresh_cache_and_velocity_ratio(polar):
    aero = RotorAero(FLUME, polar, RHO, NU)
    assert aero.velocity_ratio(1.0) == 1.0                  # before any refresh
    sched = lambda th, i: 0.0 * th
    s1 = aero.refresh(2.0, U, sched)
    assert aero.refresh(2.0 * 1.009, U * 0.995, sched) is s1
    assert aero.refresh(2.0, U, lambda th, i: 0.0 * th) is not s1
    s2 = aero.refresh(2.1, U, None)
    assert s2 is not s1 and aero.refresh(2.1, U, None) is s2
    for k in (0, 17, 40, 71):
        assert aero.velocity_ratio(float(s2.theta[k])) == pytest.approx(s2.velocity_ratio[k])
        assert aero.velocity_ratio(float(s2.theta[k]) + 2 * math.pi) == pytest.approx(s2.velocity_ratio[k])
    mid = 0.5 * (s2.theta[5] + s2.theta[6])
    assert aero.velocity_ratio(float(mid)) == pytest.approx(0.5 * (s2.velocity_ratio[5] + s2.velocity_ratio[6]))


def test_regrid_only_on_large_reynolds_change(polar):
    aero = RotorAero(FLUME, polar, RHO, NU, induction="none")
    aero.refresh(2.0, U, None)
    omega = 2.0 * U / FLUME.radius_m
    aero.blade_loads(0, 0.3, omega, U, 0.0, 1e-3)
    g1 = aero.grid_for(math.hypot(omega * FLUME.radius_m, U) * FLUME.chord_m / NU)
    aero.blade_loads(0, 0.3, omega * 1.05, U, 0.0, 1e-3)
    assert aero.grid_for(math.hypot(omega * 1.05 * FLUME.radius_m, U) * FLUME.chord_m / NU) is g1
    aero.blade_loads(0, 0.3, omega * 1.3, U, 0.0, 1e-3)
    assert aero.grid_for(math.hypot(omega * 1.3 * FLUME.radius_m, U) * FLUME.chord_m / NU) is not g1


def test_induction_models(polar):
    cps = {m: RotorAero(FLUME, polar, RHO, NU, induction=m).steady(1.5, U, n_azimuth=72).cp
           for m in ("dmst", "single", "none")}
    assert cps["none"] > cps["dmst"] > 0 and cps["single"] > 0
    with pytest.raises(ProfileError):
        RotorAero(FLUME, polar, RHO, NU, induction="vortex")
    with pytest.raises(ProfileError):
        RotorAero(FLUME, polar, -1.0, NU)


def test_strut_drag_torque_integral(flume_profile_for_struts=None):
    # each strut: dQ = 1/2 rho C_d c (w r)^2 r dr from 0 to R  ->  Q = 1/2 rho C_d c w^2 R^4 / 4
    # (calculus; strut drag as a section drag coefficient is common practice, no source)
    from scipy.integrate import quad
    from flapctl.profile import Rotor
    rotor = Rotor(inertia_kg_m2=0.02, struts=6, strut_chord_m=0.03, strut_drag_coefficient=0.03)
    rho, R, w = 998.0, 0.2, 7.5
    per_strut, _ = quad(lambda r: 0.5 * rho * 0.03 * 0.03 * (w * r) ** 2 * r, 0.0, R)
    assert rotor.strut_drag_factor(R, rho) * w * w == pytest.approx(6 * per_strut, rel=1e-9)
    # and the steady model's Cp drops by exactly that torque's power
    bare = RotorAero(FLUME, ThinSectionPolar(0.21, 0.25), RHO, NU)
    k = 1e-4
    strut = RotorAero(FLUME, ThinSectionPolar(0.21, 0.25), RHO, NU, strut_drag_factor=k)
    tsr = 2.0
    omega = tsr * U / FLUME.radius_m
    p_avail = 0.5 * RHO * FLUME.swept_area_m2 * U ** 3
    assert bare.steady(tsr, U).cp - strut.steady(tsr, U).cp == pytest.approx(k * omega ** 3 / p_avail, rel=1e-9)
