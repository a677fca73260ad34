"""The virtual instrument, driven through pyvisa's pure-Python backend over a real loopback socket."""

from __future__ import annotations

import socket
import time
import zlib

import numpy as np
import pytest
import pyvisa
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sweepgen.emulators.instrument import Faults
from sweepgen.generator import generator_from_dict, load_generator
from sweepgen.testing import instrument_server

from conftest import eventually, examples, open_visa, sine_codes

SMALL = {   # a small instrument: its limits are easy to cross (demo data)
    "title": "small test generator", "kind": "awg", "channels": 2,
    "sampling": {"rate_min": "1 kSa/s", "rate_max": "1 MSa/s", "memory": 4096, "granularity": 8,
                 "min_length": 32},
    "output": {"kind": "voltage", "range_min": "-5 V", "range_max": "5 V", "dac_bits": 12},
    "link": {"kind": "visa", "resource": "TCPIP::127.0.0.1::5025::SOCKET", "throughput": "1 MB/s",
             "timeout": "2 s"},
    "commands": {"identify": "*IDN?", "identity_pattern": "^sweepgen,", "clear": "*CLS",
                 "output_off": "OUTP OFF", "upload": "TRAC:DATA {name},{data}", "wait": "*OPC?",
                 "error_query": "SYST:ERR?", "no_error_pattern": "^[+]?0,", "output_on": "OUTP ON"},
}


@pytest.fixture
def small(tmp_path):
    gen = generator_from_dict(SMALL, tmp_path / "small.toml")
    with instrument_server(gen, max_line=20000) as server:
        yield server


@pytest.fixture
def awg():
    with instrument_server("virtual-awg") as server:
        yield server


def errors(inst) -> list[str]:
    found = []
    for _ in range(40):
        reply = inst.query("SYST:ERR?")
        if reply.startswith("0,"):
            return found
        found.append(reply)
    raise AssertionError("error queue does not empty")


def test_identity_and_empty_error_queue(rm, awg):
    inst = open_visa(rm, awg.resource)
    assert inst.query("*IDN?").startswith("sweepgen,virtual-awg,0,")
    # SCPI-1999 SYSTem:ERRor[:NEXT]? replies 0,"No error" when the queue is empty (SCPI-1999 standard, SCPI Consortium)
    assert inst.query("SYST:ERR?") == '0,"No error"'
    assert inst.query("SYSTem:ERRor:NEXT?") == '0,"No error"'
    assert inst.query("*OPC?") == "1"
    inst.close()


@pytest.mark.parametrize("order, border, letter_big", [("<i2", "SWAP", False), (">i2", "NORM", True)])
def test_block_upload_readback_and_checksum(rm, small, order, border, letter_big):
    inst = open_visa(rm, small.resource)
    data = sine_codes(256, bits=12)
    inst.write(f"FORM:DATA INT,16;:FORM:BORD {border}")
    # pyvisa builds the IEEE 488.2 block itself here (reference implementation)
    inst.write_binary_values("TRAC:DATA SWEEP,", data.tolist(), datatype="h", is_big_endian=letter_big)
    assert errors(inst) == []
    back = inst.query_binary_values("TRAC:DATA? SWEEP", datatype="h", is_big_endian=letter_big,
                                    container=np.array)
    np.testing.assert_array_equal(back, data)
    # the checksum is zlib.crc32 of the bytes a readback carries
    assert int(inst.query("TRAC:CRC? SWEEP")) == zlib.crc32(data.astype(order).tobytes())
    assert inst.query("TRAC:POIN? SWEEP") == "256"
    np.testing.assert_array_equal(small.instrument.traces["SWEEP"].values, data)
    inst.close()


def test_ascii_list_upload_and_readback(rm, small):
    inst = open_visa(rm, small.resource)
    data = sine_codes(64, bits=12)
    inst.write("FORMat:DATA ASCii")
    inst.write("DATA:DATA RAMP2," + ",".join(map(str, data.tolist())))       # DATA is TRACe's alias
    assert errors(inst) == []
    assert inst.query("TRACe:DATA? RAMP2") == ",".join(map(str, data.tolist()))
    assert int(inst.query("DATA:CRC? ramp2")) == zlib.crc32(",".join(map(str, data.tolist())).encode())
    inst.close()


