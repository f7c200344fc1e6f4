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
from testmods import load as _load  # tests/ helper modules (tests/testmods.py)

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


# ---------------------------------------------------------------------------------------------
# issue 9.2: time bins with limits close the last bin (numeric convention: numpy.histogram)
# ---------------------------------------------------------------------------------------------

HOUR_LO, HOUR_HI = dt.datetime(2026, 10, 29, 20, tzinfo=UTC), dt.datetime(2026, 10, 30, 20, tzinfo=UTC)


def _hourly_reference(ts):
    """numpy.histogram on POSIX seconds with hourly edges lo..hi: [e_i, e_i+1) and the last
    bin closed [e_23, hi] -- the convention numeric bins follow."""
    import numpy as np

    secs = np.array([t.timestamp() for t in ts if t is not None])
    edges = np.arange(HOUR_LO.timestamp(), HOUR_HI.timestamp() + 1, 3600.0)
    counts, _ = np.histogram(secs, bins=edges)  # reference: numpy.histogram (closed last bin)
    return edges, counts


@pytest.mark.parametrize("empty_bins", ["omit", "zero"])
@pytest.mark.parametrize("limits,tz", [
    (["2026-10-29T20:00:00Z", "2026-10-30T20:00:00Z"], None),
    # offset-less limits are wall-clock times of the request's zone (Berlin is UTC+1 then)
    (["2026-10-29T21:00:00", "2026-10-30T21:00:00"], "Europe/Berlin"),
])
def test_time_bins_value_on_upper_limit_lands_in_closed_last_bin(api, ref, empty_bins, limits, tz):
    assert HOUR_HI in ref.ts  # the fixture has a row exactly on the upper limit
    body = {"channels": {"x": {"column": "ts", "bin": {"bins": 24, "limits": limits}},
                         "y": {"agg": "count"}}, "empty_bins": empty_bins}
    if tz:
        body["tz"] = tz
    resp = api.chart(body)
    b = resp["bins"]["x"]
    assert b["step"] == "PT1H" and b["count"] == 24
    assert parse_ts(b["start"]).astimezone(UTC) == HOUR_LO and parse_ts(b["stop"]).astimezone(UTC) == HOUR_HI
    edges, counts = _hourly_reference(ref.ts)
    got = {}
    for r in api.rows(resp):
        if r["x_lo"] is None:
            continue
        s, e = parse_ts(r["x_lo"]).astimezone(UTC), parse_ts(r["x_hi"]).astimezone(UTC)
        assert HOUR_LO <= s and e <= HOUR_HI  # never a bin past the limits
        got[s.timestamp()] = r["count"]
    want = {float(e): int(c) for e, c in zip(edges[:-1], counts) if c or empty_bins == "zero"}
    assert got == want  # reference: numpy.histogram
    inside = sum(1 for t in ref.ts if t is not None and HOUR_LO <= t <= HOUR_HI)
    assert resp["stats"]["matched_rows"] - resp["stats"]["outside_limits"]["x"] - ref.t["ts"].isna().sum() == inside


def test_calendar_bins_closed_last_month_with_limits(api, ref):
    # monthly bins over [Jan 1, Jul 1) in Berlin: exactly 6 bins, the last one closed at Jul 1
    resp = api.chart({"channels": {"x": {"column": "ts", "bin": {"bins": 6, "limits": [
        "2026-01-01T00:00:00", "2026-07-01T00:00:00"]}}, "y": {"agg": "count"}},
        "tz": "Europe/Berlin", "empty_bins": "zero"})
    b = resp["bins"]["x"]
    assert b["step"] == "P1M" and b["count"] == 6
    rows = [r for r in api.rows(resp) if r["x_lo"] is not None]
    assert len(rows) == 6
    lo = dt.datetime(2026, 1, 1, tzinfo=BERLIN)
    hi = dt.datetime(2026, 7, 1, tzinfo=BERLIN)
    want = expected_counts([t for t in ref.ts if t is not None and lo <= t <= hi],
                           lambda t: min(local_trunc(t, "month", BERLIN),
                                         dt.datetime(2026, 6, 1, tzinfo=BERLIN).astimezone(UTC)))
    got = {check_offset(r["x_lo"], BERLIN): r["count"] for r in rows}
    assert {k: v for k, v in got.items() if v} == want  # reference: zoneinfo month starts


