"""``sweepgen upload``: the whole path from a scenario to a verified upload, over real sockets."""

from __future__ import annotations

import json

import pytest

from sweepgen.emulators.instrument import Faults
from sweepgen.testing import instrument_server, virtual_board

from conftest import OTHER_DIALECT, OTHER_IDENTITY, refused_port, run_cli, to_toml

SCENARIO = "rb87-chopped-oven"          # built in: pulsed source, virtual-awg, 160000 samples at 8 MSa/s


def run(*args):
    return run_cli("upload", *args)


def test_dry_run_prints_the_command_log_and_connects_to_nothing():
    with refused_port() as port:
        result = run(SCENARIO, "--dry-run", "--resource", f"TCPIP::127.0.0.1::{port}::SOCKET")
    assert result.exit_code == 0, result.output
    out = result.stdout
    assert "TRAC:DATA SWEEP,#6320000<320000 bytes of data>" in out
    assert "320025" in out                                  # 16 + 8 header + 320000 + newline
    assert "OUTP1:STAT OFF" in out and "OUTP1:STAT ON" not in out
    assert "TRIG:SOUR EXT" in out                           # a pulsed source triggers the sweep
    assert "dry run: nothing was sent" in out


def test_dry_run_json_is_one_document():
    result = run(SCENARIO, "--dry-run", "--arm", "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert doc["dry_run"] is True and doc["driver"] == "visa" and doc["generator"] == "virtual-awg"
    assert [e["command"] for e in doc["log"][-3:]] == ["OUTP1:STAT ON", "SYST:ERR?", "OUTP1:STAT?"]
    assert doc["bytes"] == sum(e["bytes"] for e in doc["log"])
    assert "CAUTION" not in result.stderr                  # nothing is switched on in a dry run


def test_upload_json_reports_steps_bytes_duration_verification():
    with instrument_server("virtual-awg") as server:
        result = run(SCENARIO, "--resource", server.resource, "--json")
        assert result.exit_code == 0, result.output
        doc = json.loads(result.stdout)
        trace = server.instrument.traces["SWEEP"]
        assert len(trace.values) == 160000
        assert server.instrument.outputs_on == [] and not server.instrument.ever_armed
    assert doc["verification"]["ok"] is True and doc["verification"]["method"] == "readback"
    assert doc["block_bytes"] == 320000 and doc["bytes"] > 320000 and doc["duration"] > 0
    assert [s["step"] for s in doc["steps"]][:6] == ["identify", "output_off", "clear", "output_off", "format", "upload"]
    assert doc["armed"] is False
    assert "CAUTION" not in result.stderr


def test_arm_prints_the_caution_then_switches_on():
    with instrument_server("virtual-awg") as server:
        result = run(SCENARIO, "--resource", server.resource, "--arm")
        assert result.exit_code == 0, result.output
        assert server.instrument.outputs_on == [1]
    err = result.stderr
    assert "Laser radiation" in err and "eyewear" in err.lower()
    assert "piezo" in err and "high-voltage" in err
    assert "scope and a wavemeter" in err
    assert "output: ON" in result.stdout
    assert "  output 1: ON (read back: OUTP1:STAT? answered 1)" in result.stdout
    assert "verified by readback" in result.stdout


def test_arm_json_reports_the_outputs_state_after_switching_it_on():
    with instrument_server("virtual-awg") as server:
        result = run(SCENARIO, "--resource", server.resource, "--arm", "--json")
        assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert doc["output_state"] == {"output": 1, "state": "on", "query": "OUTP1:STAT?", "reply": "1"}


# A dropped connection is charged to the upload even when the socket buffers took the whole
# block before the instrument hung up (the driver watches the socket itself).
@pytest.mark.parametrize("faults, steps", [
    (Faults(error_after_upload=True), ["upload"]),
    (Faults(corrupt_readback=True), ["verify"]),
    (Faults(drop_after=100000), ["upload"]),
])
def test_faults_exit_1_name_the_step_and_leave_the_output_off(faults, steps):
    with instrument_server("virtual-awg", faults=faults) as server:
        result = run(SCENARIO, "--resource", server.resource, "--arm", "--json")
        assert result.exit_code == 1
        assert server.instrument.outputs_on == [] and not server.instrument.ever_armed
    error = json.loads(result.stdout)["error"]          # --json: one document, the error's
    assert error["exit_code"] == 1 and any(f"step '{step}'" in error["message"] for step in steps)
    assert any(f"step '{step}'" in result.stderr for step in steps)
    assert "output switched off" in result.stderr
    assert "Traceback" not in result.output


@pytest.mark.slow
def test_silent_instrument_times_out_with_the_profile_timeout(tmp_path):
    profile = tmp_path / "quick.toml"
    data = {**OTHER_DIALECT, "link": {**OTHER_DIALECT["link"], "timeout": "0.2 s"}}
    profile.write_text(to_toml(data), encoding="utf-8")
    with instrument_server(str(profile), faults=Faults(mute=True), identity=OTHER_IDENTITY) as server:
        result = run(SCENARIO, "--generator", str(profile), "--resource", server.resource, "--arm")
        assert server.instrument.outputs_on == []
    assert result.exit_code == 1
    assert "step 'identify': no answer within 0.2 s" in result.stderr


def test_other_dialect_profile_outside_the_repo_uploads_and_verifies(tmp_path):
    profile = tmp_path / "lab" / "other-awg.toml"
    profile.parent.mkdir()
    profile.write_text(to_toml(OTHER_DIALECT), encoding="utf-8")
    with instrument_server(str(profile), identity=OTHER_IDENTITY) as server:
        result = run(SCENARIO, "--generator", str(profile), "--resource", server.resource, "--json", "--arm")
        assert result.exit_code == 0, result.output
        assert server.instrument.outputs_on == [1]
        assert "CHIRP_A" in server.instrument.traces and server.instrument.border == "NORM"
    doc = json.loads(result.stdout)
    assert doc["verification"]["method"] == "checksum" and doc["verification"]["ok"] is True
    assert doc["generator"] == "other-awg"


def test_failed_check_sends_nothing(tmp_path):
    profile = tmp_path / "tiny.toml"
    tiny = {**OTHER_DIALECT, "sampling": {"rate_min": "40 MSa/s", "rate_max": "50 MSa/s", "memory": 4096}}
    profile.write_text(to_toml(tiny), encoding="utf-8")
    with instrument_server(str(profile)) as server:
        result = run(SCENARIO, "--generator", str(profile), "--resource", server.resource)
        assert server.clients == 0
    assert result.exit_code == 1
    assert "nothing is written or sent" in result.stderr


@pytest.mark.parametrize("args, key", [
    (["--resource", "TCPIP::127.0.0.1::1::SOCKET", "--serial-port", "socket://127.0.0.1:1"], "--serial-port"),
    (["--serial-port", "socket://127.0.0.1:1"], "--serial-port"),             # virtual-awg is not a board
])
def test_contradictory_destinations_are_usage_errors(args, key):
    result = run(SCENARIO, *args)
    assert result.exit_code == 2
    assert key in result.stderr


@pytest.mark.parametrize("scenario, option, address, words", [
    (SCENARIO, "--resource", "TCPIP::127.0.0.1::99999::SOCKET",
     "port '99999' in 'TCPIP::127.0.0.1::99999::SOCKET' is not a TCP port (1 to 65535)"),
    (SCENARIO, "--resource", "garbage", "not a VISA resource string: 'garbage'"),
    (SCENARIO, "--resource", "", "expected an address, got an empty one"),       # not the profile's instead
    (SCENARIO, "--resource", "   ", "expected an address, got an empty one"),
    ("caf-buffer-gas", "--serial-port", "socket://127.0.0.1:99999",
     "expected socket://HOST:PORT with a TCP port from 1 to 65535"),
    ("caf-buffer-gas", "--serial-port", "socket://127.0.0.1:port",
     "expected socket://HOST:PORT with a TCP port from 1 to 65535"),
    ("caf-buffer-gas", "--serial-port", "socket://:7450", "expected socket://HOST:PORT"),
    ("caf-buffer-gas", "--serial-port", "nosuchscheme://x", "not a serial device or pyserial URL"),
    ("caf-buffer-gas", "--serial-port", "socket://127.0.0.1:7450?logging=banana",
     "option logging='banana' after '?' is not one a socket:// URL takes"),
    ("caf-buffer-gas", "--serial-port", "socket://127.0.0.1:7450?speed=fast",
     "option speed='fast' after '?' is not one a socket:// URL takes"),
    ("caf-buffer-gas", "--serial-port", "", "expected an address, got an empty one"),
])
def test_an_address_that_cannot_name_an_instrument_is_refused_before_connecting(scenario, option, address, words):
    result = run(scenario, option, address)
    assert result.exit_code == 2
    line = result.stderr.strip()
    assert "\n" not in line and line.startswith("sweepgen: error:")
    assert f"option '{option}'" in line and words in line           # an option is named as an option
    assert "debug|info" not in line                    # not pyserial's list of logging levels


def test_unknown_backend_is_a_usage_error():
    with instrument_server("virtual-awg") as server:
        result = run(SCENARIO, "--resource", server.resource, "--backend", "@nonexistent")
    assert result.exit_code == 2 and "--backend" in result.stderr


@pytest.mark.slow
def test_board_generator_goes_to_the_serial_driver():
    with virtual_board("demo-ramp-board") as url:
        result = run("caf-buffer-gas", "--serial-port", url, "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert doc["driver"] == "serial" and doc["armed"] is False
    assert doc["verification"]["ok"] is True and url.board.committed.crc == doc["table"]["crc32"]
    assert not url.board.armed


@pytest.mark.parametrize("scenario, profile, line, address, key", [
    ("rb87-chopped-oven", "virtual-awg", 'resource = "TCPIP::127.0.0.1::5025::SOCKET"',
     "TCPIP::127.0.0.1::99999::SOCKET", "link.resource"),
    ("rb87-chopped-oven", "virtual-awg", 'resource = "TCPIP::127.0.0.1::5025::SOCKET"', "garbage", "link.resource"),
    ("rb87-chopped-oven", "virtual-awg", 'resource = "TCPIP::127.0.0.1::5025::SOCKET"', "", "link.resource"),
    ("caf-buffer-gas", "demo-ramp-board", 'port = "socket://127.0.0.1:7450"', "socket://127.0.0.1:99999", "link.port"),
    ("caf-buffer-gas", "demo-ramp-board", 'port = "socket://127.0.0.1:7450"', "socket://127.0.0.1:abc", "link.port"),
    ("caf-buffer-gas", "demo-ramp-board", 'port = "socket://127.0.0.1:7450"', "", "link.port"),
])
def test_a_profile_address_that_cannot_name_an_instrument_names_the_profile_and_its_key(
        tmp_path, scenario, profile, line, address, key):
    # no option was given: the address is the profile's, so the refusal names its file and key, not an option
    from sweepgen import catalog

    text = catalog.resolve("generators", profile).read_text()
    assert line in text
    gen = tmp_path / "gen.toml"
    gen.write_text(text.replace(line, line.split(" = ")[0] + f' = "{address}"'))
    sc = tmp_path / "scenario.toml"
    sc.write_text(catalog.resolve("scenarios", scenario).read_text().replace(f'generator = "{profile}"',
                                                                           'generator = "gen.toml"'))
    result = run(sc)
    assert result.exit_code == 2
    line_out, = result.stderr.strip().splitlines()
    assert line_out.startswith(f"sweepgen: error: {gen}: key '{key}': ")
