"""``sweepgen emulate``: serve the virtual instrument (or the ramp-board emulator) on a TCP port."""

from __future__ import annotations

import re

import click

from sweepgen._cli import handles_errors

DEFAULT_PORT = 5025        # the usual port of raw-socket SCPI instruments (common practice)


def _profile_port(address: str, default: int) -> int:
    m = re.search(r"::(\d+)::SOCKET$", address or "", re.I) or re.search(r":(\d+)$", address or "")
    return int(m.group(1)) if m else default


@click.command(short_help="Serve the virtual instrument on a TCP port.")
@click.option("--host", default="127.0.0.1", show_default=True,
              help="Address to listen on (loopback: only this computer can connect).")
@click.option("--port", type=click.IntRange(0, 65535), default=None,
              help="TCP port (default: the one in the generator profile's link; 0 picks a free port).")
@click.option("--generator", "generator_ref", default=None,
              help="Generator profile whose limits the instrument enforces "
                   "(default virtual-awg, or demo-ramp-board with --board).")
@click.option("--board", is_flag=True, help="Serve the serial ramp-board emulator instead (frame protocol).")
@click.option("--identity", default=None, help="Reply to *IDN? (default sweepgen,virtual-awg,0,<version>).")
@click.option("--drop-after", type=click.IntRange(1), default=None, metavar="BYTES",
              help="Fault: close each connection after it has received this many bytes.")
@click.option("--delay", type=click.FloatRange(0), default=0.0, metavar="SECONDS",
              help="Fault: wait this long before every reply.")
@click.option("--mute", is_flag=True, help="Fault: never answer a query.")
@click.option("--error-after-upload", is_flag=True, help="Fault: report a hardware error after each upload.")
@click.option("--corrupt-readback", is_flag=True, help="Fault: flip one bit in every readback and checksum.")
@handles_errors
def command(host, port, generator_ref, board, identity, drop_after, delay, mute, error_after_upload,
            corrupt_readback):
    """Serve the virtual arbitrary-waveform generator until Ctrl-C, printing its
    VISA resource string. It speaks IEEE 488.2 and standard SCPI, enforces the
    generator profile's memory, sample rates and output range, and keeps an
    error queue; the fault options make it misbehave on purpose.

    \b
    Example:
      sweepgen emulate --port 5025 &
      sweepgen upload rb87-chopped-oven --resource TCPIP::127.0.0.1::5025::SOCKET
    """
    from sweepgen.errors import InputError
    from sweepgen.generator import load_generator

    if host not in ("127.0.0.1", "localhost", "::1"):
        click.echo(f"sweepgen: listening on {host}: other computers on that network can connect", err=True)
    if board:
        if identity or mute or error_after_upload or corrupt_readback or drop_after or delay:
            raise InputError("the fault and identity options belong to the virtual instrument, not to --board",
                             key="--board")
        from sweepgen import board as board_module

        gen = load_generator(generator_ref or "demo-ramp-board")
        if gen.kind != "board":
            raise InputError(f"generator '{gen.key}' is of kind '{gen.kind}'; --board needs a ramp board profile",
                             key="--generator")
        port = _profile_port(gen.link.address, 7450) if port is None else port

        def ready_board(bound_port):
            click.echo(f"socket://{host}:{bound_port}")
            click.echo(f"ramp-board emulator ({gen.key}) listening; Ctrl-C stops it", err=True)

        try:
            board_module.serve_forever(host, port, gen, faults=None, ready=ready_board)
        except KeyboardInterrupt:
            click.echo("ramp-board emulator stopped", err=True)
        except OSError as exc:
            raise InputError(f"cannot listen on {host}:{port} ({exc.strerror or exc})", key="--port") from None
        return

    from sweepgen.instrument import Faults, serve_forever

    gen = load_generator(generator_ref or "virtual-awg")
    if gen.kind != "awg":
        raise InputError(f"generator '{gen.key}' is a ramp board; serve it with --board", key="--generator")
    port = _profile_port(gen.link.address, DEFAULT_PORT) if port is None else port
    faults = Faults(drop_after=drop_after, delay=delay, mute=mute, error_after_upload=error_after_upload,
                    corrupt_readback=corrupt_readback)

    def ready(resource):
        click.echo(resource)
        active = faults.active()
        note = f" with faults: {', '.join(active)}" if active else ""
        click.echo(f"virtual instrument ({gen.key}) listening{note}; Ctrl-C stops it", err=True)

    try:
        serve_forever(host, port, gen, faults=faults, ready=ready, identity=identity)
    except KeyboardInterrupt:
        click.echo("virtual instrument stopped", err=True)
    except OSError as exc:
        raise InputError(f"cannot listen on {host}:{port} ({exc.strerror or exc})", key="--port") from None