# ---------------------------------------------------------------------------------------------
# issue 9.6: the request's tz -- default of every temporal key, and the zone of offset-less
# instants in where, limits and filter_sql (channel tz overrides for its key)
# ---------------------------------------------------------------------------------------------

LONDON = ZoneInfo("Europe/London")


def _months(resp, api, tz):
    return {check_offset(r["ts"], tz): r["count"] for r in api.rows(resp) if r["ts"] is not None}


@pytest.mark.parametrize("filt", [
    {"where": [{"column": "ts", "gte": "2026-01-01", "lt": "2026-07-01"}]},
    {"filter_sql": "ts >= TIMESTAMP '2026-01-01 00:00:00' AND ts < TIMESTAMP '2026-07-01 00:00:00'"},
    {"where": [{"column": "ts", "gte": "2026-01-01T00:00:00"}], "filter_sql": "ts < '2026-07-01'"},
], ids=["where", "filter_sql", "mixed"])
def test_request_tz_reads_where_and_filter_sql_in_that_zone(api, ref, filt):
    resp = api.chart({"channels": {"x": {"column": "ts", "trunc": "month"}, "y": {"agg": "count"}},
                      "tz": "Europe/London", **filt})
    got = _months(resp, api, LONDON)
    lo = dt.datetime(2026, 1, 1, tzinfo=LONDON)  # reference: zoneinfo (GMT in January)
    hi = dt.datetime(2026, 7, 1, tzinfo=LONDON)  # BST: 2026-06-30T23:00Z
    want = expected_counts([t for t in ref.ts if t is not None and lo <= t < hi],
                           lambda t: local_trunc(t, "month", LONDON))
    assert len(got) == 6  # January .. June, no seventh point holding one hour of July
    assert got == want  # reference: zoneinfo


def test_channel_tz_overrides_request_tz_for_its_key(api, ref):
    resp = api.chart({"channels": {"x": {"column": "ts", "trunc": "day", "tz": "UTC"}, "y": {"agg": "count"}},
                      "tz": "Europe/London",
                      "where": [{"column": "ts", "gte": "2026-06-10", "lt": "2026-06-12"}]})
    lo = dt.datetime(2026, 6, 10, tzinfo=LONDON)  # the filter is still read in London time
    hi = dt.datetime(2026, 6, 12, tzinfo=LONDON)
    want = expected_counts([t for t in ref.ts if t is not None and lo <= t < hi],
                           lambda t: local_trunc(t, "day", UTC))
    got = {parse_ts(r["ts"]).astimezone(UTC): r["count"] for r in api.rows(resp)}
    assert got == want  # reference: zoneinfo (UTC days of the London window: 3 of them)
    assert len(got) == 3


@pytest.mark.parametrize("text,want", [
    ("2026-03-29T01:30:00", dt.datetime(2026, 3, 29, 1, 30, tzinfo=LONDON)),  # in the spring gap
    ("2026-10-25T01:30:00", dt.datetime(2026, 10, 25, 1, 30, tzinfo=LONDON)),  # repeated hour, fold=0
    ("2026-03-29T01:30:00+02:00", dt.datetime(2026, 3, 28, 23, 30, tzinfo=UTC)),  # offset wins
])
def test_request_tz_dst_edges_follow_zoneinfo(api, ref, text, want):
    resp = api.chart({"channels": {"y": {"agg": "count"}}, "tz": "Europe/London",
                      "where": [{"column": "ts", "gte": text}]})
    n = sum(1 for t in ref.ts if t is not None and t >= want)  # reference: zoneinfo, fold=0
    assert resp["data"]["count"] == [n]


