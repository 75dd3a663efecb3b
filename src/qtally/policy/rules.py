"""Policies as ``(n_states, n_actions)`` probability tables, built from a rule or a list of actions.

Pure numpy; no tracking or config imports. A prediction needs the policy it measures as a
table over the same state indices the observation encoder produces, so each builder takes
the encoder and decodes every index back into the environment's own terms.

- :func:`threshold_policy`: ``high_action`` where a chosen observation part is at or above a
  threshold, ``low_action`` below it (a Blackjack player who sticks on 20 or 21 and hits
  otherwise is ``part="player_sum", threshold=20, high_action=0, low_action=1``).
- :func:`uniform_policy`, :func:`constant_policy`: every action alike; always one action.
- :func:`deterministic_policy`: one action per state, as a one-hot table.
- :func:`soften`: mix a table with the uniform policy, ``(1 - epsilon) pi + epsilon / |A|``.

>>> from qtally.envs.encoders import PartsEncoder
>>> enc = PartsEncoder(sizes=(3, 2), starts=(0, 0), names=("level", "flag"))
>>> threshold_policy(enc, 2, "level", 1, low_action=0, high_action=1)[:, 1].tolist()
[0.0, 0.0, 1.0, 1.0, 1.0, 1.0]
>>> soften(constant_policy(2, 3, 2), 0.3).round(2).tolist()
[[0.1, 0.1, 0.8], [0.1, 0.1, 0.8]]
"""

from __future__ import annotations

import numpy as np

from .table_policy import deterministic_probabilities

__all__ = [
    "PolicyRuleError",
    "RULES",
    "part_index",
    "threshold_policy",
    "uniform_policy",
    "constant_policy",
    "deterministic_policy",
    "soften",
    "check_policy_table",
]

RULES = ("threshold", "uniform", "constant")


class PolicyRuleError(ValueError):
    """A rule cannot be built as asked (unknown part, action out of range, bad epsilon)."""


def _check_action(action: int, n_actions: int, key: str) -> int:
    if not 0 <= int(action) < n_actions:
        raise PolicyRuleError(f"{key}={action} is not an action; this environment has actions 0..{n_actions - 1}")
    return int(action)


def part_index(encoder, part: str | int | None, key: str = "policy") -> int:
    """Which observation part a rule reads: a name from the encoder, or a position.

    >>> from qtally.envs.encoders import DiscreteEncoder
    >>> part_index(DiscreteEncoder(n=4), "state"), part_index(DiscreteEncoder(n=4), None)
    (0, 0)
    """
    names = tuple(encoder.names)
    if part is None:
        if len(names) == 1:
            return 0
        raise PolicyRuleError(f"{key}.part is required: the observation has parts {', '.join(names)}")
    if isinstance(part, str) and part in names:
        return names.index(part)
    try:
        position = int(part)
    except (TypeError, ValueError):
        position = -1
    if 0 <= position < len(names):
        return position
    raise PolicyRuleError(f"{key}.part={part!r} is not a part of the observation; parts are: {', '.join(names)} (or positions 0..{len(names) - 1})")


def deterministic_policy(actions: np.ndarray, n_actions: int) -> np.ndarray:
    """One-hot table of one action per state.

    >>> deterministic_policy(np.array([1, 0]), 2).tolist()
    [[0.0, 1.0], [1.0, 0.0]]
    """
    actions = np.asarray(actions, dtype=np.int64)
    if actions.size and (actions.min() < 0 or actions.max() >= n_actions):
        raise PolicyRuleError(f"actions must lie in 0..{n_actions - 1}")
    return deterministic_probabilities(actions, n_actions)


def threshold_policy(
    encoder, n_actions: int, part: str | int | None, threshold: float, *, low_action: int, high_action: int, key: str = "policy"
) -> np.ndarray:
    """``high_action`` where observation part ``part`` is ``>= threshold``, else ``low_action``.

    ``key`` is the config prefix named in error messages.
    """
    column = part_index(encoder, part, key)
    low = _check_action(low_action, n_actions, f"{key}.low_action")
    high = _check_action(high_action, n_actions, f"{key}.high_action")
    observations = [encoder.decode(s) for s in range(encoder.n_states)]
    readings = np.array([o[column] if isinstance(o, tuple) else o for o in observations], dtype=float)
    return deterministic_policy(np.where(readings >= float(threshold), high, low), n_actions)


def uniform_policy(n_states: int, n_actions: int) -> np.ndarray:
    return np.full((n_states, n_actions), 1.0 / n_actions)


def constant_policy(n_states: int, n_actions: int, action: int, key: str = "policy") -> np.ndarray:
    return deterministic_policy(np.full(n_states, _check_action(action, n_actions, f"{key}.action")), n_actions)


def soften(policy: np.ndarray, epsilon: float, key: str = "policy") -> np.ndarray:
    """``(1 - epsilon) * policy + epsilon / |A|``: epsilon-soft around any table (epsilon-greedy for a one-hot one)."""
    if not 0.0 <= float(epsilon) <= 1.0:
        raise PolicyRuleError(f"{key}.epsilon={epsilon} is outside [0, 1]")
    policy = np.asarray(policy, dtype=np.float64)
    return (1.0 - epsilon) * policy + epsilon / policy.shape[1]


def check_policy_table(policy: np.ndarray, n_states: int, n_actions: int) -> np.ndarray:
    """A finite, non-negative ``(S, A)`` table whose rows sum to 1, or :class:`PolicyRuleError`."""
    policy = np.asarray(policy, dtype=np.float64)
    if policy.shape != (n_states, n_actions):
        raise PolicyRuleError(f"policy table has shape {policy.shape}; the environment needs {(n_states, n_actions)}")
    if not np.isfinite(policy).all() or (policy < 0).any() or not np.allclose(policy.sum(axis=1), 1.0, atol=1e-9):
        raise PolicyRuleError("policy table rows must be non-negative probabilities summing to 1")
    return policy
