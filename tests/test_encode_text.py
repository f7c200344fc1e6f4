"""The JSON body's vectorised encodings (app/encode.py) write what a value-by-value encoder
writes, byte for byte.

References outside the project: numpy's ``datetime_as_string`` for the RFC 3339 UTC text of
every timestamp unit (Python's ``datetime.isoformat`` for microseconds as a second one), and
orjson on plain Python values (``Array.to_pylist``) for the body bytes.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import orjson
import pyarrow as pa
import pytest

from app.encode import column_values, dumps, instant_text, timestamps_to_text, wire_values

PER_SECOND = {"s": 1, "ms": 1_000, "us": 1_000_000, "ns": 1_000_000_000}
#: 0001-01-01T00:00:00Z .. 9999-12-31T23:59:59Z in seconds
FIRST, LAST = -62_135_596_800, 253_402_300_799


def numpy_text(values: np.ndarray, unit: str, mask: np.ndarray) -> list[str | None]:
    """numpy's ISO 8601 text + ``Z``; whole seconds when no value has a fraction."""
    per = PER_SECOND[unit]
    shown = unit if (values[~mask] % per).any() else "s"
    as_dt = values.astype(f"datetime64[{unit}]")
    text = np.datetime_as_string(as_dt, unit=shown).tolist()
    return [None if m else t + "Z" for t, m in zip(text, mask.tolist())]


def instants(rng: np.random.Generator, unit: str, n: int, whole: str) -> np.ndarray:
    per = PER_SECOND[unit]
    if unit == "ns":  # datetime64[ns] spans 1677..2262
        v = rng.integers(-(2**63) + 1, 2**63 - 1, n, dtype=np.int64)
    else:
        v = rng.integers(FIRST * per, (LAST + 1) * per, n, dtype=np.int64)
    if whole == "hour":
        v = v // (3600 * per) * (3600 * per)
    elif whole == "second":
        v = v // per * per
    return v


@pytest.mark.parametrize("unit", ["s", "ms", "us", "ns"])
@pytest.mark.parametrize("whole", ["hour", "second", "fraction"])
@pytest.mark.parametrize("nulls", [False, True])
def test_utc_text_matches_numpy(unit: str, whole: str, nulls: bool) -> None:
    rng = np.random.default_rng([ord(c) for c in unit + whole] + [int(nulls)])
    n = 5_000
    v = instants(rng, unit, n, whole)
    v[:4] = [0, -1 if whole == "fraction" else -PER_SECOND[unit], FIRST * PER_SECOND[unit]
             if unit != "ns" else 0, LAST * PER_SECOND[unit] if unit != "ns" else 0]
    mask = rng.random(n) < 0.1 if nulls else np.zeros(n, bool)
    arr = pa.array(v, pa.timestamp(unit, tz="UTC"), mask=mask)
    # two chunks, the first one sliced (an offset into its buffers)
    col = pa.chunked_array([arr.slice(1, 2_000), arr.slice(2_001)])
    keep = np.r_[1:2_001, 2_001:n]
    expected = numpy_text(v[keep], unit, mask[keep])
    assert timestamps_to_text(col, None) == expected
    assert timestamps_to_text(col, "UTC") == expected
    assert dumps({"x": wire_values(col, "UTC")}) == orjson.dumps({"x": expected})


def test_utc_text_matches_isoformat() -> None:
    rng = np.random.default_rng(11)
    v = instants(rng, "us", 2_000, "fraction")
    epoch = dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc)
    expected = [(epoch + dt.timedelta(microseconds=int(x))).isoformat(timespec="microseconds")
                .replace("+00:00", "Z") for x in v]
    col = pa.chunked_array([pa.array(v, pa.timestamp("us", tz="UTC"))])
    assert timestamps_to_text(col, None) == expected
    assert dumps(wire_values(col)) == orjson.dumps(expected)


