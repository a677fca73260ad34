"""Several outputs played in step: the slowing light, a repump through its own laser, a gate and a
marker, with their trigger, on one time axis; checked, rendered and uploaded to the virtual
instrument on a real loopback socket (an invented four-output generator described by a profile)."""

from __future__ import annotations

import dataclasses
import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from sweepgen.emulators.instrument import Faults
from sweepgen.errors import CheckFailed, InstrumentError
from sweepgen.generator import load_generator
from sweepgen.playback import MAIN, prepare
from sweepgen.testing import instrument_server

from conftest import run_cli, to_toml

BENCH = Path(__file__).parent / "data" / "four-output-bench.toml"
BASE = "rb87-chopped-oven"


def scenario_text(channels: dict | None = None, timing: dict | None = None) -> str:
    """The built-in Rb scenario on the bench generator, with a repump on its own AOM laser (output 2),
    a gate (output 3) and an arrival marker (output 4), unless ``channels``/``timing`` replace them."""
    import tomllib

    from sweepgen import catalog

    data = tomllib.loads(catalog.resolve("scenarios", BASE).read_text())
    data["generator"] = "./bench.toml"
    data["channels"] = channels if channels is not None else {
        "repump": {"kind": "frequency", "role": "repump", "saturation": 1.0, "offset": "0 MHz",
                   "laser": "demo-aom-vco", "output": 2},
        "gate": {"kind": "gate", "on": "chirp_start", "on_shift": "-20 us", "off": "chirp_end",
                 "off_shift": "50 us", "dark": "0 V", "bright": "1 V", "lights": ["main", "repump"], "output": 3}}
    data["timing"] = timing if timing is not None else {
        "delay": "0.1 ms", "edge": "rising",
        "markers": {"arrival": {"at": "arrival", "width": "20 us", "output": 4, "high": "3.3 V"}}}
    return to_toml(data)


@pytest.fixture
def write(tmp_path):
    def write(**kw) -> Path:
        shutil.copy(BENCH, tmp_path / "bench.toml")
        path = tmp_path / "scenario.toml"
        path.write_text(scenario_text(**kw))
        return path
    return write


@pytest.fixture(scope="module")
def played(tmp_path_factory):
    folder = tmp_path_factory.mktemp("played")
    shutil.copy(BENCH, folder / "bench.toml")
    (folder / "scenario.toml").write_text(scenario_text())
    return prepare(folder / "scenario.toml")


def test_the_plans_timing_lanes_show_each_table_and_window_where_it_plays(played):
    from sweepgen.timing import lanes

    pb = played
    sc, plan = pb.plan.scenario, pb.plan
    spans = dict(lanes(sc, plan))
    table = next(v for k, v in spans.items() if k.startswith("table"))
    # one period of samples from the first, 0.1 ms after the trigger: to 20.1 ms (not cut at 20 ms)
    assert table == [(pytest.approx(1e-4), pytest.approx(1e-4 + sc.chirp.period))]
    on, off = pb.timing.moments["chirp_start"] - 20e-6, pb.timing.moments["chirp_end"] + 50e-6
    assert spans["gate: light on (main, repump)"] == [(pytest.approx(on), pytest.approx(off))]


def test_every_output_is_planned_on_one_time_axis(played):
    pb = played
    assert pb.ok, [f.message for f in pb.report.failures()]
    assert list(pb.channels) == [MAIN, "repump", "gate", "arrival"]           # MAIN first, markers last
    assert [c.output for c in pb.channels.values()] == [1, 2, 3, 4]
    assert {c.rate_choice.sample_rate for c in pb.channels.values()} == {pb.main.rate_choice.sample_rate}
    tm = pb.timing
    # the profile's own names for what the scenario asks for: no built-in EXT/IMM
    assert (tm.source, tm.source_name, tm.edge, tm.edge_name) == ("external", "EXTERN", "rising", "UP")
    assert (tm.mode, tm.cycles, tm.delay) == ("burst", 1, pytest.approx(1e-4))
    plan = pb.plan
    assert tm.moments["chirp_start"] == pytest.approx(plan.chirp_start)
    assert tm.moments["chirp_end"] == pytest.approx(plan.chirp_start + plan.chirp_duration)
    assert tm.markers[0].start == pytest.approx(plan.arrival_time)
    assert pb.link().options()["trigger_source"] == "EXTERN"


def test_the_table_starts_at_the_trigger_delay(played):
    # sample k plays at delay + k / rate after the trigger: the table is the plan read from there
    main = played.table(MAIN)
    frame = next(main.frames(4096 * 64))
    planned = played.plan.schedule().detuning(played.timing.delay + frame.time)
    assert np.max(np.abs(frame.detuning - planned)) < 1e-6 * np.max(np.abs(planned))


def test_a_repump_follows_the_main_sweep_through_its_own_chain(played):
    pb = played
    main, repump = next(pb.table(MAIN).frames(1 << 16)), next(pb.table("repump").frames(1 << 16))
    np.testing.assert_allclose(repump.detuning, main.detuning, rtol=0, atol=1e-3)   # offset 0 MHz
    chain = pb.channels["repump"].laser.chain
    np.testing.assert_allclose(repump.drive, chain.to_drive(repump.detuning), atol=1e-6)
    assert pb.channels["repump"].laser.key == "demo-aom-vco"


