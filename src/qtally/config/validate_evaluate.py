"""Check a composed ``qtally-evaluate`` config before any run is opened, in the style of :mod:`.validate`.

Every message names the key, the value and what is allowed, and is raised as
:class:`~qtally.config.validate.ConfigError`. The start rules need the environment (which
states an episode can start in, how an observation is spelled), so they take it as an
argument; everything else reads the config alone.
"""

from __future__ import annotations

from typing import Any, NamedTuple

from omegaconf import DictConfig, OmegaConf

from ..envs.encoders import EncoderError
from ..errors import first_line
from .validate import ConfigError, validate_env

__all__ = [
    "POLICY_SOURCES",
    "ESTIMATE_CHOICES",
    "IMPORTANCE_SAMPLING_CHOICES",
    "EXPLORING_CHOICES",
    "StartPlan",
    "validate_evaluate",
    "start_observation",
    "resolve_start",
]

POLICY_SOURCES = ("run", "file", "model", "rule")
ESTIMATE_CHOICES = ("v", "q", "both")
IMPORTANCE_SAMPLING_CHOICES = ("ordinary", "weighted", "both")
EXPLORING_CHOICES = ("none", "states", "pairs")


class StartPlan(NamedTuple):
    """Where episodes start: a fixed observation (and first action), a uniform draw, or the environment's own reset."""

    observation: Any = None
    action: int | None = None
    states: list | None = None  # start.exploring: the states drawn from
    random_first_action: bool = False


def validate_evaluate(cfg: DictConfig) -> None:
    """Ranges and choices of the keys that need no environment to check."""
    if cfg.episodes <= 0:
        raise ConfigError(f"episodes={cfg.episodes} must be a positive number of episodes")
    if not 0.0 <= cfg.gamma <= 1.0:
        raise ConfigError(f"gamma={cfg.gamma} is outside [0, 1]; the discount must lie in [0, 1]")
    if cfg.estimate not in ESTIMATE_CHOICES:
        raise ConfigError(f"estimate={cfg.estimate!r} is unknown; choose one of {', '.join(ESTIMATE_CHOICES)}")
    if cfg.min_visits < 0:
        raise ConfigError(f"min_visits={cfg.min_visits} must be 0 or more")
    if cfg.behaviour.importance_sampling not in IMPORTANCE_SAMPLING_CHOICES:
        raise ConfigError(
            f"behaviour.importance_sampling={cfg.behaviour.importance_sampling!r} is unknown; choose one of {', '.join(IMPORTANCE_SAMPLING_CHOICES)}"
        )
    if cfg.start.exploring not in EXPLORING_CHOICES:
        raise ConfigError(f"start.exploring={cfg.start.exploring!r} is unknown; choose one of {', '.join(EXPLORING_CHOICES)}")
    if cfg.policy.source is None:
        raise ConfigError(f"policy.source is required; choose one of {', '.join(POLICY_SOURCES)}")
    validate_env(cfg.env)


def start_observation(value: Any, environment) -> Any:
    """The configured start observation in the environment's own terms (an int, or a tuple of parts)."""
    parts = list(value) if isinstance(value, (list, tuple)) else [value]
    if environment.encoder.width == 1 and type(environment.encoder).__name__ == "DiscreteEncoder":
        if len(parts) != 1:
            raise ConfigError(f"start.observation={value!r}: this environment's observation is a single integer")
        return int(parts[0])
    if len(parts) != environment.encoder.width:
        raise ConfigError(f"start.observation={value!r}: needs {environment.encoder.width} parts ({', '.join(environment.encoder.names)})")
    return tuple(int(p) for p in parts)


def resolve_start(cfg: DictConfig, environment) -> StartPlan:
    """The ``start.*`` keys checked against what this environment can start in."""
    start = cfg.start
    observation = OmegaConf.to_container(start.observation) if OmegaConf.is_config(start.observation) else start.observation
    if observation is None and start.action is None and start.exploring == "none":
        return StartPlan()
    if environment.start_control is None:
        raise ConfigError(
            f"start.* needs an environment whose start state can be set, and {environment.spec.id!r} cannot; "
            "drop start.observation/start.action/start.exploring, or implement start_states()/reset_to() (see DEVELOPERS.md)"
        )
    if start.action is not None and not 0 <= start.action < environment.n_actions:
        raise ConfigError(f"start.action={start.action} is not an action; this environment has actions 0..{environment.n_actions - 1}")
    allowed = list(environment.start_control.start_states())
    if start.exploring != "none":
        if observation is not None or start.action is not None:
            raise ConfigError("start.exploring draws the start itself; leave start.observation and start.action null with it")
        return StartPlan(states=allowed, random_first_action=start.exploring == "pairs")
    if observation is None:
        raise ConfigError("start.action needs start.observation (the state it is taken in)")
    normalised = start_observation(observation, environment)
    encode = environment.encoder.encode
    try:
        index = encode(normalised)
        allowed_index = {encode(s) for s in allowed}
    except (EncoderError, TypeError, ValueError) as exc:
        raise ConfigError(f"start.observation={observation!r}: {first_line(exc)}") from None
    if index not in allowed_index:
        raise ConfigError(
            f"start.observation={observation!r} is not a state an episode can start in here "
            f"({len(allowed)} are, e.g. {allowed[0]!r})"
        )
    return StartPlan(observation=normalised, action=start.action)
