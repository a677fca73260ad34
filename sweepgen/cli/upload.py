"""``sweepgen upload SCENARIO``: check, render and upload the sweep to a generator, verified."""

from __future__ import annotations

import click

from sweepgen._format import si
from sweepgen.cli._common import (echo_warnings, emit_json, generator_option, handles_errors, json_option,
                                  late_progress, laser_option, profile_option, table)

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
@generator_option
@laser_option
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
    from sweepgen.errors import InputError

    if resource is not None and serial_port is not None:
        raise InputError("give either --resource (VISA) or --serial-port (ramp board), not both",
                         key="--serial-port")
    import sweepgen

    with late_progress() as progress:
        def before_send(checked, link):
            echo_warnings(checked.report)                  # before anything reaches the instrument
            if arm and not dry_run:
                click.echo(CAUTION, err=True)
            nbytes = checked.table().info.nbytes
            show = not dry_run and nbytes > PROGRESS_BYTES
            progress.start(nbytes, f"uploading to {link.destination}", show=show)

        result = sweepgen.upload(scenario, resource, serial_port=serial_port, backend=backend, dry_run=dry_run,
                                 arm=arm, laser=profile_option("laser", laser_ref),
                                 generator=profile_option("generator", generator_ref), progress=progress,
                                 before_send=before_send)
    doc, info = result.to_json(), result.info
    if as_json:
        emit_json(doc)
        return
    _print(doc, info, dry_run, arm)


def _print(doc, info, dry_run, arm):
    where = doc.get("destination")
    head = (f"{doc['title']}\n  {info.count} samples at {si(info.sample_rate, 'Sa/s')} "
            f"({si(info.duration, 's')} per period), {si(info.nbytes, 'B')}; generator {doc['generator']}, "
            f"driver {doc['driver']}")
    click.echo(head)
    prov = doc.get("provenance") or {}
    click.echo(f"  table_sha256 {doc.get('table_sha256')} (the codes sent; an exported table's sidecar "
               f"carries the same digest)")
    for what in ("scenario", "laser", "generator"):
        if isinstance(prov.get(what), dict):
            click.echo(f"  {what} {prov[what]['file']} sha256 {prov[what]['sha256']}")
    for ch in doc.get("channels", []):
        click.echo(f"  output {ch['output']}: {ch['name']}, table_sha256 {ch['table_sha256']}")
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
    outputs = doc.get("arm_order")
    what = "output" if not outputs else f"outputs {', '.join(str(n) for n in outputs)}"
    if doc.get("armed"):
        click.echo(f"{what}: ON" + (" (switched on in this order, each read back)" if outputs else ""))
    else:
        click.echo(f"{what}: off" + ("" if arm else f" (pass --arm to switch {'them' if outputs else 'it'} on)"))
    for line in _read_back(doc):
        click.echo(line)


def _read_back(doc) -> list[str]:
    """One line per output whose state was read back (``output_state``): its state as last read, and
    the query and answer that read it."""
    state = doc.get("output_state")
    if not isinstance(state, dict):
        return []
    return [f"  output {e['output']}: {'ON' if e['state'] == 'on' else 'off'} (read back: {e['query']} answered "
            f"{e['reply']})" for e in state.get("outputs", [state])]
