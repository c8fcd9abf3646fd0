"""ISO 8601 companions of the API's ns times (service.api.timefields): which fields, where,
in the site zone with its offset; null for never and for times out of range."""

from __future__ import annotations

from service.api.timefields import TIME_FIELDS, iso_or_none, with_times

T = 1_764_676_800_123_456_789  # 2025-12-02T12:00:00.123456789Z
KTM = "Asia/Kathmandu"  # UTC+05:45, no summer time (IANA tz database)


def test_every_ns_time_gets_its_companion_nested_too() -> None:
    doc = {
        "t_ns": T, "since_ns": None, "acked_ns": 0,
        "latest": {"timestamp_ns": T, "values": [1.0, 2.0]},
        "events": [{"t_ns": T}, {"t_ns": T + 60 * 10**9}],
    }
    out = with_times(doc, KTM)
    assert out is doc
    assert doc["time"] == "2025-12-02T17:45:00.123+05:45"
    assert doc["since"] is None and doc["acked_time"] is None  # never
    assert doc["latest"]["time"] == "2025-12-02T17:45:00.123+05:45"
    assert doc["latest"]["values"] == [1.0, 2.0]
    assert [e["time"] for e in doc["events"]] == [
        "2025-12-02T17:45:00.123+05:45", "2025-12-02T17:46:00.123+05:45"]


def test_a_field_of_that_name_is_not_overwritten_and_odd_times_are_null() -> None:
    doc = {"t0_ns": T, "t0": "kept"}
    assert with_times(doc, "UTC")["t0"] == "kept"
    assert iso_or_none(T, "UTC") == "2025-12-02T12:00:00.123+00:00"
    assert iso_or_none(-5, "UTC") is None
    assert iso_or_none(2**63 - 1, "UTC") == "2262-04-11T23:47:16.854+00:00"  # int64 max
    assert iso_or_none(10**21, "UTC") is None  # beyond year 9999
    assert iso_or_none(True, "UTC") is None
    assert iso_or_none(1.5e18, "UTC") is None  # not an integer ns time


def test_the_companion_names_are_distinct() -> None:
    names = list(TIME_FIELDS.values())
    # t_ns and timestamp_ns are the same instant under two names; everything else differs
    assert len(set(names)) == len(names) - 1
    assert all(k.endswith("_ns") for k in TIME_FIELDS)
