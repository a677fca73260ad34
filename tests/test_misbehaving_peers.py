"""Instruments and boards that misbehave, written here, on real loopback sockets.

Each peer is a small server of its own (not the emulators): an SCPI instrument
that trickles, stalls, talks without end, answers wrongly or late, or ignores
the switch-off; a ramp board (from ``drivers/serial_protocol.md``) that does
the same or refuses DISARM. Every case runs ``sweepgen upload ... --arm`` in a
child process and checks the exit code, the message, that no traceback and no
output-on ever reached the peer, and the time taken: at most the sum of the
reply deadlines the failure can use up (``sweepgen.wire.bounds``), plus the
time the same command needs for a dry run, plus generous slack for a loaded
machine. The child's peak memory is measured too.
"""

from __future__ import annotations

import itertools
import os
import re
import socket
import struct
import subprocess
import sys
import threading
import time
import zlib

import pytest

from sweepgen import catalog

from conftest import DocBoard

pytestmark = pytest.mark.slow

SCENARIO = "rb87-chopped-oven"           # 160000 int16 samples for an AWG (320 kB)
BOARD_SCENARIO = "caf-buffer-gas"         # 100000 tuning words for a ramp board (400 kB)
TIMEOUT = 1.0                             # s, the link timeout of the profiles below
SLACK = 15.0                              # s, for a loaded 2-core machine; the deadlines are what is tested
MEMORY_SLACK = 64 << 20                   # bytes of peak memory above a dry run


# --------------------------------------------------------------------------- running the command
class Run:
    """``python -m sweepgen ARGS`` in a child process: exit code, output, wall time and peak memory."""

    def __init__(self, *args, cwd, limit: float = 120.0):
        t0 = time.monotonic()
        proc = subprocess.Popen([sys.executable, "-m", "sweepgen", *args], cwd=cwd, stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE)
        out, err = [], []
        readers = [threading.Thread(target=lambda f, b: b.append(f.read()), args=(proc.stdout, out)),
                   threading.Thread(target=lambda f, b: b.append(f.read()), args=(proc.stderr, err))]
        for reader in readers:
            reader.start()
        killer = threading.Timer(limit, proc.kill)        # a hang fails the test instead of stalling it
        killer.start()
        _, status, usage = os.wait4(proc.pid, 0)
        killer.cancel()
        for reader in readers:
            reader.join()
        self.seconds = time.monotonic() - t0
        self.code = os.waitstatus_to_exitcode(status)
        self.peak_bytes = usage.ru_maxrss * 1024           # Linux reports KiB
        self.stdout = out[0].decode(errors="replace")
        self.stderr = err[0].decode(errors="replace")
        proc.stdout.close()
        proc.stderr.close()

    def error(self) -> str:
        lines = [line for line in self.stderr.splitlines() if line.startswith("sweepgen: error:")]
        assert len(lines) == 1, self.stderr
        return lines[0]

    def check_failure(self, words, ending: str, deadlines: float, baseline: "Run") -> None:
        """Exit 1 with one line holding ``words`` and ending with ``ending``, no traceback, within
        ``deadlines`` s (plus the baseline's time and slack), in the baseline's memory plus slack."""
        assert self.code == 1, self.stderr
        error = self.error()
        for word in words:
            assert word in error
        assert error.endswith(ending)
        assert "Traceback" not in self.stderr
        assert self.seconds < baseline.seconds + deadlines + SLACK
        assert self.peak_bytes < baseline.peak_bytes + MEMORY_SLACK


def _profile(tmp_path, name: str, output_state: bool = True, **link) -> str:
    """The built-in virtual-awg profile for a peer answering ``peer,...``, with a 1 s link timeout."""
    text = catalog.builtin_dir("generators").joinpath("virtual-awg.toml").read_text()
    text = text.replace('identity_pattern = "^sweepgen,virtual-awg,"', 'identity_pattern = "^peer,"')
    text = text.replace('timeout = "5 s"', f'timeout = "{link.get("timeout", "1 s")}"')
    text = text.replace('throughput = "20 MB/s"', f'throughput = "{link.get("throughput", "20 MB/s")}"')
    text = re.sub(r'^readback = .*$', 'checksum = "TRAC:DATA:CRC? {name}"', text, flags=re.M)
    if not output_state:
        text = re.sub(r"^output_state = .*$", "", text, flags=re.M)
    path = tmp_path / f"{name}.toml"
    path.write_text(text)
    return str(path)


