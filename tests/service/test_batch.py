"""Batch scoring (``service.batch`` and ``dipshape score`` in batch and --stdin modes).

What it must do: the same result lines as the in-process ``dipshape score``; one part per
chunk, complete or absent; a resumable run that refuses to mix runs; summary counts that add up
to the inputs; every input segment exactly once in the output when a worker dies or the client
is killed; an error record for a corrupt input while the others are scored; ordered, flushed
lines in --stdin mode.

References outside the project: Apache Parquet files read back with pyarrow (the parts, column
types and nulls, per the Apache Parquet format and pyarrow documentation); Dask distributed's
documented ``LocalCluster`` (nanny processes that restart a worker that dies) and
``Client.run``; POSIX signals (SIGKILL cannot be caught, SIGINT is Ctrl-C) from Python's
``os``/``signal``; Click's ``CliRunner`` through Typer (exit codes, separate stdout/stderr);
scikit-learn (the tiny model); the JSON Lines convention (one JSON value per line).
"""

from __future__ import annotations

import json
import os
import re
import select
import shutil
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from features.catalog import FEATURE_NAMES, FEATURE_VERSION
from features.errors import ParameterError
from service.batch import (
    MANIFEST_FILE,
    PART_COLUMNS,
    SUMMARY_FILE,
    PortableModel,
    cluster_client,
    iter_result_lines,
    part_paths,
    plan_inputs,
    run_batch,
    score_stream,
)
from service.cli import app
from service.errors import EXIT_FAILURE, EXIT_USAGE
from training.classes import CLASSES
from training.registry import activate, load_model, save_model
from training.simulate import simulate_dataset

from ._registry import tiny_estimator

HERE = Path(__file__).parent


# --------------------------------------------------------------------------------------------
# Fixtures: a tiny registry and small simulated segments of the fictional Lumen Survey
# --------------------------------------------------------------------------------------------


def _estimator(*, seed: int):
    return tiny_estimator(seed=seed)


@pytest.fixture(scope="module")
def registry(tmp_path_factory) -> Path:
    """Active ``tiny-1`` and another version ``tiny-2``."""
    root = tmp_path_factory.mktemp("registry")
    for version, seed in (("tiny-1", 1), ("tiny-2", 2)):
        save_model(root, _estimator(seed=seed), name="tiny", version=version, classes=CLASSES,
                   feature_names=FEATURE_NAMES, feature_version=FEATURE_VERSION, training={},
                   metrics={}, command="pytest")
    activate(root, "tiny-1")
    return root


@pytest.fixture(scope="module")
def portable(registry) -> PortableModel:
    model = load_model(registry, expected_feature_version=FEATURE_VERSION)
    return PortableModel.from_registry(registry, model, None)


def _sims(n: int, seed: int, prefix: str):
    return simulate_dataset(n, seed=seed, window_days=4.0, cadence_min=30.0, id_prefix=prefix)


def _write_csvs(folder: Path, sims) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for s in sims:
        paths.append(folder / f"{s.id}.csv")
        pd.DataFrame({"time": s.time, "flux": s.flux}).to_csv(paths[-1], index=False)
    return paths


def _long_frame(sims) -> pd.DataFrame:
    """The long table layout: segment_id, time, flux, flux_err (every segment valid)."""
    frames = []
    for s in sims:
        err = s.flux_err if s.flux_err is not None else np.full(s.time.size, 1e-3)
        frames.append(pd.DataFrame({"segment_id": s.id, "time": s.time, "flux": s.flux,
                                    "flux_err": err}))
    return pd.concat(frames, ignore_index=True)


@pytest.fixture(scope="module")
def lumen(tmp_path_factory) -> Path:
    """``files/``: 5 CSV light curves; ``table.parquet``: a long table of 7 segments."""
    root = tmp_path_factory.mktemp("lumen")
    _write_csvs(root / "files", _sims(5, 11, "LS-00"))
    _long_frame(_sims(7, 12, "LS-07")).to_parquet(root / "table.parquet", index=False)
    return root


def _cli(*args: str, input: str | None = None):
    return CliRunner().invoke(app, ["score", *args], input=input)


def _strip(line: str) -> dict:
    """A result line without elapsed_ms, the one field that differs between runs."""
    obj = json.loads(line)
    obj.pop("elapsed_ms", None)
    return obj


