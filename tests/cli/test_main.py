"""The command group: help, version, error handling."""

import logging

import click
import pytest
from click.testing import CliRunner

import cli.main as main_module
from ntrans.cautions import CAUTIONS
from ntrans.errors import InputError


@pytest.fixture
def runner():
    return CliRunner()


def test_help_states_cautions(runner):
    result = runner.invoke(main_module.cli, ["--help"])
    assert result.exit_code == 0
    assert "starting point for calibration" in result.output
    assert "qualified" in result.output


def test_version(runner):
    result = runner.invoke(main_module.cli, ["--version"])
    assert result.exit_code == 0
    assert "0.1.0" in result.output


def test_every_registered_command_loads(runner):
    for name in main_module.COMMANDS:
        if main_module._available(name):
            result = runner.invoke(main_module.cli, [name, "--help"])
            assert result.exit_code == 0, (name, result.output)


@pytest.fixture
def failing_command(monkeypatch):
    @click.command("boom")
    def boom():
        raise InputError("the cell layer is empty; give a layer with polygons")

    monkeypatch.setitem(main_module.COMMANDS, "boom", "cli.main")
    monkeypatch.setattr(main_module, "command", boom, raising=False)
    return boom


def test_user_error_is_one_line_exit_2(runner, failing_command):
    result = runner.invoke(main_module.cli, ["boom"])
    assert result.exit_code == 2
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert lines == ["ntrans: error: the cell layer is empty; give a layer with polygons"]
    assert "Traceback" not in result.output


def test_debug_shows_traceback(runner, failing_command):
    result = runner.invoke(main_module.cli, ["--debug", "boom"])
    assert result.exit_code != 0
    assert isinstance(result.exception, InputError)


def test_cautions_are_three_sentences():
    assert len(CAUTIONS) == 3
    assert all(sentence.endswith(".") for sentence in CAUTIONS)


@pytest.fixture
def logging_command(monkeypatch):
    """A command that logs while its progress bar is up, as the long steps do."""

    @click.command("busy")
    def busy():
        from ntrans.progress import track

        for step in track(range(3), total=3, desc="steps", enabled=True):
            logging.getLogger("ntrans.busy").info("step %d done", step)

    monkeypatch.setitem(main_module.COMMANDS, "busy", "cli.main")
    monkeypatch.setattr(main_module, "command", busy, raising=False)
    return busy


def test_log_lines_do_not_land_on_a_progress_bar(runner, logging_command):
    # A terminal shows what follows the last carriage return of a line (over what came
    # before it); each log line must start a line of its own, not follow a bar's text.
    result = runner.invoke(main_module.cli, ["busy"])
    assert result.exit_code == 0, result.output
    logged = [line for line in result.output.split("\n") if "step " in line and "done" in line]
    assert len(logged) == 3
    for line in logged:
        assert line.split("\r")[-1].startswith("INFO ntrans.busy: step"), repr(line)
    # the console handler is restored when the command ends
    handlers = logging.getLogger().handlers
    assert not any(type(h).__name__ == "_TqdmLoggingHandler" for h in handlers)


def test_warnings_show_their_category_not_the_logger(runner, monkeypatch):
    from ntrans.errors import PartialCoverageWarning, warn

    @click.command("warns")
    def warns():
        warn("2 cells lie partly outside the DEM", PartialCoverageWarning)
        logging.getLogger("ntrans.tables").info("tables written")

    monkeypatch.setitem(main_module.COMMANDS, "warns", "cli.main")
    monkeypatch.setattr(main_module, "command", warns, raising=False)
    # as in a fresh process, where the command group turns the capture on: pytest restores
    # Python's warning hook after each test while logging still counts it as captured
    logging.captureWarnings(False)
    result = runner.invoke(main_module.cli, ["warns"])
    assert result.exit_code == 0, result.output
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert "WARNING PartialCoverageWarning: 2 cells lie partly outside the DEM" in lines
    assert "INFO ntrans.tables: tables written" in lines
    assert "py.warnings" not in result.output


def test_every_command_takes_the_log_options_after_its_name(runner):
    for name in main_module.COMMANDS:
        if main_module._available(name):
            result = runner.invoke(main_module.cli, [name, "--help"])
            for option in ("-v, --verbose", "-q, --quiet", "--debug"):
                assert option in result.output, (name, option)


@pytest.fixture
def level_command(monkeypatch):
    """A command reporting the log level and the flags it runs with."""
    from cli import options

    seen = {}

    @click.command("level")
    @options.verbosity
    @click.pass_context
    def level(ctx):
        seen.update(level=logging.getLogger().level, quiet=ctx.meta["ntrans.quiet"],
                    debug=ctx.meta["ntrans.debug"])

    monkeypatch.setitem(main_module.COMMANDS, "level", "cli.main")
    monkeypatch.setattr(main_module, "command", level, raising=False)
    return seen


@pytest.mark.parametrize(
    ("args", "level", "quiet", "debug"),
    [
        (["level"], logging.INFO, False, False),
        (["-q", "level"], logging.WARNING, True, False),
        (["level", "-q"], logging.WARNING, True, False),
        (["level", "--quiet"], logging.WARNING, True, False),
        (["level", "-v"], logging.DEBUG, False, False),
        (["-v", "level", "-q"], logging.WARNING, True, False),  # quiet wins, as before it
        (["level", "--debug"], logging.INFO, False, True),
        (["--debug", "level"], logging.INFO, False, True),
    ],
)
def test_log_options_after_the_command_do_what_they_do_before_it(runner, level_command, args,
                                                                 level, quiet, debug):
    result = runner.invoke(main_module.cli, args)
    assert result.exit_code == 0, result.output
    assert level_command == {"level": level, "quiet": quiet, "debug": debug}


def test_debug_after_the_command_shows_the_traceback(runner, tmp_path):
    from ntrans.errors import InputFileError

    missing = str(tmp_path / "absent.toml")
    result = runner.invoke(main_module.cli, ["run", missing])
    assert result.exit_code == 2
    assert "Traceback" not in result.output
    result = runner.invoke(main_module.cli, ["run", missing, "--debug"])
    assert isinstance(result.exception, InputFileError)


def test_quiet_after_a_real_command(runner, tmp_path):
    result = runner.invoke(main_module.cli, ["init", str(tmp_path / "p.toml"), "-q"])
    assert result.exit_code == 0, result.output
    assert (tmp_path / "p.toml").is_file()
