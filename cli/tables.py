"""``ntrans tables``: cell and face stage tables from a DEM and mesh cells."""

from __future__ import annotations

import click

from ntrans.cautions import CAUTIONS_TEXT

from . import options


@click.command("tables")
@options.tables_options
@click.option(
    "--faces/--no-faces",
    default=True,
    show_default=True,
    help="Also build the face tables (face_stage.parquet, faces.gpkg).",
)
@options.verbosity
@click.pass_context
def command(ctx: click.Context, **kwargs) -> None:
    """Cell stage tables (wet area, volume, wetted bed area, hydraulic radius) and face
    stage tables (flow area, wetted perimeter, top width, geometric conveyance), for the
    subgrid terrain and for flat beds, at the given stages or depths.

    Lengths are in the CRS's horizontal units, elevations in the DEM's vertical units;
    conveyance is in horizontal units cubed per second at n = 1.
    """
    from ntrans.tables import build_tables

    options.check_stages_or_depths(kwargs["stages"], kwargs["depths"])
    quiet = bool(ctx.meta.get("ntrans.quiet", False))
    result = build_tables(
        kwargs.pop("dem"),
        kwargs.pop("cells"),
        progress=not quiet,
        **kwargs,
    )
    click.echo(f"wrote {result.out}")
    for path in result.files:
        click.echo(f"  {path}")
    click.echo(
        f"{result.n_cells} cells, {result.n_faces} faces, {result.n_stages} stages, "
        f"{result.n_tiles} tiles"
    )
    click.echo(f"Caution: {CAUTIONS_TEXT}")
