"""Expressions: the only module that imports simpleeval.

An expression from a rulebook (``when`` or ``expr``) is parsed once with simpleeval's parser,
checked against a strict allow-list, and then either

* translated to Python source (:func:`to_python`) that the compiler joins into one generated
  function for the whole rulebook (fast; runs with no builtins), or
* evaluated by :class:`Oracle`, simpleeval's own evaluator with the same semantics (slow; the
  tests compare the generated code against it).

Semantics shared by both: numbers are floats; a comparison reads each *named* operand at its
reported precision (so a decision matches the number on screen); arithmetic reads full values;
``known(x)`` is true when x is available; ``has("code")`` is true when an earlier rule asserted
that finding or disorder code. A name inside ``known()``, or guarded by a ``known()`` test in an
``if``/``and`` before it, is not *needed*; every other name read is.
"""

from __future__ import annotations

import ast
import math
import operator
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from simpleeval import SimpleEval

from gasrules.core.errors import Location, Problem

MAX_LENGTH = 2000
MAX_DEPTH = 40
MAX_CONST_POWER = 8

FUNCTIONS: dict[str, Callable[..., Any]] = {
    "abs": abs,
    "min": min,
    "max": max,
    "sqrt": math.sqrt,
    "exp": math.exp,
    "log": math.log,
    "log10": math.log10,
}
_ARITY = {
    "abs": (1, 1),
    "min": (2, 8),
    "max": (2, 8),
    "sqrt": (1, 1),
    "exp": (1, 1),
    "log": (1, 1),
    "log10": (1, 1),
    "known": (1, 1),
    "has": (1, 1),
}
_BINOPS = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**"}


@dataclass(frozen=True)
class Comparison:
    """One comparison operator of the expression language (the one table of them)."""

    symbol: str  # as written in a condition: "<="
    node: type[ast.cmpop]  # its node in the parsed expression: ast.LtE
    holds: Callable[[Any, Any], bool]  # whether `a symbol b` is true
    flipped: str  # the same test with its operands swapped (a <= b is b >= a)
    word: str  # a name for it that fits in identifiers: "le"


COMPARISONS: dict[str, Comparison] = {
    c.symbol: c
    for c in (
        Comparison("<", ast.Lt, operator.lt, ">", "lt"),
        Comparison("<=", ast.LtE, operator.le, ">=", "le"),
        Comparison(">", ast.Gt, operator.gt, "<", "gt"),
        Comparison(">=", ast.GtE, operator.ge, "<=", "ge"),
        Comparison("==", ast.Eq, operator.eq, "==", "eq"),
        Comparison("!=", ast.NotEq, operator.ne, "!=", "ne"),
    )
}
COMPARISON_OF_NODE: dict[type[ast.cmpop], Comparison] = {c.node: c for c in COMPARISONS.values()}


@dataclass(frozen=True)
class CutPoint:
    """One numeric comparison in a condition: `quantity op threshold`."""

    owner: str  # rule id or derived name
    field: str  # 'when' or 'expr'
    quantity: str  # the name compared
    op: str
    threshold: str  # a name, or the literal text of a number
    threshold_kind: str  # parameter | derived | input | constant
    location: Location
    node: int = -1  # index of its comparison in compare_nodes(expression)


@dataclass
class Expr:
    text: str
    node: ast.AST
    location: Location
    reads: frozenset[str] = frozenset()  # every name read (needed or guarded)
    needs: frozenset[str] = frozenset()  # names that must be available
    has_codes: frozenset[str] = frozenset()
    literals: tuple[float, ...] = ()  # numeric literals outside trivial arithmetic
    compares: list[tuple[ast.AST, str, ast.AST]] = field(default_factory=list)


