"""The SQLite label store: what it keeps, what it hands to training, what it refuses, what survives.

References outside the project:

- SQLite documentation (https://www.sqlite.org/): ``pragma.html`` (``PRAGMA journal_mode``
  answers ``wal`` once the write-ahead log is on; ``synchronous`` FULL is 2; ``user_version``,
  ``application_id``; ``integrity_check`` answers the single row ``ok`` for a sound database),
  ``wal.html`` and ``atomiccommit.html`` (a committed transaction is in the file whatever instant
  the writing process dies; one that did not commit leaves no trace), ``fileformat2.html`` (every
  database begins with the 16 bytes ``"SQLite format 3\\0"``). Each is checked through Python's
  own ``sqlite3`` module on a separate connection, not through the store.
- Python's ``float()`` parses decimal text with correct rounding and ``repr`` of a float is the
  shortest text that parses back to it (Python documentation, "Floating Point Arithmetic"), so a
  value written and parsed back must be bit-identical; compared here as raw IEEE 754 bytes.
- RFC 4180 CSV as read by Python's ``csv`` module; the zip format as read by ``zipfile``.
- POSIX: SIGKILL cannot be caught or ignored, so the killed writer runs no clean-up.
- The training reader of the project itself (``training.dataset.labelled_table``,
  ``features.io.read_segment``): the export must be what it reads.
"""

from __future__ import annotations

import csv
import io
import os
import selectors
import signal
import sqlite3
import subprocess
import sys
import threading
import zipfile
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest

from features.errors import DipshapeError, ParameterError
from features.io import read_segment
from features.segment import Segment, make_segment
from service.store import APPLICATION_ID, SCHEMA_VERSION, LabelStore, StoredLabel
from training.dataset import labelled_table

REPO_ROOT = Path(__file__).resolve().parents[2]
WRITER = Path(__file__).with_name("_store_writer.py")
#: Upper bound on how long a test waits for a child process; a bound, never an assertion.
CHILD_DEADLINE_S = 120.0


# ------------------------------------------------------------------------------------------
# invented demo segments of the fictional Lumen Survey


def lumen_segment(seg_id: str, *, n: int = 81, seed: int = 0, with_errors: bool = True,
                  depth: float = 0.004) -> Segment:
    """White noise around 1200 counts with one transit-like dip (invented data)."""
    rng = np.random.default_rng(seed)
    time = 1412.0 + np.arange(n) * (10.0 / 1440.0)
    flux = 1200.0 * (1.0 + rng.normal(0.0, 8e-4, n))
    flux[n // 3: n // 3 + 12] *= 1.0 - depth
    flux_err = np.full(n, 1200.0 * 8e-4) if with_errors else None
    return make_segment(time, flux, flux_err, id=seg_id)


def even_segment_with_median_off_one(seg_id: str) -> Segment:
    """An even-length segment whose normalised flux has a median that is not exactly 1.0.

    With an even number of points the median is the mean of the two middle values, and that
    mean of two normalised values can round to 1 +- 2**-52 (IEEE 754 rounding). About one in
    ten such segments does; this searches seeds in order and returns the first.
    """
    for seed in range(1000):
        seg = lumen_segment(seg_id, n=80, seed=seed)
        if np.median(seg.flux) != 1.0:
            return seg
    raise AssertionError("no even-length segment with a median off 1.0 in 1000 seeds")


def same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    """Equal as IEEE 754 binary64 bytes (stricter than ==, which equates 0.0 and -0.0)."""
    return a.dtype == b.dtype == np.float64 and a.tobytes() == b.tobytes()


def parse_csv(text: str) -> tuple[list[str], list[list[str]]]:
    rows = list(csv.reader(io.StringIO(text)))
    return rows[0], rows[1:]


def columns_of(text: str) -> dict[str, np.ndarray]:
    """The columns of a segment CSV, each value parsed with Python's float()."""
    header, rows = parse_csv(text)
    return {name: np.array([float(r[j]) for r in rows]) for j, name in enumerate(header)}


@pytest.fixture
def db(tmp_path: Path) -> Path:
    return tmp_path / "lumen-labels.sqlite"


@pytest.fixture
def store(db: Path):
    with LabelStore(db) as opened:
        yield opened


def child_env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO_ROOT), env.get("PYTHONPATH")]))
    return env


