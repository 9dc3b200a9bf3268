"""The scoring pipeline: one light-curve segment in, one result object (the JSON contract) out.

:func:`score_segment` measures a segment's features (:func:`features.pipeline.extract`),
classifies them with a verified registry model (:class:`training.registry.LoadedModel`) and
returns a :class:`Result` whose :meth:`Result.to_dict` is the result JSON of the design
reference, validated by ``service/result.schema.json`` (:func:`result_schema`). A segment that
cannot be scored becomes an error object, :func:`score_error`. :func:`score_path` does both for
every segment of one file, which is what ``dipshape score`` writes, one JSON object per line.

Out-of-distribution rule
------------------------
A model folder may hold ``ood.json`` (:data:`OOD_FILE`): per feature, the training range
``q_lo``/``q_hi`` (low and high quantiles, or null when the feature was never measured) and the
training ``nan_fraction``. A feature of a scored segment is *outside* when

- its value is finite and below ``q_lo`` or above ``q_hi`` (or the training never measured it),
- or its value is NaN although fewer than :data:`OOD_RARE_NAN_FRACTION` of the training rows
  had it missing.

The flag ``out_of_distribution`` is raised when more than :data:`OOD_MAX_OUTSIDE` features are
outside. Without ``ood.json`` no such flag is raised.

Error codes raised here (beyond those of the readers, the extractor and the registry)::

    ModelError      feature_names_mismatch  the model's feature list is not FEATURE_NAMES
                    feature_version_mismatch  the model's feature version is not FEATURE_VERSION
                    missing_classes         the model lacks one of the five contract classes
                    invalid_prediction      the model returned non-finite probabilities
                    invalid_ood             ood.json (or the ood mapping) is malformed
                    model_integrity         ood.json does not match the card's sha256
    ParameterError  invalid_ephemeris       a "PERIOD,EPOCH,DURATION" text that is unusable
                    no_input_files          the paths given hold no light-curve file
    DipshapeError   internal_error          an unexpected failure on one segment (score_path)
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
import os
import time
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np

from features.catalog import FEATURE_NAMES, FEATURE_VERSION
from features.errors import DipshapeError, ModelError, ParameterError, SegmentError
from features.events import Ephemeris
from features.io import SUPPORTED_FORMATS, read_segments
from features.pipeline import Features, extract
from features.segment import Segment
from training.classes import CLASSES
from training.registry import LoadedModel, read_card
from training.train import OOD_RARE_NAN_FRACTION, ood_score

__all__ = [
    "OOD_FILE",
    "OOD_FLAG",
    "OOD_MAX_OUTSIDE",
    "OOD_RARE_NAN_FRACTION",
    "SCHEMA_VERSION",
    "SKIPPED_NAMES",
    "Result",
    "check_model",
    "default_registry_root",
    "file_stem",
    "find_inputs",
    "json_line",
    "load_ood",
    "ood_outside",
    "parse_ephemeris",
    "result_schema",
    "score_error",
    "score_path",
    "score_segment",
    "score_segment_with_features",
]

_log = logging.getLogger(__name__)

SCHEMA_VERSION = "1"
"""Version of the result JSON layout, written into every result and error object."""

OOD_FILE = "ood.json"
"""Name of the per-feature training-range table inside a model version folder."""

OOD_MAX_OUTSIDE = 3
"""``out_of_distribution`` is raised when MORE than this many features fall outside."""

SKIPPED_NAMES: tuple[str, ...] = ("labels.csv",)
"""File names skipped when a folder is expanded (the truth table of ``dipshape simulate``)."""

OOD_FLAG = "out_of_distribution"
"""The flag raised by the out-of-distribution rule (module docstring)."""

_OOD_KEYS = ("q_lo", "q_hi", "nan_fraction")
_SCHEMA_FILE = "result.schema.json"
_REPO_MODELS = Path(__file__).resolve().parents[1] / "models"


# --------------------------------------------------------------------------------------------
# The result
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Result:
    """The score of one segment: exactly the fields of the result JSON, in its order.

    Attributes
    ----------
    schema_version : str
        :data:`SCHEMA_VERSION`.
    id : str
        Segment id (a file's stem, or ``segment_id`` in a batch table).
    label : str
        The class of highest probability (the first of the model's class order on a tie).
    probabilities : Mapping of str to float
        Every class of the model, in the model card's order; they sum to 1.
    flags : tuple of str
        The extractor's flags (:data:`features.pipeline.FLAGS`, e.g. ``low_snr``,
        ``no_significant_dip``) in its order, then ``out_of_distribution`` when raised.
    features : Mapping of str to float or None
        Every feature of :data:`features.catalog.FEATURE_NAMES`; None where unmeasurable.
    events : tuple of Mapping
        The significant dips: ``t_mid`` [days], ``depth`` [relative flux], ``duration_days``,
        ``snr``.
    ephemeris : Mapping or None
        ``period_days``, ``epoch`` [days], ``duration_days`` when supplied or found.
    model : Mapping of str to str
        ``name``, ``version`` and ``sha256`` of the model file that scored.
    elapsed_ms : float
        Wall time of feature extraction plus classification [ms]; the one field that differs
        between two runs on the same input.
    """

    schema_version: str
    id: str
    label: str
    probabilities: Mapping[str, float]
    flags: tuple[str, ...]
    features: Mapping[str, float | None]
    events: tuple[Mapping[str, float], ...]
    ephemeris: Mapping[str, float] | None
    model: Mapping[str, str]
    elapsed_ms: float

    def to_dict(self) -> dict[str, Any]:
        """Return the result as plain JSON-ready Python objects (NaN never appears).

        Returns
        -------
        dict
            Keys in the order of the result JSON.
        """
        return {
            "schema_version": self.schema_version,
            "id": self.id,
            "label": self.label,
            "probabilities": {k: float(v) for k, v in self.probabilities.items()},
            "flags": list(self.flags),
            "features": {k: _finite_or_none(v) for k, v in self.features.items()},
            "events": [{k: float(v) for k, v in e.items()} for e in self.events],
            "ephemeris": None if self.ephemeris is None else {
                k: float(v) for k, v in self.ephemeris.items()},
            "model": dict(self.model),
            "elapsed_ms": float(self.elapsed_ms),
        }

    def to_json(self) -> str:
        """Return the result as one line of strict JSON (no NaN or infinity).

        Returns
        -------
        str

        Raises
        ------
        ValueError
            If a number other than a feature is not finite (never the case for a result of
            :func:`score_segment`).
        """
        return json_line(self.to_dict())


def json_line(obj: Mapping[str, Any]) -> str:
    """One object as one line of compact, strict JSON (what ``dipshape score`` writes).

    Parameters
    ----------
    obj : Mapping
        A result (:meth:`Result.to_dict`) or an error object (:func:`score_error`).

    Returns
    -------
    str
        Without a trailing newline.

    Raises
    ------
    ValueError
        If ``obj`` holds NaN or infinity.
    """
    return json.dumps(obj, allow_nan=False, separators=(",", ":"))


def score_error(id: str, err: DipshapeError) -> dict[str, str]:
    """The error object written in place of a result for a segment or file that failed.

    Parameters
    ----------
    id : str
        Segment id, or the file's stem when the file could not be read.
    err : DipshapeError
        What went wrong.

    Returns
    -------
    dict
        ``{"schema_version", "id", "error", "detail"}`` with ``error`` the stable code.

    Examples
    --------
    >>> from features.errors import FileFormatError
    >>> score_error("LS-0042", FileFormatError("empty_file", "'LS-0042.csv' is empty"))["error"]
    'empty_file'
    """
    return {"schema_version": SCHEMA_VERSION, "id": str(id), "error": err.code,
            "detail": err.detail}


def result_schema() -> dict[str, Any]:
    """The JSON Schema (draft 2020-12) of a result line and of an error line.

    Returns
    -------
    dict
        The parsed ``service/result.schema.json``.
    """
    text = resources.files("service").joinpath(_SCHEMA_FILE).read_text(encoding="utf-8")
    return json.loads(text)


# --------------------------------------------------------------------------------------------
# Scoring one segment
# --------------------------------------------------------------------------------------------


def check_model(model: LoadedModel) -> None:
    """Refuse a model that cannot score this extractor's features into the result contract.

    Parameters
    ----------
    model : LoadedModel
        A model from :func:`training.registry.load_model`.

    Raises
    ------
    ModelError
        ``feature_version_mismatch``, ``feature_names_mismatch`` or ``missing_classes``.
    """
    card = model.card
    if card.feature_version != FEATURE_VERSION:
        raise ModelError(
            "feature_version_mismatch",
            f"model {card.version} was trained on feature version {card.feature_version!r}; "
            f"the extractor computes version {FEATURE_VERSION!r}: retrain it",
        )
    if tuple(card.feature_names) != FEATURE_NAMES:
        diff = _first_difference(tuple(card.feature_names), FEATURE_NAMES)
        raise ModelError(
            "feature_names_mismatch",
            f"model {card.version} expects {len(card.feature_names)} features that differ "
            f"from the extractor's {len(FEATURE_NAMES)} ({diff}): retrain it",
        )
    missing = [c for c in CLASSES if c not in card.classes]
    if missing:
        raise ModelError(
            "missing_classes",
            f"model {card.version} lacks the contract classes {missing}; a model must predict "
            f"all of {list(CLASSES)} (it may add more)",
        )


def score_segment(
    segment: Segment,
    model: LoadedModel,
    *,
    ephemeris: Ephemeris | None = None,
    ood: Mapping[str, Any] | None = None,
    ood_max_outside: int = OOD_MAX_OUTSIDE,
) -> Result:
    """Measure and classify one segment.

    Same parameters and errors as :func:`score_segment_with_features`, which this calls.

    Returns
    -------
    Result

    Examples
    --------
    >>> model = load_model(Path("models"), expected_feature_version=FEATURE_VERSION)
    ... # doctest: +SKIP
    >>> score_segment(read_segment("LS-0042.csv"), model).label  # doctest: +SKIP
    'exocomet'
    """
    return score_segment_with_features(segment, model, ephemeris=ephemeris, ood=ood,
                                       ood_max_outside=ood_max_outside)[0]


def score_segment_with_features(
    segment: Segment,
    model: LoadedModel,
    *,
    ephemeris: Ephemeris | None = None,
    ood: Mapping[str, Any] | None = None,
    ood_max_outside: int = OOD_MAX_OUTSIDE,
) -> tuple[Result, Features]:
    """Measure and classify one segment, returning the measurement too (for plots).

    Parameters
    ----------
    segment : Segment
        A validated segment; its ``id`` becomes the result's ``id``.
    model : LoadedModel
        A verified model (see :func:`check_model` for what is refused).
    ephemeris : Ephemeris, optional
        Known period, epoch and duration; no period is searched when given.
    ood : Mapping, optional
        Feature name -> ``{"q_lo", "q_hi", "nan_fraction"}`` (see :func:`load_ood`); None
        skips the out-of-distribution test.
    ood_max_outside : int
        Raise ``out_of_distribution`` when more than this many features are outside.

    Returns
    -------
    result : Result
    features : Features
        What :func:`features.pipeline.extract` measured (events, fits, flags).

    Raises
    ------
    ModelError
        An incompatible model (:func:`check_model`), a malformed ``ood`` (``invalid_ood``) or
        non-finite probabilities (``invalid_prediction``).
    ParameterError
        From the extractor or the model (e.g. ``invalid_parameter``).

    Examples
    --------
    >>> model = load_model(Path("models"), expected_feature_version=FEATURE_VERSION)
    ... # doctest: +SKIP
    >>> score_segment(read_segment("LS-0042.csv"), model).label  # doctest: +SKIP
    'exocomet'
    """
    start = time.perf_counter()
    check_model(model)
    if isinstance(ood_max_outside, bool) or not isinstance(ood_max_outside, int) \
            or ood_max_outside < 0:
        raise ParameterError("invalid_parameter",
                             f"ood_max_outside must be an integer >= 0, got {ood_max_outside!r}")
    table = None if ood is None else _check_ood(ood, where="ood")
    feats = extract(segment, ephemeris)
    values = np.asarray(feats.values, dtype=np.float64)
    proba = model.predict_proba(values[np.newaxis, :])[0]
    if not np.all(np.isfinite(proba)):
        raise ModelError("invalid_prediction",
                         f"model {model.card.version} returned non-finite probabilities {proba}")
    classes = tuple(model.card.classes)
    flags = list(feats.flags)
    by_name = {n: float(v) for n, v in zip(FEATURE_NAMES, values, strict=True)}
    if table is not None:
        outside = ood_outside(by_name, table)
        if len(outside) > ood_max_outside:
            flags.append(OOD_FLAG)
            _log.info("%s: %d features outside the training range: %s", segment.id,
                      len(outside), ", ".join(outside))
    eph = feats.ephemeris
    result = Result(
        schema_version=SCHEMA_VERSION,
        id=segment.id,
        label=classes[int(np.argmax(proba))],
        probabilities=MappingProxyType(
            {c: float(p) for c, p in zip(classes, proba, strict=True)}),
        flags=tuple(dict.fromkeys(flags)),
        features=MappingProxyType({n: _finite_or_none(v) for n, v in by_name.items()}),
        events=tuple(
            MappingProxyType({"t_mid": float(e.t_mid), "depth": float(e.depth),
                              "duration_days": float(e.duration_days), "snr": float(e.snr)})
            for e in feats.events),
        ephemeris=None if eph is None else MappingProxyType(
            {"period_days": float(eph.period_days), "epoch": float(eph.epoch),
             "duration_days": float(eph.duration_days)}),
        model=MappingProxyType({"name": model.card.name, "version": model.card.version,
                                "sha256": model.sha256}),
        elapsed_ms=round((time.perf_counter() - start) * 1e3, 3),
    )
    return result, feats


# --------------------------------------------------------------------------------------------
# Out of distribution
# --------------------------------------------------------------------------------------------


def ood_outside(features: Mapping[str, float | None], ood: Mapping[str, Any]) -> tuple[str, ...]:
    """Names of the features that fall outside the training range (module docstring rule).

    Parameters
    ----------
    features : Mapping of str to float or None
        Feature name -> value (NaN or None = unmeasured).
    ood : Mapping
        Feature name -> ``{"q_lo", "q_hi", "nan_fraction"}``; names absent from either side
        are not tested.

    Returns
    -------
    tuple of str
        In :data:`features.catalog.FEATURE_NAMES` order.

    Raises
    ------
    ModelError
        ``invalid_ood`` for a malformed table.

    Examples
    --------
    >>> table = {"snr": {"q_lo": 7.0, "q_hi": 90.0, "nan_fraction": 0.0},
    ...          "depth_ppm": {"q_lo": 50.0, "q_hi": 9e4, "nan_fraction": 0.0}}
    >>> ood_outside({"snr": 250.0, "depth_ppm": 400.0}, table)
    ('snr',)
    """
    table = _check_ood(ood, where="ood")
    names = [n for n in FEATURE_NAMES if n in table and n in features]
    values = np.array([np.nan if features[n] is None else float(features[n]) for n in names])
    # one rule for training and scoring: training.train.ood_score
    _, outside = ood_score(values, {"features": {n: table[n] for n in names}})
    return tuple(outside)


def load_ood(registry_root: Path, version: str) -> Mapping[str, Any] | None:
    """Read the training-range table of a model version, when it has one.

    Parameters
    ----------
    registry_root : Path
        Registry folder.
    version : str
        Version folder name (e.g. ``model.card.version``).

    Returns
    -------
    Mapping or None
        Feature name -> ``{"q_lo", "q_hi", "nan_fraction"}`` (read-only), or None when the
        folder has no :data:`OOD_FILE`. The file may also wrap that mapping as
        ``{"features": {...}, ...}``; entries for names outside the catalogue are ignored.

    Raises
    ------
    ModelError
        ``model_not_found`` / ``invalid_card`` for the version, ``model_integrity`` when the
        file is not listed in the card or does not match its sha256, ``invalid_ood`` when it
        is not such a table.
    """
    root = Path(registry_root)
    card = read_card(root, version)
    path = root / version / OOD_FILE
    if not path.is_file():
        return None
    data = path.read_bytes()
    listed = card.files.get(OOD_FILE)
    if listed is None or hashlib.sha256(data).hexdigest() != listed:
        raise ModelError(
            "model_integrity",
            f"{OOD_FILE} of model {version} is "
            + ("not listed in its card" if listed is None else "not the file its card hashed"),
        )
    try:
        parsed = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelError("invalid_ood", f"{OOD_FILE} of model {version} is not JSON: {exc}") \
            from exc
    return _check_ood(parsed, where=f"{OOD_FILE} of model {version}")


def _check_ood(ood: Any, *, where: str) -> Mapping[str, Mapping[str, Any]]:
    """Validate an ood table; return feature name -> normalised entry (catalogue names only)."""
    if isinstance(ood, Mapping) and isinstance(ood.get("features"), Mapping):
        ood = ood["features"]
    if not isinstance(ood, Mapping):
        raise ModelError("invalid_ood", f"{where} must map feature names to ranges")
    known = set(FEATURE_NAMES)
    table: dict[str, Mapping[str, Any]] = {}
    for name, entry in ood.items():
        if name not in known:
            continue
        if not isinstance(entry, Mapping) or any(k not in entry for k in _OOD_KEYS):
            raise ModelError("invalid_ood",
                             f"{where}: entry {name!r} must hold {', '.join(_OOD_KEYS)}")
        lo, hi = (_ood_number(entry[k], where, name, k, none_ok=True) for k in ("q_lo", "q_hi"))
        frac = _ood_number(entry["nan_fraction"], where, name, "nan_fraction", none_ok=False)
        if not 0.0 <= frac <= 1.0 or (lo is not None and hi is not None and lo > hi):
            raise ModelError("invalid_ood", f"{where}: entry {name!r} needs q_lo <= q_hi and "
                             f"0 <= nan_fraction <= 1; got {dict(entry)}")
        table[name] = MappingProxyType({"q_lo": lo, "q_hi": hi, "nan_fraction": frac})
    return MappingProxyType(table)


def _ood_number(value: Any, where: str, name: str, key: str, *, none_ok: bool) -> float | None:
    if value is None and none_ok:
        return None
    if isinstance(value, bool) or not isinstance(value, int | float) \
            or not math.isfinite(float(value)):
        raise ModelError("invalid_ood", f"{where}: {name}.{key} must be a finite number"
                         + (" or null" if none_ok else "") + f", got {value!r}")
    return float(value)


# --------------------------------------------------------------------------------------------
# Files, folders and the command line's arguments
# --------------------------------------------------------------------------------------------


def parse_ephemeris(text: str) -> Ephemeris:
    """Parse ``"PERIOD,EPOCH,DURATION"`` (days, the light curves' time system).

    Parameters
    ----------
    text : str
        Three comma-separated numbers, e.g. ``"3.52,1412.37,0.12"``.

    Returns
    -------
    Ephemeris

    Raises
    ------
    ParameterError
        ``invalid_ephemeris`` naming what is wrong (count, a non-number, a non-positive or
        non-finite value, a duration not shorter than the period).

    Examples
    --------
    >>> parse_ephemeris("3.52, 1412.37, 0.12").period_days
    3.52
    """
    hint = "expected PERIOD,EPOCH,DURATION in days, e.g. 3.52,1412.37,0.12"
    if not isinstance(text, str):
        raise ParameterError("invalid_ephemeris", f"{hint}; got {text!r}")
    parts = [p.strip() for p in text.split(",")]
    if len(parts) != 3:
        raise ParameterError("invalid_ephemeris",
                             f"{hint}; got {text!r} ({len(parts)} value(s))")
    numbers = []
    for what, part in zip(("PERIOD", "EPOCH", "DURATION"), parts, strict=True):
        try:
            numbers.append(float(part))
        except ValueError:
            raise ParameterError("invalid_ephemeris",
                                 f"{hint}; {what} {part!r} is not a number") from None
    try:
        return Ephemeris(period_days=numbers[0], epoch=numbers[1], duration_days=numbers[2])
    except ParameterError as exc:
        raise ParameterError("invalid_ephemeris", f"{text!r}: {exc.detail}") from exc


def default_registry_root(*, cwd: Path | None = None) -> Path:
    """The registry used when none is named: ``./models`` if it exists, else the shipped one.

    Parameters
    ----------
    cwd : Path, optional
        Folder standing for the current directory (default :func:`pathlib.Path.cwd`).

    Returns
    -------
    Path
        ``<cwd>/models`` when that folder exists, otherwise the ``models/`` folder beside the
        ``service`` package (the repository's shipped models).
    """
    local = (Path.cwd() if cwd is None else Path(cwd)) / "models"
    return local if local.is_dir() else _REPO_MODELS


def file_stem(path: Path) -> str:
    """A file's name without its light-curve suffix (``LS-0042.fits.gz`` -> ``LS-0042``).

    Parameters
    ----------
    path : Path

    Returns
    -------
    str
        The id :func:`features.io.read_segments` gives a single-segment file.
    """
    name = Path(path).name
    lowered = name.lower()
    suffixes = sorted((s for group in SUPPORTED_FORMATS.values() for s in group), key=len,
                      reverse=True)
    for suffix in suffixes:
        if lowered.endswith(suffix) and len(name) > len(suffix):
            return name[: -len(suffix)]
    return Path(name).stem or name


def find_inputs(paths: Iterable[str | os.PathLike[str]]) -> list[Path]:
    """Expand files and folders into the list of files to score.

    A file is kept as given (whatever its suffix: an unreadable one becomes an error line). A
    folder contributes its files with a light-curve suffix (:data:`features.io.SUPPORTED_FORMATS`)
    in name order, not recursing, skipping hidden files and :data:`SKIPPED_NAMES`. A path that
    does not exist is kept, so that it gives a ``file_not_found`` line. Repeats are dropped.

    Parameters
    ----------
    paths : iterable of path

    Returns
    -------
    list of Path

    Raises
    ------
    ParameterError
        ``no_input_files`` when nothing is left to score.
    """
    suffixes = tuple(s for group in SUPPORTED_FORMATS.values() for s in group)
    given = [Path(p) for p in paths]
    found: list[Path] = []
    for path in given:
        if path.is_dir():
            found.extend(
                sorted(p for p in path.iterdir()
                       if p.is_file() and not p.name.startswith(".")
                       and p.name not in SKIPPED_NAMES and p.name.lower().endswith(suffixes)))
        else:
            found.append(path)
    unique = list(dict.fromkeys(found))
    if not unique:
        names = ", ".join(str(p) for p in given) or "(none)"
        raise ParameterError(
            "no_input_files",
            f"no light-curve files in {names} (suffixes: {', '.join(suffixes)})",
        )
    return unique


def score_path(
    path: str | os.PathLike[str],
    model: LoadedModel,
    *,
    ephemeris: Ephemeris | None = None,
    ood: Mapping[str, Any] | None = None,
    max_points: int | None = None,
) -> list[dict[str, Any]]:
    """Score every segment of one file; failures become error objects, never exceptions.

    Parameters
    ----------
    path : path
        A CSV, JSON, FITS or Parquet light-curve file (one or many segments).
    model : LoadedModel
        The model (checked with :func:`check_model` first).
    ephemeris : Ephemeris, optional
        Applied to every segment of the file.
    ood : Mapping, optional
        Training-range table (:func:`load_ood`).
    max_points : int, optional
        A segment with more points becomes a ``too_many_points`` error object (the REST
        service's limit).

    Returns
    -------
    list of dict
        One object per segment in file order: a result (:meth:`Result.to_dict`) or an error
        (:func:`score_error`). A file that cannot be read gives one error object whose id is
        the file's stem (:func:`file_stem`).

    Raises
    ------
    ModelError
        An incompatible model: the same for every segment, so the caller should stop.
    """
    check_model(model)
    stem = file_stem(Path(path))
    try:
        segments = read_segments(path)
    except DipshapeError as err:
        _log.info("%s: %s", stem, err)
        return [score_error(stem, err)]
    lines: list[dict[str, Any]] = []
    for seg in segments:
        if max_points is not None and seg.n_points > max_points:
            lines.append(score_error(seg.id, SegmentError(
                "too_many_points", f"segment {seg.id!r} has {seg.n_points} points; the limit "
                f"is {max_points}")))
            continue
        try:
            lines.append(score_segment(seg, model, ephemeris=ephemeris, ood=ood).to_dict())
        except ModelError:
            raise
        except DipshapeError as err:
            lines.append(score_error(seg.id, err))
        except Exception as exc:  # one bad segment must not end a batch
            _log.exception("%s: unexpected failure while scoring", seg.id)
            lines.append(score_error(seg.id, DipshapeError(
                "internal_error", f"{type(exc).__name__}: {exc}")))
    return lines


# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------


def _finite_or_none(value: float | None) -> float | None:
    if value is None:
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def _first_difference(got: Sequence[str], want: Sequence[str]) -> str:
    for i, (a, b) in enumerate(zip(got, want, strict=False)):
        if a != b:
            return f"position {i}: model {a!r}, extractor {b!r}"
    return f"model has {len(got)}, extractor {len(want)}"
