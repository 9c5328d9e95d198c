"""The ``sounding`` command: a click group of thin wrappers over library calls.

One module per command group, each command's options beside its code:

    index.py     sounding index, sounding check
    search.py    sounding search
    serve.py     sounding serve
    evaluate.py  sounding eval, sounding judgments export
    keys.py      sounding keys create|list|revoke
    _common.py   the --index/--model options, settings, the progress bar

Commands return their exit code. sounding's own errors become one line on
stderr and their ``exit_code``; usage errors one line and 2; anything else
one line and 70 (a traceback only with ``SOUNDING_DEBUG=1``).
"""

from __future__ import annotations

import os
import sys
from collections.abc import Sequence
from typing import Any

import click

from sounding.indexer.errors import SoundingError

from . import evaluate, index, keys, search, serve
from . import mcp as mcp_cli
from ._common import example

EXIT_USAGE = 2
EXIT_UNEXPECTED = 70
EXIT_INTERRUPTED = 130


def _usage_line(exc: click.UsageError) -> str:
    path = exc.ctx.command_path if exc.ctx is not None else "sounding"
    return f"{path}: error: {exc.format_message()} (see `{path} --help`)"


def run(command: click.Command, argv: Sequence[str], prog_name: str = "sounding") -> int:
    """Parse ``argv``, run the command, and turn every outcome into an exit code."""
    try:
        with command.make_context(prog_name, list(argv)) as ctx:
            return int(command.invoke(ctx) or 0)
    except click.exceptions.Exit as exc:  # --help, and ctx.exit()
        return exc.exit_code
    except click.UsageError as exc:
        click.echo(" ".join(_usage_line(exc).split()), err=True)
        return exc.exit_code
    except click.ClickException as exc:
        click.echo(f"sounding: error: {' '.join(exc.format_message().split())}", err=True)
        return exc.exit_code
    except SoundingError as exc:
        click.echo(f"sounding: error: {exc}", err=True)
        return exc.exit_code
    except (KeyboardInterrupt, click.Abort):
        click.echo("sounding: interrupted; the index keeps its last complete state", err=True)
        return EXIT_INTERRUPTED
    except Exception as exc:  # one line, not a traceback, unless asked
        if os.environ.get("SOUNDING_DEBUG"):
            raise
        click.echo(
            f"sounding: unexpected error: {type(exc).__name__}: {exc} "
            "(set SOUNDING_DEBUG=1 for a traceback)",
            err=True,
        )
        return EXIT_UNEXPECTED


class SoundingGroup(click.Group):
    """A group whose ``main`` applies :func:`run`'s error policy (so CliRunner sees it too)."""

    def main(  # type: ignore[override]
        self,
        args: Sequence[str] | None = None,
        prog_name: str | None = None,
        complete_var: str | None = None,
        standalone_mode: bool = True,
        **extra: Any,
    ) -> int:
        code = run(self, sys.argv[1:] if args is None else args, prog_name or "sounding")
        if standalone_mode:
            sys.exit(code)
        return code


@click.group(
    "sounding",
    cls=SoundingGroup,
    help="Meaning-based search over a team's documents.",
    epilog=example("example:\n  sounding index demo_corpus && sounding search 'who is on call?'"),
    no_args_is_help=False,
    subcommand_metavar="COMMAND [ARGS]...",
    context_settings={"help_option_names": ["-h", "--help"]},
)
def cli() -> None:
    pass


for _module in (index, search, serve, evaluate, keys, mcp_cli):
    for _command in _module.COMMANDS:
        cli.add_command(_command)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``sounding`` console script; returns the exit code."""
    return cli.main(argv, prog_name="sounding", standalone_mode=False)


if __name__ == "__main__":
    sys.exit(main())
