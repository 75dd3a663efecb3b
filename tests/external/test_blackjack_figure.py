"""Blackjack: the learned policy agrees with the published optimal policy.

Source: Sutton, R. S. and Barto, A. G. (2018), Reinforcement Learning: An Introduction,
2nd edition, Figure 5.2 (the optimal policy for Blackjack found by Monte Carlo ES, under
the rules of Example 5.1, which `Blackjack-v1` with `sab=True` implements). The stick/hit
boundaries below are read from the published figure; they were transcribed from memory
of it, not copied from a file, and match the well-known basic strategy for these rules.

Only states the learned policy visits often are compared (at least 0.2% of episodes),
because rarely visited states carry too few returns to decide close calls. The figure
shows sums 12..21; below 12 hitting cannot bust and is always right under these rules
(common practice, no source), and those states are compared too. A policy
that mimics the dealer (stick from 17) agrees on only 164 of the 200 states (82%), a
random policy on about half: the thresholds below separate learning from either.
"""

import pytest

from qtally.control.schedules import Constant
from qtally.control.variants import make_variant
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.envs.start_adapters import blackjack_start_states
from qtally.trainer import TrainingSettings, train
from support.blackjack_figure import HIT, STICK, figure_5_2_action


def _agreement(environment, outcome, episodes: int, min_share: float) -> tuple[float, int]:
    """Agreement over the decision states visited often enough, of all 280 (sums 4..11 included)."""
    visits = outcome.values.visits.sum(axis=1)
    agree = total = 0
    for p, d, u in blackjack_start_states():
        s = environment.encoder.encode((p, d, u))
        if visits[s] < min_share * episodes:
            continue
        total += 1
        agree += int(outcome.artifact.actions[s] == figure_5_2_action(p, d, u))
    return agree / total, total


def test_dealer_mimic_baseline_disagrees_enough():
    mimic = [(p, d, u) for p in range(12, 22) for d in range(1, 11) for u in (0, 1)]
    agree = sum((STICK if p >= 17 else HIT) == figure_5_2_action(p, d, u) for p, d, u in mimic)
    assert agree == 164


@pytest.mark.parametrize(
    "variant, epsilon, episodes, required, min_compared",
    [
        # Exploring starts begin in every one of the 280 decision states (about 714 starts
        # each), so all of them must be compared, sums 4..11 included: a start list that
        # skipped a sum would leave its rows unvisited and fail the count. Measured 0.986
        # agreement on all 280 at this seed (compiled engine, qtally's Blackjack table).
        ("exploring_starts", 0.0, 200_000, 0.95, 280),
        # On-policy learns the best epsilon-soft policy (epsilon 0.1), which differs from
        # the optimum on a few close calls: measured 0.949 on the 158 often-visited states.
        ("on_policy", 0.1, 200_000, 0.90, 100),
    ],
)
def test_learned_policy_matches_figure_5_2(variant, epsilon, episodes, required, min_compared):
    environment = make_environment(EnvironmentSpec(id="Blackjack-v1", kwargs={"sab": True}))
    outcome = train(
        environment,
        make_variant(variant, 1.0, True, None),
        Constant(epsilon),
        TrainingSettings(episodes=episodes, seed=0, log_every=10_000, eval_every=0, eval_episodes=10),
    )
    agreement, compared = _agreement(environment, outcome, episodes, min_share=0.002)
    assert compared >= min_compared
    assert agreement >= required, f"{variant}: {agreement:.3f} agreement on {compared} states"