def parse(text: str, location: Location) -> tuple[Expr | None, list[Problem]]:
    """Parse and check the shape of one expression (names are checked later, by the compiler)."""
    if len(text) > MAX_LENGTH:
        return None, [
            Problem(
                "RB-E024", f"expression is {len(text)} characters long", location, f"at most {MAX_LENGTH}"
            )
        ]
    if _nesting(text) > MAX_DEPTH:
        return None, [
            Problem("RB-E024", "expression is nested too deeply", location, f"at most {MAX_DEPTH} levels")
        ]
    if not text.strip():
        return None, [
            Problem(
                "RB-E020",
                "expression is blank",
                location,
                "an expression such as 'pco2 > pco2_high and ph < ph_low'",
            )
        ]
    try:
        statements = ast.parse(text.strip()).body
    except SyntaxError as exc:
        return None, [
            Problem(
                "RB-E020",
                f"syntax error in expression {text!r}: {exc.msg}",
                location,
                "an expression such as 'pco2 > pco2_high and ph < ph_low'",
            )
        ]
    except (ValueError, RecursionError, MemoryError) as exc:
        return None, [
            Problem(
                "RB-E024",
                f"expression cannot be parsed safely: {type(exc).__name__}",
                location,
                f"at most {MAX_LENGTH} characters and {MAX_DEPTH} levels",
            )
        ]
    if len(statements) != 1:
        return None, [
            Problem(
                "RB-E021",
                f"expression holds {len(statements)} statements",
                location,
                "a single expression (no ';' or line breaks between statements)",
            )
        ]
    try:
        node = SimpleEval.parse(text)
    except SyntaxError as exc:
        return None, [
            Problem(
                "RB-E020",
                f"syntax error in expression {text!r}: {exc.msg}",
                location,
                "an expression such as 'pco2 > pco2_high and ph < ph_low'",
            )
        ]
    except Exception as exc:  # simpleeval's own refusals (InvalidExpression and kin)
        return None, [
            Problem(
                "RB-E020",
                f"expression {text!r} refused by the parser: {exc}",
                location,
                "an expression such as 'pco2 > pco2_high and ph < ph_low'",
            )
        ]
    if isinstance(node, ast.Expr):
        node = node.value
    elif not isinstance(node, ast.expr):
        return None, [
            Problem(
                "RB-E021",
                f"{type(node).__name__.lower()} statements are not allowed",
                location,
                "a single expression",
            )
        ]
    problems: list[Problem] = []
    checker = _ShapeChecker(location, problems)
    checker.visit(node, 0)
    if problems:
        return None, problems
    expr = Expr(text, node, location)
    reads, needs, codes = _analyse(node)
    expr.reads, expr.needs = frozenset(reads), frozenset(needs)
    expr.has_codes = frozenset(codes)
    expr.literals = tuple(checker.literals)
    expr.compares = checker.compares
    return expr, []


def _nesting(text: str) -> int:
    depth = best = 0
    for ch in text:
        if ch == "(":
            depth += 1
            best = max(best, depth)
        elif ch == ")":
            depth -= 1
    return best


