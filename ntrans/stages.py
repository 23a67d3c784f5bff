"""Stage and depth specifications.

A SPEC is either ``start:stop:step`` (stop included when it lies on the grid, within
1e-9 of a step) or a comma-separated list of numbers.  Values are in the DEM's vertical
units.  ``--stages`` are absolute water-surface elevations; ``--depths`` are heights
above each item's lowest terrain point.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from .errors import StageSpecError

StageMode = Literal["stage", "depth"]


def parse_spec(spec: str | float | list[float] | np.ndarray, what: str = "stage") -> np.ndarray:
    """Parse a SPEC into a sorted float64 array of unique values; ``what`` (``stage`` or
    ``depth``) names the values in error messages.

    >>> parse_spec("0:1:0.5").tolist()
    [0.0, 0.5, 1.0]
    >>> parse_spec("2,1,3").tolist()
    [1.0, 2.0, 3.0]
    """
    if isinstance(spec, int | float | np.floating | np.integer):
        values = np.array([float(spec)])
    elif isinstance(spec, list | tuple | np.ndarray):
        try:
            values = np.asarray(spec, dtype=float).ravel()
        except (TypeError, ValueError) as exc:
            raise StageSpecError(f"{what} list {spec!r} holds a non-number; give numbers only") from exc
    else:
        text = str(spec).strip()
        if not text:
            raise StageSpecError(f"the {what} specification is empty; give start:stop:step or a comma list")
        if ":" in text:
            parts = text.split(":")
            if len(parts) != 3:
                raise StageSpecError(
                    f"{what} range {text!r} needs three parts start:stop:step, e.g. 10:15:0.5"
                )
            try:
                start, stop, step = (float(p) for p in parts)
            except ValueError as exc:
                raise StageSpecError(
                    f"{what} range {text!r} holds a non-number; use numbers like 10:15:0.5"
                ) from exc
            if not step > 0:
                raise StageSpecError(f"{what} range {text!r} needs a positive step")
            if stop < start:
                raise StageSpecError(f"{what} range {text!r} has stop below start; swap them")
            count = int(np.floor((stop - start) / step + 1e-9)) + 1
            if count > 100_000:
                raise StageSpecError(f"{what} range {text!r} gives {count} {what}s; use a coarser step")
            values = start + step * np.arange(count)
        else:
            try:
                values = np.array([float(p) for p in text.split(",") if p.strip()])
            except ValueError as exc:
                raise StageSpecError(
                    f"{what} list {text!r} holds a non-number; use numbers separated by commas"
                ) from exc
    if values.size == 0:
        raise StageSpecError(f"the {what} specification holds no values")
    if not np.all(np.isfinite(values)):
        raise StageSpecError(f"the {what} specification holds a non-finite value")
    return np.unique(values)


@dataclass(frozen=True)
class StageSpec:
    """Stages to evaluate: absolute elevations, or depths above each item's low point."""

    values: np.ndarray
    mode: StageMode = "stage"

    @classmethod
    def from_options(
        cls, *, stages: str | None = None, depths: str | None = None
    ) -> StageSpec:
        """Build from the mutually exclusive ``stages`` / ``depths`` options."""
        if (stages is None) == (depths is None):
            raise StageSpecError("give exactly one of stages or depths")
        if stages is not None:
            return cls(parse_spec(stages), "stage")
        values = parse_spec(depths, "depth")  # type: ignore[arg-type]
        if np.any(values < 0):
            raise StageSpecError("depths must be zero or positive")
        return cls(values, "depth")

    def for_items(self, low_points: np.ndarray) -> np.ndarray:
        """Stage matrix (n_items, n_stages): absolute stages, or low point + depth.

        Items with a NaN low point (no terrain) get NaN stages in depth mode.
        """
        low = np.asarray(low_points, dtype=float)
        if self.mode == "stage":
            return np.broadcast_to(self.values, (low.size, self.values.size)).copy()
        return low[:, None] + self.values[None, :]
