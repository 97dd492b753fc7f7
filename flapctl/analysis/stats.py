"""Statistics for the net-gain verdict: batch means, GUM uncertainty, ratios of means.

The rig answers one question: is the net power gain of morphing blades over fixed blades
real once the actuators' electrical energy is paid for, and how sure are we.  The gain is
G = a/b - 1, with a the mean net power coefficient with morphing blades and b the mean
power coefficient of the fixed-blade baseline, both measured on the same rig, interleaved
in time (A/B/A/B blocks) so that slow drift of flow speed and temperature cancels.

Contents (all pure functions on numpy arrays; results are frozen dataclasses):

* Autocorrelated records: :func:`lag_autocorr`, :func:`effective_sample_size_ar1`
  (Bayley & Hammersley 1946), :func:`batch_means` and :func:`auto_batch_means`
  (Schmeiser 1982, Operations Research 30(3):556-568; Law & Kelton, *Simulation Modeling
  and Analysis*).
* GUM (JCGM 100:2008): type-B standard uncertainties, combination with sensitivity
  coefficients and correlations, Welch-Satterthwaite effective degrees of freedom,
  expanded uncertainty with a Student-t coverage factor, and the relative uncertainty of
  C_P = Q*omega / (0.5*rho*2*R*H*U**3).
* Ratio of two means: delta method and Fieller's theorem (Fieller 1954, J. R. Stat. Soc. B
  16:175-185), and :func:`paired_gain` for interleaved morph/base blocks.

Which systematic (type-B) errors cancel in the gain ratio measured on one rig
-----------------------------------------------------------------------------
Both mode means are divided by the same normaliser 0.5*rho*A*U**3 when the flow is measured
by the same meter and the modes are interleaved.  Hence:

* Cancel exactly (do not enter the gain at all): fluid density, rotor radius and span
  (swept area), the flow meter's *scale* (calibration factor) error, and any other factor
  that multiplies the whole net C_P of both modes alike.
* Cancel on the shaft-power part only: torque-sensor and encoder (speed) *scale* errors.
  They multiply the gross shaft power of both modes, but the morph mode's net power also
  subtracts the actuator electrical power, which another sensor measures.  What is left is
  (actuator C_P / base C_P) times the shaft-scale error: ``CommonTypeB.rel_u_shaft`` with
  ``CommonTypeB.actuator_cp``.
* Never cancel: the actuator power measurement itself (current and voltage sensors; only the
  morph mode has it), ``CommonTypeB.rel_u_actuator``; additive offsets common to both modes
  (torque-sensor zero drift times speed), which leave (1 - R) times the offset,
  ``CommonTypeB.u_offset_cp``; level-dependent errors such as torque-sensor non-linearity or
  hysteresis at the two different torque levels, and errors in one mode only,
  ``CommonTypeB.u_morph_only_cp`` / ``u_base_only_cp``.
* Not covered here, and not cancelling in general: different blockage corrections when the
  two modes load the flow differently (their thrust differs), a flow-meter *offset* when the
  comparison is made at a set tip-speed ratio (both points move along C_P(lambda) curves
  of different slope), and drift that interleaving does not remove.

Type-B terms enter as linearised covariances of the two means with infinite degrees of
freedom; the effective degrees of freedom of the gain follow from Welch-Satterthwaite.
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy import stats as _sps

from flapctl.errors import ProfileError

__all__ = [
    "BatchMeans",
    "RatioInterval",
    "CommonTypeB",
    "GainResult",
    "lag_autocorr",
    "effective_sample_size_ar1",
    "batch_means",
    "auto_batch_means",
    "type_b_rectangular",
    "type_b_triangular",
    "type_b_resolution",
    "combine",
    "welch_satterthwaite",
    "coverage_factor",
    "expanded",
    "cp_relative_uncertainty",
    "ratio_delta",
    "ratio_fieller",
    "paired_gain",
]

log = logging.getLogger(__name__)

_SOURCE = "flapctl.analysis.stats"
#: |r1| of batch means above which the batches are taken as correlated (Schmeiser 1982;
#: Law & Kelton) (from memory).
R1_LIMIT = 0.2
#: Fewest batches :func:`auto_batch_means` accepts (k = 10..30 recommended, from memory).
MIN_BATCHES = 10
#: Most batches :func:`auto_batch_means` starts from.
MAX_BATCHES = 30


def _bad(func: str, key: str, value: object, expected: str) -> ProfileError:
    return ProfileError(f"{_SOURCE}.{func}", key, value, expected)


def _vector(func: str, key: str, values: object, min_len: int = 1) -> np.ndarray:
    try:
        arr = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise _bad(func, key, values, "a 1-D sequence of real numbers") from None
    if arr.ndim != 1 or arr.size < min_len:
        raise _bad(func, key, values, f"a 1-D sequence of at least {min_len} numbers")
    if not np.all(np.isfinite(arr)):
        raise _bad(func, key, values, "finite numbers only (no NaN or inf)")
    return arr


def _real(func: str, key: str, value: object, lo: float = -math.inf,
          lo_open: bool = False, allow_inf: bool = False) -> float:
    try:
        x = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise _bad(func, key, value, "a real number") from None
    if math.isnan(x) or (math.isinf(x) and not allow_inf):
        raise _bad(func, key, value, "a finite real number")
    if x < lo or (lo_open and x == lo):
        raise _bad(func, key, value, f"a number {'>' if lo_open else '>='} {lo}")
    return x


def _level(func: str, level: object) -> float:
    p = _real(func, "level", level)
    if not 0.0 < p < 1.0:
        raise _bad(func, "level", level, "a coverage probability 0 < level < 1, e.g. 0.95")
    return p


# ---------------------------------------------------------------------------------------
# Autocorrelation and batch means
# ---------------------------------------------------------------------------------------

def lag_autocorr(x: Sequence[float] | np.ndarray, k: int = 1) -> float:
    """Sample autocorrelation at lag ``k`` (dimensionless).

    r_k = sum_{i<n-k} (x_i - m)(x_{i+k} - m) / sum_i (x_i - m)**2 with m the sample mean
    (the usual biased estimator of time-series analysis).  Returns NaN when all values are
    equal (the correlation is undefined then).
    """
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
        raise _bad("lag_autocorr", "k", k, "an integer lag >= 1")
    arr = _vector("lag_autocorr", "x", x, min_len=k + 1)
    dev = arr - arr.mean()
    denom = float(np.dot(dev, dev))
    if denom == 0.0:
        return math.nan
    return float(np.dot(dev[:-k], dev[k:]) / denom)


def effective_sample_size_ar1(n: float, rho1: float) -> float:
    """Effective number of independent samples of an AR(1) record: n (1 - rho1)/(1 + rho1).

    Bayley & Hammersley 1946 (from memory); large-n limit of the variance of the mean of a
    first-order autoregressive process.  ``rho1`` must lie in (-1, 1).
    """
    nn = _real("effective_sample_size_ar1", "n", n, lo=0.0, lo_open=True)
    rho = _real("effective_sample_size_ar1", "rho1", rho1)
    if not -1.0 < rho < 1.0:
        raise _bad("effective_sample_size_ar1", "rho1", rho1, "a correlation -1 < rho1 < 1")
    return nn * (1.0 - rho) / (1.0 + rho)


@dataclass(frozen=True)
class BatchMeans:
    """Batch-means estimate of a mean and its standard error.

    ``means`` are the k batch means (same unit as the input), ``grand_mean`` their mean,
    ``se`` = s(means)/sqrt(k) with ``dof`` = k - 1, ``lag1_autocorr`` the lag-1
    autocorrelation of the batch means, ``n_unused`` the leading samples left out so that
    every batch holds ``batch_size`` whole samples, ``warning`` a text when the result should
    not be trusted as is (None otherwise).
    """

    means: np.ndarray
    grand_mean: float
    se: float
    dof: int
    lag1_autocorr: float
    batch_size: int
    n_batches: int
    n_unused: int
    warning: str | None


def _positive_int(func: str, key: str, value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise _bad(func, key, value, "a positive integer")
    return int(value)


def batch_means(values: Sequence[float] | np.ndarray, n_batches: int | None = None,
                batch_size: int | None = None) -> BatchMeans:
    """Split a record into contiguous batches of whole samples and estimate the mean's SE.

    Pass per-revolution values so that batches hold whole revolutions.  Give either
    ``n_batches`` (k) or ``batch_size`` (m), not both; with neither, k = min(20, n).
    The batch size is m = n // k (or as given), k = n // m; the n - k m leading samples
    (closest to the settling transient) are not used.  SE = s/sqrt(k) with k - 1 degrees of
    freedom, s the sample standard deviation of the batch means (Schmeiser 1982;
    Law & Kelton) (from memory).  A warning is set when |r1| of the batch means exceeds 0.2
    (batches too short to be independent) or k < 10.
    """
    arr = _vector("batch_means", "values", values, min_len=2)
    n = arr.size
    if n_batches is not None and batch_size is not None:
        raise _bad("batch_means", "batch_size", batch_size,
                   "None when n_batches is given (give one of them)")
    if batch_size is not None:
        m = _positive_int("batch_means", "batch_size", batch_size)
        k = n // m
        if k < 2:
            raise _bad("batch_means", "batch_size", batch_size,
                       f"at most {n // 2} so that the {n} samples make >= 2 batches")
    else:
        k = min(20, n) if n_batches is None else _positive_int("batch_means", "n_batches",
                                                               n_batches)
        if not 2 <= k <= n:
            raise _bad("batch_means", "n_batches", n_batches,
                       f"an integer from 2 to the number of samples ({n})")
        m = n // k
    unused = n - k * m
    means = arr[unused:].reshape(k, m).mean(axis=1)
    grand = float(means.mean())
    se = float(means.std(ddof=1) / math.sqrt(k))
    r1 = lag_autocorr(means, 1)
    notes = []
    if math.isnan(r1):
        notes.append("batch means are all equal: lag-1 autocorrelation undefined")
    elif abs(r1) > R1_LIMIT:
        notes.append(f"lag-1 autocorrelation of batch means {r1:+.3f} exceeds "
                     f"+/-{R1_LIMIT}: enlarge the batch size")
    if k < MIN_BATCHES:
        notes.append(f"only {k} batches (< {MIN_BATCHES}): the SE is poorly determined")
    warning = "; ".join(notes) if notes else None
    if warning:
        log.debug("batch_means: %s", warning)
    return BatchMeans(means=means, grand_mean=grand, se=se, dof=k - 1, lag1_autocorr=r1,
                      batch_size=m, n_batches=k, n_unused=unused, warning=warning)


def auto_batch_means(values: Sequence[float] | np.ndarray, min_batches: int = MIN_BATCHES,
                     max_batches: int = MAX_BATCHES) -> BatchMeans:
    """Batch means with the batch size enlarged until |r1| <= 0.2 or k would drop below
    ``min_batches``.

    Starts from k = ``max_batches`` batches (m = n // k; 10-30 batches are enough for the
    SE, Schmeiser 1982, from memory: more, shorter batches bias the SE low for correlated
    records even when |r1| <= 0.2) and grows m by about a quarter each step
    (m <- m + max(1, m // 4)).  If no admissible size meets the |r1| criterion, the largest
    size that still gives ``min_batches`` batches is returned with its warning set.
    Records shorter than ``max_batches`` samples start from m = 1.
    """
    arr = _vector("auto_batch_means", "values", values, min_len=2)
    kmin = _positive_int("auto_batch_means", "min_batches", min_batches)
    kmax = _positive_int("auto_batch_means", "max_batches", max_batches)
    if kmin < 2:
        raise _bad("auto_batch_means", "min_batches", min_batches, "an integer >= 2")
    if kmax < kmin:
        raise _bad("auto_batch_means", "max_batches", max_batches,
                   f"an integer >= min_batches ({kmin})")
    n = arr.size
    m = max(1, n // kmax)
    while True:  # terminates: m grows strictly and n // m must stay >= kmin >= 2
        result = batch_means(arr, batch_size=m)
        r1 = result.lag1_autocorr
        if not math.isnan(r1) and abs(r1) <= R1_LIMIT:
            return result
        nxt = m + max(1, m // 4)
        if n // nxt < kmin:
            return result
        m = nxt


# ---------------------------------------------------------------------------------------
# GUM (JCGM 100:2008)
# ---------------------------------------------------------------------------------------

def type_b_rectangular(half_width: float) -> float:
    """Standard uncertainty of a rectangular distribution of half-width a: a/sqrt(3).

    JCGM 100:2008 clause 4.3.7 (from memory).  Same unit as ``half_width``.
    """
    return _real("type_b_rectangular", "half_width", half_width, lo=0.0) / math.sqrt(3.0)


def type_b_triangular(half_width: float) -> float:
    """Standard uncertainty of a symmetric triangular distribution of half-width a: a/sqrt(6).

    JCGM 100:2008 clause 4.3.9 (from memory).
    """
    return _real("type_b_triangular", "half_width", half_width, lo=0.0) / math.sqrt(6.0)


def type_b_resolution(q: float) -> float:
    """Standard uncertainty of a reading quantised in steps q: q/sqrt(12).

    A rectangular distribution of half-width q/2 (JCGM 100:2008 F.2.2.1, from memory).
    """
    return _real("type_b_resolution", "q", q, lo=0.0) / math.sqrt(12.0)


def _correlation_matrix(func: str, correlations: object, n: int) -> np.ndarray:
    try:
        r = np.asarray(correlations, dtype=float)
    except (TypeError, ValueError):
        raise _bad(func, "correlations", correlations, f"an {n}x{n} matrix of numbers") from None
    if r.shape != (n, n) or not np.all(np.isfinite(r)):
        raise _bad(func, "correlations", correlations, f"a finite {n}x{n} matrix")
    if not np.allclose(r, r.T, rtol=0.0, atol=1e-12):
        raise _bad(func, "correlations", correlations, "a symmetric matrix")
    if not np.allclose(np.diag(r), 1.0, rtol=0.0, atol=1e-12):
        raise _bad(func, "correlations", correlations, "ones on the diagonal")
    if np.any(np.abs(r) > 1.0 + 1e-12):
        raise _bad(func, "correlations", correlations, "entries between -1 and 1")
    if float(np.linalg.eigvalsh(r).min()) < -1e-10:
        raise _bad(func, "correlations", correlations,
                   "a positive semi-definite correlation matrix")
    return r


def combine(sensitivities: Sequence[float] | np.ndarray,
            uncertainties: Sequence[float] | np.ndarray,
            correlations: Sequence[Sequence[float]] | np.ndarray | None = None) -> float:
    """Combined standard uncertainty u_c of y = f(x_1..x_n) (law of propagation).

    u_c**2 = sum_i c_i**2 u_i**2 + 2 sum_{i<j} c_i c_j u_i u_j r_ij, with c_i = df/dx_i the
    sensitivity coefficients, u_i the standard uncertainties and r_ij the correlation
    coefficients (JCGM 100:2008 eq. 13/16, from memory).  ``correlations`` None means
    independent inputs.  Unit: that of y.
    """
    c = _vector("combine", "sensitivities", sensitivities)
    u = _vector("combine", "uncertainties", uncertainties)
    if u.size != c.size:
        raise _bad("combine", "uncertainties", uncertainties,
                   f"{c.size} values, one per sensitivity coefficient")
    if np.any(u < 0.0):
        raise _bad("combine", "uncertainties", uncertainties, "non-negative values")
    cu = c * u
    if correlations is None:
        return float(math.sqrt(float(np.dot(cu, cu))))
    r = _correlation_matrix("combine", correlations, c.size)
    return math.sqrt(max(float(cu @ r @ cu), 0.0))


def welch_satterthwaite(sensitivities: Sequence[float] | np.ndarray,
                        uncertainties: Sequence[float] | np.ndarray,
                        dofs: Sequence[float] | np.ndarray) -> float:
    """Effective degrees of freedom nu_eff = u_c**4 / sum_i (c_i u_i)**4 / nu_i.

    JCGM 100:2008 G.4.1 eq. G.2b (from memory); for independent inputs only.  ``dofs`` may
    contain ``math.inf`` (type-B inputs, known exactly); returns inf when every
    contribution has infinite degrees of freedom or all contributions are zero.  The result
    is not rounded; :func:`coverage_factor` accepts non-integer degrees of freedom.
    """
    c = _vector("welch_satterthwaite", "sensitivities", sensitivities)
    u = _vector("welch_satterthwaite", "uncertainties", uncertainties)
    try:
        nu = np.asarray(dofs, dtype=float)
    except (TypeError, ValueError):
        raise _bad("welch_satterthwaite", "dofs", dofs, "a sequence of numbers") from None
    if u.size != c.size or nu.shape != c.shape:
        raise _bad("welch_satterthwaite", "dofs", dofs,
                   f"{c.size} values, one per sensitivity coefficient")
    if np.any(np.isnan(nu)) or np.any(nu <= 0.0):
        raise _bad("welch_satterthwaite", "dofs", dofs, "degrees of freedom > 0 (inf allowed)")
    if np.any(u < 0.0):
        raise _bad("welch_satterthwaite", "uncertainties", uncertainties, "non-negative values")
    contrib = (c * u) ** 2
    uc2 = float(contrib.sum())
    finite = np.isfinite(nu)
    denom = float(np.sum(contrib[finite] ** 2 / nu[finite]))
    if denom == 0.0:
        return math.inf
    return uc2 ** 2 / denom


def coverage_factor(dof: float, level: float = 0.95) -> float:
    """Two-sided coverage factor k = t_{(1+level)/2}(dof) of Student's t distribution.

    ``dof`` may be non-integer (Welch-Satterthwaite) or inf (normal quantile, 1.960 at 95 %).
    """
    nu = _real("coverage_factor", "dof", dof, lo=0.0, lo_open=True, allow_inf=True)
    p = _level("coverage_factor", level)
    q = 0.5 * (1.0 + p)
    if math.isinf(nu):
        return float(_sps.norm.ppf(q))
    return float(_sps.t.ppf(q, nu))


def expanded(u_c: float, dof: float, level: float = 0.95) -> float:
    """Expanded uncertainty U = k u_c with k from :func:`coverage_factor` (unit of u_c)."""
    uc = _real("expanded", "u_c", u_c, lo=0.0)
    return coverage_factor(dof, level) * uc


def cp_relative_uncertainty(rel_u_torque: float, rel_u_speed: float, rel_u_flow: float,
                            rel_u_rho: float = 0.0, rel_u_radius: float = 0.0,
                            rel_u_span: float = 0.0) -> float:
    """Relative standard uncertainty of C_P = Q omega / (0.5 rho 2 R H U**3).

    (u/C_P)**2 = (u_Q/Q)**2 + (u_w/w)**2 + (u_rho/rho)**2 + (u_R/R)**2 + (u_H/H)**2
    + 9 (u_U/U)**2 for independent inputs (GUM law of propagation for a product of powers).
    All arguments and the result are fractions (0.01 = 1 %).
    """
    names = ("rel_u_torque", "rel_u_speed", "rel_u_flow", "rel_u_rho", "rel_u_radius",
             "rel_u_span")
    vals = [_real("cp_relative_uncertainty", k, v, lo=0.0)
            for k, v in zip(names, (rel_u_torque, rel_u_speed, rel_u_flow, rel_u_rho,
                                    rel_u_radius, rel_u_span))]
    # exponents of Q, omega, U, rho, R, H in C_P: 1, 1, -3, -1, -1, -1
    return combine([1.0, 1.0, -3.0, -1.0, -1.0, -1.0], vals)


# ---------------------------------------------------------------------------------------
# Ratio of two means
# ---------------------------------------------------------------------------------------

@dataclass(frozen=True)
class RatioInterval:
    """Confidence set for R = a/b.

    ``kind`` is "bounded" (lo <= R <= hi), "exclusive" (the set is the two half-lines
    R <= excluded[0] and R >= excluded[1]; lo = -inf, hi = +inf) or "unbounded" (every R;
    lo = -inf, hi = +inf).  ``g`` = t**2 v_bb / b**2 (Fieller); a finite interval exists only
    when g < 1.  ``t`` is the coverage factor used, ``dof`` its degrees of freedom.
    """

    ratio: float
    lo: float
    hi: float
    method: str
    dof: float
    t: float
    g: float
    kind: str
    excluded: tuple[float, float] | None = None


def _ratio_inputs(func: str, a: float, b: float, v_aa: float, v_bb: float, v_ab: float,
                  dof: float, level: float) -> tuple[float, float, float, float, float, float]:
    aa = _real(func, "a", a)
    bb = _real(func, "b", b)
    if bb == 0.0:
        raise _bad(func, "b", b, "a non-zero denominator mean")
    vaa = _real(func, "v_aa", v_aa, lo=0.0)
    vbb = _real(func, "v_bb", v_bb, lo=0.0)
    vab = _real(func, "v_ab", v_ab)
    if vab * vab > vaa * vbb * (1.0 + 1e-9) + 1e-300:
        raise _bad(func, "v_ab", v_ab,
                   f"|v_ab| <= sqrt(v_aa v_bb) = {math.sqrt(vaa * vbb):.6g}")
    t = coverage_factor(_real(func, "dof", dof, lo=0.0, lo_open=True, allow_inf=True),
                        _level(func, level))
    return aa, bb, vaa, vbb, vab, t


def ratio_delta(a: float, b: float, v_aa: float, v_bb: float, v_ab: float, dof: float,
                level: float = 0.95) -> RatioInterval:
    """Delta-method interval for R = a/b: R +/- t sqrt((v_aa - 2 R v_ab + R**2 v_bb)/b**2).

    ``v_aa``, ``v_bb`` are the variances of the two means, ``v_ab`` their covariance,
    ``dof`` the degrees of freedom of those estimates (inf for known variances).
    """
    aa, bb, vaa, vbb, vab, t = _ratio_inputs("ratio_delta", a, b, v_aa, v_bb, v_ab, dof, level)
    r = aa / bb
    var = max((vaa - 2.0 * r * vab + r * r * vbb) / (bb * bb), 0.0)
    half = t * math.sqrt(var)
    return RatioInterval(ratio=r, lo=r - half, hi=r + half, method="delta", dof=float(dof),
                         t=t, g=t * t * vbb / (bb * bb), kind="bounded")


def ratio_fieller(a: float, b: float, v_aa: float, v_bb: float, v_ab: float, dof: float,
                  level: float = 0.95) -> RatioInterval:
    """Fieller's confidence set for R = a/b (Fieller 1954) (from memory).

    The set of r with (a - r b)**2 <= t**2 (v_aa - 2 r v_ab + r**2 v_bb), i.e. the roots of
    (b**2 - t**2 v_bb) r**2 - 2 (a b - t**2 v_ab) r + (a**2 - t**2 v_aa) = 0.  When
    g = t**2 v_bb / b**2 >= 1 the denominator is not significantly different from zero and
    the set is not a finite interval: the result says so (``kind``) and carries infinite
    bounds instead of invented ones.
    """
    aa, bb, vaa, vbb, vab, t = _ratio_inputs("ratio_fieller", a, b, v_aa, v_bb, v_ab, dof,
                                             level)
    t2 = t * t
    r = aa / bb
    g = t2 * vbb / (bb * bb)
    qa = bb * bb - t2 * vbb
    qb = aa * bb - t2 * vab
    qc = aa * aa - t2 * vaa
    disc = qb * qb - qa * qc
    common = dict(ratio=r, method="fieller", dof=float(dof), t=t, g=g)
    if g < 1.0:
        root = math.sqrt(max(disc, 0.0))  # disc >= 0 whenever qa > 0 (r = a/b is inside)
        # numerically stable pair of roots of qa x^2 - 2 qb x + qc
        if qb >= 0.0:
            s = qb + root
            lo, hi = (qc / s, s / qa) if s != 0.0 else (0.0, 0.0)
        else:
            s = qb - root
            lo, hi = s / qa, qc / s
        lo, hi = min(lo, hi), max(lo, hi)
        return RatioInterval(lo=lo, hi=hi, kind="bounded", **common)
    if qa < 0.0 and disc > 0.0:
        root = math.sqrt(disc)
        x1, x2 = sorted(((qb - root) / qa, (qb + root) / qa))
        return RatioInterval(lo=-math.inf, hi=math.inf, kind="exclusive", excluded=(x1, x2),
                             **common)
    return RatioInterval(lo=-math.inf, hi=math.inf, kind="unbounded", **common)


@dataclass(frozen=True)
class CommonTypeB:
    """Systematic (type-B) standard uncertainties of the morph and base mean C_P.

    See the module docstring for what cancels in the ratio.  All values are standard
    uncertainties; ``*_cp`` values are in C_P units (dimensionless), ``rel_*`` fractions.

    * ``rel_u_shaft``: relative scale error of the gross shaft power (torque and speed
      calibration), common to both modes.
    * ``actuator_cp``: mean actuator electrical power of the morph mode in C_P units (>= 0),
      the amount subtracted from gross shaft C_P to get net C_P.
    * ``rel_u_actuator``: relative scale error of the actuator power measurement.
    * ``u_offset_cp``: additive error common to both mode means (e.g. torque zero offset
      times speed over the available power).
    * ``u_morph_only_cp`` / ``u_base_only_cp``: independent errors of one mode only.
    """

    rel_u_shaft: float = 0.0
    actuator_cp: float = 0.0
    rel_u_actuator: float = 0.0
    u_offset_cp: float = 0.0
    u_morph_only_cp: float = 0.0
    u_base_only_cp: float = 0.0

    def __post_init__(self) -> None:
        for key in ("rel_u_shaft", "actuator_cp", "rel_u_actuator", "u_offset_cp",
                    "u_morph_only_cp", "u_base_only_cp"):
            _real("CommonTypeB", key, getattr(self, key), lo=0.0)

    def covariance(self, a: float, b: float) -> tuple[float, float, float]:
        """(v_aa, v_bb, v_ab) added to the type-A covariance of the means a (net morph
        C_P) and b (base C_P): errors a' = a + (a + P_a) e_s - P_a e_A + o + e_m,
        b' = b + b e_s + o + e_b, linearised."""
        gross = a + self.actuator_cp
        us2 = self.rel_u_shaft ** 2
        uo2 = self.u_offset_cp ** 2
        v_aa = (gross * gross * us2 + (self.actuator_cp * self.rel_u_actuator) ** 2 + uo2
                + self.u_morph_only_cp ** 2)
        v_bb = b * b * us2 + uo2 + self.u_base_only_cp ** 2
        v_ab = gross * b * us2 + uo2
        return v_aa, v_bb, v_ab


@dataclass(frozen=True)
class GainResult:
    """Net gain G = a/b - 1 of morphing over fixed blades with its confidence interval.

    ``lo``/``hi`` bound G (infinite when the Fieller set is not a finite interval, see
    ``kind``), ``g`` is Fieller's t**2 v_bb / b**2, ``dof`` the (effective) degrees of
    freedom, ``verdict`` "gain" (lo > 0), "loss" (hi < 0) or "no detectable gain".
    ``morph_mean``/``base_mean`` are the mean C_P of the two modes, ``n_pairs`` the number
    of interleaved blocks, ``level`` the coverage probability.
    """

    gain: float
    lo: float
    hi: float
    method: str
    dof: float
    g: float
    verdict: str
    kind: str
    morph_mean: float
    base_mean: float
    n_pairs: int
    level: float


def paired_gain(morph_blocks: Sequence[float] | np.ndarray,
                base_blocks: Sequence[float] | np.ndarray, level: float = 0.95,
                method: str = "fieller", type_b: CommonTypeB | None = None) -> GainResult:
    """Net gain of morphing over fixed blades from interleaved A/B blocks.

    ``morph_blocks[j]`` and ``base_blocks[j]`` are the mean net C_P of the j-th morph block
    and of the base block interleaved with it (e.g. each a batch mean over whole
    revolutions).  With n pairs: a, b = block means; v_aa = s_a**2/n, v_bb = s_b**2/n,
    v_ab = s_ab/n (the covariance estimates the common drift the pairing cancels), n - 1
    degrees of freedom.  ``type_b`` adds systematic terms (infinite dof; the effective dof
    follow from Welch-Satterthwaite on the delta-method variance).  ``method`` is
    "fieller" (default) or "delta".  The base mean must be positive.
    """
    ma = _vector("paired_gain", "morph_blocks", morph_blocks, min_len=2)
    ba = _vector("paired_gain", "base_blocks", base_blocks, min_len=2)
    if ma.size != ba.size:
        raise _bad("paired_gain", "base_blocks", base_blocks,
                   f"{ma.size} values, one per morph block (interleaved pairs)")
    if method not in ("fieller", "delta"):
        raise _bad("paired_gain", "method", method, "'fieller' or 'delta'")
    p = _level("paired_gain", level)
    n = ma.size
    a = float(ma.mean())
    b = float(ba.mean())
    if b <= 0.0:
        raise _bad("paired_gain", "base_blocks", b,
                   "a positive mean base C_P (a relative gain needs a producing baseline)")
    cov = np.cov(np.vstack([ma, ba]), ddof=1) / n
    v_aa, v_bb, v_ab = float(cov[0, 0]), float(cov[1, 1]), float(cov[0, 1])
    dof: float = float(n - 1)
    if type_b is not None:
        if not isinstance(type_b, CommonTypeB):
            raise _bad("paired_gain", "type_b", type_b, "a CommonTypeB or None")
        r = a / b
        var_a = (v_aa - 2.0 * r * v_ab + r * r * v_bb) / (b * b)
        tb_aa, tb_bb, tb_ab = type_b.covariance(a, b)
        var_b = (tb_aa - 2.0 * r * tb_ab + r * r * tb_bb) / (b * b)
        if var_b > 0.0:
            dof = math.inf if var_a <= 0.0 else dof * ((var_a + var_b) / var_a) ** 2
        v_aa, v_bb, v_ab = v_aa + tb_aa, v_bb + tb_bb, v_ab + tb_ab
    fn = ratio_fieller if method == "fieller" else ratio_delta
    ri = fn(a, b, v_aa, v_bb, v_ab, dof, p)
    lo, hi = ri.lo - 1.0, ri.hi - 1.0
    verdict = "gain" if lo > 0.0 else ("loss" if hi < 0.0 else "no detectable gain")
    if ri.kind != "bounded":
        log.info("paired_gain: Fieller set is %s (g = %.3f >= 1): gain not bounded",
                 ri.kind, ri.g)
    return GainResult(gain=ri.ratio - 1.0, lo=lo, hi=hi, method=ri.method, dof=dof, g=ri.g,
                      verdict=verdict, kind=ri.kind, morph_mean=a, base_mean=b, n_pairs=n,
                      level=p)
