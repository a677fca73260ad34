"""Monte Carlo of the atoms through the sweep: what arrives at the target, and how slow.

Atoms leave the source (:class:`sweepgen.sources.Emission`: a pulsed source
emits over its pulse, a continuous beam uniformly over one period; from a disc of
the source's radius, in directions set by its divergence or by a collimating
aperture) with velocities drawn from the source model, and fly along +z through
the slowing light, which travels along -z with the detuning its caller gives
(the hardware's, from the playback service, or the plan itself). The light is on
all the time unless a gate channel switches it: then each light (the slowing
light and each repump) shines at the level its gates set at that time of the
period, its saturation parameter scaled by that level, and no step crosses a
change of level (:mod:`sweepgen.lighting`).
The model, per atom and time step ``dt`` (README.md, "Physics background"):

* scattering rate ``R = f Γ s / (1 + s + (2·2π(Δ + v/λ)/Γ)²)``
  (:func:`sweepgen.physics.scattering_rate`; ``f`` = the species' largest rate
  as a fraction of Γ, 1/2 for two levels) with the effective saturation
  parameter ``s`` at the atom's own place: the Gaussian beam's
  ``s(z, r) = s0/q · exp(−2r²/(w0² q))`` (``Light.saturation_at``), unbounded
  light everywhere ``s0``; the detuning at the step's mid-point time, the
  position at the step's mid-point, and the velocity at the step's mid-point
  predicted from the mean force (the explicit midpoint rule, so the mean
  velocity change is second-order accurate in the step);
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
  ``k`` isotropic unit vectors has zero mean, per-axis variance ``k/3`` and
  uncorrelated axes; its three components are drawn as normals of exactly that
  mean and variance. The transverse velocity and position of every atom are
  followed step by step, because they decide the light it sees;
* hyperfine depumping (atoms whose species gives an ``[off_resonant_level]``):
  the slowing light also excites the neighbouring excited level, ``δ_hf`` away,
  at ``R_off = f Γ κs / (1 + κs + x_off²)`` (relative strength κ), and a fraction
  ``b`` of those decays ends in the dark ground level, where the slowing light
  no longer acts: per scattered photon the chance is ``b R_off/R`` (the
  off-resonant excitation ratio of two Lorentzians,
  :func:`sweepgen.physics.off_resonant_ratio`). Repump lights
  (``[channels.NAME] role = "repump"``) drive the dark level to the same
  excited level at their own saturation and detuning (held, or following the
  sweep); a fraction ``1 − b`` of those decays returns the atom to the bright
  level. Both switches use one unit-rate clock per atom (as the photons do);
  the few recoils of these off-resonant and repump photons are neglected. An
  atom in the dark level flies on and is captured if it arrives slow enough
  (the trap has its own repump);
* molecules: each photon sends the molecule to a dark state with probability
  ``p``. Each molecule draws once a budget ``B = E / (-ln(1 - p))`` with
  ``E ~ Exp(1)`` and is lost when its photon count exceeds ``B``; so it survives
  ``N`` photons with probability ``P(B > N) = (1 - p)^N`` exactly.

Time step (the rule): the largest velocity change any atom can receive in one
step, one recoil per photon at the largest scattering rate it can meet during
the step (the detuning range swept in the step, the peak saturation on the beam
line, the atom's velocity within the step's own change; the off-resonant level
counts as a second resonance), is at most ``STEP_FRACTION = 0.025`` of the
Lorentzian's natural velocity width ``λΓ/2π`` (for 87Rb 0.12 m/s, about 20
recoils). Steps also move no atom by more than ``POSITION_FRACTION`` of the
target distance (or of ten Rayleigh ranges of a focused beam). So steps are
short while any atom is near resonance and long when every atom is far from it.

The rule is converged at 10⁶ atoms (``tests/benchmarks/study_convergence.py``,
figures in README.md, "Performance"): halving the step moves the captured
fraction, the captured atoms' mean final velocity and its spread, the
turned-back fraction and the photons per captured atom of every shipped
scenario by at most 1.5 standard errors (CaF: 0.025 against 0.0125; 87Rb and
23Na already from 0.05 to 0.025). Coarser steps did not: halving 0.1 moved the
87Rb mean final velocity by 2.5 standard errors, halving 0.05 the CaF one by 3.6
(16 mm/s).
The step is set by the atoms of one part of the run (:func:`chunks`), so it
does not depend on how many atoms a run has beyond ``CHUNK_ATOMS``.

Fates: an atom *arrives* when it crosses the target plane (``captured`` if its
speed is at most the capture velocity and it is inside the aperture); it *turns
back* when its velocity drops to zero or below (the light then pushes it back to
the source); a molecule is *lost to a dark state*; an atom that has not arrived
by ``HORIZON_FACTOR × target distance / capture velocity`` after the last
emission (the pulse; for a continuous beam the end of the emission period) is
*not arrived* (too slow to matter).

Temperatures: of the captured atoms, about their own mean velocity,
longitudinal ``m·var(v_z)/k_B`` and transverse ``m·(var(v_x) + var(v_y))/(2k_B)``,
beside the Doppler limit ``ħΓ/2k_B``.

Baselines use the same initial atoms (common random numbers): no light at all,
and the light held at the schedule's start detuning (through the same gates).

Speed (``tests/benchmarks/bench_simulate.py``): the atoms are flown in parts on
every core (:func:`chunks`, :mod:`sweepgen.workers`). With numba installed
(``sweepgen[fast]``) each step is one compiled pass over the atoms in flight
(:mod:`sweepgen._kernel`) that draws from a generator compiled into it
(NumPy's SFC64 and the ziggurat, :func:`sweepgen._kernel.stream`), and the
steps between two take-ins of new atoms run in one compiled call (:func:`sweepgen._kernel.run_steps`). A
compiled step first works out every atom's expected events in one pass with
vector instructions (:func:`sweepgen._kernel.expected`), then draws atom by
atom. Without numba, the NumPy
step below, which gives statistically identical results (tests/test_kernel.py).
In the NumPy step, per step the working set of
atoms in flight costs a few in-place array passes (the step rule's nearest
velocity, the saturation at each atom, the expected counts at the start and
mid-point velocities, the transverse drift, the tests that pick the atoms that
scatter), and only the atoms that scatter get random numbers and kicks. Atoms
that are done are parked and dropped once they make up a sixteenth of the
working set, and at least every ``SORT_EVERY`` steps the working set is sorted
by velocity (the atoms near resonance then sit together).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import constants as C

from sweepgen import physics
from sweepgen._flight import (ARRIVED, DARK, HORIZON_FACTOR, LARGE_COUNT, NOT_ARRIVED, POSITION_FRACTION,
                              STEP_FRACTION, TURNED_BACK, Atoms, Flight, expected_counts, peak_saturation,
                              propagate, velocity_width)
from sweepgen.costs import DEFAULT_ATOMS
from sweepgen.errors import InputError
from sweepgen.lighting import LightLevels, light_levels
from sweepgen.programs import DetuningProgram, Played
from sweepgen.workers import run as run_tasks

__all__ = ["ARRIVED", "DARK", "HORIZON_FACTOR", "LARGE_COUNT", "NOT_ARRIVED", "POSITION_FRACTION",
           "STEP_FRACTION", "TURNED_BACK", "Atoms", "Flight", "DetuningProgram",
           "Played", "SimulationResult", "draw_atoms", "expected_counts", "peak_saturation", "propagate", "simulate",
           "velocity_width", "DEFAULT_ATOMS", "CHUNK_ATOMS", "Chunk", "ChunkResult", "chunks", "fly_chunk"]

#: most atoms in one part of a simulation (:func:`chunks`); a part is one task for the workers
CHUNK_ATOMS = 10000
#: bins of the velocity and arrival-time histograms
HISTOGRAM_BINS = 80
#: the slow end of the velocity histograms: SLOW_BINS bins from 0 to SLOW_END × the capture velocity
SLOW_END = 1.5
SLOW_BINS = 60


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
    def temperatures(self) -> tuple[float, float]:
        """Longitudinal and transverse temperatures (K) of the captured atoms about their own mean."""
        cap = self.captured()
        if int(cap.sum()) < 2:
            return math.nan, math.nan
        m = self.scenario.species.mass
        vz = self.flight.final_velocity[cap]
        vt = self.flight.transverse_velocity[cap]
        longitudinal = m * float(np.var(vz, ddof=1)) / C.k
        transverse = m * 0.5 * float(np.var(vt[:, 0], ddof=1) + np.var(vt[:, 1], ddof=1)) / C.k
        return longitudinal, transverse

    def to_json(self) -> dict:
        sc = self.scenario
        f = self.flight
        cap = self.captured()
        vf = f.final_velocity[cap]
        some = vf.size > 0
        t_long, t_trans = self.temperatures()
        outside = self.outside_aperture()
        turned = f.fate == TURNED_BACK
        arrived_inside = (f.fate == ARRIVED) & ~outside
        # atoms the chirp could have slowed (not faster than its start) that reach the target too fast
        # while in the dark ground level were lost to depumping
        reach = self.atoms.velocity <= sc.chirp.start_velocity
        dark = (f.fate == DARK) | (arrived_inside & ~cap & f.dark & reach)
        too_fast = arrived_inside & ~cap & ~(f.dark & reach)
        doc = {
            "atoms": int(f.fate.size),
            "seed": self.seed,
            "captured_fraction": float(cap.mean()),
            "band_fraction": float(self.in_band().mean()),
            "final_velocity_mean": float(vf.mean()) if some else math.nan,
            "final_velocity_spread": float(np.std(vf, ddof=1)) if vf.size >= 2 else math.nan,
            "longitudinal_temperature": t_long,
            "transverse_temperature": t_trans,
            "doppler_limit": physics.doppler_limit(sc.species.gamma),
            "photons_mean": float(f.photons[cap].mean()) if some else math.nan,
            "lost_fraction": float((turned | dark | outside).mean()),
            "lost_by_reason": {
                "turned_back": float(turned.mean()),
                "left_aperture": float(outside.mean()),
                "dark_state": float(dark.mean()),
            },
            "depumped_fraction": float(f.depumped.mean()),
            "too_fast_fraction": float(too_fast.mean()),
            "not_arrived_fraction": float((f.fate == NOT_ARRIVED).mean()),
            "baseline_no_light_fraction": float(self.captured(self.no_light).mean()),
            "baseline_fixed_frequency_fraction": float(self.captured(self.fixed_frequency).mean()),
            "arrival_time_mean": float(f.arrival_time[cap].mean()) if (some and sc.pulsed) else None,
            "transverse_velocity_spread": (float(np.std(f.transverse_velocity[cap, 0], ddof=1))
                                           if vf.size >= 2 else None),
            "time_step": {
                "rule": "largest velocity change per step <= step_fraction * lambda*Gamma/(2*pi); "
                        "rates at the step's mid-point",
                "step_fraction": STEP_FRACTION,
                "velocity_change_max": f.largest_velocity_change,
                "smallest": f.smallest_step,
                "steps": f.steps,
                "atom_steps": f.atom_steps,
                "kernel": f.kernel,
            },
            "histograms": self.histograms(),
        }
        doc.update(self.extra)
        return doc

    def histograms(self) -> dict:
        """Counts of atoms per bin (see :meth:`_velocity_histograms` and :meth:`_arrival_histograms`)."""
        out = self._velocity_histograms()
        if self.scenario.pulsed:
            out.update(self._arrival_histograms())
        return out

    def _velocity_histograms(self) -> dict:
        """Velocities before (``initial``, at the source) and after, at the target plane: every atom
        crossing it (``final``: with the sweep, ``final_no_light``, ``final_fixed_frequency``), and the
        captured atoms alone (``final_captured``), on ``velocity_edges``; and the slow end on finer bins
        (``slow_edges``, 0 to 1.5 × the capture velocity): ``slow_final`` and ``slow_captured``."""
        sc = self.scenario
        v0 = self.atoms.velocity
        finals = [f.final_velocity for f in (self.flight, self.no_light, self.fixed_frequency)]
        top = max([float(v0.max()) if v0.size else 1.0, sc.chirp.start_velocity * 1.1]
                  + [float(np.nanmax(x)) for x in finals if np.isfinite(x).any()])
        top *= 1.0 + 1e-9
        edges = np.linspace(0.0, top, HISTOGRAM_BINS + 1)
        slow = np.linspace(0.0, SLOW_END * sc.target.capture_velocity, SLOW_BINS + 1)

        def counts(values, bins=edges):
            values = values[np.isfinite(values)]
            return np.histogram(values, bins=bins)[0]

        def arrived(flight):
            return np.where(flight.fate == ARRIVED, flight.final_velocity, np.nan)

        captured = self.flight.final_velocity[self.captured()]
        return {
            "velocity_edges": edges,
            "initial": np.histogram(v0, bins=edges)[0],
            "final": counts(arrived(self.flight)),
            "final_no_light": counts(arrived(self.no_light)),
            "final_fixed_frequency": counts(arrived(self.fixed_frequency)),
            "final_captured": counts(captured),
            "slow_edges": slow,
            "slow_final": counts(arrived(self.flight), slow),
            "slow_captured": counts(captured, slow),
        }

    def _arrival_histograms(self) -> dict:
        """Arrival times at the target of every atom crossing it (``arrival_time``) and of the captured
        atoms (``arrival_time_captured``) on ``arrival_time_edges``: from the first arrival to the
        99.5 % quantile of all arrivals or the last captured atom, whichever is later (so that every
        captured atom is counted)."""
        t = self.flight.arrival_time
        t = t[np.isfinite(t)]
        t_cap = self.flight.arrival_time[self.captured()]
        if t.size:
            lo = float(t.min())
            hi = max(float(np.quantile(t, 0.995)), float(t_cap.max()) if t_cap.size else lo, lo + 1e-6)
            tedges = np.linspace(lo, hi * (1.0 + 1e-12), HISTOGRAM_BINS + 1)
        else:
            tedges = np.linspace(0.0, 1e-3, HISTOGRAM_BINS + 1)
        return {"arrival_time_edges": tedges, "arrival_time": np.histogram(t, bins=tedges)[0],
                "arrival_time_captured": np.histogram(t_cap, bins=tedges)[0]}


def simulate(scenario, *, atoms: int = DEFAULT_ATOMS, seed: int = 0, plan=None,
             played: Played | None = None, baselines: bool = True,
             step_fraction: float = STEP_FRACTION, workers: int | None = None, cluster: str | None = None,
             progress=None) -> SimulationResult:
    """Run the Monte Carlo for ``scenario`` and its two baselines, in parts on every core.

    The atoms are flown in parts of at most :data:`CHUNK_ATOMS` (:func:`chunks`),
    each with its own random streams, through :func:`sweepgen.workers.run`: the
    result depends on the seed and the atom count, not on the number of workers.

    Parameters
    ----------
    scenario : sweepgen.scenario.Scenario
    atoms : int
        Number of atoms drawn from the source.
    seed : int
        Seed of :class:`numpy.random.SeedSequence`; the same seed gives the same result.
    plan : sweepgen.planner.Plan, optional
        The plan (computed when not given).
    played : sweepgen.programs.Played, optional
        The detuning the atoms fly through; by default the plan itself. What the
        hardware plays comes from the playback service
        (:func:`sweepgen.playback.played_detuning`, :func:`sweepgen.playback.played_table`);
        when it is the hardware's, the plan is also flown with the same atoms and its
        captured fraction reported beside (``ideal_captured_fraction``).
    baselines : bool
        Also run the no-light and fixed-frequency baselines (otherwise their
        fractions are reported as zero atoms captured; for tests that need only the run).
    step_fraction : float
        The time step's yardstick (:data:`STEP_FRACTION`); smaller is finer.
    workers : int, optional
        Processes to use (default: one per core; 1 runs in this process).
    cluster : str, optional
        Address of a Dask scheduler to run the parts on instead.
    progress : callable, optional
        ``progress(done, total)`` after each part (:func:`sweepgen.workers.run`).
    """
    from sweepgen.planner import plan as make_plan

    if isinstance(atoms, bool) or int(atoms) != atoms or atoms < 1:
        raise InputError(f"expected a positive whole number of atoms, got {atoms!r}", key="atoms")
    if isinstance(seed, bool) or int(seed) != seed or seed < 0:
        raise InputError(f"expected a seed of zero or more, got {seed!r}", key="seed")
    atoms, seed = int(atoms), int(seed)
    p = make_plan(scenario) if plan is None else plan
    schedule = p.schedule()
    if played is None:
        played = Played(DetuningProgram(schedule), False, "the plan itself")
    programs = (played.program, DetuningProgram.fixed(schedule.start_detuning),
                DetuningProgram(schedule) if played.hardware else None)
    levels = light_levels(scenario, p)
    tasks = chunks(scenario, atoms, seed, programs, baselines=baselines, step_fraction=step_fraction,
                   levels=levels)
    parts = run_tasks(fly_chunk, tasks, workers=workers, cluster=cluster, progress=progress)
    initial = Atoms.join([c.atoms for c in parts])
    flight = Flight.join([c.flight for c in parts])
    dark, fixed = (Flight.join([c.no_light for c in parts]), Flight.join([c.fixed_frequency for c in parts])
                   ) if baselines else (Flight.empty(atoms), Flight.empty(atoms))
    result = SimulationResult(scenario=scenario, seed=seed, atoms=initial, flight=flight, no_light=dark,
                              fixed_frequency=fixed, start_detuning=schedule.start_detuning,
                              chirp_start=p.chirp_start, arrival_design=p.arrival_time)
    result.extra["played"] = played.to_json()
    result.extra["light_levels"] = {name: [list(x) for x in runs] for name, runs in levels.stretches().items()}
    if played.hardware:
        ideal_flight = Flight.join([c.ideal for c in parts])
        ideal_result = SimulationResult(scenario, seed, initial, ideal_flight, dark, fixed, 0.0, 0.0, None)
        cap = ideal_result.captured()
        result.extra["ideal_captured_fraction"] = float(cap.mean())
        result.extra["ideal_final_velocity_mean"] = (float(ideal_flight.final_velocity[cap].mean())
                                                     if cap.any() else math.nan)
    return result


# -- chunks: the atoms in parts of at most CHUNK_ATOMS, each with its own random streams ---------------
@dataclass(frozen=True)
class Chunk:
    """One part of a simulation: its atom count, its seed, and what it flies through."""

    scenario: object
    atoms: int
    seed: np.random.SeedSequence
    programs: tuple          # the played program, the fixed-frequency baseline's, the plan's (or None)
    baselines: bool
    step_fraction: float
    levels: LightLevels | None = None   # the lights' levels that the gates set (None: always full)


@dataclass
class ChunkResult:
    atoms: Atoms
    flight: Flight
    no_light: Flight | None
    fixed_frequency: Flight | None
    ideal: Flight | None


def chunks(scenario, atoms: int, seed: int, programs: tuple, *, baselines: bool = True,
           step_fraction: float = STEP_FRACTION, levels: LightLevels | None = None) -> list[Chunk]:
    """The simulation's parts: ``ceil(atoms / CHUNK_ATOMS)`` of them, sizes differing by at most one.

    Their number depends on the atom count alone, and each draws from its own
    seed, spawned from ``SeedSequence(seed)`` (a single part uses that seed
    itself), so that the same seed gives the same atoms and the same result on
    any computer, with any number of workers.
    """
    n = -(-atoms // CHUNK_ATOMS)
    seeds = [np.random.SeedSequence(seed)] if n == 1 else np.random.SeedSequence(seed).spawn(n)
    sizes = [atoms // n + (i < atoms % n) for i in range(n)]
    return [Chunk(scenario, size, s, programs, baselines, step_fraction, levels) for size, s in zip(sizes, seeds)]


def fly_chunk(chunk: Chunk) -> ChunkResult:
    """Draw a part's atoms and fly them: with the light, and through the baselines and the plan when asked
    (random streams: the atoms, the light, no light, the fixed frequency, the plan)."""
    streams = chunk.seed.spawn(5)
    sc = chunk.scenario
    initial = draw_atoms(sc, chunk.atoms, np.random.default_rng(streams[0]))
    played, fixed, planned = chunk.programs

    def fly(program, stream, light=True):
        return propagate(sc, initial, program, np.random.default_rng(streams[stream]), light=light,
                         levels=chunk.levels, step_fraction=chunk.step_fraction)

    dark = fly(played, 2, light=False) if chunk.baselines else None
    fixed_flight = fly(fixed, 3) if chunk.baselines else None
    return ChunkResult(initial, fly(played, 1), dark, fixed_flight, fly(planned, 4) if planned is not None else None)


def draw_atoms(scenario, n: int, rng: np.random.Generator) -> Atoms:
    """Initial velocities, emission times, transverse positions and velocities (``Emission``)."""
    v = np.asarray(scenario.source.sample(rng, n), dtype=float)
    em = scenario.emission
    t_e = em.times(rng, n, scenario.chirp.period)
    x, y, vx, vy = em.transverse(rng, v)
    return Atoms(velocity=v, emission_time=t_e, x=x, y=y, vx=vx, vy=vy)
