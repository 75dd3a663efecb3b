"""Parallel collection inside one run: what it must keep from the sequential trainer, and how it fails.

Each test names the breakage it catches. Worker processes are real (``spawn``), so each
test pays about two seconds of start-up per worker.
"""

from __future__ import annotations

import numpy as np
import pytest

from qtally.control.schedules import Constant, GlieVisits
from qtally.control.streams import RandomStreams
from qtally.control.trainer_state import TrainerState
from qtally.control.variants import make_variant
from qtally.engine.collection import CollectionFailed, CollectSettings, share_of
from qtally.engine.episodes import GymEpisodes
from qtally.engine.player import EpisodePlayer
from qtally.envs.factory import EnvironmentSpec, make_environment
from qtally.trainer import Trainer, TrainingSettings

SLIPPERY_LAKE = EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "4x4", "is_slippery": True}, max_episode_steps=100)
CORRIDOR = EnvironmentSpec(id="support.corridor:Corridor", max_episode_steps=20)
FRAGILE = EnvironmentSpec(id="support.fragile:FragileCorridor", max_episode_steps=20)


def _trainer(spec, variant, schedule, collect, *, episodes=500, seed=3, state=None, **settings):
    options = dict(episodes=episodes, seed=seed, log_every=50, eval_every=250, eval_episodes=10, engine="gym", collect=collect) | settings
    return Trainer(make_environment(spec), make_variant(variant, 0.95, True, None), schedule, TrainingSettings(**options), state=state)


def _same(a, b) -> None:
    for name in ("q", "visits", "cumulative_weights", "state_visits"):
        np.testing.assert_array_equal(getattr(a.values, name), getattr(b.values, name), err_msg=name)
    assert a.history == b.history


@pytest.mark.parametrize(
    "variant, schedule",
    [("off_policy", GlieVisits(3.0, 0.05)), ("on_policy", Constant(0.2)), ("exploring_starts", Constant(0.0))],
)
def test_one_worker_with_batches_of_one_is_the_sequential_trainer(variant, schedule):
    # Breakages caught: worker 0 not drawing from the trainer's own streams or seeding its
    # environment otherwise; a per-state schedule reading counts without the episode's own
    # visits; an exploring start's visit lost; episodes learned out of order.
    spec = CORRIDOR if variant == "exploring_starts" else SLIPPERY_LAKE
    sequential = _trainer(spec, variant, schedule, CollectSettings()).run()
    collected = _trainer(spec, variant, schedule, CollectSettings(workers=1, batch=1, force_workers=True)).run()
    _same(sequential, collected)


def test_two_workers_give_the_same_table_twice_and_their_own_streams():
    # Breakages caught: episodes assigned by arrival order instead of by number (the table
    # would depend on which worker answers first); worker 1 replaying worker 0's draws.
    collect = CollectSettings(workers=2, batch=8)
    first = _trainer(SLIPPERY_LAKE, "off_policy", GlieVisits(3.0, 0.05), collect).run()
    second = _trainer(SLIPPERY_LAKE, "off_policy", GlieVisits(3.0, 0.05), collect).run()
    _same(first, second)
    sequential = _trainer(SLIPPERY_LAKE, "off_policy", GlieVisits(3.0, 0.05), CollectSettings()).run()
    assert not np.array_equal(first.values.q, sequential.values.q)  # batches of 8 on two streams are another run


def test_a_paused_two_worker_run_resumes_bit_for_bit(tmp_path):
    # Breakage caught: a worker's stream or environment generator missing from the
    # checkpoint (worker_streams), or restored to the wrong worker.
    collect = CollectSettings(workers=2, batch=6)
    whole = _trainer(SLIPPERY_LAKE, "on_policy", GlieVisits(3.0, 0.05), collect).run()
    first = _trainer(SLIPPERY_LAKE, "on_policy", GlieVisits(3.0, 0.05), collect)
    first.run(pause_at=150)
    path = first.save_state(tmp_path / "state.npz")
    state = TrainerState.load(path)
    assert len(state.worker_streams) == 1 and state.worker_streams[0] is not None
    resumed = _trainer(SLIPPERY_LAKE, "on_policy", GlieVisits(3.0, 0.05), collect, state=state).run()
    _same(whole, resumed)


