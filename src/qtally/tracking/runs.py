"""The life of one recorded MLflow run, shared by ``qtally-train`` and ``qtally-evaluate``.

Opening the store turns any failure into one line; a run opened with
:func:`recorded_run` always ends FINISHED, KILLED (interrupted) or FAILED, never stuck
in RUNNING; params are the flattened resolved config, sent in chunks.
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path
from typing import Iterator, Mapping

from omegaconf import DictConfig, OmegaConf

from ..errors import QtallyError, first_line

__all__ = ["DEFAULT_TRACKING_URI", "resolve_tracking_uri", "open_experiment", "recorded_run", "flatten_config", "log_config"]

DEFAULT_TRACKING_URI = "sqlite:///mlflow.db"


# A server that does not answer is found out in seconds, not minutes: the health probe below
# tries PROBE_ATTEMPTS times with PROBE_TIMEOUT seconds each, PROBE_PAUSE apart (at most about
# 11 s in all), and MLflow's own calls during a run retry 3 times with a backoff of 1 s.
PROBE_ATTEMPTS, PROBE_TIMEOUT, PROBE_PAUSE = 3, 3.0, 1.0
_MLFLOW_RETRY_DEFAULTS = {"MLFLOW_HTTP_REQUEST_MAX_RETRIES": "3", "MLFLOW_HTTP_REQUEST_BACKOFF_FACTOR": "1", "MLFLOW_HTTP_REQUEST_TIMEOUT": "20"}


def resolve_tracking_uri(configured: str | None) -> str:
    """``tracking.uri``, else ``$MLFLOW_TRACKING_URI``, else SQLite in the working directory; checked (:func:`check_tracking_uri`)."""
    uri = configured or os.environ.get("MLFLOW_TRACKING_URI") or DEFAULT_TRACKING_URI
    check_tracking_uri(uri)
    return uri


def check_tracking_uri(uri: str) -> None:
    """Refuse, in one line and within seconds, a store qtally cannot use: a folder, or a server that does not answer."""
    import time
    import urllib.error
    import urllib.request

    fix = "start a server on this machine (mlflow server --host 127.0.0.1 --port 5000), or leave tracking.uri unset for the SQLite file mlflow.db here"
    scheme = uri.split("://", 1)[0].lower() if "://" in uri else ""
    if scheme in ("", "file"):
        raise QtallyError(f"tracking.uri={uri!r} is a folder (MLflow's file store, which qtally does not write); use a database file, sqlite:///mlflow.db, or a server, http://127.0.0.1:5000")
    if scheme not in ("http", "https"):
        return
    for key, value in _MLFLOW_RETRY_DEFAULTS.items():
        os.environ.setdefault(key, value)
    started, reason = time.monotonic(), ""
    for attempt in range(PROBE_ATTEMPTS):
        try:
            with urllib.request.urlopen(uri.rstrip("/") + "/health", timeout=PROBE_TIMEOUT):
                return
        except urllib.error.HTTPError:
            return  # something answers; MLflow's own calls will say what is wrong with it
        except (urllib.error.URLError, OSError, ValueError) as exc:
            reason = str(getattr(exc, "reason", exc))
        if attempt + 1 < PROBE_ATTEMPTS:
            time.sleep(PROBE_PAUSE)
    raise QtallyError(f"tracking.uri={uri!r}: no MLflow server answered ({PROBE_ATTEMPTS} tries in {time.monotonic() - started:.0f} s: {reason}); {fix}")


@contextlib.contextmanager
def _store_creation_lock(uri: str) -> Iterator[None]:
    """Serialise opening a SQLite store across processes.

    Parallel jobs that open a brand-new SQLite file at the same moment race to create its
    tables (schema migrations) and the experiment; an exclusive lock on a file beside the
    database lets one process create them while the others wait, then find them made.
    """
    prefix = "sqlite:///"
    if not uri.startswith(prefix):
        yield
        return
    import fcntl

    database = Path(uri[len(prefix):])
    database.parent.mkdir(parents=True, exist_ok=True)
    with open(database.with_name(database.name + ".lock"), "a") as handle:
        fcntl.flock(handle, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def open_experiment(uri: str, experiment: str):
    import mlflow

    try:
        with _store_creation_lock(uri):
            mlflow.set_tracking_uri(uri)
            return mlflow.set_experiment(experiment)
    except Exception as exc:  # a bad URI or an unreachable store: say so in one line
        first = str(exc).splitlines()[0][:200] if str(exc) else type(exc).__name__
        raise QtallyError(f"tracking.uri={uri!r}: cannot open the MLflow store ({first})") from None


def flatten_config(node, prefix: str = "") -> dict[str, str]:
    """``{"env": {"id": "X"}}`` -> ``{"env.id": "X"}``; an empty mapping stays visible as ``{}``.

    >>> flatten_config({"env": {"id": "X", "kwargs": {}}, "seed": 3})
    {'env.id': 'X', 'env.kwargs': '{}', 'seed': '3'}
    """
    flat: dict[str, str] = {}
    if isinstance(node, dict):
        if not node and prefix:
            flat[prefix[:-1]] = "{}"
        for key, value in node.items():
            flat.update(flatten_config(value, f"{prefix}{key}."))
    else:
        flat[prefix[:-1]] = str(node)
    return flat


@contextlib.contextmanager
def recorded_run(cfg: DictConfig, run_name: str | None, tags: Mapping[str, str], resume_run_id: str | None = None) -> Iterator[str]:
    """Open a run with the config as params (or reopen ``resume_run_id``, whose params exist); yield its id; close it with the right status."""
    import mlflow

    if resume_run_id:
        run = mlflow.start_run(run_id=resume_run_id)
        mlflow.set_tags(dict(tags))
    else:
        run = mlflow.start_run(run_name=run_name, tags=dict(tags))
    status = "FAILED"
    try:
        items = [] if resume_run_id else list(flatten_config(OmegaConf.to_container(cfg, resolve=True)).items())
        for i in range(0, len(items), 100):
            mlflow.log_params(dict(items[i : i + 100]))
        yield run.info.run_id
        status = "FINISHED"
    except KeyboardInterrupt:
        status = "KILLED"
        raise
    except BaseException as exc:
        with contextlib.suppress(Exception):  # the reason is a courtesy; the status below is what matters
            mlflow.set_tag("qtally.failure", f"{type(exc).__name__}: {first_line(exc)}"[:500])
        raise
    finally:
        try:
            mlflow.end_run(status=status)
        except Exception as exc:  # the store went away: the run stays open there; say so unless another error is on its way
            if status == "FINISHED":
                raise QtallyError(f"the run could not be closed in the tracking store ({first_line(exc)}); it stays RUNNING there until qtally-train resume=<run id> finishes it") from None


def log_config(cfg: DictConfig, scratch_dir: Path) -> None:
    """The resolved config as ``config/resolved_config.yaml``."""
    import mlflow

    path = scratch_dir / "resolved_config.yaml"
    path.write_text(OmegaConf.to_yaml(cfg, resolve=True))
    mlflow.log_artifact(str(path), "config")
