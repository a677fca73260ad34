"""Reading user TOML files strictly: every key consumed, every value checked.

A :class:`Section` wraps one TOML table together with the file it came from, the
kind of file (``"scenario"``, ``"laser"``, ...) and its dotted key prefix, so that
each error names the file, the full key and what was expected. Loaders take
values with the typed getters, which also refuse a value outside the key's
plausible range (:mod:`sweepgen.plausible`), and call :meth:`Section.finish`,
which refuses any key nobody asked for (unknown keys are errors, never silently
ignored).

Reading is bounded before the TOML parser sees the text: at most
:data:`MAX_TOML_BYTES` bytes, and tables and arrays nested at most
:data:`MAX_NESTING` deep (the standard library's parser recurses once per level
and takes quadratic time on long dotted keys, so a hostile file could otherwise
exhaust the stack or the processor). A UTF-8 byte-order mark is accepted.
"""

from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path

from sweepgen import plausible, units
from sweepgen.errors import InputError

MISSING = object()

#: largest TOML file read (bytes): a calibrated stage of 100 000 measured points is about 2 MiB
MAX_TOML_BYTES = 8 << 20
#: deepest nesting of tables, arrays and dotted keys in a TOML file (sweepgen's own files use 3)
MAX_NESTING = 32


def load_toml(path) -> dict:
    """Read a TOML file; a missing or malformed file is an :class:`InputError`."""
    return load_toml_bytes(path)[0]


def load_toml_bytes(path) -> tuple[dict, bytes]:
    """Read a TOML file once; returns the parsed table and the very bytes it was parsed from."""
    path = Path(path)
    raw = read_bounded(path, MAX_TOML_BYTES, "a sweepgen TOML file")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise InputError("not a UTF-8 text file (expected TOML)", file=str(path)) from None
    return parse_toml(text, path), raw


def require_file(path) -> Path:
    """``path`` as a Path when it names a regular file; otherwise an :class:`InputError` saying what it is
    (missing, a folder, or a device or pipe, which never end or never hold a measurement)."""
    path = Path(path)
    if path.is_file():
        return path
    if not path.exists():
        raise InputError("file not found", file=str(path))
    if path.is_dir():
        raise InputError("is a folder, not a file", file=str(path))
    raise InputError("not a regular file (a device or a pipe); give a file", file=str(path))


def read_bounded(path: Path, limit: int, what: str) -> bytes:
    """The bytes of ``path``, refused when there are more than ``limit`` of them."""
    try:
        with open(path, "rb") as handle:
            raw = handle.read(limit + 1)
    except FileNotFoundError:
        raise InputError("file not found", file=str(path)) from None
    except IsADirectoryError:
        raise InputError("is a folder, not a file", file=str(path)) from None
    except OSError as exc:
        raise InputError(f"cannot read file ({exc.strerror})", file=str(path)) from None
    if len(raw) > limit:
        raise InputError(f"file larger than {limit >> 20} MiB, more than {what} can sensibly hold",
                         file=str(path))
    return raw


def parse_toml(text: str, path) -> dict:
    """Parse TOML ``text`` (from ``path``, for messages) after bounding its nesting."""
    depth, line = nesting(text)
    if depth > MAX_NESTING:
        raise InputError(f"tables, arrays or dotted keys nested {depth} deep on line {line}; at most "
                         f"{MAX_NESTING} levels are read", file=str(path))
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"malformed TOML: {exc}", file=str(path)) from None
    except RecursionError:       # a second guard: nesting() counts conservatively, the parser decides
        raise InputError(f"nested too deeply to read (at most {MAX_NESTING} levels)", file=str(path)) from None


# strings and comments, which nesting() blanks out (keeping their line ends); the quantifiers are
# possessive, so that a string of megabytes costs no backtracking state per character (a 3 MB
# string took 380 MB of memory with ordinary ones)
_QUOTED = re.compile(r'''"""(?:[^"\\]++|\\.|"(?!""))*+"""|\'\'\'.*?\'\'\'|"(?:[^"\\\n]++|\\.)*+"|'[^'\n]*+'|#[^\n]*+''', re.S)
_STRUCTURE = re.compile(r"[\[\]{}=,.\n]")


def nesting(text: str) -> tuple[int, int]:
    """The deepest nesting in TOML ``text`` and the line where it is reached: open brackets and
    braces plus the dots of the dotted key or number being read (counted generously: a
    float adds one). Strings and comments are skipped."""
    if text.count("[") + text.count("{") + text.count(".") <= MAX_NESTING:
        return 0, 1
    bare = _QUOTED.sub(lambda m: "\n" * m.group().count("\n"), text)
    if bare.count("[") + bare.count("{") + bare.count(".") <= MAX_NESTING:
        return 0, 1
    depth = dots = deepest = 0
    line = where = 1
    for match in _STRUCTURE.finditer(bare):
        token = match.group()
        if token == ".":
            dots += 1
        elif token in ("[", "{"):
            depth += 1
            dots = 0
        elif token in ("]", "}"):
            depth -= 1
        else:                     # "=", "," or a line end
            dots = 0
            line += token == "\n"
        if depth + dots > deepest:
            deepest, where = depth + dots, line
    return deepest, where


class Section:
    """One table of a user file, read key by key."""

    def __init__(self, data, file, prefix: str = "", *, kind: str | None = None):
        if not isinstance(data, dict):
            raise InputError(f"expected a table, got {type(data).__name__}", file=str(file),
                             key=prefix or None)
        self.data = data
        self.file = str(file)
        self.prefix = prefix
        self.kind = kind            # the file kind whose plausible ranges apply (sweepgen.plausible)
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
        plausible.check(self.kind, self.key(name), result, unit, value, file=self.file)
        return result

    def quantities(self, name, unit, default=MISSING, *, example=None):
        """A list of physical values with units, as a NumPy array in ``unit``
        (see :func:`sweepgen.units.parse_many`); each must lie in the key's plausible range."""
        value = self.raw(name, default)
        if value is default and default is not MISSING:
            return default
        result = units.parse_many(value, unit, file=self.file, key=self.key(name), example=example)
        plausible.check_values(self.kind, self.key(name), result, unit, file=self.file, texts=value)
        return result

    def number(self, name, default=MISSING, *, positive=False, nonnegative=False, minimum=None,
               maximum=None, exclusive=False, integer=False):
        """A dimensionless number (a bare TOML number)."""
        value = written = self.raw(name, default)
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
        plausible.check(self.kind, self.key(name), value, "", written, file=self.file)
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
        return Section(value, self.file, self.key(name), kind=self.kind)

    def sections(self, name, default=MISSING):
        """An array of tables (``[[name]]``)."""
        value = self.raw(name, default)
        if value is default and default is not MISSING:
            return default
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            raise self.error(name, "expected an array of tables ([[...]])")
        return [Section(v, self.file, f"{self.key(name)}[{i}]", kind=self.kind) for i, v in enumerate(value)]

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
