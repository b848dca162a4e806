"""gasrules: auditable blood gas interpretation driven by versioned YAML rulebooks.

The public surface (everything else is internal):

* :func:`load_rulebook` - load, check and compile a rulebook (the shipped default when no path);
* :func:`check_rulebook` - every problem in a rulebook, with file:line:column;
* :func:`interpret` - one case (a dict) to the result contract (a dict, schemas/result.schema.json);
  pure and unchecked: it applies no site settings (no strict mode, no decision records);
* :func:`interpret_many` - many cases, in order, optionally across worker processes;
* :func:`list_cutpoints` - every numeric threshold of every condition;
* :class:`Runtime` - the governed API: a rulebook admitted under the site settings (strict mode
  against approved releases, suspensions, decision records, shadow candidate). Every command and
  the service interpret through it::

      with gasrules.Runtime.open(settings_file="site.yaml") as rt:
          result = rt.interpret(case)

Decision support only: it supports, never replaces, clinical judgement; local laboratory
ranges and protocols prevail.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Iterable, Iterator

__version__ = "0.1.0"

if TYPE_CHECKING:  # pragma: no cover
    from pathlib import Path

    from .errors import Problem
    from .model import CompiledRulebook

__all__ = ["__version__", "load_rulebook", "check_rulebook", "interpret", "interpret_many", "list_cutpoints",
           "RulebookError", "Runtime", "RuntimeRefusal"]


def load_rulebook(path: "str | Path | None" = None, *, cache: bool = True, limits: Any = None) -> "CompiledRulebook":
    """Load, validate and compile a rulebook once. Raises RulebookError listing every problem.
    ``limits``: a :class:`gasrules.loader.Limits` (default: from GASRULES_* variables)."""
    from .cache import load
    from .resources import default_rulebook_path

    return load(path if path is not None else default_rulebook_path(), use_cache=cache, limits=limits)


def check_rulebook(path: "str | Path") -> "list[Problem]":
    from .cache import check_path

    return check_path(path)


def interpret(rulebook: "CompiledRulebook", case: Any, trace: bool = True) -> dict[str, Any]:
    from .evaluator import interpret as _interpret

    return _interpret(rulebook, case, trace)


_WORKER_RB: Any = None


def _init_worker(rb: "CompiledRulebook") -> None:
    global _WORKER_RB
    _WORKER_RB = rb


def _work(args: tuple[Any, bool]) -> dict[str, Any]:
    return interpret(_WORKER_RB, args[0], args[1])


def interpret_many(rulebook: "CompiledRulebook", cases: Iterable[Any], workers: int = 1,
                   trace: bool = True, chunksize: int = 256) -> Iterator[dict[str, Any]]:
    """Results in input order; one result per case, bad cases rejected inline."""
    if workers <= 1:
        import gc

        from .evaluator import interpret as _interpret

        # Results hold no reference cycles: a caller keeping many of them would only make the
        # cyclic collector rescan a growing heap. Collect less often while the loop runs.
        before = gc.get_threshold()
        gc.set_threshold(max(before[0], 50_000), before[1], before[2])
        try:
            for case in cases:
                yield _interpret(rulebook, case, trace)
        finally:
            gc.set_threshold(*before)
        return
    import multiprocessing as mp

    with mp.get_context("spawn").Pool(workers, initializer=_init_worker, initargs=(rulebook,)) as pool:
        yield from pool.imap(_work, ((c, trace) for c in cases), chunksize=chunksize)


def list_cutpoints(rulebook: "CompiledRulebook") -> list[dict[str, Any]]:
    from .compiler import list_cutpoints as _list

    return _list(rulebook)


def __getattr__(name: str) -> Any:
    if name == "RulebookError":
        from .errors import RulebookError

        return RulebookError
    if name in ("Runtime", "RuntimeRefusal"):
        from . import runtime

        return getattr(runtime, name)
    raise AttributeError(name)
