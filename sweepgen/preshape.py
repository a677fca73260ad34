"""The pre-shaped drive: what to play so that a slow actuator's response follows the plan.

A slow actuator lags behind its drive (a first-order response by the chirp
rate times its time constant, :meth:`sweepgen.response.Response.ramp_lag`).
With ``[drive] preshape = true`` the playback service plays instead the drive
whose modelled response follows the plan:

* the wanted response is the plan's drive ``y`` (the chain's drive for the
  planned detuning) on the grid the tracking rule simulates (the played sample
  rate, or that rate divided by a whole number for very long periods), passed
  through a *reference* response much faster than the actuator: first order
  with corner ``B`` for a first-order actuator, critically damped second order
  with resonance ``B`` for a second-order one (so that the ratio of the two
  stays bounded at high frequencies: the bandwidth the drive may use);
* the drive is ``u = F/H · y`` in the periodic steady state of the
  zero-order-hold models, ``U_k = F(e^{iθ_k}) / H(e^{iθ_k}) · Y_k`` at
  ``θ_k = 2πk/N`` (the inverse of :meth:`Response.steady_state`, whose DFT
  relation it divides; A. V. Oppenheim and R. W. Schafer, *Discrete-Time
  Signal Processing*, ch. 8). Through the actuator it gives ``F·y``: the plan
  followed with the reference's far smaller lag, ``B/f_c`` times smaller for
  first order.

``B`` is ``[drive] preshape_bandwidth``, by default :data:`BANDWIDTH_FACTOR`
times the actuator's own corner or resonance and at most
:data:`NYQUIST_FRACTION` of the simulated sample rate. The pre-shaped drive,
mapped back through the chain's inverse, becomes a
:class:`sweepgen.schedule.Schedule` (piecewise linear between the grid's
samples, the plan's segments), so that every later stage (drive range, safe
input range, sample rate, quantisation, rendering, tracking, the simulation)
reads it exactly as it reads a plan: a pre-shaped drive that would leave the
actuator's safe input range, or the generator's output range, is refused like
any other. The tracking rule compares the actuator's response with the plan,
and reports the tracking without pre-shaping beside it.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from sweepgen.errors import CheckFailed

#: the default reference bandwidth, in units of the actuator's corner (first order) or resonance (second)
BANDWIDTH_FACTOR = 10.0
#: the reference bandwidth is at most this fraction of the simulated sample rate
NYQUIST_FRACTION = 0.05


@dataclass(frozen=True)
class PreShaped:
    """A pre-shaped drive: the plan, the schedule that commands it, and how it was made (SI units)."""

    planned: object            # sweepgen.schedule.Schedule, the plan's
    schedule: object           # sweepgen.schedule.Schedule, chain.to_detuning of the pre-shaped drive
    bandwidth: float           # Hz, the reference response's corner / resonance
    sample_rate: float         # Sa/s of the grid it was computed on
    reference: object          # sweepgen.response.Response

    def to_json(self) -> dict:
        return {"bandwidth": self.bandwidth, "sample_rate": self.sample_rate,
                "reference_model": self.reference.model}


def default_bandwidth(response, sample_rate: float) -> float:
    """:data:`BANDWIDTH_FACTOR` × the actuator's corner or resonance, at most
    :data:`NYQUIST_FRACTION` × ``sample_rate``."""
    own = response.corner if response.model == "first-order" else response.resonance
    return min(BANDWIDTH_FACTOR * own, NYQUIST_FRACTION * sample_rate)


def reference_response(response, bandwidth: float):
    """The response the pre-shaped drive gives: first order with corner ``bandwidth`` for a
    first-order actuator, critically damped (Q = 1/2) second order with resonance ``bandwidth``
    for a second-order one."""
    from sweepgen.response import Response

    if response.model == "first-order":
        return Response("first-order", corner=bandwidth)
    return Response("second-order", resonance=bandwidth, q=0.5)


def preshape(schedule, chain, response, sample_rate: float, bandwidth: float | None = None) -> PreShaped | None:
    """The pre-shaped drive of ``schedule`` played at ``sample_rate`` (module docstring); None for an
    ideal actuator (nothing to pre-shape).

    Raises :class:`CheckFailed` when the drive cannot be mapped back to a detuning (it leaves the range
    the chain is defined on)."""
    from sweepgen.response import simulation_grid

    if response.model == "none":
        return None
    n, sim_rate = simulation_grid(schedule.period, sample_rate)
    bandwidth = default_bandwidth(response, sim_rate) if bandwidth is None else float(bandwidth)
    reference = reference_response(response, bandwidth)
    wanted = chain.to_drive(schedule.sampled(sim_rate)(0, n))
    drive = response.preshape(wanted, sim_rate, reference)
    with np.errstate(all="ignore"):
        commanded = np.asarray(chain.to_detuning(drive), dtype=float)
    if not np.all(np.isfinite(commanded)):
        raise CheckFailed(f"the pre-shaped drive spans {drive.min():.6g}..{drive.max():.6g} {chain.drive_unit}, "
                          f"beyond what the tuning chain maps to a detuning; lower drive.preshape_bandwidth")
    return PreShaped(schedule, _linear_schedule(schedule, commanded, sim_rate), bandwidth, sim_rate, reference)


def _linear_schedule(planned, values, sample_rate: float):
    """A schedule through ``values`` at ``t_i = i / sample_rate``, linear in between and back to the
    first value at the period's end, with the segments of ``planned``."""
    from sweepgen.schedule import Schedule

    t = np.append(np.arange(values.size) / sample_rate, planned.period)
    v = np.append(values, values[0])
    coefficients = np.vstack([np.diff(v) / np.diff(t), v[:-1]])
    return Schedule(planned.segments, (t, coefficients), planned.period, planned.start_detuning,
                    planned.end_detuning)


def preshaped_playback(playing, drive):
    """``playing`` (a :class:`sweepgen.playback.ChannelPlayback` of the plan) with the pre-shaped
    drive in its place, when ``drive.preshape`` asks for it and a sample rate was chosen; the drive
    range and quantisation follow the new drive, the sample-rate choice stays the plan's. A drive the
    chain cannot map back leaves no quantisation (the checker fails it, the renderer refuses it)."""
    from sweepgen import sampling
    from sweepgen.render import drive_range

    laser = playing.laser
    if not drive.preshape or playing.rate_choice is None or laser.response.model == "none":
        return playing
    try:
        shaped = preshape(playing.schedule, laser.chain, laser.response, playing.rate_choice.sample_rate,
                          drive.preshape_bandwidth)
    except CheckFailed as exc:                   # refused like any drive no code window plays
        return dataclasses.replace(playing, quantisation=None, quantisation_refusal=str(exc))
    lo, hi = drive_range(shaped.schedule, laser.chain)
    quant, refusal = None, ""
    try:
        quant = sampling.quantisation(lo, hi, playing.generator, laser.chain)
    except CheckFailed as exc:
        refusal = str(exc)
    return dataclasses.replace(playing, schedule=shaped.schedule, drive_range=(lo, hi), quantisation=quant,
                               quantisation_refusal=refusal, preshaped=shaped)


def bandwidth_note(shaped) -> str:
    """One line for reports: the reference the drive was pre-shaped for."""
    ref = shaped.reference
    kind = "first-order corner" if ref.model == "first-order" else "critically damped resonance"
    return f"pre-shaped for a {kind} of {shaped.bandwidth:.4g} Hz (lag {1 / (2 * math.pi * shaped.bandwidth):.3g} s)"
