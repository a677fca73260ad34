"""Render the sweep: the schedule sampled at the generator's sample rate, as generator codes.

:func:`render` returns a :class:`sweepgen.table.RenderedTable` whose codes are
computed chunk by chunk when a driver iterates it, so memory does not grow with
the table's length. Sample ``i`` plays at ``t_i = i / sample_rate`` from the table's first sample
(``info.delay + t_i`` after the trigger edge, the axis written tables state):

* for ``i < period_count`` (one period of the schedule) the optical detuning
  ``Δ(t_i)`` comes from :class:`sweepgen.schedule.Schedule`, the drive from the
  laser's tuning chain (``chain.to_drive``), the code from the generator's
  quantisation (:func:`sweepgen.sampling.drive_to_codes`: DAC codes, or DDS
  frequency tuning words);
* the samples from ``period_count`` to ``count`` pad the table to the
  generator's record granularity with the first sample, so that the table
  loops without a jump.

Safety: the drive range of the whole period is found exactly by
:func:`drive_range` (the schedule is a piecewise cubic: its extremes lie at
piece boundaries or at roots of its derivative, and the chain is monotone; the
playback service computes it once), and before anything is iterated a table
whose drive would leave the actuator's safe input range or the
generator's output range is refused with :class:`CheckFailed`; nothing is
ever clipped. Every chunk is checked again as it is computed.
"""

from __future__ import annotations


import numpy as np

from sweepgen import __version__
from sweepgen.errors import CheckFailed
from sweepgen.schedule import SampledPolynomial
from sweepgen.table import Frame, RenderedTable, TableInfo

#: a chain is written to the sidecar as linear when a straight line reproduces it within this fraction of a code step
LINEAR_TOLERANCE = 1e-3
#: target accuracy of the code -> detuning lookup of a non-linear chain, as a fraction of the local code step
LOOKUP_TOLERANCE = 0.1
#: the codes' polynomial of time agrees with the chain within this fraction of a code step
TABLE_TOLERANCE = 1e-3
#: samples computed at a time (the temporaries, 256 KiB each, stay in the processor's cache)
BLOCK = 1 << 15


# ---------------------------------------------------------------------------------------------
# Exact range of the schedule over one period
# ---------------------------------------------------------------------------------------------
def detuning_extremes(schedule) -> tuple[float, float]:
    """Smallest and largest detuning of the schedule over one period (Hz).

    The schedule is a piecewise polynomial (``Schedule.coefficients``); on each
    piece the extremes lie at its ends or where its derivative vanishes
    (elementary calculus). The derivative of a cubic is a quadratic, whose real
    roots inside the piece come from the quadratic formula in its form without
    cancellation (W. H. Press et al., *Numerical Recipes*, 3rd ed., §5.6).
    Pieces are taken as PPoly takes them: the first and last extend beyond the
    breakpoints, and only what lies in ``[0, period]`` counts.
    """
    x, c = schedule.breakpoints, schedule.coefficients
    if c.shape[0] > 4:
        raise ValueError("the schedule's pieces are of degree above three")
    c = np.vstack([np.zeros((4 - c.shape[0], c.shape[1])), c])            # as cubics
    k = np.arange(c.shape[1])
    lo = np.maximum(np.where(k == 0, -np.inf, x[:-1]), 0.0) - x[:-1]        # the piece's part of the period,
    hi = np.minimum(np.where(k == k[-1], np.inf, x[1:]), schedule.period) - x[:-1]   # as offsets into it
    keep = lo <= hi
    a, b, q0 = 3.0 * c[0], 2.0 * c[1], c[2]                                  # derivative a s² + b s + q0
    with np.errstate(divide="ignore", invalid="ignore"):
        disc = b * b - 4.0 * a * q0
        q = -0.5 * (b + np.copysign(np.sqrt(disc), b))
        roots = np.stack([np.where(a != 0, q / a, -q0 / b), np.where(a != 0, q0 / q, np.nan)])
    roots[:, disc < 0] = np.nan
    offsets = np.concatenate([lo, hi, *roots])
    pieces = np.tile(k, 2 + len(roots))
    inside = np.tile(keep, 2 + len(roots)) & (offsets >= np.tile(lo, 2 + len(roots))) & (
        offsets <= np.tile(hi, 2 + len(roots)))
    values, _ = _piece_values(c, pieces[inside], offsets[inside])
    return float(values.min()), float(values.max())


