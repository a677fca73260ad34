"""The public API (``import sweepgen``): the same documents as the command line, scenarios from dicts,
notebook displays, errors as exceptions, lazy imports."""

import dataclasses
import json
import subprocess
import sys

import numpy as np
import pytest
from click.testing import CliRunner

import sweepgen
from sweepgen._format import si
from sweepgen.cli import main
from sweepgen.planner import plan as internal_plan
from sweepgen.scenario import load_scenario as internal_load

SHIPPED = ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"]


def cli_json(*args):
    result = CliRunner().invoke(main, [str(a) for a in args] + ["--json"])
    return result.exit_code, json.loads(result.stdout)


# -- the CLI's --json is the API's to_json() -------------------------------------------------------
@pytest.mark.slow
@pytest.mark.parametrize("key", SHIPPED)
def test_plan_check_and_upload_dry_run_documents_equal_the_command_line(key):
    assert cli_json("plan", key)[1] == sweepgen.plan(key).to_json()
    assert cli_json("check", key)[1] == sweepgen.check(key).to_json()
    code, doc = cli_json("upload", key, "--dry-run")
    assert code == 0 and doc == sweepgen.upload(key, dry_run=True).to_json()


def test_plan_compare_field_equals_the_command_line_and_refuses_without_zeeman_data():
    # plan(..., compare_field=True) is 'plan --compare-field': the same tapered_field numbers; without it no key
    result = sweepgen.plan("na23-continuous-focused", compare_field=True)
    code, doc = cli_json("plan", "na23-continuous-focused", "--compare-field")
    assert code == 0 and doc == result.to_json() and "tapered_field" in doc
    assert result.field_slower().to_json() == doc["tapered_field"]
    plain = sweepgen.plan("na23-continuous-focused")
    assert "tapered_field" not in plain.to_json()
    assert plain.field_slower().to_json() == doc["tapered_field"]       # worked out when asked for
    with pytest.raises(sweepgen.errors.InputError, match="zeeman"):
        sweepgen.plan("caf-buffer-gas", compare_field=True)


@pytest.mark.slow
def test_simulate_compare_field_equals_the_command_line_and_refuses_before_any_atom_flies():
    code, doc = cli_json("simulate", "na23-continuous-focused", "--atoms", "300", "--seed", "4", "--compare-field")
    result = sweepgen.simulate("na23-continuous-focused", atoms=300, seed=4, compare_field=True)
    assert code == 0 and doc == result.to_json() and doc["tapered_field"]["atoms"] == 300
    started = []
    with pytest.raises(sweepgen.errors.InputError, match="zeeman"):
        sweepgen.simulate("caf-buffer-gas", atoms=300, compare_field=True, before_run=lambda *a: started.append(a))
    assert started == []


@pytest.mark.parametrize("key", [pytest.param(k, marks=pytest.mark.slow) if k != SHIPPED[0] else k for k in SHIPPED])
def test_simulate_document_equals_the_command_line(key):
    code, doc = cli_json("simulate", key, "--atoms", "300", "--seed", "4")
    assert code == 0 and doc == sweepgen.simulate(key, atoms=300, seed=4).to_json()


@pytest.mark.parametrize("key", SHIPPED)
def test_export_and_inspect_documents_equal_the_command_line(tmp_path, key):
    options = {"byte_order": "big"}
    code, doc = cli_json("export", key, "-f", "raw", "-o", tmp_path / "t", "-O", "byte_order=big")
    api = sweepgen.export(key, "raw", tmp_path / "t", options=options)
    assert code == 0 and doc == api.to_json()          # the same folder and name: the same paths
    code, doc = cli_json("inspect", api.paths[0])
    assert code == 0 and doc == sweepgen.inspect(api.paths[0]).to_json()


