"""Weighted importance sampling across episodes: first visits, the running weighted average, the constant step.

Each test names the breakage it catches (found by mutation testing, scripts/mutation.sh).
The expected values are worked by hand from Q = sum_i W_i G_i / sum_i W_i
(Sutton & Barto 2018, section 5.6, incremental weighted-IS update).
"""

import numpy as np
import pytest

from qtally.control.action_values import ActionValues
from qtally.control.variants import EpisodeArrays, ExploringStarts, OffPolicy, OnPolicy, make_variant


def _episode(states, actions, rewards, behaviour):
    return EpisodeArrays(np.array(states), np.array(actions), np.array(rewards, dtype=float), np.array(behaviour, dtype=float))


def test_returns_of_two_episodes_are_averaged_with_their_weights():
    # Target: action 1 in state 0, action 0 in state 1 (fixed by the Q values, which stay
    # ordered). Episode A ends (0, 1) -> (1, 0): the pair (0, 1) carries W = 1 / 0.5 = 2 and
    # return 4. Episode B: (0, 1) -> (1, 0) with b = 0.25: W = 4, return 10.
    # Q(0, 1) = (2 * 4 + 4 * 10) / (2 + 4) = 8. Breakages caught: C = W instead of C += W
    # (Q would be the last return, 10), a visit count that is set instead of added.
    values = ActionValues.zeros(2, 2)
    values.q[0] = [-100.0, 0.0]
    values.q[1] = [50.0, -100.0]
    off = OffPolicy(gamma=1.0)
    off.update(values, _episode([0, 1], [1, 0], [0.0, 4.0], [0.9, 0.5]))
    values.q[1] = [50.0, -100.0]  # keep the target action in state 1 where it was
    off.update(values, _episode([0, 1], [1, 0], [0.0, 10.0], [0.9, 0.25]))
    assert values.cumulative_weights[0, 1] == pytest.approx(6.0)
    assert values.q[0, 1] == pytest.approx(8.0)
    assert values.visits[0, 1] == 2


def test_first_visit_off_policy_counts_a_repeated_pair_once():
    # The pair (0, 1) occurs at t = 0 and t = 1; both steps follow the target (action 1).
    # First-visit: only t = 0 updates, with return 1 + 2 = 3 and W = 1 / 0.5.
    # Every-visit: t = 1 (return 2, W = 1) and t = 0 (return 3, W = 2): Q = (2 + 6) / 3.
    # Breakage caught: first_visit ignored by the off-policy update.
    episode = _episode([0, 0], [1, 1], [1.0, 2.0], [0.5, 0.5])
    first = ActionValues.zeros(1, 2)
    first.q[0] = [0.0, 5.0]
    OffPolicy(gamma=1.0, first_visit=True).update(first, episode)
    assert first.visits[0, 1] == 1
    assert first.q[0, 1] == pytest.approx(3.0)
    every = ActionValues.zeros(1, 2)
    every.q[0] = [0.0, 5.0]
    OffPolicy(gamma=1.0, first_visit=False).update(every, episode)
    assert every.visits[0, 1] == 2
    assert every.q[0, 1] == pytest.approx(8.0 / 3.0)


def test_first_visit_keys_do_not_collide_across_pairs():
    # Pairs (2, 0) and (0, 1) are different; with 2 actions a key built as s / |A| + a
    # would give both 1.0 and skip the second as a repeat. Breakage caught: a key that
    # is not one-to-one in (state, action).
    values = ActionValues.zeros(3, 2)
    values.q[0] = [0.0, 1.0]
    values.q[2] = [1.0, 0.0]
    OffPolicy(gamma=1.0, first_visit=True).update(values, _episode([2, 0], [0, 1], [0.0, 1.0], [0.5, 0.5]))
    assert values.visits[0, 1] == 1 and values.visits[2, 0] == 1


@pytest.mark.parametrize("behaviour, first_step", [(0.9, 0.1 / 0.9), (0.05, 1.0)])
def test_a_constant_step_is_scaled_by_the_weight_and_capped_at_one(behaviour, first_step):
    # The last step (state 1) is updated with W = 1: Q(1, 0) = 1 + 0.1 * (10 - 1). The first
    # step then carries W = 1 / b: its step is 0.1 / b, capped at 1 (b = 0.05 gives 2, so
    # Q jumps to the return and not past it). Breakages caught: the cap removed or changed,
    # the weight divided instead of multiplied.
    values = ActionValues.zeros(2, 2)
    values.q[1] = [1.0, 0.0]
    values.q[0] = [1.0, 0.0]
    used = OffPolicy(gamma=1.0, step_size=0.1).update(values, _episode([0, 1], [0, 0], [0.0, 10.0], [0.5, behaviour]))
    assert used == 2
    assert values.q[1, 0] == pytest.approx(1.0 + 0.1 * (10.0 - 1.0))
    assert values.q[0, 0] == pytest.approx(1.0 + first_step * (10.0 - 1.0))


def test_an_empty_episode_uses_no_steps_and_changes_nothing():
    values = ActionValues.zeros(2, 2)
    empty = _episode([], [], [], [])
    assert OffPolicy(gamma=1.0).update(values, empty) == 0
    assert OnPolicy(gamma=1.0).update(values, empty) == 0
    assert not values.visits.any() and not values.q.any()


@pytest.mark.parametrize("name, cls", [("on_policy", OnPolicy), ("off_policy", OffPolicy), ("exploring_starts", ExploringStarts)])
@pytest.mark.parametrize("first_visit", [True, False])
def test_make_variant_passes_every_setting_on(name, cls, first_visit):
    # Breakage caught: make_variant dropping first_visit (each class would use its default).
    variant = make_variant(name, 0.7, first_visit, 0.05)
    assert isinstance(variant, cls)
    assert (variant.gamma, variant.first_visit, variant.step_size) == (0.7, first_visit, 0.05)


def test_an_unknown_variant_is_named_with_the_choices():
    with pytest.raises(ValueError, match=r"^variant\.name='sarsa' is unknown; choose one of exploring_starts, on_policy, off_policy$"):
        make_variant("sarsa", 1.0, True, None)
