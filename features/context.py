"""Measurements of the light curve around the dips: periodicity, steps, ramps, outliers.

These separate stellar variability (power concentrated at one period, high autocorrelation) and
instrument artefacts (steps, ramps after gaps, isolated single-cadence outliers) from real dips.
All work on the median-normalised flux, with the in-event points masked where stated.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "autocorrelation",
    "outlier_statistics",
    "power_spectrum_peak",
    "ramp_statistic",
    "step_statistic",
    "uniform_bins",
]

_MAX_BINS = 4096


def uniform_bins(
    time_days: np.ndarray, flux: np.ndarray, *, bin_days: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Average ``flux`` onto a uniform time grid.

    Parameters
    ----------
    time_days, flux : ndarray
        Sorted times [days] and values (NaN are ignored).
    bin_days : float
        Bin width [days]; grown so that there are at most 4,096 bins.

    Returns
    -------
    centres : ndarray
        Bin centres [days].
    mean : ndarray
        Mean flux per bin (0 where empty).
    filled : ndarray of bool
        True where a bin holds at least one point.
    """
    t = np.asarray(time_days, dtype=float)
    f = np.asarray(flux, dtype=float)
    good = np.isfinite(f)
    t, f = t[good], f[good]
    span = t[-1] - t[0] if t.size else 0.0
    width = max(bin_days, span / (_MAX_BINS - 1), 1e-9)
    n_bins = int(span / width) + 1
    idx = np.minimum(((t - t[0]) / width).astype(int), n_bins - 1)
    counts = np.bincount(idx, minlength=n_bins)
    sums = np.bincount(idx, weights=f, minlength=n_bins)
    filled = counts > 0
    mean = np.where(filled, sums / np.maximum(counts, 1), 0.0)
    centres = t[0] + (np.arange(n_bins) + 0.5) * width if t.size else np.empty(0)
    return centres, mean, filled


def power_spectrum_peak(
    time_days: np.ndarray,
    flux: np.ndarray,
    *,
    bin_days: float,
    min_period_days: float,
    max_period_days: float,
) -> tuple[float, float, float]:
    """Strongest periodicity of a light curve and the share of the power it holds.

    Parameters
    ----------
    time_days, flux : ndarray
        Sorted times [days] and relative flux; NaN marks masked points (e.g. in event).
    bin_days : float
        Bin width of the uniform grid [days].
    min_period_days, max_period_days : float
        Period range searched [days].

    Returns
    -------
    period_days : float
        Period of the highest peak of the power spectrum in the range (NaN if none).
    power_fraction : float
        Power in the peak (its bin and the two neighbours) over all power in the range: close to
        1 for a single sinusoid, small for white noise.
    amplitude : float
        Semi-amplitude of that sinusoid (relative flux).

    Notes
    -----
    The data are averaged onto a uniform grid, empty bins set to the mean (zero after
    subtraction), and the periodogram is ``|FFT|^2`` (Deeming 1975 classical periodogram;
    gaps act through the window function). Resolution is one over the time span.
    """
    _, mean, filled = uniform_bins(time_days, flux, bin_days=bin_days)
    n_fill = int(filled.sum())
    if n_fill < 8:
        return float("nan"), float("nan"), float("nan")
    width = (np.asarray(time_days)[-1] - np.asarray(time_days)[0]) / max(mean.size - 1, 1)
    x = np.where(filled, mean - mean[filled].mean(), 0.0)
    spec = np.fft.rfft(x)
    power = np.abs(spec) ** 2
    freq = np.fft.rfftfreq(x.size, d=width if width > 0 else 1.0)
    band = (freq >= 1.0 / max_period_days) & (freq <= 1.0 / min_period_days) & (freq > 0)
    if band.sum() < 3:
        return float("nan"), float("nan"), float("nan")
    p_band = np.where(band, power, 0.0)
    k = int(np.argmax(p_band))
    peak = p_band[max(k - 1, 0) : k + 2].sum()
    total = p_band.sum()
    amplitude = 2.0 * np.abs(spec[k]) / n_fill
    return float(1.0 / freq[k]), float(peak / total) if total > 0 else float("nan"), float(
        amplitude)


