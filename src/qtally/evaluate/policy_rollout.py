"""Rolling a learned policy out: fresh episodes, their statistics, and the exact value beside them.

A rollout plays a :class:`~qtally.policy.table_policy.TablePolicy` as it would be deployed:
greedy where training reached the state, the declared fallback elsewhere (one uniform per
decision from the acting stream of the rollout seed, the draw protocol of
:mod:`qtally.policy.table_policy`). The episodes come from the one episode source,
:class:`~qtally.engine.episodes.GymEpisodes`, on the seeds of
:func:`~qtally.control.streams.rollout_seeds`, which no training or evaluation episode
ever used. The same seed gives the same episodes, the same returns and the same report.

Reported: the mean undiscounted return with its Student-t 95% interval
(:func:`~qtally.evaluate.rollouts.summarise_returns`), the success rate where the
environment defines success (:data:`SUCCESS_RULES`), the episode length, the share of
decisions taken in states training never reached, and, where the environment has a model,
the exact expected undiscounted return of the same policy (fallback included) and whether
it lies in the interval. The model knows no time limit, so a policy that often runs into
one is measured against a value the rollout cannot reach; the report says how many
episodes a limit cut.

Pure array code and the Gymnasium edge; no tracking or config imports.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from ..control.streams import RandomStreams, rollout_seeds
from ..engine.episodes import GymEpisodes, PlayedEpisode
from ..envs.factory import TabularEnvironment
from ..policy.table_policy import TablePolicy
from .rollouts import summarise_returns

__all__ = ["SUCCESS_RULES", "success_rule", "RolloutReport", "TracedEpisode", "roll_out", "format_trace", "policy_probabilities", "exact_return", "PolicyActor"]


def _reached_goal(episode: PlayedEpisode) -> bool:
    return episode.terminated and episode.arrays.rewards.size > 0 and float(episode.arrays.rewards[-1]) > 0.0


def _ended_by_itself(episode: PlayedEpisode) -> bool:
    return episode.terminated


# What "success" means, by environment id; environments not listed have no success rate.
# FrozenLake: the episode ends on the goal with a final reward of 1 (a hole ends it with 0).
# Blackjack: the hand is won (final reward +1; a draw, 0, is no success).
# CliffWalking: the episode ends only at the goal (a fall sends the walker back to the start).
# Taxi: the episode ends only with a correct drop-off (final reward 20).
SUCCESS_RULES: dict[str, tuple[str, Callable[[PlayedEpisode], bool]]] = {
    "FrozenLake-v1": ("reached the goal (the episode ended with a positive final reward)", _reached_goal),
    "Blackjack-v1": ("won the hand (final reward > 0)", _reached_goal),
    "CliffWalking-v1": ("reached the goal (the episode ended by itself, not by a time limit)", _ended_by_itself),
    "Taxi-v4": ("delivered the passenger (the episode ended by itself, not by a time limit)", _ended_by_itself),
}


def success_rule(env_id: str) -> tuple[str, Callable[[PlayedEpisode], bool]] | None:
    """The environment's success rule as (description, test), or None where success is not defined."""
    return SUCCESS_RULES.get(env_id)


class PolicyActor:
    """One decision at a time from a :class:`TablePolicy`, one uniform per decision, counting fallbacks.

    Usable as a chooser for :meth:`GymEpisodes.play` (``actor.choose``) and, through
    ``actor[state]``, wherever code reads a policy as a table of actions (the GIF maker).
    """

    def __init__(self, policy: TablePolicy, seed: int, describe: Callable[[int], str] | None = None):
        self.policy = policy
        self.uniforms = RandomStreams(seed).acting
        self.describe = describe
        self.visited = policy.visited_states
        self.decisions = 0
        self.fallbacks = 0

    def choose(self, state: int) -> tuple[int, float]:
        u = self.uniforms.next()
        action = int(self.policy.act(np.array([state]), np.array([u]), describe=self.describe)[0])
        self.decisions += 1
        if not self.visited[state]:
            self.fallbacks += 1
        return action, 1.0

    def __getitem__(self, state: int) -> int:
        return self.choose(int(state))[0]


@dataclass(frozen=True)
class TracedEpisode:
    seed: int
    states: np.ndarray
    actions: np.ndarray
    rewards: np.ndarray
    final_state: int
    ending: str  # "terminated", "time limit" or "step cap"


@dataclass(frozen=True)
class RolloutReport:
    episodes: int
    seeds: tuple[int, int]  # the first and last environment seed
    returns: np.ndarray
    return_mean: float
    return_ci95: float
    length_mean: float
    length_max: int
    truncated: int  # episodes cut by a time limit or the step cap
    decisions: int
    fallback_decisions: int
    success_rule: str | None
    successes: int | None
    exact_return: float | None = None
    exact_reason: str | None = None
    traces: list[TracedEpisode] = field(default_factory=list)

    @property
    def fallback_share(self) -> float:
        return self.fallback_decisions / self.decisions if self.decisions else 0.0

    @property
    def success_rate(self) -> float | None:
        return None if self.successes is None else self.successes / self.episodes

    @property
    def exact_in_interval(self) -> bool | None:
        if self.exact_return is None or not np.isfinite(self.return_ci95):
            return None
        return bool(abs(self.exact_return - self.return_mean) <= self.return_ci95)

    def metrics(self) -> dict[str, float]:
        """The report as flat metrics (names shared by the console, MLflow and summary.json)."""
        out = {
            "rollout_return_mean": self.return_mean,
            "rollout_return_ci95": self.return_ci95,
            "rollout_episodes": float(self.episodes),
            "rollout_length_mean": self.length_mean,
            "rollout_length_max": float(self.length_max),
            "rollout_truncated_fraction": self.truncated / self.episodes if self.episodes else 0.0,
            "rollout_fallback_share": self.fallback_share,
        }
        if self.success_rate is not None:
            out["rollout_success_rate"] = self.success_rate
        if self.exact_return is not None:
            out["exact_return"] = self.exact_return
            if self.exact_in_interval is not None:
                out["exact_in_interval"] = float(self.exact_in_interval)
        return out


