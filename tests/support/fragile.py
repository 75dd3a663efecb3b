"""The corridor (support.corridor), with a failure switched on by environment variables, in collection workers only (test support).

``QTALLY_TEST_FAULT`` names what goes wrong at the ``QTALLY_TEST_FAULT_AT``-th reset of a
worker process numbered ``QTALLY_TEST_FAULT_WORKER`` (default 1); the trainer's own
process never fails, so a run can play its first batches and then lose a worker:

- ``exit``: the process ends at once (``os._exit``), as a crash or an out-of-memory kill would;
- ``raise``: the simulator raises ``RuntimeError("the sensor feed was lost")``;
- ``hang``: the simulator stops answering (sleeps an hour).
"""

from __future__ import annotations

import multiprocessing
import os
import time

from support.corridor import Corridor


class FragileCorridor(Corridor):
    def __init__(self, render_mode=None):
        super().__init__(render_mode)
        self.resets = 0
        name = multiprocessing.current_process().name
        self.worker = int(name.rsplit("-", 1)[1]) if name.startswith("qtally-collect-") else None

    def reset(self, *, seed=None, options=None):
        self.resets += 1
        fault = os.environ.get("QTALLY_TEST_FAULT")
        if fault and self.worker == int(os.environ.get("QTALLY_TEST_FAULT_WORKER", "1")) and self.resets == int(os.environ["QTALLY_TEST_FAULT_AT"]):
            if fault == "exit":
                os._exit(3)
            if fault == "raise":
                raise RuntimeError("the sensor feed was lost")
            if fault == "hang":
                time.sleep(3600)
        return super().reset(seed=seed, options=options)
