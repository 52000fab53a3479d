"""The schedules' tables in the job store's SQLite file (``SqliteSchedules``, a mixin of
``demaudit.service.store.sqlite_jobs.SqliteJobStore``: its connection and lock)."""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as dt
import json
import sqlite3
import threading
from collections.abc import Iterator
from typing import Any

from demaudit.service.store.schedules import (
    DEFAULT_TIMEZONE,
    RunOutcome,
    ScheduleRecord,
    ScheduleRun,
    utc_now,
)

__all__ = ["SCHEDULE_ADDED_COLUMNS", "SCHEDULE_SCHEMA", "SqliteSchedules"]

SCHEDULE_SCHEMA = """
CREATE TABLE IF NOT EXISTS schedules (
    schedule_id TEXT PRIMARY KEY,
    name        TEXT NOT NULL,
    cron        TEXT NOT NULL,
    timezone    TEXT NOT NULL DEFAULT 'UTC',
    inputs      TEXT NOT NULL,
    created     TEXT NOT NULL,
    webhook     TEXT,
    notify      TEXT NOT NULL,
    baseline    TEXT,
    base_url    TEXT,
    last_slot   TEXT,
    last_job_id TEXT,
    owner       TEXT,
    webhook_secret TEXT
);
CREATE TABLE IF NOT EXISTS schedule_runs (
    schedule_id TEXT NOT NULL,
    slot        TEXT NOT NULL,
    outcome     TEXT NOT NULL,
    owner       TEXT NOT NULL,
    recorded    TEXT NOT NULL,
    job_id      TEXT,
    reason      TEXT NOT NULL DEFAULT '',
    PRIMARY KEY (schedule_id, slot)
);
CREATE TABLE IF NOT EXISTS leases (
    name    TEXT PRIMARY KEY,
    owner   TEXT NOT NULL,
    expires REAL NOT NULL
);
"""
"""Tables of the schedules (run by ``SqliteJobStore`` beside its own)."""
SCHEDULE_ADDED_COLUMNS = {
    "timezone": f"TEXT NOT NULL DEFAULT '{DEFAULT_TIMEZONE}'",
    "owner": "TEXT",
    "webhook_secret": "TEXT",
}
"""Columns newer than the first schedules table: added when an older file is opened (its
schedules were all made in UTC, the default; they have no owner, so only admins see them, and
no webhook secret, so their deliveries go unsigned)."""

_SCHEDULE_COLUMNS = tuple(f.name for f in dataclasses.fields(ScheduleRecord))
_RUN_COLUMNS = tuple(f.name for f in dataclasses.fields(ScheduleRun))
_TIMES = frozenset({"created", "last_slot", "slot", "recorded"})


