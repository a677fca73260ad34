"""The atomic beam in the slowing beam: followed a block of atoms at a time, the same numbers."""

import numpy as np
import pytest

from sweepgen import overlap
from sweepgen.planner import plan
from sweepgen.scenario import load_scenario


@pytest.mark.parametrize("key", ["na23-continuous-focused", "caf-buffer-gas"])
def test_blocks_of_atoms_give_the_numbers_of_the_whole_sample(key, monkeypatch):
    p = plan(load_scenario(key))
    blocked = overlap.beam_overlap(p)
    monkeypatch.setattr(overlap, "BLOCK", overlap.SAMPLE)          # the whole sample in one block
    whole = overlap.beam_overlap(p)
    assert 0.0 < whole.fraction < 1.0                               # a beam that misses some atoms
    assert blocked.fraction == whole.fraction
    for name in ("median_radius", "available", "beam_radius"):
        assert np.array_equal(getattr(blocked, name), getattr(whole, name))
