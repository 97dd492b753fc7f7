"""Section polars: NACA thickness, Glauert flap theory, Viterna-Corrigan, built-in and table polars."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad

from flapctl.errors import ProfileError
from sim.polar import (PolarGrid, TablePolar, ThinSectionPolar, flap_effectiveness_factor,
                       glauert_flap, naca4_thickness, thickness_from_section, viterna_corrigan)

DEG = math.pi / 180.0


# ----------------------------------------------------------------------------- geometry

def test_naca0021_thickness_check_13():
    # NACA 4-digit formula (Jacobs et al. 1933, NACA Report 460); check #13 [derived]
    assert naca4_thickness(0.3, 0.21) == pytest.approx(0.105030, abs=1e-5)
    # TE half-thickness 0.00220 c open, 0 closed (REFERENCES §5, [derived])
    assert naca4_thickness(1.0, 0.21) == pytest.approx(0.00220, abs=1e-5)
    assert naca4_thickness(1.0, 0.21, closed_te=True) == pytest.approx(0.0, abs=1e-4)
    assert naca4_thickness(np.array([0.0, 0.5]), 0.12).shape == (2,)


def test_naca_thickness_maximum_near_30_percent():
    # Maximum thickness at x ~ 0.30 (Abbott & von Doenhoff §6.4, from memory)
    x = np.linspace(0.0, 1.0, 10001)
    assert x[np.argmax(naca4_thickness(x, 0.15))] == pytest.approx(0.30, abs=0.01)


@pytest.mark.parametrize("name, t", [("NACA 0021", 0.21), ("naca0015", 0.15), ("NACA-0012", 0.12)])
def test_thickness_from_section(name, t):
    assert thickness_from_section(name) == pytest.approx(t)


@pytest.mark.parametrize("bad", ["NACA 2412", "NACA 0000", "NACA 23012", "S1223", 21])
def test_thickness_from_section_rejects(bad):
    with pytest.raises(ProfileError) as err:
        thickness_from_section(bad)
    assert err.value.source == "section" and err.value.key == "geometry.section"
    assert err.value.value == bad


# ----------------------------------------------------------------------------- Glauert flap

# REFERENCES §4 worked numbers [derived] (checks #8-#11)
@pytest.mark.parametrize("e, th, tau, dcl, dcm, cha, chd", [
    (0.20, 126.870, 0.54982, 3.4546, -0.6400, -0.4994, -0.9229),
    (0.25, 120.000, 0.60900, 3.82645, -0.649519, -0.56535, -0.943608),
    (0.30, 113.578, 0.66075, 4.1516, -0.6416, -0.6274, -0.9654),
])
def test_glauert_flap_table(e, th, tau, dcl, dcm, cha, chd):
    f = glauert_flap(e)
    assert math.degrees(f.theta_f) == pytest.approx(th, abs=1e-3)
    assert f.tau == pytest.approx(tau, abs=1e-4)
    assert f.dcl_ddelta == pytest.approx(dcl, abs=1e-4)
    assert f.dcm_ddelta == pytest.approx(dcm, abs=1e-4)
    assert f.ch_alpha == pytest.approx(cha, abs=1e-4)
    assert f.ch_delta == pytest.approx(chd, abs=1e-4)
    # Houghton & Carpenter eq. 4.52 form: dCl/d delta = 2 pi tau
    assert f.dcl_ddelta == pytest.approx(2.0 * math.pi * f.tau, rel=1e-12)


@pytest.mark.parametrize("e", [0.15, 0.25, 0.35])
def test_hinge_derivatives_by_integrating_the_thin_airfoil_loading(e):
    # Independent check: integrate the thin-airfoil vorticity over the flap (REFERENCES §4):
    # gamma_alpha = 2 U alpha (1 + cos t)/sin t, gamma_delta closed form; x = (c/2)(1 - cos t).
    # Hinge moment, +delta sense (TE-down), of the lift load on the flap about the hinge.
    th_f = math.acos(2.0 * e - 1.0)
    x_h = 1.0 - e

    def hinge(gamma):
        def integrand(t):
            x = 0.5 * (1.0 - math.cos(t))
            return -gamma(t) * (x - x_h) * 0.5 * math.sin(t)
        val, _ = quad(integrand, th_f, math.pi, limit=200, points=[th_f])
        return 2.0 * val / e**2          # H/(0.5 rho U^2 c_f^2) with rho U gamma loading

    g_a = lambda t: 2.0 * (1.0 + math.cos(t)) / math.sin(t)
    g_d = lambda t: 2.0 * ((1.0 - th_f / math.pi) * (1.0 + math.cos(t)) / math.sin(t)
                           + math.log(abs(math.sin((t + th_f) / 2.0) / math.sin((t - th_f) / 2.0)))
                           / math.pi)
    f = glauert_flap(e)
    assert hinge(g_a) == pytest.approx(f.ch_alpha, rel=1e-5)
    assert hinge(g_d) == pytest.approx(f.ch_delta, rel=1e-5)


@pytest.mark.parametrize("bad", [0.0, 1.0, -0.1, "0.2"])
def test_glauert_flap_rejects(bad):
    with pytest.raises(ProfileError):
        glauert_flap(bad)


def test_flap_effectiveness_factor_shape():
    # Abbott & von Doenhoff ch. 8 (from memory): ~0.85 below ~10 deg, ~0.5 by 50 deg
    d = np.linspace(-60, 60, 241) * DEG
    eta = flap_effectiveness_factor(d)
    assert np.allclose(flap_effectiveness_factor(np.array([0.0, 5.0, 10.0]) * DEG), 0.85)
    assert flap_effectiveness_factor(50 * DEG) == pytest.approx(0.5)
    assert np.allclose(eta, eta[::-1])
    pos = d >= 0
    assert np.all(np.diff(eta[pos]) <= 1e-15)
    # the lift increment eta * delta still grows with delta
    assert np.all(np.diff((eta * d)[pos]) > 0)


# ----------------------------------------------------------------------------- Viterna-Corrigan

def test_viterna_corrigan_check_14():
    # Viterna & Corrigan 1982, NASA CP-2230; check #14 [derived]
    cl, cd = viterna_corrigan(45 * DEG, 10 * DEG, 0.9, 0.03, 10.0)
    assert cl == pytest.approx(0.73102, abs=1e-4)
    assert cd == pytest.approx(0.63861, abs=1e-4)
    cl, cd = viterna_corrigan(90 * DEG, 10 * DEG, 0.9, 0.03, 10.0)
    assert cl == pytest.approx(0.0, abs=1e-12) and cd == pytest.approx(1.29, abs=1e-12)
    # 2-D: cd_max = 2.01
    assert viterna_corrigan(90 * DEG, 10 * DEG, 0.9, 0.03, None)[1] == pytest.approx(2.01)


def test_viterna_corrigan_extension_symmetry_and_continuity():
    a = np.linspace(-180, 180, 3601) * DEG
    cl, cd = viterna_corrigan(a, 10 * DEG, 0.9, 0.03, 10.0)
    assert np.allclose(cl, -cl[::-1], atol=1e-12) and np.allclose(cd, cd[::-1])
    # stall point reproduced; no jumps anywhere (0.1 deg steps)
    s = viterna_corrigan(10 * DEG, 10 * DEG, 0.9, 0.03, 10.0)
    assert s[0] == pytest.approx(0.9) and s[1] == pytest.approx(0.03)
    assert np.max(np.abs(np.diff(cl))) < 0.03 and np.max(np.abs(np.diff(cd))) < 0.01
    # 90..180: cl = -0.7 cl(180 - alpha), cd mirrored (common practice, from memory)
    c120 = viterna_corrigan(120 * DEG, 10 * DEG, 0.9, 0.03, 10.0)
    c60 = viterna_corrigan(60 * DEG, 10 * DEG, 0.9, 0.03, 10.0)
    assert c120[0] == pytest.approx(-0.7 * c60[0]) and c120[1] == pytest.approx(c60[1])
    assert viterna_corrigan(180 * DEG, 10 * DEG, 0.9, 0.03, 10.0)[0] == pytest.approx(0, abs=1e-12)


# ----------------------------------------------------------------------------- built-in polar

@pytest.fixture(scope="module")
def polar():
    return ThinSectionPolar(0.21, 0.25, aspect_ratio=6.0)


def test_low_re_plausibility(polar):
    # Plausibility ranges of REFERENCES §5 (from memory)
    for re in (1e5, 2e5):
        assert 5.2 <= polar.lift_slope_per_rad(re) <= 5.75
        p, n = polar.stall_angles_rad(re, 0.0)
        assert 9.0 <= p / DEG <= 14.0 and n == pytest.approx(-p)
        assert 0.8 <= polar.max_lift(re) <= 1.0
    for re in (5e4, 1e5, 2e5):
        assert 0.014 <= polar.zero_lift_drag(re) <= 0.03
    assert polar.zero_lift_drag(1e6) < 0.012
    res = np.logspace(4, 6, 50)
    for f in (polar.lift_slope_per_rad, polar.max_lift):
        assert np.all(np.diff(f(res)) > 0)          # smooth, rising with Re
    # falls with Re through the laminar range (transition raises it again above ~6e5)
    assert np.all(np.diff(polar.zero_lift_drag(res[res <= 5e5])) < 0)


def test_symmetric_without_flap(polar):
    a = np.linspace(-179, 179, 359) * DEG
    cl, cd, cm, ch = polar.coefficients(a, 0.0, 6e4)
    assert np.allclose(cl, -cl[::-1]) and np.allclose(cd, cd[::-1])
    assert np.allclose(cm, -cm[::-1]) and np.allclose(ch, -ch[::-1])
    assert np.all(cd > 0)


@pytest.mark.parametrize("delta_deg", [-30.0, -10.0, 0.0, 12.0, 35.0])
@pytest.mark.parametrize("re", [2e4, 8e4, 5e5])
def test_continuous_everywhere(polar, delta_deg, re):
    a = np.linspace(-180, 180, 14401) * DEG          # 0.025 deg
    out = np.array(polar.coefficients(a, delta_deg * DEG, re))
    assert np.all(np.isfinite(out))
    assert np.max(np.abs(np.diff(out, axis=1))) < 0.02
    assert np.allclose(out[:, 0], out[:, -1], atol=1e-9)      # +-180 deg
    p, n = polar.stall_angles_rad(re, delta_deg * DEG)
    for s in (float(p), float(n)):
        lo = np.array(polar.coefficients(s - 1e-9, delta_deg * DEG, re))
        hi = np.array(polar.coefficients(s + 1e-9, delta_deg * DEG, re))
        assert np.allclose(lo, hi, atol=1e-6)


def test_flap_lift_increment_and_zero_lift_shift(polar):
    re, d = 1e5, 2 * DEG
    f = glauert_flap(0.25)
    # alpha_L0 = -tau eta delta (Glauert tau = d alpha_L0/d delta, REFERENCES §4)
    assert polar.zero_lift_angle_rad(d) == pytest.approx(-f.tau * 0.85 * d)
    assert polar.coefficients(float(polar.zero_lift_angle_rad(d)), d, re)[0] == pytest.approx(0, abs=1e-12)
    dcl = (polar.coefficients(0.0, d, re)[0] - polar.coefficients(0.0, -d, re)[0]) / (2 * d)
    assert dcl == pytest.approx(polar.lift_slope_per_rad(re) * f.tau * 0.85, rel=1e-3)
    # cm about c/4 from the flap term, nose-down for delta > 0 (Glauert)
    assert polar.coefficients(0.0, d, re)[2] == pytest.approx(f.dcm_ddelta * 0.85 * d)
    # stall angles move by half the zero-lift shift, so a lift-increasing flap raises cl_max
    # (plain-flap behaviour, Abbott & von Doenhoff ch. 8, from memory)
    p0, n0 = polar.stall_angles_rad(re, 0.0)
    p1, n1 = polar.stall_angles_rad(re, 10 * DEG)
    shift = polar.zero_lift_angle_rad(10 * DEG)
    assert p1 - p0 == pytest.approx(0.5 * shift, abs=1e-3) and n1 - n0 == pytest.approx(0.5 * shift, abs=1e-3)
    cl_max0 = polar.coefficients(float(p0), 0.0, re)[0]
    cl_max_up = polar.coefficients(float(p1), 10 * DEG, re)[0]
    cl_max_dn = polar.coefficients(float(polar.stall_angles_rad(re, -10 * DEG)[0]), -10 * DEG, re)[0]
    assert cl_max_dn < cl_max0 < cl_max_up
    # drag grows with deflection
    cds = [polar.coefficients(0.0, x * DEG, re)[1] for x in (0, 10, 20, 40)]
    assert np.all(np.diff(cds) > 0)


def test_hinge_moment_attached_and_saturated(polar):
    f = glauert_flap(0.25)
    a, d = 3 * DEG, 8 * DEG
    ch = polar.coefficients(a, d, 1e5)[3]
    assert ch == pytest.approx(f.ch_alpha * a + f.ch_delta * d)
    aa = np.linspace(-180, 180, 721) * DEG
    for dd in (-40, 0, 40):
        chs = polar.coefficients(aa, dd * DEG, 1e5)[3]
        assert np.max(np.abs(chs)) < 1.5          # bounded after stall
    unflapped = ThinSectionPolar(0.21, 0.0)
    assert np.all(unflapped.coefficients(aa, 0.0, 1e5)[3] == 0.0)


def test_broadcasting(polar):
    a = np.linspace(-0.5, 0.5, 7)[None, :, None]
    d = np.linspace(-0.2, 0.2, 3)[:, None, None]
    re = np.array([3e4, 1e5])[None, None, :]
    out = polar.coefficients(a, d, re)
    assert all(o.shape == (3, 7, 2) for o in out)
    assert out[0][1, 3, 1] == pytest.approx(float(polar.coefficients(a[0, 3, 0], 0.0, 1e5)[0]))


@pytest.mark.parametrize("args", [(0.0, 0.2), (0.21, 1.0), (0.21, 0.2, -1.0)])
def test_constructor_validation(args):
    with pytest.raises(ProfileError):
        ThinSectionPolar(*args)


# ----------------------------------------------------------------------------- grid

def test_grid_lookup(polar):
    g = polar.grid(8e4)
    assert isinstance(g, PolarGrid) and g.n_alpha == 1441 and g.n_delta == 161
    # at nodes: exact
    for a_deg, d_deg in ((10.0, 5.0), (-97.25, -22.5), (179.75, 40.0)):
        ref = polar.coefficients(a_deg * DEG, d_deg * DEG, 8e4)
        assert g.lookup(a_deg * DEG, d_deg * DEG) == pytest.approx([float(x) for x in ref], abs=1e-12)
    rng = np.random.default_rng(1)
    a = rng.uniform(-math.pi, math.pi, 300)
    d = rng.uniform(-0.6, 0.6, 300)
    ref = np.array(polar.coefficients(a, d, 8e4)).T
    got = np.array([g.lookup(float(x), float(y)) for x, y in zip(a, d)])
    assert np.max(np.abs(got - ref)) < 0.02
    assert type(g.lookup(0.1, 0.0)[0]) is float
    # wraps in alpha, clamps in delta
    assert g.lookup(0.3 + 2 * math.pi, 0.1) == pytest.approx(g.lookup(0.3, 0.1))
    assert g.lookup(0.3, 1.2) == pytest.approx(g.lookup(0.3, 40 * DEG))
    a0, sp, sn = g.angles(10 * DEG)
    assert a0 == pytest.approx(float(polar.zero_lift_angle_rad(10 * DEG)), abs=1e-9)
    assert sp == pytest.approx(float(polar.stall_angles_rad(8e4, 10 * DEG)[0]), abs=1e-9)


@pytest.mark.parametrize("kw", [{"alpha_step_deg": 0.7}, {"delta_step_deg": 0.0},
                                {"delta_max_deg": 95.0}])
def test_grid_rejects_bad_steps(polar, kw):
    with pytest.raises(ProfileError):
        polar.grid(8e4, **kw)


# ----------------------------------------------------------------------------- tables

def _write_table(path, polar, alphas, flaps, res, with_ch=True, drop=None, header=None):
    cols = header or ["alpha_deg", "flap_deg", "re", "cl", "cd", "cm"] + (["ch"] if with_ch else [])
    lines = [",".join(cols)]
    for r in res:
        for f in flaps:
            for a in alphas:
                if drop == (a, f, r):
                    continue
                c = [float(x) for x in polar.coefficients(a * DEG, f * DEG, r)]
                vals = [a, f, r] + c[:4 if with_ch else 3]
                lines.append(",".join(repr(float(v)) for v in vals))
    path.write_text("\n".join(lines) + "\n")
    return path


def test_table_reproduces_nodes_and_interpolates(tmp_path, polar):
    alphas = np.arange(-180, 181, 2.0)
    p = _write_table(tmp_path / "p.csv", polar, alphas, [-20.0, 0.0, 20.0], [3e4, 1e5])
    t = TablePolar(p)
    got = t.coefficients(10 * DEG, 20 * DEG, 1e5)
    assert [float(x) for x in got] == pytest.approx(
        [float(x) for x in polar.coefficients(10 * DEG, 20 * DEG, 1e5)], abs=1e-12)
    mid = t.coefficients(np.array([3.0, 51.0]) * DEG, 0.0, 1e5)
    ref = polar.coefficients(np.array([3.0, 51.0]) * DEG, 0.0, 1e5)
    assert np.allclose(mid, ref, atol=0.02)
    # flap and Re held at the table edge
    assert np.allclose(t.coefficients(0.1, 30 * DEG, 5e5), t.coefficients(0.1, 20 * DEG, 1e5))
    grid = t.grid(5e4, alpha_step_deg=1.0, delta_step_deg=1.0, delta_max_deg=20.0)
    assert grid.lookup(0.1, 0.0) == pytest.approx([float(x) for x in t.coefficients(0.1, 0.0, 5e4)],
                                                  abs=0.02)


def test_partial_table_extends_with_viterna_corrigan(tmp_path, polar):
    alphas = np.arange(-12, 12.5, 0.5)
    p = _write_table(tmp_path / "p.csv", polar, alphas, [-10.0, 0.0, 10.0], [1e5], with_ch=False)
    t = TablePolar(p, flap_chord_ratio=0.25, aspect_ratio=6.0)
    a = np.linspace(-180, 180, 7201) * DEG
    for d in (-10 * DEG, 0.0, 7 * DEG):
        out = np.array(t.coefficients(a, d, 1e5))
        assert np.all(np.isfinite(out))
        assert np.max(np.abs(np.diff(out, axis=1))) < 0.05
        cl_edge = float(t.coefficients(12 * DEG - 1e-9, d, 1e5)[0])
        assert float(t.coefficients(12 * DEG + 1e-9, d, 1e5)[0]) == pytest.approx(cl_edge, abs=1e-6)
    f = glauert_flap(0.25)
    assert float(t.coefficients(2 * DEG, 5 * DEG, 1e5)[3]) == pytest.approx(
        f.ch_alpha * 2 * DEG + f.ch_delta * 5 * DEG)
    assert float(t.zero_lift_angle_rad(0.0)) == pytest.approx(0.0, abs=1e-9)
    assert float(t.zero_lift_angle_rad(10 * DEG)) < 0.0


def test_table_errors(tmp_path, polar):
    alphas = np.arange(-180, 181, 10.0)
    p = _write_table(tmp_path / "a.csv", polar, alphas, [0.0, 10.0], [1e5],
                     header=["alpha_deg", "flap_deg", "re", "cl", "cd"])
    with pytest.raises(ProfileError) as err:
        TablePolar(p)
    assert err.value.key == "header.cm" and err.value.source.endswith("a.csv")

    p = _write_table(tmp_path / "b.csv", polar, alphas, [0.0, 10.0], [1e5])
    text = p.read_text().splitlines()
    fields = text[5].split(",")
    fields[4] = "nan"
    text[5] = ",".join(fields)
    p.write_text("\n".join(text))
    with pytest.raises(ProfileError) as err:
        TablePolar(p)
    assert err.value.key == "row 6.cd" and err.value.value == "nan"

    p = _write_table(tmp_path / "c.csv", polar, alphas, [0.0, 10.0], [1e5], drop=(20.0, 10.0, 1e5))
    with pytest.raises(ProfileError) as err:
        TablePolar(p)
    assert "rectangular" in err.value.expected and err.value.value == (20.0, 10.0, 1e5)

    p = _write_table(tmp_path / "d.csv", polar, alphas, [0.0, 10.0], [1e5], with_ch=False)
    with pytest.raises(ProfileError) as err:
        TablePolar(p)
    assert err.value.key == "ch"

    p = _write_table(tmp_path / "e.csv", polar, alphas, [0.0], [1e5])
    with pytest.raises(ProfileError) as err:
        TablePolar(p)
    assert err.value.key == "flap_deg"

    p = tmp_path / "f.csv"
    p.write_text("alpha_deg,flap_deg,re,cl,cd,cm,cx\n")
    with pytest.raises(ProfileError) as err:
        TablePolar(p)
    assert err.value.key == "header.cx"
