"""Monte Carlo prediction: the values of a *given* policy, estimated from sampled episodes.

Pure array code (numpy); no tracking or config imports. Where control improves a policy,
prediction only measures one, so every estimate here carries a standard error and a visit
count: it is a sample mean, and the reader should see how much to trust it.

- :class:`Tally`: per-entry count, mean and centred sum of squares (Welford's running
  moments; a batch is folded in with the pairwise form of Chan, Golub & LeVeque 1979).
  ``standard_error = sd / sqrt(n)`` with the sample (n - 1) standard deviation.
- :class:`WeightedTally`: per-entry ``sum w``, the weighted mean ``sum w x / sum w`` and the
  centred sums a delta-method standard error needs (see below).
- :func:`episode_samples`: returns, visit masks and importance-sampling ratios of one episode.
- :class:`OnPolicyPrediction`: V(s) and Q(s, a) of the policy that played the episodes.
- :class:`ImportanceSamplingPrediction`: V and Q of a *target* policy from episodes of a
  *behaviour* policy, by ordinary IS (mean of ``rho * G``) and weighted IS
  (``sum rho G / sum rho``) side by side.
- :func:`play_prediction_episodes`: play N episodes of a policy table in a
  :class:`~qtally.envs.factory.TabularEnvironment` and feed them to an estimator.

Memory is O(|S| |A|) whatever the number of episodes: samples are folded into the running
sums in batches and then dropped.

Importance-sampling ratios. For a visit at time ``t`` the return ``G_t`` is reweighted by
``rho = prod_k pi(a_k | s_k) / b(a_k | s_k)``, over ``k = t .. T-1`` for V(s_t) and over
``k = t+1 .. T-1`` for Q(s_t, a_t) (the action at ``t`` is given, so it is not reweighted).

Standard error of weighted IS. The weighted estimate ``R = sum w x / sum w`` is a ratio of
two sample means, so its standard error is taken from the delta method (the linearised
ratio, as for self-normalised importance sampling, e.g. Owen 2013, "Monte Carlo theory,
methods and examples", section 9.2)::

    Var(R) ~= sum_i w_i^2 (x_i - R)^2 / (sum_i w_i)^2  *  m / (m - 1)

where ``m`` is the number of visits with ``w > 0``. The factor ``m / (m - 1)`` makes it equal
the ordinary ``sd / sqrt(n)`` when all weights are equal. It is an approximation that is
poor when few weights dominate; :attr:`Estimates.effective_visits` reports Kish's effective
sample size ``(sum w)^2 / sum w^2`` so a reader can see when that happens.

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
from typing import Any, Callable, Protocol, Sequence

import numpy as np

from ..control.returns import discounted_returns, visit_mask

__all__ = [
    "Tally",
    "WeightedTally",
    "Estimates",
    "EpisodeSamples",
    "episode_samples",
    "OnPolicyPrediction",
    "ImportanceSamplingPrediction",
    "check_coverage",
    "PlayedSummary",
    "play_prediction_episodes",
    "prediction_streams",
    "IS_METHODS",
]

IS_METHODS = ("ordinary", "weighted")

# Samples buffered before they are folded into the running sums.
_FLUSH_AT = 65_536


# ---------------------------------------------------------------- running moments


class Tally:
    """Per-entry count, mean and centred sum of squares ``M2`` of the values added.

    >>> t = Tally(3)
    >>> t.add(np.array([0, 0, 2]), np.array([1.0, 3.0, 5.0]))
    >>> t.add(np.array([0]), np.array([5.0]))
    >>> t.count.tolist(), t.mean.tolist(), t.m2.tolist()
    ([3, 0, 1], [3.0, 0.0, 5.0], [8.0, 0.0, 0.0])
    >>> t.standard_error.round(4).tolist()[0]
    1.1547
    """

    def __init__(self, size: int):
        self.count = np.zeros(size, dtype=np.int64)
        self.mean = np.zeros(size)
        self.m2 = np.zeros(size)

    def add(self, indices: np.ndarray, values: np.ndarray) -> None:
        """Fold a batch in: two-pass moments of the batch, then the pairwise merge."""
        indices = np.asarray(indices, dtype=np.int64)
        values = np.asarray(values, dtype=np.float64)
        if indices.size == 0:
            return
        entries, inverse = np.unique(indices, return_inverse=True)
        n_b = np.bincount(inverse).astype(np.float64)
        mean_b = np.bincount(inverse, values) / n_b
        m2_b = np.bincount(inverse, (values - mean_b[inverse]) ** 2)
        n_a = self.count[entries].astype(np.float64)
        mean_a = self.mean[entries]
        n = n_a + n_b
        delta = mean_b - mean_a
        self.mean[entries] = mean_a + delta * n_b / n
        self.m2[entries] += m2_b + delta**2 * n_a * n_b / n
        self.count[entries] += n_b.astype(np.int64)

    @property
    def variance(self) -> np.ndarray:
        """Sample variance (n - 1 denominator); NaN below two samples."""
        n = self.count
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(n >= 2, self.m2 / np.maximum(n - 1, 1), np.nan)

    @property
    def standard_error(self) -> np.ndarray:
        """``sd / sqrt(n)``; NaN below two samples."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.sqrt(self.variance / np.maximum(self.count, 1))

    def estimate(self) -> np.ndarray:
        """The mean, NaN where nothing was added."""
        return np.where(self.count > 0, self.mean, np.nan)


