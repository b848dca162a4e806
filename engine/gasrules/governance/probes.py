"""Boundary probes: cases just below, at and just above each changed cut-point, under both versions.

1. :func:`changed_cutpoints` pairs the cut-points of two compiled rulebooks (``list_cutpoints``)
   and keeps those whose threshold value moved: a parameter's general value, a parameter's value
   for one selector (``ph_low`` for ``sample_type=venous``), or a literal in a condition.
2. For each, :func:`probe_cut` looks for a *witness*: a base case (the rulebooks' reference cases,
   then seeded synthetic cases) in which the compared quantity decides the owning rule, i.e. the
   rule's outcome differs one reporting step below and above the old cut-point.
3. It then sets the quantity to ``cut - step``, ``cut`` and ``cut + step`` for the old and the
   new cut (``step`` = one unit of the quantity's reported precision, the smallest difference
   a condition can see) and interprets each case under both rulebooks.

When the compared quantity is an input, the case sets it directly. When it is derived (the
anion gap, a ratio), the case is found by bisection on one input that feeds it (the input read
by the fewest rule conditions first), keeping the input at its own precision when that still
lands on the target. Every point is checked against the trace: the owning rule must have
compared exactly the target value, or the point is reported as not reached.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from gasrules.core.model import CompiledRulebook
from gasrules.rulebook.expressions import round_at


@dataclass(frozen=True)
class ChangedCut:
    owner: str  # rule id or derived name
    field: str  # when | expr
    quantity: str
    op: str
    threshold: str  # parameter name or literal text
    kind: str  # parameter | constant
    selector: tuple[str, str] | None  # (input, code) when the value is chosen by a coded input
    old: float
    new: float
    location: str

    @property
    def label(self) -> str:
        sel = f" [{self.selector[0]}={self.selector[1]}]" if self.selector else ""
        return f"{self.owner}: {self.quantity} {self.op} {self.threshold}{sel}"


def _param_values(rb: CompiledRulebook, name: str) -> dict[str | None, float]:
    p = rb.parameters[name]
    out: dict[str | None, float] = {None: float(p.value)}
    for sel, v in (p.by_values or {}).items():
        out[sel] = float(v)
    return out


def changed_cutpoints(old: CompiledRulebook, new: CompiledRulebook) -> list[ChangedCut]:
    """Cut-points present in both rulebooks whose threshold value differs (per selector)."""
    from gasrules.rulebook.compiler import list_cutpoints

    out: list[ChangedCut] = []
    a_rows, b_rows = list_cutpoints(old), list_cutpoints(new)
    b_params = {
        (r["owner"], r["field"], r["quantity"], r["op"], r["threshold"])
        for r in b_rows
        if r["threshold_kind"] == "parameter"
    }
    for r in a_rows:
        key = (r["owner"], r["field"], r["quantity"], r["op"], r["threshold"])
        if r["threshold_kind"] != "parameter" or key not in b_params:
            continue
        name = r["threshold"]
        va, vb = _param_values(old, name), _param_values(new, name)
        selector_input = new.parameters[name].by_input or old.parameters[name].by_input
        for sel in list(va) + [s for s in vb if s not in va]:
            x, y = va.get(sel, va[None]), vb.get(sel, vb[None])
            if x != y:
                out.append(
                    ChangedCut(
                        r["owner"],
                        r["field"],
                        r["quantity"],
                        r["op"],
                        name,
                        "parameter",
                        None if sel is None else (str(selector_input), sel),
                        x,
                        y,
                        r["location"],
                    )
                )

    # literals: pair the constant comparisons of one owner and field in order
    def constants(rows: list[dict[str, Any]]) -> dict[tuple[str, str], list[dict[str, Any]]]:
        groups: dict[tuple[str, str], list[dict[str, Any]]] = {}
        for r in rows:
            if r["threshold_kind"] == "constant":
                groups.setdefault((r["owner"], r["field"]), []).append(r)
        return groups

    ca, cb = constants(a_rows), constants(b_rows)
    for key, rows in ca.items():
        other = cb.get(key)
        if other is None or len(other) != len(rows):
            continue
        for x, y in zip(rows, other):
            if (x["quantity"], x["op"]) == (y["quantity"], y["op"]) and x["value"] != y["value"]:
                out.append(
                    ChangedCut(
                        x["owner"],
                        x["field"],
                        x["quantity"],
                        x["op"],
                        f"{x['value']:g}->{y['value']:g}",
                        "constant",
                        None,
                        float(x["value"]),
                        float(y["value"]),
                        y["location"],
                    )
                )
    return out


# ----------------------------------------------------------------------------- reading results


def step_of(rb: CompiledRulebook, quantity: str) -> float:
    """One unit of the quantity's reported precision: the smallest step a condition can see."""
    if quantity in rb.inputs:
        return 10.0 ** -rb.inputs[quantity].precision
    if quantity in rb.derived:
        return 10.0 ** -rb.derived[quantity].precision
    return 1.0


