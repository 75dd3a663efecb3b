"""What the command line shows: a progress bar and one-line errors."""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Callable, Mapping, TypeVar

from tqdm import tqdm

T = TypeVar("T")

__all__ = ["EpisodeProgress", "TrainingProgress", "PredictionProgress", "fail", "quiet_libraries", "run_reporting_errors", "pre_check_overrides"]


def quiet_libraries() -> None:
    """Keep MLflow's own progress bars and info lines, and matplotlib's, out of qtally's console output.

    MLflow sets its logger's level when it is imported, from ``MLFLOW_LOGGING_LEVEL``
    (default INFO), so setting the level before that import is not enough: the variable
    is set too (a user's own value wins). Hydra routes every INFO record to the console,
    which is how matplotlib's one-time font cache line would reach the user. MLflow's
    download bars (logging the policy model downloads a file; so does loading a policy)
    are off whatever the environment says: the console shows qtally's bar alone.
    """
    import logging

    os.environ["MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR"] = "false"
    os.environ.setdefault("MLFLOW_LOGGING_LEVEL", "WARNING")
    for name in ("mlflow", "alembic", "matplotlib"):
        logging.getLogger(name).setLevel(logging.WARNING)


class EpisodeProgress:
    """Episodes done, rate, the recent mean return (and epsilon, when it applies), on standard error."""

    def __init__(self, total: int, description: str, show_epsilon: bool):
        self.bar = tqdm(total=total, desc=description, unit="ep", dynamic_ncols=True, file=sys.stderr, mininterval=0.5)
        self.show_epsilon = show_epsilon

    def update(self, episodes: int, status: Mapping[str, float]) -> None:
        self.bar.update(episodes - self.bar.n)
        postfix = {"ret": f"{status['return_mean']:.3g}"}
        if self.show_epsilon:
            postfix["eps"] = f"{status['epsilon']:.3f}"
        self.bar.set_postfix(postfix, refresh=False)

    def close(self) -> None:
        self.bar.close()


def TrainingProgress(total: int) -> EpisodeProgress:
    return EpisodeProgress(total, "training", show_epsilon=True)


def PredictionProgress(total: int) -> EpisodeProgress:
    return EpisodeProgress(total, "predicting", show_epsilon=False)


def run_reporting_errors(program: str, action: Callable[[], T]) -> T:
    """Run ``action``; turn user errors, interrupts and surprises into one line and an exit code."""
    from ..errors import QtallyError

    try:
        return action()
    except QtallyError as exc:
        fail(program, str(exc))
    except KeyboardInterrupt as exc:
        hint = getattr(exc, "hint", None)  # a graceful stop says where its checkpoint is and how to continue
        fail(program, hint or "interrupted; the run was closed as KILLED", code=143 if "SIGTERM" in (hint or "") else 130)
    except Exception as exc:  # unexpected: one line by default, the traceback on request
        if os.environ.get("QTALLY_DEBUG"):
            raise
        first = str(exc).splitlines()[0] if str(exc) else ""
        fail(program, f"{type(exc).__name__}: {first} (any open run was closed as FAILED; set QTALLY_DEBUG=1 for the traceback)", code=1)


def config_dir_problem(arguments: list[str]) -> str | None:
    """A ``--config-dir`` that is missing or holds a YAML file that does not parse, as one line.

    Hydra would print its own block (or a parser traceback) much later; the user's file and
    line are what matter.
    """
    import yaml

    for i, argument in enumerate(arguments):
        if argument in ("--config-dir", "-cd") and i + 1 < len(arguments):
            folder = arguments[i + 1]
        elif argument.startswith("--config-dir="):
            folder = argument.split("=", 1)[1]
        else:
            continue
        root = Path(folder)
        if not root.is_dir():
            return f"--config-dir {folder}: no such folder; give the folder that holds your config groups (for example env/)"
        for path in sorted(root.rglob("*.yaml")):
            try:
                yaml.safe_load(path.read_text())
            except (yaml.YAMLError, OSError, UnicodeDecodeError) as exc:
                mark = getattr(exc, "problem_mark", None)
                where = f" line {mark.line + 1}, column {mark.column + 1}" if mark else ""
                reason = getattr(exc, "problem", None) or type(exc).__name__
                return f"{path}:{where} is not valid YAML ({reason}); fix the file or leave it out of --config-dir"
    return None


def pre_check_overrides(program: str, schema, groups: tuple[str, ...], config_file: str) -> None:
    """Refuse a mistyped override or an unreadable config folder in one line before Hydra composes anything."""
    from .overrides import first_override_problem

    problem = config_dir_problem(sys.argv[1:]) or first_override_problem(sys.argv[1:], schema, groups=groups, config_file=config_file)
    if problem:
        fail(program, problem)


def fail(program: str, message: str, code: int = 2) -> None:
    """Print ``program: error: message`` on one line and exit non-zero."""
    print(f"{program}: error: {message}", file=sys.stderr)
    sys.exit(code)
