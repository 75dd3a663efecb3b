"""Unvisited states: a briefly trained table follows its declared fallback there, and says how many there are.

Each test names the breakage it is there to catch.
"""

import numpy as np
import pytest
from omegaconf import OmegaConf

from qtally.config.validate import ConfigError, validate_fallback
from qtally.control.schedules import Constant
from qtally.control.variants import make_variant
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.policy.artifact import PolicyArtifact, load_policy
from qtally.policy.table_policy import Fallback, TablePolicy, UnvisitedStateError
from qtally.trainer import TrainingSettings, train

# 64 cells, 20 episodes: most of the map is never reached (invented stand-in for a short run).
LAKE = EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "8x8", "is_slippery": True}, max_episode_steps=200)


@pytest.fixture(scope="module")
def brief():
    environment = make_environment(LAKE)
    outcome = train(environment, make_variant("on_policy", 0.95, True, None), Constant(0.3), TrainingSettings(episodes=20, seed=3, eval_every=0, eval_episodes=5))
    visited = outcome.values.visits.sum(axis=1) > 0
    assert 1 < visited.sum() < 40 and visited[0]  # the premise: some states reached, many not
    yield environment, outcome, visited
    environment.close()


def _artifact(brief, fallback):
    environment, outcome, _ = brief
    return PolicyArtifact.from_q(outcome.values.q, outcome.values.visits, environment.signature(), fallback=fallback)


def test_visited_share_counts_reached_states(brief):
    # Breakage caught: share taken over pairs instead of states, or inverted.
    _, _, visited = brief
    art = _artifact(brief, Fallback())
    assert art.visited_share == pytest.approx(visited.sum() / 64)
    assert art.policy().visited_share_among(visited) == 1.0
    assert art.policy().visited_share_among(~visited) == 0.0


def test_fixed_action_answers_where_training_never_reached(brief):
    # Breakage caught: the tie of zeros (action 0) answering in unvisited states, or the
    # fallback overriding learned actions. Action 3 differs from that tie.
    _, outcome, visited = brief
    actions = _artifact(brief, Fallback("action", 3)).policy().act(np.arange(64))
    np.testing.assert_array_equal(actions[visited], np.argmax(outcome.values.q, axis=1)[visited])
    assert (actions[~visited] == 3).all()


def test_uniform_fallback_uses_one_uniform_per_decision(brief):
    # Breakage caught: a draw that ignores the given uniform, a different formula than
    # floor(u * |A|), or uniforms consumed on visited states changing their answer.
    _, outcome, visited = brief
    policy = _artifact(brief, Fallback("uniform")).policy()
    uniforms = np.random.default_rng(8).random(64)
    actions = policy.act(np.arange(64), uniforms)
    np.testing.assert_array_equal(actions[~visited], np.floor(uniforms[~visited] * 4).astype(int))
    np.testing.assert_array_equal(actions[visited], np.argmax(outcome.values.q, axis=1)[visited])
    assert policy.act(np.array([0, 0]), np.array([0.0, 0.99])).tolist() == [actions[0]] * 2
    with pytest.raises(ValueError, match="needs uniforms"):
        policy.act(np.arange(64))
    # Over many draws the fallback covers every action about equally (1/4 each, 4000 draws: +-0.03 is > 4 SE).
    many = policy.act(np.full(4000, np.flatnonzero(~visited)[0]), np.random.default_rng(9).random(4000))
    assert np.allclose(np.bincount(many, minlength=4) / 4000, 0.25, atol=0.03)


def test_refuse_names_the_state_in_its_own_terms(brief):
    # Breakage caught: refusing silently acting, or an error without the state.
    environment, _, visited = brief
    policy = _artifact(brief, Fallback("refuse")).policy()
    reached = np.flatnonzero(visited)
    assert policy.act(reached).shape == reached.shape  # visited states need no fallback
    missing = int(np.flatnonzero(~visited)[0])
    with pytest.raises(UnvisitedStateError, match=rf"state {missing}\b") as caught:
        policy.act(np.array([reached[0], missing]))
    assert "\n" not in str(caught.value)
    with pytest.raises(UnvisitedStateError, match=rf"state={missing}\b"):
        policy.act(np.array([missing]), describe=environment.encoder.describe)


def test_the_saved_file_keeps_the_fallback(brief, tmp_path):
    # Breakage caught: fallback or visited lost between the trainer and the file.
    _, _, visited = brief
    loaded = load_policy(_artifact(brief, Fallback("action", 2)).save(tmp_path / "p.npz"))
    np.testing.assert_array_equal(loaded.visited, visited)
    assert (loaded.policy().act(np.flatnonzero(~visited)) == 2).all()


def test_fallback_rules_are_checked():
    with pytest.raises(ValueError, match=r"policy_fallback.rule='guess' is not one of uniform, action, refuse"):
        Fallback("guess")
    with pytest.raises(ValueError, match="needs a non-negative action index"):
        Fallback("action")
    with pytest.raises(ValueError, match="only used with policy_fallback.rule=action"):
        Fallback("uniform", 1)
    with pytest.raises(ValueError, match=r"allowed 0..3"):
        PolicyArtifact.from_q(np.zeros((2, 4)), np.zeros((2, 4)), {}, fallback=Fallback("action", 4))
    assert TablePolicy(np.zeros((2, 2))).visited_share == 1.0  # no visit counts: everything counts as learned


@pytest.mark.parametrize(
    "block, message",
    [
        ({"rule": "random", "action": None}, r"^policy_fallback.rule='random' is unknown; choose one of uniform, action, refuse$"),
        ({"rule": "action", "action": None}, r"^policy_fallback.action=None must be an action index \(0 or more\) when policy_fallback.rule=action$"),
        ({"rule": "action", "action": -1}, r"^policy_fallback.action=-1 must be"),
        ({"rule": "refuse", "action": 2}, r"^policy_fallback.action=2 is only used with policy_fallback.rule=action"),
    ],
)
def test_config_errors_are_one_line(block, message):
    with pytest.raises(ConfigError, match=message):
        validate_fallback(OmegaConf.create(block))
    validate_fallback(OmegaConf.create({"rule": "action", "action": 0}))
