"""sweepgen.scpi: the IEEE 488.2 block codec, template values, profile [commands], error replies."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from pyvisa.util import from_ieee_block, to_ieee_block

from sweepgen import scpi
from sweepgen._config import Section
from sweepgen.errors import InputError

from conftest import examples

# NumPy dtype -> pyvisa (struct) datatype letter
DTYPES = {"i2": "h", "u2": "H", "i4": "i", "u4": "I", "f4": "f", "i1": "b", "u1": "B"}


def arrays():
    return st.sampled_from(sorted(DTYPES)).flatmap(
        lambda dt: hnp.arrays(np.dtype(dt), st.integers(0, 300),
                              elements=None if dt[0] != "f" else st.floats(-1e6, 1e6, width=32)))


# --- block codec against pyvisa's reference implementation (IEEE 488.2 definite-length block) ---
@settings(max_examples=examples(120))
@given(arrays(), st.sampled_from(["little", "big"]))
def test_encode_block_matches_pyvisa_to_ieee_block(values, order):
    wire = np.asarray(values).astype(scpi.wire_dtype(values.dtype, order))
    ours = scpi.encode_block(wire)
    reference = to_ieee_block(values.tolist(), DTYPES[values.dtype.str[1:]], is_big_endian=order == "big")
    assert ours == reference


@settings(max_examples=examples(120))
@given(arrays(), st.sampled_from(["little", "big"]), st.lists(st.integers(0, 300), max_size=6))
def test_streamed_block_equals_pyvisa_block_for_any_chunking(values, order, cuts):
    cuts = sorted(c for c in cuts if c <= len(values))
    chunks = np.split(values, cuts)
    nbytes = values.size * values.itemsize
    streamed = b"".join(bytes(p) for p in scpi.block_parts((scpi.to_wire(c, order) for c in chunks), nbytes))
    reference = to_ieee_block(values.tolist(), DTYPES[values.dtype.str[1:]], is_big_endian=order == "big")
    assert streamed == reference


@settings(max_examples=examples(120))
@given(arrays(), st.sampled_from(["little", "big"]))
def test_decode_block_roundtrip_with_pyvisa_from_ieee_block(values, order):
    letter = DTYPES[values.dtype.str[1:]]
    block = to_ieee_block(values.tolist(), letter, is_big_endian=order == "big")
    payload = scpi.decode_block(block + b"\n")
    ours = np.frombuffer(payload, dtype=scpi.wire_dtype(values.dtype, order))
    theirs = from_ieee_block(scpi.encode_block(scpi.to_wire(values, order)), letter, order == "big")
    np.testing.assert_array_equal(ours, values)
    np.testing.assert_array_equal(np.asarray(theirs, dtype=values.dtype), values)


def test_block_header_digits():
    # IEEE 488.2 7.7.6.2: '#', the number of length digits, the length
    assert scpi.block_header(0) == b"#10"
    assert scpi.block_header(33554432) == b"#833554432"
    with pytest.raises(scpi.BlockError):
        scpi.block_header(10 ** 9)


def test_block_parts_refuses_wrong_length():
    with pytest.raises(scpi.BlockError, match="ended after 4"):
        list(scpi.block_parts([b"abcd"], 6))
    with pytest.raises(scpi.BlockError, match="ran past"):
        list(scpi.block_parts([b"abcd", b"ef"], 5))


def test_parse_block_header_incomplete_and_malformed():
    assert scpi.parse_block_header(b"#") is None
    assert scpi.parse_block_header(b"#41") is None                  # two more length digits to come
    assert scpi.parse_block_header(b"xx#3010abc", 2) == (7, 10)
    for bad in (b"#0", b"#A1", b"#2x1", b"a1"):
        with pytest.raises(scpi.BlockError):
            scpi.parse_block_header(bad)
    with pytest.raises(scpi.BlockError, match="announces 5"):
        scpi.decode_block(b"#15abc")
    with pytest.raises(scpi.BlockError, match="unexpected"):
        scpi.decode_block(b"#13abcXYZ")


# --- values put into templates -------------------------------------------------------------------
@pytest.mark.parametrize("name", ['SW"EEP', "SWEEP\n", "SWEEP;*RST", "SWEEP\nOUTP ON", "SW'EEP", "1SWEEP", "",
                                  "A" * 13, "SWE EP", "SWEEP,#15abcde", "SWÉEP"])
def test_render_refuses_injection_through_the_trace_name(name):
    with pytest.raises(InputError, match="commands.upload"):
        scpi.render("TRAC:DATA {name},{data}", "upload", name=name)


@settings(max_examples=examples(200))
@given(st.text(max_size=16))
def test_any_accepted_name_cannot_break_out_of_its_command(name):
    try:
        text = scpi.render("SOUR1:FUNC:USER {name}", "function", name=name)
    except InputError:
        return
    assert text == f"SOUR1:FUNC:USER {name}"
    assert not set(name) & set(";\"'\n\r#, \t")


@pytest.mark.parametrize("value", [float("nan"), float("inf"), "1;*RST", True])
def test_render_refuses_non_numbers(value):
    with pytest.raises(InputError):
        scpi.render("SOUR1:VOLT {amplitude}", "amplitude", amplitude=value)


def test_render_values_and_data_placeholder():
    assert scpi.render("SOUR{channel}:FREQ {frequency}", "rate", channel=2, frequency=50.0) == "SOUR2:FREQ 50"
    assert scpi.render("SOUR1:VOLT:OFFS {offset}", "offset", offset=-0.02952) == "SOUR1:VOLT:OFFS -0.02952"
    text = scpi.render("TRAC:DATA {name},{data}", "upload", name="SWEEP")
    assert scpi.split_data(text) == ("TRAC:DATA SWEEP,", "")
    with pytest.raises(InputError, match="needs a value for {amplitude}"):
        scpi.render("SOUR1:VOLT {amplitude}", "amplitude", amplitude=None)


def test_data_format_words():
    # SCPI-1999 FORMat[:DATA] <type>,<length>; FORMat:BORDer NORMal = most significant byte first
    assert scpi.data_format("<i2")["format"] == "INT,16"
    assert scpi.data_format("<u4")["format"] == "UINT,32"
    assert scpi.data_format("<f4")["format"] == "REAL,32"
    assert scpi.data_format("<i2", "ascii")["format"] == "ASC"
    assert scpi.border("big") == "NORM" and scpi.border("little") == "SWAP"


@settings(max_examples=examples(80))
@given(hnp.arrays(np.int32, st.integers(0, 200)))
def test_ascii_list_roundtrip(values):
    text = scpi.ascii_list(values)
    assert ";" not in text and "\n" not in text
    np.testing.assert_array_equal(scpi.parse_ascii_list(text, np.int32), values)


# --- the [commands] table ---------------------------------------------------------------------
BASE = {
    "identify": "*IDN?", "identity_pattern": "^x,", "clear": "*CLS", "output_off": "OUTP OFF",
    "upload": "TRAC:DATA {name},{data}", "wait": "*OPC?", "error_query": "SYST:ERR?",
    "no_error_pattern": "^[+]?0,", "output_on": "OUTP ON",
}


def commands(**change):
    data = {**BASE, **change}
    data = {k: v for k, v in data.items() if v is not None}
    return scpi.parse_commands(Section(data, "gen.toml", "commands"))


def test_parse_commands_accepts_the_minimal_set():
    c = commands()
    assert c.has("upload") and not c.has("readback")
    assert c.upload_mode == "block" and c.byte_order == "little" and c.trace_name == "SWEEP"


@pytest.mark.parametrize("change, key, message", [
    ({"upload": "TRAC:DATA {name},{block}"}, "commands.upload", "unknown placeholder"),
    ({"upload": "TRAC:DATA {name}"}, "commands.upload", "exactly one {data}"),
    ({"rate": "FREQ {data}"}, "commands.rate", "only appear in the upload"),
    ({"identify": "*IDN"}, "commands.identify", "expected a query"),
    ({"rate": "FREQ {rate:.3f}"}, "commands.rate", "no format spec"),
    ({"rate": "FREQ {rate"}, "commands.rate", "malformed"),
    ({"output_on": None}, "commands.output_on", "missing"),
    ({"no_error_pattern": "(["}, "commands.no_error_pattern", "regular expression"),
    ({"trace_name": "MY;TRACE"}, "commands.trace_name", "character data"),
    ({"upload_mode": "hex"}, "commands.upload_mode", "expected one of"),
    ({"reset_all": "*RST"}, "commands.reset_all", "unknown key"),
])
def test_parse_commands_refuses_bad_templates(change, key, message):
    with pytest.raises(InputError, match=message) as info:
        commands(**change)
    assert info.value.key == key and info.value.file == "gen.toml"


# --- error replies --------------------------------------------------------------------------------
def test_error_replies():
    # SCPI-1999 SYSTem:ERRor[:NEXT]?: <code>,"<text>[;<device-dependent info>]"; 0,"No error" when empty
    assert scpi.error_text(0) == '0,"No error"'
    reply = scpi.parse_error('-222,"Data out of range;offset ""too"" high"')
    assert reply.code == -222 and reply.message == 'Data out of range;offset "too" high'
    assert scpi.parse_error(scpi.error_text(-102, 'a "b"')).message == 'Syntax error;a "b"'
    assert scpi.parse_error("+0,\"No error\"").code == 0
    assert scpi.parse_error("garbage").code is None
    assert scpi.is_no_error('+0,"No error"', "^[+]?0,")
    assert not scpi.is_no_error('-100,"Command error"', "^[+]?0,")