class SqliteSchedules:
    """Schedules in SQLite tables (mixin of ``SqliteJobStore``: its connection and lock).

    Times are stored as UTC text to the millisecond (equal times compare equal in SQL), lease
    expiries as POSIX seconds.
    """

    _db: sqlite3.Connection
    _lock: threading.Lock

    def _upgrade_schedules(self) -> None:
        """Add the columns an older file's schedules table lacks (SCHEDULE_ADDED_COLUMNS); call
        with the lock held, after SCHEDULE_SCHEMA. In one write transaction, so two processes
        opening the same old file do not both add a column."""
        with self._transaction():
            present = {row[1] for row in self._db.execute("PRAGMA table_info(schedules)")}
            for name, kind in SCHEDULE_ADDED_COLUMNS.items():
                if name not in present:
                    self._db.execute(f"ALTER TABLE schedules ADD COLUMN {name} {kind}")

    def add_schedule(self, schedule: ScheduleRecord) -> None:
        row = {name: _encode(name, getattr(schedule, name)) for name in _SCHEDULE_COLUMNS}
        sql = f"INSERT INTO schedules ({', '.join(row)}) VALUES ({', '.join('?' for _ in row)})"
        with self._lock:
            self._db.execute(sql, tuple(row.values()))

    def get_schedule(self, schedule_id: str) -> ScheduleRecord | None:
        sql = "SELECT * FROM schedules WHERE schedule_id = ?"
        with self._lock:
            row = self._db.execute(sql, (schedule_id,)).fetchone()
        return None if row is None else ScheduleRecord(**_decode(row, _SCHEDULE_COLUMNS))

    def find_schedules(
        self, *, limit: int = 100, offset: int = 0, owner: str | None = None
    ) -> list[ScheduleRecord]:
        where, params = _owner_filter(owner)
        sql = f"SELECT * FROM schedules{where} ORDER BY created, schedule_id LIMIT ? OFFSET ?"
        with self._lock:
            rows = self._db.execute(sql, (*params, limit, offset)).fetchall()
        return [ScheduleRecord(**_decode(r, _SCHEDULE_COLUMNS)) for r in rows]

    def count_schedules(self, *, owner: str | None = None) -> int:
        where, params = _owner_filter(owner)
        with self._lock:
            (n,) = self._db.execute(f"SELECT COUNT(*) FROM schedules{where}", params).fetchone()
        return int(n)

    def remove_schedule(self, schedule_id: str) -> bool:
        with self._lock, self._transaction():
            self._db.execute("DELETE FROM schedule_runs WHERE schedule_id = ?", (schedule_id,))
            deleted = self._db.execute(
                "DELETE FROM schedules WHERE schedule_id = ?", (schedule_id,)
            ).rowcount
        return bool(deleted)

    def acquire_lease(self, name: str, owner: str, *, now: dt.datetime, ttl_s: float) -> bool:
        # one statement: insert, or take over when the lease is ours or expired; else no change
        sql = (
            "INSERT INTO leases (name, owner, expires) VALUES (?, ?, ?) "
            "ON CONFLICT (name) DO UPDATE SET owner = excluded.owner, expires = excluded.expires "
            "WHERE leases.owner = excluded.owner OR leases.expires <= ?"
        )
        stamp = now.timestamp()
        with self._lock:
            changed = self._db.execute(sql, (name, owner, stamp + ttl_s, stamp)).rowcount
        return bool(changed)

    def release_lease(self, name: str, owner: str) -> None:
        with self._lock:
            self._db.execute("DELETE FROM leases WHERE name = ? AND owner = ?", (name, owner))

    def claim_slot(
        self,
        schedule_id: str,
        slot: dt.datetime,
        *,
        previous: dt.datetime | None,
        owner: str,
        lease: str,
        now: dt.datetime,
    ) -> ScheduleRun | None:
        claim = (
            "UPDATE schedules SET last_slot = ? WHERE schedule_id = ? AND last_slot IS ? "
            "AND EXISTS (SELECT 1 FROM leases WHERE name = ? AND owner = ? AND expires > ?)"
        )
        params = (_encode("slot", slot), schedule_id, _encode("slot", previous), lease, owner)
        run = ScheduleRun(schedule_id, slot, "claimed", owner, utc_now())
        row = {name: _encode(name, getattr(run, name)) for name in _RUN_COLUMNS}
        insert = (
            f"INSERT INTO schedule_runs ({', '.join(row)}) VALUES ({', '.join('?' for _ in row)})"
        )
        with self._lock, self._transaction():
            if self._db.execute(claim, (*params, now.timestamp())).rowcount == 0:
                return None
            self._db.execute(insert, tuple(row.values()))
        return run

    def record_run(
        self,
        schedule_id: str,
        slot: dt.datetime,
        *,
        outcome: RunOutcome,
        job_id: str | None = None,
        reason: str = "",
    ) -> None:
        recorded = _encode("recorded", utc_now())
        with self._lock, self._transaction():
            self._db.execute(
                "UPDATE schedule_runs SET outcome = ?, job_id = ?, reason = ?, recorded = ? "
                "WHERE schedule_id = ? AND slot = ?",
                (outcome, job_id, reason, recorded, schedule_id, _encode("slot", slot)),
            )
            if job_id is not None:
                self._db.execute(
                    "UPDATE schedules SET last_job_id = ? WHERE schedule_id = ?",
                    (job_id, schedule_id),
                )

    def find_runs(self, schedule_id: str, *, limit: int = 20) -> list[ScheduleRun]:
        sql = "SELECT * FROM schedule_runs WHERE schedule_id = ? ORDER BY slot DESC LIMIT ?"
        with self._lock:
            rows = self._db.execute(sql, (schedule_id, limit)).fetchall()
        return [ScheduleRun(**_decode(r, _RUN_COLUMNS)) for r in rows]

    @contextlib.contextmanager
    def _transaction(self) -> Iterator[None]:
        """BEGIN IMMEDIATE ... COMMIT (ROLLBACK on error); call with the lock held."""
        self._db.execute("BEGIN IMMEDIATE")
        try:
            yield
        except BaseException:
            self._db.execute("ROLLBACK")
            raise
        self._db.execute("COMMIT")


def _owner_filter(owner: str | None) -> tuple[str, tuple[str, ...]]:
    return ("", ()) if owner is None else (" WHERE owner = ?", (owner,))


def _encode(name: str, value: Any) -> Any:
    if value is None:
        return None
    if name in _TIMES:
        return value.astimezone(dt.UTC).isoformat(timespec="milliseconds")
    if name == "inputs":
        return json.dumps(value, sort_keys=True)
    return value


def _decode(row: sqlite3.Row, columns: tuple[str, ...]) -> dict[str, Any]:
    values: dict[str, Any] = {}
    for name in columns:
        raw = row[name]
        if raw is not None and name in _TIMES:
            raw = dt.datetime.fromisoformat(raw)
        elif raw is not None and name == "inputs":
            raw = json.loads(raw)
        values[name] = raw
    return values
