"""UTC offsets of an IANA time zone, read from its TZif file (RFC 8536).

The one planner module that reads files: the IANA time zone database, read-only, found
where and as ``zoneinfo`` (the standard library, which the planner uses everywhere) finds
it -- ``zoneinfo.TZPATH``, then the ``tzdata`` package -- and cached per zone. zoneinfo
does not expose a zone's transitions, which ``whole_offsets_from`` needs: from which
instant on every offset of a zone is a whole number of a unit, so that sub-day ``trunc``
in that zone equals the UTC floor (planner/emit_keys.py ``_trunc_micros``); and
``zone_offsets``, a zone's transitions and its POSIX rule, which the MySQL dialect writes
into SQL where CONVERT_TZ stops converting.
tests/test_planner_layers.py allows this module's reads and no other.
"""

from __future__ import annotations

import functools
import os
import re
import struct
import zoneinfo
from typing import NamedTuple

#: Microseconds from 0001-01-01T00:00:00Z (the first instant a time key shows) to 1970.
YEAR1_MICROS = 62_135_596_800_000_000


def _rule_seconds(text: str) -> int:
    sign = -1 if text.startswith("-") else 1
    parts = [int(x) for x in text.lstrip("+-").split(":")] + [0, 0]
    return sign * (parts[0] * 3600 + parts[1] * 60 + parts[2])


@functools.lru_cache(maxsize=512)
def whole_offsets_from(tz: str, unit_us: int) -> int | None:
    """Epoch microseconds from which every UTC offset of ``tz`` -- its transitions and the
    rule after them, read from the zone's TZif file (RFC 8536) where zoneinfo finds it --
    is a whole number of the unit (-YEAR1_MICROS: always), or None (never, or unreadable).
    From there on, the wall-clock remainder of an instant equals its UTC remainder, so
    ``trunc`` (the instant minus that remainder) is the UTC floor."""
    unit = unit_us // 1_000_000
    try:
        times, offsets, rule = zone_offsets(tz)
    except (OSError, ValueError):
        return None
    if any(off % unit for off in (rule.std, rule.dst) if off is not None):
        return None
    # offsets[0] holds before times[0], offsets[i + 1] from times[i] on
    bad = [i for i, off in enumerate(offsets) if off % unit]
    if not bad:
        return -YEAR1_MICROS
    last = bad[-1]
    if last >= len(times):  # the offset in force after the last transition
        return None
    return max(times[last] * 1_000_000, -YEAR1_MICROS)


def _tzif_bytes(tz: str) -> bytes:
    """The TZif file of ``tz``, searched like zoneinfo: TZPATH, then the tzdata package."""
    parts = tz.split("/")
    if any(p in ("", ".", "..") for p in parts):
        raise ValueError(tz)
    for root in zoneinfo.TZPATH:
        path = os.path.join(root, *parts)
        if os.path.isfile(path):
            with open(path, "rb") as f:
                return f.read()
    import importlib.resources

    return importlib.resources.files("tzdata").joinpath("zoneinfo", *parts).read_bytes()


def _read_tzif(data: bytes) -> tuple[list[int], list[int], str]:
    """(transition times in epoch seconds, the UTC offset before the first and after each
    transition, the footer rule) of a version 2+ TZif file (RFC 8536: the v1 block is
    skipped, the 64-bit block read)."""
    def header(at: int) -> tuple[int, ...]:
        if data[at:at + 4] != b"TZif" or data[at + 4] < ord("2"):
            raise ValueError("not a version 2+ TZif file")
        return struct.unpack(">6l", data[at + 20:at + 44])

    isut, isstd, leap, timecnt, typecnt, charcnt = header(0)
    at = 44 + timecnt * 5 + typecnt * 6 + charcnt + leap * 8 + isstd + isut
    isut, isstd, leap, timecnt, typecnt, charcnt = header(at)
    at += 44
    times = list(struct.unpack(f">{timecnt}q", data[at:at + 8 * timecnt]))
    at += 8 * timecnt
    idx = list(data[at:at + timecnt])
    at += timecnt
    utoff = [struct.unpack(">l", data[at + 6 * i:at + 6 * i + 4])[0] for i in range(typecnt)]
    at += 6 * typecnt + charcnt + leap * 12 + isstd + isut
    footer = data[at:].split(b"\n")
    rule = footer[1].decode("ascii") if len(footer) > 2 else ""
    return times, [utoff[0]] + [utoff[i] for i in idx], rule


