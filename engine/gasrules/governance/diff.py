"""Semantic diff of two resolved rulebooks, keyed by stable ids, with each change classed.

Both sides go through the overlay resolver first (``overlay.load_chain`` + ``resolve``), so an
overlay is compared by what it means once merged with its base, not by its own few lines.
Every difference becomes a :class:`Change` with a class:

* ``patch``: tuning inside the pre-approved envelope (a parameter moved inside its guard-rail
  bounds, another listed choice picked), a narrowed bound, wording of documentation;
* ``minor``: a larger but additive change (a new rule, parameter, input or derived value; a
  bound or an accepted range widened; a rule suspended or re-activated; a headline phrase);
* ``major``: a change of meaning (a condition, a formula, a finding's code, severity or text,
  a disorder asserted, a parameter moved outside its old bounds or without bounds, a removal).

The largest class is what the version bump must at least be; a smaller bump is an error
(``RulebookDiff.version_error``). The table ``_RULE_FIELDS`` and its siblings are the one place
that says how a field's change is classed. Renderers (text, JSON, Markdown) are pure functions.
"""

from __future__ import annotations

import ast
import json
import re
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

CLASSES = ("none", "patch", "minor", "major")
_RANK = {c: i for i, c in enumerate(CLASSES)}
CLASS_MEANING = {
    "none": "no content change",
    "patch": "tuning inside the guard rails or wording of documentation",
    "minor": "additive change: new rule or value, widened bound or range, suspension",
    "major": "change of meaning: condition, formula, finding or out-of-envelope value",
}


@dataclass(frozen=True)
class Change:
    kind: str  # metadata | parameter | rule | derived | input | step | presentation
    key: str  # the stable id: parameter name, rule id, ... (with [selector] for by-values)
    aspect: str  # what changed: value, bounds, when, findings.code, added, removed ...
    cls: str  # none | patch | minor | major
    why: str  # the reason for the class, in words
    old: Any = None
    new: Any = None
    unit: str = ""
    old_where: str = ""  # file:line:col that set the old value (parameters: the file that set it)
    new_where: str = ""


@dataclass
class Side:
    path: str
    id: str
    version: str
    status: str
    sha256: str
    files: list[str]
    approvals: list[dict[str, Any]] = field(default_factory=list)  # from release manifests, when given


@dataclass
class RulebookDiff:
    old: Side
    new: Side
    changes: list[Change] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def content_changes(self) -> list[Change]:
        return [c for c in self.changes if c.cls != "none"]

    @property
    def required(self) -> str:
        return max((c.cls for c in self.changes), key=_RANK.__getitem__, default="none")

    @property
    def bump(self) -> str:
        return version_bump(self.old.version, self.new.version)

    @property
    def version_error(self) -> str | None:
        """Why the version is wrong for the content change, or None when it is acceptable."""
        if self.old.id != self.new.id:
            return None  # different rulebooks (e.g. a base and a site overlay): no lineage
        need, bump = self.required, self.bump
        if bump == "backwards":
            return f"version goes backwards ({self.old.version} -> {self.new.version})"
        if need == "none" or _RANK[bump] >= _RANK[need]:
            return None
        what = "no version change" if bump == "none" else f"only a {bump} bump"
        return (
            f"the content change is {need} ({CLASS_MEANING[need]}) but the version shows {what} "
            f"({self.old.version} -> {self.new.version}); expected at least {_next_version(self.old.version, need)}"
        )

    def as_dict(self) -> dict[str, Any]:
        return {
            "old": asdict(self.old),
            "new": asdict(self.new),
            "required": self.required,
            "bump": self.bump,
            "version_error": self.version_error,
            "notes": list(self.notes),
            "counts": {c: sum(1 for x in self.changes if x.cls == c) for c in CLASSES},
            "changes": [asdict(c) for c in self.changes],
        }


# ----------------------------------------------------------------------------- versions

_SEMVER = re.compile(r"^(\d+)\.(\d+)\.(\d+)(?:-([0-9A-Za-z.-]+))?$")


def _parse_version(text: str) -> tuple[int, int, int, str]:
    m = _SEMVER.match(str(text))
    if not m:
        raise ValueError(f"version {text!r} is not MAJOR.MINOR.PATCH")
    return int(m.group(1)), int(m.group(2)), int(m.group(3)), m.group(4) or ""


