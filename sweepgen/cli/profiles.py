"""``sweepgen profiles``: what is built in."""

from __future__ import annotations

import click

from sweepgen.cli._common import emit_json, handles_errors, json_option, table


@click.command(short_help="List the built-in profiles.")
@json_option
@handles_errors
def command(as_json):
    """List the built-in species, lasers, generators and scenarios.

    Any of these keys can be used where a file names a profile; a path to your
    own TOML file works everywhere too.

    \b
    Example:
      sweepgen profiles --json
    """
    from sweepgen import catalog

    listing = {}
    for kind in catalog.KINDS:
        folder = catalog.builtin_dir(kind)
        listing[kind] = [{"key": key, "title": catalog.title_of(folder.joinpath(f"{key}.toml"))}
                         for key in catalog.builtin_keys(kind)]
    if as_json:
        emit_json(listing)
        return
    for kind, items in listing.items():
        click.echo(f"{kind}:")
        click.echo(table([("  " + it["key"], it["title"]) for it in items]) or "  (none)")
