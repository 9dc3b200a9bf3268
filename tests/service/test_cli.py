"""The `dipshape` command line: simulate, demo, keys (score has its own test module)."""

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


def test_demo_scores_the_demo_data_through_the_rest_service(tmp_path):
    repo = Path(__file__).resolve().parents[2]
    result = runner.invoke(app, ["demo", "--data", str(repo / "demo_data"), "--out",
                                 str(tmp_path), "--registry", str(repo / "models")])
    assert result.exit_code == 0, result.output
    assert "triage, not a discovery" in result.output
    assert "scored through the REST service" in result.output
    ids = sorted(p.stem for p in (repo / "demo_data").iterdir()
                 if p.suffix in (".csv", ".fits") and p.name != "labels.csv")
    # one diagnostic PNG per segment (PNG signature: ISO/IEC 15948 §5.2)
    assert sorted(p.stem for p in tmp_path.glob("*.png")) == ids
    assert all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in tmp_path.glob("*.png"))
    assert f"{len(ids)} of {len(ids)} segments get the class a vetter should see" in \
        result.output


def test_demo_fails_cleanly_without_a_model(tmp_path):
    repo = Path(__file__).resolve().parents[2]
    result = runner.invoke(app, ["demo", "--data", str(repo / "demo_data"), "--out",
                                 str(tmp_path / "o"), "--registry", str(tmp_path / "none")])
    assert result.exit_code != 0
    assert "model_not_ready" in result.output
