"""``sweepgen export``: end to end, decoded outside sweepgen, plug-ins found through entry points."""

from __future__ import annotations

import hashlib
import json
import math
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from scipy import constants

from conftest import install_driver_plugin, read_by_sidecar, run_cli as run, scenario_dict, to_toml

# a pulsed Rb beam with an explicit chirp start (test data)
EXPLICIT_START = {"chirp": {"start_time": "1 ms", "period": "10 ms"}}


def write_scenario(folder, laser="demo-ecdl-piezo", generator="virtual-awg", name="rb-explicit.toml"):
    path = folder / name
    path.write_text(to_toml(scenario_dict(laser=laser, generator=generator, **EXPLICIT_START)))
    return path


# -- an independent computation of the sweep --------------------------------------------------------
def expected_detuning(t):
    """The sweep of the EXPLICIT_START scenario from the closed forms of README.md, Physics background (uniform light: a straight chirp).

    Inputs: 87Rb D2 wavelength, mass and lifetime from D. A. Steck, "Rubidium 87 D Line Data"
    (D. A. Steck, Rubidium 87 D Line Data, recalled); ħ from CODATA via scipy.constants.
    a_d = η ħkΓ/2m · s/(1+s); lag δv = (λΓ/4π)·sqrt((1+s)(1/η − 1)); Δ = −(v + δv)/λ (textbook:
    Foot, Atomic Physics, ch. 9; Metcalf & van der Straten, ch. 6-7). The return is the smooth step
    3x² − 2x³ of README.md, Physics background.
    """
    lam, m, tau = 780.241209686e-9, 1.443160648e-25, 26.2348e-9
    gamma, s, eta = 1.0 / tau, 3.0, 0.6
    a = eta * constants.hbar * (2 * math.pi / lam) * gamma / (2 * m) * s / (1 + s)
    lag = lam * gamma / (4 * math.pi) * math.sqrt((1 + s) * (1 / eta - 1))
    v1, v2 = 260.0, 15.0
    d0, d1 = -(v1 + lag) / lam, -(v2 + lag) / lam
    t0 = 1e-3
    t1 = t0 + (v1 - v2) / a
    t2, t3 = t1 + 0.5e-3, t1 + 0.8e-3
    t = np.asarray(t, dtype=float)
    x = np.clip((t - t2) / 0.3e-3, 0, 1)
    chirp = -(v1 - a * (t - t0) + lag) / lam
    return np.select([t < t0, t < t1, t < t2, t < t3], [d0, chirp, d1, d1 + (d0 - d1) * (3 * x**2 - 2 * x**3)],
                     d0)


@pytest.mark.parametrize("fmt,options", [("raw", []), ("raw", ["-O", "dtype=uint16", "-O", "byte_order=big"]),
                                         ("raw", ["-O", "dtype=float32"]), ("npy", []), ("csv", [])])
def test_an_exported_table_matches_an_independent_computation(tmp_path, fmt, options):
    scenario = write_scenario(tmp_path)
    result = run("export", scenario, "--format", fmt, "-o", tmp_path / "out", *options)
    assert result.exit_code == 0, result.output
    sidecar = next((tmp_path / "out").glob("*.json"))
    values, _, _, detuning, side, t = read_by_sidecar(sidecar)
    step = abs(side["scaling"]["detuning"]["scale"])              # Hz of detuning per DAC code
    assert side["period_count"] / side["sample_rate"] == pytest.approx(10e-3)
    assert len(values) == side["count"] == side["period_count"] + side["padding"]
    assert np.max(np.abs(detuning - expected_detuning(t))) <= step
    assert abs(detuning[-1] - detuning[0]) <= step                 # the table loops without a jump
    assert side["provenance"]["laser"]["key"] == "demo-ecdl-piezo"
    assert side["provenance"]["scenario"]["sha256"] == hashlib.sha256(scenario.read_bytes()).hexdigest()


def test_a_dds_table_decodes_through_the_laser_profile(tmp_path):
    """Offset lock on a DDS: Δ = reference + sign · divider · f_DDS, f_DDS = FTW · clock / 2^32.

    Numbers from the laser profile demo-offset-dds (reference -1.6 GHz, sign +1, divider 8, 1 GHz
    clock, 32 bits); the word relation is common practice.
    """
    from sweepgen.planner import plan
    from sweepgen.scenario import load_scenario

    result = run("export", "caf-buffer-gas", "-f", "npy", "-o", tmp_path)
    assert result.exit_code == 0, result.output
    words, _, _, detuning, side, t = read_by_sidecar(tmp_path / "caf-buffer-gas.npy.json")
    assert side["numpy_dtype"] == "<u4"
    words = np.load(tmp_path / "caf-buffer-gas.npy").astype(float)
    independent = -1.6e9 + 8 * words * 1e9 / 2**32
    assert np.max(np.abs(detuning - independent)) < 1e-3
    schedule = plan(load_scenario("caf-buffer-gas")).schedule()
    assert np.max(np.abs(detuning - schedule.detuning(t))) <= 8 * 1e9 / 2**32   # one word step, in detuning


