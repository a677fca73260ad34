"""The JSON sidecar written beside every exported table, built in one place.

A sidecar lets a reader decode the data file with NumPy alone, without
sweepgen. Its keys (SI units; frequencies and detunings in Hz):

``sweepgen_sidecar``
    Version of this layout (an integer, currently 2; version 2 renamed
    ``sampling.rate`` to ``sampling.sample_rate``).
``tool``
    ``{"name": "sweepgen", "version": ...}``.
``driver``, ``data_file``, ``data_bytes``, ``sha256``
    The driver that wrote the data file, its name (same folder), size and the
    SHA-256 of its bytes as written (the whole file).
``table_sha256``
    SHA-256 of the generator codes as little-endian bytes of
    ``generator.code_dtype``, whatever the file format: the digest an upload
    records for the table it sends, so a file and an upload can be matched. Format-specific keys
    follow (csv: ``columns``, ``value_column``, ``delimiter``,
    ``header_lines``; npy: ``npy_format``; raw float32: ``normalised``).
``sample_rate``, ``count``, ``period_count``, ``padding``, ``duration``, ``period``
    Samples per second; samples in the file; samples that cover one period of
    the sweep; the samples appended (copies of the first one) to reach the
    generator's record granularity; ``count / sample_rate``; the period of
    the schedule.
``time``
    When sample ``index`` plays, after the trigger edge: ``"t = index /
    sample_rate"``, or with a trigger delay ``"t = timing.delay + index /
    sample_rate (after the trigger edge)"``. The time a file writes (the csv
    ``time`` column, the hdf5 ``time`` field) is on this axis.
``dtype``, ``numpy_dtype``, ``byte_order``, ``header_bytes``
    How each stored value is encoded: ``int16`` / ``uint16`` / ``float32`` /
    ``int32`` / ``uint32`` / ``uint64``, the NumPy dtype string (with byte
    order) to pass to ``numpy.frombuffer``/``numpy.fromfile``, ``"little"`` or
    ``"big"``, and the bytes before the first value (``null`` for text).
``scaling``
    ``code``: ``code = offset + scale * value`` (generator code: DAC code or
    DDS frequency tuning word). ``drive``: ``drive = offset + scale * value``
    in ``unit`` (V at the actuator input, or Hz of the DDS output).
    ``detuning``: optical detuning in Hz, either ``{"kind": "linear",
    "offset", "scale"}`` (``detuning = offset + scale * value``) or, for a
    non-linear tuning chain, ``{"kind": "lookup", "value": [...], "detuning":
    [...]}`` to be used as ``numpy.interp(value, lookup["value"],
    lookup["detuning"])``; the lookup is dense enough that this interpolation
    is within ``max_error`` Hz, less than one code step (``step``, Hz).
    A gate's or a marker's table holds no detuning: its scaling has
    ``level`` instead (``{"kind": "linear", "offset", "scale", "unit": ""}``,
    ``level = offset + scale * value``, dimensionless): a gate's fraction of
    full intensity (0 dark), a marker's fraction of the way from its low to
    its high output (0 low, 1 high).
``generator``
    What to program besides the table: ``output`` ("voltage" | "frequency"),
    ``channel``, ``amplitude`` and ``offset`` (V, voltage outputs).
``chain``, ``sampling``, ``quantisation``
    How the drive, the sample rate and the codes were chosen (from the
    renderer): the stages, the rate and what limited it (a further output's
    table plays at the main light's rate, which every output of a scenario
    shares; its ``sampling.reason`` says so), the code window and the DAC's
    full scale.
``drive_range``, ``code_range``, ``safe_range``
    The drive over one period (exact extremes), the codes that span it, and
    the actuator's safe input range it was checked against.
``channel``, ``timing`` (scenarios with several outputs or a trigger delay)
    Which channel the table plays (``name``, ``kind``: ``frequency``, ``gate`` or
    ``marker``, ``output``, ``generator``, ``quantity``: ``detuning``, or ``level``
    for a gate or marker, whose scaling then has ``level``), and when: the trigger source and
    edge (sweepgen's words and the profile's names), ``delay`` (sample ``i``
    plays at ``delay + i / sample_rate`` after the trigger edge), burst or
    repeat, and the moments of the period on the trigger's axis.
``preshape`` (a pre-shaped drive, ``[drive] preshape``)
    The reference response the drive was pre-shaped for (``bandwidth``, Hz;
    ``reference_model``) and the ``sample_rate`` it was computed at. The
    table holds the drive played: its ``scaling.detuning`` is what that drive
    commands through the chain, not the laser's detuning (which follows the plan).
``created``
    When the file was written (UTC, ISO 8601).
``provenance``
    ``scenario_digest`` (:func:`sweepgen.scenario.scenario_digest`: the scenario
    and its species file) and, per profile used, its reference and the SHA-256
    of the file.
"""

from __future__ import annotations

import hashlib
import sys
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from sweepgen import __version__, _json

LAYOUT_VERSION = 2

_ORDER = {"<": "little", ">": "big", "|": "not applicable"}


def byte_order(dtype) -> str:
    """``"little"``, ``"big"`` or ``"not applicable"`` (single bytes) for a NumPy dtype."""
    dt = np.dtype(dtype)
    char = dt.byteorder
    if char == "=":
        return sys.byteorder
    return _ORDER[char]


