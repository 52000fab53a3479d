"""Cron times of a schedule with a frozen clock: the slots due, checked expressions and time
zones, and the wall clock of a zone across daylight-saving changes."""

from __future__ import annotations

import datetime as dt
from zoneinfo import ZoneInfo

import pytest
from croniter import croniter
from hypothesis import given, settings
from hypothesis import strategies as st

from demaudit.service.scheduling.cron import (
    check_cron,
    check_timezone,
    due_runs,
    latest_slot,
    next_slot,
)
from demaudit.service.scheduling.scheduler import LastRun, Run, plan
from demaudit.service.store.schedules import ScheduleRecord
from tests.support.schedules import UTC, at, schedule

# --- due_runs with a frozen clock -------------------------------------------------------------


@pytest.mark.parametrize(
    ("cron", "created", "last_run", "now", "due"),
    [
        # nightly at 02:00: nothing before the first slot, the slot itself, and later that hour
        ("0 2 * * *", at(1, 12), None, at(2, 1, 59, 59), []),
        ("0 2 * * *", at(1, 12), None, at(2, 2), [at(2, 2)]),
        ("0 2 * * *", at(1, 12), None, at(2, 2, 30), [at(2, 2)]),
        ("0 2 * * *", at(1, 12), at(2, 2), at(2, 23, 59), []),
        ("0 2 * * *", at(1, 12), at(2, 2), at(3, 2), [at(3, 2)]),
        # every 15 minutes
        ("*/15 * * * *", at(1, 10, 7), None, at(1, 10, 14, 59), []),
        ("*/15 * * * *", at(1, 10, 7), None, at(1, 10, 15), [at(1, 10, 15)]),
        ("*/15 * * * *", at(1, 10, 7), at(1, 10, 15), at(1, 10, 29), []),
        # weekdays at 06:30: created on Friday after the slot, nothing on the weekend
        ("30 6 * * 1-5", at(6, 7), None, at(8, 23), []),
        ("30 6 * * 1-5", at(6, 7), None, at(9, 6, 30), [at(9, 6, 30)]),
        # aliases and monthly
        ("@hourly", at(1, 10, 30), None, at(1, 11, 0, 1), [at(1, 11)]),
        ("0 0 1 * *", at(1, 0, 0, 1), None, at(30, 23, 59), []),
        (
            "0 0 1 * *",
            at(1, 0, 0, 1),
            None,
            dt.datetime(2026, 12, 1, tzinfo=UTC),
            [dt.datetime(2026, 12, 1, tzinfo=UTC)],
        ),
    ],
)
def test_due_runs_at_the_cron_times(cron, created, last_run, now, due):
    assert due_runs(schedule(cron, created), last_run, now) == due


def test_no_run_before_the_first_slot_after_creation():
    """A schedule created at 02:00 exactly does not run that slot: its first is the next night."""
    created_at_slot = schedule("0 2 * * *", at(2, 2))
    assert due_runs(created_at_slot, None, at(2, 2)) == []
    assert due_runs(created_at_slot, None, at(3, 1, 59)) == []
    assert due_runs(created_at_slot, None, at(3, 2)) == [at(3, 2)]


CRONS = ["0 2 * * *", "*/7 * * * *", "15 */3 * * *", "0 0 * * 0", "30 6 * * 1-5", "@daily"]


@settings(max_examples=200, deadline=None)
@given(
    cron=st.sampled_from(CRONS),
    created=st.datetimes(
        min_value=dt.datetime(2026, 1, 1),
        max_value=dt.datetime(2026, 12, 1),
        timezones=st.just(UTC),
    ),
    wait=st.timedeltas(min_value=dt.timedelta(0), max_value=dt.timedelta(days=20)),
)
def test_due_runs_gives_the_latest_cron_time_after_creation(cron, created, wait):
    now = created + wait
    due = due_runs(schedule(cron, created), None, now)
    assert len(due) <= 1
    latest = latest_slot(cron, now)
    assert latest is not None and latest <= now
    assert croniter.match(cron, latest)
    assert croniter(cron, latest).get_next(dt.datetime) > now  # nothing later is due
    assert due == ([latest] if latest > created else [])


@pytest.mark.parametrize("good", ["0 2 * * *", " 0  2 * * * ", "*/5 * * * 1-5", "@daily"])
def test_check_cron_accepts_five_fields_and_aliases(good):
    assert check_cron(good) == " ".join(good.split())


