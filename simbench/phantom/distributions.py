"""Distributions of the phantom language's ``random`` section: read once, drawn per sample.

A drawn value is written either as a plain value (it is then fixed) or as a mapping with one
distribution key::

    radius: 8 mm                                   # fixed
    radius: {uniform: [4 mm, 12 mm]}               # uniform on [low, high]
    radius: {log_uniform: [1 mm, 20 mm]}           # log(value) uniform; low > 0
    radius: {normal: [8 mm, 2 mm], within: [4 mm, 12 mm]}   # normal(mean, sd) cut to a range
    count: {integers: [2, 6]}                      # whole numbers low..high, both included
    material: {choice: [muscle, adipose], weights: [3, 1]}  # one of a list (weights optional)

Every number of a distribution is read with the parser of the field it stands for, so its
unit and its range are checked where it is written; because every distribution stays inside
``[low, high]`` (or among its listed choices), every drawn value is valid once the bounds are.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from simbench.errors import InputError, Where
from simbench.spec import Section, check_number

NUMERIC_KINDS = ("uniform", "log_uniform", "normal", "choice")
KINDS = NUMERIC_KINDS + ("integers",)
#: Largest number of listed choices (a choice is a hand-written list).
MAX_CHOICES = 1000
DRAW_VALID = ("a fixed value, or one of {uniform: [low, high]}, {log_uniform: [low, high]}, "
              "{normal: [mean, sd], within: [low, high]}, {choice: [a, b, ...], weights: [...]}")


@dataclass(frozen=True, eq=False)
class Draw:
    """One drawn value: a fixed value or a distribution, its numbers already in inside units.

    Attributes
    ----------
    kind : str
        ``"fixed"``, ``"uniform"``, ``"log_uniform"``, ``"normal"``, ``"choice"`` or
        ``"integers"``.
    values : tuple
        fixed: (value,); uniform, log_uniform, integers: (low, high); normal: (mean, sd, low,
        high); choice: the options.
    weights : tuple or None
        Choice probabilities (normalised to a sum of 1), None for equal weights.
    where : Where
        Place of the value in the file.
    """

    kind: str
    values: tuple
    weights: tuple | None
    where: Where

    @property
    def low(self) -> Any:
        """The smallest value this draw can give (numeric draws)."""
        if self.kind in ("fixed", "choice"):
            return min(self.values)
        return self.values[-2] if self.kind == "normal" else self.values[0]

    @property
    def high(self) -> Any:
        """The largest value this draw can give (numeric draws)."""
        if self.kind in ("fixed", "choice"):
            return max(self.values)
        return self.values[-1]

    @property
    def options(self) -> tuple:
        """Every value a fixed or choice draw can give."""
        return self.values if self.kind in ("fixed", "choice") else ()

    def draw(self, rng: np.random.Generator) -> Any:
        """One value from ``rng`` (a fixed value draws nothing from the stream).

        Notes
        -----
        The truncated normal is drawn by inverting its distribution function,
        ``scipy.stats.truncnorm.ppf`` at one uniform number, so that every draw costs exactly
        one number of the stream (Devroye, *Non-Uniform Random Variate Generation*, 1986,
        section II.2).
        """
        kind, v = self.kind, self.values
        if kind == "fixed":
            return v[0]
        if kind == "uniform":
            return float(v[0] + (v[1] - v[0]) * rng.random())
        if kind == "log_uniform":
            return float(math.exp(math.log(v[0]) + (math.log(v[1]) - math.log(v[0])) * rng.random()))
        if kind == "integers":
            return int(rng.integers(v[0], v[1] + 1))
        if kind == "normal":
            from scipy.stats import truncnorm

            mean, sd, low, high = v
            u = rng.random()
            value = float(truncnorm.ppf(u, (low - mean) / sd, (high - mean) / sd, loc=mean,
                                        scale=sd))
            return min(max(value, low), high)  # the inverse may round a hair outside
        index = int(rng.choice(len(v), p=self.weights)) if self.weights else int(
            rng.integers(len(v)))
        return v[index]

    def describe(self) -> str:
        """The draw in words, for messages."""
        if self.kind == "fixed":
            return f"{self.values[0]}"
        return f"{self.kind} {list(self.values)}"


def read_draw(value: Any, where: Where, parse_item: Callable[[Any, Where], Any], *,
              integer: bool = False, text: bool = False) -> Draw:
    """Read one drawn value.

    Parameters
    ----------
    value : any
        The value as written: a plain value or a one-distribution mapping.
    where : Where
        Its place.
    parse_item : callable (value, where) -> parsed value
        The parser of the field (units, range); applied to every number or option.
    integer : bool
        Whole numbers (``integers`` allowed; ``uniform``, ``log_uniform``, ``normal`` not).
    text : bool
        Text options (only a fixed value or ``choice``).

    Raises
    ------
    InputError
        An unknown distribution, a wrong number of parameters, low above high, a parameter
        outside the field's range or with a wrong unit, bad weights.
    """
    kinds = ("choice",) if text else (("integers", "choice") if integer else NUMERIC_KINDS)
    valid = ("a fixed value or {choice: [a, b, ...], weights: [...]}" if text else
             "a fixed whole number, or {integers: [low, high]} or {choice: [a, b, ...]}"
             if integer else DRAW_VALID)
    if not isinstance(value, dict):
        if isinstance(value, list):
            raise InputError(where, "expected one value or a distribution, got a list", valid)
        return Draw("fixed", (parse_item(value, where),), None, where)
    s = Section(value, where)
    named = [k for k in value if k in KINDS]
    if len(named) != 1:
        unknown = [k for k in value if k not in KINDS + ("within", "weights")]
        problem = (f"unknown distribution '{unknown[0]}'" if unknown else
                   "no distribution given" if not named else
                   "more than one distribution: " + ", ".join(named))
        raise InputError(where, problem, valid)
    kind = named[0]
    if kind not in kinds:
        raise s.error(kind, f"a {kind} distribution cannot be used here", valid)
    s.check_keys((kind,) + (("within",) if kind == "normal" else ())
                 + (("weights",) if kind == "choice" else ()),
                 required=("within",) if kind == "normal" else ())
    items = s.sequence(kind)
    if kind == "choice":
        if not items or len(items) > MAX_CHOICES:
            raise s.error(kind, f"{len(items)} choices", f"1 to {MAX_CHOICES} choices")
        options = tuple(parse_item(item, at) for item, at in items)
        weights = None
        if s.has("weights"):
            listed = s.sequence("weights")
            if len(listed) != len(options):
                raise s.error("weights", f"{len(listed)} weights for {len(options)} choices",
                              "one weight per choice")
            numbers = [check_number(item, at, minimum=0.0, maximum=1e12) for item, at in listed]
            total = math.fsum(numbers)
            if total <= 0.0:
                raise s.error("weights", "the weights sum to 0", "weights >= 0, not all 0")
            weights = tuple(w / total for w in numbers)
        return Draw("choice", options, weights, where)
    expected = 2
    if len(items) != expected:
        names = "[mean, sd]" if kind == "normal" else "[low, high]"
        raise s.error(kind, f"expected {names}, got {len(items)} values", f"{kind}: {names}")
    if kind == "normal":
        mean = parse_item(items[0][0], items[0][1])
        sd = parse_item(items[1][0], items[1][1])
        if not sd > 0.0:
            raise InputError(items[1][1], f"the standard deviation must be > 0, got {sd:g}",
                             "a positive standard deviation in the field's unit")
        bounds = s.sequence("within")
        if len(bounds) != 2:
            raise s.error("within", f"expected [low, high], got {len(bounds)} values",
                          "within: [low, high], the range the normal is cut to")
        low, high = (parse_item(item, at) for item, at in bounds)
        _check_order(low, high, s.at("within"))
        return Draw("normal", (mean, sd, low, high), None, where)
    else:
        low, high = (parse_item(item, at) for item, at in items)
    _check_order(low, high, s.at(kind))
    if kind == "log_uniform" and not low > 0.0:
        raise s.error(kind, f"a log-uniform distribution needs low > 0, got {low:g}",
                      "0 < low <= high")
    return Draw(kind, (low, high), None, where)


def _check_order(low: float, high: float, where: Where) -> None:
    if low > high:
        raise InputError(where, f"low {low:g} is above high {high:g}", "low <= high")
