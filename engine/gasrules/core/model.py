"""Frozen data types shared by the stages. No behaviour beyond small helpers."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from gasrules.core.errors import Location

if TYPE_CHECKING:  # the checked expression types are the rulebook layer's
    from gasrules.rulebook.expressions import CutPoint, Expr


@dataclass(frozen=True)
class InputSpec:
    name: str
    label: str
    kind: str  # number | code | flag
    unit: str = ""
    precision: int = 0
    plausible_min: float | None = None
    plausible_max: float | None = None
    alternatives: dict[str, tuple[float, float]] = field(default_factory=dict)
    loinc: tuple[str, ...] = ()
    codes: tuple[str, ...] = ()
    default: Any = None
    location: Location = field(default_factory=Location)
    fallback: str | None = None  # derived value used when the input is not given
    fallback_marks: str | None = None  # flag input the engine sets when it used the fallback
    fallback_location: Location = field(default_factory=Location)


@dataclass(frozen=True)
class ParamSpec:
    name: str
    value: Any
    unit: str
    bounds: tuple[float, float] | None
    choices: tuple[str, ...] | None
    by_input: str | None
    by_values: dict[str, float]
    rationale: str
    source: dict[str, str]
    label: str
    location: Location  # where the parameter was declared
    set_by: Location  # where its value was last set (base or overlay)
    by_set_by: dict[str, Location] = field(default_factory=dict)  # code -> where by.values[code] was set

    def set_by_for(self, selector: Any) -> Location:
        if self.by_input is not None and selector in self.by_values:
            return self.by_set_by.get(selector, self.set_by)
        return self.set_by

    def value_for(self, selector: Any) -> Any:
        if self.by_input is not None and selector in self.by_values:
            return self.by_values[selector]
        return self.value


@dataclass(frozen=True)
class DerivedSpec:
    name: str
    label: str
    expr: Expr
    when: Expr | None
    unit: str
    precision: int
    report: bool
    location: Location

    @property
    def needs(self) -> frozenset[str]:
        return self.expr.needs | (self.when.needs if self.when else frozenset())


def reads_closure(name: str, derived: dict[str, DerivedSpec]) -> set[str]:
    """Every input, parameter and derived name a derived value needs, directly or through others."""
    seen: set[str] = set()
    todo = [name]
    while todo:
        for n in derived[todo.pop()].needs:
            if n not in seen:
                seen.add(n)
                if n in derived:
                    todo.append(n)
    return seen


@dataclass(frozen=True)
class FindingSpec:
    code: str
    category: str
    severity: str
    text: str
    headline: str = ""
    caution: bool = False


@dataclass(frozen=True)
class RuleSpec:
    id: str
    status: str
    step: str
    title: str
    when: Expr | None
    needs: frozenset[str]
    stop: bool
    always: bool
    result_status: str | None
    disorders: tuple[str, ...]
    qualifiers: dict[str, str]
    findings: tuple[FindingSpec, ...]
    doc: dict[str, Any]
    location: Location
    suspended_reason: str = ""

    @property
    def asserts(self) -> frozenset[str]:
        return frozenset([f.code for f in self.findings] + list(self.disorders))


@dataclass(frozen=True)
class StepSpec:
    name: str
    label: str
    core: bool


@dataclass
class CompiledRulebook:
    """A loaded, checked and compiled rulebook. Evaluate with gasrules.interpret()."""

    metadata: dict[str, Any]
    inputs: dict[str, InputSpec]
    parameters: dict[str, ParamSpec]
    derived: dict[str, DerivedSpec]
    rules: list[RuleSpec]  # evaluation order (active and suspended)
    steps: dict[str, StepSpec]
    presentation: dict[str, Any]
    display_units: dict[str, tuple[str, int | None]]
    plan: list[tuple[str, str]]  # ('derived', name) | ('rule', id) in evaluation order
    value_names: tuple[str, ...]  # order of the value tuples the generated code returns
    source: str  # the generated Python source
    sha256: str
    files: tuple[str, ...]
    cutpoints: tuple[CutPoint, ...]
    warnings: tuple[Any, ...] = ()
    engine_version: str = ""
    bibliography: Any = None  # gasrules.rulebook.bibliography.Bibliography: the cited publications
    sha256_v1: str = ""  # identity under hash scheme 1 (releases made before scheme 2)
    _function: Callable[..., Any] | None = field(default=None, repr=False)
    _static: Any = field(default=None, repr=False)
    _code: bytes | None = field(default=None, repr=False)  # marshalled code of `source` (same Python only)

    @property
    def id(self) -> str:
        return str(self.metadata["id"])

    @property
    def version(self) -> str:
        return str(self.metadata["version"])

    @property
    def identity(self) -> dict[str, str]:
        return {"id": self.id, "version": self.version, "sha256": self.sha256}

    def matches_sha256(self, sha256: str) -> bool:
        """True when ``sha256`` is this rulebook's identity under the current or the old scheme."""
        return bool(sha256) and sha256 in (self.sha256, self.sha256_v1)

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        state["_function"] = None
        state["_static"] = None
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        # The generated function and the evaluator's tables are not pickled: the rulebook layer
        # relinks a cached copy when it loads it, and the evaluator relinks a copy unpickled in a
        # worker process on first use (gasrules.evaluation.evaluator.ready).
        self.__dict__.update(state)
