"""Which run is best, and whether it beats the one already promoted: the ranking rule behind ``qtally-promote``.

A candidate is one finished run reduced to what the rule reads: its final value of the
chosen metric, the half-width of that value's 95% interval, and the number of training
episodes. The order, best first: the metric (higher or lower is better as asked), then
the narrower interval (the figure we are surer of), then fewer episodes (the cheaper
policy), then the run id, so the choice never depends on the order MLflow lists runs in.

An exact metric (computed from the environment's model, e.g. ``greedy_expected_return``,
the exact value of the greedy policy) has no sampling noise: its interval is 0 wide, and
it is the better criterion where every candidate has a model. A sampled metric takes its
interval from the matching ``*_ci95`` metric (``eval_return_mean`` -> ``eval_return_ci95``).

>>> a = Candidate("a", 0.70, 0.02, 5000)
>>> b = Candidate("b", 0.70, 0.01, 8000)
>>> c = Candidate("c", 0.70, 0.01, 4000)
>>> [x.run_id for x in ranked([a, b, c])]
['c', 'b', 'a']
>>> beats(Candidate("d", 0.75, 0.02, 1), a), overlaps(Candidate("d", 0.75, 0.02, 1), a)
(True, False)
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Sequence

__all__ = ["EXACT_METRICS", "Candidate", "interval_metric", "candidate_from_metrics", "ranked", "beats", "overlaps", "describe"]

# Metrics computed from the environment's model, without sampling noise.
EXACT_METRICS = ("greedy_expected_return", "optimality_gap", "greedy_regret", "optimal_action_fraction")


@dataclass(frozen=True)
class Candidate:
    run_id: str
    value: float
    ci95: float  # half-width of the value's 95% interval; 0 for an exact metric, NaN where none was logged
    episodes: int | None  # training episodes, None where the run does not say


def interval_metric(metric: str) -> str | None:
    """The metric holding the 95% half-width of ``metric``, or None for an exact metric.

    >>> interval_metric("eval_return_mean"), interval_metric("greedy_expected_return")
    ('eval_return_ci95', None)
    """
    if metric in EXACT_METRICS:
        return None
    stem = metric[: -len("_mean")] if metric.endswith("_mean") else metric
    return f"{stem}_ci95"


def candidate_from_metrics(run_id: str, metric: str, metrics: Mapping[str, float], episodes: int | None) -> Candidate | None:
    """The candidate a run's final metrics make; None when the run did not log ``metric``."""
    value = metrics.get(metric)
    if value is None or not math.isfinite(float(value)):
        return None
    key = interval_metric(metric)
    ci95 = 0.0 if key is None else float(metrics.get(key, float("nan")))
    return Candidate(run_id, float(value), ci95, episodes)


def _key(candidate: Candidate, higher_is_better: bool) -> tuple:
    value = -candidate.value if higher_is_better else candidate.value
    ci95 = candidate.ci95 if math.isfinite(candidate.ci95) else math.inf
    episodes = candidate.episodes if candidate.episodes is not None else math.inf
    return (value, ci95, episodes)


def ranked(candidates: Sequence[Candidate], higher_is_better: bool = True) -> list[Candidate]:
    """Best first (module docstring)."""
    return sorted(candidates, key=lambda c: (_key(c, higher_is_better), c.run_id))


def beats(candidate: Candidate, incumbent: Candidate, higher_is_better: bool = True) -> bool:
    """Strictly better by the ranking rule; an equal run (or the incumbent itself) does not beat it."""
    if candidate.run_id == incumbent.run_id:
        return False
    return _key(candidate, higher_is_better) < _key(incumbent, higher_is_better)


def overlaps(candidate: Candidate, incumbent: Candidate) -> bool:
    """Do the two 95% intervals share a point? Unknown widths count as overlapping (nothing is shown)."""
    if not (math.isfinite(candidate.ci95) and math.isfinite(incumbent.ci95)):
        return True
    return abs(candidate.value - incumbent.value) <= candidate.ci95 + incumbent.ci95


def describe(candidate: Candidate, metric: str) -> str:
    """``run <id> (metric=0.7123 ± 0.015)``; an exact metric says so instead of an interval.

    >>> describe(Candidate("abc", 0.71234, 0.015, 5000), "eval_return_mean")
    'run abc (eval_return_mean=0.7123 ± 0.015)'
    >>> describe(Candidate("abc", 0.74, 0.0, 5000), "greedy_expected_return")
    'run abc (greedy_expected_return=0.74 exact)'
    """
    if interval_metric(metric) is None:
        interval = " exact"
    else:
        interval = f" ± {candidate.ci95:.2g}" if math.isfinite(candidate.ci95) else " (no interval)"
    return f"run {candidate.run_id} ({metric}={candidate.value:.4g}{interval})"
