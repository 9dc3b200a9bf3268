"""The evaluation report: metrics, calibration, figures and one self-contained HTML page.

:func:`evaluate` turns true labels and predicted probabilities (or hard labels, for a baseline)
into a JSON-serialisable dict: per-class precision, recall, F1 and support, macro-F1, accuracy,
the confusion matrix, the top-label expected calibration error and its reliability curve, and
all of these again per SNR bin and per cadence. :func:`compare` puts several evaluations side by
side. The ``plot_*`` functions draw matplotlib figures (Agg canvas, no pyplot state) and
:func:`write_report` writes ``metrics.json``, the PNGs and ``report.html`` with the PNGs embedded.

Every value in an evaluation is a plain ``int``, ``float``, ``str``, ``list``, ``dict`` or
``None``; an undefined quantity (precision of a class never predicted, the ECE of hard labels,
anything in an empty bin) is ``None``, never NaN, so the dict is strict JSON.
"""

from __future__ import annotations

import base64
import html
import io
import itertools
import json
import logging
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from features.errors import ParameterError

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = [
    "CAUTION",
    "DEFAULT_SNR_BINS",
    "N_CALIBRATION_BINS",
    "Table",
    "compare",
    "comparison_table",
    "evaluate",
    "metrics_tables",
    "permutation_importances",
    "plot_confusion_matrix",
    "plot_permutation_importance",
    "plot_recall_vs_snr",
    "plot_reliability",
    "write_report",
]

_log = logging.getLogger(__name__)

DEFAULT_SNR_BINS: tuple[float, ...] = (0.0, 10.0, 15.0, 30.0, 100.0, math.inf)
"""Edges of the SNR bins, each bin ``[lower, upper)``."""

N_CALIBRATION_BINS = 15
"""Equal-width confidence bins of the expected calibration error (Guo et al. 2017)."""

CAUTION = (
    "Scores are triage, not discovery; follow-up needed (pixel-level and centroid checks, "
    "spectroscopy) before any planet or exocomet claim. The model was trained on simulations "
    "whose assumptions are listed in its model card."
)
"""The caution shown at the top of every report."""

_FIGURE_NAME = re.compile(r"[A-Za-z0-9_-]{1,64}")
_PROBA_SUM_TOL = 1e-6

Cell = str | int | float | None


@dataclass(frozen=True, slots=True)
class Table:
    """A titled table of cells for the HTML report.

    Attributes
    ----------
    title : str
        Heading shown above the table.
    columns : tuple of str
        Column headings.
    rows : tuple of tuples
        Cells (str, int, float or None); floats are shown with three decimals, None as a dash.
    """

    title: str
    columns: tuple[str, ...]
    rows: tuple[tuple[Cell, ...], ...]


# --- metrics ---------------------------------------------------------------------------------


