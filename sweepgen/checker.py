"""The checker: prove a sweep is safe and playable before anything is switched on.

:func:`check` plans the scenario, maps the sweep through the laser's tuning
chain, picks the sample rate and codes for the generator, simulates the
actuator, and returns one :class:`Finding` per rule, each with the value, the
limit, the unit, the margin and a status:

* ``fail``: the limit is exceeded;
* ``warn``: within 20 % of the limit (:data:`WARN_MARGIN`);
* ``pass``: otherwise.

Margins: for an upper limit ``(limit − value)/limit``; for a lower limit
``(value − limit)/limit``; for a range ``[lo, hi]`` the headroom to the nearer
edge divided by half the range width (so "within 20 % of a limit" means the
last fifth of the way from the centre to an edge).

Rules (``rule`` names in the JSON):

physics
    ``slowing_distance`` (fits between the light start, or the design atom's
    start for an explicit start time, and the target), ``chirp_start`` (an
    explicit start time leaves the atom in the light), ``deceleration``
    (design deceleration over the largest force the light gives along the whole
    path, ``a_d / a_max(s(z))``, at most 1), ``end_velocity`` (at most the
    target's capture velocity), ``photon_budget`` (molecules: surviving fraction
    ``(1 − p)^N`` at least :data:`MIN_SURVIVAL`), ``period`` (chirp start +
    chirp + hold + return fit in one period).
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
    ``sample_rate``, ``record_length`` (memory), ``granularity`` (padding),
    ``channel``, ``step_per_sample`` and ``step_per_code`` (detuning change per
    sample and per DAC code / DDS word within ``[drive] max_step``, default
    0.1 × natural linewidth), ``dds_match`` and ``dds_rounding`` (a chain with a
    DDS stage agrees with the generator's clock and word length; the word
    rounding error in Hz of detuning).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from sweepgen.errors import CheckFailed, PlanError

#: A finding warns when its margin is below this fraction.
WARN_MARGIN = 0.2
#: Smallest surviving fraction of molecules after the photons needed to slow them
#: (a design choice of this tool: losing more than half the molecules to dark
#: states calls for more repumping, or a smaller velocity change).
MIN_SURVIVAL = 0.5
#: Points per segment for the dense checks of drive, slew and stage ranges.
GRID = 4001


@dataclass
class Finding:
    rule: str
    status: str                 # "pass" | "warn" | "fail"
    value: float | None
    limit: float | None
    unit: str
    margin: float | None
    message: str
    advice: str = ""

    def to_json(self) -> dict:
        return {"rule": self.rule, "status": self.status, "value": self.value, "limit": self.limit,
                "unit": self.unit, "margin": self.margin, "message": self.message, "advice": self.advice}


def _status(margin: float | None, failed: bool) -> str:
    if failed:
        return "fail"
    if margin is not None and margin < WARN_MARGIN:
        return "warn"
    return "pass"


def upper(rule, value, limit, unit, message, advice="") -> Finding:
    """A finding for ``value ≤ limit``."""
    value, limit = float(value), float(limit)
    margin = (limit - value) / abs(limit) if limit else (0.0 if value <= 0 else -math.inf)
    failed = value > limit * (1 + 1e-12) + (0 if limit else 1e-300)
    return Finding(rule, _status(margin, failed), value, limit, unit, margin, message, advice if failed or
                   margin < WARN_MARGIN else "")


def lower(rule, value, limit, unit, message, advice="") -> Finding:
    """A finding for ``value ≥ limit``."""
    value, limit = float(value), float(limit)
    margin = (value - limit) / abs(limit) if limit else math.inf
    failed = value < limit * (1 - 1e-12)
    return Finding(rule, _status(margin, failed), value, limit, unit, margin, message,
                   advice if failed or margin < WARN_MARGIN else "")


def within(rule, vmin, vmax, lo, hi, unit, message, advice="") -> Finding:
    """A finding for ``lo ≤ vmin ≤ vmax ≤ hi``; value and limit are the extreme nearer its edge."""
    vmin, vmax, lo, hi = float(vmin), float(vmax), float(lo), float(hi)
    half = (hi - lo) / 2.0 if math.isfinite(hi - lo) else math.inf
    room_hi, room_lo = hi - vmax, vmin - lo
    if room_hi <= room_lo:
        value, limit, room = vmax, hi, room_hi
    else:
        value, limit, room = vmin, lo, room_lo
    margin = room / half if math.isfinite(half) and half > 0 else (math.inf if room >= 0 else -math.inf)
    tol = 1e-12 * max(abs(lo), abs(hi) if math.isfinite(hi) else 0.0, 1e-300)
    failed = room < -tol
    return Finding(rule, _status(margin, failed), value, limit, unit, margin, message,
                   advice if failed or margin < WARN_MARGIN else "")


def info(rule, message, value=None, unit="") -> Finding:
    """A rule that does not apply here (passes, with the reason)."""
    return Finding(rule, "pass", value, None, unit, None, message)


@dataclass
class CheckReport:
    """All findings of one check, and what was computed on the way."""

    findings: list
    scenario: object = None
    plan: object = None
    laser: object = None
    generator: object = None
    rate: object = None              # sampling.RateChoice
    quant: object = None             # sampling.Quantisation
    tracking: object = None          # response.Tracking
    extra: dict = field(default_factory=dict)

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
        doc = {"ok": self.ok, "findings": [f.to_json() for f in self.findings]}
        if self.rate is not None:
            doc["playback"] = {
                "sample_rate": self.rate.rate, "count": self.rate.count, "period_count": self.rate.period_count,
                "rate_limited_by": self.rate.limited_by, "rate_reason": self.rate.reason,
                "drive_unit": self.laser.chain.drive_unit if self.laser else None,
            }
            if self.quant is not None:
                q = self.quant
                doc["playback"].update({"dtype": q.dtype, "code_scale": q.code_scale, "code_offset": q.code_offset,
                                        "amplitude": q.amplitude, "offset": q.offset,
                                        "delivered_factor": q.delivered_factor})
        return doc


def require_playable(report: CheckReport) -> CheckReport:
    """Raise :class:`CheckFailed` (exit 1) unless no rule failed; for export and upload."""
    fails = report.failures()
    if fails:
        names = ", ".join(f"{f.rule} ({f.message})" for f in fails[:3])
        more = f" and {len(fails) - 3} more" if len(fails) > 3 else ""
        raise CheckFailed(f"the sweep fails {len(fails)} check rule(s), nothing is written or sent: "
                          f"{names}{more}; run 'sweepgen check' for the details", findings=report.findings)
    return report


# ----------------------------------------------------------------------------------
def check(scenario, laser=None, generator=None, *, rate: float | None = None) -> CheckReport:
    """Check ``scenario`` against its laser and generator (or the ones given).

    Parameters
    ----------
    scenario : sweepgen.scenario.Scenario
    laser : sweepgen.laser.Laser, optional
        Default: the scenario's ``laser``.
    generator : sweepgen.generator.Generator, optional
        Default: the scenario's ``generator``.
    rate : float, optional
        Sample rate (Sa/s) overriding ``[drive] sample_rate``.

    Returns
    -------
    CheckReport
        ``report.ok`` is False when any rule fails. Bad input (unreadable
        profiles) raises :class:`sweepgen.errors.InputError` instead.
    """
    from sweepgen.generator import load_generator
    from sweepgen.laser import load_laser
    from sweepgen.planner import plan as make_plan

    if laser is None:
        laser = load_laser(scenario.laser_ref, relative_to=scenario.base_dir, file=str(scenario.path),
                           key="laser") if scenario.laser_ref else _missing(scenario, "laser")
    if generator is None:
        generator = load_generator(scenario.generator_ref, relative_to=scenario.base_dir,
                                   file=str(scenario.path), key="generator") \
            if scenario.generator_ref else _missing(scenario, "generator")
    report = CheckReport([], scenario=scenario, laser=laser, generator=generator)
    add = report.findings.append

    try:
        plan = make_plan(scenario)
    except PlanError as exc:
        add(_plan_failure(scenario, exc))
        return report
    report.plan = plan
    for f in physics_findings(plan):
        add(f)
    period = period_finding(plan)
    add(period)
    if period.status == "fail":
        return report
    schedule = plan.schedule()
    hardware_findings(report, schedule, rate)
    return report


def _missing(scenario, what):
    from sweepgen.errors import InputError

    raise InputError(f"no {what} named; add  {what} = \"...\"  (a built-in key or a path) to check the sweep",
                     file=str(scenario.path), key=what)


def _plan_failure(scenario, exc: PlanError) -> Finding:
    """A planner refusal as a failed physics rule, with the numbers where they can be computed."""
    rule = "chirp_start" if exc.key == "chirp.start_time" else (
        "slowing_distance" if exc.key in ("chirp.start_velocity",) else "plan")
    value = limit = None
    if rule == "slowing_distance":
        from sweepgen import planner

        try:
            z_end = planner.end_position(scenario, scenario.light.start)
            value = z_end - scenario.light.start
            limit = scenario.target.distance - scenario.light.start
        except PlanError:
            value = limit = None
    margin = None if value is None else (limit - value) / limit
    return Finding(rule, "fail", value, limit, "m" if value is not None else "", margin, exc.detail,
                   "see the message: change the scenario's chirp or light")


def physics_findings(plan) -> list:
    """The planner's physics as rules: distance, deceleration, end velocity, photon budget."""
    from sweepgen import physics

    sc = plan.scenario
    sp = sc.species
    out = []
    explicit = sc.pulsed and sc.chirp.start_time not in (None, "auto")
    z_from = plan.z_start if explicit else sc.light.start
    out.append(upper("slowing_distance", plan.slowing_distance, sc.target.distance - z_from, "m",
                     f"the design atom needs {plan.slowing_distance:.4g} m; {sc.target.distance - z_from:.4g} m lie "
                     f"between {'its start' if explicit else 'the light start'} and the target",
                     "lower chirp.start_velocity, raise chirp.margin or light.saturation, or move the target"))
    tr = plan.trajectory
    a_avail = physics.max_deceleration(tr.saturation, sp.gamma, sp.wavelength, sp.mass)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(a_avail > 0, tr.deceleration / a_avail, np.inf)
    worst = float(np.max(ratio))
    i = int(np.argmax(ratio))
    out.append(upper("deceleration", worst, 1.0, "",
                     f"design deceleration is {worst:.3g} of the largest force the light gives (at z = "
                     f"{tr.position[i]:.3g} m, s = {tr.saturation[i]:.3g}); common practice keeps it to 0.5-0.75",
                     "lower chirp.margin (η) for more reserve against intensity and alignment drifts"))
    out.append(upper("end_velocity", sc.chirp.end_velocity, sc.target.capture_velocity, "m/s",
                     f"atoms leave the chirp at {sc.chirp.end_velocity:g} m/s; the target holds up to "
                     f"{sc.target.capture_velocity:g} m/s",
                     "lower chirp.end_velocity"))
    if sp.kind == "molecule" or sp.loss_per_photon > 0:
        n = plan.photons_per_atom
        surv = float(physics.survival_fraction(n, sp.loss_per_photon))
        out.append(lower("photon_budget", surv, MIN_SURVIVAL, "",
                         f"{surv:.3g} of the molecules survive the {n:.4g} photons needed (loss "
                         f"{sp.loss_per_photon:.3g} per photon)",
                         "slow over a smaller velocity range (chirp.start_velocity / end_velocity) "
                         "or close more loss channels"))
    return out


