"""How long a reply may take and how many bytes it may hold, on any link.

Both drivers wait for replies with one overall deadline per reply (not a
timeout that starts again with every byte) and read at most a stated number
of bytes, so an instrument or board that trickles, stalls or never stops
talking cannot keep an upload busy or fill the memory. Both bounds are derived
from what is expected and clamped to a stated floor and ceiling:

* **deadline** of a reply that moves N bytes: ``timeout + 2 N / throughput``
  (the link's base timeout and expected throughput from the generator
  profile), clamped to [:data:`DEADLINE_FLOOR`, :data:`DEADLINE_CEILING`];
  an absurd throughput (``1e-300 B/s``) therefore means an hour, not an
  overflow;
* **length** of a text reply: :data:`TEXT_REPLY_FLOOR` bytes for an ordinary
  reply (identity, error queue, completion, checksum, output state), or the
  expected length plus that much for a reply that carries the table (an
  ASCII readback), never more than :data:`REPLY_CEILING`; a binary readback
  must announce exactly the bytes that were sent.
"""

from __future__ import annotations

import math

#: shortest deadline of any reply (s): below it a loaded computer's scheduling noise decides
DEADLINE_FLOOR = 0.1
#: longest deadline of any reply (s)
DEADLINE_CEILING = 3600.0
#: bytes an ordinary text reply may hold (terminator included)
TEXT_REPLY_FLOOR = 4096
#: bytes any one reply may hold
REPLY_CEILING = 256 << 20


def clamp_deadline(seconds: float) -> float:
    """``seconds`` within [:data:`DEADLINE_FLOOR`, :data:`DEADLINE_CEILING`] (NaN: the ceiling)."""
    if math.isnan(seconds):
        return DEADLINE_CEILING
    return min(max(seconds, DEADLINE_FLOOR), DEADLINE_CEILING)


def transfer_deadline(timeout: float, nbytes: float, throughput: float, factor: float = 2.0) -> float:
    """Seconds a step that moves ``nbytes`` may take: ``timeout + factor nbytes / throughput``, clamped.

    The factor 2 of an SCPI transfer leaves room for a link slower than the
    profile says and for the instrument's own work on the data; a serial frame
    (whose reply time the profile's baud rate fixes) uses 1.
    """
    nbytes, throughput = float(nbytes), float(throughput)
    if nbytes <= 0:
        moving = 0.0
    elif not throughput > 0:
        moving = math.inf
    else:
        moving = factor * nbytes / throughput         # inf, not an error, when it overflows
    return clamp_deadline(float(timeout) + moving)


def reply_limit(expected: int = 0) -> int:
    """Bytes a text reply may hold when ``expected`` bytes of payload are expected."""
    return int(min(max(int(expected), 0) + TEXT_REPLY_FLOOR, REPLY_CEILING))

