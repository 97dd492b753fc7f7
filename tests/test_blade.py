"""Blade-element kinematics and loads (REFERENCES §2, §4, §6.3)."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from flapctl.errors import ProfileError
from sim.blade import RotorGeometry, blade_element, blade_loads_scalar, curvature_incidence
from sim.polar import ThinSectionPolar

DEG = math.pi / 180.0
RHO = 998.21


@pytest.fixture(scope="module")
def polar():
    return ThinSectionPolar(0.21, 0.25, aspect_ratio=5.0)


def _be(polar, theta, tsr, beta=0.0, delta=0.0, curvature=False, v=1.0, radius=0.15,
        chord=0.05, pivot=0.25):
    return blade_element(theta, tsr * v, v, beta, delta, polar, 6e4, chord, radius, pivot,
                         curvature, rho=RHO)


@pytest.mark.parametrize("tsr, theta_deg, phi_deg, w", [(2.0, 90.0, 26.5651, 2.23607),
                                                        (3.0, 60.0, 13.8979, 3.60555)])
def test_inflow_check_values_2_and_3(polar, tsr, theta_deg, phi_deg, w):
    # REFERENCES check values #2, #3 [derived], a = 0, U = 1
    r = _be(polar, theta_deg * DEG, tsr)
    assert math.degrees(float(r.phi)) == pytest.approx(phi_deg, abs=1e-4)
    assert float(r.w) == pytest.approx(w, abs=1e-4)
    # (W/U)^2 = 1 + 2 lambda cos theta + lambda^2 (§2)
    assert float(r.w) ** 2 == pytest.approx(1 + 2 * tsr * math.cos(theta_deg * DEG) + tsr**2)


def test_angle_of_attack_with_toe_out(polar):
    # §2 check: lambda = 2, theta = 90 deg, beta = +4 deg -> alpha = 22.5651 deg [derived]
    r = _be(polar, 90 * DEG, 2.0, beta=4 * DEG)
    assert math.degrees(float(r.alpha)) == pytest.approx(22.5651, abs=1e-4)


@pytest.mark.parametrize("tsr, expected_deg", [(2.0, 30.0), (3.0, 19.4712), (4.0, 14.478)])
def test_max_inflow_angle_check_4(polar, tsr, expected_deg):
    # Check #4 [derived]: max phi = asin(1/lambda)
    res = minimize_scalar(lambda t: -float(_be(polar, t, tsr).phi), bounds=(0.0, math.pi),
                          method="bounded", options={"xatol": 1e-10})
    assert math.degrees(-res.fun) == pytest.approx(expected_deg, abs=1e-3)
    assert math.degrees(-res.fun) == pytest.approx(math.degrees(math.asin(1 / tsr)), abs=1e-6)


def test_curvature_incidence_check_16(polar):
    # Check #16 [derived] §6.3: c/R = 0.2, x_p = c/4, W = omega R -> 0.1 rad
    omega, radius = 7.0, 0.5
    assert curvature_incidence(omega, 0.2 * radius, omega * radius, 0.25) == pytest.approx(0.1, abs=1e-12)
    # lambda = 3, theta = 90 deg: 0.0949 rad (§6.3)
    r0 = _be(polar, 90 * DEG, 3.0, radius=0.5, chord=0.1)
    r1 = _be(polar, 90 * DEG, 3.0, radius=0.5, chord=0.1, curvature=True)
    assert float(r1.alpha - r0.alpha) == pytest.approx(0.0949, abs=1e-4)


def test_forces_against_direct_vector_resolution(polar):
    # Independent resolution in the (x, y) frame: blade at (-R sin t, R cos t) moving with
    # velocity omega R (-cos t, -sin t); relative flow (V + omega R cos t, omega R sin t);
    # drag along it, lift perpendicular toward the inside for positive alpha (§2 conventions).
    rng = np.random.default_rng(3)
    theta = rng.uniform(0, 2 * math.pi, 50)
    v = rng.uniform(0.2, 1.0, 50)
    tsr = 2.5
    r = blade_element(theta, tsr * 1.0, v, 5 * DEG, 0.1, polar, 6e4, 0.05, 0.15, 0.3, True, rho=RHO)
    wx, wy = v + tsr * np.cos(theta), tsr * np.sin(theta)
    w = np.hypot(wx, wy)
    q = 0.5 * RHO * w**2 * 0.05
    fx = q * (r.cd * wx / w + r.cl * wy / w)
    fy = q * (r.cd * wy / w - r.cl * wx / w)
    assert np.allclose(r.streamwise_n_m, fx, rtol=1e-10, atol=1e-12)
    assert np.allclose(r.tangential_n_m, -fx * np.cos(theta) - fy * np.sin(theta), rtol=1e-10)
    assert np.allclose(r.normal_n_m, fx * np.sin(theta) - fy * np.cos(theta), rtol=1e-10)


def test_torque_includes_pivot_moment(polar):
    theta = np.linspace(0.1, 6.0, 30)
    r = blade_element(theta, 2.0, 0.7, 3 * DEG, 0.2, polar, 6e4, 0.05, 0.15, 0.4, False, rho=RHO)
    q = 0.5 * RHO * r.w**2
    alpha_geo = r.phi - 3 * DEG
    cm = polar.coefficients(r.alpha, 0.2, 6e4)[2]
    cm_p = cm + (0.4 - 0.25) * (r.cl * np.cos(alpha_geo) + r.cd * np.sin(alpha_geo))
    assert np.allclose(r.cm_pivot, cm_p)
    assert np.allclose(r.torque_nm_m, 0.15 * r.tangential_n_m + q * 0.05**2 * cm_p)
    # hinge moment per span H = C_h q c_f^2 (§4)
    assert np.allclose(r.hinge_nm_m, r.ch * q * (0.25 * 0.05) ** 2)


def test_downstream_power_sign(polar):
    # In the downstream half phi < 0 and cl < 0 but C_t stays positive when driving (§2)
    r = _be(polar, 270 * DEG, 2.5)
    assert float(r.phi) < 0 and float(r.cl) < 0 and float(r.ct) > 0


def test_scalar_twin_matches_vectorised(polar):
    grid = polar.grid(6e4)
    rng = np.random.default_rng(5)
    g = RotorGeometry(3, 0.15, 0.25, 0.05, 5 * DEG, 0.3, 0.25)
    for _ in range(100):
        th, v, d = rng.uniform(0, 2 * math.pi), rng.uniform(0.1, 0.6), rng.uniform(-0.5, 0.5)
        omega = 10.0
        q, h, fx, a, w = blade_loads_scalar(grid, th, omega, v, g.preset_pitch_rad, d, g.chord_m,
                                            g.radius_m, g.span_m, g.pivot_chord_fraction,
                                            g.flap_chord_ratio, RHO, True)
        r = blade_element(th, omega * g.radius_m, v, g.preset_pitch_rad, d, polar, 6e4, g.chord_m,
                          g.radius_m, g.pivot_chord_fraction, True, rho=RHO)
        scale = 0.5 * RHO * float(r.w) ** 2 * g.chord_m * g.span_m
        assert a == pytest.approx(float(r.alpha), abs=1e-12) and w == pytest.approx(float(r.w))
        assert abs(q - float(r.torque_nm_m) * g.span_m) < 0.02 * scale * g.radius_m
        assert abs(fx - float(r.streamwise_n_m) * g.span_m) < 0.03 * scale
        assert abs(h - float(r.hinge_nm_m) * g.span_m) < 0.02 * scale * g.chord_m
    assert blade_loads_scalar(grid, 0.0, 0.0, 0.0, 0.0, 0.0, 0.05, 0.15, 0.25, 0.25, 0.25, RHO,
                              True) == (0.0, 0.0, 0.0, 0.0, 0.0)


def test_geometry_validation():
    g = RotorGeometry(3, 0.15, 0.25, 0.05, 5 * DEG, 0.25, 0.25)
    assert g.swept_area_m2 == pytest.approx(0.075)
    # solidity N c/(2 pi R) (REFERENCES §1 sigma_3); check #5 values [derived]
    assert RotorGeometry(3, 0.20, 0.3, 0.06, 0.0, 0.25, 0.2).solidity == pytest.approx(0.143239, abs=1e-6)
    for bad in ({"blades": 0}, {"radius_m": -1.0}, {"chord_m": 0.2}, {"preset_pitch_rad": 1.0},
                {"pivot_chord_fraction": 1.5}, {"flap_chord_ratio": 1.0}):
        kw = dict(blades=3, radius_m=0.15, span_m=0.25, chord_m=0.05, preset_pitch_rad=0.0,
                  pivot_chord_fraction=0.25, flap_chord_ratio=0.25)
        kw.update(bad)
        with pytest.raises(ProfileError) as err:
            RotorGeometry(**kw)
        assert err.value.key == "geometry." + next(iter(bad))
