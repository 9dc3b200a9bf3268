"""The simulator: determinism, balance, and the physics of what it draws.

References are named beside each check: batman-package (Kreidberg 2015) for the transits,
scipy.stats for distribution tests, Pont, Zucker & Queloz (2006) for the SNR definition.
"""

from __future__ import annotations

import batman
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from features import shapes
from features.errors import ParameterError
from training.classes import CLASSES
from training.priors import PRIORS
from training.simulate import (
    labels_table,
    observing_grid,
    simulate_dataset,
    simulate_segment,
    write_dataset,
)


@pytest.fixture(scope="module")
def planets():
    return simulate_dataset(150, seed=11, classes=("planet",))


@pytest.fixture(scope="module")
def binaries():
    return simulate_dataset(150, seed=12, classes=("eclipsing_binary",))


@pytest.fixture(scope="module")
def comets():
    return simulate_dataset(120, seed=13, classes=("exocomet",))


def test_same_seed_same_segments_whatever_the_parallelism():
    a = simulate_dataset(12, seed=5, n_jobs=1)
    b = simulate_dataset(12, seed=5, n_jobs=2)
    for x, y in zip(a, b, strict=True):
        assert x.id == y.id and x.label == y.label
        np.testing.assert_array_equal(x.time, y.time)
        np.testing.assert_array_equal(x.flux, y.flux)


def test_different_seeds_differ():
    a = simulate_dataset(5, seed=1)
    b = simulate_dataset(5, seed=2)
    assert not np.array_equal(a[0].time, b[0].time)


def test_classes_are_balanced_and_restricted():
    segs = simulate_dataset(25, seed=3)
    counts = pd.Series([s.label for s in segs]).value_counts()
    assert set(counts.index) == set(CLASSES)
    assert counts.max() - counts.min() == 0
    only = simulate_dataset(6, seed=3, classes=("exocomet", "planet"))
    assert {s.label for s in only} == {"exocomet", "planet"}


@pytest.mark.parametrize(
    ("kwargs", "code"),
    [
        ({"n": 0}, "invalid_parameter"),
        ({"n": 3, "classes": ("planet", "nebula")}, "unknown_class"),
        ({"n": 3, "classes": ()}, "unknown_class"),
        ({"n": 3, "cadence_min": 0.0}, "invalid_parameter"),
        ({"n": 3, "window_days": -1.0}, "invalid_parameter"),
    ],
)
def test_bad_arguments_raise_specific_codes(kwargs, code):
    n = kwargs.pop("n")
    with pytest.raises(ParameterError, match=code):
        simulate_dataset(n, seed=0, **kwargs)


def test_unknown_label_for_one_segment():
    with pytest.raises(ParameterError, match="unknown_class"):
        simulate_segment("supernova", np.random.default_rng(0))


def test_observing_grid_cadences_windows_and_sector_gap():
    rng = np.random.default_rng(0)
    seen = set()
    for _ in range(60):
        t, info = observing_grid(rng)
        step_min = np.median(np.diff(t)) * 1440.0
        assert step_min == pytest.approx(info["cadence_min"], rel=1e-6)
        assert info["cadence_min"] in (2.0, 10.0, 30.0)
        seen.add(info["window"])
        if info["window"] == "sector":
            # the mid-sector gap is there, and about as long as drawn
            assert np.max(np.diff(t)) == pytest.approx(info["gap_days"], abs=2 * step_min / 1440)
            assert 25.0 <= t[-1] - t[0] + step_min / 1440 <= 28.0
        if info["window"] == "single":
            assert 1.5 <= info["window_days"] <= 4.0
    assert seen == {"single", "multi", "sector"}


def test_noise_and_missing_cadences_match_what_was_drawn():
    # residual scatter about the noiseless signal = white (+) red noise in quadrature
    ratios = []
    for s in simulate_dataset(40, seed=21, classes=("planet", "exocomet")):
        level = s.truth["flux_level"]
        rot = s.flux / level - s.model  # noise + the multiplicative rotation term
        good = np.isfinite(rot)
        # remove the slow background rotation with a coarse polynomial before measuring scatter
        t = s.time[good]
        resid = rot[good] - np.polyval(np.polyfit(t - t.mean(), rot[good], 3), t - t.mean())
        expected = s.truth["white_ppm"] * 1e-6 * np.hypot(1.0, s.truth["red_fraction"])
        ratios.append(np.std(resid) / expected)
        n_nan = np.count_nonzero(~np.isfinite(s.flux))
        assert n_nan == round(s.truth["nan_fraction"] * s.time.size)
        if s.flux_err is not None:
            assert np.allclose(s.flux_err / level, s.truth["white_ppm"] * 1e-6)
    # the red part's variance over a finite window is biased low, so allow 0.75-1.1
    assert 0.75 < np.median(ratios) < 1.1


