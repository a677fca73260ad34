"""``hdf5``: a self-describing HDF5 file laid out by the NeXus NXdata convention.

Needs h5py (``pip install 'sweepgen[hdf5]'``): this driver is also the example
of a plug-in with a dependency of its own. It registers in the entry-point group
``sweepgen.drivers`` like every built-in driver, imports h5py only when it
writes or reads, and says what to install when h5py is missing.

Layout (NeXus International Advisory Committee, nexusformat.org: ``NX_class``
attributes, the ``default`` chain from the root to the plotted group, and in an
NXdata group the ``signal`` and ``axes`` attributes naming the plotted field and
its axis, each field with a ``units`` attribute)::

    /                      NX_class = "NXroot", default = "entry", creator, file_time
    /entry                 NX_class = "NXentry", default = "sweep", title
    /entry/sweep           NX_class = "NXdata", signal = "detuning", axes = ["time"],
                           time_indices = 0, and every sidecar field as an attribute
    /entry/sweep/detuning  float64, units "Hz": the optical detuning the codes play
    /entry/sweep/time      float64, units "s": after the trigger edge, delay + index / sample_rate
                           (delay: the sidecar's timing.delay, 0 without)
    /entry/sweep/drive     float64, units "V" (or "Hz"): the drive the codes play
    /entry/sweep/code      the table itself: generator codes in their own dtype, units "1"

A gate's or a marker's table holds no detuning: its signal is ``level`` (float64,
units "1": a gate's fraction of full intensity, a marker's 0 low to 1 high) in
place of ``detuning``.

Sidecar fields that are tables or lists of mixed values (``scaling``,
``generator``, ``chain``, ``provenance``, ...) are stored as JSON text; the
attribute ``json_attributes`` lists them. A JSON sidecar is written beside the
file as for every file driver (with the SHA-256 of the whole file); inside the
file, ``table_sha256`` is the SHA-256 of the ``code`` data.
"""

from __future__ import annotations

import json
from datetime import datetime, timezone

import numpy as np

from sweepgen.drivers.base import FileDriver
from sweepgen.errors import DriverError, InputError

GROUP = "entry/sweep"
COMPRESSION = ("none", "gzip")
#: samples per HDF5 chunk (and per write)
CHUNK = 1 << 16


def _h5py():
    try:
        import h5py
    except ImportError:
        raise DriverError("the hdf5 driver needs h5py: pip install 'sweepgen[hdf5]'") from None
    return h5py


def _attribute(value):
    """An HDF5 attribute value for one sidecar field, and whether it was stored as JSON text."""
    if value is None:
        return "null", True
    if isinstance(value, (bool, int, float, str)):
        return value, False
    if isinstance(value, list) and value and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                                 for v in value):
        return np.asarray(value), False
    return json.dumps(value), True


