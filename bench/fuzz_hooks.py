"""schemathesis hooks for the fuzz runs: the one request rule JSON Schema cannot state.

A predict body's ``ids`` must hold as many entries as ``rows`` (the document says so in
words); a body whose ids are all valid strings gets as many as it has rows, so that a
schema-valid body is one the service must accept. A body with an invalid id is left alone:
trimming could drop the very entry that makes it invalid.
"""

from __future__ import annotations

import schemathesis

from service.schemas import MAX_ID_CHARS


def _valid_id(value) -> bool:
    return isinstance(value, str) and len(value) <= MAX_ID_CHARS


@schemathesis.hook
def before_call(ctx, case, kwargs) -> None:
    """Every phase's request passes here (drawn and coverage cases alike); schemathesis
    judges the edited body valid or not afresh."""
    body = case.body
    if not isinstance(body, dict):
        return
    rows, ids = body.get("rows"), body.get("ids")
    if isinstance(rows, list) and isinstance(ids, list) and all(map(_valid_id, ids)):
        body["ids"] = (ids + [f"r{i}" for i in range(len(ids), len(rows))])[: len(rows)]
