"""Two deliberately slow simulators for scripts/bench_collect.py (invented, for measurement only).

A made-up dispatch desk: each step a dispatcher sends one of two crews or waits; a job
queue of 0..9 changes at random; the episode ends after 20 steps. What matters is the
cost of a step:

- :class:`ComputingDesk` burns about ``step_ms`` milliseconds of CPU per step, as a
  simulator that does real arithmetic would;
- :class:`WaitingDesk` waits about ``step_ms`` milliseconds per step without computing,
  as a simulator that calls out to another program and waits for its answer would.
"""

from __future__ import annotations

import time

import gymnasium as gym

QUEUE, HORIZON = 10, 20


class _Desk(gym.Env):
    metadata = {"render_modes": []}

    def __init__(self, step_ms: float = 1.0, render_mode=None):
        self.observation_space = gym.spaces.Discrete(QUEUE)
        self.action_space = gym.spaces.Discrete(3)
        self.step_seconds = step_ms / 1000.0
        self.queue = self.t = 0

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        self.queue, self.t = int(self.np_random.integers(QUEUE)), 0
        return self.queue, {}

    def _spend(self) -> None:
        raise NotImplementedError

    def step(self, action):
        self._spend()
        served = min(self.queue, int(action) * 2)
        arrivals = int(self.np_random.integers(3))
        self.queue = min(QUEUE - 1, self.queue - served + arrivals)
        self.t += 1
        reward = float(served) - 0.5 * int(action) - 0.2 * self.queue
        return self.queue, reward, False, self.t >= HORIZON, {}


class ComputingDesk(_Desk):
    def _spend(self) -> None:
        until = time.perf_counter() + self.step_seconds
        while time.perf_counter() < until:  # busy: the CPU is taken for the whole step
            pass


class WaitingDesk(_Desk):
    def _spend(self) -> None:
        time.sleep(self.step_seconds)  # idle: the CPU is free while the "other program" works
