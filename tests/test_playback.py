"""The playback service: one computation of what is played, read by the checker, the table and the links."""

from __future__ import annotations

import dataclasses
import shutil

import numpy as np
import pytest

from sweepgen import catalog
from sweepgen.errors import CheckFailed, InputError
from sweepgen.generator import load_generator
from sweepgen.laser import load_laser
from sweepgen.planner import plan
from sweepgen.response import MAX_SIM_POINTS, preview_sample_rate
from sweepgen.playback import (MAIN, actuator_response, default_file_name, load_profile, prepare,
                               scenario_profiles)
from sweepgen.scenario import load_scenario


@pytest.fixture(scope="module")
def rb():
    return prepare("rb87-chopped-oven")


def test_the_checker_and_the_table_read_the_same_choice(rb):
    main = rb.channels[MAIN]
    assert rb.ok and rb.main is main
    # computed once: the report judges the very objects the table plays
    assert rb.report.rate_choice is main.rate_choice and rb.report.quantisation is main.quantisation
    info = rb.table().info
    assert info.sample_rate == main.rate_choice.sample_rate and info.count == main.rate_choice.count
    assert info.code_scale == main.quantisation.code_scale and info.code_offset == main.quantisation.code_offset
    assert info.extra["drive_range"] == list(main.drive_range)
    assert rb.table() is rb.table()                       # rendered once
    # the drive range is the chain's drive at the schedule's extremes (analog stage: monotone)
    ends = main.laser.chain.to_drive(np.array([main.schedule.start_detuning, main.schedule.end_detuning]))
    assert main.drive_range == pytest.approx((ends.min(), ends.max()), rel=1e-12)


def test_the_check_document_is_the_reports(rb):
    doc = rb.to_json()
    assert doc["ok"] is True and doc["playback"]["sample_rate"] == rb.main.rate_choice.sample_rate
    assert [f["rule"] for f in doc["findings"]] == [f.rule for f in rb.report.findings]


def test_a_failing_rule_refuses_the_table(tmp_path, write_scenario):
    path = write_scenario(laser="demo-ecdl-piezo", generator="virtual-awg", chirp={"period": "5 ms"})
    pb = prepare(str(path))
    assert not pb.ok and pb.report.finding("period").status == "fail"
    assert pb.channels == {}                              # nothing to play when one period cannot hold the sweep
    with pytest.raises(CheckFailed, match="period"):
        pb.table()


def test_the_trigger_follows_the_source(rb, write_scenario):
    # a pulsed source starts each period on its trigger; a continuous beam runs free
    assert rb.scenario.pulsed and rb.link().trigger_source == "EXT"
    continuous = prepare("na23-continuous-focused")
    assert not continuous.scenario.pulsed
    link = continuous.link(resource="TCPIP::127.0.0.1::1::SOCKET", backend="@py")
    assert (link.driver, link.destination, link.trigger_source) == ("visa", "TCPIP::127.0.0.1::1::SOCKET", "IMM")
    # the names are the generator profile's own ([trigger] of virtual-awg); a continuous beam repeats
    assert link.options() == {"trigger_source": "IMM", "backend": "@py", "edge": "POS", "mode": "repeat"}
    assert rb.link().options()["mode"] == "burst" and rb.link().options()["cycles"] == 1
    assert rb.link().destination == rb.generator.link.address       # the profile's address by default


def test_a_ramp_board_goes_over_serial_and_refuses_visa_options():
    board = prepare("caf-buffer-gas")
    link = board.link()
    assert link.driver == "serial" and link.destination == board.generator.link.address
    # the board's driver reads the playback's timing itself (a pulsed source: external trigger)
    assert link.options() == {"timing": board.timing} and board.timing.source == "external"
    with pytest.raises(InputError, match="--resource"):
        board.link(resource="TCPIP::127.0.0.1::1::SOCKET")
    with pytest.raises(InputError, match="--backend"):
        board.link(backend="@py")
    with pytest.raises(InputError, match="ramp boards"):
        prepare("rb87-chopped-oven").link(serial_port="socket://127.0.0.1:1")


