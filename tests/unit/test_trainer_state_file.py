"""The trainer-state file: the logging window's arithmetic, a full round trip, and every refusal.

Each test names the breakage it catches (found by mutation testing, scripts/mutation.sh).
"""

import json
import os

import numpy as np
import pytest

from qtally.control.trainer_state import STATE_FORMAT, LogWindow, MetricSeries, TrainerState, TrainerStateError, record_metrics


def test_the_window_sums_and_averages_what_it_was_given():
    # Breakages caught: a sum that is overwritten or subtracted, a mean over the wrong count,
    # the update fraction divided by a floored length of 2 or multiplied.
    window = LogWindow()
    window.add(total_reward=3.0, length=1, epsilon=0.2, truncated=False, capped=False, steps_used=1)
    assert window.metrics() == {
        "return_mean": 3.0,
        "episode_length_mean": 1.0,
        "epsilon": 0.2,
        "truncated_fraction": 0.0,
        "step_capped_fraction": 0.0,
        "update_steps_fraction": 1.0,
    }
    window.add(total_reward=-7.0, length=5, epsilon=0.4, truncated=True, capped=True, steps_used=2)
    metrics = window.metrics()
    assert metrics["return_mean"] == pytest.approx(-2.0)
    assert metrics["episode_length_mean"] == pytest.approx(3.0)
    assert metrics["epsilon"] == pytest.approx(0.3)
    assert metrics["truncated_fraction"] == 0.5 and metrics["step_capped_fraction"] == 0.5
    assert metrics["update_steps_fraction"] == pytest.approx(3 / 6)


def test_a_metric_series_reads_as_the_list_of_pairs_it_holds():
    # Breakages caught: steps and values paired out of order or misaligned after a column
    # extend, a slice or index that returns one column, equality that ignores values or
    # length, columns of unequal length taken silently.
    series = MetricSeries([(100, 0.5)])
    series.extend_columns([200, 300], [0.25, -1.0])
    series.append((400, 2.0))
    pairs = [(100, 0.5), (200, 0.25), (300, -1.0), (400, 2.0)]
    assert list(series) == pairs and len(series) == 4
    assert series[1] == (200, 0.25) and series[-1] == (400, 2.0) and series[1:3] == pairs[1:3]
    assert series == pairs and series == MetricSeries(pairs) and pairs == series
    assert series != pairs[:3] and series != [*pairs[:3], (400, 2.5)] and series != MetricSeries(pairs[::-1])
    assert [value for _, value in series] == [0.5, 0.25, -1.0, 2.0]
    with pytest.raises(ValueError, match="2 steps for 1 values"):
        series.extend_columns([500, 600], [1.0])


def test_metrics_recorded_as_columns_land_under_their_names_in_order():
    # Breakages caught: a name's values sent to another name, a plain list already in the
    # history replaced instead of extended, steps shifted by a window.
    history = {"return_mean": [(10, -1.5)]}
    record_metrics(history, [20, 30], {"return_mean": [1.0, 2.0], "epsilon": [0.5, 0.25]})
    record_metrics(history, (40,), {"epsilon": (0.125,)})
    assert history == {"return_mean": [(10, -1.5), (20, 1.0), (30, 2.0)], "epsilon": [(20, 0.5), (30, 0.25), (40, 0.125)]}
    assert all(isinstance(series, MetricSeries) for series in history.values())


def _busy_state() -> TrainerState:
    state = TrainerState.fresh(3, 2, seed=4, initial_value=1.5)
    state.values.q[1, 0] = -2.25
    state.values.visits[1, 0] = 4
    state.values.cumulative_weights[2, 1] = 0.75
    state.values.state_visits[:] = [5, 6, 0]
    state.episode = 12
    state.window.add(1.0, 3, 0.1, True, True, 2)
    state.history = {"return_mean": [(10, -1.5)]}
    state.final_evaluation = {"eval_return_mean": 0.25, "eval_return_ci95": 0.5}
    state.capped_episodes = 3
    state.streams.acting.next()
    return state


def test_a_state_comes_back_whole_from_a_new_directory(tmp_path):
    # Breakages caught: a parent directory not created, any field (final evaluation, capped
    # episodes, initial values) dropped or defaulted on the way.
    state = _busy_state()
    path = state.save(tmp_path / "runs" / "a" / "state.npz")
    loaded = TrainerState.load(path)
    for name in ("q", "visits", "cumulative_weights", "state_visits"):
        np.testing.assert_array_equal(getattr(loaded.values, name), getattr(state.values, name), err_msg=name)
    assert loaded.values.q[0, 0] == 1.5
    assert (loaded.episode, loaded.capped_episodes) == (12, 3)
    assert loaded.window == state.window
    assert loaded.history == state.history
    assert loaded.final_evaluation == state.final_evaluation
    assert loaded.streams.acting.next() == state.streams.acting.next()
    assert sorted(os.listdir(path.parent)) == ["state.npz"]  # no partial file left behind


