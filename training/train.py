"""Fitting, calibrating, evaluating and registering the classifier, in small steps.

:func:`split` (stratified train / calibration / test) -> :func:`fit` (a
``HistGradientBoostingClassifier``) -> :func:`calibrate` (``CalibratedClassifierCV`` on the
frozen model) -> :func:`evaluate_model` (:func:`training.report.evaluate`), chained with the
report, the out-of-distribution reference and the registry by :func:`train_and_save`.
:func:`ood_reference` and :func:`ood_score` are the out-of-distribution check: per-feature
quantiles of the training set, and how many features of a new segment fall outside them.

Feature matrices are plain float64 arrays in :data:`features.catalog.FEATURE_NAMES` order
(:func:`training.dataset.feature_matrix`), NaN where a feature is not measurable; the
gradient-boosted trees route NaN natively.
"""

from __future__ import annotations

import json
import logging
import tempfile
import time
from collections import Counter
from collections.abc import Mapping, Sequence
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np
import pandas as pd

from features.catalog import FEATURE_NAMES, FEATURE_VERSION
from features.errors import ParameterError
from training import report
from training.baseline import predict_baseline
from training.classes import CLASSES
from training.dataset import class_order, feature_matrix
from training.priors import PRIORS
from training.registry import ModelCard, save_model

__all__ = [
    "DEFAULT_FRACTIONS",
    "DEFAULT_PARAMS",
    "MAX_MODEL_BYTES",
    "OOD_FILE",
    "OOD_QUANTILES",
    "OOD_RARE_NAN_FRACTION",
    "ORIGIN_COLUMN",
    "calibrate",
    "evaluate_baseline",
    "evaluate_model",
    "fit",
    "ood_reference",
    "ood_score",
    "ordered_proba",
    "split",
    "train_and_save",
]

logger = logging.getLogger(__name__)

ORIGIN_COLUMN = "origin"
"""Optional table column naming where each row came from (e.g. ``"group"``, ``"simulated"``);
when the test split mixes origins, the card and the report also evaluate each one apart."""

DEFAULT_PARAMS: Mapping[str, Any] = MappingProxyType({
    # scikit-learn's default step; early stopping picks the number of rounds
    "learning_rate": 0.1,
    # upper bound on boosting rounds. One round is one tree per class; model.skops takes
    # about 11.4 kB per tree with 15 leaves (measured, skops 0.16: the calibrated model refers
    # to the frozen model twice and skops writes it twice), so five classes stay below
    # 120 x 5 x 11.4 kB = 6.8 MB even if early stopping never triggers
    "max_iter": 120,
    # small trees: a few hundred to a few ten thousand rows of ~80 features
    "max_leaf_nodes": 15,
    "min_samples_leaf": 20,
    # mild shrinkage of leaf values, against over-confident leaves on small classes
    "l2_regularization": 1.0,
    # stop when the loss on an internal, stratified 15 % of the training rows has not improved
    # for 15 rounds (set explicitly: scikit-learn only stops by default above 10,000 rows)
    "early_stopping": True,
    "validation_fraction": 0.15,
    "n_iter_no_change": 15,
    # every class weighs the same in the loss, whatever its count (labelled sets are uneven).
    # Cost: with sample weights scikit-learn 1.9 computes weighted bin edges one percentile at
    # a time: 60 rounds on 900 rows of 73 features took 5.4 s instead of 1.4 s on one core
    # (measured); the extra is paid once per fit, whatever the number of rounds
    "class_weight": "balanced",
})
"""The hyper-parameters of :func:`fit` (any other ``HistGradientBoostingClassifier`` argument
can be added; ``random_state`` comes from ``seed``)."""

DEFAULT_FRACTIONS: tuple[float, float, float] = (0.6, 0.2, 0.2)
"""Train, calibration and test shares of :func:`split`."""

MAX_MODEL_BYTES = 10_000_000
"""Above this size of ``model.skops`` :func:`train_and_save` warns (lower max_iter or
max_leaf_nodes)."""

OOD_FILE = "ood.json"
"""Name of the out-of-distribution reference in a version folder."""

