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
from sweepgen.channels import channels_from_section
from sweepgen.errors import DeprecatedKey, InputError
from sweepgen.physics import gaussian_beam_saturation, rayleigh_range
from sweepgen.sources import PULSE_SHAPES, Collimator, EffusiveSource, Emission, GaussianSource
from sweepgen.species import Species, load_species
from sweepgen.timing import Timing, timing_from_section

import numpy as np


@dataclass(frozen=True)
class Light:
    """The slowing beam along the beam line (it propagates along -z).

    ``saturation`` is the peak ``s0 = I/I_sat`` on axis as the scenario gives it,
    measured against the species' ``saturation_intensity``; the atoms see
    ``effective_factor`` times that (``I_sat / I_sat,eff``, 1 when the species
    gives no effective saturation intensity). :meth:`saturation_at` and
    :attr:`peak` are the effective values, the ones every rate uses.
    """

    saturation: float           # peak s0 on axis, as written in the scenario
    start: float                # m, where the light begins along the beam line
    waist: float | None = None  # m, 1/e² radius at the focus (None: unbounded plane wave)
    focus: float = 0.0          # m, position of the focus
    wavelength: float = 0.0     # m, needed for the Rayleigh range
    effective_factor: float = 1.0   # I_sat / I_sat,eff of the species

    @property
    def focused(self) -> bool:
        """Whether the light is a Gaussian beam (a waist is given); else an unbounded plane wave."""
        return self.waist is not None

    @property
    def rayleigh_range(self) -> float | None:
        return rayleigh_range(self.waist, self.wavelength) if self.focused else None

    @property
    def peak(self) -> float:
        """Effective saturation parameter on axis at the focus (or everywhere, unbounded light)."""
        return self.saturation * self.effective_factor

    def saturation_at(self, z, radius=0.0):
        """Effective saturation parameter at ``z`` and ``radius`` from the axis; zero before the light start."""
        z = np.asarray(z, dtype=float)
        if self.focused:
            s = gaussian_beam_saturation(z, self.peak, self.focus, self.rayleigh_range, radius, self.waist)
        else:
            s = np.full(np.broadcast(z, np.asarray(radius)).shape, self.peak)
        return np.where(z >= self.start, s, 0.0)

    def on_axis(self, z: float) -> float:
        """:meth:`saturation_at` on the axis at one position ``z``, as a float: the same products and
        quotients on Python floats (off the axis factor, ``exp(0) = 1``, which changes nothing), for the
        integrations that ask for one position at a time thousands of times."""
        z = float(z)                        # a NumPy scalar's arithmetic costs several times a float's
        if not z >= self.start:             # also NaN, as saturation_at
            return 0.0
        if not self.focused:
            return float(self.peak)
        u = (z - self.focus) / self.rayleigh_range
        return self.peak / (1.0 + u * u)

    def saturation_slope(self, z):
        """d s_eff/dz on axis (zero for unbounded light and before the light start)."""
        z = np.asarray(z, dtype=float)
        if not self.focused:
            return np.zeros_like(z)
        zr = self.rayleigh_range
        u = (z - self.focus) / zr
        slope = -2.0 * self.peak * u / (zr * (1.0 + u * u) ** 2)
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
    min_survival: float = 0.5   # smallest expected fraction left bright after slowing (check warns below)


@dataclass(frozen=True)
class Drive:
    """How the sweep is played: options read by the checker and the renderer."""

    sample_rate: float | None = None      # samples/s; None = automatic choice
    channel: int = 1
    max_step: float | None = None         # Hz: largest detuning change per sample / DAC step
    #                                       (None: 0.1 × natural linewidth, sampling.DEFAULT_STEP_FRACTION)
    tracking_fraction: float = 0.25       # tolerance as a fraction of the lag detuning Δv_lag/λ
    #                                       (checker rules "tracking" and "return_settling")
    preshape: bool = False                # play the drive whose actuator response follows the plan
    preshape_bandwidth: float | None = None   # Hz, its reference response (None: sweepgen.preshape default)


