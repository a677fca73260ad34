"""``npy``: the codes as a NumPy ``.npy`` file (format 1.0, one-dimensional).

``numpy.load`` reads it directly; the sidecar adds the scaling to drive units
and detuning (a gate's or a marker's table: level), the sample rate and the provenance. The values are the codes
exactly as rendered (DAC codes or DDS frequency tuning words), in the byte order
asked for (little-endian by default).
"""

from __future__ import annotations

import io

import numpy as np

from sweepgen.drivers.base import FileDriver
from sweepgen.errors import InputError

ORDERS = {"little": "<", "big": ">"}


def header(dtype, count: int) -> bytes:
    """The ``.npy`` header (format 1.0) of a C-ordered 1-D array, written by NumPy's own code."""
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        buf, {"descr": np.lib.format.dtype_to_descr(np.dtype(dtype)), "fortran_order": False,
              "shape": (int(count),)})
    return buf.getvalue()


class NpyDriver(FileDriver):
    name = "npy"
    extension = "npy"
    description = "NumPy .npy file of the codes (numpy.load reads it)"
    options = {"byte_order": "little (default) | big"}
    choices = {"byte_order": tuple(ORDERS)}

    def layout(self, table, options):
        order = str(options.get("byte_order", "little"))
        if order not in ORDERS:
            raise InputError(f"expected 'little' or 'big', got {order!r}", key="--option byte_order")
        dtype = np.dtype(table.info.dtype).newbyteorder(ORDERS[order])
        head = header(dtype, table.info.count)
        return {"dtype": dtype.str, "header_bytes": len(head), "value_to_code": {"offset": 0, "scale": 1},
                "npy_format": "1.0", "expected_bytes": len(head) + table.info.count * dtype.itemsize,
                "_header": head}

    def write(self, table, out, layout, delivery):
        dtype = np.dtype(layout["dtype"])
        out.write(layout["_header"])
        for chunk in table.chunks():
            out.write(np.ascontiguousarray(chunk, dtype=dtype))

    def load_values(self, path, doc):
        return np.load(path, allow_pickle=False)