def test_the_gate_is_bright_only_while_it_is_open(played):
    pb = played
    gate = pb.table("gate")
    frames = list(gate.frames(1 << 18))
    t = np.concatenate([f.time for f in frames]) + pb.timing.delay      # on the trigger axis
    drive = np.concatenate([f.drive for f in frames])
    when = pb.timing.moments
    inside = (t >= when["chirp_start"] - 20e-6 + 1e-6) & (t < when["chirp_end"] + 50e-6 - 1e-6)
    outside = (t < when["chirp_start"] - 20e-6 - 1e-6) | (t > when["chirp_end"] + 50e-6 + 1e-6)
    step = gate.info.code_scale
    assert np.all(np.abs(drive[inside] - 1.0) <= step) and np.all(np.abs(drive[outside]) <= step)
    marker = np.concatenate([f.drive for f in pb.table("arrival").frames(1 << 18)])
    assert np.count_nonzero(marker > 1.65) == round(20e-6 * gate.info.sample_rate)


@pytest.mark.parametrize("change, rule", [
    ({"off_shift": "1 ms"}, "gate.switch_off"),                   # light left on 1 ms after the chirp
    ({"on_shift": "0.2 ms"}, "gate.coverage"),                    # opens after the chirp started
    ({"on": "trigger", "on_shift": "0 s"}, "gate.window"),        # opens before the table's first sample
    ({"off_shift": "10 us", "level": 0.0}, "gate.coverage"),      # open all the chirp, but lets nothing through
])
def test_a_gate_out_of_step_with_the_chirp_fails(write, change, rule):
    channels = {"gate": {"kind": "gate", "on": "chirp_start", "off": "chirp_end", "dark": "0 V",
                         "bright": "1 V", "output": 3, **change}}
    pb = prepare(write(channels=channels))
    assert pb.report.finding(rule).status == "fail"
    with pytest.raises(CheckFailed, match=rule):
        pb.require_playable()


def test_a_delay_past_the_chirp_start_fails(write):
    pb = prepare(write(channels={}, timing={"delay": "2 ms"}))
    assert pb.report.finding("timing.delay").status == "fail"
    assert not pb.ok


def test_the_delay_has_a_headroom_to_the_chirp_start_like_every_limit(write):
    # the glossary's headroom: (limit - value) / limit, the chirp start being the limit of the delay
    pb = prepare(write(channels={}, timing={"delay": "100 us"}))
    f = pb.report.finding("timing.delay")
    start = pb.timing.moments["chirp_start"]
    assert f.limit == start and f.headroom == pytest.approx((start - 100e-6) / start)
    late = prepare(write(channels={}, timing={"delay": "2 ms"})).report.finding("timing.delay")
    assert late.headroom < 0


def test_two_channels_on_one_output_fail(write):
    channels = {"gate": {"kind": "gate", "on": "chirp_start", "off": "chirp_end", "off_shift": "10 us",
                         "dark": "0 V", "bright": "1 V", "output": 1}}
    pb = prepare(write(channels=channels, timing={}))
    assert pb.report.finding("outputs").status == "fail"


def test_a_one_channel_scenario_is_unchanged():
    pb = prepare(BASE)
    assert list(pb.channels) == [MAIN] and pb.timing.delay == 0
    np.testing.assert_array_equal(pb.main.schedule.breakpoints, pb.plan.schedule().breakpoints)


# -- upload to the virtual instrument ------------------------------------------------------------
def test_upload_loads_and_verifies_every_output_and_leaves_them_off(played):
    gen = load_generator(str(BENCH))
    with instrument_server(gen) as server:
        link = played.link(resource=server.resource)
        done = played.upload(link)
        inst = server.instrument
        assert inst.outputs_on == [] and not inst.ever_armed
        for name, playing in played.channels.items():
            stored = inst.traces[f"SWEEP{playing.output}"].values
            np.testing.assert_array_equal(stored, played.table(name).codes())
        now = inst.playing()
        assert now["trigger"] == {"source": "EXTERN", "slope": "UP", "level": 0.0, "delay": pytest.approx(1e-4),
                                  "mode": "burst of 1"}
        assert [now["outputs"][n]["sample_rate"] for n in (1, 2, 3, 4)] == [played.main.rate_choice.sample_rate] * 4
    v = done.report["verification"]
    assert v["ok"] and [o["output"] for o in v["outputs"]] == [1, 2, 3, 4]
    assert done.verified and done.report["armed"] is False


def test_arm_switches_every_output_on_in_order(played):
    gen = load_generator(str(BENCH))
    with instrument_server(gen) as server:
        done = played.upload(played.link(resource=server.resource), arm=True)
        inst = server.instrument
        assert inst.outputs_on == [1, 2, 3, 4]
        assert inst.output_events[-4:] == [(1, True), (2, True), (3, True), (4, True)]
    assert done.report["arm_order"] == [1, 2, 3, 4] and done.report["armed"] is True