def start_writer(db: Path, prefix: str, count: int, *, wait: bool) -> subprocess.Popen[str]:
    command = [sys.executable, str(WRITER), str(db), prefix, str(count)]
    return subprocess.Popen(command + (["--wait"] if wait else []), cwd=REPO_ROOT,
                            env=child_env(), stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, bufsize=1)


def read_line(proc: subprocess.Popen[str], deadline_s: float = CHILD_DEADLINE_S) -> str:
    """One line of the child's stdout ('' at end of file), giving up after ``deadline_s``."""
    with selectors.DefaultSelector() as selector:
        selector.register(proc.stdout, selectors.EVENT_READ)
        if not selector.select(timeout=deadline_s):
            proc.kill()
            raise AssertionError(f"the writer printed nothing for {deadline_s} s")
    return proc.stdout.readline()


# ------------------------------------------------------------------------------------------
# the file


def test_a_new_store_is_a_wal_database_marked_with_its_schema_version(db):
    with LabelStore(db) as store:
        assert store.path == db
        # pragma.html: synchronous FULL is the value 2; a per-connection setting.
        assert store._connection().execute("PRAGMA synchronous").fetchone()[0] == 2
    # pragma.html#pragma_journal_mode: the answer is the mode in effect, "wal" once it is on.
    check = sqlite3.connect(db)
    try:
        assert check.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert check.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
        assert check.execute("PRAGMA application_id").fetchone()[0] == APPLICATION_ID
    finally:
        check.close()
    # fileformat2.html: the header string, then application_id at offset 68 (big-endian).
    head = db.read_bytes()[:100]
    assert head[:16] == b"SQLite format 3\x00"
    assert int.from_bytes(head[68:72], "big") == APPLICATION_ID


def test_reopening_a_store_keeps_its_labels(db):
    with LabelStore(db) as store:
        first = store.add_label(lumen_segment("LS-0042-s3"), "exocomet")
    with LabelStore(db) as store:
        assert store.labels() == [first]
        assert store.count() == 1


# ------------------------------------------------------------------------------------------
# labels and arrays


def test_labels_and_arrays_come_back_exactly(store):
    given = lumen_segment("LS-0042-s3", n=81, seed=1)
    estimated = lumen_segment("LS-0107-s4", n=64, seed=2, with_errors=False)
    before = datetime.now(UTC)
    a = store.add_label(given, "exocomet", note="steep ingress,\nlong tail", submitter="ana")
    b = store.add_label(estimated, "eclipsing_binary")
    after = datetime.now(UTC)

    assert isinstance(a, StoredLabel)
    assert (a.id, a.label, a.note, a.submitter) == ("LS-0042-s3", "exocomet",
                                                    "steep ingress,\nlong tail", "ana")
    assert (b.id, b.label, b.note, b.submitter) == ("LS-0107-s4", "eclipsing_binary", None, None)
    assert b.label_id > a.label_id
    for stored in (a, b):  # ISO 8601 in UTC (datetime.fromisoformat reads the "Z" suffix)
        when = datetime.fromisoformat(stored.created_utc)
        assert when.utcoffset().total_seconds() == 0
        assert before <= when <= after
    assert store.labels() == [a, b]
    assert store.count() == 2

    for stored, seg in ((a, given), (b, estimated)):
        back = store.segment(stored.label_id)
        assert back == seg  # Segment equality: id, cadence, flux_err_estimated, exact arrays
        for name in ("time", "flux", "flux_err"):
            assert same_bits(getattr(back, name), getattr(seg, name)), name
    assert store.segment(b.label_id).flux_err_estimated


