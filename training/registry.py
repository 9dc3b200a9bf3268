"""The model registry: versioned, hashed, explicitly activated classifier artefacts.

A registry is a folder (``models/`` at the repository root by default; always passed in as a
:class:`~pathlib.Path`)::

    <root>/
        ACTIVE                      one line: the version that scoring uses
        <version>/
            model.skops             the fitted estimator, written with ``skops.io.dump``
            card.json               the model card (see :class:`ModelCard`)
            report/report.html ...  any report files handed to :func:`save_model`

``card.json`` lists the sha256 of every other file in its folder. :func:`load_model` refuses a
version whose files do not match their hashes, whose files are missing or unlisted, whose
feature version differs from the one the caller computes, or whose ``model.skops`` holds a type
outside :data:`TRUSTED_TYPES`. Nothing is ever unpickled.

Writes are atomic: a version is written into a hidden temporary folder inside the root and
renamed into place; ``ACTIVE`` is written to a temporary file and moved over with
:func:`os.replace`. A crash leaves either the old state or the new one, never half of either.

Error codes (all :class:`~features.errors.ModelError` unless noted)::

    invalid_version           a version or name that is not a safe folder name
    version_exists            save_model into a version that already exists
    model_not_found           no such version (also: ACTIVE names a missing folder)
    no_active_model           load_model(version=None) with no ACTIVE file
    invalid_card              card.json missing, unreadable or malformed
    model_integrity           a listed file missing, a hash mismatch, an unlisted file, a file
                              outside its folder, or an estimator that disagrees with its card
    feature_version_mismatch  the card's feature version differs from the expected one
    untrusted_model           model.skops holds a type outside TRUSTED_TYPES
    class_mismatch, feature_mismatch, invalid_parameter   (ParameterError) bad arguments
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import platform
import re
import shlex
import shutil
import tempfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path, PurePosixPath
from types import MappingProxyType
from typing import Any

import numpy as np

from features.errors import ModelError, ParameterError

__all__ = [
    "ACTIVE_FILE",
    "CARD_FILE",
    "CARD_VERSION",
    "MODEL_FILE",
    "TRUSTED_TYPES",
    "LoadedModel",
    "ModelCard",
    "activate",
    "active_version",
    "list_models",
    "load_model",
    "read_card",
    "save_model",
]

_log = logging.getLogger(__name__)

MODEL_FILE = "model.skops"
"""Name of the persisted estimator inside a version folder."""

CARD_FILE = "card.json"
"""Name of the model card inside a version folder."""

ACTIVE_FILE = "ACTIVE"
"""Name of the one-line file in the registry root that names the active version."""

CARD_VERSION = "1"
"""Layout version of ``card.json``; a card of another layout is refused (``invalid_card``)."""

TRUSTED_TYPES: tuple[str, ...] = (
    # The object CalibratedClassifierCV keeps per fold in ``calibrated_classifiers_``: a plain
    # container holding the frozen classifier, its calibrators, the class array and the method
    # name. No custom __setstate__ / __reduce__; restoring it only sets those four attributes.
    "sklearn.calibration._CalibratedClassifier",
    # Platt scaling (method="sigmoid"): a BaseEstimator with two float attributes a_ and b_.
    # Restored through BaseEstimator.__setstate__, which only updates __dict__.
    "sklearn.calibration._SigmoidCalibration",
    # Temperature scaling (method="temperature"): a BaseEstimator with one float attribute.
    # Same restore path as above. (method="isotonic" uses the public IsotonicRegression, which
    # skops already trusts.)
    "sklearn.calibration._TemperatureScaling",
    # One tree of the HistGradientBoostingClassifier: numpy structured arrays of nodes and
    # category bitsets. Its __setstate__ updates __dict__ and casts one integer field to the
    # platform's intp; prediction is compiled code that reads those arrays.
    "sklearn.ensemble._hist_gradient_boosting.predictor.TreePredictor",
)
"""The types beyond skops' own trusted defaults that this product's estimators need.

