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


@pytest.mark.slow
@pytest.mark.parametrize("key", ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"])
def test_the_sample_agrees_with_one_twenty_times_larger_within_its_stated_error(key):
    # the fraction within three binomial standard errors of the difference (sqrt(f(1-f)/n) of each
    # sample); the median distance from the axis within three standard errors of a sample median at every
    # node after the source: 1/(2 p(median) sqrt(n)) = 0.72/sqrt(n) of the median for a Rayleigh law
    # (the asymptotic variance of a sample quantile, e.g. Kendall and Stuart, vol. 1, §10.10, recalled)
    p = plan(load_scenario(key))
    small, large = overlap.beam_overlap(p), overlap.beam_overlap(p, sample=20 * overlap.SAMPLE, seed=7)
    f = large.fraction
    sigma = np.sqrt(f * (1 - f) / overlap.SAMPLE + f * (1 - f) / (20 * overlap.SAMPLE))
    assert abs(small.fraction - f) < 3 * sigma
    rtol = 3 * 0.72 * np.sqrt(1 / overlap.SAMPLE + 1 / (20 * overlap.SAMPLE))
    np.testing.assert_allclose(small.median_radius[1:], large.median_radius[1:], rtol=rtol)
