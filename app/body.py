"""Request bodies checked before the JSON reaches FastAPI and pydantic.

Valid JSON can still be something no part of sluice should recurse into or carry: nesting
thousands of levels deep (the decoder, pydantic, the planner and sqlglot all recurse), an
integer of 5,000 digits (beyond Python's int-parsing limit), an integer beyond 64 bits, a
number that overflows a double (``1e400``), the non-JSON tokens ``NaN``/``Infinity`` that
Python's decoder accepts, or a lone UTF-16 surrogate (``"\\ud800"``, not a Unicode scalar
value, RFC 8259 section 8.2) that no UTF-8 encoder can write back. Each becomes a 422
problem whose JSON Pointer (RFC 6901) names the value; a body that is not JSON by its
Content-Type is a 415 that says which header to send.

``check_body`` is called by ``app.limits.BodyLimitMiddleware``, which has the whole body
in hand already.
"""

from __future__ import annotations

import json
import math
import re
from typing import Any

from app.problems import Problem
from planner.errors import pointer
from planner.model import INT_MAX, INT_MIN, MAX_FILTER_DEPTH

#: deepest nesting of arrays and objects in a request body (a chart request needs ~40 at
#: the deepest filter nesting, MAX_FILTER_DEPTH)
MAX_JSON_DEPTH = 64
#: Python refuses to parse longer integers (sys.int_info.default_max_str_digits)
_MAX_DIGITS = 4300
_SURROGATE = re.compile("[\ud800-\udfff]")
_TOKEN = re.compile(r'\s*(?:("(?:[^"\\]|\\.)*")|([\[\]{}:,])|(-?[0-9][0-9.eE+\-]*)'
                    r'|(true|false|null|NaN|-?Infinity))', re.S)


def _printable(text: str) -> str:
    """Text with lone surrogates written as ``\\udXXX`` (the problem itself must be UTF-8)."""
    return text.encode("utf-8", "backslashreplace").decode("utf-8")


def _ptr(path: list[Any]) -> str:
    return _printable(pointer(*path))


def _bad(ptr: str, detail: str, status: int = 422) -> Problem:
    return Problem(status, "invalid-request", "The request does not match the chart request "
                   "schema", f"{detail} (at {ptr or 'the body'})", ptr)


def is_json_type(content_type: str | None) -> bool:
    if not content_type:
        return False
    main = content_type.split(";", 1)[0].strip().lower()
    return main == "application/json" or (main.startswith("application/")
                                           and main.endswith("+json"))


def check_body(body: bytes, content_type: str | None) -> Problem | None:
    """The problem with a request body meant for a JSON route, or None when FastAPI may
    parse it (plain syntax errors are left to FastAPI's own json_invalid answer)."""
    if not body:
        return None
    if not is_json_type(content_type):
        got = f"Content-Type {content_type!r}" if content_type else "no Content-Type"
        return Problem(415, "unsupported-media-type", "The body must be JSON",
                       f"the body was sent with {got}; send the chart request as JSON with "
                       "the header 'Content-Type: application/json' (curl: -H 'Content-Type: "
                       "application/json')", "")
    try:
        text = body.decode("utf-8")
    except UnicodeDecodeError as e:
        return _bad("", f"the body is not UTF-8 (byte {e.start}); JSON text is UTF-8 (RFC 8259 "
                    "section 8.1)", 400)
    try:
        doc = json.loads(text)
    except json.JSONDecodeError:
        return None  # FastAPI answers with the parser's position
    except (RecursionError, ValueError):  # too deep, or an integer beyond the parser's limit
        return _scan(text) or _bad("", "the body cannot be decoded")
    return _walk(doc)


