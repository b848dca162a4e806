"""The release gate: approve a rulebook version only on a passing, fully covering suite.

:func:`release` runs the rulebook's validation suite (:mod:`gasrules.verification.suite`), requires every case
to pass and every active rule to be covered (fired in some case and not fired in another),
classes the change against the previous release (:mod:`gasrules.governance.diff`: the version must be
bumped as far as the change needs), refuses an approver who is also an author of the change, then
archives the resolved rulebook by its sha256 (:mod:`gasrules.governance.registry`) and writes a sealed
release manifest. Every reason for refusing is collected, so one run lists them all.

Manifest (``gasrules-release/1``; ``hash_scheme`` 2: the sha256 covers the whole resolved
rulebook except metadata.status and metadata.changelog; manifests without it are scheme 1)::

    rulebook  {id, version, sha256, title, files [{path, sha256}]}
    archive   {sha256, file}                     where the resolved rulebook is kept
    suite     {content_sha256, files, cases, passed, failed, skipped, rules, rules_covered,
               never_fired, never_not_fired, threshold_coverage, excused (stated unreachable, with reasons)}
    previous  {manifest, manifest_sha256, rulebook {id, version, sha256}} or null
    change    {class, bump, counts, changes [{kind, key, aspect, class}]}
    cohorts   {rulebook, file, seed, size, passed, generator_problems, rows [operating characteristics,
               goals, most frequent wrong disorder sets]} or null (no cohorts.yaml in the chain);
               every goal must be met (gasrules.verification.cohort_table)
    author [names] · approvers [{name, role}] · date · engine_version · manifest_sha256
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from gasrules.core.errors import EngineError
from gasrules.governance.registry import (
    MANIFEST_FORMAT,
    ManifestEntry,
    RegistryError,
    archive_rulebook,
    load_archived,
    manifest_hash,
    read_manifests,
    utc_now,
    write_manifest,
)

__all__ = [
    "Approver",
    "ReleaseOutcome",
    "ReleaseRefused",
    "SuiteSummary",
    "release",
    "render_outcome",
    "render_refusal",
    "run_validation",
]


class ReleaseRefused(EngineError):
    """The gate refused: ``reasons`` lists every reason (code, text)."""

    def __init__(self, reasons: list[tuple[str, str]], summary: SuiteSummary | None = None):
        self.reasons, self.summary = reasons, summary
        super().__init__("release refused: " + "; ".join(text for _code, text in reasons))


@dataclass(frozen=True)
class Approver:
    name: str
    role: str


@dataclass(frozen=True)
class SuiteSummary:
    content_sha256: str
    files: list[str]
    cases: int
    passed: int
    failed: int
    skipped: int
    failures: list[str]  # "case-id: what" for each failed expectation
    rules: int  # active rules
    rules_covered: int  # fired somewhere and not fired somewhere
    never_fired: list[str]
    never_not_fired: list[str]
    threshold_coverage: dict[str, Any] = field(default_factory=dict)
    excused: list[dict[str, Any]] = field(default_factory=list)  # coverage stated unreachable, with reasons
    rules_declared_unreachable: int = 0  # of rules_covered, rules complete only through a stated exception
    rule_coverage: str = ""  # "N covered + M declared unreachable of T"

    def gate_problems(self) -> list[tuple[str, str]]:
        out = []
        if self.cases == 0:
            out.append(("suite.empty", "the validation suite holds no cases"))
        if self.failed:
            shown = "; ".join(self.failures[:5]) + (" ..." if len(self.failures) > 5 else "")
            out.append(("suite.failed", f"{self.failed} of {self.cases} suite cases fail: {shown}"))
        if self.rules_covered < self.rules:
            parts = []
            if self.never_fired:
                parts.append("never fired: " + ", ".join(self.never_fired))
            if self.never_not_fired:
                parts.append("never seen not firing: " + ", ".join(self.never_not_fired))
            out.append(
                (
                    "suite.rule_coverage",
                    f"rule coverage {self.rules_covered}/{self.rules} is not full ({'; '.join(parts)})",
                )
            )
        return out


def _files_hash(paths: list[str], root: Path) -> tuple[str, list[str]]:
    """sha256 over (name relative to root, sha256 of bytes) of each file, in name order."""
    rows = []
    for p in paths:
        path = Path(p)
        try:
            name = str(path.resolve().relative_to(root))
        except ValueError:
            name = path.name
        rows.append((name, hashlib.sha256(path.read_bytes()).hexdigest()))
    rows.sort()
    h = hashlib.sha256("".join(f"{n}\0{s}\n" for n, s in rows).encode("utf-8")).hexdigest()
    return h, [n for n, _ in rows]


def run_validation(rulebook_path: Path, rb: Any) -> SuiteSummary:
    """Run the rulebook's suite (its own cases plus inherited base cases) and summarise it."""
    from gasrules.verification import suite as S

    loaded = S.load_suite(rulebook_path)
    results = S.run_suite(rb, loaded)
    cov = S.rule_coverage(rb, results, loaded.unreachable)  # stated exceptions, each with a reason
    threshold: dict[str, Any] = {}
    if hasattr(S, "threshold_coverage"):
        tc = S.threshold_coverage(rb, results, loaded.unreachable)
        threshold = {k: v for k, v in tc.items() if isinstance(v, (int, float, str))}
    root = _common_root([str(f) for f in loaded.files] + [str(rulebook_path)])
    content, names = _files_hash([str(f) for f in loaded.files], root)
    failures = [f"{r.case.id}: {f.what}" for r in results if r.outcome == "failed" for f in r.failures]
    count = {o: sum(1 for r in results if r.outcome == o) for o in ("passed", "failed", "skipped")}
    return SuiteSummary(
        content,
        names,
        len(results),
        count["passed"],
        count["failed"],
        count["skipped"],
        failures,
        int(cov["rules"]),
        int(cov["both"]),
        list(cov["never_fired"]),
        list(cov["never_not_fired"]),
        threshold,
        [dict(e) for e in cov.get("excused", [])],
        int(cov.get("declared_unreachable", 0)),
        str(cov.get("summary", "")),
    )


