"""Stage 3: check the resolved rulebook's meaning and compile it into one Python function.

Input: a :class:`~gasrules.rulebook.overlay.Resolved` rulebook. Output: a
:class:`~gasrules.core.model.CompiledRulebook` whose generated function evaluates every derived
value and rule of one case in a fixed order. Every name, placeholder, step, disorder code and
unit is checked here, and every problem is collected with its file, line and column. The
generated source itself is written by :mod:`gasrules.rulebook.codegen`.
"""

from __future__ import annotations

import ast
import heapq
from collections.abc import Iterable
from typing import Any

from gasrules.core.errors import Location, Problem, RulebookError
from gasrules.core.model import (
    CompiledRulebook,
    DerivedSpec,
    FindingSpec,
    InputSpec,
    ParamSpec,
    RuleSpec,
    StepSpec,
    reads_closure,
)
from gasrules.core.version import __version__
from gasrules.rulebook.bibliography import (
    Bibliography,
    check_rulebook_refs,
    load_bibliographies,
    with_bibliography,
)
from gasrules.rulebook.codegen import PLACEHOLDER, _exprs, generate, link
from gasrules.rulebook.expressions import (
    COMPARISON_OF_NODE,
    COMPARISONS,
    CutPoint,
    Expr,
    compare_nodes,
    parse,
)
from gasrules.rulebook.identity import (
    identity_hash,
)
from gasrules.rulebook.overlay import Ref, Resolved

DISORDER_CODES = (
    "respiratory_acidosis",
    "respiratory_alkalosis",
    "metabolic_acidosis_high_anion_gap",
    "metabolic_acidosis_normal_anion_gap",
    "metabolic_acidosis",
    "metabolic_alkalosis",
)
# Literals that are not clinical numbers (identity, sign, percentages of a whole).
_HARMLESS_LITERALS = {0.0, 1.0, -1.0}


# ----------------------------------------------------------------------------- building specs


def build(res: Resolved) -> CompiledRulebook:
    """Check and compile. Raises RulebookError with every problem found (warnings included)."""
    problems: list[Problem] = []
    steps = {n: StepSpec(n, b.get("label", n), bool(b.get("core", False))) for n, (b, _) in res.steps.items()}
    inputs = {n: _input_spec(n, b, ref) for n, (b, ref) in res.inputs.items()}
    params = {
        n: _param_spec(n, b, ref, res.param_set_by[n], res.param_by_set_by.get(n, {}))
        for n, (b, ref) in res.parameters.items()
    }
    problems += _check_params(params, inputs)
    derived: dict[str, DerivedSpec] = {}
    broken: set[str] = set()
    for name, (body, ref) in res.derived.items():
        spec, probs = _derived_spec(name, body, ref)
        problems += probs
        if spec is not None:
            derived[name] = spec
        else:
            broken.add(name)  # declared, but its expression was refused: not "unknown" to its users
    _clash(inputs, params, derived, res, problems)
    suspended = {rule: (reason, ref) for rule, reason, ref in res.suspensions}
    rules: list[RuleSpec] = []
    seen_ids: dict[str, Location] = {}
    for body, ref in res.rules:
        if body.get("status") == "retired":
            continue
        spec, probs = _rule_spec(body, ref, suspended)
        problems += probs
        if spec is None:
            continue
        if spec.id in seen_ids:
            problems.append(
                Problem(
                    "RB-E030",
                    f"duplicate rule id '{spec.id}' (first at {seen_ids[spec.id]})",
                    ref.loc("id"),
                    "a unique, stable rule id",
                )
            )
            continue
        seen_ids[spec.id] = spec.location
        rules.append(spec)
    known_ids = {b.get("id") for b, _ in res.rules}
    for rule_id, (_, ref) in suspended.items():
        if rule_id not in known_ids:
            from gasrules.rulebook.overlay import did_you_mean

            problems.append(
                Problem(
                    "RB-E043",
                    f"suspension names unknown rule '{rule_id}'"
                    f"{did_you_mean(rule_id, sorted(i for i in known_ids if i))}",
                    ref.loc("rule"),
                    "the id of a rule in this rulebook or its base",
                )
            )
    presentation = res.presentation
    problems += _check_names(inputs, params, derived, rules, broken)
    problems += _check_rules(rules, steps, inputs, params, derived, presentation, broken)
    problems += _check_units(inputs, params, derived, rules)
    problems += _check_fallbacks(inputs, derived)
    problems += _warnings(params, derived, rules)
    problems += _check_citations(res, params, rules)
    from gasrules.rulebook.constraints import check_constraints

    problems += check_constraints(res.constraints, params)
    problems += _check_display_units(res, inputs)
    plan, order_problems = _order(derived, rules)
    problems += order_problems
    if any(not p.is_warning for p in problems):
        raise RulebookError(problems)
    display = _display_units(res.display_units)
    sha = with_bibliography(identity_hash(res), _bibliography(res))  # the cited publications are shown too
    cutpoints = tuple(_cutpoints(derived, rules, inputs, params))
    source, value_names = generate(plan, inputs, params, derived, rules, cutpoints)
    compiled = CompiledRulebook(
        metadata=res.metadata,
        inputs=inputs,
        parameters=params,
        derived=derived,
        rules=rules,
        steps=steps,
        presentation=presentation,
        display_units=display,
        plan=plan,
        value_names=value_names,
        source=source,
        sha256=sha,
        files=tuple(d.file for d in res.documents),
        cutpoints=cutpoints,
        warnings=tuple(p for p in problems if p.is_warning),
        engine_version=__version__,
        bibliography=res.bibliography,
        sha256_v1=identity_hash(res, 1),
    )
    link(compiled)
    return compiled


