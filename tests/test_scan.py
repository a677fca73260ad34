"""Scans: keys varied over a grid, each design checked and simulated with the same seed."""

from __future__ import annotations

import csv
import importlib
import io
import json
import math

import numpy as np
import pytest
from conftest import run_cli, scenario_dict, to_toml
from scipy import constants as C

from sweepgen.errors import InputError
from sweepgen.scenario import load_scenario
from sweepgen.simulate import simulate

service = importlib.import_module("sweepgen.scan")      # the module (sweepgen.scan is the public function)

#: a pulsed Gaussian beam of two-level Rb-87 (no laser or generator: the plan itself is played)
FAST = scenario_dict(source={"model": "gaussian", "temperature": None, "mean_velocity": "250 m/s",
                             "velocity_spread": "60 m/s"},
                     target={"distance": "0.5 m"}, chirp={"period": "50 ms"})


def largest_start_velocity(sc) -> float:
    """The fastest start velocity whose slowing fits between the light start and the target.

    Uniform light: a_d = η·(ħkΓ/2m)·s/(1+s) (Foot, Atomic Physics, 2005, §9.3.1, the largest
    radiation force), and the slowing distance (v1² − v2²)/(2a_d) must not exceed the length
    from the light start to the target (a pulsed source with start_time = "auto" starts the design
    atom no earlier than the light)."""
    k = 2 * math.pi / sc.species.wavelength
    s = sc.light.peak
    a_d = sc.chirp.force_fraction * C.hbar * k * sc.species.gamma / (2 * sc.species.mass) * s / (1 + s)
    room = sc.target.distance - sc.light.start
    return math.sqrt(sc.chirp.end_velocity ** 2 + 2 * a_d * room)


@pytest.fixture
def fast_file(tmp_path):
    path = tmp_path / "fast.toml"
    path.write_text(to_toml(FAST))
    return path


def test_vary_values_with_units_converted_to_the_first():
    axis = service.parse_vary("chirp.start_velocity=200 m/s:0.3 km/s:3")
    assert axis.key == "chirp.start_velocity" and axis.unit == "m/s"
    assert axis.values == ("200 m/s", "250 m/s", "300 m/s")
    bare = service.parse_vary("chirp.force_fraction=0.4:0.8:5")
    assert bare.values == (0.4, 0.5, 0.6, 0.7, 0.8) and bare.unit == ""
    assert service.parse_vary("light.saturation=3:9:1").values == (3,)


@pytest.mark.parametrize("text, words", [
    ("chirp.force_fraction=0.4:0.8", "KEY=START:STOP:N"),
    ("chirp.force_fraction=0.4:0.8:x", "whole number"),
    ("chirp.force_fraction=0.4:0.8:0", "from 1 to 10000"),
    ("chirp.start_velocity=200 m/s:3 s:4", "wrong dimension"),
    ("chirp.start_velocity=fast:300 m/s:4", "number with its unit"),
    ("=1:2:3", "scenario key"),
])
def test_bad_vary_text_names_option(text, words):
    with pytest.raises(InputError) as err:
        service.parse_vary(text)
    assert err.value.key == "vary" and words in str(err.value)     # the API's name; the command says --vary


def test_set_keys_makes_tables_and_refuses_through_a_value():
    data = {"chirp": {"hold": "0 ms"}}
    out = service.set_keys(data, {"chirp.hold": "1 ms", "drive.max_step": "1 MHz"})
    assert out == {"chirp": {"hold": "1 ms"}, "drive": {"max_step": "1 MHz"}}
    assert data == {"chirp": {"hold": "0 ms"}}                    # the start is left alone
    with pytest.raises(InputError, match="chirp.hold is a value"):
        service.set_keys(data, {"chirp.hold.x": 1})


@pytest.mark.parametrize("vary, words", [
    ("chirp.force_fraction=0.5:1.2:3", "chirp.force_fraction=1.2: expected a number strictly between"),
    ("chirp.no_such_key=1:2:2", "chirp.no_such_key=1: unknown key"),
    ("chirp.start_velocity=0.5:0.7:2", "has no unit"),
])
def test_scan_refuses_values_the_file_could_not_hold(fast_file, vary, words):
    result = run_cli("scan", fast_file, "--vary", vary)
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "option '--vary'" in lines[0] and words in lines[0]


@pytest.mark.slow
def test_known_optimum_along_the_start_velocity(fast_file, tmp_path):
    """The check passes exactly below the closed-form largest start velocity, and the best passing
    design is the fastest one that fits (more of the beam lies in its band)."""
    v_star = largest_start_velocity(load_scenario(fast_file))
    axis = service.parse_vary("chirp.start_velocity=180 m/s:240 m/s:7")
    result = service.scan(fast_file, [axis], atoms=400, seed=5, workers=1)
    for row, v in zip(result.rows, axis.numbers):
        assert (row["verdict"] == "pass") == (v <= v_star), (v, v_star, row["failing_rules"])
        assert row["verdict"] == "pass" or "slowing_distance" in row["failing_rules"]
    best = result.best()
    assert best["values"]["chirp.start_velocity"] == "210 m/s" and 210 <= v_star < 220
    passing = [r["captured_fraction"] for r in result.rows if r["verdict"] == "pass"]
    assert passing == sorted(passing) and passing[-1] > passing[0] + 3 * best["captured_error"]


