"""Calibration fits: synthetic data from known curves plus noise (demo data, invented numbers),
checked against the truth within the stated uncertainty and against general-purpose reference
fits (numpy.polyfit with its covariance, scipy.interpolate.make_smoothing_spline)."""

import numpy as np
import pytest
from scipy.interpolate import make_smoothing_spline

from sweepgen import calibration
from sweepgen.calibration import CalibrationRefused, fit_measurements


def curve(u):
    """A gently curved piezo tuning curve (invented): Hz versus V."""
    return -180e6 + 40e6 * u + 0.8e6 * u ** 2 - 0.05e6 * u ** 3


def noisy(n=600, sigma=0.3e6, seed=7, lo=-4.0, hi=4.0):
    rng = np.random.default_rng(seed)
    u = np.linspace(lo, hi, n)
    return u, curve(u) + rng.normal(0.0, sigma, n)


@pytest.mark.slow
def test_known_curve_recovered_within_the_stated_uncertainty():
    u, x = noisy()
    fit = fit_measurements(u, x)
    assert fit.degree == 3          # the truth is a cubic: cross-validation finds it
    grid = np.linspace(-4, 4, 41)
    assert np.all(np.abs(fit.poly(grid) - curve(grid)) <= 4 * fit.fit.uncertainty(grid))
    # the stated 1-sigma band is a 1-sigma band: over many noise draws it holds the truth
    # 68.3 % of the time (normal distribution)
    inside = []
    for seed in range(60):
        f = fit_measurements(*noisy(n=300, seed=100 + seed))
        inside.append(np.mean(np.abs(f.poly(grid) - curve(grid)) <= f.fit.uncertainty(grid)))
    assert np.mean(inside) == pytest.approx(0.683, abs=0.07)
    # the noise estimate: the residual RMS is the generating sigma within 10 %
    assert fit.residual_rms == pytest.approx(0.3e6, rel=0.1)


def test_fit_and_uncertainty_agree_with_numpy_polyfit():
    u, x = noisy(n=200, seed=11)
    fit = calibration.poly_fit(u, x, 3)
    # reference: numpy.polyfit with cov=True (scaled by chi2/(N - deg - 1)), a general-purpose library
    coef, cov = np.polyfit(u, x, 3, cov=True)
    grid = np.linspace(-4, 4, 9)
    assert np.allclose(fit.poly(grid), np.polyval(coef, grid), rtol=0, atol=1.0)
    v = np.vander(grid, 4)
    ref_unc = np.sqrt(np.einsum("ij,jk,ik->i", v, cov, v))
    assert np.allclose(fit.uncertainty(grid), ref_unc, rtol=1e-6)


def test_fit_agrees_with_a_scipy_smoothing_spline_within_uncertainty():
    # a curve that is not a polynomial (a VCO-like saturation, invented)
    rng = np.random.default_rng(3)
    u = np.linspace(0, 10, 800)
    truth = 30e6 + 900e6 * np.tanh(u / 12.0)
    x = truth + rng.normal(0, 0.5e6, u.size)
    fit = fit_measurements(u, x)
    spline = make_smoothing_spline(u, x)          # reference: GCV smoothing spline (scipy)
    grid = np.linspace(0.5, 9.5, 50)
    sigma = np.hypot(fit.fit.uncertainty(grid), 0.5e6 / np.sqrt(20))
    assert np.all(np.abs(fit.poly(grid) - spline(grid)) < 5 * sigma)
    assert np.all(np.abs(fit.poly(grid) - 30e6 - 900e6 * np.tanh(grid / 12)) < 5 * fit.fit.uncertainty(grid) + 1e5)


def test_straight_line_gets_degree_one():
    rng = np.random.default_rng(1)
    u = np.linspace(0, 5, 300)
    fit = fit_measurements(u, 1e8 + 2e7 * u + rng.normal(0, 1e5, u.size))
    assert fit.degree == 1


def test_outlier_is_found_and_left_out():
    u, x = noisy(n=300)
    x[50] += 30e6
    fit = fit_measurements(u, x)
    assert list(fit.outliers) == [50]
    assert abs(fit.poly(u[50]) - curve(u[50])) < 4 * fit.fit.uncertainty([u[50]])[0]
    kept = fit_measurements(u, x, outlier_sigma=0)
    assert kept.outliers.size == 0


def test_hysteresis_between_up_and_down_sweeps():
    rng = np.random.default_rng(2)
    up = np.linspace(-4, 4, 300)
    u = np.concatenate([up, up[::-1]])
    offset = np.where(np.arange(600) < 300, 1.5e6, -1.5e6)       # up sweep 3 MHz above the down sweep
    fit = fit_measurements(u, curve(u) + offset + rng.normal(0, 0.2e6, 600))
    h = fit.hysteresis
    assert h is not None and h["significant"]
    assert h["mean"] == pytest.approx(3e6, abs=4 * h["uncertainty"] + 0.05e6)
    slope = 40e6 + 1.6e6 * h["at_drive"] - 0.15e6 * h["at_drive"] ** 2      # d curve / du at that drive
    assert h["drive_equivalent"] == pytest.approx(abs(h["max"]) / slope, rel=0.05)
    assert abs(h["max"]) == pytest.approx(3e6, abs=4 * h["uncertainty"])
    # a single sweep has none
    assert fit_measurements(*noisy()).hysteresis is None


def test_refusals_say_why():
    with pytest.raises(CalibrationRefused, match="too few points"):
        fit_measurements([0, 1, 2, 3], [0, 1e6, 2e6, 3e6])
    u = np.linspace(0, 10, 200)
    bump = 1e7 * u - 3e7 * np.exp(-((u - 5) / 0.5) ** 2)       # turns back around 5 V
    with pytest.raises(CalibrationRefused, match="not monotone"):
        fit_measurements(u, bump + np.random.default_rng(0).normal(0, 1e5, u.size))
    gap = np.concatenate([np.linspace(0, 3, 50), np.linspace(6, 10, 50)])
    with pytest.raises(CalibrationRefused, match="gap: no measurement between drive 3 and 6"):
        fit_measurements(gap, 1e7 * gap)
    with pytest.raises(CalibrationRefused, match="does not follow the drive"):
        fit_measurements(u, np.random.default_rng(0).normal(0, 1e5, u.size))


def test_noise_is_not_a_reversal_but_typed_points_must_be_monotone():
    u, x = noisy(n=2000, sigma=2e6)           # neighbours often swap order: noise, not a turn
    assert np.any(np.diff(x) < 0)
    fit_measurements(u, x)
    with pytest.raises(CalibrationRefused, match="not monotone"):
        calibration.fit_points([0, 1, 2, 3, 4], [0, 1e6, 2e6, 1.5e6, 3e6])
