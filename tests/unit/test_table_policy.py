"""The one policy object: tie rule, draw protocol, and agreement between acting and exact probabilities."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qtally.control.action_values import ActionValues
from qtally.control.streams import RandomStreams, UniformDraws
from qtally.control.variants import EpisodeArrays, OffPolicy, OnPolicy
from qtally.engine.compiled_update import CompiledUpdate
from qtally.evaluate.exact import epsilon_soft_probs
from qtally.policy.table_policy import (
    EpsilonGreedyActing,
    TablePolicy,
    epsilon_greedy_decision,
    epsilon_soft_probabilities,
    greedy_actions,
    sample_action,
)

ROWS = [[0.0, 1.0, 1.0, -2.0], [3.0, 3.0, 3.0, 3.0], [-1.0, -5.0, 0.5, 0.5], [2.0, 0.0, 0.0, 0.0]]


@pytest.mark.parametrize("epsilon", [0.0, 0.1, 0.37, 1.0])
def test_acting_draws_each_action_with_exactly_the_probability_it_reports(epsilon):
    # Feed the decision an evenly spaced grid of uniforms: the share of the grid that picks
    # each action is its probability under the decision rule, with no sampling noise.
    # Breakages caught: a wrong tie share, a reported probability that differs from the
    # drawn one, an exploration step that skips an action.
    grid = (np.arange(100_000) + 0.5) / 100_000
    for row in ROWS:
        expected = epsilon_soft_probabilities(np.array([row]), epsilon)[0]
        picks = np.zeros(len(row))
        for u in grid:
            action, probability = epsilon_greedy_decision(row, epsilon, float(u))
            picks[action] += 1
            assert probability == pytest.approx(expected[action], abs=1e-12)
        np.testing.assert_allclose(picks / grid.size, expected, atol=1e-4)


@given(st.lists(st.floats(0.0, 1.0, exclude_max=True), min_size=1, max_size=30), st.sampled_from([0.0, 0.05, 0.3, 1.0]), st.integers(0, 3))
def test_the_kept_acting_object_decides_as_the_reference_decision(uniforms, epsilon, row_index):
    # EpsilonGreedyActing is what training acts with (and what the episode source runs
    # inline); epsilon_greedy_decision is the protocol written plainly. Breakages caught: a
    # kept probability that drifts from the reported one, a wrong explore index, a second draw.
    row = ROWS[row_index]
    greedy = [int(np.argmax(row))]
    draws = iter(uniforms)
    acting = EpsilonGreedyActing(greedy, epsilon, len(row), lambda: next(draws))
    for u in uniforms:
        assert acting(0) == epsilon_greedy_decision(row, epsilon, u)


def test_one_tie_rule_in_acting_exact_evaluation_and_the_artifact():
    q = np.array(ROWS)
    assert greedy_actions(q).tolist() == [1, 0, 2, 0]  # lowest index among the maximal actions
    np.testing.assert_array_equal(epsilon_soft_probs(q, 0.2), epsilon_soft_probabilities(q, 0.2))
    assert [epsilon_greedy_decision(row, 0.0, 0.99)[0] for row in ROWS] == [1, 0, 2, 0]
    np.testing.assert_array_equal(TablePolicy(q).probabilities(0.0).argmax(axis=1), greedy_actions(q))


def test_state_value_of_the_epsilon_soft_policy():
    policy = TablePolicy(np.array([[0.0, 10.0, 2.0]]))
    assert policy.state_value(0, 0.0) == 10.0
    assert policy.state_value(0, 0.3) == pytest.approx(0.1 * 0 + 0.8 * 10 + 0.1 * 2)


def test_table_sampling_follows_the_row_and_never_picks_a_zero():
    row = [0.2, 0.0, 0.5, 0.3]
    cumulative = np.cumsum(row).tolist()
    grid = (np.arange(10_000) + 0.5) / 10_000
    picks = np.bincount([sample_action(cumulative, row, float(u))[0] for u in grid], minlength=4)
    np.testing.assert_allclose(picks / grid.size, row, atol=1e-4)
    assert sample_action(cumulative, row, 0.2)[0] == 2  # the boundary skips the zero-probability action


def test_uniform_draws_match_single_calls_and_restore_mid_block():
    draws = UniformDraws(np.random.default_rng(3))
    reference = np.random.default_rng(3)
    assert [draws.next() for _ in range(2500)] == [reference.random() for _ in range(2500)]
    saved = draws.state()
    ahead = [draws.next() for _ in range(700)]
    streams = RandomStreams(0)
    streams.acting.restore(saved)
    assert [streams.acting.next() for _ in range(700)] == ahead


def test_the_fast_draw_window_and_advance_read_one_stream_in_turns():
    # The gym path reads through ``draw`` (a list iterator chained over blocks), the compiled
    # engine through window/advance, and a checkpoint can fall between any two reads.
    # Breakages caught: a block boundary that repeats or skips a number, a position that
    # forgets what ``draw`` read (state, window and advance would then reread it), and a
    # draw function kept across a move of the stream reading old numbers unnoticed.
    draws = UniformDraws(np.random.default_rng(11))
    reference = np.random.default_rng(11).random(10_000).tolist()
    draw = draws.draw
    read = [draw() for _ in range(1500)]  # across the first block's end
    assert draws.state()["position"] == 1500 - 1024
    window = draws.window(100)
    assert window[:3].tolist() == reference[1500:1503]
    draws.advance(300)
    with pytest.raises(RuntimeError, match="stale"):
        for _ in range(2000):  # the old draw runs out of its block, then refuses
            draw()
    read += reference[1500:1800]
    saved = draws.state()
    read += [draws.next() for _ in range(2000)]
    assert read == reference[:3800]
    again = RandomStreams(0).acting
    again.restore(saved)
    assert [again.draw() for _ in range(2000)] == reference[1800:3800]


def test_first_visit_is_per_state_action_pair():
    # State 0 is visited twice with different actions: both pairs get their first return.
    # Breakage caught: first visits keyed on the state alone (the second pair would be skipped).
    episode = EpisodeArrays(np.array([0, 0]), np.array([0, 1]), np.array([1.0, 2.0]), np.array([1.0, 1.0]))
    values = ActionValues.zeros(1, 2)
    OnPolicy(gamma=1.0, first_visit=True).update(values, episode)
    assert values.q[0].tolist() == [3.0, 2.0] and values.visits[0].tolist() == [1, 1]
    values = ActionValues.zeros(1, 2)
    values.q[0] = [0.0, 5.0]  # target: action 1, the last action taken; the loop reaches t = 0
    OffPolicy(gamma=1.0, first_visit=True).update(values, EpisodeArrays(np.array([0, 0]), np.array([0, 1]), np.array([1.0, 2.0]), np.array([0.5, 0.5])))
    assert values.visits[0].tolist() == [1, 1]


def test_state_value_adds_left_to_right_as_the_compiled_kernel_does():
    """With eight actions or more numpy's mean sums pairwise; the tail value must not depend on that."""
    rows = np.random.default_rng(8).normal(size=(2000, 10)) * 37.0
    policy = TablePolicy(rows)
    numpy_mean_differs = 0
    for s, row in enumerate(rows):
        total = 0.0
        for value in row.tolist():
            total += value
        expected = 0.3 * (total / 10) + 0.7 * row.max()
        assert policy.state_value(s, 0.3) == expected
        numpy_mean_differs += 0.3 * row.mean() + 0.7 * row.max() != expected
    assert numpy_mean_differs > 0  # the rule matters on these rows


