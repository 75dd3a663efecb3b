"""Which comparison group of a sweep is better, and by how much: the statistics behind ``qtally-compare``.

Pure arithmetic on per-seed numbers (numpy and scipy, no MLflow): the caller hands over one
:class:`RunCurve` per finished run, already sorted into groups. Each seed is one
independent repetition, so every interval and test here is across seeds:

- the final value of a metric is its value at the run's last logged step; a group's final
  mean gets a Student-t 95% interval across its seeds;
- the *area under the evaluation curve* is the trapezoid integral of ``eval_return_mean``
  over the episode axis divided by the episode span (first to last evaluation), so it reads
  in return units: the average evaluation return over the run, which rewards learning early
  and not only the end point;
- *episodes to threshold* is the first evaluation step where ``eval_return_mean`` reaches
  the threshold (``>=``); runs that never reach it are counted, not averaged in;
- the best group (by the chosen metric's mean, among groups with at least two seeds) is
  tested against each other group with Welch's t-test on per-seed finals (Welch 1947, unequal
  variances), and the p-values are adjusted across those comparisons by Holm's step-down
  method (Holm 1979), which controls the chance of any false "better" at 5%.

>>> [round(p, 6) for p in holm_adjust([0.01, 0.04, 0.03])]
[0.03, 0.06, 0.06]
>>> area_under_curve([0, 100, 200], [0.0, 1.0, 1.0])
0.75
>>> episodes_to_threshold([0, 100, 200], [0.1, 0.5, 0.9], 0.5)
100
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
from scipy import stats

__all__ = [
    "ALPHA",
    "MIN_SEEDS",
    "RunCurve",
    "Interval",
    "WelchResult",
    "GroupSummary",
    "GroupVerdict",
    "Comparison",
    "mean_interval",
    "area_under_curve",
    "episodes_to_threshold",
    "welch_test",
    "holm_adjust",
    "compare_groups",
]

ALPHA = 0.05  # the significance level of every verdict
MIN_SEEDS = 2  # fewer finished seeds than this: no spread, so no interval and no test
EVAL_METRIC = "eval_return_mean"
GAP_METRIC = "optimality_gap"


@dataclass(frozen=True)
class RunCurve:
    """One finished run as the statistics see it: its final metrics and its evaluation curve."""

    run_id: str
    seed: str
    finals: Mapping[str, float]  # metric -> value at the run's last logged step
    steps: np.ndarray = field(default_factory=lambda: np.zeros(0))  # evaluation episodes, increasing
    values: np.ndarray = field(default_factory=lambda: np.zeros(0))  # eval_return_mean at those episodes


@dataclass(frozen=True)
class Interval:
    """A mean across ``n`` seeds with the half-width of its 95% Student-t interval (NaN below 2 seeds)."""

    mean: float
    half_width: float
    n: int

    @property
    def low(self) -> float:
        return self.mean - self.half_width

    @property
    def high(self) -> float:
        return self.mean + self.half_width


@dataclass(frozen=True)
class WelchResult:
    """``difference`` = mean(a) - mean(b), its 95% interval on Welch's degrees of freedom, t, df and two-sided p."""

    difference: float
    low: float
    high: float
    statistic: float
    dof: float
    p_value: float
    no_spread: bool  # both groups ended on one value each: the test degenerates (p is 0 or 1)


@dataclass(frozen=True)
class GroupSummary:
    key: str
    label: str
    runs: int  # finished runs in the group
    seeds: int  # of those, the runs that logged the ranking metric: what the test and the interval use
    final: Interval  # final eval_return_mean
    metric: Interval  # final value of the ranking metric (the same as ``final`` by default)
    auc: Interval  # area under the evaluation curve, per run, then across seeds
    threshold_episodes: float  # mean over the runs that reached the threshold (NaN if none or no threshold)
    threshold_reached: int
    threshold_never: int
    optimality_gap: Interval | None  # None when no run of the group logged one
    finals: tuple[float, ...]  # the per-seed finals of the ranking metric, what the test uses


@dataclass(frozen=True)
class GroupVerdict:
    """How one group stands against the best: ``kind`` is best, better, not_different or too_few."""

    kind: str
    text: str
    welch: WelchResult | None = None
    p_adjusted: float = math.nan