def quantity_value(result: dict[str, Any], quantity: str) -> float | None:
    """The full value of an input or derived quantity as the rules read it (from the trace)."""
    if quantity in result.get("inputs", {}):
        v = result["inputs"][quantity]
        return v if isinstance(v, (int, float)) and not isinstance(v, bool) else None
    for ev in result.get("trace") or []:
        reads = ev.get("reads") or {}
        if reads.get(quantity) is not None:
            return float(reads[quantity])
    v = result.get("values", {}).get(quantity)
    return None if v is None else float(v)


def owner_event(result: dict[str, Any], owner: str) -> dict[str, Any] | None:
    for ev in result.get("trace") or []:
        if ev["rule"] == owner:
            return ev
    return None


def compared_at(result: dict[str, Any], cut: ChangedCut) -> float | None:
    """What the owning rule compared for this cut-point (None: not compared or not a rule)."""
    ev = owner_event(result, cut.owner)
    if ev is None:
        return None
    for c in ev.get("comparisons") or []:
        if (
            c["quantity"] == cut.quantity
            and c["op"] == cut.op
            and (cut.kind == "constant" or c["threshold"] == cut.threshold)
        ):
            return c["compared"]
    return None


def conclusion(result: dict[str, Any], cut: ChangedCut) -> dict[str, Any]:
    ev = owner_event(result, cut.owner)
    return {
        "status": result["status"],
        "headline": result["headline"],
        "owner_outcome": ev["outcome"] if ev else None,
        "disorders": sorted(result["disorders"]),
        "findings": sorted({f["code"] for f in result["findings"]}),
    }


# ----------------------------------------------------------------------------- placing a value


def feeders(rb: CompiledRulebook, quantity: str) -> list[str]:
    """Numeric inputs that feed a derived quantity, least-read by rule conditions first."""
    seen: set[str] = set()
    found: list[str] = []
    stack = [quantity]
    while stack:
        name = stack.pop(0)
        if name in seen:
            continue
        seen.add(name)
        if name in rb.inputs:
            if rb.inputs[name].kind == "number" and name != quantity:
                found.append(name)
        elif name in rb.derived:
            d = rb.derived[name]
            stack += sorted(d.expr.needs) + sorted(d.expr.reads - d.expr.needs)
    readers = {n: sum(1 for r in rb.rules if r.when is not None and n in r.when.reads) for n in found}
    return sorted(found, key=lambda n: (readers[n], found.index(n)))


