"""The ``visa`` driver against the virtual instrument over a real loopback socket (pyvisa, '@py')."""

from __future__ import annotations

import zlib

import numpy as np
import pytest

from sweepgen import drivers
from sweepgen.drivers.base import Delivery
from sweepgen.drivers.visa import VisaDriver
from sweepgen.errors import CheckFailed, InputError, InstrumentError
from sweepgen.generator import generator_from_dict, load_generator
from sweepgen.emulators.instrument import Faults
from sweepgen.table import Frame, RenderedTable, TableInfo
from sweepgen.testing import instrument_server, upload_to_virtual_instrument

from conftest import OTHER_DIALECT, OTHER_IDENTITY, refused_port, sine_codes, to_toml

def make_table(count=1024, rate=1e6, amplitude=2.0, offset=0.5, dtype="<i2", channel=1, bits=14):
    fs = 2 ** (bits - 1) - 1
    codes = sine_codes(count, bits, dtype)
    info = TableInfo(sample_rate=rate, count=count, period_count=count, dtype=dtype, output="voltage",
                     drive_unit="V", code_scale=amplitude / 2 / fs, code_offset=offset, amplitude=amplitude,
                     offset=offset, channel=channel)

    def frames(start, stop):
        t = np.arange(start, stop) / rate
        return Frame(start, t, t, t, codes[start:stop])

    return RenderedTable(info, frames), codes


def write_profile(tmp_path, data, name="other-awg.toml"):
    path = tmp_path / name
    path.write_text(to_toml(data), encoding="utf-8")
    return load_generator(str(path))


def short_timeout(tmp_path, timeout="0.3 s"):
    data = {**OTHER_DIALECT, "link": {**OTHER_DIALECT["link"], "timeout": timeout}}
    return write_profile(tmp_path, data, "short.toml")


def deliver(server, table, generator, **kw):
    return VisaDriver().deliver(table, Delivery(destination=server.resource, generator=generator, **kw))


def test_registered_as_entry_point():
    assert drivers.load("visa") is VisaDriver


def test_upload_builtin_dialect_verifies_and_leaves_output_off():
    table, codes = make_table()
    gen = load_generator("virtual-awg")
    with instrument_server(gen) as server:
        report = deliver(server, table, gen, options={"trigger_source": "EXT"})
        inst = server.instrument
        np.testing.assert_array_equal(inst.traces["SWEEP"].values, codes)
        ch = inst.channels[1]
        assert (ch.shape, ch.user) == ("USER", "SWEEP")
        assert ch.frequency * table.info.count == pytest.approx(table.info.sample_rate)
        assert (ch.amplitude, ch.offset) == (2.0, 0.5)
        assert inst.trigger_source == "EXT"
        assert inst.outputs_on == [] and not inst.ever_armed
    assert report["verification"]["method"] == "readback" and report["verification"]["ok"]
    # CRC-32 as zlib.crc32 of the little-endian int16 bytes sent
    assert report["verification"]["instrument_crc32"] == zlib.crc32(codes.astype("<i2").tobytes())
    assert [s["step"] for s in report["steps"]] == [
        "identify", "output_off", "clear", "output_off", "format", "upload", "wait", "verify", "function", "rate",
        "amplitude", "offset", "trigger"]
    assert report["armed"] is False
    assert report["block_bytes"] == 2048
    assert report["bytes"] == sum(e["bytes"] for e in report["log"])


def test_arm_switches_the_output_on_last():
    table, _ = make_table()
    gen = load_generator("virtual-awg")
    with instrument_server(gen) as server:
        report = deliver(server, table, gen, arm=True, options={"trigger_source": "IMM"})
        assert server.instrument.outputs_on == [1]
        assert server.instrument.trigger_source == "IMM"
        # switched on last, and read back: the profile has an output-state query
        assert list(server.instrument.log)[-3:] == ["OUTP1:STAT ON", "SYST:ERR?", "OUTP1:STAT?"]
    assert report["armed"] is True and report["steps"][-1]["step"] == "output_on"


