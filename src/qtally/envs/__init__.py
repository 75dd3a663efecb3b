"""Environment adapters: making environments, encoding observations, start control, models."""

from __future__ import annotations

_registered = False


def register_bundled() -> None:
    """Register qtally's own environments with Gymnasium (idempotent)."""
    global _registered
    if not _registered:
        from .restock import register_restock

        register_restock()
        _registered = True
