"""Config-group choices checked before Hydra runs: a misspelled choice or a missing launcher in one line.

Hydra reports an unknown group choice (``variant=on_polcy``, ``hydra/launcher=jobllib``)
in a block of a dozen lines. This check knows the choices qtally ships (``configs/<group>/``)
and the launchers and sweepers Hydra's plugins provide, names the closest ones, and says
which extra to install when a known launcher's plugin is missing.
"""

from __future__ import annotations

import difflib
import importlib.util
from importlib import resources
from typing import Sequence

__all__ = ["first_bad_choice"]

# Hydra plugin configs: choice -> (plugin module, the qtally extra that installs it).
_PLUGIN_CHOICES = {
    "hydra/launcher": {
        "basic": (None, None),
        "joblib": ("hydra_plugins.hydra_joblib_launcher", "sweep"),
        "submitit_local": ("hydra_plugins.hydra_submitit_launcher", "sweep"),
        "submitit_slurm": ("hydra_plugins.hydra_submitit_launcher", "sweep"),
        "ray": ("hydra_plugins.hydra_ray_launcher", "ray"),
        "ray_aws": ("hydra_plugins.hydra_ray_launcher", "ray"),
    },
    "hydra/sweeper": {
        "basic": (None, None),
        "optuna": ("hydra_plugins.hydra_optuna_sweeper", "sweep"),
    },
}
# qtally's own configs in those groups need the same plugins.
_OWN_PLUGIN_CONFIGS = {
    ("hydra/launcher", "ray_loopback"): ("hydra_plugins.hydra_ray_launcher", "ray"),
    ("hydra/sweeper", "tune_glie"): ("hydra_plugins.hydra_optuna_sweeper", "sweep"),
    ("hydra/sweeper", "tune_exponential"): ("hydra_plugins.hydra_optuna_sweeper", "sweep"),
}


def _shipped(group: str, extra_dirs: Sequence[str] = ()) -> list[str]:
    """The choices of a group: qtally's own configs, plus any in the user's ``--config-dir``."""
    from pathlib import Path

    folders = [resources.files("qtally.configs").joinpath(*group.split("/"))] + [Path(d).joinpath(*group.split("/")) for d in extra_dirs]
    names: set[str] = set()
    for folder in folders:
        if folder.is_dir():
            names.update(entry.name[: -len(".yaml")] for entry in folder.iterdir() if entry.name.endswith(".yaml"))
    return sorted(names)


def _config_dirs(arguments: Sequence[str]) -> list[str]:
    dirs = []
    for i, argument in enumerate(arguments):
        if argument in ("--config-dir", "-cd") and i + 1 < len(arguments):
            dirs.append(arguments[i + 1])
        elif argument.startswith("--config-dir="):
            dirs.append(argument.split("=", 1)[1])
    return dirs


def _installed(module: str | None) -> bool:
    if module is None:
        return True
    try:
        return importlib.util.find_spec(module) is not None
    except ModuleNotFoundError:
        return False


def first_bad_choice(arguments: Sequence[str], groups: Sequence[str]) -> str | None:
    """The first ``group=choice`` override naming a choice that does not exist or cannot load, as a message."""
    extra_dirs = _config_dirs(arguments)
    for argument in arguments:
        if "=" not in argument or argument.startswith("-"):
            continue
        key, _, value = argument.partition("=")
        key = key.lstrip("+~")
        if key not in groups and key not in _PLUGIN_CHOICES:
            continue
        values = [v.strip() for v in value.split(",")] if "," in value and "(" not in value else [value.strip()]
        known = set(_shipped(key, extra_dirs)) | set(_PLUGIN_CHOICES.get(key, {}))
        for choice in values:
            if choice in _PLUGIN_CHOICES.get(key, {}) or (key, choice) in _OWN_PLUGIN_CONFIGS:
                module, extra = _PLUGIN_CHOICES.get(key, {}).get(choice) or _OWN_PLUGIN_CONFIGS[(key, choice)]
                if not _installed(module):
                    return f"{key}={choice} needs a Hydra plugin that is not installed; install it with pip install 'qtally[{extra}]' (or pip install '.[{extra}]' in a checkout)"
                continue
            if choice in known:
                continue
            closest = difflib.get_close_matches(choice, sorted(known), n=3, cutoff=0.5)
            hint = f"did you mean {' or '.join(closest)}? " if closest else ""
            return f"{key}={choice!r} is not a known choice; {hint}choices are: {', '.join(sorted(known))}"
    return None
