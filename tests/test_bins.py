"""Checks of the method of bins over TSR (flapctl.analysis.bins)."""
from __future__ import annotations

import math

import numpy as np
import pytest

from flapctl.analysis.bins import bin_by
from flapctl.errors import ProfileError


def test_hand_built_example() -> None:
    # Hand-built (common practice, no source): width 0.1, centres at multiples of 0.1.
    # TSR 1.02, 1.04 -> bin 1.0 [0.95, 1.05); 1.08, 1.12, 1.14 -> bin 1.1; none in 1.2;
    # 1.31 -> bin 1.3.
    x = [1.02, 1.04, 1.08, 1.12, 1.14, 1.31]
    y = [0.10, 0.14, 0.20, 0.22, 0.24, 0.30]
    bins = bin_by(x, y, 0.1, min_count=2)
    assert [round(b.center, 10) for b in bins] == [1.0, 1.1, 1.2, 1.3]
    assert [b.n for b in bins] == [2, 3, 0, 1]
    assert [b.complete for b in bins] == [True, True, False, False]
    b0, b1, b2, b3 = bins
    assert b0.lo == pytest.approx(0.95) and b0.hi == pytest.approx(1.05)
    assert b0.mean == pytest.approx(0.12) and b0.x_mean == pytest.approx(1.03)
    assert b0.std == pytest.approx(math.sqrt(0.0008))      # deviations +/-0.02, n - 1 = 1
    assert b0.se == pytest.approx(math.sqrt(0.0008) / math.sqrt(2))
    assert b1.mean == pytest.approx(0.22) and b1.std == pytest.approx(0.02)
    assert math.isnan(b2.mean) and math.isnan(b2.std) and math.isnan(b2.se)
    assert b3.mean == pytest.approx(0.30) and math.isnan(b3.std)


def test_counts_match_numpy_histogram() -> None:
    # reference library: numpy.histogram on the same edges
    rng = np.random.default_rng(8)
    x = rng.uniform(0.7, 3.4, 5000)
    y = 0.3 - 0.05 * (x - 2.2) ** 2 + rng.normal(0, 0.01, x.size)
    for width in (0.1, 0.15, 0.2):
        bins = bin_by(x, y, width)
        edges = np.array([b.lo for b in bins] + [bins[-1].hi])
        counts, _ = np.histogram(x, bins=edges)
        assert [b.n for b in bins] == counts.tolist()
        assert sum(b.n for b in bins) == x.size
        # per-bin statistics equal numpy's on the same selection
        for b in bins[::5]:
            sel = (x >= b.lo) & (x < b.hi)
            assert b.mean == pytest.approx(y[sel].mean(), rel=1e-12)
            assert b.std == pytest.approx(y[sel].std(ddof=1), rel=1e-12)


def test_bins_are_centred_and_left_closed() -> None:
    # width 0.5 makes every edge exact in binary: 1.25 belongs to the bin centred on 1.5
    bins = bin_by([1.0, 1.25, 1.74], [1.0, 2.0, 3.0], 0.5, min_count=1)
    assert [(b.center, b.lo, b.hi, b.n) for b in bins] == [(1.0, 0.75, 1.25, 1),
                                                          (1.5, 1.25, 1.75, 2)]


def test_start_sets_first_centre_and_drops_samples_below() -> None:
    bins = bin_by([1.0, 1.5, 2.05, 2.25], [1.0, 2.0, 3.0, 4.0], 0.2, start=2.0)
    assert bins[0].center == pytest.approx(2.0) and bins[0].lo == pytest.approx(1.9)
    assert [b.n for b in bins] == [1, 1]
    assert bins[1].center == pytest.approx(2.2)
    assert all(not b.complete for b in bins)  # default min_count = 20


def test_bad_input_names_the_field() -> None:
    with pytest.raises(ProfileError, match="width"):
        bin_by([1.0], [1.0], 0.0)
    with pytest.raises(ProfileError, match="y"):
        bin_by([1.0, 2.0], [1.0], 0.1)
    with pytest.raises(ProfileError, match="x"):
        bin_by([1.0, float("inf")], [1.0, 2.0], 0.1)
    with pytest.raises(ProfileError, match="min_count"):
        bin_by([1.0], [1.0], 0.1, min_count=0)
    with pytest.raises(ProfileError, match="start"):
        bin_by([1.0], [1.0], 0.1, start=5.0)
