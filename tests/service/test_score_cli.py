"""``dipshape score``: JSON lines per segment, error lines, exit codes, reproducibility.

References outside the project: the ``jsonschema`` draft 2020-12 validator (every line against
``service/result.schema.json``), Click's ``CliRunner`` through Typer (exit codes, separate
stdout/stderr), astropy's FITS writer and pandas' CSV/Parquet writers (the input files),
scikit-learn (the tiny model).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import jsonschema
import numpy as np
import pandas as pd
import pytest
from astropy.io import fits
from typer.testing import CliRunner

from features.catalog import FEATURE_NAMES, FEATURE_VERSION
from service.cli import app
from service.errors import EXIT_FAILURE, EXIT_USAGE
from service.scoring import OOD_FILE, result_schema
from training.classes import CLASSES
from training.registry import activate, save_model
from training.simulate import simulate_segment

from ._registry import tiny_estimator


def _estimator(*, seed: int):
    return tiny_estimator(seed=seed)


def _save(root: Path, version: str, *, feature_names=FEATURE_NAMES, extra_files=None) -> None:
    save_model(root, _estimator(seed=1), name="tiny", version=version, classes=CLASSES,
               feature_names=feature_names, feature_version=FEATURE_VERSION, training={},
               metrics={}, command="pytest", extra_files=extra_files)


@pytest.fixture(scope="module")
def registry(tmp_path_factory) -> Path:
    """Active ``tiny-1``; also ``renamed`` (other feature names) and ``narrow`` (an ood.json
    whose ranges no real segment fits)."""
    root = tmp_path_factory.mktemp("registry")
    _save(root, "tiny-1")
    activate(root, "tiny-1")
    _save(root, "renamed", feature_names=tuple(f"c{i}" for i in range(len(FEATURE_NAMES))))
    narrow = {n: {"q_lo": 1e9, "q_hi": 2e9, "nan_fraction": 0.5} for n in FEATURE_NAMES}
    _save(root, "narrow", extra_files={OOD_FILE: json.dumps(narrow).encode()})
    return root


def _sim(label: str, seed: int, id: str):
    return simulate_segment(label, np.random.default_rng(seed), id=id, cadence_min=30.0,
                            window_days=4.0)


def _write_csv(path: Path, sim) -> Path:
    pd.DataFrame({"time": sim.time, "flux": sim.flux}).to_csv(path, index=False)
    return path


def _write_fits(path: Path, sim) -> Path:
    ok = np.isfinite(sim.flux)
    quality = np.zeros(sim.time.size, dtype=np.int32)
    quality[::37] = 512  # a few flagged cadences, as mission products have
    cols = [fits.Column(name="TIME", format="D", array=sim.time),
            fits.Column(name="PDCSAP_FLUX", format="D", array=np.where(ok, sim.flux, np.nan)),
            fits.Column(name="PDCSAP_FLUX_ERR", format="D",
                        array=np.full(sim.time.size, np.nanstd(sim.flux) * 0.5)),
            fits.Column(name="QUALITY", format="J", array=quality)]
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols, name="LIGHTCURVE")]
                 ).writeto(path)
    return path


@pytest.fixture(scope="module")
def data(tmp_path_factory) -> Path:
    """A folder: two CSV files, one FITS file and a two-segment Parquet table."""
    folder = tmp_path_factory.mktemp("lumen")
    _write_csv(folder / "LS-0001.csv", _sim("planet", 1, "LS-0001"))
    _write_csv(folder / "LS-0002.csv", _sim("exocomet", 2, "LS-0002"))
    _write_fits(folder / "LS-0003.fits", _sim("eclipsing_binary", 3, "LS-0003"))
    parts = [pd.DataFrame({"segment_id": s.id, "time": s.time, "flux": s.flux})
             for s in (_sim("variability", 4, "LS-0004-s1"), _sim("systematic", 5, "LS-0004-s2"))]
    pd.concat(parts, ignore_index=True).to_parquet(folder / "batch.parquet", index=False)
    return folder


@pytest.fixture(scope="module")
def validator():
    return jsonschema.Draft202012Validator(result_schema())


def _run(*args: str):
    return CliRunner().invoke(app, ["score", *args])


def _lines(text: str) -> list[dict]:
    return [json.loads(line) for line in text.splitlines() if line.strip()]


def test_scores_a_folder_ids_follow_file_stems(registry, data, validator):
    res = _run(str(data), "--registry", str(registry))
    assert res.exit_code == 0, res.stderr
    lines = _lines(res.stdout)
    # files in name order; a long Parquet table gives one line per segment_id
    assert [d["id"] for d in lines] == ["LS-0001", "LS-0002", "LS-0003", "LS-0004-s1",
                                        "LS-0004-s2"]
    for d in lines:
        validator.validate(d)  # jsonschema draft 2020-12
        assert list(d["probabilities"]) == list(CLASSES)
        assert d["model"]["version"] == "tiny-1"
    assert "scored 5 segment(s) from 4 file(s)" in res.stderr


def test_unreadable_file_becomes_an_error_line(registry, data, tmp_path, validator):
    bad = tmp_path / "LS-0099.fits"
    bad.write_bytes(b"SIMPLE  = this is not a FITS file" * 10)
    empty = tmp_path / "LS-0100.csv"
    empty.write_text("")
    res = _run(str(data / "LS-0001.csv"), str(bad), str(empty), str(data / "LS-0002.csv"),
               "--registry", str(registry))
    assert res.exit_code == EXIT_FAILURE
    lines = _lines(res.stdout)
    assert [d["id"] for d in lines] == ["LS-0001", "LS-0099", "LS-0100", "LS-0002"]
    for d in lines:
        validator.validate(d)
    assert lines[1]["error"] == "unreadable_file" and "LS-0099.fits" in lines[1]["detail"]
    assert lines[2]["error"] == "empty_file"
    assert "label" in lines[0] and "label" in lines[3]
    assert "2 failed" in res.stderr


def test_out_file_and_identical_runs(registry, data, tmp_path):
    first, second = tmp_path / "a.jsonl", tmp_path / "sub" / "b.jsonl"
    for out in (first, second):
        res = _run(str(data), "--registry", str(registry), "--out", str(out))
        assert res.exit_code == 0, res.stderr
        assert res.stdout == ""  # the lines went to the file
    a, b = _lines(first.read_text()), _lines(second.read_text())
    assert len(a) == 5
    for d in (*a, *b):
        assert d.pop("elapsed_ms") >= 0
    assert a == b


def test_ephemeris_option(registry, data):
    res = _run(str(data / "LS-0001.csv"), "--registry", str(registry),
               "--ephemeris", "1.9,1500.25,0.11")
    assert res.exit_code == 0, res.stderr
    (line,) = _lines(res.stdout)
    assert line["ephemeris"] == {"period_days": 1.9, "epoch": 1500.25, "duration_days": 0.11}
    assert "ephemeris_supplied" in line["flags"]


def test_model_option_and_ood_file(registry, data, validator):
    res = _run(str(data / "LS-0001.csv"), "--registry", str(registry), "--model", "narrow")
    assert res.exit_code == 0, res.stderr
    (line,) = _lines(res.stdout)
    validator.validate(line)
    assert line["model"]["version"] == "narrow"
    assert "out_of_distribution" in line["flags"]
    plain = _lines(_run(str(data / "LS-0001.csv"), "--registry", str(registry)).stdout)
    assert "out_of_distribution" not in plain[0]["flags"]


def test_default_registry_is_models_in_the_current_directory(registry, data, monkeypatch,
                                                             tmp_path):
    import shutil

    shutil.copytree(registry, tmp_path / "models")
    monkeypatch.chdir(tmp_path)
    res = _run(str(data / "LS-0002.csv"))
    assert res.exit_code == 0, res.stderr
    assert _lines(res.stdout)[0]["model"]["version"] == "tiny-1"


@pytest.mark.parametrize(("extra", "code", "match"), [
    (["--ephemeris", "3.5,1412.3"], EXIT_USAGE, r"invalid_ephemeris.*2 value"),
    (["--ephemeris", "p,1412.3,0.1"], EXIT_USAGE, r"invalid_ephemeris.*PERIOD 'p'"),
    (["--ephemeris", "3.5,1412.3,-1"], EXIT_USAGE, r"invalid_ephemeris.*duration_days"),
    (["--ephemeris", "0.1,1412.3,0.2"], EXIT_USAGE, r"invalid_ephemeris.*shorter than"),
    (["--model", "no-such-version"], EXIT_FAILURE, r"model_not_found"),
    (["--model", "renamed"], EXIT_FAILURE, r"feature_names_mismatch"),
])
def test_refusals_and_exit_codes(registry, data, extra, code, match):
    res = _run(str(data / "LS-0001.csv"), "--registry", str(registry), *extra)
    assert res.exit_code == code
    assert res.stdout == ""
    assert re.search(match, res.stderr), res.stderr


@pytest.mark.parametrize(("setup", "code", "match"), [
    ("empty_folder", EXIT_USAGE, r"no_input_files"),
    ("empty_registry", EXIT_FAILURE, r"no_active_model"),
    ("out_is_a_folder", EXIT_USAGE, r"unwritable_output"),
])
def test_nothing_to_do(registry, data, tmp_path, setup, code, match):
    lc = str(data / "LS-0001.csv")
    if setup == "empty_folder":
        (tmp_path / "notes.md").write_text("not a light curve")
        args = [str(tmp_path), "--registry", str(registry)]
    elif setup == "empty_registry":
        (tmp_path / "models").mkdir()
        args = [lc, "--registry", str(tmp_path / "models")]
    else:
        args = [lc, "--registry", str(registry), "--out", str(tmp_path)]
    res = _run(*args)
    assert res.exit_code == code
    assert re.search(match, res.stderr), res.stderr


def test_help_documents_the_contract():
    res = CliRunner().invoke(app, ["score", "--help"], env={"COLUMNS": "120"})
    assert res.exit_code == 0
    for needle in ("--out", "--model", "--registry", "--ephemeris", "P,T0,DUR", "Exit codes",
                   "dipshape score LS-0042.csv", "./models", "result.schema.json"):
        assert needle in res.stdout, needle
