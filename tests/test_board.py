"""The ramp-board emulator (sweepgen.emulators.board): protocol state machine, commit rule, faults, servers."""

from __future__ import annotations

import dataclasses
import os
import select
import socket
import threading
import time
import zlib

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from sweepgen.emulators.board import BoardEmulator, BoardServer, FaultPlan, serve_forever
from sweepgen.errors import InputError
from sweepgen.generator import load_generator
from sweepgen.testing import virtual_board
from sweepgen.wire import frames as fr

from conftest import examples, raw_pty, socket_address

T = fr.MsgType
R = fr.Reason
GEN = load_generator("demo-ramp-board")      # 32-bit DDS words, 1 GHz clock, 1-400 MHz, rates 0.1-1 MSa/s
RATE = 1_000_000


def words_for(freqs_hz):
    # DDS frequency tuning word FTW = round(f 2^N / f_clock) (common practice)
    return np.round(np.asarray(freqs_hz) * 2**32 / 1e9).astype("<u4")


class Host:
    """Drives a BoardEmulator frame by frame through feed(), as the serial link would."""

    def __init__(self, board):
        self.board = board
        self.seq = 0
        self.decoder = fr.Decoder()

    def raw(self, data: bytes, now=None):
        out = []
        for _, reply in self.board.feed(data, now):
            out.extend(self.decoder.feed(reply))
        return out

    def send(self, msg_type, payload=b"", seq=None):
        if seq is None:
            self.seq = (self.seq + 1) & 0xFF
            seq = self.seq
        replies = self.raw(fr.encode(msg_type, seq, payload))
        assert len(replies) == 1, replies
        reply = replies[0]
        assert reply.seq == seq
        return reply

    def ok(self, msg_type, payload=b""):
        reply = self.send(msg_type, payload)
        assert reply.type == T.ACK, fr.Refusal.unpack(reply.payload)
        request, data = fr.parse_ack(reply.payload)
        assert request == msg_type
        return data

    def refused(self, msg_type, payload=b"", seq=None) -> fr.Refusal:
        reply = self.send(msg_type, payload, seq)
        assert reply.type == T.REFUSE, reply
        refusal = fr.Refusal.unpack(reply.payload)
        assert refusal.request_type == msg_type
        return refusal

    def upload(self, data: bytes, count, *, fmt=fr.Format.UINT32, crc=None, rate=RATE, frame=1000):
        crc = zlib.crc32(data) if crc is None else crc
        self.ok(T.BEGIN, fr.Begin(fmt, count, crc, rate).pack())
        for off in range(0, len(data), frame):
            self.ok(T.DATA, fr.data_payload(off, data[off:off + frame]))


@pytest.fixture
def host():
    h = Host(BoardEmulator(GEN))
    h.ok(T.HELLO, fr.hello_payload(1))
    return h


def test_hello_announces_the_profile():
    h = Host(BoardEmulator(GEN, max_payload=1028))
    caps = fr.Capabilities.unpack(h.ok(T.HELLO, fr.hello_payload(1)))
    assert caps.version == 1 and caps.formats == (fr.Format.UINT32,)
    assert caps.word_bits == 32 and caps.clock == 1_000_000_000 and caps.dac_bits == 0
    assert caps.memory == GEN.sampling.memory and caps.max_payload == 1028
    assert caps.rates == (100_000, 250_000, 500_000, 1_000_000)


def test_an_upload_is_committed_only_after_end_and_commit(host):
    words = words_for(np.linspace(10e6, 200e6, 2500))
    data = words.tobytes()
    host.upload(data, words.size)
    assert host.board.committed is None
    assert fr.parse_u32(host.ok(T.END)) == zlib.crc32(data)
    assert host.board.committed is None
    committed = fr.TableId.unpack(host.ok(T.COMMIT))
    assert committed == fr.TableId(fr.Format.UINT32, words.size, zlib.crc32(data), RATE)
    assert np.array_equal(host.board.committed.codes(), words)
    status = fr.Status.unpack(host.ok(T.STATUS))
    assert status == fr.Status(fr.State.IDLE, False, committed, 0)
    assert fr.parse_u32(host.ok(T.ARM)) == zlib.crc32(data)
    assert host.board.armed and fr.Status.unpack(host.ok(T.STATUS)).armed
    host.ok(T.DISARM)
    assert not host.board.armed


