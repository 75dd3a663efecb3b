"""Check command-line overrides against the schema before Hydra runs, for one-line type errors.

Hydra reports a value of the wrong type (``episodes=abc``) in a multi-line block; this
pre-check finds the same problems first and states them on one line. Anything it does
not understand (syntax errors, group choices, ``+key=`` additions, ``hydra.*``) it leaves
to Hydra.
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
