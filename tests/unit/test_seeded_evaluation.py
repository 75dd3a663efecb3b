"""Evaluations that play again only what a policy change can alter give the returns of playing everything.

The reference is a plain Gymnasium loop written here (``reset(seed=...)`` and ``step``
through every wrapper, as the environment's documentation describes), which records each
episode's acted states too: the episodes due again are computed from it, not from the
code under test.
"""

from __future__ import annotations

import numpy as np
import pytest

from qtally.control.schedules import Constant
from qtally.control.streams import evaluation_seeds
from qtally.control.variants import make_variant
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.evaluate.seeded_evaluation import REPEAT_CHECK_EPISODES, SeededEvaluation
from qtally.experiment import bundled_environment_spec
from qtally.trainer import Trainer, TrainingSettings

STEP_CAP = 500  # above every bundled time limit used here: the environment's own limit ends the long episodes


def plain_play(environment, table: list[int], seed: int) -> tuple[float, list[int]]:
    """``(return, acted states)`` of the greedy table from one seeded reset, stepping the wrapped environment."""
    env, encode = environment.env, environment.encoder.encode
    observation, _ = env.reset(seed=int(seed))
    total, acted = 0.0, []
    for _ in range(STEP_CAP):
        state = encode(observation)
        acted.append(state)
        observation, reward, terminated, truncated, _ = env.step(table[state])
        total += float(reward)
        if terminated or truncated:
            break
    return total, acted


def next_table(table: np.ndarray, acted: list[list[int]], n_actions: int, rng: np.random.Generator) -> np.ndarray:
    """``table`` with a new action in one or two states that some but not all of the last episodes acted in."""
    share = np.zeros(table.shape[0])
    for states in acted:
        share[sorted(set(states))] += 1
    some = np.flatnonzero((share > 0) & (share < len(acted)))
    pool = some if some.size else np.arange(table.shape[0])
    new = table.copy()
    for state in rng.choice(pool, size=min(pool.size, int(rng.integers(1, 3))), replace=False):
        new[state] = (new[state] + 1 + rng.integers(n_actions - 1)) % n_actions
    return new


@pytest.mark.parametrize("name", ["frozen_lake_4x4", "restock"])
def test_returns_and_replayed_episodes_match_a_plain_loop(name):
    spec, _ = bundled_environment_spec(name)
    environment, reference = make_environment(spec), make_environment(spec)
    seeds = evaluation_seeds(2024, 150)
    evaluation = SeededEvaluation(seeds, STEP_CAP)
    rng = np.random.default_rng(5)
    table = rng.integers(environment.n_actions, size=environment.n_states)
    previous_table = previous_acted = None
    partial, checked = 0, False
    for k in range(7):
        if k == 6:
            table = previous_table.copy()  # the same policy again: nothing is due
        elif previous_acted is not None:
            table = next_table(previous_table, previous_acted, environment.n_actions, rng)
        plays = [plain_play(reference, table.tolist(), s) for s in seeds]
        returns = evaluation.returns(environment, table)
        np.testing.assert_array_equal(returns, [r for r, _ in plays])
        if previous_acted is None:
            assert evaluation.played == len(seeds)
        else:
            changed = set(np.flatnonzero(table != previous_table).tolist())
            due = sum(1 for acted in previous_acted if changed & set(acted))
            # before the first reuse, a few of the episodes to be kept are played again as a check
            check = 0 if checked or due == len(seeds) else min(REPEAT_CHECK_EPISODES, len(seeds) - due)
            checked = checked or due < len(seeds)
            assert evaluation.played == due + check, f"evaluation {k}: played {evaluation.played}, due {due}, check {check}"
            partial += 0 < due < len(seeds)
        previous_table, previous_acted = table, [acted for _, acted in plays]
    assert partial >= 4, "the sequence must make some evaluations replay part of their episodes"
    assert evaluation.played == 0  # the last table repeats the one before: nothing is played
    assert evaluation.reuse_off_reason is None
    assert evaluation.played_total < evaluation.asked_total == 7 * len(seeds)