def policy_probabilities(policy: TablePolicy) -> np.ndarray | None:
    """The ``(S, A)`` action probabilities of the policy as it acts: greedy where visited, the fallback elsewhere.

    None for the ``refuse`` fallback when some state is unvisited: such a policy has no
    action there, so it has no value wherever an episode can reach one.
    """
    S, A = policy.n_states, policy.n_actions
    probs = np.zeros((S, A))
    probs[np.arange(S), policy.greedy_actions()] = 1.0
    unvisited = ~policy.visited_states
    if unvisited.any():
        rule = policy.fallback.rule
        if rule == "refuse":
            return None
        probs[unvisited] = 0.0
        if rule == "action":
            probs[unvisited, policy.fallback.action] = 1.0
        else:
            probs[unvisited] = 1.0 / A
    return probs


def exact_return(environment: TabularEnvironment, policy: TablePolicy) -> tuple[float | None, str | None]:
    """The exact expected undiscounted return of the policy from the start distribution, or None and why not."""
    from ..envs.model import NoModelError
    from ..envs.model_extraction import model_of
    from .exact import ImproperPolicyError, policy_evaluation, start_value

    try:
        model = model_of(environment.env)
    except (NoModelError, ValueError) as exc:
        return None, str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    if model.n_states != environment.n_states or model.n_actions != environment.n_actions:
        return None, "the model's state or action count does not match the observation table"
    probs = policy_probabilities(policy)
    if probs is None:
        return None, "the policy refuses unvisited states, so it has no value where an episode can reach one"
    try:
        values = policy_evaluation(model, probs, 1.0)
    except ImproperPolicyError:
        return None, "the policy may never end an episode, so its undiscounted return is not finite"
    return start_value(model, values), None


def roll_out(
    environment: TabularEnvironment,
    policy: TablePolicy,
    episodes: int,
    seed: int,
    step_cap: int,
    trace: int = 0,
    exact: bool = True,
    progress=None,
) -> RolloutReport:
    """Play ``episodes`` episodes of ``policy`` on the rollout seeds of ``seed``; see the module docstring."""
    if episodes < 1:
        raise ValueError(f"episodes={episodes} must be a positive number of episodes")
    seeds = rollout_seeds(seed, episodes)
    source = GymEpisodes(environment, step_cap)
    actor = PolicyActor(policy, seed, describe=environment.encoder.describe)
    rule = success_rule(environment.spec.id)
    returns = np.empty(episodes)
    lengths = np.empty(episodes, dtype=np.int64)
    truncated = successes = 0
    traces: list[TracedEpisode] = []
    for i, env_seed in enumerate(seeds.tolist()):
        source.seed(env_seed)
        played = source.play(actor.choose)
        returns[i] = played.total_reward
        lengths[i] = played.arrays.states.size
        truncated += played.truncated
        if rule is not None and rule[1](played):
            successes += 1
        if i < trace:
            ending = "step cap" if played.capped else "time limit" if played.truncated else "terminated"
            a = played.arrays
            traces.append(TracedEpisode(env_seed, a.states, a.actions, a.rewards, played.final_state, ending))
        if progress is not None and ((i + 1) % 100 == 0 or i + 1 == episodes):
            progress.update(i + 1, {"return_mean": float(returns[: i + 1].mean())})
    summary = summarise_returns(returns)
    value, reason = exact_return(environment, policy) if exact else (None, "exact=false")
    return RolloutReport(
        episodes=episodes,
        seeds=(int(seeds[0]), int(seeds[-1])),
        returns=returns,
        return_mean=summary.mean,
        return_ci95=summary.ci95,
        length_mean=float(lengths.mean()),
        length_max=int(lengths.max()),
        truncated=truncated,
        decisions=actor.decisions,
        fallback_decisions=actor.fallbacks,
        success_rule=rule[0] if rule else None,
        successes=successes if rule else None,
        exact_return=value,
        exact_reason=reason,
        traces=traces,
    )


def format_trace(traces: list[TracedEpisode], environment: TabularEnvironment, visited: np.ndarray) -> str:
    """The traced episodes as text: each step's state in its own terms, the action, the reward.

    A decision taken in a state training never reached is marked ``(fallback)``.
    """
    describe = environment.encoder.describe
    lines: list[str] = []
    for number, episode in enumerate(traces):
        lines.append(f"episode {number} (environment seed {episode.seed}): return {float(episode.rewards.sum()):g}, {episode.states.size} steps, ended by {episode.ending}")
        for t, (s, a, r) in enumerate(zip(episode.states.tolist(), episode.actions.tolist(), episode.rewards.tolist())):
            mark = "  (fallback: state never visited in training)" if not visited[s] else ""
            lines.append(f"  t={t:<4d} {describe(s)}  -> action {a}, reward {r:g}{mark}")
        lines.append(f"  end    {describe(episode.final_state)}")
        lines.append("")
    return "\n".join(lines)
