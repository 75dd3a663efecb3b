"""Metric values written straight into an MLflow SQLite store, the rows ``log_batch`` would write.

MLflow's own ``log_batch`` builds an ORM object per value and flushes it through
SQLAlchemy: about 100 to 150 microseconds a value on a SQLite store, which on a
one-second training run is more than the run itself. For a SQLite store this module
writes the same rows with the standard library's ``sqlite3``, one transaction a batch:
each value into ``metrics`` (an identical row is skipped, as MLflow skips it) and each
key's newest value into ``latest_metrics`` (newest by step, then timestamp, then
value, MLflow's own order). NaN is stored as 0 with ``is_nan`` set and infinities as
the largest finite doubles, as MLflow stores them.

It writes only where it can prove the store is one it knows: a ``sqlite:`` URI, a
SQLite library with upserts (3.24 or later), the two tables with exactly MLflow's
columns, ``latest_metrics`` keyed by (key, run), and the run active. Anything else and
:meth:`SqliteMetricRows.open` answers ``None`` and the recorder sends through
``log_batch``. MLflow's read API (metric histories, a run's latest metrics, searches
ordered by a metric) reads these rows like its own; ``tests/unit/test_sqlite_metrics.py``
checks it against ``log_batch`` value for value.
"""

from __future__ import annotations

import sqlite3
from math import isfinite, isnan
from pathlib import Path
from typing import Sequence

__all__ = ["SqliteMetricRows", "MetricRow"]

# (key, value, timestamp in ms, step): what the recorder queues.
MetricRow = tuple[str, float, int, int]

_COLUMNS = {"key", "value", "timestamp", "step", "is_nan", "run_uuid"}
_LARGEST = 1.7976931348623157e308  # MLflow's stand-in for an infinity: SQL has none
_MIN_SQLITE = (3, 24, 0)  # INSERT ... ON CONFLICT DO UPDATE

_INSERT = "INSERT OR IGNORE INTO metrics (key, value, timestamp, step, is_nan, run_uuid) VALUES (?, ?, ?, ?, ?, ?)"
_LATEST = (
    "INSERT INTO latest_metrics (key, value, timestamp, step, is_nan, run_uuid) VALUES (?, ?, ?, ?, ?, ?) "
    "ON CONFLICT (key, run_uuid) DO UPDATE SET value = excluded.value, timestamp = excluded.timestamp, step = excluded.step, is_nan = excluded.is_nan "
    "WHERE (excluded.step, excluded.timestamp, excluded.value) > (latest_metrics.step, latest_metrics.timestamp, latest_metrics.value)"
)


def sqlite_path(tracking_uri: str) -> Path | None:
    """The database file of a ``sqlite:///`` tracking URI; ``None`` for any other store (or an in-memory one)."""
    if not tracking_uri.startswith("sqlite:"):
        return None
    from sqlalchemy.engine import make_url

    database = make_url(tracking_uri).database
    if not database or database == ":memory:":
        return None
    return Path(database)


class SqliteMetricRows:
    """Writes a run's metric values into its SQLite store, one short transaction a batch."""

    def __init__(self, path: Path, run_id: str):
        self.path = path
        self.run_id = run_id

    @classmethod
    def open(cls, tracking_uri: str, run_id: str) -> SqliteMetricRows | None:
        """A writer for this run's store, or ``None`` where only ``log_batch`` is safe."""
        path = sqlite_path(tracking_uri)
        if path is None or not path.is_file() or sqlite3.sqlite_version_info < _MIN_SQLITE:
            return None
        connection = None
        try:
            connection = _connect(path)
            for table in ("metrics", "latest_metrics"):
                if {row[1] for row in connection.execute(f"PRAGMA table_info({table})")} != _COLUMNS:
                    return None
            # PRAGMA table_info's sixth field is a column's place in the primary key (0: not in it).
            latest_key = sorted((row[5], row[1]) for row in connection.execute("PRAGMA table_info(latest_metrics)") if row[5] > 0)
            if [name for _, name in latest_key] != ["key", "run_uuid"]:
                return None
            stage = connection.execute("SELECT lifecycle_stage FROM runs WHERE run_uuid = ?", (run_id,)).fetchone()
            if stage is None or stage[0] != "active":
                return None
        except sqlite3.Error:
            return None
        finally:
            if connection is not None:
                connection.close()
        return cls(path, run_id)

    def write(self, rows: Sequence[MetricRow]) -> None:
        """Store the rows and move each key's latest value forward; all or nothing (raises ``sqlite3.Error``)."""
        if not rows:
            return
        run = self.run_id
        values = [(key, value, timestamp, step, False, run) if isfinite(value) else _non_finite_row(key, value, timestamp, step, run) for key, value, timestamp, step in rows]
        newest: dict[str, tuple] = {}
        for row in values:
            # The first of equals stays, as in MLflow's own comparison (strictly newer replaces).
            held = newest.get(row[0])
            if held is None or row[3] > held[3] or (row[3] == held[3] and (row[2], row[1]) > (held[2], held[1])):
                newest[row[0]] = row
        connection = _connect(self.path)
        try:
            connection.execute("BEGIN IMMEDIATE")
            connection.executemany(_INSERT, values)
            connection.executemany(_LATEST, list(newest.values()))
            connection.execute("COMMIT")
        except BaseException:
            if connection.in_transaction:
                connection.execute("ROLLBACK")
            raise
        finally:
            connection.close()


def _non_finite_row(key: str, value: float, timestamp: int, step: int, run: str) -> tuple:
    """A NaN or an infinity as MLflow stores it (SQL has neither): NaN as 0 with ``is_nan`` set, an infinity as the largest double of its sign."""
    if isnan(value):
        return (key, 0.0, timestamp, step, True, run)
    return (key, _LARGEST if value > 0 else -_LARGEST, timestamp, step, False, run)


def _connect(path: Path) -> sqlite3.Connection:
    # Autocommit mode, transactions begun by hand; a sweep's parallel jobs share the file, so wait for a lock.
    return sqlite3.connect(str(path), timeout=30.0, isolation_level=None)

