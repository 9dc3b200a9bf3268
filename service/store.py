"""The SQLite store of submitted labels (the group's own training set) and the score log.

A :class:`LabelStore` is one SQLite file. The REST service adds labelled segments to it from
its worker threads, possibly from several processes at once, and exports them in the layout
``dipshape train --labels labels.csv --segments segments`` reads::

    labels.csv            id,label          one row per id: its latest label
    segments/<id>.csv     time,flux[,flux_err]   the segment of that latest label

How the file is used, and why (SQLite documentation, https://www.sqlite.org/):

- **Write-ahead log** (``PRAGMA journal_mode=WAL``, ``wal.html``): a commit appends to the
  ``-wal`` file beside the database; readers keep reading a consistent snapshot while one writer
  at a time commits, so an export never sees half of a concurrent submission. WAL needs every
  process on one host: do not put the store on a network file system (``wal.html``).
- **PRAGMA synchronous=FULL** (``pragma.html#pragma_synchronous``): in WAL mode FULL syncs the
  WAL to disk at every commit, so a label whose ``add_label`` returned survives an operating
  system crash or a power cut, not only a killed process. Committed transactions survive an
  application crash under any setting (the commit has reached the operating system), and with
  NORMAL the WAL is synced only at checkpoints: still consistent, but the last commits may roll
  back after a power loss. A label is acknowledged to its submitter, so it gets FULL. The score
  log shares the same connection and setting: one setting for simplicity (its rate is that of
  requests, and its rows are a convenience, not a promise).
- **Atomic commit** (``atomiccommit.html``, ``wal.html``): a transaction is in the database
  entirely or not at all, whatever instant the process dies.
- **BEGIN IMMEDIATE** (``lang_transaction.html``) takes the write lock when a write starts, and
  **PRAGMA busy_timeout** (``pragma.html#pragma_busy_timeout``) makes a writer that finds it
  taken wait (up to ``timeout_s``) instead of failing with "database is locked". A deferred
  transaction that later tries to write could fail at once without waiting.
- **PRAGMA user_version** is the schema version and **PRAGMA application_id** marks the file as a
  dipshape store (``pragma.html``; offsets 60 and 68 of the header, ``fileformat2.html``). A file
  whose first 16 bytes are not the SQLite magic string ``"SQLite format 3\\0"``, a database of
  another application, or a newer schema is refused before anything is written to it.

Each thread uses its own connection (kept per thread inside the instance); open the store in
each process (after a fork, not before). Labels are never overwritten: a new label for an id that
is already stored is a new row (the history is kept, :meth:`LabelStore.labels`), and the export
uses the latest one, label and segment alike.

**What is stored of a segment.** A :class:`~features.segment.Segment` holds time, the flux
divided by its median and flux_err on the same scale; those three arrays are stored as float64
bytes (lossless) with the cadence and whether flux_err was estimated, so :meth:`LabelStore.segment`
gives back a segment equal to the one submitted. The export writes the same values with
``repr`` (the shortest text that parses back to the same float64) and leaves the ``flux_err``
column out when the errors were estimated, so that the training reader estimates them again
from the same flux and the ``flux_err_estimated`` feature keeps its value. The reader divides
the flux by its median once more: that is exact (a division by 1.0) when the median of the
stored flux is exactly 1.0, always the case for an odd number of points. For an even number it
is the mean of the two middle values, which can round to one or two units in the last place
away from 1.0; the reader's flux and flux_err then differ from the stored ones in the last bit
or two (relative 2e-16; no feature can tell). Exact in every case would need the reader to
leave a median within rounding of 1.0 alone.

Error codes (``features.errors``):

=============================  =================  ===============================================
code                           family             raised when
=============================  =================  ===============================================
``invalid_store``              ParameterError     the path is a folder or cannot be opened, is not
                                                  a SQLite database, belongs to another
                                                  application, lacks the store's tables, or
                                                  cannot use a write-ahead log
``unsupported_store_version``  ParameterError     the schema is newer than :data:`SCHEMA_VERSION`
``invalid_segment``            ParameterError     ``add_label`` got something other than a Segment
``invalid_label``              ParameterError     a label that is not 1-64 ASCII letters, digits,
                                                  ``_`` or ``-``
``unsafe_id``                  ParameterError     a segment id that cannot be a file name: empty,
                                                  over 128 characters (or 200 UTF-8 bytes), with
                                                  ``/`` or ``\\``, ``..``, a leading dot, control
                                                  or invisible format characters, or white space
                                                  at either end
``invalid_note``               ParameterError     a note that is not a string of <= 4000 characters
                                                  (or holds a NUL)
``invalid_submitter``          ParameterError     a submitter that is not a string of <= 256
                                                  characters without control characters
``invalid_score``              ParameterError     a score result without an ``id`` and a ``label``
                                                  or ``error``, or not strict JSON
``invalid_parameter``          ParameterError     a label_id or a count that is not a positive int
``label_not_found``            ParameterError     no label has that label_id
``invalid_export_target``      ParameterError     the export folder exists and is not empty, its
                                                  parent does not exist, or two ids collide there
``store_closed``               ParameterError     the store was used after :meth:`LabelStore.close`
``store_unavailable``          DipshapeError      SQLite failed: still locked after ``timeout_s``,
                                                  disk full, an I/O error...
=============================  =================  ===============================================
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import math
import os
import re
import shutil
import sqlite3
import tempfile
import threading
import unicodedata
import weakref
import zipfile
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from features.errors import DipshapeError, ParameterError
from features.segment import Segment

__all__ = [
    "APPLICATION_ID",
    "MAX_ID_LENGTH",
    "MAX_LABEL_LENGTH",
    "SCHEMA_VERSION",
    "LabelStore",
    "StoredLabel",
    "StoredScore",
]

#: Schema version written to ``PRAGMA user_version``.
SCHEMA_VERSION = 1
#: ``PRAGMA application_id`` of a dipshape store: the ASCII bytes "DIPS".
APPLICATION_ID = 0x44495053
#: Longest label (it becomes a class name).
MAX_LABEL_LENGTH = 64
#: Longest segment id in characters (it becomes a file name in the export).
MAX_ID_LENGTH = 128

_MAX_ID_BYTES = 200  # file names are limited to 255 bytes on common file systems
_MAX_NOTE_LENGTH = 4000
_MAX_SUBMITTER_LENGTH = 256
_SQLITE_MAGIC = b"SQLite format 3\x00"  # fileformat2.html, "The Database Header", offset 0
_LABEL_PATTERN = re.compile(r"[A-Za-z0-9_-]+")
_FLOAT64 = np.dtype("<f8")  # little-endian IEEE 754 binary64, the same on every machine
_ZIP_DATE = (1980, 1, 1, 0, 0, 0)  # earliest zip date: identical stores give identical zips

_SCHEMA = """
CREATE TABLE labels (
    label_id            INTEGER PRIMARY KEY AUTOINCREMENT,
    id                  TEXT NOT NULL,
    label               TEXT NOT NULL,
    note                TEXT,
    submitter           TEXT,
    created_utc         TEXT NOT NULL,
    n_points            INTEGER NOT NULL,
    cadence_min         REAL NOT NULL,
    flux_err_estimated  INTEGER NOT NULL,
    time                BLOB NOT NULL CHECK (length(time) = 8 * n_points),
    flux                BLOB NOT NULL CHECK (length(flux) = 8 * n_points),
    flux_err            BLOB NOT NULL CHECK (length(flux_err) = 8 * n_points)
);
CREATE INDEX labels_by_id ON labels (id, label_id);
CREATE TABLE scores (
    score_id       INTEGER PRIMARY KEY AUTOINCREMENT,
    id             TEXT NOT NULL,
    outcome        TEXT NOT NULL,
    is_error       INTEGER NOT NULL,
    model_version  TEXT,
    created_utc    TEXT NOT NULL,
    result_json    TEXT NOT NULL
);
"""
_TABLES = frozenset({"labels", "scores"})
_LABEL_COLUMNS = "label_id, id, label, note, submitter, created_utc"


@dataclass(frozen=True, slots=True)
class StoredLabel:
    """One stored label (one row; a re-labelled id has several).

    Attributes
    ----------
    label_id : int
        Unique, increasing in commit order; never reused.
    id : str
        Segment id (the file stem in the export).
    label : str
        Class name given by the submitter.
    note, submitter : str or None
        Free text as submitted.
    created_utc : str
        Time of the submission, ISO 8601 in UTC, e.g. ``"2026-03-01T12:00:00.000123Z"``.
    """

    label_id: int
    id: str
    label: str
    note: str | None
    submitter: str | None
    created_utc: str


@dataclass(frozen=True, slots=True)
class StoredScore:
    """One entry of the score log.

    Attributes
    ----------
    score_id : int
        Unique, increasing in commit order.
    id : str
        Segment id of the result.
    outcome : str
        The result's label, or its error code when ``is_error``.
    is_error : bool
        True for an error object (``{"id", "error", "detail"}``) rather than a result.
    model_version : str or None
        ``result["model"]["version"]`` when present.
    created_utc : str
        Time it was logged, ISO 8601 in UTC.
    result_json : str
        The result as strict JSON text.
    """

    score_id: int
    id: str
    outcome: str
    is_error: bool
    model_version: str | None
    created_utc: str
    result_json: str

    def result(self) -> dict[str, Any]:
        """The logged result, parsed from :attr:`result_json`."""
        return json.loads(self.result_json)


class _Link:
    """A thread's connection (a plain object, so that the store can track it weakly)."""

    __slots__ = ("__weakref__", "conn")

    def __init__(self, conn: sqlite3.Connection) -> None:
        self.conn = conn