def test_wrong_whole_table_crc_is_never_committed_and_the_old_table_stays(host):
    old = words_for([5e6, 6e6, 7e6]).tobytes()
    host.upload(old, 3)
    host.ok(T.END)
    host.ok(T.COMMIT)
    data = words_for(np.linspace(10e6, 20e6, 300)).tobytes()
    host.upload(data, 300, crc=zlib.crc32(data) ^ 1)
    refusal = host.refused(T.END)
    assert refusal.reason == R.TABLE_CRC and refusal.detail == zlib.crc32(data)
    assert host.refused(T.COMMIT).reason == R.BAD_STATE
    assert host.board.committed.data == old


@settings(max_examples=examples(40))
@given(seed=st.integers(0, 2**32 - 1), count=st.integers(1, 600), frame=st.integers(1, 400),
       tamper=st.one_of(st.none(), st.integers(0, 10**6)), bit=st.integers(0, 7))
def test_the_board_commits_exactly_the_table_whose_crc_matches(seed, count, frame, tamper, bit):
    words = np.random.default_rng(seed).integers(words_for(1e6), words_for(400e6), count, dtype=np.uint32)
    data = words.astype("<u4").tobytes()
    crc = zlib.crc32(data)
    sent = bytearray(data)
    if tamper is not None:
        sent[tamper % len(sent)] ^= 1 << bit      # damaged before framing: every frame CRC is valid
    h = Host(BoardEmulator(GEN))
    h.ok(T.HELLO, fr.hello_payload(1))
    h.upload(bytes(sent), count, crc=crc, frame=frame)
    if tamper is None:
        h.ok(T.END)
        h.ok(T.COMMIT)
        assert h.board.committed.data == data
    else:
        assert h.refused(T.END).reason == R.TABLE_CRC
        assert h.refused(T.COMMIT).reason == R.BAD_STATE
        assert h.board.committed is None


def test_a_retransmitted_frame_gets_the_same_reply_without_being_executed_again(host):
    data = words_for(np.linspace(10e6, 20e6, 100)).tobytes()
    host.ok(T.BEGIN, fr.Begin(fr.Format.UINT32, 100, zlib.crc32(data), RATE).pack())
    first = host.send(T.DATA, fr.data_payload(0, data[:200]), seq=40)
    again = host.send(T.DATA, fr.data_payload(0, data[:200]), seq=40)
    assert again == first
    assert ("repeat", {"type": "data", "seq": 40}) in host.board.events
    # HELLO is always executed: it discards the unfinished upload even when repeated
    host.send(T.HELLO, fr.hello_payload(1), seq=41)
    host.send(T.HELLO, fr.hello_payload(1), seq=41)
    assert host.refused(T.DATA, fr.data_payload(200, data[200:])).reason == R.BAD_STATE


def begin(count=10, fmt=fr.Format.UINT32, rate=RATE, crc=0):
    return fr.Begin(fmt, count, crc, rate).pack()


