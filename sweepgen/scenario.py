"""The scenario file: what the user wants to slow, where, and how hard.

Loading parses every value once (units to SI floats) and validates ranges and
relations that do not need the physics (end below start velocity, force
fraction η in (0, 1), a start time only for pulsed sources, ...). Relations
that need the physics (does the slowing distance fit?) are the planner's.
"""

from __future__ import annotations

import hashlib
import json
import warnings
from dataclasses import dataclass, field
from pathlib import Path

from sweepgen import catalog
from sweepgen._config import Section, load_toml_bytes
from sweepgen.errors import DeprecatedKey, InputError
from sweepgen.physics import gaussian_beam_saturation, rayleigh_range
from sweepgen.sources import EffusiveSource, GaussianSource
from sweepgen.species import Species, load_species

import numpy as np


@dataclass(frozen=True)
class Light:
    """The slowing beam along the beam line (it propagates along -z)."""

    saturation: float           # peak s0 on axis
    start: float                # m, where the light begins along the beam line
    waist: float | None = None  # m, 1/e² radius at the focus (None: uniform)
    focus: float = 0.0          # m, position of the focus
    wavelength: float = 0.0     # m, needed for the Rayleigh range

    @property
    def focused(self) -> bool:
        return self.waist is not None

    @property
    def rayleigh_range(self) -> float | None:
        return rayleigh_range(self.waist, self.wavelength) if self.focused else None

    def saturation_at(self, z):
        """Saturation parameter s(z) on axis; zero before the light start."""
        z = np.asarray(z, dtype=float)
        if self.focused:
            s = gaussian_beam_saturation(z, self.saturation, self.focus, self.rayleigh_range)
        else:
            s = np.full_like(z, self.saturation)
        return np.where(z >= self.start, s, 0.0)

    def saturation_slope(self, z):
        """ds/dz on axis (zero for uniform light and before the light start)."""
        z = np.asarray(z, dtype=float)
        if not self.focused:
            return np.zeros_like(z)
        zr = self.rayleigh_range
        u = (z - self.focus) / zr
        slope = -2.0 * self.saturation * u / (zr * (1.0 + u * u) ** 2)
        return np.where(z >= self.start, slope, 0.0)


@dataclass(frozen=True)
class Target:
    distance: float             # m, source -> target centre
    capture_velocity: float     # m/s
    aperture: float | None = None   # m, radius of the target aperture (optional)


@dataclass(frozen=True)
class Chirp:
    start_velocity: float       # m/s
    end_velocity: float         # m/s
    force_fraction: float       # η, the fraction of the largest force the design uses
    start_time: object          # None (continuous), "auto", or float seconds
    hold: float                 # s
    return_time: float          # s
    period: float               # s


@dataclass(frozen=True)
class Drive:
    """How the sweep is played: options read by the checker and the renderer."""

    sample_rate: float | None = None      # samples/s; None = automatic choice
    channel: int = 1
    max_step: float | None = None         # Hz: largest detuning change per sample / DAC step
    #                                       (None: 0.1 × natural linewidth, sampling.DEFAULT_STEP_FRACTION)
    tracking_fraction: float = 0.25       # tolerance as a fraction of the lag detuning Δv_lag/λ
    #                                       (checker rules "tracking" and "return_settling")


@dataclass(frozen=True)
class Scenario:
    title: str
    path: Path
    species: Species
    source: object                # EffusiveSource | GaussianSource
    pulse_time: float | None      # s; None for a continuous beam
    divergence: float | None      # rad, 1σ source divergence (transverse model), optional
    light: Light
    target: Target
    chirp: Chirp
    drive: Drive
    laser_ref: str | None = None
    generator_ref: str | None = None
    digest: str = field(default="", compare=False)

    @property
    def pulsed(self) -> bool:
        return self.pulse_time is not None

    @property
    def base_dir(self) -> Path:
        return self.path.parent

    def laser_path(self) -> Path:
        if self.laser_ref is None:
            raise InputError("no laser named; add  laser = \"...\"  (a built-in key or a path)",
                             file=str(self.path), key="laser")
        return catalog.resolve("lasers", self.laser_ref, relative_to=self.base_dir,
                                file=str(self.path), key="laser")

    def generator_path(self) -> Path:
        if self.generator_ref is None:
            raise InputError("no generator named; add  generator = \"...\"  (a built-in key or a path)",
                             file=str(self.path), key="generator")
        return catalog.resolve("generators", self.generator_ref, relative_to=self.base_dir,
                                file=str(self.path), key="generator")


