"""``qtally-evaluate``: a thin Hydra entry point around :func:`qtally.prediction_run.run_prediction`."""

from __future__ import annotations

import sys

import hydra
from omegaconf import DictConfig

from ..config.evaluate_schema import register_evaluate_schema
from .console import PredictionProgress, fail, pre_check_overrides, quiet_libraries, run_reporting_errors

PROGRAM = "qtally-evaluate"


@hydra.main(version_base="1.3", config_path="pkg://qtally.configs", config_name="evaluate")
def _evaluate(cfg: DictConfig) -> None:
    from ..prediction_run import run_prediction
    from .prediction_table import format_report

    progress = None if cfg.quiet else PredictionProgress
    summary = run_reporting_errors(PROGRAM, lambda: run_prediction(cfg, progress_factory=progress))
    if cfg.quiet:
        print(summary.run_id)  # quiet: the run id alone, for scripts
    else:
        print(format_report(summary))
        print(f"run {summary.run_id} finished (experiment {cfg.tracking.experiment}; table in tables/prediction.csv)")


def main() -> None:
    from ..config.evaluate_schema import BehaviourConfig, EvaluateConfig, PolicyConfig, StartConfig
    from ..config.schema import EnvConfig

    quiet_libraries()
    register_evaluate_schema()
    schema = EvaluateConfig(env=EnvConfig(), policy=PolicyConfig(), behaviour=BehaviourConfig(), start=StartConfig())
    pre_check_overrides(PROGRAM, schema, ("env",), "configs/evaluate.yaml")
    from .group_choices import first_bad_choice

    choice_problem = first_bad_choice(sys.argv[1:], ("env",))
    if choice_problem:
        fail(PROGRAM, choice_problem)
    _evaluate()
