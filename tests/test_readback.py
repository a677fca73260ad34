"""Reading tables back: export -> read round trips for every built-in format and the HDF5 driver,
the HDF5 file checked with h5py directly against the NeXus NXdata attribute names (NeXus
International Advisory Committee, nexusformat.org: NX_class, default, signal, axes,
AXISNAME_indices, units; recalled), and the sweep's numbers against the plan."""

import hashlib

import h5py
import numpy as np
import pytest

from sweepgen import drivers, readback
from sweepgen.drivers.base import Delivery
from sweepgen.errors import InputError
from sweepgen.playback import prepare

FORMATS = [("csv", {}), ("raw", {}), ("raw", {"dtype": "uint16", "byte_order": "big"}),
           ("raw", {"dtype": "float32"}), ("npy", {"byte_order": "big"}), ("hdf5", {}),
           ("hdf5", {"compression": "gzip"})]


@pytest.fixture(scope="module")
def rendered():
    played = prepare("rb87-chopped-oven")
    return played.scenario, played.plan, played.table()


def export(table, fmt, options, folder):
    cls = drivers.load(fmt, kind="file")
    report = cls().deliver(table, Delivery(destination=str(folder), options=dict(options, name="sweep")))
    return report


@pytest.mark.parametrize("fmt,options", FORMATS)
def test_export_then_read_back_round_trip(rendered, tmp_path, fmt, options):
    sc, p, table = rendered
    report = export(table, fmt, options, tmp_path)
    # the digest of the codes is the rendered table's, whatever the format
    assert report["table_sha256"] == table.sha256
    back = drivers.read_table(report["paths"][0])
    assert back.driver == fmt and back.verified
    assert {c["check"] for c in back.checks} >= {"sha256", "count", "table_sha256"}
    codes = table.codes()
    assert np.array_equal(back.codes(), codes)
    info = table.info
    assert np.allclose(back.drive(), info.code_offset + info.code_scale * codes.astype(float), rtol=0, atol=1e-12)
    # decoded detuning is the plan within one code step (quantisation) plus the step per sample
    t = back.time()[: info.period_count]
    planned = p.schedule().detuning(t)
    step = abs(back.sidecar["scaling"]["detuning"]["scale"])
    assert np.max(np.abs(back.detuning()[: info.period_count] - planned)) <= step


def test_a_changed_byte_fails_verification(rendered, tmp_path):
    report = export(rendered[2], "raw", {}, tmp_path)
    path = tmp_path / "sweep.bin"
    data = bytearray(path.read_bytes())
    data[100] ^= 0x01
    path.write_bytes(bytes(data))
    back = drivers.read_table(str(path))
    assert not back.verified
    failed = {c["check"] for c in back.checks if not c["ok"]}
    assert failed == {"sha256", "table_sha256"}
    assert back.checks[1]["found"] == hashlib.sha256(bytes(data)).hexdigest()    # reference: hashlib


def test_hdf5_file_follows_nexus_nxdata_read_with_h5py(rendered, tmp_path):
    sc, p, table = rendered
    report = export(table, "hdf5", {}, tmp_path)
    with h5py.File(report["paths"][0], "r") as f:
        assert f.attrs["NX_class"] == "NXroot" and f.attrs["default"] == "entry"
        entry = f[f.attrs["default"]]
        assert entry.attrs["NX_class"] == "NXentry"
        data = entry[entry.attrs["default"]]
        assert data.attrs["NX_class"] == "NXdata"
        signal = data[data.attrs["signal"]]
        axis = data[list(data.attrs["axes"])[0]]
        assert data.attrs["signal"] == "detuning" and signal.attrs["units"] == "Hz"
        assert axis.attrs["units"] == "s" and data.attrs["time_indices"] == 0
        for name in ("drive", "code"):
            assert "units" in data[name].attrs
        assert signal.shape == axis.shape == (table.info.count,)
        # the time axis is index / sample_rate; the code field is the table itself
        assert axis[5] == pytest.approx(5 / table.info.sample_rate)
        assert np.array_equal(data["code"][()], table.codes())
        assert hashlib.sha256(data["code"][()].astype("<i2").tobytes()).hexdigest() == data.attrs["table_sha256"]
        # every sidecar field is an attribute
        side = readback.load_sidecar(report["paths"][1])
        for key in side:
            if key not in ("sha256", "data_bytes", "created"):
                assert key in data.attrs, key
        assert data.attrs["sample_rate"] == side["sample_rate"]


def test_hdf5_reads_without_its_json_sidecar(rendered, tmp_path):
    report = export(rendered[2], "hdf5", {}, tmp_path)
    (tmp_path / "sweep.h5.json").unlink()
    back = drivers.read_table(report["paths"][0])
    assert back.verified and back.driver == "hdf5"
    assert np.array_equal(back.codes(), rendered[2].codes())


def test_numbers_of_a_table_agree_with_its_plan(rendered, tmp_path):
    sc, p, table = rendered
    back = drivers.read_table(export(table, "npy", {}, tmp_path)["paths"][0])
    nums = readback.analyse(back)
    step = nums["detuning_step"]
    assert nums["start_detuning"] == pytest.approx(p.start_detuning, abs=step)
    assert nums["end_detuning"] == pytest.approx(p.end_detuning, abs=step)
    # a part ends where the detuning comes within one code step of the level: the time to move a step
    dt = step / p.chirp_rate_max + 1 / table.info.sample_rate
    assert nums["chirp_duration"] == pytest.approx(p.chirp_duration, abs=2 * dt)
    # the start level is itself rounded to a code (half a step), so the start may show up to half a step later
    assert nums["chirp_start"] == pytest.approx(p.chirp_start, abs=dt + 0.5 * step / p.chirp_rate_max)
    assert nums["chirp_rate_max"] == pytest.approx(p.chirp_rate_max, rel=0.01)
    sched, error = readback.table_schedule(back.detuning(), back.sample_rate, nums["period_count"], step)
    assert error <= 2 * step
    assert sched.max_abs_chirp_rate("chirp") == pytest.approx(p.chirp_rate_max, rel=0.01)
    assert sched.max_abs_chirp_rate("return") == pytest.approx(p.schedule().max_abs_chirp_rate("return"), rel=0.01)


def test_missing_sidecar_is_refused(rendered, tmp_path):
    export(rendered[2], "raw", {}, tmp_path)
    (tmp_path / "sweep.bin.json").unlink()
    with pytest.raises(InputError, match="no sidecar sweep.bin.json"):
        drivers.read_table(str(tmp_path / "sweep.bin"))