def _classic(registry: Path, *inputs: str) -> list[dict]:
    res = _cli(*inputs, "--registry", str(registry))
    assert res.exit_code in (0, EXIT_FAILURE), res.stderr
    return [_strip(x) for x in res.stdout.splitlines() if x.strip()]


def _batch_lines(out: Path) -> list[dict]:
    return [_strip(x) for x in iter_result_lines(out)]


def _summary(out: Path) -> dict:
    return json.loads((out / SUMMARY_FILE).read_text())


# --------------------------------------------------------------------------------------------
# Same lines as the in-process command; the parts
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("fmt", ["parquet", "jsonl"])
def test_batch_lines_are_the_in_process_lines(registry, lumen, tmp_path, fmt):
    inputs = (str(lumen / "files"), str(lumen / "table.parquet"))
    out = tmp_path / "out"
    res = _cli(*inputs, "--registry", str(registry), "--out", f"{out}/", "--chunk-size", "3",
               "--format", fmt)
    assert res.exit_code == 0, res.stderr
    # 5 files + 7 table segments in chunks of 3: [3 files] [2 files + 1] [3] [3]
    assert [p.name for p in sorted(out.glob("part-*"))] == [
        f"part-0000{i}.{fmt}" for i in range(4)]
    assert _batch_lines(out) == _classic(registry, *inputs)
    assert "scored 12 segment(s) from 6 file(s)" in res.stderr
    assert "triage, not a discovery" in res.stderr
    if fmt == "jsonl":  # the JSON Lines parts concatenated are what `dipshape score` writes
        text = "".join(p.read_text() for p in sorted(out.glob("part-*.jsonl")))
        assert [_strip(x) for x in text.splitlines()] == _classic(registry, *inputs)


def test_parquet_part_records(registry, lumen, tmp_path):
    out = tmp_path / "out"
    assert _cli(str(lumen / "files"), "--registry", str(registry), "--out", f"{out}/"
                ).exit_code == 0
    # read back with pyarrow: the Apache Parquet columns, all strings, nulls where absent
    table = pq.read_table(out / "part-00000.parquet")
    assert tuple(table.column_names) == PART_COLUMNS
    assert all(str(t) == "string" for t in table.schema.types)
    rows = table.to_pylist()
    assert len(rows) == 5
    for row in rows:
        line = json.loads(row["result_json"])
        assert line["id"] == row["id"] and line["label"] == row["label"]
        assert row["error"] is None and row["model_version"] == "tiny-1"
        assert row["input"].endswith(f"{row['id']}.csv")
    manifest = json.loads((out / MANIFEST_FILE).read_text())
    assert manifest["model"]["version"] == "tiny-1"
    assert len(manifest["model"]["sha256"]) == 64
    assert manifest["chunking"] == {"chunk_size": 64, "n_chunks": 1}
    assert not list(out.glob(".*"))  # no temporary file left behind


def test_manifest_csv_and_parquet_list_relative_paths(registry, lumen, tmp_path):
    listed = tmp_path / "lists"
    listed.mkdir()
    shutil.copytree(lumen / "files", listed / "data")
    names = sorted(p.name for p in (listed / "data").glob("*.csv"))
    pd.DataFrame({"path": [f"data/{n}" for n in names[:3]]}).to_csv(listed / "m.csv",
                                                                    index=False)
    pd.DataFrame({"path": [str(listed / "data" / n) for n in names[3:]]}).to_parquet(
        listed / "m.parquet", index=False)
    out = tmp_path / "out"
    res = _cli(str(listed / "m.csv"), str(listed / "m.parquet"), "--registry", str(registry),
               "--out", f"{out}/")
    assert res.exit_code == 0, res.stderr
    assert [d["id"] for d in _batch_lines(out)] == [n.removesuffix(".csv") for n in names]


def test_glob_patterns_are_expanded(registry, lumen, tmp_path):
    out = tmp_path / "out"
    res = _cli(str(lumen / "files" / "LS-00*0[0-2].csv"), "--registry", str(registry),
               "--out", f"{out}/")
    assert res.exit_code == 0, res.stderr
    assert [d["id"] for d in _batch_lines(out)] == ["LS-00000000", "LS-00000001",
                                                    "LS-00000002"]


