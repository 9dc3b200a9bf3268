"""The feature vector end to end: injection-recovery against reference libraries and formulas.

References named beside each check: batman-package (Kreidberg 2015) for transits; Winn (2010,
"Transits and Occultations", eq. 14) for T14; astropy.timeseries.BoxLeastSquares for periods;
the closed-form thin-tail comet profile (Lecavelier des Etangs et al. 1999 picture) through
``features.shapes.comet_flux``, itself checked against it in test_shapes.
"""

from __future__ import annotations

import batman
import numpy as np
import pytest
from astropy.timeseries import BoxLeastSquares

from features import shapes
from features.catalog import FEATURE_NAMES, FEATURE_VERSION
from features.errors import DipshapeError
from features.events import Ephemeris
from features.pipeline import FLAGS, extract
from features.segment import make_segment


def _planet(t, *, t0=1.5, per=5.0, rp=0.1, a=12.0, inc=89.0, u=(0.4, 0.26)):
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc, p.ecc, p.w = t0, per, rp, a, inc, 0.0, 90.0
    p.limb_dark, p.u = "quadratic", list(u)
    return batman.TransitModel(p, t).light_curve(p)


def _winn_t14(per, rp, a, inc):
    b = a * np.cos(np.radians(inc))  # Winn (2010) eq. 14, circular
    return per / np.pi * np.arcsin(np.sqrt((1 + rp) ** 2 - b**2) / (a * np.sin(np.radians(inc))))


def _sigma_for(clean, snr):
    # SNR = depth sqrt(n_in) / sigma (white-noise limit of Pont et al. 2006)
    depth = 1 - clean.min()
    n_in = np.count_nonzero(clean < 1 - 0.5 * depth)
    return depth * np.sqrt(n_in) / snr


def _segment(t, flux, sigma, rng, id="LS-test"):
    return make_segment(t, flux + rng.normal(0, sigma, t.size), np.full(t.size, sigma), id=id)


def test_vector_is_complete_versioned_and_finite_or_nan():
    rng = np.random.default_rng(0)
    t = np.arange(0, 3, 2 / 1440)
    feats = extract(_segment(t, _planet(t), 1e-3, rng))
    assert feats.values.shape == (len(FEATURE_NAMES),)
    assert feats.feature_version == FEATURE_VERSION
    assert not np.isinf(feats.values).any()
    assert set(feats.flags) <= set(FLAGS)
    assert feats["n_events"] == 1
    assert not feats.values.flags.writeable


def test_planet_depth_t14_and_symmetry_at_snr_50():
    t = np.arange(0, 3, 2 / 1440)
    clean = _planet(t)
    sigma = _sigma_for(clean, 50)
    t14 = _winn_t14(5.0, 0.1, 12.0, 89.0)
    depth = 1 - clean.min()
    rng = np.random.default_rng(1)
    ratios, d_err, t_err = [], [], []
    for _ in range(20):
        feats = extract(_segment(t, clean, sigma, rng))
        fit = feats.fits.families["transit"].params
        d_err.append(abs(fit["depth"] / depth - 1))
        t_err.append(abs(feats["transit_t14_days"] / t14 - 1))
        ratios.append(feats["ingress_egress_ratio"])
        # noise at SNR 50 spreads the weighted skewness by ~0.1 (measured 5-95 %: -0.15..0.07)
        assert abs(feats["skewness"]) < 0.25
    # depth and T14 within 5 % (most realisations; see test_fits for the b-T14 degeneracy)
    assert np.median(d_err) < 0.05 and np.median(t_err) < 0.05
    # ingress/egress ratio within 10 % of 1 for planets at SNR 50 (median of 20 realisations;
    # a single one scatters by 25-40 % at this SNR: measured 16-84 % ranges 0.6-1.5)
    ratios = np.array(ratios)
    assert abs(np.median(ratios) - 1) < 0.1
    assert 0.5 < np.percentile(ratios, 16) and np.percentile(ratios, 84) < 2.0


def test_skewness_of_a_noiseless_transit_through_the_pipeline():
    t = np.arange(0, 3, 2 / 1440)
    f = _planet(t) + 1e-9 * np.sin(t)  # noiseless (a negligible ripple keeps the flux varying)
    feats = extract(make_segment(t, f, np.full(t.size, 1e-5)))
    assert abs(feats["skewness"]) < 0.1


@pytest.mark.parametrize(("tail_rstar", "b"), [(1.0, 0.8), (2.0, 0.0), (3.0, 0.3)])
def test_comets_are_skewed_with_short_ingress(tail_rstar, b):
    t = np.arange(0, 4, 2 / 1440)
    clean = shapes.comet_flux(t, t0=1.5, crossing_time_days=0.3, b=b,
                              tail_length_rstar=tail_rstar, peak_optical_depth=0.02,
                              height_rstar=0.2, u1=0.4, u2=0.25)
    rng = np.random.default_rng(2)
    sigma = _sigma_for(clean, 50)
    runs = [extract(_segment(t, clean, sigma, rng)) for _ in range(5)]
    assert np.median([f["skewness"] for f in runs]) > 0.5
    assert np.median([f["ingress_egress_ratio"] for f in runs]) < 0.5
    assert sum(f.fits.best_family == "comet" for f in runs) >= 4