class LabelStore:
    """Labels and score log in one SQLite file (write-ahead log, durable commits).

    Parameters
    ----------
    path : str or os.PathLike
        The database file; created (with its schema) when it does not exist or is empty. Its
        folder must exist.
    timeout_s : float, optional
        How long a writer waits for another one to finish before giving up with
        ``store_unavailable`` (``PRAGMA busy_timeout``), in seconds. Default 30.

    Raises
    ------
    ParameterError
        ``invalid_store`` or ``unsupported_store_version`` (see the module docstring); the file
        is left untouched. ``invalid_parameter`` for a bad ``timeout_s``.
    DipshapeError
        ``store_unavailable`` when another process holds the database longer than
        ``timeout_s`` while this one creates the schema.

    Notes
    -----
    Safe to share between threads (each gets its own connection) and to open from several
    processes at once. Use it as a context manager, or call :meth:`close`.

    Examples
    --------
    >>> import tempfile, pathlib, numpy as np
    >>> from features.segment import make_segment
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> seg = make_segment(np.arange(25) * 0.02, 1.0 + 0.001 * np.sin(np.arange(25.0)),
    ...                    id="LS-0042-s3")
    >>> with LabelStore(folder / "labels.sqlite") as store:
    ...     stored = store.add_label(seg, "exocomet", submitter="lumen-vetting")
    ...     (stored.label_id, stored.label, store.count(), store.segment(1) == seg)
    (1, 'exocomet', 1, True)
    """

    def __init__(self, path: str | os.PathLike[str], *, timeout_s: float = 30.0) -> None:
        if (isinstance(timeout_s, bool) or not isinstance(timeout_s, int | float)
                or not math.isfinite(timeout_s) or timeout_s < 0):
            raise ParameterError("invalid_parameter",
                                 f"timeout_s must be a finite number >= 0; got {timeout_s!r}")
        self._path = Path(path)
        self._timeout_ms = int(timeout_s * 1000)
        self._local = threading.local()
        self._links: weakref.WeakSet[_Link] = weakref.WeakSet()
        self._lock = threading.Lock()
        self._closed = False
        _check_magic(self._path)
        try:
            conn = self._open()
        except sqlite3.Error as exc:
            raise ParameterError("invalid_store", f"{self._path.name}: cannot be opened as a "
                                 f"SQLite database ({exc})") from exc
        self._local.link = link = _Link(conn)
        self._links.add(link)
        try:
            self._prepare(conn)
        except BaseException:
            self.close()
            raise

    @property
    def path(self) -> Path:
        """The database file."""
        return self._path

    # -- lifecycle ------------------------------------------------------------------------

    def close(self) -> None:
        """Close every connection of this store (idempotent).

        Call it when no other thread is using the store (at shutdown); afterwards every method
        raises ``store_closed``.
        """
        with self._lock:
            self._closed = True
            links = list(self._links)
            self._links.clear()
        for link in links:
            link.conn.close()

    def __enter__(self) -> LabelStore:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self._closed else "open"
        return f"LabelStore({os.fspath(self._path)!r}, {state})"

    # -- labels ---------------------------------------------------------------------------

    def add_label(self, segment: Segment, label: str, *, note: str | None = None,
                  submitter: str | None = None) -> StoredLabel:
        """Store a labelled segment; returns only after the transaction has committed.

        Parameters
        ----------
        segment : Segment
            The validated segment (its id becomes the file stem in the export).
        label : str
            Class name: 1 to :data:`MAX_LABEL_LENGTH` ASCII letters, digits, ``_`` or ``-``
            (one of the five built-in classes or the group's own).
        note : str, optional
            Free text, at most 4000 characters.
        submitter : str, optional
            Who submitted it, at most 256 characters, no control characters.

        Returns
        -------
        StoredLabel
            With the new ``label_id`` and the submission time.

        Raises
        ------
        ParameterError
            ``invalid_segment``, ``invalid_label``, ``unsafe_id``, ``invalid_note``,
            ``invalid_submitter``, ``store_closed``; nothing is stored.
        DipshapeError
            ``store_unavailable`` when SQLite fails; nothing is stored.

        Notes
        -----
        A second label for the same id adds a row; the earlier ones stay in :meth:`labels`
        and the export uses the latest.
        """
        if not isinstance(segment, Segment):
            raise ParameterError("invalid_segment", "segment must be a features.segment.Segment; "
                                 f"got {type(segment).__name__}")
        _check_label(label)
        _check_id(segment.id)
        _check_text(note, "note", _MAX_NOTE_LENGTH, "invalid_note", allow_control=True)
        _check_text(submitter, "submitter", _MAX_SUBMITTER_LENGTH, "invalid_submitter",
                    allow_control=False)
        with self._write() as conn:
            created = _now_utc()  # inside the lock: times increase with label_id
            cursor = conn.execute(
                "INSERT INTO labels (id, label, note, submitter, created_utc, n_points, "
                "cadence_min, flux_err_estimated, time, flux, flux_err) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (segment.id, label, note, submitter, created, segment.n_points,
                 segment.cadence_min, int(segment.flux_err_estimated), _to_blob(segment.time),
                 _to_blob(segment.flux), _to_blob(segment.flux_err)))
            label_id = int(cursor.lastrowid)
        return StoredLabel(label_id, segment.id, label, note, submitter, created)

    def count(self) -> int:
        """Number of stored labels, every row of the history included."""
        with self._read() as conn:
            return int(conn.execute("SELECT count(*) FROM labels").fetchone()[0])

    def labels(self) -> list[StoredLabel]:
        """Every stored label, oldest first (history included).

        Returns
        -------
        list of StoredLabel
            In commit order (increasing ``label_id``).
        """
        with self._read() as conn:
            rows = conn.execute(f"SELECT {_LABEL_COLUMNS} FROM labels ORDER BY label_id")
            return [StoredLabel(*row) for row in rows]

    def segment(self, label_id: int) -> Segment:
        """The segment stored with one label, equal to the one submitted.

        Parameters
        ----------
        label_id : int

        Returns
        -------
        Segment
            Same id, arrays (bit for bit), cadence and ``flux_err_estimated``; ``source`` is
            ``"store"`` and ``meta`` holds ``label_id``.

        Raises
        ------
        ParameterError
            ``invalid_parameter`` (not a positive int), ``label_not_found``.
        """
        _check_positive_int(label_id, "label_id")
        with self._read() as conn:
            row = conn.execute(
                "SELECT id, cadence_min, flux_err_estimated, time, flux, flux_err "
                "FROM labels WHERE label_id = ?", (label_id,)).fetchone()
        if row is None:
            raise ParameterError("label_not_found", f"no label has label_id {label_id}")
        seg_id, cadence_min, estimated, time, flux, flux_err = row
        return Segment(time=_from_blob(time), flux=_from_blob(flux),
                       flux_err=_from_blob(flux_err), id=seg_id, cadence_min=cadence_min,
                       source="store", flux_err_estimated=bool(estimated),
                       meta={"label_id": label_id})

    # -- export ---------------------------------------------------------------------------

    def export_zip(self) -> bytes:
        """The latest label of every id and its segment, as a zip archive.

        Returns
        -------
        bytes
            A zip holding ``labels.csv`` (``id,label``, one row per id in the order of their
            latest label) and ``segments/<id>.csv`` (``time,flux[,flux_err]``), the layout of
            ``dipshape train --labels labels.csv --segments segments`` once unpacked. The
            same store content always gives the same bytes.

        Raises
        ------
        ParameterError
            ``store_closed``.
        DipshapeError
            ``store_unavailable``.
        """
        buffer = io.BytesIO()
        with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
            for name, text in self._export_files():
                info = zipfile.ZipInfo(name, date_time=_ZIP_DATE)
                info.compress_type = zipfile.ZIP_DEFLATED
                archive.writestr(info, text)
        return buffer.getvalue()

    def export_to_dir(self, folder: str | os.PathLike[str]) -> Path:
        """Write the export (see :meth:`export_zip`) as files into a new folder.

        Parameters
        ----------
        folder : str or os.PathLike
            Must not exist, or be an empty folder; its parent must exist. The files are written
            into a temporary folder beside it that is renamed at the end, so ``folder`` holds
            either the whole export or nothing.

        Returns
        -------
        Path
            ``folder``, holding ``labels.csv`` and ``segments/``.

        Raises
        ------
        ParameterError
            ``invalid_export_target``, ``store_closed``.
        DipshapeError
            ``store_unavailable``.
        """
        target = Path(folder)
        if target.exists() and (not target.is_dir() or any(target.iterdir())):
            raise ParameterError("invalid_export_target",
                                 f"{os.fspath(target)!r} exists and is not an empty folder")
        if not target.parent.is_dir():
            raise ParameterError("invalid_export_target",
                                 f"the parent folder of {os.fspath(target)!r} does not exist")
        scratch = Path(tempfile.mkdtemp(prefix=f".{target.name}.", dir=target.parent))
        try:
            (scratch / "segments").mkdir()
            for name, text in self._export_files():
                try:
                    with open(scratch / name, "x", encoding="utf-8", newline="") as handle:
                        handle.write(text)
                except FileExistsError as exc:
                    raise ParameterError(
                        "invalid_export_target",
                        f"{name!r} was written twice: two ids differ only in letter case and "
                        "this file system does not tell them apart") from exc
            if target.exists():
                target.rmdir()
            os.rename(scratch, target)
        except BaseException:
            shutil.rmtree(scratch, ignore_errors=True)
            raise
        return target

    # -- score log ------------------------------------------------------------------------

    def log_score(self, result: Mapping[str, Any]) -> StoredScore:
        """Record one scoring result (or error object) in the score log.

        Parameters
        ----------
        result : Mapping
            A result (``service.scoring.Result.to_dict()``: ``id``, ``label``, ``model``...)
            or an error object (``id``, ``error``, ``detail``).

        Returns
        -------
        StoredScore

        Raises
        ------
        ParameterError
            ``invalid_score`` (no ``id``, neither ``label`` nor ``error``, or not strict JSON:
            NaN and infinity are refused), ``store_closed``.
        DipshapeError
            ``store_unavailable``.
        """
        if not isinstance(result, Mapping):
            raise ParameterError("invalid_score",
                                 f"a result must be a mapping; got {type(result).__name__}")
        seg_id, label, error = result.get("id"), result.get("label"), result.get("error")
        if not isinstance(seg_id, str) or not seg_id:
            raise ParameterError("invalid_score", f"result 'id' must be a non-empty string; "
                                 f"got {seg_id!r}")
        is_error = label is None
        outcome = error if is_error else label
        if not isinstance(outcome, str) or not outcome:
            raise ParameterError("invalid_score", f"result {seg_id!r} has neither a 'label' nor "
                                 "an 'error' string")
        model = result.get("model")
        version = model.get("version") if isinstance(model, Mapping) else None
        version = version if isinstance(version, str) else None
        try:
            text = json.dumps(result, allow_nan=False, separators=(",", ":"))
        except (TypeError, ValueError) as exc:
            raise ParameterError("invalid_score",
                                 f"result {seg_id!r} is not strict JSON: {exc}") from exc
        with self._write() as conn:
            created = _now_utc()
            cursor = conn.execute(
                "INSERT INTO scores (id, outcome, is_error, model_version, created_utc, "
                "result_json) VALUES (?, ?, ?, ?, ?, ?)",
                (seg_id, outcome, int(is_error), version, created, text))
            score_id = int(cursor.lastrowid)
        return StoredScore(score_id, seg_id, outcome, is_error, version, created, text)

    def recent_scores(self, n: int = 100) -> list[StoredScore]:
        """The last ``n`` entries of the score log, newest first.

        Raises
        ------
        ParameterError
            ``invalid_parameter`` when ``n`` is not a positive int; ``store_closed``.
        """
        _check_positive_int(n, "n")
        with self._read() as conn:
            rows = conn.execute(
                "SELECT score_id, id, outcome, is_error, model_version, created_utc, "
                "result_json FROM scores ORDER BY score_id DESC LIMIT ?", (n,)).fetchall()
        return [StoredScore(r[0], r[1], r[2], bool(r[3]), r[4], r[5], r[6]) for r in rows]

    # -- private --------------------------------------------------------------------------

    def _open(self) -> sqlite3.Connection:
        conn = sqlite3.connect(self._path, timeout=self._timeout_ms / 1000,
                               isolation_level=None, check_same_thread=False)
        try:
            conn.execute(f"PRAGMA busy_timeout = {self._timeout_ms}")
            conn.execute("PRAGMA synchronous = FULL")
        except BaseException:
            conn.close()
            raise
        return conn

    def _connection(self) -> sqlite3.Connection:
        if self._closed:
            raise ParameterError("store_closed", f"the store {self._path.name} is closed")
        link = getattr(self._local, "link", None)
        if link is None:
            try:
                link = _Link(self._open())
            except sqlite3.Error as exc:
                raise _unavailable(self._path, exc) from exc
            with self._lock:
                if self._closed:
                    link.conn.close()
                    raise ParameterError("store_closed", f"the store {self._path.name} is closed")
                self._links.add(link)
            self._local.link = link
        return link.conn

    @contextlib.contextmanager
    def _read(self) -> Iterator[sqlite3.Connection]:
        conn = self._connection()
        try:
            yield conn
        except sqlite3.ProgrammingError as exc:
            if self._closed:  # closed by another thread meanwhile
                raise ParameterError("store_closed", f"{self._path.name}: {exc}") from exc
            raise
        except sqlite3.Error as exc:
            raise _unavailable(self._path, exc) from exc

    @contextlib.contextmanager
    def _write(self) -> Iterator[sqlite3.Connection]:
        """One write transaction: BEGIN IMMEDIATE ... COMMIT, rolled back on any error."""
        with self._read() as conn:
            conn.execute("BEGIN IMMEDIATE")
            try:
                yield conn
                conn.execute("COMMIT")
            except BaseException:
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
                raise

    def _prepare(self, conn: sqlite3.Connection) -> None:
        """Check the file is ours (reading only), then switch to WAL and create the schema."""
        try:
            state = _schema_state(conn, self._path)
            mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise ParameterError(
                    "invalid_store", f"{self._path.name}: SQLite cannot use a write-ahead log "
                    f"here (journal_mode stayed {mode!r}; a network file system?)")
            if state == "empty":
                with self._write() as tx:  # another process may have created it meanwhile
                    if _schema_state(tx, self._path) == "empty":
                        for statement in _SCHEMA.split(";"):
                            if statement.strip():
                                tx.execute(statement)
                        tx.execute(f"PRAGMA application_id = {APPLICATION_ID}")
                        tx.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
        except sqlite3.OperationalError as exc:
            if "locked" in str(exc) or "busy" in str(exc):
                raise _unavailable(self._path, exc) from exc
            raise _not_usable(self._path, exc) from exc
        except sqlite3.DatabaseError as exc:
            raise _not_usable(self._path, exc) from exc

    def _export_files(self) -> Iterator[tuple[str, str]]:
        """(name, text) of every export file; labels.csv last, from one read snapshot."""
        index = io.StringIO()
        writer = csv.writer(index, lineterminator="\n")
        writer.writerow(["id", "label"])
        query = ("SELECT id, label, flux_err_estimated, time, flux, flux_err FROM labels "
                 "WHERE label_id IN (SELECT max(label_id) FROM labels GROUP BY id) "
                 "ORDER BY label_id")
        with self._read() as conn, contextlib.closing(conn.execute(query)) as rows:
            for seg_id, label, estimated, time, flux, flux_err in rows:
                writer.writerow([seg_id, label])
                columns = [_from_blob(time), _from_blob(flux)]
                if not estimated:
                    columns.append(_from_blob(flux_err))
                yield f"segments/{seg_id}.csv", _segment_csv(columns)
        yield "labels.csv", index.getvalue()


