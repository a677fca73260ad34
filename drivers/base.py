"""The one small protocol every driver implements."""

from __future__ import annotations

import abc
from dataclasses import dataclass, field
from typing import Callable, ClassVar


@dataclass
class Delivery:
    """Where and how to deliver a table.

    ``destination`` is a folder for file drivers, a VISA resource string for the
    VISA driver, a pyserial URL for the serial driver. ``generator`` is the
    loaded :class:`sweepgen.generator.Generator`. Outputs are switched on only
    when ``arm`` is true; ``dry_run`` validates and reports without touching
    anything. ``progress`` is called with (bytes_done, bytes_total).
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
    """

    name: ClassVar[str] = ""
    kind: ClassVar[str] = "file"
    description: ClassVar[str] = ""

    @abc.abstractmethod
    def deliver(self, table, delivery: Delivery) -> dict:
        """Deliver ``table``; return a report (steps, bytes, files, verification)."""
