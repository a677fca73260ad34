"""Reading measured data: columns with their units, from simple files a lab writes.

Formats:

* **delimited text** (``.csv``, ``.tsv``, ``.txt``, ``.dat``, anything else):
  values separated by commas, semicolons, tabs or spaces (found from the header
  line); lines starting with ``#`` are comments; the first other line is the
  header, naming each column and its unit as ``name (unit)``, ``name [unit]`` or
  ``name_unit`` (so ``time_s,detuning_Hz,drive_V`` as ``sweepgen export`` writes
  it, or ``drive (V), beat (MHz)``); every further line holds one number per
  column.
* **NeXus / HDF5** (``.h5``, ``.hdf5``, ``.nxs``; needs the ``hdf5`` extra): the
  file's default NXdata group (or the first one found): its ``signal`` and
  ``axes`` fields, each with its ``units`` attribute.

Columns are recognised by their name (case does not matter):

==========  =====================================================  ==========
kind        names                                                  dimension
==========  =====================================================  ==========
time        ``time``, ``t``                                        s
drive       ``drive``, ``voltage``, ``control``                    V (or Hz)
detuning    ``detuning``                                           Hz
frequency   ``frequency``, ``freq``, ``optical``, ``wavemeter``     Hz
beat        ``beat``, ``beatnote``, ``beat_note``                  Hz
rf          ``rf``                                                 Hz
marker      ``marker``, ``trigger``                                any
==========  =====================================================  ==========

Values are converted to SI once, here (one pint lookup per column).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from sweepgen.errors import InputError

KINDS = {
    "time": ("time", "t"),
    "drive": ("drive", "voltage", "control"),
    "detuning": ("detuning",),
    "frequency": ("frequency", "freq", "optical", "wavemeter"),
    "beat": ("beat", "beatnote", "beat_note"),
    "rf": ("rf",),
    "marker": ("marker", "trigger"),
}
HDF5_SUFFIXES = (".h5", ".hdf5", ".nxs")
_BRACKETED = re.compile(r"^\s*(.*?)\s*[\(\[]\s*(.*?)\s*[\)\]]\s*$")


@dataclass
class Column:
    name: str          # as written in the header
    kind: str | None   # one of KINDS, or None (not recognised)
    unit: str          # the unit text as written ("" when none)
    values: np.ndarray  # as written (not yet converted)
    index: int

    @property
    def label(self) -> str:
        return f"column '{self.name}'"


@dataclass
class Measurement:
    """The columns of one measurement file."""

    path: Path
    columns: list

    def find(self, *kinds) -> Column | None:
        """The first column of any of ``kinds`` (in the order given)."""
        for kind in kinds:
            for col in self.columns:
                if col.kind == kind:
                    return col
        return None

    def require(self, kind: str, unit: str, what: str) -> np.ndarray:
        """The values of the column of ``kind`` converted to ``unit``; a missing column or a
        unit of the wrong dimension is an :class:`InputError` naming the file and column."""
        col = self.find(kind)
        if col is None:
            names = ", ".join(repr(c.name) for c in self.columns)
            raise InputError(f"no {kind} column ({what}); the header names {names}; name a column "
                             f"{' or '.join(repr(n) for n in KINDS[kind])} with its unit, e.g. '{kind} ({unit})'",
                             file=str(self.path))
        return self.values(col, unit, what)

    def values(self, col: Column, unit: str, what: str) -> np.ndarray:
        from sweepgen import units

        if not col.unit and unit:
            raise InputError(f"{col.label} has no unit; write it in the header, e.g. '{col.name} ({unit})' "
                             f"({what})", file=str(self.path))
        try:
            factor = units.parse(f"1 {col.unit}".strip(), unit)
            zero = units.parse(f"0 {col.unit}".strip(), unit)
        except InputError as exc:
            raise InputError(f"{col.label}: wrong unit: {exc.detail} ({what})", file=str(self.path)) from None
        values = zero + factor * col.values
        if col.kind is not None and col.kind != "marker":      # a marker column is any signal at all
            from sweepgen import plausible

            plausible.check_values("measurement", col.kind, values, unit, file=str(self.path), shown_key=col.name)
        return values


def split_header(cell: str) -> tuple[str, str]:
    """``"drive (V)"`` → ``("drive", "V")``; ``"detuning_Hz"`` → ``("detuning", "Hz")``."""
    cell = cell.strip().strip('"').strip("'")
    m = _BRACKETED.match(cell)
    if m:
        return m.group(1), m.group(2)
    if "_" in cell:
        name, _, unit = cell.rpartition("_")
        if name and _is_unit(unit):
            return name, unit
    return cell, ""


def _is_unit(text: str) -> bool:
    from sweepgen import units

    try:
        units.registry().Unit(text)
        return True
    except Exception:  # pint raises many kinds for text that is not a unit
        return False


def _kind(name: str) -> str | None:
    key = name.strip().lower().replace(" ", "_").replace("-", "_")
    for kind, names in KINDS.items():
        if key in names:
            return kind
    return None


def read(path) -> Measurement:
    """Read a measurement file (see the module doc); bad files are an :class:`InputError`."""
    from sweepgen._config import require_file

    path = require_file(path)
    if path.suffix.lower() in HDF5_SUFFIXES:
        return _read_nexus(path)
    return _read_text(path)


#: largest measurement file read as text (bytes): some two million lines of three columns
MAX_TEXT_BYTES = 64 << 20
#: most values of one column read from an HDF5 file
MAX_COLUMN_VALUES = 1 << 24


def _read_text(path: Path) -> Measurement:
    from sweepgen._config import read_bounded

    raw = read_bounded(path, MAX_TEXT_BYTES, "a measurement file (thin the data, or split the file)")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise InputError("not a text file (expected delimited columns with a header line)", file=str(path)) from None
    lines = [(i + 1, ln) for i, ln in enumerate(text.splitlines()) if ln.strip() and not ln.lstrip().startswith("#")]
    if len(lines) < 2:
        raise InputError("expected a header line and at least one line of numbers", file=str(path))
    head_no, head = lines[0]
    delim = next((d for d in (",", ";", "\t") if d in head), None)
    cells = head.split(delim) if delim else re.findall(r"[^\s(\[]+(?:\s*[(\[][^)\]]*[)\]])?", head)
    cols = [split_header(c) for c in cells]
    if any(name == "" for name, _ in cols):
        raise InputError(f"line {head_no}: an empty column name in the header", file=str(path))
    try:
        data = np.loadtxt([ln for _, ln in lines[1:]], delimiter=delim, ndmin=2, dtype=float)
    except ValueError as exc:
        raise InputError(f"expected {len(cols)} numbers on every line after the header: {exc}",
                         file=str(path)) from None
    if data.shape[1] != len(cols):
        raise InputError(f"the header names {len(cols)} columns but the lines hold {data.shape[1]} values",
                         file=str(path))
    bad = np.argwhere(~np.isfinite(data))
    if bad.size:
        row, col = bad[0]
        raise InputError(f"line {lines[1 + row][0]}: column '{cols[col][0]}' is not a finite number",
                         file=str(path))
    return Measurement(path, [Column(n, _kind(n), u, data[:, i], i) for i, (n, u) in enumerate(cols)])


def _read_nexus(path: Path) -> Measurement:
    try:
        import h5py
    except ImportError:
        raise InputError("reading HDF5 needs h5py: pip install 'sweepgen[hdf5]'", file=str(path)) from None
    try:
        handle = h5py.File(path, "r")
    except OSError as exc:
        raise InputError(f"not a readable HDF5 file ({exc})", file=str(path)) from None
    with handle:
        group = default_nxdata(handle)
        if group is None:
            raise InputError("no NXdata group (a group with NX_class = 'NXdata' and a 'signal' attribute)",
                             file=str(path))
        names = [_text(group.attrs["signal"])] + _axes(group)
        names += [n for n in group if n not in names and isinstance(group[n], h5py.Dataset)
                  and group[n].shape == group[names[0]].shape]
        cols = []
        for i, name in enumerate(names):
            data = group[name]
            if not isinstance(data, h5py.Dataset) or data.size > MAX_COLUMN_VALUES:
                raise InputError(f"'{name}' is not a column of at most {MAX_COLUMN_VALUES} values", file=str(path))
            cols.append(Column(name, _kind(name), _text(data.attrs.get("units", "")),
                               np.asarray(data[()], dtype=float).ravel(), i))
    return Measurement(path, cols)


def default_nxdata(handle):
    """The NXdata group a NeXus reader plots: follow ``default`` attributes, else the first NXdata."""
    node = handle
    for _ in range(3):
        name = node.attrs.get("default")
        if name is None or _text(name) not in node:
            break
        node = node[_text(name)]
        if _text(node.attrs.get("NX_class", "")) == "NXdata":
            return node
    found = []

    def visit(name, obj):
        if not found and _text(obj.attrs.get("NX_class", "")) == "NXdata" and "signal" in obj.attrs:
            found.append(obj)

    handle.visititems(visit)
    return found[0] if found else None


def _axes(group) -> list:
    axes = group.attrs.get("axes", [])
    if isinstance(axes, (str, bytes)):
        axes = [axes]
    return [_text(a) for a in axes if _text(a) not in (".", "")]


def _text(value) -> str:
    if isinstance(value, bytes):
        return value.decode("utf-8")
    if isinstance(value, np.ndarray) and value.shape == ():
        return _text(value[()])
    return str(value)
