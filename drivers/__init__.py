"""Delivery drivers, discovered through the entry-point group ``sweepgen.drivers``.

A driver is one module implementing :class:`sweepgen.drivers.base.Driver`. The
built-in drivers register in sweepgen's own ``pyproject.toml`` exactly as a
third-party package would in its own::

    [project.entry-points."sweepgen.drivers"]
    mydriver = "mypackage.mydriver:MyDriver"
"""

from __future__ import annotations

from importlib.metadata import entry_points

from sweepgen.errors import DriverError, InputError

GROUP = "sweepgen.drivers"


def available() -> dict:
    """Registered driver names -> entry points (not yet imported)."""
    return {ep.name: ep for ep in entry_points(group=GROUP)}


def load(name: str):
    """The driver class registered as ``name``."""
    eps = available()
    if name not in eps:
        known = ", ".join(sorted(eps)) or "none"
        raise InputError(f"no driver named {name!r} (registered: {known})", key="--format")
    try:
        cls = eps[name].load()
    except Exception as exc:  # a broken third-party plug-in must not crash with a traceback
        raise DriverError(f"driver {name!r} failed to load: {exc}") from None
    return cls
