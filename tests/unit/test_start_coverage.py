"""Exploring starts begin everywhere an episode can go: every bundled start adapter is checked.

A start list that misses a reachable state leaves that state's row of the Q table at its
initial values under ``variant=exploring_starts``, so the greedy policy acts there by a
tie (Blackjack's old adapter skipped player sums 4..11 and stuck on all of them). For an
environment with a model, the reachable non-terminal states come from the model under the
uniform policy (any state some policy reaches is reached by the uniform one); for
Blackjack, independently of its model (qtally's own table, which the check should not
trust), from 20,000 seeded uniform-random hands of the real game (all 280 decision states
show up by hand ~9,800 at this seed).
"""

from __future__ import annotations

from importlib import resources

import numpy as np
import pytest

from qtally.envs.factory import make_environment
from qtally.envs.model import NoModelError
from qtally.envs.model_extraction import model_of
from qtally.evaluate.exact import reachable_states
from qtally.experiment import bundled_environment_spec

BUNDLED = sorted(p.name.removesuffix(".yaml") for p in (resources.files("qtally.configs") / "env").iterdir() if p.name.endswith(".yaml"))
WITHOUT_START_CONTROL = {"cartpole_binned"}  # continuous state: no list of starts to give


@pytest.fixture(params=BUNDLED)
def bundled(request):
    environment = make_environment(bundled_environment_spec(request.param)[0])
    yield request.param, environment
    environment.close()


def _reachable_by_model(environment) -> set[int] | None:
    try:
        model = model_of(environment.env)
    except NoModelError:
        return None
    uniform = np.full((model.n_states, model.n_actions), 1.0 / model.n_actions)
    return set(np.flatnonzero(reachable_states(model, uniform) & ~model.terminal).tolist())


def _reachable_by_simulation(environment, episodes: int, seed: int) -> set[int]:
    """Table indices of every observation an action was taken in, over uniform-random episodes."""
    rng = np.random.default_rng(seed)
    env, seen = environment.env, set()
    env.reset(seed=seed)
    for _ in range(episodes):
        observation, _ = env.reset()
        done = False
        while not done:
            seen.add(environment.encoder.encode(observation))
            observation, _, terminated, truncated, _ = env.step(int(rng.integers(environment.n_actions)))
            done = terminated or truncated
    return seen


def test_every_bundled_environment_is_covered_here(bundled):
    name, environment = bundled
    assert (environment.start_control is None) == (name in WITHOUT_START_CONTROL), name


def test_start_states_cover_every_reachable_non_terminal_state(bundled):
    name, environment = bundled
    if environment.start_control is None:
        pytest.skip(f"{name} has no start control")
    starts = {environment.encoder.encode(o) for o in environment.start_control.start_states()}
    reachable = _reachable_by_model(environment)
    if reachable is None:
        reachable = _reachable_by_simulation(environment, episodes=20_000, seed=0)
    missing = sorted(reachable - starts)
    assert not missing, f"{name}: {len(missing)} reachable states are never a start, e.g. {[environment.encoder.describe(s) for s in missing[:5]]}"
    # Terminal states are never starts (an episode there has no action to take).
    try:
        model = model_of(environment.env)
    except NoModelError:
        return
    assert not model.terminal[sorted(starts)].any(), name


def test_reset_to_lands_in_the_chosen_state(bundled):
    # A start list is only as good as reset_to: each start must come back as the observation asked for.
    name, environment = bundled
    if environment.start_control is None:
        pytest.skip(f"{name} has no start control")
    environment.env.reset(seed=1)
    for observation in environment.start_control.start_states():
        landed, _ = environment.start_control.reset_to(observation)
        assert environment.encoder.encode(landed) == environment.encoder.encode(observation), (name, observation, landed)


def test_blackjack_starts_deal_the_hands_a_deal_would():
    # Soft 21 starts as the natural [1, 10] (what a fresh deal showing soft 21 always is), hard 21
    # as three cards, low sums as two cards without an ace; the dealer shows the chosen card.
    environment = make_environment(bundled_environment_spec("blackjack")[0])
    environment.env.reset(seed=0)
    core = environment.env.unwrapped
    environment.start_control.reset_to((21, 7, 1))
    assert sorted(core.player) == [1, 10] and core.dealer[0] == 7
    environment.start_control.reset_to((21, 1, 0))
    assert len(core.player) == 3 and sum(core.player) == 21 and 1 not in core.player
    environment.start_control.reset_to((4, 10, 0))
    assert core.player == [2, 2] and core.dealer[0] == 10
    environment.close()