def place(
    rb: CompiledRulebook, base: dict[str, Any], quantity: str, target: float, via: str | None
) -> dict[str, Any] | None:
    """A copy of ``base`` in which ``quantity`` is compared as exactly ``target``, or None."""
    from gasrules.evaluation.evaluator import interpret

    scale = 1.0 / step_of(rb, quantity)
    if via is None:
        return {**base, quantity: target}
    spec = rb.inputs[via]
    lo = spec.plausible_min if spec.plausible_min is not None else -1e6
    hi = spec.plausible_max if spec.plausible_max is not None else 1e6

    def f(x: float) -> float | None:
        return quantity_value(interpret(rb, {**base, via: x}), quantity)

    x0 = base.get(via)
    if not isinstance(x0, (int, float)) or isinstance(x0, bool) or not lo <= x0 <= hi:
        return None
    g0 = f(x0)
    if g0 is None:
        return None
    if round_at(g0, scale) == target:
        return {**base, via: x0}
    bracket = _bracket(f, x0, g0, target, lo, hi, 10.0**-spec.precision)
    if bracket is None:
        return None
    a, b = bracket
    ga = f(a)
    for _ in range(60):
        mid = (a + b) / 2
        gm = f(mid)
        if gm is None or ga is None:
            return None
        if round_at(gm, scale) == target:
            unit = 10.0**-spec.precision  # prefer the input at its own precision
            rounded = round_at(mid, 1.0 / unit)
            for x in (rounded, round(rounded - unit, 9), round(rounded + unit, 9)):
                gx = f(x)
                if gx is not None and round_at(gx, scale) == target and lo <= x <= hi:
                    return {**base, via: x}
            return {**base, via: mid}
        if (gm - target) * (ga - target) > 0:
            a, ga = mid, gm
        else:
            b = mid
    return None


def _bracket(
    f: Any, x0: float, g0: float, target: float, lo: float, hi: float, step: float
) -> tuple[float, float] | None:
    """Walk outwards from x0, doubling the step, until g crosses the target on one side."""
    for direction in (1.0, -1.0):
        d = step
        prev = x0
        while True:
            x = min(hi, max(lo, x0 + direction * d))
            g = f(x)
            if g is not None and (g - target) * (g0 - target) <= 0:
                return (prev, x)
            if x in (lo, hi) or g is None:
                break
            prev = x
            d *= 2
    return None


# ----------------------------------------------------------------------------- probing


@dataclass
class ProbePoint:
    label: str  # "old cut - step", "new cut", ...
    target: float  # the value of the quantity as compared
    case: dict[str, Any]
    old: dict[str, Any]
    new: dict[str, Any]
    reached: bool  # the owning rule compared exactly the target under both versions

    @property
    def differs(self) -> bool:
        keys = ("owner_outcome", "disorders", "findings", "status")
        return any(self.old[k] != self.new[k] for k in keys)


@dataclass
class CutProbe:
    cut: ChangedCut
    unit: str
    step: float
    via: str | None = None  # the input bisected to place a derived quantity
    base_id: str = ""
    points: list[ProbePoint] = field(default_factory=list)
    note: str = ""

    def as_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["label"] = self.cut.label
        for p, pd in zip(self.points, d["points"]):
            pd["differs"] = p.differs
        return d


def _set_selector(case: dict[str, Any], cut: ChangedCut) -> dict[str, Any]:
    return {**case, cut.selector[0]: cut.selector[1]} if cut.selector else case


def _general_applies(rb: CompiledRulebook, case: dict[str, Any], cut: ChangedCut) -> bool:
    if cut.kind != "parameter" or cut.selector is not None:
        return True
    p = rb.parameters[cut.threshold]
    return p.by_input is None or case.get(p.by_input, rb.inputs[p.by_input].default) not in (
        p.by_values or {}
    )


def find_witness(
    rb: CompiledRulebook, cut: ChangedCut, bases: Iterable[dict[str, Any]], cut_value: float, limit: int = 60
) -> tuple[dict[str, Any], str | None] | None:
    """A base case and the input to move such that the quantity decides the owning rule.

    Bases whose quantity already lies nearest the cut are tried first: they need the smallest
    nudge, so the rest of the case (its consistency checks above all) stays as it was.
    """
    from gasrules.evaluation.evaluator import interpret

    step = step_of(rb, cut.quantity)
    routes: list[str | None] = [None] if cut.quantity in rb.inputs else list(feeders(rb, cut.quantity))
    ranked: list[tuple[float, int, dict[str, Any]]] = []
    for n, raw in enumerate(bases):
        base = _set_selector(raw, cut)
        if not _general_applies(rb, base, cut):
            continue
        first = interpret(rb, base)
        ev = owner_event(first, cut.owner)
        value = quantity_value(first, cut.quantity)
        if first["status"] == "rejected" or ev is None or ev["outcome"] not in _DECIDED or value is None:
            continue
        ranked.append((abs(value - cut_value), n, base))
    ranked.sort(key=lambda t: (t[0], t[1]))
    for _, _, base in ranked[:limit]:
        for via in routes:
            below = place(rb, base, cut.quantity, round(cut_value - step, 9), via)
            above = place(rb, base, cut.quantity, round(cut_value + step, 9), via)
            if below is None or above is None:
                continue
            eb, ea = (
                owner_event(interpret(rb, below), cut.owner),
                owner_event(interpret(rb, above), cut.owner),
            )
            if eb and ea and {eb["outcome"], ea["outcome"]} == _DECIDED:
                return base, via
    return None


