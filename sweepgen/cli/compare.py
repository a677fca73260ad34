"""``sweepgen compare SCENARIO MEASURED``: what the laser did against what was planned."""

from __future__ import annotations

import click

from sweepgen._format import si
from sweepgen.cli._common import (PlotFile, emit_json, handles_errors, json_option, option_quantity, options_named,
                                  table)


def _marker(text):
    """``EVENT`` or ``EVENT=TIME`` (TIME with its unit, on the trace's time axis)."""
    if text is None:
        return None, None
    event, sep, when = text.partition("=")
    return event.strip(), option_quantity(when, "s", "--marker", "1.25 ms") if sep else None


@click.command(short_help="Compare a measured frequency trace with the planned sweep.")
@click.argument("scenario")
@click.argument("measured", type=click.Path(dir_okay=False))
@click.option("--marker", default=None, metavar="EVENT[=TIME]",
              help="Align by a named event (trigger, pulse, chirp_start, chirp_end, return_start, return_end, "
                   "arrival, or the name of one of the scenario's [timing.markers]) at TIME on the trace's axis, or "
                   "at the first rise of its 'marker' column; default: cross-correlation.")
@click.option("--transition", default=None, metavar="FREQ",
              help="Transition frequency for a 'frequency' column (default: c/λ of the scenario's species).")
@click.option("--reference", default=None, metavar="DETUNING", help="Detuning of the reference laser of a 'beat' column.")
@click.option("--beat-sign", type=click.Choice(["1", "-1"]), default="1", show_default=True,
              help="+1 when the laser is above the reference, -1 below.")
@click.option("--plot", "plot_file", default=None, type=PlotFile(), metavar="FILE",
              help="Also draw both traces and the error with the tolerance (PNG or SVG by extension).")
@json_option
@handles_errors
def command(scenario, measured, marker, transition, reference, beat_sign, plot_file, as_json):
    """Compare MEASURED, a frequency-versus-time trace (a wavemeter log, a
    beat-note counter, a cavity trace converted to frequency: columns 'time'
    and 'detuning', 'frequency' or 'beat', each with its unit), with the sweep
    SCENARIO plans. The trace is aligned in time, the tracking error is
    computed at each sample, and its maximum and RMS during the chirp are
    compared with the checker's tracking tolerance.

    Exit status: 0 within the tolerance, 1 exceeded, 2 bad input.

    \b
    Example:
      sweepgen compare rb87-chopped-oven wavemeter-log.csv --plot compare.png
      sweepgen compare my-beam.toml scope.csv --marker trigger
    """
    import sweepgen

    event, when = _marker(marker)
    with options_named(marker="--marker", marker_time="--marker", transition="--transition", reference="--reference"):
        result = sweepgen.compare(scenario, measured, marker=event, marker_time=when,
                                  transition=option_quantity(transition, "Hz", "--transition", "384.2304844685 THz"),
                                  reference=option_quantity(reference, "Hz", "--reference", "-1.2 GHz"),
                                  beat_sign=int(beat_sign))
    if plot_file:
        result.plot(plot_file)
    doc = result.to_json()
    if as_json:
        emit_json(doc)
    else:
        _print(doc)
        if plot_file:
            click.echo(f"plot: {plot_file}", err=True)
    if not result.ok:
        raise SystemExit(1)


def _print(doc):
    a = doc["alignment"]
    how = (f"cross-correlation, lag {si(a['lag'], 's')} (known modulo the period, {si(a['period'], 's')})"
           if a["method"] == "cross-correlation" else
           f"{a['event']} at {si(a['trace_time'], 's')} of the trace ({a['from']}), lag {si(a['lag'], 's')}")
    rows = [("alignment", how),
            ("samples", f"{doc['samples']} ({doc['chirp_samples']} during the chirp)"),
            ("error in the chirp, max", f"{si(doc['chirp_error_max'], 'Hz')} at {si(doc['chirp_error_at'], 's')} "
                                        f"after the trigger"),
            ("error in the chirp, RMS", si(doc["chirp_error_rms"], "Hz")),
            ("error in the chirp, mean (offset)", si(doc["chirp_error_mean"], "Hz")),
            ("error over the whole trace, max / RMS", f"{si(doc['error_max'], 'Hz')} / {si(doc['error_rms'], 'Hz')}"),
            ("tolerance (tracking_fraction × lag detuning)", si(doc["tolerance"], "Hz")),
            ("headroom", f"{doc['headroom'] * 100:.0f} %")]
    click.echo(table(rows))
    click.echo("ok: the laser followed the plan within the tolerance" if doc["ok"] else
               "EXCEEDED: the laser left the plan by more than the tolerance during the chirp")
