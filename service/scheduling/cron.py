"""Cron times of a schedule: checked expressions and time zones, the slots due, the clock.

Cron expressions have five fields (or @daily and kin) and are evaluated on the wall clock of the
schedule's IANA time zone (``timezone``, default UTC): "0 2 * * *" in Europe/Oslo runs at 02:00
local time in winter and in summer. Slots are stored and compared as UTC times. Where the clocks
change, slots follow cron's custom: a time the clocks skip in spring (02:30 on the night they jump
from 02:00 to 03:00) runs when they jump, at 03:00; a time that comes twice in autumn runs once,
at its first occurrence, when the minute and hour fields are fixed, while schedules with ``*`` in
the minute or hour field (every 15 minutes, hourly) follow real time and run in both repeated
hours.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterator
from itertools import islice, takewhile
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from croniter import CroniterBadDateError, croniter

from demaudit.service.store.schedules import DEFAULT_TIMEZONE, ScheduleRecord

__all__ = [
    "CRON_ALIASES",
    "Clock",
    "check_cron",
    "check_timezone",
    "due_runs",
    "latest_slot",
    "missed_slots",
    "next_slot",
    "scaled_clock",
]

CRON_ALIASES = frozenset(
    {"@yearly", "@annually", "@monthly", "@weekly", "@daily", "@midnight", "@hourly"}
)
MISSED_COUNT_LIMIT = 1000

Clock = Callable[[], dt.datetime]
"""The current time, UTC-aware."""


def check_cron(expression: str) -> str:
    """The expression, stripped, if it is a five-field cron expression (or an alias such as
    @daily) with a next time; else ValueError saying why."""
    text = " ".join(expression.split())
    if text.startswith("@"):
        if text.lower() not in CRON_ALIASES:
            raise ValueError(f"unknown cron alias; use one of {', '.join(sorted(CRON_ALIASES))}")
    elif len(text.split()) != 5:
        raise ValueError("a cron expression has five fields: minute hour day month weekday")
    if not croniter.is_valid(text):
        raise ValueError("not a valid cron expression")
    if next_slot(text, dt.datetime(2000, 1, 1, tzinfo=dt.UTC)) is None:
        raise ValueError("the cron expression never matches a date")
    return text


def check_timezone(name: str) -> str:
    """The name, stripped, if it is an IANA time zone the tz database knows (Europe/Oslo, UTC);
    else ValueError naming it. 'localtime' is refused: it means whatever zone the server happens
    to be set to, so a schedule's times would move with the machine."""
    text = name.strip()
    if text == "localtime":
        raise ValueError(
            f"time zone {name!r} depends on the server's settings; name the zone, e.g. Europe/Oslo"
        )
    try:
        ZoneInfo(text)
    except (ZoneInfoNotFoundError, ValueError, OSError):  # unknown, malformed, a folder
        raise ValueError(
            f"unknown time zone {name!r}; use an IANA name such as Europe/Oslo or UTC"
        ) from None
    return text


def latest_slot(
    cron: str, now: dt.datetime, *, timezone: str = DEFAULT_TIMEZONE
) -> dt.datetime | None:
    """The latest slot at or before now (UTC), or None when there is none."""
    try:
        # croniter looks strictly before its start: one microsecond later includes now itself
        return next(_slots(cron, now + dt.timedelta(microseconds=1), timezone, backward=True))
    except CroniterBadDateError:
        return None


def next_slot(
    cron: str, after: dt.datetime, *, timezone: str = DEFAULT_TIMEZONE
) -> dt.datetime | None:
    """The first slot strictly after after (UTC), or None when there is none."""
    try:
        return next(_slots(cron, after, timezone))
    except CroniterBadDateError:
        return None


def due_runs(
    schedule: ScheduleRecord, last_run: dt.datetime | None, now: dt.datetime
) -> list[dt.datetime]:
    """The slots of schedule to run at now, given the last slot handled (None: none yet).

    A slot is due when it lies after the schedule's creation and after last_run, and not after
    now. However many are due, only the latest is returned: a server that was down catches up
    with one run, not one per missed slot.
    """
    after = last_run if last_run is not None else schedule.created
    latest = latest_slot(schedule.cron, now, timezone=schedule.timezone)
    if latest is None or latest <= _utc(after):
        return []
    return [latest]


def missed_slots(
    cron: str, after: dt.datetime, latest: dt.datetime, *, timezone: str = DEFAULT_TIMEZONE
) -> int:
    """How many slots lie strictly between after and latest (counted up to a limit)."""
    slots = islice(_slots(cron, after, timezone), MISSED_COUNT_LIMIT)
    return sum(1 for _ in takewhile(lambda slot: slot < latest, slots))


def _slots(
    cron: str, start: dt.datetime, timezone: str, *, backward: bool = False
) -> Iterator[dt.datetime]:
    """The slots of cron strictly after start (before it, backward), as UTC times: its times on
    the wall clock of timezone, a fixed time of day once on the night it comes twice.

    croniter gives both occurrences of a repeated wall-clock time (and CroniterBadDateError
    when it runs out of times); the second is dropped here unless the schedule follows real
    time (see _follows_real_time).
    """
    zone = ZoneInfo(timezone)
    times = croniter(cron, _utc(start).astimezone(zone))
    step = times.get_prev if backward else times.get_next
    keep_repeats = _follows_real_time(cron)
    while True:
        slot = step(dt.datetime).astimezone(dt.UTC)
        if keep_repeats or not _second_occurrence(slot, zone):
            yield slot


def _follows_real_time(cron: str) -> bool:
    """Whether cron has * in its minute or hour field (every 15 minutes, hourly, @hourly): such
    schedules run in both hours the clocks repeat, as cron runs them; fixed times run once."""
    if cron.startswith("@"):
        return cron.lower() == "@hourly"
    minute, hour = cron.split()[:2]
    return minute.startswith("*") or hour.startswith("*")


def _second_occurrence(slot: dt.datetime, zone: ZoneInfo) -> bool:
    """Whether slot's wall-clock time in zone came already an hour (the offset change) earlier:
    the repeated hour after the clocks go back. (croniter's own fold flags are unreliable, so
    the instant is converted afresh.)"""
    return slot.astimezone(zone).fold == 1


def scaled_clock(*, speed: float = 1.0, anchor: dt.datetime | None = None) -> Clock:
    """The UTC clock; with speed > 1 (tests), a clock running speed times faster than real time
    from anchor on, identical in every process given the same anchor and speed."""
    if speed == 1.0 or anchor is None:
        return lambda: dt.datetime.now(dt.UTC)
    origin = _utc(anchor)
    return lambda: origin + (dt.datetime.now(dt.UTC) - origin) * speed


def _utc(moment: dt.datetime) -> dt.datetime:
    if moment.tzinfo is None:
        raise ValueError("scheduler times must be timezone-aware")
    return moment.astimezone(dt.UTC)
