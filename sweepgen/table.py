"""The rendered table: generator codes for one period, delivered in chunks.

:class:`RenderedTable` is what the renderer produces and every driver consumes.
The codes are never held in memory all at once for large tables: ``chunks()``
evaluates the schedule and the tuning chain chunk by chunk, and can be iterated
any number of times (each pass recomputes the same codes).
"""

from __future__ import annotations

import hashlib
import zlib
from dataclasses import dataclass, field
from typing import Callable, Iterator

import numpy as np

#: samples per chunk when the caller does not say: small enough that a frame's arrays stay in the
#: processor's cache while the renderer fills them (render throughput falls by half at 2^18 here)
DEFAULT_CHUNK = 1 << 15


@dataclass(frozen=True)
class TableInfo:
    """Everything a driver or a reader needs to know about the codes (SI units)."""

    sample_rate: float        # samples/s
    count: int                # samples in the table (one period, padded to the granularity)
    period_count: int         # samples that cover exactly one period (before padding)
    dtype: str                # NumPy dtype string of the codes, e.g. "<i2" or "<u4"
    output: str               # "voltage" (DAC codes) | "frequency" (DDS tuning words)
    drive_unit: str           # "V" at the actuator input, or "Hz" of the DDS output
    code_scale: float         # drive = code_offset + code_scale * code
    code_offset: float
    amplitude: float | None   # V peak-to-peak to program on the generator (voltage outputs)
    offset: float | None      # V offset to program (voltage outputs)
    channel: int = 1
    scenario_digest: str = ""
    tool_version: str = ""
    extra: dict = field(default_factory=dict)   # renderer/chain details for sidecars
    quantity: str = "detuning"  # what the chain maps to the drive: "detuning" (Hz) | "level" (a gate's, a marker's)
    delay: float = 0.0        # s from the trigger edge to the first sample (``timing.delay``)

    @property
    def itemsize(self) -> int:
        return np.dtype(self.dtype).itemsize

    @property
    def nbytes(self) -> int:
        return self.count * self.itemsize

    @property
    def duration(self) -> float:
        return self.count / self.sample_rate

    @property
    def quantity_unit(self) -> str:
        """The unit of :attr:`quantity`: ``"Hz"`` for a detuning, ``""`` for a level (dimensionless)."""
        return "Hz" if self.quantity == "detuning" else ""

    def after_trigger(self, time):
        """Times from the table's first sample (``Frame.time``) as times after the trigger edge (s):
        sample ``i`` plays at ``delay + i / sample_rate``, the axis every written table states."""
        return self.delay + time


@dataclass
class Frame:
    """One chunk with its context, for drivers that write more than codes (CSV)."""

    start: int                # index of the first sample
    time: np.ndarray          # s from the table's first sample (``info.after_trigger``: after the trigger)
    detuning: np.ndarray      # what the chain maps (``info.quantity``): planned optical detuning (Hz), or level
    drive: np.ndarray         # drive units (V or Hz), planned (before quantisation)
    codes: np.ndarray         # info.dtype


