"""One exception hierarchy for ntrans.

Every error a user can cause derives from :class:`NtransError` and also from the
matching builtin (``ValueError``, ``OSError``), so callers may catch either.  Messages
are one sentence: what was found, what is allowed, what to do.  The command line turns
any :class:`NtransError` into that sentence on stderr and exit code 2.

Warnings are classes too (:class:`NtransWarning` and subclasses) so users can filter
and tests can assert them.
"""

from __future__ import annotations

import contextlib
import threading
import warnings
from collections.abc import Iterator


class NtransError(Exception):
    """Base class of every error ntrans raises on purpose."""

    exit_code: int = 2


class InputError(NtransError, ValueError):
    """An input (file, option, value) is not usable as given."""


def check_choice(name: str, value: object, allowed: tuple[str, ...]) -> None:
    """Raise :class:`InputError` naming the valid choices when ``value`` is not one."""
    if value not in allowed:
        raise InputError(f"{name} {value!r} is not one of {', '.join(allowed)}; choose one of them")


def closest_name(name: str, candidates: list[str], *, cutoff: float = 0.75) -> str | None:
    """The candidate ``name`` most likely meant, for a "did you mean" hint: equal but for
    case, else the nearest spelling at least ``cutoff`` alike (difflib's ratio); None."""
    import difflib

    folded = {c.casefold(): c for c in candidates}
    if name.casefold() in folded:
        return folded[name.casefold()]
    near = difflib.get_close_matches(name.casefold(), list(folded), n=1, cutoff=cutoff)
    return folded[near[0]] if near else None


class InputFileError(NtransError, OSError):
    """An input file is missing or cannot be read."""


class CRSError(InputError):
    """A coordinate reference system is missing, geographic, or unusable."""


class GeometryError(InputError):
    """A vector layer's geometry is empty, of the wrong type, or inconsistent."""


class StageSpecError(InputError):
    """A stage or depth specification cannot be parsed."""


class RoughnessError(InputError):
    """Roughness classes or n values are missing or invalid."""


class ProjectFileError(InputError):
    """A project file has an unknown key, a wrong type, or a missing value."""


class OutputExistsError(NtransError, FileExistsError):
    """The output folder already exists and ``overwrite`` was not given."""


class OutputError(NtransError, OSError):
    """An output could not be written (or would overwrite an input)."""


class BundleError(NtransError, ValueError):
    """A handover bundle is incomplete or does not match its manifest."""


class NtransWarning(UserWarning):
    """Base class of every warning ntrans emits."""


class GeometryRepairedWarning(NtransWarning):
    """Invalid polygons were repaired before use."""


class MeshGapWarning(NtransWarning):
    """Cell borders meant to be shared lie just beyond the snap tolerance (small gaps or
    overlaps in the mesh), so they count as mesh boundary."""


class PartialCoverageWarning(NtransWarning):
    """Some cells or faces are partly outside the DEM or over nodata."""


class FlatElevationWarning(NtransWarning):
    """Some cells have no flat-bed elevation: the elevation rule found no value for them
    (a centroid over nodata or outside the DEM, an empty elevation field)."""


class RoughnessRangeWarning(NtransWarning):
    """An n value lies outside the published range for its kind of surface."""


class DryWetMismatchWarning(NtransWarning):
    """Items wet in one model family and dry in the other were left out of a fit."""


class ProjectionScaleWarning(NtransWarning):
    """The DEM's projection stretches or shrinks lengths noticeably where the DEM lies."""


class ReprojectionAccuracyWarning(NtransWarning):
    """A layer was reprojected to the DEM's CRS by a datum transformation less accurate
    than half a DEM pixel (or of unknown accuracy), so it may sit beside its terrain."""


class CoarseFaceSpacingWarning(NtransWarning):
    """Face profiles are sampled more coarsely than half a DEM pixel, so they miss terrain
    between their stations (flow areas off by several per cent in shallow water)."""


class DeepWindowWarning(NtransWarning):
    """The calibration window stands implausibly deep above the terrain (e.g. a water
    surface in feet over terrain in metres)."""


class MemoryEstimateWarning(NtransWarning):
    """A job is expected to need more memory than the machine has available."""


# one list per open collect_warnings(), newest last
_collectors: list[list[tuple[type[NtransWarning], str]]] = []
_collectors_lock = threading.Lock()


def warn(message: str, category: type[NtransWarning], *, stacklevel: int = 2) -> None:
    """Emit an ntrans warning: through :func:`warnings.warn` and into every open
    :func:`collect_warnings` list.

    The lists do not depend on the process's warning filters.  Those are one state shared
    by every thread, and libraries change it from several threads at once
    (``warnings.catch_warnings`` is not thread-safe), which can leave warnings ignored;
    a job's cautions reach its report all the same.
    """
    with _collectors_lock:
        for sink in _collectors:
            sink.append((category, str(message)))
    warnings.warn(message, category, stacklevel=stacklevel + 1)


@contextlib.contextmanager
def collect_warnings() -> Iterator[list[tuple[type[NtransWarning], str]]]:
    """A list of (category, message) of the ntrans warnings emitted while it is open."""
    sink: list[tuple[type[NtransWarning], str]] = []
    with _collectors_lock:
        _collectors.append(sink)
    try:
        yield sink
    finally:
        with _collectors_lock:
            for i, other in enumerate(_collectors):
                if other is sink:
                    del _collectors[i]
                    break
