"""sweepgen.wire.scpi: SCPI data formats, number lists and error replies."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from sweepgen.wire import scpi

from conftest import examples


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
