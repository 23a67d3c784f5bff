"""Figures of the handover bundle (matplotlib Agg, PNG with fixed metadata).

- :func:`plot_class_ratios`: per roughness class, n ratio (target / source) against depth
  or stage: median line and 10-90 % band across faces;
- :func:`plot_stage_bias`: histograms of the stage bias with n carried over unchanged and
  with the adjusted n;
- :func:`plot_cell_curves`: for a few representative cells, stage-volume and
  hydraulic-radius curves of the subgrid terrain against the flat bed.

Each function takes the figures to draw (summaries, not the rows: those are computed in
memory by :func:`ratio_bands` / :func:`stage_bias_histogram`, or in passes over a table
by :mod:`ntrans.summaries`), writes one PNG and returns its path.  Colours come from
the Okabe-Ito palette, which stays distinguishable for the common colour-vision
deficiencies.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .maps import PNG_DPI, PNG_METADATA

#: Okabe & Ito (2008) colour-blind-safe qualitative palette.
PALETTE: tuple[str, ...] = (
    "#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442", "#000000",
)
MAX_CLASS_PANELS = 12


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def _save(fig: Any, path: str | os.PathLike[str]) -> Path:
    plt = _pyplot()
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(p, format="png", metadata=PNG_METADATA)
    plt.close(fig)
    return p


def _layout(fig: Any, nrows: int) -> None:
    """Fixed margins in inches (no automatic layout pass: faster, identical every run)."""
    width, height = fig.get_size_inches()
    fig.subplots_adjust(
        left=0.75 / width, right=1.0 - 0.2 / width, bottom=0.6 / height,
        top=1.0 - 0.6 / height, wspace=0.3, hspace=0.4 if nrows > 1 else 0.2,
    )


def ratio_bands(
    frame: pd.DataFrame, *, x: str, value: str = "n_ratio", by: str = "class", max_levels: int = 20
) -> pd.DataFrame:
    """Median and 10 / 90 % quantiles of ``value`` per (``by``, ``x``), NaN ignored.

    When ``x`` takes more than ``max_levels`` distinct values it is binned into
    ``max_levels`` equal bins (labelled by their centres).

    Returns columns ``by, x, p10, p50, p90, count`` sorted by (``by``, ``x``).
    """
    vals = frame[[by, x, value]]
    vals = vals[np.isfinite(vals[value].to_numpy(dtype=float))]
    depth = vals[x].to_numpy(dtype=float)
    if np.unique(depth).size > max_levels:
        # each item at its own stage (e.g. a water-surface window): bin the x axis so
        # every point of the band summarises many items, labelled by the bin centre
        edges = np.linspace(np.nanmin(depth), np.nanmax(depth), max_levels + 1)
        which = np.clip(np.searchsorted(edges, depth, side="right") - 1, 0, max_levels - 1)
        vals = vals.assign(**{x: 0.5 * (edges[which] + edges[which + 1])})
    grouped = vals.groupby([by, x], sort=True)[value]
    out = pd.DataFrame(
        {
            "p10": grouped.quantile(0.10),
            "p50": grouped.median(),
            "p90": grouped.quantile(0.90),
            "count": grouped.size(),
        }
    ).reset_index()
    return out


def plot_class_ratios(
    path: str | os.PathLike[str],
    bands: pd.DataFrame,
    *,
    x: str = "depth",
    x_label: str = "depth above the face's low point (m)",
    by: str = "class",
    item: str = "face",
) -> Path:
    """Per class, n ratio against depth (or stage): median line and 10-90 % band.

    Parameters
    ----------
    bands
        Columns ``by`` (class), ``x`` (depth or stage, in vertical units), ``p10, p50,
        p90`` (dimensionless ratios), sorted by (``by``, ``x``): :func:`ratio_bands` of the
        rows, or :func:`ntrans.summaries.class_ratio_bands` of a table too large to read.
    """
    plt = _pyplot()
    classes = list(dict.fromkeys(bands[by].tolist()))[:MAX_CLASS_PANELS] or ["(none)"]
    ncols = min(3, len(classes))
    nrows = math.ceil(len(classes) / ncols)
    fig, axes = plt.subplots(nrows, ncols, figsize=(3.4 * ncols + 0.6, 2.8 * nrows + 0.8),
                             dpi=PNG_DPI, sharex=True, sharey=True, squeeze=False)
    for i, ax in enumerate(axes.ravel()):
        if i >= len(classes):
            ax.set_visible(False)
            continue
        name = classes[i]
        part = bands[bands[by] == name]
        part = part[np.isfinite(part["p50"].to_numpy(dtype=float))]  # depths with a ratio
        colour = PALETTE[i % len(PALETTE)]
        if len(part):
            ax.fill_between(part[x], part["p10"], part["p90"], color=colour, alpha=0.25,
                            linewidth=0, label=f"10-90 % of {item}s")
            # a line needs two points: a class wet at one depth only shows as a dot
            ax.plot(part[x], part["p50"], color=colour, linewidth=2, label="median",
                    marker="o" if len(part) == 1 else None, markersize=4)
            if len(part) == 1:
                ax.vlines(part[x], part["p10"], part["p90"], color=colour, alpha=0.5)
        else:  # say why the panel is empty rather than leave it blank
            ax.text(0.5, 0.5, f"no ratio: no {item} of this class\nis wet in both families",
                    transform=ax.transAxes, ha="center", va="center", fontsize=8, color="0.35")
        ax.axhline(1.0, color="0.4", linewidth=0.8, linestyle="--")
        ax.set_title(str(name), fontsize=9)
        ax.grid(True, linewidth=0.3, alpha=0.6)
        if i % ncols == 0:
            ax.set_ylabel("n target / n source")
        if i >= len(classes) - ncols:
            ax.set_xlabel(x_label, fontsize=8)
            ax.xaxis.set_tick_params(labelbottom=True)
    finite = bands[["p10", "p90"]].to_numpy(dtype=float)
    finite = finite[np.isfinite(finite)]
    if finite.size and finite.min() > 0:  # ratios multiply: show them on a log axis
        axes[0, 0].set_yscale("log")
    axes[0, 0].legend(fontsize=7, loc="best")
    fig.suptitle("How the needed n changes with water level, per roughness class", fontsize=11)
    _layout(fig, nrows)
    return _save(fig, path)


@dataclass(frozen=True)
class StageBiasHistogram:
    """Histograms of the stage bias on shared bins (vertical units): ``before`` with n
    carried over unchanged, ``after`` with the adjusted n; counts per bin (values
    outside the edges in the end bins), medians and counts of the finite values."""

    edges: np.ndarray
    before: np.ndarray
    after: np.ndarray
    median_before: float
    median_after: float
    count_before: int
    count_after: int


def stage_bias_histogram(before: np.ndarray, after: np.ndarray, *, bins: int = 40,
                         ) -> StageBiasHistogram:
    """:class:`StageBiasHistogram` of two arrays (NaN ignored): ``bins`` equal bins
    symmetric about 0, out to the larger |value| of the 0.5 and 99.5 % quantiles of
    both together (at least 1e-6)."""
    b = np.asarray(before, dtype=float)
    a = np.asarray(after, dtype=float)
    b, a = b[np.isfinite(b)], a[np.isfinite(a)]
    both = np.concatenate([b, a])
    if both.size:
        lo, hi = float(np.percentile(both, 0.5)), float(np.percentile(both, 99.5))
        bound = max(abs(lo), abs(hi), 1e-6)
        edges = np.linspace(-bound, bound, bins + 1)
    else:
        edges = np.linspace(-1.0, 1.0, bins + 1)

    def counts(data: np.ndarray) -> np.ndarray:
        return np.histogram(np.clip(data, edges[0], edges[-1]), bins=edges)[0]

    def median(data: np.ndarray) -> float:
        return float(np.median(data)) if data.size else float("nan")

    return StageBiasHistogram(edges, counts(b), counts(a), median(b), median(a),
                              int(b.size), int(a.size))


def plot_stage_bias(
    path: str | os.PathLike[str],
    histogram: StageBiasHistogram,
    *,
    unit: str = "m",
    item: str = "face",
) -> Path:
    """Histograms of the stage bias (target minus source stage, vertical units), with n
    carried over unchanged and with the adjusted n, on one set of bins so their spreads
    compare directly (:func:`stage_bias_histogram`, or
    :func:`ntrans.summaries.stage_bias_figures` of a table too large to read)."""
    plt = _pyplot()
    h = histogram
    fig, axes = plt.subplots(2, 1, figsize=(7.0, 5.2), dpi=PNG_DPI, sharex=True)
    for ax, counts, median, size, colour, name in (
        (axes[0], h.before, h.median_before, h.count_before, PALETTE[1],
         "n carried over unchanged"),
        (axes[1], h.after, h.median_after, h.count_after, PALETTE[0], "adjusted n"),
    ):
        ax.hist(h.edges[:-1], bins=h.edges, weights=np.asarray(counts, dtype=float),
                color=colour, alpha=0.85)
        ax.axvline(0.0, color="black", linewidth=0.8)
        ax.set_title(f"{name}: median {median:+.3f} {unit}, {size} {item}-stages", fontsize=9)
        ax.set_ylabel(f"{item}-stages")
        ax.grid(True, linewidth=0.3, alpha=0.6)
    axes[1].set_xlabel(f"stage in the target minus stage in the source ({unit})")
    fig.suptitle("Stage error at equal conveyance, before and after adjustment", fontsize=11)
    _layout(fig, 2)
    return _save(fig, path)


def representative_cells(factor: pd.Series) -> dict[str, Any]:
    """Cell ids with the largest, the median and the smallest friction factor.

    Returns an ordered dict label -> cell id (fewer entries when cells coincide).
    """
    f = factor[np.isfinite(factor.to_numpy(dtype=float))].sort_values(kind="mergesort")
    if f.empty:
        return {}
    picks = {
        "largest bed factor": f.index[-1],
        "median bed factor": f.index[(len(f) - 1) // 2],
        "smallest bed factor": f.index[0],
    }
    seen: set[Any] = set()
    out: dict[str, Any] = {}
    for label, cell in picks.items():
        if cell not in seen:
            out[label] = cell
            seen.add(cell)
    return out


def plot_cell_curves(
    path: str | os.PathLike[str],
    curves: Mapping[str, pd.DataFrame],
    *,
    length_unit: str = "m",
    vertical_unit: str = "m",
) -> Path:
    """Stage-volume and hydraulic-radius curves, terrain against flat bed, per cell.

    Parameters
    ----------
    curves
        Label -> rows per stage with columns ``stage, volume, flat_volume,
        hydraulic_radius, flat_hydraulic_radius`` (volume in horizontal units squared
        times vertical units; radius in vertical units).
    """
    plt = _pyplot()
    labels = list(curves) or ["(no cells)"]
    volume_unit = (
        f"{length_unit}³" if length_unit == vertical_unit else f"{length_unit}² {vertical_unit}"
    )
    ncols = len(labels)
    fig, axes = plt.subplots(2, ncols, figsize=(3.6 * ncols + 0.6, 6.4), dpi=PNG_DPI,
                             squeeze=False)
    for j, label in enumerate(labels):
        top, bottom = axes[0, j], axes[1, j]
        frame = curves.get(label)
        if frame is not None and not frame.empty:
            frame = frame.sort_values("stage", kind="mergesort")
            top.plot(frame["volume"], frame["stage"], color=PALETTE[0], linewidth=2,
                     label="subgrid terrain")
            top.plot(frame["flat_volume"], frame["stage"], color=PALETTE[1], linewidth=2,
                     linestyle="--", label="flat bed")
            bottom.plot(frame["stage"], frame["hydraulic_radius"], color=PALETTE[0],
                        linewidth=2, label="terrain: V / bed area")
            bottom.plot(frame["stage"], frame["flat_hydraulic_radius"], color=PALETTE[1],
                        linewidth=2, linestyle="--", label="flat bed: depth")
        top.set_title(str(label), fontsize=9)
        top.set_xlabel(f"volume ({volume_unit})", fontsize=8)
        top.set_ylabel(f"stage ({vertical_unit})", fontsize=8)
        bottom.set_xlabel(f"stage ({vertical_unit})", fontsize=8)
        bottom.set_ylabel(f"hydraulic radius ({vertical_unit})", fontsize=8)
        for ax in (top, bottom):
            ax.grid(True, linewidth=0.3, alpha=0.6)
            ax.tick_params(labelsize=7)
        if j == 0:
            top.legend(fontsize=7)
            bottom.legend(fontsize=7)
    fig.suptitle("Storage and hydraulic radius of representative cells", fontsize=11)
    _layout(fig, 2)
    return _save(fig, path)