@pytest.mark.parametrize("steps, msg_type, payload, reason, detail", [
    ([], T.BEGIN, begin(), R.NO_SESSION, 0),
    ([], T.ARM, b"", R.NO_SESSION, 0),
    ([(T.HELLO, b"\x01")], T.HELLO, b"\x03", R.BAD_VERSION, 2),
    ([(T.HELLO, b"\x01")], T.HELLO, b"", R.BAD_LENGTH, 1),
    ([(T.HELLO, b"\x01")], T.STATUS, b"\x00", R.BAD_LENGTH, 0),
    ([(T.HELLO, b"\x01")], T.BEGIN, begin()[:15], R.BAD_LENGTH, 16),
    ([(T.HELLO, b"\x01")], 0x42, b"", R.UNKNOWN_TYPE, 0),
    ([(T.HELLO, b"\x01")], T.ACK, b"\x01", R.UNKNOWN_TYPE, 0),
    ([(T.HELLO, b"\x01")], T.BEGIN, begin(fmt=fr.Format.INT16), R.BAD_FORMAT, fr.Format.UINT32.bit),
    ([(T.HELLO, b"\x01")], T.BEGIN, begin(count=0), R.BAD_COUNT, 262144),
    ([(T.HELLO, b"\x01")], T.BEGIN, begin(count=262145), R.BAD_COUNT, 262144),
    ([(T.HELLO, b"\x01")], T.BEGIN, begin(rate=2_000_000), R.BAD_RATE, 2_000_000),
    ([(T.HELLO, b"\x01")], T.DATA, fr.data_payload(0, b"1234"), R.BAD_STATE, fr.State.IDLE),
    ([(T.HELLO, b"\x01"), (T.BEGIN, begin())], T.DATA, fr.data_payload(8, b"1234"), R.BAD_OFFSET, 0),
    ([(T.HELLO, b"\x01"), (T.BEGIN, begin())], T.DATA, fr.data_payload(0, bytes(44)), R.OVERFLOW, 40),
    ([(T.HELLO, b"\x01"), (T.BEGIN, begin())], T.DATA, b"\x00\x00\x00\x00", R.BAD_LENGTH, 0),
    ([(T.HELLO, b"\x01"), (T.BEGIN, begin()), (T.DATA, fr.data_payload(0, bytes(12)))], T.END, b"",
     R.INCOMPLETE, 12),
    ([(T.HELLO, b"\x01")], T.COMMIT, b"", R.BAD_STATE, fr.State.IDLE),
    ([(T.HELLO, b"\x01")], T.ARM, b"", R.NO_TABLE, 0),
    ([(T.HELLO, b"\x01"), (T.BEGIN, begin())], T.ARM, b"", R.BAD_STATE, fr.State.RECEIVING),
])
def test_refusals_follow_the_protocol_document(steps, msg_type, payload, reason, detail):
    h = Host(BoardEmulator(GEN))
    for t, p in steps:
        h.ok(t, p)
    refusal = h.refused(msg_type, payload)
    assert (refusal.reason, refusal.detail) == (reason, detail)
    assert refusal.text


def test_begin_and_commit_are_refused_while_armed(host):
    data = words_for([5e6, 6e6]).tobytes()
    host.upload(data, 2)
    host.ok(T.END)
    host.ok(T.COMMIT)
    host.ok(T.ARM)
    assert host.refused(T.BEGIN, begin()).reason == R.ARMED
    host.ok(T.DISARM)
    host.ok(T.BEGIN, begin())


def test_disarm_and_status_work_before_hello():
    board = BoardEmulator(GEN)
    board.armed = True
    h = Host(board)
    h.ok(T.DISARM)
    assert not board.armed
    assert fr.Status.unpack(h.ok(T.STATUS)).table.format == 0


def test_words_outside_the_output_range_are_refused_at_end(host):
    words = words_for([100e6, 200e6, 450e6, 300e6])        # 450 MHz is above the 400 MHz range_max
    host.upload(words.tobytes(), 4)
    refusal = host.refused(T.END)
    assert (refusal.reason, refusal.detail) == (R.RANGE, 2)
    assert host.board.committed is None


def test_damaged_frame_is_refused_with_frame_crc_and_its_header_seq():
    h = Host(BoardEmulator(GEN))
    raw = bytearray(fr.encode(T.HELLO, 77, b"\x01"))
    raw[8] ^= 0xFF
    (reply,) = h.raw(bytes(raw))
    assert reply.type == T.REFUSE and reply.seq == 77
    assert fr.Refusal.unpack(reply.payload).reason == R.FRAME_CRC


def test_a_partial_frame_is_dropped_after_the_gap_timeout():
    h = Host(BoardEmulator(GEN))
    raw = fr.encode(T.HELLO, 5, b"\x01")
    assert h.raw(raw[:6], now=10.0) == []
    assert h.raw(raw[6:], now=10.5) == []              # 0.5 s later: the first half was discarded
    assert [r.type for r in h.raw(raw, now=10.51)] == [T.ACK]
    assert h.raw(raw[:6], now=11.0) == [] and len(h.raw(raw[6:], now=11.05)) == 1   # within the gap: kept


# --------------------------------------------------------------------------- faults


def test_fault_plan_parsing():
    plan = FaultPlan.parse({"drop": 2, "refuse": "always", "on": ["data", "end"], "skip": 0, "stall_time": 0.5})
    assert plan.counts == {"drop": 2, "refuse": None} and plan.skip == 0 and plan.stall_time == 0.5
    assert plan.on == {T.DATA, T.END}
    assert FaultPlan.parse({"reset": 1, "on": "any"}).on is None
    for bad in ({"explode": 1}, {"drop": -3}, {"drop": 1.5}, {"on": "nothing"}, {"skip": -1},
                {"stall_time": 0}):
        with pytest.raises(InputError, match="faults"):
            FaultPlan.parse(bad)


