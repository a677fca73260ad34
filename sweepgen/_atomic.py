"""Atomic file writes: write to a temporary file beside the target, then rename.

A failure or an interruption leaves the target as it was (absent or old), never
half written. ``os.replace`` is atomic on POSIX and Windows within one folder.

The temporary files have names of their own, ``.TARGET.HOST-PID.XXXXXXXX.part``
(and ``.old`` for the moment a replaced file is kept): a process killed while
writing (``kill -9``, a power cut) leaves one behind, and the next write into
that folder recognises it by its name and removes it once the process that
wrote it is gone (:func:`remove_stale_partials`). Nothing here creates a
folder: writing into a folder that does not exist is refused.
"""

from __future__ import annotations

import contextlib
import os
import re
import socket
import tempfile
from pathlib import Path

from sweepgen.errors import InputError, display_path

_PARTIAL = re.compile(r"^\.(?P<target>.+)\.(?P<host>[A-Za-z0-9-]+)-(?P<pid>\d+)\.[a-z0-9_]{8}\.(?:part|old)$")


def _host() -> str:
    """This computer's name as it appears in temporary names (letters, digits and '-')."""
    name = socket.gethostname().split(".")[0] or "host"
    return re.sub(r"[^A-Za-z0-9-]", "-", name)[:32]


def make_partial(folder: Path, target_name: str, suffix: str = ".part") -> Path:
    """Create an empty temporary file for ``target_name`` in ``folder`` (mode 0600); returns its path."""
    fd, tmp = tempfile.mkstemp(prefix=f".{target_name}.{_host()}-{os.getpid()}.", suffix=suffix, dir=folder)
    os.close(fd)
    return Path(tmp)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, OSError):
        return True          # someone else's process (or a number the system cannot check): keep the file
    return True


def stale_partials(folder) -> list[Path]:
    """Temporary files in ``folder`` left by writers of this computer that are no longer running."""
    folder = Path(folder)
    try:
        names = os.listdir(folder)
    except OSError:
        return []
    host = _host()
    out = []
    for name in names:
        m = _PARTIAL.match(name)
        if m and m.group("host") == host and int(m.group("pid")) != os.getpid() and not _alive(int(m.group("pid"))):
            out.append(folder / name)
    return sorted(out)


def remove_stale_partials(folder) -> list[Path]:
    """Remove what :func:`stale_partials` finds; returns the files removed."""
    removed = []
    for path in stale_partials(folder):
        with contextlib.suppress(FileNotFoundError):
            path.unlink()
            removed.append(path)
    return removed


def require_folder(folder, *, key=None) -> Path:
    """``folder`` if it is an existing folder, else an :class:`InputError` (nothing is created)."""
    folder = Path(folder)
    if not folder.is_dir():
        what = "is not a folder" if folder.exists() else "does not exist"
        raise InputError(f"the folder {display_path(folder)} {what}; sweepgen writes only into existing "
                         f"folders (create it first)", key=key)
    return folder


def new_file_mode() -> int:
    """The permissions an ordinary ``open()`` gives a new file: ``0o666`` less the umask.

    The umask can only be read by setting it; it is set to ``0o022`` for that
    instant (not ``0``), so a file another thread creates meanwhile is never
    world-writable.
    """
    mask = os.umask(0o022)
    os.umask(mask)
    return 0o666 & ~mask


@contextlib.contextmanager
def atomic_path(target):
    """Yield a temporary path in the target's folder; rename it onto ``target`` on success."""
    target = Path(target)
    folder = require_folder(target.parent)
    remove_stale_partials(folder)
    tmp = make_partial(folder, target.name)
    os.chmod(tmp, new_file_mode())     # mkstemp makes 0600; give the usual permissions
    try:
        yield Path(tmp)
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


@contextlib.contextmanager
def atomic_open(target, mode="wb"):
    """Open a temporary file for writing; it replaces ``target`` only if the block succeeds."""
    with atomic_path(target) as tmp:
        with open(tmp, mode) as handle:
            yield handle
            handle.flush()
            os.fsync(handle.fileno())


def atomic_write_text(target, text: str) -> Path:
    with atomic_open(target, "w") as handle:
        handle.write(text)
    return Path(target)