@pytest.mark.parametrize(
    ("bad", "why"),
    [
        ("0 2 * *", "five fields"),
        ("0 0 2 * * *", "five fields"),  # seconds are not for nightly checks
        ("61 2 * * *", "not a valid"),
        ("every night", "five fields"),
        ("@reboot", "alias"),
        ("0 0 31 2 *", "never"),
    ],
)
def test_check_cron_refuses_with_the_reason(bad, why):
    with pytest.raises(ValueError, match=why):
        check_cron(bad)


def test_naive_times_are_refused():
    with pytest.raises(ValueError, match="timezone"):
        due_runs(schedule(), None, dt.datetime(2026, 11, 2, 2))


# --- time zones: the cron read on a local wall clock ----------------------------------------------
# The expected UTC instants come from the standard library's zoneinfo (the IANA tz database),
# computed independently of croniter, which the scheduler uses.

OSLO = ZoneInfo("Europe/Oslo")


def ticked(
    sched: ScheduleRecord, start: dt.datetime, end: dt.datetime, every: dt.timedelta
) -> list[Run]:
    """The runs the scheduler starts for sched when it ticks every `every` from start to end,
    passing the last slot run on as the Scheduler does (each run ends before the next tick)."""
    runs: list[Run] = []
    last: LastRun | None = None
    now = start
    while now <= end:
        action = plan(sched, last, now)
        if action is not None:
            assert isinstance(action, Run)
            runs.append(action)
            last = LastRun(action.slot, f"job-{len(runs)}")
        now += every
    return runs


@pytest.mark.parametrize(("month", "utc_hour"), [(1, 1), (7, 0)])
def test_a_0200_schedule_in_oslo_follows_daylight_saving_time(month, utc_hour):
    """02:00 in Europe/Oslo is 01:00 UTC in January (CET, UTC+1) and 00:00 UTC in July (CEST,
    UTC+2): the schedule is due at that UTC instant, not before, and its slot is a UTC time."""
    # reference: the IANA tz database via zoneinfo
    expected = dt.datetime(2027, month, 15, 2, 0, tzinfo=ZoneInfo("Europe/Oslo")).astimezone(UTC)
    assert expected == dt.datetime(2027, month, 15, utc_hour, 0, tzinfo=UTC)
    created = dt.datetime(2027, month, 14, 12, 0, tzinfo=UTC)
    nightly = schedule("0 2 * * *", created, timezone="Europe/Oslo")
    assert due_runs(nightly, None, expected - dt.timedelta(seconds=1)) == []
    assert due_runs(nightly, None, expected) == [expected]
    assert due_runs(nightly, None, expected + dt.timedelta(hours=5)) == [expected]
    assert due_runs(nightly, None, expected)[0].tzinfo is UTC
    assert next_slot("0 2 * * *", created, timezone="Europe/Oslo") == expected
    assert latest_slot("0 2 * * *", expected, timezone="Europe/Oslo") == expected


def test_the_spring_forward_night_runs_a_skipped_time_once_when_the_clocks_jump():
    """Europe/Oslo, 28 March 2027: the clocks jump from 02:00 CET to 03:00 CEST, so 02:30 does
    not exist that night. A daily 02:30 schedule ticked every five minutes from the evening
    before to the morning after next runs once that night, at 03:00 CEST (01:00 UTC, the moment
    of the jump, as cron runs a skipped time), and once the next night at 02:30 CEST (00:30
    UTC): no run doubled, none lost, none counted as missed, no error."""
    # reference: the IANA tz database via zoneinfo; 02:30 that night reads back as 03:30
    skipped = dt.datetime(2027, 3, 28, 2, 30, tzinfo=OSLO)
    assert skipped.astimezone(UTC).astimezone(OSLO).time() == dt.time(3, 30)
    jump = dt.datetime(2027, 3, 28, 3, 0, tzinfo=OSLO).astimezone(UTC)
    next_night = dt.datetime(2027, 3, 29, 2, 30, tzinfo=OSLO).astimezone(UTC)
    assert (jump.hour, next_night.hour, next_night.minute) == (1, 0, 30)
    daily = schedule("30 2 * * *", dt.datetime(2027, 3, 27, 12, tzinfo=UTC), timezone="Europe/Oslo")
    start, end = dt.datetime(2027, 3, 27, 18, tzinfo=UTC), dt.datetime(2027, 3, 29, 12, tzinfo=UTC)
    assert ticked(daily, start, end, dt.timedelta(minutes=5)) == [Run(jump), Run(next_night)]