def test_long_short_forms_optional_nodes_suffixes_and_compound_paths(rm, small):
    inst = open_visa(rm, small.resource)
    inst.write("FORM:DATA INT,16;BORD SWAP")
    inst.write_binary_values("TRAC:DATA A1,", sine_codes(64, bits=12).tolist(), datatype="h")
    inst.write("SOURce2:FUNCtion:USER A1;SHAPe USER")          # relative: SOURce2:FUNCtion:SHAPe
    inst.write("SOUR2:FREQ 50;SOUR2:FREQ 60")                  # relative: SOUR2:SOUR2:FREQ is unknown
    assert errors(inst)[0].startswith("-113,") and small.instrument.channels[2].frequency == 50
    inst.write("SOUR2:FREQ:CW 1000;:SOURCE2:VOLTAGE:LEVEL:IMMEDIATE:AMPLITUDE 2;OFFSet -0.5")
    inst.write(":TRIGger:SEQuence:SOURce EXTernal")
    assert errors(inst) == []
    ch = small.instrument.channels[2]
    assert (ch.shape, ch.user, ch.frequency, ch.amplitude, ch.offset) == ("USER", "A1", 1000.0, 2.0, -0.5)
    assert small.instrument.trigger_source == "EXT"
    assert inst.query("SOUR2:FUNC?") == "USER" and inst.query("SOURCE2:FUNCTION:USER?") == '"A1"'
    inst.write("OUTPut2:STATe ON")
    assert errors(inst) == [] and inst.query("OUTP2?") == "1" and inst.query("OUTP1?") == "0"
    inst.write("SOUR3:FREQ 1")                                  # only two channels
    assert errors(inst)[0].startswith("-114,")
    inst.write("*RST")
    assert inst.query("*OPC?") == "1"     # a query: the server has processed *RST before we look
    assert small.instrument.outputs_on == [] and small.instrument.output_events == [(2, True), (2, False)]
    inst.close()


@pytest.mark.slow
@pytest.mark.parametrize("commands, code", [
    (["FORM:DATA INT,16", "TRAC:DATA T,#18\x00\x00\x00\x01\x00\x02\x00\x03"], -222),   # 4 points < min_length 32
    (["FORM:DATA INT,16", "TRAC:DATA T," + "#240" + "\x00" * 40], -222),              # 20 points: not a multiple of 8
    (["FORM:DATA ASC", "TRAC:DATA T," + ",".join(["0"] * 4104)], -223),               # beyond the memory of 4096
    (["FORM:DATA ASC", "TRAC:DATA T," + ",".join(["2048"] * 32)], -222),              # beyond a 12-bit DAC
    (["TRAC:DATA T,#14abcd"], -221),                                                  # block while FORMat ASCii
    (["FORM:DATA INT,16", "TRAC:DATA T,#13abc"], -161),                               # odd bytes for INT,16
    (["FORM:DATA REAL,32", "TRAC:DATA T,#3128" + "\x7f\xc0\x00\x00" * 32], -222),     # 32 NaNs (IEEE 754)
    (["SOUR:VOLT 11"], -222), (["SOUR:VOLT:OFFS -5.5"], -222), (["SOUR:FREQ -1"], -222),
    (["FUNC USER;:OUTP ON"], -221), (["FUNC USER", "OUTP ON"], -221),                  # no trace to play
    (["FUNC:USER NOPE"], -224), (["FUNC SAWTOOTH"], -224), (["FORM:DATA INT,12"], -224),
    (["*CLS 5"], -108), (["SOUR:VOLT"], -109), (["SOUR:VOLT abc"], -120),
    (["SOUR:WOBBLE 3"], -113), (["*FOO"], -113), (["SOUR::VOLT 1"], -102),
    (["SOURCEVOLTAGEMNEMONIC:VOLT 1"], -112), (["FUNC:USER 'unterminated"], -102),
    (["TRAC:DATA BAD-NAME,1,2"], -141), (["TRAC:DATA 9LIVES,1,2"], -141),
])
def test_refusals_carry_scpi_error_numbers(rm, small, commands, code):
    # error numbers of SCPI-1999 vol. 2 ch. 21 / IEEE 488.2 (recalled)
    inst = open_visa(rm, small.resource)
    for command in commands:
        inst.write_raw(command.encode("latin-1") + b"\n")
    found = errors(inst)
    assert found and found[0].startswith(f"{code},"), found
    assert small.instrument.outputs_on == []
    assert inst.query("*IDN?").startswith("sweepgen,")          # still serving
    inst.close()


