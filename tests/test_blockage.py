"""Checks of flapctl.analysis.blockage against actuator-disc theory and published values."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from flapctl.analysis import blockage as BK
from flapctl.errors import FlapctlError, ProfileError


def test_garrett_cummins_maximum_check_17() -> None:
    # REFERENCES.md check #17: (16/27)/(1 - B)^2 (Garrett & Cummins 2007, J. Fluid Mech. 588);
    # the six-digit numbers are [derived] regression values.
    assert BK.max_cp_confined(0.1) == pytest.approx(0.731596, abs=1e-5)
    assert BK.max_cp_confined(0.3) == pytest.approx(1.209373, abs=1e-5)


@pytest.mark.parametrize("B", [0.0, 0.05, 0.1, 0.3, 0.5, 0.8])
def test_numerical_maximum_of_closed_forms_agrees(B: float) -> None:
    # maximising C_P = C_T a_t over a_w reproduces Garrett & Cummins' maximum at a_w = 1/3
    cp, aw = BK.max_cp_numeric(B)
    assert cp == pytest.approx(BK.max_cp_confined(B), rel=1e-10)
    assert aw == pytest.approx(1.0 / 3.0, abs=1e-5)


def test_open_flow_maximum_is_betz() -> None:
    # Betz 1920: 16/27 = 0.592593 at a = 1/3 (REFERENCES.md check #1)
    assert BK.max_cp_confined(0.0) == pytest.approx(0.592593, abs=1e-6)
    st0 = BK.lmadt_state(0.0, 1.0 / 3.0)  # open flow: a_w = 1 - 2a, a_t = 1 - a
    assert st0.a_t == pytest.approx(2.0 / 3.0) and st0.ct == pytest.approx(8.0 / 9.0)


@pytest.mark.parametrize("B", [0.02, 0.1, 0.3, 0.6])
@pytest.mark.parametrize("a_w", [0.05, 0.3, 0.6, 0.95])
def test_closed_forms_satisfy_conservation_laws(B: float, a_w: float) -> None:
    # Independent of the closed forms: the channel flow of Garrett & Cummins 2007 obeys
    #  continuity            1 = B a_t + b (1 - B a_t / a_w)
    #  Bernoulli, core       C_T = (p1 - p2)/(rho U_T^2/2) = b^2 - a_w^2 (wake and bypass
    #                        share one pressure far downstream)
    #  axial momentum        (b^2 - 1)/2 - B C_T/2 = B a_t a_w + (1 - B a_t/a_w) b^2 - 1
    # (speeds over U_T, pressures and fluxes over rho U_T^2 A_c; the upstream-to-wake
    # pressure drop is (b^2 - 1)/2 by Bernoulli in the bypass; standard LMADT, from memory).
    s = BK.lmadt_state(B, a_w)
    assert 1.0 == pytest.approx(B * s.a_t + s.b * (1.0 - B * s.a_t / s.a_w), abs=1e-12)
    p0 = 0.0                                   # upstream pressure (reference)
    p4 = p0 + 0.5 * (1.0 - s.b ** 2)          # far wake = bypass, Bernoulli in bypass
    p1 = p0 + 0.5 * (1.0 - s.a_t ** 2)        # just upstream of the disc, core streamtube
    p2 = p4 + 0.5 * (s.a_w ** 2 - s.a_t ** 2)  # just downstream of the disc, core streamtube
    assert s.ct == pytest.approx(2.0 * (p1 - p2), rel=1e-12)
    lhs = 0.5 * (s.b ** 2 - 1.0) - 0.5 * B * s.ct
    rhs = B * s.a_t * s.a_w + (1.0 - B * s.a_t / s.a_w) * s.b ** 2 - 1.0
    assert lhs == pytest.approx(rhs, abs=1e-12)
    assert s.cp == pytest.approx(s.ct * s.a_t, rel=1e-12)


@pytest.mark.parametrize("B", [0.0, 1e-12])
def test_zero_blockage_is_open_flow(B: float) -> None:
    # B -> 0: no correction, U_F = U_T
    c = BK.correct(0.3, 2.5, 0.7, B)
    assert c.speed_ratio == pytest.approx(1.0, abs=1e-9)
    assert c.cp_f == pytest.approx(0.3, rel=1e-8) and c.tsr_f == pytest.approx(2.5, rel=1e-8)
    assert c.ct_f == pytest.approx(0.7, rel=1e-8)


@settings(max_examples=150, deadline=None)
@given(B=st.floats(0.005, 0.6), ct=st.floats(0.01, 0.99), cp=st.floats(0.0, 1.0))
def test_corrected_cp_not_above_measured(B: float, ct: float, cp: float) -> None:
    c = BK.correct(cp, 2.0, ct, B)
    assert c.speed_ratio >= 1.0
    assert c.cp_f <= cp and c.tsr_f <= 2.0 and c.ct_f <= ct


@pytest.mark.parametrize("B", [0.05, 0.2, 0.45])
@pytest.mark.parametrize("a_w", [0.1, 1.0 / 3.0, 0.7, 0.99])
def test_root_finding_round_trip(B: float, a_w: float) -> None:
    s = BK.lmadt_state(B, a_w)
    c = BK.correct(s.cp, 3.0, s.ct, B)
    assert c.a_w == pytest.approx(a_w, rel=1e-9)
    assert c.a_t == pytest.approx(s.a_t, rel=1e-9)


@pytest.mark.parametrize("B", [0.05, 0.2, 0.45])
@pytest.mark.parametrize("a_w", [0.2, 0.5, 0.8])
def test_corrected_ideal_disc_is_open_flow_actuator_disc(B: float, a_w: float) -> None:
    # Open-flow actuator-disc momentum theory (Betz/Glauert): with induction a = 1 - u_t/U_F,
    # C_T,F = 4 a (1 - a) and C_P,F = 4 a (1 - a)^2.  An ideal disc in a channel, corrected,
    # must be exactly such a disc in open flow.
    s = BK.lmadt_state(B, a_w)
    c = BK.correct(s.cp, 2.0, s.ct, B)
    a = 1.0 - c.a_t / c.speed_ratio
    assert c.ct_f == pytest.approx(4 * a * (1 - a), rel=1e-9)
    assert c.cp_f == pytest.approx(4 * a * (1 - a) ** 2, rel=1e-9)


def test_correction_regression_value_and_quick_estimates() -> None:
    # REFERENCES.md section 7.2: B = 0.1, C_T = 0.8 gives U_F/U_T = 1.035 by LMADT
    # ([derived] regression value) and 1.095 by Maskell-type with m = 5/2 ([derived]
    # arithmetic); Pope & Harper 1966 gives 1.025 (check #19, from memory) and 1.075 at 0.3.
    assert BK.correct(0.4, 2.0, 0.8, 0.1).speed_ratio == pytest.approx(1.035, abs=5e-4)
    assert BK.maskell_speed_ratio(0.1, 0.8) == pytest.approx(1.095, abs=5e-4)
    assert BK.pope_harper_speed_ratio(0.1) == pytest.approx(1.025, abs=1e-12)
    assert BK.pope_harper_speed_ratio(0.3) == pytest.approx(1.075, abs=1e-12)


def test_thrust_source_is_carried() -> None:
    assert BK.correct(0.3, 2.0, 0.6, 0.1).thrust_source == "measured"
    assert BK.correct(0.3, 2.0, 0.6, 0.1, thrust_source="estimated").thrust_source == "estimated"
    with pytest.raises(ProfileError, match="thrust_source"):
        BK.correct(0.3, 2.0, 0.6, 0.1, thrust_source="guessed")


@pytest.mark.parametrize("ct", [2.2, -0.1])
def test_no_root_raises_blockage_error_naming_value(ct: float) -> None:
    # at B = 0.1 the momentum solution exists for 0 <= C_T < 1/(1 - sqrt(0.1))^2 = 2.1388
    with pytest.raises(BK.BlockageError, match=repr(ct)) as info:
        BK.correct(0.3, 2.0, ct, 0.1)
    assert isinstance(info.value, ValueError) and isinstance(info.value, FlapctlError)
    assert info.value.key == "ct_t" and info.value.value == ct


def test_bad_inputs() -> None:
    with pytest.raises(ProfileError, match="B"):
        BK.correct(0.3, 2.0, 0.5, 1.0)
    with pytest.raises(ProfileError, match="a_w"):
        BK.lmadt_state(0.1, 0.0)
    with pytest.raises(ProfileError, match="cp_t"):
        BK.correct(float("nan"), 2.0, 0.5, 0.1)
    with pytest.raises(ProfileError, match="channel_area_m2"):
        BK.blockage_ratio(0.1, 0.05)


def test_blockage_ratio() -> None:
    # B = A / A_c with A = 2 R H (REFERENCES.md section 7): R = 0.15 m, H = 0.3 m in a
    # 0.6 m deep, 1.0 m wide flume -> 0.09 / 0.6 = 0.15
    assert BK.blockage_ratio(2 * 0.15 * 0.3, 0.6 * 1.0) == pytest.approx(0.15)
    assert math.isclose(BK.blockage_ratio(1.0, 4.0), 0.25)
    assert np.isfinite(BK.max_cp_confined(BK.blockage_ratio(1.0, 4.0)))
