"""``sweepgen check``: exit codes, JSON document, human table, bad input."""

import json

import pytest

from conftest import PIEZO_LASER, VOLTAGE_BOARD, merged, run_cli, write_checked


def invoke(*args):
    return run_cli("check", *args)


def test_compliant_profiles_exit_zero(tmp_path):
    res = invoke(write_checked(tmp_path))
    assert res.exit_code == 0, res.output
    assert "ok: 0 failed" in res.stdout


def test_json_document(tmp_path):
    res = invoke(write_checked(tmp_path), "--json")
    assert res.exit_code == 0
    doc = json.loads(res.stdout)                   # exactly one JSON document on stdout
    assert doc["ok"] is True and doc["findings"]
    for f in doc["findings"]:
        assert {"rule", "status", "value", "limit", "unit", "message"} <= set(f)
        assert f["status"] in ("pass", "warn", "fail")
    assert doc["playback"]["sample_rate"] > 0


def test_violated_limit_exits_one_and_lists_failures_first(tmp_path):
    laser = merged(PIEZO_LASER, limits={"input_max": "2 V", "max_slew": "10 V/ms"})
    res = invoke(write_checked(tmp_path, laser=laser))
    assert res.exit_code == 1
    lines = res.stdout.splitlines()
    table = [ln for ln in lines if ln.startswith(("FAIL", "warn", "ok "))]
    assert table[0].startswith("FAIL") and table[1].startswith("FAIL")
    assert "actuator_range" in res.stdout and "slew_rate" in res.stdout
    assert "to fix actuator_range:" in res.stdout and "NOT PLAYABLE" in res.stdout
    doc = json.loads(invoke(write_checked(tmp_path, laser=laser), "--json").stdout)
    failed = {f["rule"]: f for f in doc["findings"] if f["status"] == "fail"}
    assert set(failed) == {"actuator_range", "slew_rate"} and doc["ok"] is False
    assert failed["actuator_range"]["limit"] == 2.0 and failed["actuator_range"]["value"] == pytest.approx(2.8955,
                                                                                                           abs=1e-4)


@pytest.mark.parametrize("laser, key", [
    (merged(PIEZO_LASER, response={"corner": "200 kg"}), "response.corner"),
    (merged(PIEZO_LASER, limits={"colour": "red"}), "limits.colour"),
    (merged(PIEZO_LASER, chain=[{"stage": "analog", "set_point": "-140 MHz"}]), "chain[0].coefficient"),
])
def test_bad_laser_profile_exits_two_with_one_line(tmp_path, laser, key):
    res = invoke(write_checked(tmp_path, laser=laser))
    assert res.exit_code == 2
    err = res.stderr.strip()
    assert len(err.splitlines()) == 1 and "laser.toml" in err and f"key '{key}'" in err
    assert "Traceback" not in res.output and res.stdout == ""


@pytest.mark.parametrize("gen, key", [
    (merged(VOLTAGE_BOARD, output={"dac_bits": 1}), "output.dac_bits"),
    (merged(VOLTAGE_BOARD, sampling={"memory": "lots"}), "sampling.memory"),
    (merged(VOLTAGE_BOARD, output={"load": "-50 ohm"}), "output.load"),
    (merged(VOLTAGE_BOARD, output={"bandwidth": "1 MHz"}), "output.bandwidth"),
])
def test_bad_generator_profile_exits_two_with_one_line(tmp_path, gen, key):
    res = invoke(write_checked(tmp_path, gen=gen))
    assert res.exit_code == 2
    err = res.stderr.strip()
    assert len(err.splitlines()) == 1 and "gen.toml" in err and f"key '{key}'" in err


def test_bad_rate_option_and_missing_scenario(tmp_path):
    res = invoke(write_checked(tmp_path), "--rate", "10 MHz/s")
    assert res.exit_code == 2 and "--rate" in res.stderr
    res = invoke(str(tmp_path / "nope.toml"))
    assert res.exit_code == 2


@pytest.mark.slow
def test_rate_option_and_plot(tmp_path):
    plot = tmp_path / "margins.png"
    res = invoke(write_checked(tmp_path), "--rate", "100 kSa/s", "--plot", str(plot))
    assert res.exit_code == 1 and "step_per_sample" in res.stdout
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_laser_override_and_all(tmp_path):
    path = write_checked(tmp_path)
    res = invoke(path, "--laser", "demo-offset-dds", "--all")
    assert res.exit_code == 1 and "output_kind" in res.stdout
    res = invoke(path, "--all")
    assert res.exit_code == 0 and "tracking" in res.stdout and "mode_hop_free" in res.stdout


@pytest.mark.parametrize("key", ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"])
def test_shipped_scenarios_check_ok(key):
    res = invoke(key, "--json")
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["ok"] is True
