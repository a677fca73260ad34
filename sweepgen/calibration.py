"""Fitting a tuning curve (frequency versus drive) to measured points.

One method, used for the points typed into a laser profile and for whole
measurement files (``sweepgen calibrate``): a least-squares polynomial
``f(u)`` of the drive ``u`` over the measured range, written in the scaled
variable ``x = (2u − (u_min + u_max)) / (u_max − u_min)`` (``numpy.polynomial``
with ``domain = [u_min, u_max]``, ``window = [-1, 1]``), so that its
coefficients stay well conditioned and can be written into a profile exactly.

Why a polynomial with its degree chosen by cross-validation (and not a
smoothing spline): tuning curves of piezos, diode currents and VCOs are smooth
and gently curved, so a few coefficients describe them; a global polynomial
gives the covariance of its coefficients, hence the standard uncertainty of
the fitted curve at every drive (the band the tests hold it to); its
monotonicity over the range is decided exactly from the real roots of its
derivative; and a handful of coefficients is what the new profile stores, so
a calibration made from 100 000 points costs nothing to load. A smoothing
spline would follow slow drifts and hysteresis wiggles of one sweep, and
needs its knots stored.

The degree is the smallest whose K-fold cross-validated prediction error is
within one standard error of the best degree (the "one-standard-error rule":
T. Hastie, R. Tibshirani and J. Friedman, *The Elements of Statistical
Learning*, 2nd ed., Springer 2009, §7.10, recalled). Outliers are points more
than ``outlier_sigma`` robust standard deviations (1.4826 × median absolute
deviation, a Gaussian-consistent scale: common practice) from the fit; they
are reported and left out of the final fit.

All frequencies are in Hz, drives in their own unit (V, or Hz for an RF drive).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.polynomial import Polynomial
from numpy.polynomial import polynomial as P

#: Fewer points than this are taken as exact calibration points (typed by hand, each meaning
#: itself): any reversal between two of them is refused, and a drive may appear only once. From
#: this many on, the points are noisy measurements and a reversal must stand out of the noise.
EXACT_POINTS = 40
#: Smallest number of points ``sweepgen calibrate`` fits.
MIN_POINTS = 6
#: Highest polynomial degree tried by the cross-validation.
MAX_DEGREE = 7
#: Folds of the cross-validation (leave-one-out for fewer points).
FOLDS = 10
#: Default outlier threshold, in robust standard deviations of the residuals.
OUTLIER_SIGMA = 5.0
#: A reversal of the data (or of a fit) is significant beyond this many standard uncertainties.
SIGNIFICANCE = 3.0
#: A gap between neighbouring drive values is refused when it is larger than both this many
#: median spacings and :data:`GAP_FRACTION` of the measured range.
GAP_SPACINGS = 4.0
GAP_FRACTION = 0.1
#: Rows of the dense grid on which curves are evaluated (uncertainty maximum, hysteresis).
GRID = 2049


class CalibrationRefused(ValueError):
    """The points cannot make a calibration; the message says why and what to do."""


@dataclass
class PolyFit:
    """A least-squares polynomial ``value = poly(drive)`` with its coefficient covariance."""

    poly: Polynomial
    cov: np.ndarray            # covariance of poly.coef (window basis), Hz²
    sigma: float               # residual standard deviation (Hz), from the residual sum of squares
    dof: int                   # points − coefficients

    @property
    def degree(self) -> int:
        return len(self.poly.coef) - 1

    def uncertainty(self, u) -> np.ndarray:
        """Standard uncertainty (1σ, Hz) of the fitted curve at drives ``u``."""
        x = self.poly.mapparms()[0] + self.poly.mapparms()[1] * np.asarray(u, dtype=float)
        v = P.polyvander(x, self.degree)
        return np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", v, self.cov, v), 0.0))


def poly_fit(u, value, degree: int, domain=None) -> PolyFit:
    """Least-squares polynomial of ``degree`` through ``(u, value)``.

    The covariance is ``s² (AᵀA)⁻¹`` with ``s² = RSS / (n − degree − 1)``, the
    same scaling as ``numpy.polyfit(..., cov=True)``.
    """
    u = np.asarray(u, dtype=float)
    value = np.asarray(value, dtype=float)
    lo, hi = (float(u.min()), float(u.max())) if domain is None else domain
    shape = Polynomial([0.0, 1.0], domain=[lo, hi], window=[-1.0, 1.0])
    off, scl = shape.mapparms()
    a = P.polyvander(off + scl * u, degree)
    coef, *_ = np.linalg.lstsq(a, value, rcond=None)
    resid = value - a @ coef
    dof = len(u) - degree - 1
    s2 = float(resid @ resid) / dof if dof > 0 else 0.0
    cov = s2 * np.linalg.pinv(a.T @ a)
    return PolyFit(Polynomial(coef, domain=[lo, hi], window=[-1.0, 1.0]), cov, math.sqrt(s2), dof)


def cross_validation(u, value, max_degree: int = MAX_DEGREE, folds: int = FOLDS) -> list[dict]:
    """K-fold prediction error per degree: ``[{"degree", "mse", "se"}]`` (Hz²).

    The points, sorted by drive, are dealt to the folds in turn (point i to fold
    i mod K), so every fold spans the whole range and the result is repeatable.
    Degrees that would leave a training set without two spare points are skipped.
    Each training fit solves the normal equations in the Legendre basis of the
    scaled drive (well conditioned up to :data:`MAX_DEGREE`), built from the
    whole set's sums minus the fold's, so 100 000 points cost a few passes.
    """
    from numpy.polynomial import legendre

    u = np.asarray(u, dtype=float)
    value = np.asarray(value, dtype=float)
    n = len(u)
    k = min(folds, n)
    fold = np.arange(n) % k
    lo, hi = float(u.min()), float(u.max())
    x = (2.0 * u - (lo + hi)) / (hi - lo)
    top = max(1, min(max_degree, n - math.ceil(n / k) - 3))
    a = legendre.legvander(x, top)
    parts = [(a[fold == j], value[fold == j]) for j in range(k)]
    gram = [(af.T @ af, af.T @ yf) for af, yf in parts]
    g_all = sum(g for g, _ in gram)
    b_all = sum(b for _, b in gram)
    rows = []
    for degree in range(1, max_degree + 1):
        if n - math.ceil(n / k) < degree + 3:
            break
        m = degree + 1
        errs = []
        for (af, yf), (g, b) in zip(parts, gram):
            coef = np.linalg.solve((g_all - g)[:m, :m], (b_all - b)[:m])
            errs.append(np.mean((yf - af[:, :m] @ coef) ** 2))
        errs = np.asarray(errs)
        rows.append({"degree": degree, "mse": float(errs.mean()),
                     "se": float(errs.std(ddof=1) / math.sqrt(k)) if k > 1 else 0.0})
    return rows


def choose_degree(rows: list[dict]) -> int:
    """The smallest degree within one standard error of the best cross-validated error."""
    best = min(rows, key=lambda r: r["mse"])
    limit = best["mse"] + best["se"]
    return min(r["degree"] for r in rows if r["mse"] <= limit)


def turning_point(poly: Polynomial, lo: float, hi: float) -> float | None:
    """A drive inside ``(lo, hi)`` where the polynomial's slope changes sign, or None (monotone)."""
    roots = poly.deriv().roots()
    real = roots[np.abs(roots.imag) <= 1e-9 * max(1.0, abs(hi - lo))].real
    inside = np.sort(real[(real > lo) & (real < hi)])
    for r in inside:
        eps = 1e-6 * (hi - lo)
        a, b = poly.deriv()(max(lo, r - eps)), poly.deriv()(min(hi, r + eps))
        if np.sign(a) != np.sign(b) and a != 0 and b != 0:
            return float(r)
    if poly.deriv()(lo) == 0 and poly.deriv()(hi) == 0 and len(poly.coef) > 1:
        return float(lo)
    return None


