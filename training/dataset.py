"""Feature tables: one row per segment, its labels and its feature vector.

:func:`simulated_table` simulates labelled segments and measures them; :func:`labelled_table`
measures a folder of light curves labelled by a ``labels.csv``. Both return a
:class:`pandas.DataFrame` with the columns of :data:`TABLE_COLUMNS`:

``id, label, subtype, true_snr``
    the segment id, its class, its finer truth (``""`` when unknown) and, for simulations, the
    SNR of the injected signal (:attr:`training.simulate.SimulatedSegment.snr`; NaN when
    unknown);
every name of :data:`features.catalog.FEATURE_NAMES`
    the measured feature vector (float, NaN = not measurable). It includes the measured
    ``snr`` (detection SNR), ``cadence_min`` and ``n_points`` of the segment;
``best_family, flags``
    :attr:`features.fits.EventFits.best_family` (``""`` when no dip was fitted) and the flags
    of :func:`features.extract` joined by ``";"``.

Both are parallel with joblib in chunks: each worker simulates (or reads) *and* measures its
chunk, so only the small rows travel between processes. Every segment is measured with native
thread pools limited to one thread, and segment ``i`` of a simulation always draws from child
``i`` of ``numpy.random.SeedSequence(seed)`` (as :func:`training.simulate.simulate_dataset`
does, with the same ids), so the table is identical whatever ``n_jobs`` is.

A segment the validator or the extractor refuses (a :class:`~features.errors.DipshapeError`)
is left out of the table and counted in a logged warning, never silently.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import logging
import math
import os
import tempfile
from collections import Counter
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from features.catalog import FEATURE_NAMES, FEATURE_VERSION
from features.errors import DipshapeError, FileFormatError, ParameterError
from features.io import SUPPORTED_FORMATS, read_segment
from features.pipeline import extract
from features.segment import Segment, make_segment
from training.classes import CLASSES
from training.priors import PRIORS, PriorTable
from training.simulate import simulate_segment

__all__ = [
    "META_COLUMNS",
    "MIN_CLASS_EXAMPLES",
    "TABLE_COLUMNS",
    "cache_key",
    "class_order",
    "feature_matrix",
    "labelled_table",
    "simulated_table",
]

logger = logging.getLogger(__name__)

META_COLUMNS: tuple[str, ...] = ("id", "label", "subtype", "true_snr")
"""The columns before the feature vector."""

TABLE_COLUMNS: tuple[str, ...] = (*META_COLUMNS, *FEATURE_NAMES, "best_family", "flags")
"""Every column of a feature table, in order."""

MIN_CLASS_EXAMPLES = 20
"""Below this many examples :func:`labelled_table` warns that a class is too rare to learn."""

_MAX_CHUNK = 100  # segments per task: about 3 s of work, fine enough for the progress bar
_LISTED = 10  # ids named in one log message


# --------------------------------------------------------------------------------------------
# public API


def simulated_table(
    n: int,
    *,
    seed: int,
    classes: Iterable[str] = CLASSES,
    n_jobs: int = 1,
    progress: bool = False,
    cache_dir: str | os.PathLike[str] | None = None,
    priors: PriorTable = PRIORS,
    min_dip_snr: float = 0.0,
) -> pd.DataFrame:
    """Simulate ``n`` labelled segments and measure their features.

    Parameters
    ----------
    n : int
        Number of segments; segment ``i`` has class ``classes[i % len(classes)]`` and id
        ``f"SIM{seed}-{i:06d}"``, exactly as in :func:`training.simulate.simulate_dataset`.
    seed : int
        Master seed (>= 0); segment ``i`` uses child ``i`` of ``SeedSequence(seed)``.
    classes : iterable of str
        Classes to simulate (default: the five of :data:`training.classes.CLASSES`).
    n_jobs : int
        Worker processes (joblib; -1 = all cores). The table does not depend on it.
    progress : bool
        Show a progress bar on stderr.
    cache_dir : path, optional
        Folder of cached tables. The table is stored as ``<cache_key(...)>.parquet`` (written
        to a temporary name, then renamed) and read back when that file already exists.
    priors : PriorTable
        Prior table of the simulator (its hash is part of the cache key).
    min_dip_snr : float
        Detection selection of the planet, binary and comet segments
        (:func:`training.simulate.simulate_segment`); part of the cache key.

    Returns
    -------
    pandas.DataFrame
        One row per measured segment, columns :data:`TABLE_COLUMNS`, in segment order.
        ``attrs["source"]`` describes how it was made (kind, n, seed, classes, priors hash,
        feature version, number of refused segments).

    Raises
    ------
    ParameterError
        ``invalid_parameter`` for a bad ``n``, ``seed`` or ``n_jobs``; ``unknown_class``.

    Notes
    -----
    The cache key holds every input of the table: the feature version, ``n``, ``seed``, the
    classes and a hash of the prior table. A change to the simulator's or the extractor's
    *code* that keeps ``FEATURE_VERSION`` is not in it: empty the cache folder after one.

    Examples
    --------
    >>> table = simulated_table(5, seed=0)  # doctest: +SKIP
    >>> list(table["label"])  # doctest: +SKIP
    ['planet', 'eclipsing_binary', 'exocomet', 'variability', 'systematic']
    """
    classes = _check_classes(classes)
    _check_count(n, "n")
    _check_count(seed, "seed", minimum=0)
    _check_n_jobs(n_jobs)
    key = cache_key(n, seed=seed, classes=classes, priors=priors, min_dip_snr=min_dip_snr)
    path = None if cache_dir is None else Path(cache_dir) / f"{key}.parquet"
    if path is not None and path.is_file():
        table = pd.read_parquet(path)
        logger.info("cache hit: read %d rows from %s (%d of %d segments were refused when "
                    "it was built)", len(table), path, n - len(table), n)
        table.attrs["source"] = _source(n, seed, classes, priors, refused=n - len(table),
                                        min_dip_snr=min_dip_snr)
        return table

    prefix = f"SIM{seed}-"
    children = np.random.SeedSequence(seed).spawn(n)
    jobs = [(i, classes[i % len(classes)], children[i]) for i in range(n)]
    worker = functools.partial(_simulated_chunk, prefix=prefix, priors=priors,
                               min_dip_snr=min_dip_snr)
    table, refused = _measure_all(jobs, worker, n_jobs=n_jobs, progress=progress,
                                  desc="simulating and measuring")
    _log_refused(refused, total=n, what="simulated segments")
    table.attrs["source"] = _source(n, seed, classes, priors, refused=len(refused),
                                    min_dip_snr=min_dip_snr)
    if path is not None:
        _write_atomic(table, path)
        logger.info("cached %d rows in %s", len(table), path)
    return table


def labelled_table(
    labels_csv: str | os.PathLike[str],
    segments_dir: str | os.PathLike[str],
    *,
    n_jobs: int = 1,
    progress: bool = False,
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Measure a folder of labelled light curves.

    Parameters
    ----------
    labels_csv : path
        CSV with columns ``id,label`` (any labels, not only the five built-in classes), and
        optionally ``subtype`` and ``snr`` (the injected SNR, as in the ``labels.csv`` that
        :func:`training.simulate.write_dataset` writes), carried over as ``subtype`` and
        ``true_snr``. ``id`` is the stem of a file in ``segments_dir``.
    segments_dir : path
        Folder of light curves in any format of :data:`features.io.SUPPORTED_FORMATS`, one
        segment per file, read with :func:`features.io.read_segment`.
    n_jobs : int
        Worker processes (joblib; -1 = all cores).
    progress : bool
        Show a progress bar on stderr.

    Returns
    -------
    table : pandas.DataFrame
        One row per labelled, readable segment, columns :data:`TABLE_COLUMNS`, in the order
        of ``labels_csv``.
    summary : dict
        ``n_labels`` (rows of the CSV), ``n_rows`` (rows of the table), ``counts`` (class ->
        examples in the table, built-in classes first), ``missing`` (ids without a file),
        ``unreadable`` (id -> ``"code: detail"`` of files that could not be read or measured),
        ``duplicates`` (ids listed more than once; the first label is kept) and
        ``rare_classes`` (class -> count, below :data:`MIN_CLASS_EXAMPLES`).

    Raises
    ------
    FileFormatError
        ``file_not_found`` or ``missing_columns`` for the labels file.
    ParameterError
        ``invalid_parameter`` for an empty id or label, a segments folder that does not exist,
        or a bad ``n_jobs``.

    Notes
    -----
    Labels whose file is missing, classes with fewer than :data:`MIN_CLASS_EXAMPLES`
    examples, duplicated ids and unreadable files are each reported by a logged warning.
    """
    _check_n_jobs(n_jobs)
    labels = _read_labels(Path(labels_csv))
    folder = Path(segments_dir)
    if not folder.is_dir():
        raise ParameterError("invalid_parameter", f"segments_dir {folder} is not a folder")
    files = _files_by_stem(folder)

    n_labels = len(labels)
    duplicates = sorted(set(labels["id"][labels["id"].duplicated()]))
    if duplicates:
        logger.warning("%d ids are listed more than once in %s; the first label is kept: %s",
                       len(duplicates), labels_csv, _some(duplicates))
        labels = labels.drop_duplicates("id", keep="first")
    missing = [i for i in labels["id"] if i not in files]
    if missing:
        logger.warning("%d of %d labelled segments have no file in %s: %s", len(missing),
                       len(labels), folder, _some(missing))
    jobs = [(row.id, row.label, row.subtype, row.true_snr, files[row.id])
            for row in labels.itertuples(index=False) if row.id in files]
    table, refused = _measure_all(jobs, _labelled_chunk, n_jobs=n_jobs, progress=progress,
                                  desc="reading and measuring")
    if refused:
        logger.warning("%d of %d labelled files could not be read or measured and were "
                       "skipped: %s", len(refused), len(jobs),
                       _some([f"{i} ({code})" for i, code, _ in refused]))

    order = class_order(table["label"])
    counts = {c: int(n) for c, n in Counter(table["label"]).items()}
    counts = {c: counts[c] for c in order}
    rare = {c: k for c, k in counts.items() if k < MIN_CLASS_EXAMPLES}
    if rare:
        logger.warning("classes with fewer than %d examples (too few to learn or to calibrate "
                       "well): %s", MIN_CLASS_EXAMPLES,
                       ", ".join(f"{c} ({k})" for c, k in rare.items()))
    extra = [c for c in order if c not in CLASSES]
    if extra:
        logger.info("labels beyond the built-in classes: %s", ", ".join(extra))
    table.attrs["source"] = {"kind": "labelled", "labels_csv": str(labels_csv),
                             "segments_dir": str(folder), "feature_version": FEATURE_VERSION}
    summary = {
        "n_labels": n_labels,
        "n_rows": len(table),
        "counts": counts,
        "missing": missing,
        "unreadable": {i: f"{code}: {detail}" for i, code, detail in refused},
        "duplicates": duplicates,
        "rare_classes": rare,
    }
    return table, summary


