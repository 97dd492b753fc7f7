"""Streamtube momentum models (REFERENCES §3)."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from flapctl.errors import ProfileError
from sim.blade import RotorGeometry, blade_element
from sim.polar import ThinSectionPolar
from sim.streamtube import (actuator_disc_cp, alpha_rate, momentum_ct, operating_reynolds,
                            solve_dmst, solve_no_induction, solve_single_streamtube)

DEG = math.pi / 180.0
RHO, NU = 998.21, 1.0034e-6      # water 20 C (REFERENCES §12, IAPWS)
FLUME = RotorGeometry(3, 0.15, 0.25, 0.05, 5 * DEG, 0.25, 0.25)
SLENDER = RotorGeometry(2, 0.30, 0.50, 0.03, 2 * DEG, 0.25, 0.25)


@pytest.fixture(scope="module")
def p21():
    return ThinSectionPolar(0.21, 0.25, aspect_ratio=5.0)


@pytest.fixture(scope="module")
def p15():
    return ThinSectionPolar(0.15, 0.25, aspect_ratio=10.0)


def test_actuator_disc_betz():
    # Betz 1920: Cp = 4a(1-a)^2, maximum 16/27 at a = 1/3, C_T = 8/9 (check #1)
    a = np.linspace(0.0, 1.0, 100001)
    cp = actuator_disc_cp(a)
    assert np.max(cp) <= 16.0 / 27.0 + 1e-12
    assert float(actuator_disc_cp(1.0 / 3.0)) == pytest.approx(16.0 / 27.0, abs=1e-12)
    assert a[np.argmax(cp)] == pytest.approx(1.0 / 3.0, abs=1e-4)
    assert float(momentum_ct(1.0 / 3.0, "none")) == pytest.approx(8.0 / 9.0)


def test_buhl_check_6():
    # Buhl 2005 (NREL/TP-500-36834, from memory), check #6: 0.96 at a = 0.4, 2.0 at a = 1
    assert float(momentum_ct(0.4, "buhl")) == pytest.approx(0.96, abs=1e-9)
    assert float(momentum_ct(1.0, "buhl")) == pytest.approx(2.0, abs=1e-9)
    h = 1e-7
    left = (momentum_ct(0.4, "buhl") - momentum_ct(0.4 - h, "buhl")) / h
    right = (momentum_ct(0.4 + h, "buhl") - momentum_ct(0.4, "buhl")) / h
    assert float(left) == pytest.approx(0.8, abs=1e-5) and float(right) == pytest.approx(0.8, abs=1e-5)


def test_glauert_continuity():
    # Glauert 1926 (from memory): both branches give 8/9 at a = 1/3; C_T(1) = 2
    e = 1e-12
    assert float(momentum_ct(1 / 3 + e, "glauert")) == pytest.approx(8 / 9, abs=1e-9)
    assert float(momentum_ct(1 / 3 - e, "glauert")) == pytest.approx(8 / 9, abs=1e-9)
    assert float(momentum_ct(1.0, "glauert")) == pytest.approx(2.0)
    a = np.linspace(0, 1, 1001)
    assert np.all(np.diff(momentum_ct(a, "glauert")) > 0) and np.all(np.diff(momentum_ct(a, "buhl")) > 0)
    with pytest.raises(ProfileError):
        momentum_ct(0.2, "spera")


def test_dmst_converged_in_tubes(p21, p15):
    # REFERENCES §3 note 4 [derived, regression]: 36 tubes per half within 0.1 % of 360
    a = solve_dmst(FLUME, p21, RHO, NU, 2.0, 0.5)
    b = solve_dmst(FLUME, p21, RHO, NU, 2.0, 0.5, n_tubes=360)
    assert a.valid and b.valid
    assert a.cp == pytest.approx(b.cp, rel=1e-3)
    # a slender rotor over its power range: within 0.5 % (regression)
    for tsr in (3.0, 4.0, 5.0):
        a = solve_dmst(SLENDER, p15, RHO, NU, tsr, 0.5)
        b = solve_dmst(SLENDER, p15, RHO, NU, tsr, 0.5, n_tubes=360)
        assert a.cp == pytest.approx(b.cp, rel=5e-3)


def _residual(theta, a, v_in, tsr, flow, polar, g, correction="buhl"):
    """Independent C_T,BE(a) - C_T,mom(a) for one disc from blade_element (REFERENCES §3)."""
    omega = tsr * flow / g.radius_m
    re = operating_reynolds(tsr, flow, g.chord_m, NU)
    r = blade_element(theta, omega * g.radius_m, (1 - a) * v_in, g.preset_pitch_rad, 0.0, polar,
                      re, g.chord_m, g.radius_m, g.pivot_chord_fraction, True, rho=RHO)
    ct = (g.blades * g.chord_m / (2 * math.pi * g.radius_m) * (float(r.w) / v_in) ** 2
          * (float(r.cn) * math.sin(theta) - float(r.ct) * math.cos(theta)) / abs(math.sin(theta)))
    return ct - float(momentum_ct(a, correction))


def test_dmst_roots_against_brentq(p21):
    tsr, flow = 1.8, 0.5
    sol = solve_dmst(FLUME, p21, RHO, NU, tsr, flow)
    n = 36
    scan = np.linspace(0.0, 0.99, 400)
    for k in (3, 10, 18, 27, 33):
        th = sol.theta[k]
        g = [_residual(th, x, flow, tsr, flow, p21, FLUME) for x in scan]
        i = next(i for i in range(len(g) - 1) if (g[i] > 0) != (g[i + 1] > 0))
        ref = brentq(lambda x: _residual(th, x, flow, tsr, flow, p21, FLUME), scan[i], scan[i + 1],
                     xtol=1e-13)
        assert sol.a_up[k] == pytest.approx(ref, abs=1e-7)
        # the downstream disc of the same tube, inflow V_e = (1 - 2 a_u) U
        m = n - 1 - k
        th_d = sol.theta[n + m]
        v_e = (1 - 2 * sol.a_up[k]) * flow
        assert th_d == pytest.approx(2 * math.pi - th)
        assert abs(_residual(th_d, sol.a_down[m], v_e, tsr, flow, p21, FLUME)) < 1e-6
        assert sol.velocity_ratio[n + m] == pytest.approx((1 - sol.a_down[m]) * v_e / flow)


def test_runaway_cp_goes_negative(p15):
    cps = [solve_dmst(SLENDER, p15, RHO, NU, tsr, 0.5).cp for tsr in (2.0, 4.0, 6.0, 7.0, 8.0)]
    assert max(cps) > 0.1
    assert cps[1] > cps[2] > cps[3] > cps[4] and cps[-1] < 0
    # without induction the same rotor looks far better: the induction is what limits it
    free = solve_no_induction(SLENDER, p15, RHO, NU, 4.0, 0.5)
    assert free.valid and np.all(free.velocity_ratio == 1.0) and free.cp > cps[1]


def test_validity_flag_at_high_solidity_and_tsr(p21):
    sol = solve_dmst(FLUME, p21, RHO, NU, 4.0, 0.5)
    assert not sol.valid and "a_u" in sol.reason
    assert np.max(sol.a_up) >= 0.5
    assert solve_dmst(FLUME, p21, RHO, NU, 1.5, 0.5).valid


def test_single_streamtube_balance(p21):
    sol = solve_single_streamtube(FLUME, p21, RHO, NU, 1.5, 0.5)
    a = float(sol.a[0])
    assert 0.0 < a < 0.5 and np.all(sol.a == a) and sol.valid
    # Templin: rotor streamwise force coefficient = momentum thrust at the solution
    assert sol.ct == pytest.approx(float(momentum_ct(a, "buhl")), abs=1e-8)


def test_flap_inputs_and_effect(p21):
    f = lambda th, i: 8 * DEG * np.sin(th)
    a = solve_dmst(FLUME, p21, RHO, NU, 1.8, 0.5, flap=f)
    b = solve_dmst(FLUME, p21, RHO, NU, 1.8, 0.5, flap=[lambda th: 8 * DEG * np.sin(th)] * 3)
    c = solve_dmst(FLUME, p21, RHO, NU, 1.8, 0.5)
    assert a.cp == pytest.approx(b.cp, rel=1e-12)
    assert abs(a.cp - c.cp) > 1e-3
    # per-blade schedules: one blade flapped differs from all three
    d = solve_dmst(FLUME, p21, RHO, NU, 1.8, 0.5, flap=lambda th, i: f(th, i) * (i == 0))
    assert min(a.cp, c.cp) < d.cp < max(a.cp, c.cp)
    with pytest.raises(ProfileError):
        solve_dmst(FLUME, p21, RHO, NU, 1.8, 0.5, flap=[f])
    with pytest.raises(ProfileError):
        solve_dmst(FLUME, p21, RHO, NU, -1.0, 0.5)


def test_alpha_rate_matches_finite_difference():
    th = np.linspace(0.1, 6.0, 40)
    args = (8.0, 0.15, 0.4, 0.05, 0.25, True)

    def alpha(t):
        wt = 8.0 * 0.15 + 0.4 * np.cos(t)
        wn = 0.4 * np.sin(t)
        return np.arctan2(wn, wt) + 8.0 * 0.05 * 0.5 / np.hypot(wt, wn)

    h = 1e-6
    fd = 8.0 * (alpha(th + h) - alpha(th - h)) / (2 * h)
    assert np.allclose(alpha_rate(th, *args), fd, rtol=1e-6)


def test_dynamic_stall_option_runs(p21):
    a = solve_dmst(FLUME, p21, RHO, NU, 1.5, 0.5, dynamic_stall=True)
    b = solve_dmst(FLUME, p21, RHO, NU, 1.5, 0.5)
    assert a.valid and a.cp != b.cp and math.isfinite(a.cp)
