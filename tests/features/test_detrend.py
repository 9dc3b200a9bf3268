"""Tests of features.detrend: robust scale, baseline, detrending and the red-noise factor.

References named beside each check: scipy.stats.median_abs_deviation (scale='normal') for the
MAD scale; batman-package (Kreidberg 2015) for injected transits; the variance of the mean of N
samples of a stationary AR(1) process (e.g. Priestley 1981, "Spectral Analysis and Time Series",
sect. 5.3; formula quoted from memory) for the red-noise factor; the polynomial-reproduction
identity of local polynomial regression (Cleveland 1979) for the baseline kernel.
"""

from __future__ import annotations

import batman
import numpy as np
import pytest
from scipy import stats

from features.detrend import (
    _local_poly,
    _slow_robust_baseline,
    detrend,
    mad_std,
    red_noise_beta,
    robust_baseline,
)
from features.errors import ParameterError, SegmentError

TWO_MIN = 2.0 / 1440.0
THIRTY_MIN = 30.0 / 1440.0


def _trapezoid(t, *, t0, duration, depth, ingress):
    """Symmetric trapezoid dip: full duration ``duration``, linear ingress of ``ingress``."""
    x = np.abs(t - t0)
    return 1.0 - depth * np.clip((0.5 * duration - x) / ingress, 0.0, 1.0)


def _batman(t, *, t0, per, rp, a, inc, u=(0.4, 0.26)):
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc, p.ecc, p.w = t0, per, rp, a, inc, 0.0, 90.0
    p.limb_dark, p.u = "quadratic", list(u)
    return batman.TransitModel(p, t).light_curve(p)


# --------------------------------------------------------------------------------------------
# mad_std
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_mad_std_matches_scipy_and_the_std_of_normal_samples(seed):
    rng = np.random.default_rng(seed)
    sigma = 3.7e-3
    x = rng.normal(1.0, sigma, 200_000)
    # reference: scipy.stats.median_abs_deviation with scale="normal" (same estimator)
    expected = stats.median_abs_deviation(x, scale="normal")
    assert mad_std(x) == pytest.approx(expected, rel=1e-12)
    # and it estimates the standard deviation: the MAD has ~37 % Gaussian efficiency, so its
    # relative standard error is ~1.17 / sqrt(n) = 0.26 % here; 1.5 % is a > 5-sigma bound
    assert mad_std(x) == pytest.approx(sigma, rel=0.015)


def test_mad_std_ignores_nan_and_is_nan_when_empty():
    rng = np.random.default_rng(3)
    x = rng.normal(size=1001)
    with_nan = np.concatenate([x, [np.nan] * 50])
    # reference: scipy.stats.median_abs_deviation(nan_policy="omit")
    ref = stats.median_abs_deviation(with_nan, scale="normal", nan_policy="omit")
    assert mad_std(with_nan) == pytest.approx(ref, rel=1e-12)
    assert np.isnan(mad_std([]))
    assert np.isnan(mad_std([np.nan, np.nan]))


def test_mad_std_resists_a_minority_of_outliers():
    rng = np.random.default_rng(4)
    x = rng.normal(0.0, 1.0, 10_000)
    x[:2000] += 50.0  # 20 % gross outliers move the MAD scale by well under a factor 2
    assert mad_std(x) < 2.0 * mad_std(x[2000:])


# --------------------------------------------------------------------------------------------
# robust_baseline: fast kernel against the slow reference, identities, robustness
# --------------------------------------------------------------------------------------------


def _messy_segment(rng, n, cadence):
    t = np.arange(n) * cadence
    t = t[(t < 0.35 * t[-1]) | (t > 0.42 * t[-1])]  # a data gap
    f = 1.0 + 0.004 * np.sin(2 * np.pi * t / 13.0) + rng.normal(0.0, 8e-4, t.size)
    f[rng.choice(t.size, 15, replace=False)] = np.nan
    f[rng.choice(t.size, 10, replace=False)] += 0.02  # outliers
    return t, f


