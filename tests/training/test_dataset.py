"""Feature tables: determinism, cache, refused segments, labelled folders.

References outside this module: the table must equal, row by row, what the simulator
(training.simulate.simulate_dataset) and the feature extractor (features.extract, after
features.segment.make_segment or features.io.read_segment) give when called directly; pandas'
own assert_frame_equal compares frames.
"""

from __future__ import annotations

import dataclasses
import logging

import numpy as np
import pandas as pd
import pytest

from features.catalog import FEATURE_NAMES, FEATURE_VERSION
from features.errors import FileFormatError, ParameterError
from features.io import read_segment
from features.pipeline import extract
from features.segment import make_segment
from training import dataset
from training.dataset import (
    TABLE_COLUMNS,
    cache_key,
    class_order,
    feature_matrix,
    labelled_table,
    simulated_table,
)
from training.priors import PRIORS, Prior
from training.simulate import simulate_dataset, write_dataset


@pytest.fixture(scope="module")
def small():
    """Ten simulated segments, two per class, measured in one process."""
    return simulated_table(10, seed=5, n_jobs=1)


def test_table_columns_and_rows_are_those_of_the_simulator_and_extractor(small):
    assert tuple(small.columns) == TABLE_COLUMNS
    segments = simulate_dataset(10, seed=5)
    assert small["id"].tolist() == [s.id for s in segments]
    assert small["label"].tolist() == [s.label for s in segments]
    assert small["subtype"].tolist() == [s.subtype for s in segments]
    np.testing.assert_array_equal(small["true_snr"], [s.snr for s in segments])
    for row, sim in zip(small.itertuples(index=False), segments, strict=True):
        feats = extract(make_segment(sim.time, sim.flux, sim.flux_err, id=sim.id))
        np.testing.assert_array_equal(np.array([getattr(row, n) for n in FEATURE_NAMES]),
                                      feats.values)
        assert row.best_family == ("" if feats.fits is None else feats.fits.best_family)
        assert row.flags == ";".join(feats.flags)
    assert feature_matrix(small).shape == (10, len(FEATURE_NAMES))


def test_same_table_whatever_n_jobs(small):
    pd.testing.assert_frame_equal(simulated_table(10, seed=5, n_jobs=2), small)


def test_cache_round_trip_is_a_hit_with_the_same_frame(tmp_path, small, monkeypatch, caplog):
    first = simulated_table(10, seed=5, cache_dir=tmp_path)
    pd.testing.assert_frame_equal(first, small)
    key = cache_key(10, seed=5, classes=dataset.CLASSES)
    assert [p.name for p in tmp_path.iterdir()] == [f"{key}.parquet"]  # no temporary left

    def no_work(*args, **kwargs):
        raise AssertionError("a cache hit must not simulate or measure anything")

    monkeypatch.setattr(dataset, "_measure_all", no_work)
    with caplog.at_level(logging.INFO, logger="training.dataset"):
        second = simulated_table(10, seed=5, cache_dir=tmp_path)
    assert "cache hit" in caplog.text
    pd.testing.assert_frame_equal(second, first)
    assert second.attrs["source"] == first.attrs["source"]


def test_cache_key_holds_every_input():
    base = cache_key(10, seed=5, classes=["planet", "exocomet"])
    assert base.startswith(f"features-v{FEATURE_VERSION}-n10-seed5-planet+exocomet-priors")
    looser = PRIORS.replace(planet__k=Prior("planet.k", "loguniform", 0.02, 0.25))
    others = [
        cache_key(11, seed=5, classes=["planet", "exocomet"]),
        cache_key(10, seed=6, classes=["planet", "exocomet"]),
        cache_key(10, seed=5, classes=["exocomet", "planet"]),
        cache_key(10, seed=5, classes=["planet", "exocomet"], priors=looser),
    ]
    assert len({base, *others}) == 5


def test_cache_key_follows_the_feature_version(monkeypatch):
    before = cache_key(10, seed=5, classes=["planet"])
    monkeypatch.setattr(dataset, "FEATURE_VERSION", "next")
    after = cache_key(10, seed=5, classes=["planet"])
    assert after.startswith("features-vnext-") and after != before


def test_refused_segments_are_dropped_and_counted(monkeypatch, caplog):
    real = dataset.simulate_segment

    def flat_every_third(label, rng, *, id, priors, min_dip_snr=0.0):
        sim = real(label, rng, id=id, priors=priors, min_dip_snr=min_dip_snr)
        if int(id.rsplit("-", 1)[1]) % 3 == 0:  # 0, 3, 6, 9: constant flux
            return dataclasses.replace(sim, flux=np.full_like(sim.flux, 7.0))
        return sim

    monkeypatch.setattr(dataset, "simulate_segment", flat_every_third)
    with caplog.at_level(logging.WARNING, logger="training.dataset"):
        table = simulated_table(10, seed=5)
    assert len(table) == 6
    assert not table["id"].str.endswith(("0", "3", "6", "9")).any()
    assert "dropped 4 of 10 simulated segments" in caplog.text
    assert "constant_flux: 4" in caplog.text
    assert table.attrs["source"]["n_refused"] == 4


def test_progress_bar_goes_to_stderr(capsys):
    simulated_table(3, seed=1, progress=True)
    captured = capsys.readouterr()
    assert "simulating and measuring" in captured.err and captured.out == ""


