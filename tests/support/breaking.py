"""A corridor that breaks while running: raises after a set number of steps (test support for sweeps).

Construction succeeds, so a sweep's up-front checks pass; the failure comes at run time,
as a simulator bug or a lost connection would.
"""

from __future__ import annotations

from support.corridor import Corridor


class BreakingCorridor(Corridor):
    def __init__(self, break_after_steps: int = 10**9, render_mode=None):
        super().__init__(render_mode=render_mode)
        self.break_after_steps = int(break_after_steps)
        self.steps = 0

    def step(self, action):
        self.steps += 1
        if self.steps > self.break_after_steps:
            raise RuntimeError(f"simulator broke after {self.break_after_steps} steps")
        return super().step(action)
