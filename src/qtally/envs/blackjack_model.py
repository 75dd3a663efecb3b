"""Gymnasium's ``Blackjack-v1`` as an outcome table, so exact DP can score what is learned there.

Rules (Sutton & Barto 2018, Example 5.1, which ``sab=True`` implements): an infinite deck,
each card 1..9 with probability 1/13 and a ten-valued card with 4/13; the dealer hits below
17 and sticks on 17 or more, soft 17 included; a player natural (ace and ten in two cards)
beats everything except a dealer natural. Probabilities are worked out in exact fractions
and rounded to floats once, at the end.

States are the table indices of the observation encoder ``make_environment`` builds for
Blackjack, so a Q table learned from episodes lines up with the model entry for entry:

- **decision states**: the 280 observations of
  :func:`~qtally.envs.start_adapters.blackjack_start_states` (hard sums 4..21, soft sums
  12..21, dealer card 1..10). Their rows list the game's outcomes.
- **every other index** (424) is a state no episode acts in. Each declares itself terminal
  by an absorbing row ``(1.0, itself, 0.0, terminated)``, as Gymnasium's toy-text tables do
  for FrozenLake's holes, so ``terminal`` marks exactly the non-decision states and
  ``decision_states(model)`` is the 280. A bust ends in the environment's own bust
  observation ``(sum, dealer_card, 0)`` with sum 22..31. A stick ends in :data:`STOOD`,
  the observation ``(0, 0, 0)``: the environment shows the unchanged hand after a stick,
  which is a decision state and cannot double as an end, so the table uses an index the
  game never shows.

Actions are the environment's: 0 stick, 1 hit. A hit lists the ten card values 1..10 in
that order. A stick lists the dealer's final results for the up card in the order 17, 18,
19, 20, 21 by three or more cards, natural, bust (results of probability 0 left out); the
hidden card is drawn inside the stick, so a dealer natural is one of them. Each outcome
carries its own reward (+1, 0, -1). The start distribution lists the distinct first
observations of a deal (player's two cards, dealer's up card) in increasing table index.
The table matches the environment in distribution, not draw for draw (the environment draws
the dealer's hidden card at reset).

**The natural.** A dealt ace-ten and a soft 21 reached by hitting share the observation
``(21, d, 1)``, but under ``sab=True`` a natural sticking against a dealer's 21 of three or
more cards wins (+1) where the hit 21 only draws (0). The table models ``(21, d, 1)`` as the
hit hand (stick draws against any dealer 21). Every soft 21 at the start of an episode is a
natural, and only there does the model fall short: by :func:`natural_stick_bonus` per
sticking natural (0.035 against a ten up to 0.118 against a 2), in all 0.00344 of start
value for a policy that sticks on every natural (:func:`natural_start_correction`). Hitting
a natural, and everything after a hit, is exact. The optimum's start value is -0.04656 in
the table and so -0.04311 in the game. An engine that plays episodes from the table plays
the table's game, and :attr:`OutcomeTable.opening_rewards` pays an episode's first-step stick
on a soft 21 as the natural it is (+1 unless the dealer also has a natural), so the compiled
engine plays Blackjack exactly; only exact DP on the merged model uses the hit hand's payout.

Other flags: ``sab=True`` overrides ``natural``, as in the environment. With ``sab=False,
natural=False`` a natural is just a 21 (the environment compares totals), so the same table
is exact and the bonus is 0. ``sab=False, natural=True`` (a 1.5 payout on a natural's win)
has no model: the observation cannot tell a natural from a hit 21.
"""

from __future__ import annotations

from fractions import Fraction
from functools import lru_cache

import numpy as np

from .model import NoModelError
from .outcomes import OutcomeTable
from .start_adapters import blackjack_start_states

__all__ = [
    "STICK",
    "HIT",
    "STOOD",
    "CARD_PROBABILITIES",
    "DEALER_RESULTS",
    "blackjack_outcome_table",
    "dealer_result_probabilities",
    "natural_stick_bonus",
    "natural_start_correction",
]

