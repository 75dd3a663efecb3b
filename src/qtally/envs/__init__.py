"""Environment adapters: making environments, encoding observations, start control, models."""

from __future__ import annotations

_registered = False


def register_bundled() -> None:
    """Register qtally's own environments with Gymnasium (idempotent)."""
    global _registered
    if _registered:
        return
    try:
        from .restock import register_restock
    except ImportError:  # pragma: no cover - the simulator module is part of the package
        return
    register_restock()
    _registered = True
