"""Getting a :class:`~qtally.envs.model.TabularModel` out of an environment.

Exact answers (value iteration, linear-solve policy evaluation, optimality gap)
need the environment's dynamics, not only samples from it. Two kinds of
environment state them:

- a custom environment implementing :class:`~qtally.envs.model.ModelSource`
  (a ``tabular_model()`` method), used as is;
- a Gymnasium toy-text environment (FrozenLake, CliffWalking, Taxi), whose ``P``
  table :func:`model_from_p_table` turns into arrays.

Terminal states are the states some transition enters with ``terminated=True``.
Their transition rows are zeroed, so they are absorbing with value 0 whatever the
``P`` table lists for them (toy-text tables give them self-loops or ordinary moves
that an episode never takes). A time limit added by a wrapper is not part of the
model: the model is the untruncated MDP.
"""

from __future__ import annotations

from typing import Any, Mapping, Sequence

import numpy as np
import scipy.sparse as sp

from qtally.envs.model import ModelSource, NoModelError, TabularModel
from qtally.envs.outcomes import OutcomeTable

__all__ = ["model_from_p_table", "model_of", "outcomes_of"]

_ROW_SUM_ATOL = 1e-9

# What a caller loses without a model; named in the NoModelError message.
_FEATURES_NEEDING_MODEL = "exact policy evaluation, value iteration and the optimality gap"

PTable = Mapping[int, Mapping[int, Sequence[tuple[float, int, float, bool]]]]