@dataclass(frozen=True)
class Scenario:
    title: str
    path: Path
    species: Species
    source: object                # EffusiveSource | GaussianSource
    emission: Emission            # when, where and in which directions the source emits
    light: Light
    target: Target
    chirp: Chirp
    drive: Drive
    channels: tuple = ()          # Channel, ... ([channels.NAME])
    timing: Timing = field(default_factory=Timing)   # [timing]: trigger, delay, burst/repeat, markers
    laser_ref: str | None = None
    generator_ref: str | None = None
    digest: str = field(default="", compare=False)

    @property
    def pulsed(self) -> bool:
        return self.emission.pulse_time is not None

    @property
    def pulse_time(self) -> float | None:
        """s, the leading edge of the source pulse (None for a continuous beam)."""
        return self.emission.pulse_time

    @property
    def divergence(self) -> float | None:
        """rad, 1σ source divergence per axis (None: not given)."""
        return self.emission.divergence

    @property
    def repumps(self) -> tuple:
        """The channels with ``role = "repump"``."""
        return tuple(c for c in self.channels if c.role == "repump")

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
    top = Section(data, file, kind="scenario")
    title = top.string("title")
    species_ref = top.string("species")
    species = load_species(species_ref, relative_to=path.parent, file=file, key="species")
    laser_ref = top.string("laser", None)
    generator_ref = top.string("generator", None)
    source, emission = _read_source(top.section("source"), species)
    light = _read_light(top.section("light"), species)
    target = _read_target(top.section("target"), light)
    chirp = _read_chirp(top.section("chirp"), emission, file)
    drive = _read_drive(top.section("drive", None))
    channels = channels_from_section(top.section("channels", None), species)
    timing = timing_from_section(top.section("timing", None), pulsed=emission.pulse_time is not None)
    top.finish()

    if raw is None:
        raw = json.dumps(data, sort_keys=True, default=str).encode()
    digest = scenario_digest(raw, [catalog.resolve("species", species_ref, relative_to=path.parent)])
    return Scenario(title=title, path=path, species=species, source=source, emission=emission, light=light,
                    target=target, chirp=chirp, drive=drive, channels=channels, timing=timing, laser_ref=laser_ref,
                    generator_ref=generator_ref, digest=digest)


def _read_source(src: Section, species: Species):
    """``[source]``: the velocity model and the :class:`Emission` (pulse, size, directions)."""
    model = src.string("model", choices=("effusive", "gaussian"))
    if model == "effusive":
        temperature = src.quantity("temperature", "K", positive=True, example="390 K")
        source = EffusiveSource(temperature=temperature, mass=species.mass)
    else:
        mean = src.quantity("mean_velocity", "m/s", positive=True, example="170 m/s")
        spread = src.quantity("velocity_spread", "m/s", positive=True, example="30 m/s")
        source = GaussianSource(mean_velocity=mean, velocity_spread=spread)
    pulse_time = src.quantity("pulse_time", "s", None, nonnegative=True, example="0 ms")
    for name in ("pulse_duration", "pulse_shape"):
        if src.has(name) and pulse_time is None:
            raise src.error(name, "a continuous beam has no pulse; add source.pulse_time for a pulsed source")
    duration = src.quantity("pulse_duration", "s", 0.0, nonnegative=True, example="1 ms")
    shape = src.string("pulse_shape", "flat", choices=PULSE_SHAPES)
    radius = src.quantity("radius", "m", 0.0, nonnegative=True, example="1.5 mm")
    divergence = src.quantity("divergence", "rad", None, positive=True, example="10 mrad")
    collimator = None
    if src.has("collimator"):
        if divergence is not None:
            raise src.error("collimator", "give either source.divergence or [source.collimator], not both")
        col = src.section("collimator")
        collimator = Collimator(distance=col.quantity("distance", "m", positive=True, example="0.2 m"),
                                radius=col.quantity("radius", "m", positive=True, example="1 mm"))
        col.finish()
    src.finish()
    return source, Emission(pulse_time=pulse_time, pulse_duration=duration, pulse_shape=shape, radius=radius,
                            divergence=divergence, collimator=collimator)


