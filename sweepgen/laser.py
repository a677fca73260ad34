"""Laser profiles: the tuning chain, the limits and the actuator response.

A laser profile (``profiles/lasers/*.toml``, or any path) has

* ``title``, and optionally ``notes``;
* ``[[chain]]`` tables: the stages from optical detuning to the generator's
  output, in order (see :mod:`sweepgen.chain`);
* ``[limits]``: ``mode_hop_free`` (the laser's mode-hop-free tuning range, Hz;
  omit it when the laser itself is not tuned, e.g. a locked laser swept by an
  AOM), ``max_chirp_rate`` (largest safe |dΔ/dt|, Hz/s), ``input_min`` and
  ``input_max`` (the actuator's safe input range, in the chain's drive unit: V
  at the actuator, or Hz), optional ``max_slew`` (largest safe rate of change of
  the drive, drive units per second);
* ``[response]``: the actuator response (see :mod:`sweepgen.response`).

Example::

    title = "My piezo-tuned laser"
    [limits]
    mode_hop_free = "1.2 GHz"
    max_chirp_rate = "3 GHz/ms"
    input_min = "-10 V"
    input_max = "10 V"
    max_slew = "100 V/ms"
    [response]
    model = "second-order"
    resonance = "25 kHz"
    q = 0.8
    [[chain]]
    stage = "analog"
    coefficient = "40 MHz/V"
    set_point = "-180 MHz"
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from sweepgen import catalog
from sweepgen._config import Section, load_toml
from sweepgen.chain import Chain, chain_from_sections
from sweepgen.response import Response, response_from_section


@dataclass(frozen=True)
class Limits:
    """The laser's limits (SI units; ``input_*`` and ``max_slew`` in drive units)."""

    mode_hop_free: float | None     # Hz; None: not applicable (the laser itself is not tuned)
    max_chirp_rate: float           # Hz/s
    input_min: float                # drive units (V at the actuator, or Hz)
    input_max: float
    max_slew: float | None = None   # drive units per second


@dataclass(frozen=True)
class Laser:
    key: str
    title: str
    chain: Chain
    limits: Limits
    response: Response
    path: Path | None = field(default=None, compare=False)

    @property
    def drive_unit(self) -> str:
        return self.chain.drive_unit


def load_laser(ref, *, relative_to=None, file=None, key=None) -> Laser:
    """Load a laser profile by built-in key or path (relative to ``relative_to``)."""
    path = catalog.resolve("lasers", ref, relative_to=relative_to, file=file, key=key)
    return laser_from_dict(load_toml(path), path)


def laser_from_dict(data: dict, path) -> Laser:
    """Build a :class:`Laser` from the parsed TOML of ``path`` (strict)."""
    top = Section(data, path, kind="laser")
    title = top.string("title")
    top.string("notes", "")
    chain = chain_from_sections(top.sections("chain"), file=top.file, key="chain")
    unit = chain.drive_unit
    example = "-10 V" if unit == "V" else "100 MHz"

    lim = top.section("limits")
    mhf = lim.quantity("mode_hop_free", "Hz", None, positive=True, example="1.2 GHz")
    max_rate = lim.quantity("max_chirp_rate", "Hz/s", positive=True, example="3 GHz/ms")
    lo = lim.quantity("input_min", unit, example=example)
    hi = lim.quantity("input_max", unit, example="10 V" if unit == "V" else "250 MHz")
    if not hi > lo:
        raise lim.error("input_max", f"expected a value above input_min ({lo:g} {unit})")
    slew = lim.quantity("max_slew", f"{unit}/s", None, positive=True,
                        example="100 V/ms" if unit == "V" else "500 MHz/ms")
    lim.finish()
    chain.safe_min, chain.safe_max = lo, hi

    response = response_from_section(top.section("response", None))
    top.finish()
    return Laser(key=Path(str(path)).stem, title=title, chain=chain,
                 limits=Limits(mhf, max_rate, lo, hi, slew), response=response, path=Path(str(path)))
