"""Metric rows written straight into a SQLite store read back, through MLflow's own API, as ``log_batch`` writes them.

The reference is MLflow itself: each case sends the same values to one run through
``MlflowClient.log_batch`` and to another through :class:`SqliteMetricRows`, then compares
what MLflow reads back (metric histories, a run's latest metrics, a search ordered by a
metric). The store refused, the write that fails half-way and the recorder's choice of
writer are checked apart.
"""

from __future__ import annotations

import math
import shutil
import sqlite3

import pytest
from mlflow.entities import Metric
from mlflow.tracking import MlflowClient

from qtally.tracking.mlflow_sink import MlflowRecorder
from qtally.tracking.sqlite_metrics import SqliteMetricRows, sqlite_path

INF = float("inf")
NAN = float("nan")

# Batches as the recorder queues them: (key, value, timestamp ms, step). Chosen so that a
# writer that gets MLflow's rules wrong stores something else: a NaN and both infinities;
# an identical row twice; steps out of order within a batch and across batches (a later
# batch whose newest step is older, though logged later, must not move the latest value back); one step logged twice with
# a later timestamp (the later wins) and a tie on step and timestamp broken by the value.
BATCHES = [
    [("return", 0.5, 1000, 100), ("return", 0.25, 1000, 200), ("regret", NAN, 1000, 100), ("width", INF, 1000, 100), ("width", -INF, 1000, 200)],
    [("return", 0.75, 1000, 50), ("return", 0.25, 1000, 200), ("regret", 1.5, 1000, 300), ("regret", 2.5, 999, 300)],
    [("return", 0.125, 1001, 200), ("gap", 3.0, 1002, 400), ("gap", 4.0, 1002, 400), ("gap", 3.5, 1002, 400)],
    [("regret", 0.0, 2000, 300), ("regret", NAN, 2000, 300), ("gap", 9.0, 5000, 10)],
]


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    path = tmp_path_factory.mktemp("store") / "mlflow.db"
    uri = f"sqlite:///{path}"
    client = MlflowClient(uri)
    experiment = client.create_experiment("rows")
    return uri, client, experiment


def _run(store) -> str:
    uri, client, experiment = store
    return client.create_run(experiment).info.run_id


def _history(client, run_id, key):
    return sorted((m.step, m.timestamp, math.isnan(m.value), 0.0 if math.isnan(m.value) else m.value) for m in client.get_metric_history(run_id, key))


def _latest(client, run_id):
    return {k: ("nan" if math.isnan(v) else v) for k, v in client.get_run(run_id).data.metrics.items()}


def test_rows_read_back_as_log_batch_writes_them(store):
    uri, client, _ = store
    by_mlflow, by_rows = _run(store), _run(store)
    rows = SqliteMetricRows.open(uri, by_rows)
    assert rows is not None
    for batch in BATCHES:
        client.log_batch(by_mlflow, metrics=[Metric(k, v, t, s) for k, v, t, s in batch])
        rows.write(batch)
        assert _latest(client, by_rows) == _latest(client, by_mlflow)  # after every batch, not only at the end
    for key in ("return", "regret", "width", "gap"):
        assert _history(client, by_rows, key) == _history(client, by_mlflow, key), key
    # The identical row is stored once, the latest values are MLflow's (spelled out so a shared mistake shows too).
    assert _history(client, by_rows, "return").count((200, 1000, False, 0.25)) == 1
    assert _latest(client, by_rows) == {"return": 0.125, "regret": 0.0, "width": -1.7976931348623157e308, "gap": 4.0}


def test_searches_order_runs_by_rows_written_directly(store):
    uri, client, experiment = store
    low, high = _run(store), _run(store)
    SqliteMetricRows.open(uri, low).write([("score", 1.0, 5, 1), ("score", 9.0, 5, 0)])
    SqliteMetricRows.open(uri, high).write([("score", 2.0, 5, 1)])
    found = client.search_runs([experiment], filter_string="metrics.score > 0", order_by=["metrics.score DESC"])
    assert [r.info.run_id for r in found] == [high, low]


def test_a_failed_write_leaves_nothing_behind(store, tmp_path):
    uri, client, _ = store
    run_id = _run(store)
    copy = tmp_path / "copy.db"
    shutil.copy(sqlite_path(uri), copy)
    rows = SqliteMetricRows.open(f"sqlite:///{copy}", run_id)
    with sqlite3.connect(copy) as connection:  # the second statement of the write will fail
        connection.execute("DROP TABLE latest_metrics")
    with pytest.raises(sqlite3.OperationalError, match="no such table: latest_metrics"):  # the store's own error, not one from undoing it
        rows.write([("return", 1.0, 1, 1)])
    with sqlite3.connect(copy) as connection:
        assert connection.execute("SELECT COUNT(*) FROM metrics WHERE run_uuid = ?", (run_id,)).fetchone() == (0,)


