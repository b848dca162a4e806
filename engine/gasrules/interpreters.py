"""The engine behind the services (`serve`, `listen`): the plain engine, or the change-control
``Runtime`` (strict mode, suspensions, decision records, shadow) when site settings apply."""

from __future__ import annotations

import threading
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any, Protocol

if TYPE_CHECKING:
    from .service import ServiceConfig

__all__ = ["EngineInterpreter", "Interpreter", "RuntimeInterpreter", "make_interpreter"]


class Interpreter(Protocol):
    """What the service needs from the engine: the plain engine or the change-control Runtime."""

    rulebook: Any

    def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]: ...

    def record(self, case: Any, result: dict[str, Any]) -> None: ...

    def describe(self) -> dict[str, Any]: ...

    def close(self) -> None: ...


class EngineInterpreter:
    """The plain engine: no strict mode, no decision records, no shadow rulebook."""

    def __init__(self, rulebook: Any) -> None:
        self.rulebook = rulebook

    def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
        from .evaluator import interpret

        return interpret(self.rulebook, case, trace)

    def record(self, case: Any, result: dict[str, Any]) -> None:
        return None

    def describe(self) -> dict[str, Any]:
        return {"mode": "engine", "strict": False, "decision_records": False, "shadow": None}

    def close(self) -> None:
        return None


class RuntimeInterpreter:
    """The change-control :class:`~gasrules.runtime.Runtime`: strict mode (checked once, when
    it is opened), suspensions, decision records and the shadow candidate. Shadow comparison
    keeps counters, so calls are serialised while shadowing; decision logs lock themselves."""

    def __init__(self, runtime: Any) -> None:
        self.runtime = runtime
        self.rulebook = runtime.rulebook
        self._lock = threading.Lock() if runtime.shadowing else None

    def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
        if self._lock is None:
            return self.runtime.interpret(case, trace)
        with self._lock:
            return self.runtime.interpret(case, trace)

    def record(self, case: Any, result: dict[str, Any]) -> None:
        self.runtime.record(case, result)

    def describe(self) -> dict[str, Any]:
        rt, settings = self.runtime, self.runtime.settings
        adm = rt.admission
        cand = rt.candidate
        return {"mode": "runtime", "strict": settings.strict,
                "decision_records": rt.records_decisions,
                "shadow": dict(cand.identity) if cand is not None else None,
                "approved_sha256": adm.approved_sha256,
                "release_manifest": adm.manifest.name if adm.manifest else None,
                "suspended_rules": [rule for rule, _ in adm.suspended_rules],
                "settings_from": list(settings.sources)}

    def close(self) -> None:
        self.runtime.close()


def _settings_apply(config: "ServiceConfig", environ: Mapping[str, str]) -> bool:
    return config.settings is not None or config.strict or any(
        k.startswith("GASRULES_") and k != "GASRULES_CACHE_DIR" for k in environ)


def make_interpreter(config: ServiceConfig, environ: Mapping[str, str] | None = None
                     ) -> Interpreter:
    """The Runtime when site settings apply (``config.settings``, ``config.strict`` or GASRULES_*
    variables), else the plain engine. Raises RulebookError, RuntimeRefusal, SettingsError."""
    import os

    environ = os.environ if environ is None else environ
    if not _settings_apply(config, environ):
        import gasrules

        return EngineInterpreter(gasrules.load_rulebook(config.rulebook))
    from .runtime import Runtime
    from .settings import load_settings

    settings = load_settings(config.settings, env=environ,
                             strict=True if config.strict else None)
    return RuntimeInterpreter(Runtime.from_settings(settings, config.rulebook))


