"""The `gasrules` command: a lazily loading command group.

Each command lives in its own module under gasrules/cli/commands/ and exposes a typer app named
``app``. The group (gasrules.cli.group) imports a command's module only when that command runs,
its help is asked for or its options are completed; ``gasrules --help`` and the completion of
command names read the table below and import none of them. The table is the one place that
lists the commands, in the order of ``gasrules --help``.
"""

from __future__ import annotations

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

EXIT_CODES = (
    "Exit codes: 0 ok, 1 check failed, 2 usage, 3 inconsistent sample, 4 input rejected, "
    "5 broken rulebook, 6 refused in strict mode."
)


def main(argv: list[str] | None = None) -> int:
    """Run the command line ``argv`` (default: sys.argv[1:]) and return its exit code."""
    from gasrules.cli.group import build_group

    args = list(sys.argv[1:] if argv is None else argv)
    if not args or args[0] == "help":  # `gasrules help [COMMAND]`
        args = [*args[1:2], "--help"]
    try:
        build_group().main(args=args, prog_name="gasrules", standalone_mode=True)
    except SystemExit as exc:
        code = exc.code
        return code if isinstance(code, int) else (0 if code is None else 1)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