def test_the_fall_back_night_runs_a_repeated_time_once():
    """Europe/Oslo, 31 October 2027: the clocks go back from 03:00 CEST to 02:00 CET, so 02:30
    comes twice, at 00:30 and at 01:30 UTC. A daily 02:30 schedule ticked every five minutes
    runs once that night, at the first 02:30 (00:30 UTC); the second is no slot (not run, not
    counted as missed). The next night it runs at 02:30 CET (01:30 UTC)."""
    # reference: the IANA tz database via zoneinfo (fold=1 is the second 02:30)
    first = dt.datetime(2027, 10, 31, 2, 30, tzinfo=OSLO).astimezone(UTC)
    second = dt.datetime(2027, 10, 31, 2, 30, fold=1, tzinfo=OSLO).astimezone(UTC)
    next_night = dt.datetime(2027, 11, 1, 2, 30, tzinfo=OSLO).astimezone(UTC)
    assert (first.hour, second - first) == (0, dt.timedelta(hours=1))
    daily = schedule(
        "30 2 * * *", dt.datetime(2027, 10, 30, 12, tzinfo=UTC), timezone="Europe/Oslo"
    )
    start, end = dt.datetime(2027, 10, 30, 18, tzinfo=UTC), dt.datetime(2027, 11, 1, 12, tzinfo=UTC)
    assert ticked(daily, start, end, dt.timedelta(minutes=5)) == [Run(first), Run(next_night)]
    # a server that was down all night still runs the first 02:30 once, on waking after both
    assert due_runs(daily, None, second + dt.timedelta(minutes=10)) == [first]
    assert due_runs(daily, first, second + dt.timedelta(minutes=10)) == []


def test_an_hourly_schedule_follows_real_time_on_the_fall_back_night():
    """With * in the hour field a schedule runs by real time, as cron does: hourly in
    Europe/Oslo on 31 October 2027 runs at both 02:00 (00:00 and 01:00 UTC), every UTC hour."""
    start = dt.datetime(2027, 10, 30, 22, 30, tzinfo=UTC)
    hourly = schedule("0 * * * *", start, timezone="Europe/Oslo")
    runs = ticked(hourly, start, start + dt.timedelta(hours=6), dt.timedelta(minutes=5))
    assert [r.slot for r in runs] == [start + dt.timedelta(minutes=30 + 60 * n) for n in range(6)]
    assert {r.missed for r in runs} == {0}


def test_a_schedule_without_a_zone_is_read_in_utc():
    plain = schedule("0 2 * * *")
    assert plain.timezone == "UTC"
    assert due_runs(plain, None, at(2, 2, 30)) == [at(2, 2)]
    assert due_runs(schedule("0 2 * * *", timezone="UTC"), None, at(2, 2, 30)) == [at(2, 2)]


@settings(max_examples=150, deadline=None)
@given(
    cron=st.sampled_from(CRONS),
    now=st.datetimes(
        min_value=dt.datetime(2026, 1, 1),
        max_value=dt.datetime(2027, 12, 31),
        timezones=st.just(UTC),
    ),
)
def test_the_default_zone_gives_the_utc_cron_times_of_before(cron, now):
    """Without a zone the slots are croniter's UTC times exactly, as the scheduler computed
    them before schedules had zones."""
    before = croniter(cron, now + dt.timedelta(microseconds=1)).get_prev(dt.datetime)
    assert latest_slot(cron, now) == before and latest_slot(cron, now).tzinfo is UTC
    assert next_slot(cron, now) == croniter(cron, now).get_next(dt.datetime)


@pytest.mark.parametrize(
    "good", ["UTC", "Europe/Oslo", "America/Argentina/Buenos_Aires", " Asia/Kolkata "]
)
def test_check_timezone_accepts_iana_names(good):
    assert check_timezone(good) == good.strip()


@pytest.mark.parametrize(
    "bad", ["Mars/Olympus", "", "Europe", "Europe/", "../etc/passwd", "/etc/localtime", "CET+1"]
)
def test_check_timezone_refuses_unknown_zones_naming_them(bad):
    with pytest.raises(ValueError, match="unknown time zone") as refused:
        check_timezone(bad)
    assert repr(bad) in str(refused.value)


def test_check_timezone_refuses_the_servers_localtime():
    with pytest.raises(ValueError, match="server"):
        check_timezone("localtime")
