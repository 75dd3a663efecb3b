"""qtally.engine: where episodes come from (see :mod:`qtally.engine.episodes`)."""