def test_rows_are_the_simulation_at_the_same_seed(fast_file):
    """Common random numbers: every design uses the seed given; a row is what simulate gives."""
    axis = service.parse_vary("chirp.force_fraction=0.6:0.7:2")
    result = service.scan(fast_file, [axis], atoms=300, seed=11, workers=1)
    start = service.base(fast_file)
    for row in result.rows:
        sc = start.load(row["values"])
        doc = simulate(sc, atoms=300, seed=11, baselines=False).to_json()
        assert row["seed"] == 11 and row["captured_fraction"] == doc["captured_fraction"]
        n = 300
        p = doc["captured_fraction"]
        assert row["captured_error"] == pytest.approx(math.sqrt(p * (1 - p) / n))


@pytest.mark.slow
def test_table_files_and_json_agree(fast_file, tmp_path):
    out = tmp_path / "out"
    result = run_cli("scan", fast_file, "--vary", "chirp.start_velocity=200 m/s:230 m/s:2",
                     "--vary", "chirp.force_fraction=0.5:0.6:2", "--atoms", 200, "--workers", 1,
                     "-o", out, "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert doc["designs"] == 4 and doc["finished"] == 4 and not doc["interrupted"]
    assert json.loads((out / "fast-scan.json").read_text())["rows"] == doc["rows"]
    table = list(csv.DictReader(io.StringIO((out / "fast-scan.csv").read_text())))
    assert [r["chirp.start_velocity (m/s)"] for r in table] == ["200", "200", "230", "230"]
    assert [r["chirp.force_fraction"] for r in table] == ["0.5", "0.6", "0.5", "0.6"]
    for line, row in zip(table, doc["rows"]):
        assert line["verdict"] == row["verdict"]
        assert line["failing_rules"] == ";".join(row["failing_rules"])
        assert float(line["captured_fraction"]) == pytest.approx(row["captured_fraction"])
    assert (out / "fast-scan.png").stat().st_size > 0


def test_a_design_that_cannot_exist_is_a_row(fast_file):
    """Each end of each key is possible, one combination is not (the end above the start): that one
    design is a row that says why, the others run."""
    axes = [service.parse_vary("chirp.start_velocity=200 m/s:260 m/s:2"),
            service.parse_vary("chirp.end_velocity=15 m/s:230 m/s:2")]
    result = service.scan(fast_file, axes, atoms=100, seed=0, workers=1)
    assert [r["verdict"] == "invalid" for r in result.rows] == [False, True, False, False]
    assert "end velocity below the start velocity" in result.rows[1]["message"]
    assert result.rows[1]["captured_fraction"] is None and result.rows[0]["captured_fraction"] is not None


@pytest.mark.slow
def test_plot_data_line_and_map(fast_file):
    from sweepgen.search_plots import scan_figure, scan_line, scan_map

    one = service.scan(fast_file, [service.parse_vary("chirp.start_velocity=200 m/s:230 m/s:3")], atoms=100,
                       workers=1)
    line = scan_line(one)
    assert list(line.x) == [200, 215, 230] and list(line.verdict) == ["pass", "fail", "fail"]
    assert list(line.y) == [r["captured_fraction"] for r in one.rows]
    two = service.scan(fast_file, [service.parse_vary("chirp.start_velocity=200 m/s:230 m/s:2"),
                                   service.parse_vary("chirp.force_fraction=0.5:0.7:3")], atoms=100, workers=1)
    grid = scan_map(two)
    assert grid.z.shape == (3, 2)
    for r in two.rows:
        v = float(r["values"]["chirp.start_velocity"].split()[0])
        i, j = list(grid.y).index(r["values"]["chirp.force_fraction"]), list(grid.x).index(v)
        assert grid.z[i, j] == r["captured_fraction"] and grid.verdict[i, j] == r["verdict"]
    fig = scan_figure(two)
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert any("fails check" in t for t in labels)


@pytest.mark.slow
def test_same_rows_on_one_two_workers_and_a_dask_cluster(fast_file):
    """Seeds come from the design alone: 1 process, 2 processes and a real Dask LocalCluster agree."""
    distributed = pytest.importorskip("distributed")
    axes = [service.parse_vary("chirp.force_fraction=0.5:0.7:3")]
    one = service.scan(fast_file, axes, atoms=300, seed=3, workers=1).rows
    two = service.scan(fast_file, axes, atoms=300, seed=3, workers=2).rows
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        dask = service.scan(fast_file, axes, atoms=300, seed=3, cluster=cluster.scheduler_address)
    assert one == two == dask.rows
    assert dask.where == {"cluster": cluster.scheduler_address}
    assert np.unique([r["captured_fraction"] for r in one]).size > 1     # the designs do differ


def test_a_grid_beyond_the_most_designs_is_refused_before_it_is_built():
    # 10⁴ × 10⁴ values: 10⁸ designs, refused by their count; building them first took 8 GB and minutes
    import tracemalloc

    axes = [service.Axis(key, tuple(float(v) for v in range(10_000)), tuple(float(v) for v in range(10_000)), "")
            for key in ("chirp.force_fraction", "light.saturation")]
    tracemalloc.start()
    try:
        with pytest.raises(InputError, match=r"100000000 designs; at most 100000") as info:
            service.scan("rb87-chopped-oven", axes, atoms=10)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert info.value.key == "vary" and peak < 20 << 20


def test_bad_input_leaves_no_folder(fast_file, tmp_path):
    result = run_cli("scan", fast_file, "--vary", "chirp.force_fraction=0.5:1.5:3", "-o", tmp_path / "new")
    assert result.exit_code == 2 and not (tmp_path / "new").exists()
