"""``sweepgen simulate`` through the CLI: the JSON contract, the same seed giving the
same document, plots by extension, and refusals (exit 2, one line, no traceback)."""

import json

import pytest

from conftest import run_cli as run, scenario_dict

KEYS = {"atoms", "seed", "captured_fraction", "band_fraction", "final_velocity_mean", "final_velocity_spread",
        "longitudinal_temperature", "transverse_temperature", "doppler_limit", "photons_mean", "lost_fraction", "lost_by_reason", "baseline_no_light_fraction",
        "baseline_fixed_frequency_fraction", "histograms"}

FAST = {"source": {"model": "gaussian", "mean_velocity": "150 m/s", "velocity_spread": "20 m/s",
                   "pulse_time": "0 ms", "temperature": None, "divergence": "5 mrad"},
        "target": {"aperture": "10 mm"},
        "chirp": {"hold": "0 ms", "period": "100 ms"}}


@pytest.fixture
def fast(write_scenario):
    return write_scenario(scenario_dict(**FAST))


def test_json_document_and_same_seed_same_output(fast):
    first = run("simulate", fast, "--atoms", 200, "--seed", 5, "--json")
    assert first.exit_code == 0, first.stderr
    doc = json.loads(first.stdout)          # exactly one JSON document on stdout
    assert KEYS <= set(doc)
    assert doc["atoms"] == 200 and doc["seed"] == 5
    assert set(doc["lost_by_reason"]) == {"turned_back", "left_aperture", "dark_state"}
    assert 0.0 < doc["captured_fraction"] <= 1.0
    h = doc["histograms"]
    assert sum(h["initial"]) == 200 and len(h["velocity_edges"]) == len(h["initial"]) + 1
    assert "arrival_time" in h                                   # a pulsed source
    again = run("simulate", fast, "--atoms", 200, "--seed", 5, "--json")
    assert again.stdout == first.stdout
    other = run("simulate", fast, "--atoms", 200, "--seed", 6, "--json")
    assert other.stdout != first.stdout


def test_human_table(fast):
    result = run("simulate", fast, "--atoms", 150)
    assert result.exit_code == 0, result.stderr
    out = result.stdout
    assert "captured at the target" in out and "%" in out
    assert "lost: outside the aperture" in out
    assert "lost: dark states" not in out          # an atom without dark states
    assert "m/s" in out and "150 atoms, seed 0" in out


@pytest.mark.slow
@pytest.mark.parametrize("suffix, magic", [(".png", b"\x89PNG\r\n\x1a\n"), (".svg", b"<?xml")])
def test_plot_by_extension(fast, tmp_path, suffix, magic):
    target = tmp_path / f"atoms{suffix}"
    result = run("simulate", fast, "--atoms", 150, "--plot", target)
    assert result.exit_code == 0, result.stderr
    assert target.read_bytes().startswith(magic)
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []    # no temporary left


@pytest.mark.slow
def test_plot_of_a_continuous_source(write_scenario, tmp_path):
    path = write_scenario(source={"pulse_time": None}, chirp={"start_time": None})
    target = tmp_path / "c.png"
    result = run("simulate", path, "--atoms", 100, "--plot", target, "--json")
    assert result.exit_code == 0, result.stderr
    doc = json.loads(result.stdout)
    assert "arrival_time" not in doc["histograms"] and doc["arrival_time_mean"] is None
    assert target.read_bytes().startswith(b"\x89PNG")


@pytest.mark.parametrize("args, words", [
    (["--atoms", "0"], "--atoms"),
    (["--atoms", "many"], "--atoms"),
    (["--seed", "-1"], "--seed"),
    (["--plot", "atoms.pdf"], ".png or .svg"),
])
def test_bad_options_exit_2(fast, args, words):
    result = run("simulate", fast, *args)
    assert result.exit_code == 2
    assert words in result.stderr
    assert "Traceback" not in result.output


def test_bad_scenario_is_one_line_exit_2(write_scenario):
    path = write_scenario(target={"capture_velocity": "fast"})
    result = run("simulate", path, "--atoms", 10)
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "target.capture_velocity" in lines[0]
    missing = run("simulate", "no-such-scenario")
    assert missing.exit_code == 2 and "no-such-scenario" in missing.stderr



def test_ideal_and_table_together_are_refused(fast, tmp_path):
    got = run("simulate", fast, "--ideal", "--table", tmp_path / "old.csv")
    assert got.exit_code == 2 and "--ideal" in got.stderr and "Traceback" not in got.stderr


def test_without_a_laser_the_plan_is_played_and_said_so(fast):
    doc = json.loads(run("simulate", fast, "--atoms", 100, "--json").stdout)
    assert doc["played"]["detuning"] == "plan" and "names no laser" in doc["played"]["reason"]
    assert "ideal_captured_fraction" not in doc


def test_a_bad_laser_key_in_the_scenario_file_names_the_file_not_the_option(tmp_path):
    # the option --laser was not given: the empty name is the scenario's own key 'laser'
    from conftest import CHECKED_SCENARIO, merged, write_checked

    path = write_checked(tmp_path, merged(CHECKED_SCENARIO, laser=""))
    result = run("simulate", str(path), "--atoms", "100")
    assert result.exit_code == 2
    line, = result.stderr.strip().splitlines()
    assert line.startswith(f"sweepgen: error: {path}: key 'laser': ")
    given = run("simulate", str(path), "--atoms", "100", "--laser", "")
    assert given.exit_code == 2 and given.stderr.startswith("sweepgen: error: option '--laser': ")