def _linear(offset: float, scale: float, **extra) -> dict:
    return {"offset": float(offset), "scale": float(scale), **extra}


def scaling(info, value_to_code: dict) -> dict:
    """Stored value -> code, drive and the table's quantity (``info.quantity``: ``detuning`` in Hz,
    or ``level``, dimensionless) for a table (see the module doc)."""
    vc_off = float(value_to_code.get("offset", 0.0))
    vc_scale = float(value_to_code.get("scale", 1.0))
    out = {
        "code": _linear(vc_off, vc_scale),
        "drive": _linear(info.code_offset + info.code_scale * vc_off, info.code_scale * vc_scale,
                         unit=info.drive_unit),
    }
    name, unit = info.quantity, info.quantity_unit
    det = (info.extra or {}).get(f"{name}_scaling")           # from the renderer, code -> quantity
    if det is None:
        out[name] = None
    elif det["kind"] == "linear":
        out[name] = _linear(det["offset"] + det["scale"] * vc_off, det["scale"] * vc_scale, kind="linear", unit=unit)
    else:
        codes = np.asarray(det["code"], dtype=float)
        values = (codes - vc_off) / vc_scale
        out[name] = {"kind": "lookup", "unit": unit, "value": values.tolist(),
                     name: [float(x) for x in det["detuning"]],
                     "max_error": det.get("max_error"), "step": det.get("step")}
    return out


def time_axis(info) -> str:
    """The sidecar's ``time``: when sample ``index`` plays, after the trigger edge."""
    if not info.delay:
        return "t = index / sample_rate"
    return "t = timing.delay + index / sample_rate (after the trigger edge)"


def build(info, *, driver: str, data_file: str, sha256: str | None, nbytes: int, layout: dict,
          provenance: dict | None = None, table_sha256: str | None = None) -> dict:
    """The sidecar document for one data file.

    Parameters
    ----------
    info : sweepgen.table.TableInfo
        The table's metadata (rate, count, code scaling; ``extra`` from the renderer).
    driver, data_file, sha256, nbytes
        Who wrote which file (name in the same folder), its SHA-256 and size.
    layout : dict
        From :meth:`sweepgen.drivers.base.FileDriver.layout`: ``dtype`` as stored,
        ``header_bytes``, ``value_to_code`` and format-specific keys.
    provenance : dict, optional
        Profiles used (``{"laser": {"ref", "sha256"}, ...}``), added under ``provenance``.
    """
    extra = dict(info.extra or {})
    dtype = np.dtype(layout["dtype"])
    doc = {
        "sweepgen_sidecar": LAYOUT_VERSION,
        "tool": {"name": "sweepgen", "version": info.tool_version or __version__},
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "driver": driver,
        "data_file": data_file,
        "data_bytes": int(nbytes),
        "sha256": sha256,
        "table_sha256": table_sha256,
        "sample_rate": float(info.sample_rate),
        "count": int(info.count),
        "period_count": int(info.period_count),
        "padding": int(info.count - info.period_count),
        "duration": info.count / info.sample_rate,
        "period": extra.get("period", info.period_count / info.sample_rate),
        "time": time_axis(info),
        "dtype": dtype.name,
        "numpy_dtype": dtype.str,
        "byte_order": byte_order(dtype),
        "header_bytes": layout.get("header_bytes"),
    }
    for key, value in layout.items():
        if key not in ("dtype", "header_bytes", "value_to_code", "expected_bytes") and not key.startswith("_"):
            doc[key] = value          # format-specific keys (columns, ...) and overrides (byte_order)
    doc["scaling"] = scaling(info, layout.get("value_to_code", {}))
    doc["generator"] = {"output": info.output, "channel": info.channel,
                        "amplitude": info.amplitude, "offset": info.offset,
                        "code_dtype": np.dtype(info.dtype).str}
    for key in ("chain", "sampling", "quantisation", "drive_range", "code_range", "safe_range", "channel", "timing",
                "preshape"):
        if key in extra:
            doc[key] = extra[key]
    prov = {"scenario_digest": info.scenario_digest or None}
    prov.update(provenance or {})
    doc["provenance"] = prov
    return doc


def file_digest(path) -> str:
    """SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def provenance(scenario, laser=None, generator=None) -> dict:
    """Which files made the table: key, file name and SHA-256 of each profile used.

    ``scenario_digest`` (in :func:`build`) already covers the scenario and its
    species file; this adds the scenario file itself and the laser and
    generator profiles (objects with ``key`` and ``path``, as loaded). A scenario
    built from a dict (:func:`sweepgen.load_scenario`) has no file: its entry is
    None and ``scenario_digest`` alone names it.
    """
    def entry(key, path):
        if path is None:
            return None
        path = Path(str(path))
        return {"key": key, "file": path.name, "sha256": file_digest(path)}

    from_file = Path(str(scenario.path)).is_file()
    return {"scenario": entry(Path(str(scenario.path)).stem, scenario.path) if from_file else None,
            "laser": entry(getattr(laser, "key", None), getattr(laser, "path", None)),
            "generator": entry(getattr(generator, "key", None), getattr(generator, "path", None))}


def dumps(doc: dict) -> str:
    """The sidecar as JSON text (NaN and infinities become null)."""
    return _json.dumps(doc)
