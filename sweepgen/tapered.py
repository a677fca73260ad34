"""The tapered-field alternative: the Zeeman slower that gives a plan's deceleration.

Instead of chirping the light, a tapered-field (Zeeman) slower holds the light
at one frequency and lets a magnetic field along the beam keep the slowing
atoms in resonance (C. J. Foot, *Atomic Physics*, OUP 2005, §9.3, eqs.
9.11–9.12, recalled). For the same constant deceleration ``a`` from the start
velocity ``v₀``::

    L₀ = v₀² / 2a,     v(z) = v₀ √(1 − z/L₀),
    B(z) = B₀ √(1 − z/L₀) + B_bias,     B₀ = h v₀ / (λ μ′),
    μ′ = (g_e m_e − g_g m_g) μ_B

(the species file's ``[zeeman]`` table gives the g-factors and sub-levels;
μ_B and h from :mod:`scipy.constants`). ``z`` is measured from where the
plan's design atom starts braking (``Plan.z_start``); the field stops where
it reaches the end velocity, ``L = (v₀² − v_end²)/2a`` later.

The comparison keeps the plan's light: its saturation along the beam and its
frequency, held at the chirp's start detuning ``Δ₀ = −(v₀ + Δv_lag)/λ``. The
resonance condition ``Δ₀ + v/λ − μ′B/h = −Δv_lag/λ`` then gives
``B_bias = −B₀``: the field grows in magnitude from zero at the entrance, and
at the exit falls back to zero, where the slowed atoms meet the light
``(v₀ − v_end)/λ`` red of their resonance and stop scattering (as the chirp's
return takes the light away from them). The deceleration is the plan's
smallest along its path (a constant deceleration the light can give
everywhere).

:func:`tapered_field` is the pure function (a plan in, the field out);
:func:`compare` flies the same atoms through both methods with the Monte Carlo
of :mod:`sweepgen.simulate`, the field entering as a Zeeman shift at each
atom's own place (:class:`FieldProgram`), the atoms in the field driven on
their closed cycling transition (:func:`in_field`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import constants as C

from sweepgen import physics
from sweepgen.errors import InputError


@dataclass(frozen=True)
class TaperedField:
    """A tapered-field slower with the deceleration of a plan (SI units: T, m, Hz, m/s, m/s²)."""

    moment: float              # J/T, μ′
    start_velocity: float      # m/s, v₀
    end_velocity: float        # m/s
    deceleration: float        # m/s², a
    b0: float                  # T, B₀ = h v₀ / (λ μ′)
    l0: float                  # m, L₀ = v₀² / 2a
    bias: float                # T, B_bias
    start: float               # m from the source, where the field begins
    length: float              # m, L = (v₀² − v_end²) / 2a
    laser_detuning: float      # Hz, the light's fixed detuning

    @property
    def shift_per_tesla(self) -> float:
        """``μ′/h`` in Hz/T: how far the transition moves per tesla."""
        return self.moment / C.h

    @property
    def end(self) -> float:
        """m from the source, where the field ends."""
        return self.start + self.length

    def field(self, z):
        """``B`` (T) at positions ``z`` (m from the source): eq. 9.12 inside the slower, zero outside."""
        z = np.asarray(z, dtype=float)
        inside = (z >= self.start) & (z <= self.end)
        return np.where(inside, physics.tapered_field(z - self.start, self.b0, self.l0, self.bias), 0.0)

    def velocity(self, z):
        """The design atom's velocity (m/s) at ``z``: ``v₀ √(1 − (z − start)/L₀)`` inside the slower."""
        s = np.clip((np.asarray(z, dtype=float) - self.start) / self.l0, 0.0, 1.0 - (self.end_velocity
                                                                                 / self.start_velocity) ** 2)
        return self.start_velocity * np.sqrt(1.0 - s)

    @property
    def peak_field(self) -> float:
        """Largest ``|B|`` (T) along the slower (at one of its ends: ``B`` is monotone in ``z``)."""
        return float(np.max(np.abs(self.field(np.array([self.start, self.end])))))

    def to_json(self) -> dict:
        return {
            "moment_bohr_magnetons": self.moment / C.physical_constants["Bohr magneton"][0],
            "shift_per_tesla": self.shift_per_tesla,
            "deceleration": self.deceleration,
            "b0": self.b0,
            "l0": self.l0,
            "bias": self.bias,
            "peak_field": self.peak_field,
            "length": self.length,
            "start_position": self.start,
            "end_position": self.end,
            "laser_detuning": self.laser_detuning,
            "start_velocity": self.start_velocity,
            "end_velocity": self.end_velocity,
        }


def tapered_field(plan) -> TaperedField:
    """The tapered-field slower with ``plan``'s deceleration, velocities and light (module docstring).

    Raises :class:`InputError` when the species file gives no ``[zeeman]`` table.
    """
    sp = plan.species
    if sp.zeeman is None:
        raise InputError(f"species '{sp.key}' gives no [zeeman] table (ground_g, ground_m, excited_g, "
                         f"excited_m, source), so no tapered-field slower can be worked out", key="zeeman",
                         file=sp.path)
    tr = plan.trajectory
    moment = sp.zeeman.moment
    v0, v1 = plan.start_velocity, plan.end_velocity
    a = float(np.min(tr.deceleration))
    b0 = physics.tapered_field_scale(v0, sp.wavelength, moment)
    l0 = physics.tapered_field_length(v0, a)
    detuning = plan.start_detuning
    lag = float(tr.lag[0])
    bias = C.h * (detuning + lag / sp.wavelength) / moment          # = −B₀ (module docstring)
    length = physics.closed_form_slowing(v0, v1, a, sp.wavelength)["distance"]
    return TaperedField(moment=moment, start_velocity=v0, end_velocity=v1, deceleration=a, b0=b0, l0=l0,
                        bias=bias, start=plan.z_start, length=length, laser_detuning=detuning)