def test_other_dialect_from_a_profile_outside_the_repo(tmp_path):
    gen = write_profile(tmp_path, OTHER_DIALECT)
    table, codes = make_table(count=4096, rate=2e6)
    with instrument_server(gen, identity=OTHER_IDENTITY) as server:
        report = deliver(server, table, gen, arm=True)
        inst = server.instrument
        np.testing.assert_array_equal(inst.traces["CHIRP_A"].values, codes)
        assert inst.border == "NORM" and inst.format == ("INT", 16)
        assert inst.outputs_on == [1]
        assert any(line.startswith("DATA:DATA CHIRP_A,<block 8192 bytes>") for line in inst.log)
    v = report["verification"]
    assert v["method"] == "checksum" and v["ok"]
    assert v["instrument_crc32"] == zlib.crc32(codes.astype(">i2").tobytes())     # big-endian on the wire


def test_ascii_dialect_with_readback(tmp_path):
    commands = {**OTHER_DIALECT["commands"], "upload_mode": "ascii", "format": "FORMat:DATA {format}",
                "upload": "TRACe:DATA {name},{data}", "readback": "TRACe:DATA? {name}"}
    del commands["checksum"]
    gen = write_profile(tmp_path, {**OTHER_DIALECT, "commands": commands})
    table, codes = make_table(count=256)
    with instrument_server(gen, identity=OTHER_IDENTITY) as server:
        report = deliver(server, table, gen)
        np.testing.assert_array_equal(server.instrument.traces["CHIRP_A"].values, codes)
    assert report["verification"] == {**report["verification"], "method": "readback", "ok": True}
    assert "<ASCII list of 256 codes" in report["log"][[e["step"] for e in report["log"]].index("upload")]["command"]


def test_a_readback_that_is_not_a_block_is_named_as_such_at_once(tmp_path):
    # a profile whose "readback" query answers with text (here the point count) instead of a block:
    # the driver must say what came back, not wait out its timeout and report "no answer"
    commands = {**OTHER_DIALECT["commands"], "readback": "DATA:POIN? {name}"}
    del commands["checksum"]
    gen = write_profile(tmp_path, {**OTHER_DIALECT, "commands": commands,
                                   "link": {**OTHER_DIALECT["link"], "timeout": "30 s"}})
    table, _ = make_table(count=256)
    with instrument_server(gen, identity=OTHER_IDENTITY) as server:
        with pytest.raises(InstrumentError) as info:
            deliver(server, table, gen, arm=True)
        assert server.instrument.outputs_on == [] and not server.instrument.ever_armed
    assert info.value.step == "verify" and info.value.reply == "256"
    assert "not a definite-length block" in str(info.value) and "no answer" not in str(info.value)


def test_dry_run_prints_the_exact_log_without_connecting():
    table, _ = make_table(count=1024)
    gen = load_generator("virtual-awg")
    with refused_port() as port:               # a port nobody listens on
        report = VisaDriver().deliver(table, Delivery(destination=f"TCPIP::127.0.0.1::{port}::SOCKET",
                                                      generator=gen, dry_run=True, arm=True))
    upload = next(e for e in report["log"] if e["step"] == "upload" and e["kind"] == "write")
    assert upload["command"] == "TRAC:DATA SWEEP,#42048<2048 bytes of data>"
    assert upload["bytes"] == len(b"TRAC:DATA SWEEP,#42048") + 2048 + 1
    commands = [e["command"] for e in report["log"]]
    assert commands[:3] == ["*IDN?", "OUTP1:STAT OFF", "*CLS"]
    assert commands[-3:] == ["OUTP1:STAT ON", "SYST:ERR?", "OUTP1:STAT?"]   # switched on last, read back
    assert "SOUR1:FREQ 976.5625" in commands                  # 1 MSa/s / 1024 points
    assert report["bytes"] == sum(e["bytes"] for e in report["log"])


