"""Tests of ntrans.bundle: manifest hashes, verification, zip."""

from __future__ import annotations

import hashlib
import json
import zipfile
from pathlib import Path

import numpy as np
import pytest
from conftest import write_dem

from ntrans import bundle
from ntrans.errors import BundleError, InputFileError, OutputError, OutputExistsError


def _make_bundle(folder: Path) -> Path:
    (folder / "tables").mkdir(parents=True)
    (folder / "tables" / "a.csv").write_text("x,y\n1,2\n", encoding="utf-8")
    (folder / "report.html").write_text("<html></html>\n", encoding="utf-8")
    (folder / "n_by_class.csv").write_bytes(b"class,n_source\ngrass,0.03\n")
    bundle.write_manifest(folder, inputs=[], parameters={"window": {"depths": "0:1:0.5"}})
    return folder


def test_manifest_lists_every_output_with_its_sha256(tmp_path):
    folder = _make_bundle(tmp_path / "b")
    manifest = json.loads((folder / "manifest.json").read_text())
    listed = {e["path"]: e for e in manifest["outputs"]}
    assert sorted(listed) == ["n_by_class.csv", "report.html", "tables/a.csv"]
    for rel, entry in listed.items():
        data = (folder / rel).read_bytes()
        assert entry["sha256"] == hashlib.sha256(data).hexdigest()  # independent hash
        assert entry["size"] == len(data)
    assert manifest["parameters"] == {"window": {"depths": "0:1:0.5"}}
    assert manifest["versions"]["numpy"] == np.__version__
    assert manifest["created_utc"].endswith("Z")
    assert "manifest.json" not in listed


def test_verify_passes_on_an_untouched_bundle(tmp_path):
    folder = _make_bundle(tmp_path / "b")
    result = bundle.verify_bundle(folder)
    assert result.ok
    assert result.checked == 3
    assert result.lines() == []
    result.raise_for_differences()  # nothing to raise


@pytest.mark.parametrize(
    ("change", "kind", "name"),
    [
        ("edit", "changed", "report.html"),
        ("delete", "missing", "tables/a.csv"),
        ("add", "extra", "notes.txt"),
        ("same_size_edit", "changed", "n_by_class.csv"),
    ],
)
def test_verify_detects_edited_missing_and_extra_files(tmp_path, change, kind, name):
    folder = _make_bundle(tmp_path / "b")
    target = folder / name
    if change == "edit":
        target.write_text("<html>edited</html>\n", encoding="utf-8")
    elif change == "delete":
        target.unlink()
    elif change == "add":
        target.write_text("added later\n", encoding="utf-8")
    else:  # flip one byte, size unchanged: only the hash can see it
        data = bytearray(target.read_bytes())
        data[-2] = ord("4")
        target.write_bytes(bytes(data))
    result = bundle.verify_bundle(folder)
    assert not result.ok
    assert getattr(result, kind) == (name,)
    assert result.lines() == [f"{kind}: {name}"]
    with pytest.raises(BundleError):
        result.raise_for_differences()


@pytest.mark.parametrize("edit", [
    lambda m: m["parameters"]["window"].update(depths="0:2:0.5"),  # a parameter
    lambda m: m["outputs"][0].update(sha256="0" * 64),  # a listed hash
    lambda m: m.update(created_utc="2020-01-01T00:00:00Z"),  # the time of the run
])
def test_verify_detects_an_edited_manifest(tmp_path, edit):
    """The manifest checks itself: an edit by hand to what it records (rewritten as valid
    JSON, every output file untouched) makes the bundle fail verification."""
    folder = _make_bundle(tmp_path / "b")
    path = folder / "manifest.json"
    manifest = json.loads(path.read_text())
    edit(manifest)
    path.write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
    result = bundle.verify_bundle(folder)
    assert result.manifest_edited and not result.ok
    assert result.lines()[0].startswith("changed: manifest.json (edited after the run")
    with pytest.raises(BundleError, match="manifest was edited"):
        result.raise_for_differences()


def test_manifest_check_survives_rewriting_and_reports_the_file_hash(tmp_path):
    # the check is of the content, not the layout: the same JSON re-indented still passes;
    # the file's own SHA-256 is reported (independent hash)
    folder = _make_bundle(tmp_path / "b")
    path = folder / "manifest.json"
    path.write_text(json.dumps(json.loads(path.read_text()), indent=4), encoding="utf-8")
    result = bundle.verify_bundle(folder)
    assert result.ok and result.manifest_edited is False
    assert result.manifest_sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def test_a_manifest_without_its_check_still_verifies(tmp_path):
    # bundles written before manifests checked themselves: their files are still checked
    folder = _make_bundle(tmp_path / "b")
    path = folder / "manifest.json"
    manifest = json.loads(path.read_text())
    del manifest[bundle.SELF_CHECK_KEY]
    path.write_text(json.dumps(manifest), encoding="utf-8")
    result = bundle.verify_bundle(folder)
    assert result.ok and result.manifest_edited is None