def test_batch_tz_is_every_charts_default(client, ref):
    r = client.post("/v1/batch", json={"source": "fixture", "tz": "Europe/London", "charts": [
        {"channels": {"x": {"column": "ts", "trunc": "month"}, "y": {"agg": "count"}},
         "where": [{"column": "ts", "gte": "2026-01-01", "lt": "2026-07-01"}]},
        {"channels": {"x": {"column": "ts", "trunc": "month"}, "y": {"agg": "count"}}, "tz": "UTC",
         "where": [{"column": "ts", "gte": "2026-01-01", "lt": "2026-07-01"}]}]})
    assert r.status_code == 200, r.text
    london, utc = r.json()["results"]
    assert len(london["data"]["ts"]) == 6  # reference: zoneinfo (as above)
    assert all(check_offset(s, LONDON) for s in london["data"]["ts"])
    assert len(utc["data"]["ts"]) == 6 and all(s.endswith("Z") for s in utc["data"]["ts"])


# ---------------------------------------------------------------------------------------------
# issues 10.3 / 10.5: instants near year 1 / 9999 and non-canonical zone names -> 422
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("body,ptr", [
    ({"where": [{"column": "ts", "gte": "0001-01-01T00:00:00+01:00"}]}, "/where/0/gte"),
    ({"where": [{"column": "ts", "lt": "9999-12-31T23:30:00-01:00"}]}, "/where/0/lt"),
    ({"where": [{"column": "ts", "gte": "0001-01-01T00:30:00"}], "tz": "Europe/Berlin"}, "/where/0/gte"),
    ({"filter_sql": "ts > TIMESTAMP '0001-01-01 00:00:00+01:00'"}, "/filter_sql"),
    ({"channels": {"x": {"column": "ts", "bin": {"bins": 5, "limits": ["0001-01-01T00:00:00Z",
                                                                        "0001-06-01T00:00:00Z"]},
                         "tz": "America/New_York"}, "y": {"agg": "count"}}}, "/channels/x/bin/limits"),
])
def test_instants_outside_years_1_to_9999_are_422(api, body, ptr):
    body = {"channels": {"y": {"agg": "count"}}, **body}
    r = api.post(body)
    assert r.status_code == 422, r.text  # RFC 9457 problem with an RFC 6901 pointer, never a 500
    assert r.json()["pointer"] == ptr


def test_year_one_in_utc_is_an_answer(api):
    resp = api.chart({"channels": {"y": {"agg": "count"}},
                      "where": [{"column": "ts", "lt": "0001-01-01T00:00:00Z"}]})
    assert resp["data"]["count"] == [0]  # no fixture row before year 1 (reference: the data)


@pytest.mark.parametrize("name,suggest", [
    ("Factory", None), ("posixrules", None), ("localtime", None),
    ("right/UTC", "UTC"), ("posix/Europe/Berlin", "Europe/Berlin"), ("Europe/Berln", "Europe/Berlin"),
])
@pytest.mark.parametrize("where", ["channel", "request"])
def test_only_canonical_iana_zones(api, name, suggest, where):
    import zoneinfo

    body = {"channels": {"x": {"column": "ts", "trunc": "day"}, "y": {"agg": "count"}}}
    if where == "channel":
        body["channels"]["x"]["tz"] = name
        ptr = "/channels/x/tz"
    else:
        body["tz"] = name
        ptr = "/tz"
    r = api.post(body)
    assert r.status_code == 422, r.text
    p = r.json()
    assert p["pointer"] == ptr
    valid = zoneinfo.available_timezones()  # reference: the IANA database zoneinfo ships
    assert all(s in valid and not s.startswith(("posix/", "right/")) for s in p.get("suggestions") or [])
    if suggest:
        assert suggest in p["suggestions"]


# ---------------------------------------------------------------------------------------------
# UTC trunc of fixed-length units far from 1970 (integer bin numbers on DuckDB)
# ---------------------------------------------------------------------------------------------