def evaluate(
    y_true: Sequence[str] | np.ndarray,
    proba: np.ndarray | None,
    classes: Sequence[str],
    *,
    y_pred: Sequence[str] | np.ndarray | None = None,
    snr: np.ndarray | None = None,
    cadence_min: np.ndarray | None = None,
    snr_bins: Sequence[float] = DEFAULT_SNR_BINS,
    n_calibration_bins: int = N_CALIBRATION_BINS,
) -> dict[str, Any]:
    """Classification and calibration metrics, overall and by SNR bin and cadence.

    Parameters
    ----------
    y_true : array_like of str, shape (n,)
        True labels, each one of ``classes``.
    proba : ndarray of shape (n, len(classes)) or None
        Predicted probabilities, columns in ``classes`` order, rows summing to 1. The
        prediction is ``classes[argmax]`` (first class on ties). None for a hard-label
        classifier: then give ``y_pred``; its ECE and reliability curve are None.
    classes : sequence of str
        Label order of the columns, of the confusion matrix and of ``per_class``.
    y_pred : array_like of str, shape (n,), optional
        Hard predictions; only when ``proba`` is None.
    snr : ndarray of shape (n,), optional
        Detection SNR of each sample; metrics are then also given per bin of ``snr_bins``.
        NaN or out-of-range values fall in no bin (counted in ``n_outside``).
    cadence_min : ndarray of shape (n,), optional
        Cadence of each sample [min]; metrics are then also given per distinct value.
    snr_bins : sequence of float
        Increasing bin edges, bins ``[lower, upper)``; default ``(0, 10, 15, 30, 100, inf)``.
    n_calibration_bins : int
        Equal-width confidence bins of the ECE; default 15.

    Returns
    -------
    dict
        ``classes``, ``n_samples``, ``accuracy``, ``macro_f1``, ``per_class`` ({label:
        {precision, recall, f1, support}}), ``confusion_matrix`` (rows true, columns predicted),
        ``ece``, ``reliability`` (list of {lower, upper, count, mean_confidence, accuracy}),
        ``by_snr`` and ``by_cadence`` (None when the array is not given; else ``bins``: a list
        of {..., n_samples, metrics}, metrics None for an empty bin, and ``n_outside``).

    Raises
    ------
    ParameterError
        ``unknown_class`` for a label outside ``classes``; ``invalid_parameter`` for
        inconsistent shapes, probabilities that are not a distribution, or bad bins.

    Notes
    -----
    Precision, recall and F1 per class follow the usual definitions, with
    F1 = 2 TP / (2 TP + FP + FN); a ratio with a zero denominator is None. Macro-F1 is the mean
    of the defined per-class F1 values. The top-label expected calibration error of
    Naeini, Cooper & Hauskrecht (2015) in the form of Guo, Pleiss, Sun & Weinberger (2017, §2) is

    .. math:: \\mathrm{ECE} = \\sum_{m=1}^{M} \\frac{|B_m|}{n}
              \\left| \\mathrm{acc}(B_m) - \\mathrm{conf}(B_m) \\right|

    where :math:`B_m` holds the samples whose top probability lies in
    :math:`((m-1)/M, m/M]` (the first bin also takes 0), acc is the fraction of them predicted
    correctly and conf their mean top probability.

    Examples
    --------
    >>> import numpy as np
    >>> m = evaluate(["a", "b"], np.array([[0.9, 0.1], [0.4, 0.6]]), ["a", "b"])
    >>> m["accuracy"], round(m["ece"], 3)
    (1.0, 0.25)
    """
    class_list = _check_classes(classes)
    true_idx = _label_indices(y_true, class_list, what="y_true")
    n = true_idx.size
    if proba is None and y_pred is None:
        raise ParameterError("invalid_parameter", "give proba or y_pred")
    if proba is not None and y_pred is not None:
        raise ParameterError("invalid_parameter", "give proba or y_pred, not both")
    if proba is not None:
        values = _check_proba(proba, n=n, k=len(class_list))
        pred_idx = np.argmax(values, axis=1)
        confidence = values[np.arange(n), pred_idx]
    else:
        pred_idx = _label_indices(y_pred, class_list, what="y_pred")
        if pred_idx.size != n:
            raise ParameterError(
                "invalid_parameter", f"y_pred has {pred_idx.size} labels, y_true {n}"
            )
        confidence = None
    if not isinstance(n_calibration_bins, int) or n_calibration_bins < 1:
        raise ParameterError("invalid_parameter", "n_calibration_bins must be a positive int")

    def core(mask: np.ndarray) -> dict[str, Any]:
        return _core_metrics(
            true_idx[mask], pred_idx[mask],
            None if confidence is None else confidence[mask],
            class_list=class_list, n_bins=n_calibration_bins,
        )

    result = {"classes": list(class_list), **core(np.ones(n, dtype=bool))}
    result["n_calibration_bins"] = n_calibration_bins
    result["by_snr"] = None if snr is None else _by_snr(snr, n, snr_bins, core)
    result["by_cadence"] = None if cadence_min is None else _by_cadence(cadence_min, n, core)
    return result


