"""Model-free profile measurements: skewness, widths, symmetry.

References: scipy.stats.skew (sample skewness g1), batman-package (Kreidberg 2015) for transit
profiles, and the closed-form exponential-tail profile of a thin comet tail crossing a uniform disk
(the one-sided exponential extinction of Lecavelier des Etangs et al. 1999 integrated along the
chord) written out below.
"""

from __future__ import annotations

import batman
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from features.profile import (
    deficit_skewness,
    smooth_profile,
    symmetry_residual,
    weighted_skewness,
    widths_at_levels,
)


def _batman_transit(t, *, rp=0.1, a=10.0, inc=90.0, per=3.0, u=(0.4, 0.26)):
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc, p.ecc, p.w = 0.0, per, rp, a, inc, 0.0, 90.0
    p.limb_dark, p.u = "quadratic", list(u)
    return batman.TransitModel(p, t).light_curve(p)


def _comet_uniform(t, *, c=1e-3, crossing=0.3, tail_e_fold=0.3):
    """Closed form: loss = c (tau/T)(1 - exp(-(t + T/2)/tau)) while the head is on the chord,
    c (tau/T)(exp(-(t - T/2)/tau) - exp(-(t + T/2)/tau)) after it left (head mid-chord at t=0)."""
    T, tau = crossing, tail_e_fold
    loss = np.zeros_like(t)
    on = (t >= -T / 2) & (t <= T / 2)
    after = t > T / 2
    loss[on] = c * tau / T * (1 - np.exp(-(t[on] + T / 2) / tau))
    ta = t[after]
    loss[after] = c * tau / T * (np.exp(-(ta - T / 2) / tau) - np.exp(-(ta + T / 2) / tau))
    return 1.0 - loss


@given(st.lists(st.floats(-1e3, 1e3), min_size=3, max_size=50))
@settings(max_examples=60, deadline=None)
def test_equal_weights_reduce_to_scipy_skew(values):
    x = np.array(values)
    if np.ptp(x) < 1e-3 * max(1.0, np.abs(x).max()):
        return  # nearly constant samples: the moment is numerically meaningless
    expected = stats.skew(x)  # scipy.stats.skew, biased g1
    got = weighted_skewness(x, np.ones_like(x))
    assert got == pytest.approx(expected, rel=1e-6, abs=1e-9)


def test_integer_weights_equal_repeated_samples():
    rng = np.random.default_rng(0)
    x = rng.normal(size=30)
    w = rng.integers(0, 5, 30)
    # a weight is a repetition count: compare with scipy.stats.skew of the repeated sample
    assert weighted_skewness(x, w.astype(float)) == pytest.approx(stats.skew(np.repeat(x, w)))


def test_skewness_of_a_noiseless_transit_is_about_zero():
    t = np.linspace(-0.2, 0.2, 2001)
    f = _batman_transit(t)
    assert abs(deficit_skewness(t, f)) < 0.1


def test_skewness_of_a_comet_with_a_one_radius_tail_is_large_and_positive():
    # tail of one stellar radius on a central chord (length 2 R*): e-folding time T/2
    t = np.linspace(-0.4, 2.0, 2401)
    f = _comet_uniform(t, crossing=0.3, tail_e_fold=0.15)
    assert deficit_skewness(t, f) > 0.5


def test_skewness_undefined_without_a_deficit():
    t = np.linspace(0, 1, 50)
    assert np.isnan(deficit_skewness(t, np.ones_like(t) + 1e-3))


def test_widths_of_a_trapezoid_are_linear_in_level():
    # a trapezoid of total width T14 and flat width T23: width at fraction l of the depth is
    # T14 - l (T14 - T23) (geometry of the trapezoid; common practice)
    t14, t23, depth = 0.2, 0.12, 0.01
    t = np.linspace(-0.3, 0.3, 6001)
    slope = (t14 - t23) / 2
    f = 1 - depth * np.clip((t14 / 2 - np.abs(t)) / slope, 0, 1)
    d, _, widths = widths_at_levels(t, f, levels=(0.1, 0.5, 0.9))
    assert d == pytest.approx(depth)
    np.testing.assert_allclose(widths, [t14 - lev * (t14 - t23) for lev in (0.1, 0.5, 0.9)],
                               atol=2e-4)


def test_widths_nan_when_the_window_cuts_the_dip():
    t = np.linspace(0, 1, 200)
    f = 1 - 0.01 * np.clip(1 - t, 0, 1)  # deepest at the window's first point
    _, _, widths = widths_at_levels(t, f)
    assert np.all(np.isnan(widths))


def test_smooth_profile_is_a_running_mean():
    x = np.arange(10.0)
    np.testing.assert_allclose(smooth_profile(x, 3)[1:-1], x[1:-1])
    assert smooth_profile(x, 1) is not x


def test_symmetry_residual_separates_transits_from_comets():
    rng = np.random.default_rng(3)
    t = np.linspace(-0.6, 0.6, 1201)
    sigma = 1e-4
    transit = _batman_transit(t) + rng.normal(0, sigma, t.size)
    centres = np.linspace(-0.05, 0.05, 21)
    r_transit, c_transit = symmetry_residual(t, transit, sigma=sigma, depth=0.012,
                                             centres_days=centres)
    assert r_transit < 0.02
    assert abs(c_transit) <= 0.01
    tc = np.linspace(-0.5, 1.5, 1201)
    comet = _comet_uniform(tc, c=4e-3, crossing=0.3, tail_e_fold=0.3) + rng.normal(0, sigma,
                                                                                   tc.size)
    r_comet, _ = symmetry_residual(tc, comet, sigma=sigma, depth=1.2e-3,
                                   centres_days=np.linspace(0, 0.5, 26))
    assert r_comet > 0.1


def test_symmetry_residual_undefined_cases():
    t = np.linspace(0, 1, 4)
    assert np.isnan(symmetry_residual(t, np.ones(4), sigma=1e-3, depth=1e-3,
                                      centres_days=np.array([0.5]))[0])
    t = np.linspace(0, 1, 50)
    assert np.isnan(symmetry_residual(t, np.ones(50), sigma=1e-3, depth=0.0,
                                      centres_days=np.array([0.5]))[0])
