"""``ntrans adjust``: equivalent Manning's n per roughness class for the target model family."""

from __future__ import annotations

import click

from . import options


@click.command("adjust")
@options.tables_options
@click.option(
    "--water-surface",
    "water_surface",
    multiple=True,
    type=click.Path(dir_okay=False, path_type=str),
    metavar="RASTER",
    help="Water-surface elevation raster exported from the calibrated source model "
    "(vertical units); repeat for several events.  Each face is evaluated at the raster's "
    "mean along its line (by length), each cell at its mean over the cell (by area).  "
    "Instead of --stages / --depths.",
)
@click.option("--n", "n", default=None, metavar="VALUE",
              help="One Manning's n for the whole mesh (s/m^(1/3) or its US equivalent).")
@click.option("--classes", default=None, type=click.Path(dir_okay=False, path_type=str),
              metavar="PATH", help="Roughness class polygons (GeoPackage, Shapefile, ...).")
@click.option("--classes-layer", default=None, metavar="NAME",
              help="Layer of --classes to read, when the file holds several.")
@click.option("--class-field", default=None, metavar="NAME",
              help="Attribute of --classes holding the class name (with --n-table).")
@click.option("--n-table", default=None, type=click.Path(dir_okay=False, path_type=str),
              metavar="CSV", help="CSV with columns class,n and optional surface (a kind of "
              "Chow 1959 Table 5-6, e.g. channel_clean, pasture_short_grass).")
@click.option("--n-field", default=None, metavar="NAME",
              help="Attribute of --classes holding each polygon's n (instead of a table).")
@click.option("--class-raster", default=None, type=click.Path(dir_okay=False, path_type=str),
              metavar="PATH", help="Integer class raster (with --n-table); resampled nearest.")
@click.option("--default-class", default=None, metavar="NAME",
              help="Class (or n with --n-field) for ground no class covers.")
@click.option("--overlap-rule", type=click.Choice(["error", "first", "last", "max_n"]),
              default="error", show_default=True,
              help="What to do where class polygons overlap.")
@click.option("--from", "source", type=click.Choice(["flat", "subgrid"]), default="flat",
              show_default=True, help="Model family the n values were calibrated in.")
@click.option("--to", "target", type=click.Choice(["flat", "subgrid"]), default="subgrid",
              show_default=True, help="Model family the n values are for.")
@click.option("--closure", type=click.Choice(["lumped", "strip", "cell"]), default="lumped",
              show_default=True,
              help="Friction closure of the subgrid side (the target's when both are "
              "subgrid): lumped hydraulic radius A/P on faces, strips (divided conveyance) "
              "along faces, or per cell.")
@click.option("--source-closure", type=click.Choice(["lumped", "strip", "cell"]), default=None,
              help="Closure of the source when both sides are subgrid (default lumped).")
@click.option("--composite", type=click.Choice(["horton_einstein", "pavlovskii", "lotter"]),
              default="horton_einstein", show_default=True,
              help="Composite n along a face with several classes.")
@options.verbosity
@click.pass_context
def command(ctx: click.Context, **kwargs) -> None:
    """Fit one Manning's n per roughness class so the target model family carries the
    source model's conveyance over the calibration window, and report the stage bias of
    carrying n over unchanged.

    Lengths are in the CRS's horizontal units, stages and stage bias in the DEM's
    vertical units; face conveyance in horizontal units cubed per second.
    """
    from ntrans.adjust import adjust_roughness

    windows = sum(v is not None and v != () for v in
                  (kwargs["stages"], kwargs["depths"], kwargs["water_surface"]))
    if windows != 1:
        raise click.UsageError("give exactly one of --stages, --depths and --water-surface")
    kwargs["water_surface"] = list(kwargs["water_surface"]) or None
    quiet = bool(ctx.meta.get("ntrans.quiet", False))
    result = adjust_roughness(kwargs.pop("dem"), kwargs.pop("cells"), progress=not quiet, **kwargs)
    click.echo(result.text)
    click.echo(f"wrote {result.out}")