def version_bump(old: str, new: str) -> str:
    """none | patch | minor | major | backwards (a pre-release suffix alone counts as none)."""
    a, b = _parse_version(old)[:3], _parse_version(new)[:3]
    if b < a:
        return "backwards"
    if b[0] > a[0]:
        return "major"
    if b[1] > a[1]:
        return "minor"
    return "patch" if b[2] > a[2] else "none"


def _next_version(old: str, cls: str) -> str:
    major, minor, patch, _ = _parse_version(old)
    if cls == "major":
        return f"{major + 1}.0.0"
    if cls == "minor":
        return f"{major}.{minor + 1}.0"
    return f"{major}.{minor}.{patch + 1}"


# ----------------------------------------------------------------------------- loading


def _side(path: str | Path, res: Any) -> Side:
    from gasrules.rulebook.identity import identity_hash

    md = res.metadata
    return Side(
        str(path),
        str(md["id"]),
        str(md["version"]),
        str(md.get("status", "")),
        identity_hash(res),
        [d.file for d in res.documents],
    )


def diff_paths(old: str | Path, new: str | Path, release_dir: str | Path | None = None) -> RulebookDiff:
    """The diff of two rulebook files; with ``release_dir``, each side's approvals from its manifests."""
    from gasrules.rulebook.overlay import resolve_path

    d = diff_resolved(resolve_path(old), resolve_path(new), str(old), str(new))
    if release_dir is not None:
        attach_approvals(d, Path(release_dir))
    return d


def attach_approvals(d: RulebookDiff, release_dir: Path) -> None:
    """Approvals (who, role, date, manifest) of each side, read from intact release manifests
    whose rulebook hash matches; an approval change is metadata (class none)."""
    from gasrules.governance.registry import read_manifests

    entries = [e for e in read_manifests(release_dir) if not e.problem]
    for side in (d.old, d.new):
        side.approvals = [
            {
                "manifest": e.path.name,
                "date": e.manifest.get("date", ""),
                "approvers": e.manifest.get("approvers") or [],
            }
            for e in entries
            if e.rulebook.get("sha256") == side.sha256
        ]
    if d.old.approvals != d.new.approvals:
        d.changes.append(
            Change(
                "metadata",
                "approvals",
                "value",
                "none",
                "release approvals (not clinical content)",
                _approval_text(d.old.approvals),
                _approval_text(d.new.approvals),
            )
        )


def _approval_text(approvals: list[dict[str, Any]]) -> str:
    if not approvals:
        return "not approved"
    return "; ".join(
        f"{a['date']}: " + ", ".join(f"{p.get('name')} ({p.get('role')})" for p in a["approvers"])
        for a in approvals
    )


def diff_resolved(old: Any, new: Any, old_path: str = "old", new_path: str = "new") -> RulebookDiff:
    from gasrules.rulebook.identity import canonical_content

    d = RulebookDiff(_side(old_path, old), _side(new_path, new))
    co, cn = canonical_content(old), canonical_content(new)
    d.changes += _metadata(old, new)
    d.changes += _parameters(old, new)
    d.changes += _keyed("input", co["inputs"], cn["inputs"], _INPUT_FIELDS, old.inputs, new.inputs)
    d.changes += _keyed("derived", co["derived"], cn["derived"], _DERIVED_FIELDS, old.derived, new.derived)
    d.changes += _rules(old, new, co["rules"], cn["rules"])
    d.changes += _keyed(
        "step",
        {k: b for k, (b, _) in old.steps.items()},
        {k: b for k, (b, _) in new.steps.items()},
        _STEP_FIELDS,
        old.steps,
        new.steps,
    )
    d.changes += _presentation(old, new)
    if d.old.sha256 == d.new.sha256 and d.old.version == d.new.version and not d.content_changes:
        d.notes.append("identical clinical content (same content hash)")
    elif d.old.sha256 != d.new.sha256 and not d.content_changes:
        d.notes.append("the content hash differs only through metadata (id or version)")
    if d.old.id != d.new.id:
        d.notes.append(f"different rulebook ids ({d.old.id} vs {d.new.id}): the version bump is not checked")
    return d


# ----------------------------------------------------------------------------- metadata


