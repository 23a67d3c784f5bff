"""``ntrans run``: the whole job from a project file, into one handover bundle."""

from __future__ import annotations

from typing import Any

import click

from ntrans.cautions import CAUTIONS
from ntrans.translate import flag_lines

from . import options


def echo_summary(result: Any, *, extra: tuple[str, ...] = ()) -> None:
    """Print the bundle's location, the n per class, ``extra`` lines, and the cautions."""
    click.echo(f"bundle: {result.folder}")
    click.echo(f"report: {result.report}")
    if result.zip is not None:
        click.echo(f"zip:    {result.zip}")
    frame = result.n_by_class
    cols = [c for c in ("class", "n_source", "n_target", "ratio", "flags") if c in frame.columns]
    if cols:
        click.echo("")
        click.echo(frame[cols].to_string(index=False, na_rep="-", float_format=lambda v: f"{v:.4g}"))
    explained = flag_lines(frame["flags"]) if "flags" in frame.columns else []
    if explained:
        click.echo("")
        click.echo("\n".join(explained))
    bias = result.summary.get("stage_bias_unadjusted") or {}
    after = result.summary.get("stage_bias_adjusted") or {}
    if bias.get("median") is not None and after.get("median") is not None:
        unit = {"metre": "m", "foot": "ft"}.get(result.summary.get("units", {}).get("vertical"), "")
        click.echo(
            f"\nmedian stage error: {bias['median']:+.3f} {unit} with n carried over, "
            f"{after['median']:+.3f} {unit} with the adjusted n"
        )
        if bias.get("weighted_mean_abs") is not None and after.get("weighted_mean_abs") is not None:
            worse = after["weighted_mean_abs"] > bias["weighted_mean_abs"]
            click.echo(
                f"mean |stage error| weighted by the source conveyance: "
                f"{bias['weighted_mean_abs']:.3f} {unit} with n carried over, "
                f"{after['weighted_mean_abs']:.3f} {unit} with the adjusted n"
                + (" (larger: see the report's remarks)" if worse else "")
            )
    for line in extra:
        click.echo(line)
    click.echo("")
    for caution in CAUTIONS:
        click.echo(f"Caution: {caution}")


@click.command("run")
@click.argument("project", type=click.Path(dir_okay=False, path_type=str))
@click.option(
    "--overwrite",
    is_flag=True,
    default=None,
    help="Replace the bundle folder (and zip) if it is an earlier ntrans output "
    "(default: the project's outputs.overwrite); a folder of other files is never replaced.",
)
@options.verbosity
@click.pass_context
def command(ctx: click.Context, project: str, overwrite: bool | None) -> None:
    """Run the whole job of PROJECT (a TOML project file): stage tables, n per class,
    maps, plots, report and manifest, written as one bundle folder.

    Create a project file with ``ntrans init``.  Settings such as csv, tile_size,
    threads, workers and scheduler are keys of the project file ([outputs], [run]).
    """
    from ntrans.project import run_project

    quiet = bool(ctx.meta.get("ntrans.quiet", False))
    result = run_project(project, overwrite=overwrite or None, progress=not quiet)
    echo_summary(result)
