"""Checks of flapctl.analysis.stats against published formulas and reference libraries."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.signal import lfilter

from flapctl.analysis import stats as S
from flapctl.errors import ProfileError


def _ar1(rng: np.random.Generator, rho: float, n: int) -> np.ndarray:
    """Stationary AR(1) record x_i = rho x_{i-1} + e_i, e ~ N(0, 1)."""
    x0 = rng.normal() / math.sqrt(1.0 - rho * rho)
    out, _ = lfilter([1.0], [1.0, -rho], rng.normal(size=n), zi=[rho * x0])
    return out


# --- autocorrelation --------------------------------------------------------------------

def test_lag_autocorr_hand_example() -> None:
    # r_1 = sum (x_i - m)(x_{i+1} - m) / sum (x_i - m)^2 (Box & Jenkins estimator, from
    # memory): x = 1..5 -> deviations -2..2, numerator 4, denominator 10.
    assert S.lag_autocorr([1, 2, 3, 4, 5]) == pytest.approx(0.4, abs=1e-15)


def test_lag_autocorr_matches_numpy_correlate() -> None:
    # reference library: numpy.correlate of the demeaned record
    x = np.random.default_rng(3).normal(size=257)
    d = x - x.mean()
    full = np.correlate(d, d, mode="full")
    mid = d.size - 1
    for k in (1, 2, 7):
        assert S.lag_autocorr(x, k) == pytest.approx(full[mid + k] / full[mid], rel=1e-12)


def test_lag_autocorr_constant_is_nan_and_bad_lag_raises() -> None:
    assert math.isnan(S.lag_autocorr([2.0, 2.0, 2.0]))
    with pytest.raises(ProfileError, match="k"):
        S.lag_autocorr([1.0, 2.0, 3.0], 0)


def test_effective_sample_size_ar1_reference_value() -> None:
    # rho_1 = 0.5 -> n/3 (REFERENCES.md section 8; Bayley & Hammersley 1946, from memory)
    assert S.effective_sample_size_ar1(300, 0.5) == pytest.approx(100.0, rel=1e-15)


def test_effective_sample_size_ar1_is_limit_of_exact_variance_of_mean() -> None:
    # Exact variance of the mean of a stationary AR(1) record of n samples (standard result,
    # e.g. Bendat & Piersol, from memory):
    #   Var(mean) = (s^2/n) [1 + 2 sum_{k=1}^{n-1} (1 - k/n) rho^k]
    # so n / [..] is the exact effective size; the AR(1) formula is its large-n limit.
    n, rho = 20000, 0.6
    k = np.arange(1, n)
    factor = 1.0 + 2.0 * np.sum((1.0 - k / n) * rho ** k)
    assert S.effective_sample_size_ar1(n, rho) == pytest.approx(n / factor, rel=2e-4)


def test_effective_sample_size_rejects_rho_out_of_range() -> None:
    with pytest.raises(ProfileError, match="rho1"):
        S.effective_sample_size_ar1(100, 1.0)


# --- batch means ------------------------------------------------------------------------

def test_batch_size_one_is_plain_standard_error() -> None:
    # algebraic identity: with m = 1 the batch means are the samples, SE = s/sqrt(n)
    x = np.random.default_rng(5).normal(2.0, 0.3, size=64)
    bm = S.batch_means(x, batch_size=1)
    assert bm.se == pytest.approx(x.std(ddof=1) / math.sqrt(x.size), rel=1e-12)
    assert bm.dof == 63 and bm.n_batches == 64 and bm.n_unused == 0


def test_batch_means_uses_whole_batches_and_drops_leading_remainder() -> None:
    x = np.arange(23, dtype=float)
    bm = S.batch_means(x, n_batches=5)
    assert bm.batch_size == 4 and bm.n_unused == 3
    np.testing.assert_allclose(bm.means, x[3:].reshape(5, 4).mean(axis=1))
    assert bm.grand_mean == pytest.approx(x[3:].mean())


def test_batch_means_se_matches_analytic_se_for_iid_data() -> None:
    # iid N(0, sigma^2): Var(mean) = sigma^2/n (analytic).  E[SE^2] of batch means is
    # exactly sigma^2/n; average over 200 seeds (relative SD of the average ~ 2.3 %).
    sigma, n = 0.7, 400
    se2 = [S.batch_means(np.random.default_rng(s).normal(0.0, sigma, n), n_batches=20).se ** 2
           for s in range(200)]
    assert np.mean(se2) == pytest.approx(sigma ** 2 / n, rel=0.1)


def test_batch_means_warns_on_correlated_batches() -> None:
    x = _ar1(np.random.default_rng(11), 0.97, 400)
    bm = S.batch_means(x, batch_size=2)
    assert abs(bm.lag1_autocorr) > 0.2
    assert bm.warning is not None and "autocorrelation" in bm.warning


def test_auto_batch_means_recovers_ar1_standard_error() -> None:
    # True SE of the mean of a stationary AR(1) record with unit innovations:
    # sqrt(Var(x)/n_eff), Var(x) = 1/(1 - rho^2), n_eff from Bayley & Hammersley (above).
    rho, n = 0.8, 8000
    true_se2 = (1.0 / (1.0 - rho ** 2)) / S.effective_sample_size_ar1(n, rho)
    se2, naive2 = [], []
    for seed in range(60):
        x = _ar1(np.random.default_rng(seed), rho, n)
        res = S.auto_batch_means(x)
        se2.append(res.se ** 2)
        naive2.append(x.var(ddof=1) / n)
    assert np.mean(se2) == pytest.approx(true_se2, rel=0.2)
    assert np.mean(naive2) < 0.2 * true_se2  # the iid formula is far too small here


def test_auto_batch_means_reaches_r1_criterion() -> None:
    res = S.auto_batch_means(_ar1(np.random.default_rng(2), 0.9, 3000))
    assert abs(res.lag1_autocorr) <= 0.2 and res.n_batches >= 10 and res.warning is None


def test_batch_means_bad_input_names_the_key() -> None:
    with pytest.raises(ProfileError, match="batch_size"):
        S.batch_means(np.ones(10), n_batches=2, batch_size=5)
    with pytest.raises(ProfileError, match="values"):
        S.batch_means([1.0, float("nan"), 2.0])
    with pytest.raises(ProfileError, match="n_batches"):
        S.batch_means(np.ones(10), n_batches=11)


# --- GUM ----------------------------------------------------------------------------------

def test_type_b_against_scipy_distributions() -> None:
    # reference library: standard deviations of scipy's uniform and triangular laws
    a = 0.37
    assert S.type_b_rectangular(a) == pytest.approx(stats.uniform(-a, 2 * a).std(), rel=1e-12)
    assert S.type_b_triangular(a) == pytest.approx(
        stats.triang(0.5, loc=-a, scale=2 * a).std(), rel=1e-12)
    q = 0.01
    assert S.type_b_resolution(q) == pytest.approx(stats.uniform(-q / 2, q).std(), rel=1e-12)


def test_combine_independent_and_fully_correlated() -> None:
    # JCGM 100:2008 eq. 10 (independent) and 5.2.2 note 1 (r = 1: linear sum) (from memory)
    assert S.combine([2.0, -1.0], [0.3, 0.4]) == pytest.approx(math.hypot(0.6, 0.4))
    assert S.combine([2.0, 1.0], [0.3, 0.4], [[1, 1], [1, 1]]) == pytest.approx(1.0)


def test_combine_matches_monte_carlo_of_linear_model() -> None:
    # JCGM 101:2008 (Monte Carlo propagation, from memory): for y = c.x with x jointly normal,
    # std(y) of the samples equals u_c.  Seeded, 400k draws: relative SE of std ~ 0.11 %.
    c = np.array([1.5, -2.0, 0.7])
    u = np.array([0.2, 0.1, 0.5])
    r = np.array([[1.0, 0.3, -0.2], [0.3, 1.0, 0.5], [-0.2, 0.5, 1.0]])
    cov = r * np.outer(u, u)
    x = np.random.default_rng(7).multivariate_normal(np.zeros(3), cov, size=400_000)
    assert S.combine(c, u, r) == pytest.approx(float((x @ c).std()), rel=0.01)


def test_combine_rejects_non_psd_correlations() -> None:
    bad = [[1.0, 0.9, -0.9], [0.9, 1.0, 0.9], [-0.9, 0.9, 1.0]]
    with pytest.raises(ProfileError, match="correlations"):
        S.combine([1.0, 1.0, 1.0], [1.0, 1.0, 1.0], bad)


def test_gum_annex_g_example_relative_uncertainty() -> None:
    # JCGM 100:2008 G.4.1 example (numbers from memory): Y = b X1 X2 X3, relative u
    # 0.25 %, 0.57 %, 0.82 % from n = 10, 5, 15 observations -> u_c/y = 1.03 %,
    # nu_eff = 19.0, t_95(19) = 2.09, U_95 = 2.2 %.
    rel = [0.25, 0.57, 0.82]
    dofs = [9, 4, 14]
    uc = S.combine([1, 1, 1], rel)
    nu = S.welch_satterthwaite([1, 1, 1], rel, dofs)
    assert round(uc, 2) == 1.03
    assert round(nu, 1) == 19.0
    k = S.coverage_factor(round(nu), 0.95)
    assert round(k, 2) == 2.09
    assert round(k * uc, 1) == 2.2


def test_welch_satterthwaite_formula_level() -> None:
    # nu_eff = u_c^4 / sum (c_i u_i)^4 / nu_i (JCGM 100:2008 G.2b): two equal contributions
    # with nu each give 2 nu; type-B inputs (inf) add no finite term.
    assert S.welch_satterthwaite([1, 1], [0.3, 0.3], [7, 7]) == pytest.approx(14.0)
    assert S.welch_satterthwaite([1, 1], [0.3, 0.3], [7, math.inf]) == pytest.approx(28.0)
    assert S.welch_satterthwaite([1, 1], [0.3, 0.3], [math.inf, math.inf]) == math.inf


def _student_density(x: float, nu: float) -> float:
    """Student t density from its definition (Gamma functions), for an independent check."""
    lg = math.lgamma((nu + 1) / 2) - math.lgamma(nu / 2) - 0.5 * math.log(nu * math.pi)
    return math.exp(lg - (nu + 1) / 2 * math.log1p(x * x / nu))


@pytest.mark.parametrize("nu", [1, 2, 3.5, 10, 19, 60])
@pytest.mark.parametrize("level", [0.6827, 0.95, 0.99])
def test_coverage_factor_against_scipy_and_density_integral(nu: float, level: float) -> None:
    k = S.coverage_factor(nu, level)
    assert k == pytest.approx(stats.t.ppf(0.5 * (1 + level), nu), rel=1e-12)
    mass, _ = integrate.quad(_student_density, -k, k, args=(nu,), epsabs=1e-12, limit=200)
    assert mass == pytest.approx(level, abs=1e-8)


def test_coverage_factor_table_values() -> None:
    # JCGM 100:2008 Table G.2, p = 95 % (from memory): 12.71, 4.30, 2.23, 2.09, 1.96
    for nu, k in [(1, 12.71), (2, 4.30), (10, 2.23), (19, 2.09), (math.inf, 1.96)]:
        assert round(S.coverage_factor(nu), 2) == k
    assert S.expanded(0.5, math.inf) == pytest.approx(0.5 * stats.norm.ppf(0.975))


def test_coverage_factor_bad_level() -> None:
    with pytest.raises(ProfileError, match="level"):
        S.coverage_factor(10, 95)


def test_cp_relative_uncertainty_check_20() -> None:
    # REFERENCES.md check #20 ([derived] regression value): 1 % Q, 0.5 % omega, 1 % U -> 3.20 %
    assert 100 * S.cp_relative_uncertainty(0.01, 0.005, 0.01) == pytest.approx(3.20, abs=0.01)


def test_cp_relative_uncertainty_matches_numerical_sensitivities() -> None:
    # GUM law of propagation with c_i = dC_P/dx_i by central differences of
    # C_P = Q w / (0.5 rho 2 R H U^3) (REFERENCES.md section 1), relative form.
    def cp(q: float, w: float, u: float, rho: float, r: float, h: float) -> float:
        return q * w / (0.5 * rho * 2 * r * h * u ** 3)

    x = np.array([0.8, 12.0, 0.6, 998.0, 0.15, 0.3])
    rel_u = np.array([0.01, 0.004, 0.008, 0.001, 0.002, 0.003])
    c = np.empty(6)
    for i in range(6):
        h = 1e-6 * x[i]
        up, dn = x.copy(), x.copy()
        up[i] += h
        dn[i] -= h
        c[i] = (cp(*up) - cp(*dn)) / (2 * h)
    u_abs = S.combine(c, rel_u * x) / cp(*x)
    ours = S.cp_relative_uncertainty(*rel_u[[0, 1, 2]], *rel_u[[3, 4, 5]])
    assert ours == pytest.approx(u_abs, rel=1e-6)


# --- ratio of means -----------------------------------------------------------------------

def _fieller_set_by_grid(a: float, b: float, vaa: float, vbb: float, vab: float, t: float,
                         grid: np.ndarray) -> np.ndarray:
    """Fieller 1954's definition, brute force: r with (a - r b)^2 <= t^2 Var(a - r b)."""
    return (a - grid * b) ** 2 <= t * t * (vaa - 2 * grid * vab + grid * grid * vbb)


