"""The ``ntrans`` command group: logging, error handling, lazy command loading.

Each command lives in its own module (``cli/<name>.py``) exposing ``command``, a
``click.Command`` that calls one library function.  Library errors
(:class:`ntrans.errors.NtransError`) become one line on stderr and exit code 2; with
``--debug`` the traceback is shown as well.
"""

from __future__ import annotations

import importlib
import logging
import sys

import click
from tqdm.contrib.logging import logging_redirect_tqdm

from ntrans.errors import NtransError

from . import options

# command name -> module path; imported only when the command is used.
COMMANDS: dict[str, str] = {
    "tables": "cli.tables",
    "adjust": "cli.adjust",
    "init": "cli.init",
    "run": "cli.run",
    "verify": "cli.verify",
    "demo": "cli.demo",
}


class LazyGroup(click.Group):
    """A group that imports each command module on first use."""

    def list_commands(self, ctx: click.Context) -> list[str]:
        return [name for name in COMMANDS if _available(name)]

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        if cmd_name not in COMMANDS or not _available(cmd_name):
            return None
        module = importlib.import_module(COMMANDS[cmd_name])
        return module.command

    def invoke(self, ctx: click.Context):
        try:
            return super().invoke(ctx)
        except NtransError as exc:
            if ctx.meta.get("ntrans.debug"):
                raise
            click.echo(f"ntrans: error: {exc}", err=True)
            ctx.exit(exc.exit_code)


def _available(name: str) -> bool:
    return importlib.util.find_spec(COMMANDS[name]) is not None


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.option("-v", "--verbose", count=True, help=options.VERBOSE_HELP)
@click.option("-q", "--quiet", is_flag=True, help=options.QUIET_HELP)
@click.option("--debug", is_flag=True, help=options.DEBUG_HELP)
@click.version_option(package_name="ntrans")
@click.pass_context
def cli(ctx: click.Context, verbose: int, quiet: bool, debug: bool) -> None:
    """ntrans: carry Manning's n between flat-cell and subgrid-terrain 2-D flood models.

    Adjusted n values are a starting point for calibration, not a substitute for it; a
    qualified engineer must review them; local codes, agency guidance and licensed
    practice take precedence.

    -v, -q and --debug may also follow the command's name.
    """
    console = logging.StreamHandler()
    console.setFormatter(_ConsoleFormatter())
    logging.basicConfig(handlers=[console], force=True)
    logging.captureWarnings(True)
    options.set_verbosity(ctx, verbose=verbose, quiet=quiet, debug=debug)
    # log lines written while a progress bar is up: clear the bar, print the line, redraw
    # the bar below it (else the line is appended to the bar's and the bar is left behind)
    ctx.with_resource(logging_redirect_tqdm())


class _ConsoleFormatter(logging.Formatter):
    """``LEVEL logger: message``; a Python warning (logger ``py.warnings``) as ``LEVEL
    Category: message``, its category saying what it is about."""

    def __init__(self) -> None:
        super().__init__("%(levelname)s %(name)s: %(message)s")
        self._warning = logging.Formatter("%(levelname)s %(message)s")

    def format(self, record: logging.LogRecord) -> str:
        if record.name == "py.warnings":
            return self._warning.format(record)
        return super().format(record)


def main(argv: list[str] | None = None) -> None:
    """Console-script entry point."""
    cli.main(args=argv, prog_name="ntrans", standalone_mode=True)


if __name__ == "__main__":  # pragma: no cover
    main(sys.argv[1:])
