"""The `gasrules` command: a thin dispatcher that imports only the command it runs.

Each command lives in its own module under gasrules/commands/ and exposes a typer app named
``app``. Importing only that module keeps the cold start of ``gasrules interpret`` small; the
table below is the one place that lists the commands (and feeds ``gasrules --help``).
"""

from __future__ import annotations

import importlib
import sys

# command -> (module, one-line help). Order is the order of `gasrules --help`.
COMMANDS: dict[str, tuple[str, str]] = {
    "interpret": ("gasrules.cli.commands.interpret", "Interpret one or more blood gas cases."),
    "check": (
        "gasrules.cli.commands.check",
        "Check a rulebook: schema, names, units, cycles; every problem with file:line:column.",
    ),
    "verify": (
        "gasrules.cli.commands.verify",
        "Run a rulebook's validation suite with rule and threshold coverage.",
    ),
    "diff": ("gasrules.cli.commands.diff", "Semantic diff of two rulebooks, with each change classed."),
    "impact": (
        "gasrules.cli.commands.impact",
        "Replay a corpus under two rulebooks and report what would change.",
    ),
    "probes": (
        "gasrules.cli.commands.probes",
        "Boundary cases around changed thresholds, under both rulebooks.",
    ),
    "release": (
        "gasrules.cli.commands.release",
        "Approve a rulebook version after its suite passes; write the release manifest.",
    ),
    "suspend": ("gasrules.cli.commands.suspend", "Suspend a rule or a rulebook, with a recorded reason."),
    "audit": ("gasrules.cli.commands.audit", "Verify or replay a decision log."),
    "shadow": (
        "gasrules.cli.commands.shadow",
        "Interpret with the active and a candidate rulebook; record disagreements.",
    ),
    "document": ("gasrules.cli.commands.document", "Render a rulebook for review (HTML and Markdown)."),
    "batch": ("gasrules.cli.commands.batch", "Interpret a CSV, JSON Lines or Parquet file row by row."),
    "serve": ("gasrules.cli.commands.serve", "HTTP service with a JSON API and CDS Hooks."),
    "listen": (
        "gasrules.cli.commands.listen",
        "MLLP listener: HL7 v2 ORU^R01 in, results filed and forwarded, ACKs.",
    ),
    "cutpoints": ("gasrules.cli.commands.cutpoints", "List every numeric threshold of every rule condition."),
}

_CAUTION = (
    "Decision support only: it supports, and never replaces, clinical judgement; "
    "local laboratory ranges and protocols prevail."
)


def _usage() -> str:
    width = max(map(len, COMMANDS))
    lines = [
        "Usage: gasrules COMMAND [ARGS]...",
        "",
        "Auditable blood gas interpretation driven by versioned YAML rulebooks.",
        "",
        "Commands:",
    ]
    for name, (_module, text) in COMMANDS.items():
        lines.append(f"  {name.ljust(width)}  {text}")
    lines += [
        "",
        "Run 'gasrules COMMAND --help' for a command's options.",
        "Exit codes: 0 ok, 1 check failed, 2 usage, 3 inconsistent sample, 4 input rejected, "
        "5 broken rulebook, 6 refused in strict mode.",
        "",
        _CAUTION,
    ]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    args = list(sys.argv[1:] if argv is None else argv)
    if not args or args[0] in ("-h", "--help", "help"):
        print(_usage())
        return 0
    if args[0] in ("--version", "-V"):
        from gasrules.core.version import __version__

        print(f"gasrules {__version__}")
        return 0
    name = args[0]
    if name not in COMMANDS:
        print(f"gasrules: unknown command '{name}'; expected one of: {', '.join(COMMANDS)}", file=sys.stderr)
        return 2
    try:
        module = importlib.import_module(COMMANDS[name][0])
    except ModuleNotFoundError as exc:
        if exc.name == COMMANDS[name][0]:
            print(f"gasrules: command '{name}' is not available in this version", file=sys.stderr)
            return 2
        raise
    try:
        module.app(args=args[1:], prog_name=f"gasrules {name}", standalone_mode=True)
    except SystemExit as exc:
        code = exc.code
        return code if isinstance(code, int) else (0 if code is None else 1)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
