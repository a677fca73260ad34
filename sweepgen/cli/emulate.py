"""``sweepgen emulate``: serve the virtual instrument (or the ramp-board emulator) on a TCP port."""

from __future__ import annotations

import contextlib

import click

from sweepgen.cli._common import handles_errors
from sweepgen.emulators.board import ALWAYS, FAULTS as BOARD_FAULTS
from sweepgen.wire.frames import REQUESTS, type_name

#: request types of the frame protocol a board fault can strike
FRAME_TYPES = tuple(type_name(t) for t in sorted(REQUESTS))


class _Count(click.ParamType):
    """A fault count: a number of frames (the first N eligible ones) or 'always'."""

    name = "COUNT"

    def convert(self, value, param, ctx):
        if isinstance(value, int) and not isinstance(value, bool):
            number = value
        else:
            text = str(value).strip().lower()
            if text in ALWAYS:
                return "always"
            try:
                number = int(text)
            except ValueError:
                self.fail(f"expected a number of frames or 'always', got {value!r}", param, ctx)
        if number < 1:
            self.fail(f"expected at least 1 frame (or 'always'), got {number}", param, ctx)
        return number


def _board_fault_options(command):
    """Add --corrupt, --drop, ... (one per board fault), --fault-on, --fault-skip and --stall-time."""
    extra = [
        click.option("--stall-time", type=click.FloatRange(0, min_open=True), default=None, metavar="SECONDS",
                     help="Board fault timing: how long a stalled frame waits for its reply "
                          "(default twice the profile's link timeout)."),
        click.option("--fault-skip", type=click.IntRange(0), default=None, metavar="N",
                     help="Board faults: let the first N eligible frames pass unharmed (default 1, so a "
                          "fault strikes mid-transfer)."),
        click.option("--fault-on", type=click.Choice(("any", *FRAME_TYPES), case_sensitive=False),
                     multiple=True, metavar="TYPE",
                     help="Board faults: the message type they strike (repeat for several; 'any' for every "
                          f"request; default data). Types: {', '.join(FRAME_TYPES)}."),
    ]
    for kind in reversed(BOARD_FAULTS):
        extra.append(click.option(f"--{kind.replace('_', '-')}", kind, type=_Count(), default=None,
                                  help=f"Board fault (--board): {BOARD_FAULTS[kind]} (COUNT: a number, "
                                       "or 'always')."))
    for option in extra:
        command = option(command)
    return command


@click.command(short_help="Serve the virtual instrument (or the ramp-board emulator) on a TCP port.")
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
@click.option("--protocol-version", type=click.IntRange(1, 2), default=None, metavar="N",
              help="Board (--board): the highest frame-protocol version it speaks (default 2; "
                   "1 is a board without trigger or channels).")
@click.option("--trigger-sources", default=None, metavar="LIST",
              help="Board (--board, version 2): the trigger sources it offers, comma-separated among "
                   "free, external, software (default all; 'free' is a board that cannot be triggered).")
@_board_fault_options
@handles_errors
def command(host, port, generator_ref, board, identity, drop_after, delay, mute, error_after_upload,
            corrupt_readback, protocol_version, trigger_sources, fault_on, fault_skip, stall_time, **board_faults):
    """Serve the virtual arbitrary-waveform generator until Ctrl-C, printing its
    VISA resource string. It speaks IEEE 488.2 and standard SCPI, enforces the
    generator profile's memory, sample rates and output range, and keeps an
    error queue; the fault options make it misbehave on purpose. It serves
    several clients at once (when every place is taken, an idle one makes
    room), closes connections that stay silent, and prints a line on stderr
    when a connection opens and when it closes.

    With --board it serves the serial ramp-board emulator instead (the frame
    protocol, reachable as socket://HOST:PORT with pyserial). Its fault options
    (--corrupt, --drop, --refuse, --stall, --reset, --corrupt-reply,
    --corrupt-memory) take a COUNT: a number of frames that are harmed before
    the board behaves again (a transient fault the driver should retry
    through), or 'always' (a persistent fault the upload must fail on).
    --protocol-version 1 makes it an older board (no trigger, one channel);
    --trigger-sources free makes it a board that cannot be triggered. It
    prints a line on stderr for each connection and each state change
    (session started, upload begun, verified, committed, trigger set,
    armed, disarmed, reset).

    \b
    Examples:
      sweepgen emulate --port 5025 &
      sweepgen upload rb87-chopped-oven --resource TCPIP::127.0.0.1::5025::SOCKET
    \b
      sweepgen emulate --board --port 7450 --drop 2 --reset 1 &
      sweepgen upload caf-buffer-gas --serial-port socket://127.0.0.1:7450
    """
    from sweepgen.errors import InputError

    board_faults = {kind: count for kind, count in board_faults.items() if count is not None}
    timing = {"--fault-on": bool(fault_on), "--fault-skip": fault_skip is not None,
              "--stall-time": stall_time is not None}
    if host not in ("127.0.0.1", "localhost", "::1"):
        click.echo(f"sweepgen: warning: listening on {host}: other computers on that network can connect", err=True)
    if board:
        if identity or mute or error_after_upload or corrupt_readback or drop_after or delay:
            raise InputError("the fault and identity options belong to the virtual instrument, not to --board",
                             key="--board")
        faults = _board_faults(board_faults, timing, fault_on, fault_skip, stall_time)
        _serve_board(host, port, generator_ref, faults, _board_kind(protocol_version, trigger_sources))
        return
    if protocol_version is not None or trigger_sources is not None:
        raise InputError("--protocol-version and --trigger-sources describe the ramp board; they need --board",
                         key="--protocol-version" if protocol_version is not None else "--trigger-sources")
    given = [f"--{kind.replace('_', '-')}" for kind in board_faults]
    given += [name for name, used in timing.items() if used]
    if given:
        raise InputError("the ramp-board fault options need --board", key=given[0])
    from sweepgen.emulators.instrument import Faults

    faults = Faults(drop_after=drop_after, delay=delay, mute=mute, error_after_upload=error_after_upload,
                    corrupt_readback=corrupt_readback)
    _serve_instrument(host, port, generator_ref, faults, identity)


