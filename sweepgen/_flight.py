"""The atoms' flight from the source to the target plane, step by step (the simulation's kernel).

:func:`propagate` flies a set of initial atoms (:class:`Atoms`) through the
light of a scenario and returns what happened to each (:class:`Flight`). The
model is written out in :mod:`sweepgen.simulate`; this module holds the step:
take in the atoms emitted soon, choose the step, scatter, settle.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sweepgen import _kernel, physics
from sweepgen.channels import MAIN_LIGHT
from sweepgen.lighting import LightLevels

#: largest velocity change per step as a fraction of the natural velocity width λΓ/2π (converged at 10⁶
#: atoms: see sweepgen.simulate, "Time step")
STEP_FRACTION = 0.025
#: largest distance moved per step as a fraction of the target distance (or of z_R)
POSITION_FRACTION = 1.0 / 200.0
#: expected counts at or above this are drawn from the normal law of the same mean and variance
LARGE_COUNT = 10.0
#: atoms not arrived HORIZON_FACTOR * distance / capture_velocity after the last emission are "not arrived"
HORIZON_FACTOR = 5.0
#: the working set is compacted and sorted by velocity at least every SORT_EVERY steps (atoms near
#: resonance then sit together, which keeps the compiled step's branches predictable)
SORT_EVERY = 64

ARRIVED, TURNED_BACK, DARK, NOT_ARRIVED = _kernel.ARRIVED, _kernel.TURNED_BACK, _kernel.DARK, 0
#: how a step is computed when propagate is not told: compiled when numba is installed
KERNELS = ("compiled", "numpy") if _kernel.AVAILABLE else ("numpy",)
KERNEL = KERNELS[0]
_NONE = np.empty(0, dtype=np.intp)


@dataclass
class Atoms:
    """The initial atoms: shared by a run and its baselines."""

    velocity: np.ndarray         # m/s along z
    emission_time: np.ndarray    # s on the schedule's axis
    x: np.ndarray                # m, transverse position at the source (z = 0)
    y: np.ndarray
    vx: np.ndarray               # m/s, transverse velocity at the source
    vy: np.ndarray

    @classmethod
    def on_axis(cls, velocity, emission_time) -> "Atoms":
        """Atoms leaving a point source straight along the axis."""
        v = np.asarray(velocity, dtype=float)
        zero = np.zeros(v.size)
        return cls(v, np.asarray(emission_time, dtype=float), zero, zero.copy(), zero.copy(), zero.copy())

    @classmethod
    def join(cls, parts) -> "Atoms":
        """The atoms of several parts (chunks of one simulation), in order."""
        names = ("velocity", "emission_time", "x", "y", "vx", "vy")
        return cls(*(np.concatenate([getattr(p, name) for p in parts]) for name in names))


@dataclass
class Flight:
    """What happened to each atom in one run (arrays of length ``atoms``)."""

    fate: np.ndarray             # ARRIVED / TURNED_BACK / DARK / NOT_ARRIVED
    final_velocity: np.ndarray   # m/s at the target plane (NaN unless arrived)
    arrival_time: np.ndarray     # s on the schedule's axis (NaN unless arrived)
    photons: np.ndarray          # photons scattered (absorbed) from the slowing light by each atom
    radius: np.ndarray           # m, distance from the axis at the target plane (NaN unless arrived)
    transverse_velocity: np.ndarray  # m/s, (v_x, v_y) at the target plane, shape (n, 2) (NaN unless arrived)
    dark: np.ndarray             # bool: in the dark ground level at the end (alkali depumping)
    depumped: np.ndarray         # bool: went dark at least once
    steps: int = 0
    atom_steps: int = 0
    smallest_step: float = math.inf
    largest_velocity_change: float = 0.0   # m/s, the bound the step rule enforced
    kernel: str = ""                       # how the steps were computed: "compiled" or "numpy"

    @classmethod
    def empty(cls, n: int) -> "Flight":
        nan = np.full(n, np.nan)
        return cls(fate=np.full(n, NOT_ARRIVED, dtype=np.int8), final_velocity=nan, arrival_time=nan.copy(),
                   photons=np.zeros(n), radius=nan.copy(), transverse_velocity=np.full((n, 2), np.nan),
                   dark=np.zeros(n, dtype=bool), depumped=np.zeros(n, dtype=bool))

    @classmethod
    def join(cls, parts) -> "Flight":
        """The flights of several parts (chunks of one simulation), atoms in order; steps and atom-steps
        summed, the smallest step and the largest velocity change over all parts."""
        names = ("fate", "final_velocity", "arrival_time", "photons", "radius", "transverse_velocity", "dark",
                 "depumped")
        out = cls(*(np.concatenate([getattr(p, name) for p in parts]) for name in names))
        out.steps = sum(p.steps for p in parts)
        out.atom_steps = sum(p.atom_steps for p in parts)
        out.smallest_step = min((p.smallest_step for p in parts), default=math.inf)
        out.largest_velocity_change = max((p.largest_velocity_change for p in parts), default=0.0)
        out.kernel = parts[0].kernel if parts else ""
        return out


def velocity_width(species) -> float:
    """The Lorentzian's natural velocity width ``λΓ/2π`` (m/s), the time step's yardstick."""
    return float(physics.velocity_width(species.gamma, species.wavelength))


def peak_saturation(light, z_max: float) -> float:
    """Largest effective saturation parameter on the axis between the light start and ``z_max``."""
    if not light.focused:
        return float(light.peak)
    zc = min(max(light.focus, light.start), z_max)
    return float(light.saturation_at(np.array([zc]))[0])


def propagate(scenario, atoms: Atoms, program, rng: np.random.Generator, *, light: bool = True,
              levels: LightLevels | None = None, step_fraction: float = STEP_FRACTION,
              kernel: str | None = None) -> Flight:
    """Fly the atoms from the source to the target plane (see :mod:`sweepgen.simulate`).

    ``program`` is the main light's detuning (:mod:`sweepgen.programs`); ``levels``
    the lights' levels that the gates set in time (:func:`sweepgen.lighting.light_levels`;
    default: every light at full intensity all the time), each light's saturation
    scaled by its level, and no step crossing a change of level. Each step
    has four parts, each a method of :class:`_Propagation`: take in the atoms
    emitted soon (and drop the parked ones), choose the step, scatter (rates at the
    step's mid-point, the photons and kicks of the atoms that scatter, depumping
    and repumping) and settle (fates: arrived, turned back, dark). Atoms that are
    done are parked (moved far behind the source, where there is no light, and no
    longer counted) and dropped from the working arrays whenever they make up a
    sixteenth of them.

    ``kernel`` chooses how a step is computed: ``"compiled"`` (one pass per step,
    :mod:`sweepgen._kernel`, when numba is installed) or ``"numpy"`` (array by
    array); the default is :data:`KERNEL`. The two give statistically identical
    results from different draws. A program with a magnetic field (``shift_at``: each
    atom sees the detuning shifted where it is) always takes the NumPy step.
    """
    kernel = KERNEL if kernel is None else kernel
    if kernel not in ("compiled", "numpy") or (kernel == "compiled" and not _kernel.AVAILABLE):
        raise ValueError(f"kernel {kernel!r} is not available (have: {', '.join(KERNELS)})")
    if getattr(program, "shift_at", None) is not None:
        kernel = "numpy"            # the compiled step knows one detuning for all atoms, not a field's shift
    if levels is None:
        levels = LightLevels.full((MAIN_LIGHT,) + tuple(ch.name for ch in scenario.repumps), scenario.chirp.period)
    run = (_Compiled if kernel == "compiled" else _Propagation)(scenario, atoms, program, rng, light, levels,
                                                                  step_fraction)
    if atoms.velocity.size == 0:
        return run.out
    t = run.t_first
    while True:
        run.take_in(t)
        if run.in_flight == 0:
            if run.all_emitted:
                break
            t = run.next_emission - run.lead
            continue
        if t >= run.t_end:
            break
        t = run.steps_until(t)
    out = run.finish()
    out.kernel = kernel
    return out


@dataclass
class _Hits:
    """The atoms that scatter in one step (working-set indices) and what they receive."""

    index: np.ndarray            # working-set indices: large expected counts first, then clocks run out
    photons: np.ndarray          # photons scattered by each of them in the step
    kick: np.ndarray             # m/s, their velocity change along z in the step


class _Rates:
    """The light's constants for the rates of one run (the pieces :func:`expected_counts` needs)."""

    def __init__(self, scenario):
        sp, lt = scenario.species, scenario.light
        self.light = lt
        self.gamma = sp.gamma
        self.wavelength = sp.wavelength
        self.fraction = sp.rate_fraction
        off = sp.off_resonant if sp.kind == "atom" else None
        self.off = off
        self.repumps = scenario.repumps if off is not None else ()


