"""Exact dynamic programming on tiny hand-built models whose values are worked out by hand.

All models here are invented for the tests.
"""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest

from qtally.envs.model import NoModelError, TabularModel
from qtally.envs.model_extraction import model_from_p_table, model_of
from support.dense_models import make_model
from qtally.evaluate.exact import (
    ImproperPolicyError,
    NotConvergedError,
    epsilon_soft_probs,
    greedy_actions,
    greedy_policy_probs,
    iterative_policy_evaluation,
    optimal_action_fraction,
    optimal_actions_mask,
    optimality_gap,
    policy_evaluation,
    q_from_v,
    reachable_states,
    start_value,
    terminating_states,
    value_iteration,
)

RIGHT, STAY = 0, 1



@pytest.fixture
def chain() -> TabularModel:
    """0 -> 1 -> 2 (terminal). RIGHT moves on for -1; STAY stays put for -2. Starts at 0."""
    p = np.zeros((3, 2, 3))
    p[0, RIGHT, 1] = p[1, RIGHT, 2] = 1.0
    p[0, STAY, 0] = p[1, STAY, 1] = 1.0
    rewards = [[-1.0, -2.0], [-1.0, -2.0], [0.0, 0.0]]
    return make_model(p, rewards, [False, False, True], [1.0, 0.0, 0.0])


def always(action: int, n_states: int = 3, n_actions: int = 2) -> np.ndarray:
    return greedy_policy_probs(np.full(n_states, action), n_actions)


# ---------------------------------------------------------------- policy evaluation


def test_chain_always_right_undiscounted(chain):
    # Two steps of -1 from state 0, one from state 1.
    np.testing.assert_allclose(policy_evaluation(chain, always(RIGHT), 1.0), [-2.0, -1.0, 0.0])


def test_chain_always_right_discounted(chain):
    # v1 = -1; v0 = -1 + 0.5 * v1.
    np.testing.assert_allclose(policy_evaluation(chain, always(RIGHT), 0.5), [-1.5, -1.0, 0.0])


def test_chain_epsilon_soft_undiscounted(chain):
    # pi(RIGHT) = 0.75, pi(STAY) = 0.25.
    # v1 = 0.75 * (-1) + 0.25 * (-2 + v1)       => v1 = -5/3
    # v0 = 0.75 * (-1 + v1) + 0.25 * (-2 + v0)  => v0 = -10/3
    pi = epsilon_soft_probs(np.array([[1.0, 0.0]] * 3), 0.5)
    expected = [-10 / 3, -5 / 3, 0.0]
    np.testing.assert_allclose(policy_evaluation(chain, pi, 1.0), expected)
    np.testing.assert_allclose(iterative_policy_evaluation(chain, pi, 1.0), expected, atol=1e-10)


def test_gamma_zero_is_immediate_reward(chain):
    np.testing.assert_allclose(policy_evaluation(chain, always(STAY), 0.0), [-2.0, -2.0, 0.0])


def test_undiscounted_refuses_a_policy_that_loops_forever(chain):
    # STAY never leaves states 0 and 1; both are reachable from the start.
    with pytest.raises(ImproperPolicyError, match=r"from 2 state\(s\), 1 of them reachable"):
        policy_evaluation(chain, always(STAY), 1.0)
    # Discounting makes the same policy's value finite: -2 / (1 - 0.5).
    np.testing.assert_allclose(policy_evaluation(chain, always(STAY), 0.5), [-4.0, -4.0, 0.0])


def test_undiscounted_refuses_when_a_trap_is_only_possible():
    # From 0: half the time to terminal 2, half to trap 1, which loops on itself.
    p = np.zeros((3, 1, 3))
    p[0, 0, [1, 2]] = 0.5
    p[1, 0, 1] = 1.0
    m = make_model(p, [[1.0], [0.0], [0.0]], [False, False, True], [1.0, 0.0, 0.0])
    np.testing.assert_array_equal(terminating_states(m, np.ones((3, 1))), [False, False, True])
    with pytest.raises(ImproperPolicyError, match=r"from 2 state\(s\), 2 of them"):
        policy_evaluation(m, np.ones((3, 1)), 1.0)


def test_undiscounted_loop_out_of_reach_of_the_start_is_nan():
    # 0 -> 3 (terminal) for +1; 1 <-> 2 loop for +1 a step, never started in.
    p = np.zeros((4, 1, 4))
    p[0, 0, 3] = p[1, 0, 2] = p[2, 0, 1] = 1.0
    m = make_model(p, [[1.0], [1.0], [1.0], [0.0]], [False, False, False, True], [1, 0, 0, 0])
    v = policy_evaluation(m, np.ones((4, 1)), 1.0)
    np.testing.assert_array_equal(np.isnan(v), [False, True, True, False])
    assert v[0] == 1.0 and v[3] == 0.0
    assert start_value(m, v) == 1.0
    # With discounting the loop is worth 1 / (1 - 0.9).
    np.testing.assert_allclose(policy_evaluation(m, np.ones((4, 1)), 0.9), [1.0, 10.0, 10.0, 0.0])


