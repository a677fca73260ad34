"""The tuning chain: how optical detuning becomes the generator's output.

A laser profile lists the stages from the light to the generator, in order
(``[[chain]]`` tables). Each stage maps a frequency on its upstream side (Hz: the
optical detuning for the first stage, an RF frequency further down) to a value on
its downstream side (Hz, or V for an analog input), and back. The chain composes
them: :meth:`Chain.to_drive` goes from detuning to the generator's output,
:meth:`Chain.to_detuning` back. Linear stages are exact inverses; a calibrated
stage inverts its monotone fit to machine precision.

Stages (``stage = "..."`` in the profile):

``analog``
    A linear analog input (piezo, diode-current modulation input):
    ``Δ = set_point + coefficient · (V − set_drive)``; the coefficient carries
    the tuning sign (negative for most diode-current inputs).
``calibrated``
    An analog input described by measured points ``(drive, detuning)``, fitted
    with a least-squares polynomial that must be monotone over the calibrated
    range; the fit residuals are reported. Outside the calibrated range the fit
    is continued linearly (and the checker fails a sweep that goes there).
``aom``
    An acousto-optic modulator passed ``passes`` times in diffraction order
    ``order`` (±1): ``Δ = set_point + passes · order · (f_RF − centre)``; its
    downstream side is the RF frequency.
``offset_lock``
    An offset (beat-note) lock to a reference laser at detuning ``reference``:
    beat ``f_b = sign · (Δ − reference)`` (> 0), and the lock compares
    ``f_b · multiplier / divider`` with its RF reference.
``vco``
    A voltage-controlled oscillator: RF frequency from a control voltage, linear
    (``coefficient``, ``frequency`` at ``voltage``) or calibrated from points.
``dds``
    A DDS making the RF frequency from a frequency tuning word of ``bits`` bits
    and a ``clock``: ``f = FTW · clock / 2^bits``, ``FTW = round(f · 2^bits /
    clock)`` (common practice). The chain's drive stays the DDS output frequency
    in Hz (the identity map); the words are made by the renderer, and
    :meth:`DdsStage.rounding_error` gives the error of the rounding.

Sources: the AOM frequency shift ``n · m · f_RF`` for n passes in order m and the
beat-note relation are standard laser-physics practice (e.g. C. J. Foot, *Atomic
Physics*, OUP 2005, on frequency control of lasers for cooling); the DDS word
relation is common practice.
"""

from __future__ import annotations

import abc
import math
from dataclasses import dataclass

import numpy as np

from sweepgen._config import Section
from sweepgen.errors import InputError

STAGE_KINDS = ("analog", "calibrated", "aom", "offset_lock", "vco", "dds")


@dataclass(frozen=True)
class StageRange:
    """A range one side of a stage must stay within (checked by the checker)."""

    label: str          # e.g. "AOM RF band", "calibrated range"
    quantity: str       # "upstream" | "downstream" | "beat"
    low: float
    high: float
    unit: str
    key: str            # where it was written, e.g. "chain[0].rf_max"


class Stage(abc.ABC):
    """One invertible map, upstream (Hz) <-> downstream (Hz or V)."""

    kind = "stage"
    down_unit = "Hz"

    def __init__(self, name: str):
        self.name = name

    @abc.abstractmethod
    def forward(self, x):
        """Upstream (Hz) -> downstream values."""

    @abc.abstractmethod
    def inverse(self, u):
        """Downstream -> upstream values (Hz)."""

    @abc.abstractmethod
    def derivative(self, x):
        """d(downstream)/d(upstream) at upstream values ``x``."""

    def ranges(self) -> list:
        return []

    def range_values(self, x, r: StageRange):
        """The values of ``x`` (upstream) expressed as the quantity a range limits."""
        return x if r.quantity == "upstream" else self.forward(x)

    def info(self) -> dict:
        return {"stage": self.kind, "name": self.name}


