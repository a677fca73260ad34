"""``sweepgen export SCENARIO --format FMT -o DIR``: check, render and write the sample table."""

from __future__ import annotations

import sys

import click

from sweepgen._format import si
from sweepgen.cli._common import (OutputFolder, echo_warnings, emit_json, generator_option, handles_errors,
                                  json_option, laser_option, late_progress, option_quantity, options_named,
                                  profile_option, rate_option, table)

#: tables larger than this get a progress bar when stderr is a terminal
PROGRESS_BYTES = 8 << 20


def _options(pairs) -> dict:
    from sweepgen.errors import InputError

    options = {}
    for pair in pairs:
        key, sep, value = pair.partition("=")
        key = key.strip()
        if not sep or not key:
            raise InputError(f"expected KEY=VALUE, got {pair!r}", key="--option")
        options[key] = value.strip()
    return options


@click.command(short_help="Write the sample table and its sidecar.")
@click.argument("scenario")
@click.option("--format", "-f", "fmt", required=True, metavar="FMT",
              help="File driver: csv, raw or npy (or one an installed plug-in registers).")
@click.option("--output", "-o", "output", required=True, type=OutputFolder(), metavar="DIR",
              help="Folder to write into (created if needed, but not its parents).")
@rate_option
@click.option("--name", default=None, metavar="NAME",
              help="File name without extension (default: the scenario's file name).")
@click.option("--option", "-O", "option_pairs", multiple=True, metavar="KEY=VALUE",
              help="Driver option, repeatable: for raw dtype=native|int16|uint16|float32 and "
                   "byte_order=little|big; for npy byte_order.")
@laser_option
@generator_option
@json_option
@handles_errors
def command(scenario, fmt, output, rate, name, option_pairs, laser_ref, generator_ref, as_json):
    """Check SCENARIO, render one period of the sweep at the generator's sample
    rate and write it to DIR as a data file plus a JSON sidecar (sample rate,
    count, data type and byte order, scaling to drive units and to detuning,
    SHA-256, tool version, digests of the scenario and profiles).

    Refuses (exit 1, failed rules on stderr) when any check rule fails; never
    writes a table whose drive leaves the actuator's safe input range. The
    write is atomic: a failure leaves DIR as it was.

    \b
    Example:
      sweepgen export rb87-chopped-oven --format raw -o tables/
      sweepgen export my-scenario.toml -f raw -O dtype=uint16 -O byte_order=big -o tables/
      sweepgen export caf-buffer-gas -f csv -o tables/ --json
    """
    import sweepgen
    from sweepgen.errors import CheckFailed, InputError

    options = _options(option_pairs)
    if "name" in options:
        raise InputError("give the file name with --name", key="--option")
    with late_progress() as progress:
        def before_write(checked):
            echo_warnings(checked.report)
            info = checked.table().info
            show = info.nbytes > PROGRESS_BYTES and sys.stderr.isatty()
            progress.start(info.count, f"writing {output}", show=show)

        try:
            with options_named(options="--option", name="--name"):
                result = sweepgen.export(
                    scenario, fmt, output, name=name, options=options,
                    sample_rate=option_quantity(rate, "Hz", "--rate", "10 MSa/s"),
                    laser=profile_option("laser", laser_ref), generator=profile_option("generator", generator_ref),
                    progress=progress, before_write=before_write)
        except CheckFailed as exc:
            if not exc.findings:
                raise
            _refuse(exc.findings, as_json)
    info, doc = result.info, result.to_json()
    removed = doc.get("removed_partials")
    if removed:
        click.echo(f"removed {len(removed)} partial file(s) left in {output} by an interrupted export: "
                   f"{', '.join(removed)}", err=True)
    if as_json:
        emit_json(doc)
    else:
        _print(doc["title"], info, doc)


def _refuse(findings, as_json):
    """Name every failed rule on stderr (and the findings as JSON), then refuse: nothing is written."""
    from sweepgen.checker import CheckReport
    from sweepgen.errors import CheckFailed

    report = CheckReport(list(findings))
    fails = report.failures()
    for f in fails:
        click.echo(f"FAIL {f.rule}: {f.message}" + (f" (to fix: {f.advice})" if f.advice else ""), err=True)
    if as_json:
        emit_json({"ok": False, "written": False, "findings": [f.to_json() for f in report.ordered()]})
    raise CheckFailed(f"the sweep fails {len(fails)} check rule(s); nothing was written", findings=report.findings)


def _print(title, info, result):
    click.echo(title)
    rows = [("data file", result["paths"][0]), ("sidecar", result["paths"][1]),
            ("samples", f"{info.count} ({info.period_count} per period"
                        + (f" + {info.count - info.period_count} padding)" if info.count > info.period_count
                           else ")")),
            ("sample rate", si(info.sample_rate, "Sa/s")),
            ("values", f"{result['dtype']} ({result['bytes']} bytes)"),
            *_scaling_rows(result["scaling"]),
            ("file sha256", result["sha256"]),
            ("table_sha256", f"{result['table_sha256']} (the codes, as upload records them)")]
    if info.amplitude is not None:
        rows.insert(5, ("program", f"amplitude {si(info.amplitude, 'V')} pp, offset {si(info.offset, 'V')}"))
    for ch in result.get("channels", [])[1:]:
        rows.append((f"{ch['name']} (output {ch['output']})", f"{ch['paths'][0]} + sidecar {ch['paths'][1]}"))
    click.echo(table(rows))


def _scaling_rows(scaling):
    """How a stored value becomes the drive (and the generator code, when that differs), as in the sidecar."""
    drive, code = scaling["drive"], scaling["code"]
    rows = [("drive", f"{drive['offset']:.6g} + {drive['scale']:.6g} × value {drive['unit']}")]
    if (code["offset"], code["scale"]) != (0, 1):
        rows.append(("code", f"{code['offset']:.6g} + {code['scale']:.6g} × value"))
    return rows