STICK, HIT = 0, 1
STOOD = (0, 0, 0)  # where a stick ends: an observation the environment never shows
CARDS = tuple(range(1, 11))  # 1 is an ace, 10 any ten-valued card
CARD_PROBABILITIES = {card: Fraction(4 if card == 10 else 1, 13) for card in CARDS}
# The dealer's final results in the order a stick lists them; 21 is split by the card count.
DEALER_RESULTS = ("17", "18", "19", "20", "21", "natural", "bust")
_DEALER_TOTAL = {"17": 17, "18": 18, "19": 19, "20": 20, "21": 21, "natural": 21, "bust": 0}
_NATURAL_DEAL = 2 * CARD_PROBABILITIES[1] * CARD_PROBABILITIES[10]  # ace then ten, or ten then ace


def _check_flags(sab: bool, natural: bool) -> None:
    if natural and not sab:
        raise NoModelError("Blackjack's model covers sab=True and sab=False without natural (a 1.5 natural payout needs the natural told from a hit 21)")


def _encoder():
    """The encoder training uses for Blackjack, so indices match the Q table's."""
    from .factory import EnvironmentSpec, make_environment

    environment = make_environment(EnvironmentSpec(id="Blackjack-v1", kwargs={"sab": True}))
    try:
        return environment.encoder
    finally:
        environment.close()


def _hand(raw_sum: int, has_ace: bool) -> tuple[int, int]:
    """``(total, usable_ace)`` of a hand: an ace counts 11 when that stays within 21."""
    if has_ace and raw_sum + 10 <= 21:
        return raw_sum + 10, 1
    return raw_sum, 0


@lru_cache(maxsize=None)
def _dealer_from(raw_sum: int, has_ace: bool, cards: int) -> tuple[tuple[str, Fraction], ...]:
    """Final-result probabilities of a dealer hand that hits below 17 (soft 17 sticks)."""
    total, _ = _hand(raw_sum, has_ace)
    if total > 21:
        return (("bust", Fraction(1)),)
    if total >= 17:
        result = "natural" if total == 21 and cards == 2 else str(total)
        return ((result, Fraction(1)),)
    merged: dict[str, Fraction] = {}
    for card, p in CARD_PROBABILITIES.items():
        for result, q in _dealer_from(raw_sum + card, has_ace or card == 1, cards + 1):
            merged[result] = merged.get(result, Fraction(0)) + p * q
    return tuple(merged.items())


@lru_cache(maxsize=None)
def _dealer_results(up_card: int) -> dict[str, Fraction]:
    merged = {result: Fraction(0) for result in DEALER_RESULTS}
    for hidden, p in CARD_PROBABILITIES.items():
        for result, q in _dealer_from(up_card + hidden, up_card == 1 or hidden == 1, 2):
            merged[result] += p * q
    return merged


def dealer_result_probabilities(up_card: int) -> dict[str, float]:
    """``{result: probability}`` over :data:`DEALER_RESULTS` for the dealer's up card (1 = ace), hidden card drawn."""
    if up_card not in CARD_PROBABILITIES:
        raise ValueError(f"the dealer's card is 1..10 (1 is an ace), got {up_card}")
    return {result: float(p) for result, p in _dealer_results(up_card).items()}


def _compare(player_total: int, result: str) -> float:
    """The reward of a non-natural player total against the dealer's final result."""
    dealer_total = _DEALER_TOTAL[result]
    return float((player_total > dealer_total) - (player_total < dealer_total))


def _after_hit(player_sum: int, usable_ace: int, card: int) -> tuple[int, int]:
    """``(total, usable_ace)`` once ``card`` joins the hand; totals above 21 are busts."""
    if usable_ace:
        # The ace counted 11: the cards add to player_sum - 10 as counted low.
        return _hand(player_sum - 10 + card, True)
    # A hard total of 11 or less holds no ace (it would be usable), so a new ace is the only
    # one that can count 11; a hard total of 12 or more already counts any ace low.
    return _hand(player_sum + card, card == 1 and player_sum <= 10)


def _start_distribution(encode) -> tuple[list[int], list[float]]:
    """Distinct first observations of a deal, in increasing table index, with their probabilities."""
    merged: dict[int, Fraction] = {}
    for dealer_card, p_dealer in CARD_PROBABILITIES.items():
        for first, p_first in CARD_PROBABILITIES.items():
            for second, p_second in CARD_PROBABILITIES.items():
                total, usable = _hand(first + second, 1 in (first, second))
                s = encode((total, dealer_card, usable))
                merged[s] = merged.get(s, Fraction(0)) + p_dealer * p_first * p_second
    states = sorted(merged)
    return states, [float(merged[s]) for s in states]


