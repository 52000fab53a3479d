"""The job store in one SQLite file (the default ``demaudit.service.store.jobs.JobStore``).

One connection shared under a lock, WAL journal; the schedules' tables live in the same file
(``demaudit.service.store.sqlite_schedules``). Columns added since the first jobs table are
added when an older file is opened.
"""

from __future__ import annotations

import datetime as dt
import json
import sqlite3
import threading
from collections.abc import Collection, Mapping
from pathlib import Path
from typing import Any

from demaudit.service.store.jobs import (
    FAILED,
    JOB_COLUMNS,
    STATUSES,
    JobRecord,
    JobStatus,
    Lease,
    check_changes,
    utc_now,
)
from demaudit.service.store.sqlite_schedules import SCHEDULE_SCHEMA, SqliteSchedules

__all__ = ["SqliteJobStore"]

_SCHEMA = """
CREATE TABLE IF NOT EXISTS jobs (
    job_id      TEXT PRIMARY KEY,
    process_id  TEXT NOT NULL,
    status      TEXT NOT NULL,
    message     TEXT NOT NULL,
    created     TEXT NOT NULL,
    updated     TEXT NOT NULL,
    started     TEXT,
    finished    TEXT,
    progress    INTEGER NOT NULL DEFAULT 0,
    tiles_done  INTEGER NOT NULL DEFAULT 0,
    tiles_total INTEGER NOT NULL DEFAULT 0,
    inputs      TEXT NOT NULL,
    schedule_id TEXT,
    notification TEXT,
    owner       TEXT,
    runner_instance TEXT,
    cause       TEXT
);
CREATE INDEX IF NOT EXISTS jobs_status_created ON jobs (status, created);
CREATE INDEX IF NOT EXISTS jobs_created ON jobs (created);
CREATE TABLE IF NOT EXISTS probes (name TEXT PRIMARY KEY, at TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runner_instances (
    instance TEXT PRIMARY KEY,
    host     TEXT NOT NULL,
    pid      INTEGER NOT NULL,
    expires  TEXT NOT NULL
);
"""
_ADDED_COLUMNS = {
    "schedule_id": "TEXT",
    "notification": "TEXT",
    "owner": "TEXT",
    "runner_instance": "TEXT",
    "cause": "TEXT",
}
"""Columns newer than the first jobs table: added when an older file is opened (older jobs have
no owner: only admins see them)."""
_LATER_INDEXES = "CREATE INDEX IF NOT EXISTS jobs_owner_created ON jobs (owner, created);"
"""Indexes on added columns (made once the columns exist)."""
_TIMES = ("created", "updated", "started", "finished")
_JSON = ("inputs", "notification")


