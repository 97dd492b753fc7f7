"""Method of bins over tip-speed ratio.

In the spirit of the method of bins of IEC TS 62600-200 (bins on flow speed there; here on
TSR, width 0.1-0.2, as is usual for lab rotors).  Bins are centred on ``start + i*width``
and cover [center - width/2, center + width/2) (left-closed, right-open).  By default the
centres are integer multiples of ``width`` (TSR 1.0, 1.1, 1.2 ... for width 0.1).

Feed per-revolution values: the standard error of a bin (std/sqrt(n)) assumes independent
samples; use :mod:`flapctl.analysis.stats` batch means when revolutions are correlated.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from flapctl.errors import ProfileError

__all__ = ["Bin", "bin_by", "DEFAULT_WIDTH", "DEFAULT_MIN_COUNT"]

_SOURCE = "flapctl.analysis.bins.bin_by"
#: Default TSR bin width (lab practice 0.1-0.2; common practice, no source).
DEFAULT_WIDTH = 0.1
#: Samples (revolutions) a bin needs to count as complete (>= 20-50 revolutions per point
#: is lab practice; common practice, no source).
DEFAULT_MIN_COUNT = 20


@dataclass(frozen=True)
class Bin:
    """One bin: x range [lo, hi) around ``center``; statistics of y over the n samples.

    ``mean``/``std`` (ddof = 1)/``se`` = std/sqrt(n) are in y's unit; NaN when n is too
    small (mean needs 1 sample, std and se 2).  ``x_mean`` is the mean x in the bin.
    ``complete`` is n >= the ``min_count`` given to :func:`bin_by`.
    """

    center: float
    lo: float
    hi: float
    n: int
    mean: float
    std: float
    se: float
    x_mean: float
    complete: bool


def _bad(key: str, value: object, expected: str) -> ProfileError:
    return ProfileError(_SOURCE, key, value, expected)


def _vector(key: str, values: object) -> np.ndarray:
    try:
        arr = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise _bad(key, values, "a 1-D sequence of real numbers") from None
    if arr.ndim != 1 or arr.size == 0:
        raise _bad(key, values, "a non-empty 1-D sequence of numbers")
    if not np.all(np.isfinite(arr)):
        raise _bad(key, values, "finite numbers only (no NaN or inf)")
    return arr


def _edges(x: np.ndarray, width: float, start: float | None) -> tuple[float, np.ndarray]:
    if start is None:
        c0 = width * math.floor(float(x.min()) / width + 0.5)
        if c0 - 0.5 * width > float(x.min()):
            c0 -= width
    else:
        c0 = start
    e0 = c0 - 0.5 * width
    xmax = float(x.max())
    k = max(1, int(math.floor((xmax - e0) / width)) + 1)
    # floating point may leave xmax on or beyond the last edge: add bins (at most a few)
    for _ in range(4):
        if e0 + k * width > xmax:
            break
        k += 1
    return c0, e0 + width * np.arange(k + 1)


def bin_by(x: Sequence[float] | np.ndarray, y: Sequence[float] | np.ndarray,
           width: float = DEFAULT_WIDTH, start: float | None = None,
           min_count: int = DEFAULT_MIN_COUNT) -> list[Bin]:
    """Bin ``y`` by ``x`` (e.g. C_P by TSR) into centred bins of ``width``.

    ``start`` is the centre of the first bin (default: the multiple of ``width`` nearest
    below min(x)); samples with x below the first bin's lower edge are left out.  Every bin
    from the first to the one holding max(x) is returned, empty ones included (n = 0).
    """
    xa = _vector("x", x)
    ya = _vector("y", y)
    if xa.size != ya.size:
        raise _bad("y", y, f"{xa.size} values, one per x value")
    try:
        w = float(width)
    except (TypeError, ValueError):
        raise _bad("width", width, "a bin width > 0") from None
    if not math.isfinite(w) or w <= 0.0:
        raise _bad("width", width, "a finite bin width > 0")
    if start is not None:
        try:
            s = float(start)
        except (TypeError, ValueError):
            raise _bad("start", start, "a bin centre (number) or None") from None
        if not math.isfinite(s):
            raise _bad("start", start, "a finite bin centre or None")
        if s - 0.5 * w > float(xa.max()):
            raise _bad("start", start, f"a first bin centre <= max(x) + width/2 = "
                       f"{float(xa.max()) + 0.5 * w:g}")
        start = s
    if isinstance(min_count, bool) or not isinstance(min_count, (int, np.integer)) \
            or min_count < 1:
        raise _bad("min_count", min_count, "a positive integer")
    c0, edges = _edges(xa, w, start)
    idx = np.searchsorted(edges, xa, side="right") - 1
    inside = (idx >= 0) & (idx < edges.size - 1)
    bins = []
    for i in range(edges.size - 1):
        sel = inside & (idx == i)
        n = int(sel.sum())
        yy = ya[sel]
        mean = float(yy.mean()) if n else math.nan
        std = float(yy.std(ddof=1)) if n >= 2 else math.nan
        bins.append(Bin(center=c0 + i * w, lo=float(edges[i]), hi=float(edges[i + 1]), n=n,
                        mean=mean, std=std, se=std / math.sqrt(n) if n >= 2 else math.nan,
                        x_mean=float(xa[sel].mean()) if n else math.nan,
                        complete=n >= min_count))
    return bins
