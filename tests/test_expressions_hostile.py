"""Hostile and absurd expressions: every one is refused at load with the right code.

The catalogue follows the "trying to break out" idea of simpleeval's own security tests:
dunder and attribute access, imports, calls of functions that are not allowed, subscripts,
comprehensions, lambdas, huge powers, very long or deeply nested text, f-strings, the walrus,
starred and keyword arguments, statements. Each is checked twice: by the expression checker
alone (gasrules.rulebook.expressions.parse) and inside a whole rulebook (gasrules.check_rulebook), where
the problem must point at the condition's line. Then: the generated code runs with no builtins,
and text from a rulebook (titles, reasons) cannot inject code into it.
"""

from __future__ import annotations

import ast
import json
import re
import warnings
from pathlib import Path

import pytest

import gasrules
from conftest import portable
from gasrules.core.errors import Location
from gasrules.rulebook.expressions import parse, runtime_globals

ACIDAEMIA_WHEN = "    when: ph < ph_low\n"  # the condition of rule ph_state.acidaemia in the mini rulebook
AG_EXPR = "    expr: na - (cl + hco3)\n"  # the expression of derived value anion_gap

DEEP_PARENS = "(" * 41 + "ph" + ")" * 41 + " < ph_low"
LONG = " + ".join(["ph"] * 700) + " < ph_low"

CATALOGUE: list[tuple[str, str]] = [
    # dunder and attribute access
    ("ph.__class__ == ph", "RB-E021"),
    ("ph.real < ph_low", "RB-E021"),
    ("(1).__class__.__bases__[0].__subclasses__()", "RB-E021"),
    ("ph.__class__.__mro__", "RB-E021"),
    ("__builtins__ < ph_low", "RB-E021"),
    ("_ < ph_low", "RB-E021"),
    ("__import__('os').system('true')", "RB-E021"),
    # imports
    ("__import__('os')", "RB-E023"),
    ("import os", "RB-E021"),
    ("from os import path", "RB-E021"),
    # calls of functions that are not on the allow-list
    ("eval('1') < ph_low", "RB-E023"),
    ("exec('x = 1')", "RB-E023"),
    ("open('/etc/passwd')", "RB-E023"),
    ("getattr(ph, 'real') < ph_low", "RB-E023"),
    ("globals()", "RB-E023"),
    ("compile('1', 'x', 'eval')", "RB-E023"),
    ("round(ph, 1) < ph_low", "RB-E023"),
    ("int(ph) < ph_low", "RB-E023"),
    ("type(ph)", "RB-E023"),
    ("print(ph)", "RB-E023"),
    ("ph if ph < ph_low else __import__('os')", "RB-E023"),
    # subscripts
    ("ph[0] < ph_low", "RB-E021"),
    ("(1, 2)[0] < ph_low", "RB-E021"),
    ("'abc'[0] == ph", "RB-E021"),
    # containers and odd constants
    ("[1, 2]", "RB-E021"),
    ("(1, 2)", "RB-E021"),
    ("{1: 2}", "RB-E021"),
    ("{1}", "RB-E021"),
    ("b'x' == ph", "RB-E021"),
    ("None", "RB-E021"),
    ("...", "RB-E021"),
    ("1j < ph", "RB-E021"),
    ("1e999 > ph", "RB-E021"),
    ("'" + "x" * 65 + "' == sample_type", "RB-E024"),
    # comprehensions and generators
    ("[x for x in (1, 2)]", "RB-E021"),
    ("{x for x in (1, 2)}", "RB-E021"),
    ("{x: x for x in (1, 2)}", "RB-E021"),
    ("(x for x in (1, 2))", "RB-E021"),
    ("max(x for x in (ph, ph)) < ph_low", "RB-E021"),
    # lambdas
    ("lambda: 1", "RB-E021"),
    ("(lambda: 1)() < ph_low", "RB-E021"),
    ("max(ph, (lambda x: x)(1)) < ph_low", "RB-E021"),
    # huge powers
    ("9 ** 9 ** 9 > ph", "RB-E024"),
    ("ph ** 100 > ph_low", "RB-E024"),
    ("10 ** 400 > ph", "RB-E024"),
    ("2 ** -9 < ph", "RB-E024"),
    ("ph ** 8.5 > ph_low", "RB-E024"),
    # very long, deeply nested
    (LONG, "RB-E024"),
    (DEEP_PARENS, "RB-E024"),
    ("-" * 50 + "ph < ph_low", "RB-E024"),
    ("not " * 45 + "ph", "RB-E024"),
    ("ph if ph else " * 45 + "ph", "RB-E024"),
    ("1" * 2001, "RB-E024"),
    # f-strings, walrus, starred and keyword arguments
    ('f"{ph}" == ph', "RB-E021"),
    ("(x := 5) < ph", "RB-E021"),
    ("max(*(ph, ph)) < ph_low", "RB-E021"),
    ("max(ph, *(ph, ph)) < ph_low", "RB-E021"),
    ("max(ph, ph, key=abs) < ph_low", "RB-E021"),
    ("min(ph, ph, default=1) < ph_low", "RB-E021"),
    # operators outside the allow-list
    ("ph // 1 < ph_low", "RB-E021"),
    ("ph % 2 < ph_low", "RB-E021"),
    ("ph << 1000 < ph_low", "RB-E021"),
    ("ph ^ 2 < ph_low", "RB-E021"),
    ("ph @ ph < ph_low", "RB-E021"),
    ("~ph < ph_low", "RB-E021"),
    ("ph in (1, 2)", "RB-E021"),
    ("ph is None", "RB-E021"),
    ("ph is not ph_low", "RB-E021"),
    # statements
    ("x = 1", "RB-E021"),
    ("ph += 1", "RB-E021"),
    ("del ph", "RB-E021"),
    ("assert ph", "RB-E021"),
    ("pass", "RB-E021"),
    ("raise SystemExit", "RB-E021"),
    ("global ph", "RB-E021"),
    ("def f(): pass", "RB-E021"),
    ("while True: pass", "RB-E021"),
    ("(yield)", "RB-E021"),
    ("await ph", "RB-E021"),
    # the special functions misused
    ("known(ph.real)", "RB-E021"),
    ("known(7)", "RB-E021"),
    ("has(ph)", "RB-E021"),
    ("min(ph) < ph_low", "RB-E021"),
    ("max(ph, ph, ph, ph, ph, ph, ph, ph, ph) < ph_low", "RB-E021"),
    # syntax
    ("ph <", "RB-E020"),
    ("ph ==== 1", "RB-E020"),
    ("'unterminated", "RB-E020"),
    ("ph \u22c5 2", "RB-E020"),
]


