"""Batch scoring: many light-curve segments in chunks, in-process or on a Dask cluster.

The result of every segment is the line :func:`service.scoring.score_path` gives it, the same
that ``dipshape score`` writes; this module only decides what runs where and how the lines are
kept.

How a run goes
--------------
1. :func:`plan_inputs` expands the inputs (files, folders, glob patterns, manifests, Parquet
   long tables) into an ordered list of *pieces* and cuts it into chunks of ``chunk_size``
   segments. A file counts as one segment (a CSV with ``segment_id`` or a JSON list is still
   scored whole, in one chunk); a Parquet long table (``segment_id, time, flux[, flux_err]``)
   is split by its segments. The order of the chunks, and of the records in them, is the
   order of the inputs.
2. :func:`run_batch` writes ``manifest.json`` into the output folder (what was asked: the
   inputs' fingerprint, the chunking, the model, the part format and the ephemeris), then
   scores the chunks that have no part yet and writes one part per chunk
   (``part-00000.parquet``... or ``.jsonl``), each first to a hidden temporary name and then
   renamed, so that a part exists only when it is complete. At the end it writes
   ``summary.json`` (:class:`BatchSummary`).
3. On a cluster, the client reads each chunk's input bytes and sends them with the task, and
   the workers send the records back: workers need not see the client's files, and only the
   client writes into the output folder. The verified model travels once to every worker as a
   :class:`PortableModel` inside a worker plugin (a worker that is restarted gets it again)
   and is rebuilt there into a :class:`training.registry.LoadedModel` once per worker
   process, after its sha256 and its types are checked as :func:`training.registry.load_model`
   checks them. At most a few chunks per worker thread are in flight, so the client's and the
   scheduler's memory stay bounded whatever the number of inputs. A chunk whose worker dies is
   run again (by the scheduler, then by this module up to :data:`MAX_ATTEMPTS` times); its
   part is written once, when its result arrives.

``resume=True`` keeps the parts that exist and scores only the missing chunks; it refuses
(``resume_mismatch``) when the inputs, the chunking, the model, the format or the ephemeris
differ from the folder's manifest. Files are fingerprinted by resolved path, size and
modification time (the quick check that make and rsync use: common practice), a Parquet long
table also by its number of segments.

Records
-------
A Parquet part has the columns of :data:`PART_COLUMNS`: ``id``, ``input`` (the file the
segment came from), ``label`` and ``error`` (one of them null), ``model_version`` and
``result_json``, the exact line of ``dipshape score``. A JSON-lines part holds those lines
only, so the parts concatenated in name order are what ``dipshape score`` writes for the same
inputs (apart from ``elapsed_ms``). One difference: in a Parquet long table a segment that
cannot be read gets its own error record and the other segments are scored, where the
in-process command gives the whole file one error line.

Error codes raised here (all :class:`features.errors.ParameterError`, exit code 2)::

    invalid_chunk_size    chunk_size is not an integer >= 1
    unsupported_format    a part format other than parquet or jsonl
    invalid_manifest      a manifest without a usable ``path`` column or with an empty entry
    output_exists         the output folder holds another run and resume was not asked
    resume_mismatch       resume asked, but the run differs from the folder's manifest
    invalid_run_manifest  the folder's manifest.json cannot be read
    unwritable_output     the output folder cannot be created or written
    scheduler_unreachable no Dask scheduler answers at the address given
    no_workers            the cluster has no worker to run the chunks
    no_input_files        nothing to score (from :func:`service.scoring.find_inputs`)

A :class:`features.errors.ModelError` (an incompatible or altered model) stops the run.
"""

from __future__ import annotations

import contextlib
import glob
import hashlib
import io
import json
import logging
import math
import os
import tempfile
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from types import MappingProxyType
from typing import IO, Any

from features.errors import DipshapeError, ModelError, ParameterError
from features.events import Ephemeris
from features.segment import segment_from_mapping
from service.scoring import (
    SCHEMA_VERSION,
    check_model,
    file_stem,
    find_inputs,
    json_line,
    score_error,
    score_path,
    score_segment,
)
from training.registry import MODEL_FILE, TRUSTED_TYPES, LoadedModel, ModelCard

__all__ = [
    "DEFAULT_CHUNK_SIZE",
    "MANIFEST_FILE",
    "MAX_ATTEMPTS",
    "PART_COLUMNS",
    "PART_FORMATS",
    "SUMMARY_FILE",
    "BatchSummary",
    "Plan",
    "PortableModel",
    "cluster_client",
    "iter_result_lines",
    "part_paths",
    "plan_inputs",
    "run_batch",
    "score_stream",
]

_log = logging.getLogger(__name__)

DEFAULT_CHUNK_SIZE = 64
"""Segments per chunk (one task, one part) unless told otherwise."""

MANIFEST_FILE = "manifest.json"
"""What a run asked for, written into its output folder before any part."""

SUMMARY_FILE = "summary.json"
"""Counts of a finished run (:meth:`BatchSummary.to_dict`)."""

PART_FORMATS: tuple[str, ...] = ("parquet", "jsonl")
"""Formats of the parts: Parquet records or JSON lines."""

PART_COLUMNS: tuple[str, ...] = ("id", "input", "label", "error", "model_version", "result_json")
"""Columns of a Parquet part, all strings; ``label`` is null for an error, ``error`` for a
result."""

MAX_ATTEMPTS = 3
"""Times a chunk is submitted to the cluster before it is left for a later ``resume``."""

_MANIFEST_VERSION = "1"
_PART_PREFIX = "part-"
_TMP_SUFFIX = ".tmp"
_MANIFEST_SUFFIXES = (".csv", ".parquet", ".pq")
_PARQUET_SUFFIXES = (".parquet", ".pq")
_GLOB_CHARS = frozenset("*?[")
# Column names that make a table a light curve rather than a manifest (a manifest has a
# ``path`` column and none of these).
_LIGHT_CURVE_COLUMNS = frozenset({"time", "t", "bjd", "btjd", "bkjd", "time_btjd", "time_bkjd",
                                  "time_bjd", "flux", "pdcsap_flux", "sap_flux", "segment_id"})
# Chunks in flight per worker thread: enough to keep every worker busy while the client writes
# parts, few enough to bound what the client and the scheduler hold.
_IN_FLIGHT_PER_THREAD = 2


# --------------------------------------------------------------------------------------------
# The plan
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Table:
    """A Parquet long table split by segment: ids in order of first appearance."""

    path: Path
    display: str
    id_column: str
    ids: tuple[str, ...]
    values: tuple[Any, ...] = field(repr=False)
    rows: tuple[tuple[int, int], ...] | None = field(repr=False)


