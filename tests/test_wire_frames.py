"""Frame codec of the serial ramp-board protocol (sweepgen.wire.frames)."""

from __future__ import annotations

import re
import struct
import zlib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import sweepgen.drivers
from sweepgen.wire import frames as fr

from conftest import examples

PROTOCOL_DOC = Path(sweepgen.drivers.__file__).parent / "serial_protocol.md"

types = st.integers(0, 255)
seqs = st.integers(0, 255)
# payloads rich in the sync bytes and in whole encoded frames, as well as arbitrary bytes
marker_bytes = st.lists(st.sampled_from([b"\xa5", b"\x5a", b"\xa5\x5a", b"\xff", b"\x00"]), max_size=40).map(b"".join)
payloads = st.one_of(st.binary(max_size=600), marker_bytes,
                     st.builds(lambda t, s, p: fr.encode(t, s, p), types, seqs, st.binary(max_size=50)))


@settings(max_examples=examples(200))
@given(msg_type=types, seq=seqs, payload=payloads)
def test_encode_decode_round_trip_and_crc_is_zlib_crc32(msg_type, seq, payload):
    raw = fr.encode(msg_type, seq, payload)
    assert len(raw) == len(payload) + fr.OVERHEAD
    assert raw[:2] == b"\xa5\x5a"
    n, check = struct.unpack_from("<HH", raw, 4)
    assert n == len(payload) and check == n ^ 0xFFFF
    # the trailer is zlib.crc32 (ISO-HDLC, reference implementation) of everything before it
    assert struct.unpack("<I", raw[-4:])[0] == zlib.crc32(raw[:-4])
    assert fr.decode(raw) == fr.Frame(msg_type, seq, payload)


def test_crc32_check_value():
    # CRC-32/ISO-HDLC check value 0xCBF43926 for ASCII "123456789" (CRC catalogue, recalled);
    # the protocol document states it so that a board implementer can test their CRC.
    assert zlib.crc32(b"123456789") == 0xCBF43926
    assert "0xCBF43926" in PROTOCOL_DOC.read_text(encoding="utf-8")