class WeightedTally:
    """Per-entry weighted mean ``sum w x / sum w`` with a delta-method standard error.

    Keeps, centred at the current weighted mean ``R``: ``A = sum w^2 (x - R)``,
    ``B = sum w^2`` and ``C = sum w^2 (x - R)^2``. When ``R`` moves by ``d`` the centred sums
    shift exactly (``C += 2 d A + d^2 B``, ``A += d B``), so no large uncentred sums are
    ever subtracted.

    >>> t = WeightedTally(1)
    >>> t.add(np.array([0, 0, 0]), np.array([1.0, 3.0, 10.0]), np.array([1.0, 3.0, 0.0]))
    >>> float(t.estimate()[0]), int(t.count[0]), int(t.weighted_count[0])
    (2.5, 3, 2)
    >>> round(float(t.effective_visits[0]), 3)
    1.6
    """

    def __init__(self, size: int):
        self.count = np.zeros(size, dtype=np.int64)  # every visit, zero weight or not
        self.weighted_count = np.zeros(size, dtype=np.int64)  # visits with w > 0
        self.weight_sum = np.zeros(size)
        self.mean = np.zeros(size)
        self.centred_first = np.zeros(size)  # A
        self.square_weight_sum = np.zeros(size)  # B
        self.centred_second = np.zeros(size)  # C

    def add(self, indices: np.ndarray, values: np.ndarray, weights: np.ndarray) -> None:
        indices = np.asarray(indices, dtype=np.int64)
        values = np.asarray(values, dtype=np.float64)
        weights = np.asarray(weights, dtype=np.float64)
        if indices.size == 0:
            return
        if (weights < 0).any():
            raise ValueError("importance weights must be non-negative")
        entries, inverse = np.unique(indices, return_inverse=True)
        w_b = np.bincount(inverse, weights, minlength=entries.size)
        with np.errstate(invalid="ignore", divide="ignore"):
            r_b = np.where(w_b > 0, np.bincount(inverse, weights * values) / w_b, 0.0)
        resid = values - r_b[inverse]
        sq = weights**2
        a_b = np.bincount(inverse, sq * resid)
        b_b = np.bincount(inverse, sq)
        c_b = np.bincount(inverse, sq * resid**2)

        w_a, r_a = self.weight_sum[entries], self.mean[entries]
        a_a, b_a, c_a = self.centred_first[entries], self.square_weight_sum[entries], self.centred_second[entries]
        w = w_a + w_b
        with np.errstate(invalid="ignore", divide="ignore"):
            r = np.where(w > 0, (w_a * r_a + w_b * r_b) / w, 0.0)
        d_a, d_b = r_a - r, r_b - r
        self.centred_second[entries] = c_a + 2 * d_a * a_a + d_a**2 * b_a + c_b + 2 * d_b * a_b + d_b**2 * b_b
        self.centred_first[entries] = a_a + d_a * b_a + a_b + d_b * b_b
        self.square_weight_sum[entries] = b_a + b_b
        self.weight_sum[entries] = w
        self.mean[entries] = r
        self.count[entries] += np.bincount(inverse)
        self.weighted_count[entries] += np.bincount(inverse, (weights > 0).astype(np.float64)).astype(np.int64)

    @property
    def standard_error(self) -> np.ndarray:
        """Delta-method standard error (module docstring); NaN below two weighted visits."""
        m = self.weighted_count
        with np.errstate(invalid="ignore", divide="ignore"):
            var = np.maximum(self.centred_second, 0.0) / self.weight_sum**2 * m / (m - 1)
            return np.where(m >= 2, np.sqrt(var), np.nan)

    @property
    def effective_visits(self) -> np.ndarray:
        """Kish's effective sample size ``(sum w)^2 / sum w^2``; 0 where no weight arrived."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.square_weight_sum > 0, self.weight_sum**2 / self.square_weight_sum, 0.0)

    def estimate(self) -> np.ndarray:
        """The weighted mean, NaN where the weights sum to 0 (nothing to say yet)."""
        return np.where(self.weight_sum > 0, self.mean, np.nan)


@dataclass(frozen=True)
class Estimates:
    """Estimated values with their standard errors and visit counts, shaped ``(S,)`` or ``(S, A)``.

    ``value`` is NaN where there is no estimate. ``effective_visits`` equals ``visits`` for
    plain averages; for weighted IS it is Kish's effective sample size.
    """

    value: np.ndarray
    standard_error: np.ndarray
    visits: np.ndarray
    effective_visits: np.ndarray


def _estimates_of(tally: Tally | WeightedTally, shape: tuple[int, ...]) -> Estimates:
    if isinstance(tally, WeightedTally):
        effective = tally.effective_visits
    else:
        effective = tally.count.astype(np.float64)
    return Estimates(
        value=tally.estimate().reshape(shape),
        standard_error=tally.standard_error.reshape(shape),
        visits=tally.count.copy().reshape(shape),
        effective_visits=effective.reshape(shape),
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
    """Collects per-episode samples and folds them into tallies in large batches."""

    def __init__(self) -> None:
        self._buffer: list[tuple[np.ndarray, ...]] = []
        self._buffered = 0

    def _push(self, *arrays: np.ndarray) -> None:
        self._buffer.append(arrays)
        self._buffered += arrays[0].shape[0]
        if self._buffered >= _FLUSH_AT:
            self.flush()

    def flush(self) -> None:
        if not self._buffer:
            return
        columns = [np.concatenate(parts) for parts in zip(*self._buffer)]
        self._buffer.clear()
        self._buffered = 0
        self._fold(*columns)

    def _fold(self, *columns: np.ndarray) -> None:  # pragma: no cover - abstract
        raise NotImplementedError


class OnPolicyPrediction(_Buffered):
    """V and Q of the policy that generated the episodes, by first-visit or every-visit averaging."""

    methods = ("on_policy",)

    def __init__(self, n_states: int, n_actions: int, gamma: float, first_visit: bool = True):
        super().__init__()
        if not 0.0 <= gamma <= 1.0:
            raise ValueError(f"gamma must be in [0, 1], got {gamma}")
        self.n_states, self.n_actions, self.gamma, self.first_visit = n_states, n_actions, float(gamma), bool(first_visit)
        self.state_tally = Tally(n_states)
        self.pair_tally = Tally(n_states * n_actions)

    def add_episode(self, states, actions, rewards, *, tail_value: float = 0.0, forced_first_action: bool = False) -> None:
        samples = episode_samples(
            states, actions, rewards, self.gamma, n_actions=self.n_actions, first_visit=self.first_visit,
            tail_value=tail_value, forced_first_action=forced_first_action,
        )
        states = np.asarray(states, dtype=np.int64)
        pairs = states * self.n_actions + np.asarray(actions, dtype=np.int64)
        g = samples.returns
        self._push(
            np.where(samples.state_steps, states, -1),
            np.where(samples.pair_steps, pairs, -1),
            g,
        )

    def _fold(self, state_index: np.ndarray, pair_index: np.ndarray, g: np.ndarray) -> None:
        keep = state_index >= 0
        self.state_tally.add(state_index[keep], g[keep])
        keep = pair_index >= 0
        self.pair_tally.add(pair_index[keep], g[keep])

    def state_values(self, method: str = "on_policy") -> Estimates:
        self.flush()
        return _estimates_of(self.state_tally, (self.n_states,))

    def action_values(self, method: str = "on_policy") -> Estimates:
        self.flush()
        return _estimates_of(self.pair_tally, (self.n_states, self.n_actions))

    def value_of(self, state: int) -> float:
        """V estimate of one state as of the last folded batch (0 if none): what a cut-off episode is seeded with."""
        return float(self.state_tally.mean[state]) if self.state_tally.count[state] else 0.0


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
    biased for finite samples (consistent), usually far less variable.
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
        self.ordinary_state, self.ordinary_pair = Tally(size_s), Tally(size_q)
        self.weighted_state, self.weighted_pair = WeightedTally(size_s), WeightedTally(size_q)

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

    def _fold(self, state_index, pair_index, g, state_ratio, pair_ratio) -> None:
        keep = state_index >= 0
        self.ordinary_state.add(state_index[keep], state_ratio[keep] * g[keep])
        self.weighted_state.add(state_index[keep], g[keep], state_ratio[keep])
        keep = pair_index >= 0
        self.ordinary_pair.add(pair_index[keep], pair_ratio[keep] * g[keep])
        self.weighted_pair.add(pair_index[keep], g[keep], pair_ratio[keep])

    def _tally(self, method: str, kind: str) -> Tally | WeightedTally:
        if method not in IS_METHODS:
            raise ValueError(f"method={method!r}; choose one of {', '.join(IS_METHODS)}")
        return {
            ("ordinary", "v"): self.ordinary_state,
            ("ordinary", "q"): self.ordinary_pair,
            ("weighted", "v"): self.weighted_state,
            ("weighted", "q"): self.weighted_pair,
        }[(method, kind)]

    def state_values(self, method: str = "weighted") -> Estimates:
        self.flush()
        return _estimates_of(self._tally(method, "v"), (self.n_states,))

    def action_values(self, method: str = "weighted") -> Estimates:
        self.flush()
        return _estimates_of(self._tally(method, "q"), (self.n_states, self.n_actions))

    def value_of(self, state: int) -> float:
        """Weighted-IS V estimate of one state as of the last folded batch (0 if none), for seeding a cut-off episode."""
        tally = self.weighted_state
        return float(tally.mean[state]) if tally.weight_sum[state] > 0 else 0.0


# ---------------------------------------------------------------- playing episodes


class Estimator(Protocol):
    def add_episode(self, states, actions, rewards, *, tail_value: float = 0.0, forced_first_action: bool = False) -> None: ...

    def value_of(self, state: int) -> float: ...


class ProgressSink(Protocol):
    def update(self, episodes: int, status: dict) -> None: ...


@dataclass(frozen=True)
class PlayedSummary:
    """How the episodes went (undiscounted return per episode; time-limit cuts)."""

    episodes: int
    return_mean: float
    return_standard_error: float
    truncated: int
    discarded: int
    steps: int


def prediction_streams(seed: int) -> dict[str, Any]:
    """Independent random streams (environment, actions, starts) split from one seed."""
    env_seq, action_seq, start_seq = np.random.SeedSequence(seed).spawn(3)
    return {
        "env_seed": int(env_seq.generate_state(1)[0] % (2**31 - 1)),
        "actions": np.random.default_rng(action_seq),
        "starts": np.random.default_rng(start_seq),
    }


def _sampler(policy: np.ndarray, rng: np.random.Generator) -> Callable[[int], tuple[int, float]]:
    """``choose(state) -> (action, probability)`` drawing from the rows of ``policy``."""
    cumulative = np.cumsum(policy, axis=1)
    deterministic = policy.max(axis=1) >= 1.0
    fixed = np.argmax(policy, axis=1)
    last = policy.shape[1] - 1
    cumulative_rows = cumulative.tolist()
    policy_rows = policy.tolist()
    fixed_list, deterministic_list = fixed.tolist(), deterministic.tolist()
    random = rng.random

    def choose(state: int) -> tuple[int, float]:
        if deterministic_list[state]:
            return fixed_list[state], 1.0
        u = random() * cumulative_rows[state][-1]
        row = cumulative_rows[state]
        action = 0
        while action < last and (row[action] <= u or policy_rows[state][action] == 0.0):
            action += 1
        return action, policy_rows[state][action]

    return choose


def play_prediction_episodes(
    environment,
    policy: np.ndarray,
    estimator: Estimator,
    episodes: int,
    *,
    seed: int = 0,
    start_observation: Any = None,
    start_action: int | None = None,
    start_states: Sequence[Any] | None = None,
    random_first_action: bool = False,
    truncation: str = "as_terminal",
    progress: ProgressSink | None = None,
    report_every: int = 500,
) -> PlayedSummary:
    """Play ``episodes`` episodes of ``policy`` (an ``(S, A)`` array) and add each to ``estimator``.

    Starts: by default the environment's own reset. ``start_observation`` (and optionally
    ``start_action``) fixes the start of every episode through ``environment.start_control``;
    ``start_states`` instead draws each start uniformly from the given observations
    (exploring-style), with a uniform first action too if ``random_first_action``.

    ``truncation`` says what a time-limit cut means: ``as_terminal`` (return 0 after the
    cut), ``bootstrap`` (seed the return with the estimator's current value of the state
    reached), or ``discard`` (drop the episode).
    """
    from ..engine.gym_loop import play_episode

    if truncation not in ("as_terminal", "bootstrap", "discard"):
        raise ValueError(f"truncation={truncation!r}; choose as_terminal, bootstrap or discard")
    policy = np.asarray(policy, dtype=np.float64)
    if policy.shape != (environment.n_states, environment.n_actions):
        raise ValueError(f"policy has shape {policy.shape}, environment needs {(environment.n_states, environment.n_actions)}")
    needs_start = start_observation is not None or start_states is not None
    if needs_start and environment.start_control is None:
        raise ValueError(f"{environment.spec.id!r} cannot be started in a chosen state")
    streams = prediction_streams(seed)
    choose = _sampler(policy, streams["actions"])
    starts_rng: np.random.Generator = streams["starts"]
    starts = list(start_states) if start_states is not None else None
    total_returns = np.zeros(episodes)
    truncated = discarded = steps = 0
    for episode in range(episodes):
        observation, first_action = start_observation, start_action
        if starts is not None:
            observation = starts[int(starts_rng.integers(len(starts)))]
            if random_first_action:
                first_action = int(starts_rng.integers(environment.n_actions))
        played = play_episode(
            environment, choose, seed=streams["env_seed"] if episode == 0 else None,
            start_observation=observation, first_action=first_action,
        )
        arrays = played.arrays
        total_returns[episode] = played.total_reward
        steps += arrays.length
        tail = 0.0
        if played.truncated:
            truncated += 1
            if truncation == "discard":
                discarded += 1
                continue
            if truncation == "bootstrap":
                tail = estimator.value_of(played.final_state)
        estimator.add_episode(arrays.states, arrays.actions, arrays.rewards, tail_value=tail, forced_first_action=first_action is not None)
        if progress is not None and ((episode + 1) % report_every == 0 or episode + 1 == episodes):
            recent = total_returns[max(0, episode + 1 - report_every) : episode + 1]
            progress.update(episode + 1, {"return_mean": float(recent.mean())})
    n = max(episodes, 1)
    se = float(total_returns.std(ddof=1) / np.sqrt(n)) if episodes >= 2 else float("nan")
    return PlayedSummary(episodes=episodes, return_mean=float(total_returns.mean()) if episodes else float("nan"),
                         return_standard_error=se, truncated=truncated, discarded=discarded, steps=steps)
