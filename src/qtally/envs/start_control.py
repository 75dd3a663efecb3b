"""Setting where an episode starts: what exploring starts needs.

Monte Carlo control with exploring starts begins every episode from a random
state-action pair. That requires the environment to be put into a chosen state.
A custom environment opts in by implementing :class:`StartControl`; the bundled
toy-text environments and the restocking simulator get adapters in
:mod:`qtally.envs.start_adapters`.
"""

from __future__ import annotations

from typing import Any, Protocol, Sequence, runtime_checkable

__all__ = ["StartControl", "StartNotSettableError"]


class StartNotSettableError(RuntimeError):
    """The environment cannot be started from a chosen state."""


@runtime_checkable
class StartControl(Protocol):
    """An environment (or wrapper) whose episode can begin in a chosen state.

    ``start_states()`` lists the observations an exploring start may pick from (in the
    environment's own observation terms, non-terminal only). ``reset_to(observation)``
    resets the environment into that state and returns ``(observation, info)`` like
    ``reset``; its randomness (for example a hidden card) comes from the environment's
    own generator, so a seeded environment stays reproducible.
    """

    def start_states(self) -> Sequence[Any]: ...

    def reset_to(self, observation: Any) -> tuple[Any, dict]: ...
