"""Stage 3b: generate one Python function for a checked rulebook, and link it.

The function ``evaluate(I, T=None)`` reads the canonical inputs ``I`` and computes every derived
value and rule outcome in plan order; with a list ``T`` it also appends each rule's trace event,
written as a dict literal in the branch that decided the outcome. The source comes only from
syntax trees that :mod:`gasrules.rulebook.expressions` checked, and runs with no builtins.
"""

from __future__ import annotations

import ast
import marshal
import re
from collections.abc import Iterable
from typing import Any

from gasrules.core.model import CompiledRulebook, DerivedSpec, InputSpec, ParamSpec, RuleSpec
from gasrules.rulebook.expressions import CutPoint, Expr, NameInfo, runtime_globals, to_python

# Outcome codes the generated function writes per rule (the trace names them).
FIRED, NOT_FIRED, SKIPPED, HALTED, SUSPENDED, ERROR = range(6)
OUTCOMES = ("fired", "not_fired", "skipped_missing_input", "halted", "suspended", "error")
# State codes per derived value.
COMPUTED, MISSING, NOT_APPLICABLE, CALC_ERROR = range(4)
# A placeholder in a finding text.
PLACEHOLDER = re.compile(r"\{([A-Za-z_][A-Za-z0-9_]*)\}")


def _exprs(derived: dict[str, DerivedSpec], rules: list[RuleSpec]) -> Iterable[tuple[str, str, Expr]]:
    """(owner, field, expression) for every expression of a rulebook (also used by the compiler)."""
    for d in derived.values():
        yield d.name, "expr", d.expr
        if d.when:
            yield d.name, "when", d.when
    for r in rules:
        if r.when:
            yield r.id, "when", r.when


def _name_infos(
    inputs: dict[str, InputSpec], params: dict[str, ParamSpec], derived: dict[str, DerivedSpec]
) -> dict[str, NameInfo]:
    infos: dict[str, NameInfo] = {}
    for n, i in inputs.items():
        infos[n] = NameInfo("input", i.kind)
    for n, p in params.items():
        vk = "choice" if p.choices is not None else "number"
        infos[n] = NameInfo("parameter", vk, None if p.by_input else p.value)
    for n in derived:
        infos[n] = NameInfo("derived", "number")
    return infos


def _rounded_names(
    inputs: dict[str, InputSpec], derived: dict[str, DerivedSpec], rules: list[RuleSpec]
) -> set[str]:
    out: set[str] = set()
    for _owner, _field, expr in _exprs(derived, rules):
        for left, _op, right in expr.compares:
            for side in (left, right):
                for n in ast.walk(side):
                    if isinstance(n, ast.Name) and (
                        n.id in derived or (n.id in inputs and inputs[n.id].kind == "number")
                    ):
                        out.add(n.id)
    return out


def _round_src(var: str, precision: int) -> str:
    s = repr(float(10**precision))
    return (
        f"((_floor({var} * {s} + 0.5 + 1e-9) / {s} + 0.0) if {var} >= 0 "
        f"else (-_floor(-{var} * {s} + 0.5 + 1e-9) / {s} + 0.0))"
    )


def _available(names: Iterable[str], inputs: dict[str, InputSpec], derived: dict[str, DerivedSpec]) -> str:
    tests = [f"v_{n} is not None" for n in sorted(names) if n in inputs or n in derived]
    return " and ".join(tests) if tests else "True"


