"""``sweepgen upload SCENARIO --serial-port URL`` against the board emulator on a loopback socket."""

from __future__ import annotations

import json

import numpy as np
import pytest

from sweepgen.playback import prepare
from sweepgen.testing import virtual_board

from conftest import refused_port, run_cli as run

SCENARIO = "caf-buffer-gas"          # offset-locked laser set by a DDS on the demo ramp board


@pytest.fixture(scope="module")
def rendered():
    """The table the upload command renders for the scenario (same pipeline, run here)."""
    pb = prepare(SCENARIO)
    return pb.table(), pb.generator


@pytest.mark.slow
def test_upload_commits_the_rendered_table_and_leaves_the_output_off(rendered):
    table, gen = rendered
    with virtual_board(gen) as url:
        result = run("upload", SCENARIO, "--serial-port", url, "--json")
        assert result.exit_code == 0, result.stderr
        committed = url.board.committed
        assert not url.board.armed
    doc = json.loads(result.stdout)
    assert doc["driver"] == "serial" and doc["destination"] == url and doc["armed"] is False
    assert doc["verification"]["ok"] is True and doc["verification"]["instrument_crc32"] == table.crc32
    codes = table.codes()
    assert np.array_equal(committed.codes(), codes)
    assert committed.count == table.info.count and committed.rate == round(table.info.sample_rate)
    # every committed word is a frequency the board can play: f = W f_clock / 2^N (DDS, common practice)
    f = committed.codes().astype(float) * gen.output.clock / 2.0**gen.output.word_bits
    assert gen.output.range_min <= f.min() and f.max() <= gen.output.range_max
    # and the words reproduce the planned drive frequency to within one tuning-word step
    drive = np.concatenate([fr.drive for fr in table.frames()])
    assert np.max(np.abs(f - drive)) <= gen.output.clock / 2.0**gen.output.word_bits


@pytest.mark.slow
def test_upload_with_arm_prints_the_caution_and_arms(rendered):
    _, gen = rendered
    with virtual_board(gen) as url:
        result = run("upload", SCENARIO, "--serial-port", url, "--arm")
        assert result.exit_code == 0, result.stderr
        assert url.board.armed
    assert "CAUTION" in result.stderr and "eyewear" in result.stderr
    assert "output: ON" in result.stdout and "verify" in result.stdout


@pytest.mark.slow
def test_the_checkers_warnings_come_before_the_instrument_is_touched(rendered):
    """The scenario's end velocity (10 m/s) lies within 20 % of the target's capture velocity (12 m/s):
    the checker warns, and upload says so on stderr before the caution and the upload, in the JSON,
    and in a dry run."""
    _, gen = rendered
    with virtual_board(gen) as url:
        armed = run("upload", SCENARIO, "--serial-port", url, "--arm")
        assert armed.exit_code == 0, armed.stderr
        as_json = run("upload", SCENARIO, "--serial-port", url, "--json")
    warning = "warning: end_velocity: atoms leave the chirp at 10 m/s"
    assert warning in armed.stderr and armed.stderr.index(warning) < armed.stderr.index("CAUTION")
    doc = json.loads(as_json.stdout)
    assert "end_velocity" in [w["rule"] for w in doc["warnings"]] and warning in as_json.stderr
    assert {w["status"] for w in doc["warnings"]} == {"warn"}
    assert len(doc["warnings"]) == as_json.stderr.count("warning: ")       # each one, once
    dry = run("upload", SCENARIO, "--dry-run")
    assert dry.exit_code == 0 and warning in dry.stderr
    dry_json = json.loads(run("upload", SCENARIO, "--dry-run", "--json").stdout)
    assert dry_json["warnings"] == doc["warnings"]


@pytest.mark.slow
def test_transient_fault_is_retried_through_the_cli(rendered):
    table, gen = rendered
    with virtual_board(gen, faults={"corrupt": 2, "corrupt_memory": 1}) as url:
        result = run("upload", SCENARIO, "--serial-port", url, "--json")
        assert result.exit_code == 0, result.stderr
        assert url.board.committed.crc == table.crc32 and url.board.commits == 1
    doc = json.loads(result.stdout)
    assert doc["retries"] >= 2 and doc["restarts"] == 1


@pytest.mark.slow
def test_persistent_fault_exits_1_with_one_clear_line_and_commits_nothing(rendered):
    _, gen = rendered
    with virtual_board(gen, faults={"refuse": "always"}) as url:
        result = run("upload", SCENARIO, "--serial-port", url, "--arm")
        assert url.board.committed is None and not url.board.armed
    assert result.exit_code == 1
    lines = result.stderr.strip().splitlines()
    assert lines[-1].startswith("sweepgen: error: step 'data at byte 4096': refused with BUSY after 6 attempts")
    assert "busy" in lines[-1] and "Traceback" not in result.stderr
    assert "output: ON" not in result.stdout


def test_no_board_at_the_port_exits_1_naming_the_open_step():
    with refused_port() as port:
        result = run("upload", SCENARIO, "--serial-port", f"socket://127.0.0.1:{port}")
    assert result.exit_code == 1
    assert result.stderr.strip().splitlines()[-1].startswith("sweepgen: error: step 'open': cannot open")


def test_dry_run_prints_the_frame_log_without_connecting(rendered):
    table, gen = rendered
    with virtual_board(gen) as url:
        result = run("upload", SCENARIO, "--serial-port", url, "--dry-run", "--json")
        assert url.server.connections == 0
    assert result.exit_code == 0, result.stderr
    doc = json.loads(result.stdout)
    assert [e["message"] for e in doc["log"] if e["kind"] != "record"][:5] == ["HELLO", "DISARM", "TRIGGER", "BEGIN",
                                                                                 "DATA"]
    assert doc["log"][0]["kind"] == "record" and doc["table_sha256"] == table.sha256
    assert doc["table"]["crc32"] == table.crc32