def test_replay_all_plays_every_episode_every_time():
    spec, _ = bundled_environment_spec("frozen_lake_4x4")
    environment = make_environment(spec)
    seeds = evaluation_seeds(7, 40)
    remembered, every = SeededEvaluation(seeds, STEP_CAP), SeededEvaluation(seeds, STEP_CAP, replay="all")
    table = np.full(environment.n_states, 2)
    for _ in range(2):
        np.testing.assert_array_equal(every.returns(environment, table), remembered.returns(environment, table))
        assert every.played == len(seeds)
    assert remembered.played == REPEAT_CHECK_EPISODES  # nothing changed: only the check is played
    assert every.summary().startswith("every episode played at every evaluation (eval_replay=all)")
    assert "44 of 80 (55%)" in remembered.summary()  # the second plays 4 of the 40 it keeps, as a check


@pytest.mark.parametrize("walk", ["ForgetfulWalk", "QuietForgetfulWalk"])  # the second differs in its paths only
def test_an_environment_that_does_not_repeat_a_seed_is_played_in_full(walk):
    environment = make_environment(EnvironmentSpec(id=f"support.forgetful:{walk}", max_episode_steps=12))
    seeds = evaluation_seeds(3, 30)
    evaluation = SeededEvaluation(seeds, STEP_CAP)
    table = np.ones(environment.n_states, dtype=np.int64)
    evaluation.returns(environment, table)
    assert evaluation.reuse_off_reason is None and evaluation.played == len(seeds)  # nothing kept yet: nothing checked
    evaluation.returns(environment, table)  # the same policy: every episode would be kept, so the check runs
    assert evaluation.reuse_off_reason is not None and "played seed" in evaluation.reuse_off_reason
    assert evaluation.played > len(seeds)  # the check, then every episode
    evaluation.returns(environment, table)
    assert evaluation.played == len(seeds)  # the same policy, yet every episode again
    assert evaluation.summary().startswith("every episode played at every evaluation (the evaluation environment played seed")


def test_the_check_waits_for_an_evaluation_that_keeps_episodes():
    # The second evaluation changes the start state's action, so every episode is played
    # again and none is kept: nothing can be checked yet. The third keeps them all, so the
    # check must run there. Breakage: the check counted as done when it played nothing.
    environment = make_environment(EnvironmentSpec(id="support.forgetful:ForgetfulWalk", max_episode_steps=12))
    seeds = evaluation_seeds(9, 20)
    evaluation = SeededEvaluation(seeds, STEP_CAP)
    first, second = np.ones(environment.n_states, dtype=np.int64), np.ones(environment.n_states, dtype=np.int64)
    first[0] = 0  # left at the start: the walker never leaves cell 0, slips or not
    evaluation.returns(environment, first)
    evaluation.returns(environment, second)
    assert evaluation.played == len(seeds) and evaluation.reuse_off_reason is None
    evaluation.returns(environment, second)
    assert evaluation.reuse_off_reason is not None


def test_a_summary_before_any_evaluation_reads_none_played():
    # A run paused before its first evaluation still reports; breakage: a division by zero.
    assert SeededEvaluation([1, 2, 3], 10).summary() == "episodes played again only where the greedy action changed: 0 of 0 (0%)"


def test_an_unknown_replay_rule_is_refused():
    with pytest.raises(ValueError, match="replay='some' is unknown; choose one of changed, all"):
        SeededEvaluation([1, 2], 10, replay="some")


def test_a_training_run_logs_the_same_evaluations_either_way():
    spec, truncation = bundled_environment_spec("frozen_lake_4x4")
    histories, trainers = {}, {}
    for replay in ("changed", "all"):
        settings = TrainingSettings(episodes=3000, seed=4, eval_every=250, eval_episodes=300, truncation=truncation, engine="gym", eval_replay=replay)
        trainer = Trainer(make_environment(spec), make_variant("on_policy", 0.99, True, None), Constant(0.2), settings)
        outcome = trainer.run()
        histories[replay] = {name: list(outcome.history[name]) for name in ("eval_return_mean", "eval_return_ci95")}
        trainers[replay] = trainer
    assert histories["changed"] == histories["all"]
    assert len(set(value for _, value in histories["all"]["eval_return_mean"])) >= 3  # the policy changed what evaluations see
    changed, every = trainers["changed"].evaluation, trainers["all"].evaluation
    assert every.played_total == every.asked_total == 12 * 300  # at 250, 500, ..., 3000
    assert 300 + REPEAT_CHECK_EPISODES < changed.played_total < 0.9 * changed.asked_total  # some replayed after the first, not all
