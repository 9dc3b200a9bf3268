"""The evaluation report: metrics against scikit-learn, the ECE against worked examples.

References outside the project, named beside each check:
- sklearn.metrics (precision_recall_fscore_support, f1_score, accuracy_score, recall_score,
  confusion_matrix) for the classification metrics;
- sklearn.calibration.calibration_curve (strategy="uniform") for the reliability points;
- Guo, Pleiss, Sun & Weinberger (2017), "On Calibration of Modern Neural Networks", §2, the
  binned ECE = sum_m |B_m|/n |acc(B_m) - conf(B_m)| with bins ((m-1)/M, m/M] (Eq. 3 there,
  equation number from memory), after Naeini, Cooper & Hauskrecht (2015);
- Python's html.parser and base64 for the page.
"""

from __future__ import annotations

import base64
import json
import math
from html.parser import HTMLParser

import numpy as np
import pytest
from sklearn.calibration import calibration_curve
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.metrics import (
    accuracy_score,
    confusion_matrix,
    f1_score,
    precision_recall_fscore_support,
    recall_score,
)

from features.errors import ParameterError
from training.classes import CLASSES
from training.report import (
    CAUTION,
    Table,
    compare,
    evaluate,
    permutation_importances,
    plot_confusion_matrix,
    plot_permutation_importance,
    plot_recall_vs_snr,
    plot_reliability,
    write_report,
)

SIX = (*CLASSES, "stellar_flare")


def _nan(value):
    return np.nan if value is None else value


@pytest.fixture(scope="module")
def sample():
    """Labels and probabilities with awkward classes.

    ``systematic`` occurs in truth but is never predicted (its column is zero);
    ``stellar_flare`` is predicted sometimes but never true.
    """
    rng = np.random.default_rng(7)
    n = 400
    y_true = np.array(CLASSES)[rng.integers(0, len(CLASSES), n)]
    proba = rng.dirichlet(np.full(len(SIX), 0.6), size=n)
    truth_idx = np.array([SIX.index(c) for c in y_true])
    proba[np.arange(n), truth_idx] += rng.uniform(0, 1.2, n)  # informative but imperfect
    proba[:, SIX.index("systematic")] = 0.0
    proba /= proba.sum(axis=1, keepdims=True)
    snr = rng.uniform(3, 29, n)  # nothing in 30-100 or 100-inf: two empty bins
    snr[:7] = np.nan
    cadence = rng.choice([2.0, 10.0, 30.0], n)
    cadence[:3] = np.nan
    return y_true, proba, snr, cadence


def _predicted(proba):
    return np.array(SIX)[np.argmax(proba, axis=1)]


# --- classification metrics ------------------------------------------------------------------


def test_per_class_metrics_match_sklearn(sample):
    y_true, proba, _, _ = sample
    m = evaluate(y_true, proba, SIX)
    y_pred = _predicted(proba)
    # reference: sklearn.metrics with zero_division=nan (undefined ratios), labels in SIX order
    p, r, f, s = precision_recall_fscore_support(y_true, y_pred, labels=list(SIX),
                                                 zero_division=np.nan)
    for i, label in enumerate(SIX):
        got = m["per_class"][label]
        np.testing.assert_allclose(
            [_nan(got["precision"]), _nan(got["recall"]), _nan(got["f1"])], [p[i], r[i], f[i]],
            rtol=1e-12, equal_nan=True, err_msg=label)
        assert got["support"] == s[i]
    assert m["per_class"]["systematic"]["precision"] is None  # never predicted
    assert m["per_class"]["stellar_flare"]["recall"] is None  # never true
    assert m["macro_f1"] == pytest.approx(
        f1_score(y_true, y_pred, labels=list(SIX), average="macro", zero_division=np.nan))
    assert m["accuracy"] == pytest.approx(accuracy_score(y_true, y_pred))
    # reference: sklearn.metrics.confusion_matrix, rows true and columns predicted
    assert m["confusion_matrix"] == confusion_matrix(y_true, y_pred, labels=list(SIX)).tolist()
    assert m["n_samples"] == len(y_true)