def test_undiscounted_accepts_a_cycle_that_ends_with_probability_one():
    # From 0: stay with 1/2 or end with 1/2, reward 3 a step: v = 3 / (1 - 1/2) = 6.
    p = np.zeros((2, 1, 2))
    p[0, 0] = [0.5, 0.5]
    m = make_model(p, [[3.0], [0.0]], [False, True], [1.0, 0.0])
    np.testing.assert_allclose(policy_evaluation(m, np.ones((2, 1)), 1.0), [6.0, 0.0])


def test_iterative_evaluation_gives_up_on_an_endless_rewarding_loop(chain):
    with pytest.raises(NotConvergedError):
        iterative_policy_evaluation(chain, always(STAY), 1.0, max_sweeps=50)


def test_bad_arguments_are_refused(chain):
    with pytest.raises(ValueError, match="gamma"):
        policy_evaluation(chain, always(RIGHT), 1.5)
    with pytest.raises(ValueError, match="sum to 1"):
        policy_evaluation(chain, np.full((3, 2), 0.4), 0.9)
    with pytest.raises(ValueError, match="shape"):
        policy_evaluation(chain, np.ones((3, 1)), 0.9)


# ---------------------------------------------------------------- q, value iteration


def test_q_from_v_and_value_iteration_on_the_chain(chain):
    result = value_iteration(chain, 1.0)
    # V* = [-2, -1, 0]; q*(s, STAY) = -2 + V*(s).
    np.testing.assert_allclose(result.v_star, [-2.0, -1.0, 0.0])
    np.testing.assert_allclose(result.q_star, [[-2.0, -4.0], [-1.0, -3.0], [0.0, 0.0]])
    np.testing.assert_array_equal(result.policy, [RIGHT, RIGHT, 0])
    np.testing.assert_allclose(q_from_v(chain, result.v_star, 1.0), result.q_star)


def test_undiscounted_ties_go_to_an_action_that_ends_the_episode():
    # Action 0 stays put for 0; action 1 ends for +1. Staying is "worth" V* = 1 as well,
    # so q* ties, yet only action 1 ever collects the reward.
    p = np.zeros((2, 2, 2))
    p[0, 0, 0] = p[0, 1, 1] = 1.0
    m = make_model(p, [[0.0, 1.0], [0.0, 0.0]], [False, True], [1.0, 0.0])
    result = value_iteration(m, 1.0)
    np.testing.assert_allclose(result.q_star[0], [1.0, 1.0])
    assert result.policy[0] == 1
    # Discounted, staying is strictly worse and plain lowest-index greedy picks 1 too.
    assert value_iteration(m, 0.9).policy[0] == 1


def test_value_iteration_reports_non_convergence():
    # Staying earns +1 a step forever: undiscounted, V* is unbounded.
    p = np.zeros((2, 2, 2))
    p[0, 0, 0] = p[0, 1, 1] = 1.0
    m = make_model(p, [[1.0, 0.0], [0.0, 0.0]], [False, True], [1.0, 0.0])
    with pytest.raises(NotConvergedError):
        value_iteration(m, 1.0, max_sweeps=100)


# ---------------------------------------------------------------- policy arrays


def test_epsilon_soft_rows():
    q = np.array([[0.0, 2.0, 2.0, 1.0], [5.0, 0.0, 0.0, 0.0]])
    probs = epsilon_soft_probs(q, 0.2)
    np.testing.assert_allclose(probs.sum(axis=1), 1.0)
    # Tie between actions 1 and 2 goes to 1.
    np.testing.assert_allclose(probs, [[0.05, 0.85, 0.05, 0.05], [0.85, 0.05, 0.05, 0.05]])
    np.testing.assert_allclose(epsilon_soft_probs(q, 1.0), 0.25)
    np.testing.assert_array_equal(epsilon_soft_probs(q, 0.0), greedy_policy_probs([1, 0], 4))
    with pytest.raises(ValueError):
        epsilon_soft_probs(q, 1.5)


def test_greedy_helpers_break_ties_low():
    q = np.array([[1.0, 3.0, 3.0], [2.0, 2.0 - 1e-12, 0.0]])
    np.testing.assert_array_equal(greedy_actions(q), [1, 0])
    np.testing.assert_array_equal(optimal_actions_mask(q, atol=1e-9), [[0, 1, 1], [1, 1, 0]])
    np.testing.assert_array_equal(optimal_actions_mask(q, atol=0.0), [[0, 1, 1], [1, 0, 0]])