def _input_spec(name: str, b: dict[str, Any], ref: Ref) -> InputSpec:
    plaus = b.get("plausible") or {}
    alts = {
        u: (float(a.get("factor", 1.0)), float(a.get("offset", 0.0)))
        for u, a in (b.get("alternatives") or {}).items()
    }
    fallback = b.get("fallback") or {}
    return InputSpec(
        name=name,
        label=b.get("label", name),
        kind=b.get("kind", "number"),
        unit=b.get("unit", ""),
        precision=int(b.get("precision", 0)),
        plausible_min=plaus.get("min"),
        plausible_max=plaus.get("max"),
        alternatives=alts,
        loinc=tuple(b.get("loinc") or ()),
        codes=tuple(b.get("codes") or ()),
        default=b.get("default"),
        location=ref.loc(),
        fallback=fallback.get("value"),
        fallback_marks=fallback.get("marks"),
        fallback_location=ref.loc("fallback") if fallback else ref.loc(),
    )


def _param_spec(name: str, b: dict[str, Any], ref: Ref, set_by: Ref, by_set_by: dict[str, Ref]) -> ParamSpec:
    bounds = b.get("bounds")
    by = b.get("by") or {}
    return ParamSpec(
        name=name,
        value=_num(b.get("value")),
        unit=b.get("unit", ""),
        bounds=(bounds["min"], bounds["max"]) if bounds else None,
        choices=tuple(b["choices"]) if "choices" in b else None,
        by_input=by.get("input"),
        by_values={k: _num(v) for k, v in (by.get("values") or {}).items()},
        rationale=b.get("rationale", ""),
        source=dict(b.get("source") or {}),
        label=b.get("label", name),
        location=ref.loc(),
        set_by=set_by.loc("value"),
        by_set_by={code: r.loc() for code, r in by_set_by.items()},
    )


def _num(value: Any) -> Any:
    """Numbers are floats everywhere (in code, trace and reports); other values stay as they are."""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return float(value)
    return value


def _check_params(params: dict[str, ParamSpec], inputs: dict[str, InputSpec]) -> list[Problem]:
    out = []
    for p in params.values():
        if p.choices is not None:
            if p.value not in p.choices:
                out.append(
                    Problem(
                        "RB-E042",
                        f"'{p.value}' is not a choice of parameter '{p.name}'",
                        p.set_by,
                        "one of " + ", ".join(p.choices),
                    )
                )
            continue
        if not isinstance(p.value, (int, float)) or isinstance(p.value, bool):
            out.append(
                Problem(
                    "RB-E010",
                    f"parameter '{p.name}' has no numeric value",
                    p.location,
                    "value: a number, or choices with a value among them",
                )
            )
            continue
        values = [p.value] + list(p.by_values.values())
        if p.bounds:
            lo, hi = p.bounds
            for v in values:
                if not lo <= v <= hi:
                    out.append(
                        Problem(
                            "RB-E045",
                            f"parameter '{p.name}' = {v:g} lies outside its own bounds [{lo:g}, {hi:g}]",
                            p.set_by,
                            f"a value from {lo:g} to {hi:g}",
                        )
                    )
        if p.by_input is not None:
            spec = inputs.get(p.by_input)
            if spec is None or spec.kind != "code":
                out.append(
                    Problem(
                        "RB-E022",
                        f"parameter '{p.name}' is selected by '{p.by_input}', which is not a coded input",
                        p.location,
                        "the name of an input with kind: code",
                    )
                )
            else:
                for key in p.by_values:
                    if key not in spec.codes:
                        out.append(
                            Problem(
                                "RB-E042",
                                f"'{key}' is not a code of input '{p.by_input}'",
                                p.location,
                                "one of " + ", ".join(spec.codes),
                            )
                        )
    return out