@dataclass(frozen=True)
class Comparison:
    metric: str
    higher_is_better: bool
    threshold: float | None
    groups: tuple[GroupSummary, ...]  # ranked, best first
    verdicts: tuple[GroupVerdict, ...]  # one per group, same order
    best: int | None  # index into groups of the reference group, None when no group has 2 seeds
    tests: int  # how many comparisons the Holm adjustment spans


def mean_interval(values: Sequence[float], confidence: float = 0.95) -> Interval:
    """Mean and Student-t half-width ``t_{(1+c)/2, n-1} * s / sqrt(n)`` with the sample standard deviation."""
    x = np.asarray([v for v in values if math.isfinite(v)], dtype=float)
    n = int(x.size)
    if n == 0:
        return Interval(math.nan, math.nan, 0)
    if n < 2:
        return Interval(float(x[0]), math.nan, 1)
    half = float(stats.t.ppf(0.5 + confidence / 2.0, n - 1) * x.std(ddof=1) / math.sqrt(n))
    return Interval(float(x.mean()), half, n)


def area_under_curve(steps: Sequence[float], values: Sequence[float]) -> float:
    """Trapezoid area under ``values`` over ``steps``, divided by the step span: a mean in the values' units.

    One point: that value (a run evaluated only at its end has no curve, only an end point).
    """
    s = np.asarray(steps, dtype=float)
    v = np.asarray(values, dtype=float)
    if s.size == 0:
        return math.nan
    if s.size == 1 or s[-1] == s[0]:
        return float(v[-1])
    return float(np.sum((v[1:] + v[:-1]) * np.diff(s)) / 2.0 / (s[-1] - s[0]))


def episodes_to_threshold(steps: Sequence[float], values: Sequence[float], threshold: float) -> int | None:
    """The first step whose value is at least ``threshold``; None if the run never got there."""
    for step, value in zip(steps, values):
        if value >= threshold:
            return int(step)
    return None


def welch_test(a: Sequence[float], b: Sequence[float], confidence: float = 0.95) -> WelchResult:
    """Welch's unequal-variance t-test of mean(a) = mean(b), two-sided (Welch 1947).

    The standard error is ``sqrt(s_a^2/n_a + s_b^2/n_b)`` and the degrees of freedom the
    Welch-Satterthwaite approximation. When neither group varies at all (every seed ended on
    the same value, as happens when all find the same policy and are evaluated on the same
    episodes) the statistic is undefined; the limit is used: p = 0 if the two values differ,
    p = 1 if they are equal, and ``no_spread`` says so.
    """
    x = np.asarray(a, dtype=float)
    y = np.asarray(b, dtype=float)
    if x.size < 2 or y.size < 2:
        raise ValueError("Welch's test needs at least two values in each group")
    va, vb = x.var(ddof=1) / x.size, y.var(ddof=1) / y.size
    difference = float(x.mean() - y.mean())
    se = math.sqrt(va + vb)
    if se == 0.0:
        p = 1.0 if difference == 0.0 else 0.0
        t = 0.0 if difference == 0.0 else math.copysign(math.inf, difference)
        return WelchResult(difference, difference, difference, t, math.nan, p, True)
    dof = (va + vb) ** 2 / ((va**2 / (x.size - 1) if va else 0.0) + (vb**2 / (y.size - 1) if vb else 0.0))
    t = difference / se
    p = float(2.0 * stats.t.sf(abs(t), dof))
    half = float(stats.t.ppf(0.5 + confidence / 2.0, dof) * se)
    return WelchResult(difference, difference - half, difference + half, float(t), float(dof), min(p, 1.0), False)


def holm_adjust(p_values: Sequence[float]) -> list[float]:
    """Holm's step-down adjustment (Holm 1979): sorted ascending, the i-th (from 0) of m is
    multiplied by m - i, kept non-decreasing, capped at 1; returned in the input order."""
    p = [float(x) for x in p_values]
    m = len(p)
    order = sorted(range(m), key=lambda i: p[i])
    adjusted = [0.0] * m
    running = 0.0
    for rank, i in enumerate(order):
        running = max(running, min(1.0, (m - rank) * p[i]))
        adjusted[i] = running
    return adjusted


