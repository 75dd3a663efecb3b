"""Each bundled environment states the facts of its own problem: discount and evaluation size.

The top-level ``gamma``, ``eval_episodes`` and ``eval_every`` of ``qtally-train`` default to the
environment's (``${env.gamma}`` ...), and a command-line override of the top-level key wins.
Composed with Hydra's own compose API, as the command line composes them.
"""

from __future__ import annotations

from importlib import resources

import pytest
from hydra import compose, initialize_config_module
from omegaconf import OmegaConf

from qtally.config.schema import register_schema

BUNDLED = sorted(p.name.removesuffix(".yaml") for p in (resources.files("qtally.configs") / "env").iterdir() if p.name.endswith(".yaml"))


def _compose(*overrides: str):
    register_schema()
    with initialize_config_module(config_module="qtally.configs", version_base="1.3"):
        return compose("train", overrides=list(overrides))


def test_blackjack_is_undiscounted_and_an_override_wins():
    cfg = _compose("env=blackjack")
    assert cfg.gamma == 1.0 and cfg.env.gamma == 1.0
    assert cfg.eval_episodes == 20_000
    overridden = _compose("env=blackjack", "gamma=0.9", "eval_episodes=50")
    assert overridden.gamma == 0.9 and overridden.eval_episodes == 50
    assert overridden.env.gamma == 1.0  # the environment's fact stays as stated


def test_the_default_run_keeps_its_discount():
    # FrozenLake 4x4 states 0.99 (the undiscounted optimum is the same policy; see its config).
    cfg = _compose()
    assert cfg.env.id == "FrozenLake-v1" and cfg.gamma == 0.99


def test_the_restocking_season_is_undiscounted_and_the_resolved_value_is_what_gets_recorded():
    cfg = _compose("env=restock")
    # Params and config/resolved_config.yaml are written from the resolved config.
    resolved = OmegaConf.to_container(cfg, resolve=True)
    assert resolved["gamma"] == 1.0 and resolved["eval_episodes"] == cfg.env.eval_episodes == 3000


@pytest.mark.parametrize("name", BUNDLED)
def test_every_bundled_config_states_its_own_facts(name):
    # Stated in the file itself, not inherited from the schema's fallback for unknown environments.
    text = OmegaConf.create((resources.files("qtally.configs") / "env" / f"{name}.yaml").read_text())
    for key in ("gamma", "eval_episodes", "eval_every", "eval_resolution"):
        assert key in text, f"configs/env/{name}.yaml states no {key}"
    assert 0.0 < text.gamma <= 1.0
    cfg = _compose(f"env={name}")
    assert (cfg.gamma, cfg.eval_episodes, cfg.eval_every) == (text.gamma, text.eval_episodes, text.eval_every)


@pytest.mark.parametrize("name, return_sd_bound", [("blackjack", 1.0), ("frozen_lake_4x4", 0.5), ("frozen_lake_8x8", 0.5)])
def test_bounded_returns_are_evaluated_finely_enough_for_any_policy(name, return_sd_bound):
    # Returns in [-1, 1] (Blackjack) or {0, 1} (FrozenLake) have a standard deviation of at
    # most 1 or 0.5 (Popoviciu's inequality), so the worst-case half-width is known before any
    # run: the configured size must resolve the config's own eval_resolution under the
    # summary's rule (sqrt(2) x half-width, see qtally.cli.train.ranking_note).
    cfg = _compose(f"env={name}")
    worst_half_width = 1.96 * return_sd_bound / cfg.eval_episodes**0.5
    assert 2**0.5 * worst_half_width <= cfg.env.eval_resolution