def class_order(labels: Iterable[str]) -> list[str]:
    """The distinct labels: built-in classes in canonical order, then the others sorted.

    Examples
    --------
    >>> class_order(["systematic", "flare", "planet", "planet"])
    ['planet', 'systematic', 'flare']
    """
    present = {str(label) for label in labels}
    return [c for c in CLASSES if c in present] + sorted(present - set(CLASSES))


def feature_matrix(table: pd.DataFrame) -> np.ndarray:
    """The feature columns of a table as a float64 array in FEATURE_NAMES order.

    Raises
    ------
    ParameterError
        ``feature_mismatch`` when the table lacks some feature columns.
    """
    absent = [name for name in FEATURE_NAMES if name not in table.columns]
    if absent:
        raise ParameterError(
            "feature_mismatch",
            f"the table lacks {len(absent)} feature columns (e.g. {absent[:3]}); it was not "
            f"made with feature version {FEATURE_VERSION}",
        )
    return table.loc[:, list(FEATURE_NAMES)].to_numpy(dtype=np.float64)


def cache_key(n: int, *, seed: int, classes: Sequence[str], priors: PriorTable = PRIORS,
              min_dip_snr: float = 0.0) -> str:
    """The cache file stem of a simulated table.

    ``features-v<FEATURE_VERSION>-n<n>-seed<seed>-<classes joined by '+'>-priors<hash>``, the
    hash being the first 16 hex digits of the sha256 of every field of every prior row.

    Examples
    --------
    >>> cache_key(10, seed=3, classes=["planet", "exocomet"])[:40]
    'features-v1-n10-seed3-planet+exocomet-pri'
    """
    selection = f"-snr{min_dip_snr:g}" if min_dip_snr > 0 else ""
    return (f"features-v{FEATURE_VERSION}-n{int(n)}-seed{int(seed)}-{'+'.join(classes)}"
            f"-priors{_priors_hash(priors)[:16]}{selection}")


