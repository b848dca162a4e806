"""Simulated cohorts: load the cohort file beside a suite, check it, generate its cases.

cohorts.yaml beside a rulebook (schemas/cohorts.schema.json) declares seeded cohorts built from
the rulebook's reference intervals (named by parameter, read at the cohort's sample type) and
from published compensation relations with their scatter, never from the rulebook's decision
rules. An overlay inherits the nearest cohort file of its chain; each file of the chain may
raise, never lower, the goals of the files it extends. Every number lives in the cohort file:
this module holds none but the goal defaults decided for issue 9 (used when no file sets one).

Generation is vectorised with NumPy; each cohort draws from its own stream (seed and cohort id),
so adding a cohort never changes another's cases. :mod:`gasrules.verification.cohort_table` runs and measures.
"""

from __future__ import annotations

import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from gasrules.core.errors import Location, Problem, ProblemsError
from gasrules.core.model import CompiledRulebook
from gasrules.rulebook.loader import load_document
from gasrules.rulebook.schema import validate_document

COHORT_FILE = "cohorts.yaml"
COHORTS_SCHEMA = "cohorts.schema.json"
MEASURES = ("no_disorder", "primary", "no_second", "all_named")
# Goals (percent) when no cohort file of the chain sets one: the project's decision (issue 9).
DEFAULT_GOALS: dict[str, dict[str, float]] = {
    "healthy": {"no_disorder": 99.0},
    "simple": {"primary": 95.0, "no_second": 95.0},
    "mix": {"all_named": 90.0},
}
COHORT_CODES: dict[str, str] = {
    "CO-E001": "cohort file cannot be read or is not valid YAML",
    "CO-E002": "cohort file does not match schemas/cohorts.schema.json",
    "CO-E003": "a cohort file lowers a goal set by the file it extends",
    "CO-E004": "cohort file names a parameter, input, relation, code or disorder the rulebook does not declare",
    "CO-E005": "duplicate cohort id",
    "CO-E006": "a range or interval is empty or outside the input's plausible range",
    "CO-E007": "cohort file cites a key its rulebook's bibliography does not declare",
}
_DATA_KEYS = ("seed", "size", "constants", "intervals", "relations")


class CohortError(ProblemsError):
    """The cohort files could not be used: carries every problem, sorted by file and line."""

    what = "cohort file"


@dataclass(frozen=True)
class Cohort:
    id: str
    kind: str
    label: str
    expect: tuple[str, ...]
    goal: dict[str, float]
    spec: dict[str, Any]
    location: Location


@dataclass
class CohortPlan:
    file: str  # the file that declares the cohorts
    goal_files: list[str]  # every file of the chain that was read
    seed: int
    size: int
    constants: dict[str, float]
    intervals: dict[str, dict[str, Any]]
    fixed: dict[str, Any]
    relations: dict[str, dict[str, Any]]
    cohorts: list[Cohort] = field(default_factory=list)
    locate: Any = None  # path -> Location in `file`
    refs: list[tuple[str, tuple[Any, ...]]] = field(default_factory=list)  # (bibliography key, path) cited


# ----------------------------------------------------------------------------- loading


def cohort_files(rulebook_path: str | Path, cases_dir: str | Path | None = None) -> list[Path]:
    """Cohort files of the chain, the rulebook's own first (beside `cases_dir` when one is given)."""
    from gasrules.verification.suite import rulebook_chain

    out = []
    for depth, rb_path in enumerate(rulebook_chain(rulebook_path)):
        folder = Path(cases_dir).parent if (depth == 0 and cases_dir is not None) else rb_path.parent
        if (folder / COHORT_FILE).is_file():
            out.append(folder / COHORT_FILE)
    return out


def _read(path: Path) -> tuple[Any, list[Problem]]:
    doc, problems = load_document(path, str(path))
    if doc is None or problems:
        return None, [Problem("CO-E001", p.message, p.location, p.expected) for p in problems]
    found = [
        Problem("CO-E002", p.message, p.location, p.expected) for p in validate_document(doc, COHORTS_SCHEMA)
    ]
    return (None, found) if found else (doc, [])


