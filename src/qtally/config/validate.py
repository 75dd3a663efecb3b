"""Check a composed config before any work starts: every message names the key, the value and what is allowed."""

from __future__ import annotations

import math

from omegaconf import DictConfig

from ..control.schedules import SCHEDULE_KINDS
from ..control.variants import VARIANT_NAMES
from ..control.truncation import TRUNCATION_CHOICES
from ..engine.compiled import ENGINE_CHOICES
from ..evaluate.seeded_evaluation import REPLAY_CHOICES
from ..policy.table_policy import FALLBACK_RULES

__all__ = ["ConfigError", "validate", "validate_env", "validate_collect", "schedule_parameters"]

_SCHEDULE_PARAMETERS = {
    "constant": ("epsilon",),
    "linear": ("start", "end", "decay_episodes"),
    "exponential": ("start", "rate", "floor"),
    "glie_episode": ("scale", "floor"),
    "glie_visits": ("scale", "floor"),
}
_UNIT_KEYS = ("epsilon", "start", "end", "floor")


class ConfigError(ValueError):
    """A config value is out of range or unknown."""


def schedule_parameters(schedule: DictConfig) -> dict:
    kind = schedule.kind
    if kind not in SCHEDULE_KINDS:
        raise ConfigError(f"schedule.kind={kind!r} is unknown; choose one of {', '.join(SCHEDULE_KINDS)}")
    for key in ("epsilon", "start", "end", "decay_episodes", "rate", "scale", "floor"):
        if key not in _SCHEDULE_PARAMETERS[kind] and schedule.get(key) is not None:
            # Set but unused, it would be silently ignored: the run would not be the one asked for.
            raise ConfigError(
                f"schedule.{key}={schedule.get(key)} does not apply to schedule={kind} (its keys: {', '.join(_SCHEDULE_PARAMETERS[kind])}); "
                f"drop it, or choose the schedule that has it"
            )
    parameters = {}
    for key in _SCHEDULE_PARAMETERS[kind]:
        value = schedule.get(key)
        if value is None:
            raise ConfigError(f"schedule.{key} is required for schedule.kind={kind}")
        parameters[key] = value
    return parameters


def validate_env(env: DictConfig) -> None:
    """The ``env`` group rules both commands share: how an episode may be cut, and what is done with the cut."""
    if env.truncation not in TRUNCATION_CHOICES:
        raise ConfigError(f"env.truncation={env.truncation!r}; choose one of {', '.join(TRUNCATION_CHOICES)}")
    # 0 would read as "no time limit" further down, and a negative limit is gymnasium's traceback.
    if env.max_episode_steps is not None and env.max_episode_steps <= 0:
        raise ConfigError(f"env.max_episode_steps={env.max_episode_steps} must be a positive number of steps, or null for no time limit")
    step_cap = env.get("step_cap")
    if step_cap is not None and step_cap <= 0:
        raise ConfigError(f"env.step_cap={step_cap} must be a positive number of steps, or null for the default derived from the state count")


def validate_fallback(fallback: DictConfig | None) -> None:
    """``policy_fallback``: a known rule, and a fixed action exactly when the rule is ``action``.

    Whether the action exists is checked once the environment is made (its action count).
    """
    if fallback is None:
        return
    rule, action = fallback.get("rule", "uniform"), fallback.get("action")
    if rule not in FALLBACK_RULES:
        raise ConfigError(f"policy_fallback.rule={rule!r} is unknown; choose one of {', '.join(FALLBACK_RULES)}")
    if rule == "action" and (action is None or action < 0):
        raise ConfigError(f"policy_fallback.action={action} must be an action index (0 or more) when policy_fallback.rule=action")
    if rule != "action" and action is not None:
        raise ConfigError(f"policy_fallback.action={action} is only used with policy_fallback.rule=action, not rule={rule!r}; set it to null")


