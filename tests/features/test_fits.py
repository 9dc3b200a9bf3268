"""Shape fits: recovery against batman, BIC model selection, fast vs reference solver.

References: batman-package (Kreidberg 2015) for transits; Winn (2010, "Transits and
Occultations", eq. 14) for T14; the BIC of Schwarz (1978); scipy.optimize.least_squares as the
reference solver of the fast refinement kernel.
"""

from __future__ import annotations

import batman
import numpy as np
import pytest

from features import shapes
from features.errors import ParameterError
from features.fits import FAMILIES, TEMPLATES, fit_event, make_window

CAD = 2.0 / 1440.0


def _batman(t, *, t0=1.5, per=5.0, rp=0.1, a=12.0, inc=89.0, u=(0.4, 0.26)):
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc, p.ecc, p.w = t0, per, rp, a, inc, 0.0, 90.0
    p.limb_dark, p.u = "quadratic", list(u)
    return batman.TransitModel(p, t).light_curve(p)


def _winn_t14(per, rp, a, inc):
    # Winn (2010) eq. 14, circular orbit
    b = a * np.cos(np.radians(inc))
    return per / np.pi * np.arcsin(np.sqrt((1 + rp) ** 2 - b**2) / (a * np.sin(np.radians(inc))))


def _noisy(t, clean, snr, rng, depth=None, duration=None):
    depth = depth if depth is not None else 1 - clean.min()
    n_in = np.count_nonzero(clean < 1 - 0.5 * depth) if duration is None else duration / CAD
    sigma = depth * np.sqrt(n_in) / snr  # SNR = depth sqrt(n_in) / sigma (Pont et al. 2006)
    return clean + rng.normal(0, sigma, t.size), sigma


def _fit(t, f, sigma, t_mid, dur, depth, method="fast"):
    win = make_window(t, f, np.full(t.size, sigma), t_mid=t_mid, duration_days=dur, depth=depth,
                      cadence_days=CAD)
    return fit_event(win, method=method)


def test_transit_depth_and_t14_recovered_at_snr_50():
    t = np.arange(0, 3, CAD)
    clean = _batman(t)
    t14 = _winn_t14(5.0, 0.1, 12.0, 89.0)
    depth_true = 1 - clean.min()
    rng = np.random.default_rng(0)
    depth_err, t14_err = [], []
    for _ in range(20):
        f, sigma = _noisy(t, clean, 50, rng)
        fits, _ = _fit(t, f, sigma, 1.5, 0.8 * t14, 0.9 * depth_true)
        fam = fits.families["transit"]
        depth_err.append(abs(fam.params["depth"] / depth_true - 1))
        t14_err.append(abs(fam.params["t14_days"] / t14 - 1))
    depth_err, t14_err = np.array(depth_err), np.array(t14_err)
    # measured: ~90 % of realisations within 5 % for both; the misses come from the physical
    # b-T14 degeneracy of a single transit at this SNR (a grazing-ish solution with a larger b
    # fits the noise as well), never beyond ~12 %
    assert np.median(depth_err) < 0.03 and np.median(t14_err) < 0.03
    assert np.mean(depth_err < 0.05) >= 0.8 and np.mean(t14_err < 0.05) >= 0.8
    assert depth_err.max() < 0.12 and t14_err.max() < 0.15


def test_fast_refinement_agrees_with_scipy_least_squares():
    t = np.arange(0, 4, CAD)
    rng = np.random.default_rng(1)
    cases = [
        (_batman(t, t0=2.0), 2.0, 0.14, 0.012),
        (shapes.comet_flux(t, t0=1.5, crossing_time_days=0.3, b=0.3, tail_length_rstar=2.0,
                           peak_optical_depth=0.02, height_rstar=0.2, u1=0.4, u2=0.25),
         1.7, 0.6, 0.002),
    ]
    for (clean, t_mid, dur, depth), names in zip(
            cases, [("transit", "eclipse", "comet", "artefact"), ("transit", "comet")],
            strict=True):
        # (the eclipse family on a comet has several equally poor local minima: not compared)
        f, sigma = _noisy(t, clean, 40, rng)
        fast, asym_fast = _fit(t, f, sigma, t_mid, dur, depth, "fast")
        ref, asym_ref = _fit(t, f, sigma, t_mid, dur, depth, "scipy")
        for name in names:
            # same minimum within 1 % of chi2 (+1 for flat directions)
            assert fast.families[name].chi2 <= ref.families[name].chi2 * 1.01 + 1.0, name
        assert asym_fast["chi2"] <= asym_ref["chi2"] * 1.01 + 1.0


