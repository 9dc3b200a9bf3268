"""Noise processes for simulated light curves.

White Gaussian noise and correlated (red) noise drawn from a Gaussian process with an exponential
(Ornstein-Uhlenbeck) kernel, k(dt) = sigma^2 exp(-|dt| / tau). The OU process is the continuous
limit of an AR(1) process, and on any sampling it can be drawn exactly in O(N) with the recursion

    x_0 ~ N(0, sigma^2),
    x_i = rho_i x_{i-1} + sigma sqrt(1 - rho_i^2) eps_i,   rho_i = exp(-(t_i - t_{i-1}) / tau),

(e.g. Rasmussen & Williams 2006, the Ornstein-Uhlenbeck covariance; Gillespie 1996 for the exact
update). All randomness comes from the ``numpy.random.Generator`` passed in.
"""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

from features.errors import ParameterError

__all__ = ["ou_noise", "white_noise"]


def white_noise(n: int, *, sigma: float, rng: np.random.Generator) -> np.ndarray:
    """Independent Gaussian noise.

    Parameters
    ----------
    n : int
        Number of samples.
    sigma : float
        Standard deviation (relative flux).
    rng : numpy.random.Generator
        Source of randomness.

    Returns
    -------
    ndarray of shape (n,)
    """
    if sigma < 0:
        raise ParameterError("invalid_parameter", f"sigma must be >= 0, got {sigma}")
    return rng.normal(0.0, sigma, n) if sigma > 0 else np.zeros(n)


def ou_noise(
    time_days: np.ndarray, *, sigma: float, timescale_days: float, rng: np.random.Generator
) -> np.ndarray:
    """Exact draw of an Ornstein-Uhlenbeck (exponential-kernel GP) process.

    Parameters
    ----------
    time_days : ndarray
        Sorted sample times [days].
    sigma : float
        Marginal standard deviation of the process (relative flux).
    timescale_days : float
        Correlation time tau [days].
    rng : numpy.random.Generator
        Source of randomness.

    Returns
    -------
    ndarray
        One realisation with covariance ``sigma**2 * exp(-|t_i - t_j| / tau)``.

    Notes
    -----
    Inside each run of constant time step the recursion is a first-order IIR filter and runs
    through ``scipy.signal.lfilter``; at gaps the exact coefficient for the longer step is used.

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(1000) * 0.01
    >>> x = ou_noise(t, sigma=1e-3, timescale_days=0.1, rng=np.random.default_rng(1))
    >>> x.shape
    (1000,)
    """
    if timescale_days <= 0:
        raise ParameterError(
            "invalid_parameter", f"timescale_days must be > 0, got {timescale_days}"
        )
    if sigma < 0:
        raise ParameterError("invalid_parameter", f"sigma must be >= 0, got {sigma}")
    t = np.asarray(time_days, dtype=float)
    n = t.size
    if n == 0 or sigma == 0:
        return np.zeros(n)
    eps = rng.standard_normal(n)
    x = np.empty(n)
    x[0] = eps[0]
    if n == 1:
        return sigma * x
    dt = np.diff(t)
    rho = np.exp(-dt / timescale_days)
    scale = np.sqrt(1.0 - rho * rho)
    # Split into runs of constant step (a sector is uniform apart from its gaps); inside a run the
    # recursion is a first-order IIR filter (scipy.signal.lfilter), carried across the breaks.
    step_changes = np.flatnonzero(np.abs(np.diff(dt)) > 1e-6 * np.abs(dt[1:]).clip(1e-12)) + 1
    starts = np.concatenate(([0], step_changes))
    ends = np.concatenate((step_changes, [dt.size]))
    for s0, s1 in zip(starts, ends, strict=True):
        # steps s0..s1-1 produce samples s0+1..s1, all with coefficient rho[s0]
        r = float(rho[s0])
        drive = scale[s0] * eps[s0 + 1 : s1 + 1]
        x[s0 + 1 : s1 + 1], _ = lfilter([1.0], [1.0, -r], drive, zi=[r * x[s0]])
    return sigma * x


def _ou_noise_slow(
    time_days: np.ndarray, *, sigma: float, timescale_days: float, rng: np.random.Generator
) -> np.ndarray:
    """Obvious per-sample loop of the same recursion (reference for the tests)."""
    t = np.asarray(time_days, dtype=float)
    eps = rng.standard_normal(t.size)
    x = np.empty(t.size)
    x[0] = eps[0]
    for i in range(1, t.size):
        rho = np.exp(-(t[i] - t[i - 1]) / timescale_days)
        x[i] = rho * x[i - 1] + np.sqrt(1.0 - rho * rho) * eps[i]
    return sigma * x