def _derived_spec(name: str, b: dict[str, Any], ref: Ref) -> tuple[DerivedSpec | None, list[Problem]]:
    expr, probs = parse(str(b["expr"]), ref.loc("expr"))
    when = None
    if b.get("when") is not None:
        when, more = parse(str(b["when"]), ref.loc("when"))
        probs += more
    if expr is None or probs:
        return None, probs
    return DerivedSpec(
        name=name,
        label=b.get("label", name),
        expr=expr,
        when=when,
        unit=b["unit"],
        precision=int(b["precision"]),
        report=bool(b.get("report", True)),
        location=ref.loc(),
    ), []


def _rule_spec(
    b: dict[str, Any], ref: Ref, suspended: dict[str, tuple[str, Ref]]
) -> tuple[RuleSpec | None, list[Problem]]:
    problems: list[Problem] = []
    when = None
    if b.get("when") is not None:
        when, problems = parse(str(b["when"]), ref.loc("when"))
    if problems:
        return None, problems
    status = b.get("status", "active")
    reason = b.get("suspended_reason", "")
    if b["id"] in suspended:
        status, reason = "suspended", suspended[b["id"]][0]
    findings = tuple(
        FindingSpec(
            code=f["code"],
            category=f["category"],
            severity=f["severity"],
            text=f["text"],
            headline=f.get("headline", ""),
            caution=bool(f.get("caution", False)),
        )
        for f in b.get("findings") or []
    )
    needs = frozenset(b.get("needs") or ()) | (when.needs if when else frozenset())
    return RuleSpec(
        id=b["id"],
        status=status,
        step=b["step"],
        title=b.get("title", b["id"]),
        when=when,
        needs=needs,
        stop=bool(b.get("stop", False)),
        always=bool(b.get("always", False)),
        result_status=b.get("result_status"),
        disorders=tuple(b.get("disorders") or ()),
        qualifiers=dict(b.get("qualifiers") or {}),
        findings=findings,
        doc=dict(b.get("doc") or {}),
        location=ref.loc(),
        suspended_reason=reason,
    ), []


def _clash(
    inputs: dict[str, Any],
    params: dict[str, Any],
    derived: dict[str, Any],
    res: Resolved,
    problems: list[Problem],
) -> None:
    """One name, one meaning: an input, parameter and derived value may not share a name."""
    owners: dict[str, str] = {}
    for kind, table, refs in (
        ("input", inputs, res.inputs),
        ("parameter", params, res.parameters),
        ("derived value", derived, res.derived),
    ):
        for name in table:
            if name in owners:
                problems.append(
                    Problem(
                        "RB-E030",
                        f"'{name}' is both a {owners[name]} and a {kind}",
                        refs[name][1].loc(),
                        "each name declared once",
                    )
                )
            owners.setdefault(name, kind)


# ----------------------------------------------------------------------------- semantic checks


