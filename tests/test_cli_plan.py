"""``sweepgen plan`` and ``sweepgen profiles`` through the CLI: JSON contract,
human table, and refusal of broken scenarios (exit 2, one line, no traceback)."""

import json
import os
import subprocess
import sys

import pytest

from conftest import run_cli as run, scenario_dict, to_toml

PLAN_KEYS = {"start_velocity", "end_velocity", "force_fraction", "deceleration_min", "deceleration_max",
             "lag_velocity_start", "start_detuning", "end_detuning", "chirp_span", "chirp_rate_max",
             "chirp_duration", "slowing_distance", "start_time", "arrival_time", "photons_per_atom",
             "doppler_limit", "recoil_velocity", "start_position", "end_position", "survival_fraction"}


def test_plan_json_has_the_contract_keys(write_scenario):
    result = run("plan", str(write_scenario()), "--json")
    assert result.exit_code == 0, result.stderr
    doc = json.loads(result.stdout)
    assert PLAN_KEYS <= set(doc) and doc["ok"] is True
    assert {"slowing_distance", "deceleration", "end_velocity", "period"} <= {f["rule"] for f in doc["findings"]}
    assert all(f["status"] != "fail" for f in doc["findings"])
    assert doc["start_velocity"] == 260.0 and doc["end_velocity"] == 15.0
    assert doc["start_detuning"] < doc["end_detuning"] < 0


def test_the_old_key_margin_is_named_once_on_stderr(write_scenario):
    path = write_scenario(chirp={"force_fraction": None, "margin": 0.6})
    result = run("plan", str(path), "--json")
    assert result.exit_code == 0, result.stderr
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("sweepgen: warning: ")
    assert str(path) in lines[0] and "'chirp.margin'" in lines[0] and "'chirp.force_fraction'" in lines[0]
    doc = json.loads(result.stdout)                              # stdout stays one JSON document
    assert doc["force_fraction"] == 0.6
    assert doc == json.loads(run("plan", str(write_scenario()), "--json").stdout)   # as under the new name


def test_plan_human_table(write_scenario):
    result = run("plan", str(write_scenario()))
    assert result.exit_code == 0
    assert "chirp span" in result.stdout and "MHz" in result.stdout


