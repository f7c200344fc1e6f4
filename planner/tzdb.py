"""UTC offsets of an IANA time zone, read from its TZif file (RFC 8536).

The one planner module that reads files: the IANA time zone database, read-only, found
where and as ``zoneinfo`` (the standard library, which the planner uses everywhere) finds
it -- ``zoneinfo.TZPATH``, then the ``tzdata`` package -- and cached per zone. zoneinfo
does not expose a zone's transitions, which ``whole_offsets_from`` needs: from which
instant on every offset of a zone is a whole number of a unit, so that sub-day ``trunc``
in that zone equals the UTC floor (planner/emit_keys.py ``_trunc_micros``).
tests/test_planner_layers.py allows this module's reads and no other.
"""

from __future__ import annotations

import functools
import os
import re
import struct
import zoneinfo

#: Microseconds from 0001-01-01T00:00:00Z (the first instant a time key shows) to 1970.
YEAR1_MICROS = 62_135_596_800_000_000


#: POSIX TZ rule (the TZif footer, RFC 8536 section 3.3): std name, offset, [dst name [offset]]
_TZ_RULE = re.compile(r"^(?:<[^>]*>|[A-Za-z]+)([+-]?\d{1,3}(?::\d{2}){0,2})"
                      r"(?:(?:<[^>]*>|[A-Za-z]+)([+-]?\d{1,3}(?::\d{2}){0,2})?)?(?:,.*)?$")


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
        data = _tzif_bytes(tz)
        times, offsets, rule = _read_tzif(data)
    except (OSError, ValueError, struct.error):
        return None
    if rule:
        m = _TZ_RULE.match(rule)
        if m is None:
            return None
        std = _rule_seconds(m.group(1))
        dst = _rule_seconds(m.group(2)) if m.group(2) else std - 3600
        if std % unit or dst % unit:
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