def compare(models: Mapping[str, Mapping[str, Any]]) -> dict[str, Any]:
    """Put several evaluations side by side.

    Parameters
    ----------
    models : Mapping of str to dict
        Model name -> the dict :func:`evaluate` returned for it (e.g. the gradient-boosted
        model and a hard-label baseline), in display order.

    Returns
    -------
    dict
        ``classes`` (every class of any model, in order of first appearance) and ``models``:
        a list of {name, n_samples, accuracy, macro_f1, ece, f1: {label: value}}; a class a
        model does not know, or an ECE of hard labels, is None.

    Raises
    ------
    ParameterError
        ``invalid_parameter`` when ``models`` is empty or an entry is not an evaluation.
    """
    if not models:
        raise ParameterError("invalid_parameter", "compare needs at least one evaluation")
    classes: list[str] = []
    rows = []
    for name, metrics in models.items():
        missing = {"classes", "accuracy", "macro_f1", "ece", "per_class"} - set(metrics)
        if missing:
            raise ParameterError(
                "invalid_parameter", f"{name!r} is not an evaluation: missing {sorted(missing)}"
            )
        classes.extend(c for c in metrics["classes"] if c not in classes)
        rows.append((name, metrics))
    return {
        "classes": classes,
        "models": [
            {
                "name": str(name),
                "n_samples": m.get("n_samples"),
                "accuracy": m["accuracy"],
                "macro_f1": m["macro_f1"],
                "ece": m["ece"],
                "f1": {c: m["per_class"].get(c, {}).get("f1") for c in classes},
            }
            for name, m in rows
        ],
    }


# --- figures ---------------------------------------------------------------------------------


def plot_confusion_matrix(metrics: Mapping[str, Any]) -> Figure:
    """Confusion matrix, each row normalised by its support; cells annotated with counts.

    Parameters
    ----------
    metrics : dict
        An evaluation from :func:`evaluate`.

    Returns
    -------
    matplotlib.figure.Figure
    """
    counts = np.asarray(metrics["confusion_matrix"], dtype=float)
    classes = list(metrics["classes"])
    support = counts.sum(axis=1, keepdims=True)
    rates = np.divide(counts, support, out=np.zeros_like(counts), where=support > 0)
    fig, ax = _figure(figsize=(1.2 * len(classes) + 2.5, 1.0 * len(classes) + 2.0))
    image = ax.imshow(rates, vmin=0.0, vmax=1.0, cmap="Blues")
    fig.colorbar(image, ax=ax, label="fraction of the true class")
    ax.set_xticks(range(len(classes)), classes, rotation=35, ha="right")
    ax.set_yticks(range(len(classes)), classes)
    ax.set_xlabel("predicted")
    ax.set_ylabel("true")
    for (i, j), value in np.ndenumerate(counts):
        ax.text(j, i, f"{int(value)}", ha="center", va="center",
                color="white" if rates[i, j] > 0.5 else "black", fontsize=8)
    ax.set_title("Confusion matrix (rows normalised)")
    return fig


def plot_reliability(metrics: Mapping[str, Any]) -> Figure:
    """Reliability diagram: accuracy against mean confidence per bin, with the bin counts.

    Parameters
    ----------
    metrics : dict
        An evaluation from :func:`evaluate` of probabilistic predictions.

    Returns
    -------
    matplotlib.figure.Figure
        Top axes: one bar per non-empty bin at its mean confidence, height its accuracy, and
        the diagonal of perfect calibration. Bottom axes: samples per bin.

    Raises
    ------
    ParameterError
        ``invalid_parameter`` for an evaluation of hard labels (no reliability curve).
    """
    bins = metrics.get("reliability")
    if bins is None:
        raise ParameterError(
            "invalid_parameter", "this evaluation has no probabilities, so no reliability curve"
        )
    filled = [b for b in bins if b["count"] > 0]
    width = 1.0 / len(bins)
    fig, (ax, ax_count) = _figure(nrows=2, figsize=(5.5, 6.0), height_ratios=(3, 1),
                                  sharex=True)
    ax.plot([0, 1], [0, 1], ls="--", color="grey", label="perfect calibration")
    ax.bar([b["mean_confidence"] for b in filled], [b["accuracy"] for b in filled],
           width=width * 0.9, color="tab:blue", edgecolor="black", label="accuracy")
    ax.set_ylabel("accuracy")
    ax.set_ylim(0, 1)
    ece = metrics.get("ece")
    ax.set_title("Reliability" + ("" if ece is None else f" (ECE = {ece:.3f})"))
    ax.legend(loc="upper left")
    ax_count.bar([(b["lower"] + b["upper"]) / 2 for b in bins], [b["count"] for b in bins],
                 width=width * 0.9, color="tab:grey")
    ax_count.set_xlabel("confidence (top probability)")
    ax_count.set_ylabel("samples")
    ax_count.set_xlim(0, 1)
    return fig