def robust_sigma(resid) -> float:
    """1.4826 × median absolute deviation (a Gaussian-consistent scale; common practice)."""
    resid = np.asarray(resid, dtype=float)
    return float(1.4826 * np.median(np.abs(resid - np.median(resid))))


def _fmt(u: float) -> str:
    return f"{u:.6g}"


def reversal(u, value, sigma: float, increasing: bool) -> tuple[float, float, float] | None:
    """Where sorted data runs against the trend by more than the noise allows.

    Fewer than :data:`EXACT_POINTS` points: any step against the trend. More:
    the points, sorted by drive, are averaged in groups of ``n // 20`` and a
    group mean may fall behind an earlier one by at most :data:`SIGNIFICANCE` ×
    sqrt(2) × sigma / sqrt(group size). Returns ``(drive_from, drive_to, drop)``.
    """
    u = np.asarray(u, dtype=float)
    x = np.asarray(value, dtype=float) * (1.0 if increasing else -1.0)
    n = len(u)
    if n < EXACT_POINTS:
        groups, size, allowed = u, 1, 0.0
        means = x
    else:
        size = n // 20
        m = n // size
        means = x[: m * size].reshape(m, size).mean(axis=1)
        groups = u[: m * size].reshape(m, size).mean(axis=1)
        allowed = SIGNIFICANCE * math.sqrt(2.0) * sigma / math.sqrt(size)
    best = np.maximum.accumulate(means)
    drop = best - means
    i = int(np.argmax(drop))
    if drop[i] > allowed:
        j = int(np.argmax(means[: i + 1]))
        return float(groups[j]), float(groups[i]), float(drop[i])
    return None