def load_scenario(ref) -> Scenario:
    """Load a scenario by built-in key or path, validated, in SI units."""
    path = catalog.resolve("scenarios", str(ref))
    data, raw = load_toml_bytes(path)
    return scenario_from_dict(data, path, raw=raw)


def scenario_from_dict(data: dict, path, raw: bytes | None = None) -> Scenario:
    """Build a scenario from parsed TOML; ``path`` names it in messages and anchors relative paths.

    ``raw`` (the file's bytes) feeds the digest; without it the digest covers a canonical
    rendering of ``data``."""
    path = Path(str(path))
    file = str(path)
    top = Section(data, file)
    title = top.string("title")
    species_ref = top.string("species")
    species = load_species(species_ref, relative_to=path.parent, file=file, key="species")
    laser_ref = top.string("laser", None)
    generator_ref = top.string("generator", None)
    source, pulse_time, divergence = _read_source(top.section("source"), species)
    light = _read_light(top.section("light"), species)
    target = _read_target(top.section("target"), light)
    chirp = _read_chirp(top.section("chirp"), pulse_time, file)
    drive = _read_drive(top.section("drive", None))
    top.finish()

    if raw is None:
        raw = json.dumps(data, sort_keys=True, default=str).encode()
    digest = scenario_digest(raw, [catalog.resolve("species", species_ref, relative_to=path.parent)])
    return Scenario(title=title, path=path, species=species, source=source, pulse_time=pulse_time,
                    divergence=divergence, light=light, target=target, chirp=chirp, drive=drive,
                    laser_ref=laser_ref, generator_ref=generator_ref, digest=digest)


def _read_source(src: Section, species: Species):
    """``[source]``: the velocity model, the pulse time (pulsed sources) and the divergence."""
    model = src.string("model", choices=("effusive", "gaussian"))
    if model == "effusive":
        temperature = src.quantity("temperature", "K", positive=True, example="390 K")
        source = EffusiveSource(temperature=temperature, mass=species.mass)
    else:
        mean = src.quantity("mean_velocity", "m/s", positive=True, example="170 m/s")
        spread = src.quantity("velocity_spread", "m/s", positive=True, example="30 m/s")
        source = GaussianSource(mean_velocity=mean, velocity_spread=spread)
    pulse_time = src.quantity("pulse_time", "s", None, nonnegative=True, example="0 ms")
    divergence = src.quantity("divergence", "rad", None, positive=True, example="10 mrad")
    src.finish()
    return source, pulse_time, divergence


def _read_light(lt: Section, species: Species) -> Light:
    """``[light]``: peak saturation, light start, optional focus."""
    s0 = lt.number("saturation", positive=True)
    light_start = lt.quantity("start", "m", 0.0, nonnegative=True, example="0.05 m")
    waist = lt.quantity("waist", "m", None, positive=True, example="3 mm")
    if lt.has("focus") and waist is None:
        raise lt.error("focus", "a focus needs a waist; add light.waist (1/e² radius at the focus)")
    focus = lt.quantity("focus", "m", 0.0, example="0 m")
    lt.finish()
    return Light(saturation=s0, start=light_start, waist=waist, focus=focus, wavelength=species.wavelength)


