"""sweepgen.wire.block: the IEEE 488.2 definite-length block codec."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from pyvisa.util import from_ieee_block, to_ieee_block

from sweepgen.wire import block, scpi

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
    ours = block.encode_block(wire)
    reference = to_ieee_block(values.tolist(), DTYPES[values.dtype.str[1:]], is_big_endian=order == "big")
    assert ours == reference


@settings(max_examples=examples(120))
@given(arrays(), st.sampled_from(["little", "big"]), st.lists(st.integers(0, 300), max_size=6))
def test_streamed_block_equals_pyvisa_block_for_any_chunking(values, order, cuts):
    cuts = sorted(c for c in cuts if c <= len(values))
    chunks = np.split(values, cuts)
    nbytes = values.size * values.itemsize
    streamed = b"".join(bytes(p) for p in block.block_parts((scpi.to_wire(c, order) for c in chunks), nbytes))
    reference = to_ieee_block(values.tolist(), DTYPES[values.dtype.str[1:]], is_big_endian=order == "big")
    assert streamed == reference


@settings(max_examples=examples(120))
@given(arrays(), st.sampled_from(["little", "big"]))
def test_decode_block_roundtrip_with_pyvisa_from_ieee_block(values, order):
    letter = DTYPES[values.dtype.str[1:]]
    raw = to_ieee_block(values.tolist(), letter, is_big_endian=order == "big")
    payload = block.decode_block(raw + b"\n")
    ours = np.frombuffer(payload, dtype=scpi.wire_dtype(values.dtype, order))
    theirs = from_ieee_block(block.encode_block(scpi.to_wire(values, order)), letter, order == "big")
    np.testing.assert_array_equal(ours, values)
    np.testing.assert_array_equal(np.asarray(theirs, dtype=values.dtype), values)


def test_block_header_digits():
    # IEEE 488.2 7.7.6.2: '#', the number of length digits, the length
    assert block.block_header(0) == b"#10"
    assert block.block_header(33554432) == b"#833554432"
    with pytest.raises(block.BlockError):
        block.block_header(10 ** 9)


def test_block_parts_refuses_wrong_length():
    with pytest.raises(block.BlockError, match="ended after 4"):
        list(block.block_parts([b"abcd"], 6))
    with pytest.raises(block.BlockError, match="ran past"):
        list(block.block_parts([b"abcd", b"ef"], 5))


def test_parse_block_header_incomplete_and_malformed():
    assert block.parse_block_header(b"#") is None
    assert block.parse_block_header(b"#41") is None                  # two more length digits to come
    assert block.parse_block_header(b"xx#3010abc", 2) == (7, 10)
    for bad in (b"#0", b"#A1", b"#2x1", b"a1"):
        with pytest.raises(block.BlockError):
            block.parse_block_header(bad)
    with pytest.raises(block.BlockError, match="announces 5"):
        block.decode_block(b"#15abc")
    with pytest.raises(block.BlockError, match="unexpected"):
        block.decode_block(b"#13abcXYZ")