def test_relabelling_an_id_keeps_every_row_and_the_export_uses_the_latest(store):
    first = lumen_segment("LS-0042-s3", seed=1)
    second = lumen_segment("LS-0042-s3", seed=9, depth=0.006)  # re-submitted, other data
    store.add_label(first, "planet", submitter="ana")
    store.add_label(lumen_segment("LS-0077-s3", seed=3), "variability")
    store.add_label(second, "eclipsing_binary", submitter="ben")

    history = store.labels()
    assert [(s.id, s.label) for s in history] == [
        ("LS-0042-s3", "planet"), ("LS-0077-s3", "variability"),
        ("LS-0042-s3", "eclipsing_binary")]
    assert store.count() == 3
    assert store.segment(history[0].label_id) == first

    with zipfile.ZipFile(io.BytesIO(store.export_zip())) as archive:
        header, rows = parse_csv(archive.read("labels.csv").decode())
        exported = columns_of(archive.read("segments/LS-0042-s3.csv").decode())
    assert header == ["id", "label"]
    assert rows == [["LS-0077-s3", "variability"], ["LS-0042-s3", "eclipsing_binary"]]
    assert same_bits(exported["flux"], second.flux)  # the latest segment, not the first


def test_segment_of_an_unknown_label_id_is_refused(store):
    with pytest.raises(ParameterError) as info:
        store.segment(12)
    assert info.value.code == "label_not_found"
    for bad in (0, -1, True, 1.0, "1"):
        with pytest.raises(ParameterError) as info:
            store.segment(bad)
        assert info.value.code == "invalid_parameter"


# ------------------------------------------------------------------------------------------
# the export


def test_the_zip_holds_labels_csv_and_one_csv_per_segment_with_exact_values(store):
    given = lumen_segment("LS-0042-s3", seed=1)
    estimated = lumen_segment("LS-0107-s4", seed=2, with_errors=False)
    store.add_label(given, "exocomet")
    store.add_label(estimated, "planet")

    with zipfile.ZipFile(io.BytesIO(store.export_zip())) as archive:
        assert archive.testzip() is None  # every member's CRC-32 checks
        assert sorted(archive.namelist()) == [
            "labels.csv", "segments/LS-0042-s3.csv", "segments/LS-0107-s4.csv"]
        texts = {name: archive.read(name).decode("utf-8") for name in archive.namelist()}

    a = columns_of(texts["segments/LS-0042-s3.csv"])
    assert list(a) == ["time", "flux", "flux_err"]
    for name in a:
        assert same_bits(a[name], getattr(given, name)), name
    b = columns_of(texts["segments/LS-0107-s4.csv"])
    assert list(b) == ["time", "flux"]  # estimated errors are left for the reader to estimate
    assert same_bits(b["time"], estimated.time)
    assert same_bits(b["flux"], estimated.flux)


def test_the_same_store_exports_the_same_bytes(store):
    store.add_label(lumen_segment("LS-0042-s3"), "planet")
    assert store.export_zip() == store.export_zip()


def test_the_export_is_what_the_training_reader_reads(store, tmp_path):
    # ids with dots and a comma: a file stem and a quoted CSV field (RFC 4180).
    segments = {
        "LS-0042.s3": (lumen_segment("LS-0042.s3", n=81, seed=1), "exocomet"),
        "LS-0107,s4": (lumen_segment("LS-0107,s4", n=75, seed=2, with_errors=False), "planet"),
        "LS-0230-s5": (lumen_segment("LS-0230-s5", n=63, seed=4, depth=0.02), "eclipsing_binary"),
    }
    for seg, label in segments.values():
        store.add_label(seg, label)
    store.add_label(segments["LS-0042.s3"][0], "systematic")  # re-labelled: latest wins

    folder = store.export_to_dir(tmp_path / "export")
    assert folder == tmp_path / "export"
    assert sorted(p.name for p in folder.iterdir()) == ["labels.csv", "segments"]

    table, summary = labelled_table(folder / "labels.csv", folder / "segments")
    assert summary["missing"] == [] and summary["unreadable"] == {}
    assert summary["duplicates"] == []
    assert dict(zip(table["id"], table["label"], strict=True)) == {
        "LS-0042.s3": "systematic", "LS-0107,s4": "planet", "LS-0230-s5": "eclipsing_binary"}

    for seg_id, (seg, _) in segments.items():
        back = read_segment(folder / "segments" / f"{seg_id}.csv")
        assert back.id == seg_id  # the file stem
        assert back == seg
        for name in ("time", "flux", "flux_err"):
            assert same_bits(getattr(back, name), getattr(seg, name)), (seg_id, name)
        assert back.flux_err_estimated == seg.flux_err_estimated