@pytest.mark.parametrize("case", [
    (1.10, 1.00, 4e-3, 3e-3, 2e-3, 9),
    (0.25, 0.20, 1e-4, 2e-4, -5e-5, 19),
    (-0.4, 0.5, 2e-2, 1e-2, 0.0, 5),
    (0.30, 0.10, 1e-3, 1e-3, 5e-4, 30),
])
def test_fieller_bounded_matches_brute_force(case: tuple) -> None:
    a, b, vaa, vbb, vab, dof = case
    ri = S.ratio_fieller(a, b, vaa, vbb, vab, dof)
    assert ri.kind == "bounded" and ri.g < 1.0
    t = stats.t.ppf(0.975, dof)
    grid = np.linspace(ri.ratio - 40.0, ri.ratio + 40.0, 4_000_001)
    step = grid[1] - grid[0]
    inside = grid[_fieller_set_by_grid(a, b, vaa, vbb, vab, t, grid)]
    assert inside.min() == pytest.approx(ri.lo, abs=step)
    assert inside.max() == pytest.approx(ri.hi, abs=step)
    # the set is one interval: no gaps in the grid
    assert inside.size == pytest.approx((inside.max() - inside.min()) / step + 1, abs=1)


def test_fieller_exclusive_set_matches_brute_force() -> None:
    a, b, vaa, vbb, vab, dof = 1.0, 0.1, 1e-3, 5e-3, 0.0, 10  # g ~ 2.5
    ri = S.ratio_fieller(a, b, vaa, vbb, vab, dof)
    assert ri.kind == "exclusive" and ri.g >= 1.0
    assert ri.lo == -math.inf and ri.hi == math.inf
    t = stats.t.ppf(0.975, dof)
    grid = np.linspace(-200.0, 200.0, 4_000_001)
    step = grid[1] - grid[0]
    out = grid[~_fieller_set_by_grid(a, b, vaa, vbb, vab, t, grid)]
    assert out.min() == pytest.approx(ri.excluded[0], abs=step)
    assert out.max() == pytest.approx(ri.excluded[1], abs=step)
    assert _fieller_set_by_grid(a, b, vaa, vbb, vab, t, grid[[0, -1]]).all()