def _board_faults(counts: dict, timing: dict, fault_on, fault_skip, stall_time) -> dict:
    """The board's fault switches from the options; how faults strike needs a fault to strike."""
    from sweepgen.errors import InputError

    faults = dict(counts)
    if not faults:
        given = [name for name, used in timing.items() if used]
        if given:
            raise InputError("sets how board faults strike, but no board fault is switched on (--corrupt, "
                             "--drop, --refuse, --stall, --reset, --corrupt-reply or --corrupt-memory)",
                             key=given[0])
        return faults
    if fault_on:
        kinds = {t.lower() for t in fault_on}
        faults["on"] = "any" if "any" in kinds else sorted(kinds)
    if fault_skip is not None:
        faults["skip"] = fault_skip
    if stall_time is not None:
        faults["stall_time"] = stall_time
    return faults


def _load(generator_ref, default: str, kind: str, wrong: str):
    from sweepgen.errors import InputError
    from sweepgen.generator import load_generator

    gen = load_generator(generator_ref or default)
    if gen.kind != kind:
        raise InputError(wrong.format(key=gen.key, kind=gen.kind), key="--generator")
    return gen


def _board_kind(version, sources) -> dict:
    """The emulated board's version and trigger sources from the options."""
    from sweepgen.emulators._board_protocol import ALL_SOURCES
    from sweepgen.errors import InputError

    out = {} if version is None else {"version": version}
    if sources is not None:
        names = [s.strip().lower() for s in sources.split(",") if s.strip()]
        if not names or set(names) - set(ALL_SOURCES):
            raise InputError(f"expected trigger sources among {', '.join(ALL_SOURCES)}, got {sources!r}",
                             key="--trigger-sources")
        if version == 1:
            raise InputError("a version-1 board has no trigger sources", key="--trigger-sources")
        out["sources"] = tuple(names)
    return out


def _serve_board(host, port, generator_ref, faults: dict, kind: dict) -> None:
    from sweepgen.emulators import board

    gen = _load(generator_ref, board.DEFAULT_GENERATOR, "board",
                "generator '{key}' is of kind '{kind}'; --board needs a ramp board profile")
    port = board.listen_port(gen, port)
    active = board.FaultPlan.parse(faults, default_stall=2.0 * gen.link.timeout).describe()

    def ready(bound_port):
        click.echo(f"socket://{f'[{host}]' if ':' in host else host}:{bound_port}")   # pyserial URL
        note = f" with faults: {', '.join(active)}" if active else ""
        click.echo(f"ramp-board emulator ({gen.key}) listening{note}; Ctrl-C stops it", err=True)

    with _listening(host, port, "ramp-board emulator"):
        board.serve_forever(host, port, gen, faults=faults or None, ready=ready, log=_log, **kind)


def _serve_instrument(host, port, generator_ref, faults, identity) -> None:
    from sweepgen.emulators import instrument

    gen = _load(generator_ref, instrument.DEFAULT_GENERATOR, "awg",
                "generator '{key}' is a ramp board; serve it with --board")
    port = instrument.listen_port(gen, port)

    def ready(resource):
        click.echo(resource)
        active = faults.active()
        note = f" with faults: {', '.join(active)}" if active else ""
        click.echo(f"virtual instrument ({gen.key}) listening{note}; Ctrl-C stops it", err=True)

    with _listening(host, port, "virtual instrument"):
        instrument.serve_forever(host, port, gen, faults=faults, ready=ready, identity=identity, log=_log)


def _log(line: str) -> None:
    """A line per connection opened or closed (and per state change of a board), on stderr."""
    click.echo(line, err=True)


@contextlib.contextmanager
def _listening(host, port, what: str):
    """Ctrl-C stops the server with a note; a port that cannot be bound is a usage error."""
    from sweepgen.errors import InputError

    try:
        yield
    except KeyboardInterrupt:
        click.echo(f"{what} stopped", err=True)
    except OSError as exc:
        import socket

        unresolved = isinstance(exc, socket.gaierror) or exc.errno in (socket.EAI_NONAME, socket.EAI_AGAIN)
        key = "--host" if unresolved else "--port"
        raise InputError(f"cannot listen on {host}:{port} ({exc.strerror or exc})", key=key) from None