@pytest.mark.parametrize("key", ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"])
def test_builtin_scenarios_plan(key):
    result = run("plan", key, "--json")
    assert result.exit_code == 0, result.stderr
    doc = json.loads(result.stdout)
    assert doc["slowing_distance"] > 0


def test_profiles_lists_builtins():
    result = run("profiles", "--json")
    assert result.exit_code == 0, result.stderr
    doc = json.loads(result.stdout)
    assert all(item["title"] and item["title"] != "(unreadable)" for items in doc.values() for item in items)
    assert {"rb87-d2", "cs133-d2", "na23-d2", "k39-d2", "caf-a-x"} <= {x["key"] for x in doc["species"]}
    assert {"rb87-chopped-oven", "na23-continuous-focused"} <= {x["key"] for x in doc["scenarios"]}


BROKEN = [
    # (name, sections or raw text, fragment expected in the message)
    ("wrong unit", {"chirp": {"start_velocity": "260 m"}}, "chirp.start_velocity"),
    ("missing key", {"chirp": {"force_fraction": None}}, "chirp.force_fraction"),
    ("unknown key", {"chirp": {"speed": "3 m/s"}}, "chirp.speed"),
    ("force fraction above one", {"chirp": {"force_fraction": 1.2}}, "chirp.force_fraction"),
    ("force fraction zero", {"chirp": {"force_fraction": 0.0}}, "chirp.force_fraction"),
    ("negative temperature", {"source": {"temperature": "-5 K"}}, "source.temperature"),
    ("end above start", {"chirp": {"end_velocity": "300 m/s"}}, "chirp.end_velocity"),
    ("NaN velocity", {"chirp": {"start_velocity": "nan m/s"}}, "chirp.start_velocity"),
    ("NaN force fraction", {"chirp": {"force_fraction": float("nan")}}, "chirp.force_fraction"),
    ("unknown species", {"species": "unobtainium-d9"}, "species"),
    ("bare number for a quantity", {"target": {"distance": 1.0}}, "target.distance"),
    ("unknown source model", {"source": {"model": "laser-ablation"}}, "source.model"),
    ("gaussian without spread", {"source": {"model": "gaussian", "temperature": None,
                                            "mean_velocity": "170 m/s"}}, "source.velocity_spread"),
    ("start time for continuous", {"source": {"pulse_time": None}, "chirp": {"start_time": "1 ms"}},
     "chirp.start_time"),
    ("chirp before light", {"chirp": {"start_time": "0.01 ms"}}, "chirp.start_time"),
    ("focus without waist", {"light": {"focus": "0 m"}}, "light.focus"),
    ("negative saturation", {"light": {"saturation": -1.0}}, "light.saturation"),
    ("target before light", {"light": {"start": "2 m"}}, "target.distance"),
    ("zero period", {"chirp": {"period": "0 s"}}, "chirp.period"),
    ("angular frequency", {"drive": {"max_step": "3 Mrad/s"}}, "drive.max_step"),
    ("missing section", {"target": None}, "target"),
    ("string force fraction", {"chirp": {"force_fraction": "0.6"}}, "chirp.force_fraction"),
    ("malformed TOML", "title = 'x'\n[chirp\nmargin = 0.5\n", "malformed TOML"),
    ("not UTF-8", b"\xff\xfe\x00t", "UTF-8"),
]


@pytest.mark.parametrize("name,change,fragment", BROKEN, ids=[b[0] for b in BROKEN])
def test_broken_scenarios_are_refused(tmp_path, name, change, fragment):
    path = tmp_path / "broken.toml"
    if isinstance(change, bytes):
        path.write_bytes(change)
    elif isinstance(change, str):
        path.write_text(change)
    else:
        path.write_text(to_toml(scenario_dict(**change)))
    result = run("plan", str(path), "--json")
    assert result.exit_code == 2, (name, result.stdout, result.stderr)
    error = json.loads(result.stdout)["error"]          # --json: the error document, and only it
    assert error["exit_code"] == 2 and fragment in f"{error['key']} {error['message']}"
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, lines
    assert lines[0].startswith("sweepgen: error: ")
    assert str(path) in lines[0] or "broken.toml" in lines[0]
    assert fragment in lines[0]
    assert "Traceback" not in result.stderr


def test_paths_in_messages_are_normalised(tmp_path):
    """A path given with '..' (on the command line, or inside a file) is named as the file it is:
    'bad/../bad/file.toml' is 'bad/file.toml', in the line on stderr and the error document."""
    folder = tmp_path / "bad"
    folder.mkdir()
    (folder / "file.toml").write_text(to_toml(scenario_dict(chirp={"force_fraction": "lots"})))
    (folder / "names-a-laser.toml").write_text(to_toml(scenario_dict(laser="../bad/laser.toml")))
    (folder / "laser.toml").write_text("title = 'test laser'\n[limits\n")
    for given, broken in [("bad/../bad/file.toml", "file.toml"), ("bad/names-a-laser.toml", "laser.toml")]:
        result = run("check" if "laser" in given else "plan", given, "--json")
        assert result.exit_code == 2, (given, result.output)
        where = folder / broken
        assert json.loads(result.stdout)["error"]["file"] == str(where)
        assert result.stderr.startswith(f"sweepgen: error: {where}: ") and ".." not in result.stderr


# One decision for every command (README.md, exit codes): a sweep that cannot exist is bad input
# (exit 2); a sweep that exists but breaks a limit is a failed check (exit 1).
COMMANDS = [["plan"], ["check"], ["export", "-f", "csv", "-o", "out"], ["upload", "--dry-run"],
            ["simulate", "--atoms", "50"]]


@pytest.mark.parametrize("command", COMMANDS, ids=[c[0] for c in COMMANDS])
def test_a_slowing_distance_longer_than_the_room_is_a_failed_check_everywhere(tmp_path, write_scenario, command):
    # 0.6675 m of slowing (README.md, Physics background: (v1² − v2²)/2a for this test scenario) in 0.35 m
    path = write_scenario(laser="demo-ecdl-piezo", generator="virtual-awg", target={"distance": "0.4 m"})
    result = run(command[0], path, *command[1:])
    assert result.exit_code == 1, (result.stdout, result.stderr)
    assert "slowing_distance" in result.stdout + result.stderr and "0.6675 m" in result.stdout + result.stderr
    assert "Traceback" not in result.stderr and not (tmp_path / "out").exists()


@pytest.mark.parametrize("command", COMMANDS, ids=[c[0] for c in COMMANDS])
def test_a_chirp_that_starts_in_the_dark_is_bad_input_everywhere(tmp_path, write_scenario, command):
    # at 0.1 ms after the pulse the 260 m/s design atom is at 0.026 m, before the light start at 0.05 m
    path = write_scenario(laser="demo-ecdl-piezo", generator="virtual-awg", chirp={"start_time": "0.1 ms"})
    result = run(command[0], path, *command[1:])
    assert result.exit_code == 2, (result.stdout, result.stderr)
    assert result.stdout == "" and len(result.stderr.strip().splitlines()) == 1
    assert "key 'chirp.start_time'" in result.stderr and "before the light start" in result.stderr
    assert not (tmp_path / "out").exists()


def test_plan_json_of_a_design_that_breaks_a_limit(write_scenario):
    result = run("plan", write_scenario(target={"distance": "0.4 m"}), "--json")
    assert result.exit_code == 1
    doc = json.loads(result.stdout)
    assert PLAN_KEYS <= set(doc) and doc["ok"] is False
    assert doc["findings"][0]["rule"] == "slowing_distance" and doc["findings"][0]["status"] == "fail"
    assert doc["slowing_distance"] == pytest.approx(0.6675, rel=1e-4)
    assert doc["end_position"] > 0.4          # the design atom would still be braking beyond the target
    assert {f["status"] for f in doc["findings"][1:]} <= {"pass", "warn"}


def test_missing_file_and_real_process(tmp_path):
    # a real process: no traceback reaches the user, exit code 2
    proc = subprocess.run([sys.executable, "-m", "sweepgen", "plan", str(tmp_path / "nope.toml")],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert "nope.toml" in proc.stderr


def test_version_and_usage_error():
    assert run("--version").stdout.startswith("sweepgen, version ")
    assert run("plan").exit_code == 2


@pytest.mark.slow
def test_plan_plot_png_and_svg(tmp_path):
    png, svg = tmp_path / "sweep.png", tmp_path / "sweep.svg"
    assert run("plan", "rb87-chopped-oven", "--plot", str(png)).exit_code == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert run("plan", "na23-continuous-focused", "--plot", str(svg)).exit_code == 0
    assert b"<svg" in svg.read_bytes()[:400]
    bad = run("plan", "rb87-chopped-oven", "--plot", str(tmp_path / "sweep.gif"))
    assert bad.exit_code == 2 and ".png or .svg" in bad.stderr


HEAVY = ("numpy", "scipy", "pint", "matplotlib", "pyvisa", "serial", "h5py", "dask", "distributed")


@pytest.mark.parametrize("command", ["plan", "check", "simulate", "export", "upload", "calibrate", "inspect",
                                     "compare", "emulate", "profiles", "demo", "scan", "optimise"])
def test_help_imports_no_heavy_library(command):
    # DEVELOPERS.md, "Heavy imports are lazy": a command's --help is read before anything is computed
    code = ("import sys; from sweepgen.cli import main\n"
            f"try: main([{command!r}, '--help'])\n"
            "except SystemExit: pass\n"
            f"print(sorted({{m.split('.')[0] for m in sys.modules}} & set({HEAVY!r})))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().splitlines()[-1] == "[]"


#: what planning and checking never need: plotting, instruments, files of other formats, the cluster, the
#: simulation's compiled step, and the parts of SciPy the actuator response does without
NOT_FOR_PLAN_OR_CHECK = ("matplotlib", "pyvisa", "serial", "h5py", "dask", "distributed", "numba", "scipy.signal",
                         "scipy.interpolate", "scipy.stats", "sweepgen._kernel",
                         "sweepgen._flight", "sweepgen.simulate", "sweepgen.plots", "sweepgen.drivers")


@pytest.mark.slow
@pytest.mark.parametrize("command", [["plan", "rb87-chopped-oven", "--json"], ["check", "na23-continuous-focused"]])
def test_plan_and_check_import_only_what_they_need(command, tmp_path):
    # DEVELOPERS.md, "Heavy imports are lazy"; bench_startup.py times the same commands. The first run fills
    # the user cache (pint's definitions, the remembered unit factors); from the second on, every unit of a
    # built-in scenario is remembered and pint is not imported at all
    code = ("import sys; from sweepgen.cli import main\n"
            f"try: main({command!r})\n"
            "except SystemExit: pass\n"
            "names = set(sys.modules) | {m.split('.')[0] for m in sys.modules}\n"
            f"print(sorted(names & set({(*NOT_FOR_PLAN_OR_CHECK, 'pint')!r})))")
    env = {**os.environ, "XDG_CACHE_HOME": str(tmp_path / "cache")}
    first = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, env=env)
    assert first.stdout.strip().splitlines()[-1] == "['pint']"
    again = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, env=env)
    assert again.stdout.strip().splitlines()[-1] == "[]"


def test_an_unknown_scenario_is_named_as_one_scenario(tmp_path):
    # "no built-in scenario profile", not the folder's plural
    from click.testing import CliRunner

    from sweepgen.cli import main

    r = CliRunner().invoke(main, ["plan", "no-such-beam"])
    assert r.exit_code == 2
    assert "no built-in scenario profile or file named 'no-such-beam'" in r.output