def test_fieller_unbounded_when_every_ratio_is_accepted() -> None:
    a, b, vaa, vbb, vab, dof = 0.1, 0.1, 1e-2, 1e-2, 0.0, 10
    ri = S.ratio_fieller(a, b, vaa, vbb, vab, dof)
    assert ri.kind == "unbounded" and ri.excluded is None
    t = stats.t.ppf(0.975, dof)
    grid = np.linspace(-1e4, 1e4, 200_001)
    assert _fieller_set_by_grid(a, b, vaa, vbb, vab, t, grid).all()


def test_delta_agrees_with_fieller_when_g_small() -> None:
    # Fieller -> delta method as g -> 0 (Fieller 1954); the gap shrinks about like g
    gaps = []
    for scale in (1e-3, 1e-5):
        f = S.ratio_fieller(1.08, 1.0, scale, scale, 0.6 * scale, 19)
        d = S.ratio_delta(1.08, 1.0, scale, scale, 0.6 * scale, 19)
        half = 0.5 * (d.hi - d.lo)
        gaps.append(max(abs(f.lo - d.lo), abs(f.hi - d.hi)) / half)
        assert f.g == pytest.approx(d.g)
    assert gaps[1] < 0.02 and gaps[1] < gaps[0] / 10


def test_ratio_rejects_zero_denominator_and_bad_covariance() -> None:
    with pytest.raises(ProfileError, match="b"):
        S.ratio_fieller(1.0, 0.0, 1e-3, 1e-3, 0.0, 10)
    with pytest.raises(ProfileError, match="v_ab"):
        S.ratio_delta(1.0, 1.0, 1e-3, 1e-3, 5e-3, 10)