class _Propagation:
    """One run of :func:`propagate`: the run's constants, the working set and the step's parts."""

    PARK = -1e100                # m, where atoms that are done wait (no light there)

    def __init__(self, scenario, atoms: Atoms, program, rng, light: bool, levels: LightLevels,
                 step_fraction: float):
        sp, lt, tg = scenario.species, scenario.light, scenario.target
        self.atoms, self.program, self.rng, self.light, self.levels = atoms, program, rng, light, levels
        self.level = levels.at(0.0)             # the lights' levels in the current step
        self.rates = _Rates(scenario)
        self.beam = lt
        self.wavelength = sp.wavelength
        self.gamma = sp.gamma
        self.recoil = physics.recoil_velocity(sp.mass, sp.wavelength)
        self.dv_max = step_fraction * velocity_width(sp)
        self.distance = tg.distance
        self.s_peak = peak_saturation(lt, tg.distance) if light else 0.0
        self.r_peak = physics.scattering_rate(0.0, 0.0, self.s_peak, sp.gamma, sp.wavelength, sp.rate_fraction)
        self.max_move = POSITION_FRACTION * tg.distance
        if lt.focused:
            self.max_move = min(self.max_move, POSITION_FRACTION * 10.0 * lt.rayleigh_range)
        horizon = HORIZON_FACTOR * tg.distance / tg.capture_velocity
        self.p_loss = sp.loss_per_photon
        self.dark_scale = -1.0 / math.log1p(-self.p_loss) if self.p_loss > 0 else 0.0
        self.pumping = light and self.rates.off is not None
        self.light_start = float(lt.start)

        n = atoms.velocity.size
        self.out = Flight.empty(n)
        # The clock starts at the first emission; atoms not yet emitted wait at
        # z = -v (t_e - t) < 0, where there is no light, and so reach z = 0 at t_e exactly.
        self.order = np.argsort(atoms.emission_time, kind="stable")
        self.emission_sorted = atoms.emission_time[self.order]
        if n:
            self.t_first = float(self.emission_sorted[0])
            self.t_end = float(self.emission_sorted[-1]) + horizon
        self.lead = max(horizon / 400.0, 1e-6)

        self.w = _Working(self.p_loss > 0)
        self.taken = 0              # atoms (in emission order) taken into the working set
        self.dt_prev = math.inf
        self.unlit = False          # some atom of the working set may be before the light start
        self.unchecked = False      # atoms taken in whose speed has not been checked yet
        self.n_dark = 0             # atoms of the working set in the dark ground level
        self.steps = 0
        self.sorted_at = 0          # the step at which the working set was last sorted
        self.atom_steps = 0
        self.smallest = math.inf
        self.dv_seen = 0.0

    def steps_until(self, t: float) -> float:
        """Steps from ``t`` until the working set needs :meth:`take_in` (here one step); the time reached."""
        dt, detuning = self.choose_step(t)
        self.advance(t, dt, detuning)
        return t + dt

    def advance(self, t: float, dt: float, detuning: float) -> None:
        """One step of every atom in flight: drift, scatter, settle."""
        z_new = self.drift(dt)
        hits = self.scatter(t, dt, detuning, z_new) if self.light else None
        self.settle(t, dt, z_new, hits)

    @property
    def in_flight(self) -> int:
        return self.w.size - self.w.parked

    @property
    def all_emitted(self) -> bool:
        return self.taken >= self.order.size

    @property
    def next_emission(self) -> float:
        return float(self.emission_sorted[self.taken])

    def take_in(self, t: float) -> None:
        """Drop parked atoms and sort the others (:meth:`_Working.compact`) when they are many or at least
        every :data:`SORT_EVERY` steps, and take in the atoms emitted before ``t + 2 lead``."""
        w, rng, a = self.w, self.rng, self.atoms
        grow = not self.all_emitted and self.emission_sorted[self.taken] <= t + self.lead
        if (w.parked and (grow or 16 * w.parked >= w.size)) or self.steps >= self.sorted_at + SORT_EVERY:
            w.compact()
            self.sorted_at = self.steps
            self.unlit = True
        if not grow:
            return
        stop = int(np.searchsorted(self.emission_sorted, t + 2.0 * self.lead, side="right"))
        new = self.order[self.taken:stop]
        self.taken = stop
        v0 = a.velocity[new]
        ahead = t - a.emission_time[new]          # negative: not yet emitted, waiting behind the source
        clock = rng.standard_exponential(new.size)
        pump = rng.standard_exponential(new.size)
        budget = rng.standard_exponential(new.size) * self.dark_scale if self.p_loss > 0 else None
        w.take_in(new, v0, v0 * ahead, a.x[new] + a.vx[new] * ahead, a.y[new] + a.vy[new] * ahead,
                  a.vx[new], a.vy[new], clock, pump, budget)
        self.unlit = self.unchecked = True

    def choose_step(self, t: float) -> tuple[float, float]:
        """The step (the rule of :mod:`sweepgen.simulate`) and the detuning at its mid-point."""
        w = self.w
        dt_try = min(self.max_move / max(float(w.v.max()), 1e-9), self.t_end - t)
        if not self.all_emitted:
            dt_try = min(dt_try, max(self.next_emission - self.lead - t, self.lead))
        detuning = math.nan
        if self.light:
            dt = min(dt_try, 1.5 * self.dt_prev, self.levels.next_edge(t) - t)
            self.level = self.levels.at(t)
            d_lo, d_hi = self.program.extremes(t, t + dt)
            gap = max(self._gaps(d_lo, d_hi) - self.dv_max, 0.0)
            r_bound = physics.scattering_rate(0.0, gap, self.s_peak * self.level[0], self.gamma, self.wavelength,
                                              self.rates.fraction)
            if self.recoil * r_bound * dt > self.dv_max:
                dt = self.dv_max / (self.recoil * r_bound)
            detuning = self.program.at(t + 0.5 * dt)
            self.dv_seen = max(self.dv_seen, self.recoil * r_bound * dt)
        else:
            dt = dt_try
        self.dt_prev = dt
        self.smallest = min(self.smallest, dt)
        self.steps += 1
        self.atom_steps += self.in_flight
        return dt, detuning

    def _gaps(self, d_lo: float, d_hi: float) -> float:
        """Velocity distance of the nearest bright atom to a resonance of the detunings ``[d_lo, d_hi]``
        (the off-resonant level, when followed, counts as a second resonance)."""
        gap = self._gap(d_lo, d_hi)
        if self.rates.off is not None:
            split = self.rates.off.splitting
            gap = min(gap, self._gap(d_lo - split, d_hi - split))
        return gap

    def _gap(self, d_lo: float, d_hi: float) -> float:
        """Velocity distance of the nearest bright atom to the resonant velocities ``[-λ d_hi, -λ d_lo]``."""
        w = self.w
        centre = -0.5 * self.wavelength * (d_lo + d_hi)
        gap_all = w.buf
        np.subtract(w.v, centre, out=gap_all)
        np.abs(gap_all, out=gap_all)
        if self.n_dark:
            gap_all[w.dark] = math.inf           # dark atoms do not scatter the slowing light
        return float(gap_all.min()) - 0.5 * self.wavelength * (d_hi - d_lo)

    def drift(self, dt: float) -> np.ndarray:
        """Positions after the step without kicks (the kicks of the atoms that scatter come later).

        The transverse positions move at once; the new ``z`` is returned and taken
        over in :meth:`settle` (the rates of the step need both ends)."""
        w = self.w
        z_new = w.z_next
        np.multiply(w.v, dt, out=z_new)
        z_new += w.z
        w.x += w.vx * dt
        w.y += w.vy * dt
        return z_new

    def scatter(self, t: float, dt: float, detuning: float, z_new: np.ndarray) -> _Hits | None:
        """Rates at the step's mid-point; depumping and repumping; the photons and kicks of the step."""
        w = self.w
        if self.unlit:
            lit = np.greater_equal(w.z, self.light_start, out=w.lit_bool)
            np.copyto(w.lit, lit)
            self.unlit = int(np.count_nonzero(lit)) + w.parked < w.size
        z_mid = w.buf3
        np.add(w.z, z_new, out=z_mid)
        z_mid *= 0.5
        # the transverse positions are at the step's end already; the beam changes little across a step
        s = saturation_seen(z_mid, w.x, w.y, w.lit, self.beam, self.beam.peak * self.level[0], w.s, w.buf)
        detuning = self._seen(detuning, z_mid)
        expected = midpoint_counts(w.v, s, detuning, dt, self.rates, self.recoil, w.buf, w.buf2, w.expected)
        if self.pumping:
            self._pump(dt, detuning, s, z_mid, expected)
        return self._photons(t, dt, z_new, expected)

    def _seen(self, detuning: float, z_mid: np.ndarray):
        """The light's detuning; per atom, with the Zeeman shift at each atom's place, when the program
        has a field (``shift_at``, :class:`sweepgen.tapered.FieldProgram`)."""
        shift = getattr(self.program, "shift_at", None)
        return detuning if shift is None else detuning + shift(z_mid)

    def _pump(self, dt: float, detuning: float, s: np.ndarray, z_mid: np.ndarray, expected: np.ndarray) -> None:
        """Depump bright atoms through the off-resonant level, pump dark ones back with the repump lights.

        Bright atoms go dark at ``b·R_off``, dark atoms return at ``(1 − b)·R_rep``
        (rates held over the step). Each atom carries one unit-rate clock for the
        switch out of its present level (the time-change construction of a Poisson
        process, as for the photons); atoms whose clock runs out are followed
        through the step switch by switch (:meth:`_switches`), and their expected
        photons are scaled by the part of the step they spent bright. Dark atoms
        that do not switch scatter nothing.
        """
        w, rates = self.w, self.rates
        v_mid = w.buf2                           # the mid-point velocities (midpoint_counts)
        hazard = off_resonant_counts(v_mid, s, detuning, dt, rates, w.buf, w.buf4)
        dark = np.flatnonzero(w.dark) if self.n_dark else _NONE
        if dark.size:
            hazard[dark] = self._repump(dark, detuning, dt, z_mid)
        clock = w.pump
        clock -= hazard
        turn = np.flatnonzero(clock <= 0.0)
        if dark.size:
            stays_dark = w.dark.copy()
            stays_dark[turn] = False
            expected[stays_dark] = 0.0
        if not turn.size:
            return
        was_dark = w.dark[turn]
        elapsed = (clock[turn] + hazard[turn]) / hazard[turn]      # part of the step before the switch
        bright_part = np.where(was_dark, 0.0, elapsed)
        lam_dark = off_resonant_counts(v_mid[turn], s[turn], _rows(detuning, turn), dt, rates, np.empty(turn.size),
                                       np.empty(turn.size))
        lam_back = self._repump(turn, detuning, dt, z_mid)
        end_dark, end_clock, bright_part = self._switches(~was_dark, 1.0 - elapsed, bright_part, lam_dark, lam_back)
        expected[turn] *= bright_part
        w.dark[turn] = end_dark
        w.pump[turn] = end_clock
        w.depumped[turn[~was_dark]] = True
        self.n_dark += int(np.count_nonzero(end_dark)) - int(np.count_nonzero(was_dark))

    def _repump(self, rows, detuning, dt, z_mid):
        """Expected returns to the bright level over the step of the working-set atoms ``rows``."""
        w = self.w
        if not self.rates.repumps:
            return np.zeros(rows.size)
        return repump_counts(w.v[rows], z_mid[rows], w.x[rows], w.y[rows], _rows(detuning, rows), dt,
                             self.rates, self.level[1:])

    def _switches(self, dark, rest, bright_part, lam_dark, lam_back):
        """Follow the atoms that just switched (now ``dark`` or not) through the ``rest`` of the step.

        ``lam_dark`` and ``lam_back`` are the expected switches over a whole step out
        of the bright and out of the dark level. Each stay draws a fresh ``Exp(1)``
        clock; an atom switches again while its clock runs out before the step
        ends. Returns the levels at the step's end, the clocks left, and the part of
        the step each atom spent bright.
        """
        rng = self.rng
        dark, rest, bright_part = dark.copy(), rest.copy(), bright_part.copy()
        clock = rng.standard_exponential(dark.size)
        end_dark, end_clock = dark.copy(), np.empty(dark.size)
        going = np.arange(dark.size)
        while going.size:
            lam = np.where(dark[going], lam_back[going], lam_dark[going])
            need = lam * rest[going]
            again = clock[going] < need
            with np.errstate(divide="ignore", invalid="ignore"):
                stay = np.where(again, clock[going] / lam, rest[going])
            bright_part[going] += np.where(dark[going], 0.0, stay)
            done = going[~again]
            end_dark[done] = dark[done]
            end_clock[done] = clock[done] - need[~again]
            going = going[again]
            rest[going] -= stay[again]
            dark[going] = ~dark[going]
            clock[going] = rng.standard_exponential(going.size)
        return end_dark, end_clock, bright_part

    def _photons(self, t: float, dt: float, z_new: np.ndarray, expected: np.ndarray) -> _Hits | None:
        """Draw the photons of the step and their kicks; move ``z_new`` by half of each kick."""
        w, rng = self.w, self.rng
        if dt * self.r_peak >= LARGE_COUNT:
            large = (expected >= LARGE_COUNT).nonzero()[0]
        else:
            large = _NONE
        n_large = large.size
        if n_large:
            large_mean = expected[large]
            expected[large] = 0.0               # their clocks wait this step (memoryless)
        clock = w.clock
        clock -= expected
        ran_out = (clock <= 0.0).nonzero()[0]
        n_out = ran_out.size
        if n_large + n_out == 0:
            return None
        # the atoms that scatter: large means first, then clocks run out
        index = np.concatenate([large, ran_out]) if n_large and n_out else (large if n_large else ran_out)
        photons = np.empty(n_large + n_out)
        # the counts of the large means, then the emissions of all hit atoms (order of index)
        xi = rng.standard_normal(2 * n_large + n_out)
        if n_out:
            clock[ran_out] = _clock_counts(-clock[ran_out], rng, photons[n_large:])
        if n_large:
            # large means: the normal law of the same mean and variance λ
            counts = np.sqrt(large_mean, out=photons[:n_large])
            counts *= xi[:n_large]
            counts += large_mean
            np.maximum(counts, 0.0, out=counts)
        # one recoil against the motion per photon, plus the z component of k isotropic
        # emissions (mean 0, variance k/3 per axis, the axes uncorrelated)
        spread = photons * (1.0 / 3.0)
        np.sqrt(spread, out=spread)
        spread *= self.recoil
        kick = spread * xi[n_large:]
        kick -= self.recoil * photons
        z_new[index] += (0.5 * dt) * kick
        w.photons[index] += photons
        for pos, vel in ((w.x, w.vx), (w.y, w.vy)):
            side = spread * rng.standard_normal(index.size)
            vel[index] += side
            pos[index] += (0.5 * dt) * side
        return _Hits(index=index, photons=photons, kick=kick)

    def settle(self, t: float, dt: float, z_new: np.ndarray, hits: _Hits | None) -> None:
        """Apply the kicks, record the fates of the step (arrived, turned back, dark), park those done."""
        w, out = self.w, self.out
        v, z, D = w.v, w.z, self.distance
        arrived = (z_new >= D).nonzero()[0] if float(z_new.max()) >= D else _NONE
        if arrived.size:
            v_in = v[arrived]                   # before this step's kicks
        if hits is not None:
            v_hit = v[hits.index]
            v_hit += hits.kick
            v[hits.index] = v_hit
        if arrived.size:
            self._arrive(arrived, v_in, t, dt, z_new)
        turned = _NONE
        if self.unchecked:
            turned = np.flatnonzero(v <= 0.0)
            self.unchecked = False
        elif hits is not None and float(v_hit.min()) <= 0.0:
            turned = hits.index[v_hit <= 0.0]
        dark = _NONE
        if self.p_loss > 0 and hits is not None:
            dark = hits.index[w.photons[hits.index] > w.budget[hits.index]]
        if turned.size or dark.size:
            done = np.zeros(w.size, dtype=bool)
            done[arrived] = True
            turned = turned[~done[turned]]
            out.fate[w.idx[turned]] = TURNED_BACK
            done[turned] = True
            dark = dark[~done[dark]]
            out.fate[w.idx[dark]] = DARK
            done[dark] = True
            finished = np.flatnonzero(done)
        else:
            finished = arrived
        w.z, w.z_next = z_new, z
        if finished.size:
            self._record(finished)
            self.n_dark -= int(np.count_nonzero(w.dark[finished]))
            w.park(finished, self.PARK)

    def _arrive(self, arrived, v_in, t, dt, z_new) -> None:
        """Arrival time, speed, place and transverse velocity at the target plane (linear in the step)."""
        w, out = self.w, self.out
        z0 = w.z[arrived]
        frac = (self.distance - z0) / (z_new[arrived] - z0)
        ids = w.idx[arrived]
        out.fate[ids] = ARRIVED
        out.arrival_time[ids] = t + frac * dt
        out.final_velocity[ids] = v_in + frac * (w.v[arrived] - v_in)
        back = (1.0 - frac) * dt                 # the transverse positions are already at the step's end
        out.radius[ids] = np.hypot(w.x[arrived] - w.vx[arrived] * back, w.y[arrived] - w.vy[arrived] * back)
        out.transverse_velocity[ids, 0] = w.vx[arrived]
        out.transverse_velocity[ids, 1] = w.vy[arrived]

    def _record(self, rows) -> None:
        """Photons and levels of the working-set atoms ``rows`` into the output."""
        w, out = self.w, self.out
        ids = w.idx[rows]
        out.photons[ids] = w.photons[rows]
        out.dark[ids] = w.dark[rows]
        out.depumped[ids] = w.depumped[rows]

    def finish(self) -> Flight:
        """Photons and levels of the atoms still in flight, and the step record."""
        w, out = self.w, self.out
        self._record(np.flatnonzero(w.alive))       # not arrived: photons so far
        out.steps, out.atom_steps, out.smallest_step = self.steps, self.atom_steps, self.smallest
        out.largest_velocity_change = self.dv_seen
        return out