def model_from_p_table(
    P: PTable,
    n_states: int,
    n_actions: int,
    start_distribution: np.ndarray,
    *,
    first_state: int = 0,
) -> TabularModel:
    """Turn a toy-text ``P[s][a] = [(prob, next_state, reward, terminated), ...]`` table into arrays.

    ``first_state`` is subtracted from every state label (the observation space's
    ``start``), so table indices run from 0. Repeated ``(s, a, s')`` entries are summed.
    Raises ``ValueError`` if a non-terminal state's action probabilities do not sum to 1.

    >>> P = {0: {0: [(0.5, 0, -1.0, False), (0.5, 1, 1.0, True)]},
    ...      1: {0: [(1.0, 1, 0.0, True)]}}
    >>> m = model_from_p_table(P, 2, 1, np.array([1.0, 0.0]))
    >>> m.rewards[:, 0].tolist(), m.terminal.tolist()
    ([0.0, 0.0], [False, True])
    >>> m.transitions.toarray().tolist()
    [[0.5, 0.5], [0.0, 0.0]]
    """
    rows: list[int] = []
    cols: list[int] = []
    probs: list[float] = []
    rewards = np.zeros((n_states, n_actions))
    terminal = np.zeros(n_states, dtype=bool)
    for label, by_action in P.items():
        s = int(label) - first_state
        for a, outcomes in by_action.items():
            for prob, next_label, reward, terminated in outcomes:
                s_next = int(next_label) - first_state
                rows.append(s * n_actions + int(a))
                cols.append(s_next)
                probs.append(float(prob))
                rewards[s, int(a)] += float(prob) * float(reward)
                if terminated:
                    terminal[s_next] = True
    row_idx = np.asarray(rows, dtype=np.int64)
    col_idx = np.asarray(cols, dtype=np.int64)
    if row_idx.size and (
        row_idx.min() < 0 or row_idx.max() >= n_states * n_actions
        or col_idx.min() < 0 or col_idx.max() >= n_states
    ):
        raise ValueError("P table names a state or action outside n_states x n_actions")
    # Terminal rows are dropped: an episode never acts from a terminal state.
    keep = ~terminal[row_idx // n_actions] if row_idx.size else np.zeros(0, dtype=bool)
    transitions = sp.csr_array(
        (np.asarray(probs)[keep], (row_idx[keep], col_idx[keep])),
        shape=(n_states * n_actions, n_states),
    )
    transitions.sum_duplicates()
    transitions.eliminate_zeros()
    rewards[terminal] = 0.0

    row_sums = np.asarray(transitions.sum(axis=1)).reshape(n_states, n_actions)
    bad = ~terminal[:, None] & ~np.isclose(row_sums, 1.0, rtol=0.0, atol=_ROW_SUM_ATOL)
    if bad.any():
        s, a = np.argwhere(bad)[0]
        raise ValueError(
            f"P table probabilities for state {s + first_state}, action {a} sum to "
            f"{row_sums[s, a]:.6g}, not 1 ({int(bad.sum())} such pairs)"
        )

    start = np.asarray(start_distribution, dtype=float).reshape(-1)
    if start.shape != (n_states,) or (start < 0).any() or not np.isclose(start.sum(), 1.0):
        raise ValueError("start_distribution must be n_states non-negative probabilities summing to 1")
    return TabularModel(
        transitions=transitions, rewards=rewards, terminal=terminal, start_distribution=start
    )


def _toy_text_start(env: Any, n_states: int, first_state: int) -> np.ndarray:
    """The start distribution of a toy-text env, from whichever attribute it keeps."""
    if getattr(env, "initial_state_distrib", None) is not None:
        return np.asarray(env.initial_state_distrib, dtype=float)
    start = np.zeros(n_states)
    if getattr(env, "desc", None) is not None:  # FrozenLake map: 'S' marks the start
        start[:] = (np.asarray(env.desc, dtype="c") == b"S").ravel()
    elif getattr(env, "start_state_index", None) is not None:  # CliffWalking
        start[int(env.start_state_index) - first_state] = 1.0
    if start.sum() == 0:
        raise NoModelError(
            f"{_env_name(env)} has a P table but no start distribution "
            f"(initial_state_distrib, desc or start_state_index), which {_FEATURES_NEEDING_MODEL} need"
        )
    return start / start.sum()


def _env_name(env: Any) -> str:
    spec = getattr(env, "spec", None)
    return spec.id if spec is not None else type(env).__name__


def outcomes_of(env: Any) -> OutcomeTable:
    """The outcome table of ``env`` in its own sampling order (:mod:`qtally.envs.outcomes`).

    From an ``outcome_table()`` method, a toy-text ``P`` table, or qtally's Blackjack model.
    Raises :class:`~qtally.envs.model.NoModelError` when there is none: such an environment
    can only be played through its ``step``.
    """
    base = getattr(env, "unwrapped", env)
    if callable(getattr(base, "outcome_table", None)):
        return base.outcome_table()
    if type(base).__name__ == "BlackjackEnv":
        from .blackjack_model import blackjack_outcome_table

        return blackjack_outcome_table(sab=bool(base.sab), natural=bool(base.natural))
    P = getattr(base, "P", None)
    if P is not None and hasattr(base.observation_space, "n") and hasattr(base.action_space, "n"):
        n_states, n_actions = int(base.observation_space.n), int(base.action_space.n)
        first_state = int(getattr(base.observation_space, "start", 0))
        if int(getattr(base.action_space, "start", 0)) != 0:
            raise NoModelError(f"{_env_name(env)}: actions that do not start at 0 have no outcome table")
        start = _toy_text_start(base, n_states, first_state)
        return OutcomeTable.from_p_table(P, n_states, n_actions, np.arange(n_states), start, first_state=first_state)
    raise NoModelError(f"{_env_name(env)} lists no outcomes (no outcome_table() method, no P table)")


def model_of(env: Any) -> TabularModel:
    """The tabular model of ``env`` (wrappers are looked through to the unwrapped env).

    Raises :class:`~qtally.envs.model.NoModelError` when the environment states no dynamics.
    """
    base = getattr(env, "unwrapped", env)
    if isinstance(base, ModelSource):
        return base.tabular_model()
    if type(base).__name__ == "BlackjackEnv":
        return outcomes_of(base).to_model()
    P = getattr(base, "P", None)
    if P is not None:
        obs_space, act_space = base.observation_space, base.action_space
        if not (hasattr(obs_space, "n") and hasattr(act_space, "n")):
            raise NoModelError(
                f"{_env_name(env)} has a P table but non-Discrete spaces; "
                f"{_FEATURES_NEEDING_MODEL} need a Discrete table model"
            )
        n_states, n_actions = int(obs_space.n), int(act_space.n)
        first_state = int(getattr(obs_space, "start", 0))
        action_start = int(getattr(act_space, "start", 0))
        if action_start != 0:
            P = {s: {int(a) - action_start: out for a, out in acts.items()} for s, acts in P.items()}
        start = _toy_text_start(base, n_states, first_state)
        return model_from_p_table(P, n_states, n_actions, start, first_state=first_state)
    raise NoModelError(
        f"{_env_name(env)} exposes no transition model (no tabular_model() method, no P table); "
        f"{_FEATURES_NEEDING_MODEL} need one"
    )
