"""The csv, raw and npy file drivers: round trips read back with NumPy alone, atomic writes.

The reader (``conftest.read_by_sidecar``) uses only ``json``, ``hashlib`` and NumPy and
takes everything from the sidecar, as a user's own script would.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from sweepgen.drivers.base import AtomicFileSet, Delivery
from sweepgen.drivers.csv_file import CsvDriver
from sweepgen.drivers.npy_file import NpyDriver
from sweepgen.drivers.raw_file import RawDriver, convert, storage
from sweepgen.errors import DriverError, InputError
from sweepgen.table import Frame, RenderedTable, TableInfo

from conftest import examples, read_by_sidecar


# -- a small table built directly (demo numbers) ------------------------------------------------
def make_table(count=1000, padding=8, *, dtype="<i2", code_min=-8192, code_max=8191, lookup=False,
               output="voltage", unit="V", rate=1e6, seed=1):
    """Codes of a ramp plus its planned detuning; code -> detuning is linear or a curve."""
    rng = np.random.default_rng(seed)
    period_count = count - padding
    codes = np.linspace(code_min * 0.9, code_max * 0.9, period_count).round().astype(dtype)
    codes = np.concatenate([codes, np.full(padding, codes[0], dtype=dtype)])
    step = 2.0e4                                           # Hz of detuning per code (demo)
    if lookup:
        grid = np.linspace(code_min, code_max, 4097)
        curve = -1e8 - step * grid - 1e-9 * grid.astype(float) ** 3 * step
        det_scaling = {"kind": "lookup", "code": grid.tolist(), "detuning": curve.tolist(),
                       "max_error": 1.0, "step": step}
        detuning = np.interp(codes.astype(float), grid, curve)
    else:
        det_scaling = {"kind": "linear", "offset": -1e8, "scale": -step}
        detuning = -1e8 - step * codes.astype(float)
    detuning = detuning + rng.uniform(-0.45, 0.45, count) * step      # planned, before quantisation
    info = TableInfo(sample_rate=rate, count=count, period_count=period_count, dtype=dtype, output=output,
                     drive_unit=unit, code_scale=1.25e-3, code_offset=0.25, amplitude=20.0, offset=0.0,
                     scenario_digest="ab" * 32, tool_version="test",
                     extra={"detuning_scaling": det_scaling,
                            "quantisation": {"code_min": code_min, "code_max": code_max}})
    return RenderedTable.from_arrays(info, codes, detuning=detuning), codes, detuning, step


CASES = [(CsvDriver, {}), (NpyDriver, {}), (NpyDriver, {"byte_order": "big"}),
         (RawDriver, {}), (RawDriver, {"dtype": "int16", "byte_order": "big"}),
         (RawDriver, {"dtype": "uint16"}), (RawDriver, {"dtype": "float32"})]


@pytest.mark.parametrize("lookup", [False, True])
@pytest.mark.parametrize("driver_cls,options", CASES)
def test_round_trip_from_the_sidecar_alone(tmp_path, driver_cls, options, lookup):
    table, codes, detuning, step = make_table(lookup=lookup)
    report = driver_cls().deliver(table, Delivery(str(tmp_path), options=dict(options, name="t")))
    sidecar_name = report["files"][1]
    values, got_codes, drive, got_det, side, _ = read_by_sidecar(tmp_path / sidecar_name)
    assert len(values) == side["count"] == table.info.count
    assert side["period_count"] + side["padding"] == side["count"]
    assert np.allclose(got_codes, codes, atol=1e-3)                   # exact codes (float32: < 1e-3)
    assert np.allclose(drive, 0.25 + 1.25e-3 * codes, atol=1.25e-6)
    # within one code step of the planned detuning (the data was built 0.45 step apart)
    assert np.max(np.abs(got_det - detuning)) <= step
    assert side["sample_rate"] == 1e6 and side["tool"]["version"] == "test"
    assert side["provenance"]["scenario_digest"] == "ab" * 32
    assert report["sha256"] == side["sha256"]
    # the table loops: the padding repeats the first sample
    assert np.all(got_codes[side["period_count"]:] == got_codes[0])


def test_byte_order_is_what_the_sidecar_says(tmp_path):
    table, codes, _, _ = make_table()
    RawDriver().deliver(table, Delivery(str(tmp_path), options={"dtype": "int16", "byte_order": "big"}))
    side = json.loads((tmp_path / "sweep.bin.json").read_text())
    assert side["byte_order"] == "big" and side["numpy_dtype"] == ">i2" and side["dtype"] == "int16"
    raw = (tmp_path / "sweep.bin").read_bytes()
    # the first value, big-endian by hand (two's complement)
    assert int.from_bytes(raw[:2], "big", signed=True) == int(codes[0])


def test_npy_file_loads_with_numpy(tmp_path):
    table, codes, _, _ = make_table()
    NpyDriver().deliver(table, Delivery(str(tmp_path)))
    assert np.array_equal(np.load(tmp_path / "sweep.npy"), codes)     # reference: numpy.load


def test_csv_columns(tmp_path):
    table, codes, detuning, _ = make_table(count=50, padding=2)
    CsvDriver().deliver(table, Delivery(str(tmp_path)))
    lines = (tmp_path / "sweep.csv").read_text().splitlines()
    assert lines[0] == "time_s,detuning_Hz,drive_V,code"
    data = np.loadtxt(tmp_path / "sweep.csv", delimiter=",", skiprows=1)
    assert np.allclose(data[:, 0], np.arange(50) / 1e6, rtol=0, atol=1e-15)
    assert np.array_equal(data[:, 1], detuning)                 # repr() round-trips float64 exactly
    assert np.array_equal(data[:, 3], codes)


def test_dds_words_keep_every_bit_in_native_and_are_refused_in_16_bits(tmp_path):
    table, codes, _, _ = make_table(dtype="<u4", code_min=4_294_967, code_max=1_717_986_918,
                                    output="frequency", unit="Hz")
    RawDriver().deliver(table, Delivery(str(tmp_path)))
    _, got, _, _, side, _ = read_by_sidecar(tmp_path / "sweep.bin.json")
    assert side["numpy_dtype"] == "<u4"
    assert np.array_equal(got.astype(np.uint64), codes.astype(np.uint64))
    for dtype in ("int16", "uint16", "float32"):
        with pytest.raises(InputError, match="dtype"):
            RawDriver().deliver(table, Delivery(str(tmp_path / "x"), options={"dtype": dtype}))
    assert not (tmp_path / "x").exists()


@settings(max_examples=examples(60))
@given(lo=st.integers(-40000, 40000), span=st.integers(1, 65536),
       dtype=st.sampled_from(["int16", "uint16", "float32"]), order=st.sampled_from(["little", "big"]),
       seed=st.integers(0, 1000))
def test_raw_storage_maps_every_code_back_exactly(lo, span, dtype, order, seed):
    hi = lo + span - 1
    table, _, _, _ = make_table(count=16, padding=0, dtype="<i4", code_min=lo, code_max=hi)
    spec = storage(table.info, dtype, order)
    codes = np.random.default_rng(seed).integers(lo, hi + 1, 300).astype("<i4")
    codes[:2] = lo, hi                                           # the ends of the range
    stored = convert(codes, spec)
    assert stored.dtype == np.dtype(spec["dtype"])
    vc = spec["value_to_code"]
    back = vc["offset"] + vc["scale"] * stored.astype(float)
    assert np.max(np.abs(back - codes)) < (1e-3 if dtype == "float32" else 1e-12)
    if dtype == "float32":
        assert np.all(np.abs(stored) <= 1.0)


def test_options_are_checked(tmp_path):
    table, _, _, _ = make_table()
    with pytest.raises(InputError, match="no option 'colour'"):
        RawDriver().deliver(table, Delivery(str(tmp_path), options={"colour": "red"}))
    with pytest.raises(InputError, match="byte_order"):
        RawDriver().deliver(table, Delivery(str(tmp_path), options={"byte_order": "middle"}))
    for bad in ("../up", "a/b", ".hidden", ""):
        with pytest.raises(InputError, match="file name"):
            NpyDriver().deliver(table, Delivery(str(tmp_path), options={"name": bad}))
    assert list(tmp_path.iterdir()) == []


def test_dry_run_writes_nothing(tmp_path):
    table, _, _, _ = make_table()
    report = CsvDriver().deliver(table, Delivery(str(tmp_path / "out"), dry_run=True))
    assert report["dry_run"] and report["files"] == ["sweep.csv", "sweep.csv.json"]
    assert not (tmp_path / "out").exists()


def test_progress_reaches_the_total(tmp_path):
    table, _, _, _ = make_table(count=3000)
    seen = []
    RawDriver().deliver(table, Delivery(str(tmp_path), progress=lambda d, t: seen.append((d, t))))
    assert seen[-1] == (6000, 6000)


# -- atomic writes -------------------------------------------------------------------------------
def failing_table(fail_at, exc=RuntimeError("generator cable pulled"), calls=None):
    """A table whose frame source raises once it reaches sample ``fail_at``."""
    good, codes, _, _ = make_table(count=4000)

    def source(start, stop):
        if calls is not None:
            calls.append(start)
        if stop > fail_at:
            raise exc
        return Frame(start, np.arange(start, stop) / 1e6, np.zeros(stop - start), np.zeros(stop - start),
                     codes[start:stop])

    return RenderedTable(good.info, source)


def snapshot(folder):
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


@pytest.mark.parametrize("driver_cls", [CsvDriver, NpyDriver, RawDriver])
@pytest.mark.parametrize("exc", [RuntimeError("boom"), KeyboardInterrupt(), DriverError("refused")])
def test_a_failure_mid_stream_leaves_the_folder_as_it_was(tmp_path, driver_cls, exc, monkeypatch):
    monkeypatch.setattr("sweepgen.table.DEFAULT_CHUNK", 1000)
    monkeypatch.setattr("sweepgen.drivers.csv_file.ROWS_PER_WRITE", 1000)
    (tmp_path / "notes.txt").write_text("mine")
    ext = driver_cls.extension
    (tmp_path / f"sweep.{ext}").write_bytes(b"old data")
    (tmp_path / f"sweep.{ext}.json").write_text('{"old": true}')
    before = snapshot(tmp_path)
    calls = []
    with pytest.raises(type(exc)):
        driver_cls().deliver(failing_table(2500, exc, calls), Delivery(str(tmp_path)))
    assert calls == [0, 1000, 2000]                           # two chunks were written before the failure
    assert snapshot(tmp_path) == before                       # no partial file, no temporaries


def test_a_failed_export_into_a_new_folder_leaves_no_folder(tmp_path):
    with pytest.raises(RuntimeError):
        RawDriver().deliver(failing_table(1), Delivery(str(tmp_path / "new")))
    assert list(tmp_path.iterdir()) == []                     # the folder made for it is gone again


def test_only_the_last_level_of_the_folder_is_created(tmp_path):
    table, _, _, _ = make_table()
    with pytest.raises(InputError, match="parent folder does not exist"):
        RawDriver().deliver(table, Delivery(str(tmp_path / "new" / "deeper")))
    assert list(tmp_path.iterdir()) == []


def test_a_full_disk_is_a_driver_error_and_leaves_nothing(tmp_path):
    """Writing to /dev/full fails with ENOSPC (a real device, Linux)."""
    if not os.path.exists("/dev/full"):
        pytest.skip("no /dev/full on this system")
    table, _, _, _ = make_table()
    out = tmp_path / "out"
    out.mkdir()

    class FullDisk(RawDriver):
        def write(self, table, writer, layout, delivery):
            with open("/dev/full", "wb", buffering=0) as full:
                writer.handle = full
                super().write(table, writer, layout, delivery)

    with pytest.raises(DriverError, match="left as it was"):
        FullDisk().deliver(table, Delivery(str(out)))
    assert list(out.iterdir()) == []


def test_a_success_replaces_both_files(tmp_path):
    (tmp_path / "sweep.npy").write_bytes(b"old")
    (tmp_path / "sweep.npy.json").write_text("{}")
    table, codes, _, _ = make_table()
    NpyDriver().deliver(table, Delivery(str(tmp_path)))
    assert np.array_equal(np.load(tmp_path / "sweep.npy"), codes)
    assert json.loads((tmp_path / "sweep.npy.json").read_text())["count"] == 1000
    assert sorted(os.listdir(tmp_path)) == ["sweep.npy", "sweep.npy.json"]


def test_when_the_last_rename_fails_the_first_file_is_rolled_back(tmp_path):
    (tmp_path / "data.bin").write_bytes(b"old data")
    files = AtomicFileSet(tmp_path)
    with pytest.raises(DriverError, match="left as it was"):
        with files:
            files.open("data.bin").write(b"new data")
            files.open("data.bin.json", "w").write("{}")
            (tmp_path / "data.bin.json").mkdir()          # something in the way of the sidecar
            (tmp_path / "data.bin.json" / "x").write_text("busy")
    assert (tmp_path / "data.bin").read_bytes() == b"old data"
    assert sorted(os.listdir(tmp_path)) == ["data.bin", "data.bin.json"]
    assert (tmp_path / "data.bin.json").is_dir()


def test_a_new_file_is_removed_when_a_later_rename_fails(tmp_path):
    files = AtomicFileSet(tmp_path)
    with pytest.raises(DriverError):
        with files:
            files.open("a.bin").write(b"a")
            files.open("a.bin.json", "w").write("{}")
            (tmp_path / "a.bin.json").mkdir()
            (tmp_path / "a.bin.json" / "x").write_text("busy")
    assert sorted(os.listdir(tmp_path)) == ["a.bin.json"]


def test_a_file_in_place_of_the_folder_is_an_error(tmp_path):
    (tmp_path / "out").write_text("a file")
    table, _, _, _ = make_table()
    with pytest.raises(InputError, match="not a folder"):
        RawDriver().deliver(table, Delivery(str(tmp_path / "out")))
