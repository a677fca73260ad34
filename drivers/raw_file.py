"""``raw``: the codes as bare binary values (int16, uint16 or float32, stated byte order).

The file holds nothing but the values, ``count`` of them, no header; the JSON
sidecar says how to read and scale them. Stored values relate to the generator
codes by ``code = offset + scale * value`` (sidecar ``scaling.code``):

* ``native`` (default): the codes exactly as rendered (DAC codes, or DDS
  frequency tuning words), ``offset = 0, scale = 1``;
* ``int16`` / ``uint16``: the codes, shifted by 32768 when the generator's code
  range needs it to fit (offset binary <-> two's complement); refused when the
  code range spans more than 65536 levels;
* ``float32``: normalised to [-1, 1] over the generator's full code range
  (``code / full_scale`` for a DAC: the usual float format of waveform
  memories, full scale = the programmed amplitude); refused when the code range
  spans more than 2^24 levels, where float32 could not hold every code exactly.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from sweepgen.drivers.base import FileDriver
from sweepgen.errors import DriverError, InputError

DTYPES = ("native", "int16", "uint16", "float32")
ORDERS = {"little": "<", "big": ">"}


def code_range(info) -> tuple[int, int]:
    """The generator's full code range: ``±full_scale`` of a DAC, ``0..2^N − 1`` words of a DDS
    (from the renderer's quantisation), else the codes the table may hold, else the dtype's range."""
    q = (info.extra or {}).get("quantisation") or {}
    for lo, hi in (("full_min", "full_max"), ("code_min", "code_max")):
        if lo in q and hi in q:
            return int(q[lo]), int(q[hi])
    dt = np.dtype(info.dtype)
    if dt.kind in "iu":
        ii = np.iinfo(dt)
        return int(ii.min), int(ii.max)
    raise InputError(f"the table's codes are {dt.name}, not integers; use --option dtype=native",
                     key="--option dtype")


def storage(info, dtype: str, order: str) -> dict:
    """Stored dtype and the value -> code mapping for one choice of ``dtype`` and byte ``order``."""
    if dtype not in DTYPES:
        raise InputError(f"expected one of {', '.join(DTYPES)}, got {dtype!r}", key="--option dtype")
    if order not in ORDERS:
        raise InputError(f"expected 'little' or 'big', got {order!r}", key="--option byte_order")
    char = ORDERS[order]
    if dtype == "native":
        stored = np.dtype(info.dtype).newbyteorder(char)
        return {"dtype": stored.str, "value_to_code": {"offset": 0, "scale": 1}, "shift": 0}
    lo, hi = code_range(info)
    span = hi - lo + 1
    if dtype == "float32":
        if span > 2 ** 24:
            raise InputError(f"float32 cannot hold all {span} codes of this generator exactly "
                             f"(at most 2^24); use dtype=native", key="--option dtype")
        mid = (lo + hi) / 2.0
        half = (hi - lo) / 2.0 or 1.0          # a one-level range: any scale maps it
        return {"dtype": np.dtype(np.float32).newbyteorder(char).str,
                "value_to_code": {"offset": mid, "scale": half}, "normalised": True}
    ii = np.iinfo(np.dtype(dtype))
    if span > 2 ** 16:
        raise InputError(f"{dtype} holds 65536 levels but this generator's codes span {span} "
                         f"({lo}..{hi}); use dtype=native", key="--option dtype")
    for shift in (0, 32768, -32768):
        if ii.min <= lo - shift and hi - shift <= ii.max:
            break
    else:
        shift = lo - ii.min          # any span of at most 65536 levels fits after this shift
    return {"dtype": np.dtype(dtype).newbyteorder(char).str,
            "value_to_code": {"offset": shift, "scale": 1}, "shift": shift}


def convert(codes: np.ndarray, spec: dict) -> np.ndarray:
    """Codes -> stored values (C-contiguous, stored dtype); never wraps silently."""
    target = np.dtype(spec["dtype"])
    if target.kind == "f":
        vc = spec["value_to_code"]
        return ((codes.astype(np.float64) - vc["offset"]) / vc["scale"]).astype(target)
    shift = spec.get("shift", 0)
    if codes.dtype == target:
        return np.ascontiguousarray(codes)
    values = codes.astype(np.int64) - shift if shift else codes
    if values.size:
        ii = np.iinfo(target)
        lo, hi = int(values.min()), int(values.max())
        if lo < ii.min or hi > ii.max:
            raise DriverError(f"codes {lo}..{hi} do not fit {target.name}; nothing was written")
    return np.ascontiguousarray(values, dtype=target)


class RawDriver(FileDriver):
    name = "raw"
    extension = "bin"
    description = "bare binary values (int16, uint16, float32 or the native codes), byte order stated"
    options = {"dtype": "native (default) | int16 | uint16 | float32",
               "byte_order": "little (default) | big"}
    choices = {"dtype": DTYPES, "byte_order": tuple(ORDERS)}

    def layout(self, table, options):
        spec = storage(table.info, str(options.get("dtype", "native")),
                       str(options.get("byte_order", "little")))
        stored = np.dtype(spec["dtype"])
        out = {"dtype": spec["dtype"], "header_bytes": 0, "value_to_code": spec["value_to_code"],
               "expected_bytes": table.info.count * stored.itemsize, "_spec": spec}
        if spec.get("normalised"):
            out["normalised"] = "value = (code - offset_code) / half_range, in [-1, 1]"
        return out

    def write(self, table, out, layout, delivery):
        spec = layout["_spec"]
        for chunk in table.chunks():
            out.write(convert(chunk, spec))

    def load_values(self, path, doc):
        # at most the values the file holds: NumPy allocates the count it is given before reading
        dtype, offset = np.dtype(doc["numpy_dtype"]), int(doc.get("header_bytes") or 0)
        held = max(Path(path).stat().st_size - offset, 0) // dtype.itemsize
        return np.fromfile(path, dtype=dtype, count=min(int(doc["count"]), held), offset=offset)
