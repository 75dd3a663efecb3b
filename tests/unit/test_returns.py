"""Returns and visit sets on a hand-worked episode, and the variants' use of them."""

import numpy as np
import pytest

from qtally.control.action_values import ActionValues
from qtally.control.returns import discounted_returns, first_visit_mask, visit_mask
from qtally.control.variants import EpisodeArrays, OnPolicy

# Worked by hand, gamma = 0.9, rewards (1, 0, 2, -1), backwards from G_4 = 0:
# G_3 = -1;  G_2 = 2 + 0.9 * -1 = 1.1;  G_1 = 0 + 0.9 * 1.1 = 0.99;  G_0 = 1 + 0.9 * 0.99 = 1.891
REWARDS = np.array([1.0, 0.0, 2.0, -1.0])
HAND_RETURNS = np.array([1.891, 0.99, 1.1, -1.0])
STATES = np.array([0, 1, 0, 2])  # state 0 is visited at t = 0 and t = 2
ACTIONS = np.array([1, 0, 1, 0])


def test_backward_recursion_matches_hand_worked_returns():
    np.testing.assert_allclose(discounted_returns(REWARDS, 0.9), HAND_RETURNS, rtol=0, atol=1e-12)


def test_tail_value_seeds_the_recursion():
    # A bootstrap value of 10 after the last reward adds 0.9^(T - t) * 10 to every return.
    expected = HAND_RETURNS + 10 * 0.9 ** np.arange(4, 0, -1)
    np.testing.assert_allclose(discounted_returns(REWARDS, 0.9, tail_value=10.0), expected, atol=1e-12)


def test_gamma_zero_and_one_edge_cases():
    np.testing.assert_allclose(discounted_returns(REWARDS, 0.0), REWARDS)
    np.testing.assert_allclose(discounted_returns(REWARDS, 1.0), [2.0, 1.0, 1.0, -1.0])
    assert discounted_returns(np.array([]), 0.5).size == 0


def test_first_visit_and_every_visit_sets():
    keys = STATES * 2 + ACTIONS
    assert first_visit_mask(keys).tolist() == [True, True, False, True]
    assert visit_mask(keys, first_visit=False).tolist() == [True, True, True, True]


@pytest.mark.parametrize("first_visit, expected", [(True, 1.891), (False, (1.891 + 1.1) / 2)])
def test_update_averages_the_right_returns(first_visit, expected):
    values = ActionValues.zeros(3, 2)
    episode = EpisodeArrays(STATES, ACTIONS, REWARDS, np.ones(4))
    OnPolicy(gamma=0.9, first_visit=first_visit).update(values, episode)
    assert values.q[0, 1] == pytest.approx(expected, abs=1e-12)
    assert values.visits[0, 1] == (1 if first_visit else 2)
    assert values.q[1, 0] == pytest.approx(0.99) and values.q[2, 0] == pytest.approx(-1.0)


def test_sample_average_over_episodes_and_constant_step():
    values = ActionValues.zeros(1, 1)
    for g in (1.0, 2.0, 6.0):
        OnPolicy(gamma=1.0).update(values, EpisodeArrays(np.array([0]), np.array([0]), np.array([g]), np.ones(1)))
    assert values.q[0, 0] == pytest.approx(3.0)
    values = ActionValues.zeros(1, 1)
    for g in (1.0, 2.0):
        OnPolicy(gamma=1.0, step_size=0.5).update(values, EpisodeArrays(np.array([0]), np.array([0]), np.array([g]), np.ones(1)))
    assert values.q[0, 0] == pytest.approx(0.5 * 0.5 + 0.5 * 2.0)  # 0 -> 0.5 -> 1.25
