"""How a policy derived from a Q table picks an action, and with what probability.

The epsilon-greedy (epsilon-soft) rule: with probability epsilon a uniformly random
action, otherwise a greedy one, ties split evenly among the maximal actions (random
tie-breaking keeps a fresh all-zero table from always pushing the same action).
``action_probability`` is exact under that rule, which weighted importance sampling needs.
"""

from __future__ import annotations

import numpy as np

__all__ = ["epsilon_greedy_action"]


def epsilon_greedy_action(q_row: np.ndarray, epsilon: float, rng: np.random.Generator) -> tuple[int, float]:
    """Sample an action from the epsilon-soft policy of one Q row; return it and its probability.

    Plain Python on the row: with a handful of actions this is several times faster than
    numpy calls, and this runs once per time step.

    >>> a, p = epsilon_greedy_action(np.array([0.0, 1.0, 0.0]), 0.3, np.random.default_rng(0))
    >>> a, round(p, 3)
    (1, 0.8)
    """
    row = q_row.tolist()
    n_actions = len(row)
    top = max(row)
    best = [i for i, value in enumerate(row) if value == top]
    if epsilon > 0.0 and rng.random() < epsilon:
        action = min(int(rng.random() * n_actions), n_actions - 1)
    elif len(best) > 1:
        action = best[min(int(rng.random() * len(best)), len(best) - 1)]
    else:
        action = best[0]
    probability = epsilon / n_actions + ((1.0 - epsilon) / len(best) if action in best else 0.0)
    return action, probability

