"""``sweepgen emulate``: the virtual instrument (and the ramp-board emulator) as a real server process."""

from __future__ import annotations

import signal
import socket
import subprocess
import sys

import pytest
import pyvisa
from click.testing import CliRunner

from sweepgen.cli import main


class Emulator:
    """``sweepgen emulate ARGS`` in a child process; the first stdout line is its address."""

    def __init__(self, *args):
        self.args = ["--port", "0", *args]

    def __enter__(self):
        self.proc = subprocess.Popen([sys.executable, "-m", "sweepgen", "emulate", *self.args],
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        self.address = self.proc.stdout.readline().strip()
        return self

    def stop(self):
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)
        try:
            out, err = self.proc.communicate(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            out, err = self.proc.communicate()
        return self.proc.returncode, err

    def __exit__(self, *exc):
        self.stop()


def visa(resource, timeout_ms=3000):
    return pyvisa.ResourceManager("@py").open_resource(resource, read_termination="\n", write_termination="\n",
                                                         timeout=timeout_ms)


def test_serves_the_virtual_instrument_on_loopback_until_ctrl_c():
    with Emulator() as emulator:
        assert emulator.address.startswith("TCPIP::127.0.0.1::") and emulator.address.endswith("::SOCKET")
        inst = visa(emulator.address)
        assert inst.query("*IDN?").startswith("sweepgen,virtual-awg,")
        inst.write("SOUR:VOLT 100")                       # beyond virtual-awg's 20 V span
        assert inst.query("SYST:ERR?").startswith("-222,")
        inst.close()
        code, err = emulator.stop()
    assert code == 0
    assert "listening" in err and "stopped" in err and "Traceback" not in err


def test_fault_switches_and_identity_from_the_command_line():
    with Emulator("--mute", "--identity", "sweepgen,other-awg,1,0") as emulator:
        inst = visa(emulator.address, timeout_ms=300)
        with pytest.raises(pyvisa.errors.VisaIOError):
            inst.query("*IDN?")
        inst.close()
        _, err = emulator.stop()
    assert "never answer" in err
    with Emulator("--identity", "sweepgen,other-awg,1,0", "--delay", "0.05") as emulator:
        inst = visa(emulator.address)
        assert inst.query("*IDN?") == "sweepgen,other-awg,1,0"
        inst.close()


def test_board_emulator():
    with Emulator("--board") as emulator:
        assert emulator.address.startswith("socket://127.0.0.1:")
        host, port = emulator.address[len("socket://"):].rsplit(":", 1)
        with socket.create_connection((host, int(port)), timeout=3):
            pass
        code, err = emulator.stop()
    assert code == 0 and "ramp-board emulator" in err


@pytest.mark.parametrize("args, key", [
    (["--board", "--mute"], "--board"),
    (["--generator", "demo-ramp-board"], "--generator"),
    (["--board", "--generator", "virtual-awg"], "--generator"),
    (["--generator", "no-such-generator"], "generator"),
])
def test_usage_errors(args, key):
    result = CliRunner().invoke(main, ["emulate", "--port", "0", *args])
    assert result.exit_code == 2
    assert key in result.stderr


def test_port_in_use_is_a_usage_error():
    with socket.create_server(("127.0.0.1", 0)) as busy:
        port = busy.getsockname()[1]
        result = CliRunner().invoke(main, ["emulate", "--port", str(port)])
    assert result.exit_code == 2 and "cannot listen" in result.stderr
