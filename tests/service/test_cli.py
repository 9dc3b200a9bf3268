"""The `dipshape` command line: simulate and demo (score has its own test module)."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
from typer.testing import CliRunner

from service.cli import app
from training.classes import CLASSES

runner = CliRunner()


def test_simulate_writes_balanced_segments_and_labels(tmp_path):
    out = tmp_path / "sim"
    result = runner.invoke(app, ["simulate", "--n", "10", "--out", str(out), "--seed", "3"])
    assert result.exit_code == 0, result.output
    labels = pd.read_csv(out / "labels.csv")
    assert len(labels) == 10
    assert labels["label"].value_counts().to_dict() == dict.fromkeys(CLASSES, 2)
    for seg_id in labels["id"]:
        frame = pd.read_csv(out / f"{seg_id}.csv")
        assert {"time", "flux"} <= set(frame.columns)


def test_simulate_is_reproducible_and_restricts_classes(tmp_path):
    args = ["simulate", "--n", "4", "--seed", "9", "--classes", "exocomet,planet", "--format",
            "parquet"]
    a = runner.invoke(app, [*args, "--out", str(tmp_path / "a")])
    b = runner.invoke(app, [*args, "--out", str(tmp_path / "b"), "--jobs", "2"])
    assert a.exit_code == 0 and b.exit_code == 0
    ta = pd.read_parquet(tmp_path / "a" / "segments.parquet")
    tb = pd.read_parquet(tmp_path / "b" / "segments.parquet")
    pd.testing.assert_frame_equal(ta, tb)
    assert set(pd.read_csv(tmp_path / "a" / "labels.csv")["label"]) == {"exocomet", "planet"}


def test_simulate_plot_writes_a_png(tmp_path):
    png = tmp_path / "gallery.png"
    result = runner.invoke(app, ["simulate", "--n", "5", "--out", str(tmp_path / "s"),
                                 "--plot", str(png)])
    assert result.exit_code == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec, sec. 5.2)


def test_bad_arguments_give_the_error_code_and_usage_exit(tmp_path):
    result = runner.invoke(app, ["simulate", "--n", "3", "--classes", "nebula",
                                 "--out", str(tmp_path / "x")])
    assert result.exit_code == 2
    assert "unknown_class" in result.output
    result = runner.invoke(app, ["simulate", "--n", "3", "--format", "hdf5",
                                 "--out", str(tmp_path / "y")])
    assert result.exit_code == 2
    assert "unsupported_format" in result.output


def test_demo_scores_with_the_shipped_model_and_shows_the_caution(tmp_path):
    shipped = Path(__file__).resolve().parents[2] / "models"
    result = runner.invoke(app, ["demo", "--out", str(tmp_path), "--registry", str(shipped)])
    assert result.exit_code == 0, result.output
    assert "triage, not a discovery" in result.output
    assert "labels agree with the simulated truth" in result.output
    assert (tmp_path / "simulated_examples.png").is_file()