def find_gap(u) -> tuple[float, float] | None:
    """The widest gap between neighbouring drive values if it is too wide (see :data:`GAP_SPACINGS`)."""
    s = np.unique(np.asarray(u, dtype=float))
    if len(s) < 3:
        return None
    d = np.diff(s)
    i = int(np.argmax(d))
    span = s[-1] - s[0]
    if d[i] > GAP_SPACINGS * float(np.median(d)) and d[i] > GAP_FRACTION * span:
        return float(s[i]), float(s[i + 1])
    return None


def sweep_branches(u_in_order, min_run: int) -> np.ndarray | None:
    """+1 / −1 per point for the up / down sweep it belongs to (file order), or None.

    Consecutive points with rising drive are one run, falling drive another
    (repeated readings at one drive join the run they are in). Only runs of at
    least ``min_run`` points count; when they do not hold 80 % of the points,
    or one direction is missing, there are no sweeps to compare (None).
    """
    u = np.asarray(u_in_order, dtype=float)
    step = np.sign(np.diff(u))
    if not np.any(step):
        return None
    # a repeated reading (step 0) takes the direction of the step before it (or after, at the start)
    idx = np.where(step != 0, np.arange(len(step)), 0)
    np.maximum.accumulate(idx, out=idx)
    first = step[np.flatnonzero(step)[0]]
    step = np.where(step[idx] != 0, step[idx], first)
    direction = np.concatenate([[step[0]], step])
    edges = np.flatnonzero(np.diff(direction)) + 1
    keep = np.zeros(len(u), dtype=bool)
    for a, b in zip(np.concatenate([[0], edges]), np.concatenate([edges, [len(u)]])):
        if b - a >= min_run:
            keep[a:b] = True
    if keep.mean() < 0.8 or not (np.any(direction[keep] > 0) and np.any(direction[keep] < 0)):
        return None
    return np.where(keep, direction, 0).astype(int)


@dataclass
class CalibrationFit:
    """A fitted tuning curve and what a physicist judges it by (Hz for frequencies)."""

    fit: PolyFit
    drive_min: float
    drive_max: float
    increasing: bool
    cross_validation: list
    points: int
    used: np.ndarray                  # bool per input point: in the final fit
    residuals: np.ndarray             # Hz, every input point against the final fit
    method: str
    hysteresis: dict | None = None
    notes: list = field(default_factory=list)

    @property
    def poly(self) -> Polynomial:
        return self.fit.poly

    @property
    def degree(self) -> int:
        return self.fit.degree

    @property
    def outliers(self) -> np.ndarray:
        return np.flatnonzero(~self.used)

    @property
    def residual_rms(self) -> float:
        r = self.residuals[self.used]
        return float(np.sqrt(np.mean(r ** 2)))

    @property
    def residual_max(self) -> float:
        return float(np.max(np.abs(self.residuals[self.used])))

    def uncertainty_max(self) -> float:
        """Largest standard uncertainty (1σ, Hz) of the fitted curve over the calibrated range."""
        return float(np.max(self.fit.uncertainty(np.linspace(self.drive_min, self.drive_max, GRID))))

    def value_range(self) -> tuple[float, float]:
        a, b = float(self.poly(self.drive_min)), float(self.poly(self.drive_max))
        return (a, b) if a <= b else (b, a)


def check_points(u, value, *, exact: bool | None = None) -> None:
    """Refuse lists that cannot be a calibration: lengths, non-finite values, repeated drives."""
    u = np.asarray(u, dtype=float)
    value = np.asarray(value, dtype=float)
    if u.shape != value.shape or u.ndim != 1:
        raise CalibrationRefused(f"{len(u)} drive values but {len(value)} measured values; give one per point")
    if not (np.all(np.isfinite(u)) and np.all(np.isfinite(value))):
        raise CalibrationRefused("a drive or measured value is not a finite number")
    exact = len(u) < EXACT_POINTS if exact is None else exact
    if exact:
        s = np.sort(u)
        same = np.flatnonzero(np.diff(s) == 0)
        if same.size:
            raise CalibrationRefused(f"the drive value {s[same[0]]:g} appears twice (with fewer than "
                                     f"{EXACT_POINTS} points each point is a calibration point)")
    if np.ptp(u) == 0:
        raise CalibrationRefused("every point has the same drive; measure over a range of drives")


