"""The trainer's contract: its state is one object, evaluation never touches training, every episode ends.

Each test names the breakage it is there to catch.
"""

import numpy as np
import pytest

from qtally.control.schedules import Constant, GlieVisits
from qtally.control.trainer_state import TrainerState, TrainerStateError
from qtally.control.variants import make_variant
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.tracking.sink import MemoryRecorder
from qtally.trainer import Trainer, TrainingSettings, train
from support.corridor import GOAL

CORRIDOR = EnvironmentSpec(id="support.corridor:Corridor", max_episode_steps=20)
SLIPPERY_LAKE = EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "4x4", "is_slippery": True}, max_episode_steps=100)


def _q(spec, settings, variant="on_policy", schedule=None, **options):
    outcome = train(make_environment(spec), make_variant(variant, 0.95, True, None), schedule or Constant(0.2), settings, **options)
    return outcome


@pytest.mark.parametrize("variant", ["on_policy", "off_policy", "exploring_starts"])
def test_evaluating_more_often_does_not_change_the_q_table(variant):
    # Breakage caught: evaluation playing on (or reseeding) the training environment or
    # drawing from a training stream. FrozenLake is slippery, so any shift of the
    # environment's own generator changes the episodes and the table.
    rarely = _q(SLIPPERY_LAKE, TrainingSettings(episodes=600, seed=4, eval_every=0, eval_episodes=10), variant)
    often = _q(SLIPPERY_LAKE, TrainingSettings(episodes=600, seed=4, eval_every=7, eval_episodes=10), variant)
    np.testing.assert_array_equal(rarely.values.q, often.values.q)
    np.testing.assert_array_equal(rarely.values.visits, often.values.visits)


@pytest.mark.parametrize("variant", ["on_policy", "off_policy", "exploring_starts"])
def test_a_saved_state_resumes_bit_for_bit(tmp_path, variant):
    # Breakage caught: any part of the state (a stream, the environment's generator, the
    # window, per-state visits, IS weights) not saved or not restored.
    settings = TrainingSettings(episodes=400, seed=11, log_every=50, eval_every=100, eval_episodes=10)
    straight = _q(SLIPPERY_LAKE, settings, variant, GlieVisits(3.0, 0.05))

    environment = make_environment(SLIPPERY_LAKE)
    first = Trainer(environment, make_variant(variant, 0.95, True, None), GlieVisits(3.0, 0.05), settings)
    first.run(pause_at=230)  # mid-window and between evaluations
    path = first.save_state(tmp_path / "state.npz")
    environment.close()

    restored = TrainerState.load(path)
    second = Trainer(make_environment(SLIPPERY_LAKE), make_variant(variant, 0.95, True, None), GlieVisits(3.0, 0.05), settings, state=restored)
    resumed = second.run()
    for name in ("q", "visits", "cumulative_weights", "state_visits"):
        np.testing.assert_array_equal(getattr(straight.values, name), getattr(resumed.values, name), err_msg=name)
    assert resumed.history == straight.history