# --------------------------------------------------------------------------------------------
# workers (module level so that joblib can send them to other processes)

_Row = tuple[str, str, str, float, np.ndarray, str, str]
_Refusal = tuple[str, str, str]  # id, code, detail


def _measure_one(id: str, label: str, subtype: str, true_snr: float,
                 load: Callable[[], Segment]) -> tuple[_Row | None, _Refusal | None]:
    """Validate (or read) and measure one segment; a DipshapeError becomes a refusal."""
    try:
        feats = extract(load())
    except DipshapeError as exc:
        return None, (id, exc.code, exc.detail)
    best = feats.fits.best_family if feats.fits is not None else ""
    return (id, label, subtype, true_snr, feats.values, best, ";".join(feats.flags)), None


def _simulated_chunk(jobs: Sequence[tuple[int, str, np.random.SeedSequence]], *, prefix: str,
                     priors: PriorTable, min_dip_snr: float = 0.0,
                     ) -> list[tuple[_Row | None, _Refusal | None]]:
    from threadpoolctl import threadpool_limits

    out = []
    with threadpool_limits(limits=1):
        for i, label, child in jobs:
            sim = simulate_segment(label, np.random.default_rng(child), id=f"{prefix}{i:06d}",
                                   priors=priors, min_dip_snr=min_dip_snr)
            out.append(_measure_one(
                sim.id, sim.label, sim.subtype, sim.snr,
                functools.partial(make_segment, sim.time, sim.flux, sim.flux_err, id=sim.id)))
    return out


