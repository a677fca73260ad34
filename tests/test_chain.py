"""Tuning chain: round trips, signs, AOM passes, DDS words, calibrations."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sweepgen._config import Section
from sweepgen.chain import AnalogStage, AomStage, Calibration, Chain, DdsStage, OffsetLockStage, chain_from_sections
from sweepgen.errors import InputError

from conftest import examples

finite = st.floats(min_value=-2e9, max_value=2e9, allow_nan=False)


def sections(*tables, file="laser.toml"):
    return Section({"chain": list(tables)}, file, kind="laser").sections("chain")


@settings(max_examples=examples(200))
@given(coef=st.floats(min_value=1e5, max_value=5e9), sign=st.sampled_from([1, -1]),
       set_point=st.floats(min_value=-1e9, max_value=1e9), set_drive=st.floats(min_value=-5, max_value=5),
       detuning=st.lists(finite, min_size=1, max_size=20))
def test_linear_analog_round_trip_is_exact(coef, sign, set_point, set_drive, detuning):
    chain = Chain([AnalogStage("in", sign * coef, set_point, set_drive, "V")])
    d = np.array(detuning)
    back = chain.to_detuning(chain.to_drive(d))
    # exact up to floating-point rounding of two affine maps (1 mHz on GHz detunings)
    assert np.allclose(back, d, rtol=1e-12, atol=1e-3)


@settings(max_examples=examples(100))
@given(detuning=st.lists(st.floats(min_value=-1.5e9, max_value=-1e6), min_size=1, max_size=20),
       passes=st.integers(1, 4), order=st.sampled_from([1, -1]), divider=st.integers(1, 16))
def test_composed_aom_lock_dds_round_trip(detuning, passes, order, divider):
    chain = Chain([OffsetLockStage("lock", -3e9, 1, 1, divider), AomStage("aom", passes, order, 200e6, 0.0),
                   DdsStage("dds", 1e9, 32)])
    d = np.array(detuning)
    assert np.allclose(chain.to_detuning(chain.to_drive(d)), d, rtol=0, atol=1e-3)


def test_signs_of_linear_stages():
    up = Chain([AnalogStage("piezo", 40e6, -180e6, 0.0, "V")])
    down = Chain([AnalogStage("current", -800e6, -200e6, 0.0, "V")])
    # more drive -> bluer with a positive coefficient, redder with a negative one
    assert up.to_detuning(1.0) - up.to_detuning(0.0) == pytest.approx(40e6)
    assert down.to_detuning(1.0) - down.to_detuning(0.0) == pytest.approx(-800e6)
    # set point: the detuning at the set drive
    assert up.to_detuning(0.0) == pytest.approx(-180e6)
    assert down.gain(np.array([0.0]))[0] == pytest.approx(-1 / 800e6)


def test_aom_double_pass_doubles_the_shift():
    single = AomStage("aom", 1, 1, 80e6, -100e6)
    double = AomStage("aom", 2, 1, 80e6, -100e6)
    # optical shift per RF hertz: passes × order (a double pass shifts twice)
    assert double.inverse(81e6) - double.inverse(80e6) == pytest.approx(2e6)
    assert single.inverse(81e6) - single.inverse(80e6) == pytest.approx(1e6)
    minus = AomStage("aom", 2, -1, 80e6, -100e6)
    assert minus.inverse(81e6) - minus.inverse(80e6) == pytest.approx(-2e6)
    # the RF needed for a given optical change is halved by the double pass
    assert double.forward(-100e6 + 10e6) - 80e6 == pytest.approx(5e6)


def test_offset_lock_sign_and_divider():
    lock = OffsetLockStage("lock", -1.6e9, 1, divider=8)
    assert lock.beat(-300e6) == pytest.approx(1.3e9)
    assert lock.forward(-300e6) == pytest.approx(1.3e9 / 8)
    below = OffsetLockStage("lock", 1.0e9, -1, multiplier=2)
    assert below.beat(0.0) == pytest.approx(1.0e9)
    assert below.forward(0.0) == pytest.approx(2.0e9)
    assert below.inverse(below.forward(-123e6)) == pytest.approx(-123e6)


@settings(max_examples=examples(200))
@given(f=st.floats(min_value=0, max_value=5e8), bits=st.sampled_from([24, 32, 48]))
def test_dds_word_is_rounded_frequency_times_two_to_n_over_clock(f, bits):
    clock = 1e9
    dds = DdsStage("dds", clock, bits)
    # FTW = round(f · 2^N / f_clock) (common practice), checked with exact rational arithmetic
    from fractions import Fraction

    exact = Fraction(f) * 2 ** bits / Fraction(clock)
    expected = math.floor(exact + Fraction(1, 2))
    word = int(dds.word(f))
    # float64 carries 53 bits: within a few ulps of a half-way point either rounding is correct
    tie_window = max(float(exact), 1.0) * 2.0 ** -50
    near_tie = abs(exact - math.floor(exact) - Fraction(1, 2)) < tie_window
    assert abs(word - expected) <= (1 if near_tie else 0)
    # |error| ≤ half a word step, up to the float64 rounding of the word near a half-way point
    assert abs(float(dds.rounding_error(f))) <= dds.resolution / 2 + 4 * float(np.spacing(f)) + float(
        np.spacing(float(exact))) * dds.resolution


def test_dds_stage_is_identity_and_resolution():
    dds = DdsStage("dds", 1e9, 32)
    assert dds.resolution == pytest.approx(1e9 / 2 ** 32)
    assert dds.forward(123.456e6) == 123.456e6
    assert int(dds.word(100e6)) == round(100e6 * 2 ** 32 / 1e9)


def _cal_points(n=11, noise=0.2e6, seed=3):
    rng = np.random.default_rng(seed)
    u = np.linspace(0, 10, n)
    x = 30e6 + 80e6 * u - 0.6e6 * u ** 2 + rng.normal(0, noise, n)
    return u, x


def test_calibrated_round_trip_within_fit_residual():
    u, x = _cal_points()
    cal = Calibration.from_points(u, x, 3)
    # the fit reproduces the measurements within its own residuals
    assert np.max(np.abs(cal.value(u) - x)) == pytest.approx(cal.max_residual)
    assert cal.rms_residual < 0.5e6
    # the chain's inverse is exact on the fit, so detuning -> drive -> detuning is within the residual of the data
    d = np.linspace(x.min() + 1e6, x.max() - 1e6, 97)
    drive = cal.drive(d)
    assert np.allclose(cal.value(drive), d, rtol=0, atol=1e-3)
    # against the measured points: the drive found for a measured frequency is within residual/slope of truth
    assert np.max(np.abs(cal.drive(x) - u)) <= cal.max_residual / 70e6 * 1.01


def test_calibration_refused_when_too_short_or_not_monotone():
    with pytest.raises(ValueError, match="too short"):
        Calibration.from_points([0, 1], [0, 1e6])
    with pytest.raises(ValueError, match="too short"):
        Calibration.from_points([0, 1, 2, 3], [0, 1e6, 2e6, 3e6], degree=3)
    with pytest.raises(ValueError, match="not monotone"):
        Calibration.from_points([0, 1, 2, 3, 4], [0, 1e6, 2e6, 1.5e6, 3e6])
    with pytest.raises(ValueError, match="twice"):
        Calibration.from_points([0, 1, 1, 3], [0, 1e6, 2e6, 3e6])


def test_calibrated_stage_from_profile_reports_reason():
    good = {"stage": "calibrated", "drive": ["0 V", "1 V", "2 V", "3 V"],
            "detuning": ["-300 MHz", "-250 MHz", "-190 MHz", "-120 MHz"], "degree": 2}
    chain = chain_from_sections(sections(good))
    info = chain.info()[0]
    assert info["degree"] == 2 and info["points"] == 4 and info["max_residual"] >= 0
    bad = dict(good, detuning=["-300 MHz", "-250 MHz", "-260 MHz", "-120 MHz"])
    with pytest.raises(InputError) as exc:
        chain_from_sections(sections(bad))
    assert "laser.toml" in str(exc.value) and "chain[0].detuning" in str(exc.value)
    assert "not monotone" in str(exc.value)


def test_profile_chain_aom_vco_and_validation():
    chain = chain_from_sections(sections(
        {"stage": "aom", "passes": 2, "order": -1, "centre": "350 MHz", "set_point": "-456 MHz"},
        {"stage": "vco", "coefficient": "80 MHz/V", "frequency": "30 MHz", "voltage": "0 V"}))
    assert chain.drive_unit == "V"
    # Δ = -456 MHz - 2 (f - 350 MHz); f = 30 MHz + 80 MHz/V · V
    v = chain.to_drive(np.array([-456e6 - 2 * (510e6 - 350e6)]))
    assert v[0] == pytest.approx((510e6 - 30e6) / 80e6)
    with pytest.raises(InputError, match="last stage"):
        chain_from_sections(sections({"stage": "analog", "coefficient": "1 MHz/V", "set_point": "0 MHz"},
                                     {"stage": "dds", "clock": "1 GHz", "bits": 32}))
    with pytest.raises(InputError, match="chain\\[0\\].order"):
        chain_from_sections(sections({"stage": "aom", "passes": 2, "order": 2, "centre": "80 MHz",
                                      "set_point": "0 Hz"}))
    with pytest.raises(InputError, match="chain\\[0\\].bogus"):
        chain_from_sections(sections({"stage": "dds", "clock": "1 GHz", "bits": 32, "bogus": 1}))
    with pytest.raises(InputError, match="wrong dimension"):
        chain_from_sections(sections({"stage": "analog", "coefficient": "40 MHz", "set_point": "0 MHz"}))
    dds_chain = chain_from_sections(sections({"stage": "offset_lock", "reference": "-1.6 GHz", "sign": 1,
                                              "divider": 8}, {"stage": "dds", "clock": "1 GHz", "bits": 32}))
    assert dds_chain.drive_unit == "Hz" and dds_chain.dds.bits == 32


@pytest.mark.parametrize("points", [
    {"voltage": [], "frequency": "30 MHz", "coefficient": "80 MHz/V"},
    {"voltage": "0 V", "frequency": [], "coefficient": "80 MHz/V"},
])
def test_a_vco_stage_with_an_empty_list_names_the_key_of_the_wrong_form(points):
    # an empty list is neither measured points nor a single value: the refusal names the key
    # that has the wrong form (found by the input fuzzing suite), not a key the user never wrote
    with pytest.raises(InputError) as exc:
        chain_from_sections(sections({"stage": "vco", **points}))
    wrong = next(k for k, v in points.items() if v == [])
    assert f"chain[0].{wrong}" in str(exc.value)