def _check_fallbacks(inputs: dict[str, InputSpec], derived: dict[str, DerivedSpec]) -> list[Problem]:
    """An input's `fallback` names a derived value computed without that input (directly or through
    other derived values), of the input's unit; `marks` names a flag input the engine sets."""
    out: list[Problem] = []
    for spec in inputs.values():
        if spec.fallback is None:
            continue
        loc = spec.fallback_location
        d = derived.get(spec.fallback)
        if d is None:
            out.append(
                Problem(
                    "RB-E070",
                    f"fallback of input '{spec.name}' names unknown derived value '{spec.fallback}'",
                    loc,
                    "the name of a derived value",
                )
            )
            continue
        if spec.name in reads_closure(spec.fallback, derived):
            out.append(
                Problem(
                    "RB-E071",
                    f"fallback '{spec.fallback}' of input '{spec.name}' depends on '{spec.name}' itself",
                    loc,
                    "a derived value computed from other inputs",
                )
            )
        if d.unit != spec.unit:
            out.append(
                Problem(
                    "RB-E072",
                    f"fallback '{spec.fallback}' is in '{d.unit}', input '{spec.name}' in '{spec.unit}'",
                    loc,
                    f"a derived value in {spec.unit}",
                )
            )
        marks = inputs.get(spec.fallback_marks or "")
        if marks is None or marks.kind != "flag":
            out.append(
                Problem(
                    "RB-E073",
                    f"fallback of input '{spec.name}' marks '{spec.fallback_marks}', "
                    "which is not a flag input",
                    loc,
                    "the name of a flag input (kind: flag)",
                )
            )
    return out


def _check_names(
    inputs: dict[str, InputSpec],
    params: dict[str, ParamSpec],
    derived: dict[str, DerivedSpec],
    rules: list[RuleSpec],
    broken: set[str] = frozenset(),
) -> list[Problem]:  # type: ignore[assignment]
    out: list[Problem] = []
    declared = set(inputs) | set(params) | set(derived) | set(broken)
    asserted = {c for r in rules for c in r.asserts}
    for owner, _field, expr in _exprs(derived, rules):
        for name in sorted(expr.reads - declared):
            out.append(
                Problem(
                    "RB-E022",
                    f"unknown name '{name}' in {owner}",
                    expr.location,
                    "an input, parameter or derived value declared in the rulebook",
                )
            )
        for code in sorted(expr.has_codes - asserted):
            out.append(
                Problem(
                    "RB-E025",
                    f'has("{code}") names a code no rule asserts',
                    expr.location,
                    "a finding or disorder code asserted by some rule",
                )
            )
        out += _check_strings(expr, inputs, params)
        out += _check_types(owner, _field, expr, inputs, params, derived)
    return out


def _check_types(
    owner: str,
    field: str,
    expr: Expr,
    inputs: dict[str, InputSpec],
    params: dict[str, ParamSpec],
    derived: dict[str, DerivedSpec],
) -> list[Problem]:
    """Numbers, text (codes, choices) and truth values do not mix: arithmetic takes numbers, a
    derived value's expr gives a number. Run-time TypeErrors are thus refused at load."""
    out: list[Problem] = []

    def fail(message: str, expected: str) -> None:
        out.append(Problem("RB-E026", f"{owner}: {message}", expr.location, expected))

    def kind(n: ast.AST) -> str:
        if isinstance(n, ast.Constant):
            if isinstance(n.value, bool):
                return "bool"
            return "str" if isinstance(n.value, str) else "num"
        if isinstance(n, ast.Name):
            if n.id in inputs:
                return {"number": "num", "code": "str", "flag": "bool"}[inputs[n.id].kind]
            if n.id in params:
                return "str" if params[n.id].choices is not None else "num"
            return "num"
        if isinstance(n, ast.BinOp):
            for side in (n.left, n.right):
                if kind(side) != "num":
                    fail(
                        f"arithmetic on {(kind(side) == 'str' and 'text') or 'a truth value'} ({ast.unparse(side)})",
                        "numbers on both sides of + - * / **",
                    )
            return "num"
        if isinstance(n, ast.UnaryOp):
            if isinstance(n.op, ast.Not):
                kind(n.operand)
                return "bool"
            if kind(n.operand) != "num":
                fail(f"sign of something that is not a number ({ast.unparse(n.operand)})", "a number")
            return "num"
        if isinstance(n, ast.BoolOp):  # `a and b` gives one of its operands
            kinds = [kind(v) for v in n.values]
            return "num" if "num" in kinds else ("str" if "str" in kinds else "bool")
        if isinstance(n, ast.Compare):
            parts = [kind(n.left)] + [kind(c) for c in n.comparators]
            # text against a non-code is RB-E026 from _check_strings; here only ordering of text
            if (
                "str" in parts
                and all(p == "str" for p in parts)
                and any(not isinstance(op, (ast.Eq, ast.NotEq)) for op in n.ops)
            ):
                fail(f"text ordered with < or > ({ast.unparse(n)})", "== or != for codes")
            return "bool"
        if isinstance(n, ast.IfExp):
            kind(n.test)
            a, b = kind(n.body), kind(n.orelse)
            if a != b:
                fail(f"the two branches of if-else give {a} and {b}", "branches of the same kind")
            return a
        if isinstance(n, ast.Call) and isinstance(n.func, ast.Name):
            if n.func.id in ("known", "has"):
                return "bool"
            for arg in n.args:
                if kind(arg) != "num":
                    fail(f"{n.func.id}() of something that is not a number ({ast.unparse(arg)})", "numbers")
            return "num"
        return "num"

    top = kind(expr.node)
    if field == "expr" and top != "num":
        fail(
            f"a derived value must be a number, this expression gives {'text' if top == 'str' else 'a truth value'}",
            "an arithmetic expression",
        )
    return out