#: instants around 1970, before it (negative epoch microseconds), at the first and last
#: instant of years 1..9999, and a leap day
EDGE_INSTANTS = [dt.datetime(1, 1, 1, tzinfo=UTC), dt.datetime(1, 1, 1, 0, 0, 0, 1, tzinfo=UTC),
                 dt.datetime(1, 1, 7, 23, 59, 59, 999999, tzinfo=UTC),
                 dt.datetime(1899, 12, 31, 23, 59, 59, 999999, tzinfo=UTC),
                 dt.datetime(1960, 2, 29, 12, 34, 56, 789000, tzinfo=UTC),
                 dt.datetime(1969, 12, 29, 0, 0, tzinfo=UTC),
                 dt.datetime(1969, 12, 31, 23, 0, tzinfo=UTC),
                 dt.datetime(1969, 12, 31, 23, 59, 59, 999999, tzinfo=UTC),
                 dt.datetime(1970, 1, 1, tzinfo=UTC), dt.datetime(1970, 1, 1, 0, 0, 0, 1, tzinfo=UTC),
                 dt.datetime(2026, 10, 25, 1, 30, tzinfo=UTC),
                 dt.datetime(9999, 12, 31, 23, 59, 59, 999999, tzinfo=UTC)]


def utc_trunc(t: dt.datetime, unit: str) -> dt.datetime:
    """Floor of an instant to a UTC unit. reference: datetime arithmetic / isocalendar"""
    if unit == "week":
        d = t.date() - dt.timedelta(days=t.isoweekday() - 1)  # ISO 8601: weeks start on Monday
        return dt.datetime(d.year, d.month, d.day, tzinfo=UTC)
    if unit == "day":
        return dt.datetime(t.year, t.month, t.day, tzinfo=UTC)
    cut = {"hour": dict(minute=0, second=0, microsecond=0),
           "minute": dict(second=0, microsecond=0), "second": dict(microsecond=0)}[unit]
    return t.replace(**cut)


@pytest.fixture(scope="module")
def edge_service(tmp_path_factory):
    def build(con) -> dict[str, str]:
        con.execute("CREATE TABLE t (ts TIMESTAMPTZ, tsn TIMESTAMP, d DATE)")
        con.executemany("INSERT INTO t VALUES (?, ?, ?)",
                        [(t, t.replace(tzinfo=None), t.date()) for t in EDGE_INSTANTS])
        # legal values no time key shows (README "Bins"): NULL groups
        con.execute("INSERT INTO t VALUES ('infinity', 'infinity', 'infinity'), "
                    "('-infinity', '-infinity', '-infinity'), "
                    "('12000-01-01 00:00:00+00', '12000-01-01 00:00:00', '12000-01-01'), "
                    "(NULL, NULL, NULL)")
        return {"edge": "t"}

    yield from _load("duckdb_service").duckdb_service(
        tmp_path_factory.mktemp("edge_times") / "edge.duckdb", build, "<edge times>")


@pytest.mark.parametrize("unit", ["week", "day", "hour", "minute", "second"])
@pytest.mark.parametrize("column", ["ts", "tsn", "d"])
def test_utc_trunc_before_1970_and_at_years_1_and_9999(edge_service, unit, column):
    from planner.model import ChartRequest

    svc = edge_service
    out = svc.to_json(svc.run(ChartRequest.model_validate(
        {"source": "edge", "channels": {"x": {"column": column, "trunc": unit}, "y": {"agg": "count"}}})))
    got = {None if s is None else parse_ts(s).astimezone(UTC): n
           for s, n in zip(out["data"][column], out["data"]["count"])}
    cells = [t if column != "d" else dt.datetime(t.year, t.month, t.day, tzinfo=UTC) for t in EDGE_INSTANTS]
    want = expected_counts(cells + [None] * 4, lambda t: utc_trunc(t, unit))
    assert got == want