@pytest.mark.slow
def test_compare_and_calibrate_documents_equal_the_command_line(tmp_path):
    s = internal_plan(internal_load(SHIPPED[0])).schedule()
    t = np.arange(0, 0.04, 4e-6)
    trace = tmp_path / "trace.csv"
    trace.write_text("time (s),detuning (Hz)\n" + "".join(f"{a:.7f},{b:.1f}\n" for a, b in
                                                        zip(t, s.detuning(t + 0.003))))
    code, doc = cli_json("compare", SHIPPED[0], trace)
    assert code == 0 and doc == sweepgen.compare(SHIPPED[0], trace).to_json()
    u = np.linspace(-5, 5, 300)
    points = tmp_path / "piezo.csv"
    points.write_text("drive (V),detuning (MHz)\n" + "".join(f"{a:.6f},{-180 + 41 * a + 0.6 * a * a:.6f}\n"
                                                             for a in u))
    code, doc = cli_json("calibrate", points, "--laser", "demo-ecdl-piezo", "--stage", "analog", "-o",
                         tmp_path / "a.toml")
    api = sweepgen.calibrate(points, "demo-ecdl-piezo", "analog", output=tmp_path / "b.toml")
    assert code == 0
    assert {k: v for k, v in doc.items() if k not in ("profile", "plot")} == \
        {k: v for k, v in api.to_json().items() if k not in ("profile", "plot")}
    assert api.profile == str(tmp_path / "b.toml") and (tmp_path / "b.png").stat().st_size > 0


def test_a_bad_plot_file_is_refused_before_anything_is_written(tmp_path):
    # the plot's file is checked first: a calibration with a .pdf plot writes no profile (nothing
    # half-written), and the error names the API's parameter (plot, path), not the command's option
    u = np.linspace(-5, 5, 300)
    points = tmp_path / "piezo.csv"
    points.write_text("drive (V),detuning (MHz)\n" + "".join(f"{a:.6f},{-180 + 41 * a:.6f}\n" for a in u))
    with pytest.raises(sweepgen.InputError) as exc:
        sweepgen.calibrate(points, "demo-ecdl-piezo", "analog", output=tmp_path / "c.toml", plot=tmp_path / "fit.pdf")
    assert exc.value.key == "plot" and ".png or .svg" in str(exc.value)
    assert not (tmp_path / "c.toml").exists() and list(tmp_path.iterdir()) == [points]
    result = sweepgen.plan(SHIPPED[0])
    folder = tmp_path / "figures.png"
    folder.mkdir()
    for bad, words in ((tmp_path / "sweep.gif", ".png or .svg"), (tmp_path / "none" / "sweep.png", "does not exist"),
                       (folder, "is a folder")):
        with pytest.raises(sweepgen.InputError) as exc:
            result.plot(bad)
        assert exc.value.key == "path" and words in str(exc.value)
    assert sorted(tmp_path.iterdir()) == sorted([points, folder]) and not any(folder.iterdir())


def test_compare_errors_name_the_api_parameter_and_the_command_option(tmp_path):
    # a beat-note trace without the reference laser's detuning, an unknown marker event, a marker event
    # without a time on a trace with no marker column: from Python the error names the parameter
    # (reference, marker, marker_time), from the command line the option
    t = np.arange(0, 0.02, 1e-5)
    beat = tmp_path / "beat.csv"
    beat.write_text("time (s),beat (MHz)\n" + "".join(f"{a:.6f},{100 + a * 1e3:.6f}\n" for a in t))
    for kwargs, key in (({}, "reference"), ({"reference": "-1.2 GHz", "marker": "lunch"}, "marker"),
                        ({"reference": "-1.2 GHz", "marker": "trigger"}, "marker_time")):
        with pytest.raises(sweepgen.InputError) as exc:
            sweepgen.compare(SHIPPED[0], beat, **kwargs)
        assert exc.value.key == key and "--" not in str(exc.value)
    for args, option in (([], "--reference"), (["--reference", "-1.2 GHz", "--marker", "lunch"], "--marker"),
                         (["--reference", "-1.2 GHz", "--marker", "trigger"], "--marker")):
        result = CliRunner().invoke(main, ["compare", SHIPPED[0], str(beat), *args])
        assert result.exit_code == 2 and f"option '{option}'" in result.stderr, result.stderr
        assert result.stderr.count("\n") == 1


