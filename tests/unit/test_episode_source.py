"""The episode source's edges: wrappers it must step through, caps and limits, encodings, the acting boundary, saved streams.

Each test names the breakage it catches; they were found by mutation testing
(``scripts/mutation.sh gym_episodes player``) as changes no other test noticed.
"""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest

from qtally.control.schedules import Constant
from qtally.control.streams import UniformDraws
from qtally.control.variants import make_variant
from qtally.engine.episodes import GymEpisodes
from qtally.engine.player import EpisodePlayer
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.experiment import bundled_environment_spec
from qtally.policy.table_policy import EpsilonGreedyActing

FIXED_START = "support.corridor:FixedStartCorridor"  # starts in cell 0; right six times reaches the goal (cell 6)


def always(action: int):
    return lambda state: (action, 1.0)


def corridor(max_episode_steps: int | None = 20):
    return make_environment(EnvironmentSpec(id=FIXED_START, max_episode_steps=max_episode_steps))


def test_a_wrapper_that_changes_the_episode_is_stepped_through():
    # Breakages: stepping the core past a reward-changing wrapper (rewards of -1), or
    # taking a time limit from an environment that has none (episodes cut short).
    environment = corridor()
    environment.env = gym.wrappers.TransformReward(environment.env.unwrapped, lambda r: 2.0 * r)
    played = GymEpisodes(environment, 100).play(always(1))
    assert played.rewards == [-2.0] * 6 and played.terminated and not played.truncated


def test_an_episode_that_ends_on_its_time_limit_step_is_terminated_not_truncated():
    # The environment reports both on the 6th step (TimeLimit inside a wrapper qtally steps
    # through): termination wins. Breakage: truncated reported as true.
    environment = corridor(max_episode_steps=None)
    environment.env = gym.wrappers.TransformReward(gym.wrappers.TimeLimit(environment.env.unwrapped, 6), lambda r: r)
    played = GymEpisodes(environment, 100).play(always(1))
    assert played.length == 6 and played.terminated and not played.truncated and not played.capped


def test_the_step_cap_may_be_one_step_and_not_zero():
    # Breakages: a cap of 1 refused, or the refusal without its message.
    with pytest.raises(ValueError, match=r"step_cap=0 must be a positive number of steps"):
        GymEpisodes(corridor(), 0)
    played = GymEpisodes(corridor(), 1).play(always(1))
    assert played.length == 1 and played.truncated and played.capped


@pytest.mark.parametrize("limit, cap, capped", [(3, 3, False), (3, 2, True), (2, 3, False)])
def test_a_time_limit_equal_to_the_step_cap_counts_as_the_time_limit(limit, cap, capped):
    # Breakage: the step cap taking the cut when both fall on the same step.
    played = GymEpisodes(corridor(max_episode_steps=limit), cap).play(always(1))
    assert played.length == min(limit, cap) and played.truncated and played.capped is capped


def test_observations_numbered_from_one_are_encoded_from_zero():
    # Breakage: the int() fast path taken for a Discrete space whose start is not 0.
    environment = make_environment(EnvironmentSpec(id="support.shifted:ShiftedWalk", max_episode_steps=10))
    played = GymEpisodes(environment, 10).play(always(1))
    assert played.states == [0, 1, 2] and played.final_state == 3


def test_binned_observations_encode_like_the_encoder():
    # Breakage: an encoder without a fast path (binning) left with no encode function.
    spec, _ = bundled_environment_spec("cartpole_binned")
    environment, reference = make_environment(spec), make_environment(spec)
    source = GymEpisodes(environment, 500)
    source.seed(3)
    played = source.play(always(0))
    observation, _ = reference.env.reset(seed=3)
    states = [reference.encoder.encode(observation)]
    for _ in range(played.length - 1):
        observation, *_ = reference.env.step(0)
        states.append(reference.encoder.encode(observation))
    assert played.states == states


def test_a_uniform_equal_to_epsilon_exploits():
    # The draw protocol explores when u < epsilon, so u == epsilon takes the greedy action,
    # in the step loop as in EpsilonGreedyActing. Greedy: right from cell 0, left from cell
    # 1, so the walker shuttles until the cap; exploring with u == epsilon would pick the
    # last action (right) and walk to the goal. Breakage: u <= epsilon in the step loop.
    greedy = [1, 0, 1, 1, 1, 1, 1, 1]
    acting = EpsilonGreedyActing(greedy, 0.5, 2, lambda: 0.5)
    played = GymEpisodes(corridor(), 10).play(acting)
    assert played.actions == [1, 0] * 5 and played.capped
    assert played.probabilities == [acting.exploit] * 10


def test_a_forced_first_action_has_probability_one():
    played = GymEpisodes(corridor(), 10).play(always(1), start_observation=3, first_action=0)
    assert played.states[0] == 3 and played.actions[:2] == [0, 1] and played.probabilities[0] == 1.0


def test_a_seed_not_yet_used_survives_saving_the_stream():
    # The environment's generator is seeded at the next reset; a state saved before it must
    # carry the seed. Breakage: the pending seed dropped on restore (the generator's unseeded
    # state is restored instead).
    spec = EnvironmentSpec(id="support.corridor:Corridor", max_episode_steps=20)
    first = GymEpisodes(make_environment(spec), 50)
    first.seed(11)
    second = GymEpisodes(make_environment(spec), 50)
    second.restore_rng_state(first.rng_state())
    assert [first.play(always(1)).states for _ in range(6)] == [second.play(always(1)).states for _ in range(6)]


def test_restoring_the_streams_between_episodes_replays_the_episode():
    # A checkpoint restores the acting stream between episodes; the player must act on the
    # restored stream, not on a chooser it kept from before. Breakage: the kept chooser
    # reused although its uniform reader is stale.
    spec = EnvironmentSpec(id="support.corridor:Corridor", max_episode_steps=20)
    source = GymEpisodes(make_environment(spec), 50)
    source.seed(5)
    player = EpisodePlayer(source, make_variant("on_policy", 1.0, True, None), Constant(0.6), [])
    q, visits = np.zeros((8, 2)), np.zeros(8)
    greedy = [0] * 8  # kept between episodes, as the trainer keeps its greedy actions
    acting, starts = UniformDraws(np.random.default_rng(1)), UniformDraws(np.random.default_rng(2))
    player.play(q, visits, 1, acting, starts, greedy)
    saved_acting, saved_environment = acting.state(), source.rng_state()
    once = [player.play(q, visits, k, acting, starts, greedy).played.actions for k in (2, 3, 4)]
    acting.restore(saved_acting)
    source.restore_rng_state(saved_environment)
    again = [player.play(q, visits, k, acting, starts, greedy).played.actions for k in (2, 3, 4)]
    assert once == again and len({tuple(a) for a in once}) > 1
