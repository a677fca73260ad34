"""A version-2 ramp board written from drivers/serial_protocol.md alone, and the driver uploading to it.

:class:`DocBoard2` uses struct and zlib only, no sweepgen code: if the driver and
the document drift apart, these uploads fail. It runs on a real pseudo-terminal
or a loopback socket, as a board on a USB serial adapter or a TCP bridge would.
Also here: uploads of several channels with a fault on one of them, and a board
that refuses to switch off.
"""

from __future__ import annotations

import os
import select
import socket
import struct
import threading
import zlib

import numpy as np
import pytest

from sweepgen.drivers.serial_board import BoardTiming
from sweepgen.errors import InstrumentError
from sweepgen.testing import virtual_board

from conftest import dds_table, deliver_to_board, quick_ramp_board, raw_pty

GEN = quick_ramp_board()
LOW, HIGH = 4294967, 1717986918          # 1 MHz and 400 MHz as 32-bit words of a 1 GHz DDS (section 1.3)


class DocBoard2:
    """Sections 1 (frames), 1.1 (receiving), 2 (remembered replies), 3 (order of the checks, reserved
    bytes, channels), 3.1-3.9 (messages), 4 (REFUSE), 5 (commit rule), 7 (states) of the document.

    ``sources``: bit mask of the trigger sources it offers; ``fail_end_on``: a channel whose END it
    refuses with RANGE (a table it cannot play); ``refuse_disarm``: it never confirms DISARM.
    """

    def __init__(self, *, channels=2, sources=0b011, fail_end_on=None, refuse_disarm=False, armed=False):
        self.n, self.sources, self.fail_end_on, self.refuse_disarm = channels, sources, fail_end_on, refuse_disarm
        self.max_payload, self.memory = 1024, 100_000
        self.rates = [(1_000_000, 1), (1_000_000, 3)]
        self.rx = bytearray()
        self.version = 0                         # of the session; 0: none
        self.state, self.armed = 0, armed        # 0 IDLE, 1 RECEIVING, 2 VERIFIED
        self.trigger = bytes([0, 0, 0, 0]) + struct.pack("<I", 0)
        self.begin = None                        # (format, channel, count, crc, n, d)
        self.mem, self.received = bytearray(), 0
        self.tables = {}                         # channel -> (format, count, crc, n, d, bytes)
        self.last = None                         # (seq, type, crc of payload, reply)
        self.requests = []

    @staticmethod
    def frame(t, seq, payload):
        body = b"\xa5\x5a" + struct.pack("<BBHH", t, seq, len(payload), len(payload) ^ 0xFFFF) + payload
        return body + struct.pack("<I", zlib.crc32(body))

    def ack(self, t, seq, data=b""):
        return self.frame(0x80, seq, bytes([t]) + data)

    def refuse(self, t, seq, reason, detail=0):
        return self.frame(0x81, seq, struct.pack("<BBI", t, reason, detail))

    def receive(self, data):
        self.rx += data
        out = []
        while True:
            i = self.rx.find(b"\xa5\x5a")
            if i < 0:
                del self.rx[:max(0, len(self.rx) - 1) if self.rx[-1:] == b"\xa5" else len(self.rx)]
                return out
            del self.rx[:i]
            if len(self.rx) < 8:
                return out
            t, seq, n, check = struct.unpack_from("<BBHH", self.rx, 2)
            if check != n ^ 0xFFFF or n > self.max_payload:
                del self.rx[:1]
                continue
            if len(self.rx) < n + 12:
                return out
            frame = bytes(self.rx[:n + 12])
            if zlib.crc32(frame[:8 + n]) != struct.unpack_from("<I", frame, 8 + n)[0]:
                if 0x01 <= t <= 0x0A:                       # answered only when it names a request
                    out.append(self.refuse(t, seq, 0x01))
                del self.rx[:1]
                continue
            del self.rx[:n + 12]
            out.append(self.handle(t, seq, frame[8:8 + n]))

    def handle(self, t, seq, p):
        self.requests.append(t)
        key = (seq, t, zlib.crc32(p))
        if t in (0x02, 0x03, 0x04, 0x05) and self.last and self.last[:3] == key:
            return self.last[3]
        reply = self.execute(t, seq, p)
        if t in (0x02, 0x03, 0x04, 0x05):
            self.last = (*key, reply)
        elif t == 0x01:
            self.last = None
        return reply

    LENGTHS = {0x01: 1, 0x02: 20, 0x04: 0, 0x05: 0, 0x06: 0, 0x07: 0, 0x08: 0, 0x09: 8, 0x0A: 0}
    RESERVED = {0x02: (2, 3), 0x09: (3,)}

    def execute(self, t, seq, p):
        if not 0x01 <= t <= 0x0A:                                    # 1. the type
            return self.refuse(t, seq, 0x03)
        if t == 0x03 and len(p) <= 4 or t != 0x03 and len(p) != self.LENGTHS[t]:   # 2. the length
            return self.refuse(t, seq, 0x02, 0 if t == 0x03 else self.LENGTHS[t])
        for at in self.RESERVED.get(t, ()):                           # 3. reserved bytes
            if p[at]:
                return self.refuse(t, seq, 0x13, at)
        if t == 0x01:                                                 # 4. HELLO
            if p[0] != 2:
                return self.refuse(t, seq, 0x04, 2)
            self.version, self.state, self.begin, self.received = 2, 0, None, 0
            return self.ack(t, seq, self.capabilities())
        if t == 0x08:                                                 # DISARM
            if self.refuse_disarm:
                return self.refuse(t, seq, 0x06, self.state)
            self.armed = False
            return self.ack(t, seq)
        if t == 0x06:                                                 # STATUS
            return self.ack(t, seq, self.status())
        if not self.version:                                          # 5. the session
            return self.refuse(t, seq, 0x05)
        return getattr(self, f"do_{t:02x}")(t, seq, p)                # 6. the request's own checks

    def capabilities(self):
        head = struct.pack("<BBBBHBxII", 2, self.n, self.sources, 0b01 if self.sources & 0b010 else 0,
                           self.max_payload, len(self.rates), 10, 1_000_000_000)
        block = struct.pack("<BBBxIqqQii", 1, 1 << 2, 32, self.memory, LOW, HIGH, 1_000_000_000, 0, 0)
        return head + block * self.n + b"".join(struct.pack("<II", *r) for r in self.rates) + b"doc board 2"

    def table_description(self, channel):
        fmt, count, crc, n, d, _ = self.tables.get(channel, (0, 0, 0, 0, 0, b""))
        return struct.pack("<BBxxIIII", fmt, channel, count, crc, n, d)

    def status(self):
        pending = self.begin[1] if self.begin and self.state else 0
        return (struct.pack("<BBBBI", self.state, self.armed, self.n, pending, self.received) + self.trigger
                + b"".join(self.table_description(c) for c in range(1, self.n + 1)))

    def do_02(self, t, seq, p):                                       # BEGIN
        fmt, channel, count, crc, n, d = struct.unpack("<BBxxIIII", p)
        if not 1 <= channel <= self.n:
            return self.refuse(t, seq, 0x14, self.n)
        if self.armed:
            return self.refuse(t, seq, 0x07)
        if fmt != 3:
            return self.refuse(t, seq, 0x08, 1 << 2)
        if not 1 <= count <= self.memory:
            return self.refuse(t, seq, 0x09, self.memory)
        if d == 0 or not any(n * rd == rn * d for rn, rd in self.rates):
            return self.refuse(t, seq, 0x0A, n)
        self.begin, self.mem, self.received, self.state = (fmt, channel, count, crc, n, d), bytearray(4 * count), 0, 1
        return self.ack(t, seq)

    def do_03(self, t, seq, p):                                       # DATA
        if self.state != 1:
            return self.refuse(t, seq, 0x06, self.state)
        (offset,), chunk = struct.unpack_from("<I", p), p[4:]
        if offset > self.received:
            return self.refuse(t, seq, 0x0B, self.received)
        if offset + len(chunk) > len(self.mem):
            return self.refuse(t, seq, 0x0C, len(self.mem))
        self.mem[offset:offset + len(chunk)] = chunk
        self.received = max(self.received, offset + len(chunk))
        return self.ack(t, seq, struct.pack("<I", self.received))

    def do_04(self, t, seq, p):                                       # END
        if self.state != 1:
            return self.refuse(t, seq, 0x06, self.state)
        if self.received < len(self.mem):
            return self.refuse(t, seq, 0x0D, self.received)
        crc = zlib.crc32(self.mem)
        if crc != self.begin[3]:
            self.state = 0
            return self.refuse(t, seq, 0x0E, crc)
        words = np.frombuffer(bytes(self.mem), "<u4")
        outside = np.flatnonzero((words < LOW) | (words > HIGH))
        if outside.size or self.begin[1] == self.fail_end_on:
            self.state = 0
            return self.refuse(t, seq, 0x0F, int(outside[0]) if outside.size else 0)
        self.state = 2
        return self.ack(t, seq, struct.pack("<I", crc))

    def do_05(self, t, seq, p):                                       # COMMIT
        if self.armed:
            return self.refuse(t, seq, 0x07)
        if self.state != 2:
            return self.refuse(t, seq, 0x06, self.state)
        self.state = 0
        fmt, channel, count, crc, n, d = self.begin
        if zlib.crc32(self.mem) != crc:
            return self.refuse(t, seq, 0x0E, zlib.crc32(self.mem))
        self.tables[channel] = (fmt, count, crc, n, d, bytes(self.mem))
        return self.ack(t, seq, self.table_description(channel))

    def do_07(self, t, seq, p):                                       # ARM
        if self.state != 0:
            return self.refuse(t, seq, 0x06, self.state)
        if not self.tables:
            return self.refuse(t, seq, 0x11)
        self.armed = True
        crcs = [self.tables[c][2] if c in self.tables else 0 for c in range(1, self.n + 1)]
        return self.ack(t, seq, struct.pack(f"<{self.n}I", *crcs))

    def do_09(self, t, seq, p):                                       # TRIGGER
        source, edge, mode, delay = struct.unpack("<BBBxI", p)
        if self.armed:
            return self.refuse(t, seq, 0x07)
        edges = 0b01 if self.sources & 0b010 else 0
        if not self.sources & (1 << source) or mode > 2 or source == 1 and not edges & (1 << edge):
            return self.refuse(t, seq, 0x12, self.sources | edges << 8)
        if delay > 1_000_000_000:
            return self.refuse(t, seq, 0x15, 1_000_000_000)
        self.trigger = struct.pack("<BBBxI", source, edge if source == 1 else 0, mode, round(delay / 10) * 10)
        return self.ack(t, seq, self.trigger)

    def do_0a(self, t, seq, p):                                       # FIRE
        if not self.armed:
            return self.refuse(t, seq, 0x06, self.state)
        if self.trigger[0] != 2:
            return self.refuse(t, seq, 0x12, self.sources)
        return self.ack(t, seq)


