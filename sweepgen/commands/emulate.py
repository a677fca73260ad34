"""``sweepgen emulate``: serve the virtual instrument (or the ramp-board emulator) on a TCP port."""

from __future__ import annotations

import re

import click

from sweepgen._cli import handles_errors

DEFAULT_PORT = 5025        # the usual port of raw-socket SCPI instruments (common practice)
DEFAULT_BOARD_PORT = 7450  # sweepgen's own choice for the board emulator (as in demo-ramp-board's link)


#: the board emulator's fault switches (sweepgen.board.FAULT_KINDS) with their option help
BOARD_FAULTS = {
    "corrupt": "flip one bit of COUNT received frames: they fail their CRC and are refused",
    "drop": "lose COUNT frames without a reply",
    "refuse": "refuse COUNT frames as busy",
    "stall": "answer COUNT frames only after --stall-time",
    "reset": "reset on COUNT frames, mid-transfer: the unfinished upload and the session are lost",
    "corrupt_reply": "flip one bit of the reply to COUNT frames",
    "corrupt_memory": "store COUNT data frames with one bit flipped: the whole-table CRC then fails",
}
#: request types of the frame protocol a board fault can strike (sweepgen.framing.REQUESTS)
FRAME_TYPES = ("hello", "begin", "data", "end", "commit", "status", "arm", "disarm")


class _Count(click.ParamType):
    """A fault count: a number of frames (the first N eligible ones) or 'always'."""

    name = "COUNT"

    def convert(self, value, param, ctx):
        if isinstance(value, int) and not isinstance(value, bool):
            number = value
        else:
            text = str(value).strip().lower()
            if text in ("always", "persistent"):
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


def _profile_port(address: str, default: int) -> int:
    m = re.search(r"::(\d+)::SOCKET$", address or "", re.I) or re.search(r":(\d+)$", address or "")
    return int(m.group(1)) if m else default


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
@_board_fault_options
@handles_errors
def command(host, port, generator_ref, board, identity, drop_after, delay, mute, error_after_upload,
            corrupt_readback, fault_on, fault_skip, stall_time, **board_faults):
    """Serve the virtual arbitrary-waveform generator until Ctrl-C, printing its
    VISA resource string. It speaks IEEE 488.2 and standard SCPI, enforces the
    generator profile's memory, sample rates and output range, and keeps an
    error queue; the fault options make it misbehave on purpose.

    With --board it serves the serial ramp-board emulator instead (the frame
    protocol, reachable as socket://HOST:PORT with pyserial). Its fault options
    (--corrupt, --drop, --refuse, --stall, --reset, --corrupt-reply,
    --corrupt-memory) take a COUNT: a number of frames that are harmed before
    the board behaves again (a transient fault the driver should retry
    through), or 'always' (a persistent fault the upload must fail on).

    \b
    Examples:
      sweepgen emulate --port 5025 &
      sweepgen upload rb87-chopped-oven --resource TCPIP::127.0.0.1::5025::SOCKET
    \b
      sweepgen emulate --board --port 7450 --drop 2 --reset 1 &
      sweepgen upload caf-buffer-gas --serial-port socket://127.0.0.1:7450
    """
    from sweepgen.errors import InputError
    from sweepgen.generator import load_generator

    board_faults = {kind: count for kind, count in board_faults.items() if count is not None}
    board_timing = {"--fault-on": bool(fault_on), "--fault-skip": fault_skip is not None,
                    "--stall-time": stall_time is not None}
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
        port = _profile_port(gen.link.address, DEFAULT_BOARD_PORT) if port is None else port
        faults = dict(board_faults)
        if faults:
            if fault_on:
                kinds = {t.lower() for t in fault_on}
                faults["on"] = "any" if "any" in kinds else sorted(kinds)
            if fault_skip is not None:
                faults["skip"] = fault_skip
            if stall_time is not None:
                faults["stall_time"] = stall_time
        else:
            given = [name for name, used in board_timing.items() if used]
            if given:
                raise InputError("sets how board faults strike, but no board fault is switched on (--corrupt, "
                                 "--drop, --refuse, --stall, --reset, --corrupt-reply or --corrupt-memory)",
                                 key=given[0])
        active = board_module.FaultPlan.parse(faults, default_stall=2.0 * gen.link.timeout).describe()

        def ready_board(bound_port):
            click.echo(f"socket://{f'[{host}]' if ':' in host else host}:{bound_port}")   # pyserial URL
            note = f" with faults: {', '.join(active)}" if active else ""
            click.echo(f"ramp-board emulator ({gen.key}) listening{note}; Ctrl-C stops it", err=True)

        try:
            board_module.serve_forever(host, port, gen, faults=faults or None, ready=ready_board)
        except KeyboardInterrupt:
            click.echo("ramp-board emulator stopped", err=True)
        except OSError as exc:
            raise InputError(f"cannot listen on {host}:{port} ({exc.strerror or exc})", key="--port") from None
        return

    given = [f"--{kind.replace('_', '-')}" for kind in board_faults]
    given += [name for name, used in board_timing.items() if used]
    if given:
        raise InputError("the ramp-board fault options need --board", key=given[0])
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
