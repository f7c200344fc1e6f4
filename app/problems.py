"""Problem details (RFC 9457) with JSON Pointers (RFC 6901) into the request body."""

from __future__ import annotations

import re
import typing
from typing import Any

from fastapi import Request
from fastapi.exceptions import RequestValidationError
from starlette.responses import Response

from app.encode import dumps
from planner.errors import PlanError, nearest, pointer
from planner.model import FILTER_TAGS, AnyOf, BatchRequest, ChartRequest, NotOf, Predicate

PROBLEM_JSON = "application/problem+json"

#: Every problem ``type`` this service answers (``/problems/<slug>``, RFC 9457 section 3.1.1):
#: slug -> (title, HTTP status(es), what it means and what to do). ``/problems/<slug>`` serves
#: the entry as a short page (app/routes_operations.py); a test checks that every slug raised in
#: app/ and planner/ is listed here.
PROBLEM_TYPES: dict[str, tuple[str, str, str]] = {
    "invalid-request": ("The request does not match the chart request schema", "422",
                        "A member is missing, unknown or of the wrong type. `pointer` names "
                        "the first field at fault; `errors` lists every problem found."),
    "unknown-source": ("Unknown source", "404",
                       "The `source` is not configured (or not granted to the API key). "
                       "`suggestions` lists the nearest names; `GET /v1/sources` lists all."),
    "unknown-column": ("Unknown column", "422",
                       "The column is not in the source's introspected catalog. "
                       "`suggestions` lists the nearest column names."),
    "unknown-dialect": ("Unknown dialect", "400",
                        "The `dialect` query parameter of `POST /v1/sql` names no dialect "
                        "sluice can generate; the detail lists the ones it can."),
    "type-mismatch": ("Option does not fit the column type", "422",
                      "The option at `pointer` needs another kind of column (for example "
                      "`trunc` on a number, `sum` of text). `GET /v1/sources/{name}` shows "
                      "each column's kind."),
    "bad-value": ("Bad value", "422",
                  "A value cannot be used as given (out of range, not finite, not parseable "
                  "for the column's kind)."),
    "bad-time-zone": ("Bad time zone", "422",
                      "`tz` must be an IANA time zone name such as `Europe/Berlin` or `UTC`."),
    "too-many-bins": ("Too many bins", "422",
                      "The bin layout would make more bins than the server allows; use a "
                      "larger width, fewer bins or limits."),
    "limit-exceeded": ("Request exceeds a limit", "422",
                       "The request is larger than this server allows (channels, filters, "
                       "list lengths, `limit`); the detail names the `[limits]` key."),
    "name-too-long": ("Name too long", "422", "An output name is longer than allowed."),
    "unsupported": ("Not supported by the target engine", "422",
                    "The engine of this source (or the `dialect` asked for) lacks a "
                    "capability the request needs; the README's capability table lists "
                    "what each engine can do."),
    "bad-filter-sql": ("filter_sql is not allowed", "422",
                       "`filter_sql` uses something outside the allow-list (catalog columns, "
                       "literals, comparisons, AND/OR/NOT, IN, BETWEEN, IS NULL, LIKE, "
                       "arithmetic, a few scalar functions), or the engine could not "
                       "evaluate it."),
    "not-acceptable": ("Not acceptable", "406",
                       "The `Accept` header names no format this route answers in. "
                       "`POST /v1/chart` answers `application/json`, "
                       "`application/vnd.apache.arrow.stream`, `text/csv` and "
                       "`application/vnd.apache.parquet`; `supported` lists them."),
    "unauthorized": ("Unauthorized", "401",
                     "API keys are configured and the request carries none, or an unknown "
                     "one: send `X-API-Key: <key>` or `Authorization: Bearer <key>`."),
    "forbidden-source": ("Source not granted", "403",
                         "The API key is valid but not granted this source."),
    "body-too-large": ("Request body too large", "413",
                       "The body is larger than the server's `max_body_bytes`."),
    "bad-request": ("Malformed request", "400",
                    "The request could not be read (for example an undecodable body)."),
    "not-found": ("Not found", "404", "No route has this path."),
    "method-not-allowed": ("Method not allowed", "405",
                           "The route exists but not for this HTTP method."),
    "http-error": ("HTTP error", "4xx", "A protocol-level error; the detail says which."),
    "overloaded": ("Source busy", "503",
                   "The source is already running its `max_concurrent` statements; retry "
                   "after the `Retry-After` seconds."),
    "source-unavailable": ("Source unavailable", "503",
                           "The source's engine cannot be reached or opened; retry after "
                           "`Retry-After` seconds, and see `GET /readyz`."),
    "row-condition-invalid": ("Row condition invalid", "503",
                              "The API key's row condition (`[[keys]] rows`) no longer fits "
                              "the source's columns; nothing is answered for this key until "
                              "the operator fixes the config (the detail names the key)."),
    "statement-timeout": ("Statement timed out", "504",
                          "The statement ran longer than the source's "
                          "`statement_timeout_ms` and was cancelled; narrow the request."),
    "engine-error": ("The engine rejected the statement", "502",
                     "The engine refused SQL that sluice generated; this is logged and is a "
                     "defect to report with the request."),
    "internal": ("Internal error", "500",
                 "sluice failed to answer; the error is logged under the `request_id`."),
    "unsupported-column": ("Column cannot be profiled", "422",
                           "The column's engine type is one sluice cannot group or order "
                           "(e.g. a list, map or binary type), so it has no profile."),
    "body-timeout": ("Request body too slow", "408",
                     "The request body did not arrive within the server's `body_timeout_s`; "
                     "the connection is closed. Send the body at once."),
    "operator-only": ("Operator key needed", "403",
                      "With API keys configured, `/metrics` answers only keys marked "
                      "`operator = true`, since it names every source."),
    "shutting-down": ("Server shutting down", "503",
                      "The process received SIGTERM and cut the request while draining; "
                      "retry on another replica or after the restart (Retry-After)."),
    "unsupported-media-type": ("The body must be JSON", "415",
                               "A POST to `/v1/*` needs `Content-Type: application/json`; "
                               "the body was not read."),
    "bad-name": ("Output name not allowed", "422",
                 "An output `name` starts or ends with white space, holds a control character, "
                 "or (on MariaDB) a character beyond U+FFFF; `pointer` names it."),
    "out-of-range": ("Value outside the comparable range", "422",
                     "An instant falls outside years 1 to 9999 in UTC (after applying its "
                     "offset or the request's `tz`), so no engine can compare it."),
    "superseded": ("Replaced by a newer request", "409",
                   "A newer request with the same `session` (and the same API key) arrived "
                   "while this one ran: its statements were cancelled and it has no answer. "
                   "Dashboards send one session per view and read only the newest answer."),
    "client-closed": ("Client closed the request", "499",
                      "The client disconnected before the answer, so its statements were "
                      "cancelled (the status shows in logs and metrics; nobody receives it)."),
    "bad-layout": ("Bin layout cannot bin the data", "422",
                   "The bin width, origin or limits give edges that are not distinct finite "
                   "numbers (or more than 10,000 bins); `pointer` names the field."),
}