def drive_range(schedule, chain) -> tuple[float, float]:
    """Smallest and largest drive over one period (drive units); the chain is monotone."""
    lo, hi = detuning_extremes(schedule)
    ends = np.asarray(chain.to_drive(np.array([lo, hi])), dtype=float)
    return float(ends.min()), float(ends.max())


# ---------------------------------------------------------------------------------------------
# Safety
# ---------------------------------------------------------------------------------------------
def _finding(rule, value, limit, unit, message) -> dict:
    return {"rule": rule, "status": "fail", "value": value, "limit": limit, "unit": unit, "message": message}


def output_range(generator) -> tuple[float, float, str]:
    """The generator's output range expressed at the actuator input (drive units)."""
    out = generator.output
    if out.kind == "voltage":
        k = out.delivered_factor
        lo, hi = sorted((out.range_min * k, out.range_max * k))
        return lo, hi, "V"
    return out.range_min, out.range_max, "Hz"


def safety_findings(lo: float, hi: float, laser, generator, unit: str) -> list[dict]:
    """Failed findings for a drive range ``[lo, hi]`` outside the safe input or the output range."""
    found = []
    lim = laser.limits
    if lo < lim.input_min or hi > lim.input_max:
        found.append(_finding(
            "render.safe_input", [lo, hi], [lim.input_min, lim.input_max], unit,
            f"the drive would span {lo:.6g}..{hi:.6g} {unit}, outside the actuator's safe input range "
            f"{lim.input_min:.6g}..{lim.input_max:.6g} {unit} (laser profile, limits.input_min/input_max); "
            f"no table is written"))
    olo, ohi, ounit = output_range(generator)
    if lo < olo or hi > ohi:
        found.append(_finding(
            "render.output_range", [lo, hi], [olo, ohi], ounit,
            f"the drive would span {lo:.6g}..{hi:.6g} {unit}, outside what the generator delivers at the "
            f"actuator ({olo:.6g}..{ohi:.6g} {ounit}: output range at its load); no table is written"))
    return found


def _refuse(findings):
    raise CheckFailed("; ".join(f["message"] for f in findings), findings)


# ---------------------------------------------------------------------------------------------
# code -> detuning, for sidecars
# ---------------------------------------------------------------------------------------------
def detuning_scaling(chain, q, code_lo: int, code_hi: int) -> dict:
    """How a reader turns codes back into optical detuning (Hz), or into the level a gate's or a
    marker's chain takes (``chain.input``; its table's ``level`` scaling).

    Linear when a straight line through the ends reproduces ``chain.to_detuning``
    within :data:`LINEAR_TOLERANCE` of a code step everywhere in ``[code_lo,
    code_hi]``; otherwise a lookup ``(code, detuning)`` on a grid refined until
    ``numpy.interp`` is within :data:`LOOKUP_TOLERANCE` of the local code step
    (at worst every code is a grid point and the lookup is exact).
    """
    def det(code):
        return np.asarray(chain.to_detuning(q.code_offset + q.code_scale * np.asarray(code, dtype=float)),
                          dtype=float)

    code_lo, code_hi = int(code_lo), int(code_hi)
    if code_hi <= code_lo:
        code_hi = code_lo + 1
    span = code_hi - code_lo
    grid = np.linspace(code_lo, code_hi, min(span + 1, 4097))
    values = det(grid)
    scale = (values[-1] - values[0]) / span
    offset = values[0] - scale * code_lo
    step = abs(scale)
    dev = float(np.max(np.abs(values - (offset + scale * grid))))
    if step > 0 and dev <= LINEAR_TOLERANCE * step:
        return {"kind": "linear", "offset": float(offset), "scale": float(scale), "step": step,
                "max_error": dev}
    n = 257
    while True:
        n = min(n, span + 1)
        grid = np.unique(np.round(np.linspace(code_lo, code_hi, n)))
        values = det(grid)
        mid = 0.5 * (grid[:-1] + grid[1:])
        err = np.abs(np.interp(mid, grid, values) - det(mid))
        local = np.abs(np.diff(values) / np.diff(grid))          # Hz per code on each interval
        if n >= span + 1 or np.all(err <= LOOKUP_TOLERANCE * local):
            exact = n >= span + 1
            return {"kind": "lookup", "code": grid.astype(np.int64).tolist(), "detuning": values.tolist(),
                    "max_error": 0.0 if exact else float(err.max()), "step": float(local.min())}
        n = 2 * n - 1