def _check_strings(expr: Expr, inputs: dict[str, InputSpec], params: dict[str, ParamSpec]) -> list[Problem]:
    out = []
    for left, _op, right in expr.compares:
        for a, b in ((left, right), (right, left)):
            if isinstance(a, ast.Constant) and isinstance(a.value, str):
                target = b.id if isinstance(b, ast.Name) else None
                allowed: tuple[str, ...] | None = None
                if target in inputs and inputs[target].kind == "code":
                    allowed = inputs[target].codes
                elif target in params and params[target].choices is not None:
                    allowed = params[target].choices
                if allowed is None:
                    out.append(
                        Problem(
                            "RB-E026",
                            f"'{a.value}' is compared with something that is not a coded input or choice",
                            expr.location,
                            "a coded input or a choice parameter on the other side",
                        )
                    )
                elif a.value not in allowed:
                    out.append(
                        Problem(
                            "RB-E042",
                            f"'{a.value}' is not a code of '{target}'",
                            expr.location,
                            "one of " + ", ".join(allowed),
                        )
                    )
    return out


def _check_rules(
    rules: list[RuleSpec],
    steps: dict[str, StepSpec],
    inputs: dict[str, InputSpec],
    params: dict[str, ParamSpec],
    derived: dict[str, DerivedSpec],
    presentation: dict[str, Any],
    broken: set[str] = frozenset(),
) -> list[Problem]:  # type: ignore[assignment]
    out: list[Problem] = []
    disorders = set(presentation.get("disorder_labels") or DISORDER_CODES)
    qualifiers = set(presentation.get("qualifier_labels") or ())
    names = set(inputs) | set(params) | set(derived) | set(broken)
    first_finding: dict[str, tuple[str, str, Location]] = {}
    for r in rules:
        if r.step not in steps:
            out.append(
                Problem(
                    "RB-E034",
                    f"rule '{r.id}' names undeclared step '{r.step}'",
                    r.location,
                    "one of " + ", ".join(steps),
                )
            )
        when_reads = r.when.reads if r.when else frozenset()
        for name in sorted(r.needs - set(inputs) - set(derived) - set(broken) - when_reads):
            if name not in params:
                out.append(
                    Problem(
                        "RB-E032",
                        f"rule '{r.id}' needs undeclared input '{name}'",
                        r.location,
                        "an input or derived value declared in the rulebook",
                    )
                )
        for code in r.disorders:
            if code not in disorders:
                out.append(
                    Problem(
                        "RB-E035",
                        f"rule '{r.id}' asserts unknown disorder '{code}'",
                        r.location,
                        "one of " + ", ".join(sorted(disorders)),
                    )
                )
        for code, qual in r.qualifiers.items():
            if code not in disorders or (qualifiers and qual not in qualifiers):
                out.append(
                    Problem(
                        "RB-E035",
                        f"rule '{r.id}' qualifies '{code}' as '{qual}'",
                        r.location,
                        "a disorder code and a qualifier from presentation.qualifier_labels",
                    )
                )
        for i, f in enumerate(r.findings):
            for name in PLACEHOLDER.findall(f.text):
                if name not in names:
                    out.append(
                        Problem(
                            "RB-E033",
                            f"unknown placeholder '{{{name}}}' in finding '{f.code}'",
                            r.location,
                            "an input, parameter or derived value name",
                        )
                    )
            prev = first_finding.get(f.code)
            if prev is None:
                first_finding[f.code] = (f.category, f.severity, r.location)
            elif prev[:2] != (f.category, f.severity):
                out.append(
                    Problem(
                        "RB-E037",
                        f"finding '{f.code}' is {f.category}/{f.severity} here but "
                        f"{prev[0]}/{prev[1]} at {prev[2]}",
                        r.location,
                        "one category and severity per code",
                    )
                )
        if r.result_status is not None and not r.stop:
            pass  # allowed: a status without halting
    return out


