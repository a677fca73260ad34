"""Numbers for people: the one SI-prefix formatter of sweepgen.

Core messages (checker findings, sample-rate choices) and the command line
print quantities through :func:`si`, so a value reads the same everywhere:
``si(7.187e10, "Hz/s") -> '71.87 GHz/s'``.
"""

from __future__ import annotations

import math

_PREFIXES = [(1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "µ"),
             (1e-9, "n"), (1e-12, "p")]
#: units printed without a prefix (counts, ratios, and units whose prefixed forms read badly)
_NO_PREFIX = {"%", "", "photons", "m/s²", "m/s^2", "samples", "bits", "V/s"}


def si(value, unit: str | None = "", digits: int = 4) -> str:
    """``value`` with ``digits`` significant digits, an SI prefix and ``unit``.

    ``None`` prints as an em dash, a non-finite float as itself; the units in
    ``_NO_PREFIX`` (and a value of zero) get no prefix. A value a rounding away
    from the next prefix takes that prefix (``999.99 kHz`` at four digits reads
    ``1 MHz``, not ``1000 kHz``).
    """
    unit = unit or ""
    if value is None:
        return "—"
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if unit in _NO_PREFIX or value == 0:
        return f"{value:.{digits}g} {unit}".rstrip()
    mag = abs(value)
    # the largest prefix the value reaches, counting a value that rounds up to it
    reach = 1.0 - 0.5 * 10.0 ** (1 - max(digits, 4))
    for factor, prefix in _PREFIXES:
        if mag >= factor * reach:
            return f"{value / factor:.{digits}g} {prefix}{unit}"
    factor, prefix = _PREFIXES[-1]
    return f"{value / factor:.{digits}g} {prefix}{unit}"


def listed(items) -> str:
    """Items in words, for messages: ``1``, ``1 and 2``, ``1, 2 and 4``."""
    words = [str(x) for x in items]
    return words[0] if len(words) == 1 else f"{', '.join(words[:-1])} and {words[-1]}"
