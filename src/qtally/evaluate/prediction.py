"""Monte Carlo prediction: the values of a *given* policy, estimated from sampled episodes.

Pure array code (numpy); no tracking or config imports. Where control improves a policy,
prediction only measures one, so every estimate here carries a standard error, a visit
count and an effective sample size: the reader should see how much to trust it.

- :class:`RatioTally`: per-entry ratio estimate over episodes with its standard error and
  effective sample size; the one mechanism behind every estimator below.
- :func:`episode_samples`: returns, visit masks and importance-sampling ratios of one episode.
- :class:`OnPolicyPrediction`: V(s) and Q(s, a) of the policy that played the episodes.
- :class:`ImportanceSamplingPrediction`: V and Q of a *target* policy from episodes of a
  *behaviour* policy, by ordinary IS (``rho * G`` averaged over visits) and weighted IS
  (``sum rho G / sum rho``) side by side.
- :func:`play_prediction_episodes`: play N episodes of a policy table in a
  :class:`~qtally.envs.factory.TabularEnvironment` and feed them to an estimator.

Every estimate is a ratio over episodes. Episodes are independent; the visits inside one
episode are not (an every-visit average sees the same future several times, and a
per-visit standard error would be too small: on FrozenLake its nominal 95% intervals
covered about 80%). So each estimator sums, per entry and per episode ``i``, a numerator
``X_i`` and a denominator ``N_i`` over the visits it counts (the first, or every one)::

    estimator      X_i                  N_i
    on-policy      sum of G_t           visits in the episode
    ordinary IS    sum of rho_t G_t     visits in the episode
    weighted IS    sum of rho_t G_t     sum of rho_t

The estimate is ``R = sum_i X_i / sum_i N_i`` and its standard error the delta-method
(linearised) one of a ratio estimator with episodes as the sampling units::

    se(R) = sqrt(sum_i (X_i - R N_i)^2) / sum_i N_i * sqrt(m / (m - 1))

with ``m`` the number of episodes where ``N_i > 0``. This is the ratio estimator of survey
sampling, an episode being a cluster of visits of unequal size (Cochran 1977, *Sampling
Techniques*, 3rd ed., chapter 6 on ratio estimators and chapter 9 on cluster samples;
chapter numbers recalled from memory), and for weighted IS the usual standard error of
self-normalised importance sampling (Owen 2013, *Monte Carlo theory, methods and
examples*, section 9.2). For first-visit on-policy averaging (``X_i = G_i``, ``N_i = 1``)
it is exactly ``sd / sqrt(n)`` with the (n - 1) standard deviation; the factor
``m / (m - 1)`` makes it so.

Effective sample size. Kish's ``(sum_i W_i)^2 / sum_i W_i^2`` over episodes, where ``W_i``
is the episode's weight: ``sum rho_t`` for both IS methods, the visit count on-policy (so
it is the visit count for first-visit averaging, and the number of episodes it is worth
for every-visit). It says how many equally weighted episodes an estimate is worth; when a
few heavy weights dominate, the delta-method interval is not to be trusted, and the report
(:mod:`qtally.evaluate.prediction_report`) flags the estimate.

Memory is O(|S| |A|) whatever the number of episodes: per-visit samples are buffered,
summed per episode and entry, folded into running sums centred at the current estimate
(so no large uncentred sums are ever subtracted), then dropped. Reading an estimate, or
:meth:`~OnPolicyPrediction.value_of`, folds the buffer first, so it reflects every episode
added so far.

Importance-sampling ratios. For a visit at time ``t`` the return ``G_t`` is reweighted by
``rho = prod_k pi(a_k | s_k) / b(a_k | s_k)``, over ``k = t .. T-1`` for V(s_t) and over
``k = t+1 .. T-1`` for Q(s_t, a_t) (the action at ``t`` is given, so it is not reweighted).

>>> p = OnPolicyPrediction(n_states=2, n_actions=1, gamma=1.0)
>>> p.add_episode(np.array([0, 1]), np.array([0, 0]), np.array([1.0, 2.0]))
>>> p.add_episode(np.array([0]), np.array([0]), np.array([5.0]))
>>> v = p.state_values()
>>> v.value.tolist(), v.visits.tolist()
([4.0, 2.0], [2, 1])
>>> round(float(v.standard_error[0]), 6)
1.0
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..control.returns import discounted_returns, visit_mask

__all__ = [
    "RatioTally",
    "Estimates",
    "EpisodeSamples",
    "episode_samples",
    "OnPolicyPrediction",
    "ImportanceSamplingPrediction",
    "check_coverage",
    "PlayedSummary",
    "play_prediction_episodes",
    "IS_METHODS",
]

IS_METHODS = ("ordinary", "weighted")

# Samples buffered before they are folded into the running sums.
_FLUSH_AT = 65_536


# ---------------------------------------------------------------- the ratio estimator


class RatioTally:
    """Per-entry ratio ``R = sum_i X_i / sum_i N_i`` over episodes, with its delta-method standard error.

    Each row added is one episode's sums for one entry (an entry may appear in many rows).
    Keeps ``D = sum N_i`` and, centred at the current ``R``: ``A = sum N_i (X_i - R N_i)``,
    ``B = sum N_i^2`` and ``C = sum (X_i - R N_i)^2``. When ``R`` moves by ``-d`` every
    residual grows by ``d N_i``, so the centred sums shift exactly (``C += 2 d A + d^2 B``,
    ``A += d B``) and batches merge without subtracting large uncentred sums.

    An entry visited twice in one episode (returns 6 and 3) and once in another (return 0),
    every-visit: the ratio standard error is 2, the per-visit ``sd / sqrt(3)`` would be 1.73.

    >>> t = RatioTally(1)
    >>> t.add(np.array([0, 0]), numerators=np.array([9.0, 0.0]), denominators=np.array([2.0, 1.0]), visits=np.array([2, 1]))
    >>> float(t.estimate()[0]), float(t.standard_error[0]), int(t.visits[0]), int(t.episodes[0])
    (3.0, 2.0, 3, 2)
    >>> round(float(t.effective_size[0]), 3)
    1.8
    """

    def __init__(self, size: int):
        self.visits = np.zeros(size, dtype=np.int64)  # samples (visits counted), zero weight or not
        self.episodes = np.zeros(size, dtype=np.int64)  # m: episodes with N_i > 0
        self.denominator_sum = np.zeros(size)  # D
        self.ratio = np.zeros(size)  # R
        self.centred_cross = np.zeros(size)  # A
        self.square_denominator_sum = np.zeros(size)  # B
        self.centred_square = np.zeros(size)  # C

    def add(self, entries: np.ndarray, numerators: np.ndarray, denominators: np.ndarray, visits: np.ndarray | None = None) -> None:
        """Fold in rows of per-episode sums: the batch's own ratio and centred sums, then the exact merge."""
        entries = np.asarray(entries, dtype=np.int64)
        x = np.asarray(numerators, dtype=np.float64)
        n = np.asarray(denominators, dtype=np.float64)
        if entries.size == 0:
            return
        if (n < 0).any():
            raise ValueError("denominators (visit counts, importance weights) must be non-negative")
        visits = np.ones(entries.size, dtype=np.int64) if visits is None else np.asarray(visits, dtype=np.int64)
        unique, inverse = np.unique(entries, return_inverse=True)
        size = unique.size
        d_b = np.bincount(inverse, n, minlength=size)
        with np.errstate(invalid="ignore", divide="ignore"):
            r_b = np.where(d_b > 0, np.bincount(inverse, x, minlength=size) / d_b, 0.0)
        resid = x - r_b[inverse] * n
        a_b = np.bincount(inverse, n * resid, minlength=size)
        b_b = np.bincount(inverse, n * n, minlength=size)
        c_b = np.bincount(inverse, resid * resid, minlength=size)

        d_a, r_a = self.denominator_sum[unique], self.ratio[unique]
        a_a, b_a, c_a = self.centred_cross[unique], self.square_denominator_sum[unique], self.centred_square[unique]
        d = d_a + d_b
        with np.errstate(invalid="ignore", divide="ignore"):
            r = np.where(d > 0, (d_a * r_a + d_b * r_b) / d, 0.0)
        shift_a, shift_b = r_a - r, r_b - r
        self.centred_square[unique] = c_a + 2 * shift_a * a_a + shift_a**2 * b_a + c_b + 2 * shift_b * a_b + shift_b**2 * b_b
        self.centred_cross[unique] = a_a + shift_a * b_a + a_b + shift_b * b_b
        self.square_denominator_sum[unique] = b_a + b_b
        self.denominator_sum[unique] = d
        self.ratio[unique] = r
        self.visits[unique] += np.bincount(inverse, visits, minlength=size).astype(np.int64)
        self.episodes[unique] += np.bincount(inverse, (n > 0).astype(np.float64), minlength=size).astype(np.int64)

    @property
    def standard_error(self) -> np.ndarray:
        """Delta-method ratio standard error (module docstring); NaN below two contributing episodes."""
        m = self.episodes
        with np.errstate(invalid="ignore", divide="ignore"):
            var = np.maximum(self.centred_square, 0.0) / self.denominator_sum**2 * m / (m - 1)
            return np.where(m >= 2, np.sqrt(var), np.nan)

    @property
    def effective_size(self) -> np.ndarray:
        """Kish's effective sample size ``D^2 / B`` of the per-episode denominators; 0 where none arrived."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.square_denominator_sum > 0, self.denominator_sum**2 / self.square_denominator_sum, 0.0)

    def estimate(self) -> np.ndarray:
        """The ratio, NaN where the denominators sum to 0 (nothing to say yet)."""
        return np.where(self.denominator_sum > 0, self.ratio, np.nan)


@dataclass(frozen=True)
class Estimates:
    """Estimated values with standard errors, visit counts and effective sizes, shaped ``(S,)`` or ``(S, A)``.

    ``value`` is NaN where there is no estimate. ``visits`` counts every visit used
    (zero-ratio ones included); ``episodes`` the episodes that carried weight;
    ``effective_visits`` is Kish's effective sample size over episodes (module docstring),
    equal to ``visits`` for first-visit on-policy averaging.
    """

    value: np.ndarray
    standard_error: np.ndarray
    visits: np.ndarray
    effective_visits: np.ndarray
    episodes: np.ndarray


def _estimates_of(tally: RatioTally, shape: tuple[int, ...], weights: RatioTally | None = None) -> Estimates:
    """``weights``: the tally whose denominators are the episode weights (weighted IS's, for ordinary IS)."""
    return Estimates(
        value=tally.estimate().reshape(shape),
        standard_error=tally.standard_error.reshape(shape),
        visits=tally.visits.copy().reshape(shape),
        effective_visits=(weights or tally).effective_size.reshape(shape),
        episodes=tally.episodes.copy().reshape(shape),
    )


# ---------------------------------------------------------------- one episode


@dataclass(frozen=True)
class EpisodeSamples:
    """What one episode contributes: returns, which steps count, and the IS ratios (1 on-policy)."""

    returns: np.ndarray
    state_steps: np.ndarray  # bool (T,): steps whose return updates V(s_t)
    pair_steps: np.ndarray  # bool (T,): steps whose return updates Q(s_t, a_t)
    state_ratios: np.ndarray  # rho over t..T-1
    pair_ratios: np.ndarray  # rho over t+1..T-1


def episode_samples(
    states: np.ndarray,
    actions: np.ndarray,
    rewards: np.ndarray,
    gamma: float,
    *,
    n_actions: int,
    first_visit: bool = True,
    tail_value: float = 0.0,
    forced_first_action: bool = False,
    target: np.ndarray | None = None,
    behaviour: np.ndarray | None = None,
) -> EpisodeSamples:
    """Returns, visit masks and importance ratios of one episode.

    ``forced_first_action``: the first action was fixed by the caller, not drawn from the
    policy, so step 0 is not a sample of V(s_0) (only of Q(s_0, a_0)); first visits of V are
    then counted from step 1. ``target`` and ``behaviour`` are ``(S, A)`` probability arrays;
    without them every ratio is 1.

    >>> s = episode_samples(np.array([0, 1, 0]), np.array([1, 0, 0]), np.array([0.0, 1.0, 2.0]), 1.0,
    ...                     n_actions=2, target=np.array([[1.0, 0.0], [1.0, 0.0]]),
    ...                     behaviour=np.array([[0.5, 0.5], [0.5, 0.5]]))
    >>> s.returns.tolist(), s.state_ratios.tolist(), s.pair_ratios.tolist()
    ([3.0, 3.0, 2.0], [0.0, 4.0, 2.0], [4.0, 2.0, 1.0])
    """
    states = np.asarray(states, dtype=np.int64)
    actions = np.asarray(actions, dtype=np.int64)
    returns = discounted_returns(rewards, gamma, tail_value)
    length = states.shape[0]
    pair_steps = visit_mask(states * n_actions + actions, first_visit)
    if forced_first_action and length:
        state_steps = np.zeros(length, dtype=bool)
        state_steps[1:] = visit_mask(states[1:], first_visit)
    else:
        state_steps = visit_mask(states, first_visit)
    if target is None:
        ones = np.ones(length)
        return EpisodeSamples(returns, state_steps, pair_steps, ones, ones)
    if behaviour is None:
        raise ValueError("a target policy needs the behaviour policy that played the episode")
    with np.errstate(invalid="ignore", divide="ignore"):
        step_ratio = target[states, actions] / behaviour[states, actions]
    step_ratio = np.nan_to_num(step_ratio, nan=0.0, posinf=0.0)  # b = 0: the step cannot have happened
    state_ratios = np.cumprod(step_ratio[::-1])[::-1]
    pair_ratios = np.ones(length)
    pair_ratios[:-1] = state_ratios[1:]
    return EpisodeSamples(returns, state_steps, pair_steps, state_ratios, pair_ratios)


# ---------------------------------------------------------------- estimators


class _Buffered:
    """Collects per-visit samples tagged with their episode; folds them, summed per episode and entry, in large batches."""

    def __init__(self) -> None:
        self._buffer: list[tuple[np.ndarray, ...]] = []
        self._buffered = 0
        self._buffered_episodes = 0

    def _push(self, *arrays: np.ndarray) -> None:
        length = arrays[0].shape[0]
        self._buffer.append((np.full(length, self._buffered_episodes, dtype=np.int64), *arrays))
        self._buffered_episodes += 1
        self._buffered += length
        if self._buffered >= _FLUSH_AT:
            self.flush()

    def flush(self) -> None:
        if not self._buffer:
            return
        columns = [np.concatenate(parts) for parts in zip(*self._buffer)]
        self._buffer.clear()
        self._buffered = 0
        self._buffered_episodes = 0
        self._fold(*columns)

    def _fold(self, *columns: np.ndarray) -> None:  # pragma: no cover - abstract
        raise NotImplementedError


def _per_episode(episode: np.ndarray, index: np.ndarray, size: int, *values: np.ndarray) -> tuple[np.ndarray, np.ndarray, list[np.ndarray]]:
    """Sum ``values`` per (episode, entry) over the rows with ``index >= 0``: entries, visit counts, sums."""
    keep = index >= 0
    keys, inverse = np.unique(episode[keep] * size + index[keep], return_inverse=True)
    sums = [np.bincount(inverse, v[keep], minlength=keys.size) for v in values]
    return keys % size, np.bincount(inverse, minlength=keys.size), sums


class OnPolicyPrediction(_Buffered):
    """V and Q of the policy that generated the episodes, by first-visit or every-visit averaging.

    Both are ratio estimates over episodes (module docstring): ``sum G / visits``, with the
    standard error of episodes, not of visits.
    """

    methods = ("on_policy",)

    def __init__(self, n_states: int, n_actions: int, gamma: float, first_visit: bool = True):
        super().__init__()
        if not 0.0 <= gamma <= 1.0:
            raise ValueError(f"gamma must be in [0, 1], got {gamma}")
        self.n_states, self.n_actions, self.gamma, self.first_visit = n_states, n_actions, float(gamma), bool(first_visit)
        self.state_tally = RatioTally(n_states)
        self.pair_tally = RatioTally(n_states * n_actions)

    def add_episode(self, states, actions, rewards, *, tail_value: float = 0.0, forced_first_action: bool = False) -> None:
        samples = episode_samples(
            states, actions, rewards, self.gamma, n_actions=self.n_actions, first_visit=self.first_visit,
            tail_value=tail_value, forced_first_action=forced_first_action,
        )
        states = np.asarray(states, dtype=np.int64)
        pairs = states * self.n_actions + np.asarray(actions, dtype=np.int64)
        self._push(
            np.where(samples.state_steps, states, -1),
            np.where(samples.pair_steps, pairs, -1),
            samples.returns,
        )

    def _fold(self, episode: np.ndarray, state_index: np.ndarray, pair_index: np.ndarray, g: np.ndarray) -> None:
        for tally, index in ((self.state_tally, state_index), (self.pair_tally, pair_index)):
            entries, visits, (x,) = _per_episode(episode, index, tally.visits.size, g)
            tally.add(entries, x, visits.astype(np.float64), visits)

    def state_values(self, method: str = "on_policy") -> Estimates:
        self.flush()
        return _estimates_of(self.state_tally, (self.n_states,))

    def action_values(self, method: str = "on_policy") -> Estimates:
        self.flush()
        return _estimates_of(self.pair_tally, (self.n_states, self.n_actions))

    def value_of(self, state: int) -> float:
        """V estimate of one state from every episode added so far (0 if none): what a cut-off episode is seeded with."""
        self.flush()
        value = self.state_tally.estimate()[state]
        return float(value) if np.isfinite(value) else 0.0


def check_coverage(target: np.ndarray, behaviour: np.ndarray, atol: float = 0.0) -> np.ndarray:
    """Bool ``(S,)``: states where the target gives an action positive probability that the behaviour never takes.

    Importance sampling is unbiased only where the behaviour covers the target.

    >>> check_coverage(np.array([[1.0, 0.0], [0.0, 1.0]]), np.array([[0.5, 0.5], [1.0, 0.0]])).tolist()
    [False, True]
    """
    return ((np.asarray(target) > atol) & (np.asarray(behaviour) <= 0.0)).any(axis=1)


class ImportanceSamplingPrediction(_Buffered):
    """V and Q of ``target`` from episodes played by ``behaviour``: ordinary and weighted IS together.

    Ordinary IS averages ``rho * G`` over every visit (zero ratios included): unbiased, but
    its variance can be large. Weighted IS divides by ``sum rho`` instead of the visit count:
    biased for finite samples (consistent), usually far less variable. Both are ratio
    estimates over episodes (module docstring); both report the effective sample size of
    the episode weights ``sum rho``.
    """

    methods = IS_METHODS

    def __init__(self, target: np.ndarray, behaviour: np.ndarray, gamma: float, first_visit: bool = True):
        super().__init__()
        target = np.asarray(target, dtype=np.float64)
        behaviour = np.asarray(behaviour, dtype=np.float64)
        if target.shape != behaviour.shape or target.ndim != 2:
            raise ValueError(f"target {target.shape} and behaviour {behaviour.shape} must be the same (S, A) shape")
        if not 0.0 <= gamma <= 1.0:
            raise ValueError(f"gamma must be in [0, 1], got {gamma}")
        self.target, self.behaviour = target, behaviour
        self.n_states, self.n_actions = target.shape
        self.gamma, self.first_visit = float(gamma), bool(first_visit)
        size_s, size_q = self.n_states, self.n_states * self.n_actions
        self.ordinary_state, self.ordinary_pair = RatioTally(size_s), RatioTally(size_q)
        self.weighted_state, self.weighted_pair = RatioTally(size_s), RatioTally(size_q)

    def add_episode(self, states, actions, rewards, *, tail_value: float = 0.0, forced_first_action: bool = False) -> None:
        samples = episode_samples(
            states, actions, rewards, self.gamma, n_actions=self.n_actions, first_visit=self.first_visit,
            tail_value=tail_value, forced_first_action=forced_first_action, target=self.target, behaviour=self.behaviour,
        )
        states = np.asarray(states, dtype=np.int64)
        pairs = states * self.n_actions + np.asarray(actions, dtype=np.int64)
        self._push(
            np.where(samples.state_steps, states, -1),
            np.where(samples.pair_steps, pairs, -1),
            samples.returns,
            samples.state_ratios,
            samples.pair_ratios,
        )

    def _fold(self, episode, state_index, pair_index, g, state_ratio, pair_ratio) -> None:
        for ordinary, weighted, index, ratio in (
            (self.ordinary_state, self.weighted_state, state_index, state_ratio),
            (self.ordinary_pair, self.weighted_pair, pair_index, pair_ratio),
        ):
            entries, visits, (x, w) = _per_episode(episode, index, ordinary.visits.size, ratio * g, ratio)
            ordinary.add(entries, x, visits.astype(np.float64), visits)
            weighted.add(entries, x, w, visits)

    def _tallies(self, method: str, kind: str) -> tuple[RatioTally, RatioTally]:
        """The method's tally and the weighted one, whose denominators are the episode weights."""
        if method not in IS_METHODS:
            raise ValueError(f"method={method!r}; choose one of {', '.join(IS_METHODS)}")
        weighted = self.weighted_state if kind == "v" else self.weighted_pair
        ordinary = self.ordinary_state if kind == "v" else self.ordinary_pair
        return (weighted if method == "weighted" else ordinary), weighted

    def state_values(self, method: str = "weighted") -> Estimates:
        self.flush()
        tally, weights = self._tallies(method, "v")
        return _estimates_of(tally, (self.n_states,), weights)

    def action_values(self, method: str = "weighted") -> Estimates:
        self.flush()
        tally, weights = self._tallies(method, "q")
        return _estimates_of(tally, (self.n_states, self.n_actions), weights)

    def value_of(self, state: int) -> float:
        """Weighted-IS V estimate of one state from every episode added so far (0 if none), for seeding a cut-off episode."""
        self.flush()
        value = self.weighted_state.estimate()[state]
        return float(value) if np.isfinite(value) else 0.0


# ---------------------------------------------------------------- playing episodes
# Playing lives with the shared episode source; re-exported here for existing callers.

from .policy_episodes import PlayedSummary, play_prediction_episodes  # noqa: E402
