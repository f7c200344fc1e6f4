"""Temporal keys (trunc, extract, calendar bins, time zones) against the Python standard
library: datetime.isocalendar and zoneinfo (IANA tz database shipped by tzdata).

Keys are compared as UTC instants: Python compares two datetimes that share a tzinfo by
wall clock and ignores `fold`, which would hide exactly the DST bugs these tests look for.
"""

from __future__ import annotations

import collections
import datetime as dt
import re
from zoneinfo import ZoneInfo

import pytest

UTC = dt.timezone.utc
BERLIN = ZoneInfo("Europe/Berlin")
NEW_YORK = ZoneInfo("America/New_York")

# RFC 3339 section 5.6 date-time (with the 'T' separator and a mandatory offset)
RFC3339 = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?(Z|[+-]\d{2}:\d{2})$")


def parse_ts(s: str) -> dt.datetime:
    assert isinstance(s, str), f"timestamp must be an RFC 3339 string, got {s!r}"
    assert RFC3339.match(s), f"not an RFC 3339 date-time: {s!r}"  # reference: RFC 3339 section 5.6
    d = dt.datetime.fromisoformat(s)
    assert d.tzinfo is not None
    return d


def check_offset(s: str, tz) -> dt.datetime:
    """Parse an RFC 3339 string and check its offset is the one `tz` has at that instant."""
    d = parse_ts(s)
    want = d.astimezone(tz).utcoffset()
    assert d.utcoffset() == want, f"{s}: offset {d.utcoffset()} but {tz} has {want} at that instant"  # reference: zoneinfo
    return d.astimezone(UTC)