@pytest.mark.parametrize("layout", ["interleaved_rows", "small_row_groups"])
def test_long_table_layouts_give_the_same_lines(registry, lumen, tmp_path, layout):
    frame = pd.read_parquet(lumen / "table.parquet")
    path = tmp_path / "table.parquet"
    if layout == "interleaved_rows":  # still time-ordered within each segment
        frame.assign(k=frame.groupby("segment_id").cumcount()).sort_values(
            ["k", "segment_id"], kind="stable").drop(columns="k").to_parquet(path, index=False)
    else:  # segments of 192 rows across row groups of 150 (Apache Parquet row groups)
        pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), path,
                       row_group_size=150)
        assert pq.ParquetFile(path).metadata.num_row_groups == 9
    plan = plan_inputs([path], chunk_size=2)
    assert plan.n_chunks == 4 and plan.n_table_segments == 7
    out = tmp_path / "out"
    assert _cli(str(path), "--registry", str(registry), "--out", f"{out}/", "--chunk-size",
                "2").exit_code == 0
    assert _batch_lines(out) == _classic(registry, str(path))


# --------------------------------------------------------------------------------------------
# Bad input: an error record for it, the others scored; summary counts
# --------------------------------------------------------------------------------------------


def test_corrupt_inputs_among_valid_ones(registry, lumen, tmp_path):
    data = tmp_path / "data"
    shutil.copytree(lumen / "files", data)
    (data / "LS-0099.fits").write_bytes(b"SIMPLE  = this is not a FITS file" * 10)
    (data / "LS-0100.csv").write_text("")
    frame = _long_frame(_sims(3, 13, "LS-08"))
    short = frame["segment_id"] == "LS-08000001"
    frame = pd.concat([frame[~short], frame[short].head(5)], ignore_index=True)  # 5 points
    frame.to_parquet(data / "batch.parquet", index=False)
    out = tmp_path / "out"
    res = _cli(str(data), str(tmp_path / "LS-0101.csv"), "--registry", str(registry),
               "--out", f"{out}/", "--chunk-size", "2")
    assert res.exit_code == EXIT_FAILURE
    lines = [json.loads(x) for x in iter_result_lines(out)]
    errors = {d["id"]: d["error"] for d in lines if "error" in d}
    assert errors == {"LS-0099": "unreadable_file", "LS-0100": "empty_file",
                      "LS-08000001": "too_few_points", "LS-0101": "file_not_found"}
    # 5 valid files + 2 valid table segments scored; every input exactly once
    assert sum("label" in d for d in lines) == 7
    assert len(lines) == len({d["id"] for d in lines}) == 11
    summary = _summary(out)
    assert summary["scored"] == 7 and summary["failed"] == 4
    assert summary["scored"] + summary["failed"] == summary["n_records"] == 11
    assert sum(summary["failed_by_code"].values()) == summary["failed"]
    assert summary["failed_by_code"] == {"empty_file": 1, "file_not_found": 1,
                                         "too_few_points": 1, "unreadable_file": 1}
    assert "4 failed (empty_file: 1, file_not_found: 1, too_few_points: 1" in res.stderr


# --------------------------------------------------------------------------------------------
# Resume
# --------------------------------------------------------------------------------------------


def _run(registry: Path, out: Path, *inputs: str, extra=()):
    return _cli(*inputs, "--registry", str(registry), "--out", f"{out}/", "--chunk-size", "3",
                *extra)


def test_resume_scores_only_the_missing_parts(registry, lumen, tmp_path):
    out = tmp_path / "out"
    inputs = (str(lumen / "files"), str(lumen / "table.parquet"))
    assert _run(registry, out, *inputs).exit_code == 0
    parts = sorted(out.glob("part-*.parquet"))
    before = {p: (p.stat().st_mtime_ns, p.read_bytes()) for p in parts}
    parts[2].unlink()
    res = _run(registry, out, *inputs, extra=("--resume",))
    assert res.exit_code == 0, res.stderr
    for p in (parts[0], parts[1], parts[3]):  # kept as they were
        assert (p.stat().st_mtime_ns, p.read_bytes()) == before[p]
    assert parts[2].is_file()
    summary = _summary(out)
    assert summary["chunks_resumed"] == 3 and summary["chunks_written"] == 1
    assert summary["n_records"] == 12
    assert _batch_lines(out) == _classic(registry, *inputs)
    assert "3 kept from before" in res.stderr


def test_a_second_run_into_the_same_folder_needs_resume(registry, lumen, tmp_path):
    out = tmp_path / "out"
    assert _run(registry, out, str(lumen / "files")).exit_code == 0
    res = _run(registry, out, str(lumen / "files"))
    assert res.exit_code == EXIT_USAGE
    assert "output_exists" in res.stderr and "--resume" in res.stderr


