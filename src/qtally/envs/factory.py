"""Make an environment from its config: a registered Gymnasium id or a ``module:Class`` entry point.

The result, :class:`TabularEnvironment`, bundles what the trainer needs from the edge:
the environment, its observation encoder, the number of actions, exploring-start
support if any, and a signature that a saved policy is checked against.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.wrappers import TimeLimit

from ..errors import first_line
from .encoders import Encoder, EncoderError, encoder_for_space
from .model import TabularModel
from .start_adapters import start_control_for
from .start_control import StartControl

__all__ = ["EnvironmentConfigError", "TabularEnvironment", "make_environment", "EnvironmentSpec"]


class EnvironmentConfigError(ValueError):
    """The configured environment cannot be made or cannot be learned with a table."""


@dataclass(frozen=True)
class EnvironmentSpec:
    """What the ``env`` config group holds (see ``configs/env/*.yaml``)."""

    id: str
    kwargs: Mapping[str, Any] = field(default_factory=dict)
    max_episode_steps: int | None = None
    observation_names: Sequence[str] | None = None
    bins: Sequence[int] | None = None
    low: Sequence[float] | None = None
    high: Sequence[float] | None = None


@dataclass
class TabularEnvironment:
    env: gym.Env
    encoder: Encoder
    n_actions: int
    start_control: StartControl | None
    spec: EnvironmentSpec

    @property
    def n_states(self) -> int:
        return self.encoder.n_states

    def signature(self) -> dict:
        """What a policy learned here must match to be used here."""
        return {"env_id": self.spec.id, "kwargs": _plain(dict(self.spec.kwargs or {})), "observation": self.encoder.spec(), "n_actions": self.n_actions}

    def decision_states(self, model: TabularModel | None = None) -> np.ndarray:
        """Bool ``(S,)``: the states an episode can act in, where the action taken can matter.

        Terminal states and states no episode can be in are not among them, so checks on a
        policy (does the behaviour cover the target?) leave them out. With ``model``, every
        state the model does not mark terminal; without one, the states start control lists
        (every non-terminal state episodes reach); without either, every state.
        """
        if model is not None and model.n_states == self.n_states:
            return ~np.asarray(model.terminal, dtype=bool)
        mask = np.ones(self.n_states, dtype=bool)
        if self.start_control is not None:
            mask[:] = False
            for observation in self.start_control.start_states():
                mask[self.encoder.encode(observation)] = True
        return mask

    def close(self) -> None:
        self.env.close()


def _plain(value: Any) -> Any:
    """Constructor arguments as JSON-able data (tuples become lists), for the policy signature."""
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    return value


# What a constructor raises when it does not like its arguments (FrozenLake's unknown
# map_name is a KeyError, a bad shape an AssertionError, an unknown keyword a TypeError).
_REFUSED = (LookupError, ValueError, TypeError, AssertionError)


def _refused(spec: EnvironmentSpec, exc: BaseException) -> EnvironmentConfigError:
    if spec.kwargs:
        return EnvironmentConfigError(
            f"env.kwargs={dict(spec.kwargs)!r}: the environment refused them ({first_line(exc)}); "
            f"use constructor arguments {spec.id!r} accepts"
        )
    return EnvironmentConfigError(f"env.id={spec.id!r}: the environment could not be made ({first_line(exc)})")


def _import_entry_module(module_name: str):
    """The module of a ``module:Class`` entry point: from the Python path, else from the working directory.

    A console script does not put the working directory on the path, yet a simulator file
    sitting beside the user's configs is the common case.
    """
    import os
    import sys

    try:
        return importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        here = os.getcwd()
        if exc.name != module_name.split(".")[0] or here in sys.path:
            raise
        sys.path.append(here)
        return importlib.import_module(module_name)


def _construct(spec: EnvironmentSpec, render_mode: str | None) -> gym.Env:
    kwargs = dict(spec.kwargs or {})
    if render_mode is not None:
        kwargs["render_mode"] = render_mode
    if ":" in spec.id and "/" not in spec.id.split(":", 1)[0]:
        module_name, _, class_name = spec.id.partition(":")
        try:
            module = _import_entry_module(module_name)
        except ImportError as exc:
            raise EnvironmentConfigError(f"env.id={spec.id!r}: cannot import module {module_name!r} ({exc}); check the entry point 'module:Class'") from None
        cls = getattr(module, class_name, None)
        if cls is None:
            raise EnvironmentConfigError(f"env.id={spec.id!r}: module {module_name!r} has no {class_name!r}; check the entry point 'module:Class'")
        try:
            env = cls(**kwargs)
        except _REFUSED as exc:
            raise _refused(spec, exc) from None
        if spec.max_episode_steps:
            env = TimeLimit(env, max_episode_steps=int(spec.max_episode_steps))
        return env
    from . import register_bundled

    register_bundled()
    extra = {"max_episode_steps": int(spec.max_episode_steps)} if spec.max_episode_steps else {}
    try:
        return gym.make(spec.id, disable_env_checker=True, **extra, **kwargs)
    except gym.error.Error as exc:
        message = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise EnvironmentConfigError(f"env.id={spec.id!r} is not a registered Gymnasium environment ({message}); use a registered id or a 'module:Class' entry point") from None
    except _REFUSED as exc:
        raise _refused(spec, exc) from None


def make_environment(spec: EnvironmentSpec, render_mode: str | None = None) -> TabularEnvironment:
    """Make the environment and check that a Q table can hold it."""
    env = _construct(spec, render_mode)
    if not isinstance(env.action_space, spaces.Discrete):
        env.close()
        raise EnvironmentConfigError(
            f"env.id={spec.id!r} has a {type(env.action_space).__name__} action space; tabular control needs Discrete actions"
        )
    names = spec.observation_names or getattr(env.unwrapped, "observation_names", None)
    try:
        encoder = encoder_for_space(env.observation_space, names=names, bins=spec.bins, low=spec.low, high=spec.high)
    except EncoderError as exc:
        env.close()
        raise EnvironmentConfigError(f"env.id={spec.id!r}: {exc}") from None
    return TabularEnvironment(
        env=env,
        encoder=encoder,
        n_actions=int(env.action_space.n),
        start_control=start_control_for(env),
        spec=spec,
    )