#: zones with offsets that are not whole hours (or minutes) before some year, half-hour and
#: 45-minute zones, a half-hour DST shift (Lord Howe): sub-day trunc in these zones is the UTC
#: floor only where every offset is a whole unit (planner/tzdb.py whole_offsets_from)
ZONE_CASES = ["America/New_York", "Europe/Amsterdam", "Asia/Kolkata", "Asia/Kathmandu",
              "Australia/Lord_Howe", "Africa/Monrovia", "Europe/Berlin"]


def _zone_instants() -> list[dt.datetime]:
    out = []
    # around the end of local mean time / odd offsets (1847 .. 1972), every 7 min 13 s
    for start in ("1883-11-18T16:00:00", "1905-12-31T17:30:00", "1919-12-31T17:30:00",
                  "1937-06-30T22:00:00", "1940-05-15T23:00:00", "1972-01-06T23:30:00",
                  "1893-03-31T22:30:00", "1895-01-31T12:30:00"):
        t0 = dt.datetime.fromisoformat(start).replace(tzinfo=UTC)
        out += [t0 + dt.timedelta(seconds=433 * i) for i in range(20)]
    # DST days of 2026 (New York, Berlin, Lord Howe) and the 1969/1970 boundary
    for start in ("2026-03-08T05:00:00", "2026-11-01T04:30:00", "2026-03-29T00:00:00",
                  "2026-10-25T00:00:00", "2026-04-04T14:00:00", "2026-10-03T14:30:00",
                  "1969-12-31T22:00:00"):
        t0 = dt.datetime.fromisoformat(start).replace(tzinfo=UTC)
        out += [t0 + dt.timedelta(seconds=613 * i, microseconds=7 * i) for i in range(24)]
    return out + [dt.datetime(1700, 6, 1, 12, 34, 56, tzinfo=UTC)]


@pytest.fixture(scope="module")
def zone_service(tmp_path_factory):
    def build(con) -> dict[str, str]:
        con.execute("CREATE TABLE t (ts TIMESTAMPTZ)")
        con.executemany("INSERT INTO t VALUES (?)", [(t,) for t in _zone_instants()])
        con.execute("INSERT INTO t VALUES ('infinity'), ('12000-01-01 00:00:00+00'), (NULL)")
        return {"zones": "t"}

    yield from _load("duckdb_service").duckdb_service(
        tmp_path_factory.mktemp("zone_times") / "zones.duckdb", build, "<zone times>")


@pytest.mark.parametrize("unit", ["hour", "minute", "second"])
@pytest.mark.parametrize("tzname", ZONE_CASES)
def test_subday_trunc_in_zones_with_odd_offsets_matches_zoneinfo(zone_service, tzname, unit):
    """Since 2000 against zoneinfo; on every instant (local mean time, the ends of odd
    offsets) against the engine's own time zone database: DuckDB's ICU timezone() wall
    clock, the instant minus its wall-clock remainder (the databases differ in places
    before 1970, e.g. which side of New York's 1883 switch an instant's hour belongs to)."""
    import duckdb

    from planner.model import ChartRequest

    svc, tz = zone_service, ZoneInfo(tzname)
    res = svc.run(ChartRequest.model_validate(
        {"source": "zones", "channels": {"x": {"column": "ts", "trunc": unit, "tz": tzname},
                                         "y": {"agg": "count"}}}))
    # the Arrow table's instants (RFC 3339 text shows whole-minute offsets only: local mean
    # time's seconds, e.g. Berlin's +00:53:28, are not written)
    got = {None if t is None else t.astimezone(UTC): n
           for t, n in zip(res.table.column("ts").to_pylist(), res.table.column("count").to_pylist())}

    def floor(t: dt.datetime) -> dt.datetime:
        """The instant minus its wall-clock remainder (README: sub-day trunc keeps a repeated
        hour apart). reference: zoneinfo wall clock"""
        loc = t.astimezone(tz).replace(tzinfo=None)
        cut = {"hour": dict(minute=0, second=0, microsecond=0),
               "minute": dict(second=0, microsecond=0), "second": dict(microsecond=0)}[unit]
        return t - (loc - loc.replace(**cut))

    recent = [t for t in _zone_instants() if t.year >= 2000]
    assert {t: n for t, n in got.items() if t is not None and t.year >= 2000} \
        == expected_counts(recent, floor)

    con = duckdb.connect()  # reference: the engine's own time zone database (ICU)
    con.execute("SET TimeZone = 'UTC'")
    con.execute("CREATE TABLE t (ts TIMESTAMPTZ)")
    con.executemany("INSERT INTO t VALUES (?)", [(t,) for t in _zone_instants()])
    want = dict(con.execute(f"""
        SELECT make_timestamptz(epoch_us(ts) - (epoch_us(timezone('{tzname}', ts))
                                - epoch_us(date_trunc('{unit}', timezone('{tzname}', ts))))) AS k,
               count(*)
        FROM t WHERE ts BETWEEN TIMESTAMPTZ '0001-01-01 00:00:00+00'
                            AND TIMESTAMPTZ '9999-12-31 23:59:59.999999+00'
        GROUP BY k""").fetchall())
    con.close()
    want = {t.astimezone(UTC): n for t, n in want.items()}
    want[None] = 3  # infinity, year 12000, NULL
    assert got == want