def _ids(item: tuple[str, str]) -> str:
    text = item[0]
    return text if len(text) <= 40 else f"{text[:30]}...({len(text)} chars)"


@pytest.mark.parametrize("text, code", CATALOGUE, ids=[_ids(c) for c in CATALOGUE])
def test_refused_by_the_checker(text: str, code: str) -> None:
    expr, problems = parse(text, Location("rb.yaml", 7, 11, "rules[0].when"))
    assert expr is None
    assert problems and {p.code for p in problems} == {code}, [p.render() for p in problems]
    # every problem is located at the expression and says what is expected or what went wrong
    assert all(p.location == Location("rb.yaml", 7, 11, "rules[0].when") for p in problems)
    assert all(p.message for p in problems)


@pytest.fixture
def mini_text(mini_path: Path) -> str:
    text = portable(mini_path.read_text(encoding="utf-8"), mini_path)
    assert text.count(ACIDAEMIA_WHEN) == 1 and text.count(AG_EXPR) == 1
    return text


def _line_of(text: str, snippet: str) -> int:
    return text[: text.index(snippet)].count("\n") + 1


@pytest.mark.parametrize("text, code", CATALOGUE, ids=[_ids(c) for c in CATALOGUE])
def test_refused_at_load(text: str, code: str, mini_text: str, tmp_path: Path) -> None:
    # The hostile text replaces the condition of a real rule; YAML double quotes carry it as is.
    rb_text = mini_text.replace(ACIDAEMIA_WHEN, f"    when: {json.dumps(text)}\n")
    path = tmp_path / "rb.yaml"
    path.write_text(rb_text, encoding="utf-8")
    problems = gasrules.check_rulebook(path)
    errors = [p for p in problems if not p.is_warning]
    assert {p.code for p in errors} == {code}, [p.render() for p in errors]
    line = _line_of(rb_text, "    when: " + json.dumps(text))
    assert all(
        (p.location.line, p.location.col, p.location.path) == (line, 11, "rules[2].when") for p in errors
    )
    with pytest.raises(gasrules.RulebookError):
        gasrules.load_rulebook(path, cache=False)