# -- scenarios from dicts ----------------------------------------------------------------------
@pytest.mark.parametrize("key", SHIPPED)
def test_a_dict_built_scenario_equals_the_same_scenario_read_from_toml(key):
    from_toml = sweepgen.load_scenario(key)
    from_dict = sweepgen.load_scenario(sweepgen.scenario_dict(key))
    assert dataclasses.replace(from_dict, path=from_toml.path) == from_toml
    assert sweepgen.plan(from_dict).to_json() == sweepgen.plan(key).to_json()


def test_a_dict_is_copied_and_a_varied_key_changes_the_plan():
    doc = sweepgen.scenario_dict(SHIPPED[0])
    sc = sweepgen.load_scenario(doc)
    doc["chirp"]["force_fraction"] = 0.3
    assert sc.chirp.force_fraction == 0.6                     # loading took a copy
    slow, fast = sweepgen.plan(doc), sweepgen.plan(SHIPPED[0])
    # constant deceleration: the slowing distance (v1² − v2²)/(2 η a_max) scales as 1/η (textbook kinematics)
    assert slow.slowing_distance == pytest.approx(fast.slowing_distance * 0.6 / 0.3, rel=1e-3)


def test_bad_input_is_an_exception_naming_file_and_key():
    doc = sweepgen.scenario_dict(SHIPPED[0])
    doc["chirp"]["start_velocity"] = "260 kg"
    with pytest.raises(sweepgen.InputError) as info:
        sweepgen.plan(doc)
    assert info.value.file == "<dict>" and info.value.key == "chirp.start_velocity"
    with pytest.raises(sweepgen.InputError) as info:
        sweepgen.check(SHIPPED[0], sample_rate="ten")
    assert info.value.key == "sample_rate"
    with pytest.raises(sweepgen.InputError):
        sweepgen.simulate(SHIPPED[0], atoms=0)


def test_quantities_are_pint_quantities_of_the_si_attributes():
    p = sweepgen.plan(SHIPPED[0])
    q = p.quantity("chirp_rate_max")
    assert q.to("Hz/s").magnitude == pytest.approx(p.chirp_rate_max)
    assert str(p.quantity("start_velocity").units) == "meter / second"
    assert set(p.quantities()) >= {"start_velocity", "chirp_duration", "slowing_distance"}
    with pytest.raises(KeyError):
        p.quantity("findings")


def test_sample_rate_takes_floats_text_and_quantities():
    from sweepgen.units import registry

    ureg = registry()
    rates = [sweepgen.check(SHIPPED[0], sample_rate=r).sample_rate
             for r in (10e6, "10 MSa/s", ureg.Quantity(10, "MHz"))]
    assert rates == [10e6, 10e6, 10e6]


# -- notebook displays ---------------------------------------------------------------------------
@pytest.mark.slow
def test_each_result_renders_html_with_its_headline_numbers(tmp_path):
    p = sweepgen.plan(SHIPPED[0])
    html = p._repr_html_()
    for key in ("start_velocity", "chirp_rate_max", "slowing_distance"):
        unit = dict((k, u) for k, _, u in sweepgen.PlanResult.ROWS)[key]
        assert si(getattr(p, key), unit) in html
    c = sweepgen.check(SHIPPED[0])
    html = c._repr_html_()
    assert "8 MSa/s" in html and all(f.rule in html for f in c.findings) and "warn" in html
    s = sweepgen.simulate(SHIPPED[0], atoms=300, seed=1)
    assert si(s.captured_fraction, "") in s._repr_html_() and si(s.final_velocity_mean, "m/s") in s._repr_html_()
    u = sweepgen.upload(c, dry_run=True)
    assert u.table_sha256 in u._repr_html_() and "off" in u._repr_html_()
    e = c.export("npy", tmp_path)
    assert e.sha256 in e._repr_html_()
    i = sweepgen.inspect(e.paths[0])
    assert i.ok and si(i.chirp_span, "Hz") in i._repr_html_()
    for result in (p, c, s, u, e, i):
        assert type(result).__name__ in repr(result)