def run_cohort_gate(
    path: Path, rb: Any, run: Callable[[Path, Any], dict[str, Any] | None] | None = None
) -> tuple[dict[str, Any] | None, list[tuple[str, str]]]:
    """The simulated cohorts' table (None when the chain has no cohort file) and its gate reasons:
    every goal must be met and no generated case may be inconsistent or rejected."""
    from gasrules.verification import cohort_table as T
    from gasrules.verification.cohorts import CohortError

    try:
        table = (run or (lambda p, r: T.table_for(p, r, workers=T.default_workers())))(path, rb)
    except CohortError as exc:
        return None, [("cohorts.file", p.render()) for p in exc.problems]
    return table, T.gate_problems(table)


def cohort_summary(table: dict[str, Any] | None) -> dict[str, Any] | None:
    from gasrules.verification.cohort_table import summary

    return summary(table)


def _common_root(paths: list[str]) -> Path:
    resolved = [str(Path(p).resolve().parent) for p in paths]
    return Path(os.path.commonpath(resolved)) if resolved else Path.cwd()


def _same(a: str, b: str) -> bool:
    from gasrules.governance.people import same_person

    return same_person(a, b)


def _authors(rb: Any, given: list[str]) -> list[str]:
    """Given authors, else the rulebook's owners whose role names them authors."""
    if given:
        return [a.strip() for a in given if a.strip()]
    owners = rb.metadata.get("owners") or []
    return [
        str(o.get("name"))
        for o in owners
        if isinstance(o, dict) and "author" in str(o.get("role", "")).lower()
    ]