class _ShapeChecker:
    """Refuses everything that is not on the allow-list."""

    def __init__(self, location: Location, problems: list[Problem]):
        self.location = location
        self.problems = problems
        self.literals: list[float] = []
        self.compares: list[tuple[ast.AST, str, ast.AST]] = []

    def fail(self, code: str, message: str, expected: str = "") -> None:
        self.problems.append(Problem(code, message, self.location, expected))

    def visit(self, node: ast.AST, depth: int) -> None:
        if depth > MAX_DEPTH:
            self.fail("RB-E024", "expression is nested too deeply", f"at most {MAX_DEPTH} levels")
            return
        method = getattr(self, "visit_" + type(node).__name__, None)
        if method is None:
            what = type(node).__name__
            self.fail(
                "RB-E021",
                f"'{what}' is not allowed in expressions",
                "numbers, names, + - * / **, comparisons, and/or/not, if-else, allowed functions",
            )
            return
        method(node, depth + 1)

    def visit_Constant(self, node: ast.Constant, depth: int) -> None:
        if isinstance(node.value, bool) or node.value is None:
            if node.value is None:
                self.fail("RB-E021", "None is not allowed in expressions")
            return
        if isinstance(node.value, (int, float)):
            try:
                finite = math.isfinite(float(node.value))
            except OverflowError:
                self.fail("RB-E024", "number too large", "a number a float can hold (below 1e308)")
                return
            if not finite:
                self.fail("RB-E021", "non-finite number in expression")
            return
        if isinstance(node.value, str):
            if len(node.value) > 64:
                self.fail("RB-E024", "string constant longer than 64 characters")
            return
        self.fail("RB-E021", f"constant of type {type(node.value).__name__} is not allowed")

    def visit_Name(self, node: ast.Name, depth: int) -> None:
        if node.id.startswith("_"):
            self.fail("RB-E021", f"name '{node.id}' starts with an underscore", "a declared name")

    def visit_BinOp(self, node: ast.BinOp, depth: int) -> None:
        if type(node.op) not in _BINOPS:
            self.fail("RB-E021", f"operator {type(node.op).__name__} is not allowed", "+ - * / **")
            return
        if isinstance(node.op, ast.Pow):
            if any(isinstance(n, ast.BinOp) and isinstance(n.op, ast.Pow) for n in ast.walk(node.right)):
                self.fail(
                    "RB-E024", "a power inside an exponent", "one level of powers, e.g. 10 ** (ph - pk)"
                )
                return
            exp = _const_number(node.right)
            if exp is not None and abs(exp) > MAX_CONST_POWER:
                self.fail(
                    "RB-E024", f"power {exp:g} is too large", f"an exponent of at most {MAX_CONST_POWER}"
                )
                return
        self.visit(node.left, depth)
        self.visit(node.right, depth)

    def visit_UnaryOp(self, node: ast.UnaryOp, depth: int) -> None:
        if not isinstance(node.op, (ast.USub, ast.UAdd, ast.Not)):
            self.fail("RB-E021", f"operator {type(node.op).__name__} is not allowed", "-x, +x or not x")
            return
        self.visit(node.operand, depth)

    def visit_BoolOp(self, node: ast.BoolOp, depth: int) -> None:
        for value in node.values:
            self.visit(value, depth)

    def visit_Compare(self, node: ast.Compare, depth: int) -> None:
        left = node.left
        for op, right in zip(node.ops, node.comparators):
            if type(op) not in COMPARISON_OF_NODE:
                self.fail("RB-E021", f"comparison {type(op).__name__} is not allowed", "< <= > >= == !=")
                return
            self.compares.append((left, COMPARISON_OF_NODE[type(op)].symbol, right))
            left = right
        self.visit(node.left, depth)
        for right in node.comparators:
            self.visit(right, depth)
            value = _const_number(right)
            if value is not None:
                self.literals.append(value)
        value = _const_number(node.left)
        if value is not None:
            self.literals.append(value)

    def visit_IfExp(self, node: ast.IfExp, depth: int) -> None:
        for part in (node.test, node.body, node.orelse):
            self.visit(part, depth)

    def visit_Call(self, node: ast.Call, depth: int) -> None:
        if not isinstance(node.func, ast.Name):
            self.fail("RB-E021", "only plain function calls are allowed", ", ".join(_ARITY))
            return
        name = node.func.id
        if name not in _ARITY:
            self.fail("RB-E023", f"function '{name}' is not allowed", "one of " + ", ".join(_ARITY))
            return
        if node.keywords:
            self.fail("RB-E021", f"keyword arguments to {name}() are not allowed")
            return
        if any(isinstance(a, ast.Starred) for a in node.args):
            self.fail("RB-E021", f"*arguments to {name}() are not allowed")
            return
        lo, hi = _ARITY[name]
        if not lo <= len(node.args) <= hi:
            self.fail("RB-E021", f"{name}() takes {lo}" + (f" to {hi}" if hi != lo else "") + " argument(s)")
            return
        if name == "known" and not isinstance(node.args[0], ast.Name):
            self.fail("RB-E021", "known() takes one name", "known(albumin)")
            return
        if name == "has" and not (
            isinstance(node.args[0], ast.Constant) and isinstance(node.args[0].value, str)
        ):
            self.fail("RB-E021", "has() takes one quoted code", 'has("metabolic_acidosis_present")')
            return
        for arg in node.args:
            self.visit(arg, depth)


def _const_number(node: ast.AST) -> float | None:
    if (
        isinstance(node, ast.Constant)
        and isinstance(node.value, (int, float))
        and not isinstance(node.value, bool)
    ):
        try:
            return float(node.value)
        except OverflowError:
            return float("inf")
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        inner = _const_number(node.operand)
        if inner is not None:
            return -inner if isinstance(node.op, ast.USub) else inner
    return None


def _known_args(node: ast.AST, negated: bool = False) -> set[str]:
    """Names that ``node`` being true (or false when negated) proves available."""
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "known":
        return set() if negated else {node.args[0].id}  # type: ignore[attr-defined]
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.Not):
        return _known_args(node.operand, not negated)
    if isinstance(node, ast.BoolOp):
        if isinstance(node.op, ast.And) and not negated:
            return set().union(*(_known_args(v) for v in node.values))
        if isinstance(node.op, ast.Or) and negated:
            return set().union(*(_known_args(v, True) for v in node.values))
    return set()


