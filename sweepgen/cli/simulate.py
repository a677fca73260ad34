"""``sweepgen simulate SCENARIO``: Monte Carlo of the atoms through the sweep."""

from __future__ import annotations

import click

from sweepgen._format import si
from sweepgen.cli._common import emit_json, handles_errors, json_option, laser_option, table
from sweepgen.errors import InputError
from sweepgen.simulate import DEFAULT_ATOMS


def _pct(x) -> str:
    return "—" if x is None else f"{100.0 * x:.2f} %"


@click.command(short_help="Simulate the atoms through the sweep.")
@click.argument("scenario")
@click.option("--atoms", type=click.IntRange(min=1), default=DEFAULT_ATOMS, show_default=True,
              help="Number of atoms drawn from the source.")
@click.option("--seed", type=click.IntRange(min=0), default=0, show_default=True,
              help="Random seed; the same seed gives the same result.")
@json_option
@click.option("--plot", "plot_file", type=click.Path(dir_okay=False), default=None,
              help="Also draw the velocity (and, for pulsed sources, arrival-time) distributions "
                   "(PNG or SVG by extension).")
@click.option("--table", "table_file", default=None, type=click.Path(dir_okay=False), metavar="FILE",
              help="Fly the atoms through what a table written earlier plays (through the scenario's laser, "
                   "or --laser) instead of the planned sweep.")
@laser_option
@handles_errors
def command(scenario, atoms, seed, as_json, plot_file, table_file, laser_ref):
    """Fly atoms from the source of SCENARIO (a built-in key or a path) through
    the slowing light with the planned sweep, and report how many reach the
    target slow enough to be held, with what velocity spread, and what is lost
    (turned back, outside the target aperture, dark states). Two baselines use
    the same atoms: no light, and the light held at the start detuning.

    \b
    Example:
      sweepgen simulate rb87-chopped-oven --atoms 20000 --seed 3 --plot atoms.png
    """
    from sweepgen.scenario import load_scenario
    from sweepgen.simulate import simulate

    if plot_file and not plot_file.lower().endswith((".png", ".svg")):
        # refuse before a long run (the same rule as sweepgen.plots.save)
        raise InputError(f"plot file must end in .png or .svg, got {plot_file!r}", key="--plot")
    sc = load_scenario(scenario)
    played = _table_sweep(sc, table_file, laser_ref) if table_file else None
    result = simulate(sc, atoms=atoms, seed=seed, schedule=played.schedule if played else None)
    doc = result.to_json()
    if played is not None:
        doc["table"] = {"file": str(played.table.path), "table_sha256": played.table.table_sha256(),
                        "laser": played.laser.key, "representation_error": played.error}
    if plot_file:
        from sweepgen.plots import plot_simulation

        plot_simulation(result, plot_file)
    if as_json:
        emit_json(doc)
        return
    lost = doc["lost_by_reason"]
    if played is not None:
        click.echo(f"sweep: {played.table.path} through laser '{played.laser.key}'")
    click.echo(f"{sc.title}  [{sc.species.key}, {'pulsed' if sc.pulsed else 'continuous'} source, "
               f"{doc['atoms']} atoms, seed {doc['seed']}]")
    rows = [
        ("captured at the target", _pct(doc["captured_fraction"])),
        ("initially in the chirp's band", _pct(doc["band_fraction"])),
        ("captured without light (baseline)", _pct(doc["baseline_no_light_fraction"])),
        ("captured, light at start detuning", _pct(doc["baseline_fixed_frequency_fraction"])),
        ("final velocity, mean", si(doc["final_velocity_mean"], "m/s")),
        ("final velocity, spread (1σ)", si(doc["final_velocity_spread"], "m/s")),
        ("final longitudinal temperature", si(doc["final_temperature"], "K")),
        ("photons per captured atom", si(doc["photons_mean"], "photons")),
        ("lost: turned back", _pct(lost["turned_back"])),
        ("lost: outside the aperture", _pct(lost["left_aperture"])),
        ("lost: dark states", _pct(lost["dark_state"])),
        ("arrived too fast", _pct(doc["too_fast_fraction"])),
        ("not arrived (too slow)", _pct(doc["not_arrived_fraction"])),
    ]
    if doc.get("arrival_time_mean") is not None:
        rows.append(("mean arrival of captured atoms", si(doc["arrival_time_mean"], "s")))
    if sc.species.loss_per_photon == 0:
        rows = [r for r in rows if r[0] != "lost: dark states"]
    if sc.target.aperture is None:
        rows = [r for r in rows if r[0] != "lost: outside the aperture"]
    click.echo(table(rows))
    if plot_file:
        click.echo(f"plot: {plot_file}", err=True)


def _table_sweep(sc, table_file, laser_ref):
    """What a table read back plays through the laser; a table that does not verify is refused."""
    from sweepgen import playback
    from sweepgen.cli._common import read_table_file
    from sweepgen.errors import CheckFailed

    read = read_table_file(table_file)
    if not read.verified:
        bad = ", ".join(c["check"] for c in read.checks if not c["ok"])
        raise CheckFailed(f"{read.path}: does not match its sidecar ({bad}); it was changed or damaged")
    laser = (playback.load_profile("laser", laser_ref, key="--laser") if laser_ref
             else playback.scenario_profiles(sc, required=False)[0])
    if laser is None:
        raise InputError("a table is played through a laser: name one with --laser or in the scenario",
                         key="--laser")
    return playback.table_sweep(read, laser)