class _Compiled(_Propagation):
    """A run whose step is one compiled pass over the atoms (:func:`sweepgen._kernel.step`)."""

    def __init__(self, scenario, atoms, program, rng, light, levels, step_fraction):
        super().__init__(scenario, atoms, program, rng, light, levels, step_fraction)
        lt, off = scenario.light, self.rates.off
        self.k = _kernel.constants(
            recoil=self.recoil, distance=self.distance, light_start=self.light_start, peak=lt.peak,
            focused=lt.focused, focus=lt.focus if lt.focused else 0.0,
            rayleigh=lt.rayleigh_range if lt.focused else 1.0, waist=lt.waist if lt.focused else 1.0,
            gamma=self.gamma, wavelength=self.wavelength, fraction=self.rates.fraction,
            split=off.splitting if off is not None else 0.0, strength=off.strength if off is not None else 0.0,
            branching=off.branching if off is not None else 0.0, pumping=self.pumping, loss=self.p_loss > 0,
            light=light, large=LARGE_COUNT)
        repumps = self.rates.repumps
        self.repump_s = np.array([ch.saturation for ch in repumps], dtype=float)
        self.repump_follows = np.array([bool(ch.follows) for ch in repumps], dtype=bool)
        self.repump_offset = np.array([ch.offset if ch.follows else 0.0 for ch in repumps], dtype=float)
        self.repump_fixed = np.array([0.0 if ch.follows else ch.detuning for ch in repumps], dtype=float)
        self.finished = np.empty(0, dtype=np.intp)
        self.no_budget = np.empty(0)
        tables = getattr(program, "tables", None)
        self.tables = tables() if tables is not None else None
        self.words = _kernel.stream(rng)

    def rule(self) -> tuple:
        """The step rule's numbers as the compiled run takes them (:func:`sweepgen._kernel._choose`)."""
        off = self.rates.off
        return (float(self.max_move), float(self.t_end), math.inf if self.all_emitted else self.next_emission,
                self.all_emitted, float(self.lead), float(self.dv_max), float(self.s_peak), float(self.gamma),
                float(self.wavelength), float(self.rates.fraction), float(off.splitting) if off else 0.0,
                off is not None)

    def steps_until(self, t: float) -> float:
        """Steps from ``t`` in one compiled call (:func:`sweepgen._kernel.run_steps`) until the working
        set needs :meth:`take_in`, none is left in flight or the run ends; the time reached."""
        if self.tables is None:
            return super().steps_until(t)
        w, out = self.w, self.out
        if self.finished.size < w.size:
            self.finished = np.empty(w.size, dtype=np.intp)
        state = np.array([self.dt_prev, self.smallest, self.dv_seen, self.steps, self.atom_steps, w.parked,
                          self.n_dark, self.sorted_at + SORT_EVERY], dtype=float)
        lv = self.levels
        t = _kernel.run_steps(
            self.words, self.k, self.tables, self.rule(), lv.edges, lv.levels, lv.period, self.repump_s,
            self.repump_follows, self.repump_offset, self.repump_fixed, state, float(t), float(self.r_peak),
            float(self.PARK), w.v, w.z, w.x, w.y, w.vx, w.vy, w.clock, w.pump, w.photons, w.alive, w.dark,
            w.depumped, w.budget if w.has_budget else self.no_budget, w.lit, w.idx, out.fate, out.final_velocity,
            out.arrival_time, out.radius, out.transverse_velocity, out.photons, out.dark, out.depumped,
            self.finished)
        self.dt_prev, self.smallest, self.dv_seen = (float(x) for x in state[:3])
        self.steps, self.atom_steps, w.parked, self.n_dark = (int(x) for x in state[3:7])
        return t

    def _gaps(self, d_lo: float, d_hi: float) -> float:
        w, lam = self.w, self.wavelength
        centre = -0.5 * lam * (d_lo + d_hi)
        split = self.rates.off.splitting if self.rates.off is not None else 0.0
        near, near_off = _kernel.nearest_two(w.v, w.dark, w.alive, centre, centre + lam * split)
        if self.rates.off is not None:
            near = min(near, near_off)
        return near - 0.5 * lam * (d_hi - d_lo)

    def advance(self, t: float, dt: float, detuning: float) -> None:
        w = self.w
        if self.finished.size < w.size:
            self.finished = np.empty(w.size, dtype=np.intp)
        detuning = detuning if self.light else 0.0
        repump_d = np.array([ch.detuning_with(detuning) for ch in self.rates.repumps], dtype=float)
        large = bool(dt * self.r_peak >= LARGE_COUNT)
        done, self.n_dark = _kernel.step(
            self.words, self.k, self.k.peak * self.level[0], self.repump_s * self.level[1:1 + self.repump_s.size],
            repump_d, t, dt, detuning, large, w.v, w.z, w.x, w.y, w.vx, w.vy, w.clock, w.pump, w.photons, w.alive,
            w.dark, w.depumped, w.budget if w.has_budget else self.no_budget, w.idx, self.out.fate,
            self.out.final_velocity, self.out.arrival_time, self.out.radius, self.out.transverse_velocity,
            self.finished)
        if done:
            rows = self.finished[:done].copy()
            self._record(rows)
            w.park(rows, self.PARK)