@pytest.mark.parametrize(("kwargs", "code"), [
    ({"n": 0, "seed": 1}, "invalid_parameter"),
    ({"n": 5, "seed": -1}, "invalid_parameter"),
    ({"n": 5, "seed": 1.5}, "invalid_parameter"),
    ({"n": 5, "seed": 1, "n_jobs": 0}, "invalid_parameter"),
    ({"n": 5, "seed": 1, "classes": ("planet", "comet")}, "unknown_class"),
    ({"n": 5, "seed": 1, "classes": ()}, "unknown_class"),
])
def test_bad_arguments_raise_specific_codes(kwargs, code):
    with pytest.raises(ParameterError) as info:
        simulated_table(**kwargs)
    assert info.value.code == code


def test_class_order_puts_built_in_classes_first():
    assert class_order(["zeta", "systematic", "alpha", "planet", "planet"]) == [
        "planet", "systematic", "alpha", "zeta"]


# --- labelled folders ------------------------------------------------------------------------


@pytest.fixture()
def labelled(tmp_path):
    """Five simulated CSV segments, a constant-flux file, a text file and a labels file.

    Labels: the five segments (one of them relabelled as a class beyond the five), the two bad
    files, and an id with no file.
    """
    folder = tmp_path / "segments"
    segments = simulate_dataset(5, seed=3)
    write_dataset(segments, folder, fmt="csv")
    (folder / "labels.csv").unlink()  # the simulator's truth table is not ours here
    t = np.arange(100) * 0.02
    pd.DataFrame({"time": t, "flux": np.full(t.size, 3.0)}).to_csv(folder / "flat.csv",
                                                                   index=False)
    (folder / "notes.csv").write_text("this is not a light curve\n")
    rows = [(s.id, s.label) for s in segments]
    rows[4] = (segments[4].id, "stellar_flare")
    rows += [("flat", "systematic"), ("notes", "planet"), ("ghost", "planet")]
    labels = tmp_path / "labels.csv"
    pd.DataFrame(rows, columns=["id", "label"]).to_csv(labels, index=False)
    return labels, folder, segments


def test_labelled_table_counts_new_classes_missing_and_unreadable(labelled, caplog):
    labels, folder, segments = labelled
    with caplog.at_level(logging.WARNING, logger="training.dataset"):
        table, summary = labelled_table(labels, folder)
    assert tuple(table.columns) == TABLE_COLUMNS
    assert table["id"].tolist() == [s.id for s in segments]
    assert table["label"].tolist() == [*(s.label for s in segments[:4]), "stellar_flare"]
    assert summary["n_labels"] == 8 and summary["n_rows"] == 5
    assert summary["counts"] == {"planet": 1, "eclipsing_binary": 1, "exocomet": 1,
                                 "variability": 1, "stellar_flare": 1}
    assert summary["missing"] == ["ghost"]
    assert set(summary["unreadable"]) == {"flat", "notes"}
    assert summary["unreadable"]["flat"].startswith("constant_flux")
    assert summary["rare_classes"] == summary["counts"]  # every class has < 20 examples
    assert "1 of 8 labelled segments have no file" in caplog.text and "ghost" in caplog.text
    assert "2 of 7 labelled files could not be read" in caplog.text
    assert "fewer than 20 examples" in caplog.text and "stellar_flare (1)" in caplog.text
    # the features are those of the file read directly
    feats = extract(read_segment(folder / f"{segments[0].id}.csv"))
    np.testing.assert_array_equal(feature_matrix(table)[0], feats.values)
    assert np.isnan(table["true_snr"]).all() and (table["subtype"] == "").all()


def test_labelled_table_same_whatever_n_jobs(labelled):
    labels, folder, _ = labelled
    one, summary_one = labelled_table(labels, folder, n_jobs=1)
    two, summary_two = labelled_table(labels, folder, n_jobs=2)
    pd.testing.assert_frame_equal(one, two)
    assert summary_one == summary_two


def test_labelled_table_carries_subtype_and_snr_of_a_simulation(tmp_path):
    segments = simulate_dataset(5, seed=4)
    labels = write_dataset(segments, tmp_path, fmt="csv")  # labels.csv beside the segments
    table, summary = labelled_table(labels, tmp_path)
    assert summary["missing"] == [] and summary["unreadable"] == {}
    assert table["subtype"].tolist() == [s.subtype for s in segments]
    np.testing.assert_allclose(table["true_snr"], [s.snr for s in segments], rtol=1e-12)


def test_duplicated_ids_keep_the_first_label(labelled, caplog):
    labels, folder, segments = labelled
    frame = pd.read_csv(labels)
    frame = pd.concat([frame, pd.DataFrame({"id": [segments[0].id], "label": ["exocomet"]})])
    frame.to_csv(labels, index=False)
    with caplog.at_level(logging.WARNING, logger="training.dataset"):
        table, summary = labelled_table(labels, folder)
    assert summary["duplicates"] == [segments[0].id]
    assert table["label"].iloc[0] == segments[0].label
    assert "listed more than once" in caplog.text


@pytest.mark.parametrize(("content", "error", "code"), [
    ("name,label\na,planet\n", FileFormatError, "missing_columns"),
    ("id,label\na,\n", ParameterError, "invalid_parameter"),
])
def test_bad_labels_files_raise(tmp_path, content, error, code):
    labels = tmp_path / "labels.csv"
    labels.write_text(content)
    with pytest.raises(error) as info:
        labelled_table(labels, tmp_path)
    assert info.value.code == code


def test_missing_labels_file_and_folder_raise(tmp_path):
    with pytest.raises(FileFormatError) as info:
        labelled_table(tmp_path / "absent.csv", tmp_path)
    assert info.value.code == "file_not_found"
    labels = tmp_path / "labels.csv"
    labels.write_text("id,label\na,planet\n")
    with pytest.raises(ParameterError, match="not a folder"):
        labelled_table(labels, tmp_path / "nowhere")
