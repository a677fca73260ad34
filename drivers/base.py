"""The one small protocol every driver implements, and the helpers file drivers share.

A driver receives a :class:`sweepgen.table.RenderedTable` (codes in chunks plus
:class:`sweepgen.table.TableInfo`) and a :class:`Delivery` (where and how), and
returns a JSON-able report. File drivers derive from :class:`FileDriver`, which
writes the data file and its JSON sidecar as one atomic unit
(:class:`AtomicFileSet`): an export that fails or is interrupted leaves the
output folder as it was.
"""

from __future__ import annotations

import abc
import contextlib
import hashlib
import os
import re
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, ClassVar

from sweepgen._atomic import make_partial, new_file_mode, remove_stale_partials
from sweepgen.errors import DriverError, InputError


@dataclass
class Delivery:
    """Where and how to deliver a table.

    ``destination`` is a folder for file drivers, a VISA resource string for the
    VISA driver, a pyserial URL for the serial driver. ``generator`` is the
    loaded :class:`sweepgen.generator.Generator`. Outputs are switched on only
    when ``arm`` is true; ``dry_run`` validates and reports without touching
    anything. ``progress`` is called with (done, total): bytes for binary data,
    samples where the byte count is not known in advance (csv).
    """

    destination: str
    generator: object = None
    arm: bool = False
    dry_run: bool = False
    progress: Callable[[int, int], None] | None = None
    options: dict = field(default_factory=dict)   # driver-specific (e.g. dtype, byte order, backend)
    sidecar: dict = field(default_factory=dict)   # extra provenance for sidecars (scenario, profiles)


class Driver(abc.ABC):
    """Deliver a :class:`sweepgen.table.RenderedTable` somewhere.

    Subclasses set ``name`` (the entry-point name), ``kind`` ("file" or
    "instrument") and ``description``, and implement :meth:`deliver`, which
    returns a JSON-able report dict and raises only
    :class:`sweepgen.errors.SweepgenError` subclasses for expected failures.
    ``options`` names the keys of ``Delivery.options`` the driver understands
    (key -> one-line help), for command-line help and validation.
    """

    name: ClassVar[str] = ""
    kind: ClassVar[str] = "file"
    description: ClassVar[str] = ""
    options: ClassVar[dict] = {}

    @abc.abstractmethod
    def deliver(self, table, delivery: Delivery) -> dict:
        """Deliver ``table``; return a report (steps, bytes, files, verification)."""

    def check_destination(self, delivery: Delivery):
        """The address :meth:`deliver` would reach, refused (:class:`InputError`, exit 2) when it
        cannot name one; called before any other work, so that a bad address is the only
        thing said. The default takes any destination."""
        return delivery.destination

    def read(self, source: str, delivery: Delivery | None = None):
        """Read back a table this driver delivered: a :class:`sweepgen.readback.ReadTable`.

        ``source`` is a file (or its sidecar) for file drivers, a VISA resource
        or a serial URL for instrument drivers (with ``delivery.generator``).
        The default says the driver cannot read back.
        """
        raise DriverError(f"driver {self.name!r} cannot read a table back")


