"""Errors the planner raises for a request it cannot plan.

Each carries an RFC 6901 JSON Pointer into the request body so the service can answer with
an RFC 9457 problem document that points at the field at fault.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable, Sequence


def pointer(*parts: str | int) -> str:
    """Build a JSON Pointer (RFC 6901) from path parts, escaping '~' and '/'."""
    out = []
    for p in parts:
        s = str(p).replace("~", "~0").replace("/", "~1")
        out.append(s)
    return "/" + "/".join(out) if out else ""


class PlanError(Exception):
    """A request the planner refuses. ``status`` is the HTTP status the service should use."""

    def __init__(
        self,
        pointer: str,
        detail: str,
        *,
        slug: str = "invalid-request",
        title: str = "The chart request cannot be planned",
        status: int = 422,
        suggestions: Sequence[str] | None = None,
    ) -> None:
        super().__init__(detail)
        self.pointer = pointer
        self.detail = detail
        self.slug = slug
        self.title = title
        self.status = status
        self.suggestions = list(suggestions) if suggestions else None


class Unsupported(PlanError):
    """A construct the target dialect cannot express faithfully."""

    def __init__(self, pointer: str, dialect: str, feature: str) -> None:
        super().__init__(
            pointer,
            f"not supported on {dialect}: {feature}",
            slug="unsupported",
            title="Not supported by the target engine",
        )
        self.feature = feature
        self.dialect = dialect


def nearest(name: str, candidates: Iterable[str], n: int = 3) -> list[str]:
    """The closest valid names to a misspelt one (case-insensitive similarity)."""
    cands = list(candidates)
    lowered = {c.lower(): c for c in cands}
    hits = difflib.get_close_matches(name.lower(), list(lowered), n=n, cutoff=0.5)
    out = [lowered[h] for h in hits]
    if not out:
        # fall back to substring matches, then to the first few names
        out = [c for c in cands if name.lower() in c.lower() or c.lower() in name.lower()][:n]
    return out