def test_verify_without_manifest_is_a_bundle_error(tmp_path):
    (tmp_path / "x").mkdir()
    with pytest.raises(BundleError):
        bundle.verify_bundle(tmp_path / "x")
    with pytest.raises(BundleError):
        bundle.verify_bundle(tmp_path / "nothing-here")


def test_damaged_manifest_is_a_bundle_error(tmp_path):
    folder = _make_bundle(tmp_path / "b")
    (folder / "manifest.json").write_text("{not json", encoding="utf-8")
    with pytest.raises(BundleError):
        bundle.verify_bundle(folder)


def test_zip_is_verifiable_and_deterministic(tmp_path):
    folder = _make_bundle(tmp_path / "b")
    first = bundle.write_zip(folder, tmp_path / "one.zip")
    second = bundle.write_zip(folder, tmp_path / "two.zip")
    assert first.read_bytes() == second.read_bytes()  # fixed dates, sorted entries
    with zipfile.ZipFile(first) as archive:
        names = archive.namelist()
    assert names == sorted(names)
    assert "b/manifest.json" in names
    assert bundle.verify_bundle(first).ok


def test_zip_target_replaced_only_when_it_is_a_bundle_zip_and_overwrite(tmp_path):
    folder = _make_bundle(tmp_path / "b")
    bundle.check_zip_target(folder, overwrite=False)  # no zip yet: nothing to refuse
    ours = bundle.write_zip(folder)
    assert ours == bundle.zip_path(folder) == tmp_path / "b.zip"
    with pytest.raises(OutputExistsError, match="--overwrite"):
        bundle.check_zip_target(folder, overwrite=False)
    bundle.check_zip_target(folder, overwrite=True)
    ours.write_bytes(b"someone's archive")  # not a zip of this bundle: never replaced
    for overwrite, error in ((False, OutputExistsError), (True, OutputError)):
        with pytest.raises(error, match="not the zip of an ntrans bundle"):
            bundle.check_zip_target(folder, overwrite=overwrite)
    assert ours.read_bytes() == b"someone's archive"


def test_zip_target_message_names_the_folder_too_when_both_exist(tmp_path):
    folder = _make_bundle(tmp_path / "b")
    zipped = bundle.write_zip(folder)
    with pytest.raises(OutputExistsError) as err:
        bundle.check_zip_target(folder, overwrite=False)
    text = str(err.value)
    assert f"bundle folder '{folder}' and its zip '{zipped}' exist" in text
    assert "pass --overwrite (overwrite = true in a project file" in text
    # a folder that is never replaced is said first: --overwrite would not help
    other = tmp_path / "c"
    other.mkdir()
    (other / "notes.txt").write_text("mine")
    zipped.rename(bundle.zip_path(other))
    with pytest.raises(OutputExistsError, match="does not look like ntrans output"):
        bundle.check_zip_target(other, overwrite=False)


@pytest.mark.parametrize("given", ["folder", "zip"])
def test_verify_names_what_it_checked_and_the_other_form_beside_it(tmp_path, given):
    folder = _make_bundle(tmp_path / "b")
    zipped = bundle.write_zip(folder)
    checked, other = (folder, zipped) if given == "folder" else (zipped, folder)
    result = bundle.verify_bundle(checked)
    assert result.ok and result.kind == given and result.beside == other
    assert f"the bundle {given} '{checked}'" in result.summary()
    assert f"ntrans verify {other}" in result.beside_note()
    other_kind = "zip" if given == "folder" else "folder"
    assert f"the bundle {other_kind} '{other}' beside it was not checked" in result.beside_note()
    # alone, nothing is noted
    if given == "folder":
        zipped.unlink()
    else:
        for path in sorted(folder.rglob("*"), reverse=True):
            path.rmdir() if path.is_dir() else path.unlink()
        folder.rmdir()
    alone = bundle.verify_bundle(checked)
    assert alone.beside is None and alone.beside_note() is None


def test_interrupted_zip_leaves_no_part_file(tmp_path, monkeypatch):
    folder = _make_bundle(tmp_path / "b")

    def interrupted(root):
        raise KeyboardInterrupt

    monkeypatch.setattr(bundle, "list_files", interrupted)
    with pytest.raises(KeyboardInterrupt):
        bundle.write_zip(folder)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b"]


def test_describe_input_records_crs_and_hash(tmp_path):
    dem = write_dem(tmp_path / "dem.tif", np.arange(12.0).reshape(3, 4), pixel_size=2.0)
    entry = bundle.describe_input(dem, role="dem")
    assert entry["sha256"] == hashlib.sha256(dem.read_bytes()).hexdigest()
    assert entry["size"] == dem.stat().st_size
    assert entry["kind"] == "raster"
    assert entry["crs"]["epsg"] == 32633
    assert entry["crs"]["horizontal_units"] == "metre"
    assert entry["shape"] == [3, 4]
    assert entry["pixel_size"] == [2.0, 2.0]
    csv = tmp_path / "n.csv"
    csv.write_text("class,n\na,0.03\n", encoding="utf-8")
    assert bundle.describe_input(csv, role="n_table")["kind"] == "table"
    with pytest.raises(InputFileError):
        bundle.describe_input(tmp_path / "absent.tif", role="dem")