@pytest.mark.slow
def test_plot_returns_a_figure_or_writes_the_file(tmp_path):
    from matplotlib.figure import Figure

    p = sweepgen.plan(SHIPPED[0])
    assert isinstance(p.plot(), Figure)
    assert isinstance(sweepgen.check(SHIPPED[0]).plot(), Figure)
    path = sweepgen.simulate(SHIPPED[0], atoms=200).plot(tmp_path / "s.png")
    assert path.stat().st_size > 0


# -- upload through the API -----------------------------------------------------------------------
def test_upload_to_the_virtual_instrument_is_verified_and_off():
    checked = sweepgen.check(SHIPPED[0])
    with sweepgen.testing.instrument_server("virtual-awg") as server:
        result = checked.upload(server.resource)
        assert result.verified and not result.armed
        assert server.instrument.outputs_on == []


def test_a_failing_sweep_is_refused_with_its_findings(tmp_path):
    doc = sweepgen.scenario_dict(SHIPPED[0])
    doc["target"]["distance"] = "0.5 m"
    checked = sweepgen.check(doc)
    assert not checked.ok and checked.failures()
    with pytest.raises(sweepgen.CheckFailed) as info:
        checked.export("csv", tmp_path / "out")
    assert info.value.findings and not (tmp_path / "out").exists()
    with pytest.raises(sweepgen.CheckFailed):
        sweepgen.upload(checked, dry_run=True)