class Problem(Exception):
    def __init__(self, status: int, slug: str, title: str, detail: str, ptr: str | None = None,
                 **extra: Any) -> None:
        super().__init__(detail)
        self.status, self.slug, self.title, self.detail, self.ptr = status, slug, title, detail, ptr
        self.extra = extra
        self.headers: dict[str, str] = extra.pop("headers", None) or {}

    def body(self, instance: str | None = None) -> dict[str, Any]:
        out: dict[str, Any] = {"type": f"/problems/{self.slug}", "title": self.title,
                               "status": self.status, "detail": self.detail}
        if self.ptr is not None:
            out["pointer"] = self.ptr
            out.setdefault("errors", [{"pointer": self.ptr, "detail": self.detail}])
        if instance:
            out["instance"] = instance
        out.update({k: v for k, v in self.extra.items() if v is not None})
        return out


def problem_response(p: Problem, instance: str | None = None) -> Response:
    body = p.body(instance)
    try:
        raw = dumps(body)
    except TypeError:  # text that is not UTF-8 (a lone surrogate echoed from the request)
        raw = dumps(_printable(body))
    return Response(raw, status_code=p.status, media_type=PROBLEM_JSON, headers=p.headers)


def _printable(v: Any) -> Any:
    """``v`` with every string made UTF-8 safe (lone surrogates written as \\udXXX)."""
    if isinstance(v, str):
        return v.encode("utf-8", "backslashreplace").decode("utf-8")
    if isinstance(v, dict):
        return {_printable(k): _printable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_printable(x) for x in v]
    return v


def from_plan_error(e: PlanError) -> Problem:
    return Problem(e.status, e.slug, e.title, e.detail, e.pointer, suggestions=e.suggestions)


#: member tags pydantic puts into locations of union errors (no request field is named so)
_UNION_MEMBER = re.compile(r"^(bool|int|float|str|function-(after|before|wrap|plain)\[.*\])$")
_FILTER_MODELS = {"predicate": Predicate, "any": AnyOf, "not": NotOf}