@pytest.mark.parametrize(
    "text, code",
    [
        ("__import__('os').getcwd()", "RB-E021"),
        ("na.__class__", "RB-E021"),
        ("10 ** 400", "RB-E024"),
        ("[na for na in (1, 2)]", "RB-E021"),
        ("open('x')", "RB-E023"),
    ],
)
def test_refused_in_derived_expressions(text: str, code: str, mini_text: str, tmp_path: Path) -> None:
    rb_text = mini_text.replace(AG_EXPR, f"    expr: {json.dumps(text)}\n")
    path = tmp_path / "rb.yaml"
    path.write_text(rb_text, encoding="utf-8")
    errors = [p for p in gasrules.check_rulebook(path) if not p.is_warning]
    own = [p for p in errors if p.location.path == "derived.anion_gap.expr"]
    assert [p.code for p in own] == [code]
    # (its consumers then also report it: see test_broken_derived_value_is_not_unknown)
    assert all(p.code == "RB-E022" and "'anion_gap'" in p.message for p in errors if p not in own)


def test_broken_derived_value_is_not_unknown(mini_text: str, tmp_path: Path) -> None:
    path = tmp_path / "rb.yaml"
    path.write_text(mini_text.replace(AG_EXPR, "    expr: \"open('x')\"\n"), encoding="utf-8")
    assert [p.code for p in gasrules.check_rulebook(path) if not p.is_warning] == ["RB-E023"]


# ----------------------------------------------------------------------------- gaps found and closed


def _check_text(mini_text: str, tmp_path: Path, when: str) -> list[str]:
    path = tmp_path / "rb.yaml"
    path.write_text(mini_text.replace(ACIDAEMIA_WHEN, f"    when: {json.dumps(when)}\n"), encoding="utf-8")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return [p.code for p in gasrules.check_rulebook(path) if not p.is_warning]


def test_blank_expression_is_a_syntax_error(mini_text: str, tmp_path: Path) -> None:
    assert _check_text(mini_text, tmp_path, "   ") == ["RB-E020"]


def test_several_statements_are_refused(mini_text: str, tmp_path: Path) -> None:
    assert _check_text(mini_text, tmp_path, "ph < ph_low; __import__('os')") != []


def test_huge_integer_literal_is_refused(mini_text: str, tmp_path: Path) -> None:
    assert _check_text(mini_text, tmp_path, "1" * 400 + " > ph") == ["RB-E024"]


def test_power_tower_is_refused(mini_text: str, tmp_path: Path) -> None:
    assert _check_text(mini_text, tmp_path, "8 ** 8 ** 8 > ph") == ["RB-E024"]


@pytest.mark.parametrize("expr", ["na * 'x'", "-'x'", "albumin_correction * 2"])
def test_string_arithmetic_is_refused_at_load(expr: str, mini_text: str, tmp_path: Path) -> None:
    path = tmp_path / "rb.yaml"
    path.write_text(mini_text.replace(AG_EXPR, f"    expr: {json.dumps(expr)}\n"), encoding="utf-8")
    assert [p.code for p in gasrules.check_rulebook(path) if not p.is_warning] != []


def test_overflow_at_run_time_is_a_calculation_error(mini_text: str, tmp_path: Path) -> None:
    # A value that overflows only for some inputs (exp(1400)) cannot be refused at load: it must be
    # a calculation error of that one value, never a crash or a hang.
    path = tmp_path / "rb.yaml"
    path.write_text(mini_text.replace(AG_EXPR, "    expr: exp(na * 10)\n"), encoding="utf-8")
    rb = gasrules.load_rulebook(path, cache=False)
    result = gasrules.interpret(rb, {"ph": 7.30, "pco2": 30, "hco3": 15, "na": 140, "cl": 100})
    assert result["status"] in ("interpreted", "partial")
    assert "anion_gap" not in result["values"]
    assert any("result too large" in n["why"] for n in result["not_assessed"])


