"""A chart answer (the columnar JSON payload of ``ChartService.to_json``) as terminal text:
an aligned table, CSV (RFC 4180) or JSON, for ``sluice chart``.

Values are the JSON answer's own: timestamps are its RFC 3339 strings, decimals and floats
print in Python's shortest round-trip form (``repr``), so no digits are lost or invented.
In the table a NULL prints as ``null``; in CSV as an empty field (RFC 4180 has no NULL).
"""

from __future__ import annotations

import csv
import io
import math
from typing import Any

from app.encode import dumps

NUMERIC_TYPES = frozenset({"integer", "double", "decimal"})


def _cell(v: Any, null: str) -> str:
    if v is None:
        return null
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else null
    return str(v)


def _rows(answer: dict[str, Any], null: str) -> tuple[list[str], list[list[str]]]:
    names = [c["name"] for c in answer["columns"]]
    data = answer["data"]
    n = len(data[names[0]]) if names else 0
    return names, [[_cell(data[c][i], null) for c in names] for i in range(n)]


def table_text(answer: dict[str, Any]) -> str:
    """Header, a rule, one line per row; numbers right-aligned, everything else left."""
    names, rows = _rows(answer, "null")
    if not names:
        return ""
    right = [c.get("type") in NUMERIC_TYPES for c in answer["columns"]]
    widths = [max([len(h)] + [len(r[i]) for r in rows]) for i, h in enumerate(names)]

    def line(cells: list[str]) -> str:
        return "  ".join(c.rjust(w) if r else c.ljust(w)
                         for c, w, r in zip(cells, widths, right)).rstrip()

    out = [line(names), "  ".join("-" * w for w in widths)]
    out += [line(r) for r in rows]
    return "\n".join(out) + "\n"


def csv_text(answer: dict[str, Any]) -> str:
    names, rows = _rows(answer, "")
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\r\n")  # RFC 4180: CRLF line breaks
    w.writerow(names)
    w.writerows(rows)
    return buf.getvalue()


def json_bytes(answer: dict[str, Any]) -> bytes:
    return dumps(answer)


def notes(answer: dict[str, Any]) -> list[str]:
    """What the table alone would hide: truncation, rows outside limits, approximation."""
    st = answer.get("stats") or {}
    out = [f"{st.get('result_rows', 0)} rows; {st.get('matched_rows', 0)} of "
           f"{st.get('source_rows', 0)} source rows matched; "
           f"{st.get('statements', 0)} statement(s)"]
    if st.get("truncated"):
        out.append(f"truncated: {st.get('result_rows')} of {st.get('groups')} groups shown "
                   "(raise limit)")
    for ch, n in (st.get("outside_limits") or {}).items():
        if n:
            out.append(f"{n} rows outside the limits of {ch}")
    if answer.get("approximate"):
        appr = answer.get("approximation") or {}
        out.append(f"approximate: {', '.join(appr.get('columns', []))} "
                   f"({appr.get('method')})")
    if answer.get("reduced"):
        out.append(f"reduced: {answer['reduced'].get('method')} line of "
                   f"{answer['reduced'].get('input_rows')} points")
    return out
