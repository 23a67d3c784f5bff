"""Handover bundle: manifest with hashes, verification, optional zip.

A bundle is one folder holding every output of a run plus ``manifest.json``.  The
manifest records every input (path, SHA-256, size, CRS and units where geospatial),
every parameter, the versions of ntrans and its dependencies, the UTC time of the run,
and every output file with its SHA-256 and size.  :func:`verify_bundle` re-hashes the
folder and lists missing, changed and extra files.

Everything except the ``created_utc`` time stamp is deterministic: two runs of the
same project produce the same output hashes.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import os
import shutil
import sys
import tempfile
import zipfile
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path
from typing import Any

from .errors import BundleError, InputFileError, OutputError, OutputExistsError

logger = logging.getLogger(__name__)

MANIFEST_NAME = "manifest.json"
MANIFEST_FORMAT = "ntrans-bundle/1"

#: Distributions whose versions are recorded in the manifest.
DEPENDENCIES: tuple[str, ...] = (
    "ntrans",
    "numpy",
    "scipy",
    "pandas",
    "pyarrow",
    "shapely",
    "geopandas",
    "pyogrio",
    "rasterio",
    "matplotlib",
    "click",
)

_RASTER_SUFFIXES = {".tif", ".tiff", ".vrt", ".img", ".asc", ".nc"}
_VECTOR_SUFFIXES = {".gpkg", ".shp", ".geojson", ".json", ".fgb", ".gml", ".kml"}
_CHUNK = 1 << 20


def sha256_file(path: str | os.PathLike[str]) -> str:
    """SHA-256 hex digest of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while chunk := handle.read(_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()


def dependency_versions(names: Iterable[str] = DEPENDENCIES) -> dict[str, str]:
    """Installed versions of ``names`` (``"not installed"`` when absent), plus Python and GDAL."""
    versions: dict[str, str] = {"python": sys.version.split()[0]}
    for name in names:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    try:
        import rasterio

        versions["gdal"] = rasterio.__gdal_version__
    except Exception:  # pragma: no cover - rasterio is a hard dependency
        pass
    return versions


def _crs_summary(crs: Any) -> dict[str, Any] | None:
    if crs is None:
        return None
    info: dict[str, Any] = {}
    try:
        epsg = crs.to_epsg()
    except Exception:  # pragma: no cover - defensive, depends on PROJ
        epsg = None
    info["epsg"] = epsg
    try:
        info["wkt"] = crs.to_wkt()
    except Exception:  # pragma: no cover
        info["wkt"] = str(crs)
    try:
        units = crs.linear_units
        info["horizontal_units"] = units
    except Exception:  # pragma: no cover
        pass
    return info


def describe_input(path: str | os.PathLike[str], *, role: str) -> dict[str, Any]:
    """Manifest entry of one input file: path, SHA-256, size and, if geospatial, CRS.

    Rasters also give shape, pixel size and nodata; vector layers the feature count
    and geometry type.  Files that cannot be opened as either keep the hash only.
    """
    p = Path(path)
    if not p.is_file():
        from .inputs import missing_path_hint

        raise InputFileError(f"input {role} {str(p)!r} does not exist{missing_path_hint(p)}; "
                             "check the project file")
    entry: dict[str, Any] = {
        "role": role,
        "path": str(p.resolve()),
        "sha256": sha256_file(p),
        "size": p.stat().st_size,
    }
    suffix = p.suffix.lower()
    if suffix in _RASTER_SUFFIXES:
        try:
            import rasterio

            with rasterio.open(p) as src:
                entry["kind"] = "raster"
                entry["crs"] = _crs_summary(src.crs)
                entry["shape"] = [src.height, src.width]
                entry["pixel_size"] = [abs(src.transform.a), abs(src.transform.e)]
                entry["nodata"] = src.nodata
                entry["dtype"] = src.dtypes[0]
        except Exception as exc:  # noqa: BLE001 - the hash is still worth recording
            logger.debug("could not describe raster %s: %s", p, exc)
    elif suffix in _VECTOR_SUFFIXES:
        try:
            import pyogrio
            from pyproj import CRS

            info = pyogrio.read_info(p)
            entry["kind"] = "vector"
            entry["crs"] = _crs_summary(CRS.from_user_input(info["crs"])) if info["crs"] else None
            entry["features"] = int(info["features"])
            entry["geometry_type"] = info["geometry_type"]
        except Exception as exc:  # noqa: BLE001
            logger.debug("could not describe vector %s: %s", p, exc)
    else:
        entry["kind"] = "table" if suffix in {".csv", ".txt"} else "file"
    return entry


def list_files(folder: str | os.PathLike[str]) -> list[str]:
    """Every file below ``folder`` as a sorted list of POSIX relative paths."""
    root = Path(folder)
    return sorted(p.relative_to(root).as_posix() for p in root.rglob("*") if p.is_file())


def output_entries(folder: str | os.PathLike[str], *, exclude: Iterable[str] = (MANIFEST_NAME,)) -> list[dict[str, Any]]:
    """Manifest entries (path, SHA-256, size) of every file below ``folder``."""
    root = Path(folder)
    skip = set(exclude)
    return [
        {"path": rel, "sha256": sha256_file(root / rel), "size": (root / rel).stat().st_size}
        for rel in list_files(root)
        if rel not in skip
    ]


def write_manifest(
    folder: str | os.PathLike[str],
    *,
    inputs: Iterable[Mapping[str, Any]],
    parameters: Mapping[str, Any],
    units: Mapping[str, Any] | None = None,
    created: datetime | None = None,
    extra: Mapping[str, Any] | None = None,
) -> Path:
    """Write ``manifest.json`` into ``folder`` listing every file already there.

    Parameters
    ----------
    folder
        The bundle folder; every file in it (except the manifest) is hashed.
    inputs
        Entries from :func:`describe_input`.
    parameters
        Every parameter of the run (JSON-serialisable; paths as strings).
    units
        Units of the outputs (horizontal, vertical, Manning constant).
    created
        Time of the run (default: now, UTC).
    """
    root = Path(folder)
    stamp = (created or datetime.now(UTC)).astimezone(UTC)
    manifest: dict[str, Any] = {
        "format": MANIFEST_FORMAT,
        "created_utc": stamp.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "versions": dependency_versions(),
        "parameters": _jsonable(parameters),
        "units": _jsonable(units or {}),
        "inputs": [_jsonable(dict(entry)) for entry in inputs],
        "outputs": output_entries(root),
    }
    if extra:
        manifest.update(_jsonable(dict(extra)))
    manifest[SELF_CHECK_KEY] = _self_check(manifest)
    path = root / MANIFEST_NAME
    path.write_text(json.dumps(manifest, indent=2, sort_keys=False) + "\n", encoding="utf-8")
    return path


#: the manifest's check of itself: SHA-256 of the rest of it as canonical JSON
SELF_CHECK_KEY = "manifest_sha256"


def _self_check(manifest: Mapping[str, Any]) -> str:
    """SHA-256 (hex) of ``manifest`` without its self-check entry, as canonical JSON (keys
    sorted, no spaces, UTF-8): an edit to its parameters, inputs or listed hashes after the
    run changes it.  It tells an edit by hand from the manifest ntrans wrote, not a forgery
    (anyone can recompute it); the manifest file's own hash, recorded with the handover,
    identifies the bundle."""
    rest = {k: v for k, v in manifest.items() if k != SELF_CHECK_KEY}
    text = json.dumps(rest, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _jsonable(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if hasattr(value, "tolist"):  # numpy scalars and arrays
        return value.tolist()
    if isinstance(value, str | int | float | bool) or value is None:
        return value
    return str(value)


def read_manifest(folder: str | os.PathLike[str]) -> dict[str, Any]:
    """Read and minimally check a bundle's ``manifest.json``."""
    path = Path(folder) / MANIFEST_NAME
    if not path.is_file():
        raise BundleError(f"{str(folder)!r} holds no {MANIFEST_NAME}; give the folder that ntrans run wrote")
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise BundleError(f"{str(path)!r} is not readable JSON ({exc}); the bundle is damaged") from exc
    if not isinstance(manifest, dict) or not isinstance(manifest.get("outputs"), list):
        raise BundleError(f"{str(path)!r} has no list of outputs; it is not an ntrans manifest")
    return manifest


@dataclass(frozen=True)
class VerifyResult:
    """Outcome of :func:`verify_bundle`: files missing, changed, or not in the manifest."""

    folder: Path
    checked: int
    missing: tuple[str, ...] = field(default_factory=tuple)
    changed: tuple[str, ...] = field(default_factory=tuple)
    extra: tuple[str, ...] = field(default_factory=tuple)
    #: True when the manifest's own check fails (edited after the run); None when it has
    #: none (written before manifests checked themselves)
    manifest_edited: bool | None = False
    #: SHA-256 of the manifest file itself (empty when not read)
    manifest_sha256: str = ""
    #: what was checked: "folder" or "zip"
    kind: str = "folder"
    #: the other form of the same bundle found beside it (the zip of a folder, the folder
    #: of a zip), which was not checked; None when there is none
    beside: Path | None = None

    @property
    def ok(self) -> bool:
        """True when every listed file is present and unchanged, nothing was added and the
        manifest itself was not edited."""
        return not (self.missing or self.changed or self.extra or self.manifest_edited)

    def lines(self) -> list[str]:
        """One line per difference, e.g. ``changed: report.html``."""
        edited = ([f"changed: {MANIFEST_NAME} (edited after the run: its parameters, inputs "
                   "or listed hashes are not the ones ntrans wrote)"]
                  if self.manifest_edited else [])
        return (
            edited
            + [f"missing: {p}" for p in self.missing]
            + [f"changed: {p}" for p in self.changed]
            + [f"extra: {p}" for p in self.extra]
        )

    def summary(self) -> str:
        """One sentence describing the outcome."""
        what = f"the bundle {self.kind} '{self.folder}'"
        if self.ok:
            return f"all {self.checked} files of {what} match its manifest"
        edited = "the manifest was edited after the run; " if self.manifest_edited else ""
        return (
            f"{what} does not match its manifest: {edited}{len(self.missing)} missing, "
            f"{len(self.changed)} changed, {len(self.extra)} extra file(s) of {self.checked} listed"
        )

    def beside_note(self) -> str | None:
        """A line saying that the other form of the bundle beside it was not checked."""
        if self.beside is None:
            return None
        other = "zip" if self.kind == "folder" else "folder"
        return (f"note: the bundle {other} '{self.beside}' beside it was not checked and may "
                f"differ; check it too with: ntrans verify {self.beside}")

    def raise_for_differences(self) -> None:
        """Raise :class:`BundleError` with :meth:`summary` when anything differs."""
        if not self.ok:
            raise BundleError(self.summary() + "; do not hand it over until it is rebuilt")


def verify_bundle(path: str | os.PathLike[str]) -> VerifyResult:
    """Check a bundle folder (or its zip) against its ``manifest.json``.

    Every listed output is re-hashed (SHA-256).  Returns a :class:`VerifyResult`; call
    ``result.raise_for_differences()`` to turn a mismatch into a :class:`BundleError`.

    Raises
    ------
    BundleError
        When the path holds no readable manifest.
    """
    p = Path(path)
    if p.is_file() and zipfile.is_zipfile(p):
        with tempfile.TemporaryDirectory(prefix="ntrans-verify-") as tmp:
            with zipfile.ZipFile(p) as archive:
                archive.extractall(tmp)
            roots = [d for d in Path(tmp).iterdir()]
            root = roots[0] if len(roots) == 1 and roots[0].is_dir() else Path(tmp)
            folder = p.with_suffix("") if p.suffix.lower() == ".zip" else None
            beside = folder if folder is not None and folder.is_dir() else None
            return dataclasses.replace(_verify_folder(root), folder=p, kind="zip",
                                       beside=beside)
    if not p.is_dir():
        raise BundleError(f"{str(p)!r} is neither a bundle folder nor a bundle zip; check the path")
    beside = zip_path(p)
    return dataclasses.replace(_verify_folder(p),
                               beside=beside if beside.is_file() else None)


def _verify_folder(root: Path) -> VerifyResult:
    manifest = read_manifest(root)
    listed: dict[str, dict[str, Any]] = {}
    for entry in manifest["outputs"]:
        if not isinstance(entry, dict) or "path" not in entry or "sha256" not in entry:
            raise BundleError("the manifest lists an output without path or sha256; it is damaged")
        listed[str(entry["path"])] = entry
    present = set(list_files(root)) - {MANIFEST_NAME}
    missing, changed = [], []
    for rel, entry in sorted(listed.items()):
        target = root / rel
        if not target.is_file():
            missing.append(rel)
        elif target.stat().st_size != entry.get("size", target.stat().st_size) or sha256_file(
            target
        ) != entry["sha256"]:
            changed.append(rel)
    extra = sorted(present - set(listed))
    recorded = manifest.get(SELF_CHECK_KEY)
    edited = None if recorded is None else recorded != _self_check(manifest)
    result = VerifyResult(root, len(listed), tuple(missing), tuple(changed), tuple(extra),
                          manifest_edited=edited,
                          manifest_sha256=sha256_file(root / MANIFEST_NAME))
    logger.debug(result.summary())
    return result


def zip_path(folder: str | os.PathLike[str]) -> Path:
    """Where :func:`write_zip` puts the zip of ``folder``: ``<folder>.zip`` beside it."""
    root = Path(folder)
    return root.with_name(root.name + ".zip")


def check_zip_target(folder: str | os.PathLike[str], *, overwrite: bool) -> None:
    """Refuse, before a run starts, to replace the zip of ``folder`` (:func:`zip_path`)
    without ``overwrite``, or ever when it is not the zip of an ntrans bundle (no
    ``<name>/manifest.json`` inside)."""
    from .outputs import OVERWRITE_SETTING, _replace_refusal

    dest = zip_path(folder)
    if not (dest.exists() or dest.is_symlink()):
        return
    root = Path(folder)
    folder_exists = root.exists() or root.is_symlink()
    refusal = _replace_refusal(root) if folder_exists else None
    if refusal is not None:  # the folder is never replaced: --overwrite would not help
        raise (OutputError if overwrite else OutputExistsError)(refusal)
    try:
        with zipfile.ZipFile(dest) as archive:
            ours = f"{Path(folder).name}/{MANIFEST_NAME}" in archive.namelist()
    except (OSError, zipfile.BadZipFile):
        ours = False
    if not ours:
        error = OutputError if overwrite else OutputExistsError
        raise error(
            f"'{dest}' exists and is not the zip of an ntrans bundle, so it will not be "
            "replaced; choose another output folder or remove it yourself"
        )
    if not overwrite:
        what = (f"bundle folder '{root}' and its zip '{dest}' exist" if folder_exists
                else f"zip '{dest}' exists")
        them = "both" if folder_exists else "it"
        raise OutputExistsError(
            f"{what}; pass --overwrite ({OVERWRITE_SETTING}) to replace {them} or choose "
            "another folder"
        )


def write_zip(folder: str | os.PathLike[str], destination: str | os.PathLike[str] | None = None) -> Path:
    """Zip ``folder`` (entries under the folder's name, fixed dates, sorted) beside it.

    The archive is deterministic apart from the manifest's own time stamp.  It is
    written as ``<zip>.part`` and renamed when complete (removed on any error).
    """
    root = Path(folder)
    dest = Path(destination) if destination is not None else zip_path(root)
    tmp = dest.with_name(dest.name + ".part")
    try:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as archive:
            for rel in list_files(root):
                info = zipfile.ZipInfo(f"{root.name}/{rel}", date_time=(1980, 1, 1, 0, 0, 0))
                info.compress_type = zipfile.ZIP_DEFLATED
                info.external_attr = 0o644 << 16
                with open(root / rel, "rb") as handle:
                    archive.writestr(info, handle.read())
        os.replace(tmp, dest)
    except BaseException:  # KeyboardInterrupt included: no half-written zip is left
        tmp.unlink(missing_ok=True)
        raise
    return dest


def copy_into(src: str | os.PathLike[str], folder: str | os.PathLike[str], name: str | None = None) -> Path:
    """Copy a file into ``folder`` (contents only: no time stamps carried over)."""
    dest = Path(folder) / (name or Path(src).name)
    shutil.copyfile(src, dest)
    return dest
