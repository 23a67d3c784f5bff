"""``ntrans init``, ``ntrans run``, ``ntrans verify`` and ``ntrans demo`` on the command line."""

from __future__ import annotations

import hashlib

import pandas as pd
import pytest
from click.testing import CliRunner

from cli.main import cli
from ntrans import bundle
from ntrans.cautions import CAUTIONS
from ntrans.translate import FLAG_MEANINGS

BASE = """
[inputs]
dem = "dem.tif"
cells = "cells.gpkg"
n = 0.03

[window]
depths = "0.25:1:0.25"
"""


@pytest.fixture
def runner():
    return CliRunner()


def _one_error_line(result) -> str:
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("ntrans: error: ")
    return lines[0]


def test_init_writes_a_template_and_refuses_to_overwrite(runner, tmp_path):
    path = tmp_path / "job.toml"
    result = runner.invoke(cli, ["init", str(path)])
    assert result.exit_code == 0, result.output
    assert path.is_file() and str(path) in result.stdout
    again = runner.invoke(cli, ["init", str(path)])
    assert again.exit_code == 2
    _one_error_line(again)
    forced = runner.invoke(cli, ["init", str(path), "--overwrite"])
    assert forced.exit_code == 0


@pytest.mark.parametrize(
    ("extra", "words"),
    [
        ("[run]\ncores = 4\n", ["cores", "tile_size"]),
        ('[run]\ntile_size = "big"\n', ["run.tile_size", "an integer"]),
        ('[families]\nclosure = "round"\n', ["families.closure", "lumped", "strip", "cell"]),
        ('[outputs]\nzip = "yes"\n', ["outputs.zip", "true or false"]),
    ],
)
def test_project_file_errors_exit_2_with_one_line(runner, tmp_path, extra, words):
    path = tmp_path / "p.toml"
    path.write_text(BASE + extra, encoding="utf-8")
    result = runner.invoke(cli, ["-q", "run", str(path)])
    assert result.exit_code == 2
    line = _one_error_line(result)
    for word in words:
        assert word in line
    assert not (tmp_path / "p-bundle").exists()


def test_missing_project_file_exits_2(runner, tmp_path):
    result = runner.invoke(cli, ["-q", "run", str(tmp_path / "absent.toml")])
    assert result.exit_code == 2
    _one_error_line(result)


def test_project_file_not_in_utf8_exits_2(runner, tmp_path):
    path = tmp_path / "p.toml"
    path.write_bytes(BASE.replace("dem.tif", "modèle.tif").encode("latin-1"))
    result = runner.invoke(cli, ["-q", "run", str(path)])
    assert result.exit_code == 2
    assert "save it as UTF-8" in _one_error_line(result)


def _bundle(folder):
    folder.mkdir()
    (folder / "report.html").write_text("<html></html>\n", encoding="utf-8")
    (folder / "n_by_class.csv").write_text("class,n_source\na,0.03\n", encoding="utf-8")
    bundle.write_manifest(folder, inputs=[], parameters={})
    return folder


def test_verify_ok_exits_0(runner, tmp_path):
    folder = _bundle(tmp_path / "b")
    result = runner.invoke(cli, ["verify", str(folder)])
    assert result.exit_code == 0, result.output
    digest = hashlib.sha256((folder / "manifest.json").read_bytes()).hexdigest()
    lines = result.stdout.splitlines()
    assert lines[0].startswith(f"manifest.json sha256: {digest} (record it")
    assert lines[1].startswith("ok: ")


def test_verify_lists_every_difference_then_exits_2(runner, tmp_path):
    folder = _bundle(tmp_path / "b")
    (folder / "report.html").write_text("<html>edited</html>\n", encoding="utf-8")
    (folder / "n_by_class.csv").unlink()
    (folder / "extra.txt").write_text("x", encoding="utf-8")
    result = runner.invoke(cli, ["verify", str(folder)])
    assert result.exit_code == 2
    assert result.stdout.splitlines()[:3] == [
        "missing: n_by_class.csv",
        "changed: report.html",
        "extra: extra.txt",
    ]
    assert result.stdout.splitlines()[3].startswith("manifest.json sha256: ")
    assert "1 missing, 1 changed, 1 extra" in _one_error_line(result)


