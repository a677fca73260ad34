"""The lab commands end to end: calibrate, inspect, check/simulate --table, compare (demo data,
invented numbers), with their exit codes and JSON documents."""

import json

import numpy as np
import pytest
from click.testing import CliRunner

from sweepgen.cli import main
from sweepgen.planner import plan
from sweepgen.scenario import load_scenario

SCENARIO = "rb87-chopped-oven"


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def piezo(u):
    return -180e6 + 41e6 * u + 0.6e6 * u ** 2          # a little off the profile's 40 MHz/V (invented)


@pytest.fixture()
def measurement(tmp_path):
    rng = np.random.default_rng(8)
    u = np.concatenate([np.linspace(-5, 5, 300), np.linspace(5, -5, 300)])
    x = piezo(u) + rng.normal(0, 0.2e6, u.size)
    path = tmp_path / "piezo.csv"
    path.write_text("drive (V),detuning (MHz)\n" + "".join(f"{a:.6f},{b / 1e6:.6f}\n" for a, b in zip(u, x)))
    return path


@pytest.fixture()
def exported(tmp_path):
    result = run("export", SCENARIO, "-f", "raw", "-o", tmp_path / "tables", "--name", "old", "--json")
    assert result.exit_code == 0, result.output
    return tmp_path / "tables" / "old.bin", json.loads(result.stdout)