def _read_light(lt: Section, species: Species) -> Light:
    """``[light]``: peak saturation, light start, optional focus."""
    s0 = lt.number("saturation", positive=True)
    light_start = lt.quantity("start", "m", 0.0, nonnegative=True, example="0.05 m")
    waist = lt.quantity("waist", "m", None, positive=True, example="3 mm")
    if lt.has("focus") and waist is None:
        raise lt.error("focus", "a focus needs a waist; add light.waist (1/e² radius at the focus)")
    focus = lt.quantity("focus", "m", 0.0, example="0 m")
    lt.finish()
    return Light(saturation=s0, start=light_start, waist=waist, focus=focus, wavelength=species.wavelength,
                 effective_factor=species.saturation_factor)


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


def _read_chirp(ch: Section, emission: Emission, file: str) -> Chirp:
    """``[chirp]``: velocities, η, start time (pulsed sources only), hold, return, period."""
    v1 = ch.quantity("start_velocity", "m/s", positive=True, example="260 m/s")
    v2 = ch.quantity("end_velocity", "m/s", positive=True, example="15 m/s")
    if not v2 < v1:
        raise ch.error("end_velocity", f"expected an end velocity below the start velocity "
                                       f"({v1:g} m/s), got {ch.data['end_velocity']!r}")
    force_fraction = _read_force_fraction(ch)
    pulse_time = emission.pulse_time
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
    min_survival = ch.number("min_survival", 0.5, minimum=0.0, maximum=1.0, exclusive=True)
    ch.finish()
    if pulse_time is not None and pulse_time + emission.pulse_duration >= period:
        what = "pulse" if emission.pulse_duration else "source pulse"
        raise InputError(f"the {what} at {pulse_time:g} s" + (f" lasting {emission.pulse_duration:g} s"
                         if emission.pulse_duration else "") + f" does not end within the period ({period:g} s); "
                         f"set source.pulse_time below chirp.period or lengthen chirp.period",
                         file=file, key="source.pulse_time")
    return Chirp(start_velocity=v1, end_velocity=v2, force_fraction=force_fraction, start_time=start_time,
                 hold=hold, return_time=return_time, period=period, min_survival=min_survival)


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
    """``[drive]`` (optional): sample rate, channel, largest step, tracking tolerance, pre-shaping."""
    if dv is None:
        return Drive()
    rate_raw = dv.raw("sample_rate", "auto")
    rate = None if rate_raw == "auto" else dv.quantity("sample_rate", "Hz", positive=True,
                                                       example="10 MSa/s")
    channel = dv.number("channel", 1, integer=True, minimum=1)
    max_step = dv.quantity("max_step", "Hz", None, positive=True, example="500 kHz")
    tracking = dv.number("tracking_fraction", 0.25, minimum=0.0, maximum=1.0, exclusive=True)
    preshape = dv.raw("preshape", False)
    if not isinstance(preshape, bool):
        raise dv.error("preshape", f"expected true or false, got {preshape!r}")
    bandwidth = dv.quantity("preshape_bandwidth", "Hz", None, positive=True, example="20 kHz")
    dv.finish()
    return Drive(sample_rate=rate, channel=channel, max_step=max_step, tracking_fraction=tracking,
                 preshape=preshape, preshape_bandwidth=bandwidth)


def scenario_digest(raw: bytes, others=()) -> str:
    """SHA-256 over the scenario's bytes and the profile files it uses (in order)."""
    h = hashlib.sha256()
    for item in [raw, *others]:
        data = item if isinstance(item, bytes) else Path(str(item)).read_bytes()
        h.update(len(data).to_bytes(8, "little"))
        h.update(data)
    return h.hexdigest()
