"""The pre-shaped drive: a slow actuator's modelled response follows the plan (issue: pre-shaped drive)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from conftest import CHECKED_SCENARIO, PIEZO_LASER, merged, run_cli, write_checked
from scipy import signal

from sweepgen import playback
from sweepgen.errors import CheckFailed, InputError
from sweepgen.preshape import preshape, reference_response
from sweepgen.response import Response, simulation_grid
from sweepgen.scenario import scenario_from_dict


def _slow(tmp_path, corner="1 kHz", preshape=True, limits=None, model=None, **drive):
    """CHECKED_SCENARIO on a piezo laser whose actuator is slow (first order, ``corner``)."""
    laser = {**PIEZO_LASER, "response": model or {"model": "first-order", "corner": corner},
             "limits": limits or PIEZO_LASER["limits"]}
    sc = merged(CHECKED_SCENARIO, drive={"preshape": preshape, **drive})
    return write_checked(tmp_path, sc, laser)


def _scipy_response(response, drive, sample_rate, periods=4):
    """``drive`` held between samples and repeated, through ``response`` discretised with a zero-order
    hold by scipy.signal (cont2discrete + lfilter, a reference implementation independent of
    sweepgen.response): the last period, once the start-up has died away."""
    num, den = response.transfer()
    b, a, _ = signal.cont2discrete((num, den), 1.0 / sample_rate, method="zoh")
    x = np.tile(drive - drive[0], periods)
    y = signal.lfilter(np.ravel(b), a, x)
    return y[-drive.size:] + drive[0]


def test_a_slow_actuator_fails_tracking_and_passes_pre_shaped(tmp_path):
    plain = playback.prepare(str(_slow(tmp_path, preshape=False)))
    shaped = playback.prepare(str(_slow(tmp_path, preshape=True)))
    assert plain.report.finding("tracking").status == "fail"
    assert not plain.ok
    assert shaped.ok, [f.message for f in shaped.report.failures()]
    with_, without = shaped.report.finding("tracking"), shaped.report.finding("tracking_without_preshape")
    assert with_.status in ("pass", "warn") and with_.value < with_.limit
    # check reports both: without pre-shaping the error is the plain drive's (a first-order lag r·τ)
    assert without.value == pytest.approx(plain.report.finding("tracking").value, rel=1e-2)
    assert without.value > 5 * with_.value


def test_pre_shaped_drive_through_scipy_model_reproduces_the_plan(tmp_path):
    pb = playback.prepare(str(_slow(tmp_path)))
    main, laser = pb.main, pb.laser
    shaped = main.preshaped
    n, rate = simulation_grid(main.schedule.period, main.rate_choice.sample_rate)
    drive = laser.chain.to_drive(main.schedule.sampled(rate)(0, n))
    planned = shaped.planned.sampled(rate)(0, n)
    actual = laser.chain.to_detuning(_scipy_response(laser.response, drive, rate))
    # 1. an identity: the actuator's response to the pre-shaped drive is the reference's to the plan
    wanted = _scipy_response(shaped.reference, laser.chain.to_drive(planned), rate)
    assert np.max(np.abs(actual - laser.chain.to_detuning(wanted))) < 1e-6 * np.ptp(planned)
    # 2. during the chirp the laser follows the plan within the tracking tolerance
    t = np.arange(n) / rate
    chirp = shaped.planned.segment("chirp")
    inside = (t >= chirp.start) & (t < chirp.end)
    tolerance = pb.report.finding("tracking").limit
    assert np.max(np.abs(actual - planned)[inside]) < tolerance
    # ... where the plain drive is off by the first-order lag, chirp rate × τ (Ogata, recalled)
    plain = laser.chain.to_detuning(_scipy_response(laser.response, laser.chain.to_drive(planned), rate))
    rate_mid = abs(shaped.planned.chirp_rate(0.5 * (chirp.start + chirp.end)))
    assert np.abs(plain - planned)[inside].max() == pytest.approx(rate_mid * laser.response.time_constant, rel=0.2)


def test_second_order_actuator_pre_shaped_through_scipy(tmp_path):
    model = {"model": "second-order", "resonance": "3 kHz", "q": 0.8}
    pb = playback.prepare(str(_slow(tmp_path, model=model)))
    plain = playback.prepare(str(_slow(tmp_path, model=model, preshape=False)))
    assert plain.report.finding("tracking").status == "fail"
    assert pb.report.finding("tracking").status != "fail"
    main = pb.main
    n, rate = simulation_grid(main.schedule.period, main.rate_choice.sample_rate)
    drive = pb.laser.chain.to_drive(main.schedule.sampled(rate)(0, n))
    actual = pb.laser.chain.to_detuning(_scipy_response(pb.laser.response, drive, rate))
    planned = main.preshaped.planned.sampled(rate)(0, n)
    reference = main.preshaped.reference
    assert reference.model == "second-order" and reference.q == 0.5          # critically damped
    wanted = _scipy_response(reference, pb.laser.chain.to_drive(planned), rate)
    assert np.max(np.abs(actual - pb.laser.chain.to_detuning(wanted))) < 1e-6 * np.ptp(planned)
    # the tracking rule's laser (its drive also quantised to the board's codes) agrees within a code
    code = 40e6 * 20 / 2 ** 14                        # Hz per code: 40 MHz/V over 20 V in 14 bits
    assert np.max(np.abs(actual - pb.report.tracking.actual)) < code


def test_preshape_inverts_the_response_exactly():
    # Response.preshape then Response.steady_state gives the reference's steady state
    rng = np.random.default_rng(1)
    y = np.cumsum(rng.normal(size=512))
    h = Response("first-order", corner=2e3)
    f = reference_response(h, 2e4)
    u = h.preshape(y, 1e6, f)
    assert h.steady_state(u, 1e6) == pytest.approx(f.steady_state(y, 1e6), abs=1e-9 * np.ptp(y))


def test_pre_shaped_drive_leaving_the_safe_range_is_refused(tmp_path):
    limits = {**PIEZO_LASER["limits"], "input_min": "-3.5 V", "input_max": "3.5 V"}
    plain = playback.prepare(str(_slow(tmp_path, preshape=False, limits=limits)))
    assert plain.report.finding("actuator_range").status != "fail"       # the plan's drive fits
    pb = playback.prepare(str(_slow(tmp_path, limits=limits)))
    assert pb.report.finding("actuator_range").status == "fail"
    with pytest.raises(CheckFailed):
        pb.table()
    from sweepgen.render import render

    with pytest.raises(CheckFailed, match="safe input range"):
        render(pb.main)
    res = run_cli("export", tmp_path / "scenario.toml", "--format", "npy", "-o", "out")
    assert res.exit_code == 1 and not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_export_plays_the_pre_shaped_drive(tmp_path):
    pb = playback.prepare(str(_slow(tmp_path)))
    table = pb.table()
    frame = next(table.frames(table.info.period_count))
    shaped = pb.main.schedule
    expected = pb.laser.chain.to_drive(shaped.detuning(frame.time))
    assert np.max(np.abs(frame.drive - expected)) < 1e-6
    plain_drive = pb.laser.chain.to_drive(pb.main.preshaped.planned.detuning(frame.time))
    assert np.max(np.abs(frame.drive - plain_drive)) > 0.05          # volts: it is not the plan's drive
    res = run_cli("export", tmp_path / "scenario.toml", "--format", "npy", "-o", "out", "--json")
    assert res.exit_code == 0, res.stderr
    sidecar = json.loads(next((tmp_path / "out").glob("*.json")).read_text())
    assert sidecar["preshape"]["bandwidth"] == pytest.approx(pb.main.preshaped.bandwidth)
    assert sidecar["drive_range"] == pytest.approx(list(pb.main.drive_range))


@pytest.mark.slow
def test_upload_plays_the_pre_shaped_drive(tmp_path):
    import dataclasses

    from conftest import deliver_to_board

    from sweepgen.testing import virtual_board

    pb = playback.prepare(str(_slow(tmp_path, sample_rate="20 MSa/s")))       # a rate the board plays
    table = pb.table()
    gen = dataclasses.replace(pb.generator, link=dataclasses.replace(pb.generator.link, timeout=0.5))
    with virtual_board(gen) as url:
        deliver_to_board(table, url, gen)
        stored = url.board.committed.codes()
    # the board holds the pre-shaped drive's codes, not the plan's
    assert np.array_equal(np.asarray(stored), table.codes())
    from sweepgen.sampling import drive_to_codes

    n = table.info.period_count
    t = np.arange(n) / table.info.sample_rate
    plan_codes = drive_to_codes(pb.laser.chain.to_drive(pb.main.preshaped.planned.detuning(t)), pb.main.quantisation)
    assert np.max(np.abs(np.asarray(stored[:n], dtype=float) - plan_codes)) > 100


def test_check_json_reports_both_and_the_ideal_actuator_is_left_alone(tmp_path):
    res = run_cli("check", _slow(tmp_path), "--json")
    assert res.exit_code == 0, res.stderr
    rules = {f["rule"]: f for f in json.loads(res.stdout)["findings"]}
    assert rules["tracking_without_preshape"]["value"] > rules["tracking"]["limit"] > rules["tracking"]["value"]
    res = run_cli("check", tmp_path / "scenario.toml")             # the text report says both in one line
    line = next(x for x in res.stdout.splitlines() if " tracking " in x)
    assert "with the pre-shaped drive (without it: 10.31 MHz)" in line
    pb = playback.prepare(str(_slow(tmp_path, model={"model": "none"})))
    assert pb.main.preshaped is None and pb.report.finding("tracking_without_preshape") is None


def test_drive_keys_are_read_strictly():
    with pytest.raises(InputError, match="drive.preshape"):
        scenario_from_dict(merged(CHECKED_SCENARIO, drive={"preshape": "yes"}), "s.toml")
    sc = scenario_from_dict(merged(CHECKED_SCENARIO, drive={"preshape": True, "preshape_bandwidth": "20 kHz"}),
                            "s.toml")
    assert sc.drive.preshape and sc.drive.preshape_bandwidth == 20e3
    with pytest.raises(InputError, match="preshape_bandwidth"):
        scenario_from_dict(merged(CHECKED_SCENARIO, drive={"preshape_bandwidth": "1e12 Hz"}), "s.toml")


def test_preshape_of_an_ideal_actuator_is_nothing():
    assert preshape(None, None, Response(), 1e6) is None


def test_optical_limits_judge_what_the_laser_does(tmp_path):
    # the pre-shaped drive commands steeper detuning changes than the plan, but the laser's frequency
    # follows the plan: the laser's chirp-rate limit judges the plan, the drive's slew limit the drive
    plain = playback.prepare(str(_slow(tmp_path, preshape=False)))
    pb = playback.prepare(str(_slow(tmp_path)))
    for rule in ("chirp_rate", "return_rate", "mode_hop_free"):
        assert pb.report.finding(rule).value == pytest.approx(plain.report.finding(rule).value, rel=1e-9)
    assert pb.report.finding("slew_rate").value > plain.report.finding("slew_rate").value