def test_stores_it_does_not_know_are_left_to_log_batch(store, tmp_path):
    uri, client, _ = store
    run_id = _run(store)
    assert SqliteMetricRows.open("http://127.0.0.1:5000", run_id) is None
    assert SqliteMetricRows.open("sqlite:///:memory:", run_id) is None
    assert SqliteMetricRows.open(f"sqlite:///{tmp_path / 'absent.db'}", run_id) is None
    assert not (tmp_path / "absent.db").exists()  # looking did not create it
    assert SqliteMetricRows.open(uri, "0" * 32) is None  # no such run
    client.delete_run(run_id)
    assert SqliteMetricRows.open(uri, run_id) is None  # a deleted run takes no metrics
    client.restore_run(run_id)
    assert SqliteMetricRows.open(uri, run_id) is not None

    for change in ("ALTER TABLE metrics ADD COLUMN dataset TEXT", "ALTER TABLE latest_metrics ADD COLUMN dataset TEXT"):
        copy = tmp_path / "changed.db"
        shutil.copy(sqlite_path(uri), copy)
        with sqlite3.connect(copy) as connection:
            connection.execute(change)
        assert SqliteMetricRows.open(f"sqlite:///{copy}", run_id) is None, change

    copy = tmp_path / "rekeyed.db"
    with sqlite3.connect(copy) as connection:  # the right columns, keyed otherwise: the upsert would not find its row
        connection.execute("CREATE TABLE runs (run_uuid TEXT, lifecycle_stage TEXT)")
        connection.execute("INSERT INTO runs VALUES (?, 'active')", (run_id,))
        connection.execute("CREATE TABLE metrics (key TEXT, value REAL, timestamp INTEGER, step INTEGER, is_nan INTEGER, run_uuid TEXT)")
        connection.execute("CREATE TABLE latest_metrics (key TEXT, value REAL, timestamp INTEGER, step INTEGER, is_nan INTEGER, run_uuid TEXT, PRIMARY KEY (run_uuid, key, step))")
    assert SqliteMetricRows.open(f"sqlite:///{copy}", run_id) is None


def test_the_recorder_writes_rows_where_it_can_and_keeps_a_refused_batch(store, tmp_path):
    uri, client, _ = store
    run_id = _run(store)
    assert MlflowRecorder(client, run_id).writer == "log_batch"  # no URI given: MLflow's own call
    recorder = MlflowRecorder(client, run_id, batch_size=3, tracking_uri=uri, send_every=0)
    assert recorder.writer == "sqlite rows"
    recorder.log_metrics({"a": 1.0, "b": 2.0}, 10)
    assert recorder.unsent == 2  # the queue is not full yet
    recorder.log_metric_columns([20, 30], {"a": [3.0, 5.0], "b": [4.0, 6.0]})  # full: the whole queue goes, in one write
    assert recorder.unsent == 0 and recorder.batches_sent == 1
    assert _latest(client, run_id) == {"a": 5.0, "b": 6.0}
    assert [(m.step, m.value) for m in client.get_metric_history(run_id, "b")] == [(10, 2.0), (20, 4.0), (30, 6.0)]

    recorder.rows.path = tmp_path / "not-a-store.db"
    (tmp_path / "not-a-store.db").write_text("")
    recorder.log_metrics({"a": 5.0}, 30)
    recorder.flush()
    assert recorder.unsent == 1 and "OperationalError" in recorder.last_error  # kept for a later flush


def test_a_full_queue_waits_for_its_time_unless_it_grows_long(store):
    uri, client, _ = store
    run_id = _run(store)
    recorder = MlflowRecorder(client, run_id, batch_size=3, tracking_uri=uri, send_every=3600)
    recorder.log_metric_columns([1, 2], {"a": [1.0, 2.0], "b": [3.0, 4.0]})
    assert recorder.unsent == 4  # full, but sent less than an hour ago
    recorder.log_metric_columns(list(range(3, 76)), {"a": [0.0] * 73, "b": [0.0] * 73})
    assert recorder.unsent == 0 and recorder.batches_sent == 1  # 150 values, 50 batches: sent whatever the time
    assert len(client.get_metric_history(run_id, "a")) == 75
    through_mlflow = MlflowRecorder(client, _run(store), batch_size=3, send_every=3600)
    through_mlflow.log_metric_columns([1, 2], {"a": [1.0, 2.0], "b": [3.0, 4.0]})
    assert through_mlflow.unsent == 0 and through_mlflow.batches_sent == 2  # log_batch: a full queue goes at once, 3 values a call


def test_a_resumed_run_does_not_send_a_step_twice(store):
    uri, client, _ = store
    run_id = _run(store)
    for recorder in (MlflowRecorder(client, run_id, tracking_uri=uri, already_logged={("a", 2)}), MlflowRecorder(client, run_id, already_logged={("a", 2)})):
        recorder.log_metric_columns([1, 2, 3], {"a": [1.0, 2.0, 3.0], "b": [4.0, 5.0, 6.0]})
        recorder.log_metrics({"a": 9.0, "b": 9.5}, 2)
        assert sorted(name for name, *_ in recorder._queue) == ["a", "a", "b", "b", "b", "b"], recorder.writer