def plot_recall_vs_snr(metrics: Mapping[str, Any]) -> Figure:
    """Recall of each class in each SNR bin (gaps where a bin has no sample of the class).

    Parameters
    ----------
    metrics : dict
        An evaluation from :func:`evaluate` with ``snr`` given.

    Returns
    -------
    matplotlib.figure.Figure
        One line per class, x the bin index labelled with its SNR range.

    Raises
    ------
    ParameterError
        ``invalid_parameter`` when the evaluation has no SNR bins.
    """
    by_snr = metrics.get("by_snr")
    if by_snr is None:
        raise ParameterError("invalid_parameter", "this evaluation was made without snr")
    bins = by_snr["bins"]
    fig, ax = _figure(figsize=(6.5, 4.0))
    x = np.arange(len(bins))
    for label in metrics["classes"]:
        recall = [
            np.nan if b["metrics"] is None or b["metrics"]["per_class"][label]["recall"] is None
            else b["metrics"]["per_class"][label]["recall"]
            for b in bins
        ]
        ax.plot(x, recall, marker="o", label=label)
    ax.set_xticks(x, [f"{b['label']}\n(n={b['n_samples']})" for b in bins])
    ax.set_xlabel("detection SNR")
    ax.set_ylabel("recall")
    ax.set_ylim(-0.02, 1.02)
    ax.legend(fontsize=8)
    ax.set_title("Recall against SNR")
    return fig


def permutation_importances(
    estimator: Any,
    X: np.ndarray,
    y: Sequence[str] | np.ndarray,
    *,
    feature_names: Sequence[str],
    rng: np.random.Generator,
    n_repeats: int = 5,
    top: int = 20,
    scoring: str | None = None,
) -> list[dict[str, Any]]:
    """The most important features by permutation (Breiman 2001; scikit-learn's implementation).

    Parameters
    ----------
    estimator : object
        Fitted classifier.
    X : ndarray of shape (n, n_features)
        Held-out features.
    y : array_like of shape (n,)
        Their true labels.
    feature_names : sequence of str
        Name of each column of X.
    rng : numpy.random.Generator
        Source of the permutations' seed.
    n_repeats : int
        Permutations per feature; default 5.
    top : int
        How many features to return; default 20.
    scoring : str, optional
        scikit-learn scorer name; default the estimator's ``score`` (accuracy).

    Returns
    -------
    list of dict
        {feature, mean, std} of the score drop, largest mean first, at most ``top`` entries.

    Raises
    ------
    ParameterError
        ``invalid_parameter`` when ``feature_names`` does not match the columns of X.
    """
    from sklearn.inspection import permutation_importance

    values = np.asarray(X, dtype=np.float64)
    if values.ndim != 2 or values.shape[1] != len(feature_names):
        raise ParameterError(
            "invalid_parameter",
            f"X has shape {values.shape}; feature_names has {len(feature_names)} names",
        )
    if top < 1 or n_repeats < 1:
        raise ParameterError("invalid_parameter", "top and n_repeats must be >= 1")
    seed = int(rng.integers(0, 2**31 - 1))
    result = permutation_importance(estimator, values, np.asarray(y), scoring=scoring,
                                    n_repeats=n_repeats, random_state=seed, n_jobs=1)
    order = np.argsort(-result.importances_mean, kind="stable")[:top]
    return [
        {"feature": str(feature_names[i]), "mean": float(result.importances_mean[i]),
         "std": float(result.importances_std[i])}
        for i in order
    ]


