"""One error family for every stage, with stable codes, a message and a location.

Every problem a rulebook author can make is a :class:`Problem` carrying a code from
:data:`CODES`, the file, line and column, and the path inside the document. Problems are
collected (``gasrules check`` shows them all, sorted) and raised together as a
:class:`RulebookError`. Codes are documented here and never reused for another meaning.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field

# Stable codes. Never reuse a retired code for a new meaning.
CODES: dict[str, str] = {
    # Stage 1: loading
    "RB-E001": "YAML syntax error",
    "RB-E002": "duplicate key in a mapping",
    "RB-E003": "file cannot be read",
    "RB-E004": "extends chain is broken (missing file or cycle)",
    "RB-E005": "not a regular file (device, FIFO, socket)",
    "RB-E006": "file larger than the configured limit",
    "RB-E007": "file outside the configured rulebook roots",
    "RB-E008": "file is not UTF-8 text",
    "RB-E009": "YAML graph too large, too deep or self-referencing (alias bomb)",
    # Stage 2: schema
    "RB-E010": "document does not match schemas/rulebook.schema.json",
    "RB-E011": "number that cannot be used (NaN, infinity, an integer too large)",
    # Stage 3: expressions
    "RB-E020": "expression syntax error",
    "RB-E021": "construct not allowed in expressions",
    "RB-E022": "unknown name in expression",
    "RB-E023": "function not allowed in expressions",
    "RB-E024": "expression too long, too deep or with too large a power",
    "RB-E025": "has() names a finding or disorder code no rule asserts",
    "RB-E026": "string compared with something that is not a coded input or choice",
    # Stage 3: semantic checks
    "RB-E030": "duplicate id or name",
    "RB-E031": "cycle between derived quantities or rule dependencies",
    "RB-E032": "rule needs an undeclared input",
    "RB-E033": "unknown placeholder in a finding text",
    "RB-E034": "rule names an undeclared step",
    "RB-E035": "unknown disorder or qualifier",
    "RB-E036": "unit mismatch",
    "RB-E037": "finding code asserted with different category or severity",
    # Overlays and guard rails
    "RB-E040": "override outside the base guard-rail bounds",
    "RB-E041": "overlay overrides something the base does not declare",
    "RB-E042": "choice not among the declared choices",
    "RB-E043": "suspension names an unknown rule",
    "RB-E044": "overlay redefines a base id",
    "RB-E045": "parameter value outside its own bounds",
    "RB-E046": "constraint between parameters not met",
    "RB-E047": "overlay overrides a parameter, input or rule the base does not declare (did you mean...)",
    "RB-E048": "display unit unknown or of another quantity",
    # Citations (bibliography)
    "RB-E050": "bibliography file cannot be read or does not match schemas/bibliography.schema.json",
    "RB-E051": "unknown bibliography key",
    "RB-E052": "bibliography key declared twice",
    "RB-E070": "input fallback names an unknown derived value",
    "RB-E071": "input fallback depends on the input it replaces",
    "RB-E072": "input fallback in another unit than its input",
    "RB-E073": "input fallback marks something that is not a flag input",
    # Warnings
    "RB-W101": "parameter is never used",
    "RB-W102": "numeric literal in a rule condition (make it a parameter)",
    "RB-W103": "derived value is never used nor reported",
}

# Codes of errors in a case (the input record), reported inside the result.
INPUT_CODES: dict[str, str] = {
    "input.not_an_object": "the case is not a JSON object",
    "input.unknown_key": "the rulebook declares no input of this name",
    "input.bad_form": "value is neither a number nor {value, unit}",
    "input.not_a_number": "value is not a number",
    "input.not_finite": "NaN and infinities are not accepted",
    "input.unknown_unit": "unit is not a known UCUM code or alias",
    "input.unit_mismatch": "unit does not fit this analyte",
    "input.out_of_range": "value outside the plausible range",
    "input.unknown_code": "coded value not among the accepted codes",
    "input.bad_flag": "flag value is not true or false",
    "input.bad_case_id": "case_id must be a string",
    "input.bad_context": "context must be an object",
    "input.unreadable": "the row or line could not be parsed at all",
    "input.too_large": "an integer too large to read as a number",
    "input.not_strict_json": "context holds NaN, infinity, a huge integer, a non-string key or deep nesting",
    "input.engine_set": "a flag the engine sets when it calculates an input (e.g. hco3_calculated) was given by the case",
}

# Codes of problems found while evaluating one case (never abort the case).
EVAL_CODES: dict[str, str] = {
    "eval.calculation_error": "a value could not be calculated (division by zero, log of zero...)",
    "eval.conflict": "two rules asserted incompatible qualifiers for one disorder",
}


@dataclass(frozen=True, order=True)
class Location:
    """Where something is: file, 1-based line and column, and the path inside the document."""

    file: str = ""
    line: int = 0
    col: int = 0
    path: str = ""

    def __str__(self) -> str:
        where = self.file or "<rulebook>"
        if self.line:
            where += f":{self.line}:{self.col}"
        return where


@dataclass(frozen=True)
class Problem:
    code: str
    message: str
    location: Location = field(default_factory=Location)
    expected: str = ""

    @property
    def is_warning(self) -> bool:
        return self.code.startswith("RB-W")

    def render(self) -> str:
        text = f"{self.location}: {self.code} {self.message}"
        if self.location.path:
            text += f" (at {self.location.path})"
        if self.expected:
            text += f"; expected {self.expected}"
        return text

    def sort_key(self) -> tuple[str, int, int, str]:
        loc = self.location
        return (loc.file, loc.line, loc.col, self.code)


class EngineError(Exception):
    """Base of every error the engine raises."""


class RulebookError(EngineError):
    """A rulebook could not be loaded: carries every problem found, sorted."""

    def __init__(self, problems: Iterable[Problem]):
        self.problems = sorted(problems, key=Problem.sort_key)
        errors = [p for p in self.problems if not p.is_warning]
        first = errors[0].render() if errors else "no errors"
        super().__init__(f"{len(errors)} rulebook error(s); first: {first}")

    @property
    def errors(self) -> list[Problem]:
        return [p for p in self.problems if not p.is_warning]

    @property
    def warnings(self) -> list[Problem]:
        return [p for p in self.problems if p.is_warning]


class ProblemsError(EngineError):
    """Some data files could not be used: carries every problem, sorted by file and line.
    Subclasses name what the files are (``what``)."""

    what = "file"

    def __init__(self, problems: Iterable[Problem]):
        self.problems = sorted(problems, key=Problem.sort_key)
        super().__init__(f"{len(self.problems)} {self.what} problem(s); first: {self.problems[0].render()}")
