"""IEEE 488.2 definite-length arbitrary blocks: the codec for binary transfers.

IEEE 488.2-1992 section 7.7.6, definite-length arbitrary block: ``#``, one
digit *n* (1-9), *n* digits giving the byte count, then the bytes. The bytes
come straight from NumPy arrays in the requested byte order and can be
streamed chunk by chunk after the header (:func:`block_parts`), so a large
table is never assembled in memory.
"""

from __future__ import annotations

from typing import Iterable, Iterator

class BlockError(ValueError):
    """Malformed IEEE 488.2 block."""


def block_header(nbytes: int) -> bytes:
    """``#<n><nbytes>`` for a definite-length block of ``nbytes`` bytes (IEEE 488.2 7.7.6)."""
    if nbytes < 0:
        raise ValueError("a block cannot hold a negative number of bytes")
    digits = str(int(nbytes))
    if len(digits) > 9:
        raise BlockError(f"a definite-length block holds at most 999999999 bytes, not {nbytes}")
    return f"#{len(digits)}{digits}".encode("ascii")


def encode_block(data) -> bytes:
    """A whole definite-length block (header and bytes) for an array or bytes."""
    import numpy as np

    raw = data if isinstance(data, (bytes, bytearray, memoryview)) else np.ascontiguousarray(data)
    payload = bytes(memoryview(raw).cast("B"))
    return block_header(len(payload)) + payload


def block_parts(chunks: Iterable, nbytes: int) -> Iterator:
    """Yield the header, then each chunk's bytes: a block streamed without assembling it.

    ``chunks`` yields bytes-like objects or NumPy arrays (their bytes as stored);
    their total must be ``nbytes``, else :class:`BlockError` (the instrument would
    wait for the rest or misread the next command).
    """
    import numpy as np

    yield block_header(nbytes)
    sent = 0
    for chunk in chunks:
        raw = chunk if isinstance(chunk, (bytes, bytearray, memoryview)) else np.ascontiguousarray(chunk)
        view = memoryview(raw).cast("B")
        sent += len(view)
        if sent > nbytes:
            raise BlockError(f"the data ran past the announced {nbytes} bytes")
        yield view
    if sent != nbytes:
        raise BlockError(f"the data ended after {sent} of the announced {nbytes} bytes")


def parse_block_header(buffer, start: int = 0) -> tuple[int, int] | None:
    """Parse a block header at ``buffer[start]``.

    Returns ``(payload_start, nbytes)``, or ``None`` if the buffer ends before
    the header is complete. Raises :class:`BlockError` when it is not a
    definite-length block header (``#0`` indefinite blocks included).
    """
    if len(buffer) - start < 2:
        if len(buffer) > start and buffer[start:start + 1] != b"#":
            raise BlockError("a block starts with '#'")
        return None
    if buffer[start:start + 1] != b"#":
        raise BlockError("a block starts with '#'")
    ndigits = buffer[start + 1] - 0x30
    if not 1 <= ndigits <= 9:
        raise BlockError("expected a digit 1-9 after '#' (definite-length block)")
    end = start + 2 + ndigits
    if len(buffer) < end:
        return None
    digits = bytes(buffer[start + 2:end])
    if not digits.isdigit():
        raise BlockError(f"block length {digits!r} is not a decimal number")
    return end, int(digits)


def decode_block(data) -> bytes:
    """The payload of a complete block ``data`` (a trailing newline is allowed)."""
    parsed = parse_block_header(data)
    if parsed is None:
        raise BlockError("the block header is incomplete")
    start, nbytes = parsed
    payload = bytes(data[start:start + nbytes])
    if len(payload) != nbytes:
        raise BlockError(f"the block announces {nbytes} bytes but holds {len(payload)}")
    rest = bytes(data[start + nbytes:])
    if rest not in (b"", b"\n", b"\r\n"):
        raise BlockError(f"{len(rest)} unexpected bytes after the block")
    return payload
