"""Emit: text outputs of the final stage, cut to ``MAX_TEXT_CHARS`` characters.

An answer carries at most ``planner.model.MAX_TEXT_CHARS`` characters of a text value (a
plain or top key, min / max of text: ``Plan.text_outputs``), so its memory stays bounded
however long the stored texts are; the statement flags what it cut (``names.cut_text``)
and keeps the whole value (``names.text_full``) for its ORDER BY only. In: a plan and the
final stage's output expressions; out: sqlglot expressions and names. Pure.
"""

from __future__ import annotations

from sqlglot import exp

from planner import names
from planner.emit_sql import _ref
from planner.model import MAX_TEXT_CHARS
from planner.plan import Plan


def cut_text(plan: Plan, outputs: list[exp.Expression]) -> list[exp.Expression]:
    """``outputs`` with each text output (``Plan.text_outputs``) cut to MAX_TEXT_CHARS
    characters, plus its flag ``names.cut_text(j)`` (1 where the value was longer) and the
    whole value ``names.text_full(j)``, which the ORDER BY reads and the answer leaves out
    (``answer_columns``): the answer's memory stays bounded whatever the stored texts hold,
    and it says what it cut. Groups and their order are still those of the whole values."""
    d, text = plan.dialect, plan.text_outputs
    if not text:
        return outputs
    out, flags = [], []
    for e in outputs:
        name = e.alias_or_name
        if name not in text:
            out.append(e)
            continue
        v = e.this if isinstance(e, exp.Alias) else e
        out.append(exp.alias_(d.text_prefix(v.copy(), MAX_TEXT_CHARS), name, quoted=True))
        longer = exp.GT(this=d.char_length(v.copy()), expression=exp.Literal.number(MAX_TEXT_CHARS))
        j = text.index(name)
        flags.append(exp.alias_(exp.Case(ifs=[exp.If(this=longer, true=exp.Literal.number(1))],
                                         default=exp.Literal.number(0)),
                                names.cut_text(j), quoted=True))
        flags.append(exp.alias_(v.copy(), names.text_full(j), quoted=True))
    return out + flags


def answer_columns(plan: Plan, final: exp.Select) -> list[str]:
    """The columns of the final stage ``final`` a statement returns: all but the whole
    texts that only order the rows (``cut_text``)."""
    full = {names.text_full(j) for j in range(len(plan.text_outputs))}
    return [n for n in (e.alias_or_name for e in final.expressions) if n not in full]


def order_ref(plan: Plan, name: str) -> exp.Expression:
    """The column the ORDER BY reads for output ``name``: a text output's whole value."""
    text = plan.text_outputs
    return _ref(names.text_full(text.index(name)) if name in text else name)