def test_faults_strike_eligible_frames_after_skip_in_order():
    plan = FaultPlan.parse({"drop": 1, "refuse": 2, "skip": 1})
    picks = [plan.pick(T.DATA) for _ in range(5)]
    assert picks == [None, "drop", "refuse", "refuse", None]
    assert plan.pick(T.END) is None
    persistent = FaultPlan.parse({"stall": "always", "skip": 0})
    assert [persistent.pick(T.DATA) for _ in range(4)] == ["stall"] * 4


def fault_host(faults):
    h = Host(BoardEmulator(GEN, faults={"skip": 0, **faults}))
    h.ok(T.HELLO, fr.hello_payload(1))
    h.ok(T.BEGIN, begin(count=2, crc=zlib.crc32(bytes(8))))
    return h


def test_fault_drop_sends_no_reply_and_the_retransmission_is_answered():
    h = fault_host({"drop": 1})
    frame = fr.encode(T.DATA, 9, fr.data_payload(0, bytes(8)))
    assert h.raw(frame) == []
    assert [r.type for r in h.raw(frame)] == [T.ACK]


def test_fault_corrupt_fails_the_frame_crc_check():
    h = fault_host({"corrupt": 1})
    assert h.refused(T.DATA, fr.data_payload(0, bytes(8))).reason == R.FRAME_CRC
    assert h.board.received == 0
    h.ok(T.DATA, fr.data_payload(0, bytes(8)))


def test_fault_refuse_answers_busy():
    h = fault_host({"refuse": "always"})
    for _ in range(3):
        assert h.refused(T.DATA, fr.data_payload(0, bytes(8))).reason == R.BUSY


def test_fault_stall_delays_the_reply():
    h = fault_host({"stall": 1, "stall_time": 0.3})
    ((delay, reply),) = h.board.feed(fr.encode(T.DATA, 3, fr.data_payload(0, bytes(8))))
    assert delay == 0.3 and fr.decode(reply).type == T.ACK


def test_fault_reset_loses_the_session_and_the_upload_but_keeps_the_committed_table(host):
    data = words_for([5e6, 6e6]).tobytes()
    host.upload(data, 2)
    host.ok(T.END)
    host.ok(T.COMMIT)
    host.ok(T.ARM)
    host.board.faults = FaultPlan.parse({"reset": 1, "skip": 0, "on": "status"})
    assert host.raw(fr.encode(T.STATUS, 99)) == []          # the board resets on this frame: no reply
    assert host.board.resets == 1 and not host.board.armed
    assert host.refused(T.BEGIN, begin(count=2)).reason == R.NO_SESSION
    assert host.board.committed.data == data
    assert fr.Status.unpack(host.ok(T.STATUS)).table.crc == zlib.crc32(data)


def test_fault_corrupt_reply_damages_the_reply_only():
    h = fault_host({"corrupt_reply": 1})
    frame = fr.encode(T.DATA, 12, fr.data_payload(0, bytes(8)))
    (bad,) = h.raw(frame)
    assert isinstance(bad, fr.BadFrame)
    assert h.board.received == 8
    (good,) = h.raw(frame)                   # the retransmission gets the remembered reply
    assert good.type == T.ACK and fr.parse_ack(good.payload) == (T.DATA, fr.u32(8))


def test_fault_corrupt_memory_is_caught_by_the_whole_table_crc():
    h = fault_host({"corrupt_memory": 1})
    h.ok(T.DATA, fr.data_payload(0, bytes(8)))
    assert h.refused(T.END).reason == R.TABLE_CRC
    assert h.board.committed is None


# --------------------------------------------------------------------------- servers


def _exchange(frame: bytes, read, write):
    write(frame)
    decoder = fr.Decoder()
    while True:
        out = decoder.feed(read())
        if out:
            return out[0]