@dataclass(frozen=True, slots=True)
class _FilePiece:
    path: Path
    display: str


@dataclass(frozen=True, slots=True)
class _TablePiece:
    table: _Table
    start: int
    stop: int


@dataclass(frozen=True, slots=True)
class Plan:
    """What a batch run scores, cut into chunks.

    Attributes
    ----------
    given : tuple of str
        The inputs as given (paths, folders, patterns, manifests).
    chunk_size : int
        Segments per chunk.
    chunks : tuple of tuple
        The pieces of each chunk, in input order (private piece types).
    n_files : int
        Files to read (a long table counts once).
    n_table_segments : int
        Segments of the Parquet long tables among them.
    fingerprint : str
        sha256 of the ordered inputs (resolved path, size, modification time; a long table's
        number of segments), the basis of ``resume``'s check.
    """

    given: tuple[str, ...]
    chunk_size: int
    chunks: tuple[tuple[_FilePiece | _TablePiece, ...], ...] = field(repr=False)
    n_files: int
    n_table_segments: int
    fingerprint: str

    @property
    def n_chunks(self) -> int:
        """Number of chunks (tasks and parts)."""
        return len(self.chunks)

    @property
    def n_units(self) -> int:
        """Segments planned: one per file (a multi-segment CSV or JSON counts once) plus the
        long tables' segments."""
        return sum(_weight(p) for chunk in self.chunks for p in chunk)


def plan_inputs(paths: Iterable[str | os.PathLike[str]], *,
                chunk_size: int = DEFAULT_CHUNK_SIZE) -> Plan:
    """Expand the inputs and cut them into chunks.

    Parameters
    ----------
    paths : iterable of path or str
        Light-curve files; folders (their light-curve files in name order, as
        :func:`service.scoring.find_inputs`); glob patterns (``"lumen/*.fits"``,
        ``"**"`` recursing; used when no file has that name); manifests, i.e. a CSV or
        Parquet file named on the command line with a ``path`` column and no light-curve
        column, whose entries are expanded the same way (relative ones from the manifest's
        folder); Parquet long tables with a ``segment_id`` column, split by segment.
    chunk_size : int
        Segments per chunk (>= 1).

    Returns
    -------
    Plan

    Raises
    ------
    ParameterError
        ``invalid_chunk_size``, ``invalid_manifest`` or ``no_input_files``.

    Examples
    --------
    >>> plan = plan_inputs(["lumen_sector3/", "lumen_batch.parquet"], chunk_size=64)
    ... # doctest: +SKIP
    >>> plan.n_chunks, plan.n_units  # doctest: +SKIP
    (32, 2048)
    """
    if isinstance(chunk_size, bool) or not isinstance(chunk_size, int) or chunk_size < 1:
        raise ParameterError("invalid_chunk_size",
                             f"chunk_size must be an integer >= 1, got {chunk_size!r}")
    given = tuple(str(p) for p in paths)
    files = _expand(given, allow_manifests=True)
    entries: list[_FilePiece | _Table] = []
    digest = hashlib.sha256()
    for path in files:
        table = _long_table(path) if path.name.lower().endswith(_PARQUET_SUFFIXES) else None
        entries.append(table if table is not None else _FilePiece(path, str(path)))
        digest.update(_fingerprint_line(path, table).encode("utf-8", "surrogateescape"))
    chunks = _cut(entries, chunk_size)
    return Plan(given=given, chunk_size=chunk_size, chunks=chunks, n_files=len(files),
                n_table_segments=sum(len(e.ids) for e in entries if isinstance(e, _Table)),
                fingerprint=digest.hexdigest())


def _expand(given: Sequence[str], *, allow_manifests: bool, base: Path | None = None
            ) -> list[Path]:
    """Files, folders, patterns and (on the command line only) manifests -> files in order."""
    out: list[Path] = []
    for text in given:
        path = Path(text) if base is None or Path(text).is_absolute() else base / text
        if path.is_dir():
            out.extend(_folder_files(path))
        elif path.is_file():
            if allow_manifests and path.name.lower().endswith(_MANIFEST_SUFFIXES) \
                    and _is_manifest(path):
                out.extend(_expand(_manifest_entries(path), allow_manifests=False,
                                   base=path.parent))
            else:
                out.append(path)
        elif _GLOB_CHARS & set(text):
            pattern = str(path)
            matches = sorted(glob.glob(pattern, recursive=True))
            found = [Path(m) for m in matches if Path(m).is_file()
                     and not Path(m).name.startswith(".")]
            if found:
                out.extend(found)
            else:
                _log.warning("the pattern %s matches no file", pattern)
                out.append(path)  # gives a file_not_found record
        else:
            out.append(path)  # gives a file_not_found record
    unique = list(dict.fromkeys(out))
    if not unique:
        names = ", ".join(given) or "(none)"
        raise ParameterError("no_input_files", f"no light-curve files in {names}")
    return unique


def _folder_files(folder: Path) -> list[Path]:
    try:
        return find_inputs([folder])
    except ParameterError:
        _log.warning("the folder %s holds no light-curve file", folder)
        return []


def _table_columns(path: Path) -> list[str] | None:
    """Column names of a CSV header or a Parquet schema (None when unreadable)."""
    try:
        if path.name.lower().endswith(_PARQUET_SUFFIXES):
            import pyarrow.parquet as pq

            return [str(n) for n in pq.read_schema(path).names]
        import csv

        with path.open(newline="", encoding="utf-8-sig") as handle:
            for row in csv.reader(handle):
                if row and not row[0].lstrip().startswith("#"):
                    return [c.strip() for c in row]
    except Exception:  # unreadable: left to the reader, which names the problem
        return None
    return None


def _is_manifest(path: Path) -> bool:
    names = _table_columns(path)
    if not names:
        return False
    lowered = {n.lower() for n in names}
    return "path" in lowered and not lowered & _LIGHT_CURVE_COLUMNS