# ---------------------------------------------------------------------------------------------
# The codes as a piecewise polynomial of time
# ---------------------------------------------------------------------------------------------
def code_polynomial(schedule, chain, q):
    """The codes before rounding, ``u(t) = (drive(Δ(t)) − code_offset) / code_scale``, as a piecewise
    polynomial of time over one period: ``(x, c, description)`` in the layout of
    :class:`sweepgen.schedule.SampledPolynomial`, or ``(None, None, "exact")``.

    Rendering then costs one polynomial per sample whatever the chain. A chain
    that is a straight line over the sweep (within :data:`TABLE_TOLERANCE` of a
    code) maps the schedule's coefficients exactly. A curved one (a calibrated
    stage, whose exact inverse takes Newton iterations) is followed by cubic
    Hermite pieces in time, matching ``u`` and ``du/dt = gain(Δ) Δ'(t) /
    code_scale`` at their ends; each of the schedule's pieces is halved until
    every piece's midpoint, where a Hermite cubic's error peaks, is within the
    tolerance. When 2^20 pieces are not enough, ``"exact"``: every sample goes
    through the chain.
    """
    det_lo, det_hi = detuning_extremes(schedule)
    x, c = schedule.breakpoints, schedule.coefficients
    if det_hi > det_lo:
        probe = np.linspace(det_lo, det_hi, 4097)
        drive = np.asarray(chain.to_drive(probe), dtype=float)
        slope = (drive[-1] - drive[0]) / (det_hi - det_lo)
        line = drive[0] + slope * (probe - det_lo)
        if np.max(np.abs(drive - line)) > TABLE_TOLERANCE * abs(q.code_scale):
            return _hermite_codes(schedule, chain, q)
        intercept = drive[0] - slope * det_lo
    else:
        slope, intercept = 0.0, float(np.asarray(chain.to_drive(np.array([det_lo])))[0])
    c = c * (slope / q.code_scale)
    c[-1] += (intercept - q.code_offset) / q.code_scale
    return x, c, "linear"


def _piece_values(c, k, s):
    """Value and slope of pieces ``k`` of the coefficients ``c`` at offsets ``s`` into them."""
    value, slope = c[0, k], np.zeros_like(s)
    for m in range(1, c.shape[0]):
        slope = slope * s + value
        value = value * s + c[m, k]
    return value, slope


def _hermite_codes(schedule, chain, q, limit: int = 1 << 20):
    x, c = schedule.breakpoints, schedule.coefficients
    width = np.diff(x)
    tol = TABLE_TOLERANCE

    def codes_at(k, s):
        det, rate = _piece_values(c, k, s)
        u = (np.asarray(chain.to_drive(det), dtype=float) - q.code_offset) / q.code_scale
        return u, np.asarray(chain.gain(det), dtype=float) * rate / q.code_scale

    parts = np.ones(width.size, dtype=np.int64)
    while parts.sum() <= limit:
        k = np.repeat(np.arange(width.size), parts)                    # piece of each Hermite cubic
        h = width[k] / parts[k]
        s0 = (np.arange(k.size) - np.repeat(np.cumsum(parts) - parts, parts)) * h
        u0, d0 = codes_at(k, s0)
        u1, d1 = codes_at(k, s0 + h)
        cubic = np.stack([(d0 + d1 - 2.0 * (u1 - u0) / h) / h ** 2, (3.0 * (u1 - u0) / h - 2.0 * d0 - d1) / h,
                          d0, u0])
        exact, _ = codes_at(k, s0 + 0.5 * h)
        half = 0.5 * h
        error = np.abs(((cubic[0] * half + cubic[1]) * half + cubic[2]) * half + cubic[3] - exact)
        worst = np.zeros(width.size)
        np.maximum.at(worst, k, error)
        if np.all(worst <= tol):
            breaks = np.append(x[k] + s0, x[-1])
            return breaks, cubic, f"piecewise cubic in time ({k.size} pieces, within {worst.max():.2g} code)"
        parts[worst > tol] *= 2
    return None, None, "exact"