# --------------------------------------------------------------------------- a peer on a loopback port
class Listening:
    """A loopback listener that hands each connection to ``self._serve(conn, number)`` in a thread."""

    def _listen(self):
        self.stop = threading.Event()
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.listener.settimeout(0.1)
        self.port = self.listener.getsockname()[1]
        self.thread = threading.Thread(target=self._accept, daemon=True)

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.stop.set()
        self.thread.join(5)
        self.listener.close()

    def _accept(self):
        number = itertools.count(1)
        while not self.stop.is_set():
            try:
                conn, _ = self.listener.accept()
            except socket.timeout:
                continue
            threading.Thread(target=self._serve, args=(conn, next(number)), daemon=True).start()

    def _recv(self, conn) -> bytes:
        """The next bytes from ``conn``; b"" when it closed or the peer is stopping."""
        while not self.stop.is_set():
            try:
                return conn.recv(65536)
            except socket.timeout:
                continue
        return b""


# --------------------------------------------------------------------------- an SCPI instrument
class ScpiPeer(Listening):
    """An arbitrary-waveform generator that answers like a well-behaved one unless told otherwise.

    ``misbehave(command, connection)`` returns None (answer normally) or one of
    ``("text", reply)``, ``("silent",)``, ``("trickle", seconds_per_byte)``
    (bytes without a terminator, forever), ``("endless",)`` (bytes as fast as the
    socket takes them, forever) or ``("late", reply, seconds)``. Every command
    of every connection is recorded in ``commands``.
    """

    def __init__(self, misbehave=None, *, output=False, ignore_off=False):
        self.misbehave = misbehave or (lambda command, connection: None)
        self.output = output
        self.ignore_off = ignore_off
        self.commands: list[tuple[int, str]] = []
        self.traces: dict[str, bytes] = {}
        self._listen()
        self.resource = f"TCPIP::127.0.0.1::{self.port}::SOCKET"

    @property
    def ever_on(self) -> bool:
        return any(re.match(r"OUTP\d*:STAT ON", text) for _, text in self.commands)

    def _serve(self, conn, number):
        conn.settimeout(0.1)
        buf = bytearray()
        with conn:
            try:
                while not self.stop.is_set():
                    message = self._message(conn, buf)
                    if message is None:
                        return
                    for command in message.split(";"):
                        self._command(conn, command.strip(), number)
            except OSError:
                return

    def _more(self, conn, buf) -> bool:
        data = self._recv(conn)
        buf += data
        return bool(data)

    def _message(self, conn, buf):
        """The next message up to its newline; a definite-length block inside it is taken by count."""
        while True:
            nl = buf.find(b"\n")
            block = re.search(rb"#([1-9])", buf)
            if block and (nl < 0 or block.start() < nl):
                digits = int(block.group(1))
                while len(buf) < block.end() + digits:
                    if not self._more(conn, buf):
                        return None
                count = int(buf[block.end():block.end() + digits])
                start = block.end() + digits
                while len(buf) < start + count + 1:
                    if not self._more(conn, buf):
                        return None
                self.traces["SWEEP"] = bytes(buf[start:start + count])
                text = buf[:block.start()].decode() + f"<block {count}>"
                del buf[:start + count + 1]
                return text
            if nl >= 0:
                text = buf[:nl].decode(errors="replace")
                del buf[:nl + 1]
                return text
            if not self._more(conn, buf):
                return None

    def _command(self, conn, command, number):
        self.commands.append((number, command))
        plan = self.misbehave(command, number)
        if plan is None:
            reply = self._answer(command)
            if reply is not None:
                conn.sendall(reply.encode() + b"\n")
            return
        kind = plan[0]
        if kind == "text":
            conn.sendall(plan[1].encode() + b"\n")
        elif kind == "late":
            if not self.stop.wait(plan[2]):
                conn.sendall(plan[1].encode() + b"\n")
        elif kind == "trickle":
            while not self.stop.wait(plan[1]):
                conn.sendall(b"x")
        elif kind == "endless":
            chunk = b"y" * 65536
            while not self.stop.is_set():
                conn.sendall(chunk)

    def _answer(self, command):
        if command == "*IDN?":
            return "peer,awg,0,1"
        if command == "SYST:ERR?":
            return '0,"No error"'
        if command == "*OPC?":
            return "1"
        if re.fullmatch(r"OUTP\d*:STAT\?", command):
            return "1" if self.output else "0"
        if command.startswith("TRAC:DATA:CRC?"):
            return str(zlib.crc32(self.traces.get("SWEEP", b"")))
        if re.fullmatch(r"OUTP\d*:STAT ON", command):
            self.output = True
        elif re.fullmatch(r"OUTP\d*:STAT OFF", command) and not self.ignore_off:
            self.output = False
        return None


