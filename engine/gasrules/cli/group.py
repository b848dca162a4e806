"""The `gasrules` command group: commands are imported when they run, never to be listed.

Typer builds its commands on its own copy of Click (typer._click); the group is therefore a
subclass of typer's Click group, ``typer.core.TyperGroup``, and each command module's typer app
is turned into its command with ``typer.main.get_command`` when it is first needed:

* ``gasrules --help`` and the completion of command names read gasrules.cli.COMMANDS only;
* ``gasrules COMMAND ...``, ``gasrules COMMAND --help`` and the completion of a command's
  options import gasrules.cli.commands.COMMAND and nothing else of the command line.

Shell completion is typer's, asked for Click's way: ``_GASRULES_COMPLETE=bash_source gasrules``
prints the script for bash (``zsh_source``, ``fish_source`` likewise; typer's own spelling
``source_bash`` is also accepted). A module that a command needs from an
optional extra (pyarrow, dask, starlette, uvicorn, ...) and that is not installed ends the run
with one line naming ``pip install 'gasrules[EXTRA]'`` and exit 2.
"""

from __future__ import annotations

import importlib
import os
import sys
from collections.abc import MutableMapping
from difflib import get_close_matches
from typing import Any

import typer
from typer.core import TyperGroup

from gasrules.cli import _CAUTION, COMMANDS, EXIT_CODES
from gasrules.core import exitcodes

_SHELLS = ("bash", "zsh", "fish", "powershell", "pwsh")
_DESCRIPTION = "Auditable blood gas interpretation driven by versioned YAML rulebooks."


class LazyGroup(TyperGroup):
    """A command group whose commands are the modules listed in gasrules.cli.COMMANDS, each
    imported only when it is run, its help is shown or its options are completed."""

    def list_commands(self, ctx: Any) -> list[str]:
        return list(COMMANDS)

    def get_command(self, ctx: Any, cmd_name: str) -> Any:
        entry = COMMANDS.get(cmd_name)
        if entry is None:
            return None
        module_name = entry[0]
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            if exc.name == module_name:
                raise typer.BadParameter(
                    f"command '{cmd_name}' is not available in this version", ctx=ctx
                ) from None
            raise
        command = typer.main.get_command(module.app)
        command.name = cmd_name
        return command

    def resolve_command(self, ctx: Any, args: list[str]) -> tuple[str | None, Any, list[str]]:
        name = args[0]
        if name in COMMANDS:
            return name, self.get_command(ctx, name), args[1:]
        if ctx.resilient_parsing:
            return None, None, args[1:]
        if name.startswith("-"):
            self.parse_args(ctx, args)  # an unknown option: the parser names it
        near = get_close_matches(name, list(COMMANDS), n=2)
        hint = f" (did you mean {' or '.join(near)}?)" if near else ""
        ctx.fail(f"unknown command '{name}'{hint}; expected one of: {', '.join(COMMANDS)}")
        raise AssertionError("ctx.fail raises a usage error")  # for the type checker

    def invoke(self, ctx: Any) -> Any:
        try:
            return super().invoke(ctx)
        except ModuleNotFoundError as exc:
            from gasrules.cli.commands._common import missing_extra

            message = missing_extra(exc)
            if message is None:
                raise
            command = ctx.invoked_subcommand or (ctx.protected_args or [""])[0]
            typer.echo(f"gasrules {command}: {message}", err=True)
            raise typer.Exit(exitcodes.USAGE) from None

    # ------------------------------------------------------------------------- help

    def get_help_option(self, ctx: Any) -> Any:
        option = super().get_help_option(ctx)
        if option is not None and option.default is None:
            # absent, typer's help flag is None, which it sends through its value checking
            # (importing pydantic, ~0.15 s on every run); False is a plain bool it passes as is
            option.default = False
        return option

    def format_commands(self, ctx: Any, formatter: Any) -> None:
        with formatter.section("Commands"):
            formatter.write_dl([(name, text) for name, (_module, text) in COMMANDS.items()])

    def format_epilog(self, ctx: Any, formatter: Any) -> None:
        formatter.write_paragraph()
        for line in ("Run 'gasrules COMMAND --help' for a command's options.", EXIT_CODES, "", _CAUTION):
            formatter.write(f"{line}\n")

    # ------------------------------------------------------------------------- completion

    def shell_complete(self, ctx: Any, incomplete: str) -> list[Any]:
        """Command names with their one-line help from the table (nothing imported), then the
        group's own options."""
        from typer._click.shell_completion import CompletionItem

        items = [
            CompletionItem(name, help=text)
            for name, (_module, text) in COMMANDS.items()
            if name.startswith(incomplete)
        ]
        return items + super(TyperGroup, self).shell_complete(ctx, incomplete)

    def _main_shell_completion(
        self, ctx_args: MutableMapping[str, Any], prog_name: str, complete_var: str | None = None
    ) -> None:
        var = complete_var or f"_{prog_name}_COMPLETE".replace("-", "_").upper()
        instruction = os.environ.get(var)
        if not instruction:
            return
        first, _, second = instruction.partition("_")
        if first in _SHELLS:  # Click's order (bash_source, bash_complete); typer's is source_bash
            instruction = f"{second}_{first}"
        from typer.completion import completion_init, shell_complete

        completion_init()  # registers typer's bash, zsh, fish and PowerShell scripts
        sys.exit(shell_complete(self, ctx_args, prog_name, var, instruction))


def _version(value: bool) -> None:
    if value:
        from gasrules.core.version import __version__

        typer.echo(f"gasrules {__version__}")
        raise typer.Exit(exitcodes.OK)


def build_group() -> Any:
    """The `gasrules` group (a LazyGroup), built from a typer app so that its options, help and
    completion follow typer's conventions."""
    app = typer.Typer(
        cls=LazyGroup,
        name="gasrules",
        help=_DESCRIPTION,
        # typer's --install-completion/--show-completion would cost every run the import of its
        # value checking (pydantic, ~0.2 s); _GASRULES_COMPLETE=bash_source etc. does the job
        add_completion=False,
        rich_markup_mode=None,
        context_settings={"help_option_names": ["-h", "--help"]},
        pretty_exceptions_enable=False,
    )

    @app.callback()
    def gasrules(
        version: bool = typer.Option(
            False,
            "--version",
            "-V",
            is_eager=True,
            callback=_version,
            help="Print the version and exit.",
        ),
    ) -> None:
        pass

    return typer.main.get_command(app)