def test_macro_f1_skips_a_class_absent_from_truth_and_predictions():
    y_true = ["planet", "planet", "exocomet", "exocomet", "variability"]
    y_pred = ["planet", "exocomet", "exocomet", "exocomet", "planet"]
    m = evaluate(y_true, None, CLASSES, y_pred=y_pred)
    assert m["per_class"]["eclipsing_binary"]["f1"] is None
    # reference: sklearn excludes zero_division=nan classes from the macro average
    assert m["macro_f1"] == pytest.approx(
        f1_score(y_true, y_pred, labels=list(CLASSES), average="macro", zero_division=np.nan))
    # hand check: F1 planet 0.5, exocomet 0.8, variability 0 -> mean 0.4333...
    assert m["macro_f1"] == pytest.approx((0.5 + 0.8 + 0.0) / 3)


def test_hard_label_baseline_has_no_calibration(sample):
    y_true = sample[0]
    rng = np.random.default_rng(3)
    y_pred = np.where(rng.uniform(size=len(y_true)) < 0.6, y_true, "planet")
    m = evaluate(y_true, None, SIX, y_pred=y_pred)
    assert m["ece"] is None and m["reliability"] is None
    assert m["accuracy"] == pytest.approx(accuracy_score(y_true, y_pred))  # sklearn.metrics
    assert m["macro_f1"] == pytest.approx(
        f1_score(y_true, y_pred, labels=list(SIX), average="macro", zero_division=np.nan))
    with pytest.raises(ParameterError, match="no reliability curve"):
        plot_reliability(m)


# --- calibration -----------------------------------------------------------------------------


def test_ece_hand_worked_example():
    # Guo et al. (2017) §2 with M = 15 bins of width 1/15, intervals ((m-1)/M, m/M]:
    #   confidences 0.95 (right), 0.95 (wrong) -> bin 15 (0.933, 1]: acc 1/2, conf 0.95
    #               0.65 (right)               -> bin 10 (0.600, 0.667]: acc 1, conf 0.65
    #               0.55 (right)               -> bin  9 (0.533, 0.600]: acc 1, conf 0.55
    #   ECE = 2/4 |0.5 - 0.95| + 1/4 |1 - 0.65| + 1/4 |1 - 0.55| = 0.225 + 0.0875 + 0.1125
    classes = ("planet", "systematic")
    proba = np.array([[0.95, 0.05], [0.95, 0.05], [0.35, 0.65], [0.55, 0.45]])
    y_true = ["planet", "systematic", "systematic", "planet"]
    m = evaluate(y_true, proba, classes)
    assert m["ece"] == pytest.approx(0.425, abs=1e-12)
    filled = {i: b for i, b in enumerate(m["reliability"]) if b["count"]}
    assert sorted(filled) == [8, 9, 14]  # zero-based bins 9, 10 and 15
    assert filled[14]["accuracy"] == 0.5 and filled[14]["mean_confidence"] == pytest.approx(0.95)
    assert len(m["reliability"]) == 15


def test_ece_of_a_confident_perfect_classifier_is_zero_and_of_a_wrong_one_is_one():
    # Guo et al. (2017) §2: acc(B) = conf(B) = 1 in the top bin gives ECE 0; acc 0 gives 1
    proba = np.array([[1.0, 0.0], [0.0, 1.0]])
    assert evaluate(["a", "b"], proba, ("a", "b"))["ece"] == 0.0
    assert evaluate(["b", "a"], proba, ("a", "b"))["ece"] == 1.0


def _slow_ece(y_true_idx, proba, n_bins):
    """Direct re-implementation of Guo et al. (2017) §2, one bin at a time."""
    confidence = proba.max(axis=1)
    correct = proba.argmax(axis=1) == y_true_idx
    total = 0.0
    for m in range(1, n_bins + 1):
        lower, upper = (m - 1) / n_bins, m / n_bins
        in_bin = (confidence > lower) & (confidence <= upper)
        if m == 1:
            in_bin |= confidence == 0.0
        if in_bin.any():
            total += in_bin.sum() / len(confidence) * abs(
                correct[in_bin].mean() - confidence[in_bin].mean())
    return total


