"""Species data: the transition used for slowing, loaded from a profile.

A species profile (``profiles/species/*.toml``) gives each value as a small
table ``{ value = "...", source = "..." }``: every number carries the
publication it comes from. Either the excited-state ``lifetime`` or the natural
``linewidth`` (Γ/2π, Hz) is given; the other is derived (Γ = 1/τ).

The force model (README.md, "Physics background"), each part optional with a
documented default so that older files keep working:

* ``[saturation_intensity]`` (with an optional ``definition``, the transition and
  polarisation it belongs to) is what a scenario's ``light.saturation`` is
  measured against, ``s = I / I_sat``;
* ``[effective_saturation_intensity]``: what the atoms in the slowing light
  really need (for an alkali without a quantisation axis the isotropic-light
  value; default: the saturation intensity itself). The atoms see
  ``s_eff = s · I_sat / I_sat,eff``;
* ``[max_scattering_rate]``: the largest scattering rate as a fraction of Γ,
  ``fraction = 0.5`` or ``ground_states``/``excited_states`` for
  ``n_e/(n_g + n_e)`` (default 1/2, a closed two-level cycling transition);
* ``[off_resonant_level]``: the nearest excited level the slowing light also
  excites (``splitting`` from the cycling excited level, signed, Hz; relative
  line ``strength``; ``branching`` of its decay to the dark ground level); used
  for hyperfine depumping and repumping. Absent: no depumping.
* ``[zeeman]``: the Landé factors and magnetic quantum numbers of the two
  sub-levels of the slowing transition (``ground_g``, ``ground_m``,
  ``excited_g``, ``excited_m``, ``source``), for the tapered-field comparison
  (:mod:`sweepgen.tapered`). Absent: no such comparison.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

from sweepgen import catalog
from sweepgen._config import Section, load_toml
from sweepgen.physics import TWO_LEVEL_FRACTION, multilevel_rate_fraction, zeeman_moment


@dataclass(frozen=True)
class OffResonantLevel:
    """The nearest excited level the slowing light also excites (hyperfine depumping)."""

    splitting: float       # Hz, its frequency minus the cycling excited level's (signed)
    strength: float        # line strength relative to the cycling transition
    branching: float       # probability that its decay ends in the dark ground level


@dataclass(frozen=True)
class Zeeman:
    """The two Zeeman sub-levels of the slowing transition (Landé factors g_F, quantum numbers m_F)."""

    ground_g: float
    ground_m: float
    excited_g: float
    excited_m: float

    @property
    def moment(self) -> float:
        """Effective magnetic moment μ′ (J/T), :func:`sweepgen.physics.zeeman_moment`."""
        return zeeman_moment(self.ground_g, self.ground_m, self.excited_g, self.excited_m)


@dataclass(frozen=True)
class Species:
    """One slowing transition of one atom or molecule (SI units)."""

    key: str
    title: str
    kind: str                      # "atom" | "molecule"
    wavelength: float              # m (vacuum)
    mass: float                    # kg
    gamma: float                   # s⁻¹, Γ = 2π × linewidth
    saturation_intensity: float | None = None   # W/m², what light.saturation is measured against
    loss_per_photon: float = 0.0   # probability per scattered photon of a dark, unrepumped state
    rate_fraction: float = TWO_LEVEL_FRACTION   # largest scattering rate / Γ
    effective_saturation_intensity: float | None = None   # W/m², what the slowed atoms really need
    saturation_definition: str = ""   # the transition and polarisation saturation_intensity belongs to
    off_resonant: OffResonantLevel | None = None
    zeeman: Zeeman | None = None
    sources: dict = field(default_factory=dict, compare=False)
    path: str | None = field(default=None, compare=False)    # the file it was read from, for messages

    @property
    def saturation_factor(self) -> float:
        """``I_sat / I_sat,eff``: the atoms see ``s_eff = s · factor`` for a scenario's ``s``."""
        if self.effective_saturation_intensity is None or self.saturation_intensity is None:
            return 1.0
        return self.saturation_intensity / self.effective_saturation_intensity

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


def _source_of(item: Section) -> str:
    source = item.string("source")
    if not source.strip():
        raise item.error("source", "expected the publication this value comes from")
    return source