def generate(
    plan: list[tuple[str, str]],
    inputs: dict[str, InputSpec],
    params: dict[str, ParamSpec],
    derived: dict[str, DerivedSpec],
    rules: list[RuleSpec],
    cutpoints: tuple[CutPoint, ...] = (),
) -> tuple[str, tuple[str, ...]]:
    """Python source of one function ``evaluate(I) -> (values, states, errors, outcomes, codes)``.

    ``I`` maps every input name to its canonical value (None when missing). ``values`` and
    ``states`` follow ``value_names`` (the derived values in plan order); ``outcomes`` follows
    the rule order of the plan; ``errors`` maps a name to the calculation error's text."""
    infos = _name_infos(inputs, params, derived)
    rounded = _rounded_names(inputs, derived, rules)
    by_rule = {r.id: r for r in rules}
    lines = ["def evaluate(I, T=None):", "    F = _set()", "    E = {}", "    O = []", "    H = False"]
    for n, i in inputs.items():
        lines.append(f"    v_{n} = I[{n!r}]")
        if n in rounded:
            lines.append(f"    r_{n} = None if v_{n} is None else {_round_src(f'v_{n}', i.precision)}")
    for n, p in params.items():
        if p.by_input:
            default = repr(p.value) if isinstance(p.value, str) else repr(float(p.value))
            lines.append(f"    p_{n} = _BY_{n}.get(v_{p.by_input}, {default})")
    value_names: list[str] = []
    for kind, name in plan:
        if kind == "derived":
            d = derived[name]
            value_names.append(name)
            lines.append(f"    # derived {name}")
            avail = _available(d.needs, inputs, derived)
            lines.append(f"    v_{name} = None")
            lines.append(f"    if not ({avail}):")
            lines.append(f"        S_{name} = {MISSING}")
            if d.when is not None:
                lines.append(f"    elif not ({to_python(d.when.node, infos)}):")
                lines.append(f"        S_{name} = {NOT_APPLICABLE}")
            lines.append("    else:")
            lines.append("        try:")
            lines.append(f"            v_{name} = _float({to_python(d.expr.node, infos)})")
            lines.append(f"            S_{name} = {COMPUTED}")
            lines.append("        except _ERR as exc:")
            lines.append(f"            S_{name} = {CALC_ERROR}")
            lines.append(f"            E[{name!r}] = _describe(exc)")
            if name in rounded:
                lines.append(
                    f"    r_{name} = None if v_{name} is None else {_round_src(f'v_{name}', d.precision)}"
                )
        else:
            r = by_rule[name]
            lines.append(f"    # rule {r.id}")
            ev = _TraceSource(r, inputs, params, derived, cutpoints, rounded, infos)
            if r.status == "suspended":
                lines.append(f"    O.append({SUSPENDED})")
                lines.append(f"    if T is not None: T.append({ev.event('suspended')})")
                continue
            codes = sorted(r.asserts)
            fire = [f"O.append({FIRED})"]
            if codes:
                fire.append(f"F.update({tuple(codes)!r})")
            if r.stop:
                fire.append("H = True")
            avail = _available(r.needs, inputs, derived)
            if r.always:
                lines.append(f"    if not ({avail}):")
            else:
                lines.append("    if H:")
                lines.append(f"        O.append({HALTED})")
                lines.append(f"        if T is not None: T.append({ev.event('halted')})")
                lines.append(f"    elif not ({avail}):")
            lines.append(f"        O.append({SKIPPED})")
            lines.append(f"        if T is not None: T.append({ev.event('skipped_missing_input')})")
            lines.append("    else:")
            lines.append("        try:")
            cond = to_python(r.when.node, infos) if r.when is not None else "True"
            lines.append(f"            c = _bool({cond})")
            lines.append("        except _ERR as exc:")
            lines.append("            c = None")
            lines.append(f"            E[{r.id!r}] = _describe(exc)")
            lines.append("        if c is None:")
            lines.append(f"            O.append({ERROR})")
            lines.append(f"            if T is not None: T.append({ev.event('error')})")
            lines.append("        elif c:")
            for stmt in fire:
                lines.append(f"            {stmt}")
            lines += ev.block("fired", "            ")
            lines.append("        else:")
            lines.append(f"            O.append({NOT_FIRED})")
            lines += ev.block("not_fired", "            ")
    vals = ", ".join(f"v_{n}" for n in value_names)
    states = ", ".join(f"S_{n}" for n in value_names)
    lines.append(
        f"    return ({vals}{',' if len(value_names) == 1 else ''}), ({states}{',' if len(value_names) == 1 else ''}), E, O, F"
    )
    return "\n".join(lines) + "\n", tuple(value_names)


