"""qtally: tabular Monte Carlo control for episodic systems you can simulate.

The learning core (:mod:`qtally.control`, :mod:`qtally.evaluate`, :mod:`qtally.policy`)
works on numpy arrays and knows nothing of MLflow or Hydra; environment adapters
live in :mod:`qtally.envs`, the tracking sink in :mod:`qtally.tracking`, and thin
command-line entry points in :mod:`qtally.cli`.
"""

__version__ = "0.1.0"