# --- paired gain --------------------------------------------------------------------------

def _pairs(rng: np.random.Generator, n: int, base: float, ratio: float, drift: float,
           noise: float) -> tuple[np.ndarray, np.ndarray]:
    """Interleaved blocks sharing a drifting flow condition; E[morph]/E[base] = ratio."""
    common = rng.normal(0.0, drift, n)
    b = base * (1.0 + common) + rng.normal(0.0, noise, n)
    a = ratio * base * (1.0 + common) + rng.normal(0.0, noise, n)
    return a, b


@pytest.mark.parametrize("method", ["fieller", "delta"])
def test_paired_gain_coverage_on_synthetic_data(method: str) -> None:
    # Coverage of a 95 % interval with known true gain 0.08 over 200 seeds (>= 90 %).
    hits = 0
    for seed in range(200):
        a, b = _pairs(np.random.default_rng(seed), 16, 0.20, 1.08, 0.05, 0.006)
        res = S.paired_gain(a, b, 0.95, method=method)
        hits += res.lo <= 0.08 <= res.hi
    assert hits >= 180


def test_paired_gain_verdicts() -> None:
    rng = np.random.default_rng(42)
    a, b = _pairs(rng, 20, 0.2, 1.15, 0.03, 0.002)
    assert S.paired_gain(a, b).verdict == "gain"
    a, b = _pairs(rng, 20, 0.2, 0.85, 0.03, 0.002)
    assert S.paired_gain(a, b).verdict == "loss"
    a, b = _pairs(rng, 20, 0.2, 1.0, 0.03, 0.002)
    res = S.paired_gain(a, b)
    assert res.verdict == "no detectable gain" and res.lo <= 0.0 <= res.hi


