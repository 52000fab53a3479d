"""A tile's shift estimate as a typed record: the record the tasks exchange round-trips with the
same keys in the same order (summary.json must not change)."""

from __future__ import annotations

import math

from demaudit.workers.coregistration.shift import VALUE_KEYS, ShiftEstimate

OK_RECORD = {"status": "ok"} | {k: float(i) for i, k in enumerate(VALUE_KEYS)}


def test_records_round_trip_in_order():
    for record in (
        OK_RECORD,
        OK_RECORD | {"applied": True},
        OK_RECORD | {"applied": False, "reason": "the reference could not be read again"},
        {"status": "cannot_estimate", "reason": "too flat"},
        {"status": "cannot_estimate", "reason": "too flat", "applied": False},
        {"status": "failed", "reason": "unreadable", "later_key": 1},
    ):
        again = ShiftEstimate.from_record(record).record()
        assert list(again.items()) == list(record.items())


def test_before_audit_drops_only_what_the_audit_added():
    audited = ShiftEstimate.from_record(OK_RECORD | {"applied": True})
    assert audited.before_audit().record() == OK_RECORD
    assert audited.ok and audited.value("east_m") == 0.0
    assert math.isnan(ShiftEstimate("failed", "unreadable").value("east_m"))
