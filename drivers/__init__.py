"""Delivery drivers, discovered through the entry-point group ``sweepgen.drivers``.

A driver is one module implementing :class:`sweepgen.drivers.base.Driver`. The
built-in drivers register in sweepgen's own ``pyproject.toml`` exactly as a
third-party package would in its own::

    [project.entry-points."sweepgen.drivers"]
    mydriver = "mypackage.mydriver:MyDriver"

The command line finds drivers only through this group, so installing such a
package is all it takes to add a format or an instrument.
"""

from __future__ import annotations

from importlib.metadata import entry_points

from sweepgen.errors import DriverError, InputError

GROUP = "sweepgen.drivers"


def available() -> dict:
    """Registered driver names -> entry points (not yet imported).

    A built-in name cannot be taken over by another package (sweepgen's own
    registration wins); between two other packages registering the same name,
    the one found first on ``sys.path`` wins, as for imports.
    """
    found: dict = {}
    for ep in entry_points(group=GROUP):
        if ep.name not in found or (_is_builtin(ep) and not _is_builtin(found[ep.name])):
            found[ep.name] = ep
    return dict(sorted(found.items()))


def _is_builtin(ep) -> bool:
    dist = getattr(ep, "dist", None)
    return dist is not None and (dist.metadata["Name"] or "").lower() == "sweepgen"


def load(name: str, *, kind: str | None = None):
    """The driver class registered as ``name``.

    Parameters
    ----------
    name : str
        The entry-point name (``csv``, ``raw``, ``npy``, ``visa``, ...).
    kind : str, optional
        Require the driver's ``kind`` (``"file"`` or ``"instrument"``); a driver
        of another kind is an :class:`InputError` naming the drivers that fit.

    Raises
    ------
    InputError
        No driver of that name (or kind) is registered.
    DriverError
        The plug-in failed to import or is not a driver.
    """
    eps = available()
    if name not in eps:
        names = names_of_kind(kind, eps) if kind else sorted(eps)
        known = ", ".join(names) or "none"
        raise InputError(f"no driver named {name!r} (registered: {known})", key="--format")
    try:
        cls = eps[name].load()
    except Exception as exc:  # a broken third-party plug-in must not crash with a traceback
        raise DriverError(f"driver {name!r} failed to load: {exc}") from None
    if not isinstance(cls, type) or not callable(getattr(cls, "deliver", None)):
        raise DriverError(f"driver {name!r} ({eps[name].value}) is not a driver class with a deliver() method")
    if kind is not None and getattr(cls, "kind", None) != kind:
        fitting = ", ".join(names_of_kind(kind, eps)) or "none"
        raise InputError(f"driver {name!r} delivers to {'an instrument' if kind == 'file' else 'files'}, "
                         f"not {'files' if kind == 'file' else 'an instrument'} (drivers of that kind: "
                         f"{fitting})", key="--format")
    return cls


def names_of_kind(kind: str, eps: dict | None = None) -> list[str]:
    """Names of the registered drivers of one kind (drivers that fail to load are left out)."""
    eps = available() if eps is None else eps
    names = []
    for name, ep in eps.items():
        try:
            cls = ep.load()
        except Exception:
            continue
        if getattr(cls, "kind", None) == kind:
            names.append(name)
    return names


def describe() -> list[dict]:
    """One entry per registered driver: name, kind, description, options (for listings)."""
    rows = []
    for name, ep in available().items():
        try:
            cls = ep.load()
            rows.append({"name": name, "kind": getattr(cls, "kind", "?"),
                         "description": getattr(cls, "description", ""),
                         "options": dict(getattr(cls, "options", {}) or {}), "module": ep.value})
        except Exception as exc:
            rows.append({"name": name, "kind": "?", "description": f"failed to load: {exc}",
                         "options": {}, "module": ep.value})
    return rows


def read_table(source):
    """Read back a table file with the driver that wrote it: a :class:`sweepgen.readback.ReadTable`.

    The driver is the one the JSON sidecar names (``FILE.json`` beside the file,
    or the sidecar itself); without a sidecar, a self-describing format whose
    file extension matches (HDF5).
    """
    from pathlib import Path

    from sweepgen import readback

    data, side = readback.locate(source)
    if side is not None:
        name = readback.load_sidecar(side)["driver"]
        return _reader(name, str(side)).read(str(side))
    for name, ep in available().items():
        try:
            cls = ep.load()
        except Exception:
            continue
        ext = getattr(cls, "extension", "")
        if getattr(cls, "self_describing", False) and ext and Path(data).suffix.lower() in (f".{ext}",
                                                                                          *getattr(cls, "suffixes", ())):
            return cls().read(str(data))
    raise InputError(f"no sidecar {Path(data).name}.json beside the table, and no installed driver reads "
                     f"'{Path(data).suffix}' files on their own", file=str(data))


def _reader(name: str, where: str):
    try:
        return load(name)()
    except InputError:
        raise InputError(f"the sidecar names driver {name!r}, which is not installed (registered: "
                         f"{', '.join(available()) or 'none'})", file=where, key="driver") from None