# ---------------------------------------------------------------------------------------------
# Atomic groups of files
# ---------------------------------------------------------------------------------------------
def _fsync_dir(folder: Path) -> None:
    """Make renames in ``folder`` durable (POSIX); silently skipped where unsupported."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


class AtomicFileSet:
    """Write several files of one folder so that all of them appear, or none.

    Each file is first written to a hidden temporary beside its target
    (:meth:`open`). :meth:`commit` flushes them to disk and renames them onto
    their targets in the order they were opened (data files first, the
    sidecar last). If any rename fails, the targets already renamed are rolled
    back: a file that existed before is restored from a hard-link backup, a new
    one is removed. Leaving the ``with`` block by an exception (including
    ``KeyboardInterrupt``) removes the temporaries and leaves the folder as it
    was. The folder itself is created when missing, but not its parents (an
    :class:`InputError`), and removed again when nothing was committed.
    Temporaries that a killed writer left in the folder are removed on entry
    (:func:`sweepgen._atomic.remove_stale_partials`); ``removed`` lists them.
    """

    def __init__(self, folder):
        self.folder = Path(folder)
        self._entries: list[tuple[Path, Path, object]] = []   # (target, temporary, handle)
        self._created: list[Path] = []           # the folder, when it was made for this set
        self.committed = False
        self.removed: list[Path] = []            # stale temporaries of an interrupted write, removed

    # -- context manager -------------------------------------------------------------------------
    def __enter__(self):
        if self.folder.exists() and not self.folder.is_dir():
            raise InputError("exists and is not a folder", file=str(self.folder))
        if not self.folder.exists():
            if not self.folder.parent.is_dir():
                raise InputError("its parent folder does not exist; sweepgen creates only the last level "
                                 "(create the parents first)", file=str(self.folder))
            try:
                self.folder.mkdir()
            except OSError as exc:
                raise DriverError(f"{self.folder}: cannot create the folder ({exc.strerror})") from None
            self._created = [self.folder]
        self.removed = remove_stale_partials(self.folder)
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None and not self.committed:
            self.commit()
        elif exc_type is not None:
            self.abort()
        return False

    # -- writing -----------------------------------------------------------------------------------
    def open(self, name: str, mode: str = "wb", **kwargs):
        """A handle on a temporary that becomes ``folder/name`` at commit."""
        target = self.folder / name
        if target.is_dir():
            raise DriverError(f"{target}: a folder of that name is in the way")
        try:
            tmp = make_partial(self.folder, name)
        except OSError as exc:
            raise DriverError(f"{target}: cannot write ({exc.strerror})") from None
        try:
            os.chmod(tmp, new_file_mode())            # as an ordinary open() would create it
            handle = open(tmp, mode, **kwargs)
        except OSError as exc:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
            raise DriverError(f"{target}: cannot write ({exc.strerror})") from None
        self._entries.append((target, Path(tmp), handle))
        return handle

    def temporary(self, name: str) -> Path:
        """The temporary path behind ``folder/name`` (for libraries that write files by name)."""
        for target, tmp, _ in self._entries:
            if target.name == name:
                return tmp
        raise KeyError(name)

    @property
    def targets(self) -> list[Path]:
        return [target for target, _, _ in self._entries]

    def abort(self) -> None:
        """Remove every temporary; the targets are untouched."""
        for _, tmp, handle in self._entries:
            with contextlib.suppress(Exception):
                handle.close()
            with contextlib.suppress(OSError):
                os.unlink(tmp)
        self._entries = []
        self._remove_created_folder()

    def _remove_created_folder(self) -> None:
        if not self.committed:
            for folder in self._created:
                try:
                    folder.rmdir()           # only if still empty
                except OSError:
                    break

    def commit(self) -> list[Path]:
        """Flush and rename every temporary onto its target, all or none."""
        try:
            for _, _, handle in self._entries:
                if not handle.closed:
                    handle.flush()
                    os.fsync(handle.fileno())
                    handle.close()
        except BaseException:
            self.abort()
            raise
        done: list[tuple[Path, Path | None]] = []     # (target, backup or None)
        backups: list[Path] = []
        try:
            for target, tmp, _ in self._entries:
                backup = None
                if target.exists():
                    backup = self._backup(target)
                    backups.append(backup)
                os.replace(tmp, target)
                done.append((target, backup))
        except BaseException as exc:
            for target, backup in reversed(done):
                with contextlib.suppress(OSError):
                    if backup is not None:
                        os.replace(backup, target)
                    else:
                        os.unlink(target)
            for backup in backups:
                with contextlib.suppress(OSError):
                    os.unlink(backup)
            self.abort()
            if isinstance(exc, OSError):
                raise DriverError(f"{exc.filename or self.folder}: cannot put the file in place "
                                  f"({exc.strerror}); the folder was left as it was") from None
            raise
        for backup in backups:
            with contextlib.suppress(OSError):
                os.unlink(backup)
        self.committed = True
        _fsync_dir(self.folder)
        targets = self.targets
        self._entries = []
        return targets

    def _backup(self, target: Path) -> Path:
        name = make_partial(self.folder, target.name, ".old")
        os.unlink(name)
        try:
            os.link(target, name)           # the old file stays reachable, the target is untouched
        except OSError:
            shutil.copy2(target, name)      # file systems without hard links
        return Path(name)


class HashingWriter:
    """A binary file wrapper that hashes (SHA-256) and counts every byte written."""

    def __init__(self, handle, progress=None, total: int = 0):
        self.handle = handle
        self.sha256 = hashlib.sha256()
        self.bytes = 0
        self._progress = progress
        self._total = total

    def write(self, data) -> int:
        view = memoryview(data).cast("B")
        self.handle.write(view)
        self.sha256.update(view)
        self.bytes += view.nbytes
        if self._progress is not None and self._total:
            self._progress(self.bytes, self._total)
        return view.nbytes

    def hexdigest(self) -> str:
        return self.sha256.hexdigest()


# ---------------------------------------------------------------------------------------------
# File drivers
# ---------------------------------------------------------------------------------------------
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.+-]{0,127}$")
COMMON_OPTIONS = {"name": "file name without extension (default 'sweep')"}


class FileDriver(Driver):
    """A driver that writes one data file plus its JSON sidecar into a folder.

    Subclasses set ``extension`` and implement :meth:`layout` (validate the
    options and describe how values are stored) and :meth:`write` (stream the
    data into a binary handle). ``deliver`` does the rest: file names, the
    atomic pair, SHA-256, and the sidecar (built by :mod:`sweepgen.sidecar`).

    The layout dict describes the stored values for the sidecar: ``dtype``
    (NumPy dtype string as stored, with byte order), ``header_bytes`` (bytes
    before the data, or None for text), and ``value_to_code`` = ``{"offset",
    "scale"}`` with ``code = offset + scale * value``; further keys (columns,
    format notes) are copied into the sidecar.
    """

    kind: ClassVar[str] = "file"
    extension: ClassVar[str] = ""
    #: option -> the values it takes, checked by :meth:`check_options` before any work
    choices: ClassVar[dict] = {}

    def check_options(self, options: dict) -> dict:
        """The options with defaults filled in; an unknown key, or a value outside the option's
        ``choices``, is an :class:`InputError` (checked before the scenario is even planned)."""
        known = {**COMMON_OPTIONS, **self.options}
        unknown = sorted(set(options) - set(known))
        if unknown:
            raise InputError(f"driver {self.name!r} has no option {unknown[0]!r} "
                             f"(options: {', '.join(sorted(known))})", key="--option")
        for key, allowed in self.choices.items():
            if key in options and str(options[key]) not in allowed:
                raise InputError(f"expected one of {', '.join(allowed)}, got {str(options[key])!r}",
                                 key=f"--option {key}")
        name = str(options.get("name", "sweep"))
        if not _NAME.match(name) or name in (".", ".."):
            raise InputError(f"expected a plain file name (letters, digits, '_', '-', '.', '+'; no folders), "
                             f"got {name!r}", key="--name")
        return {**options, "name": name}

    @abc.abstractmethod
    def layout(self, table, options: dict) -> dict:
        """Validate ``options`` against the table; describe the stored values (see class doc)."""

    def write(self, table, out: HashingWriter, layout: dict, delivery: Delivery) -> None:
        """Write the data to ``out`` (a binary writer); raise on failure. Every file driver
        implements this or, with ``writes_path``, :meth:`write_path`."""
        raise NotImplementedError

    def file_names(self, options: dict) -> tuple[str, str]:
        data = f"{options['name']}.{self.extension}"
        return data, data + ".json"

    #: True for formats written by a library that opens the file by name (HDF5): the driver
    #: implements :meth:`write_path` instead of :meth:`write`
    writes_path: ClassVar[bool] = False
    #: True for self-describing formats that :meth:`read` understands without a JSON sidecar
    self_describing: ClassVar[bool] = False

    def write_path(self, table, path: Path, layout: dict, delivery: Delivery, fields: dict) -> None:
        """Write the data to ``path`` (only for ``writes_path`` drivers); ``fields`` is the sidecar
        document without the file's own size and digest."""
        raise NotImplementedError

    def deliver(self, table, delivery: Delivery) -> dict:
        from sweepgen import sidecar
        from sweepgen.table import DigestingTable

        options = self.check_options(dict(delivery.options))
        layout = self.layout(table, options)
        data_name, sidecar_name = self.file_names(options)
        folder = Path(delivery.destination)
        report = {"driver": self.name, "folder": str(folder), "files": [data_name, sidecar_name],
                  "count": table.info.count, "sample_rate": table.info.sample_rate,
                  "dtype": layout["dtype"], "dry_run": bool(delivery.dry_run)}
        if delivery.dry_run:
            return report
        seen = DigestingTable(table)

        def document(sha, nbytes, digest):
            return sidecar.build(table.info, driver=self.name, data_file=data_name, sha256=sha, nbytes=nbytes,
                                 layout=layout, provenance=delivery.sidecar, table_sha256=digest)

        try:
            with AtomicFileSet(folder) as files:
                handle = files.open(data_name, "wb")
                if self.writes_path:
                    handle.close()
                    tmp = files.temporary(data_name)
                    self.write_path(seen, tmp, layout, delivery, document(None, 0, None))
                    sha, nbytes = sidecar.file_digest(tmp), tmp.stat().st_size
                else:
                    out = HashingWriter(handle, delivery.progress, layout.get("expected_bytes") or 0)
                    self.write(seen, out, layout, delivery)
                    sha, nbytes = out.hexdigest(), out.bytes
                doc = document(sha, nbytes, seen.hexdigest())
                files.open(sidecar_name, "w", encoding="utf-8").write(sidecar.dumps(doc))
                files.commit()         # data file first, sidecar last; all or nothing
        except OSError as exc:
            raise DriverError(f"{exc.filename or folder}: write failed ({exc.strerror or exc}); "
                              f"the folder was left as it was") from None
        report.update(bytes=nbytes, sha256=sha, table_sha256=doc["table_sha256"],
                      scaling={k: doc["scaling"][k] for k in ("code", "drive")},
                      paths=[str(folder / data_name), str(folder / sidecar_name)],
                      removed_partials=[p.name for p in files.removed])
        return report

    # -- reading back ----------------------------------------------------------------------------
    def load_values(self, path: Path, doc: dict):
        """The stored values of a data file this driver wrote, as the sidecar ``doc`` describes them."""
        raise DriverError(f"driver {self.name!r} cannot read a table back")

    def read(self, source, delivery: Delivery | None = None):
        """Read a data file (named directly or through its sidecar), verify and return it."""
        from sweepgen import readback

        data, side = readback.locate(source)
        if side is None:
            raise InputError(f"no sidecar {data.name}.json beside the table; it says how to decode the "
                             f"values (sample rate, scaling)", file=str(data))
        doc = readback.load_sidecar(side)
        checks = readback.file_checks(data, doc)
        try:
            values = self.load_values(data, doc)
        except (ValueError, OSError, KeyError, TypeError, IndexError, EOFError) as exc:   # (EOF: an empty .npy)
            raise InputError(f"cannot read the values as the sidecar describes them ({exc})",
                             file=str(data)) from None
        table = readback.ReadTable(data, doc, values, self.name, checks)
        table.checks += readback.value_checks(table)
        return table