def _metadata(old: Any, new: Any) -> list[Change]:
    out = []
    for key in ("id", "version", "status", "title", "effective_date", "owners"):
        a, b = old.metadata.get(key), new.metadata.get(key)
        if a != b:
            out.append(
                Change(
                    "metadata",
                    key,
                    "value",
                    "none",
                    "metadata (not clinical content)",
                    _plain(a),
                    _plain(b),
                    "",
                    str(old.metadata_ref.loc(key)),
                    str(new.metadata_ref.loc(key)),
                )
            )
    a, b = old.metadata.get("intended_use"), new.metadata.get("intended_use")
    if a != b:  # who and where the rulebook may be used: shown to reviewers, hashed, never silent
        out.append(
            Change(
                "metadata",
                "intended_use",
                "value",
                "minor",
                "intended use (population, setting, exclusions) differs",
                _plain(a),
                _plain(b),
                "",
                str(old.metadata_ref.loc("intended_use")),
                str(new.metadata_ref.loc("intended_use")),
            )
        )
    a_versions = {str(e.get("version")) for e in old.metadata.get("changelog") or []}
    for entry in new.metadata.get("changelog") or []:
        if str(entry.get("version")) not in a_versions:
            out.append(
                Change(
                    "metadata",
                    "changelog",
                    "added",
                    "none",
                    "metadata (not clinical content)",
                    None,
                    _plain(entry),
                    "",
                    "",
                    str(new.metadata_ref.loc("changelog")),
                )
            )
    return out


def _plain(v: Any) -> Any:
    return json.loads(json.dumps(v, default=str))


# ----------------------------------------------------------------------------- parameters


def _parameters(old: Any, new: Any) -> list[Change]:
    out: list[Change] = []
    for name in _union(old.parameters, new.parameters):
        a = old.parameters.get(name, (None, None))[0]
        b = new.parameters.get(name, (None, None))[0]
        ow = str(old.param_set_by[name].loc()) if name in old.param_set_by else ""
        nw = str(new.param_set_by[name].loc()) if name in new.param_set_by else ""
        unit = str((b or a or {}).get("unit", ""))
        if a is None:
            out.append(
                Change(
                    "parameter", name, "added", "minor", "new parameter", None, b.get("value"), unit, "", nw
                )
            )
            continue
        if b is None:
            out.append(
                Change(
                    "parameter",
                    name,
                    "removed",
                    "major",
                    "parameter removed",
                    a.get("value"),
                    None,
                    unit,
                    ow,
                    "",
                )
            )
            continue
        out += _param_changes(name, a, b, unit, ow, nw)
    return out


def _param_changes(
    name: str, a: dict[str, Any], b: dict[str, Any], unit: str, ow: str, nw: str
) -> list[Change]:
    out: list[Change] = []

    def add(key: str, aspect: str, cls: str, why: str, old: Any, new: Any) -> None:
        shown = unit if aspect in ("value", "bounds") else ""
        out.append(Change("parameter", key, aspect, cls, why, _plain(old), _plain(new), shown, ow, nw))

    if a.get("unit") != b.get("unit"):
        add(
            name,
            "unit",
            "major",
            "the unit changed: every comparison with it changes meaning",
            a.get("unit"),
            b.get("unit"),
        )
    old_bounds, new_bounds = _bounds(a), _bounds(b)
    if old_bounds != new_bounds:
        cls, why = _bounds_class(old_bounds, new_bounds)
        add(name, "bounds", cls, why, a.get("bounds"), b.get("bounds"))
    if a.get("choices") != b.get("choices"):
        gone = set(a.get("choices") or []) - set(b.get("choices") or [])
        add(
            name,
            "choices",
            "major" if gone else "minor",
            "a choice was withdrawn" if gone else "choices widened",
            a.get("choices"),
            b.get("choices"),
        )
    if a.get("value") != b.get("value"):
        cls, why = _value_class(a, b.get("value"))
        add(name, "value", cls, why, a.get("value"), b.get("value"))
    ab, bb = a.get("by") or {}, b.get("by") or {}
    if ab.get("input") != bb.get("input"):
        add(
            name, "by.input", "major", "a different input selects the value", ab.get("input"), bb.get("input")
        )
    av, bv = ab.get("values") or {}, bb.get("values") or {}
    for sel in _union(av, bv):
        if av.get(sel) == bv.get(sel):
            continue
        key = f"{name}[{bb.get('input') or ab.get('input')}={sel}]"
        if sel not in bv:
            add(
                key,
                "value",
                "major",
                "a selected value was withdrawn (falls back to the general value)",
                av[sel],
                None,
            )
        elif sel not in av:
            cls, why = _value_class(a, bv[sel])
            add(
                key,
                "value",
                max(cls, "minor", key=_RANK.__getitem__),
                "new selected value; " + why,
                None,
                bv[sel],
            )
        else:
            cls, why = _value_class(a, bv[sel])
            add(key, "value", cls, why, av[sel], bv[sel])
    for doc_key in ("rationale", "source", "label"):
        if a.get(doc_key) != b.get(doc_key):
            add(name, doc_key, "patch", "documentation of the parameter", a.get(doc_key), b.get(doc_key))
    return out