# ---------------------------------------------------------------------------------------------
# Render
# ---------------------------------------------------------------------------------------------
def render(playing, *, digest: str = "", delay: float = 0.0) -> RenderedTable:
    """The table of generator codes for one period of what ``playing`` plays, streamed in chunks.

    Parameters
    ----------
    playing : sweepgen.playback.ChannelPlayback
        The schedule (detuning in Hz versus time over one period), the laser
        (its chain maps detuning to drive; ``limits.input_min/max`` is the
        actuator's safe input range), the generator, and what the playback
        service chose for them: the exact drive range, the sample rate and
        lengths, the quantisation.
    digest : str
        The scenario's digest, for the sidecar.
    delay : float
        s from the trigger edge to the first sample (``timing.delay``): the
        table's ``info.delay``, where written tables put their time axis.

    Returns
    -------
    RenderedTable
        Codes (``info.dtype``) for ``info.count`` samples: ``info.period_count``
        samples of one period, then copies of the first sample.

    Raises
    ------
    CheckFailed
        No sample rate or code window was found, or the drive would leave the
        actuator's safe input range or the generator's output range (also
        raised mid-stream by the chunk check).
    """
    choice = playing.rate_choice
    if choice is None:
        raise CheckFailed(playing.rate_refusal or "no sample rate plays this sweep")
    sample_rate, period_count, count = float(choice.sample_rate), int(choice.period_count), int(choice.count)
    if not (0 < period_count <= count):
        raise ValueError(f"inconsistent sample-rate choice: period_count={period_count}, count={count}")
    q, code_lo, code_hi = _safe_codes(playing)
    chain = playing.laser.chain
    source = PeriodFrames(playing.schedule, chain, q, sample_rate, period_count)
    choice_doc = {"sample_rate": sample_rate, "period_count": period_count, "count": count,
                  "limited_by": getattr(choice, "limited_by", None), "reason": _rate_reason(playing)}
    extra = {
        "period": playing.schedule.period,
        "sampling": choice_doc,
        "chain": {"description": chain.describe(), "drive_unit": chain.drive_unit, "stages": chain.info(),
                  "evaluation": source.evaluation},
        "quantisation": _quantisation_doc(q),
        "drive_range": list(playing.drive_range),
        "code_range": [code_lo, code_hi],
        "safe_range": [playing.laser.limits.input_min, playing.laser.limits.input_max],
        f"{playing.quantity}_scaling": detuning_scaling(chain, q, code_lo, code_hi),
    }
    if getattr(playing, "preshaped", None) is not None:
        extra["preshape"] = playing.preshaped.to_json()
    info = TableInfo(sample_rate=sample_rate, count=count, period_count=period_count, dtype=np.dtype(q.dtype).str,
                     output=playing.generator.output.kind, drive_unit=chain.drive_unit,
                     code_scale=float(q.code_scale), code_offset=float(q.code_offset), amplitude=q.amplitude,
                     offset=q.offset, channel=playing.output, scenario_digest=digest, tool_version=__version__,
                     extra=extra, quantity=playing.quantity, delay=float(delay))
    return RenderedTable(info, source, codes=source.codes)


def _safe_codes(playing):
    """``(quantisation, lowest code, highest code)``, refusing any drive outside the safe input
    or output range, before and after the codes are rounded."""
    from sweepgen import sampling

    laser, gen, unit = playing.laser, playing.generator, playing.drive_unit
    lo, hi = playing.drive_range
    found = safety_findings(lo, hi, laser, gen, unit)
    if found:
        _refuse(found)
    q = playing.quantisation
    if q is None:
        raise CheckFailed(playing.quantisation_refusal or "no code window plays this drive")
    end_codes = sampling.drive_to_codes(np.array([lo, hi]), q)
    qd = q.code_offset + q.code_scale * end_codes.astype(float)
    found = safety_findings(float(qd.min()), float(qd.max()), laser, gen, unit)
    if found:
        _refuse(found)
    code_lo, code_hi = sorted(int(c) for c in end_codes)
    return q, code_lo, code_hi