def _merge_goal(
    current: dict[str, float], new: dict[str, float], where: Location, what: str
) -> tuple[dict[str, float], list[Problem]]:
    problems = []
    for measure, value in new.items():
        old = current.get(measure)
        if old is not None and value < old:
            problems.append(
                Problem(
                    "CO-E003",
                    f"{what} goal {measure} {value:g} % lowers the inherited {old:g} %",
                    where,
                    f"at least {old:g}",
                )
            )
    return {**current, **new}, problems


def load_plan(rulebook_path: str | Path, cases_dir: str | Path | None = None) -> CohortPlan | None:
    """The cohorts and goals that apply to a rulebook; None when no file of the chain declares cohorts."""
    files = cohort_files(rulebook_path, cases_dir)
    docs, problems = [], []
    for f in reversed(files):  # base first, so each file is checked against its bases
        doc, probs = _read(f)
        problems += probs
        if doc is not None:
            docs.append(doc)
    if problems:
        raise CohortError(problems)
    defining = next((d for d in reversed(docs) if "cohorts" in d.data), None)
    if defining is None:
        return None
    missing = [k for k in _DATA_KEYS if k not in defining.data]
    if missing:
        raise CohortError(
            [
                Problem(
                    "CO-E002",
                    f"a file declaring cohorts needs {', '.join(missing)}",
                    defining.locate(()),
                    "seed, size, constants, intervals and relations",
                )
            ]
        )
    goals, per_cohort, problems = _goals(docs)
    d = defining.data
    cohorts = []
    for i, c in enumerate(d["cohorts"]):
        goal = dict(goals[c["kind"]])
        for j, doc in per_cohort.get(c["id"], []):
            goal, probs = _merge_goal(
                goal,
                doc.data["cohort_goals"][c["id"]],
                doc.locate(("cohort_goals", c["id"])),
                f"cohort {c['id']}",
            )
            problems += probs
        cohorts.append(
            Cohort(
                c["id"], c["kind"], c["label"], tuple(c["expect"]), goal, c, defining.locate(("cohorts", i))
            )
        )
    if problems:
        raise CohortError(problems)
    return CohortPlan(
        file=defining.file,
        goal_files=[doc.file for doc in docs],
        seed=int(d["seed"]),
        size=int(d["size"]),
        constants={k: float(v["value"]) for k, v in d["constants"].items()},
        intervals=d["intervals"],
        fixed=dict(d.get("fixed") or {}),
        relations=d["relations"],
        cohorts=cohorts,
        locate=defining.locate,
        refs=list(_refs(d, ())),
    )


