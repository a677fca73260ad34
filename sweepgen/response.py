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
response to a sampled drive is exact at the sample instants when ``H`` is
discretised with a zero-order hold (:meth:`Response.discrete`, one matrix
exponential). The sweep repeats forever, so what the laser does is the periodic
steady state: the circular convolution of one period of the drive with the
impulse response, computed exactly through the discrete Fourier transform
(:meth:`Response.steady_state`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sweepgen._config import Section
from sweepgen.errors import InputError

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
    def state_space(self):
        """``(A, B)`` of ``x' = A x + B u`` with output ``y = x[0]``, every entry a rate (1/s).

        First order: ``A = [[−ω_c]]``, ``B = [[ω_c]]``. Second order, state
        ``(y, y'/ω_0)``: ``A = ω_0 [[0, 1], [−1, −1/Q]]``, ``B = ω_0 [[0], [1]]``
        (the companion form of ``H(s)``, scaled so that neither entry dwarfs the other).
        """
        if self.model == "first-order":
            wc = 2.0 * math.pi * self.corner
            return np.array([[-wc]]), np.array([[wc]])
        if self.model == "second-order":
            w0 = 2.0 * math.pi * self.resonance
            return w0 * np.array([[0.0, 1.0], [-1.0, -1.0 / self.q]]), w0 * np.array([[0.0], [1.0]])
        return np.zeros((0, 0)), np.zeros((0, 1))

    def zero_order_hold(self, sample_rate: float):
        """``(D, E)``: how the state changes over one held sample, ``x_{n+1} − x_n = D x_n + E u_n``.

        With ``T = 1/sample_rate`` and ``X = AT``: ``D = e^X − I = X φ(X)`` and
        ``E = ∫_0^T e^{As} ds B = T φ(X) B``, ``φ(X) = Σ X^k/(k+1)!``, read from one
        matrix exponential ``exp([[X, I], [0, 0]]) = [[e^X, φ(X)], [0, I]]`` (C. F.
        Van Loan, IEEE Trans. Autom. Control 23, 395 (1978)). Written as changes,
        ``D`` and ``E`` keep their relative accuracy however fast the sampling (``e^X``
        itself rounds towards I, and with it the discrete filter's coefficients).
        """
        from scipy.linalg import expm

        A, B = self.state_space()
        n = A.shape[0]
        x = A / sample_rate
        block = np.zeros((2 * n, 2 * n))
        block[:n, :n], block[:n, n:] = x, np.eye(n)
        phi = expm(block)[:n, n:]
        return x @ phi, (phi @ B)[:, 0] / sample_rate

    def frequency_response(self, theta, sample_rate: float):
        """``H(e^{iθ})`` of the zero-order-hold discretisation at ``sample_rate``, at angles ``θ``
        (rad per sample): ``C (zI − A_d)⁻¹ B_d = C (wI − D)⁻¹ E`` with ``w = z − 1 =
        −2 sin²(θ/2) + i sin θ``, accurate near θ = 0 (see :meth:`zero_order_hold`)."""
        theta = np.asarray(theta, dtype=float)
        if self.model == "none":
            return np.ones(theta.shape, dtype=complex)
        d, e = self.zero_order_hold(sample_rate)
        w = np.empty(theta.shape, dtype=complex)
        w.real = np.sin(0.5 * theta)
        w.real *= w.real
        w.real *= -2.0
        w.imag = np.sin(theta)
        if d.shape[0] == 1:
            return e[0] / (w - d[0, 0])
        # C = (1, 0): the first row of adj(wI − D), over det(wI − D) = w² − w tr D + det D
        numerator = w * e[0]
        numerator += d[0, 1] * e[1] - d[1, 1] * e[0]
        denominator = w - (d[0, 0] + d[1, 1])
        denominator *= w
        denominator += d[0, 0] * d[1, 1] - d[0, 1] * d[1, 0]
        numerator /= denominator
        return numerator

    def preshape(self, wanted, sample_rate: float, reference: "Response"):
        """The drive whose periodic steady-state response (:meth:`steady_state`) is ``reference``'s
        response to ``wanted`` (both sampled at ``sample_rate``, one period).

        :meth:`steady_state` multiplies the drive's DFT by ``H(e^{iθ_k})``; this
        divides by it: ``U_k = F(e^{iθ_k}) / H(e^{iθ_k}) · Y_k`` with ``F`` the
        reference's (Oppenheim and Schafer, ch. 8). The reference, faster than
        this response and of at least its order, keeps ``|F/H|`` bounded: the
        bandwidth the drive may use (:mod:`sweepgen.preshape`).
        """
        y = np.asarray(wanted, dtype=float)
        if self.model == "none" or y.size == 0:
            return reference.steady_state(y, sample_rate)
        y0 = float(y[0])
        spectrum = np.fft.rfft(y - y0)
        theta = np.arange(spectrum.size) * (2.0 * math.pi / y.size)
        spectrum *= reference.frequency_response(theta, sample_rate)
        spectrum /= self.frequency_response(theta, sample_rate)
        u = np.fft.irfft(spectrum, y.size)
        u += y0
        return u

    def steady_state(self, x, sample_rate: float):
        """The response, at the sample instants, to the sampled drive ``x`` held between samples
        and repeated forever: the periodic steady state over one period.

        A repeating input meets the impulse response in a circular convolution,
        so the discrete Fourier transform of the output is ``H(e^{iθ_k}) X_k`` at
        ``θ_k = 2πk/N`` (the convolution property of the DFT: A. V. Oppenheim and
        R. W. Schafer, *Discrete-Time Signal Processing*, ch. 8), with ``H`` from
        :meth:`frequency_response`. The drive's first value is taken off first
        (the DC gain is one), which keeps large offsets out of the transform.
        """
        x = np.asarray(x, dtype=float)
        if self.model == "none" or x.size == 0:
            return x.copy()
        x0 = float(x[0])
        spectrum = np.fft.rfft(x - x0)
        spectrum *= self.frequency_response(np.arange(spectrum.size) * (2.0 * math.pi / x.size), sample_rate)
        y = np.fft.irfft(spectrum, x.size)
        y += x0
        return y


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
    except InputError:
        raise
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


#: Largest number of points simulated per period (2 MiB per array). Beyond it the drive is
#: simulated at the played rate divided by a whole number: the laser then follows a coarser
#: hold staircase and differs by about one simulated sample's detuning step (|dΔ/dt| over
#: the simulated rate, at least 2^18 samples per period), far below a tracking tolerance
#: (a fraction of the lag detuning).
MAX_SIM_POINTS = 1 << 18


def simulation_grid(period: float, sample_rate: float, max_points: int = MAX_SIM_POINTS) -> tuple[int, float]:
    """``(n, rate)``: the points of one period and their sample rate, as :func:`track` simulates them
    (the played rate, divided by a whole number beyond ``max_points`` points; at least two points)."""
    n = int(round(period * sample_rate))
    sim_sample_rate = sample_rate
    if n > max_points:
        step = math.ceil(n / max_points)
        sim_sample_rate = sample_rate / step
        n = int(round(period * sim_sample_rate))
    return max(n, 2), sim_sample_rate


def track(schedule, chain, response: Response, sample_rate: float, *, quant=None,
          max_points: int = MAX_SIM_POINTS, planned=None) -> Tracking:
    """How the laser tracks one period of ``schedule`` played at ``sample_rate`` through ``chain``
    and ``response``.

    The drive is the chain's drive for the planned detuning at each sample
    (quantised to the generator's codes when ``quant`` is given, see
    :mod:`sweepgen.sampling`), held between samples, filtered by the response
    in its periodic steady state, and mapped back to detuning with the chain's
    inverse. The response is applied to the drive at the actuator (the one
    place where the profile states it). ``planned`` (a schedule) is what the
    laser should do when ``schedule`` is not the plan itself (a pre-shaped
    drive, :mod:`sweepgen.preshape`); by default ``schedule``.
    """
    n, sim_sample_rate = simulation_grid(schedule.period, sample_rate, max_points)
    t = np.arange(n) / sim_sample_rate
    commanded = schedule.sampled(sim_sample_rate)(0, n)
    drive = chain.to_drive(commanded)
    planned = commanded if planned is None else planned.sampled(sim_sample_rate)(0, n)
    if quant is not None:
        from sweepgen.sampling import codes_to_drive, drive_to_codes

        drive = codes_to_drive(drive_to_codes(drive, quant), quant)
    played = response.steady_state(drive, sim_sample_rate)
    actual = chain.to_detuning(played)
    return Tracking(time=t, planned=planned, drive=drive, actual=actual, sample_rate=sim_sample_rate)


def preview_sample_rate(response: Response, period: float) -> float:
    """A simulation sample rate for an actuator not tied to a generator: 1000 points per response time
    constant (10^4 per period for an ideal actuator), at most :data:`MAX_SIM_POINTS` per period."""
    tau = response.time_constant or period / 1e4
    return min(1000.0 / tau, MAX_SIM_POINTS / period)
