"""``sweepgen upload`` of a scenario with several lights to a version-2 ramp board, through the CLI.

The scenario: the built-in Rb-87 chopped-oven sweep (a pulsed source) with a repump that follows
it through its own tuning chain (an AOM driven by a VCO) and a gate that switches both lights off
after the chirp, on an invented three-channel DAC board (tests/data/three-channel-dac-board.toml)
served by the board emulator on a loopback socket.
"""

from __future__ import annotations

import json
import shutil
import tomllib
from pathlib import Path

import numpy as np
import pytest

from sweepgen import catalog
from sweepgen.playback import prepare
from sweepgen.testing import virtual_board

from conftest import run_cli as run, to_toml

BOARD = Path(__file__).parent / "data" / "three-channel-dac-board.toml"


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    folder = tmp_path_factory.mktemp("board-channels")
    shutil.copy(BOARD, folder / "board.toml")
    data = tomllib.loads(catalog.resolve("scenarios", "rb87-chopped-oven").read_text())
    data["generator"] = "./board.toml"
    data["channels"] = {
        "repump": {"kind": "frequency", "role": "repump", "saturation": 1.0, "offset": "0 MHz",
                   "laser": "demo-aom-vco", "output": 2},
        "gate": {"kind": "gate", "on": "chirp_start", "on_shift": "-20 us", "off": "chirp_end",
                 "off_shift": "50 us", "dark": "0 V", "bright": "1 V", "lights": ["main", "repump"], "output": 3}}
    data["timing"] = {"delay": "0.1 ms", "edge": "rising"}
    path = folder / "scenario.toml"
    path.write_text(to_toml(data), encoding="utf-8")
    pb = prepare(path)
    assert pb.ok and [c.output for c in pb.channels.values()] == [1, 2, 3]
    return path, pb


def _committed_matches(board, pb):
    """Every channel's committed table is the rendered one: same codes, same CRC-32 (zlib's)."""
    for name in pb.channels:
        table = pb.table(name)
        held = board.tables[table.info.channel]
        assert held.crc == table.crc32 and np.array_equal(held.codes(), table.codes()), name
        assert held.rate == table.info.sample_rate


@pytest.mark.slow
def test_every_channel_is_uploaded_verified_and_the_outputs_stay_off(scenario):
    path, pb = scenario
    lines = []
    with virtual_board(pb.generator, log=lines.append) as url:
        result = run("upload", path, "--serial-port", url, "--json")
        assert result.exit_code == 0, result.stderr
        board = url.board
        _committed_matches(board, pb)
        assert not board.armed
        # the pulsed source's trigger: the external input's rising edge, the table 0.1 ms after it
        assert (board.trigger.source, board.trigger.edge, board.trigger.delay) == (1, 0, 100_000)
    doc = json.loads(result.stdout)
    assert doc["armed"] is False and doc["verification"]["ok"] and doc["verification"]["committed"]
    assert [c["output"] for c in doc["channels"]] == [1, 2, 3] and doc["protocol"] == 2
    assert [t["channel"] for t in doc["tables"]] == [1, 2, 3]
    commits = [line for line in lines if line.startswith("board: commit")]
    assert len(commits) == 3 and not any(line.startswith("board: arm") for line in lines)


@pytest.mark.slow
def test_with_arm_the_board_plays_every_channel_on_its_trigger(scenario):
    path, pb = scenario
    with virtual_board(pb.generator) as url:
        result = run("upload", path, "--serial-port", url, "--arm")
        assert result.exit_code == 0, result.stderr
        assert url.board.armed
        _committed_matches(url.board, pb)
        arms = [e for e in url.board.events if e[0] == "arm"]
    assert arms == [("arm", {"channels": "1,2,3", "trigger": "external, rising edge, on every trigger, "
                                                             "start delay 100000 ns"})]


@pytest.mark.slow
@pytest.mark.parametrize("board_options, reason", [
    ({"sources": ("free",)}, "cannot start on an external trigger (it offers: free-running)"),
    ({"version": 1}, "it speaks protocol version 1, which has no trigger"),
])
def test_a_pulsed_scenario_on_a_board_that_cannot_trigger_is_refused(scenario, board_options, reason):
    path, pb = scenario
    with virtual_board(pb.generator, **board_options) as url:
        result = run("upload", path, "--serial-port", url, "--arm")
        events = [e[0] for e in url.board.events]
        assert not url.board.armed and not url.board.tables
    assert result.exit_code == 1 and "Traceback" not in result.stderr
    (error,) = [line for line in result.stderr.splitlines() if line.startswith("sweepgen: error:")]
    assert "step 'hello'" in error and reason in error and "nothing was uploaded or armed" in error
    assert error.endswith("the board's outputs (channels 1, 2 and 3) were switched off"), error
    assert "begin" not in events and "arm" not in events
