"""The compiled episode source: episodes played from an outcome table and learned from in machine code.

For an environment that lists its outcomes (:mod:`qtally.envs.outcomes`) the simulator
itself can run as compiled code: :func:`qtally.engine.kernels.learn_episodes` plays whole
episodes and updates the Q table without a Python call per step. It reads the same three
streams as the gym path (the environment's uniforms, one per reset and one per step; the
acting uniforms, one per decision; the start uniforms, one per exploring start), so for an
environment that follows the draw protocol it plays the *same* episodes and ends with the
same Q table as :class:`qtally.engine.episodes.GymEpisodes`.

Engine choice (``engine`` in the config): ``gym`` always plays through ``step``;
``compiled`` requires an outcome table and numba; ``auto`` takes the compiled engine when
both are there. Compiled code is cached on disk by numba, so only the first run on a machine
pays for compilation; :attr:`CompiledEpisodes.compile_seconds` reports what this run paid.
"""

from __future__ import annotations

import time
from typing import Any, NamedTuple

import numpy as np

from ..control import schedules as schedule_kinds
from ..control.streams import UniformDraws
from ..control.trainer_state import LogWindow, TrainerState
from ..envs.outcomes import OutcomeTable

__all__ = ["ENGINE_CHOICES", "ClosedWindows", "CompiledEpisodes", "EngineUnavailable", "schedule_code", "step_size_code", "variant_code", "time_limit_of"]

ENGINE_CHOICES = ("auto", "gym", "compiled")
_WINDOW = 1 << 16  # uniforms per block of each stream the kernel reads (512 KiB): few refills, and a fixed size whatever the run length


class EngineUnavailable(ValueError):
    """The compiled engine cannot run this configuration (the message says why)."""


def variant_code(variant) -> int:
    from . import kernels

    codes = {"exploring_starts": kernels.EXPLORING_STARTS, "on_policy": kernels.ON_POLICY, "off_policy": kernels.OFF_POLICY}
    name = getattr(variant, "name", None)
    if name not in codes:
        raise EngineUnavailable(f"the compiled engine knows the variants {', '.join(codes)}, not {name!r}")
    return codes[name]


def step_size_code(variant) -> float:
    """The variant's step size as the kernels take it: negative for the sample average."""
    return -1.0 if variant.step_size is None else float(variant.step_size)


def schedule_code(schedule) -> tuple[int, float, float, float]:
    """The schedule as ``(kind, p0, p1, p2)`` for the kernel's ``_epsilon``."""
    from . import kernels

    if isinstance(schedule, schedule_kinds.Constant):
        return kernels.CONSTANT, schedule.epsilon, 0.0, 0.0
    if isinstance(schedule, schedule_kinds.LinearDecay):
        return kernels.LINEAR, schedule.start, schedule.end, float(schedule.decay_episodes)
    if isinstance(schedule, schedule_kinds.ExponentialDecay):
        return kernels.EXPONENTIAL, schedule.start, schedule.rate, schedule.floor
    if isinstance(schedule, schedule_kinds.GlieEpisodes):
        return kernels.GLIE_EPISODE, schedule.scale, schedule.floor, 0.0
    if isinstance(schedule, schedule_kinds.GlieVisits):
        return kernels.GLIE_VISITS, schedule.scale, schedule.floor, 0.0
    raise EngineUnavailable(f"the compiled engine has no code for the schedule {type(schedule).__name__}")


def time_limit_of(env) -> int:
    """The ``TimeLimit`` wrapper's step limit in the wrapper stack, 0 when there is none."""
    from gymnasium.wrappers import TimeLimit

    layer = env
    while layer is not None:
        if isinstance(layer, TimeLimit):
            return int(layer._max_episode_steps)
        layer = getattr(layer, "env", None)
    return 0


class ClosedWindows(NamedTuple):
    """The logging windows the kernel closed inside a span, as columns: the episode each ends on, their sums, the share of pairs covered then.

    ``sums`` holds a window per row, its fields in :class:`LogWindow`'s order
    (:func:`qtally.control.trainer_state.window_metric_columns` turns them into metrics).
    """

    episodes: list[int]
    sums: np.ndarray
    coverage: np.ndarray


def _window_from(values: np.ndarray) -> LogWindow:
    episodes, return_sum, length_sum, epsilon_sum, truncated, capped, used = values.tolist()
    return LogWindow(int(episodes), return_sum, int(length_sum), epsilon_sum, int(truncated), int(capped), int(used))