def _read(path: Path, id: str) -> Segment:
    try:
        return read_segment(path, id=id)
    except OSError as exc:  # permissions, a file removed meanwhile...
        raise FileFormatError("unreadable_file", f"{path.name}: {exc}") from exc


def _labelled_chunk(jobs: Sequence[tuple[str, str, str, float, Path]]
                    ) -> list[tuple[_Row | None, _Refusal | None]]:
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        return [_measure_one(id, label, subtype, true_snr, functools.partial(_read, path, id))
                for id, label, subtype, true_snr, path in jobs]


# --------------------------------------------------------------------------------------------
# private helpers


def _measure_all(jobs: Sequence[Any], worker: Callable[[Sequence[Any]], list], *, n_jobs: int,
                 progress: bool, desc: str) -> tuple[pd.DataFrame, list[_Refusal]]:
    """Run ``worker`` over chunks of ``jobs`` (in order) and assemble the table."""
    workers = _effective_jobs(n_jobs)
    size = max(1, min(_MAX_CHUNK, math.ceil(len(jobs) / (4 * workers)))) if jobs else 1
    chunks = [jobs[i:i + size] for i in range(0, len(jobs), size)]
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=len(jobs), desc=desc, unit="seg", leave=False)  # stderr by default
    if workers == 1:
        results: Iterable[list] = (worker(c) for c in chunks)
    else:
        from joblib import Parallel, delayed

        results = Parallel(n_jobs=workers, return_as="generator")(
            delayed(worker)(c) for c in chunks)
    rows: list[_Row] = []
    refused: list[_Refusal] = []
    for part in results:
        for row, refusal in part:
            if row is not None:
                rows.append(row)
            else:
                refused.append(refusal)
        if bar is not None:
            bar.update(len(part))
    if bar is not None:
        bar.close()
    return _frame(rows), refused


def _frame(rows: Sequence[_Row]) -> pd.DataFrame:
    values = (np.vstack([r[4] for r in rows]) if rows
              else np.empty((0, len(FEATURE_NAMES)), dtype=np.float64))
    columns: dict[str, Any] = {
        "id": pd.array([r[0] for r in rows], dtype="str"),
        "label": pd.array([r[1] for r in rows], dtype="str"),
        "subtype": pd.array([r[2] for r in rows], dtype="str"),
        "true_snr": np.array([r[3] for r in rows], dtype=np.float64),
    }
    for j, name in enumerate(FEATURE_NAMES):
        columns[name] = values[:, j]
    columns["best_family"] = pd.array([r[5] for r in rows], dtype="str")
    columns["flags"] = pd.array([r[6] for r in rows], dtype="str")
    return pd.DataFrame(columns, columns=list(TABLE_COLUMNS))