def plot_permutation_importance(importances: Sequence[Mapping[str, Any]]) -> Figure:
    """Horizontal bars of permutation importance (mean drop, one standard deviation).

    Parameters
    ----------
    importances : sequence of dict
        The output of :func:`permutation_importances`, most important first.

    Returns
    -------
    matplotlib.figure.Figure
    """
    names = [d["feature"] for d in importances][::-1]
    means = [d["mean"] for d in importances][::-1]
    stds = [d["std"] for d in importances][::-1]
    fig, ax = _figure(figsize=(6.5, 0.3 * len(names) + 1.5))
    ax.barh(np.arange(len(names)), means, xerr=stds, color="tab:green", capsize=2)
    ax.set_yticks(np.arange(len(names)), names, fontsize=8)
    ax.axvline(0.0, color="black", lw=0.8)
    ax.set_xlabel("score drop when the feature is permuted")
    ax.set_title(f"Permutation importance (top {len(names)})")
    return fig


# --- tables and the HTML page ----------------------------------------------------------------


def metrics_tables(metrics: Mapping[str, Any]) -> tuple[Table, ...]:
    """The standard tables of one evaluation: summary, per class, confusion, by SNR, by cadence.

    Parameters
    ----------
    metrics : dict
        An evaluation from :func:`evaluate`.

    Returns
    -------
    tuple of Table
    """
    classes = list(metrics["classes"])
    tables = [
        Table("Summary", ("samples", "accuracy", "macro-F1", "ECE"),
              ((metrics["n_samples"], metrics["accuracy"], metrics["macro_f1"],
                metrics["ece"]),)),
        Table("Per class", ("class", "precision", "recall", "F1", "support"),
              tuple((c, m["precision"], m["recall"], m["f1"], m["support"])
                    for c, m in ((c, metrics["per_class"][c]) for c in classes))),
        Table("Confusion matrix (rows true, columns predicted)", ("true \\ predicted", *classes),
              tuple((c, *row) for c, row in zip(classes, metrics["confusion_matrix"],
                                                strict=True))),
    ]
    for key, title, head in (("by_snr", "By SNR", "SNR"),
                             ("by_cadence", "By cadence", "cadence [min]")):
        grouped = metrics.get(key)
        if grouped is None:
            continue
        columns = (head, "samples", "accuracy", "macro-F1", "ECE",
                   *(f"recall {c}" for c in classes))
        rows = []
        for b in grouped["bins"]:
            m = b["metrics"]
            if m is None:
                rows.append((b["label"], 0, *([None] * (3 + len(classes)))))
            else:
                rows.append((b["label"], b["n_samples"], m["accuracy"], m["macro_f1"], m["ece"],
                             *(m["per_class"][c]["recall"] for c in classes)))
        tables.append(Table(f"{title} ({grouped['n_outside']} samples in no bin)", columns,
                            tuple(rows)))
    return tuple(tables)


def comparison_table(comparison: Mapping[str, Any]) -> Table:
    """The side-by-side table of a :func:`compare` result."""
    classes = list(comparison["classes"])
    return Table(
        "Side-by-side comparison",
        ("model", "samples", "accuracy", "macro-F1", "ECE", *(f"F1 {c}" for c in classes)),
        tuple((m["name"], m["n_samples"], m["accuracy"], m["macro_f1"], m["ece"],
               *(m["f1"][c] for c in classes)) for m in comparison["models"]),
    )