# ---------------------------------------------------------------- scoring a Q table


def test_reachable_states(chain):
    np.testing.assert_array_equal(reachable_states(chain, always(RIGHT)), [True, True, True])
    np.testing.assert_array_equal(reachable_states(chain, always(STAY)), [True, False, False])


def test_optimality_gap(chain):
    q_table = np.array([[1.0, 0.0], [0.0, 1.0], [0.0, 0.0]])  # RIGHT at 0, STAY at 1
    # gamma 0.5: greedy v1 = -2 / (1 - 0.5) = -4, v0 = -1 + 0.5 * -4 = -3; V*(0) = -1.5.
    gap = optimality_gap(chain, q_table, 0.5)
    assert gap.greedy_terminates
    assert gap.optimal_start_value == pytest.approx(-1.5)
    assert gap.greedy_start_value == pytest.approx(-3.0)
    assert gap.gap == pytest.approx(1.5)
    # gamma 1: the greedy policy never ends, so no finite value.
    stuck = optimality_gap(chain, q_table, 1.0)
    assert not stuck.greedy_terminates and np.isnan(stuck.gap)
    assert stuck.optimal_start_value == pytest.approx(-2.0)
    # A table whose greedy policy is optimal has no gap.
    assert optimality_gap(chain, np.array([[1.0, 0.0]] * 3), 1.0).gap == pytest.approx(0.0)


def test_optimal_action_fraction(chain):
    q_star = value_iteration(chain, 1.0).q_star
    # RIGHT at 0 (optimal), STAY at 1 (not): both reached, half right.
    q_table = np.array([[1.0, 0.0], [0.0, 1.0], [0.0, 0.0]])
    assert optimal_action_fraction(chain, q_table, q_star) == 0.5
    # STAY at 0 never reaches state 1, so only state 0 counts, and it is wrong.
    assert optimal_action_fraction(chain, np.array([[0.0, 1.0]] * 3), q_star) == 0.0
    assert optimal_action_fraction(chain, np.array([[1.0, 0.0]] * 3), q_star) == 1.0


# ---------------------------------------------------------------- model extraction


def test_model_from_p_table_sums_duplicates_and_zeroes_terminal_rows():
    P = {
        0: {0: [(0.25, 1, 4.0, False), (0.25, 1, 4.0, False), (0.5, 2, 2.0, True)]},
        1: {0: [(1.0, 0, -1.0, False)]},
        2: {0: [(1.0, 2, 7.0, True)]},  # terminal self-loop, as toy-text tables list it
    }
    m = model_from_p_table(P, 3, 1, np.array([1.0, 0.0, 0.0]))
    np.testing.assert_allclose(m.transitions.toarray(), [[0, 0.5, 0.5], [1, 0, 0], [0, 0, 0]])
    np.testing.assert_allclose(m.rewards[:, 0], [3.0, -1.0, 0.0])
    np.testing.assert_array_equal(m.terminal, [False, False, True])


def test_model_from_p_table_refuses_bad_probabilities():
    P = {0: {0: [(0.5, 1, 0.0, True)]}, 1: {0: [(1.0, 1, 0.0, True)]}}
    with pytest.raises(ValueError, match="sum to"):
        model_from_p_table(P, 2, 1, np.array([1.0, 0.0]))


def test_model_of_uses_a_model_source_through_wrappers():
    chain_model = make_model(np.ones((1, 1, 1)), [[0.0]], [True], [1.0])

    class Stated(gym.Env):
        observation_space = gym.spaces.Discrete(1)
        action_space = gym.spaces.Discrete(1)

        def tabular_model(self):
            return chain_model

    assert model_of(gym.wrappers.TimeLimit(Stated(), 5)) is chain_model


def test_model_of_without_a_model_names_what_needs_one():
    class Opaque(gym.Env):
        observation_space = gym.spaces.Discrete(2)
        action_space = gym.spaces.Discrete(2)

    with pytest.raises(NoModelError, match="exposes no transition model.*value iteration"):
        model_of(Opaque())


def test_model_of_cliff_walking_start_and_terminal():
    m = model_of(gym.make("CliffWalking-v1"))
    assert m.start_distribution[36] == 1.0  # row 3, column 0 of the 4 x 12 grid
    np.testing.assert_array_equal(np.flatnonzero(m.terminal), [47])  # the goal only
    # Stepping into the cliff goes back to the start for -100.
    assert m.rewards[36, 1] == -100.0 and m.transitions[[36 * 4 + 1]].toarray()[0, 36] == 1.0
