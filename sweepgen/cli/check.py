"""``sweepgen check SCENARIO``: prove the sweep is safe and playable (a dry run)."""

from __future__ import annotations

import click

from sweepgen._format import si
from sweepgen.cli._common import (PlotFile, emit_json, generator_option, handles_errors, json_option, laser_option,
                                  option_quantity, profile_option, rate_option, table)

_SYMBOL = {"fail": "FAIL", "warn": "warn", "pass": "ok"}


@click.command(short_help="Check a sweep against its laser and generator.")
@click.argument("scenario")
@json_option
@rate_option
@laser_option
@generator_option
@click.option("--plot", "plot_file", type=PlotFile(), default=None, metavar="FILE",
              help="Also draw each rule's headroom to its limit as a bar (PNG or SVG by extension).")
@click.option("--table", "table_file", default=None, type=click.Path(dir_okay=False), metavar="FILE",
              help="Check a table written earlier (any installed format, or its sidecar) in place of the "
                   "scenario's own sweep: what it plays through today's laser and generator.")
@click.option("--all", "show_all", is_flag=True, help="List passing rules too (default: failures and warnings, "
                                                      "then a count of passes).")
@handles_errors
def command(scenario, as_json, rate, laser_ref, generator_ref, plot_file, table_file, show_all):
    """Check SCENARIO (a built-in key or a path) against its laser and generator
    profiles before anything is switched on: laser limits (mode-hop-free range,
    chirp and return rates, the actuator's safe input range, slew, tracking
    through the actuator response), generator limits (output range at the real
    load, sample rate, memory, resolution) and the planner's physics.

    Exit status: 0 when no rule fails (warnings allowed), 1 when any rule fails,
    2 for bad input.

    \b
    Example:
      sweepgen check rb87-chopped-oven
      sweepgen check my-scenario.toml --laser ./my-laser.toml --json
      sweepgen check my-scenario.toml --table tables/last-month.bin
    """
    import sweepgen
    from sweepgen.errors import InputError

    if table_file is not None and rate is not None:
        raise InputError("a table plays at its own sample rate; --rate does not go with --table", key="--rate")
    result = sweepgen.check(scenario, sample_rate=option_quantity(rate, "Hz", "--rate", "10 MSa/s"),
                            laser=profile_option("laser", laser_ref), generator=profile_option("generator", generator_ref),
                            table=table_file)
    if plot_file:
        result.plot(plot_file)
    if as_json:
        emit_json(result.to_json())
    else:
        _print(result.report, show_all, result.to_json())
        if plot_file:
            click.echo(f"plot: {plot_file}", err=True)
    if not result.ok:
        raise SystemExit(1)


def _print(report, show_all, doc=None):
    sc = report.scenario
    click.echo(f"{sc.title}")
    click.echo(f"  laser: {report.laser.key} ({report.laser.chain.describe()}); generator: {report.generator.key}")
    if report.rate_choice is not None:
        click.echo(f"  sample rate: {report.rate_choice.reason}")
    _print_outputs(doc or {})
    rows = []
    shown = report.ordered() if show_all else [f for f in report.ordered() if f.status != "pass"]
    for f in shown:
        headroom = "—" if f.headroom is None else f"{f.headroom * 100:.0f} %"
        rows.append((_SYMBOL[f.status], f.rule, si(f.value, f.unit), si(f.limit, f.unit), headroom,
                     f.message))
    if rows:
        click.echo(table(rows, headers=("status", "rule", "value", "limit", "headroom", "detail")))
    fails = report.failures()
    for f in fails:
        if f.advice:
            click.echo(f"  to fix {f.rule}: {f.advice}")
    passed = sum(1 for f in report.findings if f.status == "pass")
    summary = (f"{len(fails)} failed, {len(report.warnings())} warning(s), {passed} passed"
               + ("" if show_all else " (--all lists them)"))
    click.echo(("NOT PLAYABLE: " if fails else "ok: ") + summary)


def _print_outputs(doc):
    """Every output and the trigger, for a scenario with several outputs or a [timing] table."""
    channels, tm = doc.get("channels"), doc.get("timing")
    if channels and len(channels) > 1:
        click.echo("  outputs: " + "; ".join(f"{c['name']} ({c['kind']}) on output {c['output']} of {c['generator']}"
                                             for c in channels))
    if tm:
        click.echo(f"  trigger: {tm['source']} ({tm['source_name'] or 'no name in the profile'}), {tm['edge']} "
                   f"edge, delay {si(tm['delay'], 's')}, {tm['mode']}")