def _unit_of(
    name: str, inputs: dict[str, InputSpec], params: dict[str, ParamSpec], derived: dict[str, DerivedSpec]
) -> str | None:
    if name in inputs:
        return inputs[name].unit if inputs[name].kind == "number" else None
    if name in params:
        return None if params[name].choices is not None else (params[name].unit or None)
    if name in derived:
        return derived[name].unit
    return None


def _check_units(
    inputs: dict[str, InputSpec],
    params: dict[str, ParamSpec],
    derived: dict[str, DerivedSpec],
    rules: list[RuleSpec],
) -> list[Problem]:
    """Where both sides of a comparison are plain names with units, the units must agree."""
    out = []
    for owner, _field, expr in _exprs(derived, rules):
        for left, op, right in expr.compares:
            if isinstance(left, ast.Name) and isinstance(right, ast.Name):
                lu = _unit_of(left.id, inputs, params, derived)
                ru = _unit_of(right.id, inputs, params, derived)
                if lu and ru and lu != ru:
                    out.append(
                        Problem(
                            "RB-E036",
                            f"{owner} compares {left.id} [{lu}] {op} {right.id} [{ru}]",
                            expr.location,
                            f"both sides in {lu}",
                        )
                    )
    return out


def _warnings(
    params: dict[str, ParamSpec], derived: dict[str, DerivedSpec], rules: list[RuleSpec]
) -> list[Problem]:
    out = []
    used: set[str] = set()
    for _owner, _field, expr in _exprs(derived, rules):
        used |= expr.reads
    for r in rules:
        for f in r.findings:
            used |= set(PLACEHOLDER.findall(f.text))
    used |= {p.by_input for p in params.values() if p.by_input}
    for p in params.values():
        if p.name not in used:
            out.append(
                Problem("RB-W101", f"parameter '{p.name}' is never used", p.location, "remove it or use it")
            )
    for d in derived.values():
        if not d.report and d.name not in used:
            out.append(Problem("RB-W103", f"derived value '{d.name}' is never used nor reported", d.location))
    for r in rules:
        if r.when:
            for lit in r.when.literals:
                if lit not in _HARMLESS_LITERALS:
                    out.append(
                        Problem(
                            "RB-W102",
                            f"rule '{r.id}' compares with the literal {lit:g}",
                            r.when.location,
                            "a named parameter with unit, bounds and source",
                        )
                    )
    return out


# ----------------------------------------------------------------------------- ordering


