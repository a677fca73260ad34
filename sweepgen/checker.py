"""The checker: prove a sweep is safe and playable before anything is switched on.

:func:`check` plans the scenario, maps the sweep through the laser's tuning
chain, picks the sample rate and codes for the generator, simulates the
actuator, and returns one :class:`Finding` per rule, each with the value, the
limit, the unit, the headroom and a status:

* ``fail``: the limit is exceeded;
* ``warn``: within 20 % of the limit (:data:`WARN_HEADROOM`);
* ``pass``: otherwise.

Headroom (:func:`headroom`, defined here once): how far the value may still move
towards its limit, as a fraction of the limit's own size; negative when the
limit is exceeded. For an upper limit ``(limit − value)/|limit|``, for a lower
limit ``(value − limit)/|limit|``. A range ``[lo, hi]`` is a lower and an upper
limit: the finding reports the one with the smaller headroom (its ``value`` is
the extreme nearest that edge, its ``limit`` that edge), so the headroom can be
recomputed from the value and limit printed beside it. A limit of zero has no
size: the headroom to a zero edge of a range is measured against the range's
width, and a lone upper or lower limit of zero has none (None). So a value twice
its limit reads −100 % for every kind of rule, and 8 MHz against a 5 MHz floor
reads 60 %.

Rules (``rule`` names in the JSON):

physics
    ``slowing_distance`` (fits between the light start, or the design atom's
    start for an explicit start time, and the target; a chirp that starts
    before the design atom is in the light is no rule but bad input, since
    that sweep cannot exist), ``deceleration``
    (design deceleration over the largest force the light gives where the atoms
    are, at the median distance of the atomic beam from the axis, along the
    whole path, ``a_d(z) / a_max(s(z, r_½(z)))``, at most 1; see
    :mod:`sweepgen.overlap`), ``beam_overlap`` (the fraction of the atomic beam
    finding at least the design force all along the path; warns below
    :data:`MIN_OVERLAP`), ``end_velocity`` (at most the target's capture
    velocity), ``photon_budget`` (molecules) and ``depumping`` (atoms with an
    off-resonant level): the expected fraction of the chirp's band left in the
    bright level (:mod:`sweepgen.survival`), warning below ``chirp.min_survival``
    (default 0.5); ``after_chirp`` (the velocity the hold, the return and the
    rest take from atoms leaving the chirp at the end velocity where it releases
    them, :mod:`sweepgen.afterchirp`: fails when they stop, or lose more than
    ``STOP_FRACTION`` = 0.9 of it before the target; warns above half of it),
    ``period`` (chirp start + chirp + hold + return fit in one period).
laser
    ``mode_hop_free`` (sweep span), ``chirp_rate`` and ``return_rate``
    (|dΔ/dt| during each), ``actuator_range`` (drive within the safe input
    range), ``slew_rate`` (|d drive/dt|), ``stage_range`` (each stage's own
    range: AOM band, beat note, calibrated range, DDS Nyquist), ``tracking``
    (the drive filtered by the actuator response follows the planned detuning
    during the chirp within ``tracking_fraction`` × the smallest lag detuning
    ``Δv_lag/λ``; default fraction 0.25, ``[drive] tracking_fraction``),
    ``return_settling`` (the response has settled to that tolerance when the
    next chirp starts).
generator
    ``output_kind`` (volts vs frequency), ``generator_range`` (the drive at the
    real load within the output range: a generator set for 50 Ω driving a
    high-impedance input delivers twice the programmed voltage),
    ``generator_amplitude`` (an output that limits amplitude and offset apart,
    ``amplitude_max`` and ``offset_max``: the peak-to-peak the drive needs
    programmed, about the offset nearest its centre that ``offset_max`` allows,
    within ``amplitude_max``), ``sample_rate``, ``record_length`` (memory), ``granularity`` (padding),
    ``channel``, ``step_per_sample`` and ``step_per_code`` (detuning change per
    sample and per DAC code / DDS word within ``[drive] max_step``, default
    0.1 × natural linewidth), ``dds_match`` and ``dds_rounding`` (a chain with a
    DDS stage agrees with the generator's clock and word length; the word
    rounding error in Hz of detuning).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from sweepgen._format import si
from sweepgen.channels import MAIN_LIGHT
from sweepgen.errors import CheckFailed

if TYPE_CHECKING:
    from sweepgen.generator import Generator
    from sweepgen.laser import Laser
    from sweepgen.planner import Plan
    from sweepgen.response import Tracking
    from sweepgen.sampling import Quantisation, SampleRateChoice
    from sweepgen.scenario import Scenario

#: A finding warns when its headroom is below this fraction.
WARN_HEADROOM = 0.2
#: Smallest fraction of the atomic beam finding the design force all along the path before
#: ``beam_overlap`` warns (a design choice of this tool: the ``deceleration`` rule fails where
#: fewer than half the atoms find it).
MIN_OVERLAP = 0.5
#: Points per segment for the dense checks of drive, slew and stage ranges.
GRID = 4001


@dataclass
class Finding:
    rule: str
    status: str                 # "pass" | "warn" | "fail"
    value: float | None
    limit: float | None
    unit: str
    headroom: float | None
    message: str
    advice: str = ""

    def to_json(self) -> dict:
        return {"rule": self.rule, "status": self.status, "value": self.value, "limit": self.limit,
                "unit": self.unit, "headroom": self.headroom, "message": self.message, "advice": self.advice}


def _finding(rule, value, limit, unit, headroom, failed, message, advice="", warns=True) -> Finding:
    """The one place a status is decided: fail, else warn when near the limit (and ``warns``), else pass."""
    near = warns and headroom is not None and headroom < WARN_HEADROOM
    status = "fail" if failed else "warn" if near else "pass"
    return Finding(rule, status, value, limit, unit, headroom, message, advice if failed or near else "")


def headroom(value: float, limit: float, side: str, *, width: float | None = None) -> float | None:
    """A finding's headroom: how far ``value`` may still move towards ``limit`` before reaching it,
    as a fraction of the limit's size; negative when the limit is exceeded (see the module doc).

    ``side`` is ``"upper"`` (``value ≤ limit``) or ``"lower"`` (``value ≥ limit``). A zero limit is
    measured against ``width`` (a range's width) when given; otherwise there is no headroom (None).
    """
    room = limit - value if side == "upper" else value - limit
    scale = abs(limit) or width
    if not scale:
        return None
    return room / scale if math.isfinite(scale) else (0.0 if room == 0 else math.copysign(math.inf, room))


def _upper_room(value: float, limit: float) -> tuple[float | None, bool]:
    """``(headroom, failed)`` of ``value ≤ limit``."""
    return headroom(value, limit, "upper"), value > limit * (1 + 1e-12) + (0 if limit else 1e-300)


def _range_room(vmin: float, vmax: float, lo: float, hi: float) -> tuple[float, float, float, bool]:
    """``(value, limit, headroom, failed)`` of ``lo ≤ vmin ≤ vmax ≤ hi``: the edge with the smaller
    headroom, and the extreme nearest it."""
    width = hi - lo
    room_lo = headroom(vmin, lo, "lower", width=width)
    room_hi = headroom(vmax, hi, "upper", width=width)
    if (math.inf if room_hi is None else room_hi) <= (math.inf if room_lo is None else room_lo):
        value, limit, room = vmax, hi, room_hi
    else:
        value, limit, room = vmin, lo, room_lo
    tol = 1e-12 * max(abs(lo), abs(hi) if math.isfinite(hi) else 0.0, 1e-300)
    failed = (value - limit > tol) if limit == hi else (limit - value > tol)
    return value, limit, room, failed


def upper(rule, value, limit, unit, message, advice="", *, warns=True) -> Finding:
    """A finding for ``value ≤ limit``; with ``warns=False`` nearness to the limit is no warning."""
    value, limit = float(value), float(limit)
    headroom, failed = _upper_room(value, limit)
    return _finding(rule, value, limit, unit, headroom, failed, message, advice, warns)


def lower(rule, value, limit, unit, message, advice="") -> Finding:
    """A finding for ``value ≥ limit``."""
    value, limit = float(value), float(limit)
    return _finding(rule, value, limit, unit, headroom(value, limit, "lower"), value < limit * (1 - 1e-12),
                    message, advice)


def within(rule, vmin, vmax, lo, hi, unit, message, advice="") -> Finding:
    """A finding for ``lo ≤ vmin ≤ vmax ≤ hi``; value and limit are the extreme nearer its edge."""
    value, limit, room, failed = _range_room(float(vmin), float(vmax), float(lo), float(hi))
    return _finding(rule, value, limit, unit, room, failed, message, advice)


def info(rule, message, value=None, unit="") -> Finding:
    """A rule that does not apply here (passes, with the reason)."""
    return Finding(rule, "pass", value, None, unit, None, message)


@dataclass
class CheckReport:
    """All findings of one check, and what they judged."""

    findings: list[Finding]
    scenario: Scenario | None = None
    plan: Plan | None = None
    laser: Laser | None = None
    generator: Generator | None = None
    rate_choice: SampleRateChoice | None = None     # the sample rate judged (None: no rate plays the sweep)
    quantisation: Quantisation | None = None        # the codes judged (None: no safe code window)
    tracking: Tracking | None = None            # the simulated actuator over one period (the table's axis)
    delay: float = 0.0                          # s: the table's first sample plays this long after the trigger

    def played_times(self) -> np.ndarray:
        """The times of :attr:`tracking`'s samples on the trigger's axis (s, within the period)."""
        return (self.tracking.time + self.delay) % self.plan.schedule().period

    @property
    def ok(self) -> bool:
        return not any(f.status == "fail" for f in self.findings)

    def failures(self) -> list:
        return [f for f in self.findings if f.status == "fail"]

    def warnings(self) -> list:
        return [f for f in self.findings if f.status == "warn"]

    def finding(self, rule: str) -> Finding | None:
        for f in self.findings:
            if f.rule == rule:
                return f
        return None

    def ordered(self) -> list:
        """Failures first, then warnings, then passes (stable within each)."""
        rank = {"fail": 0, "warn": 1, "pass": 2}
        return sorted(self.findings, key=lambda f: rank[f.status])

    def to_json(self) -> dict:
        """The ``check --json`` document; ``findings`` in the order of the text report (:meth:`ordered`)."""
        doc = {"ok": self.ok, "findings": [f.to_json() for f in self.ordered()]}
        choice = self.rate_choice
        if choice is not None:
            doc["playback"] = {
                "sample_rate": choice.sample_rate, "count": choice.count, "period_count": choice.period_count,
                "sample_rate_limited_by": choice.limited_by, "sample_rate_reason": choice.reason,
                "drive_unit": self.laser.chain.drive_unit if self.laser else None,
            }
            if self.quantisation is not None:
                q = self.quantisation
                doc["playback"].update({"dtype": q.dtype, "code_scale": q.code_scale, "code_offset": q.code_offset,
                                        "amplitude": q.amplitude, "offset": q.offset,
                                        "delivered_factor": q.delivered_factor})
        return doc


def require_playable(report: CheckReport, consequence: str = "nothing is written or sent") -> CheckReport:
    """Raise :class:`CheckFailed` (exit 1) unless no rule failed; for export, upload and simulate
    (``consequence`` says what was not done)."""
    fails = report.failures()
    if fails:
        names = ", ".join(f"{f.rule} ({f.message})" for f in fails[:3])
        more = f" and {len(fails) - 3} more" if len(fails) > 3 else ""
        raise CheckFailed(f"the sweep fails {len(fails)} check rule(s), {consequence}: "
                          f"{names}{more}; run 'sweepgen check' for the details", findings=report.findings)
    return report


# ----------------------------------------------------------------------------------
# The design: the planner's physics
# ----------------------------------------------------------------------------------
def check_design(report: CheckReport):
    """Plan ``report.scenario`` and add the design rules to ``report``.

    Returns the plan, or None when one period cannot hold the sweep (the
    hardware rules then have nothing to judge; ``report.plan`` is set either
    way). A sweep that cannot exist raises :class:`sweepgen.errors.PlanError`
    (bad input, exit 2); one that exists but breaks a limit is a failed rule.
    """
    from sweepgen.planner import plan as make_plan

    plan = make_plan(report.scenario)
    report.plan = plan
    report.findings.extend(physics_findings(plan))
    period = period_finding(plan)
    report.findings.append(period)
    return None if period.status == "fail" else plan


def check_plan(scenario) -> CheckReport:
    """The design rules alone, without laser or generator: what ``plan`` and ``simulate`` judge.

    ``report.plan`` is the plan; ``report.ok`` is False when the design breaks a
    limit. A sweep that cannot exist raises :class:`sweepgen.errors.PlanError`.
    """
    report = CheckReport([], scenario=scenario)
    check_design(report)
    return report


def physics_findings(plan) -> list:
    """The planner's physics as rules: distance, deceleration where the atoms are, the beam's
    overlap with the atoms, end velocity, survival of dark states, after the chirp."""
    from sweepgen import planner

    sc = plan.scenario
    out = []
    explicit = sc.pulsed and sc.chirp.start_time not in (None, "auto")
    z_from = plan.z_start if explicit else sc.light.start
    out.append(upper("slowing_distance", plan.slowing_distance, sc.target.distance - z_from, "m",
                     f"the design atom needs {plan.slowing_distance:.4g} m; {sc.target.distance - z_from:.4g} m lie "
                     f"between {'its start at chirp.start_time' if explicit else 'the light start'} "
                     f"({z_from:.4g} m) and the target ({sc.target.distance:.4g} m)",
                     planner.fit_advice(plan)))
    out.append(_deceleration(plan))
    out.append(_beam_overlap(plan))
    out.append(upper("end_velocity", sc.chirp.end_velocity, sc.target.capture_velocity, "m/s",
                     f"atoms leave the chirp at {sc.chirp.end_velocity:g} m/s; the target holds up to "
                     f"{sc.target.capture_velocity:g} m/s",
                     "lower chirp.end_velocity"))
    survival = _survival(plan)
    if survival is not None:
        out.append(survival)
    after = _after_chirp(plan)
    if after is not None:
        out.append(after)
    return out


def _deceleration(plan) -> Finding:
    """Design deceleration over the largest force where the atoms are: at the median distance of
    the atomic beam from the axis (:mod:`sweepgen.overlap`), the worst point of the path."""
    tr, ov = plan.trajectory, plan.overlap
    ratio = np.divide(tr.deceleration, ov.available, out=np.full(tr.deceleration.shape, np.inf),
                      where=ov.available > 1e-300 * tr.deceleration)
    i = int(np.argmax(ratio))
    worst = float(ratio[i])
    where = (f"on the axis (unbounded light: every atom sees the on-axis force)" if not plan.scenario.light.focused
             else f"{si(ov.median_radius[i], 'm')} from the axis, where half the atoms are closer (beam radius "
                  f"{si(ov.beam_radius[i], 'm')})")
    dimmed = (f" (the gates let {ov.level:.3g} of its intensity through during the chirp)" if ov.level < 1.0
              else "")
    share = (f"is {worst:.3g} of the largest force the light gives" if math.isfinite(worst)
             else "cannot be met: the light gives no force")
    return upper("deceleration", worst, 1.0, "",
                 f"the design deceleration {si(tr.deceleration[i], 'm/s²')} {share} at z = {tr.position[i]:.3g} m, "
                 f"{where}{dimmed}; common practice keeps it to 0.5-0.75",
                 ("raise the gates' level on the slowing light during the chirp (channels.NAME.level, on/off), "
                  if ov.level < 1.0 else "")
                 + "widen the slowing beam (light.waist) or collimate the atomic beam more, raise light.saturation, "
                 "or lower chirp.force_fraction (η) for more reserve")


def _beam_overlap(plan) -> Finding:
    """The fraction of the atomic beam that finds at least the design force all along the path
    (:mod:`sweepgen.overlap`); it warns below :data:`MIN_OVERLAP` (the ``deceleration`` rule fails)."""
    ov = plan.overlap
    frac = ov.fraction
    low = frac < MIN_OVERLAP
    if not plan.scenario.light.focused:
        message = "the light has no waist (an unbounded plane wave): every atom finds the design force"
    else:
        message = (f"{100 * frac:.3g} % of the atomic beam finds at least the design force all along the path "
                   f"(beam radius {si(float(np.min(ov.beam_radius)), 'm')}; half the atoms lie within "
                   f"{si(float(np.max(ov.median_radius)), 'm')} of the axis at the widest)")
    return Finding("beam_overlap", "warn" if low else "pass", frac, MIN_OVERLAP, "", (frac - MIN_OVERLAP) / MIN_OVERLAP,
                   message,
                   "widen the slowing beam (light.waist), collimate the atomic beam (source.divergence, "
                   "[source.collimator]) or lower chirp.force_fraction" if low else "")


def _survival(plan) -> Finding | None:
    """Expected fraction of the band left bright after slowing (:mod:`sweepgen.survival`) against
    ``chirp.min_survival``: a warning with the numbers when it is lower."""
    sc = plan.scenario
    sv = plan.survival
    if sv.mechanism == "none":
        return None
    limit = sc.chirp.min_survival
    low = sv.fraction < limit
    sp = sc.species
    if sv.mechanism == "dark states":
        rule = "photon_budget"
        message = (f"{100 * sv.fraction:.3g} % of the molecules in the chirp's band survive the photons their "
                   f"slowing needs (loss {sp.loss_per_photon:.3g} per photon; {100 * sv.design:.3g} % of those "
                   f"slowed from the start velocity, {plan.photons_per_atom:.4g} photons)")
        advice = "slow over a smaller velocity range (chirp.start_velocity / end_velocity) or close more loss channels"
    else:
        rule = "depumping"
        off = sp.off_resonant
        message = (f"{100 * sv.fraction:.3g} % of the atoms in the chirp's band stay in the bright ground level: the "
                   f"light also excites the level {si(abs(off.splitting), 'Hz')} away, which decays to the dark "
                   f"level with probability {off.branching:.3g} ({100 * sv.design:.3g} % of those slowed from the "
                   f"start velocity survive; {100 * sv.crossed:.3g} % of the band is swept over by that level's "
                   f"resonance before the chirp catches it)" + ("; with the repump light" if sv.repumped else
                                                               "; no repump light" if not sc.repumps else
                                                               "; the repump light's gates keep it dark"))
        advice = ("add or strengthen a repump light: [channels.repump] kind = \"frequency\", role = \"repump\", "
                  "saturation = 1, offset = \"0 MHz\"")
    return Finding(rule, "warn" if low else "pass", sv.fraction, limit, "", (sv.fraction - limit) / limit, message,
                   advice if low else "")


def _after_chirp(plan) -> Finding | None:
    """The velocity the light takes after the chirp from atoms leaving it at the end velocity where
    the chirp releases them (:mod:`sweepgen.afterchirp`); fails when they stop before the target."""
    ac = plan.after_chirp
    if ac is None:
        return None
    v_end = ac.end_velocity
    loss = ac.velocity_loss
    what = (f"atoms leaving the chirp at {v_end:g} m/s at z = {ac.release_position:.3g} m lose "
            f"{ac.hold_velocity_loss:.3g} m/s in the hold and {ac.return_velocity_loss:.3g} m/s in the return")
    if ac.stopped:
        what += (f"; the light stops them {si(ac.stop_time, 's')} after the chirp's end, before the target, "
                 f"and pushes them back")
    else:
        what += f"; they reach the target at {ac.arrival_velocity:.3g} m/s"
    advice = ("switch the slowing light off after the chirp (a shutter or an AOM), shorten chirp.hold and "
              "chirp.return_time, or end the chirp at a higher chirp.end_velocity")
    from sweepgen.afterchirp import STOP_FRACTION, WARN_FRACTION

    limit = STOP_FRACTION * v_end
    headroom, failed = _upper_room(loss, limit)
    failed = failed or ac.stopped
    status = "fail" if failed else "warn" if loss > WARN_FRACTION * v_end else "pass"
    return Finding("after_chirp", status, loss, limit, "m/s", headroom, what, advice if status != "pass" else "")


def period_finding(plan) -> Finding:
    ch = plan.scenario.chirp
    need = plan.chirp_start + plan.chirp_duration + ch.hold + ch.return_time
    return upper("period", need, ch.period, "s",
                 f"chirp start + chirp + hold + return = {plan.chirp_start * 1e3:.4g} + "
                 f"{plan.chirp_duration * 1e3:.4g} + {ch.hold * 1e3:.4g} + {ch.return_time * 1e3:.4g} = "
                 f"{need * 1e3:.4g} ms of a {ch.period * 1e3:.4g} ms period",
                 "lengthen chirp.period, or shorten chirp.hold / chirp.return_time")


# ----------------------------------------------------------------------------------
# The hardware: what one output plays
# ----------------------------------------------------------------------------------
@dataclass(frozen=True)
class SweepSamples:
    """The sweep on a dense grid over one period, for the rules that look at every instant."""

    time: np.ndarray           # s, GRID points per segment
    detuning: np.ndarray       # Hz
    chirp_rate: np.ndarray     # Hz/s, dΔ/dt
    drive: np.ndarray          # drive units
    gain: np.ndarray           # drive units per Hz of detuning, d drive/dΔ

    @classmethod
    def of(cls, schedule, chain, n: int = GRID) -> "SweepSamples":
        t = np.concatenate([np.linspace(seg.start, np.nextafter(seg.end, seg.start), n)
                            for seg in schedule.segments])
        det = schedule.detuning(t)
        return cls(t, det, schedule.chirp_rate(t), chain.to_drive(det), chain.gain(det))


def check_hardware(report: CheckReport, playing, delay: float = 0.0) -> None:
    """Add the laser, generator, sample-rate, quantisation and tracking rules for ``playing``.

    ``playing`` (a :class:`sweepgen.playback.ChannelPlayback`) holds the drive
    range, sample-rate choice and quantisation computed once by the playback
    service; the rules judge them and never compute them again. Its table's
    first sample plays ``delay`` after the trigger (the rules speak of times on
    the trigger's axis).
    """
    report.delay = float(delay)
    sweep = SweepSamples.of(playing.schedule, playing.laser.chain)
    add = report.findings.extend
    add(laser_findings(playing, sweep))
    kind = output_kind_finding(playing)
    report.findings.append(kind)
    if kind.status == "fail":
        return
    add(generator_findings(playing))
    choice = playing.rate_choice
    if choice is None:
        report.findings.append(Finding("sample_rate", "fail", None, None, "Sa/s", None, playing.rate_refusal,
                                       "see the message: the limit that wins is named"))
        return
    report.rate_choice = choice
    add(sample_rate_findings(playing))
    report.quantisation = quant = _judged_quantisation(report, playing)
    if quant is not None:
        add(quantisation_findings(playing, quant, sweep))
    tracking_findings(report, playing.schedule, choice.sample_rate, quant, preshaped=playing.preshaped)


def _judged_quantisation(report: CheckReport, playing):
    """The codes the remaining rules judge: none for a drive a range rule already refused; a
    quantisation refused for another reason fails ``generator_range`` (:func:`_refused_codes`)."""
    if any(f.status == "fail" and f.rule in RANGE_RULES for f in report.findings):
        return None
    report.findings.extend(_refused_codes(report.findings, playing))
    return playing.quantisation


#: the rules whose failure says why no code window plays a drive
RANGE_RULES = ("actuator_range", "generator_range", "generator_amplitude")


def _refused_codes(found: list, playing) -> list[Finding]:
    """A failed ``generator_range`` with the refusal's words when no code window plays the drive and
    no rule in ``found`` (:data:`RANGE_RULES`) has already failed it with its numbers; else nothing."""
    if playing.quantisation is not None or any(f.status == "fail" and f.rule in RANGE_RULES for f in found):
        return []
    return [Finding("generator_range", "fail", None, None, playing.drive_unit, None,
                    playing.quantisation_refusal, "see the message")]


# -- laser rules -------------------------------------------------------------------
def laser_findings(playing, sweep: SweepSamples) -> list[Finding]:
    """The laser's limits: mode-hop-free range, chirp and return rates, the actuator's safe input
    range, slew, and each stage's own range. The optical ones (mode-hop-free range, chirp and return
    rates) judge what the laser's frequency does: with a pre-shaped drive, the plan it follows; the
    drive's own (safe range, slew, stage ranges) judge the drive played."""
    laser, schedule = playing.laser, playing.schedule
    optical = sweep
    if playing.preshaped is not None:
        schedule = playing.preshaped.planned
        optical = SweepSamples.of(schedule, laser.chain)
    return [_mode_hop_free(laser.limits, optical), *_chirp_rates(laser.limits, schedule),
            _actuator_range(laser.limits, playing), _slew_rate(laser.limits, playing.drive_unit, sweep),
            *_stage_ranges(laser.chain, sweep)]


def _mode_hop_free(lim, sweep) -> Finding:
    span = float(np.max(sweep.detuning) - np.min(sweep.detuning))
    if lim.mode_hop_free is None:
        return info("mode_hop_free", f"the laser itself is not tuned (no limits.mode_hop_free); the sweep spans "
                                     f"{si(span, 'Hz')}", span, "Hz")
    return upper("mode_hop_free", span, lim.mode_hop_free, "Hz",
                 f"the sweep spans {si(span, 'Hz')} of a {si(lim.mode_hop_free, 'Hz')} mode-hop-free range",
                 "slow over a smaller velocity range, or use a laser with a wider mode-hop-free range")


def _chirp_rates(lim, schedule) -> list[Finding]:
    out = []
    for kind, rule, advice in (("chirp", "chirp_rate", "lower chirp.force_fraction or light.saturation (gentler chirp)"),
                               ("return", "return_rate", "lengthen chirp.return_time")):
        if schedule.segment(kind) is None:
            out.append(info(rule, f"no {kind} segment"))
            continue
        r = schedule.max_abs_chirp_rate(kind)
        out.append(upper(rule, r, lim.max_chirp_rate, "Hz/s",
                         f"|dΔ/dt| during the {kind} reaches {si(r, 'Hz/s')}; the laser allows "
                         f"{si(lim.max_chirp_rate, 'Hz/s')}", advice))
    return out


def _actuator_range(lim, playing) -> Finding:
    dmin, dmax = playing.drive_range
    unit = playing.drive_unit
    return within("actuator_range", dmin, dmax, lim.input_min, lim.input_max, unit,
                  f"the drive spans {dmin:.5g} to {dmax:.5g} {unit}; the actuator's safe input range is "
                  f"{lim.input_min:.5g} to {lim.input_max:.5g} {unit}",
                  "move the chain's set point (set_point / reference) so the sweep sits inside the safe range, "
                  "or slow over a smaller velocity range")


def _slew_rate(lim, unit, sweep) -> Finding:
    slew = float(np.max(np.abs(sweep.gain * sweep.chirp_rate)))
    if lim.max_slew is None:
        return info("slew_rate", f"the drive changes at up to {si(slew, unit + '/s')} (no limits.max_slew given)",
                    slew, f"{unit}/s")
    return upper("slew_rate", slew, lim.max_slew, f"{unit}/s",
                 f"the drive changes at up to {si(slew, unit + '/s')}; the actuator allows "
                 f"{si(lim.max_slew, unit + '/s')}", "lengthen chirp.return_time or lower the chirp rate")


def _stage_ranges(chain, sweep) -> list[Finding]:
    out = []
    for st, up in chain.upstream_values(sweep.detuning):
        for r in st.ranges():
            vals = st.range_values(up, r)
            lo, hi = float(np.min(vals)), float(np.max(vals))
            f = within("stage_range", lo, hi, r.low, r.high, r.unit,
                       f"{r.label}: {si(lo, r.unit, 6)} to {si(hi, r.unit, 6)}, range {si(r.low, r.unit, 6)} to "
                       f"{si(r.high, r.unit, 6)}", "move the set point of the stage, or narrow the sweep")
            f.message += _edge_key(r.key, f.limit == r.high)
            out.append(f)
    return out


def _edge_key(key: str, upper: bool) -> str:
    """`` (chain[0].rf_max)``: where the edge a stage-range finding names was written."""
    if not key:
        return ""
    if upper and key.endswith("_min"):
        key = key[:-len("_min")] + "_max"
    return f" ({key})"


# -- generator rules ---------------------------------------------------------------
def output_kind_finding(playing) -> Finding:
    """The generator's output is what the chain ends in: volts, or a frequency."""
    unit, gen = playing.drive_unit, playing.generator
    out = gen.output
    want = "voltage" if unit == "V" else "frequency"
    if out.kind != want:
        return Finding("output_kind", "fail", None, None, "", None,
                       f"the laser's chain ends in {unit} but generator '{gen.key}' has a {out.kind} output",
                       f"use a generator with a {want} output")
    return info("output_kind", f"{out.kind} output for a chain ending in {unit}")


def generator_findings(playing) -> list[Finding]:
    """The generator's output range at the real load, the amplitude its separate amplitude and
    offset limits allow, its DDS, and the output channel."""
    gen = playing.generator
    out = [_generator_range(gen, playing.drive_range)]
    if gen.output.kind == "voltage" and gen.output.amplitude_max is not None:
        out.append(_generator_amplitude(playing))
    dds = playing.laser.chain.dds
    if dds is not None:
        o = gen.output
        same = o.kind == "frequency" and o.clock == dds.clock and o.word_bits == dds.bits
        out.append(Finding("dds_match", "pass" if same else "fail", dds.clock, o.clock, "Hz", None,
                           f"the chain's DDS stage has a {si(dds.clock, 'Hz')} clock and {dds.bits}-bit words; "
                           f"generator '{gen.key}' has {si(o.clock, 'Hz') if o.clock else 'no clock'} and "
                           f"{o.word_bits}-bit words", "" if same else
                           "make the DDS stage of the laser profile and the generator profile describe the same DDS"))
    ch_ok = playing.output <= gen.channels
    key = _output_key(playing)
    out.append(Finding("channel", "pass" if ch_ok else "fail", playing.output, gen.channels, "", None,
                       f"{key} {playing.output} of {gen.channels} channel(s)",
                       "" if ch_ok else f"set {key} to 1..{gen.channels}"))
    return out


def _output_key(playing) -> str:
    """The scenario key that chooses ``playing``'s generator output."""
    if playing.name == MAIN_LIGHT:
        return "drive.channel"
    if playing.kind == "marker":
        return f"timing.markers.{playing.name}.output"
    return f"channels.{playing.name}.output"


def _generator_range(gen, drive_range) -> Finding:
    dmin, dmax = drive_range
    out = gen.output
    if out.kind == "voltage":
        k = out.delivered_factor
        return within("generator_range", dmin, dmax, out.range_min * k, out.range_max * k, "V",
                      f"the actuator needs {dmin:.5g} to {dmax:.5g} V; generator '{gen.key}' delivers "
                      f"{out.range_min * k:.5g} to {out.range_max * k:.5g} V into the real load (programmed "
                      f"{out.range_min:g} to {out.range_max:g} V, ×{k:g} at the load)",
                      "check the generator's termination setting and the real load, or use a wider output")
    return within("generator_range", dmin, dmax, out.range_min, out.range_max, "Hz",
                  f"the DDS must make {dmin / 1e6:.6g} to {dmax / 1e6:.6g} MHz; generator '{gen.key}' makes "
                  f"{out.range_min / 1e6:g} to {out.range_max / 1e6:g} MHz",
                  "change the offset lock's divider or reference so the DDS frequency fits")


def _generator_amplitude(playing) -> Finding:
    """``generator_amplitude``: the peak-to-peak the drive needs programmed, about the offset nearest
    its centre that ``offset_max`` allows (:func:`sweepgen.sampling.amplitude_window`), within
    ``amplitude_max``."""
    from sweepgen.sampling import amplitude_text, amplitude_window

    out = playing.generator.output
    k = out.delivered_factor
    lo_p, hi_p = playing.drive_range[0] / k, playing.drive_range[1] / k
    offset, amplitude = amplitude_window(lo_p, hi_p, out)
    keys = f"outputs.{playing.output}" if playing.output in playing.generator.outputs else "output"
    text = f"{playing.address}: " + amplitude_text(lo_p, hi_p, offset, amplitude, out, keys)
    return upper("generator_amplitude", amplitude, out.amplitude_max, "V", text,
                 _amplitude_advice(playing, offset != 0.5 * (lo_p + hi_p), keys))


def _amplitude_advice(playing, offset_limited: bool, keys: str) -> str:
    """What to change when a drive needs more peak-to-peak than the output plays."""
    if playing.kind == "gate":
        narrower = f"bring channels.{playing.name}.dark and bright closer together"
    elif playing.kind == "marker":
        narrower = f"bring timing.markers.{playing.name}.high and low closer together"
    else:
        narrower = "narrow the sweep (slow over a smaller velocity range)"
    o_max = playing.generator.output.offset_max
    centre = (f"move the chain's set point (set_point / reference) so the drive is centred "
              f"{f'within ±{o_max:g} V' if o_max else 'on 0 V'}, " if offset_limited and playing.kind == "frequency"
              else "")
    return (f"{centre}{narrower}, or use an output (or an amplifier) that plays more peak-to-peak "
            f"({keys}.amplitude_max, offset_max)")


# -- sample-rate rules -------------------------------------------------------------
def sample_rate_findings(playing) -> list[Finding]:
    """The sample rate, the record length in memory, the granularity padding and the detuning step
    per sample, for the rate ``playing`` chose."""
    choice, gen = playing.rate_choice, playing.generator
    sm = gen.sampling
    period = playing.schedule.period
    record = upper("record_length", choice.count, sm.memory, "samples",
                   f"one period is {choice.count} samples at {si(choice.sample_rate, 'Sa/s')}; the memory holds {sm.memory}",
                   f"lower the rate to at most {si(sm.memory / period, 'Sa/s')} or shorten chirp.period",
                   warns=False)        # filling the memory is not a hazard
    step = upper("step_per_sample", choice.step, choice.max_step, "Hz",
                 f"the detuning moves up to {si(choice.step, 'Hz')} per sample at {si(choice.sample_rate, 'Sa/s')}",
                 "raise the sample rate, lengthen chirp.return_time, or raise drive.max_step")
    return [_sample_rate(choice, gen), record, _granularity(choice, sm), step]


def _sample_rate(choice, gen) -> Finding:
    sm = gen.sampling
    if not choice.limited_by.startswith("fixed"):
        return info("sample_rate", choice.reason, choice.sample_rate, "Sa/s")
    if sm.rates is not None:
        okr = sm.allows(choice.sample_rate)
        return Finding("sample_rate", "pass" if okr else "fail", choice.sample_rate, None, "Sa/s", None,
                       f"{si(choice.sample_rate, 'Sa/s')} ({choice.limited_by}); generator '{gen.key}' plays "
                       + ", ".join(si(r, "Sa/s") for r in sm.rates),
                       "" if okr else "pick one of the listed rates")
    # a rate fixed by the user near a rate limit is fine: no warning, and no headroom to show
    value, limit, room, failed = _range_room(choice.sample_rate, choice.sample_rate, sm.rate_min, sm.rate_max)
    return _finding("sample_rate", value, limit, "Sa/s", room if failed else None, failed,
                    f"{si(choice.sample_rate, 'Sa/s')} ({choice.limited_by}); generator '{gen.key}' plays "
                    f"{si(sm.rate_min, 'Sa/s')} to {si(sm.rate_max, 'Sa/s')}",
                    "pick a rate the generator plays, or remove drive.sample_rate for an automatic choice",
                    warns=False)


def _granularity(choice, sm) -> Finding:
    if choice.padding or abs(choice.period_error) > 0:
        return Finding("granularity", "warn", choice.padding, 0, "samples", None,
                       f"{choice.period_count} samples per period (table {choice.period_error * 1e9:+.3g} ns off the "
                       f"period), padded to {choice.count} for granularity {sm.granularity} / minimum length "
                       f"{sm.min_length}: play the table triggered once per period",
                       "choose a rate at which one period is a multiple of the granularity")
    return info("granularity", f"{choice.count} samples = one period exactly, a multiple of {sm.granularity}",
                choice.padding, "samples")


# -- quantisation rules ------------------------------------------------------------
def quantisation_findings(playing, quant, sweep: SweepSamples) -> list[Finding]:
    """The detuning step of one DAC code (or DDS word), and the DDS word rounding."""
    max_step = playing.rate_choice.max_step
    with np.errstate(divide="ignore"):
        per_code = float(np.max(np.abs(quant.code_scale / sweep.gain)))
    what = "DAC code" if quant.output == "voltage" else "DDS word LSB"
    out = [upper("step_per_code", per_code, max_step, "Hz",
                 f"one {what} moves the detuning by up to {si(per_code, 'Hz')} ({quant.bits} bits"
                 + (f", {quant.amplitude:.4g} V peak-to-peak programmed" if quant.amplitude else "") + ")",
                 "use a generator with more DAC bits, or a chain with less gain")]
    dds = playing.laser.chain.dds
    if dds is not None and quant.output == "frequency":
        worst = float(np.max(np.abs(dds.rounding_error(sweep.drive) / sweep.gain)))
        out.append(upper("dds_rounding", worst, max_step, "Hz",
                         f"rounding to {dds.bits}-bit tuning words moves the detuning by up to {si(worst, 'Hz')} "
                         f"(word LSB {si(dds.resolution, 'Hz')} at the DDS)",
                         "use a longer tuning word"))
    return out


# -- tracking through the actuator response ----------------------------------------
def tracking_findings(report: CheckReport, schedule, sample_rate: float, quant=None, *, preshaped=None) -> None:
    """How the laser tracks the sweep through its actuator: ``tracking`` during the chirp and
    ``return_settling`` before the next chirp starts. With a pre-shaped drive (``preshaped``,
    :class:`sweepgen.preshape.PreShaped`) the laser is judged against the plan, and
    ``tracking_without_preshape`` reports what the plan's own drive would give."""
    from sweepgen.response import track

    plan, laser = report.plan, report.laser
    add = report.findings.append
    planned = None if preshaped is None else preshaped.planned
    tr = track(schedule, laser.chain, laser.response, sample_rate, quant=quant, planned=planned)
    report.tracking = tr
    note = ""
    if planned is not None:
        unshaped = _unshaped_tracking(report, planned, sample_rate, preshaped)
        add(unshaped)
        schedule = planned
        note = f", with the pre-shaped drive (without it: {si(unshaped.value, 'Hz')})"
    _tracking_rules(report, schedule, tr, note)


def _unshaped_tracking(report: CheckReport, planned, sample_rate: float, preshaped) -> Finding:
    """The tracking the plan's own drive would give, beside the pre-shaped drive's (an info finding)."""
    from sweepgen.preshape import bandwidth_note
    from sweepgen.response import track

    laser = report.laser
    tr = track(planned, laser.chain, laser.response, sample_rate)
    chirp = planned.segment("chirp")
    inside = (tr.time >= chirp.start) & (tr.time < chirp.end) if chirp is not None else tr.time < 0
    worst = float(np.max(np.abs(tr.error[inside]))) if np.any(inside) else 0.0
    return info("tracking_without_preshape",
                f"without the pre-shaped drive the laser would be off the plan by up to {si(worst, 'Hz')} during "
                f"the chirp (tolerance {si(tracking_tolerance(report.plan), 'Hz')}); the drive played is "
                f"{bandwidth_note(preshaped)}", worst, "Hz")


def _tracking_rules(report: CheckReport, schedule, tr, note: str = "") -> None:
    """``tracking`` and ``return_settling`` of the simulated laser ``tr`` against ``schedule``; ``note``
    ends the ``tracking`` message's first part."""
    plan, laser = report.plan, report.laser
    sc = plan.scenario
    add = report.findings.append
    tol = tracking_tolerance(plan)
    err = np.abs(tr.error)
    chirp = schedule.segment("chirp")
    in_chirp = np.zeros(err.size, dtype=bool) if chirp is None else (tr.time >= chirp.start) & (tr.time < chirp.end)
    model = laser.response.model
    desc = {"none": "an ideal actuator",
            "first-order": f"a first-order response (corner {si(laser.response.corner or 0, 'Hz')})",
            "second-order": f"a second-order response (resonance {si(laser.response.resonance or 0, 'Hz')}, "
                            f"Q {laser.response.q})"}[model]
    if np.any(in_chirp):
        worst = float(np.max(err[in_chirp]))
        at = (float(tr.time[in_chirp][np.argmax(err[in_chirp])]) + report.delay) % schedule.period
        add(upper("tracking", worst, tol, "Hz",
                  f"through {desc} the laser is off the planned detuning by up to {si(worst, 'Hz')} during "
                  f"the chirp (at {at * 1e3:.4g} ms after the trigger){note}; tolerance "
                  f"{sc.drive.tracking_fraction:g} × the lag detuning {si(tol / sc.drive.tracking_fraction, 'Hz')}",
                  "pre-shape the drive (drive.preshape = true), lower the chirp rate (chirp.force_fraction), use a "
                  "faster actuator, or raise drive.tracking_fraction"))
    ret = schedule.segment("return")
    if chirp is not None and ret is not None:
        n = len(tr.time)
        i0 = int(round(chirp.start * tr.sample_rate)) % n
        before = err[i0 - 1] if i0 > 0 else err[n - 1]
        value = float(max(err[i0], before))
        # settling time after the end of the return
        i_end = int(math.ceil(ret.end * tr.sample_rate))
        idx = (np.arange(i_end, i_end + n) % n)
        seq = err[idx]
        rest = (chirp.start + schedule.period - ret.end) % schedule.period or schedule.period
        above = np.flatnonzero(seq[: max(int(round(rest * tr.sample_rate)), 1)] > tol)
        settle = (above[-1] + 1) / tr.sample_rate if above.size else 0.0
        add(upper("return_settling", value, tol, "Hz",
                  f"when the next chirp starts the laser is {si(value, 'Hz')} from the start detuning; it settles "
                  f"within {si(tol, 'Hz')} {si(settle, 's') if settle else 'at once'} after the return ({rest * 1e3:.4g} ms available)",
                  "lengthen chirp.return_time or chirp.period, or use a better damped actuator"))


def tracking_tolerance(plan) -> float:
    """Largest allowed difference (Hz) between the laser's detuning and the plan during the chirp:
    ``[drive] tracking_fraction`` × the smallest lag detuning ``Δv_lag / λ`` along the chirp."""
    sc = plan.scenario
    return sc.drive.tracking_fraction * float(np.min(np.asarray(plan.trajectory.lag))) / sc.species.wavelength


# ----------------------------------------------------------------------------------
# A table read back, in place of the plan's sweep
# ----------------------------------------------------------------------------------
def table_findings(plan, table, sweep, delay: float = 0.0) -> list[Finding]:
    """Rules for a table read back (``check --table``).

    ``table_integrity``: the file matches its sidecar (size, SHA-256, count, codes).
    ``table_match``: the detuning the table plays through TODAY's laser (``sweep``, a
    :class:`sweepgen.playback.TableSweep`) against the plan during the plan's chirp, within the
    tracking tolerance. ``table_delay``: the trigger delay the table was written for (its sidecar's
    ``timing``) is the scenario's ``delay`` that judges it (a warning when not).
    """
    from sweepgen._format import si

    bad = [c["check"] for c in table.checks if not c["ok"]]
    out = [Finding("table_integrity", "fail" if bad else "pass", None, None, "", None,
                   (f"{table.path.name} does not match its sidecar: {', '.join(bad)} differ; it was changed or "
                    f"damaged after it was written" if bad else
                    f"{table.path.name}: size, SHA-256, sample count and codes match the sidecar"),
                   "export the table again" if bad else "")]
    if plan is None:
        return out
    out.append(_table_delay(table, delay))
    planned = plan.schedule()
    seg = planned.segment("chirp")
    t = np.linspace(seg.start, np.nextafter(seg.end, seg.start), GRID)
    # the table's sample 0 plays ``delay`` after the trigger (``[timing] delay``): its axis is shifted
    diff = np.abs(sweep.schedule.detuning(t - delay) - planned.detuning(t))
    worst, at = float(diff.max()), float(t[int(np.argmax(diff))])
    out.append(upper("table_match", worst, tracking_tolerance(plan), "Hz",
                     f"played through laser '{sweep.laser.key}', the table is off the plan by up to {si(worst, 'Hz')} "
                     f"during the chirp (at {at * 1e3:.4g} ms; table sampled at {si(sweep.sample_rate, 'Sa/s')}, "
                     f"represented within {si(sweep.error, 'Hz')})",
                     "export a new table from the scenario, or recalibrate the laser (sweepgen calibrate)"))
    return out


def _table_delay(table, delay: float) -> Finding:
    """``table_delay``: the delay in the table's sidecar against the scenario's ``[timing] delay``."""
    from sweepgen._format import si

    written = float((table.sidecar.get("timing") or {}).get("delay") or 0.0)
    same = abs(written - delay) <= 1e-9 * max(abs(written), abs(delay), 1e-9)
    text = (f"{table.path.name} was written to play its first sample {written * 1e6:.9g} µs after the trigger"
            + ("" if same else f"; the scenario's [timing] delay is {delay * 1e6:.9g} µs, and the table is judged "
                               f"and flown as the scenario says"))
    return Finding("table_delay", "pass" if same else "warn", written, delay, "s", None, text,
                   "" if same else "set [timing] delay to the table's, or export a new table from the scenario")


# ----------------------------------------------------------------------------------
# Timing and further channels
# ----------------------------------------------------------------------------------
def timing_findings(scenario, timing, generator) -> list[Finding]:
    """``timing.delay`` (only the rest before the chirp may be skipped), ``timing.trigger`` (the
    generator profile can be told what the scenario asks for), and for each gate ``NAME.window``,
    ``NAME.coverage`` (open during the whole chirp, for every light it switches) and
    ``NAME.switch_off`` (closed within its tolerance after the chirp's end); ``NAME.window`` of
    each marker. ``timing`` is a :class:`sweepgen.playback.PlayTiming`."""
    when = timing.moments
    start = when["chirp_start"]
    room, failed = _upper_room(timing.delay, start)
    out = [_finding("timing.delay", timing.delay, start, "s", room, failed or timing.delay >= timing.period,
                    f"the first sample plays {si(timing.delay, 's')} after the trigger; the chirp starts at "
                    f"{si(start, 's')}",
                    "lower timing.delay to at most the chirp start: only the rest before the chirp may be skipped")]
    out += _trigger_findings(timing, generator)
    out.append(_burst_finding(timing))
    for ch in scenario.channels:
        if ch.kind == "gate":
            out += _gate_findings(ch, timing)
    for m in timing.markers:
        fits = timing.delay <= m.start < m.end <= timing.period
        out.append(Finding(f"{m.name}.window", "pass" if fits else "fail", m.start, timing.period, "s", None,
                           f"marker high from {si(m.start, 's')} to {si(m.end, 's')} after the trigger "
                           f"(table from {si(timing.delay, 's')} to {si(timing.period, 's')})",
                           "" if fits else "move the marker (at, shift, width) inside the played period"))
    missing = {m.name for m in scenario.timing.markers} - {m.name for m in timing.markers}
    for name in sorted(missing):
        out.append(Finding(f"{name}.window", "fail", None, None, "s", None,
                           f"marker {name}: this period has no such moment (a continuous beam has no arrival "
                           f"of a bunch)", "choose another moment for timing.markers." + name + ".at"))
    return out


def _burst_finding(timing) -> Finding:
    """``timing.burst``: in burst mode a table of whole periods started ``delay`` after the trigger plays on
    past the next trigger (the source's next shot, a period later); a generator that takes no trigger
    while it plays then skips every other shot (a warning with the overlap)."""
    over = timing.delay if timing.mode == "burst" else 0.0
    end = timing.cycles * timing.period + timing.delay
    text = (f"{timing.mode} mode: the table plays from {si(timing.delay, 's')} to {si(end, 's')} after the trigger"
            + (f", {si(over, 's')} after {timing.cycles} period(s) have passed: the trigger of the source's next "
               f"shot then finds it still playing, and a generator that takes no trigger while it plays skips "
               f"that shot" if over > 0 else ""))
    return Finding("timing.burst", "warn" if over > 0 else "pass", over, 0.0, "s", None, text,
                   "set timing.delay to 0 (the rest before the chirp does the waiting), use timing.mode = "
                   "\"repeat\", or make sure the generator takes a trigger while it plays" if over > 0 else "")


def _trigger_findings(timing, generator) -> list[Finding]:
    commands = getattr(generator, "commands", None)
    if commands is None:
        return [info("timing.trigger", f"{timing.source} trigger, {timing.mode}: a ramp board's link settings")]
    wanted = [("trigger", "trigger_source", timing.source, timing.source_name is None),
              ("trigger_edge", "edge", timing.edge, timing.edge_name is None)]
    problems = [f"commands.{t} needs the instrument's name for '{word}' ([trigger] {word} = \"...\")"
                for t, _, word, unnamed in wanted if commands.has(t) and unnamed]
    for key, value, template in (("delay", timing.delay, "trigger_delay"), ("level", timing.level, "trigger_level")):
        if value and not commands.has(template):
            problems.append(f"timing.{key} is set but the profile has no '{template}' template to send it")
    if timing.mode == "burst" and timing.cycles > 1 and not commands.has("burst"):
        problems.append("timing.cycles asks for a burst but the profile has no 'burst' template")
    text = (f"{timing.source} trigger ({timing.source_name or 'no name in the profile'}), {timing.edge} edge, "
            f"{timing.mode}" + (f" of {timing.cycles} period(s)" if timing.mode == "burst" else ""))
    if problems:
        return [Finding("timing.trigger", "fail", None, None, "", None, f"{text}: " + "; ".join(problems),
                        "describe the instrument's trigger in its generator profile ([trigger], [commands])")]
    return [info("timing.trigger", text)]


def _gate_findings(ch, timing) -> list[Finding]:
    from sweepgen.timing import gate_window

    g, name = ch.gate, ch.name
    window = gate_window(g, timing.moments)
    if window is None:
        return [Finding(f"{name}.window", "fail", None, None, "s", None,
                        f"gate {name}: this period has no moment '{g.on if timing.moments.get(g.on) is None else g.off}'",
                        f"choose other moments for channels.{name}.on/off")]
    opened, closed = window
    when = timing.moments
    fits = timing.delay <= opened < closed <= timing.period
    out = [Finding(f"{name}.window", "pass" if fits else "fail", opened, timing.period, "s", None,
                   f"gate {name} open from {si(opened, 's')} to {si(closed, 's')} after the trigger "
                   f"(table from {si(timing.delay, 's')} to {si(timing.period, 's')})",
                   "" if fits else "move the gate's on/off (or their shifts) inside the played period")]
    covers = opened <= when["chirp_start"] and closed >= when["chirp_end"] and g.level > 0.0
    lights = ", ".join(g.lights)
    lets = (f"lets {lights} through at {g.level:g} of full intensity" if g.level > 0.0 else
            f"is open for {lights} at level 0 (lets no light through)")
    out.append(Finding(f"{name}.coverage", "pass" if covers else "fail", None, None, "s", None,
                       f"gate {name} {lets} from {si(opened, 's')} to {si(closed, 's')}; the chirp "
                       f"runs from {si(when['chirp_start'], 's')} to {si(when['chirp_end'], 's')}",
                       "" if covers else
                       f"raise channels.{name}.level above 0" if g.level <= 0.0 else
                       "open the gate before the chirp starts and close it after it ends"))
    late = closed - when["chirp_end"]
    out.append(upper(f"{name}.switch_off", late, g.tolerance, "s",
                     f"gate {name} closes {si(late, 's')} after the chirp's end (tolerance {si(g.tolerance, 's')}): "
                     f"light left on can turn the slowed atoms back (after_chirp follows one of them)",
                     f"close it sooner (channels.{name}.off, off_shift) or raise channels.{name}.tolerance",
                     warns=False))
    return out


def channel_findings(playing) -> list[Finding]:
    """The rules of a further output, named ``NAME.rule``: for a frequency channel its laser's limits,
    the generator's output and sample-rate rules and its codes; for a gate or marker its input's safe
    range, the generator's output and its codes."""
    found = [output_kind_finding(playing)]
    kind_fits = found[0].status != "fail"
    if kind_fits:
        found += generator_findings(playing)
    if playing.kind == "frequency":
        sweep = SweepSamples.of(playing.schedule, playing.laser.chain)
        found = laser_findings(playing, sweep) + found
        if found and playing.quantisation is not None and playing.rate_choice is not None:
            found += sample_rate_findings(playing) + quantisation_findings(playing, playing.quantisation, sweep)
    else:
        # a gate's or marker's levels are its input's range by default: reaching its edge is no warning
        rng = _actuator_range(playing.laser.limits, playing)
        if rng.status == "warn":
            rng.status, rng.advice = "pass", ""
        found.insert(0, rng)
    if kind_fits:
        found += _refused_codes(found, playing)
    for f in found:
        f.rule = f"{playing.name}.{f.rule}"
    return found


def output_findings(channels: dict) -> list[Finding]:
    """``outputs``: no two channels play on the same output of one generator."""
    seen, clash = {}, []
    for name, playing in channels.items():
        where = (playing.generator.key, playing.output)
        if where in seen:
            clash.append(f"{seen[where]} and {name} both play on output {where[1]} of {where[0]}")
        seen.setdefault(where, name)
    text = "; ".join(clash) or ", ".join(f"{n} on {p.address}" for n, p in channels.items())
    return [Finding("outputs", "fail" if clash else "pass", None, None, "", None, text,
                    "give each channel its own output" if clash else "")]
