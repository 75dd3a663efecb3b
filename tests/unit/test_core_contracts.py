"""Small contracts of the learning core that mutation testing showed unguarded (scripts/mutation.sh).

Schedules, truncation rules and streams refuse bad settings with one line naming the key,
the value and what is allowed, and accept the edge of their range; streams hand out the
seeds and states a checkpoint relies on; returns and masks keep their types; the policy
object's defaults are the greedy policy. Each test names the breakage it catches.
"""

import numpy as np
import pytest

from qtally.control.action_values import ActionValues
from qtally.control.returns import discounted_returns, visit_mask
from qtally.control.schedules import Constant, ExponentialDecay, GlieEpisodes, GlieVisits, LinearDecay, make_schedule
from qtally.control.streams import SEED_MODULUS, RandomStreams, UniformDraws, evaluation_seeds
from qtally.control.truncation import check_truncation, default_step_cap, resolve_step_cap
from qtally.policy.table_policy import TablePolicy, epsilon_greedy_decision, epsilon_soft_probabilities, greedy_actions, sample_action


# ---------------------------------------------------------------- schedules


@pytest.mark.parametrize(
    "build, message",
    [
        (lambda: Constant(1.5), r"^schedule\.epsilon=1\.5 is outside \[0, 1\]"),
        (lambda: LinearDecay(start=-0.1, end=0.0, decay_episodes=5), r"^schedule\.start=-0\.1 is outside"),
        (lambda: LinearDecay(start=1.0, end=2.0, decay_episodes=5), r"^schedule\.end=2\.0 is outside"),
        (lambda: LinearDecay(start=1.0, end=0.0, decay_episodes=0), r"^schedule\.decay_episodes=0 must be a positive episode count$"),
        (lambda: ExponentialDecay(start=3.0, rate=0.5, floor=0.0), r"^schedule\.start=3\.0 is outside"),
        (lambda: ExponentialDecay(start=1.0, rate=0.5, floor=-1.0), r"^schedule\.floor=-1\.0 is outside"),
        (lambda: ExponentialDecay(start=1.0, rate=1.5, floor=0.0), r"^schedule\.rate=1\.5 must lie in \(0, 1\]$"),
        (lambda: ExponentialDecay(start=1.0, rate=0.0, floor=0.0), r"^schedule\.rate=0\.0 must lie in"),
        (lambda: GlieEpisodes(scale=0.0, floor=0.0), r"^schedule\.scale=0\.0 must be positive$"),
        (lambda: GlieEpisodes(scale=1.0, floor=1.2), r"^schedule\.floor=1\.2 is outside"),
        (lambda: GlieVisits(scale=0.0, floor=0.0), r"^schedule\.scale=0\.0 must be positive$"),
        (lambda: GlieVisits(scale=1.0, floor=-0.5), r"^schedule\.floor=-0\.5 is outside"),
        (lambda: make_schedule("cosine"), r"^schedule\.kind='cosine' is unknown; choose one of constant, linear, exponential, glie_episode, glie_visits$"),
    ],
)
def test_a_bad_schedule_setting_is_named_in_one_line(build, message):
    # Breakages caught: a check that no longer fires at the edge (scale 0, rate 1.5), a
    # message naming the wrong key or none.
    with pytest.raises(ValueError, match=message):
        build()


def test_the_edges_of_each_schedule_range_are_accepted():
    # Breakage caught: an off-by-one in a range check (decay over a single episode, a rate of
    # exactly 1, the smallest positive scale are all legitimate settings).
    assert LinearDecay(start=1.0, end=0.0, decay_episodes=1)(2, 0) == 0.0
    assert ExponentialDecay(start=0.4, rate=1.0, floor=0.0)(50, 0) == 0.4
    assert GlieEpisodes(scale=1e-9, floor=0.0)(1, 0) == pytest.approx(1e-9)
    assert GlieVisits(scale=1e-9, floor=0.0)(1, 0) == pytest.approx(1e-9)
    assert Constant(0.0)(1, 0) == 0.0 and Constant(1.0)(1, 0) == 1.0


# ---------------------------------------------------------------- truncation and the step cap


def test_an_unknown_truncation_rule_is_named_with_its_key_and_the_choices():
    with pytest.raises(ValueError, match=r"^env\.truncation='cut' is unknown; choose one of as_terminal, bootstrap, discard$"):
        check_truncation("cut")
    with pytest.raises(ValueError, match=r"^prediction\.truncation='cut' is unknown"):
        check_truncation("cut", key="prediction.truncation")


def test_step_cap_edges():
    # Breakages caught: the ceiling moved, a cap of one step refused, the message lost.
    assert default_step_cap(100_000) == 1_000_000
    assert default_step_cap(10**7) == 1_000_000
    assert resolve_step_cap(1, 16) == 1
    with pytest.raises(ValueError, match=r"^env\.step_cap=0 must be a positive number of steps, or null for the default$"):
        resolve_step_cap(0, 16)


# ---------------------------------------------------------------- streams


def test_evaluation_seeds_count_up_from_the_base_and_wrap_in_the_31_bit_range():
    # Breakages caught: seeds counting down, or divided instead of wrapped (floats, which
    # environments refuse as seeds).
    seeds = evaluation_seeds(SEED_MODULUS - 2, 4)
    assert seeds.tolist() == [SEED_MODULUS - 2, SEED_MODULUS - 1, 0, 1]
    assert seeds.dtype.kind == "i"