def test_years_outside_four_digits() -> None:
    """Year 0 and year 10000 (a min/max over a DuckDB TIMESTAMP can reach them): the
    value-by-value path, still numpy's text."""
    per = PER_SECOND["us"]
    v = np.array([FIRST * per - 1, 0, (LAST + 1) * per], np.int64)
    col = pa.chunked_array([pa.array(v, pa.timestamp("us", tz="UTC"))])
    expected = numpy_text(v, "us", np.zeros(3, bool))
    assert expected[0].startswith("0000-") and expected[2].startswith("10000-")
    assert timestamps_to_text(col, None) == expected
    assert dumps(wire_values(col)) == orjson.dumps(expected)


def test_empty_and_all_null_timestamps() -> None:
    t = pa.timestamp("us", tz="UTC")
    for col in (pa.chunked_array([], t), pa.chunked_array([pa.array([None, None], t)])):
        expected = [None] * len(col)
        assert timestamps_to_text(col, None) == expected
        assert dumps(wire_values(col)) == orjson.dumps(expected)


@pytest.mark.parametrize("arr", [
    pa.array([1, -2, 2**63 - 1, -(2**63)], pa.int64()),
    pa.array([1, None, 3], pa.int64()),
    pa.array([7, 8], pa.int16()),
    pa.array([2**64 - 1, 0], pa.uint64()),
    pa.array([0.1, -0.0, 1e16, 1e-7, 5e-324, 1.7976931348623157e308, float("nan"),
              float("inf"), -float("inf"), None], pa.float64()),
    pa.array([1.1, 2.675], pa.float32()),
    pa.array([True, False]),
    pa.array([True, None]),
    pa.array(["a", None, "é"]),
    pa.array([], pa.float64()),
], ids=lambda a: str(a.type))
def test_numbers_match_python_values(arr: pa.Array) -> None:
    """numpy arrays in the body write what the column's Python values write (orjson: a
    NaN or an infinity is ``null``, as a null is)."""
    col = pa.chunked_array([arr[:1], arr[1:]], arr.type)
    assert dumps(wire_values(col)) == orjson.dumps(arr.to_pylist())
    assert dumps(column_values(col)) == orjson.dumps(arr.to_pylist())


def test_random_doubles_match_python_values() -> None:
    rng = np.random.default_rng(5)
    bits = rng.integers(0, 2**64, 200_000, dtype=np.uint64)
    values = bits.view(np.float64)
    col = pa.chunked_array([pa.array(values)])
    assert dumps(wire_values(col)) == orjson.dumps(values.tolist())


def test_instant_text_matches_numpy() -> None:
    """One instant (bin edges, domains): numpy's text of its UTC instant, whatever zone the
    datetime carries (a naive one is UTC)."""
    import zoneinfo

    rng = np.random.default_rng(13)
    zones = [None, dt.timezone.utc, zoneinfo.ZoneInfo("Asia/Kathmandu"),
             dt.timezone(dt.timedelta(hours=-3, minutes=-30))]
    epoch = dt.datetime(1970, 1, 1)
    for i, (secs, us) in enumerate(zip(rng.integers(FIRST + 86_400, LAST - 86_400, 3_000),
                                       rng.integers(0, 1_000_000, 3_000))):
        us = int(us) if i % 2 else 0
        naive = epoch + dt.timedelta(seconds=int(secs), microseconds=us)
        zone = zones[i % len(zones)]
        v = naive if zone is None else naive.replace(tzinfo=dt.timezone.utc).astimezone(zone)
        expected = np.datetime_as_string(np.datetime64(naive, "us"), unit="us" if us else "s") + "Z"
        assert instant_text(v, None) == expected
        assert instant_text(v, "UTC") == expected


@pytest.mark.parametrize("unit", ["s", "ms", "us"])
@pytest.mark.parametrize("zone", ["Europe/Berlin", "America/New_York", "Asia/Kolkata",
                                  "Australia/Lord_Howe", "Africa/Monrovia"])