def _manifest_entries(path: Path) -> list[str]:
    import pandas as pd

    try:
        frame = (pd.read_parquet(path) if path.name.lower().endswith(_PARQUET_SUFFIXES)
                 else pd.read_csv(path, dtype=str, keep_default_na=False, comment="#"))
    except Exception as exc:
        raise ParameterError("invalid_manifest", f"manifest {path} cannot be read: {exc}") \
            from exc
    hits = [c for c in frame.columns if str(c).strip().lower() == "path"]
    if len(hits) != 1:
        raise ParameterError("invalid_manifest",
                             f"manifest {path} needs exactly one 'path' column; columns: "
                             f"{[str(c) for c in frame.columns]}")
    entries = []
    for row, value in enumerate(frame[hits[0]].tolist(), start=1):
        text = "" if value is None or (isinstance(value, float) and math.isnan(value)) \
            else str(value).strip()
        if not text:
            raise ParameterError("invalid_manifest",
                                 f"manifest {path}: data row {row} has an empty path")
        entries.append(text)
    if not entries:
        raise ParameterError("invalid_manifest", f"manifest {path} lists no path")
    return entries


def _long_table(path: Path) -> _Table | None:
    """A Parquet table split by ``segment_id``, or None to score the file whole."""
    try:
        import pyarrow.parquet as pq

        names = [str(n) for n in pq.read_schema(path).names]
        hits = [n for n in names if n.strip().lower() == "segment_id"]
        if len(hits) != 1:
            return None
        column = pq.read_table(path, columns=[hits[0]]).column(0).to_pandas()
    except Exception:  # unreadable: the reader gives the file its error record
        return None
    if len(column) == 0 or column.isna().any():
        return None  # the reader's empty_file / invalid_segment_id, once for the file
    starts = column.ne(column.shift()).to_numpy(copy=True)
    starts[0] = True
    run_values = column[starts]
    values = tuple(dict.fromkeys(column.tolist()))
    rows = None
    if run_values.is_unique:  # each segment's rows are contiguous: read them by row range
        first = [int(i) for i in starts.nonzero()[0]]
        rows = tuple(zip(first, [*first[1:], len(column)], strict=True))
    return _Table(path=path, display=str(path), id_column=hits[0],
                  ids=tuple(str(v) for v in values), values=values, rows=rows)


def _fingerprint_line(path: Path, table: _Table | None) -> str:
    try:
        st = path.stat()
    except OSError:
        return f"missing\t{os.path.abspath(path)}\n"
    extra = "" if table is None else f"\t{len(table.ids)} segments"
    return f"file\t{path.resolve()}\t{st.st_size}\t{st.st_mtime_ns}{extra}\n"


def _weight(piece: _FilePiece | _TablePiece) -> int:
    return 1 if isinstance(piece, _FilePiece) else piece.stop - piece.start


def _cut(entries: Sequence[_FilePiece | _Table], size: int
         ) -> tuple[tuple[_FilePiece | _TablePiece, ...], ...]:
    chunks: list[tuple[_FilePiece | _TablePiece, ...]] = []
    current: list[_FilePiece | _TablePiece] = []
    room = size
    for entry in entries:
        if isinstance(entry, _FilePiece):
            current.append(entry)
            room -= 1
        else:
            start = 0
            while start < len(entry.ids):
                stop = min(len(entry.ids), start + room)
                current.append(_TablePiece(entry, start, stop))
                room -= stop - start
                start = stop
                if room == 0:
                    chunks.append(tuple(current))
                    current, room = [], size
            continue
        if room == 0:
            chunks.append(tuple(current))
            current, room = [], size
    if current:
        chunks.append(tuple(current))
    return tuple(chunks)


# --------------------------------------------------------------------------------------------
# The model, in a form that travels
# --------------------------------------------------------------------------------------------


class PortableModel:
    """A verified model in a picklable form: the skops bytes, the card, the ood table.

    :class:`training.registry.LoadedModel` holds a thread-pool controller that may not pickle,
    so what travels to the workers is the verified ``model.skops`` bytes and the card; the
    worker checks the bytes against the card's sha256 and loads them with the same trusted
    types as :func:`training.registry.load_model` (nothing is unpickled by skops). The rebuilt
    model is kept on the instance, so a worker process rebuilds it once.

    Parameters
    ----------
    model_bytes : bytes
        Content of ``model.skops``.
    card : Mapping
        :meth:`training.registry.ModelCard.to_dict` of its card.
    sha256 : str
        sha256 of ``model_bytes`` recorded by the card.
    ood : Mapping or None
        Training-range table (:func:`service.scoring.load_ood`), or None.
    loaded : LoadedModel, optional
        The client's own loaded model, used in-process (not pickled).
    """

    def __init__(self, model_bytes: bytes, card: Mapping[str, Any], sha256: str,
                 ood: Mapping[str, Any] | None, *, loaded: LoadedModel | None = None) -> None:
        self.model_bytes = bytes(model_bytes)
        self.card = _plain(card)
        self.sha256 = str(sha256)
        self.ood = None if ood is None else _plain(ood)
        self._loaded = loaded
        self._lock = threading.Lock()

    @classmethod
    def from_registry(cls, root: Path, model: LoadedModel,
                      ood: Mapping[str, Any] | None) -> PortableModel:
        """Package a model loaded by :func:`training.registry.load_model` from ``root``.

        Parameters
        ----------
        root : Path
            The registry it was loaded from.
        model : LoadedModel
            The verified model.
        ood : Mapping or None
            Its training-range table.

        Returns
        -------
        PortableModel

        Raises
        ------
        ModelError
            ``model_integrity`` when ``model.skops`` changed since it was verified.
        """
        path = Path(root) / model.card.version / MODEL_FILE
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise ModelError("model_integrity", f"{path} cannot be read: {exc}") from exc
        if hashlib.sha256(data).hexdigest() != model.sha256:
            raise ModelError("model_integrity",
                             f"{path} changed since model {model.card.version} was verified")
        check_model(model)
        return cls(data, model.card.to_dict() | {"active": model.card.active}, model.sha256,
                   ood, loaded=model)

    @property
    def version(self) -> str:
        """The model version."""
        return str(self.card["version"])

    def identity(self) -> dict[str, str]:
        """``name``, ``version`` and ``sha256`` (what the results and the manifest name)."""
        return {"name": str(self.card["name"]), "version": self.version, "sha256": self.sha256}

    def model(self) -> LoadedModel:
        """The model ready to score, rebuilt and verified on first use in this process.

        Returns
        -------
        LoadedModel

        Raises
        ------
        ModelError
            ``model_integrity`` (bytes that are not the card's, or unreadable) or
            ``untrusted_model``; and what :func:`service.scoring.check_model` refuses.
        """
        with self._lock:
            if self._loaded is None:
                self._loaded = self._rebuild()
            return self._loaded

    def _rebuild(self) -> LoadedModel:
        import skops.io as sio
        from threadpoolctl import ThreadpoolController

        if hashlib.sha256(self.model_bytes).hexdigest() != self.sha256 \
                or self.card.get("files", {}).get(MODEL_FILE) != self.sha256:
            raise ModelError("model_integrity",
                             f"the shipped model {self.version} is not the file its card hashed")
        try:
            estimator = sio.loads(self.model_bytes, trusted=list(TRUSTED_TYPES))
        except sio.exceptions.UntrustedTypesFoundException as exc:
            raise ModelError("untrusted_model", f"shipped model {self.version}: {exc}") from exc
        except Exception as exc:
            raise ModelError("model_integrity",
                             f"shipped model {self.version} cannot be read: {exc}") from exc
        c = self.card
        card = ModelCard(
            name=c["name"], version=c["version"], created_utc=c["created_utc"],
            classes=tuple(c["classes"]), feature_names=tuple(c["feature_names"]),
            feature_version=c["feature_version"], training=MappingProxyType(c["training"]),
            metrics=MappingProxyType(c["metrics"]),
            library_versions=MappingProxyType(c["library_versions"]), command=c["command"],
            files=MappingProxyType(c["files"]), active=bool(c.get("active", False)))
        fitted = [str(k) for k in getattr(estimator, "classes_", [])]
        if sorted(fitted) != sorted(card.classes):
            raise ModelError("model_integrity", f"shipped model {self.version} has classes "
                             f"{fitted}; its card says {list(card.classes)}")
        loaded = LoadedModel(card=card, estimator=estimator, sha256=self.sha256,
                             column_order=tuple(fitted.index(k) for k in card.classes),
                             thread_control=ThreadpoolController())
        check_model(loaded)
        return loaded

    def __getstate__(self) -> dict[str, Any]:
        return {"model_bytes": self.model_bytes, "card": self.card, "sha256": self.sha256,
                "ood": self.ood}

    def __setstate__(self, state: Mapping[str, Any]) -> None:
        self.__init__(state["model_bytes"], state["card"], state["sha256"], state["ood"])


