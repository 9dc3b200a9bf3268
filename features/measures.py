"""Measurements across events: single-event depths, odd/even, secondary eclipse, consistency.

Pure functions on the detrended flux (baseline 1) with a per-point noise ``sigma`` that already
includes the red-noise factor. Depths are matched-filter amplitudes of a unit-depth profile
``u`` (the fitted trapezoid of the folded event): d = sum w (1 - f) u / sum w u^2 with error
1 / sqrt(sum w u^2), the least-squares amplitude of a known shape (e.g. Kovacs, Zucker & Mazeh
2002 for the box case).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

__all__ = [
    "depth_consistency",
    "epoch_depths",
    "odd_even_sigma",
    "secondary_at_phase",
    "secondary_search",
]

Profile = Callable[[np.ndarray], np.ndarray]
"""A unit-depth profile u(dt) of the time from mid-event [days] (0 far away, 1 at full depth)."""


def _amplitude(deficit: np.ndarray, u: np.ndarray, sigma: float) -> tuple[float, float]:
    suu = float(u @ u)
    if not suu > 0:
        return float("nan"), float("nan")
    return float(deficit @ u) / suu, sigma / np.sqrt(suu)


def epoch_depths(
    time_days: np.ndarray,
    flux: np.ndarray,
    sigma: float,
    *,
    period_days: float,
    epoch: float,
    half_window_days: float,
    profile: Profile,
    min_coverage: float = 0.3,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Depth of every observed transit epoch of an ephemeris.

    Parameters
    ----------
    time_days, flux : ndarray
        Times [days], detrended relative flux.
    sigma : float
        Per-point noise (red noise included).
    period_days, epoch : float
        Ephemeris [days].
    half_window_days : float
        Points within this time of mid-event are used.
    profile : callable
        Unit-depth profile of the event, ``u(t - t_mid)``.
    min_coverage : float
        An epoch counts only when its points carry at least this fraction of the profile's
        full-coverage weight sum(u^2) (partial coverage at gaps).

    Returns
    -------
    epochs : ndarray of int
        Epoch numbers (0 at ``epoch``).
    depths, errors : ndarray
        Matched-filter depth and its error per epoch.
    """
    t = np.asarray(time_days, dtype=float)
    f = np.asarray(flux, dtype=float)
    n = np.round((t - epoch) / period_days).astype(int)
    dt = t - (epoch + n * period_days)
    near = np.abs(dt) <= half_window_days
    if not near.any():
        return np.empty(0, int), np.empty(0), np.empty(0)
    cadence = float(np.median(np.diff(t))) if t.size > 1 else 1.0
    grid = np.arange(-half_window_days, half_window_days, cadence)
    full = float(np.sum(profile(grid) ** 2))
    epochs, depths, errors = [], [], []
    for e in np.unique(n[near]):
        sel = near & (n == e)
        u = profile(dt[sel])
        if full > 0 and float(u @ u) < min_coverage * full:
            continue
        d, s = _amplitude(1.0 - f[sel], u, sigma)
        if np.isfinite(d):
            epochs.append(int(e))
            depths.append(d)
            errors.append(s)
    return np.array(epochs, int), np.array(depths), np.array(errors)


def _weighted_mean(x: np.ndarray, err: np.ndarray) -> tuple[float, float]:
    w = 1.0 / (err * err)
    return float(w @ x / w.sum()), float(1.0 / np.sqrt(w.sum()))


def odd_even_sigma(epochs: np.ndarray, depths: np.ndarray, errors: np.ndarray) -> float:
    """Difference of mean odd and even depths over its combined uncertainty.

    ``(d_odd - d_even) / sqrt(s_odd^2 + s_even^2)`` with inverse-variance weighted means over
    the odd and the even epochs. For a planet this is a standard normal variable (mean 0,
    standard deviation 1, when the errors are right); an eclipsing binary folded at half its
    period, whose alternate eclipses differ, gives large values. NaN without both odd and even
    epochs.
    """
    odd = (epochs % 2) == 1
    if odd.sum() == 0 or (~odd).sum() == 0:
        return float("nan")
    d_odd, s_odd = _weighted_mean(depths[odd], errors[odd])
    d_even, s_even = _weighted_mean(depths[~odd], errors[~odd])
    return (d_odd - d_even) / float(np.hypot(s_odd, s_even))


