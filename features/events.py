"""Event finding on a detrended light curve: box matched filter, period test, folding.

Pure functions on float64 arrays: time in days (strictly increasing), detrended relative flux
(baseline 1), flux_err on the same scale. Bad arrays raise :class:`features.errors.SegmentError`,
bad numerical arguments :class:`features.errors.ParameterError` (codes ``non_positive_parameter``,
``non_finite_parameter``, ``invalid_parameter``, ``duration_exceeds_period``).

The box search
--------------
For a trial duration ``D`` and centre ``c`` the box holds the points with
``c - D/2 <= t < c + D/2``. With weights ``w_i = 1 / err_i^2`` (errors rescaled so that their
median equals the measured white scatter), the depth and its white-noise error are::

    depth = sum(w_i (1 - f_i)) / sum(w_i),     sigma_depth = beta / sqrt(sum(w_i))

both from cumulative sums, so one duration costs O(n_centres log N). ``_slow_box_stats`` is the
obvious loop over centres kept for the tests; likewise the period rules are applied to all trial
periods at once by ``_evaluate_trials`` and one by one by ``_slow_evaluate_candidate``.
"""

from __future__ import annotations

import dataclasses
import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from features.detrend import (
    _as_1d,
    _cadence_days,
    _check_flux_err,
    _check_like,
    _check_time,
    _median,
    _positive,
    mad_std,
)
from features.errors import ParameterError, SegmentError

__all__ = [
    "DurationScan",
    "Ephemeris",
    "Event",
    "EventWindows",
    "dip_significance_scan",
    "estimate_period",
    "event_windows",
    "fold",
    "search_dips",
]

logger = logging.getLogger(__name__)

#: Default trial durations: this many, log-spaced between the two limits below [days].
_N_DURATIONS = 12
_MIN_DURATION_DAYS = 0.02
_MAX_DURATION_DAYS = 2.0

#: A trial box is at least this many cadences long and at most this fraction of the segment.
_MIN_DURATION_CADENCES = 3.0
_MAX_DURATION_FRACTION = 1.0 / 3.0

#: Trial centres per duration (the step is D / this, but never below half a cadence).
_CENTRES_PER_DURATION = 4

#: Coarse peaks down to this fraction of the threshold are refined (a box D / 8 off the best
#: centre loses at most 1/8 of its overlap), and at most max_events + this many refinements.
_COARSE_FRACTION = 0.85
_EXTRA_REFINEMENTS = 5

#: A box counts only if it holds at least this many points and this fraction of D / cadence.
_MIN_BOX_POINTS = 3
_MIN_BOX_COVERAGE = 0.5

#: Refinement around a peak: durations D * ratio**(k / 4) for |k| <= 3, fine centre steps.
_REFINE_STEPS = 3

#: Symmetry timing is used for boxes shorter than this many cadences.
_SYMMETRY_MAX_CADENCES = 40

#: Symmetry timing: points within this many durations of the box centre, trial centres.
_SYMMETRY_WINDOW = 0.75
_SYMMETRY_TRIALS = 41

#: After an event is found, boxes overlapping [t_mid - D, t_mid + D] are excluded.
_EXCLUSION_HALF_WIDTHS = 1.0

#: estimate_period: candidate periods Delta / k for k up to this many.
_MAX_HARMONIC = 20
#: Depths of member events agree if within this many sigma or within this ratio.
_DEPTH_SIGMA = 3.0
_DEPTH_RATIO = 1.5
#: Durations of member events agree within this ratio.
_DURATION_RATIO = 2.0
#: Candidates whose stacked SNR is within this fraction of the best count as tied.
_TIE_FRACTION = 0.01
_MAX_REFERENCES = 3  # duration families that anchor trial periods (estimate_period)
_EMPTY_FRACTION = 0.05  # rule 3 forgives this share of shallow epochs (gap edges, ramps)
#: BLS is run on points within this multiple of the farthest trial-transit reach.
_BLS_REACH_FACTOR = 1.1
#: BLS refinement grid: this many periods over +-_BLS_HALF_WIDTHS peak half-widths.
_BLS_PERIODS = 15
_BLS_HALF_WIDTHS = 2.0


# --------------------------------------------------------------------------------------------
# Result types
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Event:
    """One significant dip found by :func:`search_dips`.

    Attributes
    ----------
    t_mid : float
        Centre of the best box [days].
    depth : float
        Mean flux deficit in the box [relative flux].
    duration_days : float
        Box duration [days] (trial durations are coarse: the best box of a limb-darkened
        transit lies between the flat-bottom and the full duration).
    snr : float
        Detection signal-to-noise ratio ``depth / sigma_depth`` (red noise included).
    n_points : int
        Points in the box.
    t_start, t_end : float
        Box edges [days].
    """

    t_mid: float
    depth: float
    duration_days: float
    snr: float
    n_points: int
    t_start: float
    t_end: float

    def __post_init__(self) -> None:
        for name in ("t_mid", "depth", "snr", "t_start", "t_end"):
            v = float(getattr(self, name))
            if not math.isfinite(v):
                raise ParameterError("non_finite_parameter", f"Event.{name} must be finite")
        _positive("Event.duration_days", self.duration_days)
        if not self.t_start <= self.t_mid <= self.t_end:
            raise ParameterError(
                "invalid_parameter", "Event needs t_start <= t_mid <= t_end"
            )


@dataclass(frozen=True)
class Ephemeris:
    """A linear ephemeris: mid-times ``epoch + n * period_days``.

    Attributes
    ----------
    period_days : float
        Period [days], > 0.
    epoch : float
        One mid-transit time [days, same system as the light curve].
    duration_days : float
        Transit (eclipse) duration [days], 0 < duration < period.

    Raises
    ------
    ParameterError
        ``non_positive_parameter``, ``non_finite_parameter``, ``duration_exceeds_period``.

    Examples
    --------
    >>> Ephemeris(period_days=3.5, epoch=1001.25, duration_days=0.12).period_days
    3.5
    """

    period_days: float
    epoch: float
    duration_days: float

    def __post_init__(self) -> None:
        period = _positive("period_days", self.period_days)
        duration = _positive("duration_days", self.duration_days)
        epoch = float(self.epoch)
        if not math.isfinite(epoch):
            raise ParameterError("non_finite_parameter", f"epoch must be finite, got {epoch!r}")
        if duration >= period:
            raise ParameterError(
                "duration_exceeds_period",
                f"duration_days ({duration!r}) must be shorter than period_days ({period!r})",
            )
        object.__setattr__(self, "period_days", period)
        object.__setattr__(self, "duration_days", duration)
        object.__setattr__(self, "epoch", epoch)


@dataclass(frozen=True)
class DurationScan:
    """Best box per trial duration around the strongest dip (:func:`dip_significance_scan`).

    Attributes
    ----------
    durations_days : ndarray
        Trial durations [days], increasing.
    snr : ndarray
        Best detection SNR at each duration (NaN where no box is valid).
    depth : ndarray
        Box depth of that best box [relative flux].
    t_mid : ndarray
        Centre of that best box [days].
    """

    durations_days: NDArray[np.float64]
    snr: NDArray[np.float64]
    depth: NDArray[np.float64]
    t_mid: NDArray[np.float64]