@pytest.fixture(scope="module")
def dry_run(tmp_path_factory):
    """Time and peak memory of the same command that connects to nothing (render and check included)."""
    tmp = tmp_path_factory.mktemp("dry")
    return Run("upload", SCENARIO, "--generator", _profile(tmp, "peer-awg"), "--dry-run", cwd=tmp)


def upload(peer, profile, tmp_path):
    return Run("upload", SCENARIO, "--generator", profile, "--resource", peer.resource, "--arm", cwd=tmp_path)


def when(name, reply):
    """Misbehave on the commands ``name`` only."""
    return lambda command, connection: reply if command == name else None


DATA_TIMEOUT = TIMEOUT + 2 * 320_031 / 20e6      # timeout + 2 N / throughput for the upload message
# (what the peer does, [what the message says], how it ends, reply deadlines the failure may use up)
SCPI_CASES = {
    "trickles": (when("*IDN?", ("trickle", 0.2)), {},
                 ["step 'identify': no complete answer within 1 s"],
                 "output switched off (confirmed on a new connection)", 2 * TIMEOUT),
    "stalls": (when("*OPC?", ("silent",)), {},
               ["step 'wait': no answer within"],
               "output switched off (confirmed on a new connection)", DATA_TIMEOUT + TIMEOUT),
    "talks-without-end": (when("*IDN?", ("endless",)), {},
                          ["step 'identify': the reply runs past 4096 bytes without its terminator"],
                          "output switched off (confirmed on a new connection)", TIMEOUT),
    "opc-answers-0": (when("*OPC?", ("text", "0")), {},
                      ["step 'wait': the completion query did not answer 1 (instrument said: 0)"],
                      "output switched off (confirmed on the same connection)", 2 * TIMEOUT),
    "opc-answers-garbage": (when("*OPC?", ("text", "banana")), {},
                            ["step 'wait': the completion query did not answer 1 (instrument said: banana)"],
                            "output switched off (confirmed on the same connection)", 2 * TIMEOUT),
    "malformed-output-state": (when("OUTP1:STAT?", ("text", "maybe")), {},
                               ["step 'output_off': the output-state reply is not 0, 1, OFF or ON "
                                "(instrument said: maybe)"],
                               "could not confirm that the output is off: check the instrument before "
                               "touching the setup", 3 * TIMEOUT),
    "ignores-switch-off": (None, {"output": True, "ignore_off": True},
                           ["step 'output_off': the instrument reports its output ON after output off "
                            "(instrument said: 1); asked again, on a new connection too, it still does: "
                            "the output may still be ON"],
                           "check the output by hand before touching the setup", 3 * TIMEOUT),
}


@pytest.mark.parametrize("case", list(SCPI_CASES))
def test_an_instrument_that_misbehaves(case, tmp_path, dry_run):
    misbehave, state, words, ending, deadlines = SCPI_CASES[case]
    with ScpiPeer(misbehave, **state) as peer:
        run = upload(peer, _profile(tmp_path, "peer-awg"), tmp_path)
    run.check_failure(words, ending, deadlines, dry_run)
    assert not peer.ever_on                                   # --arm was given, and never acted on


