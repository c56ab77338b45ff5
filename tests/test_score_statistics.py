"""Mean and Student-t confidence interval of a metric over realizations."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from simbench.score import mean_confidence_interval


def test_three_values_closed_form():
    est = mean_confidence_interval([1.0, 2.0, 3.0])
    # mean 2, s = 1, t_{0.975, 2} = 4.302653 (Student-t tables), half width t s / sqrt(3)
    assert est.mean == 2.0 and est.std == pytest.approx(1.0) and est.n == 3
    assert est.high - est.mean == pytest.approx(4.302653 / math.sqrt(3), rel=1e-6)
    assert est.mean - est.low == pytest.approx(4.302653 / math.sqrt(3), rel=1e-6)


@pytest.mark.parametrize("level", [0.9, 0.95, 0.99])
def test_agrees_with_scipy_t_interval(level):
    values = np.random.default_rng(31).normal(3.0, 0.7, 12)
    est = mean_confidence_interval(values, level)
    # scipy.stats.t.interval (reference library)
    low, high = stats.t.interval(level, values.size - 1, loc=values.mean(),
                                 scale=stats.sem(values))
    assert (est.low, est.high) == pytest.approx((low, high), rel=1e-12)
    assert est.level == level


def test_coverage_of_the_95_percent_interval():
    rng = np.random.default_rng(32)
    samples = rng.normal(5.0, 2.0, (4000, 5))
    hits = 0
    for row in samples:
        est = mean_confidence_interval(row)
        hits += est.low <= 5.0 <= est.high
    # a 95 % interval covers the true mean in 95 % of repeats (definition); binomial
    # standard error sqrt(0.95 0.05 / 4000) = 0.34 %, so within 1.5 %
    assert hits / 4000 == pytest.approx(0.95, abs=0.015)


def test_one_value_has_no_interval_and_equal_values_a_zero_width_one():
    one = mean_confidence_interval([4.0])
    assert one.mean == 4.0 and math.isnan(one.low) and math.isnan(one.high)
    same = mean_confidence_interval([4.0, 4.0, 4.0])
    assert (same.low, same.high) == (4.0, 4.0)
    assert same.as_dict()["n"] == 3


def test_jackknife_of_the_mean_is_the_student_interval():
    from simbench.score.statistics import jackknife_interval

    values = np.random.default_rng(33).normal(2.0, 0.5, 9)
    loo = [np.delete(values, i).mean() for i in range(values.size)]
    # for the sample mean the jackknife standard error equals s / sqrt(n) exactly (Efron &
    # Tibshirani 1993, An Introduction to the Bootstrap, section 11.2)
    jack = jackknife_interval(values.mean(), loo)
    student = mean_confidence_interval(values)
    assert (jack.low, jack.high, jack.std) == pytest.approx(
        (student.low, student.high, student.std), rel=1e-12)


def test_jackknife_of_a_pooled_standard_deviation_covers_the_truth():
    from simbench.score.statistics import jackknife_interval

    rng = np.random.default_rng(34)
    hits, repeats = 0, 1000
    for _ in range(repeats):
        data = rng.normal(0.0, 3.0, (6, 400))  # 6 realizations of 400 pixels each
        pooled = lambda d: float(np.sqrt(np.mean(d.var(axis=1, ddof=1))))  # noqa: E731
        est = jackknife_interval(pooled(data), [pooled(np.delete(data, i, axis=0))
                                                for i in range(6)])
        hits += est.low <= 3.0 <= est.high
    # a 95 % interval; the jackknife is approximate for a nonlinear statistic, so its coverage
    # is checked loosely: binomial standard error 0.7 % at 1000 repeats, allow +-4 %
    assert hits / repeats == pytest.approx(0.95, abs=0.04)