# -- the rates, in place ------------------------------------------------------------------------
def saturation_seen(z, x, y, lit, light, peak, out, work):
    """Effective saturation parameter of each atom at ``(z, x, y)``, times ``lit`` (1 or 0), in place.

    Unbounded light: ``peak``. A Gaussian beam: ``peak / q · exp(−2 r² / (w0² q))``,
    ``q = 1 + ((z − z_f)/z_R)²`` (:func:`sweepgen.physics.gaussian_beam_saturation`,
    Siegman 1986, ch. 17). ``out`` and ``work`` are float arrays shaped like ``z``.
    """
    if not light.focused:
        return np.multiply(lit, peak, out=out)
    q = work
    np.subtract(z, light.focus, out=q)
    q *= 1.0 / light.rayleigh_range
    np.multiply(q, q, out=q)
    q += 1.0
    r2 = out
    np.multiply(x, x, out=r2)
    r2 += y * y
    r2 *= -2.0 / (light.waist * light.waist)
    r2 /= q
    np.exp(r2, out=r2)
    r2 /= q
    r2 *= lit
    r2 *= peak
    return r2


def expected_counts(v, s, detuning, dt, rates, work, out):
    """Expected photons ``λ = R·dt`` of each atom in a step, in place.

    ``R = f Γ s / (1 + s + x²)``, ``x = 2·2π(Δ + v/λ)/Γ``, the rate of
    :func:`sweepgen.physics.scattering_rate` (Foot 2005, eq. 7.68, recalled
    number, with the Doppler shift; Tarbutt 2015 for ``f`` of a multi-level
    system) with ``s`` the effective saturation parameter at each atom.
    """
    x = work
    np.multiply(v, 2.0 * math.tau / (rates.gamma * rates.wavelength), out=x)
    x += 2.0 * math.tau / rates.gamma * detuning
    np.multiply(x, x, out=x)
    x += 1.0
    x += s
    np.divide(s, x, out=out)
    out *= rates.fraction * rates.gamma * dt
    return out