def test_range_checks_use_the_profile(rm, small):
    inst = open_visa(rm, small.resource)
    inst.write("FORM:DATA ASC")
    inst.write("TRAC:DATA T," + ",".join(["0"] * 64))
    inst.write("FUNC:USER T;SHAP USER")
    inst.write("FREQ 1e5")              # 64 points x 100 kHz = 6.4 MSa/s > rate_max 1 MSa/s
    assert errors(inst)[0].startswith("-222,")
    inst.write("FREQ 1e4;:VOLT 8;VOLT:OFFS 3")     # 3 V +- 4 V leaves -5..5 V
    inst.write("OUTP ON")
    assert errors(inst)[0].startswith("-221,") and small.instrument.outputs_on == []
    inst.write("VOLT:OFFS 0.5;:OUTP ON")
    assert errors(inst) == [] and small.instrument.outputs_on == [1]
    inst.close()


def test_injected_commands_never_run(rm, small):
    """A command error discards the rest of its message (IEEE 488.2), so nothing smuggled after it runs."""
    inst = open_visa(rm, small.resource)
    inst.write("FORM:DATA ASC")
    inst.write("TRAC:DATA T," + ",".join(["0"] * 64) + ";:FUNC:USER T;SHAP USER;:FREQ 1e3")
    assert errors(inst) == []
    for injected in ['FUNC:USER T";:OUTP ON', "FUNC:USER T X;:OUTP ON", "FUNC:USER T,#;:OUTP ON",
                     "SOUR:VOLT 1 OUTP ON;:OUTP ON", "OUTP OFF\x07;:OUTP ON"]:
        inst.write_raw(injected.encode() + b"\n")
        assert errors(inst), injected
    assert small.instrument.outputs_on == [] and not small.instrument.ever_armed


@pytest.mark.slow
@settings(max_examples=examples(25), suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.binary(min_size=1, max_size=300))
def test_garbage_is_refused_and_the_instrument_keeps_serving(rm, small, garbage):
    inst = open_visa(rm, small.resource)
    inst.write_raw(garbage + b"\n")
    inst.clear()
    inst.write_raw(b"\n*CLS\n")
    assert inst.query("*IDN?").startswith("sweepgen,")
    assert small.instrument.outputs_on == []
    inst.close()


def test_overlong_message_is_refused(rm, small):
    inst = open_visa(rm, small.resource)
    inst.write_raw(b"SOUR:VOLT " + b"1" * 50000 + b"\n")          # max_line is 20000 in the fixture
    assert errors(inst)[0].startswith("-223,")
    inst.write_raw(b"#9999999999\n")                                 # a block larger than any memory
    assert errors(inst)[0].startswith("-223,")
    assert inst.query("*IDN?").startswith("sweepgen,")
    inst.close()