def test_an_even_segment_whose_median_is_off_one_is_read_within_two_ulp(store, tmp_path):
    # The reader divides by the median again; the export holds the stored values exactly, and
    # what the reader makes of them differs from them by at most the rounding of that median.
    seg = even_segment_with_median_off_one("LS-0311-s6")
    stored = store.add_label(seg, "planet")
    assert store.segment(stored.label_id) == seg  # the store itself is exact
    folder = store.export_to_dir(tmp_path / "export")
    path = folder / "segments" / "LS-0311-s6.csv"
    written = columns_of(path.read_text())
    for name in ("time", "flux", "flux_err"):
        assert same_bits(written[name], getattr(seg, name)), name
    back = read_segment(path)
    assert same_bits(back.time, seg.time)
    np.testing.assert_array_max_ulp(back.flux, seg.flux, maxulp=2)
    np.testing.assert_array_max_ulp(back.flux_err, seg.flux_err, maxulp=2)
    assert back == make_segment(seg.time, seg.flux, seg.flux_err, id="LS-0311-s6")


def test_export_to_an_existing_empty_folder_works(store, tmp_path):
    store.add_label(lumen_segment("LS-0042-s3"), "planet")
    (tmp_path / "empty").mkdir()
    folder = store.export_to_dir(tmp_path / "empty")
    assert (folder / "segments" / "LS-0042-s3.csv").is_file()


def _folder_not_empty(tmp_path: Path) -> Path:
    (tmp_path / "full").mkdir()
    (tmp_path / "full" / "old.csv").write_text("time,flux\n")
    return tmp_path / "full"


def _a_file(tmp_path: Path) -> Path:
    (tmp_path / "a-file").write_text("x")
    return tmp_path / "a-file"


def _parent_missing(tmp_path: Path) -> Path:
    return tmp_path / "missing" / "export"


@pytest.mark.parametrize("make_target", [_folder_not_empty, _a_file, _parent_missing])
def test_export_to_an_unusable_folder_is_refused_and_leaves_nothing(store, tmp_path,
                                                                     make_target):
    store.add_label(lumen_segment("LS-0042-s3"), "planet")
    target = make_target(tmp_path)
    before = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*"))
    with pytest.raises(ParameterError) as info:
        store.export_to_dir(target)
    assert info.value.code == "invalid_export_target"
    assert sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*")) == before


def test_an_empty_store_exports_a_header_only_labels_csv(store):
    with zipfile.ZipFile(io.BytesIO(store.export_zip())) as archive:
        assert archive.namelist() == ["labels.csv"]
        assert archive.read("labels.csv").decode() == "id,label\n"


# ------------------------------------------------------------------------------------------
# refused input


BAD_LABELS = [
    ("", "invalid_label"),
    ("planet candidate", "invalid_label"),
    ("planet/eb", "invalid_label"),
    ("plan\u00e8te", "invalid_label"),  # letters must be ASCII: the label becomes a class name
    ("x" * 65, "invalid_label"),
    (None, "invalid_label"),
    (3, "invalid_label"),
]


@pytest.mark.parametrize(("label", "code"), BAD_LABELS)
def test_a_bad_label_is_refused_with_its_code_and_nothing_stored(store, label, code):
    with pytest.raises(ParameterError) as info:
        store.add_label(lumen_segment("LS-0042-s3"), label)
    assert info.value.code == code
    assert store.count() == 0