def _serve(board, fd, stop):
    while not stop.is_set():
        ready, _, _ = select.select([fd], [], [], 0.05)
        if ready:
            try:
                data = os.read(fd, 65536)
            except OSError:
                return
            if not data:
                return
            for reply in board.receive(data):
                os.write(fd, reply)


class Served:
    """A DocBoard2 on a pseudo-terminal (``link="pty"``) or a loopback socket (``link="socket"``)."""

    def __init__(self, board, link):
        self.board, self.link, self.stop = board, link, threading.Event()
        if link == "pty":
            self.master, self.slave = raw_pty()
            self.url = os.ttyname(self.slave)
            target = lambda: _serve(board, self.master, self.stop)  # noqa: E731
        else:
            self.listener = socket.create_server(("127.0.0.1", 0))
            self.url = f"socket://127.0.0.1:{self.listener.getsockname()[1]}"

            def target():
                conn, _ = self.listener.accept()
                with conn:
                    _serve(board, conn.fileno(), self.stop)
        self.thread = threading.Thread(target=target, daemon=True)
        self.thread.start()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.stop.set()
        if self.link == "pty":
            self.thread.join(5)
            os.close(self.master)
            os.close(self.slave)
        else:
            self.listener.close()
            self.thread.join(5)


def two_tables():
    """Channel 1 a rising ramp, channel 2 a falling one (demo data), as DDS tuning words."""
    (t1, w1), (t2, w2) = dds_table(3000, f0=20e6, f1=180e6), dds_table(2000, f0=150e6, f1=30e6)
    return {1: t1, 2: t2}, {1: w1, 2: w2}


