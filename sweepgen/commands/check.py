"""``sweepgen check SCENARIO``: prove the sweep is safe and playable (a dry run)."""

from __future__ import annotations

import click

from sweepgen._cli import emit_json, handles_errors, json_option, si, table

_SYMBOL = {"fail": "FAIL", "warn": "warn", "pass": "ok"}


def _value(v, unit):
    if v is None:
        return "—"
    if unit in ("", None):
        return f"{v:.4g}"
    return si(v, unit)


@click.command(short_help="Check a sweep against its laser and generator.")
@click.argument("scenario")
@json_option
@click.option("--rate", "rate", default=None, metavar="RATE",
              help="Sample rate to check, with its unit (e.g. '10 MSa/s'); overrides [drive] sample_rate.")
@click.option("--laser", "laser_ref", default=None, metavar="LASER",
              help="Laser profile (built-in key or path) instead of the scenario's.")
@click.option("--generator", "generator_ref", default=None, metavar="GENERATOR",
              help="Generator profile (built-in key or path) instead of the scenario's.")
@click.option("--plot", "plot_file", type=click.Path(dir_okay=False), default=None,
              help="Also draw each rule's margin as a bar (PNG or SVG by extension).")
@click.option("--all", "show_all", is_flag=True, help="List passing rules too (default: failures and warnings, "
                                                      "then a count of passes).")
@handles_errors
def command(scenario, as_json, rate, laser_ref, generator_ref, plot_file, show_all):
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
    """
    from sweepgen._cli import load_and_check

    sc, report = load_and_check(scenario, rate=rate, laser_ref=laser_ref, generator_ref=generator_ref)
    if plot_file:
        from sweepgen.plots import plot_check

        plot_check(report, plot_file)
    if as_json:
        emit_json(report.to_json())
    else:
        _print(report, show_all)
        if plot_file:
            click.echo(f"plot: {plot_file}", err=True)
    if not report.ok:
        raise SystemExit(1)


def _print(report, show_all):
    sc = report.scenario
    click.echo(f"{sc.title}")
    click.echo(f"  laser: {report.laser.key} ({report.laser.chain.describe()}); generator: {report.generator.key}")
    if report.rate is not None:
        click.echo(f"  sample rate: {report.rate.reason}")
    rows = []
    shown = report.ordered() if show_all else [f for f in report.ordered() if f.status != "pass"]
    for f in shown:
        margin = "—" if f.margin is None else f"{f.margin * 100:.0f} %"
        rows.append((_SYMBOL[f.status], f.rule, _value(f.value, f.unit), _value(f.limit, f.unit), margin,
                     f.message))
    if rows:
        click.echo(table(rows, headers=("status", "rule", "value", "limit", "margin", "detail")))
    fails = report.failures()
    for f in fails:
        if f.advice:
            click.echo(f"  to fix {f.rule}: {f.advice}")
    passed = sum(1 for f in report.findings if f.status == "pass")
    summary = (f"{len(fails)} failed, {len(report.warnings())} warning(s), {passed} passed"
               + ("" if show_all else " (--all lists them)"))
    click.echo(("NOT PLAYABLE: " if fails else "ok: ") + summary)
