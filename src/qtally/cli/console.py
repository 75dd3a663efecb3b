"""What the command line shows: a progress bar and one-line errors."""

from __future__ import annotations

import sys
from typing import Mapping

from tqdm import tqdm

__all__ = ["TrainingProgress", "fail", "quiet_libraries"]


def quiet_libraries() -> None:
    """Keep MLflow's own progress bars and info lines out of qtally's console output."""
    import logging
    import os

    os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")
    logging.getLogger("mlflow").setLevel(logging.WARNING)
    logging.getLogger("alembic").setLevel(logging.WARNING)


class TrainingProgress:
    """Episodes done, rate, recent mean return and epsilon, on standard error."""

    def __init__(self, total: int, description: str = "training"):
        self.bar = tqdm(total=total, desc=description, unit="ep", dynamic_ncols=True, file=sys.stderr, mininterval=0.5)

    def update(self, episodes: int, status: Mapping[str, float]) -> None:
        self.bar.update(episodes - self.bar.n)
        self.bar.set_postfix(ret=f"{status['return_mean']:.3g}", eps=f"{status['epsilon']:.3f}", refresh=False)

    def close(self) -> None:
        self.bar.close()


def fail(program: str, message: str, code: int = 2) -> None:
    """Print ``program: error: message`` on one line and exit non-zero."""
    print(f"{program}: error: {message}", file=sys.stderr)
    sys.exit(code)
