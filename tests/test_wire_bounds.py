"""sweepgen.wire.bounds: reply deadlines and lengths, with their floor and ceiling."""

from __future__ import annotations

import math

import pytest

from sweepgen.wire import bounds


def test_transfer_deadline_is_timeout_plus_twice_the_transfer_time():
    assert bounds.transfer_deadline(5.0, 0, 20e6) == 5.0
    assert bounds.transfer_deadline(5.0, 20e6, 20e6) == pytest.approx(7.0)
    assert bounds.transfer_deadline(2.0, 80e3, 80e3, factor=1.0) == pytest.approx(3.0)


@pytest.mark.parametrize("timeout, nbytes, throughput, expected", [
    (5.0, 320_000, 1e-300, bounds.DEADLINE_CEILING),       # 2 N / throughput overflows to inf
    (1e300, 0, 20e6, bounds.DEADLINE_CEILING),
    (math.inf, 10, 1.0, bounds.DEADLINE_CEILING),
    (1e-9, 0, 20e6, bounds.DEADLINE_FLOOR),
    (0.0, 10, 0.0, bounds.DEADLINE_CEILING),                 # no throughput at all: the ceiling, not an error
    (math.nan, 10, 1.0, bounds.DEADLINE_CEILING),
])
def test_absurd_link_numbers_clamp_instead_of_failing(timeout, nbytes, throughput, expected):
    assert bounds.transfer_deadline(timeout, nbytes, throughput) == expected
    # whatever came out, a VISA timeout in milliseconds can be made of it
    assert int(bounds.transfer_deadline(timeout, nbytes, throughput) * 1000) > 0


def test_reply_limit_is_the_expected_length_plus_the_floor_up_to_the_ceiling():
    assert bounds.reply_limit() == bounds.TEXT_REPLY_FLOOR
    assert bounds.reply_limit(1_000_000) == 1_000_000 + bounds.TEXT_REPLY_FLOOR
    assert bounds.reply_limit(10**12) == bounds.REPLY_CEILING