def _bounds(p: dict[str, Any]) -> tuple[float, float] | None:
    b = p.get("bounds")
    return (float(b["min"]), float(b["max"])) if b else None


def _bounds_class(a: tuple[float, float] | None, b: tuple[float, float] | None) -> tuple[str, str]:
    if a is None:
        return "minor", "guard rails added"
    if b is None:
        return "minor", "guard rails removed (any value may be set)"
    if b[0] <= a[0] and b[1] >= a[1]:
        return "minor", "bound widened"
    if b[0] >= a[0] and b[1] <= a[1]:
        return "patch", "bound narrowed"
    return "minor", "bound moved"


def _value_class(old: dict[str, Any], value: Any) -> tuple[str, str]:
    """A value is judged against the OLD envelope: the one that was approved."""
    if "choices" in old:
        if value in (old.get("choices") or []):
            return "patch", "another of the listed choices"
        return "major", "a value outside the listed choices"
    bounds = _bounds(old)
    if bounds is None:
        return "major", "no guard rails declared: any move changes meaning"
    if isinstance(value, (int, float)) and not isinstance(value, bool) and bounds[0] <= value <= bounds[1]:
        return "patch", f"moved inside its guard rails [{bounds[0]:g}, {bounds[1]:g}]"
    return "major", f"moved outside its guard rails [{bounds[0]:g}, {bounds[1]:g}]"


# ----------------------------------------------------------------------------- rules, derived, inputs


def _expr_key(text: Any) -> str:
    if text is None:
        return ""
    try:
        return ast.dump(ast.parse(str(text).strip(), mode="eval"))
    except SyntaxError:
        return str(text)


def _expr(a: Any, b: Any, kind: str) -> tuple[str, str] | None:
    if a == b:
        return None
    if _expr_key(a) == _expr_key(b):
        return "patch", "same expression, layout only"
    return "major", f"the {kind} changed"


def _same(cls: str, why: str) -> Callable[[Any, Any], tuple[str, str] | None]:
    return lambda a, b: None if a == b else (cls, why)


def _widened(a: Any, b: Any) -> tuple[str, str] | None:
    """A set-like field (codes, alternatives): additions are minor, withdrawals major."""
    if a == b:
        return None
    ka = set(a or []) if not isinstance(a, dict) else set(a)
    kb = set(b or []) if not isinstance(b, dict) else set(b)
    if ka - kb:
        return "major", "an accepted entry was withdrawn"
    if isinstance(a, dict) and isinstance(b, dict) and any(a[k] != b[k] for k in ka):
        return "major", "an accepted entry changed"
    return "minor", "accepted entries widened"


def _range(a: Any, b: Any) -> tuple[str, str] | None:
    if a == b:
        return None
    if not a or not b:
        return "minor", "range added or removed"
    lo_a, hi_a = a.get("min", float("-inf")), a.get("max", float("inf"))
    lo_b, hi_b = b.get("min", float("-inf")), b.get("max", float("inf"))
    if lo_b <= lo_a and hi_b >= hi_a:
        return "minor", "plausible range widened: more cases accepted"
    return "major", "plausible range narrowed: some cases now rejected"


def _text(a: Any, b: Any) -> tuple[str, str] | None:
    if a == b:
        return None
    if " ".join(str(a or "").split()) == " ".join(str(b or "").split()):
        return "patch", "whitespace only"
    return "major", "the finding text a clinician reads changed"


Classifier = Callable[[Any, Any], "tuple[str, str] | None"]