@pytest.mark.parametrize("n_bins", [15, 10, 1])
def test_ece_matches_a_direct_reimplementation(sample, n_bins):
    y_true, proba, _, _ = sample
    idx = np.array([SIX.index(c) for c in y_true])
    m = evaluate(y_true, proba, SIX, n_calibration_bins=n_bins)
    assert m["ece"] == pytest.approx(_slow_ece(idx, proba, n_bins), rel=1e-12)


def test_reliability_points_match_sklearn_calibration_curve(sample):
    y_true, proba, _, _ = sample
    m = evaluate(y_true, proba, SIX)
    correct = (_predicted(proba) == y_true).astype(int)
    # reference: sklearn.calibration.calibration_curve on (correct, top probability),
    # uniform bins; it returns the non-empty bins only
    prob_true, prob_pred = calibration_curve(correct, proba.max(axis=1), n_bins=15,
                                             strategy="uniform")
    filled = [b for b in m["reliability"] if b["count"]]
    np.testing.assert_allclose([b["accuracy"] for b in filled], prob_true, rtol=1e-12)
    np.testing.assert_allclose([b["mean_confidence"] for b in filled], prob_pred, rtol=1e-12)
    assert sum(b["count"] for b in m["reliability"]) == len(y_true)


# --- by SNR and cadence ----------------------------------------------------------------------


def test_metrics_by_snr_bin_and_empty_bins(sample):
    y_true, proba, snr, _ = sample
    m = evaluate(y_true, proba, SIX, snr=snr)
    bins = m["by_snr"]["bins"]
    assert [b["label"] for b in bins] == ["0-10", "10-15", "15-30", "30-100", "100-inf"]
    assert bins[-1]["upper"] is None
    assert [b["metrics"] is None for b in bins] == [False, False, False, True, True]
    assert bins[3]["n_samples"] == 0
    assert m["by_snr"]["n_outside"] == 7  # the NaN SNRs
    y_pred = _predicted(proba)
    for b in bins[:3]:
        mask = (snr >= b["lower"]) & (snr < b["upper"])
        assert b["n_samples"] == mask.sum()
        # reference: sklearn.metrics on the subset
        assert b["metrics"]["accuracy"] == pytest.approx(accuracy_score(y_true[mask],
                                                                        y_pred[mask]))
        recalls = recall_score(y_true[mask], y_pred[mask], labels=list(SIX), average=None,
                               zero_division=np.nan)
        got = [_nan(b["metrics"]["per_class"][c]["recall"]) for c in SIX]
        np.testing.assert_allclose(got, recalls, equal_nan=True, rtol=1e-12)
        idx = np.array([SIX.index(c) for c in y_true[mask]])
        assert b["metrics"]["ece"] == pytest.approx(_slow_ece(idx, proba[mask], 15))


def test_snr_bins_are_closed_below_and_open_above():
    # reference: numpy.histogram, whose bins are [a, b) except the last (no value reaches it
    # here); edge values 10, 15, 30 must land in the bin they start
    snr = np.array([0, 9.99, 10, 14, 15, 29, 30, 64, 99, 100, 250, -1], dtype=float)
    y = ["planet"] * snr.size
    m = evaluate(y, None, CLASSES, y_pred=y, snr=snr)
    counts = [b["n_samples"] for b in m["by_snr"]["bins"]]
    assert counts == [2, 2, 2, 3, 2]
    assert m["by_snr"]["n_outside"] == 1  # the negative SNR
    finite = snr[(snr >= 0) & (snr < 100)]
    np.testing.assert_array_equal(counts[:4], np.histogram(finite, bins=[0, 10, 15, 30, 100])[0])


def rng_jitter(n: int) -> np.ndarray:
    return np.random.default_rng(3).uniform(-1e-6, 1e-6, n)