def depth_consistency(depths: np.ndarray, errors: np.ndarray) -> tuple[float, float]:
    """Scatter of single-event depths.

    Returns
    -------
    scatter : float
        Standard deviation of the depths over their mean (NaN for fewer than 2 events).
    chi2_reduced : float
        ``sum ((d_i - mean_w) / s_i)^2 / (n - 1)`` about the inverse-variance weighted mean:
        about 1 for constant-depth transits, large for comets whose depth varies.
    """
    d = np.asarray(depths, dtype=float)
    s = np.asarray(errors, dtype=float)
    if d.size < 2:
        return float("nan"), float("nan")
    mean = float(np.mean(d))
    scatter = float(np.std(d, ddof=1) / mean) if mean > 0 else float("nan")
    m, _ = _weighted_mean(d, s)
    chi2 = float(np.sum(((d - m) / s) ** 2) / (d.size - 1))
    return scatter, chi2


def _folded(time_days: np.ndarray, period_days: float, epoch: float) -> np.ndarray:
    """Phase in [0, 1) with the primary at 0."""
    return ((np.asarray(time_days, dtype=float) - epoch) / period_days) % 1.0


def secondary_at_phase(
    time_days: np.ndarray,
    flux: np.ndarray,
    sigma: float,
    *,
    period_days: float,
    epoch: float,
    duration_days: float,
    phase: float = 0.5,
) -> tuple[float, float]:
    """Depth and SNR of a box of the primary's duration centred at ``phase``.

    Returns
    -------
    depth : float
        Mean flux deficit in the box (relative); NaN with fewer than 3 points in it.
    snr : float
        depth / (sigma / sqrt(n_in)).
    """
    ph = _folded(time_days, period_days, epoch)
    half = 0.5 * duration_days / period_days
    dist = np.abs(((ph - phase) + 0.5) % 1.0 - 0.5)
    sel = dist <= half
    n = int(sel.sum())
    if n < 3:
        return float("nan"), float("nan")
    depth = float(np.mean(1.0 - np.asarray(flux)[sel]))
    return depth, depth / (sigma / np.sqrt(n))


def secondary_search(
    time_days: np.ndarray,
    flux: np.ndarray,
    sigma: float,
    *,
    period_days: float,
    epoch: float,
    duration_days: float,
    n_phases: int = 200,
) -> tuple[float, float]:
    """Most significant box dip at any phase away from the primary.

    A box of the primary's duration slides over phases; phases within one duration of the
    primary are excluded. Vectorised with cumulative sums over the phase-sorted data.

    Returns
    -------
    snr : float
        Highest box SNR (depth / (sigma / sqrt(n_in))); NaN when nothing can be tested.
    phase : float
        Its phase in [0, 1).
    """
    ph = _folded(time_days, period_days, epoch)
    order = np.argsort(ph)
    ph = ph[order]
    deficit = 1.0 - np.asarray(flux, dtype=float)[order]
    half = 0.5 * duration_days / period_days
    # box centres at least one duration plus half a box away from the primary
    lo_ok, hi_ok = 3 * half, 1.0 - 3 * half
    if hi_ok <= lo_ok:
        return float("nan"), float("nan")
    centres = np.linspace(lo_ok, hi_ok, n_phases)
    c = np.concatenate(([0.0], np.cumsum(deficit)))
    lo = np.searchsorted(ph, centres - half)
    hi = np.searchsorted(ph, centres + half)
    n = hi - lo
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = np.where(n >= 3, (c[hi] - c[lo]) / n / (sigma / np.sqrt(np.maximum(n, 1))), -np.inf)
    k = int(np.argmax(snr))
    if not np.isfinite(snr[k]):
        return float("nan"), float("nan")
    return float(snr[k]), float(centres[k])