def fit_points(u, value, degree: int | None = None) -> CalibrationFit:
    """Fit the points of a profile's calibrated stage with a given (or default) degree.

    The default degree is ``min(3, n − 2)``; at least ``degree + 2`` points are
    needed so that the residuals mean something.
    """
    u = np.asarray(u, dtype=float)
    value = np.asarray(value, dtype=float)
    n = len(u)
    check_points(u, value)
    if n < 3:
        raise CalibrationRefused(f"too short: {n} point(s); a calibration needs at least 3 measured points")
    degree = min(3, n - 2) if degree is None else int(degree)
    if degree < 1:
        raise CalibrationRefused(f"degree must be at least 1, got {degree}")
    if n < degree + 2:
        raise CalibrationRefused(f"too short: {n} points for a degree-{degree} fit; give at least {degree + 2} "
                                 f"(one more than the fit's coefficients, so the residuals mean something)")
    order = np.argsort(u, kind="stable")
    fit = poly_fit(u, value, degree)
    increasing = bool(fit.poly(u.max()) > fit.poly(u.min()))
    _refuse_reversal(u[order], value[order], fit, increasing)
    _refuse_turning(fit.poly, float(u.min()), float(u.max()), degree)
    return CalibrationFit(fit, float(u.min()), float(u.max()), increasing, [], n, np.ones(n, dtype=bool),
                          value - fit.poly(u), f"least-squares polynomial of degree {degree} (as given)")


def _refuse_reversal(u_sorted, x_sorted, fit: PolyFit, increasing: bool) -> None:
    sigma = robust_sigma(x_sorted - fit.poly(u_sorted))
    rev = reversal(u_sorted, x_sorted, sigma, increasing)
    if rev is not None:
        a, b, drop = rev
        raise CalibrationRefused(
            f"not monotone: the measured value turns back by {drop:.4g} Hz between drive {_fmt(a)} and "
            f"{_fmt(b)}; a tuning curve must rise or fall throughout (re-measure, or calibrate a narrower "
            f"range that leaves out the turn)")


def _refuse_turning(poly, lo, hi, degree) -> None:
    turn = turning_point(poly, lo, hi)
    if turn is not None:
        raise CalibrationRefused(f"the degree-{degree} fit is not monotone near drive {_fmt(turn)} (its slope "
                                 f"changes sign inside the calibrated range); lower 'degree' or add points")


def fit_measurements(u, value, *, degree: int | None = None, outlier_sigma: float = OUTLIER_SIGMA,
                     max_degree: int = MAX_DEGREE) -> CalibrationFit:
    """Fit measured points (in the order they were taken) for ``sweepgen calibrate``.

    Refuses (:class:`CalibrationRefused`) too few points, a gap in the drives,
    data that run against the trend beyond the noise, a drive that does not
    move the frequency, and curves no monotone polynomial describes. The degree
    is chosen by cross-validation unless given; outliers beyond
    ``outlier_sigma`` robust standard deviations are left out (``0`` keeps all).
    """
    u = np.asarray(u, dtype=float)
    value = np.asarray(value, dtype=float)
    check_points(u, value, exact=False)
    n = len(u)
    if n < MIN_POINTS:
        raise CalibrationRefused(f"too few points: {n}; a measured calibration needs at least {MIN_POINTS} "
                                 f"(enough to choose the degree by cross-validation and estimate the noise)")
    gap = find_gap(u)
    if gap is not None:
        raise CalibrationRefused(
            f"gap: no measurement between drive {_fmt(gap[0])} and {_fmt(gap[1])} ({100 * (gap[1] - gap[0]) / np.ptp(u):.0f} % "
            f"of the measured range, more than {GAP_SPACINGS:g} median spacings); a fit would guess there "
            f"(a mode hop may hide in it): measure the gap, or calibrate one side with --range")
    used = np.ones(n, dtype=bool)
    fit, rows, chosen = _select(u, value, used, degree, max_degree)
    for _ in range(3):
        if not outlier_sigma:
            break
        resid = value - fit.poly(u)
        scale = robust_sigma(resid[used])
        new = np.abs(resid) <= outlier_sigma * scale if scale > 0 else np.ones(n, dtype=bool)
        if np.array_equal(new, used) or new.sum() < MIN_POINTS:
            break
        used = new
        fit, rows, chosen = _select(u, value, used, degree, max_degree)
    return _finish(u, value, used, fit, rows, chosen, outlier_sigma)