def _models_in(annotation: Any) -> list[type]:
    """The pydantic models an annotation can hold (through Optional, list, Union, Annotated)."""
    if isinstance(annotation, type) and hasattr(annotation, "model_fields"):
        return [annotation]
    return [m for a in typing.get_args(annotation) for m in _models_in(a)]


def allowed_keys(root: type, loc: tuple[Any, ...]) -> list[str]:
    """The keys the model at ``loc`` (a pydantic location, without the key itself) accepts."""
    models = [root]
    for p in loc:
        if isinstance(p, int):
            continue
        if p in _FILTER_MODELS and any(m in _FILTER_MODELS.values() for m in models):
            models = [_FILTER_MODELS[p]]
            continue
        nxt: list[type] = []
        for m in models:
            for name, f in m.model_fields.items():
                if p in (name, f.alias):
                    nxt += _models_in(f.annotation)
        models = nxt
    keys: list[str] = []
    for m in models:
        keys += [f.alias or n for n, f in m.model_fields.items()]
    return sorted(set(keys))


def loc_to_pointer(loc: tuple[Any, ...]) -> str:
    """Pydantic error location -> JSON Pointer into the body (drops 'body' and union tags)."""
    parts = list(loc)
    if parts and parts[0] == "body":
        parts = parts[1:]
    out: list[Any] = []
    expect_tag = False
    for p in parts:
        if isinstance(p, str) and _UNION_MEMBER.match(p):
            continue  # which member of a union failed (e.g. eq's 'int' or 'str'): no body part
        if expect_tag and p in FILTER_TAGS:
            expect_tag = False
            continue
        out.append(p)
        # a filter sits at where[i], brush[i], any[i] and under not: pydantic adds its union
        # tag next
        prev = out[-2] if len(out) >= 2 else None
        expect_tag = (isinstance(p, int) and prev in ("where", "brush", "any")) or p == "not"
    return pointer(*out)


def _message(err: dict[str, Any]) -> str:
    msg = err.get("msg", "invalid value")
    if err.get("type") == "extra_forbidden":
        name = err.get("loc", ("?",))[-1]
        return f"unknown field {name!r}"
    if err.get("type") == "missing":
        return "field required"
    if err.get("type") == "json_invalid":
        return f"the body is not valid JSON ({err.get('ctx', {}).get('error', 'parse error')})"
    if "unable to parse raw data as a unicode string" in msg:
        return ("text must be valid Unicode: a lone UTF-16 surrogate such as \\ud800 is not "
                "(RFC 8259 section 8.2)")
    if msg.startswith("Value error, "):
        msg = msg[len("Value error, "):]
    return msg


def from_validation_error(exc: RequestValidationError, root: type = ChartRequest) -> Problem:
    """``root``: the body's model (the nearest valid keys of an unknown one come from it)."""
    errors = []
    suggestions: list[str] = []
    seen: set[tuple[str, str]] = set()
    for err in exc.errors():
        loc = tuple(err.get("loc", ()))
        ptr = loc_to_pointer(loc)
        if err.get("type") == "json_invalid":
            ptr = ""
        detail = _message(err)
        if err.get("type") == "extra_forbidden" and loc:
            body_loc = loc[1:] if loc[0] == "body" else loc
            near = nearest(str(loc[-1]), allowed_keys(root, body_loc[:-1]))
            if near:
                detail += f"; did you mean {', '.join(repr(n) for n in near)}?"
                suggestions = suggestions or near
        if (ptr, detail) in seen:
            continue
        seen.add((ptr, detail))
        # a union reports each member's failure: its own check's message says most
        errors.append({"pointer": ptr, "detail": detail,
                       "_rank": (-ptr.count("/"), err.get("type") != "value_error")})
    # the deepest pointer first: it names the field at fault most precisely
    errors.sort(key=lambda e: e["_rank"])
    for e in errors:
        e.pop("_rank")
    first = errors[0] if errors else {"pointer": "", "detail": "invalid request"}
    detail = first["detail"] + (f" (at {first['pointer']})" if first["pointer"] else "")
    if len(errors) > 1:
        detail += f"; {len(errors) - 1} more problem(s) in 'errors'"
    return Problem(422, "invalid-request", "The request does not match the chart request schema",
                   detail, first["pointer"], errors=errors, suggestions=suggestions or None)


async def validation_handler(request: Request, exc: RequestValidationError) -> Response:
    root = BatchRequest if request.url.path.rstrip("/").endswith("/batch") else ChartRequest
    return problem_response(from_validation_error(exc, root), request.url.path)
