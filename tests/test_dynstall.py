"""Gormont dynamic stall with Berg's modification (REFERENCES §6.1)."""
from __future__ import annotations

import math

import numpy as np
import pytest

from flapctl.errors import ProfileError
from sim.dynstall import (A_M, DynamicStallState, berg_weight, gormont_berg, gormont_berg_scalar,
                          gormont_gammas, reference_angles)
from sim.polar import ThinSectionPolar

DEG = math.pi / 180.0
RE = 6e4


@pytest.fixture(scope="module")
def polar():
    return ThinSectionPolar(0.21, 0.25, aspect_ratio=5.0)


def test_gammas_check_15():
    # Check #15: gamma_L = 2.30, gamma_D = 1.375 for t/c = 0.21 (Gormont/Strickland, from memory)
    gl, gd = gormont_gammas(0.21)
    assert gl == pytest.approx(2.30, abs=1e-12) and gd == pytest.approx(1.375, abs=1e-12)
    with pytest.raises(ProfileError):
        gormont_gammas(None)


def test_reference_angle_signs():
    # |alpha| growing: |alpha_ref| = |alpha| - gamma sqrt|c alpha_dot/2W| (K1 = +1)
    c, w = 0.05, 2.0
    root = math.sqrt(c * 4.0 / (2 * w))
    rl, rd = reference_angles(0.3, 4.0, c, w, 2.3, 1.375)
    assert float(rl) == pytest.approx(0.3 - 2.3 * root) and float(rd) == pytest.approx(0.3 - 1.375 * root)
    rl, _ = reference_angles(-0.3, -4.0, c, w, 2.3, 1.375)
    assert float(rl) == pytest.approx(-0.3 + 2.3 * root)
    # |alpha| shrinking: K1 = -0.5 (stall held on)
    rl, _ = reference_angles(0.3, -4.0, c, w, 2.3, 1.375)
    assert float(rl) == pytest.approx(0.3 + 0.5 * 2.3 * root)


def test_berg_weight_bounds():
    a_ss = 10 * DEG
    x = np.linspace(0, 90, 901) * DEG
    wgt = berg_weight(x, a_ss)
    assert np.all((wgt >= 0) & (wgt <= 1))
    assert np.allclose(wgt[x <= a_ss], 1.0) and np.allclose(wgt[x >= A_M * a_ss], 0.0)
    mid = (A_M + 1) / 2 * a_ss
    assert float(berg_weight(mid, a_ss)) == pytest.approx(0.5)


def test_stall_delay_while_alpha_grows(polar):
    p, _ = polar.stall_angles_rad(RE, 0.0)
    alpha = np.array([p + 2 * DEG, p + 5 * DEG])
    cl_st = polar.coefficients(alpha, 0.0, RE)[0]
    cl_up = gormont_berg(polar, alpha, 0.5, 0.0, RE, 0.05, 3.0)[0]
    cl_dn = gormont_berg(polar, alpha, -0.5, 0.0, RE, 0.05, 3.0)[0]
    assert np.all(cl_up > cl_st)                  # lift overshoot past static stall
    assert np.all(cl_dn < cl_up)
    # symmetric section: mirrored motion mirrors the loads
    cl_neg = gormont_berg(polar, -alpha, -0.5, 0.0, RE, 0.05, 3.0)[0]
    # the dynamic lift slope never exceeds the static stall secant
    a0 = 0.0
    assert np.all(cl_up <= polar.max_lift(RE) / p * (alpha - a0) + 1e-12)
    assert np.allclose(cl_neg, -cl_up)


def test_static_when_alpha_dot_zero(polar):
    alpha = np.concatenate([np.linspace(-170, -2, 50), np.linspace(2, 170, 50)]) * DEG
    dyn = gormont_berg(polar, alpha, 0.0, 0.1, RE, 0.05, 1.5)
    st = polar.coefficients(alpha, 0.1, RE)
    for a, b in zip(dyn, st):
        assert np.allclose(a, b, atol=1e-12)
    # far beyond A_M * alpha_ss the static polar is returned whatever the rate
    far = np.array([100.0, -120.0]) * DEG
    for a, b in zip(gormont_berg(polar, far, 5.0, 0.0, RE, 0.05, 1.5), polar.coefficients(far, 0.0, RE)):
        assert np.allclose(a, b)


def test_scalar_twin_and_state(polar):
    grid = polar.grid(RE)
    gl, gd = gormont_gammas(0.21)
    for alpha, rate in ((0.25, 3.0), (0.3, -2.0), (-0.22, -4.0), (0.05, 1.0)):
        s = gormont_berg_scalar(grid, alpha, rate, 0.05, 0.05, 1.5, gl, gd)
        v = gormont_berg(polar, alpha, rate, 0.05, RE, 0.05, 1.5)
        assert s == pytest.approx([float(x) for x in v], abs=0.02)
    state = DynamicStallState(0.05, 0.21)
    dt = 1e-3
    first = state.coefficients(grid, 0.20, 0.0, 1.5, dt)
    assert first == grid.lookup(0.20, 0.0)           # no history yet: static
    second = state.coefficients(grid, 0.203, 0.0, 1.5, dt)
    assert second == pytest.approx(gormont_berg_scalar(grid, 0.203, 3.0, 0.0, 0.05, 1.5, gl, gd))
    held = state.coefficients(grid, 0.203, 0.0, 1.5, dt)   # alpha_dot = 0 -> static
    assert held == grid.lookup(0.203, 0.0)
    state.reset()
    assert state.coefficients(grid, 0.5, 0.0, 1.5, dt) == grid.lookup(0.5, 0.0)
    # wrap across +-pi does not produce a huge rate
    state.coefficients(grid, math.pi - 0.001, 0.0, 1.5, dt)
    near = state.coefficients(grid, -math.pi + 0.001, 0.0, 1.5, dt)
    assert near == pytest.approx(grid.lookup(-math.pi + 0.001, 0.0), abs=1e-9)
