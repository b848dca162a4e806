"""Stage 3c: relations between parameters, declared in the rulebook and checked at load.

A rulebook (and any overlay, which adds to the list) may declare::

    constraints:
      - expr: ag_normal < ag_high
        message: "the normal anion gap must lie below its upper limit"

Each ``expr`` is an expression over parameters only (the same language and allow-list as
rule conditions). It is evaluated with the resolved values: the default value of every
parameter and, for parameters selected by a coded input (e.g. venous intervals), the value for
each code. A constraint that does not hold is RB-E046 at the constraint, naming the values and
the file and line that set each of them, so an overlay that moves one limit past another fails
``check``, ``verify`` and ``release``.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

from gasrules.core.errors import Problem

__all__ = ["check_constraints"]


def _scenarios(names: Iterable[str], params: dict[str, Any]) -> list[str | None]:
    """None (default values) plus every code that selects a value of one of ``names``."""
    codes: set[str] = set()
    for n in names:
        codes.update(params[n].by_values)
    return [None, *sorted(codes)]


def check_constraints(constraints: list[tuple[dict[str, Any], Any]], params: dict[str, Any]) -> list[Problem]:
    from gasrules.rulebook.expressions import Oracle, parse

    problems: list[Problem] = []
    for body, ref in constraints:
        where = ref.loc("expr")
        expr, probs = parse(str(body.get("expr", "")), where)
        problems += probs
        if expr is None:
            continue
        unknown = sorted(n for n in expr.reads if n not in params or params[n].choices is not None)
        if unknown:
            problems.append(
                Problem(
                    "RB-E022",
                    f"constraint names {', '.join(unknown)}, which "
                    f"{'is not a numeric parameter' if len(unknown) == 1 else 'are not numeric parameters'}",
                    where,
                    "an expression over numeric parameters only",
                )
            )
            continue
        names = sorted(expr.reads)
        for code in _scenarios(names, params):
            values = {n: float(params[n].value_for(code)) for n in names}
            try:
                held = bool(Oracle(values, values, set()).run(expr))
                why = ""
            except (ArithmeticError, ValueError, TypeError) as exc:
                held, why = False, f" (cannot be evaluated: {exc})"
            if held:
                continue
            shown = "; ".join(f"{n} = {values[n]:g} set at {params[n].set_by_for(code)}" for n in names)
            scope = f" for {code}" if code is not None else ""
            problems.append(
                Problem(
                    "RB-E046",
                    f"constraint not met{scope}: {body.get('message', '')} ({expr.text}{why}; {shown})",
                    where,
                    f"parameter values for which {expr.text} holds",
                )
            )
            break
    return problems