class RenderedTable:
    """Codes of one period plus metadata; iterate with :meth:`chunks` or :meth:`frames`."""

    def __init__(self, info: TableInfo, frame_source: Callable[[int, int], Frame],
                 codes: Callable[[int, int], np.ndarray] | None = None):
        self.info = info
        self._frame_source = frame_source     # (start, stop) -> Frame
        self._codes = codes                   # (start, stop) -> codes alone, when cheaper than a Frame
        self._digests = None

    @classmethod
    def from_arrays(cls, info: TableInfo, codes, *, detuning=None, drive=None) -> "RenderedTable":
        """A table over codes already in memory (small tables, tests, third-party tools).

        ``drive`` defaults to ``code_offset + code_scale * code``; ``detuning``
        defaults to NaN (unknown) unless given.
        """
        codes = np.asarray(codes).astype(info.dtype, copy=False)
        if codes.shape != (info.count,):
            raise ValueError(f"expected {info.count} codes, got shape {codes.shape}")
        drive = (info.code_offset + info.code_scale * codes.astype(float) if drive is None
                 else np.asarray(drive, dtype=float))
        detuning = np.full(info.count, np.nan) if detuning is None else np.asarray(detuning, dtype=float)

        def source(start, stop):
            return Frame(start, np.arange(start, stop) / info.sample_rate, detuning[start:stop],
                         drive[start:stop], codes[start:stop])

        return cls(info, source)

    def frames(self, size: int | None = None) -> Iterator[Frame]:
        """Frames of ``size`` samples (default :data:`DEFAULT_CHUNK`), in order."""
        size = int(size or DEFAULT_CHUNK)
        for start in range(0, self.info.count, size):
            yield self._frame_source(start, min(start + size, self.info.count))

    def chunks(self, size: int | None = None) -> Iterator[np.ndarray]:
        """The codes in order, ``size`` samples at a time (dtype ``info.dtype``)."""
        if self._codes is None:
            for frame in self.frames(size):
                yield frame.codes
            return
        size = int(size or DEFAULT_CHUNK)
        for start in range(0, self.info.count, size):
            yield self._codes(start, min(start + size, self.info.count))

    def codes(self) -> np.ndarray:
        """All codes at once (only for small tables and tests)."""
        return np.concatenate(list(self.chunks())) if self.info.count else np.empty(0, self.info.dtype)

    def _digest(self):
        if self._digests is None:
            sha = hashlib.sha256()
            crc = 0
            for chunk in self.chunks():
                data = np.ascontiguousarray(chunk).tobytes()
                sha.update(data)
                crc = zlib.crc32(data, crc)
            self._digests = (sha.hexdigest(), crc & 0xFFFFFFFF)
        return self._digests

    @property
    def sha256(self) -> str:
        """SHA-256 of the code bytes in ``info.dtype`` (as stored in a raw file)."""
        return self._digest()[0]

    @property
    def crc32(self) -> int:
        """CRC-32 (``zlib.crc32``) of the code bytes in ``info.dtype``."""
        return self._digest()[1]


class DigestingTable:
    """A view of a :class:`RenderedTable` that hashes the codes as a driver reads them.

    The codes pass through unchanged; :meth:`hexdigest` is the SHA-256 of the
    codes as little-endian bytes of ``info.dtype`` (equal to
    :attr:`RenderedTable.sha256`) once one whole pass has been read in order,
    else None. A file driver thus records the table's digest without rendering
    the table twice.
    """

    def __init__(self, table: RenderedTable):
        self.info = table.info
        self._table = table
        self._sha = hashlib.sha256()
        self._dtype = np.dtype(self.info.dtype).newbyteorder("<")
        self._done = 0
        self._complete = False

    def _hash(self, first: bool, start: int, codes) -> None:
        if first and start == self._done:
            self._sha.update(np.ascontiguousarray(codes, dtype=self._dtype))
            self._done += len(codes)

    def _finish(self, first: bool) -> None:
        if first and self._done == self.info.count:
            self._complete = True

    def frames(self, size: int | None = None) -> Iterator[Frame]:
        first = not self._complete and self._done == 0
        for frame in self._table.frames(size):
            self._hash(first, frame.start, frame.codes)
            yield frame
        self._finish(first)

    def chunks(self, size: int | None = None) -> Iterator[np.ndarray]:
        first = not self._complete and self._done == 0
        size = int(size or DEFAULT_CHUNK)
        for start, codes in zip(range(0, self.info.count, size), self._table.chunks(size)):
            self._hash(first, start, codes)
            yield codes
        self._finish(first)

    def codes(self) -> np.ndarray:
        return np.concatenate(list(self.chunks())) if self.info.count else np.empty(0, self.info.dtype)

    def hexdigest(self) -> str | None:
        return self._sha.hexdigest() if self._complete else None