def blackjack_outcome_table(sab: bool = True, natural: bool = False) -> OutcomeTable:
    """Blackjack's outcomes per decision state and action, in the order the module docstring gives.

    Exact under ``sab=True`` except a natural's stick, which the table pays as a hit 21's
    (short by :func:`natural_stick_bonus`); exact throughout under ``sab=False, natural=False``.
    Raises :class:`~qtally.envs.model.NoModelError` for ``natural=True`` without ``sab``.
    """
    _check_flags(sab, natural)
    encoder = _encoder()
    encode = encoder.encode
    stood = encode(STOOD)
    rows: dict[tuple[int, int], list[tuple[float, int, float, bool]]] = {}
    opening: dict[tuple[int, int], list[float]] = {}
    decision = set()
    for player_sum, dealer_card, usable_ace in blackjack_start_states():
        s = encode((player_sum, dealer_card, usable_ace))
        decision.add(s)
        rows[(s, STICK)] = [
            (float(p), stood, _compare(player_sum, result), True)
            for result, p in _dealer_results(dealer_card).items()
            if p > 0
        ]
        if sab and (player_sum, usable_ace) == (21, 1):  # a soft 21 on the first step is a dealt natural
            opening[(s, STICK)] = [1.0 if result != "natural" else 0.0 for result, p in _dealer_results(dealer_card).items() if p > 0]
        hits = []
        for card, p in CARD_PROBABILITIES.items():
            total, usable = _after_hit(player_sum, usable_ace, card)
            bust = total > 21
            hits.append((float(p), encode((total, dealer_card, usable)), -1.0 if bust else 0.0, bust))
        rows[(s, HIT)] = hits
    for s in range(encoder.n_states):
        if s not in decision:  # no episode acts here: an absorbing end, as toy-text tables list one
            for action in (STICK, HIT):
                rows[(s, action)] = [(1.0, s, 0.0, True)]
    start_states, start_probabilities = _start_distribution(encode)
    return OutcomeTable.from_rows(encoder.n_states, 2, rows, start_states, start_probabilities, opening_rewards=opening)


def natural_stick_bonus(sab: bool = True, natural: bool = False) -> np.ndarray:
    """``(10,)``, entry ``d - 1`` for up card ``d``: what a natural's stick earns above the table's ``(21, d, 1)`` stick.

    Under ``sab=True`` the probability that the dealer ends on 21 with three or more cards
    (the natural wins that, the hit 21 draws); 0 under ``sab=False, natural=False``.
    """
    _check_flags(sab, natural)
    if not sab:
        return np.zeros(len(CARDS))
    return np.array([float(_dealer_results(d)["21"]) for d in CARDS])


def natural_start_correction(policy_probs: np.ndarray | None = None, sab: bool = True, natural: bool = False) -> float:
    """What to add to the table's start value for the environment's: natural deals times the bonus of sticking.

    ``sum_d P(natural dealt, up card d) * P(stick at (21, d, 1)) * natural_stick_bonus[d - 1]``,
    with the stick probability read from ``policy_probs`` (``(n_states, 2)``, the table's
    indices) or 1 for every ``d`` when it is None. Exact for any policy: the table is exact
    everywhere but a natural's stick, and a natural is only ever dealt (probability 8/169).
    Under ``sab=True`` it is 0.0034429 for every policy that sticks on soft 21 (8% of the
    optimum's loss of 0.0431 a hand), the same for all of them, so optimality gaps between
    such policies (the optimum is one) are exact without it.
    """
    bonus = natural_stick_bonus(sab, natural)
    if policy_probs is None:
        sticks = np.ones(len(CARDS))
    else:
        encode = _encoder().encode
        probs = np.asarray(policy_probs, dtype=float)
        sticks = np.array([probs[encode((21, d, 1)), STICK] for d in CARDS])
    deal = np.array([float(_NATURAL_DEAL * CARD_PROBABILITIES[d]) for d in CARDS])
    return float(deal @ (sticks * bonus))