OOD_QUANTILES: tuple[float, float] = (0.005, 0.995)
"""Quantiles of the training set outside which a feature value counts as out of distribution."""

OOD_RARE_NAN_FRACTION = 0.001
"""A missing value counts as out of distribution when fewer than this share of the training rows
had that feature missing (the rule of ``service.scoring``, which reads the same file)."""

_CALIBRATION_FOLDS = 5  # CalibratedClassifierCV's default cv: it wants this many per class
_IMPORTANCE_ROWS = 500
_IMPORTANCE_REPEATS = 5


# --------------------------------------------------------------------------------------------
# the steps


def split(
    table: pd.DataFrame,
    *,
    seed: int,
    fractions: Sequence[float] = DEFAULT_FRACTIONS,
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Split a feature table into train, calibration and test parts, stratified by label.

    Parameters
    ----------
    table : pandas.DataFrame
        A feature table (:mod:`training.dataset`) with a ``label`` column.
    seed : int
        Seed of the shuffles.
    fractions : three floats
        Shares of train, calibration and test, each > 0, summing to 1.

    Returns
    -------
    train, calibration, test : pandas.DataFrame
        Disjoint row subsets, each with every class in about the same proportion.

    Raises
    ------
    ParameterError
        ``invalid_parameter`` for bad fractions, or a class too rare to be in every part.
    """
    from sklearn.model_selection import train_test_split

    shares = tuple(float(f) for f in fractions)
    if len(shares) != 3 or min(shares) <= 0 or abs(sum(shares) - 1.0) > 1e-9:
        raise ParameterError("invalid_parameter",
                             f"fractions must be three shares > 0 summing to 1, got {fractions}")
    f_train, f_cal, _ = shares
    labels = table["label"].to_numpy(dtype=str)
    try:
        train, rest = train_test_split(table, train_size=f_train, stratify=labels,
                                       random_state=seed)
        cal, test = train_test_split(rest, train_size=f_cal / (1.0 - f_train),
                                     stratify=rest["label"].to_numpy(dtype=str),
                                     random_state=seed)
    except ValueError as exc:  # a class with too few rows for a stratified split
        counts = dict(Counter(labels))
        raise ParameterError("invalid_parameter",
                             f"cannot split {len(table)} rows by class {counts}: {exc}") from exc
    return train, cal, test


def fit(X: np.ndarray, y: Sequence[str], *, seed: int,
        params: Mapping[str, Any] = DEFAULT_PARAMS) -> Any:
    """Fit the gradient-boosted classifier.

    Parameters
    ----------
    X : ndarray of shape (n, n_features)
        Feature matrix; NaN = missing (routed natively by the trees).
    y : sequence of str, shape (n,)
        Labels.
    seed : int
        ``random_state`` (the early-stopping split).
    params : Mapping
        Hyper-parameters, laid over :data:`DEFAULT_PARAMS`.

    Returns
    -------
    sklearn.ensemble.HistGradientBoostingClassifier
        Fitted; ``n_iter_`` rounds were kept.

    Raises
    ------
    ParameterError
        ``invalid_parameter`` when X and y do not match or hold fewer than two classes.
    """
    from sklearn.ensemble import HistGradientBoostingClassifier

    values, labels = _check_xy(X, y)
    if len(set(labels)) < 2:
        raise ParameterError("invalid_parameter", "fit needs at least two classes")
    model = HistGradientBoostingClassifier(**{**DEFAULT_PARAMS, **params, "random_state": seed})
    return model.fit(values, labels)


def calibrate(model: Any, X_cal: np.ndarray, y_cal: Sequence[str], *,
              method: str = "isotonic") -> Any:
    """Calibrate a fitted classifier's probabilities on held-out rows.

    Parameters
    ----------
    model : fitted classifier
        From :func:`fit`; left unchanged (wrapped in ``sklearn.frozen.FrozenEstimator``).
    X_cal, y_cal : ndarray and sequence of str
        Calibration rows not used to fit ``model``; every class of the model, each at least
        5 times (``CalibratedClassifierCV``'s default 5-fold check).
    method : {"isotonic", "sigmoid"}
        Isotonic regression (Zadrozny & Elkan 2002) or Platt scaling, one-vs-rest per class,
        then normalised.

    Returns
    -------
    sklearn.calibration.CalibratedClassifierCV
        Holding the frozen model and one calibrator per class.

    Raises
    ------
    ParameterError
        ``invalid_parameter`` for another method or too few calibration rows of a class.
    """
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.frozen import FrozenEstimator

    if method not in ("isotonic", "sigmoid"):
        raise ParameterError("invalid_parameter",
                             f"method must be 'isotonic' or 'sigmoid', got {method!r}")
    values, labels = _check_xy(X_cal, y_cal)
    counts = Counter(labels)
    short = {str(c): counts.get(str(c), 0) for c in model.classes_
             if counts.get(str(c), 0) < _CALIBRATION_FOLDS}
    if short:
        raise ParameterError("invalid_parameter",
                             f"calibration needs >= {_CALIBRATION_FOLDS} rows of every class; "
                             f"too few of {short}")
    calibrated = CalibratedClassifierCV(FrozenEstimator(model), method=method)
    return calibrated.fit(values, labels)


def ordered_proba(model: Any, X: np.ndarray, classes: Sequence[str]) -> np.ndarray:
    """``model.predict_proba(X)`` with its columns in ``classes`` order."""
    fitted = [str(c) for c in model.classes_]
    missing = [c for c in classes if c not in fitted]
    if missing:
        raise ParameterError("class_mismatch", f"the model does not know the classes {missing}")
    proba = model.predict_proba(np.asarray(X, dtype=np.float64))
    return proba[:, [fitted.index(c) for c in classes]]


def evaluate_model(model: Any, table: pd.DataFrame, *, classes: Sequence[str]) -> dict[str, Any]:
    """:func:`training.report.evaluate` of a model on a feature table.

    The SNR bins use the measured detection SNR (column ``snr``), the cadences the measured
    ``cadence_min``, so simulated and real tables are binned alike.

    Parameters
    ----------
    model : fitted classifier
        With ``predict_proba`` and ``classes_``.
    table : pandas.DataFrame
        Feature table with the true ``label``.
    classes : sequence of str
        Class order of the evaluation.

    Returns
    -------
    dict
        The evaluation (strict JSON).
    """
    proba = ordered_proba(model, feature_matrix(table), classes)
    return report.evaluate(table["label"].to_numpy(dtype=str), proba, classes,
                           **_bins_of(table))


# --------------------------------------------------------------------------------------------
# out-of-distribution reference


def ood_reference(X: np.ndarray, feature_names: Sequence[str] = FEATURE_NAMES) -> dict[str, Any]:
    """Per-feature reference of a training set for the out-of-distribution check.

    Parameters
    ----------
    X : ndarray of shape (n, n_features)
        Training feature matrix (NaN = not measured).
    feature_names : sequence of str
        Name of each column.

    Returns
    -------
    dict
        ``feature_version``, ``quantiles`` (:data:`OOD_QUANTILES`), ``n_rows`` and
        ``features``: name -> {``q_lo``, ``q_hi`` (the 0.5 % and 99.5 % quantiles of the
        measured values, None when never measured), ``nan_fraction``}. Strict JSON; the
        layout ``service.scoring.load_ood`` reads.
    """
    values = np.asarray(X, dtype=np.float64)
    if values.ndim != 2 or values.shape[1] != len(feature_names):
        raise ParameterError("feature_mismatch",
                             f"X has shape {values.shape}; {len(feature_names)} names given")
    measured = np.isfinite(values)
    features = {}
    for j, name in enumerate(feature_names):
        col = values[measured[:, j], j]
        low, high = (float(q) for q in np.quantile(col, OOD_QUANTILES)) if col.size else (
            None, None)
        nan_fraction = float(1.0 - measured[:, j].mean()) if values.shape[0] else 1.0
        features[str(name)] = {"q_lo": low, "q_hi": high, "nan_fraction": nan_fraction}
    return {"feature_version": FEATURE_VERSION, "quantiles": list(OOD_QUANTILES),
            "n_rows": int(values.shape[0]), "features": features}


def ood_score(x: np.ndarray, ood: Mapping[str, Any]) -> tuple[int, list[str]]:
    """How many features of one segment lie outside the training reference, and which.

    Parameters
    ----------
    x : ndarray of shape (n_features,)
        One feature vector (:attr:`features.pipeline.Features.values`).
    ood : Mapping
        The reference of :func:`ood_reference` (the content of ``ood.json``).

    Returns
    -------
    n_outside : int
        Number of features outside.
    names : list of str
        Their names, in feature order.

    Raises
    ------
    ParameterError
        ``feature_mismatch`` when ``x`` does not have one value per reference feature.

    Notes
    -----
    A measured value is outside when it is below the 0.5 % or above the 99.5 % quantile of the
    training set, or when the training set never measured the feature; a missing value (NaN)
    is outside when fewer than :data:`OOD_RARE_NAN_FRACTION` of the training rows missed it.
    By construction about 1 % of training rows are outside on each feature, so an ordinary
    segment has a few features outside: compare ``n_outside`` with ``test_n_outside`` of
    ``ood.json`` (its distribution on the held-out test split), not with zero.

    Examples
    --------
    >>> ref = ood_reference(np.array([[0.0], [1.0], [2.0]]), ["depth"])
    >>> ood_score(np.array([5.0]), ref)
    (1, ['depth'])
    """
    names = list(ood["features"])
    values = np.asarray(x, dtype=np.float64)
    if values.shape != (len(names),):
        raise ParameterError("feature_mismatch",
                             f"x has shape {values.shape}; the reference has {len(names)} "
                             "features")
    outside = _outside(values[None, :], ood)[0]
    out = [name for name, flag in zip(names, outside, strict=True) if flag]
    return len(out), out


def _outside(X: np.ndarray, ood: Mapping[str, Any]) -> np.ndarray:
    """Boolean (n, n_features): which values fall outside the reference (see ood_score)."""
    ref = list(ood["features"].values())
    low = np.array([np.nan if r["q_lo"] is None else r["q_lo"] for r in ref])
    high = np.array([np.nan if r["q_hi"] is None else r["q_hi"] for r in ref])
    nan_fraction = np.array([r["nan_fraction"] for r in ref])
    missing = ~np.isfinite(X)
    never_measured = np.isnan(low) | np.isnan(high)
    beyond = (X < low) | (X > high) | never_measured  # comparisons with NaN are False
    return np.where(missing, nan_fraction < OOD_RARE_NAN_FRACTION, beyond)


# --------------------------------------------------------------------------------------------
# the whole chain


def train_and_save(
    table: pd.DataFrame,
    *,
    registry: Path,
    name: str,
    seed: int,
    command: str | Sequence[str],
    version: str | None = None,
    params: Mapping[str, Any] = DEFAULT_PARAMS,
    method: str = "isotonic",
    fractions: Sequence[float] = DEFAULT_FRACTIONS,
    importance_rows: int = _IMPORTANCE_ROWS,
) -> ModelCard:
    """Split, fit, calibrate, evaluate, write the report and register a new model version.

    Parameters
    ----------
    table : pandas.DataFrame
        Feature table (:func:`training.dataset.simulated_table` or
        :func:`~training.dataset.labelled_table`); its ``attrs["source"]`` is recorded.
    registry : Path
        Registry folder (:mod:`training.registry`).
    name : str
        Model family name, e.g. ``"default"``.
    seed : int
        Seed of the split, of the fit and of the permutation-importance subsample.
    command : str or sequence of str
        The command line that produced the model.
    version : str, optional
        Version folder name (default: name and creation time, see
        :func:`training.registry.save_model`).
    params : Mapping
        Hyper-parameters laid over :data:`DEFAULT_PARAMS`.
    method : {"isotonic", "sigmoid"}
        Calibration method.
    fractions : three floats
        Train, calibration and test shares.
    importance_rows : int
        Test rows (drawn at random) on which permutation importance is measured.

    Returns
    -------
    ModelCard
        The card written. ``metrics`` compares the calibrated model, the uncalibrated one and
        the BIC baseline on the test split (:func:`training.report.compare`); ``training``
        holds the data source, counts by class per split, seeds, hyper-parameters, rounds
        kept, fit time, the size of ``model.skops`` and the simulator priors. The version
        folder also holds ``report/`` (:func:`training.report.write_report`) and
        :data:`OOD_FILE`.
    """
    import skops.io as sio

    classes = class_order(table["label"])
    train, cal, test = split(table, seed=seed, fractions=fractions)
    X_train = feature_matrix(train)
    start = time.perf_counter()
    model = fit(X_train, train["label"], seed=seed, params=params)
    fit_seconds = time.perf_counter() - start
    calibrated = calibrate(model, feature_matrix(cal), cal["label"], method=method)
    logger.info("fitted %d rounds on %d rows in %.1f s, calibrated (%s) on %d rows",
                model.n_iter_, len(train), fit_seconds, method, len(cal))

    evaluations = {
        "calibrated": evaluate_model(calibrated, test, classes=classes),
        "uncalibrated": evaluate_model(model, test, classes=classes),
        "baseline": evaluate_baseline(test, classes),
    }
    by_origin = _evaluate_by_origin(calibrated, test, classes)
    comparison = report.compare({**evaluations, **by_origin})
    model_bytes = len(sio.dumps(calibrated))
    if model_bytes > MAX_MODEL_BYTES:
        logger.warning("model.skops is %.1f MB (> %.0f MB): lower max_iter or max_leaf_nodes",
                       model_bytes / 1e6, MAX_MODEL_BYTES / 1e6)
    ood = ood_reference(X_train)
    ood["test_n_outside"] = _quantiles(_outside(feature_matrix(test), ood).sum(axis=1))
    rng = np.random.default_rng(seed)
    with tempfile.TemporaryDirectory(prefix="dipshape-report-") as tmp:
        _write_report(Path(tmp), name=name, model=calibrated, test=test,
                      evaluations=evaluations, comparison=comparison, rng=rng,
                      importance_rows=importance_rows)
        card = save_model(
            Path(registry), calibrated, name=name, version=version, classes=classes,
            feature_names=FEATURE_NAMES, feature_version=FEATURE_VERSION,
            training=_training_summary(table, (train, cal, test), seed=seed, params=params,
                                       method=method, fractions=fractions, model=model,
                                       fit_seconds=fit_seconds, model_bytes=model_bytes),
            metrics=comparison, command=command,
            extra_files={"report": Path(tmp),
                         OOD_FILE: (json.dumps(ood, indent=1, allow_nan=False) + "\n").encode()},
        )
    logger.info("registered %s: macro-F1 %.3f, ECE %.3f on %d test rows; model.skops %.2f MB",
                card.version, evaluations["calibrated"]["macro_f1"],
                evaluations["calibrated"]["ece"], len(test), model_bytes / 1e6)
    return card


# --------------------------------------------------------------------------------------------
# private helpers


def _evaluate_by_origin(model: Any, test: pd.DataFrame,
                        classes: Sequence[str]) -> dict[str, dict[str, Any]]:
    """The calibrated model on each origin's part of the test split (group labels, simulated).

    Only when the table mixes origins (column ``origin``, see :data:`ORIGIN_COLUMN`), so that a
    group sees how the model does on its own held-out labels apart from the simulated ones.
    """
    if ORIGIN_COLUMN not in test.columns:
        return {}
    origins = list(dict.fromkeys(test[ORIGIN_COLUMN].astype(str)))
    if len(origins) < 2:
        return {}
    return {f"calibrated on {origin} rows": evaluate_model(
                model, test[test[ORIGIN_COLUMN].astype(str) == origin], classes=classes)
            for origin in origins}


def _check_xy(X: Any, y: Any) -> tuple[np.ndarray, np.ndarray]:
    values = np.asarray(X, dtype=np.float64)
    labels = np.asarray(y, dtype=str)
    if values.ndim != 2 or labels.ndim != 1 or values.shape[0] != labels.size:
        raise ParameterError("invalid_parameter",
                             f"X {values.shape} and y {labels.shape} do not match")
    return values, labels


def _bins_of(table: pd.DataFrame) -> dict[str, np.ndarray]:
    return {"snr": table["snr"].to_numpy(dtype=np.float64),
            "cadence_min": table["cadence_min"].to_numpy(dtype=np.float64)}


def evaluate_baseline(test: pd.DataFrame, classes: Sequence[str]) -> dict[str, Any]:
    """:func:`training.report.evaluate` of the BIC model-comparison baseline on a table.

    Parameters
    ----------
    test : pandas.DataFrame
        Feature table with the true ``label``.
    classes : sequence of str
        The model's classes; the five built-in ones are added (the baseline knows those).

    Returns
    -------
    dict
        The evaluation (hard labels: no ECE), binned by SNR and cadence.
    """
    known = [*classes, *(c for c in CLASSES if c not in classes)]
    return report.evaluate(test["label"].to_numpy(dtype=str), None, known,
                           y_pred=predict_baseline(test), **_bins_of(test))


def _quantiles(counts: np.ndarray) -> dict[str, float]:
    qs = {"q50": 0.5, "q90": 0.9, "q99": 0.99}
    if counts.size == 0:
        return dict.fromkeys([*qs, "max"], 0.0)
    out = {k: float(np.quantile(counts, q)) for k, q in qs.items()}
    out["max"] = float(counts.max())
    return out


def _write_report(out: Path, *, name: str, model: Any, test: pd.DataFrame,
                  evaluations: Mapping[str, Mapping[str, Any]], comparison: Mapping[str, Any],
                  rng: np.random.Generator, importance_rows: int) -> None:
    rows = np.sort(rng.choice(len(test), size=min(importance_rows, len(test)), replace=False))
    sample = test.iloc[rows]
    importances = report.permutation_importances(
        model, feature_matrix(sample), sample["label"].to_numpy(dtype=str),
        feature_names=FEATURE_NAMES, rng=rng, n_repeats=_IMPORTANCE_REPEATS)
    calibrated = evaluations["calibrated"]
    figures = {
        "confusion_matrix": report.plot_confusion_matrix(calibrated),
        "reliability": report.plot_reliability(calibrated),
        "reliability_uncalibrated": report.plot_reliability(evaluations["uncalibrated"]),
        "recall_vs_snr": report.plot_recall_vs_snr(calibrated),
        "permutation_importance": report.plot_permutation_importance(importances),
    }
    report.write_report(out, title=f"dipshape model {name!r}: held-out test split",
                        metrics=calibrated, figures=figures, comparison=comparison)
    (out / "permutation_importance.json").write_text(
        json.dumps({"n_rows": len(sample), "n_repeats": _IMPORTANCE_REPEATS,
                    "importances": importances}, indent=1) + "\n", encoding="utf-8")


def _counts(frame: pd.DataFrame, classes: Sequence[str]) -> dict[str, int]:
    counts = Counter(frame["label"].to_numpy(dtype=str))
    return {c: int(counts.get(c, 0)) for c in classes}


def _training_summary(table: pd.DataFrame, parts: Sequence[pd.DataFrame], *, seed: int,
                      params: Mapping[str, Any], method: str, fractions: Sequence[float],
                      model: Any, fit_seconds: float, model_bytes: int) -> dict[str, Any]:
    classes = class_order(table["label"])
    source = dict(table.attrs.get("source", {"kind": "unknown"}))
    simulated = source.get("kind") != "labelled"
    return {
        "source": source,
        "n_rows": len(table),
        "counts_by_class": _counts(table, classes),
        "splits": {part: _counts(frame, classes)
                   for part, frame in zip(("train", "calibration", "test"), parts, strict=True)},
        "fractions": [float(f) for f in fractions],
        "seeds": {"data": source.get("seed"), "split": seed, "fit": seed, "importance": seed},
        "estimator": "HistGradientBoostingClassifier",
        "params": {**DEFAULT_PARAMS, **params},
        "n_iter": int(model.n_iter_),
        "calibration": method,
        "fit_seconds": round(fit_seconds, 3),
        "model_bytes": int(model_bytes),
        "ood_file": OOD_FILE,
        "simulator_priors": PRIORS.as_records() if simulated else None,
    }