class Hdf5Driver(FileDriver):
    name = "hdf5"
    extension = "h5"
    suffixes = (".h5", ".hdf5", ".nxs")
    description = ("HDF5 file, NeXus NXdata layout (detuning or level, drive and codes versus time after the "
                   "trigger, with units); needs h5py")
    options = {"compression": "none (default) | gzip"}
    choices = {"compression": tuple(COMPRESSION)}
    writes_path = True
    self_describing = True

    def layout(self, table, options):
        comp = str(options.get("compression", "none"))
        if comp not in COMPRESSION:
            raise InputError(f"expected one of {', '.join(COMPRESSION)}, got {comp!r}", key="--option compression")
        return {"dtype": np.dtype(table.info.dtype).newbyteorder("<").str, "header_bytes": None,
                "byte_order": "little", "value_to_code": {"offset": 0, "scale": 1},
                "hdf5_group": GROUP, "hdf5_dataset": "code", "compression": comp}

    def write_path(self, table, path, layout, delivery, fields):
        h5py = _h5py()
        info = table.info
        n = info.count
        comp = None if layout["compression"] == "none" else "gzip"
        chunks = (min(CHUNK, n),) if n else None
        with h5py.File(path, "w") as f:
            f.attrs.update({"NX_class": "NXroot", "default": "entry", "creator": "sweepgen",
                            "creator_version": fields["tool"]["version"],
                            "file_time": datetime.now(timezone.utc).isoformat(timespec="seconds")})
            entry = f.create_group("entry")
            entry.attrs.update({"NX_class": "NXentry", "default": "sweep"})
            entry.create_dataset("title", data="sweepgen sample table")
            g = f.create_group(GROUP)
            made = {}
            for name, dtype, unit, long_name in (
                    _signal(info, fields), ("time", "<f8", "s", "time after the trigger"),
                    ("drive", "<f8", info.drive_unit, "drive at the actuator"),
                    ("code", layout["dtype"], "1", "generator code")):
                d = g.create_dataset(name, shape=(n,), dtype=dtype, chunks=chunks, compression=comp)
                d.attrs.update({"units": unit, "long_name": long_name})
                made[name] = d
            self._fill(table, made, fields)
            self._attributes(g, fields, table.hexdigest(), info.quantity)

    @staticmethod
    def _fill(table, made, fields):
        from sweepgen.readback import ReadTable

        decode = ReadTable(None, fields, np.empty(0), "hdf5")
        info = table.info
        for frame in table.frames(CHUNK):
            a, b = frame.start, frame.start + len(frame.codes)
            decode.values = np.asarray(frame.codes)
            made["code"][a:b] = frame.codes
            made["time"][a:b] = info.after_trigger(np.arange(a, b) / info.sample_rate)
            made["drive"][a:b] = decode.drive()
            made[info.quantity][a:b] = decode.level() if info.quantity == "level" else decode.detuning()

    @staticmethod
    def _attributes(group, fields, digest, signal):
        doc = dict(fields, table_sha256=digest, sha256=None, data_bytes=None)
        as_json = []
        for key, value in doc.items():
            group.attrs[key], is_json = _attribute(value)
            if is_json:
                as_json.append(key)
        group.attrs.update({"NX_class": "NXdata", "signal": signal, "axes": ["time"], "time_indices": 0,
                            "json_attributes": json.dumps(as_json)})

    # -- reading back ----------------------------------------------------------------------------
    def load_values(self, path, doc):
        h5py = _h5py()
        with h5py.File(path, "r") as f:
            return np.asarray(f[doc.get("hdf5_group", GROUP)][doc.get("hdf5_dataset", "code")][()])

    def read(self, source, delivery=None):
        from pathlib import Path

        from sweepgen import readback

        data, side = readback.locate(source)
        if side is not None:
            return super().read(source, delivery)
        h5py = _h5py()
        try:
            with h5py.File(data, "r") as f:
                g = f[GROUP]
                as_json = set(json.loads(g.attrs.get("json_attributes", "[]")))
                doc = {k: (json.loads(v) if k in as_json else _plain(v)) for k, v in g.attrs.items()
                       if k not in ("NX_class", "signal", "axes", "time_indices", "json_attributes")}
                values = np.asarray(g["code"][()])
        except (OSError, KeyError) as exc:
            raise InputError(f"not a sweepgen HDF5 table ({exc})", file=str(data)) from None
        readback.require_keys(doc, data)
        table = readback.ReadTable(Path(data), doc, values, self.name, [])
        table.checks += readback.value_checks(table)
        return table


#: what a level means, by the channel's kind (the ``long_name`` of the ``level`` field)
LEVEL_MEANING = {"gate": "level: fraction of full intensity", "marker": "level: 0 low, 1 high"}


def _signal(info, fields) -> tuple:
    """``(name, dtype, units, long_name)`` of the plotted field: the detuning, or a level table's level."""
    if info.quantity != "level":
        return "detuning", "<f8", "Hz", "optical detuning"
    kind = (fields.get("channel") or {}).get("kind")
    return "level", "<f8", "1", LEVEL_MEANING.get(kind, "level")


def _plain(value):
    if isinstance(value, bytes):
        return value.decode("utf-8")
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    return value