def _rewrite(path, target, *, metadata=None, arrays=None, pickled_metadata=False):
    with np.load(path, allow_pickle=False) as archive:
        stored = {key: archive[key] for key in archive.files}
    meta = json.loads(str(stored.pop("metadata")))
    meta.update(metadata or {})
    for key in [k for k, v in meta.items() if v is _DROP]:
        del meta[key]
    stored.update(arrays or {})
    text = json.dumps(meta)
    packed = np.array(text, dtype=object) if pickled_metadata else np.array(text)
    np.savez(target, metadata=packed, **stored)
    return target


_DROP = object()


def test_edited_arrays_fail_the_checksum(tmp_path):
    # Breakage caught: a checksum that does not depend on the arrays.
    path = _busy_state().save(tmp_path / "state.npz")
    q = np.zeros((3, 2))
    edited = _rewrite(path, tmp_path / "edited.npz", arrays={"q": q})
    with pytest.raises(TrainerStateError, match=r"edited\.npz' failed its checksum: the file is damaged or was edited$"):
        TrainerState.load(edited)


def test_a_pickled_file_is_refused(tmp_path):
    # The format loads without pickle. Breakage caught: allow_pickle switched on (this file,
    # whose metadata is a pickled object holding valid JSON, would then load).
    path = _busy_state().save(tmp_path / "state.npz")
    pickled = _rewrite(path, tmp_path / "pickled.npz", pickled_metadata=True)
    with pytest.raises(TrainerStateError, match=r"pickled\.npz' is not a readable qtally trainer state \(ValueError\)$"):
        TrainerState.load(pickled)


def test_another_format_or_version_is_refused_by_name(tmp_path):
    # Breakage caught: the format check joined with `and` (a file of another format with a
    # valid checksum would load), messages without the file name or the version.
    path = _busy_state().save(tmp_path / "state.npz")
    other = _rewrite(path, tmp_path / "other.npz", metadata={"format": "something-else"})
    with pytest.raises(TrainerStateError, match=r"other\.npz' is not a qtally trainer state$"):
        TrainerState.load(other)
    newer = _rewrite(path, tmp_path / "newer.npz", metadata={"format_version": 2})
    with pytest.raises(TrainerStateError, match=r"newer\.npz' has trainer-state version 2; this qtally reads 1$"):
        TrainerState.load(newer)
    assert STATE_FORMAT == "qtally-trainer-state"


def test_missing_and_incomplete_files_are_refused_by_name(tmp_path):
    with pytest.raises(TrainerStateError, match=r"^trainer state '.*nowhere\.npz' does not exist$"):
        TrainerState.load(tmp_path / "nowhere.npz")
    path = _busy_state().save(tmp_path / "state.npz")
    incomplete = _rewrite(path, tmp_path / "incomplete.npz", metadata={"window": _DROP})
    with pytest.raises(TrainerStateError, match=r"incomplete\.npz' has an incomplete trainer state \('window'\)$"):
        TrainerState.load(incomplete)


def test_a_file_without_a_capped_count_reads_as_none_capped(tmp_path):
    # capped_episodes was added within version 1; files without it load with 0.
    # Breakage caught: a different default, or the key misspelt on either side.
    path = _busy_state().save(tmp_path / "state.npz")
    older = _rewrite(path, tmp_path / "older.npz", metadata={"capped_episodes": _DROP})
    assert TrainerState.load(older).capped_episodes == 0


def test_a_failed_write_leaves_the_previous_file_and_no_partial_file(tmp_path, monkeypatch):
    # Breakage caught: the temporary file not removed (or its removal failing) when the
    # rename fails; the original error must come through.
    state = _busy_state()
    path = state.save(tmp_path / "state.npz")
    before = path.read_bytes()

    def refuse(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(os, "replace", refuse)
    state.episode = 99
    with pytest.raises(OSError, match="simulated"):
        state.save(path)
    assert path.read_bytes() == before
    assert sorted(os.listdir(tmp_path)) == ["state.npz"]


def test_a_fresh_state_starts_from_zero_estimates_unless_told_otherwise():
    # Breakage caught: a different default initial value (optimism the user did not ask for).
    state = TrainerState.fresh(2, 3, seed=0)
    assert not state.values.q.any() and state.values.q.shape == (2, 3)
    assert state.episode == 0 and not state.values.visits.any()