def test_metrics_by_cadence(sample):
    y_true, proba, _, cadence = sample
    m = evaluate(y_true, proba, SIX, cadence_min=cadence)
    groups = m["by_cadence"]["bins"]
    assert [g["cadence_min"] for g in groups] == [2.0, 10.0, 30.0]
    assert m["by_cadence"]["n_outside"] == 3
    # measured cadences that differ in the last digits fall in one group
    jittered = cadence + rng_jitter(cadence.size)
    again = evaluate(y_true, proba, SIX, cadence_min=jittered)["by_cadence"]["bins"]
    assert [g["label"] for g in again] == ["2", "10", "30"]
    assert [g["n_samples"] for g in again] == [g["n_samples"] for g in groups]
    y_pred = _predicted(proba)
    for g in groups:
        mask = cadence == g["cadence_min"]
        assert g["n_samples"] == mask.sum()
        assert g["metrics"]["macro_f1"] == pytest.approx(  # reference: sklearn.metrics
            f1_score(y_true[mask], y_pred[mask], labels=list(SIX), average="macro",
                     zero_division=np.nan))


def test_evaluation_is_strict_json(sample):
    y_true, proba, snr, cadence = sample
    m = evaluate(y_true, proba, SIX, snr=snr, cadence_min=cadence)
    assert json.loads(json.dumps(m, allow_nan=False)) == m


@pytest.mark.parametrize(
    ("args", "kwargs", "code", "match"),
    [
        ((["planet", "comet"], None, CLASSES), {"y_pred": ["planet"] * 2}, "unknown_class",
         r"y_true has labels not in classes .*\['comet'\]"),
        ((["planet"], None, CLASSES), {"y_pred": ["moon"]}, "unknown_class", "y_pred"),
        ((["planet"], None, CLASSES), {}, "invalid_parameter", "give proba or y_pred"),
        ((["planet"], np.eye(5)[:1], CLASSES), {"y_pred": ["planet"]}, "invalid_parameter",
         "not both"),
        ((["planet"] * 2, np.eye(5)[:1], CLASSES), {}, "invalid_parameter",
         r"shape \(1, 5\); expected \(2, 5\)"),
        ((["planet"], np.full((1, 5), 0.3), CLASSES), {}, "invalid_parameter", "sum to 1"),
        ((["planet"], np.array([[1.5, -0.5, 0, 0, 0]]), CLASSES), {}, "invalid_parameter",
         r"within \[0, 1\]"),
        ((["planet"], np.array([[np.nan, 1, 0, 0, 0]]), CLASSES), {}, "invalid_parameter",
         "finite"),
        ((["planet"], np.eye(5)[:1], CLASSES), {"snr": [1.0, 2.0]}, "invalid_parameter",
         r"snr has shape \(2,\)"),
        ((["planet"], np.eye(5)[:1], CLASSES), {"snr": [1.0], "snr_bins": (0, 10, 5)},
         "invalid_parameter", "increasing"),
        ((["planet"], np.eye(5)[:1], CLASSES), {"cadence_min": [[2.0]]}, "invalid_parameter",
         "cadence_min has shape"),
        ((["planet"], np.eye(2)[:1], ("planet", "planet")), {}, "invalid_parameter",
         "duplicates"),
        ((["planet"], np.eye(5)[:1], CLASSES), {"n_calibration_bins": 0}, "invalid_parameter",
         "n_calibration_bins"),
    ],
)
def test_bad_evaluate_arguments(args, kwargs, code, match):
    with pytest.raises(ParameterError, match=match) as info:
        evaluate(*args, **kwargs)
    assert info.value.code == code


# --- comparison ------------------------------------------------------------------------------


