"""The ``serial`` driver against the board emulator and against an independent board.

Every upload runs over a real link: a loopback TCP socket (``socket://`` URL) or a
real pseudo-terminal pair from ``os.openpty()`` whose slave device path the driver
opens with pyserial, as it would a USB serial adapter.
"""

from __future__ import annotations

import dataclasses
import os
import select
import socket
import threading
import zlib

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from sweepgen.drivers import load
from sweepgen.drivers._serial_session import TableBytes
from sweepgen.drivers.serial_board import BoardTiming, SerialDriver, _Options, _Plan
from sweepgen.emulators.board import BoardEmulator, FaultPlan
from sweepgen.errors import CheckFailed, InputError, InstrumentError
from sweepgen.generator import load_generator
from sweepgen.table import Frame, RenderedTable, TableInfo
from sweepgen.testing import virtual_board
from sweepgen.wire import frames as fr

from conftest import DocBoard, dds_table, deliver_to_board, examples, quick_ramp_board, raw_pty, refused_port

GEN = quick_ramp_board()


def test_registered_as_serial_instrument_driver():
    cls = load("serial", kind="instrument")
    assert cls is SerialDriver and set(cls.options) == {"retries", "restarts", "frame_bytes"}


def test_upload_over_a_socket_url_commits_the_rendered_table():
    table, words = dds_table()
    seen = []
    with virtual_board(GEN) as url:
        report = deliver_to_board(table, url, progress=lambda done, total: seen.append((done, total)))
        committed = url.board.committed
        assert np.array_equal(committed.codes(), words)
        assert committed.crc == table.crc32 == zlib.crc32(words.tobytes())
        assert committed.rate == 1_000_000 and not url.board.armed
    assert report["verification"] == {"method": "crc32", "expected_crc32": table.crc32,
                                      "instrument_crc32": table.crc32, "ok": True, "committed": True,
                                      "channels": {"1": table.crc32}}
    n_frames = -(-words.nbytes // 1024)
    # HELLO 13 bytes, BEGIN 32, TRIGGER 20, DISARM, END, COMMIT and STATUS 12 each (version 2)
    assert report["bytes"] == words.nbytes + n_frames * (fr.OVERHEAD + fr.DATA_PREFIX) + (13 + 32 + 20 + 4 * 12)
    assert report["armed"] is False and report["retries"] == 0 and report["restarts"] == 0
    assert report["frames"] == -(-words.nbytes // 1024)
    assert [s["step"] for s in report["steps"]] == ["open", "hello", "disarm", "trigger", "begin", "data",
                                                  "verify", "commit", "status"]
    assert report["protocol"] == 2 and report["trigger"] == "free-running, back to back, start delay 0 ns"
    assert seen[0] == (0, words.nbytes) and seen[-1] == (words.nbytes, words.nbytes)
    assert all(a[0] <= b[0] for a, b in zip(seen, seen[1:]))


@pytest.mark.slow
def test_arm_only_when_asked():
    table, _ = dds_table(500)
    with virtual_board(GEN) as url:
        deliver_to_board(table, url)
        assert not url.board.armed
        report = deliver_to_board(table, url, arm=True)
        assert url.board.armed and report["armed"] and report["steps"][-1]["step"] == "arm"
        deliver_to_board(table, url)                      # a new upload switches the output off first
        assert not url.board.armed


def test_upload_through_a_pseudo_terminal_device():
    table, words = dds_table(5000)
    master, slave = raw_pty()
    board = BoardEmulator(GEN)
    try:
        with board.start_fd(master):
            report = deliver_to_board(table, os.ttyname(slave), arm=True)
    finally:
        os.close(slave)
        os.close(master)
    assert np.array_equal(board.committed.codes(), words) and board.armed
    assert report["destination"].startswith("/dev/")


@pytest.mark.slow
def test_the_board_announces_a_smaller_payload_and_the_driver_follows():
    table, words = dds_table(700)
    with virtual_board(GEN, max_payload=100) as url:
        report = deliver_to_board(table, url, options={"frame_bytes": 4096})
        assert np.array_equal(url.board.committed.codes(), words)
    data_step = next(s for s in report["steps"] if s["step"] == "data")
    assert data_step["frame_bytes"] == 96          # 100 - 4 offset bytes, whole 4-byte words


@pytest.mark.slow
def test_voltage_board_with_int16_codes(tmp_path):
    profile = tmp_path / "dac-board.toml"
    profile.write_text("""
title = "test DAC ramp board"
kind = "board"
[sampling]
rates = ["200 kSa/s"]
memory = 8192
[output]
kind = "voltage"
range_min = "-5 V"
range_max = "5 V"
dac_bits = 16
[link]
kind = "serial"
port = "socket://127.0.0.1:9"
throughput = "50 kB/s"
timeout = "0.2 s"
""", encoding="utf-8")
    gen = load_generator(str(profile))
    codes = (np.sin(np.linspace(0, 6, 4000)) * 30000).astype("<i2")
    info = TableInfo(sample_rate=200e3, count=4000, period_count=4000, dtype="<i2", output="voltage",
                     drive_unit="V", code_scale=5 / 32767, code_offset=0.0, amplitude=10.0, offset=0.0)
    table = RenderedTable(info, lambda a, b: Frame(a, np.arange(a, b) / 200e3, codes[a:b] * 0.0,
                                                   codes[a:b] * 5 / 32767, codes[a:b]))
    with virtual_board(gen) as url:
        report = deliver_to_board(table, url, gen)
        assert np.array_equal(url.board.committed.codes(), codes)
    assert report["table"]["format"] == "int16"
    channel = report["board"]["channels"][0]
    assert channel["bits"] == 16 and channel["formats"] == ["int16"] and channel["range_v"] == [-5.0, 5.0]


@pytest.mark.slow
def test_48_bit_tuning_words_travel_as_uint64(tmp_path):
    gen = dataclasses.replace(GEN, output=dataclasses.replace(GEN.output, word_bits=48))
    table, words = dds_table(1000, bits=48, dtype="<u8")
    with virtual_board(gen) as url:
        report = deliver_to_board(table, url, gen)
        assert np.array_equal(url.board.committed.codes(), words)
    assert report["table"]["format"] == "uint64" and report["board"]["channels"][0]["bits"] == 48


# --------------------------------------------------------------------------- faults

# (fault, count) -> transient: the driver retries or starts over and succeeds
TRANSIENT = [
    ({"corrupt": 2}, "retries"),
    ({"drop": 2}, "retries"),
    ({"refuse": 3}, "retries"),
    ({"stall": 1, "stall_time": 0.5}, "retries"),
    ({"reset": 1}, "restarts"),
    ({"corrupt_reply": 2}, "retries"),
    ({"corrupt_memory": 1}, "restarts"),
]


@pytest.mark.slow
@pytest.mark.parametrize("faults, counter", TRANSIENT, ids=[next(iter(f)) for f, _ in TRANSIENT])
def test_transient_fault_is_retried_and_the_upload_succeeds(faults, counter):
    table, words = dds_table(4000)
    with virtual_board(GEN, faults=faults) as url:
        report = deliver_to_board(table, url, arm=True)
        board = url.board
        assert np.array_equal(board.committed.codes(), words)
        assert board.committed.crc == table.crc32 and board.armed
        assert board.commits == 1                 # nothing else was ever committed
    kind = next(iter(faults))
    assert board.faults.fired[kind] == faults[kind]
    assert report[counter] >= 1


# persistent faults: the upload fails with a message naming the step and the cause
PERSISTENT = [
    ("corrupt", "data at byte 1024", "refused with FRAME_CRC after 3 attempts"),
    ("drop", "data at byte 1024", "no reply within"),
    ("refuse", "data at byte 1024", "refused with BUSY after 3 attempts"),
    ("stall", "data at byte 1024", "no reply within"),
    ("reset", "data at byte", "the board lost the upload 2 times (last: DATA refused with NO_SESSION"),
    ("corrupt_reply", "data at byte 1024", "the reply failed its CRC after 3 attempts"),
    ("corrupt_memory", "verify", "the board lost the upload 2 times (last: END refused with TABLE_CRC"),
]


@pytest.mark.slow
@pytest.mark.parametrize("kind, step, message", PERSISTENT, ids=[p[0] for p in PERSISTENT])
def test_persistent_fault_fails_clearly_commits_nothing_and_leaves_the_board_disarmed(kind, step, message):
    old, old_words = dds_table(300, f0=5e6, f1=6e6)
    table, _ = dds_table(4000)
    with virtual_board(GEN) as url:
        deliver_to_board(old, url, arm=True)
        assert url.board.armed
        url.board.faults = FaultPlan.parse({kind: "always", "stall_time": 1.0})   # > 3 reply timeouts
        with pytest.raises(InstrumentError) as err:
            deliver_to_board(table, url, arm=True, options={"retries": 2, "restarts": 1})
        board = url.board
        assert not board.armed
        assert np.array_equal(board.committed.codes(), old_words) and board.commits == 1
    assert err.value.exit_code == 1
    assert err.value.step.startswith(step)
    assert message in str(err.value)
    assert f"step '{err.value.step}'" in str(err.value)
    # the driver's DISARM after the failure is confirmed, except by a board that is still stalled
    note = ("could not confirm that the board's output is off: check it before going on" if kind == "stall"
            else "the board's output was switched off")
    assert str(err.value).endswith(note)


@pytest.mark.slow
def test_board_asking_for_an_earlier_offset_gets_the_bytes_again():
    class Forgetful(BoardEmulator):
        forgot = False

        def _data(self, frame, refuse, corrupt_memory):
            if not self.forgot and self.received >= 3072:
                self.forgot, self.received = True, 1024        # pretends it lost two frames
            return super()._data(frame, refuse, corrupt_memory)

    table, words = dds_table(2000)
    board = Forgetful(GEN)
    with virtual_board(GEN, board=board) as url:
        report = deliver_to_board(table, url)
    assert board.forgot and np.array_equal(board.committed.codes(), words)
    assert report["retries"] == 1
    refusals = [e[1] for e in board.events if e[0] == "refuse"]
    assert [(r["type"], r["reason"], r["detail"]) for r in refusals] == [("data", "BAD_OFFSET", 1024)]


def test_a_board_that_does_not_match_the_profile_is_refused_before_anything_is_sent():
    other = dataclasses.replace(GEN, output=dataclasses.replace(GEN.output, clock=1.2e9, range_max=500e6))
    table, _ = dds_table(100)
    with virtual_board(other) as url:
        with pytest.raises(InstrumentError, match="step 'hello'.*DDS clock is 1200000000 Hz, the profile says 1e"):
            deliver_to_board(table, url)
        assert url.board.committed is None
        assert not any(e[0] == "begin" for e in url.board.events)


def test_a_board_with_less_memory_than_the_table_is_refused():
    small = dataclasses.replace(GEN, sampling=dataclasses.replace(GEN.sampling, memory=1000))
    table, _ = dds_table(2000)
    with virtual_board(small) as url:
        with pytest.raises(InstrumentError, match="2000 samples exceed its memory of 1000"):
            deliver_to_board(table, url)


def test_words_outside_the_output_range_are_never_sent():
    table, _ = dds_table(1000, f0=100e6, f1=450e6)          # the board plays 1-400 MHz
    with virtual_board(GEN) as url:
        with pytest.raises(CheckFailed, match=r"sample 857: tuning word .* is 4\.0\d+e\+08 Hz, outside"):
            deliver_to_board(table, url)
        assert url.server.connections == 0


@pytest.mark.parametrize("change, error, match", [
    ({"count": 300000}, CheckFailed, "exceed the board memory"),
    ({"rate": 2e6}, CheckFailed, "not one the board plays"),
    ({"rate": 250000.5}, CheckFailed, "not one the board plays"),
    ({"dtype": "<f4"}, InputError, "float32"),
])
def test_tables_the_board_cannot_take_are_refused_before_connecting(change, error, match):
    count = change.get("count", 100)
    dtype = change.get("dtype", "<u4")
    info = TableInfo(sample_rate=change.get("rate", 1e6), count=count, period_count=count, dtype=dtype,
                     output="frequency", drive_unit="Hz", code_scale=1.0, code_offset=0.0, amplitude=None,
                     offset=None)
    table = RenderedTable(info, lambda a, b: Frame(a, None, None, None, np.full(b - a, 100_000_000, dtype)))
    with pytest.raises(error, match=match):
        deliver_to_board(table, "socket://127.0.0.1:9")


@settings(max_examples=examples(60))
@given(count=st.integers(1, 400), chunk=st.integers(1, 97),
       reads=st.lists(st.tuples(st.integers(0, 1700), st.integers(1, 300)), min_size=1, max_size=25))
def test_table_bytes_reads_any_range_across_chunk_boundaries(count, chunk, reads):
    table, words = dds_table(count)
    data = words.tobytes()
    source = TableBytes(_Plan(table, GEN, _Options({})), chunk=chunk)
    for offset, n in reads:
        assert source.read(offset, n) == data[offset:offset + n]


def test_bad_options_are_input_errors():
    table, _ = dds_table(10)
    for options in ({"retries": -1}, {"frame_bytes": 2}, {"restarts": "many"}, {"retries": True},
                    {"backend": "@py"}):
        with pytest.raises(InputError, match="--option"):
            deliver_to_board(table, "socket://127.0.0.1:9", options=options)


def test_an_unreachable_port_is_an_instrument_error_at_open():
    with refused_port() as port:             # bound but not listening: connection refused
        table, _ = dds_table(10)
        with pytest.raises(InstrumentError, match="step 'open': cannot open"):
            deliver_to_board(table, f"socket://127.0.0.1:{port}")


def test_dry_run_checks_and_reports_the_frames_without_connecting():
    table, words = dds_table(3000)
    report = deliver_to_board(table, "socket://127.0.0.1:9", dry_run=True, arm=True)
    assert report["dry_run"] and report["table"]["crc32"] == zlib.crc32(words.tobytes())
    log = report["log"]
    assert [e["message"] for e in log] == ["HELLO", "DISARM", "TRIGGER", "BEGIN", "DATA", "END", "COMMIT",
                                           "STATUS", "ARM", "STATUS"]
    data = log[4]
    n = -(-words.nbytes // 1024)
    assert data["bytes"] == words.nbytes + n * (fr.OVERHEAD + fr.DATA_PREFIX)
    assert log[0]["bytes"] == 13 and log[2]["bytes"] == 20 and log[3]["bytes"] == 32
    assert report["bytes"] == sum(e["bytes"] for e in log)


@pytest.mark.slow
def test_after_a_failure_the_driver_sends_disarm_before_raising():
    table, _ = dds_table(3000)
    with virtual_board(GEN, faults={"refuse": "always", "on": "end", "skip": 0}) as url:
        with pytest.raises(InstrumentError, match="step 'verify'.*BUSY"):
            deliver_to_board(table, url, options={"retries": 1})
        events = [e[0] for e in url.board.events]
    assert events[-1] == "disarm" and events.count("disarm") == 2      # before BEGIN, and after the failure
    assert url.board.committed is None


def test_a_link_that_dies_mid_transfer_is_an_instrument_error():
    listener = socket.create_server(("127.0.0.1", 0))
    board = BoardEmulator(GEN)

    def serve():
        conn, _ = listener.accept()
        with conn:
            got = 0
            while got < 5000:                      # answer until 5000 bytes came in, then hang up
                data = conn.recv(65536)
                got += len(data)
                for _, reply in board.feed(data):
                    conn.sendall(reply)

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    table, _ = dds_table(4000)
    try:
        with pytest.raises(InstrumentError, match=r"step 'data at byte \d+': the link failed.*"
                                                  r"could not confirm that the board's output is off"):
            deliver_to_board(table, f"socket://127.0.0.1:{listener.getsockname()[1]}")
    finally:
        thread.join(5)
        listener.close()
    assert board.committed is None


# --------------------------------------------------------------------------- an independent board


def _serve_doc_board(board, fd, stop):
    while not stop.is_set():
        ready, _, _ = select.select([fd], [], [], 0.05)
        if ready:
            for reply in board.receive(os.read(fd, 65536)):
                os.write(fd, reply)


@pytest.mark.parametrize("link", ["pty", "socket"])
def test_an_independent_board_written_from_the_document_accepts_an_upload(link):
    table, words = dds_table(6000)
    board = DocBoard()
    stop = threading.Event()
    if link == "pty":
        master, slave = raw_pty()
        url, fds = os.ttyname(slave), (master, slave)
        thread = threading.Thread(target=_serve_doc_board, args=(board, master, stop), daemon=True)
    else:
        listener = socket.create_server(("127.0.0.1", 0))
        url, fds = f"socket://127.0.0.1:{listener.getsockname()[1]}", ()

        def serve():
            conn, _ = listener.accept()
            with conn:
                _serve_doc_board(board, conn.fileno(), stop)
        thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    try:
        report = deliver_to_board(table, url, arm=True, options={"frame_bytes": 4096})
    finally:
        stop.set()
        thread.join(5)
        for fd in fds:
            os.close(fd)
        if link == "socket":
            listener.close()
    fmt, count, crc, rate, data = board.committed
    assert (fmt, count, crc, rate) == (3, 6000, table.crc32, 1_000_000)
    assert np.array_equal(np.frombuffer(data, "<u4"), words) and board.armed
    assert report["board"]["name"] == "doc board" and report["retries"] == 0
    # the board announced 512-byte payloads: 508 table bytes per frame, whole words
    assert next(s for s in report["steps"] if s["step"] == "data")["frame_bytes"] == 508


# --------------------------------------------------------------------------- versions and triggers


PULSED = BoardTiming(source="external", edge="rising", mode="each", delay=25e-6)


@pytest.mark.slow
def test_a_version_1_board_is_spoken_to_in_version_1():
    table, words = dds_table(2000)
    with virtual_board(GEN, version=1) as url:
        report = deliver_to_board(table, url)
        assert np.array_equal(url.board.committed.codes(), words)
        hellos = [e[1] for e in url.board.events if e[0] in ("hello", "refuse") and e[1].get("type", "hello") == "hello"]
    assert report["protocol"] == 1 and report["verification"]["ok"]
    # HELLO(2) refused with BAD_VERSION (detail 1), then HELLO(1) acknowledged
    assert [h.get("reason") or f"hello {h['version']}" for h in hellos] == ["BAD_VERSION", "hello 1"]
    assert "trigger" not in [s["step"] for s in report["steps"]]


@pytest.mark.slow
@pytest.mark.parametrize("board_options, reason", [
    ({"version": 1}, "protocol version 1, which has no trigger"),
    ({"sources": ("free",)}, "cannot start on an external trigger (it offers: free-running); a pulsed scenario "
                             "would free-run"),
])
def test_a_pulsed_upload_to_a_board_that_cannot_trigger_is_refused_before_anything_is_uploaded(board_options,
                                                                                            reason):
    table, _ = dds_table(2000)
    with virtual_board(GEN, **board_options) as url:
        with pytest.raises(InstrumentError, match="step 'hello'") as info:
            deliver_to_board(table, url, arm=True, options={"timing": PULSED})
        events = [e[0] for e in url.board.events]
    assert reason in str(info.value) and "nothing was uploaded or armed" in str(info.value)
    assert info.value.exit_code == 1
    assert "begin" not in events and "arm" not in events and url.board.committed is None
    assert str(info.value).endswith("the board's output was switched off")


@pytest.mark.slow
def test_a_pulsed_upload_sets_the_external_trigger_and_the_start_delay():
    table, _ = dds_table(2000)
    with virtual_board(GEN) as url:
        report = deliver_to_board(table, url, arm=True, options={"timing": PULSED})
        trigger = url.board.trigger
        assert url.board.armed
    assert trigger == fr.Trigger(fr.Source.EXTERNAL, fr.Edge.RISING, fr.Mode.EACH, 25_000)
    assert report["trigger"] == "external, rising edge, on every trigger, start delay 25000 ns" and report["armed"]


def test_a_person_cannot_pass_the_timing_as_a_driver_option():
    table, _ = dds_table(10)
    with pytest.raises(InputError, match="no option 'timing'"):
        deliver_to_board(table, "socket://127.0.0.1:9", options={"timing": "external"})


@pytest.mark.slow
def test_the_host_widens_a_table_to_the_only_format_a_channel_announces():
    board = BoardEmulator(GEN)
    caps = board.caps_by_version[2]
    only_64 = dataclasses.replace(caps.channels[0], formats=(fr.Format.UINT64,))
    board.caps = board.caps_by_version[2] = dataclasses.replace(caps, channels=(only_64,))
    table, words = dds_table(1500)                       # rendered as 32-bit words
    with virtual_board(GEN, board=board) as url:
        report = deliver_to_board(table, url)
        held = url.board.committed
    assert held.format == fr.Format.UINT64 and np.array_equal(held.codes(), words.astype("<u8"))
    # the whole-table CRC is over the bytes as sent: 8-byte little-endian words (zlib's CRC-32)
    assert held.crc == zlib.crc32(words.astype("<u8").tobytes()) != table.crc32
    assert report["table"]["format"] == "uint64" and report["verification"]["instrument_crc32"] == held.crc
