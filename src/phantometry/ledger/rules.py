"""Control limits and drift rules for one metric's sequence of values over time.

Control limits come from a baseline: the mean and the sample standard deviation (ddof = 1)
of the baseline values. The warning lines sit at mean +- 2 sigma and the action lines at
mean +- 3 sigma (Shewhart chart for individual values; Western Electric Company, *Statistical
Quality Control Handbook*, 1956).

Four drift rules run on every trend, each flag naming its rule (Western Electric Handbook,
1956, zone tests; Nelson, "The Shewhart control chart - tests for special causes",
J Qual Technol 16:237-239, 1984):

``beyond_3sigma``
    one point more than 3 sigma from the mean;
``2of3_beyond_2sigma``
    two of three consecutive points more than 2 sigma from the mean on the same side (the
    flag sits on the second of them to go beyond);
``6_trending``
    six points in a row steadily rising or steadily falling (each strictly beyond the one
    before; Nelson's test 3);
``8_one_side``
    eight points in a row on the same side of the mean (a point exactly on the mean breaks
    the run; Western Electric's eight-point run).

A flag sits on the point that completes the pattern; ``first_index`` is where it began. A run
that goes on flags every further point. The rules need no loop over the values: each one is a
whole-array test on sliding windows.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

RULE_BEYOND_3SIGMA = "beyond_3sigma"
RULE_2OF3_BEYOND_2SIGMA = "2of3_beyond_2sigma"
RULE_6_TRENDING = "6_trending"
RULE_8_ONE_SIDE = "8_one_side"

#: Rule id -> what it tests, in the order the rules are applied.
RULES: dict[str, str] = {
    RULE_BEYOND_3SIGMA: "1 point beyond 3 sigma",
    RULE_2OF3_BEYOND_2SIGMA: "2 of 3 in a row beyond 2 sigma on one side",
    RULE_6_TRENDING: "6 in a row steadily rising or falling",
    RULE_8_ONE_SIDE: "8 in a row on one side of the mean",
}

#: Short numbers used on charts (1-4) for each rule.
RULE_NUMBERS: dict[str, int] = {rule: i + 1 for i, rule in enumerate(RULES)}

TRENDING_RUN = 6
ONE_SIDE_RUN = 8


@dataclass(frozen=True)
class ControlLimits:
    """Centre line and sigma of a control chart, in the unit of the metric.

    Attributes
    ----------
    mean : float
        Mean of the baseline values.
    sigma : float
        Sample standard deviation (ddof = 1) of the baseline values.
    n : int
        Number of baseline values.
    source : str
        Where the values came from (``baseline #3`` or ``all points``).
    """

    mean: float
    sigma: float
    n: int
    source: str

    @property
    def warning_low(self) -> float:
        return self.mean - 2.0 * self.sigma

    @property
    def warning_high(self) -> float:
        return self.mean + 2.0 * self.sigma

    @property
    def action_low(self) -> float:
        return self.mean - 3.0 * self.sigma

    @property
    def action_high(self) -> float:
        return self.mean + 3.0 * self.sigma


@dataclass(frozen=True)
class Flag:
    """A drift rule that fired at one point of a sequence.

    Attributes
    ----------
    index : int
        Position of the point completing the pattern.
    rule : str
        Rule id (a key of :data:`RULES`).
    description : str
        What happened, e.g. ``"8 in a row above the mean"``.
    first_index : int
        Position where the pattern began.
    """

    index: int
    rule: str
    description: str
    first_index: int


def control_limits(values, source: str = "baseline") -> ControlLimits | None:
    """Mean and sample SD of baseline values; None when fewer than two finite values.

    Parameters
    ----------
    values : array_like of float
        Baseline values (missing ones as NaN or None are dropped).
    source : str
        Label of the baseline for reports.
    """
    x = np.asarray([np.nan if v is None else v for v in values], dtype=float)
    x = x[np.isfinite(x)]
    if x.size < 2:
        return None
    return ControlLimits(mean=float(np.mean(x)), sigma=float(np.std(x, ddof=1)), n=int(x.size), source=source)


def _run_ends(mask: np.ndarray, length: int) -> np.ndarray:
    """Indices i where mask[i - length + 1 .. i] are all True."""
    if mask.size < length:
        return np.zeros(0, dtype=int)
    full = sliding_window_view(mask, length).all(axis=1)
    return np.flatnonzero(full) + length - 1


def drift_flags(values, mean: float | None, sigma: float | None) -> list[Flag]:
    """Apply the four drift rules to a time-ordered sequence.

    Parameters
    ----------
    values : array_like of float, shape (n,)
        Finite values in time order (drop missing values before calling).
    mean, sigma : float or None
        Control limits (see :func:`control_limits`). Without a positive finite ``sigma``
        the two sigma rules are skipped; without a finite ``mean`` the one-side rule too.

    Returns
    -------
    list of Flag
        Sorted by index, then by rule order.
    """
    x = np.asarray(values, dtype=float)
    if x.ndim != 1 or not np.all(np.isfinite(x)):
        raise ValueError("drift_flags needs a 1-D sequence of finite values")
    flags: list[Flag] = []
    have_mean = mean is not None and math.isfinite(mean)
    have_sigma = have_mean and sigma is not None and math.isfinite(sigma) and sigma > 0
    if have_sigma:
        z = (x - mean) / sigma
        for i in np.flatnonzero(np.abs(z) > 3.0):
            side = "above" if z[i] > 0 else "below"
            flags.append(Flag(int(i), RULE_BEYOND_3SIGMA, f"beyond 3 sigma, {side} the mean", int(i)))
        for sign, side in ((1.0, "above"), (-1.0, "below")):
            beyond = sign * z > 2.0
            prev1 = np.zeros_like(beyond)
            prev1[1:] = beyond[:-1]
            prev2 = np.zeros_like(beyond)
            prev2[2:] = beyond[:-2]
            fire = beyond & (prev1 | prev2)
            for i in np.flatnonzero(fire):
                first = int(i - 1) if prev1[i] else int(i - 2)
                flags.append(Flag(int(i), RULE_2OF3_BEYOND_2SIGMA, f"2 of 3 beyond 2 sigma, {side} the mean", first))
    steps = np.sign(np.diff(x))
    for sign, word in ((1.0, "rising"), (-1.0, "falling")):
        for end in _run_ends(steps == sign, TRENDING_RUN - 1):
            i = int(end + 1)  # step k joins points k and k + 1
            flags.append(Flag(i, RULE_6_TRENDING, f"{TRENDING_RUN} in a row steadily {word}", i - TRENDING_RUN + 1))
    if have_mean:
        side_sign = np.sign(x - mean)
        for sign, side in ((1.0, "above"), (-1.0, "below")):
            for i in _run_ends(side_sign == sign, ONE_SIDE_RUN):
                flags.append(Flag(int(i), RULE_8_ONE_SIDE, f"{ONE_SIDE_RUN} in a row {side} the mean", int(i) - ONE_SIDE_RUN + 1))
    order = {rule: k for k, rule in enumerate(RULES)}
    flags.sort(key=lambda f: (f.index, order[f.rule]))
    return flags