@pytest.mark.parametrize(("change", "match"), [
    ("add_file", r"the inputs"),
    ("edit_file", r"the inputs"),
    ("chunk_size", r"the chunking"),
    ("model", r"the model.*'tiny-1'.*'tiny-2'"),
    ("format", r"the part format"),
    ("ephemeris", r"the ephemeris"),
])
def test_resume_refuses_a_different_run(registry, lumen, tmp_path, change, match):
    data = tmp_path / "data"
    shutil.copytree(lumen / "files", data)
    out = tmp_path / "out"
    assert _run(registry, out, str(data)).exit_code == 0
    first = sorted(out.glob("part-*"))[0]
    first.unlink()  # something left to resume
    extra = ["--resume"]
    if change == "add_file":
        shutil.copy(data / "LS-00000000.csv", data / "LS-00000099.csv")
    elif change == "edit_file":
        with (data / "LS-00000003.csv").open("a") as fh:
            fh.write("9.5,1.0\n")
    elif change == "chunk_size":
        extra += ["--chunk-size", "2"]
    elif change == "model":
        extra += ["--model", "tiny-2"]
    elif change == "format":
        extra += ["--format", "jsonl"]
    else:
        extra += ["--ephemeris", "1.5,0.3,0.1"]
    res = _cli(str(data), "--registry", str(registry), "--out", f"{out}/",
               *(["--chunk-size", "3"] if change != "chunk_size" else []), *extra)
    assert res.exit_code == EXIT_USAGE
    assert "resume_mismatch" in res.stderr
    assert re.search(match, res.stderr), res.stderr
    assert not first.exists()  # nothing written into the other run's folder


def test_a_stale_temporary_part_is_removed_and_rescored(registry, lumen, tmp_path):
    out = tmp_path / "out"
    assert _run(registry, out, str(lumen / "files")).exit_code == 0
    part = sorted(out.glob("part-*"))[1]
    stale = out / f".{part.name}.tmp"
    part.rename(stale)  # as left by a run killed while writing
    assert _run(registry, out, str(lumen / "files"), extra=("--resume",)).exit_code == 0
    assert part.is_file() and not stale.exists()
    assert [d["id"] for d in _batch_lines(out)] == [f"LS-0000000{i}" for i in range(5)]


def test_an_unreadable_part_is_scored_again(registry, lumen, tmp_path, portable):
    out = tmp_path / "out"
    plan = plan_inputs([lumen / "files"], chunk_size=2)
    run_batch(plan, portable, out)
    part = part_paths(out, plan.n_chunks, "parquet")[0]
    part.write_bytes(b"PAR1 not really")  # damaged on disk after the run
    summary = run_batch(plan, portable, out, resume=True)
    assert summary.chunks_written == 1 and summary.n_records == 5
    assert pq.read_table(part).num_rows == 2


# --------------------------------------------------------------------------------------------
# Arguments
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("args", "code", "match"), [
    (["--format", "jsonl"], EXIT_USAGE, r"invalid_parameter.*--out DIR/"),
    (["--out", "o/", "--format", "xml"], EXIT_USAGE, r"unsupported_format.*parquet, jsonl"),
    (["--out", "o/", "--workers", "2", "--scheduler", "tcp://127.0.0.1:1"], EXIT_USAGE,
     r"invalid_parameter.*not both"),
    (["--stdin"], EXIT_USAGE, r"invalid_parameter.*no PATH"),
    (["--out", "o/", "--chunk-size", "0"], EXIT_USAGE, r"chunk-size"),
])
def test_batch_option_refusals(registry, lumen, tmp_path, monkeypatch, args, code, match):
    monkeypatch.chdir(tmp_path)
    res = _cli(str(lumen / "files"), "--registry", str(registry), *args)
    assert res.exit_code == code
    assert re.search(match, res.stderr + res.stdout), res.stderr
    assert not (tmp_path / "o" / MANIFEST_FILE).exists()


def test_plan_refusals(tmp_path):
    (tmp_path / "m.csv").write_text("path,note\nLS-1.csv,a\n,b\n")
    with pytest.raises(ParameterError, match="empty path") as info:
        plan_inputs([tmp_path / "m.csv"])
    assert info.value.code == "invalid_manifest"
    with pytest.raises(ParameterError) as info:
        plan_inputs([tmp_path], chunk_size=0)
    assert info.value.code == "invalid_chunk_size"
    (tmp_path / "m.csv").unlink()
    with pytest.raises(ParameterError) as info:
        plan_inputs([tmp_path])
    assert info.value.code == "no_input_files"