@pytest.mark.slow
def test_a_2_24_sample_upload_completes_without_timeout():
    gen = load_generator("virtual-awg")                 # memory 2^24, throughput 20 MB/s, timeout 5 s
    count = 1 << 24
    codes = (np.arange(count, dtype=np.int64) % 16001 - 8000).astype("<i2")
    info = TableInfo(sample_rate=10e6, count=count, period_count=count, dtype="<i2", output="voltage",
                     drive_unit="V", code_scale=1e-3, code_offset=0.0, amplitude=2.0, offset=0.0)
    empty = np.empty(0)
    table = RenderedTable(info, lambda a, b: Frame(a, empty, empty, empty, codes[a:b]))
    report = upload_to_virtual_instrument(table, gen)
    assert report["block_bytes"] == 2 * count
    assert report["verification"]["ok"] and report["verification"]["bytes"] == 2 * count
    assert report["instrument"]["outputs_on"] == []


def test_progress_reports_every_byte():
    seen = []
    table, _ = make_table(count=1 << 20, rate=10e6)
    upload_to_virtual_instrument(table, progress=lambda done, total: seen.append((done, total)))
    assert seen[-1] == (2 << 20, 2 << 20)
    assert all(b[0] > a[0] for a, b in zip(seen, seen[1:]))


# --- failures: every one leaves the output off and names the step -------------------------------------
def failing_upload(gen, faults, identity=OTHER_IDENTITY, prearm=False):
    # 2 MiB: more than the socket buffers hold, so a dropped connection shows while sending
    table, _ = make_table(count=1 << 20, rate=10e6)
    with instrument_server(gen, faults=None if prearm else faults, identity=identity) as server:
        inst = server.instrument
        if prearm:                                    # a previous session left the output on
            deliver(server, table, gen, arm=True)
            assert inst.outputs_on == [1]
            inst.faults = faults
        with pytest.raises(InstrumentError) as info:
            deliver(server, table, gen, arm=True)
        assert inst.outputs_on == []
        assert inst.ever_armed is prearm
    return info.value


SAME = "output switched off (confirmed on the same connection)"
NEW = "output switched off (confirmed on a new connection)"
UNCONFIRMED = "could not confirm that the output is off: check the instrument before touching the setup"


@pytest.mark.slow
@pytest.mark.parametrize("faults, step, words, outcome", [
    (Faults(error_after_upload=True), "upload", '-240,"Hardware error', SAME),
    (Faults(corrupt_readback=True), "verify", "differs from what was sent", SAME),
    # the instrument hangs up inside the block: whether the driver sees it while sending or while
    # waiting for the completion reply depends on socket buffers, but it is always the upload that failed
    (Faults(drop_after=5000), "upload", "the connection was lost", NEW),
    # an instrument that does not answer cannot confirm anything, and the message says so
    (Faults(mute=True), "identify", "no answer within 0.3 s", UNCONFIRMED),
    (Faults(delay=1.0), "identify", "no answer within 0.3 s", UNCONFIRMED),
], ids=["error-after-upload", "corrupt-readback", "drop-after", "mute", "delay"])
def test_each_fault_fails_its_step_with_output_off(tmp_path, faults, step, words, outcome):
    error = failing_upload(short_timeout(tmp_path), faults)
    assert error.step == step
    assert words in str(error)
    assert str(error).endswith(f"; {outcome}")


def bytes_before_upload_ends(table, gen):
    """Bytes the driver sends up to and including the upload message (from its dry-run log)."""
    log = VisaDriver().deliver(table, Delivery(destination="", generator=gen, dry_run=True))["log"]
    total = 0
    for entry in log:
        total += entry["bytes"]
        if entry["step"] == "upload" and entry["kind"] == "write":
            return total, entry["bytes"]
    raise AssertionError("no upload in the log")


