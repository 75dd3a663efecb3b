"""The structured config schema of ``qtally-evaluate``, registered with Hydra's ConfigStore.

Types are checked when Hydra composes the config (``episodes=many`` fails there, naming
the key); value ranges, choices and cross-key rules are checked by
:mod:`qtally.config.validate_evaluate` (called by
:func:`qtally.prediction_run.prepare_prediction`) before any run is opened.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Optional

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING

from .schema import EnvConfig

__all__ = ["PolicyConfig", "BehaviourConfig", "StartConfig", "EvaluateTrackingConfig", "EvaluateConfig", "register_evaluate_schema"]


@dataclass
class PolicyConfig:
    """Where the policy comes from: ``source`` is run, file, model or rule."""

    source: Optional[str] = "rule"
    run_id: Optional[str] = None  # source=run: the run's policy_file/policy.npz artifact
    path: Optional[str] = None  # source=file: a qtally policy file
    uri: Optional[str] = None  # source=model: runs:/<id>/policy or models:/<name>/<version>
    rule: str = "uniform"  # source=rule: uniform (the default: it fits every environment), threshold or constant
    part: Optional[str] = None  # threshold: observation part name (or position)
    threshold: Optional[float] = None
    low_action: Optional[int] = None  # threshold: action below the threshold
    high_action: Optional[int] = None  # threshold: action at or above it
    action: Optional[int] = None  # constant: the action
    epsilon: float = 0.0  # mix with the uniform policy: (1 - epsilon) pi + epsilon / |A|


@dataclass
class BehaviourConfig(PolicyConfig):
    """The policy that plays the episodes; ``source: null`` means the target itself (on-policy)."""

    source: Optional[str] = None
    importance_sampling: str = "both"  # ordinary, weighted or both


@dataclass
class StartConfig:
    observation: Any = None  # one observation in the environment's terms, e.g. [13, 2, 0] or 5
    action: Optional[int] = None  # the first action (then V of the start state is not sampled at step 0)
    exploring: str = "none"  # none, states (uniform start state), pairs (uniform start state and action)


@dataclass
class EvaluateTrackingConfig:
    uri: Optional[str] = None
    experiment: str = "qtally-evaluate"
    run_name: Optional[str] = None


@dataclass
class EvaluateConfig:
    env: EnvConfig = MISSING
    policy: PolicyConfig = field(default_factory=PolicyConfig)
    behaviour: BehaviourConfig = field(default_factory=BehaviourConfig)
    start: StartConfig = field(default_factory=StartConfig)
    tracking: EvaluateTrackingConfig = field(default_factory=EvaluateTrackingConfig)
    episodes: int = 10000
    gamma: float = 1.0
    seed: int = 0
    first_visit: bool = True
    estimate: str = "both"  # v, q or both
    min_visits: int = 30
    exact: bool = True
    quiet: bool = False


def register_evaluate_schema() -> None:
    ConfigStore.instance().store(name="base_evaluate", node=EvaluateConfig)
