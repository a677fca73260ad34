"""``sweepgen calibrate MEASUREMENTS --laser PROFILE --stage NAME``: fit a stage, write a new profile."""

from __future__ import annotations

import click

from sweepgen._format import si
from sweepgen.cli._common import (PlotFile, bounded, emit_json, handles_errors, json_option, option_quantity,
                                  options_named, table)


def _quantity(text, unit, key, example):
    return option_quantity(text, unit, key, example)


def _drive_range(text, unit):
    from sweepgen.errors import InputError

    if text is None:
        return None
    lo, sep, hi = text.partition(":")
    if not sep:
        raise InputError(f"expected LOW:HIGH with units, e.g. '-4 V:4 V', got {text!r}", key="--range")
    a = _quantity(lo, unit, "--range", f"-4 {unit}")
    b = _quantity(hi, unit, "--range", f"4 {unit}")
    if not b > a:
        raise InputError(f"expected LOW below HIGH, got {text!r}", key="--range")
    return a, b


def _transition(frequency, species):
    from sweepgen.errors import InputError

    if frequency is not None and species is not None:
        raise InputError("give --transition or --species, not both", key="--species")
    if species is not None:
        from scipy import constants

        from sweepgen.species import load_species

        return constants.c / load_species(species, key="--species").wavelength
    return _quantity(frequency, "Hz", "--transition", "384.2304844685 THz")


@click.command(short_help="Fit a stage of the tuning chain to measurements.")
@click.argument("measurements", type=click.Path(dir_okay=False))
@click.option("--laser", "laser_ref", required=True, metavar="PROFILE", help="Laser profile (built-in key or path).")
@click.option("--stage", required=True, metavar="NAME", help="The stage: its name, its kind, or its position (1 = first).")
@click.option("--output", "-o", default=None, type=click.Path(dir_okay=False), metavar="FILE",
              help="The new laser profile (default: PROFILE-calibrated.toml here). Never overwritten silently.")
@click.option("--overwrite", is_flag=True, help="Replace FILE if it exists.")
@click.option("--degree", type=click.IntRange(1, 7), default=None,
              help="Polynomial degree (default: chosen by cross-validation).")
@click.option("--outlier-sigma", type=click.FloatRange(min=0), default=5.0, show_default=True,
              callback=bounded("--outlier-sigma"),
              help="Leave out points this many robust standard deviations off the fit (0 keeps all).")
@click.option("--range", "range_text", default=None, metavar="LOW:HIGH", help="Fit only drives in this range, e.g. '-4 V:4 V'.")
@click.option("--transition", default=None, metavar="FREQ", help="Transition frequency for a 'frequency' column (wavemeter).")
@click.option("--species", default=None, metavar="SPECIES", help="Take the transition frequency c/λ from this species.")
@click.option("--reference", default=None, metavar="DETUNING", help="Detuning of the reference laser of a 'beat' column.")
@click.option("--beat-sign", type=click.Choice(["1", "-1"]), default="1", show_default=True,
              help="+1 when the laser is above the reference, -1 below.")
@click.option("--plot", "plot_file", default=None, type=PlotFile(), metavar="FILE",
              help="The plot of data, fit and residuals (default: beside the new profile, .png).")
@json_option
@handles_errors
def command(measurements, laser_ref, stage, output, overwrite, degree, outlier_sigma, range_text, transition,
            species, reference, beat_sign, plot_file, as_json):
    """Fit stage NAME of laser PROFILE to the measured pairs in MEASUREMENTS
    (a CSV or other delimited text file whose header names each column and its
    unit, such as 'drive (V),detuning (MHz)'; or a NeXus HDF5 file) and write
    the calibrated stage into a NEW laser profile, keeping the rest of the file
    as written. The measured column is the detuning, an absolute 'frequency'
    (with --transition or --species), a 'beat' note (with --reference) or the
    stage's own 'rf' input frequency. Reports residuals in frequency, the fit's
    uncertainty, outliers, hysteresis between up and down sweeps and the
    usable range.

    Exit status: 0 written, 2 refused (non-monotone data, too few points, wrong
    units, gaps, an existing output file), with the reason.

    \b
    Example:
      sweepgen calibrate wavemeter.csv --laser my-laser.toml --stage piezo -o my-laser-2025.toml
      sweepgen calibrate beat.tsv --laser demo-ecdl-piezo --stage 1 --reference "-1.2 GHz"
    """
    import sweepgen
    from sweepgen import recalibration
    from sweepgen.laser import load_laser

    unit = None
    if range_text is not None:
        laser = load_laser(laser_ref, key="--laser")
        unit = laser.chain.stages[recalibration.find_stage(laser.chain, stage)].down_unit
    with options_named(laser="--laser", stage="--stage"):
        result = sweepgen.calibrate(
            measurements, laser_ref, stage, output=output, overwrite=overwrite, degree=degree,
            outlier_sigma=outlier_sigma, drive_range=_drive_range(range_text, unit),
            transition=_transition(transition, species), reference=_quantity(reference, "Hz", "--reference", "-1.2 GHz"),
            beat_sign=int(beat_sign), plot=plot_file)
    doc = result.to_json()
    if as_json:
        emit_json(doc)
        return
    _print(doc)


def _print(doc):
    u = doc["usable_range"]
    unit = u["drive_unit"]
    what = doc["residual_of"]
    optical = what != "optical detuning"
    rows = [("stage", f"{doc['stage']} (stage {doc['stage_index'] + 1}) from {doc['measured']} values"),
            ("fit", doc["method"]),
            ("points", f"{doc['used']} used of {doc['points']}, {doc['outlier_count']} outlier(s) left out"),
            (f"residuals ({what})", f"RMS {si(doc['residual_rms'], 'Hz')}, max {si(doc['residual_max'], 'Hz')}"
             + (f" (optical: RMS {si(doc['residual_rms_optical'], 'Hz')})" if optical else "")),
            ("fit uncertainty (1σ, max)", si(doc["uncertainty"], "Hz")
             + (f" (optical: {si(doc['uncertainty_optical'], 'Hz')})" if optical else "")),
            ("usable range", f"{si(u['drive'][0], unit)} to {si(u['drive'][1], unit)} → detuning "
                             f"{si(u['detuning'][0], 'Hz')} to {si(u['detuning'][1], 'Hz')}"),
            ("change from the old stage", si(doc["change_from_old"], "Hz") + " (largest, over the usable range)")]
    h = doc["hysteresis"]
    if h is None:
        rows.insert(5, ("hysteresis", "— (the file holds no up and down sweeps)"))
    else:
        rows.insert(5, ("hysteresis (up − down)",
                        f"{si(h['max'], 'Hz')} at {si(h['at_drive'], unit)} (±{si(h['uncertainty'], 'Hz')}; "
                        f"{si(h['drive_equivalent'], unit)} of drive)" + ("" if h["significant"] else ", not significant")))
    click.echo(table(rows))
    for o in doc["outliers"][:5]:
        click.echo(f"  outlier: drive {si(o['drive'], unit)}, measured {si(o['measured'], 'Hz')}, "
                   f"{si(o['residual'], 'Hz')} off the fit")
    click.echo(f"written: {doc['profile']}" + ("" if doc["layout_kept"] else " (written from its data: comments "
                                                                            "of the old profile were not kept)"))
    click.echo(f"plot: {doc['plot']}", err=True)