@settings(max_examples=60, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    variant_class=st.sampled_from([OnPolicy, OffPolicy]),
    first_visit=st.booleans(),
    step_size=st.sampled_from([None, 0.5, 1.0]),
    compiled=st.booleans(),
)
def test_the_greedy_actions_kept_by_the_updates_are_the_tables_lowest_index_argmax(seed, variant_class, first_visit, step_size, compiled):
    # The gym path acts on ActionValues.greedy, which the updates (the Python loop, or the
    # compiled one for long episodes) keep in step entry by entry instead of reading each
    # row. Small integer rewards and step size 1 make ties and drops of the greedy action's
    # own value common.
    # Breakages caught: skipping the row read when the greedy value drops, taking a tied
    # higher-index action (or missing a tied lower-index one), an update path that writes
    # q without following it; and an off-policy loop that cuts against a stale target.
    rng = np.random.default_rng(seed)
    n_states, n_actions = 4, 3
    values = ActionValues.zeros(n_states, n_actions)
    reference = ActionValues.zeros(n_states, n_actions)
    variant = variant_class(gamma=1.0, first_visit=first_visit, step_size=step_size)
    update = CompiledUpdate(variant) if compiled else variant
    for _ in range(25):
        length = int(rng.integers(1, 7))
        states = rng.integers(n_states, size=length).tolist()
        actions = rng.integers(n_actions, size=length).tolist()
        rewards = rng.integers(-2, 3, size=length).astype(float).tolist()
        behaviour = rng.choice([0.25, 0.5, 1.0], size=length).tolist()
        used = update.update_lists(values, states, actions, rewards, behaviour, 0.0)
        assert values.greedy.tolist() == values.q.argmax(axis=1).tolist()
        # The same update against a table whose greedy list is read afresh each time.
        reference.forget_greedy()
        assert variant.update_lists(reference, states, actions, rewards, behaviour, 0.0) == used
        np.testing.assert_array_equal(values.q, reference.q)
