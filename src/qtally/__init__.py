"""qtally: tabular Monte Carlo control for episodic systems you can simulate.

The learning core (:mod:`qtally.control`, :mod:`qtally.evaluate`, :mod:`qtally.policy`)
works on numpy arrays and knows nothing of MLflow or Hydra; environment adapters
live in :mod:`qtally.envs`, the tracking sink in :mod:`qtally.tracking`, and thin
command-line entry points in :mod:`qtally.cli`.
"""

__version__ = "0.1.0"


def _register_environments() -> None:
    """Register qtally's own environments with Gymnasium when qtally is imported.

    Gymnasium 1.x no longer loads environment plugins from package entry points, so the
    Gymnasium way for a third-party package is registration on import: after
    ``import qtally``, ``gym.make("qtally/Restock-v0")`` works; without the import,
    ``gym.make("qtally:qtally/Restock-v0")`` imports qtally first (Gymnasium's
    ``module:id`` form).
    """
    from .envs import register_bundled

    register_bundled()


_register_environments()
