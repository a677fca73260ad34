"""``sweepgen plan SCENARIO``: the sweep and the numbers to check it by."""

from __future__ import annotations

import click

from sweepgen._format import si
from sweepgen.cli._common import PlotFile, emit_json, handles_errors, json_option, table

ROWS = [
    ("start_velocity", "start velocity", "m/s"),
    ("end_velocity", "end velocity", "m/s"),
    ("force_fraction", "force fraction η", ""),
    ("deceleration_min", "design deceleration, min", "m/s²"),
    ("deceleration_max", "design deceleration, max", "m/s²"),
    ("lag_velocity_start", "lag behind resonance at start", "m/s"),
    ("start_detuning", "start detuning", "Hz"),
    ("end_detuning", "end detuning", "Hz"),
    ("chirp_span", "chirp span", "Hz"),
    ("chirp_rate_max", "largest chirp rate", "Hz/s"),
    ("chirp_duration", "chirp duration", "s"),
    ("slowing_distance", "slowing distance", "m"),
    ("start_position", "design atom at chirp start", "m"),
    ("start_time", "chirp start after trigger", "s"),
    ("arrival_time", "arrival at target", "s"),
    ("photons_per_atom", "photons per atom", "photons"),
    ("max_rate_fraction", "largest scattering rate / Γ", ""),
    ("effective_saturation", "saturation the atoms see on axis", ""),
    ("beam_overlap", "atomic beam finding the design force", ""),
    ("survival_fraction", "band left bright (dark states, depumping)", ""),
    ("hold_velocity_loss", "velocity the hold takes", "m/s"),
    ("return_velocity_loss", "velocity the return takes", "m/s"),
    ("after_chirp_velocity", "those atoms reach the target at", "m/s"),
    ("doppler_limit", "Doppler limit", "K"),
    ("recoil_velocity", "recoil velocity", "m/s"),
]


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
    from sweepgen.checker import check_plan
    from sweepgen.scenario import load_scenario

    sc = load_scenario(scenario)
    report = check_plan(sc)
    result = report.plan
    doc = {**result.to_json(), **report.to_json()}
    if plot_file:
        _plot(report, plot_file)
    if as_json:
        emit_json(doc)
    else:
        _print(sc, doc, report, plot_file)
    if not report.ok:
        raise SystemExit(1)


def _plot(report, plot_file):
    from sweepgen.playback import actuator_response
    from sweepgen.plots import plot_plan

    if report.finding("period").status == "fail":
        click.echo("plot: not drawn, one period cannot hold the sweep (rule period)", err=True)
        return
    # overlay the actuator's simulated response when the scenario names a laser
    plot_plan(report.plan, plot_file, response=actuator_response(report.plan))


def _print(sc, doc, report, plot_file):
    click.echo(f"{sc.title}  [{sc.species.key}, {'pulsed' if sc.pulsed else 'continuous'} source]")
    rows = []
    for key, label, unit in ROWS:
        value = doc.get(key)
        if value is None and key in ("start_time", "arrival_time"):
            continue
        if key == "survival_fraction" and sc.species.loss_per_photon == 0 and sc.species.off_resonant is None:
            continue
        if value is None:
            continue
        rows.append((label, si(value, unit)))
    click.echo(table(rows))
    fails = report.failures()
    for f in fails:
        headroom = "" if f.headroom is None else f" (headroom {f.headroom * 100:.0f} %)"
        click.echo(f"FAIL {f.rule}: {f.message}{headroom}")
        if f.advice:
            click.echo(f"  to fix {f.rule}: {f.advice}")
    if fails:
        click.echo(f"NOT PLAYABLE: the design breaks {len(fails)} limit(s); 'sweepgen check' judges every rule")
    if sc.species.saturation_definition:
        click.echo(f"light.saturation is measured against: {sc.species.saturation_definition}")
    if plot_file and report.finding("period").status != "fail":
        click.echo(f"plot: {plot_file}", err=True)
