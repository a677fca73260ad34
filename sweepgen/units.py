"""Physical quantities at the boundary: text with a unit in, SI float out.

Every physical value in a user file is a string such as ``"300 m/s"`` or
``"-250 MHz/V"``. It is parsed here, once, with pint, checked for its dimension
and converted to a plain float in the unit the caller names (SI, Hz for
frequencies). Nothing inside the package converts units again.

Two lab habits are handled explicitly:

* ``"Sa"`` (sample) is known, so ``"10 MSa/s"`` is a sample rate of 1e7 /s.
* Frequencies are cyclic (Hz). pint treats the radian as dimensionless, so it
  would silently read ``"38 Mrad/s"`` as 38 MHz (and ``"1 turn/s"`` as 2π Hz); a
  value carrying an angle unit where the wanted unit has none is refused instead
  of being wrong by 2π.
* A value is a number followed by its unit: ``"MHz"`` alone is refused rather
  than read as 1 MHz.
"""

from __future__ import annotations

import math
import re
from functools import lru_cache

from sweepgen.errors import InputError

_NUMBER_UNIT = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")


#: the Sa (sample) unit, so that "10 MSa/s" reads as a sample rate
_SAMPLE = "Sa = 1 = sample"
#: how the registry is set up: its options and our definitions (remembered factors depend on them)
_SETUP = ({"autoconvert_offset_to_baseunit": True}, [_SAMPLE])


@lru_cache(maxsize=1)
def registry():
    """The one pint registry of the process, built on first use and from pint's disk cache.

    Parsing pint's definition file is most of the cost of a registry (about
    0.3 s, as much as importing NumPy); pint keeps the parsed definitions in a
    cache folder when asked (``cache_folder``), which brings the registry to
    about 0.05 s. The folder is sweepgen's in the user's cache directory
    (:func:`cache_folder`).
    """
    return build_registry(cache_folder())


def import_pint():
    """pint, imported without its optional Dask support.

    When Dask is installed (the ``cluster`` extra), importing pint imports
    ``dask.base`` too (0.1 s at every start of every command); sweepgen never
    gives pint a Dask array, so pint is imported while ``dask`` is marked as
    missing, and the mark is removed at once: Dask itself stays importable (the
    workers' cluster client imports it when asked)."""
    import sys

    if "pint" in sys.modules or "dask" in sys.modules:
        import pint
        return pint
    sys.modules["dask"] = None          # importlib.util.find_spec("dask") is now None
    try:
        import pint
    finally:
        del sys.modules["dask"]
    return pint


def cache_folder():
    """Where pint's parsed definitions are kept: ``<user cache>/sweepgen/pint-<version>``
    (``~/.cache/sweepgen/...`` on Linux; the user cache directory comes from platformdirs)."""
    import platformdirs

    return platformdirs.user_cache_path("sweepgen", appauthor=False) / f"pint-{pint_version()}"