# ------------------------------------------------------------------------------------------
# private helpers


def _check_magic(path: Path) -> None:
    """Refuse, without opening it in SQLite, a file that is not a SQLite database."""
    if path.is_dir():
        raise ParameterError("invalid_store", f"{os.fspath(path)!r} is a folder, not a file")
    if not path.parent.is_dir():
        raise ParameterError("invalid_store",
                             f"the folder of {os.fspath(path)!r} does not exist")
    try:
        with open(path, "rb") as handle:
            head = handle.read(len(_SQLITE_MAGIC))
    except FileNotFoundError:
        return
    except OSError as exc:
        raise ParameterError("invalid_store", f"{path.name}: cannot be read ({exc})") from exc
    if head and head != _SQLITE_MAGIC:
        raise ParameterError("invalid_store", f"{path.name} is not a SQLite database (its "
                             "first bytes are not the SQLite header)")


def _schema_state(conn: sqlite3.Connection, path: Path) -> str:
    """``"empty"`` (a new database) or ``"ours"``; refuse anything else. Reads only."""
    version = int(conn.execute("PRAGMA user_version").fetchone()[0])
    app_id = int(conn.execute("PRAGMA application_id").fetchone()[0])
    tables = {row[0] for row in conn.execute(
        "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")}
    if version == 0 and app_id == 0 and not tables:
        return "empty"
    if app_id != APPLICATION_ID:
        raise ParameterError("invalid_store", f"{path.name} is a SQLite database of another "
                             f"application (application_id {app_id}, tables {sorted(tables)})")
    if version > SCHEMA_VERSION:
        raise ParameterError("unsupported_store_version",
                             f"{path.name} has schema version {version}, newer than the "
                             f"{SCHEMA_VERSION} this dipshape understands; upgrade dipshape")
    if version != SCHEMA_VERSION or not _TABLES <= tables:
        raise ParameterError("invalid_store", f"{path.name} is a damaged dipshape store "
                             f"(schema version {version}, tables {sorted(tables)})")
    return "ours"


