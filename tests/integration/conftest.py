import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest


def _console_script(name: str) -> list[str]:
    found = shutil.which(name) or str(Path(sys.executable).with_name(name))
    return [found]


@pytest.fixture
def run_cli(tmp_path):
    """Run a qtally console script in a fresh working directory; the default store lands there."""

    def run(program: str, *args: str, env_extra: dict | None = None, check: bool = False):
        env = {k: v for k, v in os.environ.items() if k != "MLFLOW_TRACKING_URI"}
        env["PYTHONPATH"] = os.pathsep.join([str(Path(__file__).parents[1]), env.get("PYTHONPATH", "")])
        env.update(env_extra or {})
        result = subprocess.run(_console_script(program) + list(args), cwd=tmp_path, env=env, capture_output=True, text=True, timeout=600)
        if check and result.returncode != 0:
            raise AssertionError(f"{program} failed ({result.returncode}):\n{result.stderr[-3000:]}")
        return result

    return run