def pint_version() -> str:
    """pint's version, read as pint reads it (its distribution's metadata) without importing pint:
    a scenario whose units are all remembered (:func:`factors`) is read without pint (0.05 s)."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("pint")
    except PackageNotFoundError:        # pint then calls itself "unknown" too
        return "unknown"


def build_registry(folder=None):
    """A pint registry with the sample unit, from the definitions cached in ``folder`` (None: no cache).

    A folder that cannot be made or read (a read-only home, a file cut short
    by a crash or another process writing it) costs speed, never correctness:
    the folder is cleared and the registry is built from the definitions.
    """
    pint = import_pint()

    if folder is not None:
        try:
            return _defined(pint.UnitRegistry(**_SETUP[0], cache_folder=folder))
        except Exception:  # pint and flexcache raise OSError, pickle and parser errors alike
            import shutil

            shutil.rmtree(folder, ignore_errors=True)
    return _defined(pint.UnitRegistry(**_SETUP[0]))


def _defined(ureg):
    for definition in _SETUP[1]:
        ureg.define(definition)
    return ureg


def _describe(unit: str) -> str:
    return f"a value in units of {unit}" if unit else "a dimensionless number"


def parse(value, unit: str, *, file=None, key=None, example: str | None = None):
    """Parse ``value`` (a string with a unit) and return a float in ``unit``.

    Parameters
    ----------
    value : str
        Text from a user file, for example ``"300 m/s"``.
    unit : str
        The unit wanted, for example ``"m/s"``; it fixes the dimension that is
        accepted. ``""`` asks for a dimensionless value.
    file, key : str, optional
        Where the value came from, for the error message.
    example : str, optional
        An example of a correct value for the error message.

    Raises
    ------
    InputError
        Not a string, not parsable, wrong dimension, or not finite.
    """
    ex = f" such as '{example}'" if example else ""
    if isinstance(value, bool) or not isinstance(value, (str, int, float)):
        raise InputError(f"expected {_describe(unit)}{ex}, got {value!r}", file=file, key=key)
    if isinstance(value, (int, float)):
        if unit:
            raise InputError(
                f"{value!r} has no unit; write it as a string with its unit{ex or f' in {unit}'}",
                file=file, key=key)
        number = float(value)
        if not math.isfinite(number):
            raise InputError(f"expected a finite number, got {value!r}", file=file, key=key)
        return number
    text = value.strip()
    if not text:
        raise InputError(f"expected {_describe(unit)}{ex}, got an empty string", file=file, key=key)
    if re.search(r"\b(nan|inf|infinity)\b", text.lower()):
        raise InputError(f"expected a finite value, got {value!r}", file=file, key=key)
    match = _NUMBER_UNIT.match(text)
    if not match:
        raise InputError(f"cannot read {value!r} as a quantity: expected a number followed by its unit"
                         f"{ex or (f' in {unit}' if unit else '')}", file=file, key=key)
    number, text = float(match.group(1)), match.group(2) or ""
    factor = factors().get(text, unit)
    if factor is None:
        return _convert(number, text, unit, value, ex, file, key)
    result = number * factor
    if not math.isfinite(result):
        raise InputError(f"expected a finite value, got {value!r}", file=file, key=key)
    return result


def _convert(number: float, text: str, unit: str, value, ex: str, file, key) -> float:
    """``number`` in ``text`` converted to ``unit`` by pint, every check made; a plain scaling is
    remembered (:func:`factors`)."""
    ureg = registry()
    try:
        quantity = ureg.Quantity(number, text)
        target = ureg.Unit(unit) if unit else ureg.dimensionless
    except Exception as exc:  # pint raises many types for bad text
        raise InputError(f"cannot read {value!r} as a quantity ({_short(exc)}); "
                         f"expected {_describe(unit)}{ex}", file=file, key=key) from None
    if quantity.dimensionality != target.dimensionality:
        got = f"{quantity.units:~}" or "no unit"
        raise InputError(f"{value!r} has the wrong dimension ({got}); expected {_describe(unit)}{ex}",
                         file=file, key=key)
    if _has_angle(ureg, quantity.units) and not _has_angle(ureg, target):
        if not unit:
            raise InputError(f"{value!r} carries an angle unit; expected a dimensionless number{ex}",
                             file=file, key=key)
        raise InputError(f"{value!r} is an angular frequency (it carries an angle unit); write cyclic "
                         f"frequencies in Hz (Γ/2π, not Γ){ex}", file=file, key=key)
    result = float(quantity.to(target).magnitude)
    if not math.isfinite(result):
        raise InputError(f"expected a finite value, got {value!r}", file=file, key=key)
    zero, one = (float(ureg.Quantity(x, text).to(target).magnitude) for x in (0.0, 1.0))
    if zero == 0.0 and math.isfinite(one):        # a plain scaling (pint multiplies by this factor)
        factors().put(text, unit, one)
    return result


class Factors:
    """Conversion factors pint has given, ``(unit text, wanted unit) -> factor``, kept in a JSON file.

    Reading a scenario and its profiles asks for the same few dozen units every
    time; remembered, they need no pint registry (its construction, 0.03 s from
    pint's cache, and each lookup). Only plain scalings are kept (an offset
    unit such as degC always goes to pint), only conversions that passed every
    check, and only what pint itself returned: ``number * factor`` is the very
    product pint computes. The file belongs to one pint version (it lies in
    :func:`cache_folder`); one that cannot be read or written costs speed, never
    correctness. New factors are written when the process ends.
    """

    def __init__(self, path):
        self.path = path
        self._known = None
        self._new = False

    def _load(self) -> dict:
        if self._known is None:
            self._known = {}
            try:
                import json

                doc = json.loads(self.path.read_text(encoding="utf-8")) if self.path is not None else {}
                self._known = {k: float(v) for k, v in doc.items() if isinstance(v, (int, float))}
            except (OSError, ValueError, AttributeError):
                pass
        return self._known

    def get(self, text: str, unit: str) -> float | None:
        return self._load().get(f"{text}\x1f{unit}")

    def put(self, text: str, unit: str, factor: float) -> None:
        known = self._load()
        if known.get(f"{text}\x1f{unit}") != factor:
            known[f"{text}\x1f{unit}"] = factor
            if not self._new and self.path is not None:
                import atexit

                atexit.register(self.save)
            self._new = True

    def save(self) -> None:
        """Write the factors (atomically: a reader never sees half a file)."""
        if not self._new or self.path is None:
            return
        try:
            import json

            from sweepgen._atomic import atomic_path

            with atomic_path(self.path) as tmp:
                tmp.write_text(json.dumps(self._known, indent=0, sort_keys=True), encoding="utf-8")
            self._new = False
        except OSError:
            pass


@lru_cache(maxsize=1)
def factors() -> Factors:
    """The conversion factors of this process, from ``<cache folder>/factors-<setup>.json``, where
    ``<setup>`` names how :func:`build_registry` sets pint up (a change there starts a new file)."""
    import hashlib

    setup = hashlib.sha256(repr(_SETUP).encode()).hexdigest()[:12]
    return Factors(cache_folder() / f"factors-{setup}.json")


def _has_angle(ureg, unit) -> bool:
    """Whether ``unit`` contains an angle (radian, degree, turn, ...), which pint treats as dimensionless."""
    return "radian" in str(ureg.get_root_units(unit)[1])


def _short(exc: Exception) -> str:
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return text[:120]


def parse_many(values, unit: str, *, file=None, key=None, example: str | None = None):
    """Parse a list of quantity strings into a NumPy array of floats in ``unit``.

    The same rules as :func:`parse`, but pint is asked once per distinct unit
    text instead of once per value, so a list of 100 000 measured points reads in
    a fraction of a second. A value that does not fit the fast path (no number,
    an offset unit, anything unusual) goes through :func:`parse`, whose error
    names ``key[i]``.
    """
    import numpy as np

    if not isinstance(values, (list, tuple)):
        raise InputError(f"expected a list of values such as [\"{example or '1 ' + unit}\", ...], got {values!r}",
                         file=file, key=key)
    out = np.empty(len(values), dtype=float)
    factors: dict[str, float | None] = {}
    for i, value in enumerate(values):
        match = _NUMBER_UNIT.match(value) if isinstance(value, str) else None
        factor = None
        if match and match.group(2) and not re.search(r"(?i)\b(nan|inf|infinity)\b", value):
            text = match.group(2)
            if text not in factors:
                factors[text] = _linear_factor(text, unit)
            factor = factors[text]
        if factor is None:
            out[i] = parse(value, unit, file=file, key=f"{key}[{i}]" if key else None, example=example)
        else:
            out[i] = float(match.group(1)) * factor
    return out


def _linear_factor(text: str, unit: str) -> float | None:
    """The factor from ``text`` to ``unit`` if the conversion is a plain scaling, else None."""
    try:
        one = parse(f"1 {text}", unit)
        zero = parse(f"0 {text}", unit)
    except InputError:
        return None
    return one if zero == 0.0 else None
