"""``ntrans verify``: check a handover bundle against its manifest."""

from __future__ import annotations

import click

from . import options


@click.command("verify")
@click.argument("bundle", type=click.Path(exists=True, path_type=str))
@options.verbosity
def command(bundle: str) -> None:
    """Re-hash every file of BUNDLE (a folder or its zip) and compare with manifest.json.

    Lists missing, changed and extra files, checks that the manifest itself was not
    edited after the run, and prints the manifest's own SHA-256; exits with code 2 when
    anything differs.
    """
    from ntrans.bundle import verify_bundle

    result = verify_bundle(bundle)
    for line in result.lines():
        click.echo(line)
    if result.manifest_edited is None:
        click.echo("note: this manifest predates its own check; edits to it cannot be detected")
    click.echo(f"manifest.json sha256: {result.manifest_sha256} (record it with the handover "
               "to recognise this exact bundle later)")
    note = result.beside_note()
    if result.ok:
        click.echo(f"ok: {result.summary()}")
        if note:
            click.echo(note)
        return
    if note:
        click.echo(note)
    result.raise_for_differences()
