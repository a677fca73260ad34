"""Monte Carlo of the atoms through the sweep: what arrives at the target, and how slow.

Atoms leave the source at ``z = 0`` (a pulsed source fires at ``pulse_time``; a
continuous beam emits uniformly over one period) with velocities drawn from the
source model, and fly along +z through the slowing light, which travels along
-z and is on all the time with the schedule's detuning ``Schedule.detuning(t)``.
The model, per atom and time step ``dt`` (README.md, "Physics background"):

* scattering rate ``R = (Γ/2) s / (1 + s + (2·2π(Δ + v/λ)/Γ)²)``
  (:func:`sweepgen.physics.scattering_rate`) with the on-axis ``s(z)``
  (``Light.saturation_at``) at the atom's position at the start of the step and
  the detuning at the step's mid-point time;
* the number of scattered photons ``k`` is Poisson with mean ``λ = R·dt``
  (Foot 2005, §9.3, recalled section: absorption and spontaneous emission are independent events
  at rate R). It is drawn exactly: each atom carries the remaining unit-rate
  exponential "clock" of its photon process, ``λ`` is subtracted each step, and
  only when the clock runs out is ``1 + Poisson(overshoot)`` drawn and a fresh
  clock started (the time-change construction of an inhomogeneous Poisson
  process; exact, and it costs nothing for atoms far from resonance). For
  ``λ ≥ LARGE_COUNT`` the count is drawn from the normal distribution of the same
  mean and variance ``λ`` (the sum over the hundreds of steps of a slowing is
  Poisson with a mean of thousands either way);
* each absorption kicks ``-v_r`` along z, ``v_r = h/(mλ)``;
* each spontaneous emission kicks ``v_r`` in an isotropic direction. The sum of
  ``k`` isotropic unit vectors has zero mean and per-axis variance ``k/3``; its
  z component is drawn as a normal of exactly that mean and variance;
* the transverse model (when ``source.divergence`` or ``target.aperture`` is
  set): the source emits from a point with angles ``θx, θy ~ N(0, divergence)``,
  ``v_x = v_z θx``. Transverse kicks do not change the on-axis light the atom
  sees, so they are not drawn step by step: each atom accumulates
  ``Σk, Σk·t, Σk·t²`` and at the target plane (time T) its transverse position
  and velocity kick are drawn from their exact joint normal law,
  ``var(v) = c Σk``, ``var(x) = c Σk (T - t)²``, ``cov = c Σk (T - t)``,
  ``c = v_r²/3`` per axis (a sum of independent kicks ``ξ_j`` at times ``t_j``
  moves the atom by ``Σ ξ_j (T - t_j)``);
* molecules: each photon sends the molecule to a dark state with probability
  ``p``. Each molecule draws once a budget ``B = E / (-ln(1 - p))`` with
  ``E ~ Exp(1)`` and is lost when its photon count exceeds ``B``; so it survives
  ``N`` photons with probability ``P(B > N) = (1 - p)^N`` exactly.

Time step (the rule): the largest velocity change any atom can receive in one
step, one recoil per photon at the largest scattering rate it can meet during
the step (the detuning range swept in the step, the peak saturation on the beam
line, the atom's velocity within the step's own change), is at most
``STEP_FRACTION = 0.1`` of the Lorentzian's natural velocity width ``λΓ/2π``
(for 87Rb 0.47 m/s, about 80 recoils; the power-broadened width is wider still).
Steps also move no atom by more than ``POSITION_FRACTION`` of the target
distance (or of ten Rayleigh ranges of a focused beam). So steps are short while
any atom is near resonance and long when every atom is far from it. Measured on
the 87Rb demo scenario without aperture and hold (10 000 atoms, same atoms for
each run): step fractions 0.2, 0.1, 0.05, 0.025 give the same captured fraction
(0.2615, 0.2611, 0.2610, 0.2608, each ±0.0044) and final mean velocities 12.64,
12.80, 12.88, 12.92 m/s, so the step's bias at 0.1 is about 0.1 m/s, a fiftieth
of the width; tests/test_simulate.py checks that halving it changes nothing
beyond the statistics.

Fates: an atom *arrives* when it crosses the target plane (``captured`` if its
speed is at most the capture velocity and it is inside the aperture); it *turns
back* when its velocity drops to zero or below (the light then pushes it back to
the source); a molecule is *lost to a dark state*; an atom that has not arrived
by ``HORIZON_FACTOR × target distance / capture velocity`` after the last
emission (the pulse; for a continuous beam the end of the emission period) is
*not arrived* (too slow to matter).

Baselines use the same initial atoms (common random numbers): no light at all,
and the light held at the schedule's start detuning.

Speed (``tests/benchmarks/bench_simulate.py``): per step the working
set of atoms in flight costs a few in-place array passes (the step rule's nearest
velocity, the expected counts of :func:`expected_counts`, the two tests that pick
the atoms that scatter, the clock update and the drift), and only the atoms that
scatter get random numbers and kicks (``np.add.at`` on their indices). Atoms that
are done are parked and dropped once they make up a sixteenth of the working set.
Random numbers are about half of the cost and are set by the physics above: on
the 87Rb demo per atom-step 0.75 normal draws (a count and an emission for each
large mean, an emission for each clock that ran out), 0.18 Poisson and 0.18
exponential draws (the clocks that ran out). NumPy
takes about 1.6 times as long for these draws alone as for the benchmark's floor
of one normal draw per atom-step, so no implementation of this model that draws
its numbers with NumPy can reach more than about 0.6 of that floor; the array
passes and the hit atoms' bookkeeping cost about as much again. Measured ratio
0.24-0.28 (0.18-0.22 for the earlier version, same runs).
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import constants as C

from sweepgen import physics
from sweepgen.errors import InputError

#: largest velocity change per step as a fraction of the natural velocity width λΓ/2π
STEP_FRACTION = 0.1
#: largest distance moved per step as a fraction of the target distance (or of z_R)
POSITION_FRACTION = 1.0 / 200.0
#: expected counts at or above this are drawn from the normal law of the same mean and variance
LARGE_COUNT = 10.0
#: atoms not arrived HORIZON_FACTOR * distance / capture_velocity after the last emission are "not arrived"
HORIZON_FACTOR = 5.0
#: default number of atoms (a few seconds for a shipped pulsed scenario)
DEFAULT_ATOMS = 10000
#: bins of the velocity and arrival-time histograms
HISTOGRAM_BINS = 80

ARRIVED, TURNED_BACK, DARK, NOT_ARRIVED = 1, 2, 3, 0
_NONE = np.empty(0, dtype=np.intp)


class DetuningProgram:
    """The detuning seen by the atoms: a schedule, or one constant detuning.

    The simulation asks for one detuning per time step, so a schedule's piecewise
    polynomial (``Schedule.breakpoints`` and ``Schedule.coefficients``, the very
    polynomial behind ``Schedule.detuning``) is evaluated here on Python floats,
    which is much faster for one time at a time (tests check that it agrees with
    ``Schedule.detuning``). The extremes over an interval lie at its ends, at a
    segment boundary inside it, or where the derivative of the polynomial vanishes
    inside it (a chirp need not be monotone when the light gets stronger along the
    path, so those critical times are included among the boundaries).
    """

    def __init__(self, schedule=None, constant: float | None = None):
        if (schedule is None) == (constant is None):
            raise ValueError("give a schedule or a constant detuning")
        self.schedule = schedule
        self.constant = constant
        if schedule is not None:
            self.period = float(schedule.period)
            edges = [x for seg in schedule.segments for x in (seg.start, seg.end)]
            critical = np.asarray(schedule.poly.derivative().roots(extrapolate=False), dtype=float)
            critical = critical[np.isfinite(critical) & (critical > 0) & (critical < self.period)]
            self.bounds = [float(b) for b in np.unique(np.concatenate([edges, critical]))]
            self._bounds2 = self.bounds + [b + self.period for b in self.bounds]
            self._bounds2_parts = [(False, b) for b in self.bounds] + [(True, b) for b in self.bounds]
            self._x = [float(b) for b in schedule.breakpoints]
            coeffs = np.asarray(schedule.coefficients, dtype=float)
            self._c = [tuple(float(c) for c in coeffs[:, i]) for i in range(coeffs.shape[1])]

    @classmethod
    def fixed(cls, detuning: float) -> "DetuningProgram":
        return cls(constant=float(detuning))

    def at(self, t: float) -> float:
        """Detuning (Hz) at time ``t`` (s, any real value: the schedule repeats)."""
        if self.schedule is None:
            return self.constant
        tw = t % self.period
        x = self._x
        i = bisect.bisect_right(x, tw) - 1
        if i < 0:
            i = 0
        elif i >= len(self._c):
            i = len(self._c) - 1
        dx = tw - x[i]
        value = 0.0
        for c in self._c[i]:
            value = value * dx + c
        return value

    def extremes(self, t0: float, t1: float) -> tuple[float, float]:
        """Smallest and largest detuning over ``[t0, t1]``."""
        if self.schedule is None:
            return self.constant, self.constant
        P = self.period
        a, b = self.at(t0), self.at(t1)
        lo, hi = min(a, b), max(a, b)
        if t1 - t0 >= P:
            times = list(self.bounds)
        else:
            # the boundaries strictly inside (t0, t1), found by bisection in this period and the next
            k0 = math.floor(t0 / P) * P
            b2 = self._bounds2
            i = max(bisect.bisect_left(b2, t0 - k0) - 1, 0)
            j = bisect.bisect_right(b2, t1 - k0) + 1
            times = []
            for nxt, bd in self._bounds2_parts[i:j]:
                tb = ((k0 + P) if nxt else k0) + bd
                if t0 < tb < t1:
                    times.append(tb)
        for tb in times:
            # both sides of a boundary (the periodic wrap at P may be a jump)
            for tt in (tb, math.nextafter(tb, -math.inf)):
                d = self.at(tt)
                lo, hi = min(lo, d), max(hi, d)
        return lo, hi


@dataclass
class Flight:
    """What happened to each atom in one run (arrays of length ``atoms``)."""

    fate: np.ndarray             # ARRIVED / TURNED_BACK / DARK / NOT_ARRIVED
    final_velocity: np.ndarray   # m/s at the target plane (NaN unless arrived)
    arrival_time: np.ndarray     # s on the schedule's axis (NaN unless arrived)
    photons: np.ndarray          # photons scattered (absorbed) by each atom
    radius: np.ndarray           # m, distance from the axis at the target plane (NaN unless arrived)
    transverse_velocity: np.ndarray  # m/s, v_x at the target plane (NaN unless arrived / no model)
    steps: int = 0
    atom_steps: int = 0
    smallest_step: float = math.inf
    largest_velocity_change: float = 0.0   # m/s, the bound the step rule enforced


@dataclass
class Atoms:
    """The initial atoms: shared by the run and its baselines."""

    velocity: np.ndarray         # m/s along z
    emission_time: np.ndarray    # s on the schedule's axis
    theta_x: np.ndarray | None   # rad (None without the transverse model)
    theta_y: np.ndarray | None


@dataclass
class SimulationResult:
    """A simulation and its baselines; :meth:`to_json` is the ``simulate --json`` document."""

    scenario: object
    seed: int
    atoms: Atoms
    flight: Flight
    no_light: Flight
    fixed_frequency: Flight
    start_detuning: float
    chirp_start: float
    arrival_design: float | None
    extra: dict = field(default_factory=dict)

    # -- per-atom masks -------------------------------------------------------------
    def captured(self, flight: Flight | None = None) -> np.ndarray:
        f = self.flight if flight is None else flight
        tg = self.scenario.target
        ok = (f.fate == ARRIVED) & (f.final_velocity <= tg.capture_velocity)
        if tg.aperture is not None:
            ok &= f.radius <= tg.aperture
        return ok

    def outside_aperture(self, flight: Flight | None = None) -> np.ndarray:
        f = self.flight if flight is None else flight
        ap = self.scenario.target.aperture
        if ap is None:
            return np.zeros(f.fate.shape, dtype=bool)
        return (f.fate == ARRIVED) & (f.radius > ap)

    def in_band(self) -> np.ndarray:
        ch = self.scenario.chirp
        v = self.atoms.velocity
        return (v >= ch.end_velocity) & (v <= ch.start_velocity)

    # -- the contract numbers ---------------------------------------------------------
    def to_json(self) -> dict:
        sc = self.scenario
        f = self.flight
        n = f.fate.size
        cap = self.captured()
        vf = f.final_velocity[cap]
        if vf.size >= 2:
            spread = float(np.std(vf, ddof=1))
            temperature = sc.species.mass * spread ** 2 / C.k
        else:
            spread = temperature = math.nan
        outside = self.outside_aperture()
        turned = f.fate == TURNED_BACK
        dark = f.fate == DARK
        arrived_inside = (f.fate == ARRIVED) & ~outside
        too_fast = arrived_inside & (f.final_velocity > sc.target.capture_velocity)
        doc = {
            "atoms": n,
            "seed": self.seed,
            "captured_fraction": float(cap.mean()),
            "band_fraction": float(self.in_band().mean()),
            "final_velocity_mean": float(vf.mean()) if vf.size else math.nan,
            "final_velocity_spread": spread,
            "final_temperature": temperature,
            "photons_mean": float(f.photons[cap].mean()) if vf.size else math.nan,
            "lost_fraction": float((turned | dark | outside).mean()),
            "lost_by_reason": {
                "turned_back": float(turned.mean()),
                "left_aperture": float(outside.mean()),
                "dark_state": float(dark.mean()),
            },
            "too_fast_fraction": float(too_fast.mean()),
            "not_arrived_fraction": float((f.fate == NOT_ARRIVED).mean()),
            "baseline_no_light_fraction": float(self.captured(self.no_light).mean()),
            "baseline_fixed_frequency_fraction": float(self.captured(self.fixed_frequency).mean()),
            "arrival_time_mean": float(f.arrival_time[cap].mean()) if (vf.size and sc.pulsed) else None,
            "transverse_velocity_spread": (float(np.std(f.transverse_velocity[cap], ddof=1))
                                           if (vf.size >= 2 and self.atoms.theta_x is not None) else None),
            "time_step": {
                "rule": "largest velocity change per step <= step_fraction * lambda*Gamma/(2*pi)",
                "step_fraction": STEP_FRACTION,
                "velocity_change_max": f.largest_velocity_change,
                "smallest": f.smallest_step,
                "steps": f.steps,
                "atom_steps": f.atom_steps,
            },
            "histograms": self.histograms(),
        }
        doc.update(self.extra)
        return doc

    def histograms(self) -> dict:
        """Counts of atoms per bin: velocities before (at the source) and after (at the
        target plane: with the sweep, with no light, with the light held at the start
        detuning), and for pulsed sources the arrival times at the target."""
        sc = self.scenario
        v0 = self.atoms.velocity
        finals = [f.final_velocity for f in (self.flight, self.no_light, self.fixed_frequency)]
        top = max([float(v0.max()) if v0.size else 1.0, sc.chirp.start_velocity * 1.1]
                  + [float(np.nanmax(x)) for x in finals if np.isfinite(x).any()])
        top *= 1.0 + 1e-9
        edges = np.linspace(0.0, top, HISTOGRAM_BINS + 1)

        def counts(values):
            values = values[np.isfinite(values)]
            return np.histogram(values, bins=edges)[0]

        def arrived(flight):
            return np.where(flight.fate == ARRIVED, flight.final_velocity, np.nan)

        out = {
            "velocity_edges": edges,
            "initial": np.histogram(v0, bins=edges)[0],
            "final": counts(arrived(self.flight)),
            "final_no_light": counts(arrived(self.no_light)),
            "final_fixed_frequency": counts(arrived(self.fixed_frequency)),
        }
        if sc.pulsed:
            t = self.flight.arrival_time
            t = t[np.isfinite(t)]
            if t.size:
                lo, hi = float(t.min()), float(np.quantile(t, 0.995))
                hi = max(hi, lo + 1e-6)
                tedges = np.linspace(lo, hi, HISTOGRAM_BINS + 1)
            else:
                tedges = np.linspace(0.0, 1e-3, HISTOGRAM_BINS + 1)
            cap = self.captured()
            out["arrival_time_edges"] = tedges
            out["arrival_time"] = np.histogram(t, bins=tedges)[0]
            out["arrival_time_captured"] = np.histogram(self.flight.arrival_time[cap], bins=tedges)[0]
        return out


# ----------------------------------------------------------------------------------
def simulate(scenario, *, atoms: int = DEFAULT_ATOMS, seed: int = 0, plan=None,
             baselines: bool = True, schedule=None) -> SimulationResult:
    """Run the Monte Carlo for ``scenario`` and its two baselines.

    Parameters
    ----------
    scenario : sweepgen.scenario.Scenario
    atoms : int
        Number of atoms drawn from the source.
    seed : int
        Seed of :func:`numpy.random.default_rng`; the same seed gives the same result.
    plan : sweepgen.planner.Plan, optional
        The plan (computed when not given).
    baselines : bool
        Also run the no-light and fixed-frequency baselines (otherwise their
        fractions are reported as zero atoms captured; for tests that need only the run).
    schedule : sweepgen.schedule.Schedule, optional
        The detuning the atoms see (default: the plan's), e.g. what a table read
        back plays (:func:`sweepgen.playback.table_sweep`).
    """
    from sweepgen.planner import plan as make_plan

    if isinstance(atoms, bool) or int(atoms) != atoms or atoms < 1:
        raise InputError(f"expected a positive whole number of atoms, got {atoms!r}", key="--atoms")
    if isinstance(seed, bool) or int(seed) != seed or seed < 0:
        raise InputError(f"expected a seed of zero or more, got {seed!r}", key="--seed")
    atoms, seed = int(atoms), int(seed)
    p = make_plan(scenario) if plan is None else plan
    schedule = p.schedule() if schedule is None else schedule
    streams = np.random.SeedSequence(seed).spawn(4)
    initial = draw_atoms(scenario, atoms, np.random.default_rng(streams[0]))
    flight = propagate(scenario, initial, DetuningProgram(schedule), np.random.default_rng(streams[1]))
    if baselines:
        dark = propagate(scenario, initial, DetuningProgram(schedule), np.random.default_rng(streams[2]),
                         light=False)
        fixed = propagate(scenario, initial, DetuningProgram.fixed(schedule.start_detuning),
                          np.random.default_rng(streams[3]))
    else:
        dark = fixed = _empty_flight(atoms)
    return SimulationResult(scenario=scenario, seed=seed, atoms=initial, flight=flight, no_light=dark,
                            fixed_frequency=fixed, start_detuning=schedule.start_detuning,
                            chirp_start=p.chirp_start, arrival_design=p.arrival_time)


def _empty_flight(n: int) -> Flight:
    nan = np.full(n, np.nan)
    return Flight(fate=np.full(n, NOT_ARRIVED, dtype=np.int8), final_velocity=nan, arrival_time=nan.copy(),
                  photons=np.zeros(n), radius=nan.copy(), transverse_velocity=nan.copy())


def draw_atoms(scenario, n: int, rng: np.random.Generator) -> Atoms:
    """Initial velocities, emission times and (with the transverse model) angles."""
    v = np.asarray(scenario.source.sample(rng, n), dtype=float)
    if scenario.pulsed:
        t_e = np.full(n, float(scenario.pulse_time))
    else:
        t_e = rng.uniform(0.0, scenario.chirp.period, n)
    if transverse_model(scenario):
        sigma = scenario.divergence or 0.0
        theta = rng.normal(0.0, 1.0, (2, n)) * sigma
        return Atoms(velocity=v, emission_time=t_e, theta_x=theta[0], theta_y=theta[1])
    return Atoms(velocity=v, emission_time=t_e, theta_x=None, theta_y=None)


def transverse_model(scenario) -> bool:
    """Whether the transverse model is on (a source divergence or a target aperture is set)."""
    return scenario.divergence is not None or scenario.target.aperture is not None


def velocity_width(species) -> float:
    """The Lorentzian's natural velocity width ``λΓ/2π`` (m/s), the time step's yardstick."""
    return float(physics.velocity_width(species.gamma, species.wavelength))


def peak_saturation(light, z_max: float) -> float:
    """Largest on-axis saturation parameter between the light start and ``z_max``."""
    if not light.focused:
        return float(light.saturation)
    zc = min(max(light.focus, light.start), z_max)
    return float(light.saturation_at(np.array([zc]))[0])


def propagate(scenario, atoms: Atoms, program: DetuningProgram, rng: np.random.Generator, *,
              light: bool = True, step_fraction: float = STEP_FRACTION) -> Flight:
    """Fly the atoms from the source to the target plane (see the module notes).

    Each step has four parts, each a method of :class:`_Propagation`: take in the
    atoms emitted soon (and drop the parked ones), choose the step, scatter (draw
    the photons and kicks of the atoms that scatter) and settle (fates: arrived,
    turned back, dark). Atoms that are done are parked (moved far behind the
    source, where there is no light, and no longer counted) and dropped from the
    working arrays whenever they make up a sixteenth of them.
    """
    run = _Propagation(scenario, atoms, program, rng, light, step_fraction)
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
        dt, detuning = run.choose_step(t)
        z_new = run.drift(dt)
        hits = run.scatter(t, dt, detuning, z_new) if light else None
        run.settle(t, dt, z_new, hits)
        t = t + dt
    return run.finish()


@dataclass
class _Hits:
    """The atoms that scatter in one step (working-set indices) and what they receive."""

    index: np.ndarray            # working-set indices: large expected counts first, then clocks run out
    photons: np.ndarray          # photons scattered by each of them in the step
    kick: np.ndarray             # m/s, their velocity change along z in the step


class _Propagation:
    """One run of :func:`propagate`: the run's constants, the working set and the step's parts."""

    PARK = -1e100                # m, where atoms that are done wait (no light there)

    def __init__(self, scenario, atoms: Atoms, program: DetuningProgram, rng, light: bool,
                 step_fraction: float):
        sp, lt, tg = scenario.species, scenario.light, scenario.target
        self.atoms, self.program, self.rng, self.light = atoms, program, rng, light
        self.beam = lt
        self.wavelength = sp.wavelength
        self.gamma = sp.gamma
        self.recoil = physics.recoil_velocity(sp.mass, sp.wavelength)
        self.dv_max = step_fraction * velocity_width(sp)
        self.distance = tg.distance
        self.s_peak = peak_saturation(lt, tg.distance) if light else 0.0
        self.r_peak = physics.scattering_rate(0.0, 0.0, self.s_peak, sp.gamma, sp.wavelength)
        self.max_move = POSITION_FRACTION * tg.distance
        if lt.focused:
            self.max_move = min(self.max_move, POSITION_FRACTION * 10.0 * lt.rayleigh_range)
        horizon = HORIZON_FACTOR * tg.distance / tg.capture_velocity
        self.p_loss = sp.loss_per_photon
        self.dark_scale = -1.0 / math.log1p(-self.p_loss) if self.p_loss > 0 else 0.0
        self.transverse = atoms.theta_x is not None
        self.light_start = float(lt.start)

        n = atoms.velocity.size
        self.out = _empty_flight(n)
        # moments of the photon times of arrived atoms, for the transverse draw at the end
        self.arrived_kt = np.zeros(n) if self.transverse else None
        self.arrived_ktt = np.zeros(n) if self.transverse else None
        # The clock starts at the first emission; atoms not yet emitted wait at
        # z = -v (t_e - t) < 0, where there is no light, and so reach z = 0 at t_e exactly.
        self.order = np.argsort(atoms.emission_time, kind="stable")
        self.emission_sorted = atoms.emission_time[self.order]
        if n:
            self.t_first = float(self.emission_sorted[0])
            self.t_end = float(self.emission_sorted[-1]) + horizon
        self.lead = max(horizon / 400.0, 1e-6)

        self.w = _Working(self.transverse, self.p_loss > 0)
        self.taken = 0              # atoms (in emission order) taken into the working set
        self.dt_prev = math.inf
        self.unlit = False          # some atom of the working set may be before the light start
        self.unchecked = False      # atoms taken in whose speed has not been checked yet
        self.steps = 0
        self.atom_steps = 0
        self.smallest = math.inf
        self.dv_seen = 0.0

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
        """Drop parked atoms, and take in the atoms emitted before ``t + 2 lead``."""
        w, rng = self.w, self.rng
        grow = not self.all_emitted and self.emission_sorted[self.taken] <= t + self.lead
        if w.parked and (grow or 16 * w.parked >= w.size):
            w.compact()
            self.unlit = True
        if not grow:
            return
        stop = int(np.searchsorted(self.emission_sorted, t + 2.0 * self.lead, side="right"))
        new = self.order[self.taken:stop]
        self.taken = stop
        v0 = self.atoms.velocity[new]
        clock = rng.standard_exponential(new.size)
        w.take_in(new, v0, -v0 * (self.atoms.emission_time[new] - t), clock,
                  rng.standard_exponential(new.size) * self.dark_scale if self.p_loss > 0 else None)
        self.unlit = self.unchecked = True

    def choose_step(self, t: float) -> tuple[float, float]:
        """The step (the rule of the module notes) and the detuning at its mid-point."""
        w = self.w
        dt_try = min(self.max_move / max(float(w.v.max()), 1e-9), self.t_end - t)
        if not self.all_emitted:
            dt_try = min(dt_try, max(self.next_emission - self.lead - t, self.lead))
        detuning = math.nan
        if self.light:
            dt = min(dt_try, 1.5 * self.dt_prev)
            d_lo, d_hi = self.program.extremes(t, t + dt)
            # resonant velocities in the step: [-λ d_hi, -λ d_lo]; distance of the nearest atom
            centre = -0.5 * self.wavelength * (d_lo + d_hi)
            gap_all = w.buf
            np.subtract(w.v, centre, out=gap_all)
            np.abs(gap_all, out=gap_all)
            gap = float(gap_all.min()) - 0.5 * self.wavelength * (d_hi - d_lo)
            gap = max(gap - self.dv_max, 0.0)
            r_bound = physics.scattering_rate(0.0, gap, self.s_peak, self.gamma, self.wavelength)
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

    def drift(self, dt: float) -> np.ndarray:
        """Positions after the step without kicks (the kicks of the atoms that scatter come later)."""
        w = self.w
        z_new = w.z_next
        np.multiply(w.v, dt, out=z_new)
        z_new += w.z
        return z_new

    def scatter(self, t: float, dt: float, detuning: float, z_new: np.ndarray) -> _Hits | None:
        """Draw the photons of the step and their kicks; move ``z_new`` by half of each kick."""
        w, rng = self.w, self.rng
        # λ = R·dt, R = (Γ/2) s / (1 + s + x²) (physics.scattering_rate), fused in place
        expected = w.expected
        if self.unlit:
            lit = np.greater_equal(w.z, self.light_start, out=w.lit_bool)
            np.copyto(w.lit, lit)
            self.unlit = int(np.count_nonzero(lit)) + w.parked < w.size
        expected_counts(w.v, w.z, w.lit, detuning, dt, self.beam, self.gamma, self.wavelength,
                        w.buf, w.buf2, expected)
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
        # emissions (mean 0, variance k/3)
        kick = photons * (1.0 / 3.0)
        np.sqrt(kick, out=kick)
        kick *= xi[n_large:]
        kick -= photons
        kick *= self.recoil
        np.add.at(z_new, index, (0.5 * dt) * kick)
        np.add.at(w.photons, index, photons)
        if self.transverse:
            tm = t + 0.5 * dt - self.t_first
            weighted = photons * tm
            np.add.at(w.photon_t, index, weighted)
            weighted *= tm
            np.add.at(w.photon_tt, index, weighted)
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
            z0 = z[arrived]
            frac = (D - z0) / (z_new[arrived] - z0)
            ids = w.idx[arrived]
            out.fate[ids] = ARRIVED
            out.arrival_time[ids] = t + frac * dt
            out.final_velocity[ids] = v_in + frac * (v[arrived] - v_in)
            if self.transverse:
                self.arrived_kt[ids] = w.photon_t[arrived]
                self.arrived_ktt[ids] = w.photon_tt[arrived]
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
            out.photons[w.idx[finished]] = w.photons[finished]
            w.park(finished, self.PARK)

    def finish(self) -> Flight:
        """Photons of the atoms still in flight, the transverse draw of the arrived, the step record."""
        w, out = self.w, self.out
        out.photons[w.idx[w.alive]] = w.photons[w.alive]       # not arrived: photons so far
        if self.transverse:
            arrived = np.flatnonzero(out.fate == ARRIVED)
            r, vx = _transverse(self.atoms, arrived, out.arrival_time[arrived], out.photons[arrived],
                                self.arrived_kt[arrived], self.arrived_ktt[arrived], self.t_first,
                                self.recoil * self.recoil / 3.0, self.rng)
            out.radius[arrived] = r
            out.transverse_velocity[arrived] = vx
        else:
            out.radius[out.fate == ARRIVED] = 0.0
        out.steps, out.atom_steps, out.smallest_step = self.steps, self.atom_steps, self.smallest
        out.largest_velocity_change = self.dv_seen
        return out

def expected_counts(v, z, lit, detuning, dt, light, gamma, wavelength, work, work2, out):
    """Expected photons ``λ = R·dt`` of each atom in a step, in place (no temporaries).

    ``R = (Γ/2) s / (1 + s + x²)``, ``x = 2·2π(Δ + v/λ)/Γ``, the rate of
    :func:`sweepgen.physics.scattering_rate` (Foot 2005, eq. 7.68, recalled number, with the Doppler
    shift), with ``s`` the on-axis saturation parameter of ``light`` at ``z``
    (``Light.saturation_at``); ``lit`` is 1.0 for the atoms at or past the light
    start and 0.0 for the others. Rearranged so that each array pass is one
    in-place ufunc, with ``c = (Γ/2) dt``:

    * uniform beam: ``λ = lit / (x'² + (1 + s)/(c s))``, ``x' = x/√(c s)`` (five passes);
    * focused beam, ``s = s0/q``, ``q = 1 + u²``, ``u = (z - z_f)/z_R`` (Siegman 1986,
      ch. 17): ``λ = lit / ((1/(c s0) + u'²)(1 + x²) + 1/c)``, ``u' = u/√(c s0)``
      (eleven passes).

    ``work``, ``work2`` and ``out`` are float arrays shaped like ``v``; returns ``out``.
    """
    s0 = float(light.saturation)
    c = 0.5 * gamma * dt
    x_v = 2.0 * math.tau / (gamma * wavelength)
    x_d = 2.0 * math.tau / gamma
    x = work
    if not light.focused:
        r = 1.0 / math.sqrt(c * s0)
        np.multiply(v, x_v * r, out=x)
        x += (x_d * r) * detuning
        np.multiply(x, x, out=x)
        x += (1.0 + s0) / (c * s0)
        return np.divide(lit, x, out=out)
    np.multiply(v, x_v, out=x)
    x += x_d * detuning
    np.multiply(x, x, out=x)
    x += 1.0
    r = 1.0 / (light.rayleigh_range * math.sqrt(c * s0))
    u = work2
    np.multiply(z, r, out=u)
    u -= light.focus * r
    np.multiply(u, u, out=u)
    u += 1.0 / (c * s0)
    x *= u
    x += 1.0 / c
    return np.divide(lit, x, out=out)


def _clock_counts(overshoot, rng, out):
    """Photons of the atoms whose clock ran out in a step (into ``out``), and their fresh clocks.

    ``overshoot`` is the unit-rate time left in the step after the first photon:
    ``1 + Poisson(overshoot)`` photons, and a fresh ``Exp(1)`` clock (memorylessness).
    """
    np.add(rng.poisson(overshoot), 1.0, out=out)
    return rng.standard_exponential(overshoot.size)


class _Working:
    """The atoms in flight: per-atom arrays, parking and compaction, scratch buffers."""

    def __init__(self, transverse: bool, dark: bool):
        self.transverse = transverse
        self.dark = dark
        self.idx = np.empty(0, dtype=np.intp)
        self.v = np.empty(0)
        self.z = np.empty(0)
        self.clock = np.empty(0)
        self.photons = np.empty(0)             # photons scattered
        self.photon_t = np.empty(0)            # Σk·t (t from t_first), transverse model only
        self.photon_tt = np.empty(0)           # Σk·t²
        self.budget = np.empty(0)              # dark-state photon budget (molecules)
        self.alive = np.empty(0, dtype=bool)
        self.parked = 0
        self._scratch()

    @property
    def size(self) -> int:
        return self.v.size

    def _names(self):
        names = ["idx", "v", "z", "clock", "photons", "alive"]
        if self.transverse:
            names += ["photon_t", "photon_tt"]
        if self.dark:
            names.append("budget")
        return names

    def _scratch(self):
        n = self.v.size
        self.z_next = np.empty(n)
        self.buf = np.empty(n)
        self.buf2 = np.empty(n)
        self.expected = np.empty(n)      # expected photons of the step
        self.lit = np.zeros(n)
        self.lit_bool = np.zeros(n, dtype=bool)

    def compact(self):
        keep = self.alive
        for name in self._names():
            setattr(self, name, getattr(self, name)[keep])
        self.parked = 0
        self._scratch()

    def take_in(self, ids, v0, z0, clock, budget):
        zeros = np.zeros(ids.size)
        add = {"idx": ids, "v": v0, "z": z0, "clock": clock, "photons": zeros,
               "alive": np.ones(ids.size, dtype=bool), "photon_t": zeros, "photon_tt": zeros, "budget": budget}
        for name in self._names():
            setattr(self, name, np.concatenate([getattr(self, name), add[name]]))
        self._scratch()

    def park(self, ids, park_z):
        """Atoms done (arrived, turned back, dark): positive speed, far behind the source, no light."""
        self.v[ids] = 1.0
        self.z[ids] = park_z
        self.lit[ids] = 0.0
        self.alive[ids] = False
        if self.dark:
            self.budget[ids] = math.inf
        self.parked += ids.size


def _transverse(atoms: Atoms, ids, t_arr, a0, a1, a2, t_first, c_kick, rng):
    """Distance from the axis and v_x at the target plane, for the atoms ``ids``.

    The ballistic part is ``v_z0 θ (T - t_e)``; the emission kicks add the exact
    joint normal law of ``(Σ ξ_j (T - t_j), Σ ξ_j)`` per axis, with the photon
    moments ``a0 = Σk``, ``a1 = Σk t``, ``a2 = Σk t²`` (t from ``t_first``).
    """
    T = t_arr - t_first
    var_v = c_kick * a0
    cov = c_kick * (T * a0 - a1)
    var_x = np.maximum(c_kick * (T * T * a0 - 2.0 * T * a1 + a2), 0.0)
    safe = np.where(var_v > 0, var_v, 1.0)
    slope = np.where(var_v > 0, cov / safe, 0.0)
    resid = np.sqrt(np.maximum(var_x - slope * cov, 0.0))
    sv = np.sqrt(var_v)
    flight = t_arr - atoms.emission_time[ids]
    v0 = atoms.velocity[ids]
    pos, vel = [], []
    for theta in (atoms.theta_x[ids], atoms.theta_y[ids]):
        xi = rng.standard_normal((2, ids.size))
        kick_v = sv * xi[0]
        kick_x = slope * kick_v + resid * xi[1]
        vx0 = v0 * theta
        pos.append(vx0 * flight + kick_x)
        vel.append(vx0 + kick_v)
    return np.hypot(pos[0], pos[1]), vel[0]
