"""``sweepgen simulate SCENARIO``: Monte Carlo of the atoms through the sweep."""

from __future__ import annotations

import sys

import click

from sweepgen._format import si
from sweepgen.cli._common import (PlotFile, bounded, emit_json, handles_errors, json_option, laser_option,
                                  late_progress, options_named, profile_option, table)
from sweepgen.errors import InputError
from sweepgen.costs import DEFAULT_ATOMS


#: from this many atoms on, a terminal shows a progress bar (the parts of the run as they finish)
PROGRESS_ATOMS = 50_000
#: above this many atoms, simulate states the memory and time it expects and asks before it starts
CONFIRM_ATOMS = 1_000_000


def _pct(x) -> str:
    return "—" if x is None else f"{100.0 * x:.2f} %"


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _before_run(yes: bool, progress, quiet: bool):
    """``before_run`` of :func:`sweepgen.simulate`: above CONFIRM_ATOMS state what the simulation
    costs and start only when confirmed (on a terminal, or by --yes); then, for long runs on a
    terminal, open the progress bar."""
    def before_run(sc, atoms, seed, how):
        _confirm_size(sc, atoms, seed, yes, how)
        show = atoms >= PROGRESS_ATOMS and sys.stderr.isatty() and not quiet
        progress.start(atoms, f"simulating {atoms} atoms", show=show)

    return before_run


def _confirm_size(sc, atoms, seed, yes, how):
    """Above CONFIRM_ATOMS, state the time a simulation takes and ask (or take --yes)."""
    from sweepgen import costs

    if atoms <= CONFIRM_ATOMS:
        return
    from sweepgen.simulate import simulate

    seconds = costs.simulation_time(lambda n: simulate(sc, atoms=n, seed=seed, **how), atoms)
    click.echo(f"simulating {atoms} atoms needs about {si(costs.simulation_memory(atoms), 'B')} of memory and "
               f"at most about {_duration(seconds)} on this computer (scaled from {costs.PILOT_ATOMS} atoms)",
               err=True)
    if yes:
        return
    if not sys.stdin.isatty():
        raise InputError(f"a simulation of more than {CONFIRM_ATOMS} atoms starts only when confirmed: add "
                         f"--yes (or use fewer atoms)", key="--atoms")
    click.confirm("start it?", err=True, abort=True)


@click.command(short_help="Simulate the atoms through the sweep.")
@click.argument("scenario")
@click.option("--atoms", type=click.IntRange(min=1), default=DEFAULT_ATOMS, show_default=True,
              callback=bounded("--atoms"), help="Number of atoms drawn from the source.")
@click.option("--seed", type=click.IntRange(min=0), default=0, show_default=True, callback=bounded("--seed"),
              help="Random seed; the same seed gives the same result.")
@click.option("--workers", type=click.IntRange(min=1), default=None, callback=bounded("--workers"),
              help="Processes to fly the atoms in (default: one per core). The result does not depend on "
                   "it: the atoms are flown in parts of at most 10 000, each with its own random streams.")
@click.option("--yes", is_flag=True, help=f"Start a simulation of more than {CONFIRM_ATOMS} atoms without asking "
                                          f"(the expected memory and time are printed all the same).")
@json_option
@click.option("--plot", "plot_file", type=PlotFile(), default=None, metavar="FILE",
              help="Also draw the velocity (and, for pulsed sources, arrival-time) distributions "
                   "(PNG or SVG by extension).")
@click.option("--table", "table_file", default=None, type=click.Path(dir_okay=False), metavar="FILE",
              help="Fly the atoms through what a table written earlier plays (through the scenario's laser, "
                   "or --laser) instead of the planned sweep.")
@laser_option
@click.option("--ideal", is_flag=True, default=False,
              help="Play the planned sweep itself instead of what the hardware plays (the sweep through the "
                   "laser's chain, quantised by the generator, filtered by the actuator response).")
@click.option("--compare-field", is_flag=True, default=False,
              help="Also fly the same atoms through the tapered-field (Zeeman) slower with the same "
                   "deceleration and light (see 'sweepgen plan --compare-field') and report both.")