class CompiledEpisodes:
    """Episodes of one outcome table, played and learned in compiled code (module docstring)."""

    def __init__(self, table: OutcomeTable, step_cap: int, time_limit: int = 0, exploring_starts: np.ndarray | None = None):
        from . import kernels  # numba is imported here, not when qtally is

        self._kernels = kernels
        self.table = table
        self.step_cap = int(step_cap)
        self.time_limit = int(time_limit)
        self.max_length = self.step_cap if not self.time_limit else min(self.time_limit, self.step_cap)
        self.exploring_starts = np.asarray(exploring_starts if exploring_starts is not None else np.zeros(0), dtype=np.int64)
        self._draws: UniformDraws | None = None
        self._pending_seed: int | None = None
        n = self.max_length
        self._buffers = (np.zeros(n, np.int64), np.zeros(n, np.int64), np.zeros(n, np.float64), np.zeros(n, np.float64))
        self._first_time = np.full(table.n_states * table.n_actions, -1, dtype=np.int64)
        self.compile_seconds = 0.0
        self._compiled_for: set[bool] = set()

    # ------------------------------------------------------------ the environment's stream
    def seed(self, seed: int | None) -> None:
        """Seed the environment stream as Gymnasium seeds an environment's generator."""
        self._pending_seed = None if seed is None else int(seed)
        if seed is not None:
            self._draws = UniformDraws(np.random.Generator(np.random.PCG64(np.random.SeedSequence(int(seed)))))

    def rng_state(self) -> dict[str, Any]:
        """The same form as :meth:`GymEpisodes.rng_state`: the generator as if stepped one draw at a time."""
        if self._draws is None:
            return {"pending_seed": self._pending_seed, "bit_generator": None}
        return {"pending_seed": None, "bit_generator": self._draws.generator_state_here()}

    def restore_rng_state(self, state: dict[str, Any]) -> None:
        if state.get("bit_generator") is None:
            self.seed(state.get("pending_seed"))
            return
        name = state["bit_generator"].get("bit_generator")
        bit_generator = getattr(np.random, str(name), None)
        if bit_generator is None:
            raise ValueError(f"the saved environment generator {name!r} is not a numpy bit generator")
        generator = np.random.Generator(bit_generator())
        generator.bit_generator.state = state["bit_generator"]
        self._draws = UniformDraws(generator)
        self._pending_seed = None

    # ------------------------------------------------------------ learning
    def learn(self, state: TrainerState, variant, schedule, truncation: str, n_episodes: int, log_every: int = 0) -> ClosedWindows:
        """Play and learn ``n_episodes`` episodes into ``state``; return the logging windows closed on the way.

        A window closes after each episode numbered a multiple of ``log_every`` (0: none)
        before the last of the ``n_episodes``: the caller logs those, in order, and the
        window the span ends in stays in ``state.window`` as on the gym path.
        """
        if self._draws is None:
            raise RuntimeError("seed the compiled engine (or restore its generator) before learning")
        k = self._kernels
        code = variant_code(variant)
        kind, p0, p1, p2 = schedule_code(schedule)
        truncation_code = {"as_terminal": k.AS_TERMINAL, "bootstrap": k.BOOTSTRAP, "discard": k.DISCARD}[truncation]
        if code == k.EXPLORING_STARTS and not self.exploring_starts.size:
            raise EngineUnavailable("exploring starts need start states; this environment lists none")
        step_size = step_size_code(variant)
        values, streams, table = state.values, state.streams, self.table
        window = state.window.sums()
        episode_before = state.episode
        span_end = episode_before + n_episodes
        log_every = max(int(log_every), 0)
        closed = np.zeros((n_episodes // log_every + 1 if log_every else 1, 8))
        counters = np.array([0, np.count_nonzero(values.visits)], dtype=np.int64)  # rows filled, pairs covered
        need = 2 * (self.max_length + 1)  # enough for one more episode whatever its length
        empty = np.zeros(0)
        done_total = 0
        first_call = not self._compiled_for
        model = (table.offsets, table.next_states, table.probabilities, table.rewards, table.first_step_rewards, table.terminated,
                 table.start_states, table.start_probabilities, self.exploring_starts)
        rules = (bool(variant.first_visit), float(variant.gamma), step_size, kind, float(p0), float(p1), float(p2), truncation_code, self.time_limit, self.step_cap)
        buffers = (*self._buffers, self._first_time)
        while done_total < n_episodes or first_call:
            env_u = self._draws.window(need, _WINDOW)
            acting_u = streams.acting.window(need, _WINDOW)
            start_u = streams.starts.window(1, _WINDOW) if code == k.EXPLORING_STARTS else empty
            started = time.perf_counter()
            done, env_used, acting_used, start_used = k.learn_episodes(
                code,
                (0 if first_call else n_episodes - done_total, state.episode),
                model,
                (values.q, values.visits, values.cumulative_weights, values.state_visits),
                (env_u, acting_u, start_u),
                rules,
                buffers,
                (window, log_every, span_end, closed, counters),
            )
            if first_call:  # a call with no episodes: what it took is compiling or loading the cached code
                self.compile_seconds += time.perf_counter() - started
                self._compiled_for.add(True)
                first_call = False
            elif not done:  # the windows always hold one more episode: a call that plays none would be called forever
                raise RuntimeError(f"the compiled kernel played no episode at episode {state.episode} (a kernel or stream fault)")
            self._draws.advance(env_used)
            streams.acting.advance(acting_used)
            if start_used:
                streams.starts.advance(start_used)
            state.episode += done
            done_total += done
        values.forget_greedy()  # the kernel wrote q directly
        rows = closed[: counters[0]]
        first_closed = (episode_before // log_every + 1) * log_every if log_every else 0
        ends = [first_closed + i * log_every for i in range(len(rows))]
        windows = ClosedWindows(ends, rows[:, :7], rows[:, 7] / values.visits.size)
        state.capped_episodes += int(rows[:, 5].sum()) + int(window[5]) - state.window.capped
        state.window = _window_from(window)
        return windows
