"""The structured config schema, registered with Hydra's ConfigStore.

Types are checked by OmegaConf when Hydra composes the config (a string where a
number belongs fails there, naming the key); value ranges and choices are checked by
:func:`qtally.config.validate.validate` before any work starts.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Optional

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING

__all__ = ["EnvConfig", "VariantConfig", "ScheduleConfig", "TrackingConfig", "PolicyFallbackConfig", "CollectConfig", "TrainConfig", "register_schema"]


@dataclass
class EnvConfig:
    id: str = MISSING
    kwargs: dict[str, Any] = field(default_factory=dict)
    max_episode_steps: Optional[int] = None
    step_cap: Optional[int] = None  # hard cap on every episode's steps; null: derived from the state count
    observation_names: Optional[list[str]] = None
    bins: Optional[list[int]] = None
    low: Optional[list[float]] = None
    high: Optional[list[float]] = None
    truncation: str = "as_terminal"
    # Facts of the problem, stated by each bundled env config; the top-level keys of the same
    # names default to them (configs/train.yaml), and an override of the top-level key wins.
    gamma: float = 0.99  # the discount of the environment's own objective (0.99 when a config states none)
    eval_episodes: int = 200  # rollouts per evaluation: enough to rank runs, at about a second's cost
    eval_every: int = 1000  # episodes between evaluations, so evaluating does not dominate a long run
    eval_resolution: Optional[float] = None  # smallest difference in mean return worth telling apart (the summary's ranking rule)


@dataclass
class VariantConfig:
    name: str = MISSING
    first_visit: bool = True
    step_size: Optional[float] = None


@dataclass
class ScheduleConfig:
    kind: str = "constant"
    epsilon: Optional[float] = None
    start: Optional[float] = None
    end: Optional[float] = None
    decay_episodes: Optional[int] = None
    rate: Optional[float] = None
    scale: Optional[float] = None
    floor: Optional[float] = None


@dataclass
class TrackingConfig:
    uri: Optional[str] = None
    experiment: str = "qtally"
    run_name: Optional[str] = None
    log_model: bool = True
    sqlite_rows: bool = True  # metric values straight into a SQLite store's tables (tracking/sqlite_metrics.py)
    send_every: float = 2.0  # seconds a full queue of metric values waits for the SQLite writer (fewer commits)


@dataclass
class PolicyFallbackConfig:
    """What the saved policy does in states training never reached (qtally.policy.table_policy.Fallback)."""

    rule: str = "uniform"  # uniform | action | refuse
    action: Optional[int] = None  # the fixed action for rule=action


@dataclass
class CollectConfig:
    """Who plays the episodes of one run (qtally.engine.collection)."""

    workers: int = 1  # 1: in this process; N: N worker processes, or N Ray actors with backend=ray
    batch: Optional[int] = None  # episodes played on one snapshot of the policy; null: 1 with one worker, 8 per worker otherwise
    backend: str = "local"  # local | ray
    address: Optional[str] = None  # ray: a running cluster's address; null: a local Ray instance on loopback
    worker_cpus: float = 1.0  # ray: CPUs reserved per worker
    timeout: float = 600.0  # seconds a worker may take for its share of one batch


@dataclass
class TrainConfig:
    env: EnvConfig = MISSING
    variant: VariantConfig = MISSING
    schedule: ScheduleConfig = MISSING
    tracking: TrackingConfig = field(default_factory=TrackingConfig)
    policy_fallback: PolicyFallbackConfig = field(default_factory=PolicyFallbackConfig)
    collect: CollectConfig = field(default_factory=CollectConfig)
    episodes: int = 5000
    gamma: float = 0.99
    seed: int = 0
    repeat_seeds: Optional[list[int]] = None  # in a sweep, train each job once per seed listed (seed-averaged searches)
    eval_seed: Optional[int] = 0  # evaluation episodes' seed, independent of seed; null: derived from seed
    log_every: Any = "auto"  # auto (qtally.trainer.logging_window) or episodes per logging window
    eval_every: int = 1000
    eval_episodes: int = 200
    eval_replay: str = "changed"  # changed: evaluations play again only episodes a policy change can alter | all
    snapshot_every: int = 0
    initial_value: float = 0.0
    exact: bool = True
    engine: str = "auto"  # auto | gym | compiled: how episodes are played (qtally.engine.compiled)
    checkpoint_every: int = 0  # episodes between checkpoints (0: only when stopped and at the end)
    checkpoint_dir: str = "checkpoints"  # local checkpoints go to <checkpoint_dir>/<run id>/trainer_state.npz
    resume: Optional[str] = None  # a run id: continue that run from its last checkpoint, with its own config
    rollout_animation: bool = True
    quiet: bool = False


def register_schema() -> None:
    ConfigStore.instance().store(name="base_train", node=TrainConfig)