def test_bic_picks_the_physical_family():
    rng = np.random.default_rng(2)
    t = np.arange(0, 4, CAD)
    picks = {}
    # planet
    f, s = _noisy(t, _batman(t, t0=2.0), 60, rng)
    picks["planet"] = _fit(t, f, s, 2.0, 0.14, 0.012)[0].best_family
    # comet with a 3 R* tail
    clean = shapes.comet_flux(t, t0=1.5, crossing_time_days=0.25, b=0.2, tail_length_rstar=3.0,
                              peak_optical_depth=0.02, height_rstar=0.2, u1=0.4, u2=0.25)
    f, s = _noisy(t, clean, 60, rng)
    picks["comet"] = _fit(t, f, s, 1.8, 0.7, 1 - clean.min())[0].best_family
    # box-like pointing artefact
    clean = shapes.box_dip(t, t_start=1.9, duration_days=0.2, depth=0.003)
    f, s = _noisy(t, clean, 60, rng)
    picks["box"] = _fit(t, f, s, 2.0, 0.2, 0.003)[0].best_family
    # a slow sinusoid (spot-like) seen as a dip
    clean = 1 + 0.004 * np.sin(2 * np.pi * t / 2.0)
    f, s = _noisy(t, clean, 60, rng, depth=0.004, duration=0.8)
    picks["spot"] = _fit(t, f, s, 1.5, 0.8, 0.004)[0].best_family
    # deep V-shaped grazing binary (radius ratio 0.8, grazing)
    clean = shapes.eclipsing_binary_flux(
        t, t0=2.0, period_days=3.0, radius_ratio=0.8, a_over_r1=6.0, b=1.3,
        surface_brightness_ratio=0.5, u1_primary=0.4, u2_primary=0.25, u1_secondary=0.4,
        u2_secondary=0.25)
    f, s = _noisy(t, clean, 80, rng)
    picks["grazing_eb"] = _fit(t, f, s, 2.0, 0.15, 1 - clean.min())[0].best_family
    assert picks == {"planet": "transit", "comet": "comet", "box": "artefact",
                     "spot": "variability", "grazing_eb": "eclipse"}


def test_comet_fits_better_the_right_way_round():
    t = np.arange(0, 4, CAD)
    rng = np.random.default_rng(3)
    clean = shapes.comet_flux(t, t0=1.5, crossing_time_days=0.3, b=0.3, tail_length_rstar=2.0,
                              peak_optical_depth=0.02, height_rstar=0.2, u1=0.4, u2=0.25)
    f, s = _noisy(t, clean, 40, rng)
    fits, asym = _fit(t, f, s, 1.7, 0.6, 1 - clean.min())
    assert fits.templates["comet"].chi2 < fits.templates["comet_mirrored"].chi2
    assert asym["ingress_days"] < 0.5 * asym["egress_days"]
    # the same dip reversed in time (tail before the head): the mirrored template wins
    reversed_clean = shapes.comet_flux(4.0 - t, t0=1.5, crossing_time_days=0.3, b=0.3,
                                       tail_length_rstar=2.0, peak_optical_depth=0.02,
                                       height_rstar=0.2, u1=0.4, u2=0.25)
    mirrored = reversed_clean + rng.normal(0, s, t.size)
    fits_m, asym_m = _fit(t, mirrored, s, 2.3, 0.6, 1 - clean.min())
    assert fits_m.templates["comet_mirrored"].chi2 < fits_m.templates["comet"].chi2
    assert asym_m["ingress_days"] > asym_m["egress_days"]


def test_results_are_complete_and_consistent():
    t = np.arange(0, 3, CAD)
    f, s = _noisy(t, _batman(t), 30, np.random.default_rng(4))
    fits, _ = _fit(t, f, s, 1.5, 0.14, 0.012)
    assert set(fits.families) == set(FAMILIES) and set(fits.templates) == set(TEMPLATES)
    assert min(fits.delta_bic(n) for n in FAMILIES) == 0.0
    fracs = [fits.template_fraction(n) for n in TEMPLATES]
    assert max(fracs) == pytest.approx(1.0) and min(fracs) >= 0
    for fam in fits.families.values():
        # BIC = chi2 + k ln n (Schwarz 1978)
        assert fam.bic == pytest.approx(fam.chi2 + fam.n_params * np.log(fits.n_bins))


def test_periodic_window_adds_the_secondary_for_the_eclipse_family():
    t = np.arange(0, 27, 10 / 1440)
    period = 2.0
    clean = shapes.eclipsing_binary_flux(
        t, t0=1.0, period_days=period, radius_ratio=0.6, a_over_r1=5.0, b=0.3,
        surface_brightness_ratio=0.4, u1_primary=0.4, u2_primary=0.25, u1_secondary=0.4,
        u2_secondary=0.25, third_light=0.9)
    rng = np.random.default_rng(5)
    sigma = 5e-4
    f = clean + rng.normal(0, sigma, t.size)
    win = make_window(t, f, np.full(t.size, sigma), t_mid=1.0, duration_days=0.2,
                      depth=1 - clean.min(), cadence_days=10 / 1440, period_days=period)
    assert win.sec_t.size > 0
    fits, _ = fit_event(win)
    assert fits.families["eclipse"].params["secondary_depth"] > 0
    assert fits.best_family == "eclipse"


def test_unknown_solver_is_refused():
    t = np.arange(0, 3, CAD)
    win = make_window(t, _batman(t), np.full(t.size, 1e-3), t_mid=1.5, duration_days=0.14,
                      depth=0.012, cadence_days=CAD)
    with pytest.raises(ParameterError, match="method"):
        fit_event(win, method="simplex")
