"""``sweepgen emulate``: the virtual instrument (and the ramp-board emulator) as a real server process."""

from __future__ import annotations

import signal
import socket
import subprocess
import sys
import threading
import time
import zlib

import pytest
import pyvisa

from sweepgen.cli.emulate import BOARD_FAULTS, FRAME_TYPES
from sweepgen.emulators import board
from sweepgen.errors import InstrumentError
from sweepgen.wire import frames as fr

from conftest import dds_table, deliver_to_board, eventually, open_visa, run_cli, socket_address


class Emulator:
    """``sweepgen emulate ARGS`` in a child process; the first stdout line is its address, and its log
    (stderr) is read line by line as it comes (``lines``)."""

    def __init__(self, *args):
        self.args = ["--port", "0", *args]
        self.lines = []

    def __enter__(self):
        self.proc = subprocess.Popen([sys.executable, "-m", "sweepgen", "emulate", *self.args],
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        self.address = self.proc.stdout.readline().strip()
        self.reader = threading.Thread(target=self._read, daemon=True)
        self.reader.start()
        threading.Thread(target=self.proc.stdout.read, daemon=True).start()     # the rest of stdout, unread
        return self

    def _read(self):
        for line in self.proc.stderr:
            self.lines.append(line.rstrip("\n"))

    def logged(self, text):
        """Whether a line of the log so far contains ``text``."""
        return any(text in line for line in list(self.lines))

    def stop(self):
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        self.reader.join(timeout=10)
        return self.proc.returncode, "\n".join(self.lines) + "\n"

    def __exit__(self, *exc):
        self.stop()


def test_serves_the_virtual_instrument_on_loopback_until_ctrl_c(rm):
    with Emulator() as emulator:
        assert emulator.address.startswith("TCPIP::127.0.0.1::") and emulator.address.endswith("::SOCKET")
        inst = open_visa(rm, emulator.address, timeout_ms=3000)
        assert inst.query("*IDN?").startswith("sweepgen,virtual-awg,")
        inst.write("SOUR:VOLT 100")                       # beyond virtual-awg's 20 V span
        assert inst.query("SYST:ERR?").startswith("-222,")
        inst.close()
        code, err = emulator.stop()
    assert code == 0
    assert "listening" in err and "stopped" in err and "Traceback" not in err


@pytest.mark.slow
def test_a_line_per_connection(rm):
    with Emulator() as emulator:
        inst = open_visa(rm, emulator.address)
        assert inst.query("*OPC?") == "1"
        inst.close()
        eventually(lambda: emulator.logged("closed (closed by the client"), what="the server noticing the close")
        code, err = emulator.stop()
    assert code == 0
    opened = [line for line in err.splitlines() if line.startswith("connection 1 from 127.0.0.1:")]
    assert len(opened) == 2 and "opened" in opened[0] and "closed (closed by the client" in opened[1]


@pytest.mark.slow
def test_fault_switches_and_identity_from_the_command_line(rm):
    with Emulator("--mute", "--identity", "sweepgen,other-awg,1,0") as emulator:
        inst = open_visa(rm, emulator.address, timeout_ms=300)
        with pytest.raises(pyvisa.errors.VisaIOError):
            inst.query("*IDN?")
        inst.close()
        _, err = emulator.stop()
    assert "never answer" in err
    with Emulator("--identity", "sweepgen,other-awg,1,0", "--delay", "0.05") as emulator:
        inst = open_visa(rm, emulator.address, timeout_ms=3000)
        assert inst.query("*IDN?") == "sweepgen,other-awg,1,0"
        inst.close()


@pytest.mark.slow
def test_board_emulator():
    with Emulator("--board") as emulator:
        assert emulator.address.startswith("socket://127.0.0.1:")
        with socket.create_connection(socket_address(emulator.address), timeout=3):
            pass
        code, err = emulator.stop()
    assert code == 0 and "ramp-board emulator" in err


@pytest.mark.slow
def test_board_emulator_prints_a_line_per_connection_and_state_change():
    table, words = dds_table(2000)
    with Emulator("--board", "--trigger-sources", "free,external") as emulator:
        deliver_to_board(table, emulator.address, arm=True)
        code, err = emulator.stop()
    lines = [line for line in err.splitlines() if line.startswith(("board:", "connection"))]
    said = ["connection" if line.startswith("connection") else line.split(" (")[0] for line in lines]
    assert said == ["connection", "board: hello", "board: disarm", "board: trigger", "board: begin",
                    "board: verified", "board: commit", "board: arm", "connection"]
    assert "opened" in lines[0] and "hello (version 2)" in lines[1] and "external" not in lines[3]
    assert f"crc {zlib.crc32(words.tobytes()):#010x}" in lines[6] and "closed" in lines[-1]
    assert code == 0


def test_board_kind_options_need_the_board_and_known_sources():
    for args, key in ([["--protocol-version", "1"], "--protocol-version"],
                      [["--board", "--trigger-sources", "free,laser"], "--trigger-sources"],
                      [["--board", "--protocol-version", "1", "--trigger-sources", "free"], "--trigger-sources"]):
        result = run_cli("emulate", "--port", "0", *args)
        assert result.exit_code == 2 and key in result.output + (result.stderr or ""), result.output


# --- the ramp-board emulator's fault switches on the command line -------------------------------------
def board_status(url: str) -> fr.Status:
    """Ask the board for its STATUS over a fresh connection (the frame protocol, by hand); a version-2
    reply is given as its channel 1 in the version-1 shape."""
    decoder = fr.Decoder()
    with socket.create_connection(socket_address(url), timeout=5) as sock:
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline:      # a stalled reply from the previous host may come first
            sock.sendall(fr.encode(fr.MsgType.STATUS, 0x5A))
            sock.settimeout(1.0)
            try:
                while True:
                    frames = decoder.feed(sock.recv(4096))
                    for frame in frames:
                        if frame.seq == 0x5A and frame.type == fr.MsgType.ACK:
                            request, data = fr.parse_ack(frame.payload)
                            assert request == fr.MsgType.STATUS
                            st = fr.parse_status(data)
                            if isinstance(st, fr.Status):
                                return st
                            t = st.tables[0]
                            return fr.Status(st.state, st.armed, fr.TableId(t.format, t.count, t.crc,
                                                                            int(t.rate.value)), st.received)
            except socket.timeout:
                continue
    raise AssertionError("the board did not answer STATUS")


def test_every_board_fault_switch_has_an_option():
    assert set(BOARD_FAULTS) == set(board.FAULT_KINDS)
    assert set(FRAME_TYPES) == {fr.type_name(t) for t in fr.REQUESTS}
    result = run_cli("emulate", "--help")
    for kind in board.FAULT_KINDS:
        assert f"--{kind.replace('_', '-')} COUNT" in result.output
    assert "--fault-on TYPE" in result.output and "--stall-time SECONDS" in result.output


# one transient fault each: the driver gets through with retries (or by starting the upload over)
BOARD_TRANSIENT = [
    (["--corrupt", "2"], "retries", "corrupt 2 data frames"),
    (["--drop", "2"], "retries", "drop 2 data frames"),
    (["--refuse", "3"], "retries", "refuse 3 data frames"),
    (["--stall", "1", "--stall-time", "0.5"], "retries", "stall 1 data frame (0.5 s)"),
    (["--reset", "1"], "restarts", "reset on 1 data frame"),
    (["--corrupt-reply", "2"], "retries", "corrupt the reply to 2 data frames"),
    (["--corrupt-memory", "1"], "restarts", "corrupt in memory 1 data frame"),
    (["--refuse", "1", "--fault-on", "hello", "--fault-skip", "0"], "retries", "refuse 1 hello frame"),
]


@pytest.mark.slow
@pytest.mark.parametrize("args, counter, shown", BOARD_TRANSIENT,
                         ids=[*(a[0][2:] for a, _, _ in BOARD_TRANSIENT[:-1]), "refuse-hello"])
def test_board_transient_fault_from_the_command_line_is_retried(args, counter, shown):
    table, words = dds_table(4000)
    with Emulator("--board", *args) as emulator:
        report = deliver_to_board(table, emulator.address)
        status = board_status(emulator.address)
        code, err = emulator.stop()
    assert report[counter] >= 1                       # the fault struck, and the driver went round it
    assert report["verification"]["ok"] is True
    # what the board holds is the table: its CRC-32 as zlib.crc32 of the little-endian words
    assert status.table.crc == zlib.crc32(words.tobytes()) and status.table.count == len(words)
    assert not status.armed
    assert f"with faults: {shown}" in err
    assert code == 0 and "Traceback" not in err


@pytest.mark.slow
@pytest.mark.parametrize("args, message", [
    (["--refuse", "always"], "refused with BUSY after 3 attempts"),
    (["--corrupt-memory", "always"], "END refused with TABLE_CRC"),
], ids=["refuse", "corrupt-memory"])
def test_board_persistent_fault_from_the_command_line_fails_and_commits_nothing(args, message):
    table, _ = dds_table(4000)
    with Emulator("--board", *args) as emulator:
        with pytest.raises(InstrumentError) as info:
            deliver_to_board(table, emulator.address, options={"retries": 2, "restarts": 1})
        status = board_status(emulator.address)
        _, err = emulator.stop()
    assert message in str(info.value) and info.value.exit_code == 1
    assert status.table.format == 0 and status.table.count == 0      # no table was ever committed
    assert not status.armed
    assert "every data frame" in err


@pytest.mark.parametrize("args, key", [
    (["--drop", "2"], "--drop"),                                # a board fault for the instrument
    (["--corrupt-memory", "always"], "--corrupt-memory"),
    (["--board", "--fault-on", "data"], "--fault-on"),         # how faults strike, but no fault
    (["--board", "--stall-time", "1"], "--stall-time"),
    (["--board", "--drop", "0"], "--drop"),                     # a count is at least 1, or 'always'
    (["--board", "--refuse", "sometimes"], "--refuse"),
    (["--board", "--reset", "1", "--fault-on", "frames"], "--fault-on"),
    (["--board", "--mute"], "--board"),
    (["--generator", "demo-ramp-board"], "--generator"),
    (["--board", "--generator", "virtual-awg"], "--generator"),
    (["--generator", "no-such-generator"], "generator"),
])
def test_usage_errors(args, key):
    result = run_cli("emulate", "--port", "0", *args)
    assert result.exit_code == 2
    assert key in result.stderr


def test_port_in_use_is_a_usage_error():
    with socket.create_server(("127.0.0.1", 0)) as busy:
        port = busy.getsockname()[1]
        result = run_cli("emulate", "--port", port)
    assert result.exit_code == 2 and "cannot listen" in result.stderr


@pytest.mark.parametrize("board", [[], ["--board"]])
def test_a_host_name_that_does_not_resolve_names_the_host_option(board):
    # RFC 6761: names under .invalid never resolve
    result = run_cli("emulate", "--host", "no-such-host.invalid", "--port", "0", *board)
    assert result.exit_code == 2
    warning, error = result.stderr.strip().splitlines()
    assert warning.startswith("sweepgen: warning: listening on no-such-host.invalid")
    assert error.startswith("sweepgen: error: option '--host': cannot listen on no-such-host.invalid:0")


@pytest.mark.slow
def test_a_line_per_change_of_state(rm, tmp_path):
    # a user watching `sweepgen emulate` sees what the instrument was told: trace, trigger, outputs
    import shutil
    from pathlib import Path

    shutil.copy(Path(__file__).parent / "data" / "four-output-bench.toml", tmp_path / "bench.toml")
    with Emulator("--generator", str(tmp_path / "bench.toml")) as emulator:
        inst = open_visa(rm, emulator.address, timeout_ms=3000)
        inst.write("FORM:DATA ASC;:TRAC:DATA SWEEP2," + ",".join(["0"] * 32))
        inst.write("SOUR2:FUNC:USER SWEEP2;SHAP USER;:SOUR2:FREQ 1000;:TRIG:SOUR EXTERN;:TRIG:DEL 0.0001")
        inst.write("TRIG:COUN 2;:INIT:CONT OFF;:OUTP2:STAT ON")
        assert inst.query("OUTP2:STAT?") == "1"
        inst.write("OUTP2:STAT OFF")
        assert inst.query("SYST:ERR?").startswith("0,")
        inst.close()
        eventually(lambda: emulator.logged("closed (closed by the client"), what="the server noticing the close")
        code, err = emulator.stop()
    assert code == 0
    lines = err.splitlines()
    assert "trace SWEEP2 stored: 32 points" in lines
    assert "trigger source EXTERN" in lines and "trigger delay 0.0001 s" in lines
    assert "playback: burst of 2 per trigger" in lines
    on = next(line for line in lines if line.startswith("output 2 ON"))
    assert "32000 Sa/s" in on and "trigger EXTERN UP" in on and "burst of 2" in on
    assert lines.index(on) < lines.index("output 2 OFF")
