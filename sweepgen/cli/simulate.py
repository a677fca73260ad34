"""``sweepgen simulate SCENARIO``: Monte Carlo of the atoms through the sweep."""

from __future__ import annotations

import click

from sweepgen._format import si
from sweepgen.cli._common import emit_json, handles_errors, json_option, table
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
@handles_errors
def command(scenario, atoms, seed, as_json, plot_file):
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
    result = simulate(sc, atoms=atoms, seed=seed)
    doc = result.to_json()
    if plot_file:
        from sweepgen.plots import plot_simulation

        plot_simulation(result, plot_file)
    if as_json:
        emit_json(doc)
        return
    lost = doc["lost_by_reason"]
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