PULSED = BoardTiming(source="external", edge="rising", mode="once", delay=12.5e-6)


@pytest.mark.parametrize("link", ["pty", "socket"])
def test_a_version_2_board_written_from_the_document_takes_two_channels_and_the_trigger(link):
    from sweepgen.drivers.base import Delivery
    from sweepgen.drivers.serial_board import SerialDriver

    tables, words = two_tables()
    board = DocBoard2()
    with Served(board, link) as served:
        report = SerialDriver().deliver_tables(tables, Delivery(served.url, GEN, options={"timing": PULSED}))
    for channel in (1, 2):
        fmt, count, crc, n, d, data = board.tables[channel]
        assert (fmt, count, n, d) == (3, words[channel].size, 1_000_000, 1)
        assert crc == zlib.crc32(words[channel].tobytes()) and np.array_equal(np.frombuffer(data, "<u4"),
                                                                                words[channel])
    assert not board.armed                                    # outputs stay off without --arm
    assert struct.unpack("<BBBxI", board.trigger) == (1, 0, 1, 12_500)
    assert report["protocol"] == 2 and report["board"]["name"] == "doc board 2"
    assert [c["channel"] for c in report["tables"]] == [1, 2] and report["verification"]["committed"]
    assert board.requests.index(0x09) < board.requests.index(0x02)          # TRIGGER before the first BEGIN
    assert 0x07 not in board.requests                                        # never ARM