def test_unreachable_scheduler_is_a_clear_error():
    with pytest.raises(ParameterError, match="no Dask scheduler answers") as info, \
            cluster_client(scheduler="tcp://127.0.0.1:9", timeout_s=1.0):
        pass
    assert info.value.code == "scheduler_unreachable"


def test_a_shipped_model_must_be_the_file_its_card_hashed(portable):
    state = portable.__getstate__()
    altered = PortableModel(state["model_bytes"] + b"x", state["card"], state["sha256"], None)
    with pytest.raises(Exception, match="not the file its card hashed") as info:
        altered.model()
    assert info.value.code == "model_integrity"
    rebuilt = PortableModel(**state)
    assert rebuilt.model().card.version == "tiny-1"
    assert rebuilt.model() is rebuilt.model()  # rebuilt once per process


# --------------------------------------------------------------------------------------------
# --stdin
# --------------------------------------------------------------------------------------------


def _segment_line(sim, **extra) -> str:
    flux = [None if not np.isfinite(f) else float(f) for f in sim.flux]
    return json.dumps({"id": sim.id, "time": sim.time.tolist(), "flux": flux, **extra})


def test_stdin_lines_in_order_with_error_lines(registry):
    a, b = _sims(2, 21, "LS-09")
    no_id = json.loads(_segment_line(b))
    del no_id["id"]
    flux = [float(f) for f in a.flux]
    flux[3], flux[4] = float("nan"), float("inf")
    nan_text = json.dumps({"id": "LS-nan", "time": a.time.tolist(), "flux": flux})
    assert "NaN" in nan_text and "Infinity" in nan_text  # Python's non-JSON tokens
    stream = "\n".join([
        _segment_line(a),
        "{not json",
        "",
        json.dumps({"id": "LS-short", "time": [0, 1, 2], "flux": [1, 1, 1]}),
        json.dumps(no_id),
        json.dumps([1, 2]),
        nan_text,
    ]) + "\n"
    res = _cli("--stdin", "--registry", str(registry), input=stream)
    assert res.exit_code == EXIT_FAILURE
    lines = [json.loads(x) for x in res.stdout.splitlines()]
    assert [d["id"] for d in lines] == ["LS-09000000", "line-2", "LS-short", "line-5",
                                        "line-6", "LS-nan"]
    assert [d.get("error") for d in lines] == [None, "invalid_json", "too_few_points", None,
                                               "invalid_type", None]
    # the same segment gives the same line as from a file
    assert _strip(res.stdout.splitlines()[0]) == _strip(json.dumps(lines[0]))
    assert "scored 3 line(s)" in res.stderr and "3 failed" in res.stderr


def test_stream_flushes_every_line(portable):
    (sim,) = _sims(1, 22, "LS-10")

    class Recorder:
        def __init__(self):
            self.events = []

        def write(self, text):
            self.events.append(("write", text.count("\n")))

        def flush(self):
            self.events.append(("flush", 0))

    sink = Recorder()
    scored, failed = score_stream([_segment_line(sim), "nope"], sink, portable.model())
    assert (scored, failed) == (1, 1)
    assert sink.events == [("write", 1), ("flush", 0), ("write", 1), ("flush", 0)]


