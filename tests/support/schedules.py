"""Test helpers: times in November 2026 (UTC) and schedule records."""

from __future__ import annotations

import datetime as dt
from typing import Any

from demaudit.service.store.schedules import ScheduleRecord

UTC = dt.UTC


def at(day: int, hour: int = 0, minute: int = 0, second: int = 0) -> dt.datetime:
    """A time in November 2026, UTC (2 November is a Monday)."""
    return dt.datetime(2026, 11, day, hour, minute, second, tzinfo=UTC)


def schedule(cron: str = "0 2 * * *", created: dt.datetime | None = None, **extra: Any):
    return ScheduleRecord(
        schedule_id=extra.pop("schedule_id", "s1"),
        name="nightly",
        cron=cron,
        inputs={"name": "unit-job"},
        created=created or at(1, 12),
        **extra,
    )