class SqliteJobStore(SqliteSchedules):
    """Records in one SQLite file (WAL journal); one connection shared under a lock."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._lock = threading.Lock()
        self._db = sqlite3.connect(self.path, check_same_thread=False, isolation_level=None)
        self._db.row_factory = sqlite3.Row
        with self._lock:
            self._db.execute("PRAGMA journal_mode=WAL")
            self._db.execute("PRAGMA busy_timeout=5000")
            self._db.executescript(_SCHEMA + SCHEDULE_SCHEMA)
            present = {row[1] for row in self._db.execute("PRAGMA table_info(jobs)")}
            for name, kind in _ADDED_COLUMNS.items():
                if name not in present:
                    self._db.execute(f"ALTER TABLE jobs ADD COLUMN {name} {kind}")
            self._db.executescript(_LATER_INDEXES)
            self._upgrade_schedules()

    def add(self, record: JobRecord) -> None:
        row = _to_row(record)
        names = ", ".join(row)
        marks = ", ".join("?" for _ in row)
        with self._lock:
            self._db.execute(f"INSERT INTO jobs ({names}) VALUES ({marks})", tuple(row.values()))

    def get(self, job_id: str) -> JobRecord | None:
        with self._lock:
            row = self._db.execute("SELECT * FROM jobs WHERE job_id = ?", (job_id,)).fetchone()
        return None if row is None else _from_row(row)

    def update(
        self,
        job_id: str,
        changes: Mapping[str, Any],
        *,
        only_from: Collection[JobStatus] | None = None,
    ) -> JobRecord | None:
        check_changes(changes)
        values = {k: _encode(k, v) for k, v in {"updated": utc_now(), **changes}.items()}
        sql = "UPDATE jobs SET " + ", ".join(f"{k} = ?" for k in values) + " WHERE job_id = ?"
        params: list[Any] = [*values.values(), job_id]
        if only_from is not None:
            statuses = list(only_from)
            sql += f" AND status IN ({', '.join('?' for _ in statuses)})"
            params += statuses
        with self._lock:
            if self._db.execute(sql, params).rowcount == 0:
                return None
            row = self._db.execute("SELECT * FROM jobs WHERE job_id = ?", (job_id,)).fetchone()
        return _from_row(row)

    def find(
        self,
        *,
        statuses: Collection[JobStatus] | None = None,
        limit: int = 10,
        offset: int = 0,
        owner: str | None = None,
    ) -> list[JobRecord]:
        where, params = _status_filter(statuses, owner)
        sql = f"SELECT * FROM jobs{where} ORDER BY created DESC, job_id DESC LIMIT ? OFFSET ?"
        with self._lock:
            rows = self._db.execute(sql, [*params, limit, offset]).fetchall()
        return [_from_row(r) for r in rows]

    def count(
        self, *, statuses: Collection[JobStatus] | None = None, owner: str | None = None
    ) -> int:
        where, params = _status_filter(statuses, owner)
        with self._lock:
            (n,) = self._db.execute(f"SELECT COUNT(*) FROM jobs{where}", params).fetchone()
        return int(n)

    def count_by_status(self) -> dict[JobStatus, int]:
        counts = dict.fromkeys(STATUSES, 0)
        with self._lock:
            rows = self._db.execute("SELECT status, COUNT(*) FROM jobs GROUP BY status").fetchall()
        for status, n in rows:
            if status in counts:
                counts[status] = int(n)
        return counts

    def tiles_done_total(self) -> int:
        with self._lock:
            (n,) = self._db.execute("SELECT COALESCE(SUM(tiles_done), 0) FROM jobs").fetchone()
        return int(n)

    def fail_unfinished(self, status: JobStatus, message: str) -> list[str]:
        now = _encode("finished", utc_now())
        with self._lock:
            ids = [
                r[0]
                for r in self._db.execute(
                    "SELECT job_id FROM jobs WHERE status = ?", (status,)
                ).fetchall()
            ]
            self._db.execute(
                "UPDATE jobs SET status = ?, message = ?, finished = ?, updated = ? "
                "WHERE status = ?",
                (FAILED, message, now, now, status),
            )
        return ids

    def check_writable(self) -> None:
        at = utc_now().isoformat(timespec="milliseconds")
        with self._lock:
            self._db.execute(
                "INSERT INTO probes (name, at) VALUES ('ready', ?) "
                "ON CONFLICT (name) DO UPDATE SET at = excluded.at",
                (at,),
            )

    def renew_lease(self, lease: Lease) -> None:
        expires = lease.expires.isoformat(timespec="milliseconds")
        with self._lock:
            self._db.execute(
                "INSERT INTO runner_instances (instance, host, pid, expires) VALUES (?, ?, ?, ?) "
                "ON CONFLICT (instance) DO UPDATE SET expires = excluded.expires",
                (lease.instance, lease.host, lease.pid, expires),
            )

    def drop_lease(self, instance: str) -> None:
        with self._lock:
            self._db.execute("DELETE FROM runner_instances WHERE instance = ?", (instance,))

    def leases(self) -> list[Lease]:
        with self._lock:
            rows = self._db.execute(
                "SELECT instance, host, pid, expires FROM runner_instances"
            ).fetchall()
        return [Lease(r[0], r[1], int(r[2]), dt.datetime.fromisoformat(r[3])) for r in rows]

    def close(self) -> None:
        with self._lock:
            self._db.close()


def _status_filter(
    statuses: Collection[JobStatus] | None, owner: str | None = None
) -> tuple[str, list[Any]]:
    clauses: list[str] = []
    params: list[Any] = []
    if statuses is not None:
        chosen = list(statuses)
        clauses.append(f"status IN ({', '.join('?' for _ in chosen)})" if chosen else "0")
        params += chosen
    if owner is not None:
        clauses.append("owner = ?")
        params.append(owner)
    return (" WHERE " + " AND ".join(clauses) if clauses else ""), params


def _encode(name: str, value: Any) -> Any:
    if name in _TIMES:
        return None if value is None else value.isoformat(timespec="milliseconds")
    if name in _JSON:
        return None if value is None else json.dumps(value, sort_keys=True)
    return value


def _to_row(record: JobRecord) -> dict[str, Any]:
    return {name: _encode(name, getattr(record, name)) for name in JOB_COLUMNS}


def _from_row(row: sqlite3.Row) -> JobRecord:
    values: dict[str, Any] = {}
    for name in JOB_COLUMNS:
        raw = row[name]
        if name in _TIMES:
            values[name] = None if raw is None else dt.datetime.fromisoformat(raw)
        elif name in _JSON:
            values[name] = None if raw is None else json.loads(raw)
        else:
            values[name] = raw
    return JobRecord(**values)