def test_zoned_text_names_the_same_instant(zone: str, unit: str) -> None:
    """Every text in a zone reads back (``datetime.fromisoformat``) as the same instant, also
    under local mean time, whose offsets have seconds that RFC 3339 offsets (hh:mm, RFC 3339
    section 5.6) cannot hold; where the zone's offset is whole minutes the text equals
    zoneinfo's own wall clock and offset (Python's ``zoneinfo`` as the reference)."""
    from zoneinfo import ZoneInfo

    rng = np.random.default_rng(7)
    secs = np.concatenate([rng.integers(-4_000_000_000, 2_000_000_000, 400),
                           [-2_422_054_408, -2_422_054_409, 0]])  # Berlin's 1893 switch
    frac = rng.integers(0, PER_SECOND[unit], len(secs)) if unit != "s" else 0
    raw = secs * PER_SECOND[unit] + frac
    arr = pa.chunked_array([pa.array(raw, pa.timestamp(unit, tz="UTC"))])
    texts = timestamps_to_text(arr, zone)
    for v, text in zip(arr.to_pylist(), texts):
        back = dt.datetime.fromisoformat(text)
        assert back == v, (text, v)
        assert back.utcoffset().total_seconds() % 60 == 0
        local = v.astimezone(ZoneInfo(zone))
        if local.utcoffset().total_seconds() % 60 == 0:
            assert back.replace(tzinfo=None) == local.replace(tzinfo=None), (text, local)


@pytest.mark.parametrize("zone", ["Europe/Berlin", "Africa/Monrovia"])
def test_zoned_nanosecond_text_with_nulls(zone: str) -> None:
    """Nanosecond instants in a column with nulls, also under local mean time (offsets with
    seconds): each text's nine fraction digits are the value's own (integer arithmetic on
    the raw ticks) and its whole seconds read back (``datetime.fromisoformat``) as the same
    instant; a null stays None."""
    rng = np.random.default_rng(11)
    secs = np.concatenate([rng.integers(-2_800_000_000, -2_500_000_000, 40),  # before 1893
                           rng.integers(0, 2_000_000_000, 40)])
    raw = [int(s) * 1_000_000_000 + int(f)
           for s, f in zip(secs, rng.integers(1, 1_000_000_000, len(secs)))]
    raw[3] = raw[50] = None
    arr = pa.chunked_array([pa.array(raw, pa.timestamp("ns", tz="UTC"))])
    epoch = dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc)
    for r, text in zip(raw, timestamps_to_text(arr, zone)):
        if r is None:
            assert text is None
            continue
        whole, frac = divmod(r, 1_000_000_000)
        head, tail = text.split(".")
        assert int(tail[:9]) == frac, (text, r)
        back = dt.datetime.fromisoformat(head + tail[9:])
        assert back == epoch + dt.timedelta(seconds=whole), (text, r)


def test_wall_text_of_any_year_matches_python_datetime():
    """``_wall_text`` (days-to-civil arithmetic) against Python's datetime, whose calendar
    is the proleptic Gregorian one, over its whole range; and one step past either end,
    where a year-1 instant read west of UTC (or a 9999 one east of it) has its local year:
    0000-12-31 is the day before 0001-01-01, 10000-01-01 the day after 9999-12-31."""
    import random

    from app.encode import _wall_text

    rng = random.Random(20261204)
    for _ in range(20000):
        s = rng.randint(-62135596800, 253402300799)
        t = dt.datetime(1970, 1, 1) + dt.timedelta(seconds=s)
        assert _wall_text(s) == f"{t.year:04d}" + t.strftime("-%m-%dT%H:%M:%S"), s
    assert _wall_text(-62135596800 - 3600) == "0000-12-31T23:00:00"
    assert _wall_text(253402300800) == "10000-01-01T00:00:00"


def test_year_one_in_a_zone_with_a_mean_time_offset():
    """0001-01-01T00:10Z in New York (LMT -4:56:02, cut to -4:56 as the offset text holds
    minutes) is 0000-12-31T19:14 there; in Tokyo (LMT +9:18:59 -> +9:18) 09:28. Before,
    the first raised OverflowError (500) and the second wrote the year as "1"."""
    from app.encode import timestamps_to_text

    arr = pa.chunked_array([pa.array([dt.datetime(1, 1, 1, 0, 10, tzinfo=dt.timezone.utc)],
                                     pa.timestamp("us", tz="UTC"))])
    assert timestamps_to_text(arr, "America/New_York") == ["0000-12-31T19:14:00-04:56"]
    assert timestamps_to_text(arr, "Asia/Tokyo") == ["0001-01-01T09:28:00+09:18"]
