"""``sweepgen export SCENARIO --format FMT -o DIR``: check, render and write the sample table."""

from __future__ import annotations

import re

import click

from sweepgen._cli import emit_json, handles_errors, json_option, load_and_check, si, table

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


def _default_name(path) -> str:
    stem = re.sub(r"[^A-Za-z0-9_.+-]+", "-", path.stem).strip(".-")
    return stem or "sweep"


@click.command(short_help="Write the sample table and its sidecar.")
@click.argument("scenario")
@click.option("--format", "-f", "fmt", required=True, metavar="FMT",
              help="File driver: csv, raw or npy (or one an installed plug-in registers).")
@click.option("--output", "-o", "output", required=True, type=click.Path(file_okay=False), metavar="DIR",
              help="Folder to write into (created if needed).")
@click.option("--rate", default=None, metavar="RATE",
              help="Sample rate with its unit (e.g. '10 MSa/s'); overrides [drive] sample_rate.")
@click.option("--name", default=None, metavar="NAME",
              help="File name without extension (default: the scenario's file name).")
@click.option("--option", "-O", "option_pairs", multiple=True, metavar="KEY=VALUE",
              help="Driver option, repeatable: for raw dtype=native|int16|uint16|float32 and "
                   "byte_order=little|big; for npy byte_order.")
@click.option("--laser", "laser_ref", default=None, metavar="LASER",
              help="Laser profile (built-in key or path) instead of the scenario's.")
@click.option("--generator", "generator_ref", default=None, metavar="GENERATOR",
              help="Generator profile (built-in key or path) instead of the scenario's.")
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
    import sys

    from sweepgen import drivers, sidecar
    from sweepgen.drivers.base import Delivery
    from sweepgen.errors import CheckFailed, InputError
    from sweepgen.render import render
    from sweepgen.scenario import load_scenario

    driver = drivers.load(fmt, kind="file")()
    options = _options(option_pairs)
    if "name" in options:
        raise InputError("give the file name with --name", key="--option")
    sc = load_scenario(scenario)
    options["name"] = name if name is not None else _default_name(sc.path)
    if hasattr(driver, "check_options"):
        driver.check_options(options)             # bad options fail before any work
    _, report = load_and_check(sc, rate=rate, laser_ref=laser_ref, generator_ref=generator_ref)
    fails = report.failures()
    if fails:
        for f in fails:
            click.echo(f"FAIL {f.rule}: {f.message}" + (f" (to fix: {f.advice})" if f.advice else ""), err=True)
        if as_json:
            emit_json({"ok": False, "written": False, "findings": [f.to_json() for f in report.findings]})
        raise CheckFailed(f"the sweep fails {len(fails)} check rule(s); nothing was written",
                          findings=report.findings)
    if not as_json:
        for f in report.warnings():
            click.echo(f"warning: {f.rule}: {f.message}", err=True)

    laser, gen = report.laser, report.generator
    table_ = render(report.plan.schedule(), laser, gen, sc, rate_choice=report.rate)

    bar = progress = None
    if table_.info.nbytes > PROGRESS_BYTES and sys.stderr.isatty():
        bar = click.progressbar(length=table_.info.count, label=f"writing {output}", file=sys.stderr)
        bar.__enter__()
        state = {"done": 0}

        def progress(done, total):
            # bytes for binary files, samples for csv: scale to samples either way
            now = done * table_.info.count // max(total, 1)
            bar.update(now - state["done"])
            state["done"] = now

    delivery = Delivery(destination=str(output), generator=gen, options=options, progress=progress,
                        sidecar=sidecar.provenance(sc, laser, gen))
    try:
        result = driver.deliver(table_, delivery)
    finally:
        if bar is not None:
            bar.__exit__(None, None, None)

    info = table_.info
    doc = {"ok": True, "written": True, "scenario": str(sc.path), "title": sc.title, "laser": laser.key,
           "generator": gen.key, "format": fmt, **result,
           "period_count": info.period_count, "padding": info.count - info.period_count,
           "drive_unit": info.drive_unit, "code_scale": info.code_scale, "code_offset": info.code_offset,
           "amplitude": info.amplitude, "offset": info.offset,
           "warnings": [f.to_json() for f in report.warnings()]}
    if as_json:
        emit_json(doc)
        return
    click.echo(sc.title)
    rows = [("data file", result["paths"][0]), ("sidecar", result["paths"][1]),
            ("samples", f"{info.count} ({info.period_count} per period"
                        + (f" + {info.count - info.period_count} padding)" if info.count > info.period_count
                           else ")")),
            ("sample rate", si(info.sample_rate, "Sa/s")),
            ("values", f"{result['dtype']} ({result['bytes']} bytes)"),
            ("drive", f"{info.code_offset:.6g} + {info.code_scale:.6g} × code {info.drive_unit}"),
            ("sha256", result["sha256"])]
    if info.amplitude is not None:
        rows.insert(5, ("program", f"amplitude {si(info.amplitude, 'V')} pp, offset {si(info.offset, 'V')}"))
    click.echo(table(rows))
