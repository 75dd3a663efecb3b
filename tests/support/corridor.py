"""A tiny deterministic corridor whose optimal policy is worked out by hand (test support).

Cells 0..6 in a line; action 1 (right) moves one cell right, action 0 (left) one cell
left, each at reward -1; reaching cell 6 ends the episode. Episodes start in a cell
0..5 drawn uniformly, so every cell is visited often under any policy. From cell 0, "left" is an
exit that ends the episode at once with reward -5.35.

With gamma = 1: going right from cell 0 costs 6, the exit 5.35, so the optimum is
"exit at 0, right elsewhere": Q*(0, left) = -5.35, Q*(0, right) = -6.
With gamma = 0.9: right from cell 0 is worth -(1 - 0.9**6) / 0.1 = -4.686 > -5.35,
so the optimum is "right everywhere". A discounting bug flips one of the two answers;
the gaps (0.65 and 0.66) are wide enough for a few thousand episodes to resolve.

Implements qtally's StartControl protocol (start_states, reset_to) and the ModelSource
protocol (tabular_model), as a custom environment would.
"""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import scipy.sparse as sp

from qtally.envs.model import TabularModel

N_CELLS = 7
GOAL = N_CELLS - 1
EXIT_REWARD = -5.35


class Corridor(gym.Env):
    metadata = {"render_modes": []}

    def __init__(self, render_mode=None):
        self.observation_space = gym.spaces.Discrete(N_CELLS + 1)  # cell 5 is the exit (terminal)
        self.action_space = gym.spaces.Discrete(2)
        self.cell = 0

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        self.cell = int(self.np_random.integers(GOAL))  # any of cells 0..3, uniformly
        return self.cell, {}

    def step(self, action):
        if self.cell == 0 and action == 0:
            self.cell = N_CELLS
            return self.cell, EXIT_REWARD, True, False, {}
        self.cell = max(0, self.cell + (1 if action == 1 else -1))
        return self.cell, -1.0, self.cell == GOAL, False, {}

    def start_states(self):
        return list(range(GOAL))

    def reset_to(self, observation):
        self.cell = int(observation)
        return self.cell, {}

    def tabular_model(self) -> TabularModel:
        n, a = N_CELLS + 1, 2
        rows, cols, probs = [], [], []
        rewards = np.zeros((n, a))
        for s in range(GOAL):
            for action in range(a):
                if s == 0 and action == 0:
                    nxt, r = N_CELLS, EXIT_REWARD
                else:
                    nxt, r = max(0, s + (1 if action == 1 else -1)), -1.0
                rows.append(s * a + action)
                cols.append(nxt)
                probs.append(1.0)
                rewards[s, action] = r
        transitions = sp.csr_array((probs, (rows, cols)), shape=(n * a, n))
        terminal = np.zeros(n, dtype=bool)
        terminal[[GOAL, N_CELLS]] = True
        start = np.zeros(n)
        start[:GOAL] = 1.0 / GOAL
        return TabularModel(transitions=transitions, rewards=rewards, terminal=terminal, start_distribution=start)


def optimal_actions(gamma: float) -> list[int]:
    """Hand-worked optimum for cells 0..5 (see the module docstring)."""
    return [0] + [1] * (GOAL - 1) if gamma == 1.0 else [1] * GOAL


class FixedStartCorridor(Corridor):
    """The corridor, but every ordinary reset puts the walker in cell 0.

    Only a start chosen through ``reset_to`` reaches the far cells under a policy that
    exits at once, so a learner that ignores its drawn start state shows here.
    """

    def reset(self, *, seed=None, options=None):
        gym.Env.reset(self, seed=seed)
        self.cell = 0
        return self.cell, {}
