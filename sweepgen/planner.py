"""The planner: from a scenario to the design trajectory and the optical sweep.

The design ("synchronous") atom starts at ``z0`` with the start velocity when the
chirp starts and decelerates at ``a_d(z) = η · a_max(s(z))``. It rides on the
low-velocity side of the Lorentzian, a lag ``Δv_lag(z)`` below the resonant
velocity of the light, so the laser detuning during the chirp is

    Δ(t) = -(v_s(t) + Δv_lag(z_s(t))) / λ

(README.md, "Physics background"). ``dv_s/dt = -a_d(z_s)``,
``dz_s/dt = v_s`` are integrated with :func:`scipy.integrate.solve_ivp` and
stopped by an event at ``v_s = end_velocity``. With uniform light the result is
the constant-deceleration closed form (:func:`sweepgen.physics.closed_form_slowing`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from sweepgen import physics
from sweepgen.errors import PlanError
from sweepgen.scenario import Scenario

#: Nodes of the cubic Hermite representation of the chirp (exact for uniform light).
CHIRP_NODES = 513


@dataclass(frozen=True)
class Trajectory:
    """The design atom during the chirp, sampled at ``time`` (s from the chirp start)."""

    time: np.ndarray
    position: np.ndarray      # m
    velocity: np.ndarray      # m/s
    deceleration: np.ndarray  # m/s², design deceleration a_d(z)
    saturation: np.ndarray    # effective s(z) on axis
    lag: np.ndarray           # m/s, Δv_lag(z)
    detuning: np.ndarray      # Hz
    chirp_rate: np.ndarray    # Hz/s, dΔ/dt


@dataclass(frozen=True)
class Plan:
    """The planned sweep and the numbers a physicist checks it by (SI units)."""

    scenario: Scenario
    trajectory: Trajectory
    chirp_start: float        # s on the period's time axis (0 = trigger; the pulse is at pulse_time)
    z_start: float            # m
    z_end: float              # m
    start_time: float | None  # s (pulsed) / None (continuous)
    arrival_time: float | None

    # -- the contract numbers ---------------------------------------------------
    @property
    def species(self):
        return self.scenario.species

    @property
    def start_velocity(self) -> float:
        return self.scenario.chirp.start_velocity

    @property
    def end_velocity(self) -> float:
        return self.scenario.chirp.end_velocity

    @property
    def force_fraction(self) -> float:
        """η, the fraction of the largest force the design uses."""
        return self.scenario.chirp.force_fraction

    @property
    def chirp_duration(self) -> float:
        return float(self.trajectory.time[-1])

    @property
    def slowing_distance(self) -> float:
        return self.z_end - self.z_start

    @property
    def fits(self) -> bool:
        """Whether the design atom reaches the end velocity before the target (checker rule
        ``slowing_distance``)."""
        return self.z_end <= self.scenario.target.distance * (1 + 1e-12)

    @property
    def start_detuning(self) -> float:
        return float(self.trajectory.detuning[0])

    @property
    def end_detuning(self) -> float:
        return float(self.trajectory.detuning[-1])

    @property
    def chirp_span(self) -> float:
        return self.end_detuning - self.start_detuning

    @property
    def chirp_rate_max(self) -> float:
        """Largest |dΔ/dt| during the chirp (Hz/s)."""
        return float(np.max(np.abs(self.trajectory.chirp_rate)))

    @property
    def photons_per_atom(self) -> float:
        sp = self.species
        return physics.photons_to_slow(self.start_velocity - self.end_velocity, sp.mass, sp.wavelength)

    # -- what the design leaves out, estimated along the design path ---------------
    @cached_property
    def after_chirp(self):
        """What the hold and the return take from atoms leaving the chirp (:mod:`sweepgen.afterchirp`);
        None when one period cannot hold the sweep."""
        from sweepgen.afterchirp import after_chirp
        from sweepgen.errors import PlanError

        try:
            schedule = self.schedule()
        except PlanError:
            return None
        return after_chirp(self, schedule)

    @cached_property
    def light_levels(self):
        """Each light's level over the period as the scenario's gates set it (:mod:`sweepgen.lighting`)."""
        from sweepgen.lighting import light_levels

        return light_levels(self.scenario, self)

    @cached_property
    def survival(self):
        """Expected survival of the band (:mod:`sweepgen.survival`)."""
        from sweepgen.survival import expected_survival

        return expected_survival(self)

    @cached_property
    def overlap(self):
        """The atomic beam in the slowing beam along the design path (:mod:`sweepgen.overlap`)."""
        from sweepgen.overlap import beam_overlap

        return beam_overlap(self)

    def to_json(self) -> dict:
        """The ``sweepgen plan --json`` document (SI units, Hz for detunings)."""
        sp = self.species
        tr = self.trajectory
        after = (self.after_chirp.to_json() if self.after_chirp is not None else
                 {k: None for k in ("hold_velocity_loss", "return_velocity_loss", "after_chirp_velocity",
                                    "after_chirp_stopped", "after_chirp_stop_time", "release_position")})
        return {
            "start_velocity": self.start_velocity,
            "end_velocity": self.end_velocity,
            "force_fraction": self.force_fraction,
            "deceleration_min": float(np.min(tr.deceleration)),
            "deceleration_max": float(np.max(tr.deceleration)),
            "lag_velocity_start": float(tr.lag[0]),
            "start_detuning": self.start_detuning,
            "end_detuning": self.end_detuning,
            "chirp_span": self.chirp_span,
            "chirp_rate_max": self.chirp_rate_max,
            "chirp_duration": self.chirp_duration,
            "slowing_distance": self.slowing_distance,
            "start_time": self.start_time,
            "arrival_time": self.arrival_time,
            "photons_per_atom": self.photons_per_atom,
            "doppler_limit": physics.doppler_limit(sp.gamma),
            "recoil_velocity": physics.recoil_velocity(sp.mass, sp.wavelength),
            "start_position": self.z_start,
            "end_position": self.z_end,
            "max_rate_fraction": sp.rate_fraction,
            "effective_saturation": self.scenario.light.peak * self.overlap.level,
            "chirp_light_level": self.overlap.level,
            "survival_fraction": self.survival.fraction,
            "beam_overlap": self.overlap.fraction,
            **after,
        }

    def schedule(self):
        """The sweep over one period as a :class:`sweepgen.schedule.Schedule`."""
        from sweepgen.schedule import Schedule

        return Schedule.from_plan(self)

    def design_resonance(self, t):
        """Detuning resonant with the design atom itself, ``-v_s/λ``, at period times ``t``
        during the chirp (NaN outside); for plots."""
        t = np.asarray(t, dtype=float) - self.chirp_start
        tr = self.trajectory
        inside = (t >= 0) & (t <= tr.time[-1])
        v = np.interp(t, tr.time, tr.velocity)
        return np.where(inside, -v / self.species.wavelength, np.nan)


# ----------------------------------------------------------------------------------
def _integrate(scenario: Scenario, z0: float, *, dense: bool):
    """Integrate the design atom from ``z0``; returns (solution, duration) or raises PlanError."""
    sp = scenario.species
    ch = scenario.chirp
    light = scenario.light
    eta = ch.force_fraction

    def accel(z):
        return eta * physics.max_deceleration(light.on_axis(z), sp.gamma, sp.wavelength, sp.mass,
                                              sp.rate_fraction)

    def rhs(_t, y):
        return (y[1], -accel(y[0]))

    def stopped(_t, y):
        return y[1] - ch.end_velocity

    stopped.terminal = True
    stopped.direction = -1

    # An upper bound on the time: the weakest deceleration between z0 and far beyond the target.
    z_far = max(scenario.target.distance, z0) + 10.0 * max(scenario.target.distance, 1.0)
    zs = np.linspace(z0, z_far, 2001)
    a_min = eta * physics.max_deceleration(light.saturation_at(zs).min(), sp.gamma, sp.wavelength, sp.mass,
                                           sp.rate_fraction)
    if a_min <= 0:
        raise PlanError("the slowing light has zero intensity somewhere on the path", file=str(scenario.path),
                        key="light")
    t_max = 1.5 * (ch.start_velocity - ch.end_velocity) / a_min
    sol = solve_ivp(rhs, (0.0, t_max), [z0, ch.start_velocity], method="DOP853", rtol=1e-11,
                    atol=[1e-12, 1e-10], events=stopped, dense_output=dense)
    if sol.status != 1 or not len(sol.t_events[0]):
        raise PlanError(f"the design atom does not reach the end velocity ({ch.end_velocity:g} m/s) "
                        f"within {t_max:.3g} s; raise light.saturation or check the beam geometry",
                        file=str(scenario.path), key="light")
    return sol, float(sol.t_events[0][0])


def end_position(scenario, z0) -> float:
    """Where the design atom starting at ``z0`` with the start velocity reaches the end
    velocity (m), integrated as in :func:`plan`; used to put numbers on a refusal."""
    sol, _ = _integrate(scenario, z0, dense=False)
    return float(sol.y_events[0][0][0])


def fit_advice(plan: "Plan") -> str:
    """What to change when the slowing distance of ``plan`` does not fit before the target."""
    sc = plan.scenario
    ch = sc.chirp
    text = (f"lower chirp.start_velocity (now {ch.start_velocity:g} m/s), raise chirp.force_fraction "
            f"(now {ch.force_fraction:g}) or light.saturation, or move the target further away")
    if sc.pulsed and ch.start_time not in (None, "auto"):
        z_latest = sc.target.distance - plan.slowing_distance      # where the design atom would have to start
        if z_latest >= sc.light.start:
            latest = sc.pulse_time + z_latest / ch.start_velocity
            text += f"; or start the chirp earlier (about {latest * 1e3:.4g} ms at the latest)"
    return text


def plan(scenario: Scenario) -> Plan:
    """Plan the sweep of ``scenario``.

    A sweep whose slowing distance does not fit before the target still exists:
    it is returned (``Plan.fits`` is False; the checker's ``slowing_distance``
    rule fails it, with :func:`fit_advice`), and its ``arrival_time`` is when the
    design atom crosses the target, still faster than the end velocity.

    Raises
    ------
    PlanError
        When the sweep cannot exist: the design atom cannot follow it at all
        (it would be in the dark when the chirp starts, or the light never
        slows it to the end velocity).
    """
    ch = scenario.chirp
    light = scenario.light
    target = scenario.target.distance
    if not scenario.pulsed:
        z0 = light.start
    elif ch.start_time == "auto":
        z0 = _auto_start(scenario)
    else:
        z0 = ch.start_velocity * (ch.start_time - scenario.pulse_time)
        if z0 < light.start:
            earliest = scenario.pulse_time + light.start / ch.start_velocity
            raise PlanError(f"at chirp.start_time the design atom is at {z0:.4g} m, before the light start "
                            f"({light.start:.4g} m), where no light can slow it; start the chirp at "
                            f"{earliest * 1e3:.4g} ms or later, or use start_time = \"auto\"",
                            file=str(scenario.path), key="chirp.start_time")

    sol, duration = _integrate(scenario, z0, dense=True)
    trajectory = _sample(scenario, sol, duration)
    z_end = float(trajectory.position[-1])
    if scenario.pulsed:
        start_time = scenario.pulse_time + z0 / ch.start_velocity
        if z_end <= target:
            arrival = start_time + duration + (target - z_end) / ch.end_velocity
        elif z0 >= target:      # past the target before the chirp starts
            arrival = scenario.pulse_time + target / ch.start_velocity
        else:                   # the design atom reaches the target during the chirp
            arrival = start_time + brentq(lambda t: sol.sol(t)[0] - target, 0.0, duration, xtol=1e-15)
        chirp_start = start_time
    else:
        start_time = arrival = None
        chirp_start = 0.0
    return Plan(scenario=scenario, trajectory=trajectory, chirp_start=chirp_start, z_start=z0, z_end=z_end,
                start_time=start_time, arrival_time=arrival)


def _auto_start(scenario: Scenario) -> float:
    """Where the design atom starts so that it reaches the end velocity exactly at the target; the light
    start when even that is too late (the plan then does not fit, and the checker says so)."""
    light = scenario.light
    target = scenario.target.distance
    z_end_first = end_position(scenario, light.start)
    if z_end_first >= target:
        return light.start
    if not light.focused:
        return target - (z_end_first - light.start)
    return brentq(lambda z: end_position(scenario, z) - target, light.start, target, xtol=1e-9, rtol=1e-12)


def _sample(scenario: Scenario, sol, duration: float) -> Trajectory:
    sp = scenario.species
    light = scenario.light
    eta = scenario.chirp.force_fraction
    t = np.linspace(0.0, duration, CHIRP_NODES)
    z, v = sol.sol(t)
    v[-1] = scenario.chirp.end_velocity       # the event's value, exactly
    v[0] = scenario.chirp.start_velocity
    s = light.saturation_at(z)
    a = eta * physics.max_deceleration(s, sp.gamma, sp.wavelength, sp.mass, sp.rate_fraction)
    lag = physics.lag_velocity(s, eta, sp.gamma, sp.wavelength)
    detuning = -(v + lag) / sp.wavelength
    # d(lag)/dz = (λΓ/4π) sqrt(1/η - 1) · (ds/dz) / (2 sqrt(1+s))
    dlag_dz = (sp.wavelength * sp.gamma / (4.0 * math.pi) * math.sqrt(1.0 / eta - 1.0)
               * light.saturation_slope(z) / (2.0 * np.sqrt(1.0 + s)))
    chirp_rate = (a - v * dlag_dz) / sp.wavelength
    return Trajectory(time=t, position=z, velocity=v, deceleration=a, saturation=s, lag=lag,
                      detuning=detuning, chirp_rate=chirp_rate)