def _analyse(node: ast.AST) -> tuple[set[str], set[str], set[str]]:
    reads: set[str] = set()
    needs: set[str] = set()
    codes: set[str] = set()

    def walk(n: ast.AST, guarded: frozenset[str]) -> None:
        if isinstance(n, ast.Name):
            reads.add(n.id)
            if n.id not in guarded:
                needs.add(n.id)
            return
        if isinstance(n, ast.Call) and isinstance(n.func, ast.Name):
            if n.func.id == "known":
                reads.add(n.args[0].id)  # type: ignore[attr-defined]
                return
            if n.func.id == "has":
                codes.add(n.args[0].value)  # type: ignore[attr-defined]
                return
            for a in n.args:
                walk(a, guarded)
            return
        if isinstance(n, ast.IfExp):
            walk(n.test, guarded)
            walk(n.body, guarded | _known_args(n.test))
            walk(n.orelse, guarded | _known_args(n.test, True))
            return
        if isinstance(n, ast.BoolOp):
            g = guarded
            for v in n.values:
                walk(v, g)
                g = g | _known_args(v, negated=isinstance(n.op, ast.Or))
            return
        for child in ast.iter_child_nodes(n):
            walk(child, guarded)

    walk(node, frozenset())
    return reads, needs, codes


# ----------------------------------------------------------------------------- code generation


@dataclass(frozen=True)
class NameInfo:
    """What the code generator needs to know about one name."""

    kind: str  # input | parameter | derived
    value_kind: str  # number | code | flag | choice
    literal: Any = None  # parameters without `by`: the value, baked into the code


def compare_nodes(root: ast.AST) -> list[ast.Compare]:
    """The comparisons of an expression, numbered in ast.walk order (the trace's index)."""
    return [n for n in ast.walk(root) if isinstance(n, ast.Compare)]


def to_python(node: ast.AST, names: Mapping[str, NameInfo], record: bool = False) -> str:
    """Python source for a checked expression. Locals: v_<name> full value, r_<name> rounded,
    p_<name> per-case parameter; F is the set of asserted codes.

    With ``record``, comparison k (see :func:`compare_nodes`) becomes
    ``(_fv if _ov == k else _rec(W, k, <comparison>))``: its value is recorded in the local dict
    W when it is evaluated, and it can be forced to ``_fv`` by setting ``_ov = k``. The trace
    uses this to tell which comparisons decided a rule's outcome."""
    return _Gen(names, {id(n): k for k, n in enumerate(compare_nodes(node))} if record else None).expr(
        node, False
    )


class _Gen:
    def __init__(self, names: Mapping[str, NameInfo], record: dict[int, int] | None = None):
        self.names = names
        self.record = record

    def expr(self, n: ast.AST, in_compare: bool) -> str:
        if isinstance(n, ast.Constant):
            if isinstance(n.value, bool) or isinstance(n.value, str):
                return repr(n.value)
            return repr(float(n.value))
        if isinstance(n, ast.Name):
            return self.name(n.id, in_compare)
        if isinstance(n, ast.BinOp):
            left, right = self.expr(n.left, False), self.expr(n.right, False)
            if isinstance(n.op, ast.Pow):
                return f"_pow({left}, {right})"
            return f"({left} {_BINOPS[type(n.op)]} {right})"
        if isinstance(n, ast.UnaryOp):
            op = {ast.USub: "-", ast.UAdd: "+", ast.Not: "not "}[type(n.op)]
            return f"({op}{self.expr(n.operand, False)})"
        if isinstance(n, ast.BoolOp):
            joiner = " and " if isinstance(n.op, ast.And) else " or "
            return "(" + joiner.join(self.expr(v, False) for v in n.values) + ")"
        if isinstance(n, ast.Compare):
            parts = [self.expr(n.left, True)]
            for op, right in zip(n.ops, n.comparators):
                parts.append(COMPARISON_OF_NODE[type(op)].symbol)
                parts.append(self.expr(right, True))
            text = "(" + " ".join(parts) + ")"
            if self.record is not None:
                k = self.record[id(n)]
                return f"(_fv if _ov == {k} else _rec(W, {k}, {text}))"
            return text
        if isinstance(n, ast.IfExp):
            return f"({self.expr(n.body, in_compare)} if {self.expr(n.test, False)} else {self.expr(n.orelse, in_compare)})"
        if isinstance(n, ast.Call):
            fn = n.func.id  # type: ignore[attr-defined]
            if fn == "known":
                arg = n.args[0].id  # type: ignore[attr-defined]
                info = self.names[arg]
                return "True" if info.kind == "parameter" else f"(v_{arg} is not None)"
            if fn == "has":
                return f"({n.args[0].value!r} in F)"  # type: ignore[attr-defined]
            args = ", ".join(self.expr(a, False) for a in n.args)
            return f"_{fn}({args})"
        raise AssertionError(f"unchecked node {type(n).__name__}")  # pragma: no cover

    def name(self, name: str, in_compare: bool) -> str:
        info = self.names[name]
        if info.kind == "parameter":
            if info.literal is not None:
                return repr(info.literal) if isinstance(info.literal, str) else repr(float(info.literal))
            return f"p_{name}"
        if in_compare and info.value_kind == "number":
            return f"r_{name}"
        return f"v_{name}"