# ----------------------------------------------------------------------------- generated code


def test_generated_code_has_no_builtins(mini_rb: object) -> None:
    fn = mini_rb._function  # type: ignore[attr-defined]
    assert fn.__globals__["__builtins__"] == {}
    g = runtime_globals()
    assert g["__builtins__"] == {}
    for name in ("open", "__import__", "eval", "exec", "getattr", "type", "print"):
        with pytest.raises(NameError):
            eval(name, g)


def test_generated_code_uses_only_known_globals(mini_rb: object, shipped_rb: object) -> None:
    # Every name the generated function reads is a local it assigns, an argument, or one of the
    # runtime globals; every attribute it touches is a method of its own result containers.
    for rb in (mini_rb, shipped_rb):
        tree = ast.parse(rb.source)  # type: ignore[attr-defined]
        fn = tree.body[0]
        assert isinstance(fn, ast.FunctionDef) and len(tree.body) == 1
        assigned = {n.id for n in ast.walk(fn) if isinstance(n, ast.Name) and isinstance(n.ctx, ast.Store)}
        assigned |= {a.arg for a in fn.args.args}
        assigned |= {n.name for n in ast.walk(fn) if isinstance(n, ast.ExceptHandler) and n.name}
        comprehension_vars = {
            t.id
            for c in ast.walk(fn)
            if isinstance(c, ast.comprehension)
            for t in ast.walk(c.target)
            if isinstance(t, ast.Name)
        }
        available = set(rb._function.__globals__)  # type: ignore[attr-defined]
        read = {n.id for n in ast.walk(fn) if isinstance(n, ast.Name) and isinstance(n.ctx, ast.Load)}
        assert read - assigned - comprehension_vars - available == set()
        attributes = {n.attr for n in ast.walk(fn) if isinstance(n, ast.Attribute)}
        assert attributes <= {"append", "update", "get"}
        assert not any(
            isinstance(n, (ast.Import, ast.ImportFrom, ast.Lambda, ast.Global, ast.Nonlocal))
            for n in ast.walk(fn)
        )


TRICKY = "Quote ' double \" triple ''' \"\"\" back\\\\slash {ph} %s \\n newline; __import__('os')"


def test_rulebook_text_cannot_inject_code(mini_text: str, tmp_path: Path) -> None:
    # Free text that ends up inside the generated source (titles, suspension reasons) is quoted.
    text = mini_text.replace("    title: Acidaemia\n", f"    title: {json.dumps(TRICKY)}\n")
    base = tmp_path / "rb.yaml"
    base.write_text(text, encoding="utf-8")
    overlay = tmp_path / "site.yaml"
    overlay.write_text(
        "format: gasrules/1\nextends: rb.yaml\nmetadata: {id: tricky, version: 1.0.0, "
        "title: Tricky, effective_date: 2026-12-01, status: draft}\n"
        f"suspend:\n  - rule: ph_state.alkalaemia\n    reason: {json.dumps(TRICKY)}\n",
        encoding="utf-8",
    )
    rb = gasrules.load_rulebook(overlay, cache=False)
    result = gasrules.interpret(rb, {"ph": 7.30, "pco2": 30, "hco3": 15, "na": 140, "cl": 100})
    events = {e["rule"]: e for e in result["trace"]}
    assert events["ph_state.acidaemia"]["title"] == json.loads(json.dumps(TRICKY))
    assert events["ph_state.alkalaemia"] == {
        "rule": "ph_state.alkalaemia",
        "step": "ph_state",
        "title": "Alkalaemia",
        "outcome": "suspended",
        "reason": json.loads(json.dumps(TRICKY)),
    }


def test_expression_text_never_reaches_the_generated_source(mini_rb: object) -> None:
    # Generated code is built from checked syntax trees, not from the expression text: the
    # source holds no expression text verbatim except through repr() of names and numbers.
    source = mini_rb.source  # type: ignore[attr-defined]
    assert "ph < ph_low" not in source
    assert re.search(r"\(r_ph < p_ph_low\)", source)
