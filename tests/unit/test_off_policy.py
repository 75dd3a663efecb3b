"""Weighted importance sampling: the backward loop, the weights and where it stops."""

import numpy as np
import pytest

from qtally.control.action_values import ActionValues
from qtally.control.variants import EpisodeArrays, OffPolicy


def test_weights_accumulate_and_loop_stops_off_target():
    values = ActionValues.zeros(3, 2)
    values.q[2] = [0.0, 1.0]  # target takes action 1 in state 2
    values.q[1] = [1.0, 0.0]  # target takes action 0 in state 1
    # t=0: state 0 action 1 (b=0.5); t=1: state 1 action 0 (b=0.8); t=2: state 2 action 1 (b=0.6)
    episode = EpisodeArrays(np.array([0, 1, 2]), np.array([1, 0, 1]), np.array([0.0, 0.0, 3.0]), np.array([0.5, 0.8, 0.6]))
    used = OffPolicy(gamma=1.0).update(values, episode)
    # t=2: W=1, C=1, Q(2,1) = 3; t=1: W = 1/0.6, C = 1/0.6, Q(1,0) = 1 + 1 * (3 - 1) = 3
    assert values.q[2, 1] == pytest.approx(3.0)
    assert values.cumulative_weights[1, 0] == pytest.approx(1 / 0.6)
    assert values.q[1, 0] == pytest.approx(3.0)
    # t=0: W = 1/(0.6*0.8); the pair is updated with that weight (the loop has reached t = 0).
    assert values.cumulative_weights[0, 1] == pytest.approx(1 / (0.6 * 0.8))
    assert used == 3


def test_a_tie_goes_to_the_lowest_action_and_the_weight_grows_by_one_over_b():
    # One tie rule everywhere (lowest index): Q(1) = [0, 0] after the last step's update
    # (reward 0), so the target takes action 0 in state 1 with probability 1.
    values = ActionValues.zeros(2, 2)
    took_target = EpisodeArrays(np.array([0, 1]), np.array([1, 0]), np.array([0.0, 0.0]), np.array([0.5, 0.4]))
    assert OffPolicy(gamma=1.0).update(values, took_target) == 2
    assert values.cumulative_weights[0, 1] == pytest.approx(1 / 0.4)  # W = pi / b = 1 / 0.4, not (1/2) / 0.4
    values = ActionValues.zeros(2, 2)
    left_target = EpisodeArrays(np.array([0, 1]), np.array([0, 1]), np.array([0.0, 0.0]), np.array([0.5, 0.5]))
    assert OffPolicy(gamma=1.0).update(values, left_target) == 1  # action 1 at a tie is off target: stop
    assert values.cumulative_weights[0].sum() == 0.0


def test_loop_stops_before_earlier_steps_when_behaviour_leaves_target():
    values = ActionValues.zeros(2, 2)
    # Last step takes action 1 in state 1, but the greedy target there is 0 after the update
    # only if Q(1,0) > Q(1,1): make it so, then the first step must never be reached.
    values.q[1] = [5.0, 0.0]
    episode = EpisodeArrays(np.array([0, 1]), np.array([0, 1]), np.array([0.0, 1.0]), np.array([0.5, 0.5]))
    used = OffPolicy(gamma=1.0).update(values, episode)
    assert used == 1
    assert values.visits[0].sum() == 0