class _TraceSource:
    """Source text of one rule's trace event for each outcome (see gasrules.evaluation.trace.TraceEvent).
    Events are dict literals built in the branch that decided the outcome."""

    def __init__(
        self,
        r: RuleSpec,
        inputs: dict[str, InputSpec],
        params: dict[str, ParamSpec],
        derived: dict[str, DerivedSpec],
        cutpoints: tuple[CutPoint, ...],
        rounded: set[str],
        infos: dict[str, NameInfo],
    ):
        self.r = r
        self.record_cond = to_python(r.when.node, infos, record=True) if r.when is not None else ""
        self.head = f'"rule": {r.id!r}, "step": {r.step!r}, "title": {r.title!r}'
        reads = set(r.when.reads) if r.when else set()
        reads |= set(r.needs)
        self.reads = (
            "{" + ", ".join(f"{n!r}: v_{n}" for n in sorted(reads) if n in inputs or n in derived) + "}"
        )
        prm = []
        for n in sorted(reads):
            p = params.get(n)
            if p is None:
                continue
            if p.by_input:
                prm.append(
                    f'{n!r}: {{"value": p_{n}, "unit": {p.unit!r}, "set_by": _SB_{n}.get(v_{p.by_input}, {str(p.set_by)!r}), '
                    f'"selected_by": {p.by_input + "="!r} + _str(v_{p.by_input})}}'
                )
            else:
                # a fresh dict per event: results never share mutable parts
                value = repr(p.value) if isinstance(p.value, str) else repr(float(p.value))
                prm.append(f'{n!r}: {{"value": {value}, "unit": {p.unit!r}, "set_by": {str(p.set_by)!r}}}')
        self.params = ("{" + ", ".join(prm) + "}") if prm else ""
        needs = [n for n in sorted(r.needs) if n in inputs or n in derived]
        pairs = ", ".join(f"({n!r}, v_{n})" for n in needs)
        self.missing = f"[n for n, v in ({pairs},) if v is None]" if needs else "[]"
        comps = []
        for c in cutpoints:
            if c.owner != r.id or c.field != "when" or c.quantity not in rounded:
                continue
            if c.threshold_kind == "parameter":
                p = params[c.threshold]
                tv = f"p_{c.threshold}" if p.by_input else repr(float(p.value))
            elif c.threshold_kind == "constant":
                tv = c.threshold
            elif c.threshold in rounded:
                tv = f"r_{c.threshold}"
            else:
                tv = f"v_{c.threshold}"
            comps.append(
                f"_cmp({c.quantity!r}, v_{c.quantity}, r_{c.quantity}, {c.op!r}, {c.threshold!r}, {tv}, "
                f"W.get({c.node}), D.get({c.node}, False))"
            )
        self.comparisons = ("[" + ", ".join(comps) + "]") if comps else ""
        self.asserted = repr(sorted(r.asserts)) if r.asserts else ""

    def block(self, outcome: str, indent: str) -> list[str]:
        """Trace statements for a decided rule (fired or not fired). When the rule compares
        numbers, its condition is evaluated again recording each comparison's value (W), then
        once per evaluated comparison with that one forced the other way: a comparison is
        decisive (D) when forcing it alone changes the outcome."""
        if not self.comparisons:
            return [f"{indent}if T is not None: T.append({self.event(outcome)})"]
        i2, i3 = indent + "    ", indent + "        "
        return [
            f"{indent}if T is not None:",
            f"{i2}W = {{}}",
            f"{i2}_ov = -1",
            f"{i2}_fv = False",
            f"{i2}try:",
            f"{i3}_bool({self.record_cond})",
            f"{i2}except _ERR_T:",
            f"{i3}pass",
            f"{i2}R = W",
            f"{i2}D = {{}}",
            f"{i2}for _k in R:",
            f"{i3}W = {{}}",
            f"{i3}_ov = _k",
            f"{i3}_fv = not R[_k]",
            f"{i3}try:",
            f"{i3}    D[_k] = _bool({self.record_cond}) != c",
            f"{i3}except _ERR_T:",
            f"{i3}    D[_k] = False",
            f"{i2}W = R",
            f"{i2}T.append({self.event(outcome)})",
        ]

    def event(self, outcome: str) -> str:
        parts = [self.head, f'"outcome": {outcome!r}']
        if outcome == "suspended":
            parts.append(f'"reason": {self.r.suspended_reason!r}')
        if outcome in ("suspended", "halted"):
            return "{" + ", ".join(parts) + "}"
        parts.append(f'"reads": {self.reads}')
        if self.params:
            parts.append(f'"parameters": {self.params}')
        if outcome == "skipped_missing_input":
            parts.append(f'"missing": {self.missing}')
        elif outcome == "error":
            parts.append(f'"reason": E.get({self.r.id!r}, "")')
        elif self.comparisons:
            parts.append(f'"comparisons": {self.comparisons}')
        if outcome == "fired" and self.asserted:
            parts.append(f'"asserted": {self.asserted}')
        return "{" + ", ".join(parts) + "}"


def _cmp(
    quantity: str,
    value: Any,
    compared: Any,
    op: str,
    threshold: str,
    tvalue: Any,
    holds: bool | None,
    decisive: bool,
) -> dict[str, Any]:
    margin = None if compared is None or tvalue is None else round(compared - tvalue, 9)
    return {
        "quantity": quantity,
        "value": value,
        "compared": compared,
        "op": op,
        "threshold": threshold,
        "threshold_value": tvalue,
        "margin": margin,
        "holds": holds,
        "decisive": decisive,
    }


def link(compiled: CompiledRulebook) -> None:
    """Turn the generated source into a function (also after unpickling from the cache)."""
    g = runtime_globals()
    for n, p in compiled.parameters.items():
        if p.by_input:
            g[f"_BY_{n}"] = {k: (v if isinstance(v, str) else float(v)) for k, v in p.by_values.items()}
            g[f"_SB_{n}"] = {k: str(p.set_by_for(k)) for k in p.by_values}
    g.update(_OUT=OUTCOMES, _cmp=_cmp, _str=str)
    code = None
    if compiled._code is not None:
        try:
            code = marshal.loads(compiled._code)
        except (ValueError, EOFError, TypeError):
            code = None
    if code is None:
        code = compile(compiled.source, f"<rulebook {compiled.id}@{compiled.version}>", "exec")
        compiled._code = marshal.dumps(code)
    exec(code, g)
    compiled._function = g["evaluate"]
    compiled._static = None  # the evaluator's per-rulebook tables, rebuilt on first use
