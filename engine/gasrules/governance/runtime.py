"""The runtime: one active rulebook under the site's settings (strict mode, suspensions,
decision records, shadow candidate). Commands that interpret (interpret, batch, serve) build one
:class:`Runtime` and call :meth:`Runtime.interpret` / :meth:`Runtime.interpret_many`.

    with Runtime.from_settings(load_settings(settings_file), rulebook_path) as rt:
        result = rt.interpret(case)

Opening a runtime (not each case) decides whether the rulebook may be used:

* strict mode: the active rulebook's sha256 must be the one in an intact approved release
  manifest, else :class:`RuntimeRefusal` ``strict.not_approved`` (exit code 6) saying why: no
  release directory, no manifest at all, or the same id and version released with other content
  (edited after approval);
* a suspended rulebook (the suspension register in the release directory) is refused whether
  strict or not (``rulebook.suspended``, exit 6): a kill switch must hold everywhere;
* suspended rules: the archived variant of the rulebook with those rules suspended is used
  instead (its sha256 is the one decision records name).

A shadow candidate runs beside the active rulebook (strict mode does not apply to it); only the
active result is returned; disagreements go to the shadow log (:mod:`gasrules.governance.shadow`).
The result dicts are the engine's, unchanged.
"""

from __future__ import annotations

import itertools
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from gasrules.core import exitcodes
from gasrules.core.errors import EngineError
from gasrules.governance.settings import Settings

__all__ = ["Admission", "Runtime", "RuntimeRefusal", "admit"]


class RuntimeRefusal(EngineError):
    """The runtime refuses this rulebook. ``code``: strict.not_approved, strict.no_release_dir,
    rulebook.suspended, registry.damaged; ``exit_code`` is 6 for every one."""

    exit_code = exitcodes.REFUSED

    def __init__(self, code: str, reason: str):
        self.code, self.reason = code, reason
        super().__init__(f"refused ({code}): {reason}")


@dataclass(frozen=True)
class Admission:
    """Why a rulebook may be used: its approval (strict mode) and the suspensions applied."""

    rulebook: Any  # the compiled rulebook to evaluate (maybe a suspension variant)
    approved_sha256: str  # sha256 of the rulebook as given
    manifest: Path | None = None  # the approving manifest (strict mode or found anyway)
    suspended_rules: tuple[tuple[str, str], ...] = ()


def _describe(rb: Any) -> str:
    return f"rulebook {rb.id} {rb.version} (sha256 {rb.sha256[:16]}...)"


def admit(rb: Any, settings: Settings) -> Admission:
    """Decide whether ``rb`` may be used under ``settings``; raises RuntimeRefusal when not."""
    from gasrules.governance.registry import (
        RegistryError,
        approvals_for,
        load_archived,
        read_suspensions,
        suspension_state,
    )

    release_dir = settings.release_dir
    manifest = None
    if settings.strict:
        if release_dir is None:
            raise RuntimeRefusal(
                "strict.no_release_dir",
                f"strict mode is on but no release directory is set, so "
                f"{_describe(rb)} cannot be matched to an approved release (set "
                "GASRULES_RELEASE_DIR or releases.dir)",
            )
        found, entries = approvals_for(
            release_dir, rb.sha256, legacy_sha256=getattr(rb, "sha256_v1", ""), archive=settings.archive
        )
        if found is None:
            raise RuntimeRefusal("strict.not_approved", _why_not_approved(rb, entries, release_dir))
        manifest = found.path
    if release_dir is None:
        return Admission(rb, rb.sha256, manifest)
    try:
        events = read_suspensions(release_dir)
        state = suspension_state(events, rb.sha256)
        if not state.suspended and not state.rules and getattr(rb, "sha256_v1", ""):
            state = suspension_state(events, rb.sha256_v1)  # suspensions filed under hash scheme 1
    except RegistryError as exc:
        raise RuntimeRefusal(
            "registry.damaged", f"the suspension register cannot be trusted: {exc}"
        ) from None
    if state.suspended:
        who = state.rulebook_event.get("by", "?")
        when = state.rulebook_event.get("time", "?")
        raise RuntimeRefusal(
            "rulebook.suspended", f"{_describe(rb)} was suspended by {who} at {when}: {state.rulebook_reason}"
        )
    if not state.rules:
        return Admission(rb, rb.sha256, manifest)
    archive = settings.archive
    try:
        variant = load_archived(archive, state.variant_sha256) if archive else None
    except (LookupError, RegistryError) as exc:
        variant, missing = None, str(exc)
    else:
        missing = "no archive directory is set"
    if variant is None:
        raise RuntimeRefusal(
            "registry.damaged",
            f"rules {', '.join(sorted(state.rules))} of {_describe(rb)} are "
            f"suspended but the rulebook with them suspended is not available: {missing}",
        )
    return Admission(variant, rb.sha256, manifest, tuple(sorted(state.rules.items())))