def _unavailable(path: Path, exc: sqlite3.Error) -> DipshapeError:
    return DipshapeError("store_unavailable", f"{path.name}: {exc}")


def _not_usable(path: Path, exc: sqlite3.Error) -> ParameterError:
    return ParameterError("invalid_store", f"{path.name}: not a usable SQLite database ({exc})")


def _check_label(label: Any) -> None:
    if (not isinstance(label, str) or not label or len(label) > MAX_LABEL_LENGTH
            or not _LABEL_PATTERN.fullmatch(label)):
        raise ParameterError(
            "invalid_label", f"label must be 1 to {MAX_LABEL_LENGTH} ASCII letters, digits, "
            f"'_' or '-' (it becomes a class name); got {label!r}")


def _check_id(seg_id: Any) -> None:
    """A segment id must be usable as a file stem on any common file system."""
    problem = None
    if not isinstance(seg_id, str) or not seg_id:
        problem = "it is empty"
    elif len(seg_id) > MAX_ID_LENGTH:
        problem = f"it is longer than {MAX_ID_LENGTH} characters"
    elif len(seg_id.encode("utf-8")) > _MAX_ID_BYTES:
        problem = f"it is longer than {_MAX_ID_BYTES} bytes in UTF-8"
    elif "/" in seg_id or "\\" in seg_id:
        problem = "it holds a path separator"
    elif ".." in seg_id:
        problem = "it holds '..'"
    elif seg_id.startswith("."):
        problem = "it starts with a dot"
    elif any(unicodedata.category(c) in ("Cc", "Cf", "Zl", "Zp") for c in seg_id):
        problem = "it holds a control character"
    elif seg_id != seg_id.strip():
        problem = "it starts or ends with white space"
    if problem:
        raise ParameterError("unsafe_id", f"segment id {seg_id!r} cannot name a file in the "
                             f"export: {problem}")