def test_stdin_answers_each_line_before_the_stream_ends(registry):
    """Over a real pipe: the first answer arrives while standard input is still open."""
    (sim,) = _sims(1, 23, "LS-11")
    proc = subprocess.Popen([sys.executable, str(HERE / "_batch_cli.py"), "score", "--stdin",
                             "--registry", str(registry)], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    try:
        proc.stdin.write(_segment_line(sim) + "\n")
        proc.stdin.flush()
        ready, _, _ = select.select([proc.stdout], [], [], 120)
        assert ready, "no answer while the stream is open"
        first = json.loads(proc.stdout.readline())
        assert first["id"] == "LS-11000000" and "label" in first
        proc.stdin.write("garbage\n")
        proc.stdin.close()
        rest = proc.stdout.read().splitlines()
        assert [json.loads(x)["error"] for x in rest] == ["invalid_json"]
        assert proc.wait(timeout=60) == EXIT_FAILURE
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


# --------------------------------------------------------------------------------------------
# Faults: the client killed, a worker killed
# --------------------------------------------------------------------------------------------


def _wait_for_parts(out: Path, n: int, proc: subprocess.Popen, timeout_s: float = 120) -> None:
    deadline = time.monotonic() + timeout_s
    while len(list(out.glob("part-*"))) < n:
        assert proc.poll() is None, "the run ended before it could be interrupted"
        assert time.monotonic() < deadline, "no parts appeared"
        time.sleep(0.01)


@pytest.fixture(scope="module")
def forty(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("forty")
    _write_csvs(folder, _sims(40, 31, "LS-2"))
    return folder


def test_client_killed_mid_run_then_resume(registry, forty, tmp_path):
    out = tmp_path / "out"
    args = [str(forty), "--registry", str(registry), "--out", f"{out}/", "--chunk-size", "2"]
    proc = subprocess.Popen([sys.executable, str(HERE / "_batch_cli.py"), "score", *args],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        _wait_for_parts(out, 3, proc)
        proc.send_signal(signal.SIGKILL)  # POSIX: cannot be caught, nothing is cleaned up
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    done = len(list(out.glob("part-*")))
    assert 3 <= done < 20, "the kill must land mid-run"
    for part in out.glob("part-*"):  # every part there is complete
        assert pq.read_table(part).num_rows == 2
    res = _cli(*args, "--resume")
    assert res.exit_code == 0, res.stderr
    ids = [d["id"] for d in _batch_lines(out)]
    assert Counter(ids) == Counter(p.stem for p in forty.glob("*.csv"))  # none lost, none twice
    assert _summary(out)["chunks_resumed"] == done


@pytest.fixture(scope="module")
def two_hundred(tmp_path_factory) -> Path:
    """Long enough (100 chunks) that a Ctrl-C after two parts lands mid-run on 2 workers."""
    folder = tmp_path_factory.mktemp("two_hundred")
    _write_csvs(folder, _sims(200, 37, "LS-3"))
    return folder


def test_client_of_a_local_cluster_interrupted_with_ctrl_c(registry, two_hundred, tmp_path):
    out = tmp_path / "out"
    args = [str(two_hundred), "--registry", str(registry), "--out", f"{out}/", "--chunk-size", "2",
            "--workers", "2"]
    # a background job of a non-interactive shell (a CI runner) starts with SIGINT ignored and
    # its children inherit that (POSIX); give the child the default disposition, so that
    # Python turns SIGINT into KeyboardInterrupt as it does at a terminal
    proc = subprocess.Popen([sys.executable, str(HERE / "_batch_cli.py"), "score", *args],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    try:
        _wait_for_parts(out, 2, proc)
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130  # 128 + SIGINT (shell convention)
    assert re.search(r"interrupted: \d+ of 100 chunk\(s\) have their part.*--resume", err), err
    assert not (out / SUMMARY_FILE).exists()  # only a run that ends writes its summary
    assert not list(out.glob(".*.tmp"))
    assert _cli(*args[:-2], "--resume").exit_code == 0  # resumed in-process: same manifest
    assert sorted(d["id"] for d in _batch_lines(out)) == sorted(
        p.stem for p in two_hundred.glob("*.csv"))


def test_worker_killed_mid_run_every_segment_once(portable, forty, tmp_path, registry):
    out = tmp_path / "out"
    bad = tmp_path / "LS-bad.fits"
    bad.write_bytes(b"SIMPLE  = this is not a FITS file" * 10)
    inputs = [str(forty), str(bad), str(tmp_path / "LS-missing.csv")]
    plan = plan_inputs(inputs, chunk_size=1)
    killed: list[int] = []
    with cluster_client(workers=2) as client:
        pids = sorted(client.run(os.getpid).values())
        assert len(pids) == 2

        def kill_one(index: int) -> None:
            if not killed:  # after the first part, while the other chunks run
                os.kill(pids[0], signal.SIGKILL)
                killed.append(pids[0])

        summary = run_batch(plan, portable, out, client=client, on_part=kill_one)
        assert summary.mode == "cluster (2 workers)"
        with pytest.raises(ProcessLookupError):
            os.kill(killed[0], 0)  # that worker process is gone
    assert summary.complete and summary.n_records == 42
    assert dict(summary.failed_by_code) == {"unreadable_file": 1, "file_not_found": 1}
    lines = _batch_lines(out)
    expected = [p.stem for p in forty.glob("*.csv")] + ["LS-bad", "LS-missing"]
    assert Counter(d["id"] for d in lines) == Counter(expected)  # each exactly once
    assert lines == _classic(registry, *inputs)  # the same lines as in-process
