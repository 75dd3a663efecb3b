"""qtally's environments are made the Gymnasium way in any program once qtally is installed."""

import subprocess
import sys


def test_gym_make_works_after_import_and_through_the_module_form():
    code = (
        "import gymnasium as gym\n"
        "env = gym.make('qtally:qtally/Restock-v0')\n"  # Gymnasium imports qtally itself
        "assert type(env.unwrapped).__name__ == 'RestockEnv'\n"
        "import qtally\n"
        "env = gym.make('qtally/Restock-v0', horizon=3)\n"
        "assert env.unwrapped.horizon == 3\n"
    )
    # A fresh interpreter: nothing registered by an earlier test in this process.
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr[-2000:]
