"""Atomic file writes: write to a temporary file beside the target, then rename.

A failure or an interruption leaves the target as it was (absent or old), never
half written. ``os.replace`` is atomic on POSIX and Windows within one folder.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path


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
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    os.close(fd)
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
