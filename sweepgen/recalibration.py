"""Calibrating one stage of a laser's tuning chain from measurements (``sweepgen calibrate``).

The measured points are pairs of the drive applied to the stage and what the
light did, as one of (see :mod:`sweepgen.measurements` for the file formats):

* ``detuning``: the optical detuning itself;
* ``frequency``: the absolute optical frequency (a wavemeter); the detuning is
  ``f − f0`` with the transition frequency ``f0`` given, or ``c/λ`` of a species;
* ``beat``: a beat note with a reference laser at detuning ``reference``:
  ``Δ = reference + sign · beat`` (``sign = +1`` when the laser is above the
  reference);
* ``rf``: the stage's own input frequency (e.g. a VCO's output on a counter),
  for a stage further down the chain.

An optical measurement is carried through the stages before the calibrated one
(an AOM, an offset lock) to the stage's own upstream frequency, which is what
the stage's curve maps the drive to. The fit (:mod:`sweepgen.calibration`)
becomes a ``calibrated`` stage (``vco`` for a VCO) in a NEW laser profile,
which is loaded back and must reproduce the fit before it is written.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from sweepgen.errors import InputError

CALIBRATABLE = ("analog", "calibrated", "vco")


@dataclass
class Request:
    """What ``sweepgen calibrate`` was asked (SI units)."""

    measurements: str
    laser: str
    stage: str
    output: str | None = None
    degree: int | None = None
    outlier_sigma: float = 5.0
    drive_range: tuple | None = None        # (low, high) in drive units
    reference: float | None = None          # Hz, detuning of the beat-note reference
    beat_sign: int = 1
    transition: float | None = None         # Hz, absolute optical frequency of the transition
    overwrite: bool = False


@dataclass
class Result:
    """A finished calibration: the fit, the points, the new profile."""

    request: Request
    laser: object
    index: int
    stage_name: str
    drive: np.ndarray                  # drive units, as used (after --range)
    upstream: np.ndarray               # Hz of the stage's upstream frequency
    measured_kind: str
    fit: object                        # calibration.CalibrationFit
    optical_factor: float              # |optical detuning per upstream Hz|
    drive_unit: str
    new_laser: object = None
    output: Path | None = None
    kept_layout: bool = True
    text: str = ""
    change: float | None = None        # Hz: largest change of the detuning against the old stage
    digest: str = ""
    notes: list = field(default_factory=list)


def find_stage(chain, ref: str) -> int:
    """Index of the stage named ``ref``: its name, its kind (if unique) or its position (1 = first)."""
    stages = chain.stages
    for i, st in enumerate(stages):
        if st.name == ref:
            return i
    kinds = [i for i, st in enumerate(stages) if st.kind == ref]
    if len(kinds) == 1:
        return kinds[0]
    if ref.isdigit() and 1 <= int(ref) <= len(stages):
        return int(ref) - 1
    names = ", ".join(f"{i + 1}: '{st.name}' ({st.kind})" for i, st in enumerate(stages))
    raise InputError(f"no stage {ref!r} in the chain (stages {names}); give a name, a kind or a position",
                     key="--stage")


def _upstream(chain, index: int, optical):
    """Optical detunings carried through the stages before ``index``."""
    x = np.asarray(optical, dtype=float)
    for st in chain.stages[:index]:
        x = st.forward(x)
    return x


def _optical_factor(chain, index: int) -> float:
    """|d detuning / d upstream| of stage ``index`` (the stages before it are linear)."""
    g = 1.0
    x = np.array([0.0])
    for st in chain.stages[:index]:
        g *= float(st.derivative(x)[0])
        x = st.forward(x)
    return 1.0 / abs(g) if g else 1.0


def measured_upstream(m, req: Request, chain, index: int) -> tuple[np.ndarray, str]:
    """The measured column as the stage's upstream frequency (Hz), and its kind."""
    col = m.find("detuning", "frequency", "beat", "rf")
    if col is None:
        m.require("detuning", "Hz", "what the light did at each drive: detuning, frequency, beat or rf")
    what = f"{col.kind} of the light at each drive"
    values = m.values(col, "Hz", what)
    if col.kind == "rf":
        if index == 0:
            raise InputError(f"{col.label}: an rf column calibrates a stage fed by an RF frequency; stage "
                             f"{index + 1} is fed by the optical detuning (give detuning, frequency or beat)",
                             file=str(m.path))
        return values, "rf"
    if col.kind == "frequency":
        if req.transition is None:
            raise InputError(f"{col.label} holds absolute optical frequencies: give the transition frequency "
                             f"(--transition, or --species for c/λ)", file=str(m.path), key="--transition")
        values = values - req.transition
    elif col.kind == "beat":
        if req.reference is None:
            raise InputError(f"{col.label} holds beat notes: give the reference laser's detuning with "
                             f"--reference (and --beat-sign -1 if the laser is below it)",
                             file=str(m.path), key="--reference")
        values = req.reference + req.beat_sign * values
    return _upstream(chain, index, values), col.kind