def _saturation(top: Section, sources: dict):
    """``[saturation_intensity]`` (value, source, optional definition) and
    ``[effective_saturation_intensity]``; returns (I_sat, I_sat,eff, definition)."""
    isat = isat_eff = None
    definition = ""
    if top.has("saturation_intensity"):
        item = top.section("saturation_intensity")
        isat = item.quantity("value", "W/m^2", positive=True, example="1.669 mW/cm^2")
        definition = item.string("definition", "")
        sources["saturation_intensity"] = _source_of(item)
        item.finish()
    isat_eff, s_eff = _sourced(top, "effective_saturation_intensity", "W/m^2", required=False, positive=True,
                               example="3.577 mW/cm^2")
    if isat_eff is not None:
        if isat is None:
            raise top.error("effective_saturation_intensity", "needs [saturation_intensity] too: the value "
                            "light.saturation is measured against")
        sources["effective_saturation_intensity"] = s_eff
    return isat, isat_eff, definition


def _rate_fraction(top: Section, sources: dict) -> float:
    """``[max_scattering_rate]``: ``fraction``, or ``ground_states`` and ``excited_states``."""
    if not top.has("max_scattering_rate"):
        return TWO_LEVEL_FRACTION
    item = top.section("max_scattering_rate")
    if item.has("fraction") == (item.has("ground_states") or item.has("excited_states")):
        raise item.error(None, "give either fraction (R_max/Γ) or ground_states and excited_states")
    if item.has("fraction"):
        fraction = item.number("fraction", positive=True, maximum=TWO_LEVEL_FRACTION)
    else:
        n_g = item.number("ground_states", integer=True, minimum=1)
        n_e = item.number("excited_states", integer=True, minimum=1)
        if n_e > n_g:
            raise item.error("excited_states", f"expected at most as many excited as ground sub-levels "
                                               f"({n_g}), got {n_e}")
        fraction = multilevel_rate_fraction(n_g, n_e)
    sources["max_scattering_rate"] = _source_of(item)
    item.finish()
    return fraction


def _off_resonant(top: Section, sources: dict) -> OffResonantLevel | None:
    """``[off_resonant_level]``: splitting, strength, branching, source."""
    if not top.has("off_resonant_level"):
        return None
    item = top.section("off_resonant_level")
    splitting = item.quantity("splitting", "Hz", example="-266.65 MHz")
    if splitting == 0:
        raise item.error("splitting", "expected a non-zero splitting from the cycling excited level")
    strength = item.number("strength", positive=True)
    branching = item.number("branching", minimum=0.0, maximum=1.0)
    sources["off_resonant_level"] = _source_of(item)
    item.finish()
    return OffResonantLevel(splitting=splitting, strength=strength, branching=branching)


def _zeeman(top: Section, sources: dict) -> Zeeman | None:
    """``[zeeman]``: ground_g, ground_m, excited_g, excited_m, source."""
    if not top.has("zeeman"):
        return None
    item = top.section("zeeman")
    values = {name: item.number(name) for name in ("ground_g", "ground_m", "excited_g", "excited_m")}
    sources["zeeman"] = _source_of(item)
    item.finish()
    zeeman = Zeeman(**values)
    if zeeman.moment == 0:
        raise item.error("excited_m", "the transition's frequency does not move in a field "
                                      "(g_e m_e = g_g m_g): no tapered-field slower can use it")
    return zeeman


def load_species(ref, *, relative_to=None, file=None, key=None) -> Species:
    """Load a species profile by built-in key or path."""
    path = catalog.resolve("species", ref, relative_to=relative_to, file=file, key=key)
    return species_from_dict(load_toml(path), path)


def species_from_dict(data: dict, path) -> Species:
    top = Section(data, path, kind="species")
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
    isat, isat_eff, definition = _saturation(top, sources)
    fraction = _rate_fraction(top, sources)
    off = _off_resonant(top, sources)
    zeeman = _zeeman(top, sources)
    if off is not None and kind == "molecule":
        raise top.error("off_resonant_level", "molecules lose to dark states through loss_per_photon; "
                                              "off_resonant_level is for atoms")
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
                   gamma=gamma, saturation_intensity=isat, loss_per_photon=loss or 0.0, rate_fraction=fraction,
                   effective_saturation_intensity=isat_eff, saturation_definition=definition,
                   off_resonant=off, zeeman=zeeman, sources=sources, path=str(path))