class FieldProgram:
    """The light of a tapered-field slower as the Monte Carlo asks for it.

    The light's own detuning is fixed (``at``); each atom sees it moved by the
    Zeeman shift at its place, ``−μ′B(z)/h`` (``shift_at``), which
    :mod:`sweepgen._flight` adds per atom. ``extremes`` bounds what any atom can
    see over a step (the light's detuning and every shift the field makes), so
    the time-step rule of the simulation holds as it does for a chirp.
    """

    def __init__(self, field: TaperedField, period: float):
        self.field = field
        self.period = float(period)
        shifts = -field.shift_per_tesla * field.field(np.array([field.start, field.end]))
        self._range = (field.laser_detuning + min(0.0, float(shifts.min())),
                       field.laser_detuning + max(0.0, float(shifts.max())))

    def at(self, t: float) -> float:
        return self.field.laser_detuning

    def extremes(self, t0: float, t1: float) -> tuple[float, float]:
        return self._range

    def shift_at(self, z):
        """Hz added to the light's detuning for atoms at ``z`` (m): ``−μ′B(z)/h``."""
        return -self.field.shift_per_tesla * self.field.field(z)


@dataclass(frozen=True)
class FieldComparison:
    """Both methods on the same atoms: the chirp (as :func:`sweepgen.simulate.simulate` plays it) and
    the tapered-field slower with the same light."""

    field: TaperedField
    atoms: int
    seed: int
    chirp_captured: float              # fraction
    field_captured: float              # fraction
    chirp_final_velocity: float        # m/s, mean of the captured atoms (NaN: none)
    field_final_velocity: float

    @staticmethod
    def error(fraction: float, atoms: int) -> float:
        """Binomial standard error ``√(p(1 − p)/N)`` of a captured fraction."""
        return math.sqrt(max(fraction * (1.0 - fraction), 0.0) / atoms)

    def to_json(self) -> dict:
        return {
            "field": self.field.to_json(),
            "atoms": self.atoms,
            "seed": self.seed,
            "chirp_captured_fraction": self.chirp_captured,
            "chirp_captured_error": self.error(self.chirp_captured, self.atoms),
            "field_captured_fraction": self.field_captured,
            "field_captured_error": self.error(self.field_captured, self.atoms),
            "chirp_final_velocity_mean": self.chirp_final_velocity,
            "field_final_velocity_mean": self.field_final_velocity,
        }


def compare(scenario, *, atoms: int = 2000, seed: int = 0, plan=None, chirp=None,
            workers: int | None = None) -> FieldComparison:
    """Fly the same atoms (same seed) through the chirp and through the tapered-field slower.

    ``chirp`` is a :class:`sweepgen.simulate.SimulationResult` of the chirp already run with these
    atoms and seed (run here when not given); ``workers`` as :func:`sweepgen.simulate.simulate` takes
    it. Pure: no printing, no files.
    """
    from sweepgen.planner import plan as make_plan
    from sweepgen.programs import Played
    from sweepgen.simulate import simulate

    p = make_plan(scenario) if plan is None else plan
    field = tapered_field(p)
    if chirp is None:
        chirp = simulate(scenario, atoms=atoms, seed=seed, plan=p, baselines=False, workers=workers)
    played = Played(FieldProgram(field, scenario.chirp.period), False,
                    f"a tapered-field slower, light held at {field.laser_detuning / 1e6:.6g} MHz")
    run = simulate(in_field(scenario), atoms=atoms, seed=seed, plan=p, played=played, baselines=False,
                   workers=workers)
    (chirp_cap, chirp_v), (field_cap, field_v) = _numbers(chirp), _numbers(run)
    return FieldComparison(field, atoms, seed, chirp_cap, field_cap, chirp_v, field_v)


def in_field(scenario):
    """``scenario`` as its atoms meet it inside the field: a closed cycling transition.

    The field gives the atoms a quantisation axis, and the slowing light,
    circularly polarised along it, pumps them into the stretched sub-level of
    the ``[zeeman]`` table, from which only the cycling excited level can be
    reached (Foot 2005, §9.3; H. J. Metcalf and P. van der Straten, *Laser
    Cooling and Trapping*, Springer 1999, ch. 6; recalled): no hyperfine
    depumping (nor repumping), and the saturation measured against the cycling
    transition's intensity. The light's intensity and frequency stay the plan's.
    """
    import dataclasses

    sp = dataclasses.replace(scenario.species, off_resonant=None, effective_saturation_intensity=None)
    light = dataclasses.replace(scenario.light, effective_factor=sp.saturation_factor)
    return dataclasses.replace(scenario, species=sp, light=light, channels=())


def _numbers(result) -> tuple[float, float]:
    cap = result.captured()
    v = result.flight.final_velocity[cap]
    return float(cap.mean()), (float(v.mean()) if v.size else math.nan)