_DECIDED = {"fired", "not_fired"}


def probe_cut(
    old: CompiledRulebook, new: CompiledRulebook, cut: ChangedCut, bases: Iterable[dict[str, Any]]
) -> CutProbe:
    from gasrules.evaluation.evaluator import interpret

    step = step_of(old, cut.quantity)
    unit = old.inputs[cut.quantity].unit if cut.quantity in old.inputs else old.derived[cut.quantity].unit
    probe = CutProbe(cut, unit, step)
    if cut.owner not in {r.id for r in old.rules}:
        probe.note = "the cut-point belongs to a derived value's formula: probed through the conclusions only"
    bases = list(bases)
    witness = find_witness(old, cut, bases, cut.old) or find_witness(new, cut, bases, cut.new)
    if witness is None:
        probe.note = "no base case found in which this comparison decides the rule" + (
            f" (tried inputs: {', '.join(feeders(old, cut.quantity))})" if cut.quantity in old.derived else ""
        )
        return probe
    base, probe.via = witness
    probe.base_id = str(base.get("case_id") or "")
    labels: dict[float, list[str]] = {}
    for which, value in (("old cut", cut.old), ("new cut", cut.new)):
        for label, target in (
            (f"{which} - step", value - step),
            (which, value),
            (f"{which} + step", value + step),
        ):
            labels.setdefault(round(target, 9), []).append(label)
    for target, names in sorted(labels.items()):
        label = " = ".join(names)
        case = place(old, base, cut.quantity, target, probe.via) or place(
            new, base, cut.quantity, target, probe.via
        )
        if case is None:
            probe.points.append(ProbePoint(label, target, {}, {}, {}, False))
            continue
        case = {**case, "case_id": f"probe:{cut.quantity}={target:g}"}
        ro, rn = interpret(old, case), interpret(new, case)
        reached = compared_at(ro, cut) == target and compared_at(rn, cut) == target
        probe.points.append(
            ProbePoint(label, target, case, conclusion(ro, cut), conclusion(rn, cut), reached)
        )
    return probe


def default_bases(
    case_dirs: Iterable[Path], n_generated: int = 300, seed: int = 11
) -> Iterator[dict[str, Any]]:
    """Reference cases beside the rulebooks first (curated for their rules), then synthetic ones."""
    import yaml

    for d in case_dirs:
        for path in sorted(Path(d).glob("*.yaml")):
            try:
                data = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
            except (OSError, yaml.YAMLError):
                continue
            for c in data.get("cases") or []:
                if isinstance(c, dict) and isinstance(c.get("input"), dict) and "want_error_code" not in c:
                    yield {"case_id": f"{path.stem}:{c.get('id', '')}", **c["input"]}
    from gasrules.verification.casegen import generate_cases

    for case in generate_cases(n_generated, seed):
        yield {k: v for k, v in case.items() if k != "context"}


def run_probes(
    old: CompiledRulebook, new: CompiledRulebook, bases: Iterable[dict[str, Any]], only: Iterable[str] = ()
) -> list[CutProbe]:
    """Probe every changed cut-point (or only those whose owner or threshold is in ``only``)."""
    wanted = set(only)
    base_list = list(bases)
    out = []
    for cut in changed_cutpoints(old, new):
        if wanted and cut.owner not in wanted and cut.threshold not in wanted:
            continue
        out.append(probe_cut(old, new, cut, base_list))
    return out


