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


def jackknife_interval(full: float, leave_one_out, level: float = LEVEL) -> Estimate:
    """Interval of a statistic pooled over n realizations, from its leave-one-out values.

    Parameters
    ----------
    full : float
        The statistic computed from all n realizations (the estimate reported).
    leave_one_out : sequence of float (n,)
        The statistic recomputed n times, each time without one realization.
    level : float
        Confidence level (default 0.95).

    Returns
    -------
    Estimate
        ``mean`` is ``full``; ``low``/``high`` are ``full -+ t_{(1+level)/2, n-1} SE``; ``std``
        is ``SE sqrt(n)``, so that ``std / sqrt(n)`` is the standard error as for a mean
        (what ``simbench check`` uses); ``n`` is the number of realizations.

    Notes
    -----
    The jackknife standard error ``SE = sqrt((n - 1)/n sum_i (theta_(i) - theta_(.))^2)``,
    with ``theta_(.)`` the mean of the leave-one-out values. For the sample mean it equals
    ``s / sqrt(n)`` exactly. It serves statistics that are not means of per-realization values:
    the noise of a pooled noise power spectrum, the TTF of the mean image, d'.

    References
    ----------
    B. Efron and R. J. Tibshirani, *An Introduction to the Bootstrap*, Chapman & Hall (1993),
    chapter 11 (the jackknife estimate of standard error, eq. 11.5).

    Examples
    --------
    >>> e = jackknife_interval(2.0, [2.5, 2.0, 1.5])   # the mean of [1, 2, 3]
    >>> round(e.std, 12), round(e.high, 4)
    (1.0, 4.4841)
    """
    function = "jackknife_interval"
    data = checks.real_array(leave_one_out, function, "leave_one_out", ndims=(1,))
    n = int(data.size)
    if n < 2:
        raise checks.fail(function, "leave_one_out", f"got {n} value(s)", "at least 2")
    full = float(full)
    se = math.sqrt((n - 1) / n * float(np.sum((data - data.mean()) ** 2)))
    half = float(stats.t.ppf(0.5 + level / 2.0, n - 1)) * se
    return Estimate(full, full - half, full + half, se * math.sqrt(n), n, level)
