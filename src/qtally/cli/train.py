"""``qtally-train``: a thin Hydra entry point around :func:`qtally.experiment.run_training`."""

from __future__ import annotations

import hydra
from omegaconf import DictConfig

from ..config.schema import register_schema
from .console import TrainingProgress, fail, quiet_libraries

PROGRAM = "qtally-train"


@hydra.main(version_base="1.3", config_path="pkg://qtally.configs", config_name="train")
def _train(cfg: DictConfig) -> None:
    from ..experiment import QtallyError, run_training

    progress = None if cfg.quiet else TrainingProgress
    try:
        summary = run_training(cfg, progress_factory=progress)
    except QtallyError as exc:
        fail(PROGRAM, str(exc))
    except KeyboardInterrupt:
        fail(PROGRAM, "interrupted; the run was closed as KILLED", code=130)
    except Exception as exc:  # unexpected: one line by default, the traceback on request
        import os

        if os.environ.get("QTALLY_DEBUG"):
            raise
        fail(PROGRAM, f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''} (any open run was closed as FAILED; set QTALLY_DEBUG=1 for the traceback)", code=1)
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
    import sys

    from ..config.schema import EnvConfig, ScheduleConfig, TrainConfig, VariantConfig
    from .overrides import first_override_problem

    quiet_libraries()
    register_schema()
    schema = TrainConfig(env=EnvConfig(), variant=VariantConfig(), schedule=ScheduleConfig())
    problem = first_override_problem(sys.argv[1:], schema, groups=("env", "variant", "schedule"))
    if problem:
        fail(PROGRAM, problem)
    _train()