def test_a_non_linear_chain_ships_a_lookup_within_one_step(tmp_path):
    from sweepgen.planner import plan
    from sweepgen.scenario import load_scenario

    result = run("export", "na23-continuous-focused", "-f", "raw", "-o", tmp_path)
    assert result.exit_code == 0, result.output
    _, _, _, detuning, side, t = read_by_sidecar(tmp_path / "na23-continuous-focused.bin.json")
    assert side["scaling"]["detuning"]["kind"] == "lookup"
    schedule = plan(load_scenario("na23-continuous-focused")).schedule()
    # one DAC step in detuning, at its largest over the range (the VCO curve is not straight)
    lookup = side["scaling"]["detuning"]
    step = np.max(np.abs(np.diff(lookup["detuning"]) / np.diff(lookup["value"])))
    assert np.max(np.abs(detuning - schedule.detuning(t))) <= step


def test_padding_to_the_granularity_of_a_generator_with_listed_rates(tmp_path):
    gen = tmp_path / "listed.toml"
    text = (textwrap.dedent("""\
        title = "Listed-rate generator (test data)"
        kind = "awg"
        [sampling]
        rates = ["5 MSa/s", "10 MSa/s"]
        memory = 1048576
        granularity = 64
        min_length = 64
        [output]
        kind = "voltage"
        range_min = "-10 V"
        range_max = "10 V"
        dac_bits = 16
        [link]
        kind = "visa"
        resource = "TCPIP::127.0.0.1::5025::SOCKET"
        throughput = "1 MB/s"
        """) + "[commands]\n" + _commands_of_the_virtual_awg())
    gen.write_text(text)
    scenario = write_scenario(tmp_path, generator="./listed.toml")
    result = run("export", scenario, "-f", "raw", "-o", tmp_path / "out", "--rate", "5 MSa/s", "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert doc["count"] % 64 == 0 and doc["count"] == 50048 and doc["period_count"] == 50000
    values, _, _, detuning, side, t = read_by_sidecar(tmp_path / "out" / "rb-explicit.bin.json")
    assert side["padding"] == 48 and np.all(values[50000:] == values[0])


def _commands_of_the_virtual_awg() -> str:
    import tomllib

    from sweepgen import catalog

    data = tomllib.loads(catalog.resolve("generators", "virtual-awg").read_text())
    commands = "".join(f"{k} = {json.dumps(v)}\n" for k, v in data["commands"].items())
    return commands + "[trigger]\n" + "".join(f"{k} = {json.dumps(v)}\n" for k, v in data["trigger"].items())


# -- refusals ----------------------------------------------------------------------------------
def test_a_failing_rule_refuses_and_writes_nothing(tmp_path):
    from sweepgen import catalog

    laser = catalog.resolve("lasers", "demo-ecdl-piezo").read_text()
    laser = laser.replace('input_min = "-10 V"', 'input_min = "-2 V"').replace('input_max = "10 V"', 'input_max = "2 V"')
    (tmp_path / "narrow.toml").write_text(laser)
    scenario = write_scenario(tmp_path, laser="./narrow.toml")
    out = tmp_path / "out"
    result = run("export", scenario, "-f", "raw", "-o", out)
    assert result.exit_code == 1
    assert "FAIL actuator_range" in result.stderr and "nothing was written" in result.stderr
    assert "Traceback" not in result.output
    assert not out.exists()
    result = run("export", scenario, "-f", "raw", "-o", out, "--json")
    assert result.exit_code == 1
    doc = json.loads(result.stdout)                                # one JSON document on stdout
    assert doc["ok"] is False and doc["written"] is False
    assert any(f["rule"] == "actuator_range" and f["status"] == "fail" for f in doc["findings"])


@pytest.mark.parametrize("args,message", [
    (["-f", "hdf9"], "no driver named 'hdf9'"),
    (["-f", "raw", "-O", "colour=red"], "no option 'colour'"),
    (["-f", "raw", "-O", "dtype"], "expected KEY=VALUE"),
    (["-f", "raw", "-O", "dtype=int8"], "expected one of native, int16, uint16, float32"),
    (["-f", "raw", "--rate", "fast"], "--rate"),
    (["-f", "raw", "--name", "../escape"], "plain file name"),
])
def test_bad_input_is_exit_2_with_one_line(tmp_path, args, message):
    result = run("export", "rb87-chopped-oven", "-o", tmp_path / "out", *args)
    assert result.exit_code == 2, result.output
    assert message in result.stderr and "Traceback" not in result.output
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("option,message", [
    ("dtype=int8", "expected one of native, int16, uint16, float32, got 'int8'"),
    # the demo ramp board's DDS words have 32 bits: a 16-bit file cannot hold them
    ("dtype=int16", "int16 holds 65536 levels but this generator's codes span 4294967296"),
])
def test_option_values_are_refused_before_the_check_speaks(tmp_path, option, message):
    """caf-buffer-gas draws a warning from the checker (end velocity near the capture velocity); a bad
    option value is refused before that warning, or anything else, is printed."""
    result = run("export", "caf-buffer-gas", "-f", "raw", "-O", option, "-o", tmp_path / "out")
    assert result.exit_code == 2, result.output
    assert result.stderr.startswith("sweepgen: error: option '--option dtype': " + message)
    assert "warning" not in result.stderr and result.stdout == ""
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("dtype", ["int16", "uint16", "float32"])
def test_the_console_gives_the_scaling_of_the_values_as_stored(tmp_path, dtype):
    """The "drive" line of the console is the sidecar's scaling of the stored values (uint16 values
    are shifted by 32768 and float32 values normalised, so the code scaling would be wrong for them)."""
    result = run("export", "rb87-chopped-oven", "-f", "raw", "-O", f"dtype={dtype}", "-o", tmp_path)
    assert result.exit_code == 0, result.output
    side = json.loads((tmp_path / "rb87-chopped-oven.bin.json").read_text())
    line = next(x for x in result.stdout.splitlines() if x.startswith("drive "))
    offset, scale = (float(x) for x in line.split()[1::2][:2])          # "drive  A + B × value V"
    drive = side["scaling"]["drive"]
    assert offset == pytest.approx(drive["offset"], rel=1e-5) and scale == pytest.approx(drive["scale"], rel=1e-5)
    values = np.fromfile(tmp_path / "rb87-chopped-oven.bin", dtype=side["numpy_dtype"]).astype(float)
    assert np.min(offset + scale * values) == pytest.approx(side["drive_range"][0], abs=abs(scale))
    doc = json.loads(run("export", "rb87-chopped-oven", "-f", "raw", "-O", f"dtype={dtype}", "-o",
                         tmp_path / "again", "--json").stdout)
    assert doc["scaling"]["drive"] == drive and doc["scaling"]["code"] == side["scaling"]["code"]


@pytest.mark.parametrize("name", ["visa", "serial"])
def test_an_instrument_driver_is_not_a_file_format(tmp_path, name):
    # visa and serial are built-in instrument drivers, registered in sweepgen's own pyproject.toml
    result = run("export", "rb87-chopped-oven", "-f", name, "-o", tmp_path / "out")
    assert result.exit_code == 2 and "delivers to an instrument" in result.stderr
    assert not (tmp_path / "out").exists()


def test_json_output_is_one_document(tmp_path):
    result = run("export", "rb87-chopped-oven", "-f", "npy", "-o", tmp_path, "--json", "--name", "sweep")
    assert result.exit_code == 0
    doc = json.loads(result.stdout)
    assert doc["files"] == ["sweep.npy", "sweep.npy.json"] and doc["written"] is True
    assert doc["sha256"] == hashlib.sha256((tmp_path / "sweep.npy").read_bytes()).hexdigest()


# -- plug-ins through the entry-point group, in a fresh interpreter --------------------------------
@pytest.fixture
def plugin_path(tmp_path):
    return install_driver_plugin(tmp_path / "plugins", "sg_cli_plugin",
                                 "textcodes = sg_cli_plugin:TextCodes\nexploding = sg_cli_plugin:Exploding\n")


def cli(args, plugin_path):
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(plugin_path), os.environ.get("PYTHONPATH", "")]))
    return subprocess.run([sys.executable, "-m", "sweepgen", *map(str, args)], capture_output=True, text=True,
                          env=env, timeout=120)


