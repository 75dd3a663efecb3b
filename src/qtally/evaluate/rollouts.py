"""Greedy-policy evaluation by rollouts, with a 95% confidence interval on the mean return.

Evaluation uses its own environment instance and a fixed list of seeds, so every
evaluation during a run (and every run with the same ``seed``) plays the same
situations: differences between evaluations come from the policy, not the dice. The
returns are played by :class:`~qtally.evaluate.seeded_evaluation.SeededEvaluation`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = ["ReturnSummary", "summarise_returns"]


@dataclass(frozen=True)
class ReturnSummary:
    mean: float
    ci95: float
    n: int


def summarise_returns(returns: np.ndarray) -> ReturnSummary:
    """Mean and the half-width of its Student-t 95% interval.

    >>> s = summarise_returns(np.array([1.0, 2.0, 3.0, 4.0]))
    >>> round(s.mean, 3), round(s.ci95, 3)
    (2.5, 2.054)
    """
    returns = np.asarray(returns, dtype=np.float64)
    n = returns.shape[0]
    if n < 2:
        return ReturnSummary(mean=float(returns.mean()) if n else float("nan"), ci95=float("nan"), n=n)
    half_width = stats.t.ppf(0.975, n - 1) * returns.std(ddof=1) / np.sqrt(n)
    return ReturnSummary(mean=float(returns.mean()), ci95=float(half_width), n=n)