def local_trunc(instant: dt.datetime, unit: str, tz) -> dt.datetime:
    """date_trunc in the local time of `tz`, as a UTC instant. reference: zoneinfo + datetime"""
    loc = instant.astimezone(tz)
    if unit == "hour":
        out = loc.replace(minute=0, second=0, microsecond=0)  # keeps `fold` across fall-back
    elif unit == "day":
        out = dt.datetime(loc.year, loc.month, loc.day, tzinfo=tz)
    elif unit == "week":
        d = loc.date()
        monday = d - dt.timedelta(days=d.isocalendar().weekday - 1)  # reference: ISO 8601 week (isocalendar)
        out = dt.datetime(monday.year, monday.month, monday.day, tzinfo=tz)
    elif unit == "month":
        out = dt.datetime(loc.year, loc.month, 1, tzinfo=tz)
    elif unit == "quarter":
        out = dt.datetime(loc.year, 3 * ((loc.month - 1) // 3) + 1, 1, tzinfo=tz)
    elif unit == "year":
        out = dt.datetime(loc.year, 1, 1, tzinfo=tz)
    else:
        raise ValueError(unit)
    return out.astimezone(UTC)


def expected_counts(instants, fn):
    c = collections.Counter()
    for t in instants:
        c[None if t is None else fn(t)] += 1
    return dict(c)


CASES = [
    ("week", None),
    ("week", "America/New_York"),
    ("day", "Europe/Berlin"),
    ("day", "America/New_York"),
    ("month", "Europe/Berlin"),
    ("month", "America/New_York"),
    ("quarter", "Europe/Berlin"),
    ("year", "America/New_York"),
    ("hour", "Europe/Berlin"),
    ("hour", "America/New_York"),
    ("day", None),
]


@pytest.mark.parametrize("unit,tzname", CASES, ids=[f"{u}-{z}" for u, z in CASES])
def test_trunc_matches_zoneinfo(api, ref, unit, tzname):
    tz = ZoneInfo(tzname) if tzname else UTC
    key = {"column": "ts", "trunc": unit}
    if tzname:
        key["tz"] = tzname
    resp = api.chart({"channels": {"x": key, "y": {"agg": "count"}}})
    rows = api.rows(resp)
    got = {}
    for r in rows:
        k = None if r["ts"] is None else check_offset(r["ts"], tz)
        assert k not in got, f"group {r['ts']} appears twice"
        got[k] = r["count"]
    want = expected_counts(ref.ts, lambda t: local_trunc(t, unit, tz))  # reference: zoneinfo / isocalendar
    assert got == want
    col = api.column(resp, "ts")
    assert (col["role"], col["type"]) == ("key", "timestamp")


def test_trunc_week_is_iso_monday_and_spans_year_end(api, ref):
    resp = api.chart({"channels": {"x": {"column": "ts", "trunc": "week"}, "y": {"agg": "count"}}})
    starts = [parse_ts(s).astimezone(UTC) for s in resp["data"]["ts"] if s is not None]
    for s in starts:
        assert s.isoweekday() == 1 and s.time() == dt.time(0, 0)  # reference: ISO 8601 weeks start on Monday
    # 2027-01-01 (a Friday) belongs to ISO week 2026-W53, which starts on Monday 2026-12-28
    assert dt.date(2027, 1, 1).isocalendar()[:2] == (2026, 53)  # reference: datetime.isocalendar
    assert dt.datetime(2026, 12, 28, tzinfo=UTC) in starts
    assert not any(s.date() == dt.date(2027, 1, 1) for s in starts)


def test_trunc_day_berlin_has_two_offsets_around_spring_forward(api, ref):
    resp = api.chart(
        {
            "channels": {"x": {"column": "ts", "trunc": "day", "tz": "Europe/Berlin"}, "y": {"agg": "count"}},
            "where": [{"column": "ts", "gte": "2026-03-28T00:00:00+01:00", "lt": "2026-03-31T00:00:00+02:00"}],
        }
    )
    labels = [s for s in resp["data"]["ts"]]
    # Berlin midnights: 28 and 29 March are still CET (+01:00), 30 March is CEST (+02:00)
    # reference: zoneinfo (IANA rules: EU summer time starts the last Sunday of March, 01:00 UTC)
    assert labels == ["2026-03-28T00:00:00+01:00", "2026-03-29T00:00:00+01:00", "2026-03-30T00:00:00+02:00"]
    want = expected_counts([t for t in ref.ts if t is not None and dt.datetime(2026, 3, 27, 23, tzinfo=UTC) <= t < dt.datetime(2026, 3, 30, 22, tzinfo=UTC)],
                           lambda t: local_trunc(t, "day", BERLIN))
    assert dict(zip([parse_ts(s).astimezone(UTC) for s in labels], resp["data"]["count"])) == want  # reference: zoneinfo


def test_trunc_hour_berlin_fall_back_keeps_repeated_hour_apart(api, ref):
    # On 2026-10-25 Berlin's wall clock shows 02:00-02:59 twice (+02:00, then +01:00): two hours.
    resp = api.chart(
        {
            "channels": {"x": {"column": "ts", "trunc": "hour", "tz": "Europe/Berlin"}, "y": {"agg": "count"}},
            "where": [{"column": "ts", "gte": "2026-10-24T23:00:00Z", "lt": "2026-10-25T03:00:00Z"}],
        }
    )
    labels = resp["data"]["ts"]
    # reference: zoneinfo fold handling (PEP 495)
    assert labels == [
        "2026-10-25T01:00:00+02:00",
        "2026-10-25T02:00:00+02:00",
        "2026-10-25T02:00:00+01:00",
        "2026-10-25T03:00:00+01:00",
    ]
    sel = [t for t in ref.ts if t is not None and dt.datetime(2026, 10, 24, 23, tzinfo=UTC) <= t < dt.datetime(2026, 10, 25, 3, tzinfo=UTC)]
    want = expected_counts(sel, lambda t: local_trunc(t, "hour", BERLIN))
    assert dict(zip([parse_ts(s).astimezone(UTC) for s in labels], resp["data"]["count"])) == want


EXTRACTS = [
    ("isodow", "Europe/Berlin", lambda d: d.isoweekday()),  # reference: datetime.isoweekday (Mon=1..Sun=7)
    ("isodow", "America/New_York", lambda d: d.isoweekday()),
    ("dow", "Europe/Berlin", lambda d: d.isoweekday() % 7),  # reference: SQL/PostgreSQL dow, Sun=0..Sat=6 (from memory)
    ("hour", "Europe/Berlin", lambda d: d.hour),  # reference: zoneinfo local hour
    ("hour", "America/New_York", lambda d: d.hour),
    ("hour", None, lambda d: d.hour),
    ("month", "America/New_York", lambda d: d.month),
    ("year", "Europe/Berlin", lambda d: d.year),
    ("doy", None, lambda d: d.timetuple().tm_yday),  # reference: datetime day of year
]


@pytest.mark.parametrize("field,tzname", [e[:2] for e in EXTRACTS], ids=[f"{e[0]}-{e[1]}" for e in EXTRACTS])
def test_extract_matches_zoneinfo(api, ref, field, tzname):
    fn = {(e[0], e[1]): e[2] for e in EXTRACTS}[(field, tzname)]
    tz = ZoneInfo(tzname) if tzname else UTC
    key = {"column": "ts", "extract": field}
    if tzname:
        key["tz"] = tzname
    resp = api.chart({"channels": {"x": key, "y": {"agg": "count"}}})
    name = f"ts_{field}"
    got = {r[name]: r["count"] for r in api.rows(resp)}
    want = expected_counts(ref.ts, lambda t: fn(t.astimezone(tz)))  # reference: zoneinfo
    assert got == want
    assert api.column(resp, name)["type"] == "integer"
    assert list(got) == sorted(k for k in got if k is not None) + ([None] if None in got else [])


def test_naive_timestamp_is_read_as_utc(api, ref):
    # DEVELOPERS: a naive TIMESTAMP column is read as UTC; trunc/extract use tz.
    resp = api.chart({"channels": {"x": {"column": "tsn", "trunc": "day", "tz": "Europe/Berlin"}, "y": {"agg": "count"}}})
    got = {}
    for r in api.rows(resp):
        got[None if r["tsn"] is None else check_offset(r["tsn"], BERLIN)] = r["count"]
    want = expected_counts(ref.tsn, lambda t: local_trunc(t.replace(tzinfo=UTC), "day", BERLIN))  # reference: zoneinfo
    assert got == want

    resp = api.chart({"channels": {"x": {"column": "tsn", "extract": "hour", "tz": "America/New_York"}, "y": {"agg": "count"}}})
    got = {r["tsn_hour"]: r["count"] for r in api.rows(resp)}
    want = expected_counts(ref.tsn, lambda t: t.replace(tzinfo=UTC).astimezone(NEW_YORK).hour)  # reference: zoneinfo
    assert got == want


def test_utc_output_is_rfc3339(api):
    resp = api.chart({"channels": {"x": {"column": "ts", "trunc": "month"}, "y": {"agg": "count"}}})
    for s in resp["data"]["ts"]:
        if s is not None:
            d = parse_ts(s)
            assert d.utcoffset() == dt.timedelta(0)  # default tz is UTC: 'Z' or +00:00
    mn, mx = resp["domains"]["ts"]
    assert parse_ts(mn) <= parse_ts(mx)


# ---------------------------------------------------------------------------------------------
# calendar bins on timestamps
# ---------------------------------------------------------------------------------------------


def test_calendar_bins_month_utc(api, ref):
    # The data span 2025-12-20 .. 2027-01-10 (~12.7 months): with a target of 20 bins the nice
    # calendar step is 1 month under any reasonable rule (1 week would give ~55 bins, 1 quarter ~5).
    resp = api.chart({"channels": {"x": {"column": "ts", "bin": {"bins": 20}}, "y": {"agg": "count"}}})
    b = resp["bins"]["x"]
    assert b["step"] == "P1M" and b["method"] == "calendar"
    got = {}
    for r in api.rows(resp):
        if r["x_lo"] is None:
            assert r["x_hi"] is None
            got[None] = r["count"]
            continue
        s, e = parse_ts(r["x_lo"]).astimezone(UTC), parse_ts(r["x_hi"]).astimezone(UTC)
        assert s.day == 1 and s.time() == dt.time(0)
        nxt = dt.datetime(s.year + (s.month == 12), s.month % 12 + 1, 1, tzinfo=UTC)
        assert e == nxt  # reference: calendar month length
        got[s] = r["count"]
    want = expected_counts(ref.ts, lambda t: local_trunc(t, "month", UTC))
    assert got == want  # reference: datetime month truncation
    months = sorted(k for k in want if k is not None)
    assert parse_ts(b["start"]).astimezone(UTC) == months[0]
    assert b["count"] == (months[-1].year - months[0].year) * 12 + months[-1].month - months[0].month + 1
    assert api.column(resp, "x_lo")["type"] == "timestamp"


def test_calendar_bins_month_berlin(api, ref):
    resp = api.chart({"channels": {"x": {"column": "ts", "bin": {"bins": 20}, "tz": "Europe/Berlin"}, "y": {"agg": "count"}}})
    assert resp["bins"]["x"]["step"] == "P1M"
    got = {}
    for r in api.rows(resp):
        k = None if r["x_lo"] is None else check_offset(r["x_lo"], BERLIN)
        got[k] = r["count"]
    want = expected_counts(ref.ts, lambda t: local_trunc(t, "month", BERLIN))  # reference: zoneinfo
    assert got == want


ISO_FIXED = re.compile(r"^PT(\d+)([HMS])$")


def _fixed_seconds(step: str) -> int:
    m = ISO_FIXED.match(step)
    if m:
        return int(m.group(1)) * {"H": 3600, "M": 60, "S": 1}[m.group(2)]
    return {"P1D": 86400}[step]


def test_calendar_bins_subday_aligned_to_utc_epoch(api, ref):
    lo, hi = dt.datetime(2026, 10, 24, 12, tzinfo=UTC), dt.datetime(2026, 10, 26, 12, tzinfo=UTC)
    resp = api.chart(
        {
            "channels": {"x": {"column": "ts", "bin": {"bins": 40}}, "y": {"agg": "count"}},
            "where": [{"column": "ts", "gte": "2026-10-24T12:00:00Z", "lt": "2026-10-26T12:00:00Z"}],
        }
    )
    b = resp["bins"]["x"]
    step = _fixed_seconds(b["step"])  # a 48 h span with ~40 bins needs a sub-day step
    assert step < 86400
    assert 10 <= b["count"] <= 80
    sel = [t for t in ref.ts if t is not None and lo <= t < hi]
    want = expected_counts(sel, lambda t: dt.datetime.fromtimestamp(int(t.timestamp()) // step * step, UTC))
    got = {}
    for r in api.rows(resp):
        s, e = parse_ts(r["x_lo"]).astimezone(UTC), parse_ts(r["x_hi"]).astimezone(UTC)
        assert int(s.timestamp()) % step == 0  # DEVELOPERS: sub-day bins aligned to the UTC epoch
        assert (e - s).total_seconds() == step
        got[s] = r["count"]
    assert got == want  # reference: integer flooring of POSIX seconds
    assert sum(got.values()) == len(sel) == resp["stats"]["matched_rows"]
