"""``qtally-train``: a thin Hydra entry point around :func:`qtally.experiment.run_training`."""

from __future__ import annotations

import hydra
from omegaconf import DictConfig

from ..config.schema import register_schema
from .console import TrainingProgress, pre_check_overrides, quiet_libraries, run_reporting_errors

PROGRAM = "qtally-train"


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
        print(f"  policy model: runs:/{summary.run_id}/policy")
        print(f"  tracking UI:  mlflow ui --backend-store-uri {summary.tracking_uri} --host 127.0.0.1")


def main() -> None:
    from ..config.schema import EnvConfig, ScheduleConfig, TrainConfig, VariantConfig

    quiet_libraries()
    register_schema()
    schema = TrainConfig(env=EnvConfig(), variant=VariantConfig(), schedule=ScheduleConfig())
    pre_check_overrides(PROGRAM, schema, ("env", "variant", "schedule"), "configs/train.yaml")
    _train()