def _walk(doc: Any) -> Problem | None:
    """Iterative walk of the decoded body in document order: the first offender is named.
    Only containers go on the stack; scalars are checked where they sit (a 5,000-value list
    costs ~1 ms)."""
    if not isinstance(doc, (dict, list)):  # not an object: FastAPI/pydantic say so
        bad = _scalar(doc)
        return _bad("", bad) if bad is not None else None
    stack: list[tuple[Any, tuple, int]] = [(doc, (), 0)]
    while stack:
        v, path, nested = stack.pop()
        if len(path) >= MAX_JSON_DEPTH:
            return _bad(_ptr(list(path)), f"the body nests arrays/objects deeper than "
                        f"{MAX_JSON_DEPTH} levels")
        if nested > MAX_FILTER_DEPTH and isinstance(v, dict):  # a filter object
            return _bad(_ptr(list(path)), f"any/not nest {nested} levels deep; at most "
                        f"{MAX_FILTER_DEPTH}")
        if isinstance(v, dict):
            items: Any = v.items()
            for k in v:
                if _SURROGATE.search(k):
                    return _bad(_ptr(list(path) + [k]), f"the key {_printable(repr(k))} "
                                "contains a lone UTF-16 surrogate: not valid Unicode (RFC "
                                "8259 section 8.2)")
        else:
            if v and _plain_list(v):
                continue
            items = enumerate(v)
        later = []
        for k, c in items:
            if isinstance(c, (dict, list)):
                later.append((c, path + (k,), nested + (k == "any" or k == "not")))
            else:
                bad = _scalar(c)
                if bad is not None:
                    return _bad(_ptr(list(path) + [k]), bad)
        stack.extend(reversed(later))
    return None


def _plain_list(v: list) -> bool:
    """A list of strings or integers with nothing to report, checked at C speed (long
    ``in`` lists); anything else is walked item by item."""
    first = type(v[0])
    if first is str and all(type(c) is str for c in v):
        return _SURROGATE.search("".join(v)) is None
    if first is int and all(type(c) is int for c in v):
        return INT_MIN <= min(v) and max(v) <= INT_MAX
    return False


def _scalar(v: Any) -> str | None:
    if isinstance(v, str):
        m = _SURROGATE.search(v)
        if m is not None:
            return (f"the text contains a lone UTF-16 surrogate (\\u{ord(m.group()):04x} at "
                    f"character {m.start()}): not valid Unicode (RFC 8259 section 8.2)")
    elif isinstance(v, bool) or v is None:
        return None
    elif isinstance(v, int):
        if not INT_MIN <= v <= INT_MAX:
            return _int_detail(len(str(abs(v))))
    elif isinstance(v, float) and not math.isfinite(v):
        return ("the number is outside the double range (about +-1.8e308), or is "
                "NaN/Infinity, which JSON does not have (RFC 8259 section 6)")
    return None


def _int_detail(digits: int) -> str:
    return (f"integers must lie in [-2^63, 2^64-1]; this one has {digits} digits (write an "
            "approximate value as a float, e.g. 1e30)")


def _scan(text: str) -> Problem | None:
    """Token scan (no recursion) for a body the decoder refused: the pointer of the first
    container deeper than MAX_JSON_DEPTH, or of the first over-long integer."""
    frames: list[list[Any]] = []  # [kind, key or index]
    pos, n = 0, len(text)
    while pos < n:
        m = _TOKEN.match(text, pos)
        if m is None or m.end() == pos:
            return None
        pos = m.end()
        string, punct, number = m.group(1), m.group(2), m.group(3)
        if punct in ("{", "["):
            nested = sum(1 for f in frames if f[0] == "obj" and f[1] in ("any", "not"))
            if punct == "{" and nested > MAX_FILTER_DEPTH:
                return _bad(_ptr([f[1] for f in frames]), f"any/not nest {nested} levels deep; "
                            f"at most {MAX_FILTER_DEPTH}")
            if len(frames) >= MAX_JSON_DEPTH:
                return _bad(_ptr([f[1] for f in frames]), "the body nests arrays/objects "
                            f"deeper than {MAX_JSON_DEPTH} levels")
            frames.append(["obj", None] if punct == "{" else ["arr", 0])
        elif punct in ("}", "]"):
            if frames:
                frames.pop()
        elif punct == ",":
            if frames and frames[-1][0] == "arr":
                frames[-1][1] += 1
            elif frames:
                frames[-1][1] = None
        elif string is not None and frames and frames[-1][0] == "obj" and frames[-1][1] is None:
            try:
                frames[-1][1] = json.loads(string)
            except ValueError:
                frames[-1][1] = string[1:-1]
        elif number is not None and not any(c in number for c in ".eE"):
            digits = len(number.lstrip("-"))
            if digits > 19 and (digits > _MAX_DIGITS or not INT_MIN <= int(number) <= INT_MAX):
                return _bad(_ptr([f[1] for f in frames]), _int_detail(digits))
    return None
