"""``ntrans demo``: the whole job on the invented demo scenario."""

from __future__ import annotations

import click

from . import options
from .run import echo_summary


@click.command("demo")
@click.option(
    "--out",
    type=click.Path(file_okay=False, path_type=str),
    default="demo-out",
    show_default=True,
    help="Bundle folder to write (an earlier ntrans output there is replaced; a folder of "
    "other files never is).",
)
@options.verbosity
@click.pass_context
def command(ctx: click.Context, out: str) -> None:
    """Run the whole job on the invented demo river (data_demo/) and print where the
    report is.  The scenario is made up; its numbers describe no real place.
    """
    from ntrans.demo import run_demo_result

    quiet = bool(ctx.meta.get("ntrans.quiet", False))
    result = run_demo_result(out, overwrite=True, progress=not quiet)
    echo_summary(result, extra=("", f"open the report: {result.report}"))
