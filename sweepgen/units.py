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


def cache_folder():
    """Where pint's parsed definitions are kept: ``<user cache>/sweepgen/pint-<version>``
    (``~/.cache/sweepgen/...`` on Linux; the user cache directory comes from platformdirs)."""
    import pint
    import platformdirs

    return platformdirs.user_cache_path("sweepgen", appauthor=False) / f"pint-{pint.__version__}"


def build_registry(folder=None):
    """A pint registry with the sample unit, from the definitions cached in ``folder`` (None: no cache).

    A folder that cannot be made or read (a read-only home, a file cut short
    by a crash or another process writing it) costs speed, never correctness:
    the folder is cleared and the registry is built from the definitions.
    """
    import pint

    if folder is not None:
        try:
            ureg = pint.UnitRegistry(autoconvert_offset_to_baseunit=True, cache_folder=folder)
            ureg.define(_SAMPLE)
            return ureg
        except Exception:  # pint and flexcache raise OSError, pickle and parser errors alike
            import shutil

            shutil.rmtree(folder, ignore_errors=True)
    ureg = pint.UnitRegistry(autoconvert_offset_to_baseunit=True)
    ureg.define(_SAMPLE)
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
    ureg = registry()
    try:
        quantity = ureg.Quantity(float(match.group(1)), match.group(2) or "")
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
    return result


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