def _read_target(tg: Section, light: Light) -> Target:
    """``[target]``: distance, capture velocity, optional aperture; the target lies beyond the light start."""
    distance = tg.quantity("distance", "m", positive=True, example="1.0 m")
    capture_velocity = tg.quantity("capture_velocity", "m/s", positive=True, example="20 m/s")
    aperture = tg.quantity("aperture", "m", None, positive=True, example="5 mm")
    tg.finish()
    if distance <= light.start:
        raise tg.error("distance", f"the target ({distance:g} m) must lie beyond the light start "
                                   f"({light.start:g} m)")
    return Target(distance=distance, capture_velocity=capture_velocity, aperture=aperture)


def _read_chirp(ch: Section, pulse_time: float | None, file: str) -> Chirp:
    """``[chirp]``: velocities, η, start time (pulsed sources only), hold, return, period."""
    v1 = ch.quantity("start_velocity", "m/s", positive=True, example="260 m/s")
    v2 = ch.quantity("end_velocity", "m/s", positive=True, example="15 m/s")
    if not v2 < v1:
        raise ch.error("end_velocity", f"expected an end velocity below the start velocity "
                                       f"({v1:g} m/s), got {ch.data['end_velocity']!r}")
    force_fraction = _read_force_fraction(ch)
    if ch.has("start_time"):
        start_raw = ch.raw("start_time")
        if pulse_time is None:
            raise ch.error("start_time", "a continuous beam has no chirp start time; remove it, "
                                         "or add source.pulse_time for a pulsed source")
        if start_raw == "auto":
            start_time = "auto"
        else:
            start_time = ch.quantity("start_time", "s", nonnegative=True, example="1.2 ms")
    else:
        start_time = "auto" if pulse_time is not None else None
    hold = ch.quantity("hold", "s", 0.0, nonnegative=True, example="0.5 ms")
    return_time = ch.quantity("return_time", "s", positive=True, example="0.3 ms")
    period = ch.quantity("period", "s", positive=True, example="20 ms")
    ch.finish()
    if pulse_time is not None and pulse_time >= period:
        raise InputError(f"the source pulse at {pulse_time:g} s lies outside the period ({period:g} s); "
                         f"set source.pulse_time below chirp.period or lengthen chirp.period",
                         file=file, key="source.pulse_time")
    return Chirp(start_velocity=v1, end_velocity=v2, force_fraction=force_fraction, start_time=start_time,
                 hold=hold, return_time=return_time, period=period)


def _read_force_fraction(ch: Section) -> float:
    """η from ``force_fraction``, or from its old name ``margin`` (still read, with a
    :class:`sweepgen.errors.DeprecatedKey` warning)."""
    if not ch.has("margin"):
        return ch.number("force_fraction", minimum=0.0, maximum=1.0, exclusive=True)
    if ch.has("force_fraction"):
        raise ch.error("margin", "give only force_fraction (margin is its old name)")
    warnings.warn(DeprecatedKey(ch.file, ch.key("margin"), ch.key("force_fraction")), stacklevel=2)
    return ch.number("margin", minimum=0.0, maximum=1.0, exclusive=True)


def _read_drive(dv: Section | None) -> Drive:
    """``[drive]`` (optional): sample rate, channel, largest step, tracking tolerance."""
    if dv is None:
        return Drive()
    rate_raw = dv.raw("sample_rate", "auto")
    rate = None if rate_raw == "auto" else dv.quantity("sample_rate", "Hz", positive=True,
                                                       example="10 MSa/s")
    channel = dv.number("channel", 1, integer=True, minimum=1)
    max_step = dv.quantity("max_step", "Hz", None, positive=True, example="500 kHz")
    tracking = dv.number("tracking_fraction", 0.25, minimum=0.0, maximum=1.0, exclusive=True)
    dv.finish()
    return Drive(sample_rate=rate, channel=channel, max_step=max_step, tracking_fraction=tracking)


def scenario_digest(raw: bytes, others=()) -> str:
    """SHA-256 over the scenario's bytes and the profile files it uses (in order)."""
    h = hashlib.sha256()
    for item in [raw, *others]:
        data = item if isinstance(item, bytes) else Path(str(item)).read_bytes()
        h.update(len(data).to_bytes(8, "little"))
        h.update(data)
    return h.hexdigest()