def period_finding(plan) -> Finding:
    ch = plan.scenario.chirp
    need = plan.chirp_start + plan.chirp_duration + ch.hold + ch.return_time
    return upper("period", need, ch.period, "s",
                 f"chirp start + chirp + hold + return = {plan.chirp_start * 1e3:.4g} + "
                 f"{plan.chirp_duration * 1e3:.4g} + {ch.hold * 1e3:.4g} + {ch.return_time * 1e3:.4g} = "
                 f"{need * 1e3:.4g} ms of a {ch.period * 1e3:.4g} ms period",
                 "lengthen chirp.period, or shorten chirp.hold / chirp.return_time")


def _dense(schedule, n=GRID):
    ts = [np.linspace(seg.start, np.nextafter(seg.end, seg.start), n) for seg in schedule.segments]
    return np.concatenate(ts)


def _fmt(value, unit):
    from sweepgen._cli import si

    return si(value, unit)


def hardware_findings(report: CheckReport, schedule, rate=None) -> None:
    """Laser and generator rules for a schedule; appends to ``report.findings``."""
    from sweepgen import sampling
    from sweepgen.render import drive_range

    plan, laser, gen = report.plan, report.laser, report.generator
    sc = plan.scenario
    chain, lim = laser.chain, laser.limits
    unit = chain.drive_unit
    add = report.findings.append

    t = _dense(schedule)
    det = schedule.detuning(t)
    drate = schedule.rate(t)
    drive = chain.to_drive(det)
    gain = chain.gain(det)
    # the exact extremes (as the renderer finds them), so the codes chosen here are the ones rendered and
    # every sample the tracking simulation plays lies inside the checked code window
    dmin, dmax = drive_range(schedule, chain)

    span = float(np.max(det) - np.min(det))
    if lim.mode_hop_free is None:
        add(info("mode_hop_free", f"the laser itself is not tuned (no limits.mode_hop_free); the sweep spans "
                                  f"{_fmt(span, 'Hz')}", span, "Hz"))
    else:
        add(upper("mode_hop_free", span, lim.mode_hop_free, "Hz",
                  f"the sweep spans {_fmt(span, 'Hz')} of a {_fmt(lim.mode_hop_free, 'Hz')} mode-hop-free range",
                  "slow over a smaller velocity range, or use a laser with a wider mode-hop-free range"))
    for kind, rule, advice in (("chirp", "chirp_rate", "lower chirp.margin or light.saturation (gentler chirp)"),
                               ("return", "return_rate", "lengthen chirp.return_time")):
        if schedule.segment(kind) is None:
            add(info(rule, f"no {kind} segment"))
            continue
        r = schedule.max_abs_rate(kind)
        add(upper(rule, r, lim.max_chirp_rate, "Hz/s",
                  f"|dΔ/dt| during the {kind} reaches {_fmt(r, 'Hz/s')}; the laser allows {_fmt(lim.max_chirp_rate, 'Hz/s')}",
                  advice))
    add(within("actuator_range", dmin, dmax, lim.input_min, lim.input_max, unit,
               f"the drive spans {dmin:.5g} to {dmax:.5g} {unit}; the actuator's safe input range is "
               f"{lim.input_min:.5g} to {lim.input_max:.5g} {unit}",
               "move the chain's set point (set_point / reference) so the sweep sits inside the safe range, "
               "or slow over a smaller velocity range"))
    slew = float(np.max(np.abs(gain * drate)))
    if lim.max_slew is None:
        add(info("slew_rate", f"the drive changes at up to {_fmt(slew, unit + '/s')} (no limits.max_slew given)",
                 slew, f"{unit}/s"))
    else:
        add(upper("slew_rate", slew, lim.max_slew, f"{unit}/s",
                  f"the drive changes at up to {_fmt(slew, unit + '/s')}; the actuator allows "
                  f"{_fmt(lim.max_slew, unit + '/s')}", "lengthen chirp.return_time or lower the chirp rate"))
    for st, up in chain.upstream_values(det):
        for r in st.ranges():
            vals = st.range_values(up, r)
            add(within("stage_range", float(np.min(vals)), float(np.max(vals)), r.low, r.high, r.unit,
                       f"{r.label}: {np.min(vals):.6g} to {np.max(vals):.6g} {r.unit}, range "
                       f"{r.low:.6g} to {r.high:.6g} {r.unit}" + (f" ({r.key})" if r.key else ""),
                       "move the set point of the stage, or narrow the sweep"))

    # -- generator -----------------------------------------------------------------
    out = gen.output
    want = "voltage" if unit == "V" else "frequency"
    if out.kind != want:
        add(Finding("output_kind", "fail", None, None, "", None,
                    f"the laser's chain ends in {unit} but generator '{gen.key}' has a {out.kind} output",
                    f"use a generator with a {want} output"))
        return
    add(info("output_kind", f"{out.kind} output for a chain ending in {unit}"))
    if out.kind == "voltage":
        k = out.delivered_factor
        add(within("generator_range", dmin, dmax, out.range_min * k, out.range_max * k, "V",
                   f"the actuator needs {dmin:.5g} to {dmax:.5g} V; generator '{gen.key}' delivers "
                   f"{out.range_min * k:.5g} to {out.range_max * k:.5g} V into the real load (programmed "
                   f"{out.range_min:g} to {out.range_max:g} V, ×{k:g} at the load)",
                   "check the generator's termination setting and the real load, or use a wider output"))
    else:
        add(within("generator_range", dmin, dmax, out.range_min, out.range_max, "Hz",
                   f"the DDS must make {dmin / 1e6:.6g} to {dmax / 1e6:.6g} MHz; generator '{gen.key}' makes "
                   f"{out.range_min / 1e6:g} to {out.range_max / 1e6:g} MHz",
                   "change the offset lock's divider or reference so the DDS frequency fits"))
    dds = chain.dds
    if dds is not None:
        same = out.kind == "frequency" and out.clock == dds.clock and out.word_bits == dds.bits
        add(Finding("dds_match", "pass" if same else "fail", dds.clock, out.clock, "Hz", None,
                    f"the chain's DDS stage has a {_fmt(dds.clock, 'Hz')} clock and {dds.bits}-bit words; generator "
                    f"'{gen.key}' has {_fmt(out.clock, 'Hz') if out.clock else 'no clock'} and "
                    f"{out.word_bits}-bit words", "" if same else
                    "make the DDS stage of the laser profile and the generator profile describe the same DDS"))
    ch_ok = sc.drive.channel <= gen.channels
    add(Finding("channel", "pass" if ch_ok else "fail", sc.drive.channel, gen.channels, "", None,
                f"drive.channel {sc.drive.channel} of {gen.channels} channel(s)",
                "" if ch_ok else f"set drive.channel to 1..{gen.channels}"))

    lw = sc.species.linewidth
    try:
        choice = sampling.choose_rate(schedule, chain, gen, sc.drive, linewidth=lw, strict=False, rate=rate)
    except CheckFailed as exc:
        add(Finding("sample_rate", "fail", None, None, "Sa/s", None, str(exc),
                    "see the message: the limit that wins is named"))
        return
    report.rate = choice
    sm = gen.sampling
    if choice.limited_by.startswith("fixed"):
        if sm.rates is not None:
            okr = sm.allows(choice.rate)
            add(Finding("sample_rate", "pass" if okr else "fail", choice.rate, None, "Sa/s", None,
                        f"{_fmt(choice.rate, 'Sa/s')} ({choice.limited_by}); generator '{gen.key}' plays "
                        + ", ".join(_fmt(r, "Sa/s") for r in sm.rates),
                        "" if okr else "pick one of the listed rates"))
        else:
            add(within("sample_rate", choice.rate, choice.rate, sm.rate_min, sm.rate_max, "Sa/s",
                       f"{_fmt(choice.rate, 'Sa/s')} ({choice.limited_by}); generator '{gen.key}' plays "
                       f"{_fmt(sm.rate_min, 'Sa/s')} to {_fmt(sm.rate_max, 'Sa/s')}",
                       "pick a rate the generator plays, or remove drive.sample_rate for an automatic choice"))
            if report.findings[-1].status != "fail":     # a fixed rate near a rate limit is fine
                report.findings[-1].status = "pass"
                report.findings[-1].margin = None
                report.findings[-1].advice = ""
    else:
        add(info("sample_rate", choice.reason, choice.rate, "Sa/s"))
    add(upper("record_length", choice.count, sm.memory, "samples",
              f"one period is {choice.count} samples at {_fmt(choice.rate, 'Sa/s')}; the memory holds {sm.memory}",
              f"lower the rate to at most {_fmt(sm.memory / schedule.period, 'Sa/s')} or shorten chirp.period"))
    if report.findings[-1].status == "warn":            # filling the memory is not a hazard
        report.findings[-1].status = "pass"
        report.findings[-1].advice = ""
    if choice.padding or abs(choice.period_error) > 0:
        add(Finding("granularity", "warn", choice.padding, 0, "samples", None,
                    f"{choice.period_count} samples per period (table {choice.period_error * 1e9:+.3g} ns off the "
                    f"period), padded to {choice.count} for granularity {sm.granularity} / minimum length "
                    f"{sm.min_length}: play the table triggered once per period",
                    "choose a rate at which one period is a multiple of the granularity"))
    else:
        add(info("granularity", f"{choice.count} samples = one period exactly, a multiple of {sm.granularity}",
                 choice.padding, "samples"))
    add(upper("step_per_sample", choice.step, choice.max_step, "Hz",
              f"the detuning moves up to {_fmt(choice.step, 'Hz')} per sample at {_fmt(choice.rate, 'Sa/s')}",
              "raise the sample rate, lengthen chirp.return_time, or raise drive.max_step"))

    quant = None
    failed_range = any(f.status == "fail" and f.rule in ("actuator_range", "generator_range")
                       for f in report.findings)
    if not failed_range:
        try:
            quant = sampling.quantisation(dmin, dmax, gen, chain)
        except CheckFailed as exc:
            add(Finding("generator_range", "fail", None, None, unit, None, str(exc), "see the message"))
    report.quant = quant
    if quant is not None:
        with np.errstate(divide="ignore"):
            per_code = float(np.max(np.abs(quant.code_scale / gain)))
        what = "DAC code" if quant.output == "voltage" else "DDS word LSB"
        add(upper("step_per_code", per_code, choice.max_step, "Hz",
                  f"one {what} moves the detuning by up to {_fmt(per_code, 'Hz')} ({quant.bits} bits"
                  + (f", {quant.amplitude:.4g} V peak-to-peak programmed" if quant.amplitude else "") + ")",
                  "use a generator with more DAC bits, or a chain with less gain"))
        if dds is not None and quant.output == "frequency":
            err = np.abs(dds.rounding_error(drive) / gain)
            worst = float(np.max(err))
            add(upper("dds_rounding", worst, choice.max_step, "Hz",
                      f"rounding to {dds.bits}-bit tuning words moves the detuning by up to {_fmt(worst, 'Hz')} "
                      f"(word LSB {_fmt(dds.resolution, 'Hz')} at the DDS)",
                      "use a longer tuning word"))

    # -- tracking through the actuator response ------------------------------------
    tracking_findings(report, schedule, choice.rate, quant)