def test_error_queue_overflow_and_event_status(rm, small):
    inst = open_visa(rm, small.resource)
    for _ in range(20):
        inst.write("NOPE")
    # SCPI-1999: a full queue replaces its newest entry by -350,"Queue overflow"
    found = errors(inst)
    assert len(found) == 16 and found[-1].startswith("-350,") and found[0].startswith("-113,")
    # IEEE 488.2 standard event status register: bit 5 (32) = command error; reading clears it
    assert inst.query("*ESR?") == "32"
    assert inst.query("*ESR?") == "0"
    inst.write("SOUR:VOLT 100")
    assert inst.query("*ESR?") == "16"                               # bit 4: execution error
    inst.write("*CLS")
    assert inst.query("SYST:ERR:COUN?") == "0"
    inst.close()


def test_a_silent_client_does_not_block_another(rm, small):
    # one client sends half a block header and falls silent; another connects and is answered at once
    silent = socket.create_connection((small.host, small.port), timeout=2)
    silent.sendall(b"TRAC:DATA T,#42")
    idle = socket.create_connection((small.host, small.port), timeout=2)      # connected, says nothing
    t0 = time.monotonic()
    second = open_visa(rm, small.resource, timeout_ms=3000)
    assert second.query("*OPC?") == "1"
    took = time.monotonic() - t0
    assert took < 1.0 + 2.0            # issue 16: within a second, with slack for a loaded machine
    assert small.clients == 3
    second.close()
    silent.close()
    idle.close()


@pytest.mark.slow
def test_sixty_idle_connections_do_not_keep_a_client_out(rm, tmp_path):
    # connections opened and left idle give way at once to a newcomer
    gen = generator_from_dict(SMALL, tmp_path / "small.toml")
    lines = []
    with instrument_server(gen, max_connections=3, log=lines.append) as server:
        hogs = [socket.create_connection((server.host, server.port), timeout=2) for _ in range(60)]
        t0 = time.monotonic()
        inst = open_visa(rm, server.resource, timeout_ms=3000)
        assert inst.query("*IDN?").startswith("sweepgen,")
        took = time.monotonic() - t0
        inst.close()
        for hog in hogs:
            hog.close()
    assert took < 1.0 + 2.0                         # within a second, with slack for a loaded machine
    assert any("closed to make room for a new client: it never sent anything" in line for line in lines)


@pytest.mark.slow
def test_with_every_slot_taken_a_stalled_client_makes_room_after_a_second(rm, tmp_path):
    gen = generator_from_dict(SMALL, tmp_path / "small.toml")
    lines = []
    with instrument_server(gen, max_connections=2, log=lines.append) as server:
        stalled = [socket.create_connection((server.host, server.port), timeout=2) for _ in range(2)]
        for sock in stalled:
            sock.sendall(b"*ID")                    # half a command, then nothing
        eventually(lambda: [conn.received for conn, _ in list(server._live.values())] == [3, 3],
                   what="the server hearing both stalled clients")
        with socket.create_connection((server.host, server.port), timeout=2) as early:
            assert early.recv(10) == b""            # both have spoken within the second: turned away
        time.sleep(1.0)                             # now silent longer than EVICT_AFTER (1 s)
        inst = open_visa(rm, server.resource, timeout_ms=3000)
        assert inst.query("*IDN?").startswith("sweepgen,")
        inst.close()
        for sock in stalled:
            sock.close()
    assert any("turned away: all 2 connections are busy" in line for line in lines)
    assert any("closed to make room for a new client: silent for" in line for line in lines)


@pytest.mark.slow
def test_an_idle_connection_is_closed_after_the_idle_timeout(tmp_path):
    gen = generator_from_dict(SMALL, tmp_path / "small.toml")
    lines = []
    with instrument_server(gen, idle_timeout=0.3, log=lines.append) as server:
        with socket.create_connection((server.host, server.port), timeout=3) as sock:
            sock.sendall(b"*IDN")                    # half a command, then nothing
            assert sock.recv(10) == b""              # the server hangs up
    assert any("silent for 0.3 s" in line for line in lines)


