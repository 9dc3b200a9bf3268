"""Out-of-event measurements: periodicity, autocorrelation, steps, ramps, outliers.

References: astropy.timeseries.LombScargle (VanderPlas 2018) for the periodogram peak; the
autocorrelation of a sinusoid (cos of the lag phase) and of an Ornstein-Uhlenbeck process
(exp(-lag/tau), e.g. Rasmussen & Williams 2006, eq. 4.14 with nu = 1/2); Gaussian tail
probabilities from scipy.stats.norm.
"""

from __future__ import annotations

import numpy as np
import pytest
from astropy.timeseries import LombScargle
from scipy import stats

from features.context import (
    autocorrelation,
    outlier_statistics,
    power_spectrum_peak,
    ramp_statistic,
    step_statistic,
    uniform_bins,
)
from training.noise import ou_noise


def _sector(cadence_min=10.0, days=27.0, gap=1.0):
    t = np.arange(0, days, cadence_min / 1440.0)
    return t[np.abs(t - days / 2) > gap / 2]


def test_uniform_bins_average_and_mark_empty_bins():
    t = np.array([0.0, 0.1, 0.2, 1.05, 1.1])
    f = np.array([1.0, 3.0, 5.0, 2.0, 4.0])
    centres, mean, filled = uniform_bins(t, f, bin_days=0.5)
    assert mean[0] == pytest.approx(3.0) and not filled[1] and mean[2] == pytest.approx(3.0)
    assert centres[0] == pytest.approx(0.25)


def test_power_peak_matches_astropy_lomb_scargle():
    rng = np.random.default_rng(0)
    t = _sector()
    period = 3.7
    f = 1 + 2e-3 * np.sin(2 * np.pi * t / period + 0.3) + rng.normal(0, 5e-4, t.size)
    p, frac, amp = power_spectrum_peak(t, f, bin_days=0.02, min_period_days=0.1,
                                       max_period_days=13.0)
    freq, power = LombScargle(t, f).autopower(minimum_frequency=1 / 13, maximum_frequency=10,
                                              samples_per_peak=10)
    p_ref = 1 / freq[np.argmax(power)]
    # FFT resolution is 1/span: the periods agree to within one resolution element
    assert abs(1 / p - 1 / p_ref) < 1.0 / (t[-1] - t[0])
    assert frac > 0.6
    assert amp == pytest.approx(2e-3, rel=0.25)


def test_power_fraction_is_small_for_white_noise():
    rng = np.random.default_rng(1)
    t = _sector()
    f = 1 + rng.normal(0, 1e-3, t.size)
    _, frac, _ = power_spectrum_peak(t, f, bin_days=0.02, min_period_days=0.1,
                                     max_period_days=13.0)
    assert frac < 0.1


def test_power_peak_undefined_with_too_little_data():
    t = np.linspace(0, 1, 5)
    assert np.isnan(power_spectrum_peak(t, np.ones(5), bin_days=0.1, min_period_days=0.1,
                                        max_period_days=1.0)[0])


def test_autocorrelation_of_a_sinusoid_is_cos_of_the_lag():
    t = _sector(cadence_min=30.0)
    period = 2.0
    f = 1 + 1e-3 * np.sin(2 * np.pi * t / period)
    acf = autocorrelation(t, f, bin_days=1 / 48, lags_days=np.array([0.0, 0.5, 1.0, 2.0]))
    np.testing.assert_allclose(acf, np.cos(2 * np.pi * np.array([0, 0.5, 1, 2]) / period),
                               atol=0.05)


def test_autocorrelation_of_an_ou_process_decays_exponentially():
    rng = np.random.default_rng(4)
    t = np.arange(0, 200, 0.02)
    tau = 0.5
    f = 1 + ou_noise(t, sigma=1e-3, timescale_days=tau, rng=rng)
    acf = autocorrelation(t, f, bin_days=0.02, lags_days=np.array([tau, 2 * tau]))
    # exp(-lag / tau) (OU covariance); finite-sample estimator noise ~ 0.05 at this length
    np.testing.assert_allclose(acf, np.exp(-np.array([1.0, 2.0])), atol=0.08)


def test_step_statistic_finds_an_injected_step():
    rng = np.random.default_rng(2)
    sigma, n = 1e-3, 50
    f = 1 + rng.normal(0, sigma, 2000)
    f[1200:] += 10 * sigma * np.sqrt(2 / n)  # a 10-sigma step for windows of 50 points
    snr, idx = step_statistic(f, sigma, window_points=n)
    assert snr == pytest.approx(10, abs=2.0)
    assert abs(idx - 1200) <= 5
    clean = 1 + rng.normal(0, sigma, 2000)
    # maximum of ~2000 correlated N(0,1) statistics stays well below 5 (Gaussian tails)
    assert step_statistic(clean, sigma, window_points=n)[0] < 5


def test_ramp_after_a_gap_is_detected():
    rng = np.random.default_rng(3)
    sigma = 5e-4
    t = _sector(cadence_min=10.0)
    f = 1 + rng.normal(0, sigma, t.size)
    after = t > 13.5
    f[after] -= 3e-3 * np.exp(-(t[after] - t[after][0]) / 0.1)
    assert ramp_statistic(t, f, sigma, gap_days=0.5) > 10
    clean = 1 + rng.normal(0, sigma, t.size)
    assert ramp_statistic(t, clean, sigma, gap_days=0.5) < 4.5


def test_outliers_found_and_counted():
    rng = np.random.default_rng(5)
    sigma = 1e-3
    f = 1 + rng.normal(0, sigma, 10000)
    expected_false = 10000 * 2 * stats.norm.sf(5)  # ~0.006 false hits (scipy.stats.norm)
    n0, _, _ = outlier_statistics(f, sigma)
    assert n0 <= 1 + 10 * expected_false
    f[[100, 5000, 7000]] -= 20 * sigma
    n, max_sigma, n_low = outlier_statistics(f, sigma)
    assert n == 3 and n_low == 3
    assert max_sigma == pytest.approx(20 / np.sqrt(1.5), rel=0.3)


@pytest.mark.parametrize(
    "call",
    [
        lambda: step_statistic(np.ones(10), 1e-3, window_points=20),
        lambda: step_statistic(np.ones(100), 0.0, window_points=5),
        lambda: ramp_statistic(np.arange(5.0), np.ones(5), 1e-3, gap_days=0.5),
    ],
)
def test_unmeasurable_cases_are_nan(call):
    assert np.isnan(call()[0] if isinstance(call(), tuple) else call())
