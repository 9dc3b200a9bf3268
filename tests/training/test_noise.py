"""Noise processes: the fast Ornstein-Uhlenbeck draw against its obvious twin and its law.

References: the exact OU update x_i = rho x_{i-1} + sigma sqrt(1 - rho^2) eps (Gillespie 1996);
its stationary variance sigma^2 and covariance sigma^2 exp(-|dt|/tau) (Rasmussen & Williams
2006, eq. 4.14 with nu = 1/2).
"""

from __future__ import annotations

import numpy as np
import pytest

from features.errors import ParameterError
from training.noise import _ou_noise_slow, ou_noise, white_noise


def _gappy_grid():
    t = np.arange(0, 5, 2 / 1440)
    t = t[(t < 2.0) | (t > 2.6)]  # a gap
    return np.concatenate([t, [5.3, 5.31, 6.0]])  # and irregular steps at the end


def test_fast_draw_equals_the_slow_recursion():
    t = _gappy_grid()
    fast = ou_noise(t, sigma=3e-4, timescale_days=0.2, rng=np.random.default_rng(4))
    slow = _ou_noise_slow(t, sigma=3e-4, timescale_days=0.2, rng=np.random.default_rng(4))
    np.testing.assert_allclose(fast, slow, rtol=0, atol=1e-15)


def test_stationary_variance_and_lag_covariance():
    rng = np.random.default_rng(5)
    t = np.array([0.0, 0.1, 0.3])
    draws = np.array([ou_noise(t, sigma=2.0, timescale_days=0.1, rng=rng) for _ in range(20000)])
    # variance sigma^2 at every time (standard error of a variance ~ sqrt(2/N) ~ 1 %)
    np.testing.assert_allclose(draws.var(axis=0), 4.0, rtol=0.04)
    # covariance sigma^2 exp(-dt/tau) for dt = 0.1 and 0.3 d
    cov = np.mean(draws[:, 0] * draws[:, 1:].T, axis=1)
    np.testing.assert_allclose(cov, 4.0 * np.exp(-np.array([1.0, 3.0])), atol=0.1)


def test_white_noise_scale_and_zero():
    x = white_noise(50000, sigma=1e-3, rng=np.random.default_rng(6))
    assert x.std() == pytest.approx(1e-3, rel=0.02)
    assert not white_noise(10, sigma=0.0, rng=np.random.default_rng(6)).any()


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (lambda r: ou_noise(np.arange(3.0), sigma=1.0, timescale_days=0.0, rng=r),
         "timescale_days"),
        (lambda r: ou_noise(np.arange(3.0), sigma=-1.0, timescale_days=1.0, rng=r), "sigma"),
        (lambda r: white_noise(3, sigma=-1.0, rng=r), "sigma"),
    ],
)
def test_bad_parameters(call, match):
    with pytest.raises(ParameterError, match=match):
        call(np.random.default_rng(0))