# -- the package stays light ------------------------------------------------------------------------
def test_import_sweepgen_loads_no_numerics_and_help_loads_no_api():
    code = ("import sys, sweepgen; heavy = [m for m in ('numpy', 'click', 'sweepgen.api', 'pint') if m in sys.modules];"
            "print(heavy)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"
    code = ("import sys; from click.testing import CliRunner; from sweepgen.cli import main;"
            "CliRunner().invoke(main, ['--help']); print('sweepgen.api' in sys.modules, 'numpy' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "False False"


def test_public_functions_keep_their_names_beside_modules_of_the_same_name():
    import sweepgen.render  # noqa: F401  (an internal module named like a public function)
    import sweepgen.simulate  # noqa: F401

    assert callable(sweepgen.simulate) and sweepgen.simulate.__module__ == "sweepgen.api"
    assert sweepgen.render.__module__ == "sweepgen.api" and sweepgen.compare.__module__ == "sweepgen.api"
    import sweepgen.optimise  # noqa: F401

    assert sweepgen.optimise.__module__ == "sweepgen.api"
    assert set(sweepgen.__all__) <= set(dir(sweepgen))


@pytest.mark.slow
def test_optimise_document_equals_the_command_line_and_takes_a_dict(tmp_path, monkeypatch):
    # the same search through the command and the function (same seed, one process): the same JSON but
    # for the files' paths; from a dict the winner is written whole and loads with the winning value; the
    # winner of a file naming its species by a relative path loads as a dict from another folder
    from conftest import to_toml
    from test_scan import FAST, largest_start_velocity

    from sweepgen.scenario import load_scenario

    (tmp_path / "profiles").mkdir()
    (tmp_path / "profiles" / "atom.toml").write_text(open(FAST["species"], encoding="utf-8").read())
    path = tmp_path / "fast.toml"
    path.write_text(to_toml({**FAST, "species": "profiles/atom.toml"}))
    free = "chirp.start_velocity=150 m/s:300 m/s"
    args = ("--atoms", "60", "--evaluations", "8", "--confirm-atoms", "200", "--workers", "1")
    code, doc = cli_json("optimise", path, "--free", free, *args, "-o", tmp_path / "cli")
    api = sweepgen.optimise(path, free, atoms=60, evaluations=8, confirm_atoms=200, workers=1, output=tmp_path / "py")
    got = api.to_json()
    assert code == 0 and {k: v for k, v in doc.items() if k != "files"} == {k: v for k, v in got.items()
                                                                          if k != "files"}
    assert set(got["files"]) == {"scenario", "plot", "report", "json"}
    best = float(api.best["values"]["chirp.start_velocity"].split()[0])
    assert 150 <= best <= largest_start_velocity(load_scenario(path)) + 1e-6
    from_dict = sweepgen.optimise(FAST, {"chirp.start_velocity": "150 m/s:300 m/s"}, atoms=60, evaluations=8,
                                  confirm_atoms=200, workers=1, output=tmp_path / "dict")
    assert from_dict.best == api.best                  # the same search from the same table
    written = load_scenario(from_dict.files["scenario"])
    assert written.chirp.start_velocity == pytest.approx(best)
    assert sweepgen.load_scenario(from_dict.best_scenario()).chirp.start_velocity == pytest.approx(best)
    (tmp_path / "elsewhere").mkdir()
    monkeypatch.chdir(tmp_path / "elsewhere")
    assert sweepgen.load_scenario(api.best_scenario()).chirp.start_velocity == pytest.approx(best)
    assert "improvement (confirmed)" in repr(api) and api.plot(tmp_path / "h.png").is_file()


@pytest.mark.slow
def test_scan_document_equals_the_command_line_and_takes_a_dict(tmp_path):
    vary = "chirp.force_fraction=0.5:0.6:2"
    code, doc = cli_json("scan", SHIPPED[0], "--vary", vary, "--atoms", "100", "--workers", "1", "-o", tmp_path / "c")
    api = sweepgen.scan(SHIPPED[0], vary, atoms=100, workers=1, output=tmp_path / "c")
    assert code == 0 and doc == api.to_json() and (tmp_path / "c" / "rb87-chopped-oven-scan.png").is_file()
    from_dict = sweepgen.scan(sweepgen.scenario_dict(SHIPPED[0]), {"chirp.force_fraction": "0.5:0.6:2"}, atoms=100,
                              workers=1)
    assert [r["captured_fraction"] for r in from_dict.rows] == [r["captured_fraction"] for r in api.rows]
    assert api.best() in api.rows and "force_fraction = 0.6" in api._repr_html_()


@pytest.mark.slow
def test_a_dict_built_scenario_exports_and_uploads_named_by_its_digest(tmp_path):
    doc = sweepgen.scenario_dict(SHIPPED[0])
    exported = sweepgen.export(doc, "csv", tmp_path / "t")
    assert exported.to_json()["paths"][0].endswith("dict.csv")
    dry = sweepgen.upload(doc, dry_run=True).to_json()
    assert dry["provenance"]["scenario"] is None and dry["provenance"]["scenario_digest"]


def test_errors_about_a_parameter_name_the_parameter_from_python_and_the_option_from_the_command_line():
    # the API speaks of its own parameters (vary, free, objective, workers); the commands of their options
    cases = [
        (lambda: sweepgen.scan(SHIPPED[0], "chirp.force_fraction=0.4:0.8"), "vary",
         ["scan", SHIPPED[0], "--vary", "chirp.force_fraction=0.4:0.8"], "option '--vary'"),
        (lambda: sweepgen.optimise(SHIPPED[0], ["chirp.force_fraction", "chirp.force_fraction"]), "free",
         ["optimise", SHIPPED[0], "--free", "chirp.force_fraction", "--free", "chirp.force_fraction"],
         "option '--free'"),
        (lambda: sweepgen.optimise(SHIPPED[0], "chirp.force_fraction", objective="atoms"), "objective",
         ["optimise", SHIPPED[0], "--free", "chirp.force_fraction", "--objective", "atoms"], "option '--objective'"),
        (lambda: sweepgen.scan(SHIPPED[0], "chirp.force_fraction=0.4:0.8:2", atoms=10, workers=0), "workers",
         None, None),
    ]
    for call, key, argv, words in cases:
        with pytest.raises(sweepgen.errors.InputError) as info:
            call()
        assert info.value.key == key and "--" not in str(info.value)
        if argv is not None:
            result = CliRunner().invoke(main, argv)
            assert result.exit_code == 2 and words in result.stderr, result.stderr
