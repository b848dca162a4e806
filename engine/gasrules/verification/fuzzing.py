"""Mutation fuzzing of rulebooks and cases (used by the tests and by tools/fuzz_*.py).

:func:`mutate_rulebook` derives a hostile variant of a rulebook's text, seeded and so
reproducible: structural mutations on the parsed data (a value replaced by a hostile one, a key
deleted or renamed, an expression garbled, a section duplicated) dumped back to YAML, or raw
mutations of the bytes (flips, cuts, tabs, aliases, bytes that are not UTF-8).
:func:`run_rulebook` pushes one variant through check, load and a few interpretations and
returns the uncaught exception, if any: every outcome must be problems or results, never an
exception. :func:`random_case` makes a case of any JSON type for the case fuzzer.
"""

from __future__ import annotations

import json
import math
import random
import traceback
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import yaml

__all__ = ["hostile_value", "mutate_rulebook", "random_case", "run_rulebook"]

_EXPRESSIONS = [
    "ph ** 99999",
    "((((ph",
    "__import__('os')",
    "ph if ph else",
    "log10(0)",
    "sqrt(-1)",
    "ph / 0",
    "1e308 * 1e308",
    "ph < ",
    "lambda: 1",
    "[x for x in ph]",
    "ph.__class__",
    "known(nothing)",
    "has('x')",
    "ph < ph_low < ph_high < ratio",
    "'a' < 1",
    "ph and",
    "-" * 500 + "ph",
    "ph" + " + ph" * 400,
    "abs()",
    "max(ph)",
    "min(ph, ratio, 1, 2, 3)",
    "ratio_low if ratio else ph_low",
    "not ph",
    "ph == 'arterial'",
    "10 ** 400",
    "ph // 0.0",
]


def hostile_value(rng: random.Random, depth: int = 0) -> Any:
    """One value of any JSON/YAML type, often hostile."""
    choice = rng.randrange(20)
    if choice == 0:
        return None
    if choice == 1:
        return rng.choice([True, False])
    if choice == 2:
        return rng.choice([0, -1, 1, 2**63, -(2**63), 10**400, -(10**400)])
    if choice == 3:
        return rng.choice([math.nan, math.inf, -math.inf, 1e308, -1e-308, 5e-324, 0.0, -0.0])
    if choice == 4:
        return rng.uniform(-1e6, 1e6)
    if choice == 5:
        return rng.choice(
            [
                "",
                " ",
                "ph\n",
                "\u200b",
                "\ud7ff",
                "x" * 5000,
                "{ph}",
                "{nothing}",
                "%s",
                "\x00",
                "mm[Hg]",
                "kPa",
                "[pH]",
                "mmol/L",
                "1",
                "2026-13-45",
                "Ω",
                "ph_low",
                "ph",
            ]
        )
    if choice == 6 and depth < 4:
        return [hostile_value(rng, depth + 1) for _ in range(rng.randrange(4))]
    if choice == 7 and depth < 4:
        return {
            rng.choice(["value", "unit", "min", "max", "expr", "when", "x", "ph"]): hostile_value(
                rng, depth + 1
            )
            for _ in range(rng.randrange(4))
        }
    if choice == 8:
        nested: Any = 0
        for _ in range(rng.choice([10, 60, 200, 2000])):
            nested = [nested]
        return nested
    if choice in (9, 10, 11):
        return rng.choice(_EXPRESSIONS)
    if choice == 12:
        return rng.randrange(-5, 500)
    return rng.uniform(-10, 10)