def write_report(
    out_dir: Path,
    *,
    title: str,
    metrics: Mapping[str, Any],
    figures: Mapping[str, Figure],
    tables: Sequence[Table] | None = None,
    comparison: Mapping[str, Any] | None = None,
    dpi: int = 110,
) -> Path:
    """Write ``metrics.json``, one PNG per figure and a self-contained ``report.html``.

    Parameters
    ----------
    out_dir : Path
        Output folder (created if absent); existing files of the same names are replaced.
    title : str
        Heading of the page.
    metrics : dict
        Strict-JSON metrics (usually from :func:`evaluate`), written as ``metrics.json``.
    figures : Mapping of str to Figure
        File stem ([A-Za-z0-9_-]) -> figure; written as ``<stem>.png`` and embedded in the
        page as base64 data URIs.
    tables : sequence of Table, optional
        Tables to show; default :func:`metrics_tables` of ``metrics``.
    comparison : dict, optional
        A :func:`compare` result, written as ``comparison.json`` and shown side by side.
    dpi : int
        Resolution of the PNGs.

    Returns
    -------
    Path
        The written ``report.html``.

    Raises
    ------
    ParameterError
        ``invalid_parameter`` for a bad figure name or metrics that are not strict JSON.
    """
    out_dir = Path(out_dir)
    for name in figures:
        if not isinstance(name, str) or not _FIGURE_NAME.fullmatch(name):
            raise ParameterError(
                "invalid_parameter", f"figure name {name!r}: use 1-64 of [A-Za-z0-9_-]"
            )
    metrics_text = _strict_json_text(metrics, what="metrics")
    comparison_text = None if comparison is None else _strict_json_text(
        comparison, what="comparison")
    shown = tuple(metrics_tables(metrics) if tables is None else tables)
    if comparison is not None:
        shown = (comparison_table(comparison), *shown)

    out_dir.mkdir(parents=True, exist_ok=True)
    (out_dir / "metrics.json").write_text(metrics_text, encoding="utf-8")
    if comparison_text is not None:
        (out_dir / "comparison.json").write_text(comparison_text, encoding="utf-8")
    pngs = {}
    for name, fig in figures.items():
        buffer = io.BytesIO()
        fig.savefig(buffer, format="png", dpi=dpi, bbox_inches="tight")
        pngs[name] = buffer.getvalue()
        (out_dir / f"{name}.png").write_bytes(pngs[name])
    path = out_dir / "report.html"
    path.write_text(_html_page(title, shown, pngs), encoding="utf-8")
    _log.info("wrote report %s (%d figures, %d tables)", path, len(pngs), len(shown))
    return path


# --- private helpers -------------------------------------------------------------------------


def _check_classes(classes: Sequence[str]) -> tuple[str, ...]:
    if isinstance(classes, str) or not classes or not all(
        isinstance(c, str) and c for c in classes
    ):
        raise ParameterError("invalid_parameter", "classes must be a non-empty list of labels")
    out = tuple(classes)
    if len(set(out)) != len(out):
        raise ParameterError("invalid_parameter", f"classes has duplicates: {list(out)}")
    return out


def _label_indices(labels: Any, classes: tuple[str, ...], *, what: str) -> np.ndarray:
    values = np.asarray(labels)
    if values.ndim != 1:
        raise ParameterError("invalid_parameter", f"{what} must be 1-D; got {values.shape}")
    uniques, inverse = np.unique(values.astype(str), return_inverse=True)
    lookup = {c: i for i, c in enumerate(classes)}
    unknown = [str(u) for u in uniques if str(u) not in lookup]
    if unknown:
        raise ParameterError(
            "unknown_class", f"{what} has labels not in classes {list(classes)}: {unknown}"
        )
    return np.array([lookup[str(u)] for u in uniques], dtype=np.intp)[inverse]