def _why_not_approved(rb: Any, entries: list[Any], release_dir: Path) -> str:
    same = [e for e in entries if e.rulebook.get("id") == rb.id and e.rulebook.get("version") == rb.version]
    damaged = [e for e in entries if e.problem and e.rulebook.get("sha256") == rb.sha256]
    head = f"{_describe(rb)} matches no approved release in {release_dir}"
    if damaged:
        return f"{head}: its manifest {damaged[0].path.name} {damaged[0].problem}"
    legacy = [
        e
        for e in entries
        if not e.problem and getattr(rb, "sha256_v1", "") and e.rulebook.get("sha256") == rb.sha256_v1
    ]
    if legacy:
        return (
            f"{head}: {legacy[0].path.name} approved it under identity hash scheme 1, which did not cover "
            "texts, labels, steps, presentation or display units, and the rulebook archived at that release "
            "is missing or differs from this one in them (release it again)"
        )
    if same:
        other = same[-1].rulebook.get("sha256", "")
        return (
            f"{head}: version {rb.version} was approved with content sha256 {str(other)[:16]}...; "
            "the rulebook was edited after approval (release it again under a new version)"
        )
    if not entries:
        return f"{head}: no release has been approved there yet (run gasrules release)"
    known = ", ".join(
        sorted({f"{e.rulebook.get('id')} {e.rulebook.get('version')}" for e in entries if not e.problem})
    )
    return f"{head}: approved releases are {known or 'none intact'}"


