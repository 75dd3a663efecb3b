"""qtally-evaluate's headline: the policy's value where its episodes start, with an interval that covers the exact value."""

import numpy as np

from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.envs.model_extraction import model_of
from qtally.evaluate.exact import policy_evaluation, start_value
from qtally.evaluate.prediction import OnPolicyPrediction, play_prediction_episodes
from qtally.policy.rules import uniform_policy


def test_the_start_value_is_the_discounted_return_and_covers_the_exact_value():
    # Uniform play on slippery FrozenLake 4x4 at gamma 0.9. The exact value comes from the
    # linear solve (another route). Breakages caught: the undiscounted return used as the
    # start value (it reaches the goal about 1.4% of the time, well above the discounted
    # value), or an interval of the wrong width.
    environment = make_environment(EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "4x4", "is_slippery": True}, max_episode_steps=100))
    policy = uniform_policy(environment.n_states, environment.n_actions)
    model = model_of(environment.env)
    exact = start_value(model, policy_evaluation(model, policy, 0.9))
    played = play_prediction_episodes(environment, policy, OnPolicyPrediction(environment.n_states, environment.n_actions, 0.9), 6000, seed=5)
    assert abs(played.start_value_mean - exact) <= played.start_value_ci95
    assert played.return_mean - exact > 3 * played.start_value_ci95  # undiscounted is a different quantity
    # The half-width is the Student-t one of the discounted first returns (about 1.96 standard errors here).
    assert 0.5 * played.start_value_ci95 < 1.96 * played.return_standard_error