def _check_proba(proba: Any, *, n: int, k: int) -> np.ndarray:
    try:
        values = np.asarray(proba, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ParameterError("invalid_parameter", f"proba is not numeric: {exc}") from exc
    if values.shape != (n, k):
        raise ParameterError(
            "invalid_parameter", f"proba has shape {values.shape}; expected ({n}, {k})"
        )
    if not np.all(np.isfinite(values)) or np.any(values < 0.0) or np.any(values > 1.0):
        raise ParameterError("invalid_parameter", "proba must be finite and within [0, 1]")
    worst = float(np.max(np.abs(values.sum(axis=1) - 1.0))) if n else 0.0
    if worst > _PROBA_SUM_TOL:
        raise ParameterError(
            "invalid_parameter", f"proba rows must sum to 1 (worst row is off by {worst:.2g})"
        )
    return values


def _ratio(num: float, den: float) -> float | None:
    return float(num / den) if den > 0 else None


def _core_metrics(
    true_idx: np.ndarray,
    pred_idx: np.ndarray,
    confidence: np.ndarray | None,
    *,
    class_list: tuple[str, ...],
    n_bins: int,
) -> dict[str, Any]:
    k = len(class_list)
    n = int(true_idx.size)
    cm = np.zeros((k, k), dtype=np.int64)
    np.add.at(cm, (true_idx, pred_idx), 1)
    tp = np.diag(cm)
    support = cm.sum(axis=1)
    predicted = cm.sum(axis=0)
    per_class = {}
    f1_values = []
    for i, label in enumerate(class_list):
        f1 = _ratio(2 * tp[i], predicted[i] + support[i])
        per_class[label] = {
            "precision": _ratio(tp[i], predicted[i]),
            "recall": _ratio(tp[i], support[i]),
            "f1": f1,
            "support": int(support[i]),
        }
        if f1 is not None:
            f1_values.append(f1)
    if confidence is None:
        ece, reliability = None, None
    else:
        ece, reliability = _calibration(confidence, true_idx == pred_idx, n_bins=n_bins)
    return {
        "n_samples": n,
        "accuracy": _ratio(int(tp.sum()), n),
        "macro_f1": float(np.mean(f1_values)) if f1_values else None,
        "per_class": per_class,
        "confusion_matrix": cm.tolist(),
        "ece": ece,
        "reliability": reliability,
    }


def _calibration(
    confidence: np.ndarray, correct: np.ndarray, *, n_bins: int
) -> tuple[float | None, list[dict[str, Any]]]:
    """Top-label ECE and reliability points over equal-width bins ((m-1)/M, m/M]."""
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    bin_idx = np.searchsorted(edges[1:-1], confidence, side="left")
    counts = np.bincount(bin_idx, minlength=n_bins)
    conf_sum = np.bincount(bin_idx, weights=confidence, minlength=n_bins)
    correct_sum = np.bincount(bin_idx, weights=correct.astype(float), minlength=n_bins)
    n = int(confidence.size)
    points = []
    ece = 0.0
    for m in range(n_bins):
        mean_conf = _ratio(conf_sum[m], counts[m])
        acc = _ratio(correct_sum[m], counts[m])
        if mean_conf is not None and acc is not None:
            ece += counts[m] / n * abs(acc - mean_conf)
        points.append({"lower": float(edges[m]), "upper": float(edges[m + 1]),
                       "count": int(counts[m]), "mean_confidence": mean_conf, "accuracy": acc})
    return (float(ece) if n else None), points


def _sample_array(values: Any, n: int, *, what: str) -> np.ndarray:
    try:
        array = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ParameterError("invalid_parameter", f"{what} is not numeric: {exc}") from exc
    if array.shape != (n,):
        raise ParameterError(
            "invalid_parameter", f"{what} has shape {array.shape}; expected ({n},)"
        )
    return array


def _finite_or_none(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _by_snr(snr: Any, n: int, snr_bins: Sequence[float], core) -> dict[str, Any]:
    values = _sample_array(snr, n, what="snr")
    edges = np.asarray(snr_bins, dtype=np.float64)
    if edges.ndim != 1 or edges.size < 2 or np.any(np.isnan(edges)) or np.any(
        np.diff(edges) <= 0
    ):
        raise ParameterError(
            "invalid_parameter", f"snr_bins must be >= 2 increasing edges; got {list(snr_bins)}"
        )
    bins = []
    covered = np.zeros(n, dtype=bool)
    for lower, upper in itertools.pairwise(edges):
        mask = (values >= lower) & (values < upper)
        covered |= mask
        bins.append({
            "label": f"{lower:g}-{upper:g}",
            "lower": _finite_or_none(lower),
            "upper": _finite_or_none(upper),
            "n_samples": int(mask.sum()),
            "metrics": core(mask) if mask.any() else None,
        })
    return {"bins": bins, "n_outside": int((~covered).sum())}


def _by_cadence(cadence_min: Any, n: int, core) -> dict[str, Any]:
    # measured cadences (median time steps) differ in the last digits: group to 0.1 min
    values = np.round(_sample_array(cadence_min, n, what="cadence_min"), 1)
    finite = np.isfinite(values)
    bins = []
    for value in np.unique(values[finite]):
        mask = values == value
        bins.append({"label": f"{value:g}", "cadence_min": float(value),
                     "n_samples": int(mask.sum()), "metrics": core(mask)})
    return {"bins": bins, "n_outside": int((~finite).sum())}


def _strict_json_text(value: Mapping[str, Any], *, what: str) -> str:
    try:
        return json.dumps(value, indent=2, allow_nan=False) + "\n"
    except (TypeError, ValueError) as exc:
        raise ParameterError(
            "invalid_parameter", f"{what} is not strict JSON (use None, not NaN): {exc}"
        ) from exc


def _figure(*, nrows: int = 1, figsize: tuple[float, float], height_ratios=None,
            sharex: bool = False):
    """A figure on its own Agg canvas (no pyplot, no global backend state)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, layout="constrained")
    FigureCanvasAgg(fig)
    gridspec = None if height_ratios is None else {"height_ratios": height_ratios}
    axes = fig.subplots(nrows=nrows, sharex=sharex, gridspec_kw=gridspec)
    return fig, axes


def _cell(value: Cell) -> str:
    if value is None:
        return "&mdash;"
    if isinstance(value, bool):
        return html.escape(str(value))
    if isinstance(value, float):
        return f"{value:.3f}" if math.isfinite(value) else html.escape(str(value))
    return html.escape(str(value))


def _html_table(table: Table) -> str:
    head = "".join(f"<th>{html.escape(c)}</th>" for c in table.columns)
    body = "".join(
        "<tr>" + "".join(f"<td>{_cell(v)}</td>" for v in row) + "</tr>" for row in table.rows
    )
    return (f"<section>\n<h2>{html.escape(table.title)}</h2>\n<table>\n"
            f"<thead><tr>{head}</tr></thead>\n<tbody>{body}</tbody>\n</table>\n</section>\n")


_STYLE = """
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 72em; color: #222; }
.caution { background: #fff4d6; border-left: 4px solid #e0a800; padding: 0.6em 1em; }
table { border-collapse: collapse; margin: 0.5em 0 1.5em; font-size: 0.9em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: right; }
th:first-child, td:first-child { text-align: left; }
figure { display: inline-block; margin: 0 1em 1em 0; }
img { max-width: 100%; }
"""


def _html_page(title: str, tables: Sequence[Table], pngs: Mapping[str, bytes]) -> str:
    figures = "".join(
        f'<figure><img src="data:image/png;base64,{base64.b64encode(data).decode("ascii")}" '
        f'alt="{html.escape(name)}"><figcaption>{html.escape(name)}</figcaption></figure>\n'
        for name, data in pngs.items()
    )
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        f"<title>{html.escape(title)}</title>\n<style>{_STYLE}</style>\n</head>\n<body>\n"
        f"<header>\n<h1>{html.escape(title)}</h1>\n"
        f"<p class=\"caution\"><strong>Caution.</strong> {html.escape(CAUTION)}</p>\n"
        "</header>\n"
        + "".join(_html_table(t) for t in tables)
        + (f"<section>\n<h2>Figures</h2>\n{figures}</section>\n" if pngs else "")
        + "</body>\n</html>\n"
    )
