"""The prior table: validated rows, reproducible draws, and docs that cannot drift."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from features.catalog import fill_markers
from features.errors import ParameterError
from training.priors import PRIORS, Prior, PriorTable, priors_markdown

DOCS = Path(__file__).resolve().parents[2] / "docs" / "simulator.md"


def test_every_prior_has_a_reason_and_a_valid_distribution():
    for prior in PRIORS.values():
        assert prior.why, prior.name
        value = prior.sample(np.random.default_rng(0))
        if prior.distribution in ("uniform", "loguniform"):
            assert prior.low <= value <= prior.high


def test_loguniform_draws_follow_the_loguniform_law():
    # reference: scipy.stats.loguniform and the Kolmogorov-Smirnov test
    rng = np.random.default_rng(1)
    prior = PRIORS["planet.period_days"]
    draws = [prior.sample(rng) for _ in range(2000)]
    assert stats.kstest(draws, stats.loguniform(prior.low, prior.high).cdf).pvalue > 0.01


def test_choice_weights_are_respected():
    rng = np.random.default_rng(2)
    prior = PRIORS["obs.cadence_min"]
    draws = np.array([prior.sample(rng) for _ in range(3000)])
    for option, weight in zip(prior.options, prior.weights, strict=True):
        # binomial standard error sqrt(p(1-p)/n) ~ 0.009; 4 sigma bound
        assert abs(np.mean(draws == option) - weight) < 0.04


@pytest.mark.parametrize(
    ("row", "match"),
    [
        (Prior("x.a", "gaussian", 0, 1), "unknown distribution"),
        (Prior("x.a", "uniform", 2, 1), "low < high"),
        (Prior("x.a", "loguniform", 0, 1), "low > 0"),
        (Prior("x.a", "choice", options=(1, 2), weights=(0.5,)), "must match"),
        (Prior("x.a", "choice", options=(1, 2), weights=(0.5, 0.6)), "sum to 1"),
        (Prior("x.a", "bernoulli", 1.5), "p must be"),
    ],
)
def test_invalid_rows_are_refused(row, match):
    with pytest.raises(ParameterError, match=match):
        PriorTable([row])


def test_duplicate_and_unknown_names():
    with pytest.raises(ParameterError, match="duplicate"):
        PriorTable([Prior("x.a", "uniform", 0, 1), Prior("x.a", "uniform", 0, 2)])
    with pytest.raises(ParameterError, match="no prior named"):
        PRIORS.draw("planet.colour", np.random.default_rng(0))


def test_replace_makes_a_new_table():
    changed = PRIORS.replace(planet__k=Prior("planet.k", "uniform", 0.1, 0.11, why="test"))
    assert changed["planet.k"].high == 0.11
    assert PRIORS["planet.k"].high == 0.2


def test_docs_table_is_generated_from_the_code():
    text = DOCS.read_text()
    assert text == fill_markers(text, "priors", priors_markdown()), (
        "docs/simulator.md is stale: regenerate the table between the markers with "
        "features.catalog.fill_markers(text, 'priors', training.priors.priors_markdown())"
    )