def midpoint_counts(v, s, detuning, dt, rates, recoil, work, v_mid, out):
    """Expected photons of the step at the mid-point velocity (the midpoint rule for the mean force).

    ``λ₁`` at the start velocity predicts the mid-point velocity ``v − v_r λ₁/2``
    (the mean recoil of half the step); ``λ`` is the rate there times the step.
    This makes the mean velocity change second-order accurate in the step
    (explicit midpoint method, e.g. E. Hairer, S. P. Nørsett and G. Wanner,
    *Solving Ordinary Differential Equations I*, Springer 1993, §II.1, recalled
    section). ``v_mid`` receives the mid-point velocities.
    """
    first = expected_counts(v, s, detuning, dt, rates, work, out)
    np.multiply(first, -0.5 * recoil, out=v_mid)
    v_mid += v
    return expected_counts(v_mid, s, detuning, dt, rates, work, out)


def off_resonant_counts(v, s, detuning, dt, rates, work, out):
    """Expected depumping events of each atom in a step, ``b·R_off·dt``, in place (into ``out``).

    ``R_off = f Γ κs / (1 + κs + x_off²)``, ``x_off = 2·2π(Δ + v/λ − δ_hf)/Γ``: the
    rate of :func:`sweepgen.physics.scattering_rate` on the off-resonant level
    ``δ_hf`` away with relative strength ``κ``; a fraction ``b`` (branching) of
    its decays ends in the dark ground level.
    """
    off = rates.off
    x = work
    np.multiply(v, 2.0 * math.tau / (rates.gamma * rates.wavelength), out=x)
    x += 2.0 * math.tau / rates.gamma * (detuning - off.splitting)
    np.multiply(x, x, out=x)
    x += 1.0
    np.multiply(s, off.strength, out=out)
    x += out
    out /= x
    out *= off.branching * rates.fraction * rates.gamma * dt
    return out


