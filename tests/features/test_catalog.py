"""The feature catalogue: unique names, complete definitions, and docs that cannot drift."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from features.catalog import (
    FEATURE_NAMES,
    FEATURES,
    SNR_SCAN_DURATIONS_DAYS,
    features_markdown,
    fill_markers,
    flags_markdown,
)
from features.pipeline import FLAGS

DOCS = Path(__file__).resolve().parents[2] / "docs" / "features.md"


def test_names_are_unique_and_every_feature_is_defined():
    assert len(set(FEATURE_NAMES)) == len(FEATURE_NAMES)
    for spec in FEATURES:
        assert spec.definition and spec.separates and spec.group, spec.name


def test_scan_durations_span_the_issue_range_log_spaced():
    d = np.array(SNR_SCAN_DURATIONS_DAYS)
    assert 10 <= d.size <= 15
    assert d[0] == 0.02 and d[-1] == 2.0
    ratios = d[1:] / d[:-1]
    assert np.allclose(ratios, ratios[0], rtol=1e-3)


def test_docs_are_generated_from_the_code():
    text = DOCS.read_text()
    expected = fill_markers(fill_markers(text, "flags", flags_markdown(FLAGS)), "features",
                            features_markdown())
    assert text == expected, (
        "docs/features.md is stale: regenerate its tables with features.catalog.fill_markers "
        "(flags_markdown(FLAGS), features_markdown())")
