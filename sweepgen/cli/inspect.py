"""``sweepgen inspect TABLE``: read a table back, verify it and print its numbers."""

from __future__ import annotations

import click

from sweepgen._format import si
from sweepgen.cli._common import PlotFile, emit_json, handles_errors, json_option, table

ROWS = [
    ("start_detuning", "start detuning", "Hz"),
    ("end_detuning", "end detuning", "Hz"),
    ("chirp_span", "chirp span", "Hz"),
    ("chirp_rate_max", "largest chirp rate", "Hz/s"),
    ("chirp_rate_mean", "mean chirp rate", "Hz/s"),
    ("chirp_duration", "chirp duration", "s"),
    ("chirp_start", "chirp start after trigger", "s"),
    ("return_duration", "return duration", "s"),
    ("return_rate_max", "largest return rate", "Hz/s"),
    ("sample_rate", "sample rate", "Sa/s"),
    ("period", "period", "s"),
]


@click.command(short_help="Read a table back, verify it and print its numbers.")
@click.argument("table_file", metavar="TABLE", type=click.Path(dir_okay=False))
@json_option
@click.option("--plot", "plot_file", type=PlotFile(), default=None, metavar="FILE",
              help="Also draw detuning (a gate's or marker's table: level) and drive versus time after the "
                   "trigger (PNG or SVG by extension).")
@handles_errors
def command(table_file, as_json, plot_file):
    """Read TABLE (a data file written by 'sweepgen export' with any installed
    driver, or its JSON sidecar; an HDF5 table needs no sidecar), verify its
    size and SHA-256 and the digest of its codes against the sidecar, decode it
    to drive and detuning versus time after the trigger, and print the sweep's
    numbers; for a gate's or a marker's table, its levels and the windows where
    it is on.

    Exit status: 0 when the table verifies, 1 when it does not match its
    sidecar, 2 for bad input.

    \b
    Example:
      sweepgen inspect tables/sweep.bin
      sweepgen inspect tables/sweep.h5 --plot sweep.png --json
    """
    import sweepgen

    result = sweepgen.inspect(table_file)
    doc = result.to_json()
    if plot_file:
        result.plot(plot_file)
    if as_json:
        emit_json(doc)
    else:
        _print(doc)
        if plot_file:
            click.echo(f"plot: {plot_file}", err=True)
    if not result.ok:
        raise SystemExit(1)


def _level_rows(doc) -> list:
    """The rows of a gate's or a marker's table: its channel, levels, windows on, delay."""
    ch = doc["channel"]
    rows = [("channel", f"{ch.get('name')} ({ch.get('kind')}) on output {ch.get('output')}"),
            ("levels", "—" if doc["levels"] is None else ", ".join(f"{v:.4g}" for v in doc["levels"]))]
    for w in doc["windows"]:
        rows.append(("on", f"{si(w['start'], 's')} to {si(w['end'], 's')} after trigger "
                           f"({si(w['duration'], 's')}) at level {w['level']:.4g}"))
    if doc["window_count"] > len(doc["windows"]):
        rows.append(("", f"... {doc['window_count']} windows in all"))
    if not doc["windows"]:
        rows.append(("on", "never (level 0 throughout)"))
    return rows + [("first sample after trigger", si(doc["delay"], "s")),
                   ("sample rate", si(doc["sample_rate"], "Sa/s")), ("period", si(doc.get("period"), "s"))]


def _print(doc):
    click.echo(f"{doc['file']}  [{doc['driver']}, written {doc['created'] or 'at an unknown time'}]")
    if doc.get("quantity") == "level":
        rows = _level_rows(doc)
    else:
        rows = [(label, si(doc.get(key), unit)) for key, label, unit in ROWS if doc.get(key) is not None]
    unit = doc["drive_unit"]
    rows.append(("samples", f"{doc['count']} ({doc['period_count']} per period)"))
    rows.append(("drive", f"{si(doc['drive_min'], unit)} to {si(doc['drive_max'], unit)}"))
    rows.append(("codes", f"{doc['code_min']} to {doc['code_max']}"))
    rows.append(("table sha256", doc["table_sha256"]))
    click.echo(table(rows))
    for c in doc["checks"]:
        if not c["ok"]:
            click.echo(f"MISMATCH {c['check']}: sidecar {c['expected']}, file {c['found']}")
    click.echo("verified: the file matches its sidecar" if doc["verified"] else
               "NOT VERIFIED: the file was changed or damaged after it was written")
