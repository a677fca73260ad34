"""Calibrating a stage from a measurement file into a new laser profile (demo data, invented numbers)."""

import numpy as np
import pytest
from scipy import constants

from sweepgen.errors import InputError
from sweepgen.laser import load_laser
from sweepgen.measurements import read
from sweepgen.playback import prepare
from sweepgen.recalibration import Request, calibrate, to_json, write
from sweepgen.scenario import load_scenario


def piezo(u):
    return -180e6 + 40e6 * u + 0.8e6 * u ** 2


def write_csv(path, header, rows, comment="# invented demo measurement"):
    path.write_text(comment + "\n" + header + "\n" + "".join(",".join(f"{v:.9g}" for v in r) + "\n" for r in rows))
    return path


def measured(tmp_path, n=400, sigma=0.2e6, name="piezo.csv"):
    rng = np.random.default_rng(4)
    u = np.linspace(-5, 5, n)
    return write_csv(tmp_path / name, "drive (V),detuning (MHz)",
                     zip(u, (piezo(u) + rng.normal(0, sigma, n)) / 1e6))


def test_calibrated_profile_is_written_loads_and_checks(tmp_path):
    req = Request(str(measured(tmp_path)), "demo-ecdl-piezo", "piezo modulation input",
                  output=str(tmp_path / "piezo-cal.toml"))
    result = calibrate(req)
    path = write(result)
    laser = load_laser(str(path))
    stage = laser.chain.stages[0]
    assert stage.kind == "calibrated" and stage.calibration.degree == 2
    grid = np.linspace(-4.5, 4.5, 11)
    assert np.all(np.abs(laser.chain.to_detuning(grid) - piezo(grid)) < 4 * result.fit.fit.uncertainty(grid))
    doc = to_json(result)
    assert doc["residual_of"] == "optical detuning"
    assert doc["residual_rms"] == pytest.approx(0.2e6, rel=0.15)       # Hz, not volts
    assert doc["usable_range"]["drive"] == [-5.0, 5.0]
    # the comments of the user's profile are kept
    assert "# A piezo-tuned extended-cavity diode laser" in path.read_text()
    # the new profile plans and checks a built-in scenario
    sc = load_scenario("rb87-chopped-oven")
    report = prepare(sc, laser=laser).report
    assert report.finding("stage_range") is not None
    assert report.plan is not None


def test_never_overwrites_silently(tmp_path):
    out = tmp_path / "new.toml"
    out.write_text("keep me")
    req = Request(str(measured(tmp_path)), "demo-ecdl-piezo", "analog", output=str(out))
    with pytest.raises(InputError, match="exists"):
        write(calibrate(req))
    assert out.read_text() == "keep me"
    req.overwrite = True
    write(calibrate(req))
    assert "fit = \"polynomial\"" in out.read_text()


def test_wavemeter_frequency_and_beat_note_columns(tmp_path):
    f0 = constants.c / 780.241209686e-9       # Rb-87 D2 (Steck, recalled; the vacuum wavelength of rb87-d2)
    u = np.linspace(-5, 5, 100)
    wm = write_csv(tmp_path / "wm.tsv", "drive [V]\tfrequency [THz]", [])
    wm.write_text("drive [V]\tfrequency [THz]\n" + "".join(f"{a:.6f}\t{(f0 + piezo(a)) / 1e12:.12f}\n" for a in u))
    r = calibrate(Request(str(wm), "demo-ecdl-piezo", "1", transition=f0))
    assert abs(r.fit.poly(0.0) - piezo(0.0)) < 2e3           # the file holds 1 kHz digits
    beat = write_csv(tmp_path / "beat.csv", "drive_V,beat_MHz", zip(u, (-1.0e9 - piezo(u)) / -1e6))
    r = calibrate(Request(str(beat), "demo-ecdl-piezo", "analog", reference=-1.0e9, beat_sign=1))
    assert abs(r.fit.poly(2.0) - piezo(2.0)) < 1e3


def test_aom_vco_stage_from_optical_detuning(tmp_path):
    # optical detuning = -456 MHz - 2 (f_RF - 350 MHz): the VCO's RF is found through the AOM
    v = np.linspace(0, 10, 60)
    rf = 30e6 + 80e6 * v - 0.5e6 * v ** 2
    det = -456e6 - 2 * (rf - 350e6)
    path = write_csv(tmp_path / "vco.csv", "voltage (V),detuning (Hz)", zip(v, det))
    r = calibrate(Request(str(path), "demo-aom-vco", "vco"))
    assert r.fit.poly(5.0) == pytest.approx(30e6 + 400e6 - 12.5e6, abs=1e3)
    assert to_json(r)["residual_of"] == "RF frequency"
    assert r.optical_factor == pytest.approx(2.0)


def test_bad_files_are_refused_with_the_reason(tmp_path):
    u = np.linspace(-5, 5, 50)
    wrong = write_csv(tmp_path / "wrong.csv", "drive (MHz),detuning (MHz)", zip(u, piezo(u) / 1e6))
    with pytest.raises(InputError, match="column 'drive': wrong unit"):
        calibrate(Request(str(wrong), "demo-ecdl-piezo", "analog"))
    few = write_csv(tmp_path / "few.csv", "drive (V),detuning (MHz)", zip(u[:4], piezo(u[:4]) / 1e6))
    with pytest.raises(InputError, match="too few points"):
        calibrate(Request(str(few), "demo-ecdl-piezo", "analog"))
    nounit = write_csv(tmp_path / "nounit.csv", "drive,detuning (MHz)", zip(u, piezo(u) / 1e6))
    with pytest.raises(InputError, match="has no unit"):
        calibrate(Request(str(nounit), "demo-ecdl-piezo", "analog"))
    with pytest.raises(InputError, match="exact frequency relation"):
        calibrate(Request(str(measured(tmp_path)), "demo-aom-vco", "aom"))
    with pytest.raises(InputError, match="no stage 'nope'"):
        calibrate(Request(str(measured(tmp_path)), "demo-ecdl-piezo", "nope"))


def test_measurement_reader_formats(tmp_path):
    p = tmp_path / "m.txt"
    p.write_text("# comment\ntime (ms)  detuning (MHz)  marker\n0 -100 0\n1 -90 1\n")
    m = read(p)
    assert m.require("time", "s", "")[1] == pytest.approx(1e-3)
    assert m.require("detuning", "Hz", "")[0] == pytest.approx(-100e6)
    assert m.find("marker").values[1] == 1
