"""RestockEnv: accounting, the exact model against the simulator, start control, rendering."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env

from qtally.envs.model import NoModelError
from qtally.envs.restock import RESTOCK_ID, RestockEnv, demand_pmf, make_newsvendor_kwargs, register_restock

MONEY_ITEMS = ("revenue", "ordering_cost", "holding_cost", "spoilage_cost", "lost_sale_cost", "salvage_revenue")
REQUIRED_INFO = ("sold", "demand", "lost", "spoiled", "ordered") + MONEY_ITEMS[:-1]


def _index(obs, nvec) -> int:
    return int(np.ravel_multi_index(tuple(int(v) for v in obs), tuple(int(v) for v in nvec)))


@pytest.mark.parametrize("stock_cap", [None, 2])
def test_units_balance_and_reward_is_itemised(stock_cap):
    # stock_cap=2 below max_order=5 makes the cap bind, so discarding is exercised too.
    env = RestockEnv(stock_cap=stock_cap, salvage_value=0.3)
    rng = np.random.default_rng(11)
    obs, _ = env.reset(seed=5)
    totals = dict.fromkeys(("ordered", "sold", "spoiled", "discarded", "salvaged"), 0)
    for _ in range(1500):
        stock_before = int(obs[1:].sum())
        obs, reward, terminated, truncated, info = env.step(int(rng.integers(0, env.max_order + 1)))
        assert all(key in info for key in REQUIRED_INFO)
        stock_after = int(obs[1:].sum())
        units_out = info["sold"] + info["spoiled"] + info["discarded"] + info["salvaged"]
        assert info["ordered"] == units_out + stock_after - stock_before
        assert info["kept"] == stock_after
        assert info["sold"] + info["lost"] == info["demand"]
        expected = (
            info["revenue"] + info["salvage_revenue"] - info["ordering_cost"] - info["holding_cost"]
            - info["spoilage_cost"] - info["lost_sale_cost"]
        )
        assert reward == pytest.approx(expected, abs=1e-12)
        assert info["revenue"] == pytest.approx(env.price * info["sold"])
        assert info["ordering_cost"] == pytest.approx(env.unit_cost * info["ordered"])
        assert info["holding_cost"] == pytest.approx(env.holding_cost * info["kept"])
        assert info["spoilage_cost"] == pytest.approx(env.spoilage_cost * (info["spoiled"] + info["discarded"]))
        assert info["lost_sale_cost"] == pytest.approx(env.lost_sale_cost * info["lost"])
        assert np.all(obs[1:] <= env.stock_cap)
        assert not truncated
        for key in totals:
            totals[key] += info[key]
        if terminated:
            assert obs.tolist() == [env.horizon] + [0] * (env.shelf_life - 1)
            obs, _ = env.reset()
    assert totals["sold"] > 0 and totals["spoiled"] > 0 and totals["salvaged"] > 0
    if stock_cap == 2:
        assert totals["discarded"] > 0
    else:
        assert totals["discarded"] == 0  # the default cap equals max_order and never binds


def test_fifo_sells_oldest_first():
    env = RestockEnv(shelf_life=3, stock_cap=5, weekly_demand_means=(5.0,) * 7)
    env.reset(seed=0)
    seen = set()
    for _ in range(60):
        env.reset_to((2, 2, 3))
        _, _, _, _, info = env.step(4)
        assert list(env._last["shelf"]) == [4, 2, 3]
        # The age-2 units go first, then age 1, then the fresh ones.
        sold = info["sold"]
        left = [4 - max(sold - 5, 0), 2 - min(max(sold - 3, 0), 2), 3 - min(sold, 3)]
        assert info["spoiled"] == left[2]
        assert env._stock.tolist() == [left[0], left[1]]
        seen.add(sold)
    assert len(seen) >= 5  # demand varied enough to cover every age being emptied


@pytest.mark.parametrize(
    "kwargs, observation, action",
    [
        ({}, (0, 0, 0), 3),
        ({}, (5, 2, 4), 1),  # Saturday, busy
        ({}, (13, 3, 1), 2),  # last day: salvage, nothing kept
        ({"stock_cap": 2, "salvage_value": 0.5}, (3, 2, 2), 5),  # cap binds
    ],
)
def test_model_matches_simulator(kwargs, observation, action):
    """Empirical next-state frequencies and mean reward against the exact model.

    n = 4000 samples a pair. A frequency is compared with its model probability p within
    5 standard errors sqrt(p (1 - p) / n) + 1e-3, the mean reward within 5 standard errors
    of the sample mean: a false alarm has probability below 1e-5 a comparison, and the seed
    is fixed anyway. An off-by-one in ageing, capping or the state numbering moves whole
    probability masses (tenths) between next states or puts observed states where the model
    has none (the support check), far beyond these bands. The reward band is about 0.25
    here, so small reward errors are left to the exact checks of
    ``test_expected_reward_by_hand`` and the itemised accounting test.
    """
    env = RestockEnv(**kwargs)
    model = env.tabular_model()
    n_actions = model.n_actions
    s = _index(observation, env.nvec)
    row = model.transitions[[s * n_actions + action], :].toarray().ravel()
    env.reset(seed=123)
    n = 4000
    counts = np.zeros(model.n_states)
    rewards = np.empty(n)
    for k in range(n):
        env.reset_to(observation)
        obs, rewards[k], _, _, _ = env.step(action)
        counts[_index(obs, env.nvec)] += 1
    freq = counts / n
    assert np.all(row[counts > 0] > 0), "simulator reached a state the model says is impossible"
    tolerance = 5 * np.sqrt(row * (1 - row) / n) + 1e-3
    assert np.all(np.abs(freq - row) <= tolerance)
    assert abs(rewards.mean() - model.rewards[s, action]) <= 5 * rewards.std() / np.sqrt(n) + 1e-9


def test_expected_reward_by_hand():
    """Expected rewards of a no-carry-over product, summed over the demand pmf independently."""
    price, cost, spoil, lost, salvage = 4.0, 1.5, 0.5, 1.0, 0.25
    env = RestockEnv(
        horizon=2, shelf_life=1, max_order=6, price=price, unit_cost=cost, holding_cost=0.3,
        spoilage_cost=spoil, lost_sale_cost=lost, salvage_value=salvage, max_demand=5,
    )
    model = env.tabular_model()
    demand = np.arange(6)
    for day in (0, 1):  # day 0 leftovers spoil overnight; day 1 is the last, they are salvaged
        pmf = demand_pmf(env.weekly_demand_means[day], 5)
        for q in range(7):
            over, short = np.maximum(q - demand, 0), np.maximum(demand - q, 0)
            leftover_value = salvage * over if day == 1 else -spoil * over
            by_demand = price * np.minimum(q, demand) - cost * q - lost * short + leftover_value
            assert model.rewards[day, q] == pytest.approx(float(pmf @ by_demand), abs=1e-12)


def test_model_rows_and_shapes():
    env = RestockEnv()
    model = env.tabular_model()
    n_states, n_actions = int(np.prod(env.nvec)), env.max_order + 1
    assert (model.n_states, model.n_actions) == (n_states, n_actions) == (540, 6)
    assert model.transitions.shape == (n_states * n_actions, n_states)
    row_sums = np.asarray(model.transitions.sum(axis=1)).reshape(n_states, n_actions)
    live = ~model.terminal
    np.testing.assert_allclose(row_sums[live], 1.0, atol=1e-12)
    assert np.all(row_sums[model.terminal] == 0)
    assert np.all(model.rewards[model.terminal] == 0)
    # Terminal layer is exactly day == horizon.
    days = np.unravel_index(np.arange(n_states), tuple(env.nvec))[0]
    np.testing.assert_array_equal(model.terminal, days == env.horizon)
    # The season moves one day per step.
    rows, cols = model.transitions.nonzero()
    np.testing.assert_array_equal(days[cols], days[rows // n_actions] + 1)
    assert model.start_distribution[_index((0, 0, 0), env.nvec)] == 1.0
    assert model.start_distribution.sum() == 1.0


def test_demand_pmf_is_censored_poisson():
    pmf = demand_pmf(4.5, 6)
    assert pmf.sum() == pytest.approx(1.0, abs=1e-12)
    env = RestockEnv(max_demand=6)
    env.reset(seed=2)
    draws = []
    for _ in range(3000):
        env.reset_to((5, 0, 0))  # Saturday, mean 4.5
        draws.append(env.step(0)[4]["demand"])
    freq = np.bincount(draws, minlength=7) / len(draws)
    assert np.all(np.abs(freq - pmf) <= 5 * np.sqrt(pmf * (1 - pmf) / len(draws)) + 1e-3)


def test_start_states_round_trip():
    env = RestockEnv(horizon=5, shelf_life=3, max_order=2)
    starts = env.start_states()
    assert len(starts) == 5 * 3 * 3
    assert [_index(s, env.nvec) for s in starts] == list(range(len(starts)))
    env.reset(seed=0)
    for state in starts:
        obs, info = env.reset_to(state)
        assert env.observation_space.contains(obs)
        np.testing.assert_array_equal(obs, state)
        assert info["day"] == state[0]
    with pytest.raises(ValueError):
        env.reset_to((5, 0, 0))  # terminal layer
    with pytest.raises(ValueError):
        env.reset_to((0, 3, 0))  # above the cap
    obs, _ = env.reset()
    np.testing.assert_array_equal(obs, [0, 0, 0])


def test_rendering():
    env = RestockEnv(render_mode="ansi")
    env.reset(seed=0)
    assert "day 1/14" in env.render()
    env.step(2)
    text = env.render()
    assert isinstance(text, str) and "age0" in text and "demand" in text
    env = RestockEnv(render_mode="rgb_array")
    env.reset(seed=0)
    frames = [env.render()]
    for _ in range(env.horizon):
        env.step(3)
        frames.append(env.render())
    for frame in frames:
        assert frame.dtype == np.uint8 and frame.ndim == 3 and frame.shape[2] == 3
        assert frame.shape == frames[0].shape
    assert not np.array_equal(frames[0], frames[1])
    assert RestockEnv().render() is None


def test_no_model_above_the_limit():
    env = RestockEnv(model_state_limit=100)
    with pytest.raises(NoModelError, match="states"):
        env.tabular_model()
    big = RestockEnv(horizon=60, shelf_life=4, max_order=8)
    assert big.n_states > 20000
    with pytest.raises(NoModelError):
        big.tabular_model()
    big.reset(seed=0)
    assert big.step(4)[0].shape == (4,)  # still simulates


def test_seeded_runs_repeat():
    def run(seed):
        env = RestockEnv()
        env.reset(seed=seed)
        out = []
        for action in [3, 0, 5, 2, 4, 1, 3, 3, 2, 5, 0, 4, 2, 3]:
            obs, reward, terminated, _, info = env.step(action)
            out.append((tuple(obs), reward, info["demand"]))
        assert terminated
        return out

    assert run(7) == run(7)
    assert run(7) != run(8)


def test_gymnasium_checker_and_registration():
    check_env(RestockEnv(), skip_render_check=True)
    register_restock()
    register_restock()  # idempotent
    env = gym.make(RESTOCK_ID, horizon=3)
    obs, _ = env.reset(seed=0)
    assert obs.shape == (3,)
    env.close()


def test_newsvendor_preset():
    env = RestockEnv(**make_newsvendor_kwargs(mean_demand=5.0))
    assert env.horizon == 1 and env.observation_names == ("day",)
    obs, _ = env.reset(seed=0)
    obs, reward, terminated, _, info = env.step(5)
    assert terminated and obs.tolist() == [1]
    assert info["holding_cost"] == info["lost_sale_cost"] == info["salvage_revenue"] == 0.0
    assert reward == pytest.approx(env.price * info["sold"] - env.unit_cost * 5)


def test_bad_arguments():
    with pytest.raises(ValueError):
        RestockEnv(weekly_demand_means=(1.0, 2.0))
    with pytest.raises(ValueError):
        RestockEnv(render_mode="human")
    env = RestockEnv()
    env.reset(seed=0)
    with pytest.raises(ValueError):
        env.step(env.max_order + 1)
