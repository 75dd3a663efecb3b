"""The published optimal Blackjack policy, shared by the tests that check against it.

Source: Sutton, R. S. and Barto, A. G. (2018), Reinforcement Learning: An Introduction,
2nd edition, Figure 5.2 (the optimal policy under the rules of Example 5.1, which
``Blackjack-v1`` with ``sab=True`` implements). The stick/hit boundaries were transcribed
from memory of the figure (recalled from memory), not copied from a file; they match the
well-known basic strategy for these rules. Below 12 the figure shows nothing: there
hitting cannot bust and is always right under these rules (common practice, no source).
"""

STICK, HIT = 0, 1


def figure_5_2_action(player_sum: int, dealer_card: int, usable_ace: int) -> int:
    """The published optimal action (dealer_card 1 is an ace)."""
    if usable_ace:
        if player_sum >= 19:
            return STICK
        if player_sum == 18:
            return STICK if 2 <= dealer_card <= 8 else HIT
        return HIT
    if player_sum >= 17:
        return STICK
    if 13 <= player_sum <= 16:
        return STICK if 2 <= dealer_card <= 6 else HIT
    if player_sum == 12:
        return STICK if 4 <= dealer_card <= 6 else HIT
    return HIT
