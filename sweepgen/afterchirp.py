"""After the chirp: what the hold, the return and the rest do to the atoms the chirp has slowed.

The slowing light stays on after the chirp unless a gate switches it off or down
(:mod:`sweepgen.lighting`: its force then scales with the level the gates set,
and nothing at all acts while it is dark). During the hold it sits at the end
detuning, still resonant a lag above the end velocity; the smooth return leaves
the end detuning with zero slope, so for a while it is a second, slower chirp;
at rest, at the start detuning, it still brakes slow atoms a little. Atoms that
leave the chirp at the end velocity before the target keep being slowed on
their way there, and can stop and be pushed back.

Where the chirp releases its atoms: an atom of the band (velocity ``v0``,
emitted at ``t_e``) is caught when the design velocity comes down to ``v0``
(chirp time ``t_c``) and from then on follows the design atom's velocity, a
fixed distance ``z_s(t_c) − v0·(T_c − t_e)`` behind it (``T_c`` the period
time of the catch); so it leaves the chirp that far before the design atom's
end position. :func:`release_position` takes that place over the band
(weighted by the source's velocity distribution) and over the emission times
(the pulse, or a continuous beam's whole period), among the atoms still inside
the light and before the target: all but a tenth of them
(:data:`RELEASE_QUANTILE`) leave the chirp closer to the target.

:func:`after_chirp` follows an atom leaving the chirp there at the end velocity,
on the beam's axis (the strongest light): the mean radiation-pressure force
``dv/dt = −v_r R(Δ(t), v, s(z))``, ``dz/dt = v``
(:func:`sweepgen.physics.scattering_rate`, the species' effective force) is
integrated with :func:`scipy.integrate.solve_ivp` through the hold, the
return and the rest until it reaches the target, stops, or the next chirp starts,
piece by piece between the changes of the light's level (the force jumps there).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

from sweepgen import physics

#: nodes over the band's velocities and over the emission times for the release position
BAND_NODES = 101
TIME_NODES = 41
#: the followed atom is released further from the target than all but this fraction of the band's
#: atoms (a design choice of this tool: a sweep that stops one slowed atom in ten fails)
RELEASE_QUANTILE = 0.1
#: the checker fails a sweep whose light takes more than this fraction of the end velocity from the
#: followed atom before the target: it is stopped in all but name, and its neighbours, spread about
#: it by a metre per second or so, stop and are pushed back (a design choice of this tool)
STOP_FRACTION = 0.9
#: ... and warns when it takes more than this fraction: part of the slowed atoms may already stop
WARN_FRACTION = 0.5


@dataclass(frozen=True)
class AfterChirp:
    """What the light after the chirp does to an atom leaving it at the end velocity."""

    end_velocity: float           # m/s, where it starts
    release_position: float       # m, where it leaves the chirp
    hold_velocity_loss: float     # m/s taken during the hold
    return_velocity_loss: float   # m/s taken during the return
    arrival_velocity: float       # m/s at the target (0 when it stops first)
    stopped: bool                 # the velocity reached zero: the atom stops and is pushed back
    stop_time: float | None       # s after the chirp's end when it stops (None: it does not)

    @property
    def velocity_loss(self) -> float:
        """m/s lost between leaving the chirp and the target (all of it when it stops)."""
        return self.end_velocity - self.arrival_velocity

    def to_json(self) -> dict:
        return {"hold_velocity_loss": self.hold_velocity_loss, "return_velocity_loss": self.return_velocity_loss,
                "after_chirp_velocity": self.arrival_velocity, "after_chirp_stopped": self.stopped,
                "after_chirp_stop_time": self.stop_time, "release_position": self.release_position}


def release_position(plan) -> float:
    """Where the chirp releases the atoms of its band (m): all but :data:`RELEASE_QUANTILE` of them
    leave it closer to the target (see the module notes)."""
    sc = plan.scenario
    ch, tr = sc.chirp, plan.trajectory
    v0 = np.linspace(ch.end_velocity, ch.start_velocity, BAND_NODES)
    w_v = np.asarray(sc.source.pdf(v0), dtype=float)
    t_c = np.interp(v0, tr.velocity[::-1], tr.time[::-1])            # chirp time of the catch
    z_c = np.interp(t_c, tr.time, tr.position)                        # the design atom there
    t_e, w_t = _emission_nodes(sc, plan)
    behind = z_c[:, None] - v0[:, None] * (plan.chirp_start + t_c[:, None] - t_e[None, :])
    release = plan.z_end - behind
    weight = w_v[:, None] * w_t[None, :]
    inside = (release >= sc.light.start) & (release < sc.target.distance) & (weight > 0)
    if not np.any(inside):
        return float(plan.z_end)
    r, w = release[inside], weight[inside]
    order = np.argsort(r)
    cum = np.cumsum(w[order])
    return float(r[order][np.searchsorted(cum, RELEASE_QUANTILE * cum[-1])])


def _through(rhs, events, state, start, stop, levels, max_step):
    """Integrate ``rhs`` from ``start`` to ``stop`` in the pieces between the changes of the slowing
    light's level (``levels``); the state at the end and the outcome (``("stopped" | "arrived", t)``,
    None when neither event happened)."""
    while start < stop:
        piece = min(levels.next_edge(start), stop)
        sol = solve_ivp(rhs, (start, piece), state, method="DOP853", rtol=1e-9, atol=[1e-9, 1e-9],
                        events=events, max_step=max_step, args=(float(levels.at(start)[0]),))
        if sol.status == 1:
            which = 0 if sol.t_events[0].size else 1
            return ([float(x) for x in sol.y_events[which][0]],
                    ("stopped" if which == 0 else "arrived", float(sol.t_events[which][0])))
        state, start = [float(sol.y[0, -1]), float(sol.y[1, -1])], piece
    return state, None


def _emission_nodes(sc, plan):
    """Emission times and weights: over the pulse, or over the period before the chirp (continuous)."""
    em = sc.emission
    if em.pulse_time is None:
        return np.linspace(plan.chirp_start - sc.chirp.period, plan.chirp_start, TIME_NODES), np.ones(TIME_NODES)
    if em.pulse_duration <= 0:
        return np.array([em.pulse_time]), np.ones(1)
    if em.pulse_shape == "flat":
        return em.pulse_time + np.linspace(0.0, em.pulse_duration, TIME_NODES), np.ones(TIME_NODES)
    from sweepgen.sources import FWHM_PER_SIGMA

    sigma = em.pulse_duration / FWHM_PER_SIGMA
    centre = em.pulse_time + 0.5 * em.pulse_duration
    t = centre + np.linspace(-3.0, 3.0, TIME_NODES) * sigma
    return t, np.exp(-0.5 * ((t - centre) / sigma) ** 2)


def after_chirp(plan, schedule=None) -> AfterChirp:
    """Follow an atom that leaves the chirp at the end velocity through hold, return and rest."""
    sc = plan.scenario
    sp, lt, ch = sc.species, sc.light, sc.chirp
    schedule = plan.schedule() if schedule is None else schedule
    v_r = physics.recoil_velocity(sp.mass, sp.wavelength)
    t_end = plan.chirp_start + plan.chirp_duration
    z0 = release_position(plan)
    levels = plan.light_levels

    def rhs(t, y, level):
        z, v = y.tolist()                   # floats: NumPy scalars' arithmetic costs several times more
        rate = physics.scattering_rate(float(schedule.detuning(t)), v, level * lt.on_axis(z), sp.gamma,
                                       sp.wavelength, sp.rate_fraction)
        return (v, -v_r * rate)

    def stopped(_t, y, *_):
        return y[1]

    def arrived(_t, y, *_):
        return y[0] - sc.target.distance

    stopped.terminal = arrived.terminal = True
    stopped.direction = -1
    phases = [ch.hold, ch.return_time, max(ch.period - plan.chirp_duration - ch.hold - ch.return_time, 0.0)]
    state, start, losses, outcome = [z0, ch.end_velocity], t_end, [], None
    for length in phases:
        if length <= 0 or outcome is not None:
            losses.append(0.0)
            continue
        end, outcome = _through(rhs, (stopped, arrived), state, start, start + length, levels, length / 64.0)
        losses.append(state[1] - end[1])
        state, start = end, start + length
    stop = outcome is not None and outcome[0] == "stopped"
    return AfterChirp(end_velocity=ch.end_velocity, release_position=z0, hold_velocity_loss=losses[0],
                      return_velocity_loss=losses[1], arrival_velocity=0.0 if stop else max(state[1], 0.0),
                      stopped=stop, stop_time=outcome[1] - t_end if stop else None)