def test_a_damaged_state_file_is_refused(tmp_path):
    outcome_trainer = Trainer(make_environment(CORRIDOR), make_variant("on_policy", 1.0, True, None), Constant(0.1), TrainingSettings(episodes=20, eval_every=0, eval_episodes=2))
    outcome_trainer.run()
    path = outcome_trainer.save_state(tmp_path / "state.npz")
    raw = bytearray(path.read_bytes())
    raw[len(raw) // 2] ^= 0xFF
    (tmp_path / "damaged.npz").write_bytes(bytes(raw))
    with pytest.raises(TrainerStateError):
        TrainerState.load(tmp_path / "damaged.npz")
    (tmp_path / "short.npz").write_bytes(path.read_bytes()[:100])
    with pytest.raises(TrainerStateError):
        TrainerState.load(tmp_path / "short.npz")


def test_a_looping_policy_is_cut_by_the_step_cap():
    # CliffWalking without a time limit: from an all-zero table the greedy action is 0 (up),
    # which walks into the top wall and stays there forever. Breakage caught: no step cap
    # (the test would hang) or a cap that does not count as truncation.
    spec = EnvironmentSpec(id="CliffWalking-v1", max_episode_steps=None)
    recorder = MemoryRecorder()
    outcome = _q(spec, TrainingSettings(episodes=3, seed=0, eval_every=0, eval_episodes=2, log_every=3, step_cap=50), "on_policy", Constant(0.0), recorder=recorder)
    assert outcome.capped_episodes == 3
    assert outcome.step_cap == 50
    assert recorder.series("step_capped_fraction") == [(3, 1.0)]
    assert recorder.series("truncated_fraction") == [(3, 1.0)]
    assert recorder.series("episode_length_mean") == [(3, 50.0)]
    default = _q(spec, TrainingSettings(episodes=1, seed=0, eval_every=0, eval_episodes=1), "on_policy", Constant(0.0))
    assert default.step_cap == 1000  # 48 states: the floor of the default rule


def _one_step_update(variant, truncation, epsilon, tail_row):
    """Train one episode cut after one step; return Q of the pair taken and the expected value."""
    spec = EnvironmentSpec(id="support.corridor:FixedStartCorridor", max_episode_steps=1)
    environment = make_environment(spec)
    state = TrainerState.fresh(environment.n_states, environment.n_actions, seed=0)
    state.values.q[1] = tail_row  # the cell reached by stepping right from cell 0
    state.values.q[0] = [-100.0, 0.0]  # cell 0: greedy is "right"
    settings = TrainingSettings(episodes=1, seed=0, eval_every=0, eval_episodes=1, truncation=truncation)
    Trainer(environment, make_variant(variant, 0.5, True, None), Constant(epsilon), settings, state=state).play_and_learn()
    return state.values.q[0, 1], state.values.visits[0, 1]


@pytest.mark.parametrize(
    "variant, expected_tail",
    [("on_policy", 0.1 * 5.0 + 0.9 * 10.0), ("off_policy", 10.0)],
)
def test_a_bootstrapped_cut_is_seeded_with_the_value_of_the_learned_policy(variant, expected_tail):
    # Q(1) = [0, 10]. On-policy learns the epsilon-soft policy: its value at cell 1 is
    # 0.1 * mean + 0.9 * max = 9.5 with epsilon 0.1 (sum_a pi(a|s) Q(s, a)); the greedy
    # target of off-policy is worth max = 10. With gamma 0.5 and reward -1, the pair
    # (0, right) gets -1 + 0.5 * tail. Breakages caught: a tail forced to 0, the max used
    # for on-policy. The first decision uses u from the seeded stream; seed 0's first
    # uniform is above 0.1, so the walker steps right (checked by the visit count).
    q, visits = _one_step_update(variant, "bootstrap", 0.1, [0.0, 10.0])
    assert visits == 1
    assert q == pytest.approx(-1.0 + 0.5 * expected_tail)


def test_as_terminal_and_discard_treat_the_cut_as_they_say():
    q, visits = _one_step_update("on_policy", "as_terminal", 0.1, [0.0, 10.0])
    assert (q, visits) == (pytest.approx(-1.0), 1)
    q, visits = _one_step_update("on_policy", "discard", 0.1, [0.0, 10.0])
    assert (q, visits) == (0.0, 0)


def test_exploring_starts_begin_in_the_drawn_state():
    # Ordinary resets of this corridor always start in cell 0, where the all-zero table's
    # greedy action (0, lowest index) exits at once. Only starts drawn through reset_to
    # reach cells 2..5. Breakage caught: exploring starts that ignore the drawn state.
    environment = make_environment(EnvironmentSpec(id="support.corridor:FixedStartCorridor", max_episode_steps=20))
    outcome = train(environment, make_variant("exploring_starts", 1.0, True, None), Constant(0.0), TrainingSettings(episodes=300, seed=0, eval_every=0, eval_episodes=2))
    assert np.all(outcome.values.visits[2:GOAL].sum(axis=1) > 0)


def test_per_state_visits_drive_the_visit_schedule():
    # GLIE by visits: epsilon = min(1, 2 / (n(s) + 1)). Breakage caught: per-state visit
    # counts that never grow (epsilon would stay 1 in every window).
    recorder = MemoryRecorder()
    outcome = _q(CORRIDOR, TrainingSettings(episodes=400, seed=1, eval_every=0, eval_episodes=2, log_every=100), "on_policy", GlieVisits(2.0, 0.0), recorder=recorder)
    epsilons = [value for _, value in recorder.series("epsilon")]
    assert epsilons[0] < 0.5 and epsilons[-1] < 0.05
    decisions = int(outcome.values.visits.sum())  # first-visit counts at most one per pair an episode...
    assert outcome.values.state_visits.sum() >= decisions  # ...while every decision counts a state visit


@pytest.mark.parametrize("engine", ["gym", "compiled"])
@pytest.mark.parametrize("stop_after", [199, 200, 230])
def test_a_stop_then_resume_logs_every_step_once(tmp_path, engine, stop_after):
    # Breakage caught: a stop honoured before the boundary's logging and evaluation (200 is
    # both): the checkpoint then says 200 episodes were played, the resumed run starts at the
    # next boundary and the step-200 metrics and evaluation are never logged. The compiled
    # engine only stops where a span ends (here on the evaluations, every 100), so it always
    # hit this; its spans also close the logging windows inside them (every 50), which the
    # resumed history must hold once each.
    from qtally.trainer import TrainingStopped

    settings = TrainingSettings(episodes=400, seed=11, log_every=50, eval_every=100, eval_episodes=10, engine=engine)
    straight = _q(SLIPPERY_LAKE, settings, "on_policy", GlieVisits(3.0, 0.05))

    first = Trainer(make_environment(SLIPPERY_LAKE), make_variant("on_policy", 0.95, True, None), GlieVisits(3.0, 0.05), settings,
                    checkpoint=lambda trainer: trainer.save_state(tmp_path / "state.npz"))
    assert first.engine == engine
    play_until = first._play_until

    def play_and_ask_to_stop(episode: int):
        closed = play_until(min(episode, stop_after) if engine == "gym" else episode)
        if first.state.episode >= stop_after:
            first.request_stop("a test")
        return closed

    first._play_until = play_and_ask_to_stop
    with pytest.raises(TrainingStopped) as stopped:
        first.run()
    expected_stop = stop_after if engine == "gym" else -(-stop_after // 100) * 100
    assert stopped.value.episode == expected_stop
    second = Trainer(make_environment(SLIPPERY_LAKE), make_variant("on_policy", 0.95, True, None), GlieVisits(3.0, 0.05), settings,
                     state=TrainerState.load(tmp_path / "state.npz"))
    resumed = second.run()
    np.testing.assert_array_equal(straight.values.q, resumed.values.q)
    assert resumed.history == straight.history