@settings(max_examples=examples(150))
@given(msg_type=types, seq=seqs, payload=payloads, data=st.data())
def test_every_single_bit_error_is_detected(msg_type, seq, payload, data):
    # CRC-32 detects every single-bit error (a property of any CRC with more than one term)
    raw = bytearray(fr.encode(msg_type, seq, payload))
    bit = data.draw(st.integers(0, 8 * len(raw) - 1))
    raw[bit // 8] ^= 1 << (bit % 8)
    with pytest.raises(fr.FrameError):
        fr.decode(raw)


def _split(stream: bytes, cuts):
    points = sorted({c % (len(stream) + 1) for c in cuts})
    pieces, last = [], 0
    for p in points + [len(stream)]:
        pieces.append(stream[last:p])
        last = p
    return pieces


@settings(max_examples=examples(150))
@given(frames=st.lists(st.tuples(types, seqs, payloads), min_size=1, max_size=6),
       noise=st.lists(st.binary(max_size=30).map(lambda b: b.replace(b"\xa5", b"\x00")), min_size=7, max_size=7),
       cuts=st.lists(st.integers(0, 10_000), max_size=12))
def test_decoder_finds_every_frame_in_a_noisy_stream_fed_in_any_pieces(frames, noise, cuts):
    stream = noise[0]
    for i, f in enumerate(frames):
        stream += fr.encode(*f) + noise[i + 1]
    decoder = fr.Decoder()
    out = []
    for piece in _split(stream, cuts):
        out.extend(decoder.feed(piece))
    assert out == [fr.Frame(*f) for f in frames]
    assert decoder.discarded == sum(len(n) for n in noise[:len(frames) + 1])


@settings(max_examples=examples(150))
@given(payload=payloads, seq=seqs)
def test_decoder_reports_a_damaged_frame_and_recovers_with_the_next(payload, seq):
    bad = bytearray(fr.encode(fr.MsgType.DATA, seq, payload))
    bad[fr.HEADER_SIZE + len(payload) // 2 if payload else -1] ^= 0x40
    good = fr.encode(fr.MsgType.END, (seq + 1) & 0xFF)
    decoder = fr.Decoder()
    out = decoder.feed(bytes(bad) + good)
    assert out[0] == fr.BadFrame(fr.MsgType.DATA, seq, len(payload))
    if out[-1] != fr.Frame(fr.MsgType.END, (seq + 1) & 0xFF, b""):
        # the damaged bytes held a false header that passes the length check: the decoder waits
        # for its bytes until the gap timeout (board) or the reply timeout (host) clears it
        assert decoder.pending > 0
        decoder.reset()
        assert decoder.feed(good) == [fr.Frame(fr.MsgType.END, (seq + 1) & 0xFF, b"")]


def test_decoder_recovers_directly_after_a_damaged_frame_of_table_data():
    rng = np.random.default_rng(7)
    words = rng.integers(0, 2**32, 1000, dtype=np.uint64).astype("<u4").tobytes()
    frames = [fr.encode(fr.MsgType.DATA, i, fr.data_payload(i * 4000, words[i * 400:(i + 1) * 400]))
              for i in range(10)]
    damaged = [bytearray(f) for f in frames]
    for f in damaged[::2]:
        f[100] ^= 0x01
    out = fr.Decoder(max_payload=4100).feed(b"".join(map(bytes, damaged)))
    assert [type(o).__name__ for o in out] == ["BadFrame", "Frame"] * 5
    assert [o.seq for o in out] == list(range(10))


def test_decoder_skips_false_sync_with_a_wrong_length_check_and_over_long_frames():
    good = fr.encode(fr.MsgType.STATUS, 9)
    false_sync = b"\xa5\x5a\x01\x02\x10\x00\x00\x00"        # length 16, check should be 0xFFEF
    too_long = fr.encode(fr.MsgType.DATA, 1, bytes(100))
    decoder = fr.Decoder(max_payload=64)
    assert decoder.feed(false_sync + too_long + good) == [fr.Frame(fr.MsgType.STATUS, 9, b"")]


def test_decoder_wants_exactly_the_rest_of_the_frame():
    raw = fr.encode(fr.MsgType.DATA, 3, bytes(range(40)))
    decoder = fr.Decoder()
    assert decoder.wanted() == fr.HEADER_SIZE
    assert decoder.feed(raw[:3]) == []
    assert decoder.wanted() == fr.HEADER_SIZE - 3
    assert decoder.feed(raw[3:10]) == []
    assert decoder.wanted() == len(raw) - 10
    assert decoder.feed(raw[10:]) == [fr.Frame(fr.MsgType.DATA, 3, bytes(range(40)))]


@pytest.mark.parametrize("bad, message", [
    (b"\x00" * 12, "sync"),
    (fr.encode(1, 1, b"\x01")[:-1], "must be"),
    (fr.encode(1, 1, b"\x01") + b"\x00", "must be"),
    (b"\xa5\x5a\x01\x01\x01\x00\xff\xff\x01" + b"\x00" * 4, "length check"),
    (b"\xa5\x5a", "too few"),
])
def test_decode_refuses_what_is_not_one_frame(bad, message):
    with pytest.raises(fr.FrameError, match=message):
        fr.decode(bad)


def test_encode_refuses_values_that_do_not_fit():
    with pytest.raises(fr.FrameError):
        fr.encode(256, 0)
    with pytest.raises(fr.FrameError):
        fr.encode(1, 256)
    with pytest.raises(fr.FrameError):
        fr.encode(1, 0, bytes(fr.MAX_PAYLOAD + 1))


# --------------------------------------------------------------------------- payloads

text = st.text(max_size=20)
u32 = st.integers(0, 2**32 - 1)


@settings(max_examples=examples(100))
@given(formats=st.sets(st.sampled_from(list(fr.Format)), min_size=1), word=st.integers(0, 64),
       dac=st.integers(0, 32), maxp=st.integers(64, 65535), memory=u32, clock=st.integers(0, 2**64 - 1),
       rates=st.lists(u32, min_size=1, max_size=20), name=text)
def test_capabilities_round_trip(formats, word, dac, maxp, memory, clock, rates, name):
    caps = fr.Capabilities(1, tuple(sorted(formats)), word, dac, maxp, memory, clock, tuple(rates), name)
    assert fr.Capabilities.unpack(caps.pack()) == caps


@settings(max_examples=examples(100))
@given(fmt=st.sampled_from(list(fr.Format)), count=u32, crc=u32, rate=u32, req=types,
       reason=st.sampled_from(list(fr.Reason)), detail=u32, msg=text, state=st.sampled_from(list(fr.State)),
       armed=st.booleans(), received=u32, offset=u32, chunk=st.binary(min_size=1, max_size=100))
def test_message_payloads_round_trip(fmt, count, crc, rate, req, reason, detail, msg, state, armed, received,
                                     offset, chunk):
    begin = fr.Begin(fmt, count, crc, rate)
    assert fr.Begin.unpack(begin.pack()) == begin and len(begin.pack()) == 16
    refusal = fr.Refusal(req, reason, detail, msg)
    assert fr.Refusal.unpack(refusal.pack()) == refusal
    status = fr.Status(state, armed, fr.TableId(fmt, count, crc, rate), received)
    assert fr.Status.unpack(status.pack()) == status and len(status.pack()) == 20
    assert fr.parse_data(fr.data_payload(offset, chunk)) == (offset, chunk)
    assert fr.parse_ack(fr.ack_payload(req, chunk)) == (req, chunk)


def test_texts_are_clipped_to_whole_characters():
    refusal = fr.Refusal(1, fr.Reason.BUSY, 0, "µ" * 100)
    packed = refusal.pack()
    assert len(packed) <= 6 + fr.MAX_TEXT
    assert set(fr.Refusal.unpack(packed).text) == {"µ"}


@pytest.mark.parametrize("dtype, fmt", [("<i2", fr.Format.INT16), (">i2", fr.Format.INT16),
                                        ("<u2", fr.Format.UINT16), ("<u4", fr.Format.UINT32),
                                        ("<u8", fr.Format.UINT64)])
def test_formats_for_dtypes(dtype, fmt):
    assert fr.format_for_dtype(dtype) is fmt
    assert np.dtype(fmt.dtype).itemsize == fmt.itemsize == np.dtype(dtype).itemsize


def test_unsupported_dtype_is_refused():
    with pytest.raises(fr.FrameError, match="float32"):
        fr.format_for_dtype("<f4")


def test_formats_mask_round_trip():
    for r in range(1, 16):
        formats = tuple(f for f in fr.Format if r & f.bit)
        assert fr.formats_from_mask(fr.formats_mask(formats)) == formats


# --------------------------------------------------------------------------- the protocol document


def _doc_examples():
    doc = PROTOCOL_DOC.read_text(encoding="utf-8")
    blocks = re.findall(r"```\n((?:[0-9a-f]{2} )+[0-9a-f]{2})\n```", doc)
    return [bytes.fromhex(b) for b in blocks]


def test_the_documents_worked_examples_are_valid_frames():
    examples = _doc_examples()
    assert len(examples) == 11
    for raw in examples:
        # the CRC a reader checks with any CRC-32 (ISO-HDLC): zlib.crc32 as reference implementation
        assert struct.unpack("<I", raw[-4:])[0] == zlib.crc32(raw[:-4])
        fr.decode(raw)
    hello, data, ack, refuse = (fr.decode(r) for r in examples[:4])
    assert hello == fr.Frame(fr.MsgType.HELLO, 1, fr.hello_payload(1))
    assert fr.parse_data(data.payload) == (4096, struct.pack("<2I", 0x02AAA000, 0x02AAA100))
    assert fr.parse_ack(ack.payload) == (fr.MsgType.DATA, struct.pack("<I", 4104))
    assert fr.Refusal.unpack(refuse.payload) == fr.Refusal(fr.MsgType.END, fr.Reason.TABLE_CRC, 0xDEADBEEF)


def test_the_documents_version_2_examples_say_what_the_text_says():
    hello2, old_board, caps, trigger, bad_trigger, begin, status = (fr.decode(r) for r in _doc_examples()[4:])
    assert hello2 == fr.Frame(fr.MsgType.HELLO, 1, b"\x02")
    assert fr.Refusal.unpack(old_board.payload) == fr.Refusal(fr.MsgType.HELLO, fr.Reason.BAD_VERSION, 1)
    request, data = fr.parse_ack(caps.payload)
    c = fr.CapabilitiesV2.unpack(data)
    assert request == fr.MsgType.HELLO and len(c.channels) == 2 and c.name == "demo"
    assert c.sources == (fr.Source.FREE, fr.Source.EXTERNAL) and c.edges == (fr.Edge.RISING,)
    assert c.rates == (fr.Rate(1_000_000, 1), fr.Rate(1_000_000, 3)) and c.max_payload == 4100
    lo, hi = c.channels[0].range_hz()
    # FTW = round(f 2^32 / 1 GHz): the words of 1 MHz and 400 MHz (common practice)
    assert c.channels[0].low == round(1e6 * 2**32 / 1e9) and c.channels[0].high == round(400e6 * 2**32 / 1e9)
    assert lo == pytest.approx(1e6, rel=1e-6) and hi == pytest.approx(400e6, rel=1e-9)
    assert fr.Trigger.unpack(trigger.payload) == fr.Trigger(fr.Source.EXTERNAL, fr.Edge.RISING, fr.Mode.ONCE, 2500)
    assert fr.Refusal.unpack(bad_trigger.payload) == fr.Refusal(fr.MsgType.TRIGGER, fr.Reason.BAD_TRIGGER, 1)
    b = fr.BeginV2.unpack(begin.payload)
    assert b == fr.BeginV2(fr.Format.UINT32, 2, 1000, 0x12345678, fr.Rate(1_000_000, 3))
    assert b.rate.same(fr.Rate(2_000_000, 6)) and not b.rate.same(fr.Rate(333_333, 1))
    st = fr.parse_status(fr.parse_ack(status.payload)[1])
    assert st.trigger.delay == 2500 and st.tables == (fr.TableIdV2(3, 1, 1000, 0x12345678, fr.Rate(1_000_000, 3)),)


@settings(max_examples=examples(60))
@given(n_ch=st.integers(1, fr.MAX_CHANNELS), rates=st.lists(st.tuples(st.integers(1, 2**32 - 1),
                                                                       st.integers(1, 2**32 - 1)), min_size=1,
                                                             max_size=255),
       sources=st.sets(st.sampled_from(list(fr.Source))), name=st.text(max_size=80))
def test_version_2_capabilities_round_trip_and_fit_the_longest_reply(n_ch, rates, sources, name):
    ch = fr.ChannelCaps(fr.Output.VOLTAGE, (fr.Format.INT16,), 16, 8192, -32768, 32767, 0, -5_000_000, 5_000_000)
    caps = fr.CapabilitiesV2((ch,) * n_ch, tuple(sorted(sources)), (fr.Edge.FALLING,), 512, 0, 0,
                             tuple(fr.Rate(*r) for r in rates), name)
    raw = caps.pack()
    back = fr.CapabilitiesV2.unpack(raw)
    assert back.channels == caps.channels and back.rates == caps.rates and back.sources == caps.sources
    assert len(fr.ack_payload(1, raw)) <= fr.MAX_REPLY


@pytest.mark.parametrize("formats, low, high, preferred, chosen", [
    ((fr.Format.UINT32, fr.Format.UINT64), 5, 2**31, fr.Format.UINT32, fr.Format.UINT32),   # its own format
    ((fr.Format.UINT64,), 5, 2**31, fr.Format.UINT32, fr.Format.UINT64),                     # widened
    ((fr.Format.UINT16, fr.Format.INT16), 0, 1000, fr.Format.UINT32, fr.Format.INT16),       # narrowest, lower number
    ((fr.Format.UINT16,), -1, 1000, fr.Format.INT16, None),                                  # a negative sample
    ((fr.Format.INT16, fr.Format.UINT32), 0, 40000, fr.Format.UINT16, fr.Format.UINT32),
])
def test_the_host_chooses_the_narrowest_format_that_holds_every_sample(formats, low, high, preferred, chosen):
    assert fr.choose_format(formats, low, high, preferred) == chosen


def test_the_document_lists_every_message_type_and_reason_code():
    doc = PROTOCOL_DOC.read_text(encoding="utf-8")
    for t in fr.MsgType:
        assert re.search(rf"\| `{t.value:02x}` \| {t.name} \|", doc), t
    for r in fr.Reason:
        assert re.search(rf"\| `{r.value:02x}` \| {r.name} \|", doc), r
