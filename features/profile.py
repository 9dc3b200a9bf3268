"""Model-free measurements of one dip's profile.

Pure functions on the detrended flux around one event (relative flux, baseline 1): skewness,
widths at fractions of the depth, the time-reversal symmetry residual. Each is defined in its
docstring; ``docs/features.md`` collects them.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "deficit_skewness",
    "smooth_profile",
    "symmetry_residual",
    "weighted_skewness",
    "widths_at_levels",
]


def weighted_skewness(x: np.ndarray, weights: np.ndarray) -> float:
    """Third standardised moment of ``x`` under non-negative ``weights``.

    Parameters
    ----------
    x : ndarray
        Sample values (here: times [days]).
    weights : ndarray
        Non-negative weights of the same shape.

    Returns
    -------
    float
        ``sum w (x - m)^3 / W / s^3`` with ``W = sum w``, ``m = sum w x / W`` and
        ``s^2 = sum w (x - m)^2 / W``; NaN when ``W`` or ``s`` is zero.

    Notes
    -----
    With equal weights this is the (biased) sample skewness g1 of ``scipy.stats.skew``
    (Joanes & Gill 1998, eq. 1).

    Examples
    --------
    >>> import numpy as np
    >>> round(weighted_skewness(np.array([0.0, 1.0, 2.0]), np.ones(3)), 6)
    0.0
    """
    x = np.asarray(x, dtype=float)
    w = np.asarray(weights, dtype=float)
    total = w.sum()
    if not total > 0:
        return float("nan")
    mean = np.dot(w, x) / total
    d = x - mean
    var = np.dot(w, d * d) / total
    if not var > 0:
        return float("nan")
    return float(np.dot(w, d * d * d) / total / var**1.5)


def deficit_skewness(time_days: np.ndarray, flux: np.ndarray) -> float:
    """Skewness of a dip: the third standardised moment of time weighted by the flux deficit.

    Parameters
    ----------
    time_days : ndarray
        Times inside the event window [days].
    flux : ndarray
        Detrended relative flux there (baseline 1).

    Returns
    -------
    float
        :func:`weighted_skewness` of ``time_days`` with weights ``max(1 - flux, 0)``.
        Positive when the deficit trails to later times (a tail after the minimum, as behind a
        comet's head); about 0 for a symmetric transit; NaN without a deficit.
    """
    w = np.clip(1.0 - np.asarray(flux, dtype=float), 0.0, None)
    return weighted_skewness(time_days, w)


def smooth_profile(flux: np.ndarray, n_points: int) -> np.ndarray:
    """Running mean over ``n_points`` samples (odd, edges shrink), used to read widths.

    Parameters
    ----------
    flux : ndarray
        Evenly or nearly evenly sampled flux.
    n_points : int
        Window length in samples (made odd; 1 returns a copy).
    """
    f = np.asarray(flux, dtype=float)
    n = max(1, int(n_points) | 1)
    if n == 1 or f.size < 3:
        return f.copy()
    half = n // 2
    c = np.concatenate(([0.0], np.cumsum(f)))
    idx = np.arange(f.size)
    lo = np.clip(idx - half, 0, f.size)
    hi = np.clip(idx + half + 1, 0, f.size)
    return (c[hi] - c[lo]) / (hi - lo)


def _crossing(t: np.ndarray, g: np.ndarray, level: float, i_min: int, side: int) -> float:
    """Time where ``g`` (deficit, peak at i_min) falls below ``level`` walking away from i_min."""
    if side < 0:
        below = np.flatnonzero(g[: i_min + 1] < level)
        if below.size == 0:
            return float("nan")
        j = below[-1]  # g[j] < level <= g[j+1]
        k = j + 1
    else:
        below = np.flatnonzero(g[i_min:] < level)
        if below.size == 0:
            return float("nan")
        k = i_min + below[0]  # g[k] < level <= g[k-1]
        j = k - 1
    gj, gk = g[j], g[k]
    if gk == gj:
        return float(t[j])
    frac = (level - gj) / (gk - gj)
    return float(t[j] + frac * (t[k] - t[j]))


def widths_at_levels(
    time_days: np.ndarray,
    flux: np.ndarray,
    *,
    levels: tuple[float, ...] = (0.1, 0.5, 0.9),
    smooth_points: int = 1,
) -> tuple[float, float, np.ndarray]:
    """Widths of a dip at fractions of its depth.

    Parameters
    ----------
    time_days : ndarray
        Sorted times around the event [days].
    flux : ndarray
        Detrended relative flux (baseline 1).
    levels : tuple of float
        Fractions of the depth at which to measure the width (0.1 = near the top).
    smooth_points : int
        Running-mean length applied first (samples), to read widths from noisy data.

    Returns
    -------
    depth : float
        Depth of the smoothed profile (1 - its minimum).
    t_min : float
        Time of the minimum [days].
    widths : ndarray
        Width [days] at each level: the time between the last crossing of ``level * depth``
        before the minimum and the first after it (linear interpolation); NaN where the profile
        does not come back above that level inside the window.
    """
    t = np.asarray(time_days, dtype=float)
    g = 1.0 - smooth_profile(flux, smooth_points)
    i_min = int(np.argmax(g))
    depth = float(g[i_min])
    out = np.full(len(levels), np.nan)
    if depth <= 0:
        return depth, float(t[i_min]), out
    for n, lev in enumerate(levels):
        left = _crossing(t, g, lev * depth, i_min, -1)
        right = _crossing(t, g, lev * depth, i_min, +1)
        out[n] = right - left
    return depth, float(t[i_min]), out


def symmetry_residual(
    time_days: np.ndarray,
    flux: np.ndarray,
    *,
    sigma: float,
    depth: float,
    centres_days: np.ndarray,
) -> tuple[float, float]:
    """How far a dip is from time-reversal symmetry.

    The profile is mirrored about each trial centre c (``f(2c - t)``, by linear interpolation)
    and compared with itself over the points whose mirror image lies inside the window; the best
    (most symmetric) centre is kept.

    Parameters
    ----------
    time_days, flux : ndarray
        The event window: sorted times [days], detrended relative flux.
    sigma : float
        Per-point white noise (relative flux), subtracted in quadrature.
    depth : float
        Dip depth (relative), the unit of the result.
    centres_days : ndarray
        Trial centres [days].

    Returns
    -------
    residual : float
        ``sqrt(max(mean((f - f_mirror)^2) - 2 sigma^2, 0)) / depth`` at the best centre:
        0 for a symmetric dip, of order 0.1-0.5 for a comet-like tail; NaN when undefined.
    centre : float
        The best centre [days].
    """
    t = np.asarray(time_days, dtype=float)
    f = np.asarray(flux, dtype=float)
    c = np.asarray(centres_days, dtype=float)
    if t.size < 5 or depth <= 0 or c.size == 0:
        return float("nan"), float("nan")
    mirror_t = 2.0 * c[:, None] - t[None, :]
    inside = (mirror_t >= t[0]) & (mirror_t <= t[-1])
    mirrored = np.interp(mirror_t, t, f)
    d2 = np.where(inside, (f[None, :] - mirrored) ** 2, 0.0)
    n = inside.sum(axis=1)
    # need the mirror to overlap at least half the window to count
    ok = n >= max(5, t.size // 2)
    if not ok.any():
        return float("nan"), float("nan")
    msd = np.where(ok, d2.sum(axis=1) / np.maximum(n, 1), np.inf)
    best = int(np.argmin(msd))
    excess = max(msd[best] - 2.0 * sigma * sigma, 0.0)
    return float(np.sqrt(excess) / depth), float(c[best])