def _previous(
    release_dir: Path, rb: Any, given: Path | None
) -> tuple[ManifestEntry | None, list[tuple[str, str]]]:
    if given is not None:
        try:
            data = json.loads(Path(given).read_bytes())
        except (OSError, ValueError) as exc:
            return None, [("previous.unreadable", f"--previous {given}: {exc}")]
        if not isinstance(data, dict) or data.get("manifest_sha256") != manifest_hash(data):
            return None, [("previous.damaged", f"--previous {given} is not an intact release manifest")]
        return ManifestEntry(Path(given), data), []
    same = [e for e in read_manifests(release_dir) if not e.problem and e.rulebook.get("id") == rb.id]
    return (same[-1] if same else None), []


@dataclass(frozen=True)
class ReleaseOutcome:
    manifest_path: Path
    manifest: dict[str, Any]
    diff_markdown: str = ""


def release(
    rulebook_path: str | Path,
    *,
    release_dir: str | Path,
    approvers: list[Approver],
    authors: list[str] | None = None,
    previous: str | Path | None = None,
    archive: str | Path | None = None,
    validate: Callable[[Path, Any], SuiteSummary] = run_validation,
    now: Callable[[], str] = utc_now,
    cohorts: Callable[[Path, Any], dict[str, Any] | None] | None = None,
    roster: Any = None,
) -> ReleaseOutcome:
    """Gate, archive and record one release. Raises ReleaseRefused (every reason) or RulebookError."""
    from gasrules.core.version import __version__
    from gasrules.governance.diff import diff_paths, render_markdown
    from gasrules.rulebook.build import load_rulebook

    path, release_dir = Path(rulebook_path), Path(release_dir)
    archive_dir = Path(archive) if archive is not None else release_dir / "archive"
    rb = load_rulebook(path)
    reasons: list[tuple[str, str]] = []
    approvers = [Approver(a.name.strip(), a.role.strip()) for a in approvers]
    if not approvers:
        reasons.append(("approval.none", "at least one approver (name and role) is needed"))
    for a in approvers:
        if not a.name or not a.role:
            reasons.append(("approval.incomplete", f"approver {a.name or '?'} needs both a name and a role"))
    author_names = _authors(rb, list(authors or []))
    if not author_names:
        reasons.append(
            (
                "approval.no_author",
                "name the author of the change (--author), or list an owner "
                "with an author role in the rulebook metadata",
            )
        )
    # names compare as read: NFKC, no format characters, case folded, confusable skeleton (people.py)
    own = sorted({a.name for a in approvers if any(_same(a.name, x) for x in author_names)})
    for name in own:
        reasons.append(("approval.self", f"{name} is an author of this change and cannot approve it"))
    if any(_same(a.name, b.name) for i, a in enumerate(approvers) for b in approvers[i + 1 :]):
        reasons.append(("approval.duplicate", "the same person is listed twice as approver"))
    from gasrules.governance.people import match_all

    author_ids, problems = match_all(roster, author_names, "author")
    reasons += problems
    approver_ids, problems = match_all(roster, [a.name for a in approvers if a.name], "approver")
    reasons += problems
    if roster is not None and not problems:
        ids = [approver_ids[a.name] for a in approvers if a.name in approver_ids]
        if set(ids) & set(author_ids.values()):
            reasons.append(("approval.self", "an approver is, by roster id, an author of this change"))
        if len(set(ids)) < len(ids):
            reasons.append(("approval.duplicate", "the same person (roster id) is listed twice as approver"))
    summary = validate(path, rb)
    reasons += summary.gate_problems()
    cohort_table, cohort_reasons = run_cohort_gate(path, rb, cohorts)
    reasons += cohort_reasons
    prev, problems = _previous(release_dir, rb, Path(previous) if previous is not None else None)
    reasons += problems
    change: dict[str, Any] = {"class": "initial", "bump": "", "counts": {}, "changes": []}
    markdown = ""
    if prev is not None:
        prev_sha = str(prev.rulebook.get("sha256", ""))
        if rb.matches_sha256(prev_sha):
            reasons.append(("release.exists", f"this content is already released in {prev.path.name}"))
        try:
            old_rb = load_archived(archive_dir, prev_sha)
        except (LookupError, RegistryError) as exc:
            reasons.append(
                ("previous.not_archived", f"the previous release's rulebook cannot be read: {exc}")
            )
        else:
            d = diff_paths(Path(archive_dir) / old_rb.sha256 / "rulebook.yaml", path)
            markdown = render_markdown(d)
            if d.version_error:
                reasons.append(("version.bump", d.version_error))
            change = {
                "class": d.required,
                "bump": d.bump,
                "counts": {k: v for k, v in d.as_dict()["counts"].items() if v},
                "changes": [
                    {"kind": c.kind, "key": c.key, "aspect": c.aspect, "class": c.cls} for c in d.changes
                ],
            }
    if reasons:
        raise ReleaseRefused(reasons, summary)
    archived = archive_rulebook(archive_dir, path)
    if archived != rb.sha256:  # pragma: no cover - archive_rulebook checks this itself
        raise ReleaseRefused([("archive.mismatch", f"archived as {archived}, expected {rb.sha256}")], summary)
    root = _common_root(list(rb.files))
    files = [
        {"path": name, "sha256": sha}
        for name, sha in sorted(
            (_rel(f, root), hashlib.sha256(Path(f).read_bytes()).hexdigest()) for f in rb.files
        )
    ]
    manifest = {
        "format": MANIFEST_FORMAT,
        "rulebook": {**rb.identity, "title": str(rb.metadata.get("title", "")), "files": files},
        "archive": {"sha256": archived, "file": f"{archived}/rulebook.yaml"},
        "suite": {k: v for k, v in asdict(summary).items() if k != "failures"},
        "previous": None
        if prev is None
        else {
            "manifest": prev.path.name,
            "manifest_sha256": prev.manifest.get("manifest_sha256"),
            "rulebook": {k: prev.rulebook.get(k) for k in ("id", "version", "sha256")},
        },
        "change": change,
        "cohorts": cohort_summary(cohort_table),
        "author": author_names,
        "approvers": [
            {**asdict(a), **({"id": approver_ids[a.name]} if a.name in approver_ids else {})}
            for a in approvers
        ],
        **({"author_ids": [author_ids[n] for n in author_names]} if roster is not None else {}),
        "date": now(),
        "engine_version": __version__,
    }
    target = write_manifest(release_dir, manifest)
    return ReleaseOutcome(target, manifest, markdown)


