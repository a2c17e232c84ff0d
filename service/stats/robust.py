"""Robust location and scale: limits learned from a short history of a statistic.

Functions
---------
median_abs_deviation
    Median absolute deviation, optionally scaled to estimate a normal standard deviation.
robust_scale
    The scale used for robust z-scores: scaled MAD, falling back to the scaled mean absolute
    deviation when more than half the values are equal.
robust_z
    Robust (modified) z-score of one value against a history.
hampel_limit
    The Hampel identifier's bound: median plus or minus ``k`` robust standard deviations.
quantile_limit
    An empirical quantile of the history.

References
----------
1. Hampel, F. R. (1974). The influence curve and its role in robust estimation. Journal of the
   American Statistical Association 69(346), 383–393. (The median absolute deviation as a
   robust scale; the identifier that flags values more than ``k`` MADs from the median.)
2. Iglewicz, B. and Hoaglin, D. C. (1993). How to Detect and Handle Outliers. ASQC Quality
   Press. (The modified z-score ``0.6745 (x - median) / MAD`` and the cut-off 3.5.)
3. Rousseeuw, P. J. and Croux, C. (1993). Alternatives to the median absolute deviation. Journal
   of the American Statistical Association 88(424), 1273–1283. (The consistency constant
   ``1 / Phi^-1(3/4) = 1.4826`` that makes the MAD estimate a normal standard deviation.)
4. Geary, R. C. (1935). The ratio of the mean deviation to the standard deviation as a test of
   normality. Biometrika 27(3/4), 310–332. (For a normal variable the mean absolute deviation
   is ``sigma * sqrt(2 / pi)``, so ``sqrt(pi / 2) = 1.2533`` rescales it to ``sigma``.)
5. Hyndman, R. J. and Fan, Y. (1996). Sample quantiles in statistical packages. The American
   Statistician 50(4), 361–365. (Definition 7, numpy's default ``linear`` method.)
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from scipy import special

from service.stats.validation import finite_1d

#: ``1 / Phi^-1(3/4)``: scales the MAD to a normal standard deviation [3].
MAD_TO_SIGMA = float(1.0 / (math.sqrt(2.0) * special.erfinv(0.5)))
#: ``sqrt(pi / 2)``: scales the mean absolute deviation to a normal standard deviation [4].
MEANAD_TO_SIGMA = math.sqrt(math.pi / 2.0)

Side = Literal["upper", "lower"]


@dataclass(frozen=True)
class RobustScale:
    """Median and robust scale of a history.

    ``source`` says which estimate gave ``scale``: ``"mad"`` (scaled MAD), ``"meanad"`` (scaled
    mean absolute deviation, used when the MAD is zero) or ``"none"`` (every value equal: the
    scale is zero).
    """

    median: float
    scale: float
    mad: float
    n: int
    source: Literal["mad", "meanad", "none"]


@dataclass(frozen=True)
class RobustZ:
    """A robust z-score with the location and scale it was computed from.

    ``z`` is infinite (signed) when the history has no spread and the value differs from it.
    """

    z: float
    median: float
    scale: float
    n: int
    source: Literal["mad", "meanad", "none"]


def median_abs_deviation(values: object, *, scale: Literal["normal"] | float = 1.0) -> float:
    """Median absolute deviation from the median.

    Parameters
    ----------
    values : array_like
        Finite values, at least one.
    scale : "normal" or float, default 1.0
        The raw MAD is divided by *scale*; ``"normal"`` divides by ``Phi^-1(3/4) = 0.6745``
        so the result estimates the standard deviation of a normal distribution [3]. Same
        convention as ``scipy.stats.median_abs_deviation``.

    Returns
    -------
    float
        ``median(|x - median(x)|) / scale``.

    Examples
    --------
    >>> median_abs_deviation([1, 2, 3, 4, 100])
    1.0
    """
    x = finite_1d(values, "values")
    if scale == "normal":
        divisor = 1.0 / MAD_TO_SIGMA
    elif isinstance(scale, (int, float)) and not isinstance(scale, bool) and scale > 0:
        divisor = float(scale)
    else:
        raise ValueError(f"scale must be 'normal' or a positive number, got {scale!r}")
    return float(np.median(np.abs(x - np.median(x))) / divisor)


def robust_scale(values: object) -> RobustScale:
    """Median and a robust standard deviation of *values* [1, 2, 3, 4].

    Parameters
    ----------
    values : array_like
        Finite values, at least three.

    Returns
    -------
    RobustScale
        ``scale`` is ``1.4826 * MAD``; when the MAD is zero (more than half the values are
        equal) it falls back to ``1.2533 * mean(|x - median|)`` as Iglewicz and Hoaglin
        suggest [2]; when that is zero too every value is equal and the scale is 0.

    Notes
    -----
    Both scales estimate the standard deviation when the history is normal; the MAD ignores up
    to half the values being outliers, which is why a few bad snapshots that slipped through do
    not widen a learned limit.
    """
    x = finite_1d(values, "values", min_size=3)
    median = float(np.median(x))
    deviations = np.abs(x - median)
    mad = float(np.median(deviations))
    if mad > 0:
        return RobustScale(median, MAD_TO_SIGMA * mad, mad, x.size, "mad")
    mean_ad = float(np.mean(deviations))
    if mean_ad > 0:
        return RobustScale(median, MEANAD_TO_SIGMA * mean_ad, mad, x.size, "meanad")
    return RobustScale(median, 0.0, mad, x.size, "none")


def robust_z(value: float, history: object) -> RobustZ:
    """Robust z-score of *value* against *history*: ``(value - median) / robust scale`` [2].

    Parameters
    ----------
    value : float
        The value judged (finite).
    history : array_like
        Earlier values, at least three, finite.

    Returns
    -------
    RobustZ
        With the scale of :func:`robust_scale`, ``z`` equals the modified z-score
        ``0.6745 (value - median) / MAD`` of [2] whenever the MAD is positive.

    Examples
    --------
    >>> round(robust_z(10.0, [1.0, 2.0, 3.0, 4.0, 5.0]).z, 3)
    3.372
    """
    if not math.isfinite(float(value)):
        raise ValueError(f"value must be finite, got {value!r}")
    spread = robust_scale(history)
    difference = float(value) - spread.median
    if spread.scale > 0:
        z = difference / spread.scale
    else:
        z = 0.0 if difference == 0 else math.copysign(math.inf, difference)
    return RobustZ(z, spread.median, spread.scale, spread.n, spread.source)


def hampel_limit(history: object, *, k: float, side: Side = "upper") -> float:
    """The Hampel identifier's bound on *history*: ``median + k * scale`` (upper side) or
    ``median - k * scale`` (lower side) [1].

    Parameters
    ----------
    history : array_like
        Earlier values, at least three, finite.
    k : float
        Number of robust standard deviations, positive. 3.5 follows [2]; 3 is Hampel's [1].
    side : {"upper", "lower"}, default "upper"
        Which tail is flagged.

    Returns
    -------
    float
        The bound. A value beyond it (above for ``upper``, below for ``lower``) is flagged.
    """
    if not (isinstance(k, (int, float)) and math.isfinite(k) and k > 0):
        raise ValueError(f"k must be a positive number, got {k!r}")
    if side not in ("upper", "lower"):
        raise ValueError(f"side must be 'upper' or 'lower', got {side!r}")
    spread = robust_scale(history)
    sign = 1.0 if side == "upper" else -1.0
    return spread.median + sign * k * spread.scale


def quantile_limit(history: object, *, q: float, side: Side = "upper") -> float:
    """Empirical quantile of *history*: level *q* (upper side) or ``1 - q`` (lower side).

    Parameters
    ----------
    history : array_like
        Earlier values, at least one, finite.
    q : float
        Level in [0.5, 1]. Linear interpolation between order statistics (definition 7 of
        [5]); level 1 returns the largest value.
    side : {"upper", "lower"}, default "upper"

    Returns
    -------
    float
        The quantile.

    Notes
    -----
    With n values the empirical quantile cannot exceed the largest one, so a level of 0.99
    needs about 100 values to mean what it says; with fewer it is close to the maximum.
    """
    if not (isinstance(q, (int, float)) and 0.5 <= q <= 1.0):
        raise ValueError(f"q must be a number in [0.5, 1], got {q!r}")
    if side not in ("upper", "lower"):
        raise ValueError(f"side must be 'upper' or 'lower', got {side!r}")
    x = finite_1d(history, "history")
    level = q if side == "upper" else 1.0 - q
    return float(np.quantile(x, level))