# ----------------------------------------------------------------------------- renderers


def _fmt(v: float) -> str:
    return f"{v:.6g}"


def _said(c: dict[str, Any]) -> str:
    if not c:
        return "(not placed)"
    dis = ", ".join(c["disorders"]) or "no disorder"
    return f"{c['owner_outcome'] or c['status']}: {dis}"


def _finding_delta(p: ProbePoint) -> str:
    if not p.old or not p.new:
        return ""
    gone = sorted(set(p.old["findings"]) - set(p.new["findings"]))
    came = sorted(set(p.new["findings"]) - set(p.old["findings"]))
    return " ".join([f"+{c}" for c in came] + [f"-{c}" for c in gone])


def _moved(p: ProbePoint, probe: CutProbe) -> str:
    """The input moved to place a derived quantity ("-" when the quantity is itself the input)."""
    name = probe.via
    return f"{name}={_fmt(p.case[name])}" if name and p.case and name in p.case else "-"


def _head(probe: CutProbe, old_v: str, new_v: str) -> str:
    c = probe.cut
    unit = "" if probe.unit in ("", "1") else f" {probe.unit}"
    via = f", moving {probe.via}" if probe.via else ""
    base = f", from base case {probe.base_id}" if probe.base_id else ""
    return f"{c.label}: {_fmt(c.old)} -> {_fmt(c.new)}{unit} (step {_fmt(probe.step)}{via}{base}; {old_v} -> {new_v})"


def render_text(probes: list[CutProbe], old_version: str, new_version: str) -> str:
    if not probes:
        return "No changed numeric thresholds: nothing to probe."
    lines = [
        f"Boundary probes: {len(probes)} changed cut-point(s); '*' marks a conclusion that differs, "
        "'?' a point the rule did not compare as placed.",
        "",
    ]
    for probe in probes:
        lines.append(_head(probe, old_version, new_version))
        if probe.note:
            lines.append(f"  note: {probe.note}")
        for p in probe.points:
            mark = "*" if p.differs else ("?" if not p.reached else " ")
            lines.append(
                f"  {mark} {p.label:<28} {probe.cut.quantity}={_fmt(p.target):<8} "
                f"{_moved(p, probe):<14} old {_said(p.old):<48} new {_said(p.new)}"
                + (f"  [{_finding_delta(p)}]" if _finding_delta(p) else "")
            )
        lines.append("")
    return "\n".join(lines).rstrip()


def render_markdown(probes: list[CutProbe], old_version: str, new_version: str) -> str:
    lines = ["## Boundary probes", ""]
    if not probes:
        return "\n".join(lines + ["No changed numeric thresholds."])
    for probe in probes:
        lines += [f"### `{probe.cut.label}`", "", _head(probe, old_version, new_version), ""]
        if probe.note:
            lines += [f"_{probe.note}_", ""]
        lines += [
            f"| Point | {probe.cut.quantity} | Case | Old {old_version} | New {new_version} | Findings | Differs |",
            "|---|---|---|---|---|---|---|",
        ]
        for p in probe.points:
            lines.append(
                f"| {p.label} | {_fmt(p.target)} | {_moved(p, probe)} | {_said(p.old)} | {_said(p.new)} | "
                f"{_finding_delta(p) or '-'} | {'**yes**' if p.differs else ('not reached' if not p.reached else 'no')} |"
            )
        lines.append("")
    lines.append(
        "_Invented probe cases for review; decision support only, it never replaces clinical judgement._"
    )
    return "\n".join(lines)


def render_json(probes: list[CutProbe], old_version: str, new_version: str) -> str:
    import json

    return json.dumps(
        {"old_version": old_version, "new_version": new_version, "probes": [p.as_dict() for p in probes]},
        indent=2,
        default=str,
    )


RENDERERS = {"text": render_text, "json": render_json, "markdown": render_markdown}
