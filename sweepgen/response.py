"""How fast the laser frequency follows its actuator: the response model.

A laser profile's ``[response]`` table gives one of

* ``model = "none"``: the frequency follows the drive at once;
* ``model = "first-order"``, ``corner = "20 kHz"``: a single pole,
  ``H(s) = 1 / (1 + s/ω_c)``, ``ω_c = 2π f_c``, time constant ``τ = 1/ω_c``;
  its unit-step response is ``1 − exp(−t/τ)``;
* ``model = "second-order"``, ``resonance = "25 kHz"``, ``q = 0.8``: a damped
  resonance (a piezo), ``H(s) = ω_0² / (s² + (ω_0/Q) s + ω_0²)``.

Both are the textbook low-pass forms (e.g. K. Ogata, *Modern Control
Engineering*, ch. 5, first- and second-order systems). The DC gain is one: the
static tuning is the chain's business, the response only shapes time.

The generator holds each sample until the next (zero-order hold), so the
response to a sampled drive is computed exactly at the sample instants by
discretising ``H`` with a zero-order hold (:func:`scipy.signal.cont2discrete`)
and filtering with :func:`scipy.signal.lfilter`. The periodic steady state (the
sweep repeats forever) is exact: the filter state after one period is linear in
the state it started from, ``z_N = Φ z_0 + z_forced``, so the state that repeats
solves ``(I − Φ) z_0 = z_forced`` (linear-systems algebra; Φ has one column per
state variable, from one pass over a period of zeros each).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sweepgen._config import Section

MODELS = ("none", "first-order", "second-order")


@dataclass(frozen=True)
class Response:
    """An actuator response model (frequencies in Hz)."""

    model: str = "none"
    corner: float | None = None        # Hz, first order: -3 dB frequency
    resonance: float | None = None     # Hz, second order: undamped resonance f_0
    q: float | None = None             # second order: quality factor

    def __post_init__(self):
        if self.model not in MODELS:
            raise ValueError(f"unknown response model {self.model!r}")
        if self.model == "first-order" and not (self.corner and self.corner > 0):
            raise ValueError("a first-order response needs a corner frequency > 0")
        if self.model == "second-order" and not (self.resonance and self.resonance > 0 and self.q and self.q > 0):
            raise ValueError("a second-order response needs a resonance > 0 and q > 0")

    # -- the model -----------------------------------------------------------------
    @property
    def time_constant(self) -> float:
        """``τ = 1/(2π f_c)`` for first order, ``2Q/ω_0`` (envelope) for second order, 0 for none."""
        if self.model == "first-order":
            return 1.0 / (2.0 * math.pi * self.corner)
        if self.model == "second-order":
            return 2.0 * self.q / (2.0 * math.pi * self.resonance)
        return 0.0

    def transfer(self):
        """``(num, den)`` of ``H(s)``, highest power first (as :mod:`scipy.signal` takes them)."""
        if self.model == "first-order":
            wc = 2.0 * math.pi * self.corner
            return np.array([wc]), np.array([1.0, wc])
        if self.model == "second-order":
            w0 = 2.0 * math.pi * self.resonance
            return np.array([w0 * w0]), np.array([1.0, w0 / self.q, w0 * w0])
        return np.array([1.0]), np.array([1.0])

    def ramp_lag(self, slope: float) -> float:
        """Steady-state lag behind a ramp of slope ``slope``: ``slope·τ`` (first order),
        ``slope/(Q ω_0)`` (second order); final-value theorem on ``(1 − H(s))/s²``."""
        if self.model == "first-order":
            return slope / (2.0 * math.pi * self.corner)
        if self.model == "second-order":
            return slope / (self.q * 2.0 * math.pi * self.resonance)
        return 0.0

    def step(self, t):
        """Unit-step response at times ``t`` (s), in closed form.

        First order: ``1 − exp(−t/τ)``. Second order with ``ζ = 1/(2Q)``:
        underdamped ``1 − e^{−ζω_0 t}(cos ω_d t + ζ/√(1−ζ²) sin ω_d t)``,
        ``ω_d = ω_0 √(1−ζ²)``; critically damped ``1 − e^{−ω_0 t}(1 + ω_0 t)``;
        overdamped ``1 + (p_2 e^{p_1 t} − p_1 e^{p_2 t})/(p_1 − p_2)`` with the
        two real poles ``p_1,2`` (Ogata, *Modern Control Engineering*, §5-3).
        """
        t = np.asarray(t, dtype=float)
        pos = t >= 0
        if self.model == "none":
            return np.where(pos, 1.0, 0.0)
        if self.model == "first-order":
            tau = self.time_constant
            return np.where(pos, -np.expm1(-np.maximum(t, 0) / tau), 0.0)
        w0 = 2.0 * math.pi * self.resonance
        zeta = 1.0 / (2.0 * self.q)
        tt = np.maximum(t, 0.0)
        if abs(zeta - 1.0) < 1e-9:
            y = 1.0 - np.exp(-w0 * tt) * (1.0 + w0 * tt)
        elif zeta < 1.0:
            wd = w0 * math.sqrt(1.0 - zeta * zeta)
            y = 1.0 - np.exp(-zeta * w0 * tt) * (np.cos(wd * tt) + zeta / math.sqrt(1.0 - zeta * zeta)
                                                  * np.sin(wd * tt))
        else:
            root = math.sqrt(zeta * zeta - 1.0)
            p1, p2 = -w0 * (zeta - root), -w0 * (zeta + root)
            y = 1.0 + (p2 * np.exp(p1 * tt) - p1 * np.exp(p2 * tt)) / (p1 - p2)
        return np.where(pos, y, 0.0)

    # -- sampled signals ---------------------------------------------------------------
    def discrete(self, sample_rate: float):
        """``(b, a)`` of the zero-order-hold discretisation at ``sample_rate`` samples/s."""
        from scipy.signal import cont2discrete

        if self.model == "none":
            return np.array([1.0]), np.array([1.0])
        num, den = self.transfer()
        b, a, _ = cont2discrete((num, den), 1.0 / sample_rate, method="zoh")
        b = np.atleast_1d(np.squeeze(b))
        return b / a[0], a / a[0]

    def filter(self, x, sample_rate: float, *, periodic: bool = False):
        """Response to the sampled drive ``x`` held between samples, at the sample instants.

        Starts from rest at ``x[0]``; with ``periodic=True`` the input is taken to
        repeat forever and the periodic steady state is returned instead.
        """
        from scipy.signal import lfilter

        x = np.asarray(x, dtype=float)
        if self.model == "none" or x.size == 0:
            return x.copy()
        b, a = self.discrete(sample_rate)
        # Filter the deviation from the first value: better conditioned for large offsets.
        x0 = float(x[0])
        d = x - x0
        nz = max(len(a), len(b)) - 1
        zi = np.zeros(nz)
        if periodic and nz:
            zi = _periodic_state(b, a, d)
        y, _ = lfilter(b, a, d, zi=zi)
        return y + x0


def _periodic_state(b, a, d) -> np.ndarray:
    """The initial state of ``lfilter(b, a, ·)`` that it returns to after one period ``d``.

    The final state is ``Φ z0 + z_forced``: ``z_forced`` from a pass starting at
    rest, column ``i`` of ``Φ`` from a pass over zeros starting at unit state
    ``e_i``. For a stable filter ``I − Φ`` is invertible (every eigenvalue of Φ is
    a pole raised to the period's sample count, inside the unit circle).
    """
    from scipy.signal import lfilter

    nz = max(len(a), len(b)) - 1
    _, forced = lfilter(b, a, d, zi=np.zeros(nz))
    zeros = np.zeros_like(d)
    phi = np.column_stack([lfilter(b, a, zeros, zi=e)[1] for e in np.eye(nz)])
    return np.linalg.solve(np.eye(nz) - phi, forced)


def response_from_section(sec: Section | None) -> Response:
    """Read the ``[response]`` table of a laser profile (absent: ``model = "none"``)."""
    if sec is None:
        return Response()
    model = sec.string("model", choices=MODELS)
    try:
        if model == "first-order":
            resp = Response(model, corner=sec.quantity("corner", "Hz", positive=True, example="20 kHz"))
        elif model == "second-order":
            resp = Response(model, resonance=sec.quantity("resonance", "Hz", positive=True, example="25 kHz"),
                            q=sec.number("q", positive=True))
        else:
            resp = Response()
    except ValueError as exc:
        raise sec.error("model", str(exc)) from None
    sec.finish()
    return resp


@dataclass
class Tracking:
    """The simulated laser over one period, sampled at ``sample_rate`` (SI units)."""

    time: np.ndarray          # s
    planned: np.ndarray       # Hz, the schedule's detuning
    drive: np.ndarray         # drive units, as played (after quantisation when given)
    actual: np.ndarray        # Hz, the detuning the laser really has (chain inverse of the response)
    sample_rate: float        # samples/s of the simulation

    @property
    def error(self) -> np.ndarray:
        return self.actual - self.planned


#: Largest number of points simulated per period; beyond it the drive is simulated
#: at a lower rate (the hold staircase at such rates is far below any tolerance).
MAX_SIM_POINTS = 1 << 21


def track(schedule, chain, response: Response, sample_rate: float, *, quant=None,
          max_points: int = MAX_SIM_POINTS) -> Tracking:
    """How the laser tracks one period of ``schedule`` played at ``sample_rate`` through ``chain``
    and ``response``.

    The drive is the chain's drive for the planned detuning at each sample
    (quantised to the generator's codes when ``quant`` is given, see
    :mod:`sweepgen.sampling`), held between samples, filtered by the response
    in its periodic steady state, and mapped back to detuning with the chain's
    inverse. The response is applied to the drive at the actuator (the one
    place where the profile states it).
    """
    n = int(round(schedule.period * sample_rate))
    sim_sample_rate = sample_rate
    if n > max_points:
        step = math.ceil(n / max_points)
        sim_sample_rate = sample_rate / step
        n = int(round(schedule.period * sim_sample_rate))
    n = max(n, 2)
    t = np.arange(n) / sim_sample_rate
    planned = schedule.detuning(t)
    drive = chain.to_drive(planned)
    if quant is not None:
        from sweepgen.sampling import codes_to_drive, drive_to_codes

        drive = codes_to_drive(drive_to_codes(drive, quant), quant)
    played = response.filter(drive, sim_sample_rate, periodic=True)
    actual = chain.to_detuning(played)
    return Tracking(time=t, planned=planned, drive=drive, actual=actual, sample_rate=sim_sample_rate)


def preview_sample_rate(response: Response, period: float) -> float:
    """A simulation sample rate for an actuator not tied to a generator: 1000 points per response time
    constant (10^4 per period for an ideal actuator), at most :data:`MAX_SIM_POINTS` per period."""
    tau = response.time_constant or period / 1e4
    return min(1000.0 / tau, MAX_SIM_POINTS / period)
