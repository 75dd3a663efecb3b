"""A walk whose slips come from a generator its seed never reaches (test support).

Cells 0..4 in a line, start in cell 0; action 1 tries to move right, action 0 left, and
with probability 1/2 the move slips and the walker stays put. Reaching cell 4 ends the
episode with reward 1; every step costs 0.1 and the episode is cut after 12 steps. The
slips are drawn from a module-level generator, so ``reset(seed=...)`` does not repeat an
episode: the environment breaks Gymnasium's seeding contract on purpose, as a hand-written
simulator may by drawing from the ``random`` module. :class:`QuietForgetfulWalk` pays
nothing, so only the path of an episode shows the break.
"""

from __future__ import annotations

import random

import gymnasium as gym

_SLIPS = random.Random(12345)


class ForgetfulWalk(gym.Env):
    metadata = {"render_modes": []}

    def __init__(self, render_mode=None):
        self.observation_space = gym.spaces.Discrete(5)
        self.action_space = gym.spaces.Discrete(2)
        self.cell = 0

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        self.cell = 0
        return self.cell, {}

    def step(self, action):
        if _SLIPS.random() >= 0.5:
            self.cell = min(4, self.cell + 1) if int(action) == 1 else max(0, self.cell - 1)
        done = self.cell == 4
        return self.cell, (1.0 if done else 0.0) - 0.1, done, False, {}


class QuietForgetfulWalk(ForgetfulWalk):
    """The same walk paying nothing: two plays of a seed differ in their path, never in their return."""

    def step(self, action):
        cell, _, done, truncated, info = super().step(action)
        return cell, 0.0, done, truncated, info
