"""sqlglot helpers the emit modules share: a quoted column reference and a quoted table.

Part of the emit stage (``planner.emit_*``, entry points in ``planner.compile``). Pure.
"""

from __future__ import annotations

from sqlglot import exp


def _ref(name: str, table: str | None = None) -> exp.Column:
    return exp.Column(this=exp.to_identifier(name, quoted=True),
                      table=exp.to_identifier(table, quoted=True) if table else None)


def _table(name: str) -> exp.Table:
    return exp.Table(this=exp.to_identifier(name, quoted=True))