@dataclass(frozen=True)
class EventWindows:
    """Boolean windows around events (:func:`event_windows`).

    Attributes
    ----------
    in_event : ndarray of bool
        Points inside an event (``|t - t_mid| <= D / 2``).
    around_event : ndarray of bool
        Points outside every event but within ``half_width_factor * D`` of a mid-time.
    event_index : ndarray of int
        For a list of events: index of the nearest event whose window holds the point, -1 if
        none. For an ephemeris: the epoch number of :func:`fold` (every point has one).
    """

    in_event: NDArray[np.bool_]
    around_event: NDArray[np.bool_]
    event_index: NDArray[np.int64]


# --------------------------------------------------------------------------------------------
# The box kernel
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Boxes:
    """Cumulative sums for box statistics on one light curve."""

    t: NDArray[np.float64]
    cw: NDArray[np.float64]  # cumsum of weights, leading 0
    cwd: NDArray[np.float64]  # cumsum of weight * deficit
    cn: NDArray[np.float64]  # cumsum of usable points
    cadence: float
    beta: float
    t_ok: NDArray[np.float64]  # times of the usable points
    f_ok: NDArray[np.float64]  # their flux


def _prepare(
    t: NDArray[np.float64],
    flux: NDArray[np.float64],
    err: NDArray[np.float64] | None,
    sigma_white: float | None,
    beta: float,
) -> _Boxes:
    ok = np.isfinite(flux)
    if ok.sum() < _MIN_BOX_POINTS + 1:
        raise SegmentError("too_few_points", "flux has almost no finite values")
    if sigma_white is None:
        sigma = mad_std(flux[ok])
        if not sigma > 0.0:
            sigma = float(np.std(flux[ok]))
        if not sigma > 0.0:
            raise SegmentError("constant_flux", "flux does not vary: no noise scale")
    else:
        sigma = sigma_white
    if err is None:
        eff = np.full(t.size, sigma)
    else:  # keep the relative weights, match the measured scatter
        eff = err * (sigma / _median(err[ok]))
    w = np.where(ok, 1.0 / (eff * eff), 0.0)
    deficit = np.where(ok, 1.0 - flux, 0.0)
    zero = np.zeros(1)
    return _Boxes(
        t,
        np.concatenate([zero, np.cumsum(w)]),
        np.concatenate([zero, np.cumsum(w * deficit)]),
        np.concatenate([zero, np.cumsum(ok.astype(np.float64))]),
        _cadence_days(t),
        beta,
        t[ok],
        flux[ok],
    )


def _min_points(
    boxes: _Boxes, duration: float | NDArray[np.float64]
) -> float | NDArray[np.float64]:
    return np.maximum(float(_MIN_BOX_POINTS), _MIN_BOX_COVERAGE * duration / boxes.cadence)


