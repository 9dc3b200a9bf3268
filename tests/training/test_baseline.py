"""The BIC baseline: the mapping on a hand-made table, its fallback rule, its use in the report.

References outside the project: the class of each shape family is the product's class table
(DESIGN.md: transit -> planet, eclipse -> eclipsing_binary, comet -> exocomet, ...), written out
by hand here; sklearn.metrics.accuracy_score and f1_score for the report's side of the check.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import accuracy_score, f1_score

from features.errors import ParameterError
from training.baseline import PSD_FRACTION_THRESHOLD, predict_baseline
from training.classes import CLASSES
from training.report import evaluate

# best_family, psd_peak_fraction, expected class (written by hand, not from FAMILY_TO_CLASS)
HAND_MADE = [
    ("transit", 0.9, "planet"),  # a fit wins over any power-spectrum value
    ("eclipse", np.nan, "eclipsing_binary"),
    ("comet", 0.0, "exocomet"),
    ("variability", 0.05, "variability"),
    ("artefact", 0.95, "systematic"),
    ("", 0.8, "variability"),  # no fit, coherent star
    ("", 0.1, "systematic"),  # no fit, no coherent peak
    ("", PSD_FRACTION_THRESHOLD, "variability"),  # the threshold itself counts as coherent
    ("", np.nan, "systematic"),  # no fit and no power spectrum (short segment)
    (None, 0.7, "variability"),  # a missing family is "no fit" too
]


@pytest.fixture()
def table():
    return pd.DataFrame({"best_family": [r[0] for r in HAND_MADE],
                         "psd_peak_fraction": [r[1] for r in HAND_MADE]})


def test_predictions_follow_the_bic_mapping_and_the_fallback(table):
    assert predict_baseline(table).tolist() == [r[2] for r in HAND_MADE]


def test_predictions_are_only_built_in_classes(table):
    assert set(predict_baseline(table)) <= set(CLASSES)


def test_report_takes_the_baseline_as_hard_labels(table):
    truth = np.array(["planet", "planet", "exocomet", "variability", "systematic",
                      "variability", "exocomet", "variability", "systematic", "systematic"])
    pred = predict_baseline(table)
    m = evaluate(truth, None, CLASSES, y_pred=pred)
    assert m["accuracy"] == pytest.approx(accuracy_score(truth, pred))  # 7 of 10
    assert m["accuracy"] == pytest.approx(0.7)
    # the report averages the defined per-class F1 values (an undefined one is NaN here)
    per_class = f1_score(truth, pred, labels=list(CLASSES), average=None, zero_division=np.nan)
    assert m["macro_f1"] == pytest.approx(np.nanmean(per_class))
    assert m["ece"] is None  # hard labels have no calibration


@pytest.mark.parametrize(("frame", "match"), [
    (pd.DataFrame({"best_family": ["transit"]}), "psd_peak_fraction"),
    (pd.DataFrame({"psd_peak_fraction": [0.1]}), "best_family"),
    (pd.DataFrame({"best_family": ["lensing"], "psd_peak_fraction": [0.1]}), "lensing"),
])
def test_bad_tables_raise(frame, match):
    with pytest.raises(ParameterError, match=match) as info:
        predict_baseline(frame)
    assert info.value.code == "invalid_parameter"


def test_empty_table_gives_no_labels():
    empty = pd.DataFrame({"best_family": pd.Series([], dtype=str),
                          "psd_peak_fraction": pd.Series([], dtype=float)})
    assert predict_baseline(empty).shape == (0,)