def test_board_server_on_a_loopback_socket_keeps_its_table_across_connections():
    data = words_for([5e6, 6e6, 7e6]).tobytes()
    with BoardServer(GEN) as server:
        assert server.url == f"socket://127.0.0.1:{server.port}"
        for n, requests in enumerate([
            [(T.HELLO, b"\x01"), (T.BEGIN, begin(count=3, crc=zlib.crc32(data))),
             (T.DATA, fr.data_payload(0, data)), (T.END, b""), (T.COMMIT, b"")],
            [(T.STATUS, b"")],
        ]):
            with socket.create_connection(("127.0.0.1", server.port), timeout=5) as sock:
                for seq, (t, p) in enumerate(requests):
                    reply = _exchange(fr.encode(t, seq, p), lambda: sock.recv(4096), sock.sendall)
                    assert reply.type == T.ACK and reply.seq == seq
        status = fr.Status.unpack(fr.parse_ack(reply.payload)[1])
        assert status.table.crc == zlib.crc32(data) and server.connections == 2


def test_a_silent_host_does_not_block_another():
    # one host sends half a frame and falls silent; another is answered at once, on its own decoder
    lines = []
    with BoardServer(GEN, log=lines.append) as server:
        silent = socket.create_connection(("127.0.0.1", server.port), timeout=5)
        silent.sendall(fr.encode(T.HELLO, 9, b"\x01")[:5])
        t0 = time.monotonic()
        with socket.create_connection(("127.0.0.1", server.port), timeout=5) as sock:
            reply = _exchange(fr.encode(T.STATUS, 4, b""), lambda: sock.recv(4096), sock.sendall)
        took = time.monotonic() - t0
        silent.close()
    assert reply.type == T.ACK and reply.seq == 4
    assert took < 1.0 + 2.0                     # within a second, with slack for a loaded machine
    assert sum("opened" in line for line in lines) == 2


def test_the_announced_memory_is_what_the_emulator_will_buffer():
    from sweepgen.emulators.board import MAX_TABLE_BYTES, capabilities_for

    huge = dataclasses.replace(GEN, sampling=dataclasses.replace(GEN.sampling, memory=10**300))
    caps = capabilities_for(huge, version=1)     # a profile's absurd memory does not reach the wire
    assert caps.memory == MAX_TABLE_BYTES // 4   # 32-bit tuning words
    assert fr.Capabilities.unpack(caps.pack()) == caps
    caps2 = capabilities_for(huge)               # version 2 also offers 64-bit words for them
    assert caps2.memory == MAX_TABLE_BYTES // 8
    assert fr.CapabilitiesV2.unpack(caps2.pack()) == caps2


def test_serve_forever_calls_ready_with_its_port_and_stops_on_request():
    ports = []
    stop = threading.Event()
    ready = threading.Event()
    thread = threading.Thread(target=serve_forever, args=("127.0.0.1", 0, "demo-ramp-board"),
                              kwargs={"ready": lambda p: (ports.append(p), ready.set()), "stop": stop}, daemon=True)
    thread.start()
    assert ready.wait(5)
    with socket.create_connection(("127.0.0.1", ports[0]), timeout=5) as sock:
        reply = _exchange(fr.encode(T.HELLO, 1, b"\x01"), lambda: sock.recv(4096), sock.sendall)
    assert fr.Capabilities.unpack(fr.parse_ack(reply.payload)[1]).clock == 1_000_000_000
    stop.set()
    thread.join(5)
    assert not thread.is_alive()


def test_board_serves_a_pseudo_terminal():
    master, slave = raw_pty()
    board = BoardEmulator(GEN)
    try:
        with board.start_fd(master):
            def read():
                ready, _, _ = select.select([slave], [], [], 5)
                assert ready, "no reply on the pseudo-terminal"
                return os.read(slave, 4096)

            reply = _exchange(fr.encode(T.HELLO, 3, b"\x01"), read, lambda b: os.write(slave, b))
            assert reply.type == T.ACK and reply.seq == 3
    finally:
        os.close(slave)
        os.close(master)


def test_virtual_board_yields_a_pyserial_url_carrying_the_board():
    with virtual_board("demo-ramp-board", faults={"drop": 1}) as url:
        assert isinstance(url, str) and url.startswith("socket://127.0.0.1:")
        assert url.board.faults.counts == {"drop": 1}
        address = socket_address(url)
        with socket.create_connection(address, timeout=5):
            pass
    with pytest.raises(OSError):
        socket.create_connection(address, timeout=1).close()


# --------------------------------------------------------------------------- version 2


