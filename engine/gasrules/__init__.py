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

from importlib import import_module
from typing import TYPE_CHECKING, Any

from gasrules.core.version import __version__

if TYPE_CHECKING:  # pragma: no cover
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.evaluator import interpret
    from gasrules.governance.runtime import Runtime, RuntimeRefusal
    from gasrules.rulebook.build import check_rulebook, load_rulebook
    from gasrules.rulebook.compiler import list_cutpoints
    from gasrules.tables.pool import interpret_many

__all__ = [
    "RulebookError",
    "Runtime",
    "RuntimeRefusal",
    "__version__",
    "check_rulebook",
    "interpret",
    "interpret_many",
    "list_cutpoints",
    "load_rulebook",
]

# public name -> the module that defines it, imported on first use (importing gasrules stays cheap)
_HOMES = {
    "load_rulebook": "gasrules.rulebook.build",
    "check_rulebook": "gasrules.rulebook.build",
    "interpret": "gasrules.evaluation.evaluator",
    "interpret_many": "gasrules.tables.pool",
    "list_cutpoints": "gasrules.rulebook.compiler",
    "RulebookError": "gasrules.core.errors",
    "Runtime": "gasrules.governance.runtime",
    "RuntimeRefusal": "gasrules.governance.runtime",
}


def __getattr__(name: str) -> Any:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'gasrules' has no attribute {name!r}")
    value = getattr(import_module(home), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