def test_a_one_radius_tail_on_a_central_chord_is_only_mildly_asymmetric():
    # measured, not a target: a tail of one stellar radius on a central chord (2 R* long) has an
    # e-folding time of half the crossing time; the trapezoid ratio is then ~0.6, not < 0.5
    t = np.arange(0, 4, 2 / 1440)
    clean = shapes.comet_flux(t, t0=1.5, crossing_time_days=0.3, b=0.0, tail_length_rstar=1.0,
                              peak_optical_depth=0.02, height_rstar=0.2, u1=0.4, u2=0.25)
    rng = np.random.default_rng(12)
    sigma = _sigma_for(clean, 50)
    ratios = [extract(_segment(t, clean, sigma, rng))["ingress_egress_ratio"] for _ in range(5)]
    assert 0.45 < np.median(ratios) < 0.8


def test_period_matches_astropy_bls_run_directly():
    t = np.arange(0, 27, 10 / 1440)
    t = t[np.abs(t - 13.5) > 0.5]
    clean = _planet(t, t0=1.2, per=3.3, rp=0.08, a=10.0)
    rng = np.random.default_rng(3)
    seg = _segment(t, clean, 1e-3, rng)
    feats = extract(seg)
    # astropy BoxLeastSquares on the same data, fine grid around the range
    bls = BoxLeastSquares(seg.time, seg.flux, seg.flux_err)
    periods = np.linspace(1.0, 8.0, 20000)
    res = bls.power(periods, 0.1)
    p_ref = periods[np.argmax(res.power)]
    assert feats["periodic"] == 1
    assert feats["period_days"] == pytest.approx(p_ref, rel=1e-3)


def test_odd_even_calibrated_over_200_planets():
    t = np.arange(0, 12, 30 / 1440)
    clean = _planet(t, t0=0.7, per=1.9, rp=0.1, a=7.0)
    sigma = _sigma_for(clean, 40)
    eph = Ephemeris(period_days=1.9, epoch=0.7, duration_days=0.12)
    rng = np.random.default_rng(4)
    stats = [extract(_segment(t, clean, sigma, rng), eph)["odd_even_sigma"] for _ in range(200)]
    stats = np.array(stats)
    assert np.isfinite(stats).all()
    assert abs(stats.mean()) < 0.2
    assert 0.8 < stats.std() < 1.25


def test_odd_even_flags_a_binary_with_alternating_depths_at_snr_30():
    t = np.arange(0, 12, 30 / 1440)
    clean = _planet(t, t0=0.7, per=1.9, rp=0.1, a=7.0)
    n = np.round((t - 0.7) / 1.9).astype(int)
    clean = 1 - (1 - clean) * np.where(n % 2 == 1, 0.8, 1.0)  # alternate eclipses 20 % apart
    rng = np.random.default_rng(5)
    # SNR 30 per eclipse
    depth = 1 - clean.min()
    n_one = np.count_nonzero(np.abs(t - 0.7) < 0.05)
    sigma = depth * np.sqrt(n_one) / 30
    # expected ~7 for a perfectly matched filter (0.2 x 30 / sqrt(2/3)); measured median ~6
    stats = [abs(extract(_segment(t, clean, sigma, rng))["odd_even_sigma"]) for _ in range(10)]
    assert np.median(stats) > 5


def test_secondary_eclipse_found_for_a_binary_absent_for_a_planet():
    t = np.arange(0, 27, 10 / 1440)
    t = t[np.abs(t - 13.5) > 0.5]
    rng = np.random.default_rng(6)
    # a binary whose secondary eclipse removes 1 % of the light (companion light fraction 1 %
    # when totally eclipsed), primary diluted to a few per cent
    eb = shapes.eclipsing_binary_flux(
        t, t0=1.1, period_days=2.7, radius_ratio=0.35, a_over_r1=7.0, b=0.2,
        surface_brightness_ratio=0.09, u1_primary=0.4, u2_primary=0.25, u1_secondary=0.4,
        u2_secondary=0.25)
    sec = 1 - eb[np.abs(((t - 1.1) / 2.7 % 1) - 0.5) < 0.002].min()
    assert 0.005 < sec < 0.02
    feats = extract(_segment(t, eb, 1e-3, rng))
    assert feats["secondary_snr"] > 7
    planet = _planet(t, t0=1.1, per=2.7, rp=0.1, a=7.0)
    feats_p = extract(_segment(t, planet, 1e-3, rng))
    assert feats_p["secondary_snr"] < 3


def test_no_dip_gives_nan_shapes_and_a_flag():
    rng = np.random.default_rng(7)
    t = np.arange(0, 3, 10 / 1440)
    feats = extract(_segment(t, np.ones_like(t), 1e-3, rng))
    assert "no_significant_dip" in feats.flags
    assert np.isnan(feats["skewness"]) and np.isnan(feats["delta_bic_transit"])
    assert np.isfinite(feats["sigma_white_ppm"])


def test_bad_arguments():
    t = np.arange(0, 3, 10 / 1440)
    seg = _segment(t, _planet(t), 1e-3, np.random.default_rng(8))
    with pytest.raises(DipshapeError, match="max_dip_days"):
        extract(seg, max_dip_days=0)
    with pytest.raises(DipshapeError, match="snr_threshold"):
        extract(seg, snr_threshold=-1)
    with pytest.raises(DipshapeError, match="method"):
        extract(seg, method="newton")
