"""RenderedTable: chunked iteration, re-iteration, digests."""

from __future__ import annotations

import hashlib
import zlib

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from sweepgen.table import RenderedTable, TableInfo

from conftest import examples


def info_for(count, dtype="<i2", rate=1e6):
    return TableInfo(sample_rate=rate, count=count, period_count=count, dtype=dtype, output="voltage",
                     drive_unit="V", code_scale=1e-3, code_offset=0.5, amplitude=2.0, offset=0.0)


@settings(max_examples=examples(40))
@given(count=st.integers(1, 3000), size=st.integers(1, 700), seed=st.integers(0, 2**32 - 1))
def test_chunks_cover_the_codes_in_order_for_any_chunk_size(count, size, seed):
    codes = np.random.default_rng(seed).integers(-8192, 8192, count).astype("<i2")
    table = RenderedTable.from_arrays(info_for(count), codes)
    chunks = list(table.chunks(size))
    assert all(len(c) <= size for c in chunks)
    assert np.array_equal(np.concatenate(chunks), codes)
    starts = [f.start for f in table.frames(size)]
    assert starts == list(range(0, count, size))


def test_frames_carry_time_and_default_drive():
    codes = np.array([0, 10, -10, 5], dtype="<i2")
    table = RenderedTable.from_arrays(info_for(4, rate=2e6), codes)
    frame = next(table.frames(3))
    assert np.allclose(frame.time, [0, 0.5e-6, 1e-6])
    assert np.allclose(frame.drive, 0.5 + 1e-3 * np.array([0, 10, -10]))
    assert np.isnan(frame.detuning).all()


def test_digests_match_the_reference_implementations():
    codes = np.arange(-5000, 5000, 7, dtype="<i2")
    table = RenderedTable.from_arrays(info_for(len(codes)), codes)
    raw = codes.tobytes()
    assert table.sha256 == hashlib.sha256(raw).hexdigest()      # reference: hashlib
    assert table.crc32 == zlib.crc32(raw)                        # reference: zlib.crc32
    # a second pass recomputes the same codes
    assert np.array_equal(table.codes(), codes)
    assert np.array_equal(table.codes(), codes)


def test_info_sizes():
    info = info_for(1000, dtype="<u4")
    assert info.itemsize == 4 and info.nbytes == 4000
    assert info.duration == pytest.approx(1e-3)


def test_wrong_length_is_refused():
    with pytest.raises(ValueError):
        RenderedTable.from_arrays(info_for(5), np.zeros(4))