def test_a_time_column_proved_in_range_is_read_without_the_year_test(tmp_path):
    """The catalog proves, per data version of a DuckDB file, that a time column holds only
    instants of years 1..9999 (app.catalog ``_in_range``, ``ColumnInfo.in_range``); hour and
    month keys then read it without the range test that turns 'infinity' / year 12000 into
    NULL, and answer the same. A new file with 'infinity' and year 12000 brings the test
    back: those two are in the NULL group. reference: Python datetime floors in UTC."""
    import os

    import duckdb

    from app.catalog import Catalog
    from app.service import ChartService
    from app.settings import parse_settings
    from planner.model import ChartRequest

    rows = _zone_instants()  # 1700 .. 2026, the 1969/1970 boundary, odd minutes

    def write(path, extra: str) -> None:
        con = duckdb.connect(str(path))
        con.execute("SET TimeZone = 'UTC'")
        con.execute("CREATE TABLE t (ts TIMESTAMPTZ)")
        con.executemany("INSERT INTO t VALUES (?)", [(t,) for t in rows])
        con.execute("INSERT INTO t VALUES (NULL)" + extra)
        con.close()

    db = tmp_path / "t.duckdb"
    write(db, "")
    catalog = Catalog(parse_settings({"sources": {"t": {"engine": "duckdb", "path": str(db),
                                                        "table": "t"}}}, "<in range>"))
    svc = ChartService(catalog)
    floors = {"hour": lambda t: t.replace(minute=0, second=0, microsecond=0),
              "month": lambda t: t.replace(day=1, hour=0, minute=0, second=0, microsecond=0)}
    guards = {"hour": "BETWEEN -62135596800000000", "month": "0001-01-01"}

    def ask(unit: str) -> tuple[dict, str]:
        res = svc.run(ChartRequest.model_validate(
            {"source": "t", "channels": {"x": {"column": "ts", "trunc": unit},
                                         "y": {"agg": "count"}}, "limit": 100000}))
        got = {None if t is None else t.astimezone(UTC): n for t, n in
               zip(res.table.column("ts").to_pylist(), res.table.column("count").to_pylist())}
        return got, res.meta["sql"][-1]

    try:
        assert catalog.entry("t").schema.column("ts").in_range
        for unit, floor in floors.items():
            got, sql = ask(unit)
            assert guards[unit] not in sql
            assert got == {**expected_counts(rows, floor), None: 1}
        fresh = tmp_path / "t2.duckdb"
        write(fresh, ", ('infinity'), ('12000-01-01 00:00:00+00')")
        os.replace(fresh, db)  # a new data version: the catalog opens it again
        assert not catalog.entry("t").schema.column("ts").in_range
        for unit, floor in floors.items():
            got, sql = ask(unit)
            assert guards[unit] in sql
            assert got == {**expected_counts(rows, floor), None: 3}
    finally:
        catalog.close()