def test_calibrate_writes_a_profile_that_checks(tmp_path, measurement):
    out = tmp_path / "laser-new.toml"
    result = run("calibrate", measurement, "--laser", "demo-ecdl-piezo", "--stage", "analog", "-o", out, "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert doc["residual_of"] == "optical detuning"
    assert doc["residual_rms"] == pytest.approx(0.2e6, rel=0.2)     # Hz: the generating noise
    assert doc["hysteresis"] is not None and doc["degree"] == 2
    assert (tmp_path / "laser-new.png").stat().st_size > 0
    again = run("calibrate", measurement, "--laser", "demo-ecdl-piezo", "--stage", "analog", "-o", out)
    assert again.exit_code == 2 and "exists" in again.stderr and again.stderr.count("\n") == 1
    checked = run("check", SCENARIO, "--laser", out, "--json")
    assert checked.exit_code == 0, checked.output
    assert any(f["rule"] == "stage_range" for f in json.loads(checked.stdout)["findings"])


def test_calibrate_refuses_with_exit_2(tmp_path):
    u = np.linspace(0, 5, 100)
    bad = tmp_path / "bad.csv"
    bad.write_text("drive (s),detuning (MHz)\n" + "".join(f"{a},{a * 40}\n" for a in u))
    result = run("calibrate", bad, "--laser", "demo-ecdl-piezo", "--stage", "1", "-o", tmp_path / "x.toml")
    assert result.exit_code == 2 and "wrong unit" in result.stderr
    bump = tmp_path / "bump.csv"
    bump.write_text("drive (V),detuning (MHz)\n" + "".join(f"{a},{40 * a - 80 * np.exp(-(a - 2.5) ** 2 / 0.1)}\n"
                                                           for a in u))
    result = run("calibrate", bump, "--laser", "demo-ecdl-piezo", "--stage", "1", "-o", tmp_path / "x.toml")
    assert result.exit_code == 2 and "not monotone" in result.stderr
    assert not (tmp_path / "x.toml").exists()


def test_a_bad_plot_file_is_refused_before_any_work(tmp_path, measurement, exported):
    # calibrate, inspect and compare check --plot when they parse it (as plan, check and simulate do): a
    # calibration refused for its plot's extension writes no profile
    out = tmp_path / "laser-new.toml"
    result = run("calibrate", measurement, "--laser", "demo-ecdl-piezo", "--stage", "analog", "-o", out,
                 "--plot", tmp_path / "fit.pdf")
    assert result.exit_code == 2 and "'--plot'" in result.stderr and ".png or .svg" in result.stderr
    assert not out.exists() and not (tmp_path / "fit.pdf").exists()
    path, _ = exported
    result = run("inspect", path, "--plot", tmp_path / "no" / "drive.png")
    assert result.exit_code == 2 and "'--plot'" in result.stderr and "does not exist" in result.stderr
    result = run("compare", SCENARIO, measurement, "--plot", tmp_path / "c.jpg")
    assert result.exit_code == 2 and "'--plot'" in result.stderr and ".png or .svg" in result.stderr
    assert "Traceback" not in result.output


def test_inspect_reports_and_verifies(exported):
    path, written = exported
    result = run("inspect", path, "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    p = plan(load_scenario(SCENARIO))
    assert doc["verified"] and doc["table_sha256"] == written["table_sha256"]
    assert doc["start_detuning"] == pytest.approx(p.start_detuning, abs=doc["detuning_step"])
    assert doc["chirp_rate_max"] == pytest.approx(p.chirp_rate_max, rel=0.01)
    human = run("inspect", path)
    assert "verified" in human.stdout and "largest chirp rate" in human.stdout
    data = bytearray(path.read_bytes())
    data[-1] ^= 0x40
    path.write_bytes(bytes(data))
    damaged = run("inspect", path)
    assert damaged.exit_code == 1 and "NOT VERIFIED" in damaged.stdout


@pytest.mark.slow
def test_check_and_simulate_an_old_table(tmp_path, exported, measurement):
    path, _ = exported
    ok = run("check", SCENARIO, "--table", path, "--json")
    assert ok.exit_code == 0, ok.output
    rules = {f["rule"]: f for f in json.loads(ok.stdout)["findings"]}
    assert rules["table_integrity"]["status"] == "pass" and rules["table_match"]["status"] == "pass"
    assert "the table" in json.loads(ok.stdout)["playback"]["sample_rate_limited_by"]
    # today's laser is calibrated anew (41 MHz/V instead of 40): the old table no longer follows the plan
    new = tmp_path / "new.toml"
    assert run("calibrate", measurement, "--laser", "demo-ecdl-piezo", "--stage", "1", "-o", new).exit_code == 0
    moved = run("check", SCENARIO, "--table", path, "--laser", new, "--json")
    assert moved.exit_code == 1
    assert {f["rule"]: f for f in json.loads(moved.stdout)["findings"]}["table_match"]["status"] == "fail"
    assert run("check", SCENARIO, "--table", path, "--rate", "8 MSa/s").exit_code == 2
    sim = run("simulate", SCENARIO, "--table", path, "--atoms", 500, "--json")
    assert sim.exit_code == 0, sim.output
    assert json.loads(sim.stdout)["table"]["file"] == str(path)
    text = run("simulate", SCENARIO, "--table", path, "--atoms", 200)
    assert f"table played: {path} (sha256 " in text.stdout                  # the text names the table too


def test_compare_catches_an_injected_error(tmp_path):
    s = plan(load_scenario(SCENARIO)).schedule()
    rng = np.random.default_rng(4)
    t = np.arange(0, 0.04, 4e-6)
    det = s.detuning(t + 0.003) + rng.normal(0, 40e3, t.size)
    good = tmp_path / "good.csv"
    good.write_text("time (s),detuning (Hz)\n" + "".join(f"{a:.7f},{b:.1f}\n" for a, b in zip(t, det)))
    result = run("compare", SCENARIO, good, "--json", "--plot", tmp_path / "c.png")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert doc["ok"] and doc["lag"] == pytest.approx(0.003, abs=1e-6)
    chirp = s.segment("chirp")
    inside = np.abs((t + 0.003) % s.period - (chirp.start + 1e-3)) < 1e-4
    det[inside] += 2 * doc["tolerance"]
    bad = tmp_path / "bad.csv"
    bad.write_text("time (s),detuning (Hz)\n" + "".join(f"{a:.7f},{b:.1f}\n" for a, b in zip(t, det)))
    result = run("compare", SCENARIO, bad)
    assert result.exit_code == 1 and "EXCEEDED" in result.stdout
    assert "(known modulo the period, 20 ms)" in result.stdout, result.stdout


def _trace_of(name: str, path, periods: float = 2.2):
    """A noiseless trace of scenario ``name``'s planned sweep over ``periods`` periods from its trigger."""
    s = plan(load_scenario(name)).schedule()
    t = np.arange(0, periods * s.period, s.period / 4000)
    path.write_text("time (s),detuning (Hz)\n" + "".join(f"{a:.9g},{b:.9g}\n" for a, b in zip(t, s.detuning(t))))
    return path


@pytest.mark.parametrize("name", ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"])
def test_compare_finds_its_own_plan_in_a_trace_of_a_fraction_of_periods(tmp_path, name):
    # 2.2 periods: the fold is the mean over each phase, so the extra fifth of a period does not pull the lag
    # (a linear chirp shifted in time is the same chirp shifted in detuning: a wrong lag is a false offset)
    result = run("compare", name, _trace_of(name, tmp_path / "t.csv"), "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert doc["chirp_error_rms"] < 1e-3 * doc["tolerance"]


@pytest.mark.parametrize("name,trace", [("rb87-chopped-oven", "na23-continuous-focused"),
                                        ("na23-continuous-focused", "caf-buffer-gas"),
                                        ("rb87-chopped-oven", "caf-buffer-gas")])
def test_compare_refuses_a_trace_of_another_sweep(tmp_path, name, trace):
    path = _trace_of(trace, tmp_path / "other.csv")
    result = run("compare", name, path)
    assert result.exit_code == 2 and result.stdout == ""
    line, = result.stderr.strip().splitlines()
    assert line.startswith(f"sweepgen: error: {path}: key 'detuning': the trace does not fit the planned sweep")
    assert "Traceback" not in result.output


def _one_error_line(result, code):
    assert result.exit_code == code, result.output
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    line, = result.stderr.strip().splitlines()
    assert line.startswith("sweepgen: error: ")
    return line


@pytest.fixture(params=["raw", "npy", "csv"])
def exported_as(request, tmp_path):
    fmt = request.param
    result = run("export", SCENARIO, "-f", fmt, "-o", tmp_path / "t", "--name", "old", "--json")
    assert result.exit_code == 0, result.output
    data, side = (tmp_path / "t" / ("old." + {"raw": "bin"}.get(fmt, fmt)),) * 2
    return data, side.with_name(side.name + ".json")


@pytest.mark.parametrize("command", [["inspect", "SIDE"], ["check", SCENARIO, "--table", "SIDE"],
                                     ["simulate", SCENARIO, "--atoms", 200, "--table", "SIDE"]])
def test_broken_sidecars_and_tables_are_refused_in_one_line(exported_as, command):
    data, side = exported_as
    words = [side if w == "SIDE" else w for w in command]
    good = json.loads(side.read_text())
    # a number of 100000 digits (beyond Python's limit for converting integers from text)
    side.write_text(json.dumps(good).replace(f'"count": {good["count"]}', '"count": ' + "9" * 100000))
    assert str(side) in _one_error_line(run(*words), 2)
    # a count of 10¹² values (1.8 TiB of int16): read as many as the file holds, then refused as damaged
    side.write_text(json.dumps({**good, "count": 10 ** 12}))
    result = run(*words)
    assert result.exit_code == 1 and isinstance(result.exception, (SystemExit, type(None))), result.exception
    # a layout newer than this version reads
    side.write_text(json.dumps({**good, "sweepgen_sidecar": 99}))
    assert f"{side}: key 'sweepgen_sidecar': " in _one_error_line(run(*words), 2)
    side.write_text(json.dumps(good))
    # an emptied data file: damaged (exit 1), or unreadable as the sidecar says (exit 2)
    saved = data.read_bytes()
    data.write_bytes(b"")
    result = run(*words)
    line = _one_error_line(result, 1 if "damaged" in result.stderr else 2)
    assert line.endswith("it was changed or damaged") or "cannot read the values as the sidecar describes" in line
    data.write_bytes(saved)
    if command[0] != "inspect":
        # a drive scaling that overflows: the detuning it plays is not finite
        scaled = json.loads(json.dumps(good))
        scaled["scaling"]["drive"]["scale"] = 1e308
        side.write_text(json.dumps(scaled))
        assert f"{side}: key 'scaling.drive': " in _one_error_line(run(*words), 2)
