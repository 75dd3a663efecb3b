"""The structured config schema of ``qtally-rollout``, registered with Hydra's ConfigStore.

Types are checked when Hydra composes the config; values and the choice of exactly one
policy source by :func:`qtally.rollout_run.prepare_rollout` before any run is opened.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Optional

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING

from .schema import EnvConfig

__all__ = ["RolloutTrackingConfig", "RolloutConfig", "register_rollout_schema", "ROLLOUT_SOURCES"]

ROLLOUT_SOURCES = ("run_id", "model", "name", "sweep")  # exactly one says where the policy comes from


@dataclass
class RolloutTrackingConfig:
    uri: Optional[str] = None  # null: $MLFLOW_TRACKING_URI, else sqlite:///mlflow.db in the working directory
    experiment: str = "qtally-rollout"  # rollouts have their own experiment, apart from training sweeps
    run_name: Optional[str] = None


@dataclass
class RolloutConfig:
    env: EnvConfig = MISSING
    run_id: Optional[str] = None  # a training run's id: its policy_file/policy.npz
    model: Optional[str] = None  # a model URI: runs:/<id>/policy, models:/<name>@<alias>, models:/<name>/<version>
    name: Optional[str] = None  # a registered model name, with alias
    alias: str = "best"
    sweep: Optional[str] = None  # the best run of this sweep (parent run id or latest), ranked like qtally-promote
    experiment: str = "qtally"  # for sweep=latest
    metric: str = "eval_return_mean"  # for sweep=: the ranking metric
    higher_is_better: bool = True
    episodes: int = 1000
    seed: int = 0  # picks the rollout seeds (all >= 2**31: never a training or evaluation seed)
    trace: int = 0  # print and save a text trace of the first N episodes
    animation: bool = False  # save one episode as an animated GIF where the environment renders rgb_array
    exact: bool = True  # where the environment has a model, the exact expected return beside the estimate
    quiet: bool = False
    tracking: RolloutTrackingConfig = field(default_factory=RolloutTrackingConfig)


def register_rollout_schema() -> None:
    ConfigStore.instance().store(name="base_rollout", node=RolloutConfig)