def _check_text(value: Any, name: str, limit: int, code: str, *, allow_control: bool) -> None:
    if value is None:
        return
    if not isinstance(value, str) or len(value) > limit:
        raise ParameterError(code, f"{name} must be a string of at most {limit} characters; "
                             f"got {type(value).__name__} of length "
                             f"{len(value) if isinstance(value, str) else '-'}")
    if "\x00" in value or (not allow_control
                           and any(unicodedata.category(c) == "Cc" for c in value)):
        raise ParameterError(code, f"{name} must not hold control characters; got {value!r}")


def _check_positive_int(value: Any, name: str) -> None:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 1:
        raise ParameterError("invalid_parameter",
                             f"{name} must be a positive integer; got {value!r}")


def _now_utc() -> str:
    return datetime.now(UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def _to_blob(values: np.ndarray) -> bytes:
    return np.ascontiguousarray(values, dtype=_FLOAT64).tobytes()


def _from_blob(blob: bytes) -> np.ndarray:
    return np.frombuffer(blob, dtype=_FLOAT64).astype(np.float64)


def _segment_csv(columns: list[np.ndarray]) -> str:
    """``time,flux[,flux_err]`` with every value as ``repr`` (round-trips float64 exactly)."""
    header = ["time", "flux", "flux_err"][: len(columns)]
    lines = [",".join(header)]
    lists = [c.tolist() for c in columns]
    lines.extend(",".join(map(repr, row)) for row in zip(*lists, strict=True))
    return "\n".join(lines) + "\n"
