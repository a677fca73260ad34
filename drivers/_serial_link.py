"""Frames over one pyserial port: send a request, wait for its reply, send it again.

The link layer of the ``serial`` driver (:mod:`sweepgen.drivers.serial_board`):
stop and wait with one overall deadline per reply (:mod:`sweepgen.wire.bounds`),
replies matched by sequence number and request type, a frame sent again after a
timeout, a damaged reply or a FRAME_CRC/BUSY refusal. A damaged reply is never
answered: the request goes out again with the same sequence number and bytes.
"""

from __future__ import annotations

import collections
import time

from sweepgen.errors import InstrumentError
from sweepgen.wire import frames as fr
from sweepgen.wire.bounds import transfer_deadline

_REPLY_ALLOWANCE = 128         # bytes a reply may take beyond the request, for timeouts


class Refused(Exception):
    """The board refused a request for a reason other than 'send it again'."""

    def __init__(self, step: str, refusal: fr.Refusal):
        super().__init__(refusal.describe())
        self.step = step
        self.refusal = refusal


class Restart(Exception):
    """The board lost the upload; start over from HELLO."""

    def __init__(self, step: str, why: str):
        super().__init__(why)
        self.step = step
        self.why = why


class Link:
    """Frames over one pyserial port: send a request, wait for its reply, retry."""

    POLL = 0.02               # s, pyserial read timeout; waiting loops until the reply deadline

    def __init__(self, port, *, retries: int, timeout: float, throughput: float, report: dict):
        self.port = port
        self.retries = retries
        self.timeout = timeout
        self.throughput = throughput
        self.report = report
        self.decoder = fr.Decoder(fr.MAX_REPLY)
        self.queue: collections.deque = collections.deque()
        self.seq = 0
        self.sent = 0             # bytes written to the link, retransmissions included

    def reply_timeout(self, nbytes: int) -> float:
        """Base timeout of the link plus the time to move ``nbytes`` and a reply at its throughput,
        clamped (:mod:`sweepgen.wire.bounds`)."""
        return transfer_deadline(self.timeout, nbytes + _REPLY_ALLOWANCE, self.throughput, factor=1.0)

    def flush_input(self) -> None:
        """Forget every byte received so far (decoded, half-decoded or still in the port's buffer)."""
        try:
            self.port.reset_input_buffer()
        except Exception:            # a broken link: the decoder below still starts afresh
            pass
        self.decoder.reset()
        self.queue.clear()

    def _write(self, raw: bytes, step: str) -> None:
        import serial

        try:
            self.port.write(raw)
            self.sent += len(raw)
        except (serial.SerialException, OSError) as exc:
            raise InstrumentError(f"the link failed while sending ({exc})", step=step) from None

    def _next(self, deadline: float, step: str):
        """The next frame (or BadFrame) from the board, or None at the deadline."""
        import serial

        while not self.queue:
            if time.monotonic() >= deadline:
                return None
            try:
                # what the frame needs, or what is already waiting (a board that talks without end is
                # read in pieces, not byte by byte)
                data = self.port.read(max(self.decoder.wanted(), min(self.port.in_waiting, 1 << 16)))
            except (serial.SerialException, OSError) as exc:
                raise InstrumentError(f"the link failed while waiting for a reply ({exc})", step=step) from None
            if data:
                self.queue.extend(self.decoder.feed(data))
        return self.queue.popleft()

    def exchange(self, msg_type: int, payload: bytes, step: str, timeout: float | None = None) -> bytes:
        """Send one request until the board acknowledges it; return the ACK's reply data.

        Raises :class:`_Refused` for a refusal other than FRAME_CRC/BUSY, and
        :class:`InstrumentError` when the retries are used up.
        """
        self.seq = (self.seq + 1) & 0xFF
        seq = self.seq
        raw = fr.encode(msg_type, seq, payload)
        wait = timeout if timeout is not None else self.reply_timeout(len(raw))
        problem = "no reply"
        last_refusal = None
        for attempt in range(self.retries + 1):
            if attempt:
                self.report["retries"] += 1
            self._write(raw, step)
            outcome = self._await(msg_type, seq, time.monotonic() + wait, step)
            if isinstance(outcome, bytes):
                return outcome
            if isinstance(outcome, fr.Refusal):
                if outcome.reason not in fr.RETRY_SAME:
                    raise Refused(step, outcome)
                last_refusal = outcome
                problem = f"refused with {fr.reason_name(outcome.reason)}"
            elif outcome == "damaged":
                problem = "the reply failed its CRC"
            else:
                problem = f"no reply within {wait:.3g} s"
        raise InstrumentError(f"{problem} after {self.retries + 1} attempts "
                              f"({fr.type_name(msg_type).upper()} frame, sequence number {seq})",
                              step=step, reply=last_refusal.describe() if last_refusal else None)

    def _await(self, msg_type, seq, deadline, step):
        """The reply to request ``seq``: ACK data (bytes), a Refusal, "damaged" or None (timeout)."""
        while True:
            item = self._next(deadline, step)
            if item is None:
                return None
            if isinstance(item, fr.BadFrame):
                self.report["damaged_replies"] += 1
                return "damaged"
            if item.seq != seq:
                continue                      # a late reply to an earlier request
            try:
                if item.type == fr.MsgType.ACK:
                    request, data = fr.parse_ack(item.payload)
                    if request == msg_type:
                        return data
                elif item.type == fr.MsgType.REFUSE:
                    refusal = fr.Refusal.unpack(item.payload)
                    if refusal.request_type == msg_type:
                        return refusal
            except fr.FrameError:
                self.report["damaged_replies"] += 1
                return "damaged"
