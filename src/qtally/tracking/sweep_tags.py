"""The tags that tie a sweep's runs together, shared by the sweep callback and ``qtally-compare``.

A sweep is one MLflow parent run with a child run per job. Every child carries:

- ``mlflow.parentRunId``: the parent (MLflow's own key, so the UI nests the runs);
- ``qtally.sweep``: the parent run id again (filterable in the UI search box);
- ``qtally.group``: the comparison group, a short stable key of the job's config minus its seed;
- ``qtally.group_label``: the same group in words, the sweep's overrides minus the seed;
- ``qtally.role`` = ``job`` (the parent has ``sweep``), and ``seed``.

>>> group_key({"variant": "on_policy", "schedule": "glie_visits"}) == group_key({"schedule": "glie_visits", "variant": "on_policy"})
True
>>> group_label(["schedule=glie_visits", "seed=3", "variant=on_policy"])
'schedule=glie_visits variant=on_policy'
"""

from __future__ import annotations

import hashlib
import json
from typing import Any, Iterable, Mapping

__all__ = [
    "PARENT_TAG",
    "SWEEP_TAG",
    "GROUP_TAG",
    "GROUP_LABEL_TAG",
    "ROLE_TAG",
    "SEED_KEYS",
    "group_key",
    "group_label",
]

PARENT_TAG = "mlflow.parentRunId"
SWEEP_TAG = "qtally.sweep"
GROUP_TAG = "qtally.group"
GROUP_LABEL_TAG = "qtally.group_label"
ROLE_TAG = "qtally.role"
SEED_KEYS = ("seed",)  # what varies between the repetitions of one group


def _without_seeds(config: Mapping[str, Any]) -> dict[str, Any]:
    return {key: value for key, value in config.items() if key not in SEED_KEYS}


def group_key(config: Mapping[str, Any]) -> str:
    """Ten hex digits of the SHA-256 of the config (a flat or nested mapping) minus its seed."""
    text = json.dumps(_without_seeds(config), sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:10]


def group_label(overrides: Iterable[str]) -> str:
    """The job's ``key=value`` overrides without the seed, sorted: what sets this group apart."""
    kept = sorted(o for o in overrides if o.split("=", 1)[0].lstrip("+~") not in SEED_KEYS)
    return " ".join(kept) if kept else "(base config)"