@pytest.mark.slow
def test_the_cli_finds_a_driver_registered_by_another_distribution(tmp_path, plugin_path):
    scenario = write_scenario(tmp_path)
    out = tmp_path / "out"
    proc = cli(["export", scenario, "-f", "textcodes", "-o", out, "--json"], plugin_path)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads(proc.stdout)
    assert doc["driver"] == "textcodes"
    codes = np.loadtxt(out / "rb-explicit.txt", dtype=np.int64)
    side = json.loads((out / "rb-explicit.txt.json").read_text())
    assert len(codes) == side["count"] == 80000
    t = np.arange(len(codes)) / side["sample_rate"]
    det = side["scaling"]["detuning"]
    detuning = det["offset"] + det["scale"] * codes
    assert np.max(np.abs(detuning - expected_detuning(t))) <= abs(det["scale"])


@pytest.mark.slow
def test_a_driver_failing_mid_stream_leaves_the_folder_as_it_was(tmp_path, plugin_path):
    scenario = write_scenario(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    (out / "rb-explicit.txt").write_text("an older export\n")
    (out / "rb-explicit.txt.json").write_text("{}\n")
    (out / "notes.md").write_text("lab notes\n")
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    proc = cli(["export", scenario, "-f", "exploding", "-o", out], plugin_path)
    assert proc.returncode == 1
    assert "disk filled up" in proc.stderr and "Traceback" not in proc.stderr
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