# Where the instrument hangs up, counted from the end of the upload message (0 = right after its
# terminator, so the trace is stored but the completion query is never answered).
@pytest.mark.parametrize("count, from_end", [
    (1 << 20, -(1 << 21)),        # 2 MiB block: a few bytes into the block
    (1 << 20, -(1 << 20)),        # in the middle of the block
    (1 << 20, -1),                # everything but the terminator
    (256, -300),                  # a small block that the socket buffers take whole
    (256, 0),                     # after the whole message
], ids=["block-start", "block-middle", "block-end", "small-block", "after-terminator"])
def test_a_dropped_connection_is_the_upload_step_and_is_noticed_at_once(tmp_path, count, from_end):
    # a 30 s timeout: a driver that waited for it instead of noticing the closed socket would report
    # "no answer within 30 s" (and take that long), not a lost connection
    gen = short_timeout(tmp_path, "30 s")
    table, codes = make_table(count=count, rate=10e6)
    through, upload_bytes = bytes_before_upload_ends(table, gen)
    assert -from_end < upload_bytes
    with instrument_server(gen, faults=Faults(drop_after=through + from_end), identity=OTHER_IDENTITY) as server:
        inst = server.instrument
        with pytest.raises(InstrumentError) as info:
            deliver(server, table, gen, arm=True)
        assert inst.outputs_on == [] and not inst.ever_armed
        if from_end < 0:
            assert inst.traces == {}
        else:
            np.testing.assert_array_equal(inst.traces["CHIRP_A"].values, codes)
        assert server.clients == 2          # the upload, then a new connection to switch the output off
    error = info.value
    assert error.step == "upload"
    assert "the connection was lost" in str(error) and "before the instrument confirmed the upload" in str(error)
    assert "no answer" not in str(error)
    assert str(error).endswith(f"; {NEW}")


def test_a_dropped_connection_before_the_upload_names_the_query_that_saw_it(tmp_path):
    gen = short_timeout(tmp_path, "30 s")
    table, _ = make_table(count=256)
    with instrument_server(gen, faults=Faults(drop_after=3), identity=OTHER_IDENTITY) as server:
        with pytest.raises(InstrumentError) as info:     # the instrument hangs up inside '*IDN?'
            deliver(server, table, gen, arm=True)
        assert server.instrument.outputs_on == [] and server.instrument.traces == {}
    assert info.value.step == "identify"
    assert "the connection was lost" in str(info.value) and "no answer" not in str(info.value)


def test_failure_after_a_previous_arming_switches_the_output_off(tmp_path):
    error = failing_upload(short_timeout(tmp_path), Faults(corrupt_readback=True), prearm=True)
    assert error.step == "verify" and "output switched off" in str(error)


def test_wrong_identity_is_refused_before_anything_is_sent(tmp_path):
    gen = write_profile(tmp_path, OTHER_DIALECT)
    table, _ = make_table()
    with instrument_server(gen) as server:          # answers sweepgen,virtual-awg,... instead
        with pytest.raises(InstrumentError, match="identity pattern") as info:
            deliver(server, table, gen)
        assert info.value.step == "identify" and "virtual-awg" in info.value.reply
        assert server.instrument.traces == {}
        # only the identity query reached it: no command of a dialect it does not speak
        assert [m for m in server.instrument.log if m.strip()] == [gen.commands.templates["identify"]]
        assert "check its output by hand" in str(info.value)


def test_instrument_refusal_names_the_step(tmp_path):
    table, _ = make_table(amplitude=30.0, offset=0.0)      # the instrument's range is -10..10 V
    gen = load_generator("virtual-awg")
    with instrument_server(gen) as server:
        with pytest.raises(InstrumentError) as info:
            deliver(server, table, gen, arm=True)
        assert server.instrument.outputs_on == []
    assert info.value.step == "amplitude" and info.value.reply.startswith("-222,")


def test_nothing_is_sent_for_a_table_the_generator_cannot_hold():
    gen = load_generator("virtual-awg")
    table, _ = make_table(count=1004)                       # not a multiple of the granularity 8
    with instrument_server(gen) as server:
        with pytest.raises(CheckFailed, match="granularity"):
            deliver(server, table, gen)
        assert server.clients == 0


@pytest.mark.parametrize("options, key", [
    ({"verify": "checksum"}, "verify"), ({"verify": "maybe"}, "verify"), ({"colour": "red"}, "--option"),
    ({"trigger_source": "EXT;*RST"}, "trigger_source"), ({"mode": "sometimes"}, "mode"),
    ({"mode": "burst", "cycles": "0"}, "cycles"), ({"delay": "-1"}, "delay"), ({"backend": "@nonexistent"}, "--backend"),
])
def test_bad_options_are_input_errors(options, key):
    table, _ = make_table()
    gen = load_generator("virtual-awg")
    with instrument_server(gen) as server:
        with pytest.raises(InputError) as info:
            deliver(server, table, gen, options=options)
    assert info.value.key == key