def test_the_player_acts_on_its_snapshot_and_changes_neither_table():
    # Breakages caught: a player that writes visit counts itself (a parallel batch would
    # count them twice), or records probabilities of another epsilon than the one it acted
    # with (off-policy weights would be wrong).
    environment = make_environment(SLIPPERY_LAKE)
    player = EpisodePlayer(GymEpisodes(environment, 100), make_variant("off_policy", 0.95, True, None), Constant(0.3), [])
    q = np.random.default_rng(0).normal(size=(16, 4))
    visits = np.arange(16, dtype=np.int64)
    q_before, visits_before = q.copy(), visits.copy()
    streams = RandomStreams(5)
    experience = player.play(q, visits, 7, streams.acting, streams.starts)
    np.testing.assert_array_equal(q, q_before)
    np.testing.assert_array_equal(visits, visits_before)
    played = experience.played
    assert experience.decisions == played.length
    assert experience.epsilon_sum == pytest.approx(0.3 * played.length)
    for s, a, p in zip(played.states, played.actions, played.probabilities):
        greedy = int(np.argmax(q[s]))
        assert p == pytest.approx(0.3 / 4 + (0.7 if a == greedy else 0.0))


@pytest.mark.parametrize("step_cap", [100, 7])
def test_the_sources_inline_acting_plays_what_the_called_chooser_plays(step_cap):
    # The episode source runs EpsilonGreedyActing's lines inside its step loop and resets
    # the core environment after its first, seeded reset. Played instead through a plain
    # function (the general path, every reset through the wrappers' chain), the same seeds
    # must give the same episodes. Breakages caught: an inline copy that draws or decides
    # differently, a probability computed another way, a reset shortcut that changes the
    # environment's stream or the cap.
    from qtally.policy.table_policy import EpsilonGreedyActing

    q = np.random.default_rng(1).normal(size=(16, 4))
    greedy = q.argmax(axis=1).tolist()

    def episodes(called: bool) -> list:
        source = GymEpisodes(make_environment(SLIPPERY_LAKE), step_cap)
        source.seed(11)
        acting = EpsilonGreedyActing(greedy, 0.25, 4, RandomStreams(4).acting.next)
        choose = (lambda state: acting(state)) if called else acting
        if called:
            source._core = source.environment.env  # step and reset through every wrapper
        played = [source.play(choose) for _ in range(30)]
        return [(p.states, p.actions, p.rewards, p.probabilities, p.truncated, p.capped, p.final_state) for p in played]

    inline, called = episodes(False), episodes(True)
    assert inline == called
    assert any(len(states) > 1 for states, *_ in inline)


def test_shares_cover_a_batch_once_in_round_robin():
    # Breakage caught: an episode played twice or never when the batch is not a multiple of the workers.
    shares = [share_of(k, 3, 21, 10) for k in range(3)]
    assert sorted(sum(shares, [])) == list(range(21, 31))
    assert shares[0] == [21, 24, 27, 30]


@pytest.mark.parametrize(
    "fault, words",
    [
        ("exit", ["collection worker 1", "exited with code 3", "playing episodes"]),
        ("raise", ["collection worker 1 failed", "RuntimeError: the sensor feed was lost"]),
        ("hang", ["collection worker 1", "sent nothing for 3 s", "collect.timeout"]),
    ],
)
def test_a_lost_worker_ends_the_collection_in_one_line_keeping_the_last_whole_batch(monkeypatch, tmp_path, fault, words):
    # Breakages caught: a dead or silent worker waited for forever; a half-played batch
    # learned from; no checkpoint to resume from; a multi-line or traceback message.
    monkeypatch.setenv("QTALLY_TEST_FAULT", fault)
    monkeypatch.setenv("QTALLY_TEST_FAULT_AT", "30")  # worker 1 plays 4 episodes a batch: it fails in the 8th batch
    saved = []
    trainer = Trainer(
        make_environment(FRAGILE), make_variant("on_policy", 1.0, True, None), Constant(0.2),
        TrainingSettings(episodes=400, seed=1, log_every=40, eval_every=0, eval_episodes=2, engine="gym", collect=CollectSettings(workers=2, batch=8, timeout=3)),
        checkpoint=lambda t: saved.append(t.state.episode) or t.save_state(tmp_path / "state.npz"),
    )
    with pytest.raises(CollectionFailed) as failed:
        trainer.run()
    message = str(failed.value)
    assert "\n" not in message and all(word in message for word in words), message
    assert saved == [56] and trainer.state.episode == 56  # seven whole batches; the eighth is not learned from
    assert failed.value.checkpoint == tmp_path / "state.npz"
    assert trainer._collector is None  # every worker stopped