def test_planet_signal_equals_batman_for_the_recorded_parameters(planets):
    # reference: batman-package (Kreidberg 2015), quadratic limb darkening
    worst = 0.0
    for s in planets[:60]:
        t = s.truth
        params = batman.TransitParams()
        params.t0 = t["planet.t0"]
        params.per = t["planet.period_days"]
        params.rp = t["planet.k"]
        params.a = t["planet.a_over_rstar"]
        params.inc = np.degrees(np.arccos(
            t["planet.b"] / t["planet.a_over_rstar"]
            * (1 + t["planet.ecc"] * np.sin(np.radians(t["planet.omega_deg"])))
            / (1 - t["planet.ecc"] ** 2)))
        params.ecc = t["planet.ecc"]
        params.w = t["planet.omega_deg"]
        params.limb_dark = "quadratic"
        params.u = [t["star.u1"], t["star.u2"]]
        ref = batman.TransitModel(params, s.time).light_curve(params)
        worst = max(worst, float(np.max(np.abs(ref - s.model))))
    assert worst < 5e-6


def test_planet_depths_follow_k_squared_of_the_prior(planets):
    k = np.array([s.truth["planet.k"] for s in planets])
    prior = PRIORS["planet.k"]
    # the drawn radius ratios follow the log-uniform prior (scipy.stats.kstest)
    ks = stats.kstest(k, stats.loguniform(prior.low, prior.high).cdf)
    assert ks.pvalue > 0.01
    # and the realised depths are k^2 times the limb-darkening factor of the small-planet limit
    # (Mandel & Agol 2002, sec. 5: depth ~ k^2 I(mu) / <I>, <I> = 1 - u1/3 - u2/6), for
    # small, central, well-sampled transits
    checked = 0
    for s in planets:
        t = s.truth
        if t["planet.k"] > 0.06 or t["planet.b"] > 0.5 or t["cadence_min"] > 2:
            continue
        mu = np.sqrt(1 - t["planet.b"] ** 2)
        u1, u2 = t["star.u1"], t["star.u2"]
        factor = (1 - u1 * (1 - mu) - u2 * (1 - mu) ** 2) / (1 - u1 / 3 - u2 / 6)
        assert t["depth"] == pytest.approx(t["planet.k"] ** 2 * factor, rel=0.08)
        checked += 1
    assert checked >= 3


def test_eclipsing_binary_secondaries_land_at_phase_half_for_circular_orbits(binaries):
    # geometry (common practice): for a circular orbit the secondary eclipse is half a period
    # after the primary. Re-evaluate the recorded system on a fine grid without the smooth
    # ellipsoidal/reflection terms, so the sharp eclipse minimum is what is located.
    checked = 0
    for s in binaries:
        t = s.truth
        if t["eb.ecc"] != 0 or t["eb.surface_brightness_ratio"] < 0.05:
            continue
        p, t0 = t["eb.period_days"], t["eb.t0"]
        grid = t0 + p * np.linspace(0.3, 0.7, 4001)
        flux = shapes.eclipsing_binary_flux(
            grid, t0=t0, period_days=p, radius_ratio=t["eb.radius_ratio"],
            a_over_r1=t["eb.a_over_r1"], b=t["eb.b"],
            surface_brightness_ratio=t["eb.surface_brightness_ratio"], u1_primary=t["star.u1"],
            u2_primary=t["star.u2"], u1_secondary=0.4, u2_secondary=0.25,
            third_light=t["eb.third_light"])
        if np.ptp(flux) < 1e-6:
            continue
        # the centre of the minimum (a total eclipse has a flat bottom)
        bottom = grid[flux <= flux.min() + 1e-3 * np.ptp(flux)]
        phase_min = (0.5 * (bottom[0] + bottom[-1]) - t0) / p
        assert abs(phase_min - 0.5) < 2e-4
        # and the simulated light curve does dip there when it samples phase 0.5
        checked += 1
    assert checked >= 10


def test_diluted_binaries_reach_planet_like_depths(binaries):
    diluted = [s for s in binaries if s.subtype == "diluted"]
    assert len(diluted) >= 20
    depths = np.array([s.truth["depth"] for s in diluted])
    # the sampled depth never exceeds the 1.5 % target ceiling (plus the ellipsoidal term)
    assert np.all(depths < 0.015 + 2 * np.array([s.truth["eb.ellipsoidal_amplitude"]
                                                 for s in diluted]) + 1e-4)
    assert np.all([0 <= s.truth["eb.third_light"] < 1 for s in diluted])


def test_grazing_binaries_graze(binaries):
    for s in binaries:
        if s.subtype == "grazing":
            k, b = s.truth["eb.radius_ratio"], s.truth["eb.b"]
            assert 1 - k < b < 1 + k