def test_profiles_named_in_a_scenario_are_found_beside_it(tmp_path, write_scenario):
    folder = tmp_path / "beam"
    folder.mkdir()
    shutil.copy(catalog.resolve("lasers", "demo-ecdl-piezo"), folder / "mine.toml")
    path = write_scenario(name="beam/s.toml", laser="mine.toml", generator="virtual-awg")
    laser, gen = scenario_profiles(load_scenario(str(path)))
    assert laser.path == folder / "mine.toml" and gen.key == "virtual-awg"
    bare = load_scenario(str(write_scenario()))           # names neither profile
    assert scenario_profiles(bare, required=False) == (None, None)
    with pytest.raises(InputError) as err:
        scenario_profiles(bare)
    assert err.value.key == "laser"
    given = load_profile("generator", "demo-ramp-board", key="--generator")
    assert scenario_profiles(bare, load_laser("demo-ecdl-piezo"), given)[1] is given
    with pytest.raises(InputError) as err:
        load_profile("laser", "no-such-laser", key="--laser")
    assert err.value.key == "--laser"


def test_a_fixed_rate_overrides_the_scenario(rb):
    pb = prepare("rb87-chopped-oven", sample_rate=5e6)
    assert pb.main.rate_choice.sample_rate == 5e6 and pb.main.rate_choice.limited_by == "fixed by --rate"
    assert pb.table().info.sample_rate == 5e6


def test_export_names_the_file_after_the_scenario(tmp_path, rb):
    from sweepgen.playback import file_format

    assert default_file_name(rb.scenario) == "rb87-chopped-oven"
    odd = dataclasses.replace(rb.scenario, path=tmp_path / "my beam (v2).toml")
    assert default_file_name(odd) == "my-beam-v2"
    done = rb.export(file_format("npy"), tmp_path / "out", {"name": "sweep"})
    doc = done.to_json()
    assert doc["format"] == "npy" and doc["written"] is True and doc["files"] == ["sweep.npy", "sweep.npy.json"]
    assert doc["period_count"] == rb.main.rate_choice.period_count and doc["laser"] == "demo-ecdl-piezo"
    assert np.array_equal(np.load(tmp_path / "out" / "sweep.npy"), rb.table().codes())


def test_actuator_response_for_plots():
    p = plan(load_scenario("rb87-chopped-oven"))
    laser = load_laser("demo-ecdl-piezo")
    t, d = actuator_response(p, laser, load_generator("virtual-awg"))
    sched = p.schedule()
    assert t.shape == d.shape and t[0] == 0 and t[-1] < sched.period
    # the piezo follows within its ramp lag rate/(Q ω0) plus the transients (second-order lag, final-value theorem)
    lag = laser.response.ramp_lag(sched.max_abs_chirp_rate("chirp"))
    chirp = sched.kinds(t) == "chirp"
    assert np.max(np.abs(d - sched.detuning(t))[chirp]) < 1.5 * lag
    assert np.max(np.abs(d - sched.detuning(t))[chirp]) > 0.5 * lag


@pytest.mark.slow
def test_actuator_response_follows_the_scenarios_profiles(write_scenario):
    p = plan(load_scenario("rb87-chopped-oven"))
    t, d = actuator_response(p)                            # the scenario names laser and generator
    t2, d2 = actuator_response(p, load_laser("demo-ecdl-piezo"), load_generator("virtual-awg"))
    assert np.array_equal(t, t2) and np.array_equal(d, d2)
    assert actuator_response(plan(load_scenario(str(write_scenario())))) is None      # no laser named
    # without a generator: unquantised, 1000 points per time constant 2Q/ω0 of the piezo (0.8, 25 kHz),
    # at most MAX_SIM_POINTS per period
    free = plan(load_scenario(str(write_scenario(laser="demo-ecdl-piezo"))))
    t3, _ = actuator_response(free)
    tau = 2 * 0.8 / (2 * np.pi * 25e3)
    assert t3[1] == pytest.approx(max(tau / 1000, free.scenario.chirp.period / MAX_SIM_POINTS), rel=1e-9)
    assert preview_sample_rate(load_laser("demo-ecdl-piezo").response, 1e-3) == pytest.approx(1000 / tau)

