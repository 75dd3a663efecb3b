"""``qtally-train``: a thin Hydra entry point around :func:`qtally.experiment.run_training`."""

from __future__ import annotations

import math

import hydra
from omegaconf import DictConfig

from ..config.schema import register_schema
from .console import TrainingProgress, pre_check_overrides, quiet_libraries, run_reporting_errors

PROGRAM = "qtally-train"


def ranking_note(half_width: float, episodes: int, resolution: float | None) -> str:
    """Whether the final evaluation can rank this run against another, and what would make it so.

    The rule: two runs evaluated alike differ at the 5% level when their mean returns are
    further apart than about sqrt(2) times the 95% half-width (their errors add in
    quadrature; the shared evaluation seeds usually narrow the difference). The interval is
    too wide to rank runs when that distance exceeds ``env.eval_resolution``, the smallest
    difference in mean return worth telling apart in the environment (each bundled config
    states one). The half-width shrinks as 1/sqrt(n), which gives the suggested size.

    >>> ranking_note(0.13, 200, 0.02)
    'too wide to rank runs: differences below 0.18 are noise, env.eval_resolution=0.02; eval_episodes=16900 would resolve it'
    >>> ranking_note(0.013, 20000, 0.02)
    'ranks runs: differences above 0.018 are resolved (env.eval_resolution=0.02)'
    >>> ranking_note(0.05, 100, None)
    'differences below 0.071 are noise (set env.eval_resolution to judge whether that is too wide)'
    """
    if not math.isfinite(half_width):
        return "no interval (fewer than 2 evaluation episodes): too wide to rank runs"
    noise = math.sqrt(2.0) * half_width
    if resolution is None:
        return f"differences below {noise:.2g} are noise (set env.eval_resolution to judge whether that is too wide)"
    if noise <= resolution:
        return f"ranks runs: differences above {noise:.2g} are resolved (env.eval_resolution={resolution:g})"
    needed = math.ceil(round(episodes * (noise / resolution) ** 2, 6))
    return f"too wide to rank runs: differences below {noise:.2g} are noise, env.eval_resolution={resolution:g}; eval_episodes={needed} would resolve it"


@hydra.main(version_base="1.3", config_path="pkg://qtally.configs", config_name="train")
def _train(cfg: DictConfig) -> None:
    from ..experiment import run_training

    progress = None if cfg.quiet else TrainingProgress
    summary = run_reporting_errors(PROGRAM, lambda: run_training(cfg, progress_factory=progress))
    if cfg.quiet:
        print(summary.run_id)  # quiet: the run id alone, for scripts (RUN=$(qtally-train quiet=true))
    else:
        evaluation = summary.final_evaluation
        line = f"eval_return_mean={evaluation.get('eval_return_mean', float('nan')):.4g} ± {evaluation.get('eval_return_ci95', float('nan')):.3g}"
        if "optimality_gap" in evaluation:
            line += f"  optimality_gap={evaluation['optimality_gap']:.4g}  optimal_action_fraction={evaluation['optimal_action_fraction']:.3f}"
        print(f"run {summary.run_id} finished: {line}")
        print(f"  evaluation:   {ranking_note(evaluation.get('eval_return_ci95', float('nan')), cfg.eval_episodes, cfg.env.get('eval_resolution'))}")
        print(f"  policy model: runs:/{summary.run_id}/policy")
        print(f"  tracking UI:  mlflow ui --backend-store-uri {summary.tracking_uri} --host 127.0.0.1")


def main() -> None:
    from ..config.schema import EnvConfig, ScheduleConfig, TrainConfig, VariantConfig

    quiet_libraries()
    register_schema()
    schema = TrainConfig(env=EnvConfig(), variant=VariantConfig(), schedule=ScheduleConfig())
    pre_check_overrides(PROGRAM, schema, ("env", "variant", "schedule"), "configs/train.yaml")
    _train()