TWO = dataclasses.replace(GEN, channels=2)


def begin2(channel=1, count=2, crc=None, rate=fr.Rate(RATE), fmt=fr.Format.UINT32, data=None):
    crc = zlib.crc32(data if data is not None else bytes(4 * count)) if crc is None else crc
    return fr.BeginV2(fmt, channel, count, crc, rate).pack()


@pytest.fixture
def host2():
    h = Host(BoardEmulator(TWO))
    caps = fr.CapabilitiesV2.unpack(h.ok(T.HELLO, fr.hello_payload(2)))
    assert len(caps.channels) == 2 and caps.sources == tuple(fr.Source)
    return h


def commit2(h, channel, words):
    data = words.tobytes()
    h.ok(T.BEGIN, begin2(channel, words.size, data=data))
    h.ok(T.DATA, fr.data_payload(0, data))
    h.ok(T.END)
    return fr.TableIdV2.unpack(h.ok(T.COMMIT))


def test_version_2_channels_hold_their_own_tables_and_arm_together(host2):
    one, two = words_for([5e6, 6e6, 7e6]), words_for([300e6, 200e6])
    assert commit2(host2, 1, one) == fr.TableIdV2(fr.Format.UINT32, 1, 3, zlib.crc32(one.tobytes()), fr.Rate(RATE))
    commit2(host2, 2, two)
    st = fr.StatusV2.unpack(host2.ok(T.STATUS))
    assert [t.crc for t in st.tables] == [zlib.crc32(one.tobytes()), zlib.crc32(two.tobytes())] and not st.armed
    crcs = host2.ok(T.ARM)
    assert struct_u32s(crcs) == [zlib.crc32(one.tobytes()), zlib.crc32(two.tobytes())]
    assert host2.ok(T.ARM) == crcs                           # ARM while armed: the same, nothing restarted
    assert [e[0] for e in host2.board.events].count("arm") == 1


def struct_u32s(data):
    return list(np.frombuffer(data, "<u4"))


def test_a_rate_that_is_not_a_whole_number_travels_as_a_fraction():
    gen = dataclasses.replace(GEN, sampling=dataclasses.replace(GEN.sampling, rates=(1e6 / 3, 1e6),
                                                                rate_min=1e6 / 3))
    h = Host(BoardEmulator(gen))
    caps = fr.CapabilitiesV2.unpack(h.ok(T.HELLO, fr.hello_payload(2)))
    assert caps.rates[0] == fr.Rate(1_000_000, 3)
    h.ok(T.BEGIN, begin2(rate=fr.Rate(2_000_000, 6)))         # the same rate, another fraction
    assert h.refused(T.BEGIN, begin2(rate=fr.Rate(333_333, 1))).reason == R.BAD_RATE
    assert h.refused(T.BEGIN, begin2(rate=fr.Rate(1, 0))).reason == R.BAD_RATE
    # a version-1 session hears only the whole-number rates
    assert fr.Capabilities.unpack(h.ok(T.HELLO, fr.hello_payload(1))).rates == (1_000_000,)