_INPUT_FIELDS: dict[str, Classifier] = {
    "unit": _same("major", "canonical unit changed"),
    "precision": _same("major", "precision changed: comparisons round differently"),
    "kind": _same("major", "kind changed"),
    "plausible": _range,
    "alternatives": _widened,
    "codes": _widened,
    "default": _same("major", "default changed"),
    "loinc": _same("patch", "codes for interfaces"),
    "label": _same("patch", "label"),
}
_DERIVED_FIELDS: dict[str, Classifier] = {
    "expr": lambda a, b: _expr(a, b, "formula"),
    "when": lambda a, b: _expr(a, b, "condition for computing it"),
    "unit": _same("major", "unit changed"),
    "precision": _same("major", "precision changed: comparisons round differently"),
    "report": _same("minor", "shown or hidden in the report"),
    "label": _same("patch", "label"),
}
_STEP_FIELDS: dict[str, Classifier] = {
    "core": _same("minor", "step made core or optional"),
    "label": _same("patch", "label"),
}
_RULE_FIELDS: dict[str, Classifier] = {
    "when": lambda a, b: _expr(a, b, "condition"),
    "needs": lambda a, b: None if sorted(a or []) == sorted(b or []) else ("major", "inputs needed changed"),
    "disorders": lambda a, b: (
        None if sorted(a or []) == sorted(b or []) else ("major", "disorders asserted changed")
    ),
    "qualifiers": _same("major", "qualifiers asserted changed"),
    "stop": _same("major", "whether it halts later rules changed"),
    "always": _same("major", "whether it runs after a halt changed"),
    "result_status": _same("major", "result status it sets changed"),
    "step": _same("minor", "moved to another step"),
    "title": _same("patch", "title"),
    "doc": _same("patch", "rule documentation"),
}
_FINDING_FIELDS: dict[str, Classifier] = {
    "category": _same("major", "finding category changed"),
    "severity": _same("major", "finding severity changed"),
    "text": _text,
    "headline": _same("minor", "headline phrase changed"),
    "caution": _same("minor", "listed among the cautions or not"),
}


def _union(a: Any, b: Any) -> list[str]:
    return list(a) + [k for k in b if k not in a]


def _where(refs: dict[str, Any], name: str, *sub: Any) -> str:
    item = refs.get(name)
    return str(item[1].loc(*sub)) if item is not None else ""


def _keyed(
    kind: str,
    a: dict[str, Any],
    b: dict[str, Any],
    fields: dict[str, Classifier],
    arefs: dict[str, Any],
    brefs: dict[str, Any],
) -> list[Change]:
    out: list[Change] = []
    for name in _union(a, b):
        if name not in b:
            out.append(
                Change(kind, name, "removed", "major", f"{kind} removed", old_where=_where(arefs, name))
            )
            continue
        if name not in a:
            out.append(Change(kind, name, "added", "minor", f"new {kind}", new_where=_where(brefs, name)))
            continue
        out += _fields(
            kind,
            name,
            a[name],
            b[name],
            fields,
            lambda *s: _where(arefs, name, *s),
            lambda *s: _where(brefs, name, *s),
        )
    return out


def _fields(
    kind: str,
    key: str,
    a: dict[str, Any],
    b: dict[str, Any],
    fields: dict[str, Classifier],
    aw: Callable[..., str],
    bw: Callable[..., str],
    prefix: str = "",
) -> list[Change]:
    out = []
    for f in _union(a, b):
        if a.get(f) == b.get(f):
            continue
        classify = fields.get(f, _same("minor", f"'{f}' changed"))
        verdict = classify(a.get(f), b.get(f))
        if verdict is None:
            continue
        out.append(
            Change(
                kind,
                key,
                prefix + f,
                verdict[0],
                verdict[1],
                _plain(a.get(f)),
                _plain(b.get(f)),
                "",
                aw(f),
                bw(f),
            )
        )
    return out