def test_stream_seeds_are_integers_in_range_and_differ_by_seed():
    # Breakage caught: a derived seed divided by the modulus (a float below 1).
    first, second = RandomStreams(7), RandomStreams(8)
    for streams in (first, second):
        for seed in (streams.env_seed, streams.evaluation_base):
            assert isinstance(seed, int) and 0 <= seed < SEED_MODULUS
    assert first.env_seed != second.env_seed and first.evaluation_base != second.evaluation_base
    assert first.env_seed != first.evaluation_base


def test_a_state_taken_before_any_draw_or_right_after_a_restore_can_be_restored():
    # A checkpoint may be written before the first decision, and a resumed run may be
    # checkpointed again before it draws. Breakage caught: the block's start state not
    # recorded at construction or at restore (None would be saved).
    fresh = UniformDraws(np.random.default_rng(5))
    saved = fresh.state()
    expected = [fresh.next() for _ in range(5)]
    again = UniformDraws(np.random.default_rng(99))
    again.restore(saved)
    resaved = again.state()
    third = UniformDraws(np.random.default_rng(123))
    third.restore(resaved)
    assert [third.next() for _ in range(5)] == expected


def test_streams_of_another_seed_are_refused_by_name():
    streams = RandomStreams(7)
    with pytest.raises(ValueError, match=r"^these streams belong to seed 5, not 7$"):
        streams.restore(RandomStreams(5).state())


# ---------------------------------------------------------------- returns, masks, tables


def test_integer_rewards_with_a_fractional_tail_are_not_truncated():
    # Breakage caught: rewards kept in their own (integer) type, so the tail 0.5 * 0.5 added
    # to the last reward would be cut to 0.
    np.testing.assert_allclose(discounted_returns(np.array([1, 0, 2]), gamma=0.5, tail_value=0.5), [1.5625, 1.125, 2.25])


def test_an_every_visit_mask_selects_every_step():
    # The mask is used to index arrays of returns. Breakage caught: a mask of ones that is
    # not boolean (it would index element 1 over and over instead of selecting).
    returns = np.array([3.0, 4.0, 5.0])
    np.testing.assert_array_equal(returns[visit_mask(np.array([2, 2, 7]), first_visit=False)], returns)


def test_coverage_is_the_share_of_pairs_with_a_return():
    values = ActionValues.zeros(4, 2)
    values.visits[0, 1] = 3
    values.visits[2, 0] = 1
    values.visits[3, 1] = 7
    assert values.coverage() == 3 / 8


def test_the_policy_object_defaults_to_the_greedy_policy():
    # Breakages caught: a default epsilon other than 0 for probabilities or state values,
    # greedy actions not read from the table.
    policy = TablePolicy(np.array([[0.0, 4.0, 1.0], [2.0, 2.0, -1.0]]))
    assert policy.greedy_actions().tolist() == [1, 0]
    np.testing.assert_array_equal(policy.probabilities(), [[0.0, 1.0, 0.0], [1.0, 0.0, 0.0]])
    assert policy.state_value(0) == 4.0


def test_table_sampling_of_a_certain_action_always_picks_it():
    # Breakage caught: the zero-probability skip testing for 1 instead of 0.
    grid = (np.arange(1000) + 0.5) / 1000
    for hot in range(3):
        row = [0.0, 0.0, 0.0]
        row[hot] = 1.0
        cumulative = np.cumsum(row).tolist()
        assert {sample_action(cumulative, row, float(u)) for u in grid} == {(hot, 1.0)}


def test_table_sampling_scales_the_uniform_by_the_row_total():
    # Rows are sampled in proportion to their entries whatever their total (here 0.5, as a
    # row of a sub-stochastic table would be). Breakage caught: u divided by the total.
    row = [0.1, 0.0, 0.4]
    cumulative = np.cumsum(row).tolist()
    grid = (np.arange(10_000) + 0.5) / 10_000
    picks = np.bincount([sample_action(cumulative, row, float(u))[0] for u in grid], minlength=3)
    np.testing.assert_allclose(picks / grid.size, [0.2, 0.0, 0.8], atol=1e-3)


def test_the_draw_protocol_explores_only_strictly_below_epsilon():
    # u < epsilon explores, u >= epsilon is greedy. Breakages caught: `<=` (at u == epsilon the
    # last action would be forced, and a greedy policy, epsilon 0, would divide by zero at u = 0).
    row = [0.0, 3.0, 1.0]
    assert epsilon_greedy_decision(row, 0.5, 0.5) == (1, pytest.approx(0.5 + 0.5 / 3))
    assert epsilon_greedy_decision(row, 0.0, 0.0) == (1, 1.0)


@pytest.mark.parametrize("epsilon, shown", [(1.5, "1.5..1.5"), (-0.1, "-0.1..-0.1"), (np.array([0.2, 1.5]), "0.2..1.5")])
def test_epsilon_soft_probabilities_refuse_an_epsilon_outside_the_unit_interval(epsilon, shown):
    # Breakage caught: the range check joined with `&` (never true) or widened.
    with pytest.raises(ValueError, match=rf"^epsilon must be in \[0, 1\], got {shown}$"):
        epsilon_soft_probabilities(np.zeros((2, 3)), epsilon)


def test_greedy_actions_with_a_tolerance_compare_within_each_row():
    # Within atol of the row's best counts as tied, the edge included; the lowest such index
    # wins. Breakages caught: the best taken over the whole table, `>` for `>=`, the
    # tolerance ignored for atol = 1.
    assert greedy_actions(np.array([[0.0, 5.0], [10.0, 20.0]]), atol=1.0).tolist() == [1, 1]
    assert greedy_actions(np.array([[1.0, 2.0]]), atol=1.0).tolist() == [0]
    assert greedy_actions(np.array([[1.0, 1.5]]), atol=1.0).tolist() == [0]
    assert greedy_actions(np.array([[1.0, 1.5]])).tolist() == [1]