def _summarise(key: str, label: str, runs: Sequence[RunCurve], metric: str, threshold: float | None) -> GroupSummary:
    with_metric = [r for r in runs if math.isfinite(r.finals.get(metric, math.nan))]
    finals = tuple(float(r.finals[metric]) for r in with_metric)
    gaps = [r.finals[GAP_METRIC] for r in runs if math.isfinite(r.finals.get(GAP_METRIC, math.nan))]
    areas = [area_under_curve(r.steps, r.values) for r in runs if len(r.steps)]
    reached: list[int] = []
    never = 0
    if threshold is not None:
        for r in runs:
            if not len(r.steps):
                continue
            first = episodes_to_threshold(r.steps, r.values, threshold)
            if first is None:
                never += 1
            else:
                reached.append(first)
    return GroupSummary(
        key=key,
        label=label,
        runs=len(runs),
        seeds=len(with_metric),
        final=mean_interval([r.finals.get(EVAL_METRIC, math.nan) for r in runs]),
        metric=mean_interval(finals),
        auc=mean_interval(areas),
        threshold_episodes=float(np.mean(reached)) if reached else math.nan,
        threshold_reached=len(reached),
        threshold_never=never,
        optimality_gap=mean_interval(gaps) if gaps else None,
        finals=finals,
    )


def _fmt(x: float) -> str:
    return f"{x:.3g}"


def _verdict(best: GroupSummary, other: GroupSummary, welch: WelchResult, p_adjusted: float, metric: str, higher_is_better: bool) -> GroupVerdict:
    difference = f"difference (best - this) in final {metric} {_fmt(welch.difference)}"
    if welch.no_spread:
        difference += " (every seed of both groups ended on the same value: no spread to test)"
    else:
        difference += f", 95% interval [{_fmt(welch.low)}, {_fmt(welch.high)}]"
    better_direction = welch.difference > 0 if higher_is_better else welch.difference < 0
    if p_adjusted < ALPHA and better_direction:
        return GroupVerdict("better", f"the best group is better (adjusted p={p_adjusted:.2g}); {difference}", welch, p_adjusted)
    return GroupVerdict("not_different", f"not significantly different from the best at the 5% level (adjusted p={p_adjusted:.2g}); {difference}", welch, p_adjusted)


def compare_groups(
    groups: Mapping[str, tuple[str, Sequence[RunCurve]]],
    metric: str = EVAL_METRIC,
    higher_is_better: bool = True,
    threshold: float | None = None,
) -> Comparison:
    """Summarise, rank and test the groups: ``groups`` maps a key to (label, the finished runs).

    Ranking is by the mean final ``metric`` (groups without a value last, then by label). The
    reference is the best-ranked group with at least :data:`MIN_SEEDS` seeds; a group with
    fewer gets the verdict "too few seeds to tell" and no test, so it does not count in Holm's m.
    """
    summaries = [_summarise(key, label, runs, metric, threshold) for key, (label, runs) in groups.items()]
    sign = -1.0 if higher_is_better else 1.0

    def order(s: GroupSummary):
        m = s.metric.mean
        return (0, sign * m, s.label) if math.isfinite(m) else (1, 0.0, s.label)

    summaries.sort(key=order)
    best = next((i for i, s in enumerate(summaries) if s.seeds >= MIN_SEEDS), None)
    tested = [i for i, s in enumerate(summaries) if best is not None and i != best and s.seeds >= MIN_SEEDS]
    welch = {i: welch_test(summaries[best].finals, summaries[i].finals) for i in tested}
    adjusted = dict(zip(tested, holm_adjust([welch[i].p_value for i in tested])))
    verdicts = []
    for i, s in enumerate(summaries):
        if s.seeds < MIN_SEEDS:
            count = f"{s.seeds} finished seed{'s' if s.seeds != 1 else ''}"
            verdicts.append(GroupVerdict("too_few", f"too few seeds to tell ({count} with {metric}; need at least {MIN_SEEDS})"))
        elif i == best:
            text = "best" if tested else "best, but no other group has enough seeds to test against"
            verdicts.append(GroupVerdict("best", text))
        else:
            verdicts.append(_verdict(summaries[best], s, welch[i], adjusted[i], metric, higher_is_better))
    return Comparison(metric, higher_is_better, threshold, tuple(summaries), tuple(verdicts), best, len(tested))
