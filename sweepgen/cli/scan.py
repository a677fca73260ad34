"""``sweepgen scan SCENARIO --vary KEY=START:STOP:N``: every design of a grid, checked and simulated alike."""

from __future__ import annotations

import sys

import click

from sweepgen.cli._common import (OutputFolder, bounded, emit_json, handles_errors, json_option, late_progress,
                                  options_named, table)

#: atoms per design unless --atoms says otherwise
SCAN_ATOMS = 2000

cluster_option = click.option("--cluster", default=None, metavar="ADDRESS",
                              help="Run the designs on the Dask scheduler at ADDRESS (e.g. tcp://10.0.0.5:8786; "
                                   "install sweepgen[cluster]) instead of on this computer's cores.")
workers_option = click.option("--workers", type=click.IntRange(min=1), default=None, callback=bounded("--workers"),
                              help="Local worker processes (default: one per core; 1 runs in this process).")


def where_text(where: dict) -> str:
    """``on 2 local processes`` or ``on the Dask scheduler at ADDRESS``."""
    if "cluster" in where:
        return f"on the Dask scheduler at {where['cluster']}"
    n = where["local_processes"]
    return f"on {n} local process{'es' if n != 1 else ''}"


@click.command(short_help="Check and simulate a grid of designs.")
@click.argument("scenario")
@click.option("--vary", "vary", multiple=True, required=True, metavar="KEY=START:STOP:N",
              help="A key of the scenario (dotted, as in the file) and N values from START to STOP with their "
                   "unit; repeat for more keys (every combination is run).")
@click.option("--atoms", type=click.IntRange(min=1), default=SCAN_ATOMS, show_default=True,
              callback=bounded("--atoms"), help="Atoms per design.")
@click.option("--seed", type=click.IntRange(min=0), default=0, show_default=True, callback=bounded("--seed"),
              help="The seed every design uses (common random numbers).")
@workers_option
@cluster_option
@click.option("--output", "-o", "output", type=OutputFolder(), default=".", show_default=True, metavar="DIR",
              help="Folder for NAME-scan.csv, NAME-scan.json and NAME-scan.png.")
@json_option
@handles_errors
def command(scenario, vary, atoms, seed, workers, cluster, output, as_json):
    """Vary keys of SCENARIO (a built-in key or a path) over a grid and run
    every design through check and simulate with the same seed, so that the
    differences between designs are not noise. Writes a table (CSV and JSON:
    each design's values, the check's verdict with its failing rules, the
    captured fraction with its statistical error, the final velocity and the
    arrival time) and a plot (a line for one key, a map for two; failing
    designs marked).

    Runs on all local cores (--workers to choose) or on a Dask scheduler
    (--cluster). Ctrl-C stops and writes the designs that finished.

    \b
    Example:
      sweepgen scan rb87-chopped-oven --vary chirp.force_fraction=0.4:0.8:5
      sweepgen scan my.toml --vary "chirp.start_velocity=220 m/s:300 m/s:5" \\
                            --vary light.saturation=1:5:5 -o scans/
    """
    import sweepgen

    with options_named(vary="--vary", atoms="--atoms", seed="--seed", workers="--workers", cluster="--cluster"), \
            late_progress("designs", show=not as_json and sys.stderr.isatty()) as progress:
        result = sweepgen.scan(scenario, list(vary), atoms=atoms, seed=seed, workers=workers, cluster=cluster,
                               output=output, progress=progress)
    paths = result.files
    if as_json:
        emit_json(result.to_json())
    else:
        _print(result, paths)
    if result.interrupted:
        click.echo(f"sweepgen: interrupted: {len(result.rows)} of {result.designs} designs finished and were "
                   f"written", err=True)
        raise SystemExit(130)


def _print(result, paths) -> None:
    click.echo(f"{result.title}  [{result.designs} designs, {result.atoms} atoms each, seed {result.seed}, "
               f"{where_text(result.where)}]")
    heads = [a["key"] for a in result.axes]
    rows = []
    for r in result.rows:
        p = r["captured_fraction"]
        captured = "—" if p is None else f"{100 * p:.2f} ± {100 * r['captured_error']:.2f} %"
        verdict = {"pass": "ok", "fail": "FAIL " + ",".join(r["failing_rules"]),
                   "invalid": "cannot exist"}[r["verdict"]]
        rows.append([*[str(r["values"][a["key"]]) for a in result.axes], captured, verdict])
    click.echo(table(rows, headers=(*heads, "captured", "check")))
    best = result.best()
    if best is not None:
        shown = ", ".join(f"{k} = {v}" for k, v in best["values"].items())
        click.echo(f"best passing design: {shown} ({100 * best['captured_fraction']:.2f} % captured)")
    for kind, path in paths.items():
        click.echo(f"{kind}: {path}", err=True)
