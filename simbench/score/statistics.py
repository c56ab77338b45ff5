"""Statistics over noise realizations: the mean of a metric and its confidence interval."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from simbench.score import checks

#: the default confidence level
LEVEL = 0.95


@dataclass(frozen=True)
class Estimate:
    """The mean of a metric over realizations with its confidence interval.

    Attributes
    ----------
    mean : float
    low, high : float
        The interval's ends (NaN with a single value: one realization gives no interval).
    std : float
        Sample standard deviation of the values (``ddof = 1``; NaN with a single value).
    n : int
        Number of values.
    level : float
        Confidence level, e.g. 0.95.
    """

    mean: float
    low: float
    high: float
    std: float
    n: int
    level: float

    def as_dict(self) -> dict:
        """The fields as a plain dict (for JSON)."""
        return {"mean": self.mean, "low": self.low, "high": self.high, "std": self.std,
                "n": self.n, "level": self.level}


def mean_confidence_interval(values, level: float = LEVEL) -> Estimate:
    """Mean of a scalar metric over realizations, with a Student-t confidence interval.

    Parameters
    ----------
    values : sequence of float (n,)
        The metric's value for each of n independent realizations (finite).
    level : float
        Confidence level, ``0 < level < 1`` (default 0.95).

    Returns
    -------
    Estimate

    Notes
    -----
    ``mean +- t_{(1+level)/2, n-1} s / sqrt(n)`` with s the sample standard deviation
    (``ddof = 1``) and t the Student-t quantile with n - 1 degrees of freedom
    (``scipy.stats.t.ppf``). It assumes the values are independent and roughly normal; it
    covers the mean over realizations, not a single realization's value.

    References
    ----------
    "Student" (W. S. Gosset), "The probable error of a mean", Biometrika 6(1), 1-25 (1908).

    Examples
    --------
    >>> round(mean_confidence_interval([1.0, 2.0, 3.0]).high, 4)
    4.4841
    """
    function = "mean_confidence_interval"
    data = checks.real_array(values, function, "values", ndims=(1,))
    level = checks.positive(level, function, "level")
    if not level < 1:
        raise checks.fail(function, "level", f"got {level}", "0 < level < 1, e.g. 0.95")
    n = int(data.size)
    mean = float(data.mean())
    if n == 1:
        return Estimate(mean, math.nan, math.nan, math.nan, 1, level)
    std = float(np.std(data, ddof=1))
    half = float(stats.t.ppf(0.5 + level / 2.0, n - 1)) * std / math.sqrt(n)
    return Estimate(mean, mean - half, mean + half, std, n, level)