@pytest.mark.slow
def test_blocks_of_all_connections_share_one_bounded_buffer(rm, small):
    from sweepgen.emulators._scpi_reader import Budget

    small.instrument.buffers = Budget(1000)          # a tiny instrument: 1000 bytes for every block in flight
    holder = socket.create_connection((small.host, small.port), timeout=2)
    holder.sendall(b"FORM:DATA INT,16;:TRAC:DATA T,#3800" + bytes(100))     # 800 announced, 100 sent
    eventually(lambda: small.instrument.buffers.held == 800, what="the holder's block taking its 800 bytes")
    inst = open_visa(rm, small.resource)
    inst.write("FORM:DATA INT,16;:FORM:BORD SWAP")
    inst.write_binary_values("TRAC:DATA U,", sine_codes(256, bits=12).tolist(), datatype="h")   # 512 bytes: no room
    assert "-223," in errors(inst)[0]
    assert "U" not in small.instrument.traces
    holder.close()
    eventually(lambda: small.instrument.buffers.held == 0, what="the holder's bytes being given back")
    inst.write_binary_values("TRAC:DATA U,", sine_codes(256, bits=12).tolist(), datatype="h")
    assert errors(inst) == [] and "U" in small.instrument.traces
    inst.close()


@pytest.mark.slow
def test_fault_delay_and_mute(rm, tmp_path):
    gen = generator_from_dict(SMALL, tmp_path / "small.toml")
    with instrument_server(gen, faults=Faults(delay=0.5)) as server:
        inst = open_visa(rm, server.resource, timeout_ms=150)
        with pytest.raises(pyvisa.errors.VisaIOError):
            inst.query("*IDN?")
        inst.close()
        inst = open_visa(rm, server.resource, timeout_ms=3000)
        assert inst.query("*OPC?") == "1"
        inst.close()
    with instrument_server(gen, faults=Faults(mute=True)) as server:
        inst = open_visa(rm, server.resource, timeout_ms=200)
        inst.write("OUTP OFF")
        with pytest.raises(pyvisa.errors.VisaIOError):
            inst.query("*IDN?")
        inst.close()
        assert "OUTP OFF" in server.instrument.log              # it listens, it only never answers


def test_fault_drop_after_bytes_then_serves_the_next_client(rm, tmp_path):
    gen = generator_from_dict(SMALL, tmp_path / "small.toml")
    with instrument_server(gen, faults=Faults(drop_after=100)) as server:
        sock = socket.create_connection((server.host, server.port), timeout=2)
        with pytest.raises(OSError):
            for _ in range(100):
                sock.sendall(b"FORM:DATA ASC;" + b"0" * 100 + b"\n")
                sock.recv(1)
        sock.close()
        inst = open_visa(rm, server.resource)
        assert inst.query("*IDN?").startswith("sweepgen,")
        inst.close()


def test_fault_error_after_upload_and_corrupt_readback(rm, tmp_path):
    gen = generator_from_dict(SMALL, tmp_path / "small.toml")
    data = sine_codes(64, bits=12)
    with instrument_server(gen, faults=Faults(error_after_upload=True, corrupt_readback=True)) as server:
        inst = open_visa(rm, server.resource)
        inst.write("FORM:DATA INT,16;:FORM:BORD SWAP")
        inst.write_binary_values("TRAC:DATA T,", data.tolist(), datatype="h")
        assert errors(inst)[0].startswith("-240,")
        back = inst.query_binary_values("TRAC:DATA? T", datatype="h", container=np.array)
        assert (back != data).sum() == 1
        assert int(inst.query("TRAC:CRC? T")) != zlib.crc32(data.astype("<i2").tobytes())
        np.testing.assert_array_equal(server.instrument.traces["T"].values, data)   # stored intact
        inst.close()


def test_builtin_profile_limits_and_identity(rm):
    gen = load_generator("virtual-awg")
    with instrument_server(gen, identity="sweepgen,virtual-awg-b,7,2.0") as server:
        assert server.instrument.max_block == 8 * gen.sampling.memory
        inst = open_visa(rm, server.resource)
        assert inst.query("*IDN?") == "sweepgen,virtual-awg-b,7,2.0"
        inst.close()