def test_verify_catches_a_parameter_edited_in_the_manifest(runner, tmp_path):
    folder = _bundle(tmp_path / "b")
    path = folder / "manifest.json"
    path.write_text(path.read_text().replace('"parameters": {}', '"parameters": {"closure": "strip"}'),
                    encoding="utf-8")
    result = runner.invoke(cli, ["verify", str(folder)])
    assert result.exit_code == 2
    assert result.stdout.splitlines()[0].startswith("changed: manifest.json (edited after the run")
    assert "the manifest was edited after the run" in _one_error_line(result)


def test_verify_without_manifest_exits_2(runner, tmp_path):
    (tmp_path / "empty").mkdir()
    result = runner.invoke(cli, ["verify", str(tmp_path / "empty")])
    assert result.exit_code == 2
    _one_error_line(result)


@pytest.mark.filterwarnings("ignore::ntrans.errors.DryWetMismatchWarning")
def test_run_writes_the_bundle_and_ends_with_the_cautions(runner, tmp_path):
    from test_project import write_small_project

    project = write_small_project(tmp_path / "job")
    result = runner.invoke(cli, ["-q", "run", str(project)])
    assert result.exit_code == 0, result.output
    out = [line for line in result.stdout.splitlines() if line.strip()]
    assert out[-len(CAUTIONS):] == [f"Caution: {c}" for c in CAUTIONS]
    assert f"report: {tmp_path / 'job' / 'bundle' / 'report.html'}" in result.stdout
    # every flag of the class table is explained in the summary, none that is not there
    table = pd.read_csv(tmp_path / "job" / "bundle" / "n_by_class.csv", keep_default_na=False)
    shown = {part.split(":")[0] for text in table["flags"] for part in text.split(";") if part}
    printed = " ".join(result.stdout.split())
    for name, meaning in FLAG_MEANINGS.items():
        assert (f": {meaning}" in printed) == (name in shown), name
    assert ("flags:" in printed) == bool(shown)
    # the stage errors as the report gives them: the median, and the mean |error| weighted
    # by the source conveyance (the fit's own weighting), said larger when it is
    weighted = [line for line in result.stdout.splitlines()
                if line.startswith("mean |stage error| weighted by the source conveyance: ")]
    assert len(weighted) == 1
    before, after = (float(part.split()[0]) for part in
                     weighted[0].split(": ", 1)[1].split(", "))
    assert weighted[0].endswith("(larger: see the report's remarks)") == (after > before)
    again = runner.invoke(cli, ["-q", "run", str(project)])
    assert again.exit_code == 2  # the bundle exists and --overwrite was not given
    _one_error_line(again)
    verified = runner.invoke(cli, ["verify", str(tmp_path / "job" / "bundle")])
    assert verified.exit_code == 0


@pytest.mark.filterwarnings("ignore::ntrans.errors.DryWetMismatchWarning")
def test_demo_prints_report_and_bundle_then_the_cautions(runner, tmp_path, monkeypatch):
    """The demo command on a small stand-in for data_demo/ (same file names)."""
    from test_project import write_small_project

    import ntrans.demo

    write_small_project(tmp_path / "data_demo")
    monkeypatch.setattr(ntrans.demo, "demo_folder", lambda: tmp_path / "data_demo")
    out = tmp_path / "demo-out"
    result = runner.invoke(cli, ["-q", "demo", "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert f"bundle: {out}" in result.stdout
    assert f"open the report: {out / 'report.html'}" in result.stdout
    lines = [line for line in result.stdout.splitlines() if line.strip()]
    assert lines[-len(CAUTIONS):] == [f"Caution: {c}" for c in CAUTIONS]
    assert (out / "report.html").is_file()
    # run again: the earlier demo bundle is replaced, a folder of other files never is
    again = runner.invoke(cli, ["-q", "demo", "--out", str(out)])
    assert again.exit_code == 0, again.output
    other = tmp_path / "documents"
    other.mkdir()
    (other / "notes.txt").write_text("mine")
    refused = runner.invoke(cli, ["-q", "demo", "--out", str(other)])
    assert refused.exit_code == 2
    assert "does not look like ntrans output" in _one_error_line(refused)
    assert [p.name for p in other.iterdir()] == ["notes.txt"]


def test_verify_notes_the_zip_beside_a_folder(runner, tmp_path):
    folder = _bundle(tmp_path / "b")
    zipped = bundle.write_zip(folder)
    result = runner.invoke(cli, ["verify", str(folder)])
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert lines[1] == f"ok: all 2 files of the bundle folder '{folder}' match its manifest"
    assert lines[2].startswith(f"note: the bundle zip '{zipped}' beside it was not checked")
