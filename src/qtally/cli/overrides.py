"""Check command-line overrides against the schema before Hydra runs, for one-line type errors.

Hydra reports a value of the wrong type (``episodes=abc``) in a multi-line block; this
pre-check finds the same problems first and states them on one line. Anything it does
not understand (syntax errors, group choices, ``+key=`` additions, ``hydra.*``) it leaves
to Hydra.

``env.kwargs`` is the one open mapping in the schema: which constructor arguments it holds
is written in the chosen ``configs/env/NAME.yaml``, so a mistyped argument
(``env.kwargs.is_slipery=false``) is checked against that file, and an argument the file
does not list must be added with ``+env.kwargs.NAME=VALUE``.
"""

from __future__ import annotations

from typing import Any, Sequence

from omegaconf import OmegaConf

__all__ = ["first_override_problem"]


def _values(override) -> list[Any]:
    if override.is_sweep_override():
        try:
            return list(override.sweep_iterator())
        except Exception:  # range/interval sweeps: let Hydra handle them
            return []
    return [override.value()]


def _bundled_env_kwargs(overrides, config_file: str) -> dict[str, set[str]] | None:
    """Each chosen bundled env config (several in a sweep) and its kwargs keys; None where it cannot be told."""
    from importlib import resources

    configs = resources.files("qtally.configs")
    choices = None
    for override in overrides:
        if override.key_or_group == "env" and not override.package:
            choices = [str(v) for v in _values(override)] or None
    try:
        if choices is None:
            primary = OmegaConf.create((configs / config_file.rsplit("/", 1)[-1]).read_text())
            choices = [d["env"] for d in primary.get("defaults", []) if OmegaConf.is_dict(d) and "env" in d]
        found = {}
        for choice in choices:
            env = OmegaConf.create((configs / "env" / f"{choice}.yaml").read_text())
            found[choice] = {str(k) for k in (env.get("kwargs") or {})}
    except (OSError, ValueError, TypeError):  # not a bundled config (a user --config-dir): Hydra will say what it finds
        return None
    return found or None


def first_override_problem(arguments: Sequence[str], schema: Any, groups: Sequence[str], config_file: str = "configs/train.yaml") -> str | None:
    """The first override whose key is unknown or whose value does not fit the schema, as a message."""
    from hydra.core.override_parser.overrides_parser import OverridesParser

    candidates = [a for a in arguments if "=" in a and not a.startswith("-")]
    try:
        overrides = OverridesParser.create().parse_overrides(candidates)
    except Exception:
        return None
    base = OmegaConf.structured(schema)
    for override in overrides:
        key = override.key_or_group
        if key.startswith("hydra") or key in groups or override.package or override.is_add() or override.is_delete() or override.is_force_add():
            continue
        if key.startswith("env.kwargs.") and key.count(".") == 2:
            name = key.split(".")[2]
            for choice, known in (_bundled_env_kwargs(overrides, config_file) or {}).items():
                if name not in known:
                    listed = ", ".join(sorted(known)) or "none"
                    return (
                        f"{key}: env={choice} lists no constructor argument {name!r} (it lists: {listed}); "
                        f"to pass a new one, add it with +{key}=..."
                    )
        for value in _values(override):
            trial = base.copy()
            try:
                OmegaConf.update(trial, key, value, merge=True)
            except Exception as exc:  # OmegaConf's validation and key errors
                reason = str(exc).splitlines()[0]
                if reason.startswith("Key '") and " not in " in reason:
                    return f"{key}: no such config key; see the keys in {config_file} or run with --cfg job"
                return f"{key}={value!r}: {reason}"
    return None
