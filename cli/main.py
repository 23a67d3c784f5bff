"""The ``ntrans`` command group: logging, error handling, lazy command loading.

Each command lives in its own module (``cli/<name>.py``) exposing ``command``, a
``click.Command`` that calls one library function.  Library errors
(:class:`ntrans.errors.NtransError`) become one line on stderr and exit code 2; with
``--debug`` the traceback is shown as well.  Ctrl-C (SIGINT) and SIGTERM stop a command
the same way: its clean-up runs (no staging folder is left), one line says what was
written, and the exit code is 128 + the signal's number (130, 143).
"""

from __future__ import annotations

import contextlib
import importlib
import logging
import signal
import sys
import traceback
from collections.abc import Iterator

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
        with _stop_on_signals() as received:
            try:
                result = super().invoke(ctx)
            except click.exceptions.Exit:
                raise
            except BaseException as exc:
                # a library may turn the interrupt into an error of its own: the signal decides
                if received or isinstance(exc, KeyboardInterrupt):
                    _exit_interrupted(ctx, received, exc)
                if not isinstance(exc, NtransError) or ctx.meta.get("ntrans.debug"):
                    raise
                click.echo(f"ntrans: error: {exc}", err=True)
                ctx.exit(exc.exit_code)
            if received:  # the signal came once the command's work was done
                _exit_interrupted(ctx, received, None, "its work was already done")
            return result


#: the signals that stop a command (Ctrl-C, and a batch system's or ``timeout``'s stop)
STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)


@contextlib.contextmanager
def _stop_on_signals() -> Iterator[list[int]]:
    """While open, SIGINT and SIGTERM raise KeyboardInterrupt, so the command's clean-up
    runs; yields the list of signals received.  The previous handlers are restored."""
    received: list[int] = []

    def stop(signum: int, frame: object) -> None:
        received.append(signum)
        raise KeyboardInterrupt

    previous = {}
    try:
        for number in STOP_SIGNALS:
            previous[number] = signal.signal(number, stop)
    except ValueError:  # not the main thread: signals cannot be handled here
        pass
    try:
        yield received
    finally:
        for number, handler in previous.items():
            signal.signal(number, signal.SIG_DFL if handler is None else handler)


def _exit_interrupted(ctx: click.Context, received: list[int], exc: BaseException | None,
                      done: str | None = None) -> None:
    """Say the command was interrupted and what was written (the outermost output
    folder's note on ``exc``, or ``done``); exit with 128 + the signal's number."""
    number = received[0] if received else signal.SIGINT
    if exc is not None and ctx.meta.get("ntrans.debug"):
        traceback.print_exception(exc)
    notes = getattr(exc, "__notes__", None) or ([done] if done else [])
    outcome = f"; {notes[-1]}" if notes else ""
    click.echo(f"ntrans: interrupted ({signal.Signals(number).name}){outcome}", err=True)
    ctx.exit(128 + number)


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
    # a job made of steps (ntrans run: tables, then adjust) may warn of the same thing in
    # each; the console shows each warning once per command
    warnings_log = logging.getLogger("py.warnings")
    once = _EachWarningOnce()
    warnings_log.addFilter(once)
    ctx.call_on_close(lambda: warnings_log.removeFilter(once))
    options.set_verbosity(ctx, verbose=verbose, quiet=quiet, debug=debug)
    # log lines written while a progress bar is up: clear the bar, print the line, redraw
    # the bar below it (else the line is appended to the bar's and the bar is left behind)
    ctx.with_resource(logging_redirect_tqdm())


class _EachWarningOnce(logging.Filter):
    """Let a warning's text through the first time only."""

    def __init__(self) -> None:
        super().__init__()
        self._seen: set[str] = set()

    def filter(self, record: logging.LogRecord) -> bool:
        text = record.getMessage()
        if text in self._seen:
            return False
        self._seen.add(text)
        return True


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