def _select(u, value, used, degree, max_degree):
    """Fit the used points: the given degree, or the cross-validated one (lowered until monotone)."""
    uu, xx = u[used], value[used]
    order = np.argsort(uu, kind="stable")
    uu, xx = uu[order], xx[order]
    rows = [] if degree is not None else cross_validation(uu, xx, max_degree)
    if degree is None and not rows:
        raise CalibrationRefused(f"too few points: {len(uu)} for even a straight line with spare points")
    chosen = degree if degree is not None else choose_degree(rows)
    lo, hi = float(uu[0]), float(uu[-1])
    fit = poly_fit(uu, xx, chosen, domain=(lo, hi))
    line = poly_fit(uu, xx, 1, domain=(lo, hi))
    slope, slope_se = line.poly.coef[1], math.sqrt(max(line.cov[1, 1], 0.0))
    if abs(slope) <= SIGNIFICANCE * slope_se:
        raise CalibrationRefused(f"the measured value does not follow the drive (a straight line's change over "
                                 f"the range, {2 * slope:.4g} Hz, is within {SIGNIFICANCE:g} standard errors of "
                                 f"zero); check the columns and units")
    increasing = bool(slope > 0)
    _refuse_reversal(uu, xx, fit, increasing)
    if degree is not None:
        _refuse_turning(fit.poly, lo, hi, chosen)
        return fit, rows, chosen
    while turning_point(fit.poly, lo, hi) is not None and chosen > 1:
        chosen -= 1
        fit = poly_fit(uu, xx, chosen, domain=(lo, hi))
    return fit, rows, chosen


def _finish(u, value, used, fit, rows, chosen, outlier_sigma) -> CalibrationFit:
    lo, hi = float(u[used].min()), float(u[used].max())
    k = min(FOLDS, int(used.sum()))
    if rows:
        best = min(rows, key=lambda r: r["mse"])["degree"]
        method = (f"least-squares polynomial, degree {chosen} chosen by {k}-fold cross-validation "
                  f"(smallest degree within one standard error of the best, degree {best})")
        if chosen < choose_degree(rows):
            method += "; lowered to keep the fit monotone"
    else:
        method = f"least-squares polynomial of degree {chosen} (as given)"
    if outlier_sigma:
        method += f"; points beyond {outlier_sigma:g} robust standard deviations left out"
    increasing = bool(fit.poly(hi) > fit.poly(lo))
    result = CalibrationFit(fit, lo, hi, increasing, rows, len(u), used, value - fit.poly(u), method)
    result.hysteresis = hysteresis(u, value, used, chosen)
    return result


def hysteresis(u, value, used, degree: int) -> dict | None:
    """Up and down sweeps fitted apart (same degree), compared where both were measured.

    Returns ``None`` when the file does not hold both directions, else the
    largest and mean difference up − down (Hz) over the common drive range, its
    drive equivalent (difference / slope), and the uncertainty of the difference.
    """
    min_run = max(degree + 3, 5)
    branch = sweep_branches(u, min_run)
    if branch is None:
        return None
    up, down = (branch > 0) & used, (branch < 0) & used
    if up.sum() < degree + 3 or down.sum() < degree + 3:
        return None
    lo = max(u[up].min(), u[down].min())
    hi = min(u[up].max(), u[down].max())
    if not hi > lo:
        return None
    f_up = poly_fit(u[up], value[up], degree)
    f_down = poly_fit(u[down], value[down], degree)
    grid = np.linspace(lo, hi, GRID)
    diff = f_up.poly(grid) - f_down.poly(grid)
    unc = np.sqrt(f_up.uncertainty(grid) ** 2 + f_down.uncertainty(grid) ** 2)
    slope = np.abs(0.5 * (f_up.poly.deriv()(grid) + f_down.poly.deriv()(grid)))
    i = int(np.argmax(np.abs(diff)))
    return {"up_points": int(up.sum()), "down_points": int(down.sum()), "range": [float(lo), float(hi)],
            "max": float(diff[i]), "at_drive": float(grid[i]), "mean": float(diff.mean()),
            "uncertainty": float(unc[i]), "drive_equivalent": float(abs(diff[i]) / slope[i]),
            "significant": bool(abs(diff[i]) > SIGNIFICANCE * unc[i])}