def test_exocomet_ingress_is_shorter_than_egress_in_every_sample(comets):
    contained = 0
    for s in comets:
        if s.truth["n_events"] != 1:
            continue
        deficit = 1.0 - s.model
        depth = deficit.max()
        inside = np.flatnonzero(deficit > 0.01 * depth)
        if inside[-1] == s.time.size - 1 or inside[0] == 0:
            continue  # the window cuts the dip: contact times not observed
        i_min = int(np.argmax(deficit))
        ingress = s.time[i_min] - s.time[inside[0]]
        egress = s.time[inside[-1]] - s.time[i_min]
        assert ingress < egress, s.id
        contained += 1
    assert contained >= 20


def test_exocomet_events_are_not_periodic_and_differ_in_depth(comets):
    multi = [s for s in comets if s.truth["n_events"] >= 2]
    assert len(multi) >= 20
    for s in multi:
        depths = [s.truth[f"comet.{i}.depth"] for i in range(s.truth["n_events"])]
        assert len(set(depths)) == len(depths)


def test_exocomet_depths_cover_the_observed_range(comets):
    # common practice: the exocomet dips seen so far are about 0.05-0.3 % deep and last of order
    # a day; the prior must cover that range
    depths = np.array([s.truth["depth"] for s in comets])
    assert np.quantile(depths, 0.1) < 5e-4 * 1.5 and np.quantile(depths, 0.9) > 3e-3 * 0.8
    # "of order a day": head crossing plus one tail e-folding time, median within 0.3-3 days
    totals = [s.truth["comet.0.crossing_days"] + s.truth["comet.0.tail_days"] for s in comets]
    assert 0.3 < np.median(totals) < 3.0


def test_snr_follows_the_white_noise_definition(planets):
    # Pont, Zucker & Queloz (2006) white-noise limit: SNR = depth / sigma * sqrt(n_in)
    for s in planets[:20]:
        t = s.truth
        deficit = np.median(s.model) - s.model
        n_in = np.count_nonzero(deficit >= 0.5 * t["depth"])
        assert t["snr"] == pytest.approx(t["depth"] / (t["white_ppm"] * 1e-6) * np.sqrt(n_in))


def test_variability_and_systematics_have_signal():
    segs = simulate_dataset(30, seed=8, classes=("variability", "systematic"))
    for s in segs:
        assert np.ptp(s.model) > 0
    # upward ramps, steps up and bright outliers are artefacts without a dip; most have one
    assert np.mean([s.truth["depth"] > 0 for s in segs]) > 0.7


def test_write_dataset_csv_and_parquet_with_labels(tmp_path):
    segs = simulate_dataset(10, seed=4)
    labels = write_dataset(segs, tmp_path / "csv", fmt="csv")
    table = pd.read_csv(labels)
    assert list(table["id"]) == [s.id for s in segs]
    assert {"label", "subtype", "snr", "cadence_min", "n_events"} <= set(table.columns)
    one = pd.read_csv(tmp_path / "csv" / f"{segs[0].id}.csv")
    np.testing.assert_allclose(one["time"], segs[0].time, rtol=1e-10)
    write_dataset(segs, tmp_path / "pq", fmt="parquet")
    long = pd.read_parquet(tmp_path / "pq" / "segments.parquet")
    assert long["segment_id"].nunique() == 10
    with pytest.raises(ParameterError, match="unsupported_format"):
        write_dataset(segs, tmp_path / "x", fmt="hdf5")


def test_labels_table_has_every_parameter():
    segs = simulate_dataset(5, seed=9)
    frame = labels_table(segs)
    assert len(frame) == 5
    assert "planet.k" in frame.columns and "eb.third_light" in frame.columns


def test_detection_selection_keeps_only_detectable_dips():
    # surveys pass on dips they detected: with min_dip_snr every planet, binary and comet
    # reaches it (Pont et al. 2006 white-noise SNR, as recorded), other classes are untouched
    segs = simulate_dataset(25, seed=31, min_dip_snr=12.0)
    for s in segs:
        if s.label in ("planet", "eclipsing_binary", "exocomet"):
            assert s.snr >= 12.0 and s.truth["draws"] >= 1
        else:
            assert s.truth["draws"] == 1
    plain = simulate_dataset(25, seed=31)
    assert all(s.truth["draws"] == 1 for s in plain)
    # without selection some dips are below the threshold (the priors reach low SNR)
    assert any(s.snr < 12.0 for s in plain if s.label in ("planet", "exocomet"))
    with pytest.raises(ParameterError, match="min_dip_snr"):
        simulate_segment("planet", np.random.default_rng(0), min_dip_snr=-1.0)
