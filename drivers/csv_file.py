"""``csv``: one row per sample: time, detuning (or level), drive, code (comma separated, one header line).

* ``time_s``: when the sample plays after the trigger edge, ``delay + index /
  sample_rate`` (``delay``: the sidecar's ``timing.delay``, 0 without; its
  ``time`` says so);
* ``detuning_Hz``: the planned optical detuning at that time; in the table of
  a gate or a marker, ``level`` instead: its planned level, dimensionless (a
  gate's fraction of full intensity, a marker's 0 low to 1 high);
* ``drive_<unit>``: the planned drive (V at the actuator input, or Hz of the
  DDS output) before quantisation;
* ``code``: the generator code actually played (integer).

The code column is the table; the sidecar's ``scaling`` maps it (as ``value``)
to drive units and to detuning (or level). Read it back with
``numpy.loadtxt(path, delimiter=",", skiprows=1)``.
"""

from __future__ import annotations

import numpy as np

from sweepgen.drivers.base import FileDriver

ROWS_PER_WRITE = 1 << 15


def _lines(frame, info) -> str:
    codes = frame.codes.tolist()
    return "".join(f"{t!r},{d!r},{v!r},{c}\n" for t, d, v, c in
                   zip(info.after_trigger(frame.time).tolist(), frame.detuning.tolist(), frame.drive.tolist(),
                       codes))


class CsvDriver(FileDriver):
    name = "csv"
    extension = "csv"
    description = "text table: time, detuning (a gate's or marker's: level), drive, code (one row per sample)"
    options = {}

    def layout(self, table, options):
        info = table.info
        columns = [{"name": "time", "unit": "s"}, {"name": info.quantity, "unit": info.quantity_unit},
                   {"name": "drive", "unit": info.drive_unit}, {"name": "code", "unit": ""}]
        head = ",".join(f"{c['name']}_{c['unit']}" if c["unit"] else c["name"] for c in columns)
        return {"dtype": np.dtype(table.info.dtype).str, "header_bytes": None, "byte_order": "not applicable (text)",
                "value_to_code": {"offset": 0, "scale": 1}, "columns": columns, "value_column": "code",
                "delimiter": ",", "header_lines": 1, "encoding": "ascii", "_head": head}

    def write(self, table, out, layout, delivery):
        out.write((layout["_head"] + "\n").encode("ascii"))
        done = 0
        for frame in table.frames(ROWS_PER_WRITE):
            out.write(_lines(frame, table.info).encode("ascii"))
            done += len(frame.codes)
            if delivery.progress is not None:
                delivery.progress(done, table.info.count)

    def load_values(self, path, doc):
        names = [c["name"] for c in doc["columns"]]
        dtype = np.dtype(doc["numpy_dtype"]).newbyteorder("=")
        return np.loadtxt(path, delimiter=doc["delimiter"], skiprows=int(doc["header_lines"]),
                          usecols=names.index(doc["value_column"]), dtype=dtype, ndmin=1)
