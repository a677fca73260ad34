"""``sweepgen optimise SCENARIO --free KEY[=LOW:HIGH]``: the design that delivers the most atoms and passes check."""

from __future__ import annotations

import sys

import click

from sweepgen.cli._common import (OutputFolder, bounded, emit_json, handles_errors, json_option, options_named,
                                  progress_bar, table)
from sweepgen.cli.scan import SCAN_ATOMS, cluster_option, where_text, workers_option


@click.command(short_help="Search free keys for the design that delivers the most atoms.")
@click.argument("scenario")
@click.option("--free", "free", multiple=True, required=True, metavar="KEY[=LOW:HIGH]",
              help="A key of the scenario (dotted, as in the file) the search may change, between LOW and HIGH "
                   "with their unit (default: half to one and a half times its value); repeat for more keys.")
@click.option("--objective", default="captured_fraction", show_default=True, metavar="NAME",
              help="The number of 'simulate --json' to make as large as possible.")
@click.option("--minimise", is_flag=True, help="Make the objective as small as possible instead.")
@click.option("--atoms", type=click.IntRange(min=1), default=SCAN_ATOMS, show_default=True,
              callback=bounded("--atoms"), help="Atoms per design during the search.")
@click.option("--confirm-atoms", type=click.IntRange(min=1), default=None, callback=bounded("--confirm-atoms"),
              help="Atoms of the confirmation run (default: 10 × --atoms).")
@click.option("--evaluations", type=click.IntRange(min=1), default=60, show_default=True,
              callback=bounded("--evaluations"), help="About how many designs the search may try.")
@click.option("--seed", type=click.IntRange(min=0), default=0, show_default=True, callback=bounded("--seed"),
              help="The seed every design of the search uses (common random numbers); the confirmation uses a "
                   "fresh seed derived from it.")
@workers_option
@cluster_option
@click.option("--output", "-o", "output", type=OutputFolder(), default=".", show_default=True, metavar="DIR",
              help="Folder for NAME-best.toml, NAME-optimise.md, .json and .png (numbered, never replaced).")
@json_option
@handles_errors
def command(scenario, free, objective, minimise, atoms, confirm_atoms, evaluations, seed, workers, cluster,
            output, as_json):
    """Search the free keys of SCENARIO (a built-in key or a path) for the
    design that delivers the most atoms at the target (or another objective)
    among those that pass 'sweepgen check'. The search is SciPy's differential
    evolution; every design flies the same atoms (one seed), and the winner is
    confirmed beside the starting design with a fresh seed and more atoms.

    Writes the best scenario as a new TOML file beside a report (the
    improvement with its error, the rules that bind at the optimum, the
    history of the search as a plot) and its JSON. Runs on all local cores
    (--workers) or a Dask scheduler (--cluster); Ctrl-C stops the search and
    writes what it found so far.

    \b
    Example:
      sweepgen optimise rb87-chopped-oven --free chirp.force_fraction=0.4:0.9
      sweepgen optimise my.toml --free "chirp.start_velocity=200 m/s:300 m/s" \\
                                --free chirp.force_fraction -o best/
    """
    import importlib
    from pathlib import Path

    from sweepgen import optimise_report

    service = importlib.import_module("sweepgen.optimise")      # the package's `optimise` is the API function

    with options_named(free="--free", objective="--objective", atoms="--atoms", seed="--seed", workers="--workers",
                       cluster="--cluster"), \
            progress_bar(evaluations, "designs", show=not as_json and sys.stderr.isatty()) as progress:
        goal = service.Goal(objective, minimise).check()
        result = service.optimise(scenario, free, goal=goal, atoms=atoms, seed=seed, budget=evaluations,
                                  confirm_atoms=confirm_atoms, workers=workers, cluster=cluster, progress=progress)
    Path(output).mkdir(exist_ok=True)           # only now: bad input leaves no folder behind
    files = optimise_report.write(result, output, result.search.start.stem)
    doc = result.to_json()
    if as_json:
        emit_json({**doc, "files": {k: str(v) for k, v in files.items()}})
    else:
        _print(result, doc, files)
    if not result.finished:
        click.echo(f"sweepgen: interrupted after {doc['evaluations']} designs; the best so far was written "
                   f"(not confirmed)", err=True)
        raise SystemExit(130)
    if result.best is None:
        raise SystemExit(1)


def _pct(p, e) -> str:
    return "—" if p is None else f"{100 * p:.2f} ± {100 * e:.2f} %"


def _print(result, doc, files) -> None:
    s = result.search
    click.echo(f"{s.start.title}  [{doc['evaluations']} designs, {s.atoms} atoms each, seed {s.seed}, "
               f"{where_text(doc['where'])}]")
    if result.best is None:
        click.echo("no design that passes check was found")
    rows = []
    for name, row in (("start", result.start_row), ("best", result.best_row)):
        if row is not None:
            rows.append([name, *[str(row["values"].get(f.key, "(as in the file)")) for f in s.frees],
                         _pct(row["captured_fraction"], row["captured_error"]),
                         "ok" if row["verdict"] == "pass" else "FAIL " + ",".join(row["failing_rules"])])
    if rows:
        click.echo(table(rows, headers=("", *[f.key for f in s.frees], "captured", "check")))
    imp = doc["improvement"]
    if imp is not None:
        click.echo(f"confirmed ({result.confirm_atoms} atoms, fresh seed): {_pct(imp['difference'], imp['error'])} "
                   + ("(beyond two standard errors)" if imp["significant"] else "(not beyond two standard errors)"))
    for b in doc["binding"]:
        click.echo(f"binds: rule {b['rule']} (headroom {100 * b['headroom']:.1f} %)" if "rule" in b
                   else f"binds: {b['free']} at its {b['bound']} bound")
    for kind, path in files.items():
        click.echo(f"{kind}: {path}", err=True)
