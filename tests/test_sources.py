"""Beam sources: effusive moments from N. F. Ramsey, *Molecular Beams* (OUP 1956),
sampling against the reference implementation scipy.stats.chi(df=4, scale=α/√2)."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats
from scipy import constants as C

from sweepgen.sources import EffusiveSource, GaussianSource

from conftest import examples

RB87_MASS = 1.443160648e-25  # kg, Steck (recalled)


def test_effusive_moments_ramsey():
    src = EffusiveSource(390.0, RB87_MASS)
    a = src.alpha
    assert a == pytest.approx(math.sqrt(2 * C.k * 390.0 / RB87_MASS))
    norm = integrate.quad(src.pdf, 0, 20 * a)[0]
    mean = integrate.quad(lambda v: v * src.pdf(v), 0, 20 * a)[0]
    rms = math.sqrt(integrate.quad(lambda v: v * v * src.pdf(v), 0, 20 * a)[0])
    assert norm == pytest.approx(1.0, rel=1e-9)
    # Ramsey 1956: mean (3√π/4)α, rms sqrt(2)α, most probable sqrt(3/2)α
    assert mean == pytest.approx(0.75 * math.sqrt(math.pi) * a, rel=1e-9)
    assert src.mean() == pytest.approx(mean, rel=1e-9)
    assert rms == pytest.approx(math.sqrt(2) * a, rel=1e-9)
    v = np.linspace(0.5 * a, 2 * a, 200001)
    assert v[np.argmax(src.pdf(v))] == pytest.approx(math.sqrt(1.5) * a, rel=1e-4)


def test_effusive_density_and_cdf_equal_scipy_chi4():
    src = EffusiveSource(600.0, 3.8175e-26)
    ref = stats.chi(df=4, scale=src.alpha / math.sqrt(2))  # reference implementation (scipy.stats)
    v = np.linspace(0, 5 * src.alpha, 301)
    assert np.allclose(src.pdf(v), ref.pdf(v), rtol=1e-10, atol=1e-16)
    assert np.allclose(src.cdf(v), ref.cdf(v), rtol=1e-10, atol=1e-15)


def test_effusive_sampling_matches_chi4_ks():
    src = EffusiveSource(390.0, RB87_MASS)
    ref = stats.chi(df=4, scale=src.alpha / math.sqrt(2))
    sample = src.sample(np.random.default_rng(12345), 20000)
    result = stats.kstest(sample, ref.cdf)
    assert result.pvalue > 0.01   # fixed seed: a deterministic statistical test
    # the mean is within 4 standard errors of Ramsey's (3√π/4)α
    se = sample.std() / math.sqrt(sample.size)
    assert abs(sample.mean() - src.mean()) < 4 * se


def test_sampling_is_reproducible():
    src = GaussianSource(170.0, 30.0)
    a = src.sample(np.random.default_rng(7), 1000)
    b = src.sample(np.random.default_rng(7), 1000)
    assert np.array_equal(a, b)


def test_gaussian_truncated_normalisation_and_cdf():
    src = GaussianSource(40.0, 30.0)    # a noticeable part below zero is cut away
    assert integrate.quad(src.pdf, 0, 400)[0] == pytest.approx(1.0, rel=1e-9)
    ref = stats.truncnorm(a=-40.0 / 30.0, b=np.inf, loc=40.0, scale=30.0)   # scipy.stats reference
    v = np.linspace(0, 200, 101)
    assert np.allclose(src.cdf(v), ref.cdf(v), atol=1e-12)
    sample = src.sample(np.random.default_rng(3), 20000)
    assert sample.min() > 0
    assert stats.kstest(sample, ref.cdf).pvalue > 0.01


@settings(max_examples=examples(40))
@given(t=st.floats(1.0, 3000.0), m_u=st.floats(1.0, 300.0), q=st.floats(0.0, 1.0))
def test_effusive_cdf_monotone_and_bounded(t, m_u, q):
    src = EffusiveSource(t, m_u * C.atomic_mass)
    v = np.sort(np.linspace(0, 6 * src.alpha, 50) * (0.5 + q))
    c = src.cdf(v)
    assert np.all(np.diff(c) >= -1e-15)
    assert 0.0 <= c[0] <= c[-1] <= 1.0
