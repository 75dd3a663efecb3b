"""``qtally-evaluate``: a thin Hydra entry point around :func:`qtally.prediction_run.run_prediction`."""

from __future__ import annotations

import sys
from typing import Mapping

import hydra
from omegaconf import DictConfig

from ..config.evaluate_schema import register_evaluate_schema
from .console import fail, quiet_libraries

PROGRAM = "qtally-evaluate"


class PredictionProgress:
    """Episodes played, rate and the recent mean return, on standard error."""

    def __init__(self, total: int, description: str = "predicting"):
        from tqdm import tqdm

        self.bar = tqdm(total=total, desc=description, unit="ep", dynamic_ncols=True, file=sys.stderr, mininterval=0.5)

    def update(self, episodes: int, status: Mapping[str, float]) -> None:
        self.bar.update(episodes - self.bar.n)
        self.bar.set_postfix(ret=f"{status['return_mean']:.3g}", refresh=False)

    def close(self) -> None:
        self.bar.close()


@hydra.main(version_base="1.3", config_path="pkg://qtally.configs", config_name="evaluate")
def _evaluate(cfg: DictConfig) -> None:
    from ..experiment import QtallyError
    from ..prediction_run import format_report, run_prediction

    try:
        summary = run_prediction(cfg, progress_factory=None if cfg.quiet else PredictionProgress)
    except QtallyError as exc:
        fail(PROGRAM, str(exc))
    except KeyboardInterrupt:
        fail(PROGRAM, "interrupted; the run was closed as KILLED", code=130)
    except Exception as exc:  # unexpected: one line by default, the traceback on request
        import os

        if os.environ.get("QTALLY_DEBUG"):
            raise
        first = str(exc).splitlines()[0] if str(exc) else ""
        fail(PROGRAM, f"{type(exc).__name__}: {first} (any open run was closed as FAILED; set QTALLY_DEBUG=1 for the traceback)", code=1)
    if cfg.quiet:
        print(summary.run_id)  # quiet: the run id alone, for scripts
    else:
        print(format_report(summary))
        print(f"run {summary.run_id} finished (experiment {cfg.tracking.experiment}; table in tables/prediction.csv)")


def main() -> None:
    from ..config.evaluate_schema import BehaviourConfig, EvaluateConfig, PolicyConfig, StartConfig
    from ..config.schema import EnvConfig
    from .overrides import first_override_problem

    quiet_libraries()
    register_evaluate_schema()
    schema = EvaluateConfig(env=EnvConfig(), policy=PolicyConfig(), behaviour=BehaviourConfig(), start=StartConfig())
    problem = first_override_problem(sys.argv[1:], schema, groups=("env",), config_file="configs/evaluate.yaml")
    if problem:
        fail(PROGRAM, problem)
    _evaluate()