def test_a_late_reply_is_never_taken_for_the_confirmation(tmp_path, dry_run):
    # every *OPC? is answered 1.5 s late (the timeout is 1 s), and the profile has no output-state
    # query: the late "1" to the upload's completion query must not pass for the answer to the
    # completion query after the switch-off, so the switch-off cannot be confirmed
    with ScpiPeer(when("*OPC?", ("late", "1", 1.5))) as peer:
        run = upload(peer, _profile(tmp_path, "no-state", output_state=False), tmp_path)
    run.check_failure(["step 'wait': no answer within"],
                      "could not confirm that the output is off: check the instrument before touching the setup",
                      DATA_TIMEOUT + TIMEOUT, dry_run)
    assert not peer.ever_on


def test_a_well_behaved_peer_takes_the_upload(tmp_path, dry_run):
    # the peers above differ from this one only in what they are told to do wrong
    with ScpiPeer() as peer:
        run = upload(peer, _profile(tmp_path, "peer-awg"), tmp_path)
    assert run.code == 0, run.stderr
    assert peer.ever_on and peer.output                       # --arm
    assert "output: ON" in run.stdout


def test_an_absurd_throughput_or_timeout_is_refused_not_a_traceback(tmp_path):
    # 1e-300 B/s would make the upload's deadline overflow; 1e300 s would never end: both lie far outside
    # their plausible ranges, so the profile is refused (exit 2) before anything connects (the deadlines
    # would clamp them anyway: tests/test_wire_bounds.py)
    for name, key, value in [("slow", "throughput", "1e-300 B/s"), ("patient", "timeout", "1e300 s")]:
        with ScpiPeer() as peer:
            run = upload(peer, _profile(tmp_path, name, **{key: value}), tmp_path)
        assert run.code == 2, run.stderr
        assert f"key 'link.{key}'" in run.stderr and run.stderr.count("\n") == 1
        assert "Traceback" not in run.stderr and not peer.ever_on


# --------------------------------------------------------------------------- a ramp board
class BoardPeer(Listening, DocBoard):
    """The board of the protocol document on a loopback socket, told to misbehave.

    ``fault`` is one of ``"trickle"`` (every reply a byte at a time, 0.2 s
    apart), ``"stall"`` (no reply after HELLO), ``"endless"`` (after HELLO,
    noise without end instead of replies), ``"malformed"`` (STATUS replies of
    the wrong length), ``"refuse-disarm"``, ``"ignore-disarm"`` (acknowledges
    DISARM and stays armed) or ``"late"`` (answers BEGIN 6.5 s late, after the
    host gave up on it, and from then on never answers DISARM: a host that took
    the late reply for the confirmation of its DISARM would say "switched off").
    """

    def __init__(self, fault: str, *, armed: bool = False):
        super().__init__(memory=262144, rates=(100_000, 250_000, 500_000, 1_000_000), max_payload=4100)
        self.fault = fault
        self.armed = armed
        self.requests: list[int] = []          # message types received, in order
        self._listen()
        self.url = f"socket://127.0.0.1:{self.port}"

    @property
    def ever_armed_by_host(self) -> bool:
        return 0x07 in self.requests            # ARM

    def _serve(self, conn, number):
        conn.settimeout(0.05)
        with conn:
            try:
                while data := self._recv(conn):
                    for reply in self.receive(data):
                        self._send(conn, reply)
            except OSError:
                return

    def _send(self, conn, reply):
        if reply is None:
            return
        if self.fault == "trickle":
            for byte in reply:
                if self.stop.wait(0.2):
                    return
                conn.sendall(bytes([byte]))
        elif self.fault == "endless" and any(t != 0x01 for t in self.requests):   # after HELLO
            conn.settimeout(None)                 # push for as long as the host reads
            while not self.stop.is_set():
                conn.sendall(b"\x00\xa5" * 4096)
        elif self.fault == "late" and self.requests[-1] == 0x02:         # BEGIN
            threading.Timer(6.5, lambda: self._send_quietly(conn, reply)).start()
        else:
            conn.sendall(reply)

    def _send_quietly(self, conn, reply):
        try:
            conn.sendall(reply)
        except OSError:
            pass

    def handle(self, t, seq, p):
        self.requests.append(t)
        if self.fault == "stall" and self.session:
            return None
        if self.fault == "refuse-disarm" and t == 0x08:
            return self.refuse(t, seq, 0x06, self.state)          # BAD_STATE
        if self.fault == "ignore-disarm" and t == 0x08:
            return self.ack(t, seq)
        if self.fault == "malformed" and t == 0x06:
            return self.ack(t, seq, b"\x00\x01")                   # STATUS is 20 bytes, not 2
        if self.fault == "late" and t == 0x08 and 0x02 in self.requests:
            return None                                              # DISARM after BEGIN: never answered
        return super().handle(t, seq, p)