Found once with ``skops.io.get_untrusted_types`` on
``CalibratedClassifierCV(FrozenEstimator(HistGradientBoostingClassifier()), method=m)`` for
``m`` in sigmoid, isotonic and temperature (scikit-learn 1.9). Everything else in such a file
(the public estimators, numpy arrays and scalars, builtins containers) is on skops' default list.
A file with any other type is refused with ``untrusted_model``; ``trusted=True`` is never used.
Review this tuple whenever scikit-learn or the estimator changes.
"""

_SAFE_NAME = re.compile(r"[A-Za-z0-9._-]{1,128}")
_RESERVED = frozenset({ACTIVE_FILE.casefold(), f"{ACTIVE_FILE}.tmp".casefold()})
_TMP_PREFIX = ".tmp-"
_LIBRARIES = (
    ("numpy", "numpy"),
    ("scipy", "scipy"),
    ("sklearn", "scikit-learn"),
    ("skops", "skops"),
    ("astropy", "astropy"),
    ("dipshape", "dipshape"),
)


@dataclass(frozen=True, slots=True)
class ModelCard:
    """The model card of one registered version (the content of ``card.json``).

    Attributes
    ----------
    name : str
        Model family, e.g. ``"default"``.
    version : str
        Folder name of the version, e.g. ``"default-2026-12-02T0130Z"``.
    created_utc : str
        ISO 8601 creation time in UTC with a ``Z`` suffix.
    classes : tuple of str
        Class labels, in the column order of :meth:`LoadedModel.predict_proba`.
    feature_names : tuple of str
        The feature vector's order, as the model was trained.
    feature_version : str
        ``features.catalog.FEATURE_VERSION`` the model was trained with.
    training : Mapping
        Free description of the training: data summary, simulator priors, seeds.
    metrics : Mapping
        Free evaluation metrics.
    library_versions : Mapping of str to str
        python, numpy, scipy, sklearn, skops, astropy and dipshape at save time.
    command : str
        The exact command line that produced the model (shell-quoted when given as a list).
    files : Mapping of str to str
        Relative POSIX path -> sha256 of every file in the folder except ``card.json``.
    active : bool
        Whether the registry's ``ACTIVE`` file names this version (not stored in the card).
    """

    name: str
    version: str
    created_utc: str
    classes: tuple[str, ...]
    feature_names: tuple[str, ...]
    feature_version: str
    training: Mapping[str, Any]
    metrics: Mapping[str, Any]
    library_versions: Mapping[str, str]
    command: str
    files: Mapping[str, str]
    active: bool = False

    def to_dict(self) -> dict[str, Any]:
        """Return the JSON object written to ``card.json`` (``active`` is not part of it)."""
        return {
            "card_version": CARD_VERSION,
            "name": self.name,
            "version": self.version,
            "created_utc": self.created_utc,
            "classes": list(self.classes),
            "feature_names": list(self.feature_names),
            "feature_version": self.feature_version,
            "training": _plain(self.training),
            "metrics": _plain(self.metrics),
            "library_versions": dict(self.library_versions),
            "command": self.command,
            "files": dict(sorted(self.files.items())),
        }


@dataclass(frozen=True, slots=True)
class LoadedModel:
    """A verified model ready to score.

    Attributes
    ----------
    card : ModelCard
        Its model card.
    estimator : object
        The fitted scikit-learn classifier.
    sha256 : str
        sha256 of ``model.skops`` (goes into every result as ``model.sha256``).
    column_order : tuple of int
        Index into ``estimator.classes_`` of each label of ``card.classes``.
    thread_control : threadpoolctl.ThreadpoolController
        Made once at load time: entering ``threadpool_limits`` anew scans the loaded native
        libraries on every call (milliseconds), ``ThreadpoolController.limit`` does not.
    """

    card: ModelCard
    estimator: Any = field(repr=False)
    sha256: str
    column_order: tuple[int, ...] = field(repr=False)
    thread_control: Any = field(repr=False, compare=False)

    def predict_proba(self, X: Any) -> np.ndarray:
        """Class probabilities, one column per label of ``card.classes``, in that order.

        Runs with every native thread pool (OpenMP, BLAS) limited to one thread, as
        ``threadpoolctl.threadpool_limits(1)`` would, and restored afterwards: per-row scoring
        with many OpenMP threads is many times slower on small machines; throughput scales
        with processes.

        Parameters
        ----------
        X : array_like of shape (n_samples, n_features)
            Feature vectors in ``card.feature_names`` order; NaN marks a missing feature.

        Returns
        -------
        numpy.ndarray of shape (n_samples, n_classes)

        Raises
        ------
        ParameterError
            ``invalid_parameter`` when X is not a 2-D numeric array, ``feature_mismatch`` when
            its number of columns differs from ``len(card.feature_names)``.
        """
        try:
            values = np.asarray(X, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise ParameterError("invalid_parameter", f"X is not numeric: {exc}") from exc
        if values.ndim != 2:
            raise ParameterError(
                "invalid_parameter",
                f"X must be 2-D (n_samples, n_features); got shape {values.shape}",
            )
        n_expected = len(self.card.feature_names)
        if values.shape[1] != n_expected:
            raise ParameterError(
                "feature_mismatch",
                f"X has {values.shape[1]} columns; model {self.card.version} expects "
                f"{n_expected} features ({self.card.feature_version=})",
            )
        with self.thread_control.limit(limits=1):
            proba = self.estimator.predict_proba(values)
        return np.asarray(proba, dtype=np.float64)[:, list(self.column_order)]


# --- public API ------------------------------------------------------------------------------


def save_model(
    root: Path,
    estimator: Any,
    *,
    name: str,
    version: str | None = None,
    classes: Sequence[str],
    feature_names: Sequence[str],
    feature_version: str,
    training: Mapping[str, Any],
    metrics: Mapping[str, Any],
    command: str | Sequence[str],
    extra_files: Mapping[str, bytes | Path] | None = None,
    now: datetime | None = None,
) -> ModelCard:
    """Write a fitted estimator and its card as a new version of the registry.

    Parameters
    ----------
    root : Path
        Registry folder (created if absent).
    estimator : object
        Fitted classifier with ``classes_``, ``n_features_in_`` and ``predict_proba``.
    name : str
        Model family; safe folder-name characters only.
    version : str, optional
        Folder name; default ``f"{name}-{now:%Y-%m-%dT%H%MZ}"``.
    classes : sequence of str
        Labels in the column order wanted from :meth:`LoadedModel.predict_proba`; must be the
        estimator's classes (any order, any labels, not only the built-in five).
    feature_names : sequence of str
        Feature order; its length must equal ``estimator.n_features_in_``.
    feature_version : str
        Feature definition version the model was trained with.
    training, metrics : Mapping
        Free JSON objects (strict JSON: no NaN or infinity).
    command : str or sequence of str
        The command line that produced the model; a sequence is joined with ``shlex.join``.
    extra_files : Mapping of str to bytes or Path, optional
        Relative POSIX path inside the version folder -> content, or a file to copy, or a
        folder whose files are copied under that path (e.g. ``{"report": out_dir}``).
    now : datetime, optional
        Creation time (timezone-aware); default the current UTC time.

    Returns
    -------
    ModelCard
        The card as written.

    Raises
    ------
    ModelError
        ``invalid_version`` for an unsafe name or version, ``version_exists`` when the version
        is already registered, ``untrusted_model`` when the estimator holds a type that
        :func:`load_model` would refuse.
    ParameterError
        ``class_mismatch``, ``feature_mismatch`` or ``invalid_parameter`` for arguments that
        disagree with the estimator or cannot be stored.

    Examples
    --------
    >>> card = save_model(Path("models"), model, name="default", classes=CLASSES,
    ...                   feature_names=FEATURE_NAMES, feature_version=FEATURE_VERSION,
    ...                   training={"n_train": 50000}, metrics={"macro_f1": 0.91},
    ...                   command=sys.argv)  # doctest: +SKIP
    """
    import skops.io as sio

    created = _utc(now)
    _check_name(name, what="name")
    version = version if version is not None else f"{name}-{created:%Y-%m-%dT%H%MZ}"
    _check_name(version, what="version")
    class_tuple = _check_classes(estimator, classes)
    feature_tuple = _check_features(estimator, feature_names)
    if not isinstance(feature_version, str) or not feature_version:
        raise ParameterError("invalid_parameter", "feature_version must be a non-empty string")
    training_json = _strict_json(training, what="training")
    metrics_json = _strict_json(metrics, what="metrics")
    command_text = _command_text(command)
    payload = _collect_extra_files(extra_files or {})

    model_bytes = sio.dumps(estimator)
    offending = _untrusted(sio, model_bytes)
    if offending:
        raise ModelError(
            "untrusted_model",
            f"the estimator holds types that load_model would refuse: {offending}; "
            "review them and extend TRUSTED_TYPES, or store another estimator",
        )
    payload[MODEL_FILE] = model_bytes

    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    target = root / version
    if target.exists():
        raise ModelError("version_exists", f"version {version!r} already exists in {root}")

    card = ModelCard(
        name=name,
        version=version,
        created_utc=created.isoformat(timespec="microseconds").replace("+00:00", "Z"),
        classes=class_tuple,
        feature_names=feature_tuple,
        feature_version=feature_version,
        training=_frozen(training_json),
        metrics=_frozen(metrics_json),
        library_versions=_frozen(_library_versions()),
        command=command_text,
        files=_frozen({rel: _sha256(data) for rel, data in sorted(payload.items())}),
    )
    card_bytes = (json.dumps(card.to_dict(), indent=2, allow_nan=False) + "\n").encode()

    staging = Path(tempfile.mkdtemp(prefix=f"{_TMP_PREFIX}{version}-", dir=root))
    try:
        for rel, data in payload.items():
            _write_synced(staging / rel, data)
        _write_synced(staging / CARD_FILE, card_bytes)
        _fsync_tree_dirs(staging)
        try:
            # On POSIX, rename onto an existing non-empty folder fails: no silent overwrite.
            os.rename(staging, target)
        except OSError as exc:
            raise ModelError(
                "version_exists", f"version {version!r} appeared in {root} while saving: {exc}"
            ) from exc
        _fsync_dir(root)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    _log.info("saved model %s (%d files) in %s", version, len(payload), root)
    return card


def read_card(root: Path, version: str) -> ModelCard:
    """Read and validate the card of one version.

    Parameters
    ----------
    root : Path
        Registry folder.
    version : str
        Version folder name.

    Returns
    -------
    ModelCard
        With ``active`` set when ``ACTIVE`` names this version.

    Raises
    ------
    ModelError
        ``invalid_version``, ``model_not_found`` or ``invalid_card``.
    """
    root = Path(root)
    folder = _version_folder(root, version)
    card = _read_card_file(folder, version)
    return replace(card, active=_read_active(root) == version)


def list_models(root: Path) -> list[ModelCard]:
    """All registered versions, oldest first, the active one marked.

    Folders that are not versions (hidden or temporary ones, or without a readable card) are
    skipped with a logged warning. A missing root is an empty registry.

    Parameters
    ----------
    root : Path
        Registry folder.

    Returns
    -------
    list of ModelCard
        Sorted by ``created_utc``, then version.
    """
    root = Path(root)
    if not root.is_dir():
        return []
    active = _read_active(root, strict=False)
    cards = []
    for entry in sorted(root.iterdir()):
        if entry.name.startswith(".") or not entry.is_dir():
            continue
        try:
            _check_name(entry.name, what="version")
            card = _read_card_file(entry, entry.name)
        except ModelError as exc:
            _log.warning("skipping %s in the registry: %s", entry.name, exc)
            continue
        cards.append(replace(card, active=card.version == active))
    return sorted(cards, key=lambda c: (_parse_utc(c.created_utc), c.version))


def active_version(root: Path) -> str | None:
    """The version named in ``<root>/ACTIVE``, or None when there is none.

    Parameters
    ----------
    root : Path
        Registry folder.

    Returns
    -------
    str or None

    Raises
    ------
    ModelError
        ``invalid_version`` when ``ACTIVE`` holds something that is not a version name.
    """
    return _read_active(Path(root))


def activate(root: Path, version: str) -> None:
    """Make ``version`` the active model, atomically.

    The version must exist, have a valid card and pass the file-hash check (nothing is
    deserialised). ``ACTIVE`` is written to a temporary file in the root, flushed, and moved
    over the old one with :func:`os.replace`, so readers see the old or the new name only.
    (The temporary file has a unique name, ``ACTIVE.<random>.tmp``, so that two concurrent
    activations cannot write into the same file.)

    Parameters
    ----------
    root : Path
        Registry folder.
    version : str
        Version to activate.

    Raises
    ------
    ModelError
        ``invalid_version``, ``model_not_found``, ``invalid_card`` or ``model_integrity``.
    """
    root = Path(root)
    folder = _version_folder(root, version)
    card = _read_card_file(folder, version)
    _verified_model_bytes(folder, card)
    fd, tmp_name = tempfile.mkstemp(prefix=f"{ACTIVE_FILE}.", suffix=".tmp", dir=root)
    tmp = Path(tmp_name)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(f"{version}\n".encode())
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, root / ACTIVE_FILE)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(root)
    _log.info("activated model %s in %s", version, root)


def load_model(
    root: Path, version: str | None = None, *, expected_feature_version: str
) -> LoadedModel:
    """Load a registered model after verifying it.

    Checks, in order: the version exists and its card is valid; the card's feature version
    equals ``expected_feature_version``; every listed file exists inside the folder and matches
    its sha256, and no file is unlisted; ``model.skops`` holds only trusted types; the
    estimator's classes and feature count agree with the card. The model is deserialised from
    the bytes that were hashed, so the file cannot change between check and load.

    Parameters
    ----------
    root : Path
        Registry folder.
    version : str, optional
        Version to load; None loads the active one.
    expected_feature_version : str
        The feature version of the running feature extractor.

    Returns
    -------
    LoadedModel

    Raises
    ------
    ModelError
        ``no_active_model``, ``model_not_found``, ``invalid_version``, ``invalid_card``,
        ``feature_version_mismatch``, ``model_integrity`` or ``untrusted_model``.

    Examples
    --------
    >>> model = load_model(Path("models"), expected_feature_version=FEATURE_VERSION)
    ... # doctest: +SKIP
    >>> proba = model.predict_proba(features)  # doctest: +SKIP
    """
    import skops.io as sio
    from threadpoolctl import ThreadpoolController

    root = Path(root)
    if version is None:
        version = _read_active(root)
        if version is None:
            raise ModelError(
                "no_active_model",
                f"no active model in {root}: activate a version first ({ACTIVE_FILE} missing)",
            )
        if not (root / version).is_dir():
            raise ModelError(
                "model_not_found",
                f"{root / ACTIVE_FILE} names version {version!r}, but {root / version} "
                "does not exist",
            )
    folder = _version_folder(root, version)
    card = _read_card_file(folder, version)
    if card.feature_version != expected_feature_version:
        raise ModelError(
            "feature_version_mismatch",
            f"model {version} was trained on feature version {card.feature_version!r}; the "
            f"feature extractor computes version {expected_feature_version!r}: retrain it",
        )
    model_bytes = _verified_model_bytes(folder, card)
    offending = _untrusted(sio, model_bytes)
    if offending:
        raise ModelError(
            "untrusted_model",
            f"{folder / MODEL_FILE} holds types outside TRUSTED_TYPES: {offending}; refused",
        )
    try:
        estimator = sio.loads(model_bytes, trusted=list(TRUSTED_TYPES))
    except sio.exceptions.UntrustedTypesFoundException as exc:
        raise ModelError("untrusted_model", f"{folder / MODEL_FILE}: {exc}") from exc
    except Exception as exc:  # a corrupt but correctly hashed archive
        raise ModelError(
            "model_integrity", f"{folder / MODEL_FILE} cannot be read by skops: {exc}"
        ) from exc
    column_order = _column_order(estimator, card, folder)
    _warn_on_version_drift(card)
    card = replace(card, active=_read_active(root, strict=False) == version)
    return LoadedModel(
        card=card,
        estimator=estimator,
        sha256=card.files[MODEL_FILE],
        column_order=column_order,
        thread_control=ThreadpoolController(),
    )


# --- validation helpers ----------------------------------------------------------------------


def _check_name(value: object, *, what: str) -> None:
    """Refuse anything that is not a safe, non-hidden folder name."""
    if (
        not isinstance(value, str)
        or not _SAFE_NAME.fullmatch(value)
        or value.startswith(".")
        or ".." in value
        or value.casefold() in _RESERVED
    ):
        raise ModelError(
            "invalid_version",
            f"invalid {what} {value!r}: use 1-128 characters from [A-Za-z0-9._-], not starting "
            f"with '.', without '..', and not {ACTIVE_FILE!r}",
        )


def _check_classes(estimator: Any, classes: Sequence[str]) -> tuple[str, ...]:
    if isinstance(classes, str) or not all(isinstance(c, str) and c for c in classes):
        raise ParameterError("invalid_parameter", "classes must be a sequence of label strings")
    class_tuple = tuple(classes)
    if len(set(class_tuple)) != len(class_tuple):
        raise ParameterError("invalid_parameter", f"classes has duplicates: {class_tuple}")
    fitted = getattr(estimator, "classes_", None)
    if fitted is None or not hasattr(estimator, "predict_proba"):
        raise ParameterError(
            "invalid_parameter", "estimator must be a fitted classifier with predict_proba"
        )
    fitted_labels = [str(c) for c in fitted]
    if sorted(fitted_labels) != sorted(class_tuple):
        raise ParameterError(
            "class_mismatch",
            f"classes {list(class_tuple)} differ from the estimator's classes {fitted_labels}",
        )
    return class_tuple


def _check_features(estimator: Any, feature_names: Sequence[str]) -> tuple[str, ...]:
    if isinstance(feature_names, str) or not all(
        isinstance(f, str) and f for f in feature_names
    ):
        raise ParameterError("invalid_parameter", "feature_names must be a sequence of strings")
    names = tuple(feature_names)
    if len(set(names)) != len(names):
        raise ParameterError("invalid_parameter", "feature_names has duplicates")
    n_in = getattr(estimator, "n_features_in_", None)
    if n_in is not None and int(n_in) != len(names):
        raise ParameterError(
            "feature_mismatch",
            f"{len(names)} feature_names given; the estimator was fitted on {n_in} features",
        )
    return names


def _strict_json(value: Mapping[str, Any], *, what: str) -> dict[str, Any]:
    """Deep copy through strict JSON (no NaN/inf), refusing what cannot be stored."""
    if not isinstance(value, Mapping):
        raise ParameterError("invalid_parameter", f"{what} must be a mapping")
    try:
        return json.loads(json.dumps(_plain(value), allow_nan=False))
    except (TypeError, ValueError) as exc:
        raise ParameterError(
            "invalid_parameter", f"{what} is not strict JSON (no NaN/inf, str keys): {exc}"
        ) from exc


def _command_text(command: str | Sequence[str]) -> str:
    if isinstance(command, str):
        return command
    if not all(isinstance(part, str) for part in command):
        raise ParameterError("invalid_parameter", "command must be a string or list of strings")
    return shlex.join(command)


def _check_relative(rel: str, *, what: str) -> PurePosixPath:
    """A relative POSIX path of safe parts, not the card or the model file."""
    if not isinstance(rel, str) or not rel:
        raise ParameterError("invalid_parameter", f"{what} {rel!r} must be a non-empty string")
    path = PurePosixPath(rel)
    if (
        "\\" in rel
        or path.is_absolute()
        or str(path) != rel
        or any(not _SAFE_NAME.fullmatch(p) or p.startswith(".") or ".." in p for p in path.parts)
    ):
        raise ParameterError(
            "invalid_parameter",
            f"{what} {rel!r} must be a relative POSIX path of [A-Za-z0-9._-] parts, no '..'",
        )
    return path


def _collect_extra_files(extra: Mapping[str, bytes | Path]) -> dict[str, bytes]:
    out: dict[str, bytes] = {}
    for rel, source in extra.items():
        base = _check_relative(rel, what="extra file")
        if isinstance(source, bytes | bytearray):
            out[str(base)] = bytes(source)
        elif isinstance(source, Path) and source.is_file():
            out[str(base)] = source.read_bytes()
        elif isinstance(source, Path) and source.is_dir():
            for item in sorted(p for p in source.rglob("*") if p.is_file()):
                sub = base.joinpath(*item.relative_to(source).parts)
                out[str(_check_relative(str(sub), what="extra file"))] = item.read_bytes()
        else:
            raise ParameterError(
                "invalid_parameter", f"extra file {rel!r}: expected bytes or an existing Path"
            )
    for reserved in (MODEL_FILE, CARD_FILE):
        if reserved in out:
            raise ParameterError("invalid_parameter", f"extra_files may not contain {reserved}")
    return out


# --- reading and verifying -------------------------------------------------------------------


def _version_folder(root: Path, version: str) -> Path:
    _check_name(version, what="version")
    folder = root / version
    if not folder.is_dir():
        known = [c.version for c in list_models(root)]
        raise ModelError(
            "model_not_found", f"no model version {version!r} in {root}; known: {known}"
        )
    if not folder.resolve().is_relative_to(root.resolve()):
        raise ModelError("model_integrity", f"{folder} points outside the registry {root}")
    return folder


def _read_card_file(folder: Path, version: str) -> ModelCard:
    path = folder / CARD_FILE
    try:
        raw = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise ModelError("invalid_card", f"{path} is missing") from exc
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelError("invalid_card", f"{path} cannot be read: {exc}") from exc
    try:
        card = _card_from_dict(raw)
    except (KeyError, TypeError, ValueError) as exc:
        raise ModelError("invalid_card", f"{path} is malformed: {exc!r}") from exc
    if card.version != version:
        raise ModelError(
            "invalid_card", f"{path} describes version {card.version!r}, not {version!r}"
        )
    return card


def _card_from_dict(raw: Any) -> ModelCard:
    if not isinstance(raw, dict):
        raise TypeError("card is not a JSON object")
    if raw.get("card_version") != CARD_VERSION:
        raise ValueError(f"card_version {raw.get('card_version')!r}, expected {CARD_VERSION!r}")

    def strings(key: str) -> tuple[str, ...]:
        value = raw[key]
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise TypeError(f"{key} must be a list of strings")
        return tuple(value)

    def text(key: str) -> str:
        if not isinstance(raw[key], str):
            raise TypeError(f"{key} must be a string")
        return raw[key]

    def obj(key: str) -> dict[str, Any]:
        if not isinstance(raw[key], dict):
            raise TypeError(f"{key} must be an object")
        return raw[key]

    files = obj("files")
    if not all(isinstance(v, str) and re.fullmatch(r"[0-9a-f]{64}", v) for v in files.values()):
        raise ValueError("files must map paths to sha256 hex digests")
    for rel in files:
        _check_relative(rel, what="listed file")
    _parse_utc(text("created_utc"))
    return ModelCard(
        name=text("name"),
        version=text("version"),
        created_utc=text("created_utc"),
        classes=strings("classes"),
        feature_names=strings("feature_names"),
        feature_version=text("feature_version"),
        training=_frozen(obj("training")),
        metrics=_frozen(obj("metrics")),
        library_versions=_frozen({str(k): str(v) for k, v in obj("library_versions").items()}),
        command=text("command"),
        files=_frozen(files),
    )


def _verified_model_bytes(folder: Path, card: ModelCard) -> bytes:
    """Check every file of the folder against the card; return the verified model bytes."""
    if MODEL_FILE not in card.files:
        raise ModelError("model_integrity", f"{folder / CARD_FILE} does not list {MODEL_FILE}")
    resolved_folder = folder.resolve()
    model_bytes = b""
    for rel, expected in sorted(card.files.items()):
        path = folder / rel
        if not path.resolve().is_relative_to(resolved_folder):
            raise ModelError("model_integrity", f"{path} points outside {folder}")
        try:
            data = path.read_bytes()
        except FileNotFoundError as exc:
            raise ModelError(
                "model_integrity", f"{path} is listed in the card but missing"
            ) from exc
        except OSError as exc:
            raise ModelError("model_integrity", f"{path} cannot be read: {exc}") from exc
        actual = _sha256(data)
        if actual != expected:
            raise ModelError(
                "model_integrity",
                f"sha256 of {path} is {actual}, the card says {expected}: file altered",
            )
        if rel == MODEL_FILE:
            model_bytes = data
    present = {
        p.relative_to(folder).as_posix() for p in folder.rglob("*") if not p.is_dir()
    } - {CARD_FILE}
    unlisted = sorted(present - set(card.files))
    if unlisted:
        raise ModelError(
            "model_integrity", f"files in {folder} not listed in its card: {unlisted}"
        )
    return model_bytes


def _untrusted(sio: Any, model_bytes: bytes) -> list[str]:
    """Types in a skops payload that neither skops' defaults nor TRUSTED_TYPES cover."""
    try:
        found = sio.get_untrusted_types(data=model_bytes)
    except Exception as exc:  # not a skops archive at all
        raise ModelError("model_integrity", f"not a readable skops archive: {exc}") from exc
    return sorted(set(found) - set(TRUSTED_TYPES))