def test_the_doc_board_is_armed_only_with_arm_and_plays_both_channels():
    tables, words = two_tables()
    board = DocBoard2()
    with Served(board, "socket") as served:
        report = deliver_to_board(tables, served.url, arm=True, options={"timing": PULSED})
    assert board.armed and report["armed"]
    arm = next(s for s in report["steps"] if s["step"] == "arm")
    assert "external, rising edge, once, start delay 12500 ns" in arm["detail"]


def test_a_fault_on_the_second_channel_leaves_every_output_off():
    tables, _ = two_tables()
    board = DocBoard2(fail_end_on=2)
    with Served(board, "socket") as served:
        with pytest.raises(InstrumentError) as info:
            deliver_to_board(tables, served.url, arm=True, options={"timing": PULSED})
    message = str(info.value)
    assert "step 'verify'" in message and "RANGE" in message and info.value.exit_code == 1
    assert message.endswith("the board's outputs (channels 1 and 2) were switched off"), message
    assert not board.armed and 0x07 not in board.requests        # ARM never sent
    assert 1 in board.tables and 2 not in board.tables            # channel 1 committed, never played


@pytest.mark.slow
def test_a_fault_on_the_emulators_second_channel_leaves_the_first_off():
    two = __import__("dataclasses").replace(GEN, channels=2)
    tables, words = two_tables()
    frames_of_channel_1 = -(-words[1].nbytes // 1024)
    faults = {"corrupt_memory": "always", "skip": frames_of_channel_1}     # every DATA frame of channel 2
    with virtual_board(two, faults=faults) as url:
        with pytest.raises(InstrumentError, match="TABLE_CRC") as info:
            deliver_to_board(tables, url, two, arm=True, options={"restarts": 1})
        board = url.board
        assert not board.armed and "arm" not in [e[0] for e in board.events]
        assert np.array_equal(board.tables[1].codes(), words[1]) and 2 not in board.tables
    assert "channel 2 was not committed" in str(info.value)
    assert str(info.value).endswith("the board's outputs (channels 1 and 2) were switched off"), str(info.value)


def test_a_board_that_refuses_disarm_is_reported_as_unconfirmed_off():
    tables, _ = two_tables()
    board = DocBoard2(refuse_disarm=True, armed=True)
    with Served(board, "socket") as served:
        with pytest.raises(InstrumentError) as info:
            deliver_to_board(tables, served.url, arm=True)
    message = str(info.value)
    assert info.value.exit_code == 1 and "step 'disarm': the board refused DISARM" in message
    assert "could not confirm that the board's outputs (channels 1 and 2) are off: check them" in message
    assert "switched off" not in message.replace("could not confirm", "")
    assert 0x02 not in board.requests and 0x07 not in board.requests   # nothing uploaded, never armed


def test_a_pulsed_upload_to_a_doc_board_without_external_trigger_is_refused():
    tables, _ = two_tables()
    board = DocBoard2(sources=0b001)                 # free-running only
    with Served(board, "socket") as served:
        with pytest.raises(InstrumentError, match="cannot start on an external trigger") as info:
            deliver_to_board(tables, served.url, arm=True, options={"timing": PULSED})
    assert "nothing was uploaded or armed" in str(info.value)
    assert 0x02 not in board.requests and 0x09 not in board.requests and 0x07 not in board.requests


def test_the_doc_board_follows_the_documents_resolved_points():
    # a BUSY is never remembered; STATUS is executed afresh; reserved bytes and damaged replies
    board = DocBoard2()

    def send(t, seq, p=b""):
        (reply,) = board.receive(board.frame(t, seq, p))
        return reply

    send(0x01, 1, b"\x02")
    begin = struct.pack("<BBxxIIII", 3, 1, 1, zlib.crc32(bytes(4)), 1_000_000, 3)
    bad_reserved = bytearray(begin)
    bad_reserved[3] = 1
    assert send(0x02, 2, bytes(bad_reserved))[8:10] == b"\x02\x13"       # REFUSE RESERVED
    first = send(0x06, 3)
    send(0x02, 4, begin)
    assert send(0x06, 3) != first                                          # the same STATUS, fresh state
    damaged = bytearray(board.frame(0x80, 5, b"\x06"))
    damaged[-1] ^= 1
    assert board.receive(bytes(damaged)) == []                             # a damaged reply: no answer