@pytest.mark.parametrize("steps, msg_type, payload, reason, detail", [
    # the order of the checks: type, length, reserved bytes, session, then the request's own
    ([], T.TRIGGER, bytes([1, 0, 0, 7, 0, 0, 0, 0]), R.UNKNOWN_TYPE, 0),   # before HELLO: version 1's types
    ([(T.HELLO, b"\x02"), (T.HELLO, b"\x05")], T.BEGIN, begin2()[:3] + b"\x01" + begin2()[4:], R.RESERVED, 3),
    ([(T.HELLO, b"\x02")], T.BEGIN, begin2()[:19], R.BAD_LENGTH, 20),
    ([(T.HELLO, b"\x02")], T.BEGIN, begin2()[:3] + b"\x01" + begin2()[4:], R.RESERVED, 3),
    ([(T.HELLO, b"\x02")], T.TRIGGER, bytes([1, 0, 0, 7, 0, 0, 0, 0]), R.RESERVED, 3),
    ([(T.HELLO, b"\x02")], T.BEGIN, begin2(channel=3), R.BAD_CHANNEL, 2),
    ([(T.HELLO, b"\x02")], T.BEGIN, begin2(channel=0), R.BAD_CHANNEL, 2),
    ([(T.HELLO, b"\x02")], T.TRIGGER, fr.Trigger(3, 0, 0, 0).pack(), R.BAD_TRIGGER, 0b111 | 0b11 << 8),
    ([(T.HELLO, b"\x02")], T.TRIGGER, fr.Trigger(1, 0, 3, 0).pack(), R.BAD_TRIGGER, 0b111 | 0b11 << 8),
    ([(T.HELLO, b"\x02")], T.TRIGGER, fr.Trigger(1, 0, 0, 2 * 10**9).pack(), R.BAD_DELAY, 10**9),
    ([(T.HELLO, b"\x02")], T.FIRE, b"", R.BAD_STATE, fr.State.IDLE),
    ([(T.HELLO, b"\x01")], T.TRIGGER, fr.Trigger().pack(), R.UNKNOWN_TYPE, 0),
    ([(T.HELLO, b"\x02")], T.DATA, b"", R.BAD_LENGTH, 0),
    ([(T.HELLO, b"\x02")], T.TRIGGER, b"", R.BAD_LENGTH, 8),
])
def test_version_2_refusals_follow_the_document(steps, msg_type, payload, reason, detail):
    h = Host(BoardEmulator(TWO))
    for t, p in steps:
        h.send(t, p)               # a refused HELLO(5) leaves the version-2 session as it was
    refusal = h.refused(msg_type, payload)
    assert (refusal.reason, refusal.detail) == (reason, detail)


def test_busy_is_never_replayed_and_a_resent_status_is_fresh():
    h = Host(BoardEmulator(TWO, faults={"refuse": 1, "skip": 0, "on": "begin"}))
    h.ok(T.HELLO, fr.hello_payload(2))
    assert h.refused(T.BEGIN, begin2(), seq=50).reason == R.BUSY
    assert h.send(T.BEGIN, begin2(), seq=50).type == T.ACK        # the same frame again: executed afresh
    first = h.send(T.STATUS, seq=51)
    h.ok(T.DATA, fr.data_payload(0, bytes(8)))
    again = h.send(T.STATUS, seq=51)                               # the same STATUS frame: state as it is now
    assert fr.StatusV2.unpack(fr.parse_ack(first.payload)[1]).received == 0
    assert fr.StatusV2.unpack(fr.parse_ack(again.payload)[1]).received == 8


def test_disarm_during_an_upload_leaves_it_and_the_trigger_needs_the_output_off(host2):
    words = words_for([5e6, 6e6])
    commit2(host2, 1, words)
    set_to = host2.ok(T.TRIGGER, fr.Trigger(fr.Source.SOFTWARE, fr.Edge.FALLING, fr.Mode.ONCE, 1234).pack())
    # the edge means nothing without the external input; the delay goes to the board's 10 ns steps
    assert fr.Trigger.unpack(set_to) == fr.Trigger(fr.Source.SOFTWARE, fr.Edge.RISING, fr.Mode.ONCE, 1230)
    host2.ok(T.ARM)
    assert host2.refused(T.TRIGGER, fr.Trigger().pack()).reason == R.ARMED
    host2.ok(T.FIRE)
    host2.ok(T.DISARM)
    host2.ok(T.BEGIN, begin2(2))
    host2.ok(T.DATA, fr.data_payload(0, bytes(4)))
    host2.ok(T.DISARM)                                             # during the upload: it goes on
    host2.ok(T.DATA, fr.data_payload(4, bytes(4)))
    assert fr.StatusV2.unpack(host2.ok(T.STATUS)).received == 8


def test_a_damaged_frame_is_answered_only_when_it_names_a_request():
    h = Host(BoardEmulator(TWO))
    for msg_type, answered in ((T.ACK, False), (T.REFUSE, False), (0x42, False), (T.STATUS, True)):
        raw = bytearray(fr.encode(msg_type, 9, b"\x06"))
        raw[-1] ^= 0x80
        assert len(h.raw(bytes(raw))) == int(answered), msg_type


def test_a_version_1_board_refuses_version_2_with_its_own_version():
    h = Host(BoardEmulator(GEN, version=1))
    refusal = h.refused(T.HELLO, fr.hello_payload(2))
    assert (refusal.reason, refusal.detail) == (R.BAD_VERSION, 1)
    assert fr.Capabilities.unpack(h.ok(T.HELLO, fr.hello_payload(1))).version == 1