def test_the_longest_label_and_id_are_accepted(store):
    stored = store.add_label(lumen_segment("L" * 128), "x_-9" * 16)
    assert (len(stored.id), len(stored.label)) == (128, 64)


BAD_IDS = [
    "../LS-0042",
    "LS/0042",
    "LS\\0042",
    "LS..0042",
    ".LS-0042",
    "..",
    "LS-0042\x00",
    "LS-0042\nb",
    "LS-\u200b0042",  # a zero-width (format) character
    " LS-0042",
    "LS-0042 ",
    "L" * 129,
    "\u00e9" * 101,  # 101 characters but 202 bytes in UTF-8
]


@pytest.mark.parametrize("seg_id", BAD_IDS)
def test_an_id_that_cannot_be_a_file_name_is_refused(store, seg_id):
    with pytest.raises(ParameterError) as info:
        store.add_label(lumen_segment(seg_id), "planet")
    assert info.value.code == "unsafe_id"
    assert store.count() == 0


BAD_EXTRAS = [
    ({"note": 12}, "invalid_note"),
    ({"note": "x" * 4001}, "invalid_note"),
    ({"note": "nul\x00byte"}, "invalid_note"),
    ({"submitter": ["ana"]}, "invalid_submitter"),
    ({"submitter": "a" * 257}, "invalid_submitter"),
    ({"submitter": "ana\nben"}, "invalid_submitter"),
]


@pytest.mark.parametrize(("kwargs", "code"), BAD_EXTRAS)
def test_a_bad_note_or_submitter_is_refused(store, kwargs, code):
    with pytest.raises(ParameterError) as info:
        store.add_label(lumen_segment("LS-0042-s3"), "planet", **kwargs)
    assert info.value.code == code
    assert store.count() == 0


def test_something_other_than_a_segment_is_refused(store):
    raw = {"id": "LS-0042", "time": [0.0, 1.0], "flux": [1.0, 1.0]}
    with pytest.raises(ParameterError) as info:
        store.add_label(raw, "planet")
    assert info.value.code == "invalid_segment"
    assert store.count() == 0


def test_a_bad_timeout_is_refused(db):
    for bad in (-1.0, float("nan"), "30", True):
        with pytest.raises(ParameterError) as info:
            LabelStore(db, timeout_s=bad)
        assert info.value.code == "invalid_parameter"
    assert not db.exists()


# ------------------------------------------------------------------------------------------
# files that are not our store are refused untouched


