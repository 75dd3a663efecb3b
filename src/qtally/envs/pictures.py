"""Policy maps and value heat maps for state spaces that have a natural picture.

Grid worlds (FrozenLake, CliffWalking) get a grid; two- and three-factor spaces
(Blackjack, the restocking simulator) get panels. Other environments get none, and
:func:`policy_pictures` returns an empty list.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..plots import UNVISITED_MARK, grid_maps, two_factor_maps
from .factory import TabularEnvironment

__all__ = ["policy_pictures", "state_values"]


def _state_values(q: np.ndarray, visits: np.ndarray | None) -> np.ndarray:
    values = q.max(axis=1).astype(float)
    if visits is not None:
        values[visits.sum(axis=1) == 0] = np.nan
    return values


def state_values(q: np.ndarray, visits: np.ndarray | None = None) -> np.ndarray:
    """The greedy value max_a Q of each state, NaN where training never reached it (what the maps colour)."""
    return _state_values(q, visits)


def policy_pictures(environment: TabularEnvironment, q: np.ndarray, actions: np.ndarray, directory: Path, label: str, visits: np.ndarray | None = None, values: np.ndarray | None = None, value_range: tuple[float, float] | None = None) -> list[Path]:
    """Draw what fits this environment; ``values`` defaults to the greedy value max_a Q.

    Pass the same ``value_range`` to a learned and an optimal picture so their colours mean the same values.
    """
    directory.mkdir(parents=True, exist_ok=True)
    core = environment.env.unwrapped
    name = type(core).__name__
    v = _state_values(q, visits) if values is None else np.asarray(values, dtype=float)
    path = directory / f"{label}_policy_map.png"
    # States no episode acted in have no learned action: marked "?" (the policy's fallback acts there).
    unvisited = None if visits is None else np.asarray(visits).sum(axis=1) == 0
    note = f"\n{UNVISITED_MARK}: never reached in training, the fallback acts" if unvisited is not None and unvisited.any() else ""
    if name == "FrozenLakeEnv":
        desc = np.asarray(core.desc).astype(str)
        blocked = np.isin(desc.ravel(), ("H", "G"))
        return [grid_maps(v, actions, desc.shape, "←↓→↑", path, f"{label}: value and greedy action\n(· hole or goal){note}", blocked, unvisited, value_range)]
    if name == "CliffWalkingEnv":
        shape = tuple(core.shape)
        blocked = core._cliff.ravel().copy()
        blocked[-1] = True
        return [grid_maps(v, actions, shape, "↑→↓←", path, f"{label}: value and greedy action\n(· cliff or goal){note}", blocked, unvisited, value_range)]
    if name == "BlackjackEnv":
        encoder = environment.encoder
        sums, dealers = list(range(12, 22)), list(range(1, 11))
        grid_v = np.full((2, len(sums), len(dealers)), np.nan)
        grid_a = np.zeros((2, len(sums), len(dealers)), dtype=int)
        grid_u = np.zeros((2, len(sums), len(dealers)), dtype=bool)
        for k in (0, 1):
            for r, s in enumerate(sums):
                for c, d in enumerate(dealers):
                    index = encoder.encode((s, d, k))
                    grid_v[k, r, c], grid_a[k, r, c] = v[index], actions[index]
                    grid_u[k, r, c] = unvisited is not None and unvisited[index]
        return [two_factor_maps(grid_v, grid_a, sums, ["A"] + dealers[1:], "player sum", "dealer showing", "SH", ["no usable ace", "usable ace"], path, f"{label}: value and greedy action (S stick, H hit)\nplayer sums 12-21 shown; sums 4-11 (no usable ace) are in tables/q_table.csv{note}", grid_u, value_range)]
    if name == "RestockEnv":
        encoder = environment.encoder
        sizes = encoder.sizes
        if len(sizes) < 2:
            return []  # shelf life 1: the observation is (day,) alone, there is no stock axis to map
        days = list(range(sizes[0] - 1))
        stock = list(range(sizes[1]))
        panels = [0] if len(sizes) < 3 else [0, sizes[2] - 1]
        grid_v = np.full((len(panels), len(days), len(stock)), np.nan)
        grid_a = np.zeros_like(grid_v, dtype=int)
        grid_u = np.zeros_like(grid_v, dtype=bool)
        for k, older in enumerate(panels):
            for r, day in enumerate(days):
                for c, units in enumerate(stock):
                    observation = (day, units) + ((older,) + (0,) * (len(sizes) - 3) if len(sizes) >= 3 else ())
                    index = encoder.encode(observation)
                    grid_v[k, r, c], grid_a[k, r, c] = v[index], actions[index]
                    grid_u[k, r, c] = unvisited is not None and unvisited[index]
        letters = [str(n) for n in range(environment.n_actions)]
        titles = [f"{encoder.names[2]}={older}" for older in panels] if len(sizes) >= 3 else [""]
        shown = ""
        if len(sizes) >= 3:
            older_units = ", ".join(encoder.names[3:])
            shown = f"\nslices {encoder.names[2]} = {panels[0]} and {panels[-1]} of 0..{sizes[2] - 1} shown" + (f" ({older_units} = 0)" if older_units else "") + "; the others are in tables/q_table.csv"
        return [two_factor_maps(grid_v, grid_a, days, stock, "day", encoder.names[1], letters, titles, path, f"{label}: value and order quantity{shown}{note}", grid_u, value_range)]
    return []
