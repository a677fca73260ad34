"""Tables read back from files: verification, decoding, the sweep's numbers, a schedule.

A driver's ``read`` method (:meth:`sweepgen.drivers.base.Driver.read`) returns a
:class:`ReadTable`: the stored values as read and the sidecar that describes
them (from the JSON sidecar, or from the file's own attributes for a
self-describing format). From the sidecar alone this module

* verifies the file (size and SHA-256 of its bytes; the SHA-256 of the codes,
  ``table_sha256``, which is also what an upload records);
* decodes the values to generator codes, drive (V at the actuator, or Hz) and
  optical detuning (Hz), or for a gate's or a marker's table its level
  (dimensionless), versus time after the trigger edge ``t = delay + index /
  sample_rate`` (``delay``: the sidecar's ``timing.delay``, 0 without);
* finds the sweep's parts (rest, chirp, hold, return) and the numbers a
  physicist checks it by, or a level table's levels and the windows where it
  is on (:func:`analyse`);
* makes a :class:`sweepgen.schedule.Schedule` of what the table plays, for
  ``check --table`` and ``simulate --table`` (:func:`table_schedule`).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from sweepgen.errors import CheckFailed, InputError, clip

#: most pieces of the piecewise-linear schedule made from a table (longer tables are averaged down)
MAX_NODES = 1 << 16
#: the chirp-rate estimate averages over windows long enough that one code step moves it by at
#: most this fraction of the largest step per sample
RATE_QUANTISATION = 0.01


@dataclass
class ReadTable:
    """A table read back: the stored values and the sidecar that describes them."""

    path: Path
    sidecar: dict
    values: np.ndarray
    driver: str
    checks: list = field(default_factory=list)     # [{"check", "ok", "expected", "found"}]

    @property
    def verified(self) -> bool:
        return all(c["ok"] for c in self.checks)

    @property
    def count(self) -> int:
        return int(self.sidecar["count"])

    @property
    def sample_rate(self) -> float:
        return float(self.sidecar["sample_rate"])

    @property
    def drive_unit(self) -> str:
        return self.sidecar["scaling"]["drive"].get("unit", "V")

    @property
    def delay(self) -> float:
        """s from the trigger edge to the first sample (the sidecar's ``timing.delay``; 0 without)."""
        return float((self.sidecar.get("timing") or {}).get("delay") or 0.0)

    @property
    def quantity(self) -> str:
        """What the table holds: ``"detuning"`` (Hz), or ``"level"`` (a gate's or a marker's table:
        its sidecar's ``channel.quantity``)."""
        return "level" if (self.sidecar.get("channel") or {}).get("quantity") == "level" else "detuning"

    @property
    def channel(self) -> dict:
        """The sidecar's ``channel`` (``name``, ``kind``, ``output``, ...); the main sweep's without one."""
        from sweepgen.channels import MAIN_LIGHT

        return self.sidecar.get("channel") or {"name": MAIN_LIGHT, "kind": "frequency", "quantity": "detuning"}

    def time(self) -> np.ndarray:
        """When each sample plays after the trigger edge (s): ``delay + index / sample_rate``."""
        return self.delay + np.arange(len(self.values)) / self.sample_rate

    def codes(self) -> np.ndarray:
        """Generator codes (DAC codes or DDS tuning words) in the generator's code dtype."""
        sc = self.sidecar["scaling"]["code"]
        dtype = np.dtype(self.sidecar["generator"]["code_dtype"])
        if sc["offset"] == 0 and sc["scale"] == 1 and self.values.dtype.kind in "iu":
            return self.values.astype(dtype)
        return np.rint(sc["offset"] + sc["scale"] * self.values.astype(float)).astype(dtype)

    def _exact(self) -> np.ndarray:
        """The stored values recomputed from the integer codes (removes float32 storage rounding)."""
        sc = self.sidecar["scaling"]["code"]
        if self.values.dtype.kind == "f" and np.dtype(self.sidecar["generator"]["code_dtype"]).kind in "iu":
            return (self.codes().astype(float) - sc["offset"]) / sc["scale"]
        return self.values.astype(float)

    def drive(self) -> np.ndarray:
        sc = self.sidecar["scaling"]["drive"]
        return sc["offset"] + sc["scale"] * self._exact()

    def detuning(self) -> np.ndarray:
        """Optical detuning (Hz) by the chain the table was made for (the sidecar's scaling)."""
        if self.quantity != "detuning":
            ch = self.channel
            raise InputError(f"this is the table of {ch.get('kind', 'a further channel')} '{ch.get('name')}': "
                             f"it holds a level, not a detuning", file=str(self.path), key="channel.quantity")
        return self._decoded("detuning")

    def level(self) -> np.ndarray:
        """The level of a gate's or a marker's table (dimensionless: a gate's fraction of full
        intensity, a marker's 0 low to 1 high) from the sidecar's ``scaling.level``; a table written
        before that key existed kept it under ``scaling.detuning`` (with ``channel.quantity = "level"``)."""
        if self.quantity != "level":
            raise InputError("this table holds a detuning, not a level", file=str(self.path), key="channel.quantity")
        return self._decoded(self.level_key)

    @property
    def level_key(self) -> str:
        """Where a level table's sidecar keeps its level scaling: ``level``, or ``detuning`` in one
        written before ``level`` existed."""
        scaling = self.sidecar["scaling"]
        return "detuning" if scaling.get("level") is None and scaling.get("detuning") is not None else "level"

    def _decoded(self, key: str) -> np.ndarray:
        """The stored values through the sidecar's ``scaling.<key>`` (linear or lookup)."""
        det = self.sidecar["scaling"].get(key)
        if det is None:
            raise InputError(f"the sidecar has no {key} scaling", file=str(self.path), key=f"scaling.{key}")
        v = self._exact()
        if det["kind"] == "linear":
            return det["offset"] + det["scale"] * v
        return np.interp(v, det["value"], det[key])

    def table_sha256(self) -> str:
        """SHA-256 of the codes as little-endian bytes of the code dtype (what uploads record)."""
        return codes_digest(self.codes())


def codes_digest(codes) -> str:
    """SHA-256 of codes as little-endian bytes of their dtype (``RenderedTable.sha256``)."""
    codes = np.asarray(codes)
    return hashlib.sha256(np.ascontiguousarray(codes, dtype=codes.dtype.newbyteorder("<")).tobytes()).hexdigest()


def locate(source) -> tuple[Path, Path | None]:
    """``(data file, JSON sidecar or None)`` for a path naming either of them."""
    path = Path(source)
    if path.suffix == ".json" and path.is_file():
        doc = load_sidecar(path)
        data = path.parent / str(doc.get("data_file", ""))
        return data, path
    from sweepgen._config import require_file

    side = path.with_name(path.name + ".json")
    return require_file(path), side if side.is_file() else None


#: largest JSON sidecar read (bytes); sweepgen writes a few kilobytes (a lookup scaling: some hundred)
MAX_SIDECAR_BYTES = 16 << 20


def load_sidecar(path) -> dict:
    """A JSON sidecar, checked for the keys a reader needs (:func:`require_keys`)."""
    from sweepgen._config import read_bounded

    path = Path(path)
    raw = read_bounded(path, MAX_SIDECAR_BYTES, "a table's sidecar")
    try:
        doc = json.loads(raw.decode("utf-8-sig"))
    except (UnicodeDecodeError, ValueError) as exc:          # (also a number of more than 4300 digits)
        raise InputError(f"not a readable JSON sidecar ({exc})", file=str(path)) from None
    except RecursionError:
        raise InputError("not a readable JSON sidecar (nested too deeply)", file=str(path)) from None
    require_keys(doc, path)
    return doc


def require_keys(doc: dict, path) -> None:
    """Refuse a sidecar that lacks, or has in the wrong form, anything a reader of the table uses:
    each refusal names the key (see :mod:`sweepgen.sidecar` for what they mean)."""
    from sweepgen.sidecar import LAYOUT_VERSION

    if not isinstance(doc, dict) or "sweepgen_sidecar" not in doc:
        raise InputError("not a sweepgen sidecar (no 'sweepgen_sidecar' key)", file=str(path))
    version = doc["sweepgen_sidecar"]
    if isinstance(version, bool) or not isinstance(version, int) or not 1 <= version <= LAYOUT_VERSION:
        raise InputError(f"expected a layout version from 1 to {LAYOUT_VERSION} (a newer one is read by a newer "
                         f"sweepgen), got {clip(repr(version), 40)}", file=str(path), key="sweepgen_sidecar")
    for key in ("driver", "data_file", "sample_rate", "count", "numpy_dtype", "scaling", "generator"):
        if key not in doc:
            raise InputError("missing from the sidecar (required to read the table)", file=str(path), key=key)
    _Fields(doc, str(path)).check()


class _Fields:
    """Typed access to a sidecar's fields, each refusal naming the file and the key."""

    def __init__(self, doc: dict, file: str):
        self.doc, self.file = doc, file

    def get(self, dotted: str, *, optional=False):
        node = self.doc
        for part in dotted.split("."):
            if not isinstance(node, dict) or part not in node:
                if optional:
                    return None
                raise InputError("missing from the sidecar (required to read the table)", file=self.file, key=dotted)
            node = node[part]
        return node

    def fail(self, dotted: str, expected: str):
        value = repr(self.get(dotted, optional=True))
        return InputError(f"expected {expected}, got {value}", file=self.file, key=dotted)

    def number(self, dotted: str, *, optional=False, integer=False, nonzero=False) -> float | None:
        from sweepgen import plausible

        value = self.get(dotted, optional=optional)
        if value is None and optional:
            return None
        ok = isinstance(value, int) if integer else isinstance(value, (int, float))
        if isinstance(value, bool) or not ok or not np.isfinite(value) or (nonzero and value == 0):
            kind = "a whole number" if integer else "a finite number" + (" other than zero" if nonzero else "")
            raise self.fail(dotted, kind)
        if dotted in plausible.RANGES["sidecar"]:
            plausible.check("sidecar", dotted, float(value), "Hz" if dotted == "sample_rate" else "", value,
                            file=self.file)
        return value

    def dtype(self, dotted: str, kinds: str) -> None:
        value = self.get(dotted)
        try:
            dt = np.dtype(value) if isinstance(value, str) else None
        except TypeError:
            dt = None
        if dt is None or dt.kind not in kinds or dt.itemsize > 8 or dt.shape != ():
            raise self.fail(dotted, f"a NumPy dtype string of {'integers' if kinds == 'iu' else 'numbers'}, "
                                    f"such as '<i2'")

    def check(self) -> None:
        name = self.get("data_file")
        if not isinstance(name, str) or Path(name).name != name or name in ("", ".", ".."):
            raise self.fail("data_file", "a file name in the sidecar's folder (no folders)")
        self.number("sample_rate")
        for key in ("count", "period_count"):
            self.number(key, integer=True, optional=key != "count")
        if self.number("header_bytes", integer=True, optional=True) is not None and self.doc["header_bytes"] < 0:
            raise self.fail("header_bytes", "zero or more bytes")
        self.dtype("numpy_dtype", "iuf")
        self.dtype("generator.code_dtype", "iu")
        self.number("scaling.code.offset")
        self.number("scaling.code.scale", nonzero=True)
        self.number("scaling.drive.offset")
        self.number("scaling.drive.scale")
        for name in ("detuning", "level"):
            self._quantity(name)
        self._channel()

    def _channel(self) -> None:
        """``channel`` and ``timing`` (optional): tables of keys, with what the table holds and its delay."""
        for key in ("channel", "timing"):
            if self.doc.get(key) is not None and not isinstance(self.doc[key], dict):
                raise self.fail(key, "a table of keys")
        if self.get("channel.quantity", optional=True) not in (None, "detuning", "level"):
            raise self.fail("channel.quantity", "'detuning' or 'level'")
        if self.doc.get("timing") is not None:
            self.number("timing.delay", optional=True)

    def _quantity(self, name: str) -> None:
        """``scaling.<name>`` (``detuning`` or ``level``), when present: linear or a lookup."""
        det = self.get(f"scaling.{name}", optional=True)
        if det is None:
            return
        kind = self.get(f"scaling.{name}.kind")
        if kind == "linear":
            self.number(f"scaling.{name}.offset")
            self.number(f"scaling.{name}.scale")
            return
        if kind != "lookup":
            raise self.fail(f"scaling.{name}.kind", "'linear' or 'lookup'")
        columns = []
        for key in ("value", name):
            items = self.get(f"scaling.{name}.{key}")
            try:
                array = np.asarray(items, dtype=float)
            except (TypeError, ValueError):
                array = None
            if array is None or array.ndim != 1 or len(array) < 2 or not np.all(np.isfinite(array)):
                raise self.fail(f"scaling.{name}.{key}", "a list of at least two finite numbers")
            columns.append(array)
        if len(columns[0]) != len(columns[1]) or not np.all(np.diff(columns[0]) > 0):
            raise self.fail(f"scaling.{name}.value", f"increasing values, as many as in scaling.{name}.{name}")


def file_checks(data: Path, doc: dict) -> list:
    """Size and SHA-256 of the data file against its sidecar."""
    from sweepgen.sidecar import file_digest

    if not data.is_file():
        raise InputError(f"the data file {data.name} named by the sidecar is missing", file=str(data))
    checks = [{"check": "data_bytes", "expected": doc.get("data_bytes"), "found": data.stat().st_size}]
    checks.append({"check": "sha256", "expected": doc.get("sha256"), "found": file_digest(data)})
    for c in checks:
        c["ok"] = c["expected"] is not None and c["expected"] == c["found"]
    return checks


def value_checks(table: ReadTable) -> list:
    """Count of values and the digest of the codes against the sidecar (once the values are read)."""
    out = [{"check": "count", "expected": table.count, "found": int(len(table.values))}]
    expected = table.sidecar.get("table_sha256")
    if expected is not None and len(table.values) == table.count:
        out.append({"check": "table_sha256", "expected": expected, "found": table.table_sha256()})
    for c in out:
        c["ok"] = c["expected"] == c["found"]
    return out


# ---------------------------------------------------------------------------------------------
# The sweep's parts and numbers
# ---------------------------------------------------------------------------------------------
def parts(detuning, step: float) -> dict:
    """Sample indices of the sweep's parts: rest at the first value, chirp to the far extreme,
    hold there, return, rest (``None`` for a table without a chirp).

    ``step`` (Hz) is how far a sample may sit from a level and still be on it.
    """
    d = np.asarray(detuning, dtype=float)
    start = d[0]
    far = int(np.argmax(np.abs(d - start)))
    end = d[far]
    tol = max(step, 1e-9 * max(abs(start), abs(end), 1.0))
    if abs(end - start) <= tol:
        return {"chirp": None}
    at_end = np.flatnonzero(np.abs(d - end) <= tol)
    at_start = np.flatnonzero(np.abs(d - start) <= tol)
    chirp_end = int(at_end[0])
    before = at_start[at_start < chirp_end]
    chirp_start = int(before[-1]) if before.size else 0
    run = np.flatnonzero(np.abs(d[chirp_end:] - end) > tol)
    hold_end = chirp_end + (int(run[0]) if run.size else len(d) - chirp_end)
    back = at_start[at_start >= hold_end]
    return_end = int(back[0]) if back.size else len(d)
    return {"chirp": (chirp_start, chirp_end), "hold": (chirp_end, hold_end), "return": (hold_end, return_end),
            "start_level": float(start), "end_level": float(end), "tolerance": tol}


def windowed_rate(d, rate: float, window: int) -> np.ndarray:
    """|dΔ/dt| from differences over ``window`` samples (Hz/s)."""
    if len(d) <= window:
        return np.array([abs(d[-1] - d[0]) * rate / max(len(d) - 1, 1)])
    return np.abs(d[window:] - d[:-window]) * rate / window


def chirp_rate_window(d, step: float) -> int:
    """Samples per window so that one code step of ``step`` Hz is at most RATE_QUANTISATION of the
    mean change per sample over ``d`` (a chirp)."""
    per_sample = abs(float(d[-1]) - float(d[0])) / (len(d) - 1) if len(d) > 1 else 0.0
    if per_sample <= 0 or step <= 0:
        return 1
    return max(1, int(np.ceil(step / (RATE_QUANTISATION * per_sample))))


def period_samples(table: ReadTable) -> int:
    """The samples of one period the table holds; a table holding fewer than two, or fewer than its
    sidecar's period, is refused: as damaged (:class:`CheckFailed`) when it does not verify."""
    n = int(table.sidecar.get("period_count", table.count))
    if len(table.values) >= max(n, 2):
        return n
    if not table.verified:
        bad = ", ".join(c["check"] for c in table.checks if not c["ok"])
        raise CheckFailed(f"{table.path}: does not match its sidecar ({bad}); it was changed or damaged")
    raise InputError(f"holds {len(table.values)} samples of a period of {n}; a sweep needs at least 2",
                     file=str(table.path))


def analyse(table: ReadTable) -> dict:
    """The numbers of what a table plays (SI units, Hz for detunings), times on the trigger's axis (the
    table's first sample plays ``delay`` after the trigger, as its sidecar's ``timing`` says; 0 without):
    for the main sweep's table the sweep's numbers as ``plan`` gives them (:func:`sweep_numbers`), for
    a gate's or a marker's its levels and the windows where it is on (:func:`level_numbers`)."""
    doc = table.sidecar
    rate = table.sample_rate
    drive = table.drive()
    codes = table.codes()
    out = {"sample_rate": rate, "count": table.count, "period_count": int(doc.get("period_count", table.count)),
           "padding": int(doc.get("padding", 0)), "duration": table.count / rate, "period": doc.get("period")}
    own = level_numbers(table) if table.quantity == "level" else sweep_numbers(table)
    common = {"drive_min": float(drive.min()), "drive_max": float(drive.max()), "drive_unit": table.drive_unit,
              "code_min": int(codes.min()), "code_max": int(codes.max())}
    return {**out, **own.pop("head"), **common, **own}


def _step(table: ReadTable, key: str) -> float:
    """The size of one code step in the table's quantity (``scaling.<key>``: ``step``, or ``|scale|``)."""
    det = table.sidecar["scaling"].get(key) or {}
    return float(det.get("step") or abs(det.get("scale", 0.0)) or 0.0)


def sweep_numbers(table: ReadTable) -> dict:
    """The sweep's numbers of the main table (:func:`analyse`): detuning range, chirp, hold, return;
    ``head`` holds those :func:`analyse` puts before the drive's."""
    delay, rate = table.delay, table.sample_rate
    d = table.detuning()[: period_samples(table)]
    step = _step(table, "detuning")
    p = parts(d, step)
    out = {"head": {"quantity": "detuning", "detuning_min": float(d.min()), "detuning_max": float(d.max())},
           "detuning_step": step, "delay": delay}
    if p["chirp"] is None:
        out.update({"start_detuning": float(d[0]), "end_detuning": None, "chirp_span": 0.0, "chirp_rate_max": 0.0,
                    "chirp_duration": 0.0, "chirp_start": None, "return_duration": None, "return_rate_max": None})
        return out
    a, b = p["chirp"]
    r0, r1 = p["return"]
    chirp = d[a:b + 1]
    window = chirp_rate_window(chirp, step)
    out.update({
        "start_detuning": p["start_level"], "end_detuning": p["end_level"],
        "chirp_span": p["end_level"] - p["start_level"],
        "chirp_start": delay + a / rate, "chirp_duration": (b - a) / rate, "hold": (p["hold"][1] - b) / rate,
        "chirp_rate_max": float(windowed_rate(chirp, rate, window).max()),
        "chirp_rate_mean": abs(p["end_level"] - p["start_level"]) * rate / max(b - a, 1),
        "return_duration": (r1 - r0) / rate,
        "return_rate_max": float(windowed_rate(d[max(r0 - 1, 0):r1 + 1], rate, window).max()) if r1 > r0 else 0.0,
        "chirp_rate_window": window,
    })
    return out


#: windows of a level table listed by ``inspect`` (the count says how many there are)
MAX_WINDOWS = 100
#: distinct levels of a level table listed by ``inspect`` (more: a table that holds no few levels)
MAX_LEVELS = 16


def level_numbers(table: ReadTable) -> dict:
    """A gate's or a marker's table (:func:`analyse`): its channel, the levels it holds (dimensionless),
    and the windows where it is on (above level 0 by more than one code step), each with its ``start``
    and ``end`` after the trigger, ``duration`` and ``level`` (the largest it holds there); ``head``
    holds those :func:`analyse` puts before the drive's."""
    delay, rate = table.delay, table.sample_rate
    n = period_samples(table)
    level, codes = table.level()[:n], table.codes()[:n]
    step = _step(table, table.level_key)
    _, first = np.unique(codes, return_index=True)
    levels = sorted(float(level[i]) for i in first) if len(first) <= MAX_LEVELS else None
    on = np.concatenate([[False], level > max(step, 1e-12), [False]])
    edges = np.flatnonzero(np.diff(on.astype(np.int8)))
    runs = edges.reshape(-1, 2)
    windows = [{"start": delay + a / rate, "end": delay + b / rate, "duration": (b - a) / rate,
                "level": float(level[a:b].max())} for a, b in runs[:MAX_WINDOWS]]
    ch = table.channel
    return {"head": {"quantity": "level", "channel": {k: ch.get(k) for k in ("name", "kind", "output")},
                     "level_min": float(level.min()), "level_max": float(level.max())},
            "level_step": step, "delay": delay, "levels": levels, "window_count": len(runs), "windows": windows}


# ---------------------------------------------------------------------------------------------
# A schedule of what the table plays
# ---------------------------------------------------------------------------------------------
def _nodes(d, csum, a: int, b: int, window: int):
    """Node indices in samples ``a..b-1`` every ``window`` (the next part's first node ends the last
    piece), with the mean of the
    samples within half a window around each node (symmetric, so a ramp is not biased; narrower near
    the part's ends, never reaching outside the part)."""
    idx = np.arange(a, b, window)
    if len(idx) > 1 and b - idx[-1] < window / 2:
        idx = idx[:-1]                       # no short last piece: its slope would be a code step's
    half = np.minimum(np.minimum(window // 2, idx - a), b - 1 - idx)
    lo, hi = idx - half, idx + half + 1
    return idx, (csum[hi] - csum[lo]) / (hi - lo)


def table_schedule(detuning, sample_rate: float, period_count: int, step: float = 0.0):
    """A :class:`sweepgen.schedule.Schedule`: piecewise linear through the table's samples.

    Within each part of the sweep (rest, chirp, hold, return) the samples are
    averaged over a window long enough that one code step (``step``, Hz) moves
    the slope by at most :data:`RATE_QUANTISATION` of the part's own rate, and
    no table gives more than about :data:`MAX_NODES` pieces; parts are never
    averaged across their boundaries. Returns ``(schedule, representation_error)``:
    the largest difference (Hz) between the schedule and the table's samples.
    """
    from scipy.interpolate import PPoly

    from sweepgen.schedule import Schedule, Segment

    d = np.asarray(detuning, dtype=float)[:period_count]
    n = len(d)
    period = n / sample_rate
    least = int(np.ceil(n / MAX_NODES))
    csum = np.concatenate([[0.0], np.cumsum(d)])
    p = parts(d, step)
    if p["chirp"] is None:
        cuts, kinds = [0, n], ["rest"]
        start = end = float(d[0])
    else:
        (a, b), (r0, r1) = p["chirp"], p["return"]
        cuts, kinds = [0, a, b, r0, r1, n], ["rest", "chirp", "hold", "return", "rest"]
        start, end = p["start_level"], p["end_level"]
    idx, values = [], []
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        if hi > lo:
            w = max(least, chirp_rate_window(d[lo:hi], step) if step and hi - lo > 1 else 1)
            i, v = _nodes(d, csum, lo, hi, w)
            idx.append(i)
            values.append(v)
    t = np.concatenate([np.concatenate(idx) / sample_rate, [period]])
    v = np.concatenate(values + [values[0][:1]])
    slope = np.diff(v) / np.diff(t)
    poly = PPoly(np.vstack([slope, v[:-1]]), t, extrapolate=True)
    error = float(np.max(np.abs(poly(np.arange(n) / sample_rate) - d)))
    segments = [Segment(k, cuts[i] / sample_rate, cuts[i + 1] / sample_rate)
                for i, k in enumerate(kinds) if cuts[i + 1] > cuts[i]]
    return Schedule(segments, poly, period, start, end), error