def _order(
    derived: dict[str, DerivedSpec], rules: list[RuleSpec]
) -> tuple[list[tuple[str, str]], list[Problem]]:
    """A stable topological order of derived values and rules.

    Rules keep their declared order unless a dependency forces otherwise; each derived value
    is placed just before its first consumer. Dependencies: names read, and has() codes
    (on every rule that asserts the code)."""
    asserted_by: dict[str, list[str]] = {}
    for r in rules:
        for code in r.asserts:
            asserted_by.setdefault(code, []).append(r.id)
    nodes: dict[tuple[str, str], set[tuple[str, str]]] = {}
    for d in derived.values():
        deps = {
            ("derived", n) for n in (d.expr.reads | (d.when.reads if d.when else frozenset())) if n in derived
        }
        for e in (d.expr, d.when):
            if e is not None:
                deps |= {("rule", rid) for c in e.has_codes for rid in asserted_by.get(c, ())}
        nodes[("derived", d.name)] = deps
    for r in rules:
        reads = (r.when.reads if r.when else frozenset()) | r.needs
        for f in r.findings:
            reads |= set(PLACEHOLDER.findall(f.text))
        deps = {("derived", n) for n in reads if n in derived}
        if r.when:
            deps |= {("rule", rid) for c in r.when.has_codes for rid in asserted_by.get(c, ()) if rid != r.id}
        nodes[("rule", r.id)] = deps
    # Priority: rules by declaration; a derived value takes its earliest consumer's priority.
    prio: dict[tuple[str, str], float] = {("rule", r.id): float(i) for i, r in enumerate(rules)}
    consumers: dict[tuple[str, str], list[tuple[str, str]]] = {k: [] for k in nodes}
    for node, deps in nodes.items():
        for dep in deps:
            consumers[dep].append(node)

    def derived_prio(node: tuple[str, str], seen: frozenset[tuple[str, str]] = frozenset()) -> float:
        if node in prio:
            return prio[node]
        if node in seen:
            return float("inf")
        best = min((derived_prio(c, seen | {node}) for c in consumers[node]), default=float(len(rules)))
        prio[node] = best - 0.5
        return prio[node]

    decl = {k: i for i, k in enumerate(nodes)}
    for node in nodes:
        derived_prio(node)
    indeg = {k: len(v) for k, v in nodes.items()}
    heap = [(prio[k], decl[k], k) for k, n in indeg.items() if n == 0]
    heapq.heapify(heap)
    plan: list[tuple[str, str]] = []
    while heap:
        _, _, node = heapq.heappop(heap)
        plan.append(node)
        for c in consumers[node]:
            indeg[c] -= 1
            if indeg[c] == 0:
                heapq.heappush(heap, (prio[c], decl[c], c))
    if len(plan) < len(nodes):
        stuck = sorted(k for k, n in indeg.items() if n > 0)
        loc = {("derived", d.name): d.location for d in derived.values()}
        loc.update({("rule", r.id): r.location for r in rules})
        first = stuck[0]
        return plan, [
            Problem(
                "RB-E031",
                "cycle among " + ", ".join(f"{k}:{n}" for k, n in stuck[:8]),
                loc[first],
                "derived values and has() dependencies that form no loop",
            )
        ]
    return plan, []


# ----------------------------------------------------------------------------- display units


def _check_display_units(res: Resolved, inputs: dict[str, InputSpec]) -> list[Problem]:
    """Each display unit must be a known unit that some input of that quantity converts to."""
    from gasrules.core import units as U

    problems = []
    for unit, target in res.display_units.items():
        to = target["unit"] if isinstance(target, dict) else str(target)
        doc = next(
            (
                d
                for d in reversed(res.documents)
                if isinstance(d.data, dict) and unit in (d.data.get("display_units") or {})
            ),
            res.documents[-1],
        )
        where = doc.locate(("display_units", unit))
        canonical = [i for i in inputs.values() if i.unit == unit]
        code = U.normalise(to)
        if not canonical:
            problems.append(
                Problem(
                    "RB-E048",
                    f"display unit for '{unit}', which is the unit of no input",
                    where,
                    "a canonical unit of an input: "
                    + ", ".join(sorted({i.unit for i in inputs.values() if i.unit})),
                )
            )
        elif code is None:
            problems.append(
                Problem(
                    "RB-E048",
                    f"display unit '{to}' is not a known unit",
                    where,
                    "one of " + ", ".join(sorted({a for i in canonical for a in i.alternatives})),
                )
            )
        elif code != unit and not any(code in i.alternatives for i in canonical):
            problems.append(
                Problem(
                    "RB-E048",
                    f"display unit '{to}' is not a unit of the quantity measured in '{unit}'",
                    where,
                    "one of " + ", ".join(sorted({a for i in canonical for a in i.alternatives})),
                )
            )
    return problems


# ----------------------------------------------------------------------------- citations


def _bibliography(res: Resolved) -> Bibliography:
    """The bibliographies the rulebook chain declares (loaded once per resolved rulebook)."""
    if res.bibliography is None:
        res.bibliography, res.bibliography_problems = load_bibliographies(res.documents)
    return res.bibliography


def _source_ref(res: Resolved, name: str, ref: Ref) -> Ref:
    """Where a parameter's `source` was written: the overlay that overrode it, else its declaration."""
    set_by = res.param_set_by.get(name)
    if set_by is not None and set_by.path + ("source",) in set_by.doc.positions:
        return set_by
    return ref