def autocorrelation(
    time_days: np.ndarray, flux: np.ndarray, *, bin_days: float, lags_days: np.ndarray
) -> np.ndarray:
    """Autocorrelation of a gappy light curve at given lags.

    Parameters
    ----------
    time_days, flux : ndarray
        Sorted times [days] and relative flux; NaN marks masked points.
    bin_days : float
        Grid bin width [days].
    lags_days : ndarray
        Lags [days] at which to report the autocorrelation.

    Returns
    -------
    ndarray
        ACF at each lag, normalised by the overlap so gaps do not bias it (the masked-correlation
        estimator: sum of products over pairs present, divided by the number of such pairs, over
        the variance); NaN where fewer than 10 pairs overlap.
    """
    _, mean, filled = uniform_bins(time_days, flux, bin_days=bin_days)
    lags = np.asarray(lags_days, dtype=float)
    out = np.full(lags.size, np.nan)
    if filled.sum() < 10:
        return out
    width = (np.asarray(time_days)[-1] - np.asarray(time_days)[0]) / max(mean.size - 1, 1)
    x = np.where(filled, mean - mean[filled].mean(), 0.0)
    m = filled.astype(float)
    n = x.size
    size = 1 << int(np.ceil(np.log2(2 * n)))
    fx, fm = np.fft.rfft(x, size), np.fft.rfft(m, size)
    cxx = np.fft.irfft(fx * np.conj(fx), size)[:n]
    cmm = np.fft.irfft(fm * np.conj(fm), size)[:n]
    var = cxx[0] / max(cmm[0], 1.0)
    if not var > 0:
        return out
    k = np.rint(lags / width).astype(int) if width > 0 else np.zeros(lags.size, int)
    ok = (k >= 0) & (k < n)
    pairs = np.rint(cmm[k[ok]])
    acf = np.where(pairs >= 10, cxx[k[ok]] / np.maximum(pairs, 1) / var, np.nan)
    out[ok] = acf
    return out


def step_statistic(flux: np.ndarray, sigma: float, *, window_points: int) -> tuple[float, int]:
    """Largest jump between the means of two adjacent windows, in units of its noise.

    Parameters
    ----------
    flux : ndarray
        Relative flux (finite).
    sigma : float
        Per-point white noise.
    window_points : int
        Points on each side of a trial step.

    Returns
    -------
    snr : float
        ``max |mean(right) - mean(left)| / (sigma sqrt(2 / n))`` over all positions.
    index : int
        Index of the first point after the largest step.
    """
    f = np.asarray(flux, dtype=float)
    n = int(window_points)
    if f.size < 2 * n or n < 1 or not sigma > 0:
        return float("nan"), -1
    c = np.concatenate(([0.0], np.cumsum(f)))
    pos = np.arange(n, f.size - n + 1)
    left = (c[pos] - c[pos - n]) / n
    right = (c[pos + n] - c[pos]) / n
    jump = np.abs(right - left)
    k = int(np.argmax(jump))
    return float(jump[k] / (sigma * np.sqrt(2.0 / n))), int(pos[k])


def ramp_statistic(
    time_days: np.ndarray, flux: np.ndarray, sigma: float, *, gap_days: float,
    head_days: float = 0.1, body_days: float = 0.4,
) -> float:
    """Strongest ramp at the start of the data or after a gap, in units of its noise.

    For the start and every gap longer than ``gap_days``, the mean of the first ``head_days``
    after it minus the mean of the next ``body_days``; returns the largest ``|difference|`` over
    its standard error. Thermal settling after a data gap shows as such a ramp.
    """
    t = np.asarray(time_days, dtype=float)
    f = np.asarray(flux, dtype=float)
    if t.size < 10 or not sigma > 0:
        return float("nan")
    starts = np.concatenate(([0], np.flatnonzero(np.diff(t) > gap_days) + 1))
    best = 0.0
    found = False
    for s in starts:
        t0 = t[s]
        lo = np.searchsorted(t, t0 + head_days)
        hi = np.searchsorted(t, t0 + head_days + body_days)
        n_head, n_body = lo - s, hi - lo
        if n_head < 3 or n_body < 3:
            continue
        diff = f[s:lo].mean() - f[lo:hi].mean()
        err = sigma * np.sqrt(1.0 / n_head + 1.0 / n_body)
        best = max(best, abs(diff) / err)
        found = True
    return float(best) if found else float("nan")


def outlier_statistics(flux: np.ndarray, sigma: float, *, threshold: float = 5.0) -> tuple[
        int, float, int]:
    """Isolated single-cadence outliers.

    A point is an outlier when it differs from the mean of its two neighbours by more than
    ``threshold`` times the noise of that difference (``sigma sqrt(1.5)``) while the neighbours
    agree with each other (within the same threshold).

    Returns
    -------
    n_outliers : int
        Number of such points.
    max_sigma : float
        Largest deviation among them, in units of the difference's noise (0 when none).
    n_low : int
        How many lie below their neighbours (dip-like).
    """
    f = np.asarray(flux, dtype=float)
    if f.size < 3 or not sigma > 0:
        return 0, float("nan"), 0
    mid = f[1:-1]
    nb = 0.5 * (f[:-2] + f[2:])
    dev = (mid - nb) / (sigma * np.sqrt(1.5))
    calm = np.abs(f[:-2] - f[2:]) / (sigma * np.sqrt(2.0)) < threshold
    hit = (np.abs(dev) > threshold) & calm
    n = int(hit.sum())
    if n == 0:
        return 0, 0.0, 0
    return n, float(np.abs(dev[hit]).max()), int((dev[hit] < 0).sum())
