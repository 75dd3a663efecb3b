"""The structured config schema of ``qtally-compare``, registered with Hydra's ConfigStore.

Types are checked when Hydra composes the config (``threshold=high`` fails there, naming
the key); values are checked by :func:`qtally.compare_run.check_compare_config` before the
store is opened.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Optional

from hydra.core.config_store import ConfigStore

__all__ = ["CompareTrackingConfig", "CompareConfig", "register_compare_schema"]


@dataclass
class CompareTrackingConfig:
    uri: Optional[str] = None  # null: $MLFLOW_TRACKING_URI, else sqlite:///mlflow.db in the working directory
    experiment: str = "qtally-compare"  # where a comparison of runs without a common parent is recorded


@dataclass
class CompareConfig:
    sweep: Optional[str] = None  # a sweep's parent run id, or "latest"; null: latest, unless a filter is given
    experiment: str = "qtally"  # the experiment to look in (for latest and filter)
    filter: Optional[str] = None  # an MLflow filter string; with a sweep it narrows the sweep's runs
    group_by: Optional[list[str]] = None  # tags that form the groups; null: the sweep's qtally.group tag
    metric: str = "eval_return_mean"  # the final metric that ranks the groups and is tested
    higher_is_better: bool = True
    threshold: Optional[float] = None  # eval_return_mean to reach: episodes to first reach it, per group
    output_dir: str = "comparison"  # where comparison.csv, comparison.md and learning_curves.png are written
    record: bool = True  # log the files and per-group metrics to MLflow
    quiet: bool = False  # print only the id of the run that holds the comparison
    tracking: CompareTrackingConfig = field(default_factory=CompareTrackingConfig)


def register_compare_schema() -> None:
    ConfigStore.instance().store(name="base_compare", node=CompareConfig)