def _board_scenario(tmp_path) -> str:
    """The board scenario running free (an internal trigger): the peer is a version-1 board, which
    has no trigger, and would rightly be refused a pulsed scenario before anything misbehaves."""
    text = catalog.builtin_dir("scenarios").joinpath(f"{BOARD_SCENARIO}.toml").read_text()
    path = tmp_path / "free-running.toml"
    path.write_text(text + '\n[timing]\nsource = "internal"\nmode = "repeat"\n')
    return str(path)


def _board_profile(tmp_path) -> str:
    text = catalog.builtin_dir("generators").joinpath("demo-ramp-board.toml").read_text()
    path = tmp_path / "peer-board.toml"
    path.write_text(text.replace('timeout = "2 s"', 'timeout = "1 s"'))
    return str(path)


@pytest.fixture(scope="module")
def board_dry_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("dry-board")
    return Run("upload", _board_scenario(tmp), "--generator", _board_profile(tmp), "--dry-run", cwd=tmp)


# a HELLO and a DISARM frame each take 1 s + (frame + 128 B) / 80 kB/s to answer, 6 attempts for the
# upload (5 retries) and 3 for the DISARM after a failure (2 retries), and a STATUS read-back 3 more
EXCHANGE = TIMEOUT + (32 + 128) / 80e3
UNCONFIRMED_BOARD = "could not confirm that the board's output is off: check it before going on"
BOARD_CASES = {
    "trickle": ({}, ["step 'hello': no reply within 1 s after 6 attempts"], UNCONFIRMED_BOARD, 9 * EXCHANGE),
    "stall": ({}, ["step 'disarm': no reply within 1 s after 6 attempts"], UNCONFIRMED_BOARD, 9 * EXCHANGE),
    "endless": ({}, ["step 'disarm': no reply within 1 s after 6 attempts"], UNCONFIRMED_BOARD, 9 * EXCHANGE),
    "malformed": ({}, ["step 'status': malformed STATUS reply"], UNCONFIRMED_BOARD, 3 * EXCHANGE),
    "refuse-disarm": ({"armed": True}, ["step 'disarm': the board refused DISARM",
                                        "the board refused DISARM (BAD_STATE"], UNCONFIRMED_BOARD, 3 * EXCHANGE),
    "ignore-disarm": ({"armed": True}, ["step 'begin': the board refused BEGIN",
                                        "the output may still be ON: the board acknowledged DISARM but its "
                                        "STATUS reports the output armed"],
                      "check it by hand before going on", 3 * EXCHANGE),
    "late": ({}, ["step 'begin': no reply within 1 s after 6 attempts"], UNCONFIRMED_BOARD, 9 * EXCHANGE),
}


@pytest.mark.parametrize("fault", list(BOARD_CASES))
def test_a_board_that_misbehaves(fault, tmp_path, board_dry_run):
    state, words, ending, deadlines = BOARD_CASES[fault]
    with BoardPeer(fault, **state) as board:
        run = Run("upload", _board_scenario(tmp_path), "--generator", _board_profile(tmp_path), "--serial-port",
                  board.url, "--arm", cwd=tmp_path)
    run.check_failure(words, ending, deadlines, board_dry_run)
    assert not board.ever_armed_by_host


def test_the_document_board_frames_match_the_codec():
    # the peers above build their frames by hand; they must be the frames sweepgen decodes
    from sweepgen.wire import frames as fr

    raw = DocBoard.frame(0x80, 7, bytes([0x08]))
    assert fr.decode(raw) == fr.Frame(0x80, 7, b"\x08")
    assert struct.unpack_from("<I", raw, len(raw) - 4)[0] == zlib.crc32(raw[:-4])
