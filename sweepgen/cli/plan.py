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
@click.option("--compare-field", is_flag=True, default=False,
              help="Also work out the tapered-field (Zeeman) slower with the same deceleration and light: "
                   "its field profile, peak field and length (the species file needs a [zeeman] table).")
@click.option("--field-plot", type=PlotFile(), default=None, metavar="FILE",
              help="Draw the tapered-field slower beside the chirp (implies --compare-field).")
@handles_errors
def command(scenario, as_json, plot_file, compare_field, field_plot):
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

    result = sweepgen.plan(scenario, compare_field=compare_field or field_plot is not None)
    field = result.field_slower() if (compare_field or field_plot) else None
    if field_plot:
        _field_plot(result, field_plot)
    drawn = _plot(result, plot_file) if plot_file else ""
    if as_json:
        emit_json(result.to_json())
    else:
        _print(result, drawn)
        if field is not None:
            _print_field(field)
    if not result.ok:
        raise SystemExit(1)


FIELD_ROWS = [
    ("moment_bohr_magnetons", "effective magnetic moment μ′ (μ_B)", ""),
    ("deceleration", "deceleration (constant)", "m/s²"),
    ("b0", "B₀ = h v₀ / (λ μ′)", "T"),
    ("bias", "B_bias", "T"),
    ("peak_field", "peak field |B|", "T"),
    ("l0", "L₀ = v₀² / 2a", "m"),
    ("length", "field length (start to end velocity)", "m"),
    ("start_position", "field starts at", "m"),
    ("laser_detuning", "light held at", "Hz"),
]


def _field_plot(result, field_plot):
    """Draw the tapered-field slower of ``result`` beside the chirp into ``field_plot``."""
    from sweepgen.plots import plot_field

    plot_field(result.report.plan, result.field_slower(), field_plot)
    click.echo(f"field plot: {field_plot}", err=True)


def _print_field(field):
    from sweepgen._format import si

    doc = field.to_json()
    click.echo("tapered-field alternative (same deceleration and light; C. J. Foot, Atomic Physics, §9.3):")
    click.echo(table([(label, si(doc[key], unit) if unit else f"{doc[key]:.4g}") for key, label, unit in FIELD_ROWS]))


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
    click.echo(table(result.table_rows()))
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
