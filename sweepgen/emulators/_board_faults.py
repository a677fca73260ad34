"""The ramp-board emulator's fault switches: which frames it harms, and how.

Every count is "the first N times", or ``"always"`` for a persistent fault
(see :mod:`sweepgen.emulators.board` for the table of effects).
"""

from __future__ import annotations

from dataclasses import dataclass, field

from sweepgen.errors import InputError
from sweepgen.wire import frames as fr

#: the fault switches, in the order a frame takes them, with what each does (COUNT: how many
#: eligible frames it harms)
FAULTS = {
    "corrupt": "flip one bit of COUNT received frames: they fail their CRC and are refused",
    "drop": "lose COUNT frames without a reply",
    "refuse": "refuse COUNT frames as busy",
    "stall": "answer COUNT frames only after the stall time",
    "reset": "reset on COUNT frames, mid-transfer: the unfinished upload and the session are lost",
    "corrupt_reply": "flip one bit of the reply to COUNT frames",
    "corrupt_memory": "store COUNT data frames with one bit flipped: the whole-table CRC then fails",
}
FAULT_KINDS = tuple(FAULTS)
ALWAYS = ("always", "persistent")


@dataclass
class FaultPlan:
    """Parsed fault switches; :mod:`sweepgen.emulators.board` describes the keys."""

    counts: dict = field(default_factory=dict)      # kind -> remaining count, None = always
    on: frozenset | None = frozenset({fr.MsgType.DATA})   # eligible types; None = any request
    skip: int = 1
    stall_time: float = 4.0                         # s; BoardEmulator sets twice the profile's link timeout
    fired: dict = field(default_factory=dict)       # kind -> times applied
    seen: int = 0                                   # eligible frames seen

    @classmethod
    def parse(cls, faults: dict | None, *, default_stall: float = 4.0) -> "FaultPlan":
        faults = dict(faults or {})
        plan = cls(stall_time=float(default_stall))
        for key in list(faults):
            value = faults.pop(key)
            if key in FAULT_KINDS:
                plan.counts[key] = _count(key, value)
            elif key == "on":
                plan.on = _types(value)
            elif key == "skip":
                if isinstance(value, bool) or not isinstance(value, int) or value < 0:
                    raise InputError(f"expected a whole number of frames >= 0, got {value!r}", key="faults.skip")
                plan.skip = value
            elif key == "stall_time":
                if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
                    raise InputError(f"expected a time in seconds > 0, got {value!r}", key="faults.stall_time")
                plan.stall_time = float(value)
            else:
                raise InputError(f"unknown fault switch (known: {', '.join(FAULT_KINDS)}, on, skip, "
                                 "stall_time)", key=f"faults.{key}")
        return plan

    def eligible(self, msg_type: int) -> bool:
        return self.on is None and msg_type in fr.REQUESTS or self.on is not None and msg_type in self.on

    def pick(self, msg_type: int) -> str | None:
        """The fault to apply to a received frame of ``msg_type`` (consumes one count)."""
        if not self.counts or not self.eligible(msg_type):
            return None
        self.seen += 1
        if self.seen <= self.skip:
            return None
        for kind in FAULT_KINDS:
            if kind not in self.counts:
                continue
            left = self.counts[kind]
            if left is None or left > 0:
                if left is not None:
                    self.counts[kind] = left - 1
                self.fired[kind] = self.fired.get(kind, 0) + 1
                return kind
        return None

    def describe(self) -> list[str]:
        """The active faults in words, e.g. ``["drop 2 data frames", "stall every data frame (2 s)"]``."""
        if not self.counts:
            return []
        types = "" if self.on is None else "/".join(fr.type_name(t) for t in sorted(self.on)) + " "

        def frames(n):
            return f"{n} {types}frame{'' if n == 1 else 's'}"

        verbs = {"corrupt": "corrupt", "drop": "drop", "refuse": "refuse", "stall": "stall",
                 "reset": "reset on", "corrupt_reply": "corrupt the reply to",
                 "corrupt_memory": "corrupt in memory"}
        out = []
        for kind in FAULT_KINDS:
            if kind in self.counts:
                left = self.counts[kind]
                text = f"{verbs[kind]} {f'every {types}frame' if left is None else frames(left)}"
                out.append(text + (f" ({self.stall_time:g} s)" if kind == "stall" else ""))
        if self.skip:
            out.append(f"after {frames(self.skip)} unharmed")
        return out

    def refund(self, kind: str) -> None:
        """Give back a count taken by :meth:`pick` for a fault that did not apply."""
        if self.counts.get(kind) is not None:
            self.counts[kind] += 1
        self.fired[kind] -= 1


def _count(key, value):
    if isinstance(value, str) and value.strip().lower() in ALWAYS or value is True or value == -1:
        return None
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise InputError(f"expected a count of frames (the first N times) or \"always\", got {value!r}",
                         key=f"faults.{key}")
    return value


def _types(value):
    if isinstance(value, str):
        if value.strip().lower() == "any":
            return None
        value = [value]
    try:
        return frozenset(fr.MsgType[str(v).strip().upper()] for v in value)
    except (KeyError, TypeError):
        names = ", ".join(t.name.lower() for t in sorted(fr.REQUESTS))
        raise InputError(f"expected \"any\" or message type names ({names}), got {value!r}",
                         key="faults.on") from None