def _quantisation_doc(q) -> dict:
    return {"dtype": np.dtype(q.dtype).str, "bits": int(q.bits),
            "full_min": -int(q.full_scale) if q.output == "voltage" else 0,
            "full_max": int(q.full_scale),
            "code_min": int(q.code_min), "code_max": int(q.code_max),
            "code_scale": float(q.code_scale), "code_offset": float(q.code_offset),
            "amplitude": q.amplitude, "offset": q.offset,
            "delivered_factor": float(q.delivered_factor)}


class PeriodFrames:
    """The samples of a table: one period at ``sample_rate``, then copies of the first sample.

    :meth:`codes` gives the codes alone (what most drivers write); calling the
    object gives a whole :class:`sweepgen.table.Frame` (time, detuning, drive,
    codes). Both work in blocks of :data:`BLOCK` samples that stay in the
    processor's cache, from :func:`code_polynomial`: one polynomial per sample
    for the codes, rounded, checked against the code window (a value outside it
    raises :class:`CheckFailed` instead of being clipped) and cast.
    """

    def __init__(self, schedule, chain, q, sample_rate: float, period_count: int):
        from sweepgen import sampling

        self._to_codes = sampling.drive_to_codes
        self.chain, self.q, self.period_count = chain, q, period_count
        self.detuning = schedule.sampled(sample_rate)
        x, c, self.evaluation = code_polynomial(schedule, chain, q)
        self.unrounded = None if x is None else SampledPolynomial(x, c, sample_rate, schedule.period)
        self.first_detuning = float(schedule.detuning(0.0))
        self.first_drive = float(np.asarray(chain.to_drive(np.array([self.first_detuning])))[0])
        self.first_code = self._to_codes(np.array([self.first_drive]), q)[0]
        self.sample_rate = sample_rate
        self.dtype = np.dtype(q.dtype)

    def _block(self, start: int, stop: int, codes, detuning=None, drive=None) -> None:
        """Samples ``start .. stop − 1`` of the period into ``codes`` (and ``detuning``, ``drive``)."""
        q = self.q
        if detuning is not None:
            self.detuning(start, stop, out=detuning)
        if self.unrounded is None:                                     # every sample through the chain
            d = self.chain.to_drive(detuning if detuning is not None else self.detuning(start, stop))
            codes[:] = self._to_codes(d, q)
            if drive is not None:
                drive[:] = d
            return
        u = self.unrounded(start, stop)
        if drive is not None:
            np.multiply(u, q.code_scale, out=drive)
            drive += q.code_offset
        np.rint(u, out=u)
        lo, hi = u.min(), u.max()
        if not (q.code_min <= lo and hi <= q.code_max):              # NaN fails here too
            self._to_codes(q.code_offset + q.code_scale * u, q)       # raises CheckFailed with the sample
        codes[:] = u

    def codes(self, start: int, stop: int) -> np.ndarray:
        """The codes of samples ``start .. stop − 1`` (``info.dtype``)."""
        codes = np.empty(stop - start, dtype=self.dtype)
        inner = max(0, min(stop, self.period_count) - start)
        for a in range(0, inner, BLOCK):
            b = min(a + BLOCK, inner)
            self._block(start + a, start + b, codes[a:b])
        codes[inner:] = self.first_code                               # padding: the first sample again
        return codes

    def __call__(self, start: int, stop: int) -> Frame:
        n = stop - start
        time = np.arange(start, stop, dtype=np.float64)
        time /= self.sample_rate
        detuning, drive, codes = np.empty(n), np.empty(n), np.empty(n, dtype=self.dtype)
        inner = max(0, min(stop, self.period_count) - start)
        for a in range(0, inner, BLOCK):
            b = min(a + BLOCK, inner)
            self._block(start + a, start + b, codes[a:b], detuning[a:b], drive[a:b])
        detuning[inner:] = self.first_detuning
        drive[inner:] = self.first_drive
        codes[inner:] = self.first_code
        return Frame(start, time, detuning, drive, codes)


def _rate_reason(playing) -> str | None:
    """Why the table has its sample rate: the choice's own reason for the main light; for a further
    output the main light's choice, which every output of a scenario shares (they play in step)."""
    from sweepgen.channels import MAIN_LIGHT

    reason = getattr(playing.rate_choice, "reason", None)
    if playing.name == MAIN_LIGHT or reason is None:
        return reason
    return f"the main light's rate, which every output of the scenario shares (they play in step): {reason}"