def _box_stats(
    boxes: _Boxes, centres: NDArray[np.float64], duration: float | NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """(depth, snr, n_points) of boxes at many centres (one duration, or one per centre).

    The SNR is -inf where the box is not valid (too few points).
    """
    lo = np.searchsorted(boxes.t, centres - 0.5 * duration, side="left")
    hi = np.searchsorted(boxes.t, centres + 0.5 * duration, side="left")
    sw = boxes.cw[hi] - boxes.cw[lo]
    n = boxes.cn[hi] - boxes.cn[lo]
    valid = (n >= _min_points(boxes, duration)) & (sw > 0.0)
    safe = np.where(valid, sw, 1.0)
    depth = np.where(valid, (boxes.cwd[hi] - boxes.cwd[lo]) / safe, np.nan)
    snr = np.where(valid, depth * np.sqrt(safe) / boxes.beta, -np.inf)
    return depth, snr, n


def _slow_box_stats(
    boxes: _Boxes, flux: NDArray[np.float64], weight: NDArray[np.float64],
    centres: NDArray[np.float64], duration: float,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Loop version of :func:`_box_stats` from the raw flux and weights (reference)."""
    depth = np.full(centres.size, np.nan)
    snr = np.full(centres.size, -np.inf)
    npts = np.zeros(centres.size)
    ok = np.isfinite(flux)
    for i, c in enumerate(centres):
        sel = (boxes.t >= c - 0.5 * duration) & (boxes.t < c + 0.5 * duration) & ok
        npts[i] = sel.sum()
        sw = weight[sel].sum()
        if npts[i] >= _min_points(boxes, duration) and sw > 0.0:
            depth[i] = np.sum(weight[sel] * (1.0 - flux[sel])) / sw
            snr[i] = depth[i] * math.sqrt(sw) / boxes.beta
    return depth, snr, npts


def _centres(boxes: _Boxes, duration: float) -> NDArray[np.float64]:
    step = max(duration / _CENTRES_PER_DURATION, 0.5 * boxes.cadence)
    t0, t1 = float(boxes.t[0]), float(boxes.t[-1])
    n = math.floor((t1 - t0) / step) + 1
    return t0 + step * np.arange(n)


def _default_durations(t: NDArray[np.float64]) -> NDArray[np.float64]:
    cadence = _cadence_days(t)
    lo = max(_MIN_DURATION_DAYS, _MIN_DURATION_CADENCES * cadence)
    hi = min(_MAX_DURATION_DAYS, _MAX_DURATION_FRACTION * float(t[-1] - t[0]))
    if hi < lo:
        return np.zeros(0)
    full = math.log(_MAX_DURATION_DAYS / _MIN_DURATION_DAYS)
    n = max(2, round(_N_DURATIONS * math.log(hi / lo) / full) if hi > lo else 1)
    return np.geomspace(lo, hi, n) if hi > lo else np.array([lo])


def _check_durations(
    durations_days: ArrayLike | None, t: NDArray[np.float64]
) -> NDArray[np.float64]:
    if durations_days is None:
        return _default_durations(t)
    d = np.atleast_1d(np.asarray(durations_days, dtype=np.float64))
    if d.ndim != 1 or d.size == 0:
        raise ParameterError("invalid_parameter", "durations_days must be a non-empty 1-D list")
    for v in d:
        _positive("durations_days", v)
    return np.unique(d)


def _check_beta(beta_red: float) -> float:
    try:
        b = float(beta_red)
    except (TypeError, ValueError):
        raise ParameterError(
            "non_finite_parameter", f"beta_red must be a number, got {beta_red!r}"
        ) from None
    if math.isnan(b):
        logger.info("beta_red is NaN (not measurable): using 1")
        return 1.0
    if not math.isfinite(b) or b < 1.0:
        raise ParameterError("invalid_parameter", f"beta_red must be >= 1 (or NaN), got {b!r}")
    return b


def _setup(
    time_days: ArrayLike, flux: ArrayLike, flux_err: ArrayLike | None,
    sigma_white: float | None, beta_red: float,
) -> tuple[NDArray[np.float64], NDArray[np.float64], _Boxes]:
    t = _check_time(time_days)
    f = _check_like("flux", flux, t.size)
    err = _check_flux_err(flux_err, t.size)
    sigma = None if sigma_white is None else _positive("sigma_white", sigma_white)
    beta = _check_beta(beta_red)
    return t, f, _prepare(t, f, err, sigma, beta)


@dataclass
class _Scan:
    """Box statistics of every trial (duration, centre), flattened; duration blocks in order.

    Mutable: excluded boxes get SNR -inf.
    """

    durations: NDArray[np.float64]  # the trial durations
    start: NDArray[np.int64]  # first flat index of each duration's block (plus the end)
    centre: NDArray[np.float64]  # flat: box centre
    duration: NDArray[np.float64]  # flat: box duration
    snr: NDArray[np.float64]  # flat: box SNR

    def block(self, k: int) -> slice:
        return slice(int(self.start[k]), int(self.start[k + 1]))


def _scan(boxes: _Boxes, durations: NDArray[np.float64]) -> _Scan:
    centres = [_centres(boxes, float(d)) for d in durations]
    sizes = np.array([c.size for c in centres], dtype=np.int64)
    start = np.concatenate([[0], np.cumsum(sizes)])
    centre = np.concatenate(centres) if centres else np.zeros(0)
    duration = np.repeat(durations, sizes)
    snr = _box_stats(boxes, centre, duration)[1] if centre.size else np.zeros(0)
    return _Scan(durations, start, centre, duration, snr)


def _best(scan: _Scan) -> tuple[int, float]:
    """(flat index, snr) of the highest valid box; (-1, -inf) if none."""
    if scan.snr.size == 0:
        return -1, -math.inf
    i = int(np.argmax(scan.snr))
    return i, float(scan.snr[i])


def _refine(
    boxes: _Boxes, centre: float, duration: float, ratio: float,
    zones: list[tuple[float, float]],
) -> tuple[float, float, float, float, int]:
    """Best (centre, duration, depth, snr, n) on a fine grid around a coarse peak.

    Durations ``D * ratio**(k / 4)`` for ``|k| <= 3`` and centres within one coarse step, at a
    step of ``min(D / 100, cadence / 2)``; all trial boxes are evaluated in one call.
    """
    coarse_step = max(duration / _CENTRES_PER_DURATION, 0.5 * boxes.cadence)
    ks = np.arange(-_REFINE_STEPS, _REFINE_STEPS + 1)
    durs = duration * ratio ** (ks / (_REFINE_STEPS + 1))
    fine = np.maximum(np.minimum(durs / 100.0, 0.5 * boxes.cadence), 1e-9)
    half_n = np.ceil(coarse_step / fine).astype(np.int64)
    sizes = 2 * half_n + 1
    group = np.repeat(np.arange(durs.size), sizes)
    first = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    offset = np.arange(group.size) - first[group] - half_n[group]
    c = centre + fine[group] * offset
    d = durs[group]
    depth, snr, npts = _box_stats(boxes, c, d)
    for a, b in zones:
        snr = np.where((c + 0.5 * d > a) & (c - 0.5 * d < b), -np.inf, snr)
    i = int(np.argmax(snr))
    g = group[i]
    lo, hi = first[g], first[g] + sizes[g]
    j = lo + _likelihood_mean(snr[lo:hi], i - lo)
    return float(c[j]), float(d[j]), float(depth[j]), float(snr[j]), int(npts[j])


def _likelihood_mean(snr: NDArray[np.float64], i: int) -> int:
    """Index nearest the likelihood-weighted mean centre, weights exp((SNR^2 - SNR_max^2)/2)."""
    good = np.isfinite(snr)
    w = np.zeros(snr.size)
    # only dips carry likelihood: negative SNR (a bump) gets the weight of SNR 0
    pos = np.clip(snr[good], 0.0, None)
    w[good] = np.exp(0.5 * (pos**2 - max(float(snr[i]), 0.0) ** 2))
    if not w.sum() > 0:
        return i
    mean = float(np.sum(w * np.arange(snr.size)) / np.sum(w))
    return round(mean)


def _symmetry_centre(boxes: _Boxes, centre: float, duration: float) -> float:
    """Time of symmetry of the dip near ``centre`` (Kwee & van Woerden 1956), or ``centre``.

    For trial centres c within +-D/4, the points within 0.75 D of ``centre`` are reflected
    about c and compared with the light curve interpolated there; the sum of squared
    differences is smallest at the centre of symmetry. A parabola through the three lowest
    grid values gives the minimum. If the minimum sits on the edge of the trial range, or too
    few points are available, the box centre is kept.
    """
    half = _SYMMETRY_WINDOW * duration
    lo = np.searchsorted(boxes.t_ok, centre - half, side="left")
    hi = np.searchsorted(boxes.t_ok, centre + half, side="right")
    if hi - lo < 2 * _MIN_BOX_POINTS:
        return centre
    tw, fw = boxes.t_ok[lo:hi], boxes.f_ok[lo:hi]
    shifts = np.linspace(-0.25 * duration, 0.25 * duration, _SYMMETRY_TRIALS)
    trial = centre + shifts
    mirrored = 2.0 * trial[:, None] - tw[None, :]
    inside = (mirrored >= boxes.t_ok[0]) & (mirrored <= boxes.t_ok[-1])
    g = np.interp(mirrored, boxes.t_ok, boxes.f_ok)
    d2 = np.where(inside, (fw[None, :] - g) ** 2, 0.0)
    cnt = inside.sum(axis=1)
    if cnt.min() < 2 * _MIN_BOX_POINTS:
        return centre
    cost = d2.sum(axis=1) / cnt
    j = int(np.argmin(cost))
    if j == 0 or j == cost.size - 1:
        return centre
    a, b, c = cost[j - 1], cost[j], cost[j + 1]
    denom = a - 2.0 * b + c
    step = shifts[1] - shifts[0]
    offset = 0.5 * (a - c) / denom * step if denom > 0.0 else 0.0
    return float(trial[j] + offset)


def _exclude(scan: _Scan, zone: tuple[float, float]) -> None:
    """Set to -inf every box overlapping ``zone``."""
    a, b = zone
    half = 0.5 * scan.duration
    scan.snr[(scan.centre + half > a) & (scan.centre - half < b)] = -np.inf


def _duration_ratio(durations: NDArray[np.float64]) -> float:
    if durations.size > 1:
        return float(np.exp(np.mean(np.diff(np.log(durations)))))
    return 1.5


# --------------------------------------------------------------------------------------------
# Public search functions
# --------------------------------------------------------------------------------------------


def search_dips(
    time_days: ArrayLike,
    flux: ArrayLike,
    flux_err: ArrayLike | None,
    *,
    durations_days: ArrayLike | None = None,
    snr_threshold: float = 7.0,
    max_events: int = 10,
    sigma_white: float | None = None,
    beta_red: float = 1.0,
) -> list[Event]:
    """Find the significant dips of a detrended light curve with a box matched filter.

    Parameters
    ----------
    time_days : array_like, shape (n,)
        Times [days], finite and strictly increasing.
    flux : array_like, shape (n,)
        Detrended relative flux (baseline 1). NaN = missing.
    flux_err : array_like, shape (n,), or None
        Per-point uncertainties [relative]; only their relative sizes are used (they are
        rescaled to the measured white scatter). None = equal weights.
    durations_days : array_like, optional
        Trial box durations [days]. Default: about 12 log-spaced from 0.02 to 2 days, clipped to
        ``[max(0.02, 3 cadences), min(2, span / 3)]``.
    snr_threshold : float, optional
        Detection threshold on the box SNR (> 0).
    max_events : int, optional
        Largest number of events returned (>= 1).
    sigma_white : float, optional
        Per-point white scatter [relative]; default ``mad_std(flux)``.
    beta_red : float, optional
        Red-noise factor (>= 1; NaN means "not measured" and counts as 1), e.g.
        :attr:`features.detrend.Detrended.beta_red`.

    Returns
    -------
    list of Event
        In order of detection, i.e. by decreasing SNR. Empty when nothing passes.

    Raises
    ------
    SegmentError
        Bad arrays (``length_mismatch``, ``unsorted_time``, ``too_few_points``...).
    ParameterError
        ``non_positive_parameter`` (durations, snr_threshold, sigma_white),
        ``invalid_parameter`` (max_events, beta_red < 1).

    Notes
    -----
    For every trial duration ``D`` and centre ``c`` (step ``D / 4``), the weighted box depth
    ``delta = sum(w (1 - f)) / sum(w)`` and ``SNR = delta / sigma_delta`` with
    ``sigma_delta = beta * sigma_w / sqrt(n)`` for equal weights. This is the red-noise
    inflated transit SNR of Pont, Zucker & Queloz (2006, MNRAS 373, 231), with the red term
    written as the time-averaging factor ``beta`` of Winn et al. (2008, ApJ 683, 1076).

    The highest box (down to 0.85 of the threshold on this coarse grid) is refined on a finer
    grid (durations ``D * r^(k/4)``, ``|k| <= 3``, with
    ``r`` the ratio of neighbouring trial durations;
    centre steps ``min(D / 100, cadence / 2)``), its centre taken as the likelihood-weighted
    mean (weights ``exp((SNR^2 - SNR_max^2) / 2)``). For boxes of fewer than 40 cadences,
    where the sampling limits the box centre, it is then moved to the time of symmetry of the
    dip by the method of Kwee & van Woerden (1956, BAN 12, 327). The event is recorded and
    every box overlapping ``[t_mid - D, t_mid + D]`` is excluded; this repeats until the best
    SNR falls below the threshold or ``max_events`` are found. Boxes need at least 3 points
    and half the points ``D / cadence`` predicts.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(3)
    >>> t = np.arange(0.0, 10.0, 0.01)
    >>> f = 1.0 + rng.normal(0.0, 1e-3, t.size) - 0.004 * (np.abs(t - 4.0) < 0.1)
    >>> events = search_dips(t, f, None)
    >>> len(events), round(events[0].t_mid, 1)
    (1, 4.0)
    """
    t, _, boxes = _setup(time_days, flux, flux_err, sigma_white, beta_red)
    durations = _check_durations(durations_days, t)
    threshold = _positive("snr_threshold", snr_threshold)
    if isinstance(max_events, bool) or not isinstance(max_events, int | np.integer) or (
        max_events < 1
    ):
        raise ParameterError(
            "invalid_parameter", f"max_events must be an integer >= 1, got {max_events!r}"
        )
    if durations.size == 0:
        logger.info("segment too short for any trial duration: no search")
        return []
    scan = _scan(boxes, durations)
    ratio = _duration_ratio(durations)
    events: list[Event] = []
    zones: list[tuple[float, float]] = []
    attempts = 0
    while len(events) < max_events and attempts < max_events + _EXTRA_REFINEMENTS:
        i, snr = _best(scan)
        # the coarse grid may sit up to D / 8 off the best centre: refine anything close enough
        if i < 0 or snr < _COARSE_FRACTION * threshold:
            break
        attempts += 1
        c0, d0 = float(scan.centre[i]), float(scan.duration[i])
        c, d, depth, snr, n = _refine(boxes, c0, d0, ratio, zones)
        zone_d = d if math.isfinite(snr) else d0
        zone_c = c if math.isfinite(snr) else c0
        zone = (zone_c - (0.5 + _EXCLUSION_HALF_WIDTHS) * zone_d,
                zone_c + (0.5 + _EXCLUSION_HALF_WIDTHS) * zone_d)
        _exclude(scan, zone)
        if not snr >= threshold:
            continue  # a coarse near-miss that does not reach the threshold: skip its zone
        # the symmetry time beats the box centre only where sampling limits the box (measured:
        # better below ~30 cadences per box, worse above ~60 with noisy points)
        c_sym = _symmetry_centre(boxes, c, d) if d < _SYMMETRY_MAX_CADENCES * boxes.cadence else c
        clear = all(c_sym + 0.5 * d <= a or c_sym - 0.5 * d >= b for a, b in zones)
        if c_sym != c and clear:  # re-centre the box on the symmetry time
            depth_a, snr_a, n_a = _box_stats(boxes, np.array([c_sym]), d)
            if snr_a[0] >= threshold:
                c, depth, snr, n = c_sym, float(depth_a[0]), float(snr_a[0]), int(n_a[0])
        events.append(Event(c, depth, d, snr, n, c - 0.5 * d, c + 0.5 * d))
        zones.append((c - (0.5 + _EXCLUSION_HALF_WIDTHS) * d,
                      c + (0.5 + _EXCLUSION_HALF_WIDTHS) * d))
        _exclude(scan, zones[-1])
    return events


def dip_significance_scan(
    time_days: ArrayLike,
    flux: ArrayLike,
    flux_err: ArrayLike | None,
    *,
    durations_days: ArrayLike | None = None,
    sigma_white: float | None = None,
    beta_red: float = 1.0,
) -> DurationScan:
    """Best box SNR at every trial duration around the strongest dip.

    Parameters
    ----------
    time_days, flux, flux_err, durations_days, sigma_white, beta_red
        As in :func:`search_dips`.

    Returns
    -------
    DurationScan
        For each trial duration ``D``, the best box whose centre lies within
        ``max(D, D_best) / 2`` of the strongest box (``D_best`` its duration). All NaN when no
        box is valid.

    Raises
    ------
    SegmentError, ParameterError
        As :func:`search_dips`.

    Notes
    -----
    Same statistic as :func:`search_dips` (Pont et al. 2006 SNR with the Winn et al. 2008
    red-noise factor). The curve of SNR against duration separates a short artefact (peaks at
    the shortest durations) from a transit (peaks near its duration) or a long dip.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(4)
    >>> t = np.arange(0.0, 10.0, 0.01)
    >>> f = 1.0 + rng.normal(0.0, 1e-3, t.size) - 0.003 * (np.abs(t - 6.0) < 0.25)
    >>> scan = dip_significance_scan(t, f, None)
    >>> bool(0.2 < scan.durations_days[np.argmax(scan.snr)] < 1.0)
    True
    """
    t, _, boxes = _setup(time_days, flux, flux_err, sigma_white, beta_red)
    durations = _check_durations(durations_days, t)
    nan = np.full(durations.size, np.nan)
    if durations.size == 0:
        return DurationScan(durations, nan, nan.copy(), nan.copy())
    scan = _scan(boxes, durations)
    i, best_snr = _best(scan)
    if i < 0 or not math.isfinite(best_snr):
        return DurationScan(durations, nan, nan.copy(), nan.copy())
    c_best, d_best = float(scan.centre[i]), float(scan.duration[i])
    snr_out, depth_out, tmid_out = nan.copy(), nan.copy(), nan.copy()
    for j, d in enumerate(durations):
        reach = 0.5 * max(float(d), d_best)
        step = max(float(d) / (4 * _CENTRES_PER_DURATION), 0.5 * boxes.cadence)
        cc = c_best + step * np.arange(-math.floor(reach / step), math.floor(reach / step) + 1)
        depth, snr, _ = _box_stats(boxes, cc, float(d))
        m = int(np.argmax(snr))
        if math.isfinite(snr[m]):
            snr_out[j], depth_out[j], tmid_out[j] = snr[m], depth[m], cc[m]
    return DurationScan(durations, snr_out, depth_out, tmid_out)


# --------------------------------------------------------------------------------------------
# Period
# --------------------------------------------------------------------------------------------


def _epoch_stats(
    boxes: _Boxes, t_ref: float, period: float, duration: float
) -> tuple[NDArray[np.int64], NDArray[np.float64], NDArray[np.float64], NDArray[np.bool_]]:
    """Epoch numbers, box depth, depth sigma and coverage at every predicted mid-time."""
    t0, t1 = float(boxes.t[0]), float(boxes.t[-1])
    n_lo = math.ceil((t0 - t_ref) / period - 0.5)
    n_hi = math.floor((t1 - t_ref) / period + 0.5)
    epochs = np.arange(n_lo, n_hi + 1, dtype=np.int64)
    centres = t_ref + epochs * period
    depth, snr, _ = _box_stats(boxes, centres, duration)
    covered = np.isfinite(snr)
    lo = np.searchsorted(boxes.t, centres - 0.5 * duration, side="left")
    hi = np.searchsorted(boxes.t, centres + 0.5 * duration, side="left")
    sw = boxes.cw[hi] - boxes.cw[lo]
    sigma = np.where(covered, boxes.beta / np.sqrt(np.where(sw > 0.0, sw, 1.0)), np.inf)
    return epochs, np.where(covered, depth, np.nan), sigma, covered


@dataclass(frozen=True)
class _Candidate:
    period: float
    t_ref: float
    score: float
    members: tuple[int, ...]


def _members(
    times: NDArray[np.float64], halfwidths: NDArray[np.float64], t_ref: float, period: float
) -> tuple[NDArray[np.bool_], NDArray[np.int64]]:
    n = np.round((times - t_ref) / period).astype(np.int64)
    return np.abs(times - (t_ref + n * period)) <= halfwidths, n


def _slow_evaluate_candidate(
    boxes: _Boxes, events: Sequence[Event], period: float, t_ref: float,
) -> _Candidate | None:
    """Acceptance rules for one trial period, written out plainly (reference for
    :func:`_evaluate_trials`); returns the refitted, scored candidate or None."""
    times = np.array([e.t_mid for e in events])
    durs = np.array([e.duration_days for e in events])
    member, n = _members(times, 0.5 * durs, t_ref, period)
    if member.sum() < 2 or np.unique(n[member]).size < 2:
        return None
    # refit the linear ephemeris to the member mid-times (least squares)
    nn, tt = n[member].astype(np.float64), times[member]
    slope, intercept = np.polyfit(nn, tt, 1)
    period, t_ref = float(slope), float(intercept)
    if not period > 0.0:
        return None
    member, n = _members(times, 0.5 * durs, t_ref, period)
    if member.sum() < 2 or np.unique(n[member]).size < 2:
        return None
    d_mem = durs[member]
    if d_mem.max() / d_mem.min() > _DURATION_RATIO:
        return None  # rule 2: member durations agree
    duration = float(np.median(d_mem))
    if duration >= 0.5 * period:
        return None
    epochs, depth, sigma, covered = _epoch_stats(boxes, t_ref, period, duration)
    at_member = np.isin(epochs, n[member])
    md, ms = depth[at_member & covered], sigma[at_member & covered]
    if md.size < 2 or not np.all(md > 0.0):
        return None
    # rule 2: member depths agree (within 3 sigma of each other, or within a factor 1.5)
    hi_i, lo_i = int(np.argmax(md)), int(np.argmin(md))
    diff_ok = (md[hi_i] - md[lo_i]) <= _DEPTH_SIGMA * math.hypot(ms[hi_i], ms[lo_i])
    if not diff_ok and md[hi_i] / md[lo_i] > _DEPTH_RATIO:
        return None
    wm = 1.0 / ms**2
    mean_depth = float(np.sum(wm * md) / np.sum(wm))
    # rule 3: every other covered epoch shows a dip consistent with the members
    others = covered & ~at_member
    n_others = int(others.sum())
    parity = np.mod(epochs[at_member & covered], 2)
    dof = sum(int(np.sum(parity == p)) - 1 for p in (0, 1) if np.sum(parity == p) >= 2)
    ss = sum(float(np.sum((md[parity == p] - md[parity == p].mean()) ** 2))
             for p in (0, 1) if np.sum(parity == p) >= 2)
    scatter = math.sqrt(ss / dof) if dof >= 2 else 0.0
    n_fail = int(np.sum(depth[others] < mean_depth
                        - _DEPTH_SIGMA * np.hypot(sigma[others], scatter)))
    if n_fail > math.floor(_EMPTY_FRACTION * n_others):
        return None
    w = 1.0 / sigma[covered] ** 2
    score = float(np.sum(w * depth[covered]) / math.sqrt(np.sum(w)))
    return _Candidate(period, t_ref, score, tuple(int(i) for i in np.flatnonzero(member)))


def _evaluate_trials(
    boxes: _Boxes, events: Sequence[Event], trials: NDArray[np.float64], t_ref: float
) -> list[_Candidate]:
    """Vectorised :func:`_slow_evaluate_candidate` over many trial periods at once."""
    times = np.array([e.t_mid for e in events])
    durs = np.array([e.duration_days for e in events])
    halfw = 0.5 * durs
    # rule 1 with the trial ephemeris, then a least-squares refit to the members
    n = np.round((times[None, :] - t_ref) / trials[:, None])
    mem = np.abs(times[None, :] - (t_ref + n * trials[:, None])) <= halfw[None, :]
    s0 = mem.sum(axis=1).astype(np.float64)
    sn = np.where(mem, n, 0.0).sum(axis=1)
    snn = np.where(mem, n * n, 0.0).sum(axis=1)
    st = np.where(mem, times[None, :], 0.0).sum(axis=1)
    snt = np.where(mem, n * times[None, :], 0.0).sum(axis=1)
    det = s0 * snn - sn * sn
    fit = (s0 >= 2) & (det > 0.5)  # two members at two different epochs
    with np.errstate(divide="ignore", invalid="ignore"):
        period = np.where(fit, (s0 * snt - sn * st) / det, np.nan)
        ref = np.where(fit, (st - period * sn) / s0, np.nan)
    fit &= period > 0.0
    idx = np.flatnonzero(fit)
    if idx.size == 0:
        return []
    period, ref = period[idx], ref[idx]
    n = np.round((times[None, :] - ref[:, None]) / period[:, None])
    mem = np.abs(times[None, :] - (ref[:, None] + n * period[:, None])) <= halfw[None, :]
    # trials that refit to the same members give the same ephemeris: keep one of each
    seen: set[tuple[float, bytes]] = set()
    first_of = []
    for i in range(period.size):
        key = (round(float(period[i]), 9), mem[i].tobytes())
        if key not in seen:
            seen.add(key)
            first_of.append(i)
    period, ref, n, mem = period[first_of], ref[first_of], n[first_of], mem[first_of]
    cnt = mem.sum(axis=1)
    distinct = np.where(mem, n, -np.inf).max(axis=1) > np.where(mem, n, np.inf).min(axis=1)
    dmax = np.where(mem, durs[None, :], -np.inf).max(axis=1)
    dmin = np.where(mem, durs[None, :], np.inf).min(axis=1)
    keep = (cnt >= 2) & distinct
    with np.errstate(divide="ignore", invalid="ignore"):
        keep &= dmax / dmin <= _DURATION_RATIO  # rule 2, durations
    dmed = np.full(period.size, np.nan)
    if keep.any():
        dmed[keep] = np.nanmedian(np.where(mem[keep], durs[None, :], np.nan), axis=1)
    keep &= dmed < 0.5 * period
    sel = np.flatnonzero(keep)
    if sel.size == 0:
        return []
    period, ref, dmed, n, mem = period[sel], ref[sel], dmed[sel], n[sel], mem[sel]
    # every predicted epoch of every surviving trial, flattened
    t0, t1 = float(boxes.t[0]), float(boxes.t[-1])
    n_lo = np.ceil((t0 - ref) / period - 0.5)
    n_hi = np.floor((t1 - ref) / period + 0.5)
    counts = (n_hi - n_lo + 1).astype(np.int64)
    owner = np.repeat(np.arange(sel.size), counts)
    first = np.concatenate([[0], np.cumsum(counts)[:-1]])
    epoch = n_lo[owner] + (np.arange(owner.size) - first[owner])
    centres = ref[owner] + epoch * period[owner]
    dur = dmed[owner]
    depth, snr, _ = _box_stats(boxes, centres, dur)
    covered = np.isfinite(snr)
    lo = np.searchsorted(boxes.t, centres - 0.5 * dur, side="left")
    hi = np.searchsorted(boxes.t, centres + 0.5 * dur, side="left")
    sw = boxes.cw[hi] - boxes.cw[lo]
    sigma = np.where(covered, boxes.beta / np.sqrt(np.where(sw > 0.0, sw, 1.0)), np.inf)
    depth = np.where(covered, depth, 0.0)
    is_mem = np.any(mem[owner] & (n[owner] == epoch[:, None]), axis=1)
    mc = is_mem & covered
    m_cnt = np.bincount(owner, weights=mc, minlength=sel.size)
    m_pos = np.bincount(owner, weights=mc & (depth > 0.0), minlength=sel.size)
    ok = (m_cnt >= 2) & (m_pos == m_cnt)
    # rule 2, depths: deepest and shallowest member epoch
    d_hi = np.full(sel.size, -np.inf)
    d_lo = np.full(sel.size, np.inf)
    np.maximum.at(d_hi, owner[mc], depth[mc])
    np.minimum.at(d_lo, owner[mc], depth[mc])
    i_hi = _group_arg(owner, mc, depth, d_hi, sel.size)
    i_lo = _group_arg(owner, mc, depth, d_lo, sel.size)
    with np.errstate(invalid="ignore", divide="ignore"):
        s_pair = np.hypot(sigma[np.maximum(i_hi, 0)], sigma[np.maximum(i_lo, 0)])
        diff_ok = (d_hi - d_lo) <= _DEPTH_SIGMA * s_pair
        ratio_ok = d_hi / d_lo <= _DEPTH_RATIO
    ok &= diff_ok | ratio_ok
    wm = np.where(mc, 1.0 / sigma**2, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_depth = np.bincount(owner, weights=wm * depth, minlength=sel.size) / np.bincount(
            owner, weights=wm, minlength=sel.size
        )
    # rule 3: every other covered epoch dips consistently with the members
    others = covered & ~is_mem
    n_others = np.bincount(owner, weights=others, minlength=sel.size)
    scatter = _parity_scatter(owner, mc, depth, epoch, sel.size)
    fails = others & (depth < mean_depth[owner]
                      - _DEPTH_SIGMA * np.hypot(sigma, scatter[owner]))
    allowed = np.floor(_EMPTY_FRACTION * n_others)  # 0 below 20 other epochs
    ok &= np.bincount(owner, weights=fails, minlength=sel.size) <= allowed
    wc = np.where(covered, 1.0 / sigma**2, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        score = np.bincount(owner, weights=wc * depth, minlength=sel.size) / np.sqrt(
            np.bincount(owner, weights=wc, minlength=sel.size)
        )
    return [
        _Candidate(float(period[i]), float(ref[i]), float(score[i]),
                   tuple(int(j) for j in np.flatnonzero(mem[i])))
        for i in np.flatnonzero(ok)
    ]


def _parity_scatter(owner: NDArray[np.int64], use: NDArray[np.bool_],
                    depth: NDArray[np.float64], epoch: NDArray[np.float64],
                    n_groups: int) -> NDArray[np.float64]:
    """Per group, the pooled sample std of ``depth[use]`` within even and within odd epochs.

    Pooled within parity, an eclipsing binary folded at half its period (primaries on even
    epochs, secondaries on odd ones) shows no scatter, while real epoch-to-epoch variation
    does. Zero with fewer than two degrees of freedom."""
    key = owner * 2 + np.mod(epoch, 2).astype(np.int64)
    cnt = np.bincount(key, weights=use, minlength=2 * n_groups)
    s1 = np.bincount(key, weights=np.where(use, depth, 0.0), minlength=2 * n_groups)
    s2 = np.bincount(key, weights=np.where(use, depth**2, 0.0), minlength=2 * n_groups)
    with np.errstate(invalid="ignore", divide="ignore"):
        ss = np.where(cnt >= 2, np.clip(s2 - s1**2 / cnt, 0.0, None), 0.0)
    dof = np.where(cnt >= 2, cnt - 1, 0.0)
    ss_g = ss.reshape(n_groups, 2).sum(axis=1)
    dof_g = dof.reshape(n_groups, 2).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(dof_g >= 2, np.sqrt(ss_g / dof_g), 0.0)


def _group_arg(
    owner: NDArray[np.int64], use: NDArray[np.bool_], values: NDArray[np.float64],
    target: NDArray[np.float64], n_groups: int,
) -> NDArray[np.int64]:
    """Flat index of the first element of each group (``use``) equal to the group's target."""
    big = np.iinfo(np.int64).max
    out = np.full(n_groups, big, dtype=np.int64)
    hit = np.flatnonzero(use & (values == target[owner]))
    np.minimum.at(out, owner[hit], hit)
    return np.where(out == big, -1, out)


def estimate_period(
    time_days: ArrayLike,
    flux: ArrayLike,
    flux_err: ArrayLike | None,
    events: Sequence[Event],
    *,
    min_period_days: float | None = None,
    sigma_white: float | None = None,
    beta_red: float = 1.0,
) -> Ephemeris | None:
    """Test whether the events are periodic; return the ephemeris or None.

    Parameters
    ----------
    time_days, flux, flux_err
        As in :func:`search_dips` (detrended flux).
    events : sequence of Event
        Events from :func:`search_dips`.
    min_period_days : float, optional
        Shortest period considered [days]; default twice the longest event duration.
    sigma_white, beta_red : float, optional
        Noise scale and red-noise factor as in :func:`search_dips`.

    Returns
    -------
    Ephemeris or None
        None for fewer than two events or when no trial period passes the rules below.

    Raises
    ------
    SegmentError, ParameterError
        As :func:`search_dips`; ``non_positive_parameter`` for ``min_period_days``.

    Notes
    -----
    Trial periods are ``Delta / k`` for the separations ``Delta`` between the strongest event
    and each other event and ``k = 1 .. 20`` (``>= min_period_days``). A trial period is
    accepted only if

    1. at least two events, at two different epochs, lie within half their duration of the
       predicted mid-times (the "members"; the ephemeris is refitted to their mid-times by least
       squares);
    2. the members agree: durations within a factor 2, box depths (all measured with the median
       member duration) within 3 sigma of each other or within a factor 1.5;
    3. every other predicted epoch covered by data shows a box depth no lower than the mean
       member depth minus 3 sigma (a true period has no empty epochs; a sub-multiple does),
       sigma being the epoch's noise and the members' own depth scatter in quadrature (real
       epoch-to-epoch variation, e.g. quarter-to-quarter dilution), pooled within even and
       within odd epochs so that alternating primary and secondary eclipses do not count;
       with many epochs, 5 % of them may fall short (one in 20: epochs at gap edges and on
       instrumental ramps are detrended badly), while a sub-multiple leaves half of them empty.

    Trial periods are anchored on the strongest event and on the strongest event of each
    other duration family (durations more than a factor 2 apart, at most three families), so
    that a long ramp near a gap cannot hide a periodic family of short eclipses.

    Among accepted trials, the highest stacked box SNR wins; within 1 % the longest period is
    kept. The winner is refined with astropy ``BoxLeastSquares`` (Kovacs, Zucker & Mazeh 2002)
    over 21 periods spanning +-3 peak half-widths ``D P / span`` and three durations around
    the member duration, and rule 1 is checked again with the BLS ephemeris.

    Consequences: two dips of different depth or duration at arbitrary times give None; two
    alike dips always fold (the period is then their separation, or a sub-multiple whose other
    epochs fall in gaps); an eclipsing binary whose primary and secondary have similar depths
    folds at half its period (odd/even measures catch that later); one whose depths differ
    folds at the true period with the secondaries left out.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(5)
    >>> t = np.arange(0.0, 20.0, 0.01)
    >>> phase = (t - 1.3 + 1.5) % 3.0 - 1.5
    >>> f = 1.0 + rng.normal(0.0, 1e-3, t.size) - 0.003 * (np.abs(phase) < 0.08)
    >>> ev = search_dips(t, f, None)
    >>> eph = estimate_period(t, f, None, ev)
    >>> round(eph.period_days, 2)
    3.0
    """
    t, f, boxes = _setup(time_days, flux, flux_err, sigma_white, beta_red)
    events = list(events)
    for e in events:
        if not isinstance(e, Event):
            raise ParameterError("invalid_parameter", "events must be Event instances")
    if len(events) < 2:
        return None
    fixed_min = None if min_period_days is None else _positive("min_period_days",
                                                                 min_period_days)
    accepted = []
    for ref in _reference_events(events):
        # members must share the reference's duration within a factor 2 (rule 2), so the
        # shortest period worth trying is twice the longest duration of that family
        # (a long event near a gap would otherwise be a "member" of any short period); only
        # that family can be members
        d_ref = events[ref].duration_days
        family = [j for j, e in enumerate(events)
                  if 0.5 * d_ref <= e.duration_days <= 2.0 * d_ref]
        p_min = 2.0 * max(events[j].duration_days for j in family) if fixed_min is None \
            else fixed_min
        t_ref = events[ref].t_mid
        trials = []
        for j in family:
            if j == ref:
                continue
            delta = abs(events[j].t_mid - t_ref)
            for k in range(1, _MAX_HARMONIC + 1):
                if delta / k < p_min:
                    break
                trials.append(delta / k)
        if trials:
            found = _evaluate_trials(boxes, [events[j] for j in family],
                                     np.unique(np.array(trials)), t_ref)
            accepted += [dataclasses.replace(c, members=tuple(family[m] for m in c.members))
                         for c in found]
    if not accepted:
        logger.info("no trial period passes the consistency rules: not periodic")
        return None
    top = max(c.score for c in accepted)
    tied = [c for c in accepted if c.score >= (1.0 - _TIE_FRACTION) * top]
    best = max(tied, key=lambda c: c.period)
    return _refine_with_bls(t, f, flux_err, boxes, events, best)


def _reference_events(events: Sequence[Event]) -> list[int]:
    """Indices of the events that anchor trial periods: the strongest, then the strongest of
    each other duration family (durations more than a factor 2 apart), at most
    :data:`_MAX_REFERENCES`. A ramp or a long dip near a gap can outshine a periodic family of
    short eclipses; anchoring only on the strongest event would then never fold them."""
    order = sorted(range(len(events)), key=lambda i: events[i].snr, reverse=True)
    refs: list[int] = []
    for i in order:
        d = events[i].duration_days
        if all(not (0.5 * events[r].duration_days <= d <= 2.0 * events[r].duration_days)
               for r in refs):
            refs.append(i)
        if len(refs) == _MAX_REFERENCES:
            break
    return refs


def _refine_with_bls(
    t: NDArray[np.float64],
    f: NDArray[np.float64],
    flux_err: ArrayLike | None,
    boxes: _Boxes,
    events: Sequence[Event],
    cand: _Candidate,
) -> Ephemeris | None:
    from astropy.timeseries import BoxLeastSquares

    ok = np.isfinite(f)
    duration = float(np.median([events[i].duration_days for i in cand.members]))
    span = float(t[-1] - t[0])
    half = _BLS_HALF_WIDTHS * duration * cand.period / span
    periods = cand.period + np.linspace(-half, half, _BLS_PERIODS)
    periods = periods[periods > 2.0 * duration]
    durations = duration * np.array([0.8, 1.0, 1.25])
    durations = durations[durations < 0.5 * periods.min()] if periods.size else durations[:0]
    if periods.size == 0 or durations.size == 0:
        return None
    # BLS sees only the points that any trial transit can reach: within the period-drift range
    # plus the longest trial duration of the candidate's predicted mid-times
    phase = (t - cand.t_ref + 0.5 * cand.period) % cand.period - 0.5 * cand.period
    reach = half * span / cand.period + durations.max()
    ok &= np.abs(phase) <= _BLS_REACH_FACTOR * reach
    dy = None if flux_err is None else np.asarray(flux_err, dtype=np.float64)[ok]
    bls = BoxLeastSquares(t[ok], f[ok], dy)
    res = bls.power(periods, durations, objective="likelihood")
    power = np.asarray(res.power, dtype=np.float64)
    i = int(np.argmax(power))
    period = float(res.period[i])
    if 0 < i < power.size - 1:  # vertex of the parabola through the peak and its neighbours
        a, b, c = power[i - 1], power[i], power[i + 1]
        curv = a - 2.0 * b + c
        if curv < 0.0:
            period += 0.5 * (a - c) / curv * float(periods[1] - periods[0])
    epoch = float(res.transit_time[i])
    dur = float(res.duration[i])
    times = np.array([e.t_mid for e in events])
    halfw = 0.5 * np.array([e.duration_days for e in events])
    member, n = _members(times, np.maximum(halfw, 0.5 * dur), epoch, period)
    if member.sum() < 2 or np.unique(n[member]).size < 2:
        logger.info("BLS ephemeris does not fold the events: not periodic")
        return None
    # epoch from the member mid-times (finer than the BLS phase grid), next to the first one
    first = float(times[member].min())
    epoch = float(np.mean(times[member] - n[member] * period))
    epoch += round((first - epoch) / period) * period
    return Ephemeris(period_days=period, epoch=epoch, duration_days=dur)


# --------------------------------------------------------------------------------------------
# Folding and windows
# --------------------------------------------------------------------------------------------


def fold(
    time_days: ArrayLike, ephemeris: Ephemeris
) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Phase in days from the nearest mid-transit, and the epoch number.

    Parameters
    ----------
    time_days : array_like
        Times [days] (any order; NaN not allowed).
    ephemeris : Ephemeris

    Returns
    -------
    phase_days : ndarray
        ``t - (epoch + n P)`` in ``[-P/2, P/2)`` [days].
    epoch_index : ndarray of int64
        ``n``, the integer epoch (even/odd split: ``n % 2``).

    Raises
    ------
    SegmentError
        ``non_finite_time``, ``invalid_shape``, ``invalid_type``.
    ParameterError
        ``invalid_parameter`` when ``ephemeris`` is not an :class:`Ephemeris`.

    Notes
    -----
    ``n = floor((t - epoch) / P + 1/2)``; values that rounding puts on ``+P/2`` are moved to
    ``-P/2`` of the next epoch, so the interval is half-open.

    Examples
    --------
    >>> import numpy as np
    >>> ph, n = fold([9.9, 10.0, 11.6], Ephemeris(period_days=2.0, epoch=10.0, duration_days=0.1))
    >>> np.round(ph, 3).tolist(), n.tolist()
    ([-0.1, 0.0, -0.4], [0, 0, 1])
    """
    if not isinstance(ephemeris, Ephemeris):
        raise ParameterError("invalid_parameter", "ephemeris must be an Ephemeris")
    t = _as_1d("time_days", time_days)
    if not np.all(np.isfinite(t)):
        raise SegmentError("non_finite_time", "time_days must be finite everywhere")
    p = ephemeris.period_days
    n = np.floor((t - ephemeris.epoch) / p + 0.5)
    phase = t - (ephemeris.epoch + n * p)
    up = phase >= 0.5 * p
    down = phase < -0.5 * p
    phase = np.where(up, phase - p, np.where(down, phase + p, phase))
    n = n + up - down
    return phase, n.astype(np.int64)


def event_windows(
    time_days: ArrayLike,
    events: Sequence[Event] | Ephemeris,
    *,
    half_width_factor: float = 1.5,
) -> EventWindows:
    """In-event and around-event masks for a list of events or an ephemeris.

    Parameters
    ----------
    time_days : array_like
        Times [days].
    events : sequence of Event, or Ephemeris
        Events (each its own mid-time and duration) or an ephemeris (every epoch).
    half_width_factor : float, optional
        The around-event window reaches ``half_width_factor * duration`` from a mid-time
        (> 0.5; the default 1.5 makes the whole window three durations, the detrending rule).

    Returns
    -------
    EventWindows

    Raises
    ------
    SegmentError
        Bad time array.
    ParameterError
        ``invalid_parameter`` for ``half_width_factor <= 0.5`` or a wrong ``events`` type.

    Notes
    -----
    In-event: ``|t - t_mid| <= D / 2``. Around-event: ``D / 2 < |t - t_mid| <= h D`` and not in
    any event (common practice: the local out-of-event reference).

    Examples
    --------
    >>> import numpy as np
    >>> w = event_windows(np.arange(10.0), Ephemeris(period_days=5.0, epoch=2.0,
    ...                   duration_days=1.0))
    >>> w.in_event.nonzero()[0].tolist(), w.around_event.nonzero()[0].tolist()
    ([2, 7], [1, 3, 6, 8])
    """
    factor = _positive("half_width_factor", half_width_factor)
    if factor <= 0.5:
        raise ParameterError(
            "invalid_parameter", f"half_width_factor must be > 0.5, got {factor!r}"
        )
    t = _as_1d("time_days", time_days)
    if isinstance(events, Ephemeris):
        phase, n = fold(t, events)
        dist = np.abs(phase)
        d = events.duration_days
        in_event = dist <= 0.5 * d
        around = (dist > 0.5 * d) & (dist <= factor * d)
        return EventWindows(in_event, around, n)
    ev = list(events)
    for e in ev:
        if not isinstance(e, Event):
            raise ParameterError(
                "invalid_parameter", "events must be Event instances or an Ephemeris"
            )
    in_event = np.zeros(t.size, dtype=bool)
    reach = np.zeros(t.size, dtype=bool)
    index = np.full(t.size, -1, dtype=np.int64)
    best = np.full(t.size, np.inf)
    for i, e in enumerate(ev):
        dist = np.abs(t - e.t_mid)
        in_event |= dist <= 0.5 * e.duration_days
        near = dist <= factor * e.duration_days
        reach |= near
        closer = near & (dist < best)
        index[closer] = i
        best[closer] = dist[closer]
    return EventWindows(in_event, reach & ~in_event, index)