def test_compare_puts_a_model_and_a_hard_label_baseline_side_by_side(sample):
    y_true, proba, _, _ = sample
    model = evaluate(y_true, proba, SIX)
    baseline = evaluate(y_true, None, CLASSES, y_pred=np.full(len(y_true), "planet"))
    table = compare({"gradient_boosting": model, "bic_baseline": baseline})
    assert table["classes"] == list(SIX)
    gb, bic = table["models"]
    assert (gb["name"], bic["name"]) == ("gradient_boosting", "bic_baseline")
    assert gb["ece"] == model["ece"] and bic["ece"] is None
    assert gb["macro_f1"] == model["macro_f1"]
    assert bic["f1"]["stellar_flare"] is None  # the baseline does not know that class
    # reference: sklearn.metrics F1 of the constant "planet" baseline
    assert bic["f1"]["planet"] == pytest.approx(
        f1_score(y_true, np.full(len(y_true), "planet"), labels=["planet"], average=None)[0])
    with pytest.raises(ParameterError, match="at least one"):
        compare({})
    with pytest.raises(ParameterError, match=r"not an evaluation: missing \['accuracy'"):
        compare({"x": {"classes": [], "macro_f1": 0, "ece": 0, "per_class": {}}})


# --- figures ---------------------------------------------------------------------------------


def test_confusion_figure_shows_row_normalised_rates(sample):
    y_true, proba, _, _ = sample
    fig = plot_confusion_matrix(evaluate(y_true, proba, SIX))
    shown = np.asarray(fig.axes[0].images[0].get_array())
    # reference: sklearn.metrics.confusion_matrix(normalize="true"); the never-true class's
    # row is all zeros in both
    expected = np.nan_to_num(confusion_matrix(y_true, _predicted(proba), labels=list(SIX),
                                              normalize="true"))
    np.testing.assert_allclose(shown, expected, rtol=1e-12)


def test_reliability_figure_bars_are_the_bin_accuracies(sample):
    y_true, proba, _, _ = sample
    fig = plot_reliability(evaluate(y_true, proba, SIX))
    heights = [p.get_height() for p in fig.axes[0].patches]
    correct = (_predicted(proba) == y_true).astype(int)
    prob_true, _ = calibration_curve(correct, proba.max(axis=1), n_bins=15)  # sklearn
    np.testing.assert_allclose(heights, prob_true, rtol=1e-12)
    assert sum(p.get_height() for p in fig.axes[1].patches) == len(y_true)


def test_recall_figure_has_one_line_per_class_with_the_bin_recalls(sample):
    y_true, proba, snr, _ = sample
    m = evaluate(y_true, proba, SIX, snr=snr)
    fig = plot_recall_vs_snr(m)
    lines = fig.axes[0].get_lines()
    assert [ln.get_label() for ln in lines] == list(SIX)
    first = m["by_snr"]["bins"][0]
    mask = (snr >= first["lower"]) & (snr < first["upper"])
    recalls = recall_score(y_true[mask], _predicted(proba)[mask], labels=list(SIX),
                           average=None, zero_division=np.nan)  # sklearn.metrics
    np.testing.assert_allclose([ln.get_ydata()[0] for ln in lines], recalls, equal_nan=True)
    assert all(np.isnan(ln.get_ydata()[3]) for ln in lines)  # the empty 30-100 bin
    with pytest.raises(ParameterError, match="without snr"):
        plot_recall_vs_snr(evaluate(y_true, proba, SIX))


def test_permutation_importance_ranks_the_informative_feature_first():
    # common practice: permuting the only informative feature destroys the score; noise
    # features hardly matter
    rng = np.random.default_rng(11)
    n, n_features = 200, 22
    X = rng.normal(size=(n, n_features))
    y = np.where(X[:, 3] > 0, "planet", "systematic")
    hgb = HistGradientBoostingClassifier(max_iter=15, random_state=0).fit(X, y)
    names = [f"f{i}" for i in range(n_features)]
    top = permutation_importances(hgb, X, y, feature_names=names, rng=rng, n_repeats=2)
    assert len(top) == 20
    assert top[0]["feature"] == "f3" and top[0]["mean"] > 0.3
    means = [t["mean"] for t in top]
    assert means == sorted(means, reverse=True)
    fig = plot_permutation_importance(top)
    assert fig.axes[0].get_yticklabels()[-1].get_text() == "f3"  # drawn at the top
    with pytest.raises(ParameterError, match="feature_names has 2 names"):
        permutation_importances(hgb, X, y, feature_names=["a", "b"], rng=rng)