@handles_errors
def command(scenario, atoms, seed, workers, yes, as_json, plot_file, table_file, laser_ref, ideal,
            compare_field):
    """Fly atoms from the source of SCENARIO (a built-in key or a path) through
    the slowing light with the detuning the hardware plays (the sweep through
    the laser's tuning chain, quantised to the generator's codes and filtered
    by the actuator response; --ideal plays the plan itself), and report how
    many reach the target slow enough to be held, with what velocity spread and
    temperatures, and what is lost (turned back, outside the target aperture,
    dark states). Two baselines use the same atoms: no light, and the light
    held at the start detuning.

    A design that breaks a limit (the design rules of 'sweepgen plan') is
    refused with exit 1 before any atom flies.

    Above 1 000 000 atoms it first states the memory and time it expects
    (the time from a short run on this computer) and starts only when
    confirmed (--yes where there is no terminal to ask); a run that would need
    more than half of the computer's memory is refused with how to split it.

    \b
    Example:
      sweepgen simulate rb87-chopped-oven --atoms 20000 --seed 3 --plot atoms.png
    """
    import sweepgen

    if ideal and table_file:
        raise InputError("--ideal plays the planned sweep and --table an old table: give one of them",
                         key="--ideal")
    with options_named(atoms="--atoms", seed="--seed", laser="--laser", workers="--workers"), \
            late_progress() as progress:
        result = sweepgen.simulate(scenario, atoms=atoms, seed=seed, ideal=ideal, table=table_file,
                                   laser=profile_option("laser", laser_ref), workers=workers, progress=progress,
                                   before_run=_before_run(yes, progress, as_json), compare_field=compare_field)
    sc, doc = result.scenario, result.to_json()
    if plot_file:
        result.plot(plot_file)
    if as_json:
        emit_json(doc)
        return
    lost = doc["lost_by_reason"]
    click.echo(f"detuning played: {doc['played']['reason']}")
    _say_played(doc)
    for line in _gated(doc.get("light_levels", {})):
        click.echo(line)
    click.echo(f"{sc.title}  [{sc.species.key}, {'pulsed' if sc.pulsed else 'continuous'} source, "
               f"{doc['atoms']} atoms, seed {doc['seed']}]")
    rows = [("captured at the target", _pct(doc["captured_fraction"]))]
    if "ideal_captured_fraction" in doc:
        rows.append(("captured, the plan itself played", _pct(doc["ideal_captured_fraction"])))
    rows += [
        ("initially in the chirp's band", _pct(doc["band_fraction"])),
        ("captured without light (baseline)", _pct(doc["baseline_no_light_fraction"])),
        ("captured, light at start detuning", _pct(doc["baseline_fixed_frequency_fraction"])),
        ("final velocity, mean", si(doc["final_velocity_mean"], "m/s")),
        ("final velocity, spread (1σ)", si(doc["final_velocity_spread"], "m/s")),
        ("longitudinal temperature (captured)", si(doc["longitudinal_temperature"], "K")),
        ("transverse temperature (captured)", si(doc["transverse_temperature"], "K")),
        ("Doppler limit", si(doc["doppler_limit"], "K")),
        ("photons per captured atom", si(doc["photons_mean"], "photons")),
        ("went dark at least once (depumped)", _pct(doc["depumped_fraction"])),
        ("lost: turned back", _pct(lost["turned_back"])),
        ("lost: outside the aperture", _pct(lost["left_aperture"])),
        ("lost: dark states", _pct(lost["dark_state"])),
        ("arrived too fast", _pct(doc["too_fast_fraction"])),
        ("not arrived (too slow)", _pct(doc["not_arrived_fraction"])),
    ]
    if doc.get("arrival_time_mean") is not None:
        rows.append(("mean arrival of captured atoms", si(doc["arrival_time_mean"], "s")))
    darkens = sc.species.loss_per_photon > 0 or sc.species.off_resonant is not None
    if not darkens:
        rows = [r for r in rows if r[0] not in ("lost: dark states", "went dark at least once (depumped)")]
    if sc.target.aperture is None:
        rows = [r for r in rows if r[0] != "lost: outside the aperture"]
    click.echo(table(rows))
    if "tapered_field" in doc:
        _print_field(doc["tapered_field"])
    if plot_file:
        click.echo(f"plot: {plot_file}", err=True)


def _print_field(cmp):
    """The two methods on the same atoms, with their binomial errors."""
    def pct(key):
        return f"{100 * cmp[key + '_fraction']:.2f} ± {100 * cmp[key + '_error']:.2f} %"

    f = cmp["field"]
    click.echo(f"tapered-field slower, same atoms and light (peak field {si(f['peak_field'], 'T')}, length "
               f"{si(f['length'], 'm')}, light held at {si(f['laser_detuning'], 'Hz')}):")
    click.echo(table([("captured, chirp", pct("chirp_captured")),
                      ("captured, tapered field", pct("field_captured")),
                      ("final velocity, chirp", si(cmp["chirp_final_velocity_mean"], "m/s")),
                      ("final velocity, tapered field", si(cmp["field_final_velocity_mean"], "m/s"))]))


def _gated(levels: dict) -> list[str]:
    """A line for each light a gate switches: its level and when (ms, trigger axis), dark otherwise."""
    lines = []
    for name, runs in levels.items():
        lit = [(a, b, level) for a, b, level in runs if level > 0.0]
        if len(runs) == 1 and runs[0][2] == 1.0:
            continue
        when = ", ".join(f"{level:g} from {a * 1e3:.4g} to {b * 1e3:.4g} ms" for a, b, level in lit) or "never on"
        dark = lit and any(level == 0.0 for _, _, level in runs)
        lines.append(f"light '{name}' as its gates set it: {when}" + (", dark otherwise" if dark else ""))
    return lines


def _say_played(doc: dict) -> None:
    """The table read back that is played (``--table``), and a warning on stderr when what is played breaks
    check rules (the atoms fly through it all the same)."""
    if "table" in doc:
        click.echo(f"table played: {doc['table']['file']} (sha256 {doc['table']['table_sha256'][:16]}…), through "
                   f"laser '{doc['table']['laser']}'")
    failed = doc["played"].get("failed_rules") or []
    if failed:
        click.echo(f"warning: what the hardware plays fails {len(failed)} check rule(s) ({', '.join(failed)}): the "
                   f"atoms fly through it as it would be played; 'sweepgen check' has the details and the fixes",
                   err=True)