def _rules(old: Any, new: Any, ca: list[dict[str, Any]], cb: list[dict[str, Any]]) -> list[Change]:
    a = {r["id"]: r for r in ca}
    b = {r["id"]: r for r in cb}
    arefs = {body["id"]: (body, ref) for body, ref in old.rules}
    brefs = {body["id"]: (body, ref) for body, ref in new.rules}
    areason = {s: why for s, why, _ in old.suspensions}
    breason = {s: why for s, why, _ in new.suspensions}
    bsusp = {s: str(ref.loc()) for s, _, ref in new.suspensions}
    out: list[Change] = []
    for rid in _union(a, b):
        aw = lambda *s, rid=rid: _where(arefs, rid, *s)  # noqa: E731
        bw = lambda *s, rid=rid: _where(brefs, rid, *s)  # noqa: E731
        if rid not in b:
            out.append(
                Change(
                    "rule", rid, "removed", "major", "rule removed: its conclusions disappear", old_where=aw()
                )
            )
            continue
        if rid not in a:
            out.append(
                Change("rule", rid, "added", "minor", "new rule", None, b[rid].get("when"), new_where=bw())
            )
            continue
        ra, rb_ = a[rid], b[rid]
        sa, sb = ra.get("status", "active"), rb_.get("status", "active")
        if sa != sb:
            cls, why = _status_class(sa, sb)
            out.append(
                Change(
                    "rule",
                    rid,
                    "status",
                    cls,
                    why,
                    _status_text(sa, areason.get(rid)),
                    _status_text(sb, breason.get(rid)),
                    "",
                    aw("status"),
                    bsusp.get(rid) or bw("status"),
                )
            )
        elif sa == "suspended" and areason.get(rid) != breason.get(rid):
            out.append(
                Change(
                    "rule",
                    rid,
                    "suspension reason",
                    "patch",
                    "reason reworded",
                    areason.get(rid),
                    breason.get(rid),
                    "",
                    aw(),
                    bw(),
                )
            )
        rest_a = {k: v for k, v in ra.items() if k not in ("status", "findings", "id")}
        rest_b = {k: v for k, v in rb_.items() if k not in ("status", "findings", "id")}
        out += _fields("rule", rid, rest_a, rest_b, _RULE_FIELDS, aw, bw)
        out += _findings(rid, ra.get("findings") or [], rb_.get("findings") or [], aw, bw)
    return out


def _status_class(a: str, b: str) -> tuple[str, str]:
    if b == "retired":
        return "major", "rule retired: its conclusions disappear"
    if b == "suspended":
        return "minor", "rule suspended (reversible, with a recorded reason)"
    return "minor", "rule brought back into use"


def _status_text(status: str, reason: str | None) -> str:
    return f"{status} ({reason})" if status == "suspended" and reason else status


def _findings(
    rid: str,
    fa: list[dict[str, Any]],
    fb: list[dict[str, Any]],
    aw: Callable[..., str],
    bw: Callable[..., str],
) -> list[Change]:
    a = {f["code"]: (i, f) for i, f in enumerate(fa)}
    b = {f["code"]: (i, f) for i, f in enumerate(fb)}
    out = []
    for code in _union(a, b):
        if code not in b:
            out.append(
                Change(
                    "rule",
                    rid,
                    f"finding {code} removed",
                    "major",
                    "finding code withdrawn",
                    code,
                    None,
                    "",
                    aw("findings", a[code][0]),
                )
            )
        elif code not in a:
            out.append(
                Change(
                    "rule",
                    rid,
                    f"finding {code} added",
                    "major",
                    "new finding code from an existing rule",
                    None,
                    code,
                    "",
                    "",
                    bw("findings", b[code][0]),
                )
            )
        else:
            (ia, x), (ib, y) = a[code], b[code]
            out += _fields(
                "rule",
                rid,
                x,
                y,
                _FINDING_FIELDS,
                lambda *s, i=ia: aw("findings", i, *s),
                lambda *s, i=ib: bw("findings", i, *s),
                prefix=f"finding {code}.",
            )
    return out


def _presentation(old: Any, new: Any) -> list[Change]:
    out = []
    pa, pb = old.presentation, new.presentation
    for key in _union(pa, pb):
        if pa.get(key) != pb.get(key):
            cls, why = (
                ("minor", "the cautions shown with every result")
                if key == "cautions"
                else ("patch", "wording")
            )
            out.append(
                Change("presentation", key, "value", cls, why, _plain(pa.get(key)), _plain(pb.get(key)))
            )
    if old.display_units != new.display_units:
        out.append(
            Change(
                "presentation",
                "display_units",
                "value",
                "patch",
                "display only; comparisons unchanged",
                _plain(old.display_units),
                _plain(new.display_units),
            )
        )
    return out


# ----------------------------------------------------------------------------- renderers


def _short(v: Any, width: int = 90) -> str:
    if v is None:
        return "-"
    text = v if isinstance(v, str) else json.dumps(v, ensure_ascii=False, default=str)
    text = " ".join(text.split())
    return text if len(text) <= width else text[: width - 3] + "..."


def _with_unit(v: Any, unit: str) -> str:
    if v is None:
        return "-"
    u = "" if unit in ("", "1") else f" {unit}"
    return f"{_short(v)}{u}"