def tracking_findings(report: CheckReport, schedule, rate: float, quant=None) -> None:
    from sweepgen.response import simulate

    plan, laser = report.plan, report.laser
    sc = plan.scenario
    add = report.findings.append
    tr = simulate(schedule, laser.chain, laser.response, rate, quant=quant)
    report.tracking = tr
    lag_det = np.asarray(plan.trajectory.lag) / sc.species.wavelength
    tol = sc.drive.tracking_fraction * float(np.min(lag_det))
    kinds = schedule.kinds(tr.time)
    err = np.abs(tr.error)
    in_chirp = kinds == "chirp"
    model = laser.response.model
    desc = {"none": "an ideal actuator",
            "first-order": f"a first-order response (corner {_fmt(laser.response.corner or 0, 'Hz')})",
            "second-order": f"a second-order response (resonance {_fmt(laser.response.resonance or 0, 'Hz')}, "
                            f"Q {laser.response.q})"}[model]
    if np.any(in_chirp):
        worst = float(np.max(err[in_chirp]))
        at = float(tr.time[in_chirp][np.argmax(err[in_chirp])])
        add(upper("tracking", worst, tol, "Hz",
                  f"through {desc} the laser is off the planned detuning by up to {_fmt(worst, 'Hz')} during "
                  f"the chirp (at {at * 1e3:.4g} ms); tolerance {sc.drive.tracking_fraction:g} × the lag detuning "
                  f"{_fmt(tol / sc.drive.tracking_fraction, 'Hz')}",
                  "lower the chirp rate (chirp.margin), use a faster actuator, or raise drive.tracking_fraction"))
    chirp = schedule.segment("chirp")
    ret = schedule.segment("return")
    if chirp is not None and ret is not None:
        n = len(tr.time)
        i0 = int(round(chirp.start * tr.rate)) % n
        before = err[i0 - 1] if i0 > 0 else err[n - 1]
        value = float(max(err[i0], before))
        # settling time after the end of the return
        i_end = int(math.ceil(ret.end * tr.rate))
        idx = (np.arange(i_end, i_end + n) % n)
        seq = err[idx]
        rest = (chirp.start + schedule.period - ret.end) % schedule.period or schedule.period
        above = np.flatnonzero(seq[: max(int(round(rest * tr.rate)), 1)] > tol)
        settle = (above[-1] + 1) / tr.rate if above.size else 0.0
        add(upper("return_settling", value, tol, "Hz",
                  f"when the next chirp starts the laser is {_fmt(value, 'Hz')} from the start detuning; it settles "
                  f"within {_fmt(tol, 'Hz')} {_fmt(settle, 's') if settle else 'at once'} after the return ({rest * 1e3:.4g} ms available)",
                  "lengthen chirp.return_time or chirp.period, or use a better damped actuator"))
