"""The structured config schema of ``qtally-check``, registered with Hydra's ConfigStore."""

from __future__ import annotations

from dataclasses import dataclass

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING

from .schema import EnvConfig

__all__ = ["CheckConfig", "register_check_schema"]


@dataclass
class CheckConfig:
    env: EnvConfig = MISSING
    episodes: int = 100000  # the training length the time estimate is for
    probe_seconds: float = 2.0  # how long to play random episodes to measure the speed
    seed: int = 0
    workers: int = 0  # the collection workers the estimate is for (0: this machine's core count)


def register_check_schema() -> None:
    ConfigStore.instance().store(name="base_check", node=CheckConfig)