def test_paired_gain_unbounded_is_reported_not_invented() -> None:
    rng = np.random.default_rng(1)
    b = 0.01 + rng.normal(0.0, 0.03, 6)
    b -= b.mean() - 0.01  # mean base C_P 0.01, far inside its own noise
    a = 0.02 + rng.normal(0.0, 0.03, 6)
    res = S.paired_gain(a, b)
    assert res.g >= 1.0 and res.kind in ("exclusive", "unbounded")
    assert res.lo == -math.inf and res.hi == math.inf
    assert res.verdict == "no detectable gain"


def test_paired_gain_pairing_uses_covariance() -> None:
    # interleaving cancels common drift: the paired interval is narrower than the one with
    # the covariance ignored (delta method, v_ab = 0)
    a, b = _pairs(np.random.default_rng(9), 20, 0.2, 1.05, 0.05, 0.002)
    paired = S.paired_gain(a, b, method="delta")
    n = a.size
    indep = S.ratio_delta(a.mean(), b.mean(), a.var(ddof=1) / n, b.var(ddof=1) / n, 0.0, n - 1)
    assert paired.hi - paired.lo < 0.5 * (indep.hi - indep.lo)


def test_common_scale_cancels_except_on_actuator_part() -> None:
    # Delta method algebra (REFERENCES.md section 8): a common scale error e_s on gross shaft
    # power leaves (P_act/b) e_s in the ratio; actuator-power error e_A leaves (P_act/b) e_A;
    # a common offset o leaves (1 - R) o / b.  Type-B terms have infinite dof; the effective
    # dof follow from Welch-Satterthwaite.
    a, b = _pairs(np.random.default_rng(4), 20, 0.2, 1.06, 0.03, 0.003)
    plain = S.paired_gain(a, b, method="delta")
    scale_only = S.paired_gain(a, b, method="delta", type_b=S.CommonTypeB(rel_u_shaft=0.02))
    assert scale_only.lo == pytest.approx(plain.lo, rel=1e-9)
    assert scale_only.hi == pytest.approx(plain.hi, rel=1e-9)

    tb = S.CommonTypeB(rel_u_shaft=0.02, actuator_cp=0.03, rel_u_actuator=0.05,
                       u_offset_cp=0.004)
    res = S.paired_gain(a, b, method="delta", type_b=tb)
    r = a.mean() / b.mean()
    n = a.size
    cov = np.cov(a, b) / n
    var_a = (cov[0, 0] - 2 * r * cov[0, 1] + r * r * cov[1, 1]) / b.mean() ** 2
    var_b = ((0.03 * 0.02) ** 2 + (0.03 * 0.05) ** 2 + ((1 - r) * 0.004) ** 2) / b.mean() ** 2
    nu = (n - 1) * ((var_a + var_b) / var_a) ** 2
    half = stats.t.ppf(0.975, nu) * math.sqrt(var_a + var_b)
    assert res.dof == pytest.approx(nu, rel=1e-9)
    assert res.hi - res.lo == pytest.approx(2 * half, rel=1e-9)
    fieller = S.paired_gain(a, b, type_b=tb)
    assert fieller.hi - fieller.lo == pytest.approx(2 * half, rel=0.05)


def test_paired_gain_bad_input() -> None:
    with pytest.raises(ProfileError, match="base_blocks"):
        S.paired_gain([0.2, 0.21, 0.22], [0.2, 0.2])
    with pytest.raises(ProfileError, match="base_blocks"):
        S.paired_gain([0.2, 0.21], [-0.1, -0.2])
    with pytest.raises(ProfileError, match="method"):
        S.paired_gain([0.2, 0.21], [0.2, 0.2], method="bootstrap")
    with pytest.raises(ProfileError, match="rel_u_shaft"):
        S.paired_gain([0.2, 0.21], [0.2, 0.19], type_b=S.CommonTypeB(rel_u_shaft=-0.1))
