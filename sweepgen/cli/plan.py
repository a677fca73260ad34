"""``sweepgen plan SCENARIO``: the sweep and the numbers to check it by."""

from __future__ import annotations

import click

from sweepgen.cli._common import PlotFile, emit_json, handles_errors, json_option, table


@click.command(short_help="Plan the sweep for a scenario.")
@click.argument("scenario")
@json_option
@click.option("--plot", "plot_file", type=PlotFile(), default=None, metavar="FILE",
              help="Also draw the sweep, the design atom and (when the scenario names a laser) the "
                   "actuator's simulated response (PNG or SVG by extension).")
@handles_errors
def command(scenario, as_json, plot_file):
    """Plan the detuning sweep for SCENARIO (a built-in key or a path), and
    judge it by the design rules of 'sweepgen check' (slowing distance,
    deceleration, beam overlap, end velocity, survival, after the chirp,
    period).

    Exit status: 0 when the design breaks no limit, 1 when it does (the plan is
    printed, then the failed rules), 2 for bad input, including a sweep that
    cannot exist.

    \b
    Example:
      sweepgen plan rb87-chopped-oven --json
    """
    import sweepgen

    result = sweepgen.plan(scenario)
    drawn = _plot(result, plot_file) if plot_file else ""
    if as_json:
        emit_json(result.to_json())
    else:
        _print(result, drawn)
    if not result.ok:
        raise SystemExit(1)


def _plot(result, plot_file) -> str:
    """Draw the plan (with the actuator's simulated response when the scenario names a laser)."""
    period = result.finding("period")
    if period is not None and period.status == "fail":
        click.echo("plot: not drawn, one period cannot hold the sweep (rule period)", err=True)
        return ""
    return str(result.plot(plot_file))


def _print(result, drawn):
    sc = result.scenario
    click.echo(f"{sc.title}  [{sc.species.key}, {'pulsed' if sc.pulsed else 'continuous'} source]")
    click.echo(table(result.rows()))
    timing = result.to_json().get("timing")
    if timing is not None:
        _print_timing(timing)
    fails = result.failures()
    for f in fails:
        headroom = "" if f.headroom is None else f" (headroom {f.headroom * 100:.0f} %)"
        click.echo(f"FAIL {f.rule}: {f.message}{headroom}")
        if f.advice:
            click.echo(f"  to fix {f.rule}: {f.advice}")
    if fails:
        click.echo(f"NOT PLAYABLE: the design breaks {len(fails)} limit(s); 'sweepgen check' judges every rule")
    if sc.species.saturation_definition:
        click.echo(f"light.saturation is measured against: {sc.species.saturation_definition}")
    if drawn:
        click.echo(f"plot: {drawn}", err=True)


def _print_timing(timing):
    """The timing on the trigger's axis: how the playback starts, then when each thing is on."""
    from sweepgen._format import si

    mode = f"burst of {timing['cycles']} period(s) per trigger" if timing["mode"] == "burst" else "repeat"
    level = f", threshold {si(timing['level'], 'V')}" if timing["level"] is not None else ""
    click.echo(f"timing (0 = the trigger edge): {timing['source']} trigger, {timing['edge']} edge{level}, {mode}")
    click.echo(table([(lane["label"], ", ".join(f"{si(a, 's')} to {si(b, 's')}" for a, b in lane["spans"]))
                      for lane in timing["lanes"]]))
