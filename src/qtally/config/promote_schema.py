"""The structured config schema of ``qtally-promote``, registered with Hydra's ConfigStore.

Types are checked when Hydra composes the config; values by
:func:`qtally.promote_run.run_promotion` before anything is registered.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Optional

from hydra.core.config_store import ConfigStore

__all__ = ["PromoteTrackingConfig", "PromoteConfig", "register_promote_schema"]


@dataclass
class PromoteTrackingConfig:
    uri: Optional[str] = None  # null: $MLFLOW_TRACKING_URI, else sqlite:///mlflow.db in the working directory


@dataclass
class PromoteConfig:
    name: Optional[str] = None  # the registered model name (required)
    alias: str = "best"  # models:/<name>@<alias> resolves to the winner
    sweep: Optional[str] = None  # a sweep's parent run id, or "latest"; null: every run of the experiment (or those the filter keeps)
    experiment: str = "qtally"
    filter: Optional[str] = None  # an MLflow filter string over params and tags
    metric: str = "eval_return_mean"  # final metric that ranks the runs; greedy_expected_return is exact where every run has a model
    higher_is_better: bool = True
    require_significant: bool = False  # move the alias only if the 95% intervals do not overlap
    quiet: bool = False  # print only the run id the alias points at
    tracking: PromoteTrackingConfig = field(default_factory=PromoteTrackingConfig)


def register_promote_schema() -> None:
    ConfigStore.instance().store(name="base_promote", node=PromoteConfig)
