"""A four-cell walk whose observations are numbered from 1 (test support).

``Discrete(4, start=1)``: observations 1..4, start in 1; action 1 moves right, action 0
stays; reaching 4 ends the episode with reward 1, every other step costs 0. A table index
is the observation minus 1, which only an encoder that reads the space's ``start`` gets right.
"""

from __future__ import annotations

import gymnasium as gym


class ShiftedWalk(gym.Env):
    metadata = {"render_modes": []}

    def __init__(self, render_mode=None):
        self.observation_space = gym.spaces.Discrete(4, start=1)
        self.action_space = gym.spaces.Discrete(2)
        self.cell = 1

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        self.cell = 1
        return self.cell, {}

    def step(self, action):
        self.cell = min(4, self.cell + int(action))
        done = self.cell == 4
        return self.cell, 1.0 if done else 0.0, done, False, {}
