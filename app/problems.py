"""Problem details (RFC 9457) with JSON Pointers (RFC 6901) into the request body."""

from __future__ import annotations

from typing import Any

from fastapi import Request
from fastapi.exceptions import RequestValidationError
from starlette.responses import Response

from app.encode import dumps
from planner.errors import PlanError, pointer
from planner.model import FILTER_TAGS

PROBLEM_JSON = "application/problem+json"


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
    return Response(dumps(p.body(instance)), status_code=p.status, media_type=PROBLEM_JSON,
                    headers=p.headers)


def from_plan_error(e: PlanError) -> Problem:
    return Problem(e.status, e.slug, e.title, e.detail, e.pointer, suggestions=e.suggestions)


def loc_to_pointer(loc: tuple[Any, ...]) -> str:
    """Pydantic error location -> JSON Pointer into the body (drops 'body' and union tags)."""
    parts = list(loc)
    if parts and parts[0] == "body":
        parts = parts[1:]
    out: list[Any] = []
    expect_tag = False
    for p in parts:
        if expect_tag and p in FILTER_TAGS:
            expect_tag = False
            continue
        out.append(p)
        # a filter sits at where[i], any[i] and under not: pydantic adds its union tag next
        prev = out[-2] if len(out) >= 2 else None
        expect_tag = (isinstance(p, int) and prev in ("where", "any")) or p == "not"
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
    if msg.startswith("Value error, "):
        msg = msg[len("Value error, "):]
    return msg


def from_validation_error(exc: RequestValidationError) -> Problem:
    errors = []
    for err in exc.errors():
        ptr = loc_to_pointer(tuple(err.get("loc", ())))
        if err.get("type") == "json_invalid":
            ptr = ""
        errors.append({"pointer": ptr, "detail": _message(err)})
    # the deepest pointer first: it names the field at fault most precisely
    errors.sort(key=lambda e: -e["pointer"].count("/"))
    first = errors[0] if errors else {"pointer": "", "detail": "invalid request"}
    detail = first["detail"] + (f" (at {first['pointer']})" if first["pointer"] else "")
    if len(errors) > 1:
        detail += f"; {len(errors) - 1} more problem(s) in 'errors'"
    return Problem(422, "invalid-request", "The request does not match the chart request schema",
                   detail, first["pointer"], errors=errors)


async def validation_handler(request: Request, exc: RequestValidationError) -> Response:
    return problem_response(from_validation_error(exc), request.url.path)
