"""qtally-check: one line per capability, and an exit code that says whether qtally can train the environment.

Which bug each test catches: a capability reported that the environment lacks (or the
reverse: the custom corridor has start control and a model but no outcome table and no
renderer), a required capability missing without a non-zero exit, a traceback instead of
one line for an environment with continuous actions.
"""


def _lines(result) -> dict[str, tuple[str, str]]:
    """``{capability: (mark, detail)}`` from the report (columns are separated by two spaces or more)."""
    import re

    found = {}
    for line in result.stdout.splitlines()[1:]:
        parts = re.split(r"\s{2,}", line.strip(), maxsplit=2)
        if len(parts) == 3 and parts[0] in ("yes", "no", "NO"):
            found[parts[1]] = (parts[0], parts[2])
    return found


def test_a_bundled_environment_has_everything(run_cli):
    result = run_cli("qtally-check", "env=restock", "probe_seconds=0.2", "episodes=1000000")
    assert result.returncode == 0, result.stderr
    lines = _lines(result)
    for capability in ("gymnasium checker", "actions", "observations", "reproducible", "start control", "model", "compiled engine", "rendering", "speed"):
        assert lines[capability][0] == "yes", (capability, lines[capability])
    assert "540 states x 6 actions = 3,240 table entries" in lines["observations"][1]
    assert lines["time limit"][0] == "no" and "env.step_cap=5400" in lines["time limit"][1]
    assert "1,000,000 episodes take about" in lines["speed"][1]
    assert result.stdout.strip().endswith("verdict: qtally can train qtally/Restock-v0")


def test_a_custom_environment_by_entry_point(run_cli):
    result = run_cli("qtally-check", "env=cliff_walking", "env.id=support.corridor:Corridor", "env.max_episode_steps=50", "probe_seconds=0.2")
    assert result.returncode == 0, result.stderr
    lines = _lines(result)
    assert lines["start control"][0] == "yes" and lines["model"][0] == "yes"
    assert lines["compiled engine"][0] == "no" and "implement outcome_table()" in lines["compiled engine"][1]
    assert lines["rendering"][0] == "no" and lines["time limit"] == ("yes", "50 steps (a cut episode is handled as env.truncation says)")


def test_continuous_actions_cannot_be_trained(run_cli):
    result = run_cli("qtally-check", "env=cartpole_binned", "env.id=MountainCarContinuous-v0", "probe_seconds=0.2")
    assert result.returncode == 1
    errors = [line for line in result.stderr.splitlines() if line.strip()]
    assert errors == ["qtally-check: error: qtally cannot train MountainCarContinuous-v0: env.id='MountainCarContinuous-v0' has a Box action space; tabular control needs Discrete actions"]
    assert "Traceback" not in result.stdout + result.stderr
