"""The command group: help, version, error handling."""

import logging
import os
import signal
import subprocess
import sys
import warnings
from pathlib import Path

import click
import pytest
from click.testing import CliRunner

import cli.main as main_module
import ntrans
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


def test_a_warning_repeated_by_a_later_step_shows_once(runner, monkeypatch):
    # ntrans run's steps (tables, then adjust) each warn of cells off the DEM, from two
    # places in the code: the console shows it once per command, and again in the next
    from ntrans.errors import PartialCoverageWarning, warn

    @click.command("steps")
    def steps():
        warn("2 cells lie partly outside the DEM", PartialCoverageWarning)  # a first step
        warn("2 cells lie partly outside the DEM", PartialCoverageWarning)  # a second step
        warn("3 cells lie partly outside the DEM", PartialCoverageWarning)

    monkeypatch.setitem(main_module.COMMANDS, "steps", "cli.main")
    monkeypatch.setattr(main_module, "command", steps, raising=False)
    for _ in range(2):
        logging.captureWarnings(False)  # as in a fresh process (see above)
        with warnings.catch_warnings():
            warnings.simplefilter("always")  # Python's own once-per-place rule aside
            result = runner.invoke(main_module.cli, ["steps"])
        assert result.exit_code == 0, result.output
        assert result.output.count("2 cells lie partly outside the DEM") == 1
        assert result.output.count("3 cells lie partly outside the DEM") == 1
    assert not logging.getLogger("py.warnings").filters  # removed when each command ended


@pytest.mark.parametrize(("args", "user", "expected"), [
    (["-q"], None, "warning"), ([], None, "warning"), (["-vv"], None, "info"),
    (["-v", "verify", "-v"], None, "info"),  # the flags add up wherever they are given
    ([], "error", "error"),  # a level the user set in the environment is kept
])
def test_dask_logs_follow_the_verbosity(runner, monkeypatch, tmp_path, args, user, expected):
    # a local cluster's start-up lines (INFO) only with -vv; Dask takes the level from the
    # environment when it is imported, in this process and in its workers
    from cli.options import DASK_LOG_ENV

    monkeypatch.setenv(DASK_LOG_ENV, "unset")  # restored after the test, whatever it was
    if user is None:
        monkeypatch.delenv(DASK_LOG_ENV)
    else:
        monkeypatch.setenv(DASK_LOG_ENV, user)
    command = args if "verify" in args else [*args, "verify"]
    runner.invoke(main_module.cli, [*command, str(tmp_path)])
    assert os.environ[DASK_LOG_ENV] == expected


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


# ------------------------------------------------------------------------ interrupts

#: a command that writes into its output's staging folder, says so, then waits to be
#: stopped (run as a script, imported again by the command group as ``slow_job``)
_SLOW_JOB = """
import sys
import time

import click

from ntrans.outputs import OutputFolder


@click.command("slow")
@click.argument("out")
def command(out):
    with OutputFolder(out) as folder:
        (folder.path / "half.parquet").write_bytes(b"PAR1")
        print("writing", flush=True)
        time.sleep(60)


if __name__ == "__main__":
    import cli.main

    cli.main.COMMANDS["slow"] = "slow_job"
    cli.main.main(["-q", "slow", sys.argv[1]])
"""


@pytest.mark.parametrize(("number", "exit_code"), [(signal.SIGTERM, 143), (signal.SIGINT, 130)])
def test_a_stopped_job_leaves_no_staging_folder(tmp_path, number, exit_code):
    # SIGTERM (a batch system, timeout) stops a job as Ctrl-C does: the staging folder is
    # removed, one line says nothing was written, exit code 128 + the signal's number
    script = tmp_path / "slow_job.py"
    script.write_text(_SLOW_JOB, encoding="utf-8")
    out = tmp_path / "job" / "out"
    root = Path(ntrans.__file__).resolve().parents[1]  # this checkout's cli and ntrans
    env = {**os.environ, "PYTHONPATH": str(root), "PYTHONDONTWRITEBYTECODE": "1"}
    child = subprocess.Popen([sys.executable, str(script), str(out)], env=env, text=True,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        assert child.stdout.readline() == "writing\n"  # the staging folder holds a file
        assert [p.name for p in out.parent.iterdir()][0].startswith(".out.tmp-")
        child.send_signal(number)
        _, stderr = child.communicate(timeout=30)
    finally:
        if child.poll() is None:  # pragma: no cover - only when the test fails
            child.kill()
            child.communicate()
    assert child.returncode == exit_code, stderr
    assert stderr.splitlines() == [
        f"ntrans: interrupted ({signal.Signals(number).name}); nothing was written to {out}"
    ]
    assert list(out.parent.iterdir()) == []


def test_a_signal_swallowed_by_the_work_still_stops_with_its_code(runner, monkeypatch):
    # a library may catch the interrupt and go on; the command then ends, but it was told
    # to stop: exit 128 + the signal's number, saying its work was done
    @click.command("stubborn")
    def stubborn():
        try:
            os.kill(os.getpid(), signal.SIGTERM)
        except KeyboardInterrupt:
            pass
        click.echo("finished")

    monkeypatch.setitem(main_module.COMMANDS, "stubborn", "cli.main")
    monkeypatch.setattr(main_module, "command", stubborn, raising=False)
    result = runner.invoke(main_module.cli, ["stubborn"])
    assert result.exit_code == 143
    assert result.stdout == "finished\n"
    assert result.stderr.strip() == "ntrans: interrupted (SIGTERM); its work was already done"


def test_signal_handlers_are_restored_after_a_command(runner, failing_command):
    stops = (signal.SIGINT, signal.SIGTERM)
    before = [signal.getsignal(n) for n in stops]
    runner.invoke(main_module.cli, ["boom"])
    assert [signal.getsignal(n) for n in stops] == before
