"""Tiny hand-built models for the exact-DP tests (test support; every model is invented)."""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from qtally.envs.model import TabularModel


def make_model(p, rewards, terminal, start) -> TabularModel:
    """A TabularModel from a dense (S, A, S) transition array."""
    p = np.asarray(p, dtype=float)
    S, A, _ = p.shape
    return TabularModel(
        transitions=sp.csr_array(p.reshape(S * A, S)),
        rewards=np.asarray(rewards, dtype=float),
        terminal=np.asarray(terminal, dtype=bool),
        start_distribution=np.asarray(start, dtype=float),
    )
