"""``sweepgen check``: exit codes, JSON document, human table, bad input."""

import json

import pytest
from click.testing import CliRunner

from sweepgen.cli import main

SCENARIO = """title = "cli test: continuous Rb beam"
species = "rb87-d2"
laser = "laser.toml"
generator = "gen.toml"
[source]
model = "effusive"
temperature = "390 K"
[light]
saturation = 3.0
start = "0.05 m"
[target]
distance = "1.0 m"
capture_velocity = "20 m/s"
[chirp]
start_velocity = "200 m/s"
end_velocity = "15 m/s"
margin = 0.6
hold = "0.2 ms"
return_time = "0.5 ms"
period = "6 ms"
"""
LASER = """title = "cli test laser"
[limits]
mode_hop_free = "1 GHz"
max_chirp_rate = "3 GHz/ms"
input_min = "-10 V"
input_max = "10 V"
max_slew = "100 V/ms"
[response]
model = "first-order"
corner = "200 kHz"
[[chain]]
stage = "analog"
coefficient = "40 MHz/V"
set_point = "-140 MHz"
"""
GEN = """title = "cli test generator"
kind = "board"
[sampling]
rate_min = "1 kSa/s"
rate_max = "20 MSa/s"
memory = 1048576
granularity = 8
[output]
kind = "voltage"
range_min = "-10 V"
range_max = "10 V"
dac_bits = 14
termination = "high-z"
load = "high-z"
[link]
kind = "serial"
port = "loop://"
throughput = "1 MB/s"
"""


def write(tmp_path, scenario=SCENARIO, laser=LASER, gen=GEN):
    (tmp_path / "laser.toml").write_text(laser)
    (tmp_path / "gen.toml").write_text(gen)
    path = tmp_path / "scenario.toml"
    path.write_text(scenario)
    return str(path)


def invoke(*args):
    return CliRunner().invoke(main, ["check", *args])


def test_compliant_profiles_exit_zero(tmp_path):
    res = invoke(write(tmp_path))
    assert res.exit_code == 0, res.output
    assert "ok: 0 failed" in res.stdout


def test_json_document(tmp_path):
    res = invoke(write(tmp_path), "--json")
    assert res.exit_code == 0
    doc = json.loads(res.stdout)                   # exactly one JSON document on stdout
    assert doc["ok"] is True and doc["findings"]
    for f in doc["findings"]:
        assert {"rule", "status", "value", "limit", "unit", "message"} <= set(f)
        assert f["status"] in ("pass", "warn", "fail")
    assert doc["playback"]["sample_rate"] > 0


def test_violated_limit_exits_one_and_lists_failures_first(tmp_path):
    laser = LASER.replace('input_max = "10 V"', 'input_max = "2 V"').replace('max_slew = "100 V/ms"',
                                                                             'max_slew = "10 V/ms"')
    res = invoke(write(tmp_path, laser=laser))
    assert res.exit_code == 1
    lines = res.stdout.splitlines()
    table = [ln for ln in lines if ln.startswith(("FAIL", "warn", "ok "))]
    assert table[0].startswith("FAIL") and table[1].startswith("FAIL")
    assert "actuator_range" in res.stdout and "slew_rate" in res.stdout
    assert "to fix actuator_range:" in res.stdout and "NOT PLAYABLE" in res.stdout
    doc = json.loads(invoke(write(tmp_path, laser=laser), "--json").stdout)
    failed = {f["rule"]: f for f in doc["findings"] if f["status"] == "fail"}
    assert set(failed) == {"actuator_range", "slew_rate"} and doc["ok"] is False
    assert failed["actuator_range"]["limit"] == 2.0 and failed["actuator_range"]["value"] == pytest.approx(2.8955,
                                                                                                           abs=1e-4)


@pytest.mark.parametrize("laser, key", [
    (LASER.replace('corner = "200 kHz"', 'corner = "200 kg"'), "response.corner"),
    (LASER.replace('[limits]', '[limits]\ncolour = "red"'), "limits.colour"),
    (LASER.replace('coefficient = "40 MHz/V"\n', ''), "chain[0].coefficient"),
])
def test_bad_laser_profile_exits_two_with_one_line(tmp_path, laser, key):
    res = invoke(write(tmp_path, laser=laser))
    assert res.exit_code == 2
    err = res.stderr.strip()
    assert len(err.splitlines()) == 1 and "laser.toml" in err and f"key '{key}'" in err
    assert "Traceback" not in res.output and res.stdout == ""


@pytest.mark.parametrize("gen, key", [
    (GEN.replace('dac_bits = 14', 'dac_bits = 1'), "output.dac_bits"),
    (GEN.replace('memory = 1048576', 'memory = "lots"'), "sampling.memory"),
    (GEN.replace('load = "high-z"', 'load = "-50 ohm"'), "output.load"),
    (GEN.replace('[output]', '[output]\nbandwidth = "1 MHz"'), "output.bandwidth"),
])
def test_bad_generator_profile_exits_two_with_one_line(tmp_path, gen, key):
    res = invoke(write(tmp_path, gen=gen))
    assert res.exit_code == 2
    err = res.stderr.strip()
    assert len(err.splitlines()) == 1 and "gen.toml" in err and f"key '{key}'" in err


def test_bad_rate_option_and_missing_scenario(tmp_path):
    res = invoke(write(tmp_path), "--rate", "10 MHz/s")
    assert res.exit_code == 2 and "--rate" in res.stderr
    res = invoke(str(tmp_path / "nope.toml"))
    assert res.exit_code == 2


@pytest.mark.slow
def test_rate_option_and_plot(tmp_path):
    plot = tmp_path / "margins.png"
    res = invoke(write(tmp_path), "--rate", "100 kSa/s", "--plot", str(plot))
    assert res.exit_code == 1 and "step_per_sample" in res.stdout
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_laser_override_and_all(tmp_path):
    path = write(tmp_path)
    res = invoke(path, "--laser", "demo-offset-dds", "--all")
    assert res.exit_code == 1 and "output_kind" in res.stdout
    res = invoke(path, "--all")
    assert res.exit_code == 0 and "tracking" in res.stdout and "mode_hop_free" in res.stdout


@pytest.mark.parametrize("key", ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"])
def test_shipped_scenarios_check_ok(key):
    res = invoke(key, "--json")
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["ok"] is True