# -- a zone's offsets as data, for engines whose own conversion stops at a range -----------

#: A POSIX TZ day rule (RFC 8536 section 3.3, POSIX.1-2017 section 8.3): ("M", month, week,
#: weekday) -- week 5 is the last -- or ("J", day 1..365 never counting February 29, 0, 0)
#: or ("n", day 0..365 counting it, 0, 0), with the local time of day in seconds (may be
#: negative or past 24 h, RFC 8536 section 3.3.1).
DayRule = tuple[str, int, int, int, int]


class ZoneRule(NamedTuple):
    """The footer rule of a zone: UTC offsets (seconds east of UTC) of standard and daylight
    time, and the day rules on which daylight time starts and ends (None: no daylight time)."""

    std: int
    dst: int | None = None
    start: DayRule | None = None
    end: DayRule | None = None


_NAME = r"(?:<[^>]*>|[A-Za-z]{3,})"
_OFFSET = r"([+-]?\d{1,3}(?::\d{2}){0,2})"
_FULL_RULE = re.compile(rf"^{_NAME}{_OFFSET}(?:{_NAME}{_OFFSET}?(?:,([^,]+),([^,]+))?)?$")
_DAY = re.compile(r"^(?:M(\d{1,2})\.(\d)\.(\d)|J(\d{1,3})|(\d{1,3}))(?:/([+-]?\d{1,3}(?::\d{2}){0,2}))?$")


def _day_rule(text: str) -> DayRule:
    m = _DAY.match(text)
    if m is None:
        raise ValueError(text)
    secs = _rule_seconds(m.group(6)) if m.group(6) else 7200  # POSIX default 02:00:00
    if m.group(1):
        month, week, weekday = int(m.group(1)), int(m.group(2)), int(m.group(3))
        if not (1 <= month <= 12 and 1 <= week <= 5 and weekday <= 6):
            raise ValueError(text)
        return ("M", month, week, weekday, secs)
    if m.group(4):
        day = int(m.group(4))
        if not 1 <= day <= 365:
            raise ValueError(text)
        return ("J", day, 0, 0, secs)
    day = int(m.group(5))
    if day > 365:
        raise ValueError(text)
    return ("n", day, 0, 0, secs)


def parse_rule(text: str) -> ZoneRule:
    """A TZif footer (a POSIX TZ string) as a ZoneRule; ValueError when it is not one, or
    names daylight time without its dates (POSIX leaves those to the implementation; zic
    never writes one)."""
    m = _FULL_RULE.match(text)
    if m is None or (m.group(3) is None and text[m.end(1):]):
        raise ValueError(text)
    std = -_rule_seconds(m.group(1))  # POSIX offsets count west of UTC
    if m.group(3) is None:
        return ZoneRule(std)
    dst = -_rule_seconds(m.group(2)) if m.group(2) else std + 3600
    return ZoneRule(std, dst, _day_rule(m.group(3)), _day_rule(m.group(4)))


@functools.lru_cache(maxsize=512)
def zone_offsets(tz: str) -> tuple[tuple[int, ...], tuple[int, ...], ZoneRule]:
    """(transition times in epoch seconds from year 1 on, the UTC offset in seconds before
    the first and after each, the rule after the last) of ``tz``, from its TZif file
    (RFC 8536). Placeholder transitions that change no offset are dropped. ValueError or
    OSError when the zone cannot be read."""
    try:
        times, offsets, rule = _read_tzif(_tzif_bytes(tz))
    except struct.error as e:  # a truncated file
        raise ValueError(f"{tz}: {e}") from None
    zone_rule = parse_rule(rule) if rule else ZoneRule(offsets[-1])
    kept_t: list[int] = []
    kept_o = [offsets[0]]
    for t, off in zip(times, offsets[1:]):
        if t < -YEAR1_MICROS // 1_000_000:  # zic's "big bang" marker before year 1
            kept_o[0] = off
            continue
        if off != kept_o[-1]:
            kept_t.append(t)
            kept_o.append(off)
    return tuple(kept_t), tuple(kept_o), zone_rule