def _rows(detuning, rows):
    """The entries ``rows`` of a per-atom detuning (a single detuning is every atom's)."""
    return detuning[rows] if isinstance(detuning, np.ndarray) else detuning


def repump_counts(v, z, x, y, detuning, dt, rates, levels=None):
    """Expected returns to the bright level of the dark atoms given, ``(1 − b)·Σ R_rep·dt``.

    Each repump light drives the dark ground level to the off-resonant excited
    level with the rate of :func:`sweepgen.physics.scattering_rate` at its own
    saturation (the slowing light's beam geometry) times its level in the step
    (``levels``, one per repump light; default full) and detuning; a fraction
    ``1 − b`` of those decays ends in the bright level.
    """
    lt = rates.light
    lit = (z >= lt.start).astype(float)
    total = np.zeros(v.size)
    levels = np.ones(len(rates.repumps)) if levels is None else levels
    for ch, level in zip(rates.repumps, levels):
        s = saturation_seen(z, x, y, lit, lt, ch.saturation * level, np.empty(v.size), np.empty(v.size))
        total += physics.scattering_rate(ch.detuning_with(detuning), v, s, rates.gamma, rates.wavelength,
                                         rates.fraction)
    return total * ((1.0 - rates.off.branching) * dt)


def _clock_counts(overshoot, rng, out):
    """Photons of the atoms whose clock ran out in a step (into ``out``), and their fresh clocks.

    ``overshoot`` is the unit-rate time left in the step after the first photon:
    ``1 + Poisson(overshoot)`` photons, and a fresh ``Exp(1)`` clock (memorylessness).
    """
    np.add(rng.poisson(overshoot), 1.0, out=out)
    return rng.standard_exponential(overshoot.size)


