"""Species data: the transition used for slowing, loaded from a profile.

A species profile (``profiles/species/*.toml``) gives each value as a small
table ``{ value = "...", source = "..." }``: every number carries the
publication it comes from. Either the excited-state ``lifetime`` or the natural
``linewidth`` (Γ/2π, Hz) is given; the other is derived (Γ = 1/τ).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

from sweepgen import catalog
from sweepgen._config import Section, load_toml


@dataclass(frozen=True)
class Species:
    """One slowing transition of one atom or molecule (SI units)."""

    key: str
    title: str
    kind: str                      # "atom" | "molecule"
    wavelength: float              # m (vacuum)
    mass: float                    # kg
    gamma: float                   # s⁻¹, Γ = 2π × linewidth
    saturation_intensity: float | None = None   # W/m², cycling transition
    loss_per_photon: float = 0.0   # probability per scattered photon of a dark, unrepumped state
    sources: dict = field(default_factory=dict, compare=False)

    @property
    def linewidth(self) -> float:
        """Natural linewidth Γ/2π in Hz."""
        return self.gamma / (2.0 * math.pi)

    @property
    def lifetime(self) -> float:
        """Excited-state lifetime τ = 1/Γ in s."""
        return 1.0 / self.gamma

    @property
    def k(self) -> float:
        """Wavenumber k = 2π/λ in 1/m."""
        return 2.0 * math.pi / self.wavelength


def _sourced(section: Section, name: str, unit: str, *, required=True, **checks):
    """Read ``name = { value = "...", source = "..." }``; returns (value, source)."""
    if not section.has(name):
        if required:
            raise section.error(name, "missing (required): give { value = \"...\", source = \"...\" }")
        section.raw(name, None)
        return None, None
    item = section.section(name)
    if unit is None:
        value = item.number("value", **checks)
    else:
        value = item.quantity("value", unit, **checks)
    source = item.string("source")
    if not source.strip():
        raise item.error("source", "expected the publication this value comes from")
    item.finish()
    return value, source


def load_species(ref, *, relative_to=None, file=None, key=None) -> Species:
    """Load a species profile by built-in key or path."""
    path = catalog.resolve("species", ref, relative_to=relative_to, file=file, key=key)
    return species_from_dict(load_toml(path), path)


def species_from_dict(data: dict, path) -> Species:
    top = Section(data, path)
    title = top.string("title")
    kind = top.string("kind", "atom", choices=("atom", "molecule"))
    sources = {}
    wavelength, sources["wavelength"] = _sourced(top, "wavelength", "m", positive=True, example="780.24 nm")
    mass, sources["mass"] = _sourced(top, "mass", "kg", positive=True, example="1.4432e-25 kg")
    lifetime, s_tau = _sourced(top, "lifetime", "s", required=False, positive=True, example="26.2 ns")
    linewidth, s_gam = _sourced(top, "linewidth", "Hz", required=False, positive=True, example="6.07 MHz")
    if (lifetime is None) == (linewidth is None):
        raise top.error("lifetime", "give exactly one of 'lifetime' or 'linewidth' (Γ/2π)")
    if lifetime is not None:
        gamma = 1.0 / lifetime
        sources["lifetime"] = s_tau
    else:
        gamma = 2.0 * math.pi * linewidth
        sources["linewidth"] = s_gam
    isat, s_isat = _sourced(top, "saturation_intensity", "W/m^2", required=False, positive=True,
                            example="1.669 mW/cm^2")
    if isat is not None:
        sources["saturation_intensity"] = s_isat
    loss, s_loss = _sourced(top, "loss_per_photon", None, required=(kind == "molecule"),
                            minimum=0.0, maximum=1.0)
    if loss is not None:
        if not loss < 1.0:
            raise top.error("loss_per_photon.value", f"expected a probability below 1, got {loss!r}")
        sources["loss_per_photon"] = s_loss
    top.raw("notes", None)
    if top.has("notes") and not isinstance(data["notes"], str):
        raise top.error("notes", "expected a string")
    top.finish()
    return Species(key=Path(str(path)).stem, title=title, kind=kind, wavelength=wavelength, mass=mass,
                   gamma=gamma, saturation_intensity=isat, loss_per_photon=loss or 0.0, sources=sources)
