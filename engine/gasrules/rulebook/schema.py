"""Stage 2: validate documents against the JSON Schemas in schemas/.

Collects every schema error (``iter_errors``) and turns its ``absolute_path`` into a file,
line and column through the document's position map.
"""

from __future__ import annotations

import json
from functools import cache
from typing import Any

from gasrules.core.errors import Problem
from gasrules.core.resources import schema_path
from gasrules.rulebook.loader import Document


@cache
def load_schema(name: str) -> dict[str, Any]:
    with open(schema_path(name), encoding="utf-8") as fh:
        return json.load(fh)


@cache
def _validator(name: str) -> Any:
    import jsonschema  # imported here: only a cache miss pays for it

    schema = load_schema(name)
    base = jsonschema.validators.validator_for(schema)
    base.check_schema(schema)
    cls = jsonschema.validators.extend(base, {"pattern": _pattern_whole})
    return cls(schema, format_checker=base.FORMAT_CHECKER)


def _pattern_whole(validator: Any, pattern: str, instance: Any, schema: Any) -> Any:
    """``pattern`` with a true end anchor: Python's ``$`` also matches before a final newline,
    so ``"ph\\n"`` would pass ``^[a-z]+$``; here ``$`` means the end of the text."""
    import re

    from jsonschema.exceptions import ValidationError

    if not validator.is_type(instance, "string"):
        return
    whole = pattern[:-1] + r"\Z" if pattern.endswith("$") and not pattern.endswith("\\$") else pattern
    if re.search(whole, instance) is None:
        yield ValidationError(f"{instance!r} does not match {pattern!r}")


def validate_document(doc: Document, schema_name: str = "rulebook.schema.json") -> list[Problem]:
    problems = []
    for err in _validator(schema_name).iter_errors(doc.data):
        best = _deepest(err)
        path = tuple(best.absolute_path)
        problems.append(Problem("RB-E010", _message(best), doc.locate(path), _expected(best)))
    return problems


def validate_instance(instance: Any, schema_name: str) -> list[str]:
    """Plain messages for data that has no positions (results, cases in tests)."""
    out = []
    for err in _validator(schema_name).iter_errors(instance):
        where = "/".join(str(p) for p in err.absolute_path) or "(root)"
        out.append(f"{where}: {err.message}")
    return out


def _deepest(err: Any) -> Any:
    """For oneOf/anyOf failures, report the most specific sub-error."""
    if err.context:
        return max(err.context, key=lambda e: (len(e.absolute_path), -len(e.message)))
    return err


def _message(err: Any) -> str:
    if err.validator == "additionalProperties":
        return err.message.replace("Additional properties are not allowed", "unknown key")
    if err.validator == "required":
        return err.message.replace("is a required property", "is required")
    return err.message


def _expected(err: Any) -> str:
    v = err.validator
    if v == "enum":
        return "one of " + ", ".join(map(str, err.validator_value))
    if v == "type":
        return f"a value of type {err.validator_value}"
    if v == "pattern":
        return f"text matching {err.validator_value}"
    if v == "const":
        return repr(err.validator_value)
    if v in ("minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum", "minLength", "minItems"):
        return f"{v} {err.validator_value}"
    return ""