def _column_order(estimator: Any, card: ModelCard, folder: Path) -> tuple[int, ...]:
    fitted = [str(c) for c in getattr(estimator, "classes_", [])]
    if sorted(fitted) != sorted(card.classes) or not hasattr(estimator, "predict_proba"):
        raise ModelError(
            "model_integrity",
            f"estimator in {folder} has classes {fitted}; its card says {list(card.classes)}",
        )
    n_in = getattr(estimator, "n_features_in_", None)
    if n_in is not None and int(n_in) != len(card.feature_names):
        raise ModelError(
            "model_integrity",
            f"estimator in {folder} takes {n_in} features; its card lists "
            f"{len(card.feature_names)}",
        )
    return tuple(fitted.index(c) for c in card.classes)


def _warn_on_version_drift(card: ModelCard) -> None:
    current = _library_versions()
    for key in ("sklearn", "skops", "numpy"):
        saved = card.library_versions.get(key)
        if saved is not None and saved != current[key]:
            _log.warning(
                "model %s was saved with %s %s; running %s", card.version, key, saved,
                current[key],
            )


def _read_active(root: Path, *, strict: bool = True) -> str | None:
    try:
        text = (root / ACTIVE_FILE).read_text(encoding="utf-8").strip()
    except FileNotFoundError:
        return None
    if not text:
        return None
    try:
        _check_name(text, what=f"version in {root / ACTIVE_FILE}")
    except ModelError:
        if strict:
            raise
        return None
    return text


# --- small utilities -------------------------------------------------------------------------


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _utc(now: datetime | None) -> datetime:
    if now is None:
        return datetime.now(UTC)
    if now.tzinfo is None:
        raise ParameterError("invalid_parameter", "now must be timezone-aware")
    return now.astimezone(UTC)


def _parse_utc(text: str) -> datetime:
    return datetime.fromisoformat(text.replace("Z", "+00:00"))


def _library_versions() -> dict[str, str]:
    versions = {"python": platform.python_version()}
    for key, dist in _LIBRARIES:
        try:
            versions[key] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            versions[key] = "not installed"
    return versions


def _plain(value: Any) -> Any:
    """Mappings and sequences (including read-only views) as plain dicts and lists."""
    if isinstance(value, Mapping):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    return value


def _frozen(value: dict[str, Any]) -> Mapping[str, Any]:
    return MappingProxyType(dict(value))


def _write_synced(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "wb") as handle:
        handle.write(data)
        handle.flush()
        os.fsync(handle.fileno())


def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:  # platforms without directory handles
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _fsync_tree_dirs(top: Path) -> None:
    for folder in sorted((p for p in top.rglob("*") if p.is_dir()), reverse=True):
        _fsync_dir(folder)
    _fsync_dir(top)