def _plain(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    return value


# --------------------------------------------------------------------------------------------
# Scoring one chunk (in-process or on a worker)
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Blob:
    """One piece of a chunk as the scorer receives it.

    ``kind`` is ``"file"`` (``data`` the file's bytes, or None to read ``path``), ``"table"``
    (``data`` a Parquet table of some segments' rows) or ``"lines"`` (``lines`` already made by
    the client, for a file it could not read).
    """

    kind: str
    input: str
    name: str
    path: str | None = None
    data: bytes | None = field(default=None, repr=False)
    ids: tuple[str, ...] = ()
    lines: tuple[dict[str, Any], ...] = ()


@dataclass(frozen=True, slots=True)
class _TaskFailure:
    """A DipshapeError raised on a worker, sent back as data (its pickling loses the code)."""

    code: str
    detail: str
    model_error: bool


def _score_chunk(blobs: Sequence[_Blob], model: LoadedModel, ood: Mapping[str, Any] | None,
                 ephemeris: Ephemeris | None) -> list[dict[str, Any]]:
    records: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory(prefix="dipshape-chunk-") as tmp:
        for index, blob in enumerate(blobs):
            if blob.kind == "lines":
                lines = list(blob.lines)
            elif blob.kind == "file" and blob.data is None:
                lines = score_path(Path(blob.path or blob.name), model, ephemeris=ephemeris,
                                   ood=ood)
            else:
                folder = Path(tmp) / str(index)
                folder.mkdir()
                target = folder / blob.name
                target.write_bytes(blob.data or b"")
                lines = score_path(target, model, ephemeris=ephemeris, ood=ood)
                if blob.kind == "table" and _read_failed(lines, target):
                    lines = _score_table_singly(target, blob.ids, model, ood, ephemeris)
                target.unlink()
            records.extend(_record(line, blob.input, model.card.version) for line in lines)
    return records


def _read_failed(lines: Sequence[Mapping[str, Any]], path: Path) -> bool:
    return len(lines) == 1 and "error" in lines[0] and lines[0]["id"] == file_stem(path)


def _score_table_singly(path: Path, ids: Sequence[str], model: LoadedModel,
                        ood: Mapping[str, Any] | None, ephemeris: Ephemeris | None
                        ) -> list[dict[str, Any]]:
    """Score a table slice one segment at a time, so that one bad segment fails alone."""
    import pandas as pd

    frame = pd.read_parquet(path)
    column = next(c for c in frame.columns if str(c).strip().lower() == "segment_id")
    lines: list[dict[str, Any]] = []
    for seg_id, sub in frame.groupby(column, sort=False):
        sub.to_parquet(path, index=False)
        got = score_path(path, model, ephemeris=ephemeris, ood=ood)
        if _read_failed(got, path):
            got = [dict(got[0], id=str(seg_id))]
        lines.extend(got)
    if len(lines) != len(ids):
        _log.warning("%s: %d segments read, %d planned", path.name, len(lines), len(ids))
    return lines


def _record(line: Mapping[str, Any], input: str, version: str) -> dict[str, Any]:
    return {"id": str(line["id"]), "input": input, "label": line.get("label"),
            "error": line.get("error"), "model_version": version,
            "result_json": json_line(line)}


def _worker_task(blobs: Sequence[_Blob], plugin_name: str,
                 ephemeris: Ephemeris | None) -> list[dict[str, Any]] | _TaskFailure:
    """The task a worker runs: its plugin's model, then :func:`_score_chunk`."""
    from distributed import get_worker

    try:
        portable = get_worker().plugins[plugin_name].portable
        return _score_chunk(blobs, portable.model(), portable.ood, ephemeris)
    except DipshapeError as err:
        return _TaskFailure(err.code, err.detail, isinstance(err, ModelError))


def _model_plugin(portable: PortableModel) -> Any:
    from distributed.diagnostics.plugin import WorkerPlugin

    class _ModelPlugin(WorkerPlugin):
        """Holds the portable model on every worker; rebuilds it when the worker starts."""

        name = f"dipshape-model-{portable.sha256[:16]}"

        def __init__(self, shipped: PortableModel) -> None:
            self.portable = shipped

        def setup(self, worker: Any) -> None:
            try:
                self.portable.model()
            except DipshapeError as err:  # the tasks report it to the client
                _log.error("worker %s cannot use the model: %s", worker.address, err)

    return _ModelPlugin(portable)


# --------------------------------------------------------------------------------------------
# The run
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class BatchSummary:
    """The counts of a batch run (also written to ``summary.json``).

    Attributes
    ----------
    out_dir : Path
        The output folder.
    n_chunks : int
        Chunks planned.
    chunks_written : int
        Parts written by this run.
    chunks_resumed : int
        Parts kept from an earlier run (``resume``).
    chunks_unfinished : tuple of int
        Chunks with no part after :data:`MAX_ATTEMPTS` attempts (a later resume runs them).
    scored : int
        Records with a result.
    failed : int
        Records with an error.
    failed_by_code : Mapping of str to int
        Error records by code; the values add up to ``failed``.
    n_files : int
        Input files read.
    model : Mapping of str to str
        ``name``, ``version``, ``sha256``.
    fmt : str
        Part format.
    mode : str
        ``"in-process"`` or ``"cluster (N workers)"``.
    elapsed_s : float
        Wall time of this run [s].
    """

    out_dir: Path
    n_chunks: int
    chunks_written: int
    chunks_resumed: int
    chunks_unfinished: tuple[int, ...]
    scored: int
    failed: int
    failed_by_code: Mapping[str, int]
    n_files: int
    model: Mapping[str, str]
    fmt: str
    mode: str
    elapsed_s: float

    @property
    def n_records(self) -> int:
        """Records in the parts: ``scored + failed``."""
        return self.scored + self.failed

    @property
    def complete(self) -> bool:
        """Whether every chunk has its part."""
        return not self.chunks_unfinished

    def to_dict(self) -> dict[str, Any]:
        """The JSON object of ``summary.json``."""
        return {
            "summary_version": _MANIFEST_VERSION, "n_chunks": self.n_chunks,
            "chunks_written": self.chunks_written, "chunks_resumed": self.chunks_resumed,
            "chunks_unfinished": list(self.chunks_unfinished), "n_records": self.n_records,
            "scored": self.scored, "failed": self.failed,
            "failed_by_code": dict(sorted(self.failed_by_code.items())),
            "n_files": self.n_files, "model": dict(self.model), "format": self.fmt,
            "mode": self.mode, "elapsed_s": round(self.elapsed_s, 3),
        }

    def text(self) -> str:
        """One line for the terminal."""
        codes = ", ".join(f"{k}: {v}" for k, v in sorted(self.failed_by_code.items()))
        resumed = f", {self.chunks_resumed} kept from before" if self.chunks_resumed else ""
        line = (f"scored {self.scored} segment(s) from {self.n_files} file(s) with model "
                f"{self.model['version']} in {self.n_chunks} chunk(s){resumed}, {self.mode}; "
                f"{self.failed} failed" + (f" ({codes})" if codes else "")
                + f" -> {self.out_dir}")
        if self.chunks_unfinished:
            line += (f"; {len(self.chunks_unfinished)} chunk(s) unfinished (workers lost): "
                     "run again with --resume")
        return line


def part_paths(out_dir: Path, n_chunks: int, fmt: str) -> list[Path]:
    """The part file of every chunk, in order (whether it exists or not).

    Parameters
    ----------
    out_dir : Path
    n_chunks : int
    fmt : {"parquet", "jsonl"}

    Returns
    -------
    list of Path
        ``part-00000.<fmt>``...; the number has at least five digits, more when needed.
    """
    width = max(5, len(str(max(n_chunks - 1, 0))))
    return [Path(out_dir) / f"{_PART_PREFIX}{i:0{width}d}.{fmt}" for i in range(n_chunks)]


def run_batch(
    plan: Plan,
    model: PortableModel,
    out_dir: str | os.PathLike[str],
    *,
    fmt: str = "parquet",
    resume: bool = False,
    client: Any = None,
    ephemeris: Ephemeris | None = None,
    progress: bool | None = None,
    on_part: Callable[[int], None] | None = None,
) -> BatchSummary:
    """Score a plan into one part per chunk, in-process or on a Dask cluster.

    Parameters
    ----------
    plan : Plan
        From :func:`plan_inputs`.
    model : PortableModel
        The verified model (:meth:`PortableModel.from_registry`).
    out_dir : path
        Output folder (created); it receives ``manifest.json``, the parts and
        ``summary.json``.
    fmt : {"parquet", "jsonl"}
        Part format.
    resume : bool
        Keep the parts of an earlier run of the same manifest and score only the missing
        chunks.
    client : distributed.Client, optional
        Run the chunks on this client's cluster; None scores them in this process. A plan of
        a single chunk is always scored in this process.
    ephemeris : Ephemeris, optional
        Applied to every segment.
    progress : bool, optional
        Progress bar over chunks on standard error; None shows it only on a terminal.
    on_part : callable, optional
        Called with the chunk index after each part is written.

    Returns
    -------
    BatchSummary

    Raises
    ------
    ParameterError
        ``unsupported_format``, ``output_exists``, ``resume_mismatch``,
        ``invalid_run_manifest``, ``unwritable_output``, ``no_workers``.
    ModelError
        An incompatible or altered model (the run stops; the parts written stay valid).

    Examples
    --------
    >>> plan = plan_inputs(["lumen_sector3/"])  # doctest: +SKIP
    >>> run_batch(plan, portable, "results/").text()  # doctest: +SKIP
    'scored 412 segment(s) from 412 file(s) with model default-v3 in 7 chunk(s), ...'
    """
    start = time.perf_counter()
    if fmt not in PART_FORMATS:
        raise ParameterError("unsupported_format",
                             f"part format must be one of {', '.join(PART_FORMATS)}; got {fmt!r}")
    out = Path(out_dir)
    manifest = _manifest(plan, model, fmt, ephemeris)
    _prepare_folder(out, manifest, resume=resume)
    parts = part_paths(out, plan.n_chunks, fmt)
    counts: Counter[str] = Counter()
    kept: list[int] = []
    for i, part in enumerate(parts):
        found = _part_counts(part, fmt) if part.is_file() else None
        if found is not None:
            kept.append(i)
            counts.update(found)
    todo = sorted(set(range(plan.n_chunks)) - set(kept))
    use_cluster = client is not None and plan.n_chunks > 1 and bool(todo)
    mode = "in-process"
    if use_cluster:
        n_workers = _wait_for_workers(client)
        mode = f"cluster ({n_workers} worker{'s' if n_workers != 1 else ''})"
    elif client is not None:
        _log.info("%d chunk(s) to score: in this process", len(todo))
    _log.info("batch: %d chunks (%d kept), %s", plan.n_chunks, len(kept), mode)

    from tqdm import tqdm

    written: list[int] = []

    def keep(index: int, records: list[dict[str, Any]]) -> None:
        _write_part(parts[index], records, fmt)
        counts.update(_record_counts(records))
        written.append(index)
        bar.update(1)
        if on_part is not None:
            on_part(index)

    groups = _RowGroups()
    with tqdm(total=plan.n_chunks, initial=len(kept), desc="scoring", unit="chunk",
              file=_stderr(), leave=False, disable=None if progress is None else not progress
              ) as bar:
        if use_cluster:
            unfinished = _run_on_cluster(client, plan, todo, model, ephemeris, keep, groups)
        else:
            loaded = model.model()
            for index in todo:
                blobs = _blobs(plan.chunks[index], model, ship=False, groups=groups)
                keep(index, _score_chunk(blobs, loaded, model.ood, ephemeris))
            unfinished = []
    summary = BatchSummary(
        out_dir=out, n_chunks=plan.n_chunks, chunks_written=len(written),
        chunks_resumed=len(kept), chunks_unfinished=tuple(sorted(unfinished)),
        scored=counts.pop("", 0), failed=sum(counts.values()),
        failed_by_code=MappingProxyType(dict(counts)), n_files=plan.n_files,
        model=MappingProxyType(model.identity()), fmt=fmt, mode=mode,
        elapsed_s=time.perf_counter() - start)
    _write_json(out / SUMMARY_FILE, summary.to_dict())
    return summary


def _stderr() -> IO[str]:
    import sys

    return sys.stderr


def _run_on_cluster(client: Any, plan: Plan, todo: Sequence[int], model: PortableModel,
                    ephemeris: Ephemeris | None,
                    keep: Callable[[int, list[dict[str, Any]]], None],
                    groups: _RowGroups) -> list[int]:
    """Submit the chunks with a bounded window; write each part as its result arrives."""
    from distributed import as_completed

    plugin = _model_plugin(model)
    client.register_plugin(plugin, name=plugin.name)
    threads = max(1, sum(client.nthreads().values()))
    window = max(2, _IN_FLIGHT_PER_THREAD * threads)
    run_id = hashlib.sha256(f"{time.time_ns()}-{os.getpid()}".encode()).hexdigest()[:12]
    pending = iter(todo)
    attempts: Counter[int] = Counter()
    in_flight: dict[Any, int] = {}
    unfinished: list[int] = []
    done = as_completed()

    def submit(index: int) -> None:
        attempts[index] += 1
        blobs = _blobs(plan.chunks[index], model, ship=True, groups=groups)
        future = client.submit(_worker_task, blobs,
                               plugin.name, ephemeris, pure=False,
                               key=f"dipshape-chunk-{run_id}-{index}-{attempts[index]}")
        in_flight[future] = index
        done.add(future)

    try:
        for index in pending:
            submit(index)
            if len(in_flight) >= window:
                break
        for future in done:
            index = in_flight.pop(future)
            try:
                result = future.result()
            except Exception as exc:  # a lost worker (KilledWorker), a broken connection...
                if attempts[index] < MAX_ATTEMPTS:
                    _log.warning("chunk %d failed (%s: %s); submitting it again", index,
                                 type(exc).__name__, exc)
                    submit(index)
                else:
                    _log.error("chunk %d failed %d times (%s); left for --resume", index,
                               attempts[index], exc)
                    unfinished.append(index)
                continue
            finally:
                future.release()
            if isinstance(result, _TaskFailure):
                cls = ModelError if result.model_error else DipshapeError
                raise cls(result.code, result.detail)
            keep(index, result)
            nxt = next(pending, None)
            if nxt is not None:
                submit(nxt)
    finally:
        for future in list(in_flight):
            future.cancel()
        with contextlib.suppress(Exception):
            client.unregister_worker_plugin(plugin.name)
    return unfinished


def _wait_for_workers(client: Any, timeout_s: float = 60.0) -> int:
    try:
        client.wait_for_workers(1, timeout=timeout_s)
    except Exception as exc:
        raise ParameterError("no_workers", f"the cluster at {client.scheduler.address} has no "
                             f"worker after {timeout_s:g} s: start workers or use --workers N"
                             ) from exc
    return len(client.scheduler_info(n_workers=-1).get("workers", {})) or 1


def _blobs(pieces: Sequence[_FilePiece | _TablePiece], model: PortableModel, *,
           ship: bool, groups: _RowGroups) -> list[_Blob]:
    """What the scorer of one chunk receives; ``ship`` reads the files' bytes here."""
    blobs: list[_Blob] = []
    for piece in pieces:
        if isinstance(piece, _TablePiece):
            table = piece.table
            blobs.append(_Blob("table", table.display, table.path.name,
                               data=_table_slice(table, piece.start, piece.stop, groups),
                               ids=table.ids[piece.start:piece.stop]))
            continue
        if not ship:
            blobs.append(_Blob("file", piece.display, piece.path.name, path=str(piece.path)))
            continue
        try:
            data = piece.path.read_bytes()
        except OSError:  # missing or unreadable here: its error line, made here
            lines = score_path(piece.path, model.model(), ood=model.ood)
            blobs.append(_Blob("lines", piece.display, piece.path.name, lines=tuple(lines)))
            continue
        blobs.append(_Blob("file", piece.display, piece.path.name, data=data))
    return blobs


class _RowGroups:
    """The row groups of long tables last decoded in a run, so that consecutive chunks of one
    table decode each row group once (a row group often holds many chunks' rows)."""

    def __init__(self, keep: int = 2) -> None:
        self._keep = keep
        self._tables: dict[tuple[Path, int], Any] = {}
        self._sizes: dict[Path, list[int]] = {}

    def sizes(self, path: Path) -> list[int]:
        """Rows in each row group of a Parquet file."""
        if path not in self._sizes:
            import pyarrow.parquet as pq

            meta = pq.ParquetFile(path).metadata
            self._sizes[path] = [meta.row_group(g).num_rows for g in range(meta.num_row_groups)]
        return self._sizes[path]

    def group(self, path: Path, index: int) -> Any:
        """One decoded row group (an Arrow table)."""
        key = (path, index)
        if key not in self._tables:
            import pyarrow.parquet as pq

            while len(self._tables) >= self._keep:
                self._tables.pop(next(iter(self._tables)))
            self._tables[key] = pq.ParquetFile(path).read_row_group(index)
        return self._tables[key]


def _table_slice(table: _Table, start: int, stop: int, groups: _RowGroups) -> bytes:
    """The rows of segments ``start:stop`` of a long table, as Parquet bytes.

    Contiguous segments are read by row range from the row groups that hold them; a table
    whose segments' rows are interleaved is read whole for every chunk, which is slower.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    if table.rows is not None:
        lo, hi = table.rows[start][0], table.rows[stop - 1][1]
        pieces, offset = [], 0
        for g, n in enumerate(groups.sizes(table.path)):
            if offset + n > lo and offset < hi:
                a, b = max(lo, offset) - offset, min(hi, offset + n) - offset
                pieces.append(groups.group(table.path, g).slice(a, b - a))
            offset += n
        rows = pa.concat_tables(pieces)
    else:
        import pyarrow.compute as pc

        wanted = pa.array(list(table.values[start:stop]))
        whole = pq.read_table(table.path)
        rows = whole.filter(pc.is_in(whole.column(table.id_column), value_set=wanted))
    buffer = io.BytesIO()
    pq.write_table(rows, buffer)
    return buffer.getvalue()


# --------------------------------------------------------------------------------------------
# The output folder: manifest, parts, summary
# --------------------------------------------------------------------------------------------


def _manifest(plan: Plan, model: PortableModel, fmt: str, ephemeris: Ephemeris | None
              ) -> dict[str, Any]:
    from importlib import metadata

    try:
        version = metadata.version("dipshape")
    except metadata.PackageNotFoundError:
        version = "unknown"
    return {
        "manifest_version": _MANIFEST_VERSION,
        "schema_version": SCHEMA_VERSION,
        "created_utc": datetime.now(UTC).isoformat(timespec="seconds").replace("+00:00", "Z"),
        "dipshape_version": version,
        "inputs": {"given": list(plan.given), "n_files": plan.n_files,
                   "n_table_segments": plan.n_table_segments, "sha256": plan.fingerprint},
        "chunking": {"chunk_size": plan.chunk_size, "n_chunks": plan.n_chunks},
        "model": model.identity(),
        "format": fmt,
        "ephemeris": None if ephemeris is None else {
            "period_days": ephemeris.period_days, "epoch": ephemeris.epoch,
            "duration_days": ephemeris.duration_days},
    }


# What must agree for a resume, as (manifest key, what to call it).
_RESUME_KEYS = (("inputs", "the inputs"), ("chunking", "the chunking"), ("model", "the model"),
                ("format", "the part format"), ("ephemeris", "the ephemeris"),
                ("schema_version", "the result schema"))


def _prepare_folder(out: Path, manifest: Mapping[str, Any], *, resume: bool) -> None:
    target = out / MANIFEST_FILE
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ParameterError("unwritable_output",
                             f"--out {out}: {exc.strerror or exc}") from exc
    if not out.is_dir():
        raise ParameterError("unwritable_output", f"--out {out} is not a folder")
    old = _read_manifest(target) if target.exists() else None
    if old is not None and not resume:
        raise ParameterError("output_exists",
                             f"{out} holds an earlier run ({MANIFEST_FILE}): add --resume to "
                             "finish it, or choose another folder")
    if old is None and any(out.glob(f"{_PART_PREFIX}*")):
        raise ParameterError("output_exists",
                             f"{out} holds parts but no {MANIFEST_FILE}: choose another folder")
    if old is not None:
        differ = [what for key, what in _RESUME_KEYS
                  if _comparable(key, old.get(key)) != _comparable(key, manifest.get(key))]
        if differ:
            raise ParameterError(
                "resume_mismatch",
                f"cannot resume in {out}: {', '.join(differ)} differ from its {MANIFEST_FILE} "
                f"(model there {old.get('model', {}).get('version')!r}, here "
                f"{manifest['model']['version']!r}; chunks there "
                f"{old.get('chunking', {}).get('n_chunks')}, here "
                f"{manifest['chunking']['n_chunks']}); use another folder for a new run")
        _remove_stale(out)
        return
    _remove_stale(out)
    if resume:
        _log.info("nothing to resume in %s: starting a new run", out)
    _write_json(target, manifest)


def _remove_stale(out: Path) -> None:
    for stale in out.glob(f".{_PART_PREFIX}*{_TMP_SUFFIX}"):
        stale.unlink(missing_ok=True)  # a part that an interrupted run did not finish


def _comparable(key: str, value: Any) -> Any:
    if key == "inputs" and isinstance(value, Mapping):  # the paths as typed may differ
        return {k: v for k, v in value.items() if k != "given"}
    return value


def _read_manifest(path: Path) -> dict[str, Any]:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ParameterError("invalid_run_manifest", f"{path} cannot be read: {exc}") from exc
    if not isinstance(data, dict) or data.get("manifest_version") != _MANIFEST_VERSION:
        raise ParameterError("invalid_run_manifest",
                             f"{path} is not a dipshape batch manifest (version "
                             f"{_MANIFEST_VERSION})")
    return data


def _write_json(path: Path, obj: Mapping[str, Any]) -> None:
    _atomic_write(path, (json.dumps(obj, indent=2, allow_nan=False) + "\n").encode())


def _atomic_write(path: Path, data: bytes | None, *,
                  writer: Callable[[Path], None] | None = None) -> None:
    """Write to a hidden temporary name in the same folder, fsync, rename into place."""
    tmp = path.with_name(f".{path.name}{_TMP_SUFFIX}")
    try:
        if writer is not None:
            writer(tmp)
        else:
            with open(tmp, "wb") as handle:
                handle.write(data or b"")
        with open(tmp, "rb+") as handle:
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise ParameterError("unwritable_output", f"{path}: {exc.strerror or exc}") from exc
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _write_part(path: Path, records: Sequence[Mapping[str, Any]], fmt: str) -> None:
    if fmt == "jsonl":
        text = "".join(r["result_json"] + "\n" for r in records)
        _atomic_write(path, text.encode("utf-8"))
        return
    import pyarrow as pa
    import pyarrow.parquet as pq

    schema = pa.schema([(c, pa.string()) for c in PART_COLUMNS])
    table = pa.table({c: [r[c] for r in records] for c in PART_COLUMNS}, schema=schema)
    _atomic_write(path, None, writer=lambda tmp: pq.write_table(table, tmp))


def _record_counts(records: Iterable[Mapping[str, Any]]) -> Counter[str]:
    """Counter of error codes, with "" counting the results."""
    return Counter(r["error"] or "" for r in records)


def _part_counts(path: Path, fmt: str) -> Counter[str] | None:
    """Counts of an existing part, or None when it cannot be read (it is scored again)."""
    try:
        if fmt == "jsonl":
            errors = [json.loads(line).get("error") for line in
                      path.read_text(encoding="utf-8").splitlines() if line.strip()]
        else:
            import pyarrow.parquet as pq

            errors = pq.read_table(path, columns=["error"]).column(0).to_pylist()
    except Exception as exc:
        _log.warning("%s cannot be read (%s): scoring its chunk again", path, exc)
        return None
    return Counter(e or "" for e in errors)


def iter_result_lines(out_dir: str | os.PathLike[str]) -> Iterator[str]:
    """The result lines of a batch output folder, in input order.

    Parameters
    ----------
    out_dir : path
        A folder written by :func:`run_batch`.

    Yields
    ------
    str
        Each record's line (``result_json``), as ``dipshape score`` writes it.

    Raises
    ------
    ParameterError
        ``invalid_run_manifest`` when the folder has no readable manifest.
    """
    out = Path(out_dir)
    manifest = _read_manifest(out / MANIFEST_FILE)
    fmt = manifest["format"]
    for path in part_paths(out, int(manifest["chunking"]["n_chunks"]), fmt):
        if not path.is_file():
            continue
        if fmt == "jsonl":
            yield from (x for x in path.read_text(encoding="utf-8").splitlines() if x.strip())
        else:
            import pyarrow.parquet as pq

            yield from pq.read_table(path, columns=["result_json"]).column(0).to_pylist()


# --------------------------------------------------------------------------------------------
# Streaming: JSON lines in, result lines out
# --------------------------------------------------------------------------------------------


def score_stream(lines_in: Iterable[str | bytes], lines_out: IO[str], model: LoadedModel, *,
                 ood: Mapping[str, Any] | None = None,
                 ephemeris: Ephemeris | None = None) -> tuple[int, int]:
    """Score a stream of segment JSON lines, writing one result line per input line, in order.

    Each non-blank line is ``{"id"?, "time": [...], "flux": [...], "flux_err"?: [...]}``
    (``null`` = a missing point; ``NaN`` and ``Infinity``, which are not JSON, are read as
    missing points too; other keys are ignored). Without an id the segment is ``line-<n>``
    (``n`` counts every line from 1). A line that cannot be parsed or scored gives an error
    line (``invalid_json``, ``invalid_type``, ``too_few_points``...) and the stream goes on.
    Each output line is flushed, for Unix pipes and broker filters.

    Parameters
    ----------
    lines_in : iterable of str or bytes
        E.g. ``sys.stdin``.
    lines_out : writable text stream
        E.g. ``sys.stdout``.
    model : LoadedModel
    ood : Mapping, optional
        Training-range table.
    ephemeris : Ephemeris, optional
        Applied to every segment.

    Returns
    -------
    scored, failed : int

    Raises
    ------
    ModelError
        An incompatible model (nothing is read then).

    Examples
    --------
    >>> import io, sys
    >>> score_stream(io.StringIO('{"id": "LS-0042", "time": [0, 1], "flux": [1, 1]}\\n'),
    ...              sys.stdout, model)  # doctest: +SKIP
    {"schema_version":"1","id":"LS-0042","error":"too_few_points",...}
    (0, 1)
    """
    check_model(model)
    scored = failed = 0
    for number, raw in enumerate(lines_in, start=1):
        text = raw.decode("utf-8", errors="replace") if isinstance(raw, bytes) else str(raw)
        if not text.strip():
            continue
        line = _stream_line(text, number, model, ood, ephemeris)
        failed += "error" in line
        scored += "error" not in line
        lines_out.write(json_line(line) + "\n")
        lines_out.flush()
    return scored, failed


def _stream_line(text: str, number: int, model: LoadedModel, ood: Mapping[str, Any] | None,
                 ephemeris: Ephemeris | None) -> dict[str, Any]:
    fallback = f"line-{number}"
    try:
        obj = json.loads(text)
    except (json.JSONDecodeError, RecursionError) as exc:
        detail = getattr(exc, "msg", str(exc))
        return score_error(fallback, ParameterError(
            "invalid_json", f"line {number} is not JSON: {detail}"))
    given = obj.get("id") if isinstance(obj, Mapping) else None
    seg_id = given if isinstance(given, str) and given else fallback
    try:
        segment = segment_from_mapping(obj, id=None if isinstance(obj, Mapping) and "id" in obj
                                       else fallback)
        return score_segment(segment, model, ephemeris=ephemeris, ood=ood).to_dict()
    except ModelError:
        raise
    except DipshapeError as err:
        return score_error(seg_id, err)
    except Exception as exc:  # one bad line must not end the stream
        _log.exception("line %d: unexpected failure while scoring", number)
        return score_error(seg_id, DipshapeError("internal_error",
                                                 f"{type(exc).__name__}: {exc}"))


# --------------------------------------------------------------------------------------------
# Clusters
# --------------------------------------------------------------------------------------------


@contextlib.contextmanager
def cluster_client(*, scheduler: str | None = None, workers: int | None = None,
                   timeout_s: float = 30.0) -> Iterator[Any]:
    """A Dask client on an existing cluster, or on a local one started (and stopped) here.

    Parameters
    ----------
    scheduler : str, optional
        Address of an existing scheduler, e.g. ``tcp://10.0.0.5:8786``.
    workers : int, optional
        Start a ``distributed.LocalCluster`` of this many worker processes, each with one
        thread and a nanny (scoring is CPU-bound Python; a nanny restarts a worker that dies).
    timeout_s : float
        Connection timeout [s].

    Yields
    ------
    distributed.Client

    Raises
    ------
    ParameterError
        ``invalid_parameter`` when both or neither are given, or ``workers < 1``;
        ``scheduler_unreachable`` when nothing answers at ``scheduler``.
    """
    if (scheduler is None) == (workers is None):
        raise ParameterError("invalid_parameter", "give either --scheduler or --workers")
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int)
                                or workers < 1):
        raise ParameterError("invalid_parameter", f"--workers must be >= 1, got {workers!r}")
    from distributed import Client, LocalCluster

    with _quiet_cluster_logs():
        if scheduler is not None:
            try:
                client = Client(scheduler, timeout=f"{timeout_s}s")
            except (OSError, TimeoutError, ValueError) as exc:
                raise ParameterError("scheduler_unreachable",
                                     f"no Dask scheduler answers at {scheduler!r}: {exc}"
                                     ) from exc
            with client:
                yield client
            return
        with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                          dashboard_address=None, silence_logs=logging.WARNING) as cluster, \
                Client(cluster) as client:
            yield client


@contextlib.contextmanager
def _quiet_cluster_logs() -> Iterator[None]:
    """Dask's INFO messages only when this process logs INFO (``dipshape -v``)."""
    logger = logging.getLogger("distributed")
    before = logger.level
    if not logging.getLogger().isEnabledFor(logging.INFO):
        logger.setLevel(logging.WARNING)
    try:
        yield
    finally:
        logger.setLevel(before)
