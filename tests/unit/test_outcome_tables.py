"""Outcome tables replay their environments draw for draw, and merge into the exact model.

Which bug each test catches: outcomes listed out of the environment's order, or merged
(the replay then diverges at the first step where order matters); a reset that does not
spend its uniform (every later step is shifted); the restocking simulator's one-shop
``step`` drifting from the batch arithmetic that defines its model.
"""

import gymnasium as gym
import numpy as np
import pytest

from qtally.envs.model_extraction import model_of, outcomes_of
from qtally.envs.outcomes import pick_outcome
from qtally.envs.restock import RestockEnv


def _replay(table, seed: int, actions: np.random.Generator, episodes: int, time_limit: int):
    """Episodes from the table alone, with the environment's generator replayed by the protocol."""
    u = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed)))
    out = []
    for _ in range(episodes):
        state = int(table.start_states[pick_outcome(table.start_probabilities, u.random())])
        for _ in range(time_limit):
            a = int(actions.integers(table.n_actions))
            row = state * table.n_actions + a
            lo, hi = table.offsets[row], table.offsets[row + 1]
            k = lo + pick_outcome(table.probabilities[lo:hi], u.random())
            out.append((state, a, float(table.rewards[k]), int(table.next_states[k])))
            state = int(table.next_states[k])
            if table.terminated[k]:
                break
    return out


def _play(env, encode, seed: int, actions: np.random.Generator, episodes: int, time_limit: int):
    out = []
    observation, _ = env.reset(seed=seed)
    for episode in range(episodes):
        if episode:
            observation, _ = env.reset()
        state = encode(observation)
        for _ in range(time_limit):
            a = int(actions.integers(env.action_space.n))
            observation, reward, terminated, _, _ = env.step(a)
            out.append((state, a, float(reward), encode(observation)))
            state = encode(observation)
            if terminated:
                break
    return out


@pytest.mark.parametrize(
    "make, encode",
    [
        (lambda: gym.make("FrozenLake-v1", map_name="8x8", is_slippery=True).unwrapped, int),
        (lambda: gym.make("CliffWalking-v1").unwrapped, int),
        (lambda: RestockEnv(), lambda obs: int(np.ravel_multi_index(tuple(obs), RestockEnv().nvec))),
    ],
    ids=["frozen_lake_8x8", "cliff_walking", "restock"],
)
def test_outcome_table_replays_the_environment_draw_for_draw(make, encode):
    env = make()
    table = outcomes_of(env)
    played = _play(env, encode, 11, np.random.default_rng(5), episodes=40, time_limit=60)
    replayed = _replay(table, 11, np.random.default_rng(5), episodes=40, time_limit=60)
    assert len(played) > 200
    assert played == replayed


@pytest.mark.parametrize("make", [lambda: gym.make("FrozenLake-v1", map_name="8x8").unwrapped, lambda: gym.make("Taxi-v4").unwrapped])
def test_outcome_table_merges_into_the_p_table_model(make):
    env = make()
    merged, direct = outcomes_of(env).to_model(), model_of(env)
    np.testing.assert_allclose(merged.transitions.toarray(), direct.transitions.toarray(), atol=1e-12)
    np.testing.assert_allclose(merged.rewards, direct.rewards, atol=1e-12)
    np.testing.assert_array_equal(merged.terminal, direct.terminal)
    np.testing.assert_allclose(merged.start_distribution, direct.start_distribution)


def test_restock_one_shop_step_matches_the_batch_arithmetic_everywhere():
    env = RestockEnv(shelf_life=3, stock_cap=3, max_order=4, max_demand=6)
    for day in (0, env.horizon - 1):
        for stock in np.ndindex(*env.nvec[1:]):
            env.reset_to((day, *stock))
            last = day == env.horizon - 1
            for order in range(env.max_order + 1):
                demand = np.arange(env.max_demand + 1)
                batch = env._serve_days(np.tile(stock, (demand.size, 1)), np.full(demand.size, order), demand, np.full(demand.size, last))
                for d in demand:
                    reward, next_stock, info = env._serve_day(order, int(d), last)
                    assert reward == batch["reward"][d]
                    assert next_stock == batch["next_stock"][d].tolist()
                    assert info["sold"] == batch["sold"][d] and info["discarded"] == batch["discarded"][d]


def test_restock_model_marks_the_whole_last_layer_terminal():
    env = RestockEnv()
    model = env.tabular_model()
    n_stock = int(np.prod(env.nvec[1:]))
    assert model.terminal[env.horizon * n_stock :].all() and not model.terminal[: env.horizon * n_stock].any()