@pytest.mark.parametrize("degree", [0, 1, 2, 3])
@pytest.mark.parametrize(("n", "cadence", "window"), [(3000, THIRTY_MIN, 3.0),
                                                       (1500, TWO_MIN, 4.0),  # global fallback
                                                       (4000, TWO_MIN, 0.7)])
def test_fast_baseline_equals_slow_reference(degree, n, cadence, window):
    rng = np.random.default_rng(10 + degree)
    t, f = _messy_segment(rng, n, cadence)
    mask = np.zeros(t.size, dtype=bool)
    mask[t.size // 3 : t.size // 3 + 60] = True
    fast = robust_baseline(t, f, window_days=window, mask=mask, degree=degree)
    slow = _slow_robust_baseline(t, f, window_days=window, mask=mask, degree=degree)
    assert np.all(np.isfinite(fast))
    np.testing.assert_allclose(fast, slow, rtol=0, atol=1e-10)


def test_local_kernel_reproduces_polynomials_exactly():
    # identity: a weighted local polynomial fit of degree p reproduces any polynomial of degree
    # <= p, value and slope (Cleveland 1979); checked on irregular nodes and weights
    rng = np.random.default_rng(5)
    xb = np.sort(rng.uniform(0.0, 20.0, 400))
    wb = rng.uniform(0.5, 3.0, xb.size)
    xe = np.linspace(0.5, 19.5, 77)

    def cubic(x):
        return 1e-3 * (x - 7.0) - 2e-4 * (x - 7.0) ** 2 + 1e-5 * (x - 7.0) ** 3

    def dcubic(x):
        return 1e-3 - 4e-4 * (x - 7.0) + 3e-5 * (x - 7.0) ** 2

    value, slope, ok = _local_poly(xb, cubic(xb), wb, xe, 1.5, 3)
    assert ok.all()
    np.testing.assert_allclose(value, cubic(xe), rtol=0, atol=1e-13)
    np.testing.assert_allclose(slope, dcubic(xe), rtol=0, atol=1e-12)


@pytest.mark.parametrize("degree", [2, 3])
def test_baseline_follows_a_polynomial_trend_of_its_degree(degree):
    # same identity through binning and Hermite interpolation: exact up to the median of an even
    # number of points per bin (curvature * cadence^2 / 8 ~ 1e-10 here)
    t = np.arange(0.0, 20.0, TWO_MIN)
    f = 1.0 + 1e-3 * (t - 7.0) - 2e-4 * (t - 7.0) ** 2 + (1e-5 * (t - 7.0) ** 3 if degree == 3
                                                         else 0.0)
    base = robust_baseline(t, f, window_days=3.0, degree=degree)
    assert np.max(np.abs(base - f)) < 1e-8


def test_baseline_is_finite_across_a_masked_stretch_longer_than_the_window():
    t = np.arange(0.0, 12.0, THIRTY_MIN)
    f = 1.0 + 1e-3 * np.sin(t)
    mask = (t > 4.0) & (t < 8.0)  # 4 days masked, window 2 days
    base = robust_baseline(t, f, window_days=2.0, mask=mask)
    assert np.all(np.isfinite(base))
    # where the window holds no data the nearest fitted values are used: bounded by the data
    assert base[mask].min() >= f.min() - 1e-3 and base[mask].max() <= f.max() + 1e-3


def test_baseline_ignores_outliers_and_follows_a_slow_trend():
    rng = np.random.default_rng(6)
    t = np.arange(0.0, 27.0, TWO_MIN)
    truth = 1.0 + 0.005 * np.sin(2 * np.pi * t / 25.0)
    sigma = 1e-3
    f = truth + rng.normal(0.0, sigma, t.size)
    spikes = rng.choice(t.size, t.size // 50, replace=False)
    f[spikes] += rng.uniform(0.01, 0.05, spikes.size)  # 2 % flares / cosmic rays
    base = robust_baseline(t, f, window_days=3.0)
    # a window holds ~2160 points; the bin-median fit error is a few sigma / sqrt(2160) ~ 1e-4
    # at worst (segment edges); 3e-4 bounds it with margin while outliers would add ~5e-4
    assert np.max(np.abs(base - truth)) < 3e-4
    assert np.std(base - truth) < 6e-5


# --------------------------------------------------------------------------------------------
# detrend
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("phase", np.linspace(0.0, 2.0 * np.pi, 6, endpoint=False))
def test_long_dip_survives_detrending_with_variability(phase):
    """A 1.5-day, 0.2 % dip is not eaten by the baseline (window = 3 x 1.5 d).

    The star varies by 1 % with a 15-day period. A 5-day period (requested in the issue) cannot
    be followed by any window >= 4.5 days: a local quadratic over 0.9 period misses the extremum
    by ~17 % of the amplitude (documented in detrend's Notes), so 15 days is tested instead.
    Reference: the injected numpy trapezoid.
    """
    rng = np.random.default_rng(int(100 * phase))
    t = np.arange(0.0, 27.4, THIRTY_MIN)
    dip = _trapezoid(t, t0=13.0, duration=1.5, depth=0.002, ingress=0.05)
    f = (1.0 + 0.01 * np.sin(2 * np.pi * t / 15.0 + phase)) * dip
    f = f + rng.normal(0.0, 2e-4, t.size)
    d = detrend(t, f, None, max_dip_days=1.5)
    core = np.abs(t - 13.0) < 0.7
    recovered = 1.0 - d.flux[core].mean()
    expected = 1.0 - dip[core].mean()
    assert recovered == pytest.approx(expected, rel=0.10)
    assert d.dip_mask[core].mean() > 0.9  # the dip was masked, not absorbed
    assert d.window_days == pytest.approx(4.5)


def test_long_dip_on_a_quiet_star_with_default_window():
    rng = np.random.default_rng(7)
    t = np.arange(0.0, 27.4, THIRTY_MIN)
    dip = _trapezoid(t, t0=9.0, duration=1.5, depth=0.002, ingress=0.05)
    f = dip * (1.0 + 0.003 * (t - 13.7) / 13.7) + rng.normal(0.0, 3e-4, t.size)
    d = detrend(t, f, np.full(t.size, 3e-4))
    core = np.abs(t - 9.0) < 0.7
    assert 1.0 - d.flux[core].mean() == pytest.approx(1.0 - dip[core].mean(), rel=0.10)
    assert d.window_days == pytest.approx(6.0)  # 3 x max_dip_days (2 d)
    assert d.method == "local_polynomial"


@pytest.mark.parametrize("phase", [0.0, 1.6, 3.1, 4.7])
def test_transit_survives_fast_variability_with_a_matched_window(phase):
    # batman transit (reference model) of ~0.22 d on a 1 % sinusoid of 5-day period: with
    # max_dip_days = 0.5 the window is 1.5 d and follows the variability
    rng = np.random.default_rng(int(10 * phase) + 1)
    t = np.arange(0.0, 27.4, TWO_MIN)
    model = _batman(t, t0=13.0, per=10.0, rp=0.07, a=15.0, inc=89.0)
    f = model * (1.0 + 0.01 * np.sin(2 * np.pi * t / 5.0 + phase))
    f = f + rng.normal(0.0, 1e-3, t.size)
    d = detrend(t, f, None, max_dip_days=0.5)
    inside = model < 1.0
    ratio = np.mean(1.0 - d.flux[inside]) / np.mean(1.0 - model[inside])
    assert ratio == pytest.approx(1.0, abs=0.10)


def test_short_segment_falls_back_to_a_global_polynomial():
    rng = np.random.default_rng(8)
    t = np.arange(2000) * TWO_MIN  # 2.8 days, window 6 days
    trend = 1.0 + 0.002 * (t - 1.4) + 0.001 * (t - 1.4) ** 2
    f = trend * _trapezoid(t, t0=1.2, duration=0.3, depth=0.003, ingress=0.02)
    f = f + rng.normal(0.0, 5e-4, t.size)
    d = detrend(t, f, None)
    assert d.method == "global_polynomial"
    out = ~d.dip_mask
    # the trend is removed: out-of-dip residual scatter is the white noise (MAD bound)
    assert mad_std(d.flux[out] - 1.0) == pytest.approx(5e-4, rel=0.1)
    core = np.abs(t - 1.2) < 0.12
    assert 1.0 - d.flux[core].mean() == pytest.approx(0.003, rel=0.1)


def test_detrend_outputs_are_consistent():
    rng = np.random.default_rng(9)
    t = np.arange(0.0, 10.0, THIRTY_MIN)
    f = 1.0 + rng.normal(0.0, 1e-3, t.size)
    f[5] = np.nan
    d = detrend(t, f, None, max_dip_days=0.5)
    assert np.isnan(d.flux[5]) and np.all(np.isfinite(d.baseline))
    np.testing.assert_allclose(d.flux * d.baseline, f, rtol=1e-12)
    assert d.sigma_white == pytest.approx(1e-3, rel=0.15)
    assert d.beta_red >= 1.0
    assert d.dip_mask.dtype == bool and not d.flux.flags.writeable


# --------------------------------------------------------------------------------------------
# red_noise_beta
# --------------------------------------------------------------------------------------------


def test_beta_is_one_for_white_noise():
    rng = np.random.default_rng(12)
    t = np.arange(5000) * TWO_MIN
    betas = np.array([red_noise_beta(t, rng.normal(0.0, 1e-3, t.size)) for _ in range(60)])
    # Pont et al. (2006) / Winn et al. (2008): white noise gives beta = 1 (floored at 1)
    assert np.all(betas >= 1.0)
    assert abs(np.mean(betas) - 1.0) < 0.15
    assert np.quantile(betas, 0.9) < 1.15


def _ar1(rng, n, phi):
    e = rng.normal(0.0, 1.0, n) * np.sqrt(1.0 - phi * phi)
    x = np.empty(n)
    x[0] = rng.normal()
    for i in range(1, n):
        x[i] = phi * x[i - 1] + e[i]
    return x


def _ar1_beta(n_points, phi):
    """sqrt(Var(mean of N AR(1) samples) / (sigma^2 / N)) = sqrt(1 + 2 sum (1 - k/N) phi^k)."""
    k = np.arange(1, n_points)
    return np.sqrt(1.0 + 2.0 * np.sum((1.0 - k / n_points) * phi**k))


def test_beta_matches_the_ar1_variance_of_the_mean():
    rng = np.random.default_rng(13)
    phi, cadence = 0.9, TWO_MIN
    n_bins = np.array([10, 20, 40, 80])
    sizes = n_bins * cadence
    t = np.arange(20_000) * cadence
    measured = np.median([red_noise_beta(t, 1e-3 * _ar1(rng, t.size, phi),
                                         bin_sizes_days=sizes) for _ in range(4)])
    # reference: variance of the mean of N AR(1) samples (textbook, e.g. Priestley 1981)
    analytic = np.median([_ar1_beta(int(n), phi) for n in n_bins])
    assert measured > 1.5
    assert measured == pytest.approx(analytic, rel=0.15)


def test_beta_is_nan_when_too_few_bins():
    t = np.arange(30) * TWO_MIN  # an hour: no bin size gives 10 bins of >= 2 points
    assert np.isnan(red_noise_beta(t, np.random.default_rng(1).normal(size=30),
                                   bin_sizes_days=[0.05]))


# --------------------------------------------------------------------------------------------
# bad input tables
# --------------------------------------------------------------------------------------------

_T = np.arange(100) * THIRTY_MIN
_F = np.ones(100) + 1e-3 * np.sin(np.arange(100))
_E = np.full(100, 1e-3)


@pytest.mark.parametrize(
    ("kwargs", "error", "code"),
    [
        ({"max_dip_days": 0.0}, ParameterError, "non_positive_parameter"),
        ({"max_dip_days": -1.0}, ParameterError, "non_positive_parameter"),
        ({"max_dip_days": float("nan")}, ParameterError, "non_finite_parameter"),
        ({"window_factor": 2.0}, ParameterError, "window_too_short"),
        ({"n_iter": 0}, ParameterError, "invalid_parameter"),
        ({"n_iter": 2.5}, ParameterError, "invalid_parameter"),
        ({"clip_sigma": 0.0}, ParameterError, "non_positive_parameter"),
        ({"time_days": _T[::-1].copy()}, SegmentError, "unsorted_time"),
        ({"time_days": np.r_[_T[:50], _T[49:99]]}, SegmentError, "duplicate_times"),
        ({"time_days": np.r_[_T[:99], np.nan]}, SegmentError, "non_finite_time"),
        ({"time_days": _T[:10], "flux": _F[:10], "flux_err": _E[:10]}, SegmentError,
         "too_few_points"),
        ({"flux": _F[:99]}, SegmentError, "length_mismatch"),
        ({"flux_err": _E[:99]}, SegmentError, "length_mismatch"),
        ({"flux_err": np.r_[_E[:99], 0.0]}, SegmentError, "non_positive_flux_err"),
        ({"flux_err": np.r_[_E[:99], np.inf]}, SegmentError, "non_finite_flux_err"),
        ({"flux": np.ones((10, 10))}, SegmentError, "invalid_shape"),
        ({"flux": np.ones(100), "flux_err": None}, SegmentError, "constant_flux"),
    ],
)
def test_detrend_rejects_bad_input(kwargs, error, code):
    args = {"time_days": _T, "flux": _F, "flux_err": _E}
    params = {k: kwargs.pop(k) for k in list(kwargs) if k in args}
    args.update(params)
    with pytest.raises(error, match=code) as info:
        detrend(args["time_days"], args["flux"], args["flux_err"], **kwargs)
    assert info.value.code == code


@pytest.mark.parametrize(
    ("kwargs", "error", "code"),
    [
        ({"window_days": 0.0}, ParameterError, "non_positive_parameter"),
        ({"window_days": float("inf")}, ParameterError, "non_finite_parameter"),
        ({"window_days": 1.0, "degree": 4}, ParameterError, "invalid_parameter"),
        ({"window_days": 1.0, "mask": np.zeros(99, bool)}, SegmentError, "length_mismatch"),
        ({"window_days": 1.0, "mask": np.zeros(100)}, SegmentError, "invalid_type"),
    ],
)
def test_robust_baseline_rejects_bad_input(kwargs, error, code):
    with pytest.raises(error, match=code):
        robust_baseline(_T, _F, **kwargs)


def test_robust_baseline_needs_unmasked_data():
    with pytest.raises(SegmentError, match="too_few_points"):
        robust_baseline(_T, _F, window_days=1.0, mask=np.ones(100, bool))


@pytest.mark.parametrize(
    ("args", "kwargs", "code"),
    [
        ((_T, _F[:99]), {}, "length_mismatch"),
        ((_T, _F), {"bin_sizes_days": [0.1, -0.1]}, "non_positive_parameter"),
        ((_T, _F), {"bin_sizes_days": [float("nan")]}, "non_finite_parameter"),
    ],
)
def test_red_noise_beta_rejects_bad_input(args, kwargs, code):
    with pytest.raises((SegmentError, ParameterError), match=code):
        red_noise_beta(*args, **kwargs)
