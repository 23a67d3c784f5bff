"""``ntrans init``: write a commented project-file template."""

from __future__ import annotations

import click

from . import options


@click.command("init")
@click.argument("path", type=click.Path(dir_okay=False, path_type=str), default="project.toml")
@click.option("--overwrite", is_flag=True, default=False, help="Replace PATH if it exists.")
@options.verbosity
def command(path: str, overwrite: bool) -> None:
    """Write a commented project file template to PATH (default: project.toml).

    Edit the paths and options, then run the whole job with ``ntrans run PATH``.
    """
    from ntrans.project import write_project_template

    written = write_project_template(path, overwrite=overwrite)
    click.echo(f"wrote {written}")
    click.echo(f"edit it, then run: ntrans run {written}")