def _paths(data: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    out = [prefix]
    if len(prefix) > 8:
        return out
    if isinstance(data, dict):
        for k, v in data.items():
            out += _paths(v, prefix + (k,))
    elif isinstance(data, list):
        for i, v in enumerate(data):
            out += _paths(v, prefix + (i,))
    return out


def _get(data: Any, path: tuple[Any, ...]) -> Any:
    for part in path:
        data = data[part]
    return data


def _mutate_data(data: Any, rng: random.Random) -> Any:
    import copy

    data = copy.deepcopy(data)
    for _ in range(rng.randrange(1, 4)):
        paths = [p for p in _paths(data) if p]
        if not paths:
            return hostile_value(rng)
        path = rng.choice(paths)
        parent = _get(data, path[:-1])
        key = path[-1]
        action = rng.randrange(6)
        if action == 0 and isinstance(parent, dict):
            del parent[key]
        elif action == 1 and isinstance(parent, dict):
            parent[
                rng.choice(
                    [str(key) + "x", str(key)[:-1] or "k", "ph", "ratio", "ph\n", "Ph", "p h", "_x", "9a"]
                )
            ] = parent.pop(key)
        elif action == 2 and isinstance(parent, list):
            parent.append(copy.deepcopy(parent[key]))
        elif action == 3:
            other = _get(data, rng.choice(paths))
            try:
                parent[key] = copy.deepcopy(other) if len(json.dumps(other, default=str)) < 20_000 else None
            except (RecursionError, ValueError):
                parent[key] = None
        else:
            parent[key] = hostile_value(rng)
    return data


def _mutate_text(raw: bytes, rng: random.Random) -> bytes:
    buf = bytearray(raw)
    for _ in range(rng.randrange(1, 6)):
        if not buf:
            break
        pos = rng.randrange(len(buf))
        action = rng.randrange(9)
        if action == 0:
            buf[pos] = rng.randrange(256)
        elif action == 1:
            del buf[pos : pos + rng.randrange(1, 40)]
        elif action == 2:
            buf[pos:pos] = rng.choice(
                [
                    b"\t",
                    b"\n  ",
                    b": ",
                    b"- ",
                    b"{",
                    b"[",
                    b"&a ",
                    b"*a",
                    b"<<: *a\n",
                    b"'",
                    b'"',
                    b"#",
                    b"\xff\xfe",
                    b"\xc3",
                    b"!!python/object:os.system ",
                    b"%YAML 1.1\n",
                    b"---\n",
                    b"...\n",
                    b"? ",
                    b"|\n",
                    b">\n",
                    b"!!binary ",
                    b"2026-13-45",
                ]
            )
        elif action == 3:
            del buf[pos:]
        elif action == 4:
            line_start = buf.rfind(b"\n", 0, pos) + 1
            line_end = buf.find(b"\n", pos)
            line = bytes(buf[line_start : line_end if line_end >= 0 else len(buf)])
            buf[line_start:line_start] = line + b"\n"
        elif action == 5:
            buf[pos:pos] = str(
                rng.choice([10**400, 1e308, "nan", ".inf", "-.inf", "0x1F", "1_000", "0o7"])
            ).encode()
        elif action == 6:
            buf[pos:pos] = "\u200b\u202e\ufeff".encode("utf-8")
        elif action == 7:
            buf = bytearray(raw.decode("utf-8", "replace").encode("utf-16")) if rng.random() < 0.2 else buf
        else:
            swap = rng.randrange(len(buf))
            buf[pos], buf[swap] = buf[swap], buf[pos]
    return bytes(buf)


def mutate_rulebook(text: str, data: Any, rng: random.Random) -> bytes:
    """One mutated variant of a rulebook (its text and its parsed data)."""
    if rng.random() < 0.55:
        try:
            mutated = _mutate_data(data, rng)
            return yaml.safe_dump(mutated, sort_keys=False, allow_unicode=True, width=1000).encode(
                "utf-8", "surrogatepass"
            )
        except (yaml.YAMLError, RecursionError, ValueError, UnicodeEncodeError):
            return _mutate_text(text.encode("utf-8"), rng)
    return _mutate_text(text.encode("utf-8"), rng)


_CASES = [
    {"ph": 7.40, "pco2": 40, "hco3": 24},
    {"ph": 7.10, "pco2": 20, "hco3": 6},
    {"ph": 7.60, "pco2": {"value": 3.5, "unit": "kPa"}, "hco3": 26},
    {},
    {"ph": 7.3},
]


def run_rulebook(path: Path, outcomes: dict[str, int] | None = None) -> str | None:
    """Check, load and interpret one rulebook file; the traceback of an uncaught exception, or
    None. ``outcomes`` counts how each variant ended ("RB-Exxx" of its first error, or "compiled")."""
    import gasrules
    from gasrules.core.errors import RulebookError

    def note(what: str) -> None:
        if outcomes is not None:
            outcomes[what] = outcomes.get(what, 0) + 1

    try:
        problems = gasrules.check_rulebook(path)
        for p in problems:
            p.render()
        errors = [p for p in problems if not p.is_warning]
        if errors:
            note(errors[0].code)
            return None
        try:
            rb = gasrules.load_rulebook(path, cache=False)
        except RulebookError:
            note("refused at load")
            return None
        for case in _CASES:
            result = gasrules.interpret(rb, case)
            json.dumps(result, allow_nan=False)
        gasrules.list_cutpoints(rb)
        note("compiled")
        return None
    except Exception:
        note("EXCEPTION")
        return traceback.format_exc()


def plausible_case(rng: random.Random, inputs: Mapping[str, Any]) -> dict[str, Any]:
    """A case that reads cleanly: a random subset of the inputs, each a number inside its
    plausible range, a declared code or a flag (so the evaluation itself is exercised)."""
    case: dict[str, Any] = {}
    engine_set = {getattr(s, "fallback_marks", None) for s in inputs.values()}
    for name, spec in inputs.items():
        if rng.random() < 0.35 or name in engine_set:  # flags the engine sets are never given by a case
            continue
        if spec.kind == "code":
            if spec.codes:
                case[name] = rng.choice(list(spec.codes))
        elif spec.kind == "flag":
            case[name] = rng.choice([True, False])
        else:
            lo = spec.plausible_min if spec.plausible_min is not None else -1e3
            hi = spec.plausible_max if spec.plausible_max is not None else 1e3
            case[name] = rng.choice([lo, hi, rng.uniform(lo, hi), rng.uniform(lo, hi)])
    return case


def random_case(
    rng: random.Random,
    names: list[str],
    units: Callable[[str], list[str]] | None = None,
    inputs: Mapping[str, Any] | None = None,
) -> Any:
    """A case of any JSON type: mostly objects with inputs (numbers, {value, unit}, junk), context
    of any shape, and hostile top-level values. With ``inputs`` (the rulebook's input specs),
    half the cases are plausible ones (:func:`plausible_case`), some with one field spoiled."""
    if inputs is not None and rng.random() < 0.5:
        case = plausible_case(rng, inputs)
        if rng.random() < 0.3 and names:
            case[rng.choice(names)] = hostile_value(rng)
        if rng.random() < 0.3:
            case["context"] = {"ward": "X", "n": rng.randrange(10**6)}
        return case
    roll = rng.random()
    if roll < 0.05:
        return hostile_value(rng)
    case = {}
    for name in rng.sample(names, rng.randrange(len(names) + 1)):
        r = rng.random()
        if r < 0.5:
            case[name] = rng.choice([rng.uniform(-50, 300), rng.uniform(6.5, 8), rng.randrange(0, 200)])
        elif r < 0.7 and units is not None:
            case[name] = {
                "value": rng.uniform(0, 200),
                "unit": rng.choice(units(name) + ["", "furlong", None]),
            }
        else:
            case[name] = hostile_value(rng)
    if rng.random() < 0.3:
        case["context"] = hostile_value(rng)
    if rng.random() < 0.3:
        case["case_id"] = hostile_value(rng)
    if rng.random() < 0.1:
        case[rng.choice(["x", "PH", "pco2 ", ""])] = hostile_value(rng)
    return case