def _verdict(d: RulebookDiff) -> str:
    err = d.version_error
    if err:
        return f"ERROR: {err}"
    if d.old.id != d.new.id:
        return f"version {d.old.version} -> {d.new.version}: not checked across different rulebook ids"
    if d.required == "none":
        return f"version {d.old.version} -> {d.new.version}: no content change to cover"
    return f"version {d.old.version} -> {d.new.version} ({d.bump} bump) covers the {d.required} change"


def render_text(d: RulebookDiff) -> str:
    lines = [
        f"old: {d.old.id} {d.old.version} [{d.old.status}] sha256 {d.old.sha256[:12]}  ({d.old.path})",
        f"new: {d.new.id} {d.new.version} [{d.new.status}] sha256 {d.new.sha256[:12]}  ({d.new.path})",
        f"change class: {d.required} ({CLASS_MEANING[d.required]})",
        _verdict(d),
    ]
    lines += [f"note: {n}" for n in d.notes]
    for kind in ("metadata", "parameter", "rule", "derived", "input", "step", "presentation"):
        rows = [c for c in d.changes if c.kind == kind]
        if not rows:
            continue
        lines += ["", f"{kind.capitalize()} changes ({len(rows)}):"]
        for c in rows:
            lines.append(
                f"  [{c.cls:<5}] {c.key} {c.aspect}: {_with_unit(c.old, c.unit)} -> {_with_unit(c.new, c.unit)}"
            )
            lines.append(f"          {c.why}" + _where_text(c))
    if not d.changes:
        lines += ["", "No differences."]
    return "\n".join(lines)


def _where_text(c: Change) -> str:
    if c.kind == "parameter" and (c.old_where or c.new_where):
        return f"; set by {c.old_where or '-'} -> {c.new_where or '-'}"
    where = c.new_where or c.old_where
    return f"; at {where}" if where else ""


def render_json(d: RulebookDiff) -> str:
    return json.dumps(d.as_dict(), indent=2, ensure_ascii=False, default=str)


def _md(v: Any) -> str:
    return _short(v).replace("|", "\\|")


def render_markdown(d: RulebookDiff) -> str:
    lines = [
        f"## Rulebook change: {d.old.id} {d.old.version} -> {d.new.id} {d.new.version}",
        "",
        f"* Change class: **{d.required}** ({CLASS_MEANING[d.required]})",
        f"* Version check: {_verdict(d)}",
        f"* Content hash: `{d.old.sha256[:16]}` -> `{d.new.sha256[:16]}`",
        f"* Status: {d.old.status} -> {d.new.status}",
    ]
    lines += [f"* Note: {n}" for n in d.notes]
    counts = ", ".join(f"{sum(1 for c in d.changes if c.cls == k)} {k}" for k in ("major", "minor", "patch"))
    lines += [f"* Changes: {counts}", ""]
    params = [c for c in d.changes if c.kind == "parameter"]
    if params:
        lines += [
            "### Parameters",
            "",
            "| Parameter | Change | Old | New | Unit | Class | Set by (old -> new) |",
            "|---|---|---|---|---|---|---|",
        ]
        for c in params:
            lines.append(
                f"| `{c.key}` | {c.aspect} | {_md(c.old)} | {_md(c.new)} | {c.unit} | {c.cls}: {c.why} | "
                f"{c.old_where or '-'} -> {c.new_where or '-'} |"
            )
        lines.append("")
    for kind, title in (
        ("rule", "Rules"),
        ("derived", "Derived quantities"),
        ("input", "Inputs"),
        ("step", "Steps"),
        ("presentation", "Presentation"),
        ("metadata", "Metadata"),
    ):
        rows = [c for c in d.changes if c.kind == kind]
        if not rows:
            continue
        lines += [f"### {title}", "", "| Id | Change | Old | New | Class |", "|---|---|---|---|---|"]
        for c in rows:
            lines.append(f"| `{c.key}` | {c.aspect} | {_md(c.old)} | {_md(c.new)} | {c.cls}: {c.why} |")
        lines.append("")
    lines.append(
        "_Decision support only: it supports, never replaces, clinical judgement; local laboratory "
        "ranges and protocols prevail._"
    )
    return "\n".join(lines)


RENDERERS: dict[str, Callable[[RulebookDiff], str]] = {
    "text": render_text,
    "json": render_json,
    "markdown": render_markdown,
}