def _check_citations(res: Resolved, params: dict[str, ParamSpec], rules: list[RuleSpec]) -> list[Problem]:
    """Every bibliography key a parameter or rule cites must be declared (RB-E050 to RB-E052)."""
    bib = _bibliography(res)
    param_refs = [
        (n, b.get("source") or {}, _source_ref(res, n, ref).loc("source", "ref"))
        for n, (b, ref) in res.parameters.items()
    ]
    rule_refs = [
        (b.get("id", ""), list((b.get("doc") or {}).get("references") or []), ref.loc("doc", "references"))
        for b, ref in res.rules
        if isinstance(b, dict)
    ]
    if res.bibliography_problems:  # a bibliography that did not load: its keys cannot be judged
        return list(res.bibliography_problems)
    problems, _used = check_rulebook_refs(bib, param_refs, rule_refs)
    return problems


def _display_units(raw: dict[str, Any]) -> dict[str, tuple[str, int | None]]:
    out: dict[str, tuple[str, int | None]] = {}
    for unit, target in raw.items():
        if isinstance(target, dict):
            out[unit] = (target["unit"], target.get("precision"))
        else:
            out[unit] = (str(target), None)
    return out


# ----------------------------------------------------------------------------- cut-points


def _cutpoints(
    derived: dict[str, DerivedSpec],
    rules: list[RuleSpec],
    inputs: dict[str, InputSpec],
    params: dict[str, ParamSpec],
) -> Iterable[CutPoint]:
    def kind(node: ast.AST) -> tuple[str, str] | None:
        if isinstance(node, ast.Name):
            n = node.id
            if n in params:
                return ("parameter", n) if params[n].choices is None else None
            if n in derived:
                return ("derived", n)
            if n in inputs and inputs[n].kind == "number":
                return ("input", n)
            return None
        if (
            isinstance(node, ast.Constant)
            and isinstance(node.value, (int, float))
            and not isinstance(node.value, bool)
        ):
            return ("constant", repr(float(node.value)))
        if (
            isinstance(node, ast.UnaryOp)
            and isinstance(node.op, ast.USub)
            and isinstance(node.operand, ast.Constant)
        ):
            return ("constant", repr(-float(node.operand.value)))
        return None

    for owner, field, expr in _exprs(derived, rules):
        for k, node in enumerate(compare_nodes(expr.node)):
            for left, op, right in _pairs(node):
                cp = _cutpoint(owner, field, expr, k, left, op, right, kind)
                if cp is not None:
                    yield cp


def _pairs(node: ast.Compare) -> list[tuple[ast.AST, str, ast.AST]]:
    out = []
    left = node.left
    for op, right in zip(node.ops, node.comparators):
        out.append((left, COMPARISON_OF_NODE[type(op)].symbol, right))
        left = right
    return out


def _cutpoint(
    owner: str,
    field: str,
    expr: Expr,
    k: int,
    left: ast.AST,
    op: str,
    right: ast.AST,
    kind: Any,
) -> CutPoint | None:
    lk, rk = kind(left), kind(right)
    if lk is None or rk is None:
        return None
    # the quantity is the measured side; the threshold is the parameter/constant side
    if lk[0] in ("parameter", "constant") and rk[0] in ("input", "derived"):
        lk, rk, op = rk, lk, COMPARISONS[op].flipped
    if lk[0] in ("parameter", "constant"):
        return None
    return CutPoint(
        owner=owner,
        field=field,
        quantity=lk[1],
        op=op,
        threshold=rk[1],
        threshold_kind=rk[0],
        location=expr.location,
        node=k,
    )


def list_cutpoints(compiled: CompiledRulebook) -> list[dict[str, Any]]:
    """Every numeric cut-point of every condition, with the threshold's current value.

    ``value`` is the default; when a coded input selects the parameter (e.g. venous intervals),
    ``by`` holds {input, values} with the value for each code. When both sides are measured or
    derived, ``quantity`` is the left-hand side as written."""
    out = []
    for c in compiled.cutpoints:
        value: Any = None
        by: dict[str, Any] = {}
        if c.threshold_kind == "parameter":
            p = compiled.parameters[c.threshold]
            value = p.value
            if p.by_input:
                by = {"input": p.by_input, "values": dict(p.by_values)}
        elif c.threshold_kind == "constant":
            value = float(c.threshold)
        out.append(
            {
                "owner": c.owner,
                "field": c.field,
                "quantity": c.quantity,
                "op": c.op,
                "threshold": c.threshold,
                "threshold_kind": c.threshold_kind,
                "value": value,
                "by": by,
                "location": str(c.location),
            }
        )
    return out
