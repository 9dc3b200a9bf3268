"""Cross-event measurements: epoch depths, odd/even, secondary eclipse, depth consistency.

References: batman-package (Kreidberg 2015) for injected transits and eclipses (a secondary
eclipse is a uniform-disk occultation: batman's ``fp``/``t_secondary`` secondary model);
the odd/even statistic is a difference of two Gaussian means over its standard error, so for a
planet it must be standard normal (common practice; its calibration is checked here).
"""

from __future__ import annotations

import batman
import numpy as np
import pytest

from features.measures import (
    depth_consistency,
    epoch_depths,
    odd_even_sigma,
    secondary_at_phase,
    secondary_search,
)

PERIOD, EPOCH = 2.5, 1.0


def _planet(t, rp=0.1):
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc, p.ecc, p.w = EPOCH, PERIOD, rp, 8.0, 89.0, 0.0, 90.0
    p.limb_dark, p.u = "quadratic", [0.4, 0.26]
    return batman.TransitModel(p, t).light_curve(p)


def _secondary(t, fp=0.01, rp=0.3):
    # batman secondary eclipse: the companion's flux fp disappears behind the star
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc, p.ecc, p.w = EPOCH, PERIOD, rp, 8.0, 89.0, 0.0, 90.0
    p.limb_dark, p.u = "uniform", []
    p.fp, p.t_secondary = fp, EPOCH + PERIOD / 2
    m = batman.TransitModel(p, t, transittype="secondary")
    return m.light_curve(p) / (1 + fp)


def _box_profile(half):
    return lambda dt: (np.abs(dt) <= half).astype(float)


def _sector():
    t = np.arange(0, 27, 10 / 1440)
    return t[np.abs(t - 13.5) > 0.5]


def test_epoch_depths_recover_the_injected_depth():
    t = _sector()
    sigma = 1e-3
    rng = np.random.default_rng(0)
    clean = _planet(t)
    f = clean + rng.normal(0, sigma, t.size)
    epochs, depths, errors = epoch_depths(t, f, sigma, period_days=PERIOD, epoch=EPOCH,
                                          half_window_days=0.05, profile=_box_profile(0.05))
    assert 9 <= epochs.size <= 11
    # reference: the mean deficit of the noiseless batman model inside the same boxes
    phase = (t - EPOCH + PERIOD / 2) % PERIOD - PERIOD / 2
    expected = np.mean(1 - clean[np.abs(phase) <= 0.05])
    combined = 1 / np.sqrt(np.sum(1 / errors**2))
    assert abs(np.average(depths, weights=1 / errors**2) - expected) < 4 * combined
    assert np.all(errors > 0)


def test_odd_even_is_calibrated_for_planets():
    # 200 noisy planet realisations: the statistic must be ~N(0, 1)
    t = _sector()
    sigma = 2e-3
    clean = _planet(t)
    rng = np.random.default_rng(1)
    stats = []
    for _ in range(200):
        f = clean + rng.normal(0, sigma, t.size)
        e, d, s = epoch_depths(t, f, sigma, period_days=PERIOD, epoch=EPOCH,
                               half_window_days=0.05, profile=_box_profile(0.05))
        stats.append(odd_even_sigma(e, d, s))
    stats = np.array(stats)
    assert abs(stats.mean()) < 0.2
    assert 0.8 < stats.std() < 1.25


def test_odd_even_flags_alternating_eclipses():
    # an eclipsing binary folded at half its period: alternate eclipses differ by 20 %
    t = _sector()
    f = _planet(t)
    n = np.round((t - EPOCH) / PERIOD).astype(int)
    f = 1 - (1 - f) * np.where(n % 2 == 1, 0.8, 1.0)
    depth = 0.0115
    # SNR 30 per event: sigma = depth sqrt(n_in) / 30
    n_in = np.count_nonzero(np.abs(t - EPOCH) <= 0.05)
    sigma = depth * np.sqrt(max(n_in, 1)) / 30
    f = f + np.random.default_rng(2).normal(0, sigma, t.size)
    e, d, s = epoch_depths(t, f, sigma, period_days=PERIOD, epoch=EPOCH, half_window_days=0.05,
                           profile=_box_profile(0.05))
    assert abs(odd_even_sigma(e, d, s)) > 5


def test_odd_even_needs_both_parities():
    assert np.isnan(odd_even_sigma(np.array([0, 2]), np.array([1.0, 1.0]), np.array([0.1, 0.1])))


def test_secondary_eclipse_found_and_absent_for_a_planet():
    t = _sector()
    sigma = 1e-3
    rng = np.random.default_rng(3)
    eb = _planet(t, rp=0.3) * _secondary(t, fp=0.01, rp=0.3) + rng.normal(0, sigma, t.size)
    # T14 and T23 of the occultation from Winn (2010) eq. 14-15 (b = a cos i, k = 0.3)
    a, k, b = 8.0, 0.3, 8.0 * np.cos(np.radians(89.0))
    t14 = PERIOD / np.pi * np.arcsin(np.sqrt((1 + k) ** 2 - b**2) / (a * np.sin(np.radians(89))))
    t23 = PERIOD / np.pi * np.arcsin(np.sqrt((1 - k) ** 2 - b**2) / (a * np.sin(np.radians(89))))
    dur = t14
    depth, snr = secondary_at_phase(t, eb, sigma, period_days=PERIOD, epoch=EPOCH,
                                    duration_days=dur)
    assert snr > 7
    # a box of width T14 over a trapezoid of depth fp/(1+fp) averages (T14 + T23) / (2 T14) of it
    assert depth == pytest.approx(0.01 / 1.01 * (t14 + t23) / (2 * t14), rel=0.2)
    snr_s, phase = secondary_search(t, eb, sigma, period_days=PERIOD, epoch=EPOCH,
                                    duration_days=dur)
    assert snr_s > 7 and abs(phase - 0.5) < 0.02
    planet = _planet(t) + rng.normal(0, sigma, t.size)
    _, snr_p = secondary_at_phase(t, planet, sigma, period_days=PERIOD, epoch=EPOCH,
                                  duration_days=0.12)
    assert abs(snr_p) < 3


def test_depth_consistency_of_constant_and_varying_depths():
    rng = np.random.default_rng(4)
    err = np.full(8, 1e-4)
    constant = 1e-3 + rng.normal(0, 1e-4, 8)
    scatter, chi2 = depth_consistency(constant, err)
    assert chi2 < 3 and scatter < 0.3
    varying = np.array([1e-3, 2e-3, 5e-4])
    scatter_v, chi2_v = depth_consistency(varying, np.full(3, 1e-4))
    assert chi2_v > 50 and scatter_v > 0.5
    assert np.isnan(depth_consistency(np.array([1e-3]), np.array([1e-4]))[0])