def _listing(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def _sqlite_file(path: Path, *script: str) -> None:
    conn = sqlite3.connect(path)  # a rollback-journal database, as another program makes it
    try:
        for statement in script:
            conn.execute(statement)
        conn.commit()
    finally:
        conn.close()


@pytest.mark.parametrize(("make", "code"), [
    pytest.param(lambda p: p.write_bytes(b"time,flux\n1412.0,1.0\n" * 50), "invalid_store",
                 id="a-csv-file"),
    pytest.param(lambda p: p.write_bytes(b"SQLite format 3\x00" + b"\xff" * 4000),
                 "invalid_store", id="sqlite-magic-then-garbage"),
    pytest.param(lambda p: _sqlite_file(p, "CREATE TABLE photometry (t REAL, f REAL)"),
                 "invalid_store", id="another-applications-database"),
    pytest.param(lambda p: _sqlite_file(p, f"PRAGMA application_id = {APPLICATION_ID}",
                                        f"PRAGMA user_version = {SCHEMA_VERSION + 1}",
                                        "CREATE TABLE labels (x)", "CREATE TABLE scores (x)"),
                 "unsupported_store_version", id="newer-schema"),
    pytest.param(lambda p: _sqlite_file(p, f"PRAGMA application_id = {APPLICATION_ID}",
                                        f"PRAGMA user_version = {SCHEMA_VERSION}"),
                 "invalid_store", id="our-mark-without-tables"),
])
def test_a_file_that_is_not_our_store_is_refused_byte_for_byte_unchanged(tmp_path, make, code):
    path = tmp_path / "store.sqlite"
    make(path)
    before = _listing(tmp_path)
    with pytest.raises(ParameterError) as info:
        LabelStore(path)
    assert info.value.code == code
    assert _listing(tmp_path) == before  # same files (no -wal or -shm left), same bytes


def test_a_folder_or_a_missing_folder_is_refused(tmp_path):
    for path in (tmp_path, tmp_path / "nowhere" / "store.sqlite"):
        with pytest.raises(ParameterError) as info:
            LabelStore(path)
        assert info.value.code == "invalid_store"
    assert list(tmp_path.iterdir()) == []


def test_an_empty_file_becomes_a_store(tmp_path):
    path = tmp_path / "store.sqlite"
    path.touch()
    with LabelStore(path) as store:
        assert store.count() == 0


# ------------------------------------------------------------------------------------------
# lifecycle


def test_a_closed_store_refuses_every_call(db):
    store = LabelStore(db)
    store.close()
    store.close()  # idempotent
    calls = [store.count, store.labels, store.export_zip, lambda: store.segment(1),
             lambda: store.add_label(lumen_segment("LS-0042-s3"), "planet"),
             lambda: store.log_score({"id": "LS-0042", "label": "planet"}),
             lambda: store.recent_scores(3)]
    for call in calls:
        with pytest.raises(ParameterError) as info:
            call()
        assert info.value.code == "store_closed"


def test_the_context_manager_closes_the_store(db):
    with LabelStore(db) as store:
        store.count()
    with pytest.raises(ParameterError, match="closed"):
        store.count()


# ------------------------------------------------------------------------------------------
# score log


def _result(seg_id: str, label: str) -> dict:
    return {"schema_version": "1", "id": seg_id, "label": label,
            "probabilities": {"planet": 0.7, "exocomet": 0.3}, "flags": [],
            "features": {"skewness": None}, "model": {"name": "default", "version": "v7"}}


def test_scores_are_logged_and_read_back_newest_first(store):
    first = store.log_score(_result("LS-0042-s3", "planet"))
    error = store.log_score({"schema_version": "1", "id": "LS-0107", "error": "too_few_points",
                             "detail": "12 usable points"})
    third = store.log_score(_result("LS-0230-s5", "exocomet"))

    assert (first.outcome, first.is_error, first.model_version) == ("planet", False, "v7")
    assert (error.outcome, error.is_error, error.model_version) == ("too_few_points", True, None)
    assert first.result() == _result("LS-0042-s3", "planet")
    assert store.recent_scores(2) == [third, error]
    assert store.recent_scores() == [third, error, first]
    assert store.count() == 0  # the score log is not a label


@pytest.mark.parametrize("result", [
    pytest.param(["LS-0042", "planet"], id="not-a-mapping"),
    pytest.param({"label": "planet"}, id="no-id"),
    pytest.param({"id": "LS-0042"}, id="neither-label-nor-error"),
    pytest.param({"id": "LS-0042", "label": "planet", "features": {"depth": float("nan")}},
                 id="nan-is-not-json"),
    pytest.param({"id": "LS-0042", "label": "planet", "extra": object()}, id="not-serialisable"),
])
def test_a_bad_score_is_refused(store, result):
    with pytest.raises(ParameterError) as info:
        store.log_score(result)
    assert info.value.code == "invalid_score"
    assert store.recent_scores() == []


def test_recent_scores_needs_a_positive_count(store):
    for bad in (0, -3, 2.5, True):
        with pytest.raises(ParameterError) as info:
            store.recent_scores(bad)
        assert info.value.code == "invalid_parameter"


# ------------------------------------------------------------------------------------------
# concurrency and durability


def test_many_threads_and_processes_write_at_once_and_every_label_is_kept(db):
    n_threads, n_processes, per_writer = 8, 3, 25
    # The processes create the store themselves, at about the same moment.
    procs = [start_writer(db, f"p{k}", per_writer, wait=True) for k in range(n_processes)]
    try:
        for proc in procs:
            assert read_line(proc) == "ready\n", proc.stderr.read()
        with LabelStore(db) as store:
            barrier = threading.Barrier(n_threads + 1)
            errors: list[BaseException] = []
            acknowledged: list[int] = []
            lock = threading.Lock()

            def write(k: int) -> None:
                try:
                    barrier.wait()
                    for i in range(per_writer):
                        seg = lumen_segment(f"LS-t{k}-{i:05d}", n=41, seed=k * 1000 + i)
                        stored = store.add_label(seg, "planet")
                        with lock:
                            acknowledged.append(stored.label_id)
                except BaseException as exc:  # collected and asserted below
                    errors.append(exc)

            threads = [threading.Thread(target=write, args=(k,)) for k in range(n_threads)]
            for thread in threads:
                thread.start()
            for proc in procs:  # go: processes and threads write together
                proc.stdin.write("go\n")
                proc.stdin.flush()
            barrier.wait()
            for thread in threads:
                thread.join()
            outputs = [proc.communicate(timeout=CHILD_DEADLINE_S) for proc in procs]
            assert errors == []
            for proc, (out, err) in zip(procs, outputs, strict=True):
                assert proc.returncode == 0, err
                assert "locked" not in err
                acknowledged.extend(int(line) for line in out.split())

            labels = store.labels()
            total = (n_threads + n_processes) * per_writer
            assert store.count() == total == len(labels)
            assert sorted(acknowledged) == [s.label_id for s in labels]  # unique, all there
            expected = {f"LS-t{k}-{i:05d}" for k in range(n_threads) for i in range(per_writer)}
            expected |= {f"LS-p{k}-{i:05d}" for k in range(n_processes) for i in range(per_writer)}
            assert {s.id for s in labels} == expected
    finally:
        for proc in procs:
            if proc.poll() is None:
                proc.kill()
                proc.wait()


def test_a_writer_kept_waiting_past_its_timeout_gets_store_unavailable(db):
    with LabelStore(db, timeout_s=0.05) as store:
        blocker = sqlite3.connect(db, isolation_level=None)
        blocker.execute("BEGIN IMMEDIATE")  # lang_transaction.html: takes the write lock now
        try:
            with pytest.raises(DipshapeError) as info:
                store.add_label(lumen_segment("LS-0042-s3"), "planet")
            assert info.value.code == "store_unavailable"
            assert store.count() == 0  # wal.html: a reader is not blocked by the writer
        finally:
            blocker.execute("ROLLBACK")
            blocker.close()
        store.add_label(lumen_segment("LS-0042-s3"), "planet")  # once the lock is released
        assert store.count() == 1


@pytest.mark.skipif(not hasattr(signal, "SIGKILL"), reason="needs POSIX SIGKILL")
def test_every_acknowledged_label_survives_a_kill_mid_load(db):
    proc = start_writer(db, "k", 0, wait=False)  # writes until killed
    acknowledged: list[int] = []
    try:
        while len(acknowledged) < 40:
            line = read_line(proc)
            assert line, f"the writer stopped early: {proc.stderr.read()}"
            acknowledged.append(int(line))
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=CHILD_DEADLINE_S)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == -signal.SIGKILL
    # Lines already in the pipe were printed after add_label returned: acknowledged too.
    acknowledged.extend(int(line) for line in proc.stdout.read().split())
    proc.stdout.close()
    proc.stdin.close()
    proc.stderr.close()

    # atomiccommit.html / wal.html: the next opener recovers the WAL; committed rows are there.
    check = sqlite3.connect(db)
    try:
        assert check.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
    finally:
        check.close()
    with LabelStore(db) as store:
        stored = {s.label_id for s in store.labels()}
        assert set(acknowledged) <= stored
        assert store.count() >= len(acknowledged)
        last = max(acknowledged)
        assert store.segment(last).n_points == 61