def validate(cfg: DictConfig) -> None:
    if cfg.episodes <= 0:
        raise ConfigError(f"episodes={cfg.episodes} must be a positive number of episodes")
    if not 0.0 <= cfg.gamma <= 1.0:
        raise ConfigError(f"gamma={cfg.gamma} is outside [0, 1]; the discount must lie in [0, 1]")
    if cfg.variant.name not in VARIANT_NAMES:
        raise ConfigError(f"variant.name={cfg.variant.name!r} is unknown; choose one of {', '.join(VARIANT_NAMES)}")
    if cfg.variant.step_size is not None and not 0.0 < cfg.variant.step_size <= 1.0:
        raise ConfigError(f"variant.step_size={cfg.variant.step_size} must lie in (0, 1], or be null for the sample average")
    validate_env(cfg.env)
    # A nan or infinite starting value poisons every comparison the greedy policy makes.
    if not math.isfinite(cfg.initial_value):
        raise ConfigError(f"initial_value={cfg.initial_value} must be a finite number (the starting Q value of every pair)")
    parameters = schedule_parameters(cfg.schedule)
    for key in _UNIT_KEYS:
        value = parameters.get(key)
        if value is not None and not 0.0 <= value <= 1.0:
            raise ConfigError(f"schedule.{key}={value} is outside [0, 1]; epsilon values must lie in [0, 1]")
    if cfg.schedule.kind == "exponential" and not 0.0 < parameters["rate"] <= 1.0:
        raise ConfigError(f"schedule.rate={parameters['rate']} must lie in (0, 1]")
    if cfg.schedule.kind == "linear" and parameters["decay_episodes"] < 1:
        raise ConfigError(f"schedule.decay_episodes={parameters['decay_episodes']} must be a positive episode count")
    if cfg.schedule.kind.startswith("glie") and not parameters["scale"] > 0:  # written so nan fails too
        raise ConfigError(f"schedule.scale={parameters['scale']} must be positive")
    validate_fallback(cfg.get("policy_fallback"))
    engine = cfg.get("engine", "auto")
    if engine not in ENGINE_CHOICES:
        raise ConfigError(f"engine={engine!r} is unknown; choose one of {', '.join(ENGINE_CHOICES)}")
    replay = cfg.get("eval_replay", "changed")
    if replay not in REPLAY_CHOICES:
        raise ConfigError(f"eval_replay={replay!r} is unknown; choose one of {', '.join(REPLAY_CHOICES)}")
    log_every = cfg.log_every
    if log_every != "auto" and (isinstance(log_every, bool) or not isinstance(log_every, int) or log_every <= 0):
        raise ConfigError(f"log_every={log_every} must be auto or a positive number of episodes per logging window")
    send_every = cfg.tracking.get("send_every", 2.0)
    if not math.isfinite(send_every) or send_every < 0:
        raise ConfigError(f"tracking.send_every={send_every} must be a number of seconds, 0 or more (how long a full queue of metric values may wait)")
    if cfg.eval_episodes <= 0:
        raise ConfigError(f"eval_episodes={cfg.eval_episodes} must be positive")
    for key in ("eval_every", "snapshot_every", "checkpoint_every"):
        if cfg[key] < 0:
            raise ConfigError(f"{key}={cfg[key]} must be 0 (off) or a positive episode count")
    validate_collect(cfg.get("collect"), engine)


def validate_collect(collect: DictConfig | None, engine: str) -> None:
    """The ``collect`` block: how many workers play, where, and in what batches."""
    if collect is None:
        return
    from ..engine.collection import BACKENDS, compiled_beside_workers

    if collect.workers < 1:
        raise ConfigError(f"collect.workers={collect.workers} must be 1 or more (1: episodes are played in this process)")
    if collect.batch is not None and collect.batch < 1:
        raise ConfigError(f"collect.batch={collect.batch} must be a positive number of episodes, or null for 8 per worker")
    if collect.backend not in BACKENDS:
        raise ConfigError(f"collect.backend={collect.backend!r} is unknown; choose one of {', '.join(BACKENDS)}")
    if collect.address is not None and collect.backend != "ray":
        raise ConfigError(f"collect.address={collect.address!r} is a Ray cluster's address; it needs collect.backend=ray")
    if not collect.timeout > 0:
        raise ConfigError(f"collect.timeout={collect.timeout} must be a positive number of seconds")
    if not collect.worker_cpus > 0:
        raise ConfigError(f"collect.worker_cpus={collect.worker_cpus} must be a positive number of CPUs")
    if engine == "compiled" and (collect.workers > 1 or collect.backend != "local"):
        raise ConfigError(compiled_beside_workers(collect))