def calibrate(req: Request) -> Result:
    """Fit the measurements, build the new profile and check it loads and reproduces the fit."""
    from sweepgen import calibration, measurements
    from sweepgen.laser import load_laser

    laser = load_laser(req.laser, key="--laser")
    index = find_stage(laser.chain, req.stage)
    stage = laser.chain.stages[index]
    if stage.kind not in CALIBRATABLE:
        raise InputError(f"stage '{stage.name}' ({stage.kind}) is an exact frequency relation; only stages "
                         f"driven by a voltage ({', '.join(CALIBRATABLE)}) are calibrated from measurements",
                         key="--stage")
    m = measurements.read(req.measurements)
    unit = stage.down_unit
    drive = m.require("drive", unit, f"the drive applied to stage '{stage.name}'")
    upstream, kind = measured_upstream(m, req, laser.chain, index)
    if req.drive_range is not None:
        keep = (drive >= req.drive_range[0]) & (drive <= req.drive_range[1])
        drive, upstream = drive[keep], upstream[keep]
    try:
        fit = calibration.fit_measurements(drive, upstream, degree=req.degree, outlier_sigma=req.outlier_sigma)
    except calibration.CalibrationRefused as exc:
        raise InputError(f"calibration refused: {exc}", file=str(m.path)) from None
    result = Result(req, laser, index, stage.name, drive, upstream, kind, fit,
                    _optical_factor(laser.chain, index), unit)
    result.digest = hashlib.sha256(Path(req.measurements).read_bytes()).hexdigest()
    build_profile(result)
    return result


def _q(value: float, unit: str) -> str:
    return f"{float(value)!r} {unit}"


def stage_table(result: Result) -> dict:
    """The ``[[chain]]`` table of the calibrated stage (every quantity with its unit)."""
    fit, stage = result.fit, result.laser.chain.stages[result.index]
    table = {"stage": "vco" if stage.kind == "vco" else "calibrated", "name": stage.name, "fit": "polynomial",
             "range": [_q(fit.drive_min, result.drive_unit), _q(fit.drive_max, result.drive_unit)],
             "coefficients": [_q(c, "Hz") for c in fit.poly.coef],
             "points": int(fit.used.sum()), "outliers": int((~fit.used).sum()),
             "rms_residual": _q(fit.residual_rms, "Hz"), "max_residual": _q(fit.residual_max, "Hz"),
             "uncertainty": _q(fit.uncertainty_max(), "Hz")}
    if fit.hysteresis is not None:
        table["hysteresis"] = _q(abs(fit.hysteresis["max"]), "Hz")
    table.update({"method": fit.method, "measurements": Path(result.request.measurements).name,
                  "measurements_sha256": result.digest,
                  "calibrated": datetime.now(timezone.utc).isoformat(timespec="seconds")})
    return table


def build_profile(result: Result) -> None:
    """The new profile's text; loaded back strictly, and its stage must reproduce the fit."""
    import tomllib

    from sweepgen.laser import laser_from_dict
    from sweepgen.profile_writer import replace_stage

    laser = result.laser
    source = Path(laser.path).read_text(encoding="utf-8")
    table = stage_table(result)
    comment = (f"calibrated by sweepgen calibrate from {table['measurements']} ({table['points']} points, "
               f"{table['outliers']} outliers left out); residuals and uncertainty in Hz of the "
               f"{'RF frequency' if result.index else 'optical detuning'}")
    text, kept = replace_stage(source, result.index, table, comments=[comment])
    out = Path(result.request.output) if result.request.output else Path(f"{Path(laser.path).stem}-calibrated.toml")
    new = laser_from_dict(tomllib.loads(text), out)
    cal = new.chain.stages[result.index].calibration
    grid = np.linspace(result.fit.drive_min, result.fit.drive_max, 257)
    if not np.allclose(cal.value(grid), result.fit.poly(grid), rtol=1e-12, atol=1e-3):
        raise AssertionError("the written calibration does not reproduce the fit")
    result.new_laser, result.output, result.text, result.kept_layout = new, out, text, kept
    old = laser.chain
    det = new.chain.to_detuning(grid)
    result.change = float(np.max(np.abs(old.to_detuning(grid) - det)))


def write(result: Result) -> Path:
    """Write the new profile (never over an existing file unless asked)."""
    from sweepgen.profile_writer import write_new

    return write_new(result.output, result.text, overwrite=result.request.overwrite,
                     protect=[result.laser.path])


def to_json(result: Result) -> dict:
    """The ``calibrate --json`` document (SI units; residuals in Hz)."""
    fit = result.fit
    k = result.optical_factor
    lo, hi = fit.value_range()
    outliers = [{"drive": float(result.drive[i]), "measured": float(result.upstream[i]),
                 "residual": float(fit.residuals[i])} for i in fit.outliers[:100]]
    opt = result.new_laser.chain.to_detuning(np.array([fit.drive_min, fit.drive_max]))
    return {
        "laser": str(result.laser.path), "stage": result.stage_name, "stage_index": result.index,
        "measured": result.measured_kind, "measurements": str(result.request.measurements),
        "measurements_sha256": result.digest, "profile": str(result.output), "layout_kept": result.kept_layout,
        "method": fit.method, "degree": fit.degree, "points": fit.points, "used": int(fit.used.sum()),
        "cross_validation": fit.cross_validation,
        "residual_of": "RF frequency" if result.index else "optical detuning",
        "residual_rms": fit.residual_rms, "residual_max": fit.residual_max,
        "residual_rms_optical": fit.residual_rms * k, "residual_max_optical": fit.residual_max * k,
        "uncertainty": fit.uncertainty_max(), "uncertainty_optical": fit.uncertainty_max() * k,
        "outlier_count": int((~fit.used).sum()), "outliers": outliers,
        "hysteresis": fit.hysteresis,
        "usable_range": {"drive": [fit.drive_min, fit.drive_max], "drive_unit": result.drive_unit,
                         "upstream": [lo, hi], "detuning": sorted(float(v) for v in opt)},
        "change_from_old": result.change,
        "coefficients": [float(c) for c in fit.poly.coef],
    }