class LinearMap(Stage):
    """``upstream = set_point + coefficient · (downstream − set_drive)``."""

    def __init__(self, name, coefficient: float, set_point: float, set_drive: float, down_unit: str,
                 up_unit: str = "Hz"):
        super().__init__(name)
        if coefficient == 0 or not math.isfinite(coefficient):
            raise ValueError("coefficient must be finite and non-zero")
        self.coefficient = float(coefficient)
        self.set_point = float(set_point)
        self.set_drive = float(set_drive)
        self.down_unit = down_unit
        self.up_unit = up_unit             # "Hz"; "1" where the chain maps a level (a gate's input)

    def forward(self, x):
        return self.set_drive + (np.asarray(x, dtype=float) - self.set_point) / self.coefficient

    def inverse(self, u):
        return self.set_point + self.coefficient * (np.asarray(u, dtype=float) - self.set_drive)

    def derivative(self, x):
        return np.full_like(np.asarray(x, dtype=float), 1.0 / self.coefficient)

    def info(self):
        return {**super().info(), "coefficient": self.coefficient, "set_point": self.set_point,
                "set_drive": self.set_drive, "unit": f"{self.up_unit}/{self.down_unit}"}


class AnalogStage(LinearMap):
    kind = "analog"


class Calibration:
    """A monotone polynomial ``upstream = poly(drive)`` over a calibrated drive range.

    Built from measured points (:meth:`from_points`: a profile's ``drive`` /
    ``detuning`` lists, fitted by :func:`sweepgen.calibration.fit_points`) or
    from a fit written into a profile by ``sweepgen calibrate``
    (:meth:`from_coefficients`). Outside the range the curve is continued
    linearly (and the checker fails a sweep that goes there). ``stats`` holds
    what the fit is judged by, frequencies in Hz: ``points``, ``rms_residual``,
    ``max_residual``, and for a measured calibration ``uncertainty``,
    ``outliers``, ``hysteresis``, ``method`` and where the measurements came from.

    Raises
    ------
    ValueError
        With the reason: too few points, repeated drive values, measured values
        that are not monotone, or a curve that is not monotone over the range.
    """

    GRID = 4097

    def __init__(self, poly, u_min: float, u_max: float, stats: dict | None = None):
        from sweepgen.calibration import turning_point

        self.poly = poly
        self.dpoly = poly.deriv()
        self.u_min, self.u_max = float(u_min), float(u_max)
        if not self.u_max > self.u_min:
            raise ValueError(f"the calibrated range {self.u_min:g} to {self.u_max:g} is empty")
        turn = turning_point(poly, self.u_min, self.u_max)
        if turn is not None:
            raise ValueError(f"the degree-{self.degree} fit is not monotone near drive {turn:g} (its slope "
                             f"changes sign inside the calibrated range); lower 'degree' or add points")
        self.stats = dict(stats or {})
        grid = np.linspace(self.u_min, self.u_max, self.GRID)
        slope = self.dpoly(grid)
        self.increasing = bool(slope[self.GRID // 2] > 0)
        self._grid_u = grid
        self._grid_x = poly(grid)
        self.x_lo, self.x_hi = float(poly(self.u_min)), float(poly(self.u_max))
        self.slope_lo, self.slope_hi = float(slope[0]), float(slope[-1])

    @classmethod
    def from_points(cls, drive, value, degree: int | None = None) -> "Calibration":
        """Fit measured ``(drive, value)`` points (see :func:`sweepgen.calibration.fit_points`)."""
        from sweepgen.calibration import fit_points

        fit = fit_points(drive, value, degree)
        cal = cls(fit.poly, fit.drive_min, fit.drive_max,
                  {"points": fit.points, "rms_residual": fit.residual_rms, "max_residual": fit.residual_max,
                   "method": fit.method})
        cal.residuals = fit.residuals
        return cal

    @classmethod
    def from_coefficients(cls, coefficients, u_min: float, u_max: float, stats: dict | None = None):
        """The polynomial ``sum c_k x^k``, ``x = (2u − (u_min + u_max)) / (u_max − u_min)``."""
        from numpy.polynomial import Polynomial

        poly = Polynomial(np.asarray(coefficients, dtype=float), domain=[u_min, u_max], window=[-1.0, 1.0])
        return cls(poly, u_min, u_max, stats)

    @property
    def degree(self) -> int:
        return len(self.poly.coef) - 1

    @property
    def coefficients(self) -> list:
        """Coefficients in the scaled drive ``x`` in [-1, 1] (Hz), lowest power first."""
        return [float(c) for c in self.poly.coef]

    @property
    def rms_residual(self) -> float | None:
        """RMS of the fit's residuals (Hz of the stage's upstream frequency), None if unknown."""
        return self.stats.get("rms_residual")

    @property
    def max_residual(self) -> float | None:
        return self.stats.get("max_residual")

    def value(self, u):
        """Upstream frequency at downstream values ``u`` (linear continuation outside the range)."""
        u = np.asarray(u, dtype=float)
        inner = self.poly(np.clip(u, self.u_min, self.u_max))
        below = self.x_lo + self.slope_lo * (u - self.u_min)
        above = self.x_hi + self.slope_hi * (u - self.u_max)
        return np.where(u < self.u_min, below, np.where(u > self.u_max, above, inner))

    def slope(self, u):
        u = np.asarray(u, dtype=float)
        inner = self.dpoly(np.clip(u, self.u_min, self.u_max))
        return np.where(u < self.u_min, self.slope_lo, np.where(u > self.u_max, self.slope_hi, inner))

    def drive(self, x):
        """Downstream values giving upstream ``x``: the exact inverse of :meth:`value`."""
        x = np.asarray(x, dtype=float)
        gx, gu = (self._grid_x, self._grid_u) if self.increasing else (self._grid_x[::-1], self._grid_u[::-1])
        u = np.interp(x, gx, gu)
        for _ in range(4):                                   # Newton polish on the polynomial
            u = u - (self.value(u) - x) / self.slope(u)
        lo = self.u_min + (x - self.x_lo) / self.slope_lo
        hi = self.u_max + (x - self.x_hi) / self.slope_hi
        if self.increasing:
            return np.where(x < self.x_lo, lo, np.where(x > self.x_hi, hi, u))
        return np.where(x > self.x_lo, lo, np.where(x < self.x_hi, hi, u))


class CalibratedMap(Stage):
    """A stage whose upstream frequency is a calibrated monotone function of the drive."""

    def __init__(self, name, calibration: Calibration, down_unit: str, key: str):
        super().__init__(name)
        self.calibration = calibration
        self.down_unit = down_unit
        self._key = key

    def forward(self, x):
        return self.calibration.drive(x)

    def inverse(self, u):
        return self.calibration.value(u)

    def derivative(self, x):
        return 1.0 / self.calibration.slope(self.forward(x))

    def ranges(self):
        c = self.calibration
        return [StageRange(f"{self.name}: calibrated range", "downstream", c.u_min, c.u_max,
                           self.down_unit, self._key)]

    def info(self):
        c = self.calibration
        doc = {**super().info(), "degree": c.degree, "coefficients": c.coefficients,
               "range": [c.u_min, c.u_max], "range_unit": self.down_unit,
               "residual_unit": "Hz", "residual_of": self.upstream_label}
        doc.update({k: v for k, v in c.stats.items() if k not in doc})
        return doc

    #: what the stage's upstream frequency is (the residuals are in Hz of it)
    upstream_label = "optical detuning"


class CalibratedStage(CalibratedMap):
    kind = "calibrated"


class AomStage(Stage):
    """``Δ = set_point + passes · order · (f_RF − centre)``."""

    kind = "aom"

    def __init__(self, name, passes: int, order: int, centre: float, set_point: float,
                 band: tuple | None = None, key: str = ""):
        super().__init__(name)
        self.passes, self.order = int(passes), int(order)
        self.centre, self.set_point = float(centre), float(set_point)
        self.band = band
        self._key = key

    @property
    def factor(self) -> float:
        """Optical shift per hertz of RF: ``passes · order``."""
        return float(self.passes * self.order)

    def forward(self, x):
        return self.centre + (np.asarray(x, dtype=float) - self.set_point) / self.factor

    def inverse(self, u):
        return self.set_point + self.factor * (np.asarray(u, dtype=float) - self.centre)

    def derivative(self, x):
        return np.full_like(np.asarray(x, dtype=float), 1.0 / self.factor)

    def ranges(self):
        if self.band is None:
            return []
        return [StageRange(f"{self.name}: RF band", "downstream", self.band[0], self.band[1], "Hz", self._key)]

    def info(self):
        return {**super().info(), "passes": self.passes, "order": self.order, "centre": self.centre,
                "set_point": self.set_point}


class OffsetLockStage(Stage):
    """Beat ``f_b = sign · (Δ − reference)``; downstream ``f_b · multiplier / divider``."""

    kind = "offset_lock"

    def __init__(self, name, reference: float, sign: int, multiplier: int = 1, divider: int = 1,
                 beat_range: tuple | None = None, key: str = ""):
        super().__init__(name)
        self.reference = float(reference)
        self.sign = int(sign)
        self.multiplier, self.divider = int(multiplier), int(divider)
        self.beat_range = beat_range or (0.0, math.inf)
        self._key = key

    @property
    def ratio(self) -> float:
        return self.multiplier / self.divider

    def beat(self, x):
        return self.sign * (np.asarray(x, dtype=float) - self.reference)

    def forward(self, x):
        return self.beat(x) * self.ratio

    def inverse(self, u):
        return self.reference + self.sign * np.asarray(u, dtype=float) / self.ratio

    def derivative(self, x):
        return np.full_like(np.asarray(x, dtype=float), self.sign * self.ratio)

    def ranges(self):
        return [StageRange(f"{self.name}: beat note", "beat", self.beat_range[0], self.beat_range[1], "Hz",
                           self._key)]

    def range_values(self, x, r):
        return self.beat(x) if r.quantity == "beat" else super().range_values(x, r)

    def info(self):
        return {**super().info(), "reference": self.reference, "sign": self.sign,
                "multiplier": self.multiplier, "divider": self.divider}


class VcoLinear(LinearMap):
    kind = "vco"


class VcoCalibrated(CalibratedMap):
    kind = "vco"
    upstream_label = "RF frequency"


class DdsStage(Stage):
    """A DDS: the drive is its output frequency (identity); words ``round(f · 2^bits / clock)``."""

    kind = "dds"

    def __init__(self, name, clock: float, bits: int):
        super().__init__(name)
        self.clock = float(clock)
        self.bits = int(bits)

    @property
    def resolution(self) -> float:
        """Output frequency per word LSB, ``clock / 2^bits`` (Hz)."""
        return self.clock / 2.0 ** self.bits

    def word(self, f):
        """Frequency tuning word ``round(f · 2^bits / clock)`` (common practice), as uint64."""
        return np.rint(np.asarray(f, dtype=float) * (2.0 ** self.bits / self.clock)).astype(np.uint64)

    def frequency(self, word):
        return np.asarray(word, dtype=float) * self.resolution

    def rounding_error(self, f):
        """Played minus wanted frequency after rounding to a word (Hz, |·| ≤ resolution/2)."""
        return self.frequency(self.word(f)) - np.asarray(f, dtype=float)

    def forward(self, x):
        return np.asarray(x, dtype=float) + 0.0

    def inverse(self, u):
        return np.asarray(u, dtype=float) + 0.0

    def derivative(self, x):
        return np.ones_like(np.asarray(x, dtype=float))

    def ranges(self):
        return [StageRange(f"{self.name}: DDS output (below clock/2)", "downstream", 0.0, self.clock / 2,
                           "Hz", "")]

    def info(self):
        return {**super().info(), "clock": self.clock, "bits": self.bits, "resolution": self.resolution}


@dataclass
class Chain:
    """The ordered stages from optical detuning (Hz) to the generator's output (for a gate or a marker:
    from its level, ``input = "level"``)."""

    stages: tuple
    safe_min: float | None = None      # the actuator's safe input range, drive units (set by the laser)
    safe_max: float | None = None
    input: str = "optical detuning"    # what the first stage takes, in words

    def __post_init__(self):
        self.stages = tuple(self.stages)
        if not self.stages:
            raise ValueError("a chain needs at least one stage")
        for st in self.stages[:-1]:
            if st.down_unit != "Hz":
                raise ValueError(f"stage {st.name!r} ends in volts; only the last stage may")

    @property
    def drive_unit(self) -> str:
        """``"V"`` for an analog input, ``"Hz"`` for an RF frequency (played by a DDS)."""
        return self.stages[-1].down_unit

    def to_drive(self, detuning):
        """Drive values (V or Hz) for optical detunings (Hz); vectorised."""
        x = np.asarray(detuning, dtype=float)
        for st in self.stages:
            x = st.forward(x)
        return x

    def to_detuning(self, drive):
        """Optical detunings (Hz) for drive values; the inverse of :meth:`to_drive`."""
        u = np.asarray(drive, dtype=float)
        for st in reversed(self.stages):
            u = st.inverse(u)
        return u

    def gain(self, detuning):
        """d(drive)/d(detuning) at ``detuning`` (drive units per Hz), with its sign."""
        x = np.asarray(detuning, dtype=float)
        g = np.ones_like(x)
        for st in self.stages:
            g = g * st.derivative(x)
            x = st.forward(x)
        return g

    def upstream_values(self, detuning):
        """``[(stage, upstream values)]`` for every stage, for range checks."""
        x = np.asarray(detuning, dtype=float)
        out = []
        for st in self.stages:
            out.append((st, x))
            x = st.forward(x)
        return out

    @property
    def dds(self) -> DdsStage | None:
        for st in self.stages:
            if isinstance(st, DdsStage):
                return st
        return None

    def describe(self) -> str:
        return " → ".join([self.input] + [st.name for st in self.stages])

    def info(self) -> list:
        return [st.info() for st in self.stages]


# ----------------------------------------------------------------------------------
# Reading the [[chain]] tables of a laser profile
_DEFAULT_NAMES = {"analog": "analog input", "calibrated": "calibrated input", "aom": "AOM",
                  "offset_lock": "offset lock", "vco": "VCO", "dds": "DDS"}


#: keys a calibrated stage written by ``sweepgen calibrate`` may carry besides the fit itself
#: (what the fit is judged by and where it came from; reported, carried into sidecars)
RECORD_QUANTITIES = ("rms_residual", "max_residual", "uncertainty", "hysteresis")
RECORD_NUMBERS = ("points", "outliers")
RECORD_TEXTS = ("method", "measurements", "measurements_sha256", "calibrated")


def _calibration(sec: Section, drive_name: str, drive_unit: str, value_name: str) -> Calibration:
    if sec.has("coefficients"):
        return _fitted_calibration(sec, drive_unit)
    u = sec.quantities(drive_name, drive_unit, example=f"1.5 {drive_unit}")
    x = sec.quantities(value_name, "Hz", example="-120 MHz")
    degree = sec.number("degree", None, integer=True, minimum=1, maximum=7)
    try:
        return Calibration.from_points(u, x, degree)
    except ValueError as exc:
        raise sec.error(value_name, f"calibration refused: {exc}") from None


def _fitted_calibration(sec: Section, drive_unit: str) -> Calibration:
    """A fit written by ``sweepgen calibrate``: ``fit``, ``range``, ``coefficients`` and its record."""
    sec.string("fit", choices=("polynomial",))
    ends = sec.quantities("range", drive_unit, example=f"0 {drive_unit}")
    if len(ends) != 2 or not ends[1] > ends[0]:
        raise sec.error("range", f"expected [low, high], two drive values in {drive_unit} with low < high")
    lo, hi = float(ends[0]), float(ends[1])
    coef = sec.quantities("coefficients", "Hz", example="-120 MHz")
    if len(coef) < 2 or len(coef) > 8:
        raise sec.error("coefficients", f"expected 2 to 8 coefficients (degree 1 to 7), got {len(coef)}")
    stats = {k: sec.quantity(k, "Hz", None, nonnegative=True) for k in RECORD_QUANTITIES}
    stats.update({k: sec.number(k, None, integer=True, nonnegative=True) for k in RECORD_NUMBERS})
    stats.update({k: sec.string(k, None) for k in RECORD_TEXTS})
    try:
        return Calibration.from_coefficients(coef, lo, hi, {k: v for k, v in stats.items() if v is not None})
    except ValueError as exc:
        raise sec.error("coefficients", f"calibration refused: {exc}") from None


def _sign(sec: Section, name: str) -> int:
    value = sec.raw(name)
    if isinstance(value, bool) or value not in (1, -1):
        raise sec.error(name, f"expected +1 or -1, got {value!r}")
    return int(value)


def stage_from_section(sec: Section) -> Stage:
    """Build one stage from its ``[[chain]]`` table (strict: unknown keys refused)."""
    kind = sec.string("stage", choices=STAGE_KINDS)
    name = sec.string("name", _DEFAULT_NAMES[kind])
    if kind == "analog":
        coef = sec.quantity("coefficient", "Hz/V", example="-250 MHz/V")
        if coef == 0:
            raise sec.error("coefficient", "expected a non-zero tuning coefficient")
        st = AnalogStage(name, coef, sec.quantity("set_point", "Hz", example="-180 MHz"),
                         sec.quantity("set_drive", "V", 0.0, example="0 V"), "V")
    elif kind == "calibrated":
        st = CalibratedStage(name, _calibration(sec, "drive", "V", "detuning"), "V", sec.key("drive"))
    elif kind == "aom":
        passes = sec.number("passes", integer=True, minimum=1, maximum=8)
        order = _sign(sec, "order")
        centre = sec.quantity("centre", "Hz", positive=True, example="200 MHz")
        set_point = sec.quantity("set_point", "Hz", example="-450 MHz")
        band = None
        if sec.has("rf_min") or sec.has("rf_max"):
            lo = sec.quantity("rf_min", "Hz", nonnegative=True, example="150 MHz")
            hi = sec.quantity("rf_max", "Hz", positive=True, example="250 MHz")
            if not hi > lo:
                raise sec.error("rf_max", f"expected a value above rf_min ({lo:g} Hz)")
            if not lo <= centre <= hi:
                raise sec.error("centre", "expected the centre frequency inside the band rf_min..rf_max")
            band = (lo, hi)
        st = AomStage(name, passes, order, centre, set_point, band, key=sec.key("rf_min"))
    elif kind == "offset_lock":
        reference = sec.quantity("reference", "Hz", example="-1.6 GHz")
        sign = _sign(sec, "sign")
        if sec.has("multiplier") and sec.has("divider"):
            raise sec.error("divider", "give either 'multiplier' or 'divider', not both")
        mult = sec.number("multiplier", 1, integer=True, minimum=1)
        div = sec.number("divider", 1, integer=True, minimum=1)
        beat = None
        if sec.has("beat_min") or sec.has("beat_max"):
            lo = sec.quantity("beat_min", "Hz", 0.0, nonnegative=True, example="500 MHz")
            hi = sec.quantity("beat_max", "Hz", positive=True, example="3 GHz")
            if not hi > lo:
                raise sec.error("beat_max", f"expected a value above beat_min ({lo:g} Hz)")
            beat = (lo, hi)
        st = OffsetLockStage(name, reference, sign, mult, div, beat, key=sec.key("beat_min"))
    elif kind == "vco":
        # measured points: a list with something in it (an empty one is a value of the wrong type)
        if any(isinstance(sec.data.get(k), list) and sec.data.get(k) for k in ("voltage", "frequency")) \
                or sec.has("coefficients"):
            st = VcoCalibrated(name, _calibration(sec, "voltage", "V", "frequency"), "V", sec.key("voltage"))
        else:
            coef = sec.quantity("coefficient", "Hz/V", example="40 MHz/V")
            if coef == 0:
                raise sec.error("coefficient", "expected a non-zero tuning coefficient")
            st = VcoLinear(name, coef, sec.quantity("frequency", "Hz", positive=True, example="100 MHz"),
                           sec.quantity("voltage", "V", 0.0, example="0 V"), "V")
    else:  # dds
        clock = sec.quantity("clock", "Hz", positive=True, example="1 GHz")
        bits = sec.number("bits", integer=True, minimum=8, maximum=64)
        st = DdsStage(name, clock, bits)
    sec.finish()
    return st


def chain_from_sections(sections, *, file=None, key="chain") -> Chain:
    """Build a :class:`Chain` from the ``[[chain]]`` tables of a profile."""
    if not sections:
        raise InputError("expected at least one [[chain]] stage", file=file, key=key)
    stages = []
    for i, sec in enumerate(sections):
        if stages and stages[-1].down_unit != "Hz":
            raise sec.error("stage", f"stage {i - 1} ({stages[-1].name}) already ends in volts at the generator; "
                                     f"a voltage drive must be the last stage")
        st = stage_from_section(sec)
        if isinstance(st, DdsStage) and i != len(sections) - 1:
            raise sec.error("stage", "the DDS makes the generator's output; it must be the last stage")
        stages.append(st)
    return Chain(tuple(stages))