def runtime_globals() -> dict[str, Any]:
    """The only globals generated code sees (no builtins)."""
    g: dict[str, Any] = {"__builtins__": {}, "_pow": math.pow, "_floor": math.floor}
    for fname, fn in FUNCTIONS.items():
        g["_" + fname] = fn
    g["_ERR"] = (ArithmeticError, ValueError, TypeError)  # TypeError: a safety net; types are checked at load
    g.update(_set=set, _float=finite_float, _bool=bool, _describe=describe_error, _rec=_record)
    g["_ERR_T"] = (ArithmeticError, ValueError, TypeError)  # re-evaluations may meet unguarded None
    return g


def finite_float(value: Any) -> float:
    """A derived value as a float; infinity and NaN (e.g. 1e308 * 10, inf - inf) are calculation
    errors, never values: results stay strict JSON and comparisons stay meaningful."""
    out = float(value)
    if math.isnan(out):
        raise ValueError("the result is not a number (NaN)")
    if math.isinf(out):
        raise OverflowError("result too large")
    return out


def _record(store: dict[int, bool], k: int, value: Any) -> Any:
    store[k] = bool(value)
    return value


def describe_error(exc: BaseException) -> str:
    """A calculation error in words a reader understands."""
    text = str(exc)
    if isinstance(exc, ZeroDivisionError):
        return "division by zero"
    if text == "math domain error":
        return "outside the domain of the function (log or square root of zero or a negative number)"
    if isinstance(exc, OverflowError):
        return "result too large"
    return text or type(exc).__name__


def round_at(x: float, scale: float) -> float:
    """Round half away from zero at 1/scale, tolerant of binary representation error.
    Shared by generated code (emitted inline with the same arithmetic) and the oracle."""
    if x >= 0:
        return math.floor(x * scale + 0.5 + 1e-9) / scale + 0.0
    return -math.floor(-x * scale + 0.5 + 1e-9) / scale + 0.0


# ----------------------------------------------------------------------------- the oracle


class Oracle(SimpleEval):
    """simpleeval's own tree-walking evaluator, with the engine's comparison semantics.

    ``values`` holds full values (None when unavailable), ``rounded`` the values at their
    reported precision, ``codes`` the asserted finding/disorder codes."""

    def __init__(
        self,
        values: Mapping[str, Any],
        rounded: Mapping[str, Any],
        codes: set[str],
        forced: Mapping[int, bool] | None = None,
    ):
        functions: dict[str, Any] = dict(FUNCTIONS)
        functions["known"] = lambda v: v is not None
        functions["has"] = lambda c: c in codes
        super().__init__(functions=functions, names=dict(values))
        self.operators[ast.Pow] = math.pow
        self._rounded = rounded
        self._forced = dict(forced or {})
        self._index: dict[int, int] = {}
        self.seen: dict[int, bool] = {}  # comparison index -> its value, when evaluated

    def _eval_compare(self, node: ast.Compare) -> Any:
        k = self._index.get(id(node))
        if k is not None and k in self._forced:
            return self._forced[k]
        value = self._compare(node)
        if k is not None:
            self.seen[k] = bool(value)
        return value

    def _compare(self, node: ast.Compare) -> Any:
        right = self._operand(node.left)
        result = True
        for op, comp in zip(node.ops, node.comparators):
            if not result:
                break
            left = right
            right = self._operand(comp)
            result = self.operators[type(op)](left, right)
        return result

    def _operand(self, node: ast.AST) -> Any:
        if isinstance(node, ast.Name) and node.id in self._rounded:
            return self._rounded[node.id]
        return self._eval(node)

    def _eval_call(self, node: ast.Call) -> Any:
        if isinstance(node.func, ast.Name) and node.func.id == "known":
            return self.names.get(node.args[0].id) is not None  # type: ignore[attr-defined, union-attr]
        return super()._eval_call(node)

    def _eval_constant(self, node: ast.Constant) -> Any:
        value = node.value
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return float(value)
        return value

    def run(self, expr: Expr) -> Any:
        self._index = {id(n): k for k, n in enumerate(compare_nodes(expr.node))}
        self.seen = {}
        return self._eval(expr.node)