@pytest.mark.parametrize("arm, state, reply", [(True, "on", "1"), (False, "off", "0")])
def test_upload_reports_each_outputs_state_as_last_read_back(write, arm, state, reply):
    # every output is read back after its switch-off and, with --arm, after its switch-on: the report gives
    # each output's last readback, in JSON and in text, not the last output's switch-off alone
    path = write()
    with instrument_server(load_generator(str(BENCH))) as server:
        args = ["upload", path, "--resource", server.resource] + (["--arm"] if arm else [])
        doc = json.loads(run_cli(*args, "--json").stdout)
        text = run_cli(*args).stdout
        assert server.instrument.outputs_on == ([1, 2, 3, 4] if arm else [])
    assert doc["output_state"] == {"outputs": [{"output": n, "state": state, "query": f"OUTP{n}:STAT?",
                                                "reply": reply} for n in (1, 2, 3, 4)]}
    for n in (1, 2, 3, 4):
        assert f"  output {n}: {'ON' if arm else 'off'} (read back: OUTP{n}:STAT? answered {reply})" in text


def test_a_silent_instrument_is_reported_unconfirmed_for_every_output_by_number(write, tmp_path):
    # the virtual instrument's --mute fault: no reply ever comes, so no switch-off of the four outputs is confirmed
    path = write()
    bench = tmp_path / "bench.toml"
    bench.write_text(bench.read_text().replace('timeout = "5 s"', 'timeout = "0.2 s"'))
    with instrument_server(load_generator(str(bench)), faults=Faults(mute=True)) as server:
        result = run_cli("upload", path, "--resource", server.resource, "--arm")
        assert server.instrument.outputs_on == [] and not server.instrument.ever_armed
    assert result.exit_code == 1
    assert result.stderr.rstrip().endswith("could not confirm that outputs 1, 2, 3 and 4 are off: check the "
                                           "instrument before touching the setup")

def test_a_fault_on_the_second_output_leaves_the_first_switched_off(played):
    # the real instrument's output 2 reaches only 3 V, less than the profile says: it takes the repump's
    # amplitude and offset, but refuses to switch the output on, after output 1 was switched on
    gen = load_generator(str(BENCH))
    narrow = dataclasses.replace(gen.output, amplitude_max=None, offset_max=None, range_min=-5.0, range_max=3.0)
    real = dataclasses.replace(gen, outputs={**gen.outputs, 2: narrow})
    with instrument_server(real) as server:
        with pytest.raises(InstrumentError) as info:
            played.upload(played.link(resource=server.resource), arm=True)
        inst = server.instrument
        assert inst.outputs_on == []
        assert (1, True) in inst.output_events and inst.output_events[-1] == (1, False)
    text = str(info.value)
    assert info.value.step == "output_on, output 2" and "outside" in text
    assert text.endswith("every output (1, 2, 3, 4) switched off (confirmed on the same connection)")


@pytest.mark.slow
def test_an_output_the_instrument_does_not_have_is_refused_in_its_words(played):
    gen = load_generator(str(BENCH))
    with instrument_server(dataclasses.replace(gen, channels=1, outputs={})) as server:
        with pytest.raises(InstrumentError) as info:
            played.upload(played.link(resource=server.resource))
        assert server.instrument.outputs_on == []
    text = str(info.value)
    assert "-114" in text and "channel 2" in text            # the instrument's own words
    assert "switched off (confirmed" not in text             # never reported as a success


# -- no combination of channels writes a table outside any actuator's safe range -------------------
from hypothesis import HealthCheck, given, settings, strategies as st  # noqa: E402


@st.composite
def channel_sets(draw):
    channels = {}
    if draw(st.booleans()):
        follow = draw(st.booleans())
        value = f"{draw(st.floats(-600, 600, allow_nan=False)):.3f} MHz"
        channels["repump"] = {"kind": "frequency", "saturation": 1.0, "output": 2,
                              "laser": draw(st.sampled_from(["demo-aom-vco", "demo-ecdl-piezo"])),
                              "offset" if follow else "detuning": value}
    if draw(st.booleans()):
        dark, bright = draw(st.floats(-8, 8)), draw(st.floats(-8, 8))
        if abs(bright - dark) < 0.01:
            bright = dark + 0.5
        lo = min(dark, bright) - draw(st.floats(-1, 1))
        hi = max(dark, bright) + draw(st.floats(-1, 1))
        channels["gate"] = {"kind": "gate", "on": "chirp_start", "off": "chirp_end", "off_shift": "20 us",
                            "dark": f"{dark:.4f} V", "bright": f"{bright:.4f} V", "output": 3,
                            "level": draw(st.floats(0, 1)),
                            "input_min": f"{lo:.4f} V", "input_max": f"{max(hi, lo + 0.01):.4f} V"}
    markers = {}
    if draw(st.booleans()):
        markers["arrival"] = {"at": "arrival", "width": "20 us", "output": 4,
                              "high": f"{draw(st.floats(0.5, 9)):.3f} V"}
    return channels, {"delay": f"{draw(st.floats(0, 0.5)):.4f} ms", "markers": markers}


@pytest.mark.slow
@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(chosen=channel_sets())
def test_no_combination_of_channels_leaves_a_safe_range(write, chosen):
    channels, timing = chosen
    path = write(channels=channels, timing=timing)
    text = path.read_text().replace('sample_rate = "auto"', 'sample_rate = "1 MSa/s"')
    path.write_text(text)
    pb = prepare(path)
    if not pb.ok:
        with pytest.raises(CheckFailed):
            pb.table(MAIN)
        return
    for name, playing in pb.channels.items():
        table = pb.table(name)
        drive = table.info.code_offset + table.info.code_scale * table.codes().astype(float)
        lim = playing.laser.limits
        assert lim.input_min - 1e-9 <= drive.min() and drive.max() <= lim.input_max + 1e-9, name
        k = playing.generator.output.delivered_factor
        out = playing.generator.output
        assert out.range_min * k - 1e-9 <= drive.min() and drive.max() <= out.range_max * k + 1e-9, name


