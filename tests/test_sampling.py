"""Sampling in time (rate choice) and in value (DAC codes, DDS words)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sweepgen.chain import AnalogStage, Chain, DdsStage, OffsetLockStage
from sweepgen.errors import CheckFailed
from sweepgen.generator import generator_from_dict
from sweepgen.planner import plan
from sweepgen.sampling import choose_sample_rate, codes_to_drive, drive_to_codes, quantisation, step_tolerance
from sweepgen.scenario import Drive, load_scenario

from conftest import examples


def board(**over):
    """A serial-board generator with a voltage output (only the fields the sampling uses matter)."""
    sampling = {"rate_min": "1 kSa/s", "rate_max": "50 MSa/s", "memory": 1 << 20, "granularity": 8,
                "min_length": 32}
    output = {"kind": "voltage", "range_min": "-10 V", "range_max": "10 V", "dac_bits": 14,
              "termination": "high-z", "load": "high-z"}
    sampling.update(over.pop("sampling", {}))
    output = over.pop("dds_output", None) or {**output, **over.pop("output", {})}
    if "rates" in sampling:
        sampling.pop("rate_min"), sampling.pop("rate_max")
    data = {"title": "test", "kind": "board", "channels": 1, "sampling": sampling, "output": output,
            "link": {"kind": "serial", "port": "loop://", "throughput": "1 MB/s"}}
    return generator_from_dict(data, "gen.toml")


@pytest.fixture(scope="module")
def rb():
    sc = load_scenario("rb87-chopped-oven")
    return sc, plan(sc).schedule()


PIEZO = Chain([AnalogStage("piezo", 40e6, -180e6, 0.0, "V")])


def test_auto_rate_keeps_steps_within_tolerance_and_whole_period(rb):
    sc, sched = rb
    lw = sc.species.linewidth
    c = choose_sample_rate(sched, PIEZO, board(), Drive(), linewidth=lw)
    tol, _ = step_tolerance(Drive(), lw)
    assert tol == pytest.approx(0.1 * lw)
    assert c.step <= tol / 2 * (1 + 1e-9)                 # a factor STEP_DIVISOR = 2 below the tolerance
    assert c.step == pytest.approx(sched.max_abs_chirp_rate() / c.sample_rate)
    assert c.period_count == pytest.approx(sched.period * c.sample_rate, abs=1e-6)   # exactly one period
    assert c.period_count % 8 == 0 and c.count == c.period_count
    assert c.limited_by == "detuning step tolerance"


def test_rate_adjusted_to_granularity(rb):
    sc, sched = rb
    c = choose_sample_rate(sched, PIEZO, board(sampling={"granularity": 96}), Drive(max_step=2e6))
    assert c.period_count % 96 == 0
    assert c.sample_rate * sched.period == pytest.approx(c.period_count, abs=1e-6)
    assert c.step <= 2e6


def test_listed_rates_pick_the_lowest_comfortable_one(rb):
    sc, sched = rb
    g = board(sampling={"rates": ["1 MSa/s", "5 MSa/s", "20 MSa/s", "40 MSa/s"]})
    c = choose_sample_rate(sched, PIEZO, g, Drive(max_step=1e6))
    need = sched.max_abs_chirp_rate() / 1e6        # 1.57 MSa/s; doubled (STEP_DIVISOR) -> 5 MSa/s
    assert need < 5e6 / 2 and c.sample_rate == 5e6


def test_memory_limit_wins_and_is_named(rb):
    sc, sched = rb
    g = board(sampling={"memory": 4096, "min_length": 1})
    with pytest.raises(CheckFailed, match="memory wins"):
        choose_sample_rate(sched, PIEZO, g, Drive(), linewidth=sc.species.linewidth)


def test_rate_limit_wins_and_is_named(rb):
    sc, sched = rb
    g = board(sampling={"rate_max": "100 kSa/s"})
    with pytest.raises(CheckFailed, match="rate limit wins"):
        choose_sample_rate(sched, PIEZO, g, Drive(), linewidth=sc.species.linewidth)


def test_fixed_rate_strict_and_lenient(rb):
    sc, sched = rb
    g = board(sampling={"rates": ["1 MSa/s", "2 MSa/s"]})
    with pytest.raises(CheckFailed, match="not a rate"):
        choose_sample_rate(sched, PIEZO, g, Drive(sample_rate=3e6))
    c = choose_sample_rate(sched, PIEZO, g, Drive(sample_rate=3e6), strict=False)
    assert c.sample_rate == 3e6 and c.limited_by.startswith("fixed")
    c = choose_sample_rate(sched, PIEZO, board(sampling={"granularity": 7}), Drive(), sample_rate=1e6)
    assert c.period_count == 20000 and c.count == 20006 and c.padding == 6   # padded to a multiple of 7


def test_voltage_quantisation_full_scale_and_round_trip():
    g = board()
    q = quantisation(-3.9, 3.8, g, PIEZO)
    fs = 2 ** 13 - 1                              # ±(2^(bits-1) - 1) for 14 bits
    assert q.dtype == "<i2" and q.full_scale == fs
    assert q.amplitude >= 7.7 and q.amplitude == pytest.approx(7.7, rel=2e-3)
    assert q.code_scale == pytest.approx(q.amplitude / (2 * fs))
    assert q.offset - q.amplitude / 2 <= -3.9 and q.offset + q.amplitude / 2 >= 3.8
    v = np.linspace(-3.9, 3.8, 1001)
    codes = drive_to_codes(v, q)
    assert codes.dtype == np.dtype("<i2")
    assert np.max(np.abs(codes_to_drive(codes, q) - v)) <= q.code_scale / 2 * (1 + 1e-9)


@pytest.mark.parametrize("lo, hi", [(-10.0, 3.3327), (-3.3327, 10.0), (-10.0, 10.0), (-9.99871, 9.99)])
def test_the_programmed_window_stays_inside_the_output_range(lo, hi):
    # a sweep reaching an edge of the ±10 V output: offset ± amplitude/2 must not ask for more than the range
    q = quantisation(lo, hi, board(), PIEZO)
    eps = 1e-9                                   # V: float rounding only (a rounded offset overshoots by ~1 mV)
    assert -10.0 - eps <= q.offset - q.amplitude / 2 <= lo + eps
    assert hi - eps <= q.offset + q.amplitude / 2 <= 10.0 + eps
    assert np.all(np.abs(codes_to_drive(drive_to_codes(np.array([lo, hi]), q), q) - [lo, hi])
                  <= q.code_scale / 2 * (1 + 1e-9))


def test_fifty_ohm_setting_into_high_impedance_doubles_the_voltage():
    # a generator set for 50 Ω puts twice the programmed voltage into a high-impedance input
    # (voltage divider with a 50 Ω source: common practice of function generators)
    g50 = board(output={"termination": "50 ohm", "load": "high-z"})
    assert g50.output.delivered_factor == pytest.approx(2.0)
    q = quantisation(-3.9, 3.8, g50, PIEZO)
    q_hz = quantisation(-3.9, 3.8, board(), PIEZO)
    assert q.amplitude == pytest.approx(q_hz.amplitude / 2, rel=2e-3)   # program half ...
    assert q.code_scale == pytest.approx(q_hz.code_scale, rel=2e-3)    # ... to get the same volts at the laser
    matched = board(output={"termination": "50 ohm", "load": "50 ohm"})
    assert matched.output.delivered_factor == pytest.approx(1.0)
    with pytest.raises(CheckFailed, match="×2 at the real load"):
        quantisation(-3.9, 3.8, board(output={"termination": "50 ohm", "load": "high-z",
                                              "range_min": "-1.5 V", "range_max": "1.5 V"}), PIEZO)


def test_quantisation_refuses_unsafe_or_mismatched_ranges():
    safe = Chain([AnalogStage("piezo", 40e6, -180e6, 0.0, "V")], safe_min=-2.0, safe_max=2.0)
    with pytest.raises(CheckFailed, match="safe input range"):
        quantisation(-3.9, 3.8, board(), safe)
    dds_chain = Chain([OffsetLockStage("lock", -1.6e9, 1, divider=8), DdsStage("dds", 1e9, 32)])
    with pytest.raises(CheckFailed, match="frequency output"):
        quantisation(150e6, 200e6, board(), dds_chain)


@settings(max_examples=examples(100))
@given(f=st.lists(st.floats(min_value=150e6, max_value=200e6), min_size=1, max_size=50))
def test_dds_words_equal_round_f_times_two_to_n_over_clock(f):
    g = board(dds_output={"kind": "frequency", "clock": "1 GHz", "word_bits": 32, "range_min": "1 MHz",
                          "range_max": "400 MHz"})
    dds_chain = Chain([OffsetLockStage("lock", -1.6e9, 1, divider=8), DdsStage("dds", 1e9, 32)])
    q = quantisation(150e6, 200e6, g, dds_chain)
    assert q.dtype == "<u4" and q.code_offset == 0.0
    words = drive_to_codes(np.array(f), q)
    # FTW = round(f · 2^N / f_clock) (common practice)
    assert [int(w) for w in words] == [round(x * 2 ** 32 / 1e9) for x in f]


def test_drive_to_codes_refuses_to_clip():
    q = quantisation(-1.0, 1.0, board(), PIEZO)
    with pytest.raises(CheckFailed, match="refusing to clip"):
        drive_to_codes(np.array([0.0, 1.2]), q)
    with pytest.raises(CheckFailed):
        drive_to_codes(np.array([np.nan]), q)
