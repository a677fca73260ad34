"""The search for the best design: a known optimum, the files it writes, where it runs."""

from __future__ import annotations

import importlib
import json
import tomllib

import pytest
from conftest import run_cli, to_toml
from test_scan import FAST, largest_start_velocity

from sweepgen import _toml_edit
from sweepgen.checker import check_plan
from sweepgen.errors import InputError
from sweepgen.scan import base
from sweepgen.scenario import load_scenario

service = importlib.import_module("sweepgen.optimise")      # the package's `optimise` is the API function


@pytest.fixture
def fast_file(tmp_path):
    path = tmp_path / "fast.toml"
    path.write_text("# a fast scenario\n" + to_toml(FAST))
    return path


@pytest.mark.slow
def test_finds_the_closed_form_optimum_and_names_the_binding_rule(fast_file, tmp_path):
    """More of the beam lies in a faster chirp's band, until the slowing no longer fits: the best
    passing start velocity is the closed form's largest one (test_scan.largest_start_velocity)."""
    v_star = largest_start_velocity(load_scenario(fast_file))
    result = run_cli("optimise", fast_file, "--free", "chirp.start_velocity=150 m/s:300 m/s", "--atoms", 300,
                     "--evaluations", 24, "--workers", 2, "-o", tmp_path / "out", "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    best = float(doc["best"]["values"]["chirp.start_velocity"].split()[0])
    assert v_star - 6 <= best <= v_star, (best, v_star)
    assert {"rule": "slowing_distance"}.items() <= doc["binding"][0].items()
    assert doc["confirmation"]["atoms"] == 3000 and doc["confirmation"]["seed"] != doc["seed"]
    assert doc["confirmation"]["best"]["verdict"] == "pass" and doc["confirmation"]["start"]["verdict"] == "fail"
    imp = doc["improvement"]
    assert imp["significant"] and imp["difference"] > 2 * imp["error"] > 0
    sc = load_scenario(doc["files"]["scenario"])          # the new file: loads, passes, holds the winner
    assert check_plan(sc).ok and sc.chirp.start_velocity == pytest.approx(best)
    assert (tmp_path / "out" / "fast-best.toml").read_text().count("# a fast scenario") == 1
    field = doc["tapered_field"]                     # the winner beside a tapered-field slower, same atoms
    assert field["atoms"] == 3000 and field["seed"] == doc["confirmation"]["seed"] and field["field"]["b0"] > 0
    assert field["chirp_captured_fraction"] == doc["confirmation"]["best"]["captured_fraction"]
    assert "## The tapered-field alternative" in (tmp_path / "out" / "fast-optimise.md").read_text()


@pytest.mark.slow
def test_files_are_never_replaced(fast_file, tmp_path):
    args = ("optimise", fast_file, "--free", "chirp.start_velocity=150 m/s:200 m/s", "--atoms", 50, "--evaluations", 6,
            "--workers", 1, "-o", tmp_path)
    assert run_cli(*args).exit_code == 0
    first = (tmp_path / "fast-best.toml").read_text()
    assert run_cli(*args).exit_code == 0
    assert (tmp_path / "fast-best.toml").read_text() == first
    assert {p.name for p in tmp_path.glob("fast-*-2.*")} == {"fast-best-2.toml", "fast-optimise-2.md",
                                                             "fast-optimise-2.json", "fast-optimise-2.png"}
    report = (tmp_path / "fast-optimise.md").read_text()
    assert "## What binds at the optimum" in report and "![history](fast-optimise.png)" in report


@pytest.mark.slow
def test_the_winner_beside_a_tapered_field_slower(tmp_path):
    """The report's comparison is sweepgen.tapered's, on the confirmation's atoms and seed."""
    from sweepgen import tapered
    from sweepgen.optimise_report import _tapered
    from sweepgen.scan import Design

    path = tmp_path / "rb.toml"
    path.write_text(to_toml({**FAST, "species": "rb87-d2"}))
    start = base(path)
    design = Design(start.path, start.data, {"chirp.start_velocity": "200 m/s"}, 200, 9)
    doc = service.field_comparison(design)
    same = tapered.compare(design.scenario(), atoms=200, seed=9).to_json()
    assert doc["field"] == pytest.approx(same["field"]) and doc["atoms"] == 200 and doc["seed"] == 9
    assert doc["field_captured_fraction"] == same["field_captured_fraction"]
    text = "\n".join(_tapered(doc))
    assert f"B₀ = {1e3 * same['field']['b0']:.4g} mT" in text and "| tapered field |" in text
    impossible = Design(start.path, start.data, {"chirp.end_velocity": "300 m/s"}, 200, 9)
    assert "end velocity below the start velocity" in service.field_comparison(impossible)["unavailable"]


@pytest.mark.parametrize("free, words", [
    ("chirp.no_such_key=1:2", "chirp.no_such_key=1: unknown key"),
    ("chirp.force_fraction=0.5", "KEY=LOW:HIGH"),
    ("chirp.force_fraction=0.5:1.5", "chirp.force_fraction=1.5: expected a number strictly between"),
    ("drive.max_step", "no number to start from"),
    ("chirp.force_fraction=0.5:0.5", "LOW below HIGH"),
])
def test_bad_free_is_one_line_naming_option_and_key(fast_file, free, words):
    result = run_cli("optimise", fast_file, "--free", free)
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "option '--free'" in lines[0] and words in lines[0], lines


def test_bad_objective_is_refused(fast_file):
    result = run_cli("optimise", fast_file, "--free", "chirp.force_fraction", "--objective", "atoms")
    assert result.exit_code == 2 and "option '--objective'" in result.stderr


def test_free_without_bounds_spans_its_start_value(fast_file):
    free = service.parse_free("chirp.force_fraction", base(fast_file))
    assert (free.low, free.high, free.start, free.unit) == (pytest.approx(0.3), pytest.approx(0.9), 0.6, "")
    with_unit = service.parse_free("chirp.hold=0.1 ms:2 ms", base(fast_file))
    assert with_unit.unit == "ms" and with_unit.start == pytest.approx(0.5)


def test_energy_puts_every_passing_design_before_every_failing_one():
    goal = service.Goal()
    passing = {"verdict": "pass", "captured_fraction": 0.0, "headrooms": {}, "failing_rules": []}
    failing = {"verdict": "fail", "captured_fraction": 0.9, "headrooms": {"slowing_distance": -0.5},
               "failing_rules": ["slowing_distance"]}
    worse = {**failing, "headrooms": {"slowing_distance": -2.0}}
    assert goal.energy(passing) < goal.energy(failing) < goal.energy(worse) < goal.energy({"verdict": "invalid"})
    assert service.Goal("final_velocity_spread", minimise=True).energy(
        {"verdict": "pass", "simulation": {"final_velocity_spread": 2.0}}) == 2.0


def test_toml_edit_keeps_comments_and_adds_what_is_missing():
    text = "title = \"x\"  # name\n\n[chirp]\n# braking\nforce_fraction = 0.6  # eta\nhold = \"0 ms\"\n"
    values = {"chirp.force_fraction": 0.7, "chirp.period": "5 ms", "drive.max_step": "1 MHz"}
    wanted = {"title": "x", "chirp": {"force_fraction": 0.7, "hold": "0 ms", "period": "5 ms"},
              "drive": {"max_step": "1 MHz"}}
    out, kept = _toml_edit.with_values(text, values, wanted)
    assert kept and tomllib.loads(out) == wanted
    assert "force_fraction = 0.7  # eta" in out and "# braking" in out and "# name" in out
    inline = "chirp = { force_fraction = 0.6 }\n"
    out, kept = _toml_edit.with_values(inline, {"chirp.force_fraction": 0.7}, {"chirp": {"force_fraction": 0.7}})
    assert not kept and tomllib.loads(out) == {"chirp": {"force_fraction": 0.7}}


def test_profile_paths_still_name_the_same_files_from_the_new_folder(tmp_path):
    import shutil

    from conftest import TWO_LEVEL_RB

    from sweepgen.optimise_report import moved_profiles

    (tmp_path / "profiles").mkdir()
    (tmp_path / "elsewhere").mkdir()
    shutil.copy(TWO_LEVEL_RB, tmp_path / "profiles" / "atom.toml")
    path = tmp_path / "mine.toml"
    path.write_text(to_toml({**FAST, "species": "profiles/atom.toml", "laser": "demo-ecdl-piezo"}))
    moved = moved_profiles(base(path), tmp_path / "elsewhere")
    assert moved == {"species": "../profiles/atom.toml"}          # a built-in key stays as it is


@pytest.mark.slow
def test_ctrl_c_stops_the_search_and_writes_what_finished(fast_file, tmp_path):
    """A real SIGINT during the search (in this process, --workers 1): exit 130, the report and its
    JSON hold the designs that finished, and nothing is confirmed."""
    import os
    import signal
    import threading

    import dataclasses

    from sweepgen.scenario import load_scenario
    from sweepgen.simulate import simulate

    sc = load_scenario(fast_file)          # the compiled step made ready first, so that the signal meets the search
    simulate(dataclasses.replace(sc, chirp=dataclasses.replace(sc.chirp, start_velocity=180.0)), atoms=50,
             workers=1, baselines=False)
    timer = threading.Timer(1.5, os.kill, (os.getpid(), signal.SIGINT))
    timer.start()
    try:
        result = run_cli("optimise", fast_file, "--free", "chirp.start_velocity=150 m/s:200 m/s", "--atoms", 300,
                         "--evaluations", 400, "--workers", 1, "-o", tmp_path)
    finally:
        timer.cancel()
    assert result.exit_code == 130, result.output
    assert "interrupted after" in result.stderr
    doc = json.loads((tmp_path / "fast-optimise.json").read_text())
    assert not doc["finished"] and 0 < doc["evaluations"] < 400
    assert doc["confirmation"]["best"] is None and doc["improvement"] is None
    assert "interrupted" in (tmp_path / "fast-optimise.md").read_text()


@pytest.mark.slow
def test_same_answer_on_one_process_and_a_dask_cluster(fast_file):
    distributed = pytest.importorskip("distributed")
    kw = dict(atoms=200, seed=4, budget=12, confirm_atoms=400)
    one = service.optimise(fast_file, ["chirp.start_velocity=180 m/s:240 m/s"], workers=1, **kw).to_json()
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as cluster:
        dask = service.optimise(fast_file, ["chirp.start_velocity=180 m/s:240 m/s"],
                                cluster=cluster.scheduler_address, **kw).to_json()
    for key in ("best", "confirmation", "improvement", "history", "binding"):
        assert one[key] == dask[key], key