def _cohort_line(table: dict[str, Any] | None) -> list[str]:
    if not table:
        return []
    met = sum(1 for r in table["rows"] if r["passed"])
    return [
        f"  cohorts:  {met}/{len(table['rows'])} simulated cohorts meet their goals ({table['size']} cases each, "
        f"seed {table['seed']})"
    ]


def _rel(file: str, root: Path) -> str:
    try:
        return str(Path(file).resolve().relative_to(root))
    except ValueError:
        return Path(file).name


def render_outcome(outcome: ReleaseOutcome) -> str:
    m = outcome.manifest
    rb, s, c = m["rulebook"], m["suite"], m["change"]
    prev = m["previous"]
    lines = [
        f"released {rb['id']} {rb['version']} (sha256 {rb['sha256'][:16]}...)",
        f"  manifest: {outcome.manifest_path}",
        f"  archive:  {m['archive']['file']}",
        f"  suite:    {s['passed']}/{s['cases']} passed, {s['skipped']} skipped; rules covered "
        f"{s['rules_covered']}/{s['rules']} ({s.get('rule_coverage', '')}); suite content "
        f"{s['content_sha256'][:16]}...",
        *_cohort_line(m.get("cohorts")),
        f"  change:   {c['class']}"
        + (
            f" against {prev['rulebook']['version']} ({c['bump']} bump)"
            if prev
            else " (first release of this rulebook)"
        ),
        f"  author:   {', '.join(m['author'])}",
        "  approved: " + "; ".join(f"{a['name']} ({a['role']})" for a in m["approvers"]),
        f"  date:     {m['date']}",
    ]
    return "\n".join(lines)


def render_refusal(exc: ReleaseRefused) -> str:
    lines = ["release refused:"] + [f"  {code}: {text}" for code, text in exc.reasons]
    return "\n".join(lines)