def _refs(node: Any, path: tuple[Any, ...]) -> Iterator[tuple[str, tuple[Any, ...]]]:
    """Every bibliography key cited by a `source` or `range_source` in the file, with its path."""
    if isinstance(node, dict):
        for k, v in node.items():
            if k in ("source", "range_source", "fixed_source") and isinstance(v, dict):
                ref = v.get("ref")
                for key in [ref] if isinstance(ref, str) else list(ref or []):
                    yield str(key), path + (k, "ref")
            else:
                yield from _refs(v, path + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield from _refs(v, path + (i,))


def _goals(
    docs: list[Any],
) -> tuple[dict[str, dict[str, float]], dict[str, list[tuple[int, Any]]], list[Problem]]:
    goals = {k: dict(v) for k, v in DEFAULT_GOALS.items()}
    per_cohort: dict[str, list[tuple[int, Any]]] = {}
    problems: list[Problem] = []
    for j, doc in enumerate(docs):
        for kind, goal in (doc.data.get("goals") or {}).items():
            if j == 0:
                goals[kind] = {**goals[kind], **goal}  # the first file sets the chain's goals
                continue
            goals[kind], probs = _merge_goal(goals[kind], goal, doc.locate(("goals", kind)), kind)
            problems += probs
        for cid in doc.data.get("cohort_goals") or {}:
            per_cohort.setdefault(cid, []).append((j, doc))
    return goals, per_cohort, problems


# ----------------------------------------------------------------------------- checking


def param_value(rb: CompiledRulebook, name: str, fixed: dict[str, Any]) -> float:
    """A numeric parameter's value for the cohort's fixed coded inputs (e.g. sample_type arterial)."""
    p = rb.parameters[name]
    if p.by_input and p.by_input in fixed and fixed[p.by_input] in p.by_values:
        return float(p.by_values[fixed[p.by_input]])
    return float(p.value)


def _bound(rb: CompiledRulebook, plan: CohortPlan, value: Any) -> float:
    return param_value(rb, value, plan.fixed) if isinstance(value, str) else float(value)


def intervals(rb: CompiledRulebook, plan: CohortPlan) -> dict[str, tuple[float, float]]:
    """Every healthy interval as numbers, parameter names read from this rulebook."""
    return {k: (_bound(rb, plan, v["low"]), _bound(rb, plan, v["high"])) for k, v in plan.intervals.items()}


def check_plan(rb: CompiledRulebook, plan: CohortPlan) -> list[Problem]:
    """Names, codes and ranges of the plan against this rulebook, each problem with its location."""
    loc = plan.locate
    problems = []
    known = rb.bibliography.entries if rb.bibliography is not None else {}
    for key, path in plan.refs:
        if key not in known:
            problems.append(
                Problem(
                    "CO-E007",
                    f"unknown bibliography key '{key}'",
                    loc(path),
                    "a key of the rulebook's bibliography",
                )
            )
    for name, iv in plan.intervals.items():
        for end in ("low", "high"):
            v = iv[end]
            if isinstance(v, str) and (
                v not in rb.parameters or not isinstance(rb.parameters[v].value, (int, float))
            ):
                problems.append(
                    Problem(
                        "CO-E004",
                        f"interval {name}.{end} names '{v}', not a numeric parameter of {rb.id}",
                        loc(("intervals", name, end)),
                        "a numeric parameter name or a number",
                    )
                )
            elif not isinstance(v, str) and "source" not in iv:
                problems.append(
                    Problem(
                        "CO-E002",
                        f"interval {name} gives a literal {end} without a source",
                        loc(("intervals", name)),
                        "source: {ref, evidence, note}",
                    )
                )
    if not problems:
        problems += _check_ranges(rb, plan, intervals(rb, plan))
    for key, value in plan.fixed.items():
        problems += _check_input_value(rb, key, value, loc(("fixed", key)))
    seen: set[str] = set()
    labels = set((rb.presentation.get("disorder_labels") or {}).keys())
    for i, c in enumerate(plan.cohorts):
        if c.id in seen:
            problems.append(
                Problem(
                    "CO-E005", f"cohort id '{c.id}' is used twice", loc(("cohorts", i, "id")), "unique ids"
                )
            )
        seen.add(c.id)
        problems += _check_cohort(rb, plan, c, i, labels)
    return problems


def _check_input_value(rb: CompiledRulebook, key: str, value: Any, where: Location) -> list[Problem]:
    spec = rb.inputs.get(key)
    if spec is None:
        return [Problem("CO-E004", f"'{key}' is not an input of {rb.id}", where, "a declared input")]
    if spec.kind == "code" and value not in spec.codes:
        return [
            Problem("CO-E004", f"'{value}' is not a code of {key}", where, "one of " + ", ".join(spec.codes))
        ]
    if spec.kind == "number" and not _inside(spec, float(value)):
        return [Problem("CO-E006", f"{key} {value} is outside its plausible range", where, _plausible(spec))]
    return []


def _inside(spec: Any, x: float) -> bool:
    return (spec.plausible_min is None or x >= spec.plausible_min) and (
        spec.plausible_max is None or x <= spec.plausible_max
    )


def _plausible(spec: Any) -> str:
    return f"{spec.plausible_min:g} to {spec.plausible_max:g} {spec.unit}"


def _check_ranges(
    rb: CompiledRulebook, plan: CohortPlan, ivs: dict[str, tuple[float, float]]
) -> list[Problem]:
    out = []
    for name, (lo, hi) in ivs.items():
        where = plan.locate(("intervals", name))
        if lo > hi:
            out.append(
                Problem("CO-E006", f"interval {name} is empty ({lo:g} > {hi:g})", where, "low <= high")
            )
        spec = rb.inputs.get(name)
        if spec is not None and spec.kind == "number" and not (_inside(spec, lo) and _inside(spec, hi)):
            out.append(
                Problem(
                    "CO-E006",
                    f"interval {name} {lo:g}-{hi:g} leaves the plausible range",
                    where,
                    _plausible(spec),
                )
            )
    return out


def _check_cohort(
    rb: CompiledRulebook, plan: CohortPlan, c: Cohort, i: int, labels: set[str]
) -> list[Problem]:
    loc, s = plan.locate, c.spec
    out = [
        Problem(
            "CO-E004",
            f"cohort {c.id} expects '{d}', a disorder {rb.id} does not label",
            loc(("cohorts", i, "expect")),
            "one of " + ", ".join(sorted(labels)),
        )
        for d in c.expect
        if d not in labels
    ]
    if c.kind == "healthy":
        return out + (
            [
                Problem(
                    "CO-E002",
                    f"healthy cohort {c.id} expects disorders",
                    loc(("cohorts", i, "expect")),
                    "expect: []",
                )
            ]
            if c.expect
            else []
        )
    if (c.kind == "simple" and len(c.expect) != 1) or (c.kind == "mix" and len(c.expect) != 2):
        out.append(
            Problem(
                "CO-E002",
                f"cohort {c.id} ({c.kind}) expects {len(c.expect)} disorder(s)",
                loc(("cohorts", i, "expect")),
                "one for a simple cohort, two for a mix",
            )
        )
    if "driver" not in s or "relation" not in s:
        return out + [
            Problem(
                "CO-E002",
                f"cohort {c.id} needs a driver and a relation",
                loc(("cohorts", i)),
                "driver: {input, range} and relation: NAME",
            )
        ]
    rel = plan.relations.get(s["relation"])
    if rel is None:
        return out + [
            Problem(
                "CO-E004",
                f"cohort {c.id} names relation '{s['relation']}', which the file does not declare",
                loc(("cohorts", i, "relation")),
                "one of " + ", ".join(plan.relations),
            )
        ]
    if rel["driver"] != s["driver"]["input"]:
        out.append(
            Problem(
                "CO-E002",
                f"cohort {c.id} drives {s['driver']['input']} but relation {s['relation']} is "
                f"driven by {rel['driver']}",
                loc(("cohorts", i, "driver", "input")),
                rel["driver"],
            )
        )
    lo, hi = s["driver"]["range"]
    spec = rb.inputs.get(s["driver"]["input"])
    if lo > hi or (spec is not None and not (_inside(spec, lo) and _inside(spec, hi))):
        out.append(
            Problem(
                "CO-E006",
                f"cohort {c.id} driver range {lo:g}-{hi:g} is empty or implausible",
                loc(("cohorts", i, "driver", "range")),
                _plausible(spec) if spec else "low <= high",
            )
        )
    for key, value in (s.get("set") or {}).items():
        out += _check_input_value(rb, key, value, loc(("cohorts", i, "set", key)))
    return out


# ----------------------------------------------------------------------------- generation


def _rng(seed: int, cohort_id: str) -> Any:
    import numpy as np

    return np.random.Generator(
        np.random.PCG64(np.random.SeedSequence([seed, zlib.crc32(cohort_id.encode())]))
    )


def hh_ph(pco2: Any, hco3: Any, pk: float, s: float) -> Any:
    """pH by Henderson-Hasselbalch: pK' + log10(HCO3 / (S x PCO2))."""
    import numpy as np

    return pk + np.log10(hco3 / (s * pco2))


def expected(rel: dict[str, Any], driver: Any) -> Any:
    """A relation's expected dependent value: base + slope x (driver - reference)."""
    return rel["base"] + rel["slope"] * (driver - rel["reference"])


def _uniform(rng: Any, iv: tuple[float, float], n: int) -> Any:
    return rng.uniform(iv[0], iv[1], n)


def _rounded(x: Any, places: int) -> Any:
    import numpy as np

    return np.round(x, places)


def _electrolytes(
    rng: Any,
    n: int,
    ivs: dict[str, tuple[float, float]],
    hco3: Any,
    fall: Any | None,
    ratio: list[float] | None,
    prec: dict[str, int],
) -> dict[str, Any]:
    """Na, K, albumin and the gap inside their intervals; a high-gap cohort adds ratio x fall to the gap;
    Cl = Na - gap - HCO3 takes up the rest."""
    na = _rounded(_uniform(rng, ivs["na"], n), prec["na"])
    gap = _uniform(rng, ivs["anion_gap"], n)
    if ratio is not None and fall is not None:
        gap = gap + rng.uniform(ratio[0], ratio[1], n) * fall
    gap = _rounded(gap, prec["cl"])
    return {
        "na": na,
        "k": _rounded(_uniform(rng, ivs["k"], n), prec["k"]),
        "cl": _rounded(na - gap - hco3, prec["cl"]),
        "albumin": _rounded(_uniform(rng, ivs["albumin"], n), prec["albumin"]),
    }


def _healthy_gases(
    rng: Any, n: int, ivs: dict[str, tuple[float, float]], const: dict[str, float], prec: dict[str, int]
) -> tuple[Any, Any, Any]:
    """PCO2 and HCO3 uniform inside their intervals; pH by Henderson-Hasselbalch, kept inside its interval."""
    import numpy as np

    keep_p, keep_h, keep_ph = [], [], []
    count = 0
    while count < n:
        m = 2 * (n - count) + 16
        pco2 = _rounded(_uniform(rng, ivs["pco2"], m), prec["pco2"])
        hco3 = _rounded(_uniform(rng, ivs["hco3"], m), prec["hco3"])
        ph = _rounded(hh_ph(pco2, hco3, const["hh_pk"], const["hh_solubility"]), prec["ph"])
        ok = (ph >= ivs["ph"][0]) & (ph <= ivs["ph"][1])
        keep_p.append(pco2[ok]), keep_h.append(hco3[ok]), keep_ph.append(ph[ok])
        count += int(ok.sum())
    return tuple(np.concatenate(x)[:n] for x in (keep_p, keep_h, keep_ph))  # type: ignore[return-value]


def _disorder_gases(rng: Any, n: int, c: Cohort, plan: CohortPlan, prec: dict[str, int]) -> dict[str, Any]:
    """The driver uniform in its range; the dependent value from the relation, uniform inside +/- band,
    or beyond the band by margin + U(0, spread) on the stated side (mixes)."""
    s = c.spec
    rel = plan.relations[s["relation"]]
    driver = _uniform(rng, tuple(s["driver"]["range"]), n)
    centre = expected(rel, driver)
    off = s.get("offset")
    if off is None:
        dependent = centre + rng.uniform(-rel["band"], rel["band"], n)
    else:
        sign = -1.0 if off["side"] == "below" else 1.0
        dependent = centre + sign * (rel["band"] + off["margin"] + rng.uniform(0, off["spread"], n))
    cols = {rel["driver"]: driver, rel["dependent"]: dependent}
    cols = {k: _rounded(v, prec[k]) for k, v in cols.items()}
    const = plan.constants
    cols["ph"] = _rounded(
        hh_ph(cols["pco2"], cols["hco3"], const["hh_pk"], const["hh_solubility"]), prec["ph"]
    )
    return cols


def generate_columns(
    rb: CompiledRulebook, plan: CohortPlan, c: Cohort, n: int | None = None
) -> dict[str, Any]:
    """One cohort as columns (NumPy arrays, rounded to each input's reported precision)."""
    n = plan.size if n is None else n
    rng = _rng(plan.seed, c.id)
    ivs = intervals(rb, plan)
    prec = {k: spec.precision for k, spec in rb.inputs.items()}
    if c.kind == "healthy":
        pco2, hco3, ph = _healthy_gases(rng, n, ivs, plan.constants, prec)
        cols = {"ph": ph, "pco2": pco2, "hco3": hco3}
    else:
        cols = _disorder_gases(rng, n, c, plan, prec)
    ratio = c.spec.get("delta_ratio")
    fall = plan.constants["hco3_normal"] - cols["hco3"]
    cols.update(_electrolytes(rng, n, ivs, cols["hco3"], fall, ratio, prec))
    if c.spec.get("with_oxygen"):
        cols["po2"] = _rounded(_uniform(rng, ivs["po2"], n), prec["po2"])
    return cols


def to_cases(cols: dict[str, Any], fixed: dict[str, Any], cohort: Cohort) -> list[dict[str, Any]]:
    """Plain case dicts (floats, not NumPy scalars), ids '<cohort>-<index>'."""
    names = list(cols)
    extra = {**fixed, **(cohort.spec.get("set") or {})}
    rows = zip(*(cols[k].tolist() for k in names))
    return [{"case_id": f"{cohort.id}-{i}", **dict(zip(names, row)), **extra} for i, row in enumerate(rows)]


def generate(rb: CompiledRulebook, plan: CohortPlan, c: Cohort, n: int | None = None) -> list[dict[str, Any]]:
    return to_cases(generate_columns(rb, plan, c, n), plan.fixed, c)