# -- the commands ----------------------------------------------------------------------------------
def test_export_writes_a_table_and_a_sidecar_per_channel(write, tmp_path):
    import json

    result = run_cli("export", write(), "-f", "raw", "-o", tmp_path / "out", "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert [c["name"] for c in doc["channels"]] == [MAIN, "repump", "gate", "arrival"]
    for ch in doc["channels"]:
        side = json.loads(Path(ch["paths"][1]).read_text())
        assert side["generator"]["channel"] == ch["output"] and side["channel"]["name"] == ch["name"]
        assert side["timing"]["delay"] == pytest.approx(1e-4) and side["timing"]["source_name"] == "EXTERN"
        codes = np.fromfile(ch["paths"][0], dtype=side["numpy_dtype"])
        drive = side["scaling"]["drive"]["offset"] + side["scaling"]["drive"]["scale"] * codes
        lo, hi = side["safe_range"]
        assert lo - 1e-9 <= drive.min() and drive.max() <= hi + 1e-9


@pytest.mark.slow
def test_check_and_plan_show_every_channel_and_the_timing(write):
    import json

    path = write()
    check = run_cli("check", path, "--json")
    assert check.exit_code == 0, check.output
    doc = json.loads(check.stdout)
    assert [c["output"] for c in doc["channels"]] == [1, 2, 3, 4] and doc["timing"]["edge_name"] == "UP"
    assert {"repump.actuator_range", "gate.coverage", "gate.switch_off", "arrival.window"} <= {
        f["rule"] for f in doc["findings"]}
    plan = run_cli("plan", path, "--plot", "plan.png")
    assert plan.exit_code == 0, plan.output
    assert "timing (0 = the trigger edge): external trigger, rising edge, burst" in plan.stdout
    assert "gate: light on (main, repump)" in plan.stdout and Path("plan.png").stat().st_size > 0


@pytest.mark.slow
def test_upload_is_off_until_arm_and_a_refusal_is_exit_1(write, tmp_path):
    path = write()
    gen = load_generator(str(BENCH))
    with instrument_server(gen) as server:
        result = run_cli("upload", path, "--resource", server.resource)
        assert result.exit_code == 0, result.output
        assert server.instrument.outputs_on == [] and not server.instrument.ever_armed
    with instrument_server(dataclasses.replace(gen, channels=1, outputs={})) as server:
        result = run_cli("upload", path, "--resource", server.resource, "--arm")
        assert result.exit_code == 1
        assert "-114" in result.stderr and "switched off (confirmed" not in result.output
        assert not server.instrument.ever_armed


def test_a_table_exported_with_a_trigger_delay_still_matches_its_plan(write, tmp_path):
    import json

    path = write()
    assert run_cli("export", path, "-f", "raw", "-o", tmp_path / "out").exit_code == 0
    result = run_cli("check", path, "--table", tmp_path / "out" / "scenario.bin", "--json")
    assert result.exit_code == 0, result.output
    found = {f["rule"]: f for f in json.loads(result.stdout)["findings"]}
    match = found["table_match"]
    assert match["status"] == "pass" and match["value"] < 0.1 * match["limit"]
    assert found["table_delay"]["status"] == "pass"
    # the same table judged by a scenario that now asks for another delay: warned, and the match suffers
    other = write(timing={"delay": "0.2 ms", "edge": "rising",
                          "markers": {"arrival": {"at": "arrival", "width": "20 us", "output": 4, "high": "3.3 V"}}})
    again = run_cli("check", other, "--table", tmp_path / "out" / "scenario.bin", "--json")
    found = {f["rule"]: f for f in json.loads(again.stdout)["findings"]}
    delay = found["table_delay"]
    assert delay["status"] == "warn" and (delay["value"], delay["limit"]) == pytest.approx((1e-4, 2e-4))
    assert "the scenario's [timing] delay is 200 µs, and the table" in delay["message"], delay["message"]


def test_a_connection_lost_during_the_second_table_leaves_every_output_off(played):
    # the instrument hangs up in the middle of output 2's block; a new connection switches all off
    from sweepgen.drivers.base import Delivery
    from sweepgen.drivers.visa import VisaDriver

    gen = load_generator(str(BENCH))
    tables = [played.table(n) for n in played.channels]
    link = played.link(resource="TCPIP::127.0.0.1::5025::SOCKET")
    log = VisaDriver().deliver_tables(tables, Delivery("", gen, dry_run=True, options=link.options()))["log"]
    upto = 0
    for entry in log:
        upto += entry["bytes"]
        if entry["step"] == "upload, output 2" and entry["kind"] == "write":
            upto -= entry["bytes"] // 2
            break
    with instrument_server(gen, faults=Faults(drop_after=upto)) as server:
        server.instrument.execute("OUTP1:STAT OFF")
        with pytest.raises(InstrumentError) as info:
            played.upload(played.link(resource=server.resource), arm=True)
        inst = server.instrument
        assert inst.outputs_on == [] and not inst.ever_armed
        assert "SWEEP1" in inst.traces and "SWEEP2" not in inst.traces
    assert info.value.step == "upload, output 2"
    assert str(info.value).endswith("every output (1, 2, 3, 4) switched off (confirmed on a new connection)")


@pytest.mark.parametrize("lo, hi, offset, amplitude", [
    (6.0, 9.0, 5.0, 8.0),        # centre 7.5 V is past the offset limit: offset 5 V, 8 Vpp reaches 9 V
    (-2.0, 2.0, 0.0, 4.0),
])
def test_separate_amplitude_and_offset_limits_play_what_they_allow(lo, hi, offset, amplitude):
    # an output limited to 10 Vpp and |offset| <= 5 V reaches 6..9 V with the offset at its limit
    from sweepgen import sampling

    gen = load_generator(str(BENCH))
    chain = prepare(BASE).laser.chain
    chain = dataclasses.replace(chain, safe_min=-20.0, safe_max=20.0)
    q = sampling.quantisation(lo, hi, gen, chain)
    assert (q.offset, q.amplitude) == (pytest.approx(offset), pytest.approx(amplitude))
    assert q.offset - q.amplitude / 2 <= lo and hi <= q.offset + q.amplitude / 2


def test_separate_limits_refuse_an_amplitude_beyond_them():
    from sweepgen import sampling

    gen = load_generator(str(BENCH))
    chain = dataclasses.replace(prepare(BASE).laser.chain, safe_min=-20.0, safe_max=20.0)
    with pytest.raises(CheckFailed, match="amplitude_max"):
        sampling.quantisation(-6.0, 6.0, gen, chain)                   # 12 Vpp of a 10 Vpp output
    with pytest.raises(CheckFailed, match="amplitude_max"):
        sampling.quantisation(-3.0, 3.0, gen.for_output(3), chain)     # output 3: 5 Vpp



def test_further_outputs_needing_more_peak_to_peak_fail_generator_amplitude_and_nothing_is_sent(write, tmp_path):
    # outputs 3 and 4 of the bench play at most 5 V peak-to-peak (|offset| <= 2.5 V), their window is ±5 V: a gate
    # from -3 to 3 V and a marker from -0.5 to 4.9 V fit the window but need 6 and 5.4 V peak-to-peak
    channels = {"gate": {"kind": "gate", "on": "chirp_start", "on_shift": "-20 us", "off": "chirp_end",
                         "off_shift": "50 us", "dark": "-3 V", "bright": "3 V", "input_min": "-5 V",
                         "input_max": "5 V", "output": 3}}
    timing = {"delay": "0.1 ms", "markers": {"arrival": {"at": "arrival", "width": "20 us", "output": 4,
                                                         "high": "4.9 V", "low": "-0.5 V"}}}
    path = write(channels=channels, timing=timing)
    report = prepare(path).report
    for name, need, advice in (("gate", 6.0, "channels.gate.dark and bright"),
                               ("arrival", 5.4, "timing.markers.arrival.high and low")):
        f = report.finding(f"{name}.generator_amplitude")
        assert (f.status, f.value, f.limit, f.unit) == ("fail", pytest.approx(need), 5.0, "V")
        assert f.headroom == pytest.approx((5.0 - need) / 5.0)
        assert "outputs." in f.message and "amplitude_max" in f.message and "offset_max" in f.message
        assert advice in f.advice
        assert report.finding(f"{name}.generator_range").status in ("pass", "warn")
    assert not [f for f in report.findings if f.advice == "see the message"]
    out = tmp_path / "out"
    result = run_cli("export", path, "-f", "raw", "-o", out)
    assert result.exit_code == 1 and "gate.generator_amplitude" in result.stderr and not out.exists()
    with instrument_server(load_generator(str(BENCH))) as server:
        result = run_cli("upload", path, "--resource", server.resource, "--arm")
        assert result.exit_code == 1 and "nothing is written or sent" in result.stderr
        assert server.clients == 0 and not server.instrument.ever_armed

def test_the_detuning_played_after_a_trigger_delay_is_flown_on_the_triggers_axis(played):
    # the table's first sample plays 0.1 ms after the trigger; the atoms and the plan live on the trigger's
    # axis, so the detuning the simulation flies must follow the plan there to within the actuator's lag
    # (the tracking error), not lead it by the delay (5 MHz at this chirp rate)
    from sweepgen.playback import played_from

    pb = played
    flown = played_from(pb)
    s = pb.plan.schedule()
    t0, t1 = pb.plan.chirp_start, pb.plan.chirp_start + pb.plan.chirp_duration
    t = np.linspace(t0, t1, 4001)
    err = np.max(np.abs(np.array([flown.program.at(x) for x in t]) - s.detuning(t)))
    moved = abs(s.detuning(t0 + 0.5 * (t1 - t0) + pb.timing.delay) - s.detuning(t0 + 0.5 * (t1 - t0)))
    assert pb.timing.delay == pytest.approx(1e-4) and flown.hardware
    assert err <= 1.01 * flown.tracking_error and err < 0.2 * moved, (err, flown.tracking_error, moved)


def test_a_sampled_program_played_later():
    from sweepgen.programs import SampledProgram

    values = np.sin(np.linspace(0.0, 2 * np.pi, 1000, endpoint=False))
    sp = SampledProgram(values, 1.0)
    np.testing.assert_array_equal(sp.later(0.007).values, np.roll(values, 7))      # whole samples: moved exactly
    assert sp.later(2.0) is sp
    shifted = sp.later(0.0123)
    t = np.random.default_rng(0).uniform(-2.0, 2.0, 500)
    step = np.max(np.abs(np.diff(values)))
    assert max(abs(shifted.at(x) - sp.at(x - 0.0123)) for x in t) < step           # within one sample's step


def test_simulate_says_when_the_gate_lets_the_light_through(write):
    from sweepgen.planner import plan
    from sweepgen.scenario import load_scenario
    from sweepgen.timing import moments

    path = write()
    out = run_cli("simulate", path, "--atoms", 200, "--seed", 1)
    assert out.exit_code == 0, out.output
    when = moments(plan(load_scenario(path)))
    opens, closes = (when["chirp_start"] - 20e-6) * 1e3, (when["chirp_end"] + 50e-6) * 1e3
    for light in ("main", "repump"):
        assert f"light '{light}' as its gates set it: 1 from {opens:.4g} to {closes:.4g} ms, dark otherwise" \
            in out.stdout, out.stdout
    doc = json.loads(run_cli("simulate", path, "--atoms", 200, "--seed", 1, "--json").stdout)
    assert doc["light_levels"]["main"][1] == pytest.approx([opens * 1e-3, closes * 1e-3, 1.0])
    assert doc["light_levels"]["main"][0][2] == 0.0 == doc["light_levels"]["main"][2][2]


@pytest.mark.parametrize("delay", [1e-4, 13.1e-3, 16e-3])
def test_a_schedule_on_the_tables_axis_is_moved_onto_the_triggers(delay):
    # what plays at t of the table plays at t + delay after the trigger: the moved schedule at t must be the
    # table's at t - delay (periodic), pieces cut by the period's end included (13.1 ms cuts the return's cubic
    # at 6.9 ms of the demo's 20 ms period, 16 ms a piece of the chirp at 4 ms); undelayed undoes delayed
    from sweepgen.planner import plan
    from sweepgen.playback import delayed, undelayed
    from sweepgen.scenario import load_scenario

    s = plan(load_scenario(BASE)).schedule()
    moved = undelayed(s, delay)
    t = np.random.default_rng(3).uniform(0.0, 2 * s.period, 5000)
    np.testing.assert_allclose(moved.detuning(t), s.detuning(t - delay), rtol=0, atol=1e-3)   # Hz
    assert list(moved.kinds(t)) == list(s.kinds((t - delay) % s.period))
    if delay < 2e-4:                                                # only the rest before the chirp may be skipped
        np.testing.assert_allclose(undelayed(delayed(s, delay), delay).detuning(t), s.detuning(t), rtol=0, atol=1e-3)


def test_a_table_read_back_is_flown_on_the_triggers_axis(write, tmp_path):
    # the exported main table (first sample 0.1 ms after the trigger), read back and played through the laser
    # and actuator: the detuning the simulation flies follows the plan on the trigger's axis to within the
    # tracking error (not one delay early: 5 MHz at this chirp rate)
    from sweepgen import drivers
    from sweepgen.playback import played_table, table_sweep
    from sweepgen.planner import plan
    from sweepgen.scenario import load_scenario

    path = write()
    doc = json.loads(run_cli("export", path, "-f", "raw", "-o", tmp_path / "out", "--json").stdout)
    main = next(c for c in doc["channels"] if c["name"] == MAIN)
    sc = load_scenario(path)
    p = plan(sc)
    from sweepgen.playback import scenario_profiles

    flown = played_table(sc, table_sweep(drivers.read_table(main["paths"][0]), scenario_profiles(sc)[0]))
    s = p.schedule()
    t = np.linspace(p.chirp_start, p.chirp_start + p.chirp_duration, 4001)
    err = np.max(np.abs(np.array([flown.program.at(x) for x in t]) - s.detuning(t)))
    assert flown.hardware and err <= 1.05 * flown.tracking_error and err < 1e6, (err, flown.tracking_error)


def test_the_reports_speak_of_the_triggers_axis_after_a_delay(played, write, tmp_path):
    # with the table's first sample 0.1 ms after the trigger: the tracking rule's worst time lies within the
    # chirp on the trigger's axis (it was given from the first sample, 0.1 ms early: before the chirp even
    # started); the drive plot's "as played" curve lies on the planned drive; inspect's chirp start is the
    # plan's to within the 2 us to which the table's parts are found
    import re

    import sweepgen
    from sweepgen.plots import drive_figure

    pb = played
    p = pb.plan
    t0, t1 = p.chirp_start, p.chirp_start + p.chirp_duration
    at = float(re.search(r"at ([0-9.e+-]+) ms after the trigger", pb.report.finding("tracking").message)[1]) * 1e-3
    assert t0 <= at <= t1, (t0, at, t1)
    planned, as_played = drive_figure(pb.report).axes[0].lines[:2]
    x, y = (np.asarray(v, dtype=float) for v in as_played.get_data())
    inside = (x > t0 * 1e3) & (x < t1 * 1e3)
    gap = np.abs(y[inside] - np.interp(x[inside], *(np.asarray(v, dtype=float) for v in planned.get_data())))
    assert gap.max() < 0.02, gap.max()           # V; one delay early it is 0.13 V at this chirp rate
    doc = json.loads(run_cli("export", write(), "-f", "raw", "-o", tmp_path / "out", "--json").stdout)
    main = next(c for c in doc["channels"] if c["name"] == MAIN)
    numbers = sweepgen.inspect(main["paths"][0]).to_json()
    # (the table's chirp is found where it leaves the start level by a code step: 0.6 us late, as without a delay)
    assert numbers["delay"] == pytest.approx(1e-4) and abs(numbers["chirp_start"] - t0) < 2e-6


def test_a_further_output_out_of_range_names_its_own_key(write):
    # the bench generator has four outputs: a marker on 5, a gate on 7 are refused with the key that chose them
    timing = {"delay": "0.1 ms", "markers": {"arrival": {"at": "arrival", "width": "20 us", "output": 5,
                                                         "high": "3.3 V"}}}
    channels = {"gate": {"kind": "gate", "on": "chirp_start", "off": "chirp_end", "off_shift": "10 us",
                         "dark": "0 V", "bright": "1 V", "output": 7}}
    report = prepare(write(channels=channels, timing=timing)).report
    marker, gate = report.finding("arrival.channel"), report.finding("gate.channel")
    assert marker.status == gate.status == "fail"
    assert marker.advice == "set timing.markers.arrival.output to 1..4"
    assert gate.advice == "set channels.gate.output to 1..4"


def test_a_further_channels_table_is_not_read_back_as_the_main_sweep(write, tmp_path):
    # the gate's table (a level, not a detuning) given to check --table or simulate --table: one line naming
    # the file and what to give instead, exit 2
    path = write()
    assert run_cli("export", path, "-f", "csv", "-o", tmp_path / "out").exit_code == 0
    for command in ("check", "simulate"):
        result = run_cli(command, path, "--table", tmp_path / "out" / "scenario-gate.csv")
        assert result.exit_code == 2, result.output
        assert "scenario-gate.csv" in result.stderr and "channel 'gate'" in result.stderr
        assert "give the main sweep's table" in result.stderr and len(result.stderr.strip().splitlines()) == 1


def test_simulate_warns_when_what_is_played_breaks_a_rule(write):
    # a gate that closes 1 ms late fails gate.switch_off; simulate still flies the atoms (what the hardware
    # would play) but says so, on stderr and in the JSON
    channels = {"gate": {"kind": "gate", "on": "chirp_start", "off": "chirp_end", "off_shift": "1 ms",
                         "dark": "0 V", "bright": "1 V", "output": 3}}
    path = write(channels=channels)
    result = run_cli("simulate", path, "--atoms", 200, "--seed", 1)
    assert result.exit_code == 0 and "fails 1 check rule(s) (gate.switch_off)" in result.stderr, result.stderr
    doc = json.loads(run_cli("simulate", path, "--atoms", 200, "--seed", 1, "--json").stdout)
    assert doc["played"]["failed_rules"] == ["gate.switch_off"]
    clean = json.loads(run_cli("simulate", write(), "--atoms", 200, "--seed", 1, "--json").stdout)
    assert clean["played"]["failed_rules"] == []


def test_a_burst_that_outlasts_the_period_is_warned(played, write):
    # the bench scenario plays one period per trigger from 0.1 ms after it: until 20.1 ms, when the source's
    # next shot (20 ms) has already triggered; in repeat mode, or without a delay, nothing outlasts the period
    f = played.report.finding("timing.burst")
    assert f.status == "warn" and f.value == pytest.approx(1e-4) and "20.1 ms after the trigger" in f.message
    for timing in ({"delay": "0 ms"}, {"delay": "0.1 ms", "mode": "repeat", "source": "internal"}):
        assert prepare(write(channels={}, timing=timing)).report.finding("timing.burst").status == "pass"


# ---------------------------------------------------------------------------------------------
# What the files say about a further channel's table, and on which time axis
# ---------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def exported(played, tmp_path_factory):
    """The bench scenario's four tables (main, repump, gate, marker) written as csv, npy and hdf5."""
    from sweepgen.playback import file_format

    folder = tmp_path_factory.mktemp("exported")
    for fmt in ("csv", "npy", "hdf5"):
        played.export(file_format(fmt), folder / fmt, {"name": "scenario"})
    return folder


def _sidecar(path: Path) -> dict:
    return json.loads(Path(f"{path}.json").read_text())


def test_a_gate_and_a_marker_table_hold_a_level_in_every_file(exported):
    # a gate's table holds its fraction of full intensity, a marker's 0 low to 1 high: named so, without a
    # unit, and no "detuning" in Hz anywhere (the csv column, the sidecar's scaling and chain, the hdf5 field)
    import h5py

    for name, meaning in (("gate", "fraction of full intensity"), ("arrival", "0 low, 1 high")):
        csv = exported / "csv" / f"scenario-{name}.csv"
        assert csv.read_text().splitlines()[0] == "time_s,level,drive_V,code"
        side = _sidecar(csv)
        assert side["columns"][1] == {"name": "level", "unit": ""}
        assert "detuning" not in side["scaling"] and side["scaling"]["level"]["unit"] == ""
        assert side["chain"]["description"].startswith("level →")
        assert all("Hz" not in stage["unit"] for stage in side["chain"]["stages"])
        level = np.loadtxt(csv, delimiter=",", skiprows=1, usecols=1)
        assert set(np.round(level, 3)) == {0.0, 1.0}
        # its rate is the main light's (every output plays in step), and its sampling says so
        assert side["sampling"]["reason"].startswith("the main light's rate, which every output of the scenario "
                                                     "shares"), side["sampling"]
        with h5py.File(exported / "hdf5" / f"scenario-{name}.h5") as f:
            g = f["entry/sweep"]
            assert "detuning" not in g and g.attrs["signal"] == "level"
            assert g["level"].attrs["units"] == "1" and meaning in g["level"].attrs["long_name"]
            np.testing.assert_allclose(g["level"][()], level, atol=1e-12)
    main = exported / "csv" / "scenario.csv"
    assert main.read_text().splitlines()[0] == "time_s,detuning_Hz,drive_V,code"
    assert _sidecar(main)["scaling"]["detuning"]["unit"] == "Hz" and "level" not in _sidecar(main)["scaling"]


def test_every_file_gives_the_time_after_the_trigger(played, exported):
    # the table's first sample plays 0.1 ms after the trigger: the csv's time column and the hdf5's time
    # field start there, the sidecar says so, and the gate opens in the file when the plan says it does
    # (chirp_start - 20 us on the trigger's axis, within one sample)
    import h5py

    delay, when = played.timing.delay, played.timing.moments
    for name in ("scenario", "scenario-gate"):
        data = np.loadtxt(exported / "csv" / f"{name}.csv", delimiter=",", skiprows=1)
        assert data[0, 0] == pytest.approx(delay, abs=1e-15)
        assert _sidecar(exported / "csv" / f"{name}.csv")["time"].startswith("t = timing.delay + index")
        with h5py.File(exported / "hdf5" / f"{name}.h5") as f:
            np.testing.assert_allclose(f["entry/sweep/time"][()], data[:, 0], rtol=0, atol=1e-15)
    gate = np.loadtxt(exported / "csv" / "scenario-gate.csv", delimiter=",", skiprows=1)
    opens = gate[np.argmax(gate[:, 1] > 0.5), 0]
    assert 0 <= opens - (when["chirp_start"] - 20e-6) < 1 / played.main.rate_choice.sample_rate


def test_compare_aligns_an_exported_table_by_its_trigger(played, exported):
    # compare puts the plan's trigger at time 0 of the trace: the main table's csv, read as a trace and
    # aligned there, follows the plan (one delay off, it was 81 MHz away during the chirp)
    import sweepgen

    result = sweepgen.compare(played.scenario, exported / "csv" / "scenario.csv", marker="trigger",
                              marker_time="0 s")
    assert result.ok and result.chirp_error_max < 1e3, result.chirp_error_max


@pytest.mark.parametrize("fmt, suffix", [("csv", "csv"), ("npy", "npy"), ("hdf5", "h5")])
def test_inspect_gives_a_level_tables_windows_not_chirp_numbers(played, exported, fmt, suffix):
    # the gate is on from chirp_start - 20 us to chirp_end + 50 us, the marker for 20 us from arrival; each
    # time after the trigger, within one sample
    import sweepgen

    when, dt = played.timing.moments, 1 / played.main.rate_choice.sample_rate
    expected = {"gate": (when["chirp_start"] - 20e-6, when["chirp_end"] + 50e-6),
                "arrival": (when["arrival"], when["arrival"] + 20e-6)}
    for name, (start, end) in expected.items():
        doc = sweepgen.inspect(exported / fmt / f"scenario-{name}.{suffix}").to_json()
        assert doc["quantity"] == "level" and doc["channel"]["name"] == name
        assert not {"start_detuning", "chirp_start", "chirp_span", "detuning_min"} & set(doc)
        assert doc["levels"] == pytest.approx([0.0, 1.0], abs=1e-3) and doc["window_count"] == 1
        window, = doc["windows"]
        assert 0 <= window["start"] - start < dt and 0 <= window["end"] - end < dt
        assert window["level"] == pytest.approx(1.0, abs=1e-3)
    text = run_cli("inspect", exported / fmt / f"scenario-gate.{suffix}").stdout
    assert "after trigger" in text and "chirp" not in text and "detuning" not in text


def test_a_gate_table_written_before_the_level_key_is_read_as_a_level(exported, tmp_path):
    # tables written before: the gate's level under scaling.detuning (in "Hz"), the sidecar's
    # channel.quantity "level"; inspect reads them as level tables, with the same windows
    import sweepgen

    new = sweepgen.inspect(exported / "npy" / "scenario-gate.npy").to_json()
    shutil.copy(exported / "npy" / "scenario-gate.npy", tmp_path / "old.npy")
    side = _sidecar(exported / "npy" / "scenario-gate.npy")
    side["data_file"] = "old.npy"
    side["scaling"]["detuning"] = {**side["scaling"].pop("level"), "unit": "Hz"}
    (tmp_path / "old.npy.json").write_text(json.dumps(side))
    old = sweepgen.inspect(tmp_path / "old.npy").to_json()
    assert old["quantity"] == "level" and old["verified"]
    assert old["windows"] == new["windows"] and old["levels"] == new["levels"]


def test_the_inspect_plot_of_a_gate_draws_its_level_after_the_trigger(played, exported):
    from sweepgen import drivers, readback
    from sweepgen.plots import table_figure

    read = drivers.read_table(exported / "npy" / "scenario-gate.npy")
    top, bottom = table_figure(read, readback.analyse(read)).axes
    assert top.get_ylabel() == "level" and bottom.get_xlabel() == "time after the trigger (ms)"
    x, y = (np.asarray(v, dtype=float) for v in top.lines[0].get_data())
    assert x[0] == pytest.approx(played.timing.delay * 1e3) and set(np.round(y, 3)) == {0.0, 1.0}
