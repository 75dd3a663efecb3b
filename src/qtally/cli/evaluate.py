"""``qtally-evaluate``: a thin Hydra entry point around :func:`qtally.prediction_run.run_prediction`."""

from __future__ import annotations

import sys
from typing import Mapping

import hydra
from omegaconf import DictConfig

from ..config.evaluate_schema import register_evaluate_schema
from .console import fail

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
    if not cfg.quiet:
        print(format_report(summary))
    print(f"run {summary.run_id} finished (experiment {cfg.tracking.experiment})")


def main() -> None:
    register_evaluate_schema()
    _evaluate()
