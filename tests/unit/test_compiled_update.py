"""The gym path's two updates, the variants' Python loops and the compiled engine's, give the same floats.

The trainer hands an episode of at least ``COMPILED_FROM`` steps to the compiled update
(:mod:`qtally.engine.compiled_update`) and a shorter one to the Python loop, so which one
ran must never show in a Q table. Which bug each test catches: any change of arithmetic or
order between the two (a return summed the other way, a step size, a weight added after
the step, a tail), a first-visit rule that counts a repeated pair twice or never, the
weighted-IS cut one step early or late, the count of steps used, a greedy action kept out
of step with ``q``, and a trainer that forgets what the update changed.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qtally.control.action_values import ActionValues
from qtally.control.schedules import Constant, GlieVisits
from qtally.control.variants import ExploringStarts, OffPolicy, OnPolicy
from qtally.engine import kernels  # noqa: F401  (loaded, so every trainer here takes the compiled update for long episodes)
from qtally.engine.compiled_update import REPAYS_LOADING, CompiledUpdate
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.trainer import Trainer, TrainingSettings


@settings(max_examples=80, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    variant_class=st.sampled_from([ExploringStarts, OnPolicy, OffPolicy]),
    first_visit=st.booleans(),
    step_size=st.sampled_from([None, 0.1, 1.0]),
    gamma=st.sampled_from([1.0, 0.9]),
    integer_rewards=st.booleans(),
)
def test_the_compiled_update_equals_the_python_loop_bit_for_bit(seed, variant_class, first_visit, step_size, gamma, integer_rewards):
    # Few states and long episodes: pairs repeat within an episode (first visit matters);
    # integer rewards make ties of the greedy action common, real ones make the order of
    # the sums show in the last bits.
    rng = np.random.default_rng(seed)
    n_states, n_actions = 5, 3
    python, compiled = ActionValues.zeros(n_states, n_actions), ActionValues.zeros(n_states, n_actions)
    variant = variant_class(gamma=gamma, first_visit=first_visit, step_size=step_size)
    update = CompiledUpdate(variant)
    for _ in range(30):
        length = int(rng.integers(1, 25))
        states = rng.integers(n_states, size=length).tolist()
        actions = rng.integers(n_actions, size=length).tolist()
        rewards = (rng.integers(-2, 3, size=length).astype(float) if integer_rewards else rng.normal(size=length)).tolist()
        behaviour = rng.choice([0.25, 0.5, 0.9, 1.0], size=length).tolist()
        tail = float(rng.choice([0.0, rng.normal()]))
        used = variant.update_lists(python, states, actions, rewards, behaviour, tail)
        count_visits = bool(rng.integers(2))  # the trainer's own loop counts them when the update does not
        assert update.update_lists(compiled, states, actions, rewards, behaviour, tail, count_visits=count_visits) == used
        for s in states:
            python.state_visits[s] += 1
            compiled.state_visits[s] += not count_visits
        for name in ("q", "visits", "cumulative_weights", "state_visits"):
            np.testing.assert_array_equal(getattr(compiled, name), getattr(python, name), err_msg=name)
        assert compiled.greedy.tolist() == python.greedy.tolist() == python.q.argmax(axis=1).tolist()


def test_one_compiled_update_serves_tables_of_other_layouts_in_turn():
    # The update keeps numba's compiled entry point for the arrays it last saw and calls it
    # directly. A table whose arrays are laid out otherwise (Fortran order here; a restored
    # state is a new table too) needs another compiled version: called through the old one,
    # its values would be read with the wrong strides and the twins below would differ.
    rng = np.random.default_rng(11)
    variant = OnPolicy(gamma=0.9, first_visit=True, step_size=None)
    update = CompiledUpdate(variant)
    c_order = ActionValues.zeros(6, 4)
    f_order = ActionValues(*(np.asfortranarray(np.zeros((6, 4), dtype=dtype)) for dtype in (np.float64, np.int64, np.float64)), np.zeros(6, dtype=np.int64))
    twins = [(c_order, ActionValues.zeros(6, 4)), (f_order, ActionValues.zeros(6, 4))]
    for k in range(40):
        values, python = twins[int(rng.integers(2))]
        length = int(rng.integers(4, 12))
        states, actions = rng.integers(6, size=length).tolist(), rng.integers(4, size=length).tolist()
        rewards = rng.normal(size=length).tolist()
        count_visits = bool(rng.integers(2))
        assert update.update_lists(values, states, actions, rewards, [1.0] * length, 0.0, count_visits=count_visits) == variant.update_lists(python, states, actions, rewards, [1.0] * length, 0.0)
        for s in states:
            python.state_visits[s] += 1
            values.state_visits[s] += not count_visits
    for values, python in twins:
        assert np.count_nonzero(values.visits) > 10
        for name in ("q", "visits", "state_visits"):
            np.testing.assert_array_equal(getattr(values, name), getattr(python, name), err_msg=name)


@pytest.mark.parametrize("variant_class", [ExploringStarts, OnPolicy, OffPolicy])
def test_a_restock_run_ends_the_same_whichever_update_learned_its_long_seasons(variant_class, monkeypatch):
    # A season is 14 days (7.5 on average from an exploring start): with the threshold in
    # place nearly every episode goes to the compiled update; raised past any length, none.
    def run(threshold: int):
        monkeypatch.setattr("qtally.trainer.COMPILED_FROM", threshold)
        settings = TrainingSettings(episodes=400, seed=3, log_every=50, eval_every=0, eval_episodes=3, engine="gym")
        variant = variant_class(gamma=1.0, first_visit=variant_class is not OffPolicy, step_size=None)
        trainer = Trainer(make_environment(EnvironmentSpec(id="qtally/Restock-v0")), variant, Constant(0.2), settings)
        outcome = trainer.run()
        return trainer.state.values, outcome.history

    (mixed, mixed_history), (python, python_history) = run(4), run(10**9)
    for name in ("q", "visits", "cumulative_weights", "state_visits"):
        np.testing.assert_array_equal(getattr(mixed, name), getattr(python, name), err_msg=name)
    assert mixed_history == python_history
    assert np.count_nonzero(python.visits) > 100  # the runs learned something to compare


@pytest.mark.parametrize("truncation", ["bootstrap", "discard"])
def test_cut_episodes_count_their_visits_once_whichever_update_learned_them(truncation, monkeypatch):
    # A step cap of 6 cuts most FrozenLake 8x8 episodes at 6 steps, long enough for the
    # compiled update. Started at 1.0, the table learns only from the tails. A bootstrapped tail's epsilon (a per-state schedule) reads the visit
    # counts with the episode's own visits in, so the trainer counts them itself before
    # it; a discarded episode is counted without any update. The compiled engine, which
    # counts while playing, is the independent check: counted late, twice or not at all,
    # the tails, the epsilons and the counts would differ from it.
    def run(threshold: int, engine: str):
        monkeypatch.setattr("qtally.trainer.COMPILED_FROM", threshold)
        settings = TrainingSettings(episodes=300, seed=5, log_every=50, eval_every=0, eval_episodes=2, engine=engine, truncation=truncation, step_cap=6, initial_value=1.0)
        schedule = GlieVisits(scale=2.0, floor=0.05)
        trainer = Trainer(make_environment(EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "8x8"})), OnPolicy(gamma=0.95), schedule, settings)
        outcome = trainer.run()
        return trainer.state.values, outcome.history

    runs = [run(4, "gym"), run(10**9, "gym"), run(4, "compiled")]
    (reference, reference_history) = runs[-1]
    for values, history in runs[:-1]:
        for name in ("q", "visits", "state_visits"):
            np.testing.assert_array_equal(getattr(values, name), getattr(reference, name), err_msg=name)
        assert history == reference_history
    assert reference.state_visits.sum() > 6 * 250  # nearly every episode ran to the cap
    # No reward within 6 steps: the table moves off its initial 1.0 only through the tails
    # (or, discarded, not at all), and a row's uneven values make its tail depend on epsilon.
    assert (np.count_nonzero(reference.q != 1.0) > 50) == (truncation == "bootstrap")


def test_numba_is_loaded_only_where_it_repays_loading(monkeypatch):
    # Loading numba costs more than a short run saves, so a process that has not loaded it
    # loads it only for a long run; once loaded, every run uses it.
    monkeypatch.delitem(sys.modules, "numba")
    short, long = CompiledUpdate(OnPolicy(gamma=1.0)), CompiledUpdate(OnPolicy(gamma=1.0))
    assert not short.load_if_it_pays(REPAYS_LOADING - 1) and not short.ready
    assert long.load_if_it_pays(REPAYS_LOADING) and long.ready
    monkeypatch.undo()
    assert short.load_if_it_pays(0)


def test_a_variant_of_another_class_keeps_its_own_update():
    # A subclass may change the update: the kernel's would then learn something else.
    class Halved(OnPolicy):
        def update_lists(self, values, states, actions, rewards, probabilities, tail_value):
            return super().update_lists(values, states, actions, [r / 2 for r in rewards], probabilities, tail_value)

    assert not CompiledUpdate(Halved(gamma=1.0)).load_if_it_pays(10**9)
    assert CompiledUpdate(OnPolicy(gamma=1.0)).load_if_it_pays(10**9)


def test_a_short_gym_run_in_a_fresh_process_never_loads_numba():
    script = (
        "import sys\n"
        "from qtally.control.schedules import Constant\n"
        "from qtally.control.variants import OnPolicy\n"
        "from qtally.envs.factory import EnvironmentSpec, make_environment\n"
        "from qtally.trainer import Trainer, TrainingSettings\n"
        "settings = TrainingSettings(episodes=300, seed=1, log_every=100, eval_every=0, eval_episodes=2, engine='gym')\n"
        "Trainer(make_environment(EnvironmentSpec(id='qtally/Restock-v0')), OnPolicy(gamma=1.0), Constant(0.1), settings).run()\n"
        "print('numba' in sys.modules)\n"
    )
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "False"
