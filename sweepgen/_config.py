"""Reading user TOML files strictly: every key consumed, every value checked.

A :class:`Section` wraps one TOML table together with the file it came from and
its dotted key prefix, so that each error names the file, the full key and what
was expected. Loaders take values with the typed getters and call
:meth:`Section.finish`, which refuses any key nobody asked for (unknown keys are
errors, never silently ignored).
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

from sweepgen import units
from sweepgen.errors import InputError

MISSING = object()


def load_toml(path) -> dict:
    """Read a TOML file; a missing or malformed file is an :class:`InputError`."""
    return load_toml_bytes(path)[0]


def load_toml_bytes(path) -> tuple[dict, bytes]:
    """Read a TOML file once; returns the parsed table and the very bytes it was parsed from."""
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise InputError("file not found", file=str(path)) from None
    except OSError as exc:
        raise InputError(f"cannot read file ({exc.strerror})", file=str(path)) from None
    try:
        return tomllib.loads(raw.decode("utf-8")), raw
    except UnicodeDecodeError:
        raise InputError("not a UTF-8 text file (expected TOML)", file=str(path)) from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"malformed TOML: {exc}", file=str(path)) from None


class Section:
    """One table of a user file, read key by key."""

    def __init__(self, data, file, prefix: str = ""):
        if not isinstance(data, dict):
            raise InputError(f"expected a table, got {type(data).__name__}", file=str(file),
                             key=prefix or None)
        self.data = data
        self.file = str(file)
        self.prefix = prefix
        self._used: set[str] = set()

    # -- helpers -----------------------------------------------------------
    def key(self, name: str) -> str:
        return f"{self.prefix}.{name}" if self.prefix else name

    def error(self, name: str | None, message: str) -> InputError:
        return InputError(message, file=self.file, key=self.key(name) if name else (self.prefix or None))

    def has(self, name: str) -> bool:
        return name in self.data

    def raw(self, name: str, default=MISSING):
        self._used.add(name)
        if name in self.data:
            return self.data[name]
        if default is MISSING:
            raise self.error(name, "missing (required)")
        return default

    # -- typed getters -------------------------------------------------------
    def quantity(self, name, unit, default=MISSING, *, positive=False, nonnegative=False,
                 example=None, minimum=None, maximum=None):
        """A physical value with a unit, returned as a float in ``unit``."""
        value = self.raw(name, default)
        if value is default and default is not MISSING and not isinstance(default, str):
            return default
        result = units.parse(value, unit, file=self.file, key=self.key(name), example=example)
        self._range(name, value, result, unit, positive, nonnegative, minimum, maximum)
        return result

    def number(self, name, default=MISSING, *, positive=False, nonnegative=False, minimum=None,
               maximum=None, exclusive=False, integer=False):
        """A dimensionless number (a bare TOML number)."""
        value = self.raw(name, default)
        if value is default and default is not MISSING:
            return default
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            kind = "a whole number" if integer else "a number"
            raise self.error(name, f"expected {kind}, got {value!r}")
        if integer and not isinstance(value, int):
            if float(value).is_integer():
                value = int(value)
            else:
                raise self.error(name, f"expected a whole number, got {value!r}")
        if not math.isfinite(value):
            raise self.error(name, f"expected a finite number, got {value!r}")
        if exclusive:
            if minimum is not None and not value > minimum or maximum is not None and not value < maximum:
                raise self.error(name, f"expected a number strictly between {minimum} and {maximum}, got {value!r}")
        self._range(name, value, value, "", positive, nonnegative, None if exclusive else minimum,
                    None if exclusive else maximum)
        return value

    def string(self, name, default=MISSING, *, choices=None):
        value = self.raw(name, default)
        if value is default and default is not MISSING:
            return default
        if not isinstance(value, str):
            raise self.error(name, f"expected a string, got {value!r}")
        if choices is not None and value not in choices:
            raise self.error(name, f"expected one of {', '.join(repr(c) for c in choices)}, got {value!r}")
        return value

    def section(self, name, default=MISSING):
        value = self.raw(name, default)
        if value is default and default is not MISSING:
            return default
        return Section(value, self.file, self.key(name))

    def sections(self, name, default=MISSING):
        """An array of tables (``[[name]]``)."""
        value = self.raw(name, default)
        if value is default and default is not MISSING:
            return default
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            raise self.error(name, "expected an array of tables ([[...]])")
        return [Section(v, self.file, f"{self.key(name)}[{i}]") for i, v in enumerate(value)]

    def finish(self):
        """Refuse keys that no getter asked for."""
        unknown = [k for k in self.data if k not in self._used]
        if unknown:
            name = unknown[0]
            known = sorted(self._used)
            hint = f"; known keys here: {', '.join(known)}" if known else ""
            raise self.error(name, f"unknown key{hint}")

    # -- internals -------------------------------------------------------------
    def _range(self, name, text, value, unit, positive, nonnegative, minimum, maximum):
        shown = repr(text)
        if positive and not value > 0:
            raise self.error(name, f"expected a value greater than zero, got {shown}")
        if nonnegative and not value >= 0:
            raise self.error(name, f"expected a value of zero or more, got {shown}")
        if minimum is not None and value < minimum:
            raise self.error(name, f"expected at least {minimum:g} {unit}".rstrip() + f", got {shown}")
        if maximum is not None and value > maximum:
            raise self.error(name, f"expected at most {maximum:g} {unit}".rstrip() + f", got {shown}")