# --- the page --------------------------------------------------------------------------------


class _StrictPage(HTMLParser):
    """Collects images and text and checks that every element is closed in order."""

    VOID = frozenset({"meta", "img", "br", "hr", "link", "input"})

    def __init__(self) -> None:
        super().__init__()
        self.stack: list[str] = []
        self.images: list[dict[str, str]] = []
        self.text: list[str] = []
        self.headings: list[str] = []
        self._in_heading = False

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.images.append(dict(attrs))
        if tag not in self.VOID:
            self.stack.append(tag)
        self._in_heading = tag in {"h1", "h2"}

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            raise AssertionError(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
        self.stack.pop()
        self._in_heading = False

    def handle_data(self, data):
        self.text.append(data)
        if self._in_heading:
            self.headings.append(data)


def _parse(path) -> _StrictPage:
    page = _StrictPage()
    page.feed(path.read_text(encoding="utf-8"))
    page.close()
    assert page.stack == [], f"unclosed elements: {page.stack}"
    return page


def test_write_report_embeds_every_figure_and_round_trips_the_metrics(tmp_path, sample):
    y_true, proba, snr, cadence = sample
    m = evaluate(y_true, proba, SIX, snr=snr, cadence_min=cadence)
    baseline = evaluate(y_true, None, SIX, y_pred=np.full(len(y_true), "planet"))
    figures = {"confusion": plot_confusion_matrix(m), "reliability": plot_reliability(m),
               "recall_snr": plot_recall_vs_snr(m)}
    comparison = compare({"model": m, "baseline": baseline})
    path = write_report(tmp_path / "report", title="Model <default> & friends", metrics=m,
                        figures=figures, comparison=comparison)
    assert path == tmp_path / "report" / "report.html"

    page = _parse(path)
    assert len(page.images) == len(figures)
    for name, img in zip(figures, page.images, strict=True):
        prefix = "data:image/png;base64,"
        assert img["src"].startswith(prefix) and img["alt"] == name
        embedded = base64.b64decode(img["src"][len(prefix):], validate=True)
        assert embedded[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec, ISO 15948)
        assert embedded == (tmp_path / "report" / f"{name}.png").read_bytes()
    text = " ".join(page.text)
    assert "scores are triage, not discovery; follow-up needed" in text.lower()
    assert CAUTION in text
    assert "Model <default> & friends" in page.headings  # escaped, then parsed back
    assert "Side-by-side comparison" in page.headings
    assert any(h.startswith("By SNR") for h in page.headings)
    assert f"{m['macro_f1']:.3f}" in text
    # json round trips (reference: the json module)
    assert json.loads((tmp_path / "report" / "metrics.json").read_text()) == m
    assert json.loads((tmp_path / "report" / "comparison.json").read_text()) == comparison


def test_write_report_without_comparison_and_with_own_tables(tmp_path):
    m = evaluate(["planet", "exocomet"], None, CLASSES, y_pred=["planet", "planet"])
    table = Table("Training data", ("class", "events"), (("planet", 1200), ("exocomet", None)))
    path = write_report(tmp_path, title="Baseline", metrics=m, figures={}, tables=[table])
    page = _parse(path)
    assert page.images == []
    assert page.headings[1:] == ["Training data"]
    assert "Side-by-side comparison" not in page.headings
    assert not (tmp_path / "comparison.json").exists()


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"figures": {"../evil": None}}, "figure name"),
        ({"figures": {"with space": None}}, "figure name"),
        ({"metrics": {"ece": math.nan}}, "not strict JSON"),
    ],
)
def test_write_report_refuses_bad_input(tmp_path, kwargs, match):
    args = {"title": "t", "metrics": {"ece": None}, "figures": {}, "tables": [], **kwargs}
    with pytest.raises(ParameterError, match=match):
        write_report(tmp_path / "out", **args)
    assert not (tmp_path / "out").exists()
