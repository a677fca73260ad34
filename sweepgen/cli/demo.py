"""``sweepgen demo [DIR]``: the whole job on built-in data."""

from __future__ import annotations

import click

from sweepgen.cli._common import OutputFolder, handles_errors


@click.command(short_help="Run the whole job on built-in data.")
@click.argument("directory", required=False, default="sweepgen-demo", type=OutputFolder())
@handles_errors
def command(directory):
    """Run the whole job on a built-in scenario and write a short report into
    DIRECTORY (default ./sweepgen-demo/): plan the sweep, check it against the
    laser and generator, simulate the atoms, export the sample table with its
    sidecar, upload it to an in-process virtual instrument over a loopback
    socket and verify it (the output stays off). No network, no hardware.

    \b
    Example:
      sweepgen demo first-look
    """
    from sweepgen.demo import run

    result = run(directory, echo=click.echo)
    click.echo(f"report written in {result.seconds:.1f} s to {result.directory}/:")
    width = max(len(k) for k in result.files)
    for label, path in result.files.items():
        click.echo(f"  {label.ljust(width)}  {path}")
    if not result.ok:
        raise SystemExit(1)