class _Working:
    """The atoms in flight: per-atom arrays, parking and compaction, scratch buffers."""

    NAMES = ("idx", "v", "z", "x", "y", "vx", "vy", "clock", "pump", "photons", "alive", "dark", "depumped")

    def __init__(self, budget: bool):
        self.has_budget = budget
        self.idx = np.empty(0, dtype=np.intp)
        for name in self._names()[1:]:
            setattr(self, name, np.empty(0, dtype=bool if name in ("alive", "dark", "depumped") else float))
        self.parked = 0
        self._scratch()

    @property
    def size(self) -> int:
        return self.v.size

    def _names(self):
        return self.NAMES + (("budget",) if self.has_budget else ())

    def _scratch(self):
        n = self.v.size
        self.z_next = np.empty(n)
        self.buf = np.empty(n)
        self.buf2 = np.empty(n)
        self.buf3 = np.empty(n)
        self.buf4 = np.empty(n)
        self.s = np.empty(n)                   # effective saturation parameter of the step
        self.expected = np.empty(n)            # expected photons of the step
        self.lit = np.zeros(n)                 # 1.0: in the light
        self.lit_bool = np.zeros(n, dtype=bool)

    def compact(self):
        """Drop the parked atoms and sort the others by velocity."""
        keep = np.flatnonzero(self.alive)
        keep = keep[np.argsort(self.v[keep], kind="stable")]
        for name in self._names():
            setattr(self, name, getattr(self, name)[keep])
        self.parked = 0
        self._scratch()

    def take_in(self, ids, v0, z0, x0, y0, vx, vy, clock, pump, budget):
        n = ids.size
        no = np.zeros(n, dtype=bool)
        add = {"idx": ids, "v": v0, "z": z0, "x": x0, "y": y0, "vx": vx.copy(), "vy": vy.copy(), "clock": clock,
               "pump": pump, "photons": np.zeros(n), "alive": np.ones(n, dtype=bool), "dark": no,
               "depumped": no, "budget": budget}
        for name in self._names():
            setattr(self, name, np.concatenate([getattr(self, name), add[name]]))
        self._scratch()

    def park(self, ids, park_z):
        """Atoms done (arrived, turned back, dark): positive speed, far behind the source, no light."""
        self.v[ids] = 1.0
        self.z[ids] = park_z
        self.lit[ids] = 0.0
        self.alive[ids] = False
        self.dark[ids] = False
        self.pump[ids] = math.inf
        if self.has_budget:
            self.budget[ids] = math.inf
        self.parked += ids.size