class Runtime:
    """An admitted active rulebook, an optional decision log and an optional shadow candidate."""

    def __init__(self, rulebook: Any, settings: Settings | None = None, *, candidate: Any = None):
        from gasrules.governance.decision_log import DecisionLog

        self.settings = settings or Settings()
        self.admission = admit(rulebook, self.settings)
        self.rulebook = self.admission.rulebook
        self.candidate = candidate
        self._log = None
        self._shadow = None
        try:
            if self.settings.decision_log is not None:
                self._log = DecisionLog(self.settings.decision_log, self.settings.record_config())
            if candidate is not None:
                from gasrules.governance.shadow import ShadowRecorder

                self._shadow = ShadowRecorder(
                    self.settings.shadow_log,
                    self.settings.record_config() if self.settings.shadow_log else None,
                )
        except BaseException:
            self.close()
            raise

    @classmethod
    def open(
        cls,
        rulebook: str | Path | None = None,
        *,
        settings_file: str | Path | None = None,
        env: Any = None,
        **overrides: Any,
    ) -> Runtime:
        """The governed entry point of the Python API: settings from ``settings_file``, the
        GASRULES_* environment (``env``, default os.environ) and ``overrides`` (Settings field
        names, e.g. ``strict=True``), exactly as the command line reads them; then the rulebook
        (``rulebook``, else the settings', else the shipped one) is loaded and admitted."""
        from gasrules.governance.settings import load_settings

        return cls.from_settings(load_settings(settings_file, env=env, **overrides), rulebook)

    @classmethod
    def from_settings(cls, settings: Settings, rulebook: str | Path | None = None) -> Runtime:
        """Load the active rulebook (``rulebook``, else settings.rulebook, else the shipped one)
        and the shadow candidate named in the settings. RulebookError for a broken rulebook,
        RuntimeRefusal when it may not be used, SettingsError / RecordError for a bad log."""
        from gasrules.rulebook.build import load_rulebook

        limits = settings.limits()
        active = load_rulebook(rulebook if rulebook is not None else settings.rulebook, limits=limits)
        candidate = (
            load_rulebook(settings.shadow_rulebook, limits=limits) if settings.shadow_rulebook else None
        )
        return cls(active, settings, candidate=candidate)

    # ------------------------------------------------------------ evaluation

    def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
        from gasrules.evaluation.evaluator import interpret

        result = interpret(self.rulebook, case, trace=trace or self._log is not None)
        other = interpret(self.candidate, case, trace=False) if self._shadow is not None else None
        return self._after(case, result, other, trace)

    def prepare(self, case: Any, trace: bool = True) -> tuple[dict[str, Any], Any]:
        """(result, deliver): the result is evaluated now; ``deliver()`` writes its decision
        record (and shadow comparison) and must be called only once the result has been handed
        over, so that a request ending in an error leaves no record."""
        from gasrules.evaluation.evaluator import interpret

        result = interpret(self.rulebook, case, trace=trace or self._log is not None)
        other = interpret(self.candidate, case, trace=False) if self._shadow is not None else None
        shown = result if trace or not result.get("trace") else {**result, "trace": []}
        return shown, lambda: self._after(case, result, other, trace)

    def interpret_many(
        self, cases: Iterable[Any], workers: int = 1, trace: bool = True
    ) -> Iterator[dict[str, Any]]:
        """Results in input order, one per case (bad cases rejected inline)."""
        from gasrules.tables.pool import interpret_many

        want_trace = trace or self._log is not None
        if self._shadow is None:
            for case, result in _paired(
                cases, lambda cs: interpret_many(self.rulebook, cs, workers, want_trace)
            ):
                yield self._after(case, result, None, trace)
            return
        a, b, c = itertools.tee(cases, 3)
        active = interpret_many(self.rulebook, a, workers, want_trace)
        shadow = interpret_many(self.candidate, b, workers, False)
        for case, result, other in zip(c, active, shadow):
            yield self._after(case, result, other, trace)

    def observe(
        self, case: Any, result: dict[str, Any], candidate_result: dict[str, Any] | None = None
    ) -> None:
        """For callers that evaluate themselves (worker pools, batch): log ``result`` (evaluated
        with :attr:`rulebook`, traced) and compare it with the candidate's, if shadowing."""
        self._after(case, result, candidate_result, True)

    @property
    def records_decisions(self) -> bool:
        return self._log is not None

    @property
    def shadowing(self) -> bool:
        return self._shadow is not None

    def record(self, case: Any, result: dict[str, Any]) -> None:
        """Log a result built outside the engine (e.g. the rejected result of an unreadable row),
        so the decision log still holds one entry per row. No shadow comparison."""
        if self._log is not None:
            self._log.append(case, result, rulebook=self.rulebook)

    def _after(
        self, case: Any, result: dict[str, Any], other: dict[str, Any] | None, trace: bool
    ) -> dict[str, Any]:
        if self._log is not None:
            self._log.append(case, result, rulebook=self.rulebook)
        if self._shadow is not None and other is not None:
            self._shadow.observe(case, result, other)
        if not trace and result.get("trace"):
            result = {**result, "trace": []}  # the contract keeps the key; it is empty when not asked for
        return result

    # ------------------------------------------------------------ lifecycle

    @property
    def disagreements(self) -> int:
        return self._shadow.disagreements if self._shadow is not None else 0

    def close(self) -> None:
        if self._log is not None:
            self._log.close()
            self._log = None
        if self._shadow is not None:
            self._shadow.close()
            self._shadow = None

    def __enter__(self) -> Runtime:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _paired(cases: Iterable[Any], run: Any) -> Iterator[tuple[Any, dict[str, Any]]]:
    a, b = itertools.tee(cases)
    return zip(a, run(b))