def _log_refused(refused: Sequence[_Refusal], *, total: int, what: str) -> None:
    if not refused:
        logger.info("measured all %d %s", total, what)
        return
    codes = Counter(code for _, code, _ in refused)
    logger.warning("dropped %d of %d %s that the validator refused (%s): %s", len(refused),
                   total, what, ", ".join(f"{c}: {k}" for c, k in sorted(codes.items())),
                   _some([i for i, _, _ in refused]))


def _some(items: Sequence[str]) -> str:
    head = ", ".join(str(i) for i in items[:_LISTED])
    return head + (f", ... ({len(items) - _LISTED} more)" if len(items) > _LISTED else "")


def _priors_hash(priors: PriorTable) -> str:
    rows = [dataclasses.asdict(priors[name]) for name in priors]
    text = json.dumps(rows, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def _source(n: int, seed: int, classes: Sequence[str], priors: PriorTable, *,
            refused: int, min_dip_snr: float = 0.0) -> dict[str, Any]:
    return {"kind": "simulated", "n": int(n), "seed": int(seed), "classes": list(classes),
            "priors_sha256": _priors_hash(priors), "feature_version": FEATURE_VERSION,
            "n_refused": int(refused), "min_dip_snr": float(min_dip_snr)}


def _write_atomic(table: pd.DataFrame, path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        table.to_parquet(tmp, index=False)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _check_classes(classes: Iterable[str]) -> tuple[str, ...]:
    out = tuple(classes)
    unknown = [c for c in out if c not in CLASSES]
    if not out or unknown or len(set(out)) != len(out):
        raise ParameterError(
            "unknown_class",
            f"classes must be distinct names among {', '.join(CLASSES)}; got {list(out)}")
    return out


def _check_count(value: Any, name: str, *, minimum: int = 1) -> None:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < minimum:
        raise ParameterError("invalid_parameter",
                             f"{name} must be an integer >= {minimum}, got {value!r}")


def _check_n_jobs(n_jobs: Any) -> None:
    if isinstance(n_jobs, bool) or not isinstance(n_jobs, int) or not (
            n_jobs >= 1 or n_jobs == -1):
        raise ParameterError("invalid_parameter",
                             f"n_jobs must be a positive integer or -1, got {n_jobs!r}")


def _effective_jobs(n_jobs: int) -> int:
    return (os.cpu_count() or 1) if n_jobs == -1 else n_jobs


def _read_labels(path: Path) -> pd.DataFrame:
    if not path.is_file():
        raise FileFormatError("file_not_found", f"no labels file {path}")
    raw = pd.read_csv(path, dtype=str, keep_default_na=False)
    raw.columns = [str(c).strip() for c in raw.columns]
    absent = [c for c in ("id", "label") if c not in raw.columns]
    if absent:
        raise FileFormatError("missing_columns",
                              f"{path.name} needs columns id,label; missing {absent}, found "
                              f"{list(raw.columns)}")
    ids = raw["id"].str.strip()
    labels = raw["label"].str.strip()
    empty = np.flatnonzero((ids == "").to_numpy() | (labels == "").to_numpy())
    if empty.size:
        raise ParameterError("invalid_parameter",
                             f"{path.name}: empty id or label on data rows "
                             f"{[int(i) + 1 for i in empty[:_LISTED]]}")
    subtype = raw["subtype"].str.strip() if "subtype" in raw.columns else ""
    snr = (pd.to_numeric(raw["snr"], errors="coerce") if "snr" in raw.columns
           else np.nan)
    return pd.DataFrame({"id": ids, "label": labels, "subtype": subtype,
                         "true_snr": snr}).astype({"true_snr": np.float64})


def _stem(name: str) -> str | None:
    lowered = name.lower()
    suffixes = sorted((s for group in SUPPORTED_FORMATS.values() for s in group), key=len,
                      reverse=True)
    for suffix in suffixes:
        if lowered.endswith(suffix) and len(name) > len(suffix):
            return name[: -len(suffix)]
    return None


def _files_by_stem(folder: Path) -> dict[str, Path]:
    files: dict[str, Path] = {}
    for path in sorted(p for p in folder.iterdir() if p.is_file()):
        stem = _stem(path.name)
        if stem is None:
            continue
        if stem in files:
            logger.warning("two files share the stem %r in %s: using %s, ignoring %s", stem,
                           folder, files[stem].name, path.name)
            continue
        files[stem] = path
    return files
