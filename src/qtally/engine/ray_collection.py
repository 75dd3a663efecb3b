"""Collection workers as Ray actors: on a local Ray instance kept on loopback, or on a running cluster.

The actors are :class:`~qtally.engine.collection.EpisodeWorker` objects, so a batch is
played exactly as by local processes (same shares, same streams, same episodes). Ray is
optional (``pip install 'qtally[ray]'``).

Loopback: a local instance is started with its node address on 127.0.0.1 and its
dashboard off. Ray (2.60, on Linux) swaps a 127.0.0.1 node address for the machine's
external one, and its services then listen on every interface, unless
``RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER=0`` is set before Ray is imported; qtally sets it when
it starts a local instance and Ray is not imported yet (:func:`keep_ray_on_loopback`).
A cluster given by ``collect.address`` is joined as it is: its network is its operator's.
"""

from __future__ import annotations

import math
import os
import sys
from typing import Any

from ..errors import QtallyError
from .collection import CollectionFailed, CollectSettings, Collector, EpisodeWorker, WorkerBlueprint

__all__ = ["RayCollector", "keep_ray_on_loopback", "LOOPBACK_SWITCH"]

LOOPBACK_SWITCH = "RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER"  # 0: a 127.0.0.1 node address stays 127.0.0.1 (read when Ray is imported)


def keep_ray_on_loopback() -> bool:
    """Make a local Ray instance listen on loopback only; False when Ray was imported before with other settings."""
    if "ray" in sys.modules:
        return os.environ.get(LOOPBACK_SWITCH) == "0"
    os.environ.setdefault(LOOPBACK_SWITCH, "0")
    return os.environ[LOOPBACK_SWITCH] == "0"


class RayCollector(Collector):
    """One actor per worker; a dead actor or one that misses ``timeout`` ends the collection in one line."""

    def __init__(self, settings: CollectSettings, blueprint: WorkerBlueprint, saved: list[dict[str, Any] | None]):
        super().__init__(settings, saved)
        if settings.address is None:
            keep_ray_on_loopback()
        try:
            import ray
        except ImportError:
            raise QtallyError("collect.backend=ray needs Ray: pip install 'qtally[ray]' (or collect.backend=local for processes on this machine)") from None
        self.ray = ray
        self.started_here = False
        if not ray.is_initialized():
            options: dict[str, Any] = {"include_dashboard": False, "log_to_driver": False, "configure_logging": False}
            if settings.address is None:
                cpus = max(os.cpu_count() or 1, math.ceil(settings.workers * settings.worker_cpus))
                # Actors import the environment's module by name: give them the trainer's import path
                # (the working folder included, where qtally also looks for entry-point modules).
                path = os.pathsep.join(dict.fromkeys([os.getcwd(), *(entry or os.getcwd() for entry in sys.path)]))
                options.update(_node_ip_address="127.0.0.1", num_cpus=cpus, runtime_env={"env_vars": {"PYTHONPATH": path}})
            else:
                options.update(address=settings.address)
            try:
                ray.init(**options)
            except Exception as exc:  # noqa: BLE001 - no cluster at that address, a port taken...
                where = f"collect.address={settings.address}" if settings.address else "a local Ray instance"
                raise QtallyError(f"collect.backend=ray: could not start or reach {where} ({type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''})") from None
            self.started_here = True
        actor = ray.remote(num_cpus=settings.worker_cpus, max_restarts=0)(EpisodeWorker)
        self.actors = [actor.remote(blueprint, k, saved[k]) for k in range(self.workers)]
        try:
            self._wait({k: a.state.remote() for k, a in enumerate(self.actors)}, "starting")
        except BaseException:
            self.close()
            raise

    def _wait(self, calls: dict[int, Any], doing: str) -> dict[int, Any]:
        ray = self.ray
        refs = list(calls.values())
        ready, pending = ray.wait(refs, num_returns=len(refs), timeout=self.settings.timeout)
        if pending:
            late = [k for k, ref in calls.items() if ref in pending]
            raise CollectionFailed(
                f"collection worker {late[0]} (Ray actor) sent nothing for {self.settings.timeout:g} s while {doing}; raise collect.timeout for a simulator this slow"
            )
        out = {}
        for k, ref in calls.items():
            try:
                out[k] = ray.get(ref)
            except ray.exceptions.RayActorError as exc:
                raise CollectionFailed(f"collection worker {k} (Ray actor) died while {doing}: {str(exc).splitlines()[0][:200]}") from None
            except ray.exceptions.RayTaskError as exc:
                cause = exc.cause if getattr(exc, "cause", None) is not None else exc
                raise CollectionFailed(f"collection worker {k} failed while {doing}: {type(cause).__name__}: {str(cause).splitlines()[0] if str(cause) else ''}") from None
        return out

    def _play(self, q, state_visits, shares):
        q_ref, visits_ref = self.ray.put(q), self.ray.put(state_visits)
        calls = {k: self.actors[k].play.remote(q_ref, visits_ref, share) for k, share in shares.items()}
        first, last = min(s[0] for s in shares.values()), max(s[-1] for s in shares.values())
        return self._wait(calls, f"playing episodes {first}-{last}")

    def close(self) -> None:
        for actor in getattr(self, "actors", []):
            try:
                self.ray.kill(actor)
            except Exception:  # noqa: BLE001 - already gone
                pass
        self.actors = []
        if getattr(self, "started_here", False):
            self.ray.shutdown()
            self.started_here = False
