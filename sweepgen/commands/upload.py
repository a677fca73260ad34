"""``sweepgen upload SCENARIO``: check, render and upload the sweep to a generator, verified."""

from __future__ import annotations

import click

from sweepgen._cli import emit_json, handles_errors, json_option, si, table

#: tables larger than this get a progress bar on stderr
PROGRESS_BYTES = 1 << 20

CAUTION = """\
CAUTION: switching the output on drives the laser.
  - Laser radiation: class 3B/4 beams. Wear eyewear for the wavelength, enclose the beams,
    follow your local laser-safety rules and laser safety officer.
  - Drive limits: overdriving a diode's modulation input or a piezo destroys it;
    high-voltage piezo amplifiers are a shock hazard.
  - Check the sweep on a scope and a wavemeter before connecting the laser."""


@click.command(short_help="Upload the sweep to a generator, verified.")
@click.argument("scenario")
@click.option("--resource", default=None, metavar="VISA_RESOURCE",
              help="VISA resource string of the generator (default: link.resource of its profile), "
                   "e.g. TCPIP::192.168.1.20::5025::SOCKET.")
@click.option("--serial-port", default=None, metavar="URL",
              help="Serial device or pyserial URL of a ramp board (default: link.port of its profile).")
@click.option("--backend", default=None, metavar="BACKEND",
              help="pyvisa backend: '@py' (pure Python, the default) or another, e.g. '@ivi'.")
@click.option("--generator", "generator_ref", default=None, metavar="GENERATOR",
              help="Generator profile (built-in key or path) instead of the scenario's.")
@click.option("--laser", "laser_ref", default=None, metavar="LASER",
              help="Laser profile (built-in key or path) instead of the scenario's.")
@click.option("--dry-run", is_flag=True, help="Check and render, print the exact command log; connect to nothing.")
@click.option("--arm", is_flag=True, help="Switch the output on after a verified upload (prints a caution first).")
@json_option
@handles_errors
def command(scenario, resource, serial_port, backend, generator_ref, laser_ref, dry_run, arm, as_json):
    """Check SCENARIO, render its table and upload it to the generator.

    Refuses (exit 1) when any check rule fails. Over VISA the sequence is:
    identify, output off, clear, format, upload (one IEEE 488.2 block), wait,
    error queue, verify (readback or checksum), function, rate, amplitude,
    offset, trigger, and output on only with --arm. Any failure switches the
    output off and exits 1 naming the step and what the instrument said. A ramp
    board (generator kind "board", or --serial-port) gets the framed serial
    protocol instead.

    \b
    Example:
      sweepgen emulate --port 5025 &
      sweepgen upload rb87-chopped-oven --dry-run
      sweepgen upload rb87-chopped-oven --resource TCPIP::127.0.0.1::5025::SOCKET
    """
    import sys

    from sweepgen import drivers
    from sweepgen._cli import load_and_check
    from sweepgen.checker import require_playable
    from sweepgen.drivers.base import Delivery
    from sweepgen.errors import InputError
    from sweepgen.render import render

    if resource is not None and serial_port is not None:
        raise InputError("give either --resource (VISA) or --serial-port (ramp board), not both",
                         key="--serial-port")
    sc, report = load_and_check(scenario, laser_ref=laser_ref, generator_ref=generator_ref)
    require_playable(report)
    gen = report.generator
    name = "serial" if (serial_port is not None or gen.kind == "board") else "visa"
    if name == "serial":
        if gen.kind != "board":
            raise InputError(f"generator '{gen.key}' is an arbitrary-waveform generator on a VISA link; "
                             f"--serial-port is for ramp boards (use --resource)", key="--serial-port")
        if resource is not None:
            raise InputError(f"generator '{gen.key}' is a ramp board on a serial link; use --serial-port",
                             key="--resource")
        if backend is not None:
            raise InputError("--backend chooses the VISA backend; a ramp board is reached through pyserial",
                             key="--backend")
        destination = serial_port or gen.link.address
        options = {}
    else:
        destination = resource or gen.link.address
        options = {"trigger_source": "EXT" if sc.pulsed else "IMM"}
        if backend is not None:
            options["backend"] = backend
    driver = drivers.load(name)()
    table_ = render(report.plan.schedule(), report.laser, gen, sc, rate_choice=report.rate)

    if arm and not dry_run:
        click.echo(CAUTION, err=True)
    bar = None
    progress = None
    if not dry_run and table_.info.nbytes > PROGRESS_BYTES:
        bar = click.progressbar(length=table_.info.nbytes, label=f"uploading to {destination}",
                                file=sys.stderr, show_eta=True)
        bar.__enter__()
        state = {"done": 0}

        def progress(done, total):
            bar.update(done - state["done"])
            state["done"] = done

    delivery = Delivery(destination=destination, generator=gen, arm=arm, dry_run=dry_run, progress=progress,
                        options=options)
    try:
        result = driver.deliver(table_, delivery)
    finally:
        if bar is not None:
            bar.__exit__(None, None, None)
    doc = {"scenario": str(sc.path), "title": sc.title, "generator": gen.key, "laser": report.laser.key,
           **result}
    if as_json:
        emit_json(doc)
        return
    _print(doc, table_.info, dry_run, arm)


def _print(doc, info, dry_run, arm):
    where = doc.get("destination")
    head = (f"{doc['title']}\n  {info.count} samples at {si(info.sample_rate, 'Sa/s')} "
            f"({si(info.duration, 's')} per period), {si(info.nbytes, 'B')}; generator {doc['generator']}, "
            f"driver {doc['driver']}")
    click.echo(head)
    if dry_run:
        click.echo(f"dry run: nothing was sent; the command log for {where}:")
        rows = []
        for entry in doc.get("log", []):
            if not isinstance(entry, dict):
                rows.append(("", "", "", str(entry)))
                continue
            command = entry.get("command") or entry.get("message", "")
            if entry.get("detail"):
                command = f"{command}  ({entry['detail']})"
            if entry.get("note"):
                command = f"{command}  [{entry['note']}]"
            rows.append((entry.get("step", ""), entry.get("kind", ""), entry.get("bytes", ""), command))
        click.echo(table(rows, headers=("step", "kind", "bytes", "command")))
        click.echo(f"total: {doc.get('bytes')} bytes" + ("; --arm would switch the output on last" if arm else ""))
        return
    rows = []
    for step in doc.get("steps", []):
        detail = step.get("detail") or step.get("reply") or step.get("identity") or ""
        duration = step.get("duration")
        rows.append((step.get("step"), "ok" if step.get("ok") else "FAILED",
                     "" if duration is None else si(duration, "s", 3), detail))
    if rows:
        click.echo(table(rows, headers=("step", "status", "time", "detail")))
    verification = doc.get("verification") or {}
    method = verification.get("method")
    if verification.get("ok"):
        crc = verification.get("instrument_crc32")
        verified = f"verified by {method}" + (f" (CRC-32 0x{crc:08x})" if isinstance(crc, int) else "")
    elif method in (None, "none"):
        verified = "NOT verified (the profile has no readback or checksum)"
    else:
        verified = f"verification: {verification}"
    duration = doc.get("duration")
    click.echo(f"uploaded to {where}: {doc.get('bytes')} bytes"
               + (f" in {si(duration, 's', 3)}" if duration else "") + f"; {verified}")
    if doc.get("armed"):
        click.echo("output: ON")
    else:
        click.echo("output: off" + ("" if arm else " (pass --arm to switch it on)"))
