"""Robustness and recovery of the whole extractor over the simulator and random segments.

Every simulated class and awkward-but-valid segments must give features that are finite or NaN,
and nothing but a DipshapeError may escape. The fitted-family BIC must pick the true family for
most high-SNR simulated segments (bound measured on 500 segments, set a little below).
"""

from __future__ import annotations

import collections

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from features.errors import DipshapeError
from features.pipeline import extract
from features.segment import MIN_POINTS, make_segment
from training.simulate import simulate_dataset

TRUE_FAMILY = {"planet": "transit", "eclipsing_binary": "eclipse", "exocomet": "comet",
               "variability": "variability", "systematic": "artefact"}


@pytest.fixture(scope="module")
def simulated():
    out = []
    for s in simulate_dataset(500, seed=2024):
        seg = make_segment(s.time, s.flux, s.flux_err, id=s.id)
        out.append((s, extract(seg)))
    return out


def test_every_simulated_class_gives_finite_or_nan_features(simulated):
    for _, feats in simulated:
        assert not np.isinf(feats.values).any()
    labels = {s.label for s, _ in simulated}
    assert labels == set(TRUE_FAMILY)


def test_bic_picks_the_true_family_for_most_high_snr_segments(simulated):
    picks = collections.defaultdict(list)
    for s, feats in simulated:
        if feats.fits is not None and s.snr >= 15:
            picks[s.label].append(feats.fits.best_family == TRUE_FAMILY[s.label])
    overall = np.mean([x for v in picks.values() for x in v])
    # measured on this set (seed 2024): overall 0.74; planet 0.73, binary 0.82, comet 0.88;
    # variability and artefacts are rarely fitted (their dips are mostly removed by the
    # detrending or are not dips) and are separated by the context features instead
    assert overall > 0.65
    for label in ("planet", "eclipsing_binary", "exocomet"):
        assert np.mean(picks[label]) > 0.65, label


@st.composite
def _segments(draw):
    n = draw(st.integers(MIN_POINTS, 400))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    kind = draw(st.sampled_from(["uniform", "gappy", "irregular"]))
    cadence = draw(st.sampled_from([1 / 1440, 2 / 1440, 30 / 1440, 0.1]))
    if kind == "uniform":
        t = np.arange(n) * cadence
    elif kind == "gappy":
        t = np.arange(n) * cadence
        t[n // 2 :] += draw(st.floats(0.1, 20.0))
    else:
        t = np.cumsum(rng.uniform(0.1, 3.0, n) * cadence)
    noise = draw(st.floats(1e-6, 0.05))
    f = 1 + rng.normal(0, noise, n)
    if draw(st.booleans()):
        i = rng.integers(0, n)
        width = draw(st.integers(1, max(n // 3, 1)))
        f[i : i + width] -= draw(st.floats(1e-4, 0.5))
    if draw(st.booleans()):
        f[rng.integers(0, n, 3)] += draw(st.floats(-0.5, 0.5))
    err = None if draw(st.booleans()) else np.full(n, max(noise, 1e-6))
    return t, np.clip(f, 1e-3, None), err


@given(_segments())
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
def test_random_valid_segments_never_crash(data):
    t, f, err = data
    try:
        seg = make_segment(t, f, err)
    except DipshapeError:
        return  # refused at the boundary with a specific code: fine
    try:
        feats = extract(seg)
    except DipshapeError:
        return
    assert not np.isinf(feats.values).any()


def test_a_fold_no_comet_template_fits_still_gets_a_comet_family():
    # Regression: a short-period detached binary folded at its period (seed 99, segment 51 of
    # the simulator's stream) gave no finite comet-template row, and the comet fit started
    # from a tail ratio of 0 (math domain error). It must measure like any other segment.
    sim = simulate_dataset(52, seed=99, min_dip_snr=10.0)[51]
    assert sim.label == "eclipsing_binary"
    feats = extract(make_segment(sim.time, sim.flux, sim.flux_err, id=sim.id))
    assert feats.ephemeris is not None
    comet = feats.fits.families["comet"]
    assert np.isfinite(comet.chi2) and comet.params["tail_ratio"] > 0
