"""From a validated :class:`~features.segment.Segment` to its feature vector.

``extract(segment, ephemeris=None)`` runs the pipeline of one segment: detrend and estimate the
noise, find the significant dips, look for a period (or use the one supplied), fit the shape
families to the strongest event (or to the fold when periodic), and measure every feature of
:data:`features.catalog.FEATURES`. A feature that cannot be measured is NaN, and a flag says why.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from features.catalog import FEATURE_NAMES, FEATURE_VERSION, SNR_SCAN_DURATIONS_DAYS
from features.context import (
    autocorrelation,
    outlier_statistics,
    power_spectrum_peak,
    ramp_statistic,
    step_statistic,
)
from features.detrend import detrend
from features.errors import ParameterError
from features.events import (
    Ephemeris,
    Event,
    dip_significance_scan,
    estimate_period,
    event_windows,
    search_dips,
)
from features.fits import (
    EventFits,
    asymmetric_trapezoid,
    fit_asymmetric,
    fit_event,
    fit_stretched_transit,
    make_window,
)
from features.measures import (
    depth_consistency,
    epoch_depths,
    odd_even_sigma,
    secondary_at_phase,
    secondary_search,
)
from features.profile import deficit_skewness, symmetry_residual, widths_at_levels
from features.segment import Segment

__all__ = ["FLAGS", "Features", "extract"]

FLAGS: dict[str, str] = {
    "no_significant_dip": "no dip above the detection threshold: shape features are NaN",
    "low_snr": "the strongest dip has SNR < 10: shape features are uncertain",
    "few_points_in_event": "fewer than 6 points inside the event: shape features are NaN",
    "single_event": "only one event: odd/even and depth-consistency features are NaN",
    "not_periodic": "no period found or supplied: odd/even and secondary features are NaN",
    "ephemeris_supplied": "the period, epoch and duration were supplied, not searched",
    "estimated_errors": "flux errors were estimated from the scatter",
    "red_noise_unmeasured": "too few points to measure red noise: beta = 1 assumed",
    "event_near_gap": "the strongest event lies within one duration of a gap or an edge",
    "short_baseline": "the segment is too short for the power spectrum and autocorrelation",
}
"""Every flag :func:`extract` can raise, with what it means."""

_LOW_SNR = 10.0
_MIN_EVENT_POINTS = 6


@dataclass(frozen=True)
class Features:
    """The features of one segment.

    Attributes
    ----------
    values : ndarray
        Feature values in :data:`features.catalog.FEATURE_NAMES` order (NaN = not measurable).
    events : tuple of Event
        The significant dips found.
    ephemeris : Ephemeris or None
        The period used (supplied or found).
    fits : EventFits or None
        The shape fits of the strongest (or folded) event.
    flags : tuple of str
        Keys of :data:`FLAGS`.
    feature_version : str
        :data:`features.catalog.FEATURE_VERSION` of the definitions used.
    """

    values: np.ndarray
    events: tuple[Event, ...]
    ephemeris: Ephemeris | None
    fits: EventFits | None
    flags: tuple[str, ...]
    feature_version: str = FEATURE_VERSION
    names: tuple[str, ...] = field(default=FEATURE_NAMES)

    def __getitem__(self, name: str) -> float:
        return float(self.values[self.names.index(name)])

    def as_dict(self) -> dict[str, float]:
        """Name -> value (NaN kept; the JSON edge turns it into null)."""
        return {n: float(v) for n, v in zip(self.names, self.values, strict=True)}


def _nan() -> float:
    return float("nan")


def _gap_distance(t: np.ndarray, t_mid: float, duration: float, cadence: float) -> float:
    """Distance from t_mid to the nearest gap edge or segment edge, in durations."""
    steps = np.diff(t)
    gaps = np.flatnonzero(steps > max(5.0 * cadence, 0.1))
    edges = np.concatenate(([t[0], t[-1]], t[gaps], t[gaps + 1]))
    return float(np.min(np.abs(edges - t_mid)) / duration)


def _strongest(events: list[Event]) -> Event:
    return max(events, key=lambda e: e.snr)


def _near_epoch(ephemeris: Ephemeris, t: np.ndarray) -> float:
    """Mid-event time of the ephemeris nearest the middle of the data."""
    n = round((0.5 * (t[0] + t[-1]) - ephemeris.epoch) / ephemeris.period_days)
    return ephemeris.epoch + n * ephemeris.period_days


def extract(
    segment: Segment,
    ephemeris: Ephemeris | None = None,
    *,
    max_dip_days: float = 2.0,
    snr_threshold: float = 7.0,
    method: str = "fast",
) -> Features:
    """Measure the feature vector of one segment.

    Parameters
    ----------
    segment : Segment
        A validated segment (sorted, finite, median-normalised).
    ephemeris : Ephemeris, optional
        Known period, epoch and duration; when given no period is searched.
    max_dip_days : float
        Longest dip considered [days]; the detrending window is three times longer.
    snr_threshold : float
        Detection threshold of the dip search.
    method : {"fast", "scipy"}
        Solver of the shape-fit refinements (see :func:`features.fits.fit_event`).

    Returns
    -------
    Features

    Raises
    ------
    ParameterError
        Bad ``max_dip_days``, ``snr_threshold`` or ``method``.

    Examples
    --------
    >>> import numpy as np
    >>> from features.segment import make_segment
    >>> rng = np.random.default_rng(0)
    >>> t = np.arange(0, 3, 0.01)
    >>> f = 1 - 0.01 * (np.abs(t - 1.5) < 0.05) + rng.normal(0, 1e-3, t.size)
    >>> feats = extract(make_segment(t, f, id="LS-0001"))
    >>> feats["n_events"]
    1.0
    """
    if not max_dip_days > 0:
        raise ParameterError("invalid_parameter", f"max_dip_days must be > 0, got {max_dip_days}")
    if not snr_threshold > 0:
        raise ParameterError("invalid_parameter",
                             f"snr_threshold must be > 0, got {snr_threshold}")
    t, f, e = segment.time, segment.flux, segment.flux_err
    cadence = segment.cadence_min / 1440.0
    flags: list[str] = []
    if segment.flux_err_estimated:
        flags.append("estimated_errors")
    if ephemeris is not None:
        flags.append("ephemeris_supplied")
        max_dip_days = max(max_dip_days, ephemeris.duration_days)

    det = detrend(t, f, e, max_dip_days=max_dip_days)
    beta = det.beta_red
    if not math.isfinite(beta):
        beta = 1.0
        flags.append("red_noise_unmeasured")
    sigma_w = float(det.sigma_white)
    fd = np.asarray(det.flux)
    events = search_dips(t, fd, e, snr_threshold=snr_threshold, sigma_white=sigma_w,
                         beta_red=beta)
    scan = dip_significance_scan(t, fd, e, durations_days=np.array(SNR_SCAN_DURATIONS_DAYS),
                                 sigma_white=sigma_w, beta_red=beta)
    if ephemeris is None and len(events) >= 2:
        ephemeris = estimate_period(t, fd, e, events, sigma_white=sigma_w, beta_red=beta)

    v: dict[str, float] = dict.fromkeys(FEATURE_NAMES, float("nan"))
    v.update(n_points=float(t.size), cadence_min=float(segment.cadence_min),
             span_days=float(t[-1] - t[0]), flux_err_estimated=float(segment.flux_err_estimated),
             sigma_white_ppm=sigma_w * 1e6, red_noise_beta=beta, n_events=float(len(events)),
             periodic=float(ephemeris is not None))
    for i, snr in enumerate(scan.snr):
        v[f"snr_scan_{i:02d}"] = float(snr)
    if np.isfinite(scan.snr).any():
        v["snr_scan_peak_days"] = float(scan.durations_days[np.nanargmax(scan.snr)])
    if ephemeris is not None:
        v["period_days"] = ephemeris.period_days

    # the event whose shape is measured
    if ephemeris is not None:
        t_mid = _near_epoch(ephemeris, t)
        duration = ephemeris.duration_days
        depth = _strongest(events).depth if events else _nan()
        snr = _strongest(events).snr if events else _nan()
    elif events:
        main = _strongest(events)
        t_mid, duration, depth, snr = main.t_mid, main.duration_days, main.depth, main.snr
    else:
        flags.append("no_significant_dip")
        t_mid = duration = depth = snr = _nan()
        if np.isfinite(scan.snr).any():
            k = int(np.nanargmax(scan.snr))
            v.update(snr=float(scan.snr[k]), depth_ppm=float(scan.depth[k]) * 1e6,
                     duration_days=float(scan.durations_days[k]))
    sigma = sigma_w * beta
    fits = None
    if math.isfinite(t_mid):
        if not math.isfinite(depth) or depth <= 0:
            depth = max(float(scan.depth[np.nanargmax(scan.snr)]) if np.isfinite(
                scan.snr).any() else 3 * sigma, 3 * sigma)
        period = ephemeris.period_days if ephemeris is not None else None
        in_event = _points_in_event(t, t_mid, duration, period)
        v.update(snr=snr, depth_ppm=depth * 1e6, duration_days=duration,
                 duration_depth_ratio=duration / depth, points_in_event=float(in_event),
                 gap_distance_durations=_gap_distance(t, t_mid, duration, cadence))
        if math.isfinite(snr) and snr < _LOW_SNR:
            flags.append("low_snr")
        if v["gap_distance_durations"] < 1.0:
            flags.append("event_near_gap")
        if in_event < _MIN_EVENT_POINTS:
            flags.append("few_points_in_event")
        else:
            fits, asym = _shape_features(v, t, fd, sigma, t_mid, duration, depth, cadence,
                                         period, method)
            _cross_event_features(v, flags, t, fd, sigma, ephemeris, events, t_mid, asym)
    elif ephemeris is None:
        flags.append("not_periodic")
    _context_features(v, flags, t, f, det.baseline, fd, sigma_w, cadence, events, ephemeris,
                      t_mid, duration, depth)
    values = np.array([v[n] for n in FEATURE_NAMES], dtype=float)
    values[~np.isfinite(values)] = np.nan
    values.setflags(write=False)
    return Features(values=values, events=tuple(events), ephemeris=ephemeris,
                    fits=fits, flags=tuple(dict.fromkeys(flags)))


def _points_in_event(t: np.ndarray, t_mid: float, duration: float,
                     period: float | None) -> int:
    dt = t - t_mid
    if period is not None:
        dt = (dt + 0.5 * period) % period - 0.5 * period
    return int(np.count_nonzero(np.abs(dt) <= 0.5 * duration))


def _shape_features(v: dict[str, float], t, fd, sigma, t_mid, duration, depth, cadence, period,
                    method) -> tuple[EventFits, dict[str, float]]:
    win = make_window(t, fd, np.full(t.size, sigma), t_mid=t_mid, duration_days=duration,
                      depth=depth, cadence_days=cadence, period_days=period)
    fits, _ = fit_event(win, method=method, with_asymmetric=False)
    # ingress and egress need finer bins than the wide window: fit them on a zoom of the dip
    # centred on the best symmetric trapezoid (widened for a comet's tail)
    trap = fits.templates["trapezoid"].params
    centre, span = trap["t0"], trap["t14_days"]
    if fits.templates["comet"].chi2 < fits.templates["trapezoid"].chi2:
        cm = fits.templates["comet"].params
        span = max(span, cm["crossing_days"] * (1.0 + 3.0 * cm["tail_ratio"]))
    zoom = make_window(t, fd, np.full(t.size, sigma), t_mid=centre, duration_days=span,
                       depth=depth, cadence_days=cadence, period_days=period, before=1.0,
                       after=1.5, max_bins=150)
    if zoom.t.size < 10:
        zoom = win
    asym = fit_asymmetric(zoom, t0=centre, t14_days=span, method=method)
    total = asym["ingress_days"] + asym["flat_days"] + asym["egress_days"]
    tr = fits.families["transit"].params
    halves = fit_stretched_transit(zoom, t0=asym["t1"] + 0.5 * total, t14_days=total,
                                   k=tr["k"], b=tr["b"], method=method)
    v.update(ingress_egress_ratio=halves["before_days"] / halves["after_days"],
             ingress_days=asym["ingress_days"], egress_days=asym["egress_days"],
             flat_bottom_fraction=asym["flat_days"] / total if total > 0 else _nan())
    # model-free profile on the binned window, padded symmetrically around the trapezoid
    t1, t4 = asym["t1"], asym["t1"] + total
    pad = 0.25 * total
    sel = (win.t >= t1 - pad) & (win.t <= t4 + pad)
    if sel.sum() >= 5:
        v["skewness"] = deficit_skewness(win.t[sel], win.y[sel])
    bin_sigma = float(np.median(1.0 / np.sqrt(win.w)))
    snr_bins = depth / bin_sigma if bin_sigma > 0 else np.inf
    smooth = 1 if snr_bins > 10 else 3
    _, t_min, widths = widths_at_levels(win.t, win.y, smooth_points=smooth)
    v.update(width_10_days=widths[0], width_50_days=widths[1], width_90_days=widths[2])
    v["width_ratio_90_10"] = widths[2] / widths[0] if widths[0] > 0 else _nan()
    v["narrowest_feature_cadences"] = widths[1] / cadence
    centres = t_min + duration * np.linspace(-0.5, 0.5, 21)
    res, _ = symmetry_residual(win.t, win.y, sigma=bin_sigma, depth=depth, centres_days=centres)
    v["symmetry_residual"] = res
    for name in ("transit", "eclipse", "comet", "variability", "artefact"):
        v[f"delta_bic_{name}"] = fits.delta_bic(name)
    v.update(transit_k=tr["k"], transit_b=tr["b"], transit_t14_days=tr["t14_days"])
    cm = fits.families["comet"].params
    v.update(comet_tail_days=cm["tail_days"], comet_tail_crossing_ratio=cm["tail_ratio"])
    for name in ("box", "trapezoid", "v", "gaussian", "comet", "comet_mirrored"):
        v[f"template_{name}_frac"] = fits.template_fraction(name)
    gain_trap = fits.chi2_flat - fits.templates["trapezoid"].chi2
    if gain_trap > 0:
        v["v_shape_index"] = max(fits.templates["v"].chi2 - fits.templates["trapezoid"].chi2,
                                 0.0) / gain_trap
    return fits, asym


def _cross_event_features(v, flags, t, fd, sigma, ephemeris, events, t_mid, asym) -> None:
    if ephemeris is None:
        flags.append("not_periodic")
        if len(events) >= 2:
            depths = np.array([ev.depth for ev in events])
            errors = np.array([ev.depth / ev.snr for ev in events])
            v["depth_scatter"], v["depth_consistency_chi2"] = depth_consistency(depths, errors)
        else:
            flags.append("single_event")
        return
    offset = asym["t1"] - t_mid

    def profile(dt: np.ndarray) -> np.ndarray:
        return asymmetric_trapezoid(dt, t1=offset, ingress_days=asym["ingress_days"],
                                    flat_days=asym["flat_days"],
                                    egress_days=asym["egress_days"])

    total = asym["ingress_days"] + asym["flat_days"] + asym["egress_days"]
    half = max(abs(offset), abs(offset + total)) + 0.5 * ephemeris.duration_days
    epochs, depths, errors = epoch_depths(t, fd, sigma, period_days=ephemeris.period_days,
                                          epoch=t_mid, half_window_days=half, profile=profile)
    if epochs.size >= 2:
        v["odd_even_sigma"] = odd_even_sigma(epochs, depths, errors)
        v["depth_scatter"], v["depth_consistency_chi2"] = depth_consistency(depths, errors)
    else:
        flags.append("single_event")
    dur = max(total, ephemeris.duration_days * 0.5)
    sec_depth, sec_snr = secondary_at_phase(t, fd, sigma, period_days=ephemeris.period_days,
                                            epoch=t_mid, duration_days=dur)
    v.update(secondary_depth_ppm=sec_depth * 1e6, secondary_snr=sec_snr)
    s_snr, s_phase = secondary_search(t, fd, sigma, period_days=ephemeris.period_days,
                                      epoch=t_mid, duration_days=dur)
    v.update(secondary_search_snr=s_snr, secondary_search_phase=s_phase)


def _context_features(v, flags, t, f, baseline, fd, sigma_w, cadence, events, ephemeris, t_mid,
                      duration, depth) -> None:
    span = float(t[-1] - t[0])
    raw = np.array(f, dtype=float)
    if events or ephemeris is not None:
        target: Any = ephemeris if ephemeris is not None else list(events)
        win = event_windows(t, target)
        raw[win.around_event] = np.nan
        if math.isfinite(t_mid):
            near = np.abs(t - t_mid) <= 3.0 * duration
            b = np.asarray(baseline)[near] / np.median(baseline)
            if b.size >= 5 and depth > 0:
                v["variability_to_depth"] = float(np.subtract(*np.percentile(b, [95, 5]))
                                                  / depth)
    bin_days = max(cadence, 0.02)
    if span >= 1.0 and np.isfinite(raw).sum() >= 50:
        period, frac, amp = power_spectrum_peak(t, raw, bin_days=bin_days,
                                                min_period_days=max(4 * bin_days, 0.05),
                                                max_period_days=0.5 * span)
        v.update(psd_peak_period_days=period, psd_peak_fraction=frac)
        if math.isfinite(depth) and depth > 0:
            v["psd_peak_to_depth"] = amp / depth
        lags = np.geomspace(0.25, max(0.5 * span, 0.26), 24)
        acf = autocorrelation(t, raw, bin_days=bin_days, lags_days=lags)
        if np.isfinite(acf).any():
            v["acf_max"] = float(np.nanmax(acf))
        if math.isfinite(duration):
            v["acf_at_duration"] = float(autocorrelation(
                t, raw, bin_days=bin_days, lags_days=np.array([duration]))[0])
    else:
        flags.append("short_baseline")
    window_points = max(round(0.25 / cadence), 3)
    v["step_snr"] = step_statistic(f, sigma_w, window_points=min(window_points,
                                                                 max(t.size // 4, 1)))[0]
    v["ramp_snr"] = ramp_statistic(t, f, sigma_w, gap_days=max(10 * cadence, 0.1))
    n_out, max_sig, _ = outlier_statistics(fd, sigma_w)
    v.update(n_outliers=float(n_out), outlier_max_sigma=max_sig)
