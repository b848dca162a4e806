"""Shape limits on JSON request bodies of `gasrules serve`: nesting depth and fields per case.

A deeply nested ``context`` once made the service fail with a 500 (the JSON encoder's own
recursion limit), and 80,000 unknown keys made a 42 MB answer; these checks turn both into a
400 naming the place, before the engine sees the case.
"""

from __future__ import annotations

from typing import Any

import orjson

from gasrules.evaluation.evaluator import UNREADABLE

__all__ = ["nested_too_deep", "read_line"]


def nested_too_deep(data: Any, max_depth: int) -> str | None:
    """The JSON path of the first place nested deeper than ``max_depth`` levels, or None."""
    stack: list[tuple[Any, int, str]] = [(data, 1, "$")]
    while stack:
        node, depth, path = stack.pop()
        if isinstance(node, dict):
            items: Any = ((f"{path}.{k}", v) for k, v in node.items())
        elif isinstance(node, list):
            items = ((f"{path}[{i}]", v) for i, v in enumerate(node))
        else:
            continue
        if depth > max_depth:
            return path
        stack.extend((child, depth + 1, where) for where, child in items if isinstance(child, (dict, list)))
    return None


def read_line(n: int, line: bytes, max_depth: int, max_fields: int) -> Any:
    """One JSON Lines row, or a stand-in naming the line's problem (N in, N out)."""
    try:
        row = orjson.loads(line)
    except orjson.JSONDecodeError as exc:
        return {UNREADABLE: f"line {n}: not valid JSON: {exc.msg} at column {exc.colno}"}
    deep = nested_too_deep(row, max_depth)
    if deep is not None:
        return {UNREADABLE: f"line {n}: nests more than {max_depth} levels deep at {deep}"}
    if isinstance(row, dict) and len(row) > max_fields:
        return {UNREADABLE: f"line {n}: {len(row)} fields; a case has at most {max_fields}"}
    return row