def test_connection_refused_is_an_instrument_error():
    table, _ = make_table()
    gen = load_generator("virtual-awg")
    with refused_port() as port, pytest.raises(InstrumentError, match="connection refused") as info:
        VisaDriver().deliver(table, Delivery(destination=f"TCPIP::127.0.0.1::{port}::SOCKET", generator=gen))
    assert info.value.step == "identify"


@pytest.mark.slow
def test_a_table_yielding_more_bytes_than_announced_never_sends_the_excess():
    # the block header announces count x itemsize bytes; bytes beyond it would be read by the
    # instrument as commands, so the chunk that runs past is refused before it is sent
    table, codes = make_table(count=1024)
    longer = np.concatenate([codes, codes[:8]])
    over = RenderedTable(table.info, lambda a, b: Frame(a, None, None, None, longer[a:b + 8 * (b == 1024)]))
    gen = load_generator("virtual-awg")
    with instrument_server(gen) as server:
        with pytest.raises(InstrumentError, match="ran past the announced 2048 bytes") as info:
            deliver(server, over, gen, arm=True)
        assert server.instrument.outputs_on == [] and "SWEEP" not in server.instrument.traces
    assert info.value.step == "upload"


def test_timeouts_scale_with_the_byte_count():
    from sweepgen.drivers.visa import _Plan

    table, _ = make_table()
    plan = _Plan(table, load_generator("virtual-awg"), {})
    # link.timeout + 2 N / link.throughput (virtual-awg: 5 s, 20 MB/s)
    assert plan.data_timeout(0) == 5.0
    assert plan.data_timeout(20e6) == pytest.approx(7.0)


def test_a_channel_the_generator_lacks_is_refused_before_connecting():
    table, _ = make_table(channel=2)
    with pytest.raises(CheckFailed, match="channel 2"):
        VisaDriver().deliver(table, Delivery(destination="", generator=load_generator("virtual-awg"),
                                             dry_run=True))


def test_frequency_profile_must_be_an_awg(tmp_path):
    board = load_generator("demo-ramp-board")
    table, _ = make_table()
    with pytest.raises(InputError, match="kind 'awg'"):
        VisaDriver().deliver(table, Delivery(destination="", generator=board, dry_run=True))


def test_generator_profile_checked(tmp_path):
    data = {**OTHER_DIALECT, "commands": {**OTHER_DIALECT["commands"], "trace_name": "A;B"}}
    with pytest.raises(InputError, match="trace_name"):
        generator_from_dict(data, tmp_path / "bad.toml")


def test_an_instrument_that_refuses_output_off_stops_the_upload(tmp_path):
    # a profile whose "output off" the instrument does not understand (SCPI -113 undefined header):
    # *CLS must not wipe that error, and the upload must stop before any data is sent or armed
    import re

    from sweepgen import catalog

    text = catalog.builtin_dir("generators").joinpath("virtual-awg.toml").read_text()
    text = re.sub(r"^output_off = .*$", 'output_off = "OUTP{channel}:BOGUS OFF"', text, flags=re.M)
    path = tmp_path / "bad-off.toml"
    path.write_text(text)
    gen = load_generator(str(path))
    info = TableInfo(sample_rate=1e6, count=64, period_count=64, dtype="<i2", output="voltage",
                     drive_unit="V", code_scale=1e-3, code_offset=0.0, amplitude=1.0, offset=0.0)
    table = RenderedTable.from_arrays(info, np.zeros(64, dtype="<i2"))
    with instrument_server(gen) as server:
        with pytest.raises(InstrumentError) as exc:
            VisaDriver().deliver(table, Delivery(destination=server.resource, generator=gen, arm=True))
        assert exc.value.step == "output_off"
        assert "-113" in str(exc.value)
        assert not server.instrument.ever_armed
        assert "SWEEP" not in server.instrument.traces
