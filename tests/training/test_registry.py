"""The model registry: round trips, integrity checks, trusted types and atomic activation.

References outside the project: the original scikit-learn estimator's own ``predict_proba``
(round trip), Python's ``hashlib.sha256`` (file hashes), ``skops.io.get_untrusted_types``
(what the trusted-type list must cover).
"""

from __future__ import annotations

import hashlib
import json
import os
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
import skops.io as sio
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import make_classification
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.frozen import FrozenEstimator
from threadpoolctl import ThreadpoolController, threadpool_info

from features.catalog import FEATURE_VERSION
from features.errors import ModelError, ParameterError
from training.classes import CLASSES
from training.registry import (
    ACTIVE_FILE,
    MODEL_FILE,
    TRUSTED_TYPES,
    LoadedModel,
    activate,
    active_version,
    list_models,
    load_model,
    read_card,
    save_model,
)

N_FEATURES = 8
FEATURES = tuple(f"feature_{i}" for i in range(N_FEATURES))
EXTRA_CLASSES = (*CLASSES, "stellar_flare", "blended_neighbour")
T0 = datetime(2026, 12, 2, 1, 30, tzinfo=UTC)


def _data(n_classes: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    X, y = make_classification(
        n_samples=450, n_features=N_FEATURES, n_informative=6, n_redundant=0,
        n_classes=n_classes, n_clusters_per_class=1, class_sep=2.0, random_state=seed,
    )
    return X, y


def _calibrated(X, labels, method: str) -> CalibratedClassifierCV:
    hgb = HistGradientBoostingClassifier(max_iter=5, max_leaf_nodes=7, random_state=0)
    hgb.fit(X[:300], labels[:300])
    return CalibratedClassifierCV(FrozenEstimator(hgb), method=method).fit(X[300:], labels[300:])


@pytest.fixture(scope="module")
def five():
    """A CalibratedClassifierCV(FrozenEstimator(HGB)) on the five built-in labels."""
    X, y = _data(len(CLASSES), seed=1)
    labels = np.array(CLASSES)[y]
    return _calibrated(X, labels, "sigmoid"), X


@pytest.fixture(scope="module")
def seven():
    """The same kind of model on seven labels, two of them beyond the built-in five."""
    X, y = _data(len(EXTRA_CLASSES), seed=2)
    labels = np.array(EXTRA_CLASSES)[y]
    return _calibrated(X, labels, "isotonic"), X


@pytest.fixture(scope="module")
def loaded_five(five, tmp_path_factory):
    """The five-class model saved and loaded back once."""
    root = tmp_path_factory.mktemp("registry")
    _save(root, five[0])
    return load_model(root, "v1", expected_feature_version=FEATURE_VERSION)


def _save(root: Path, model, *, version: str = "v1", classes=CLASSES, **overrides):
    kwargs = dict(
        name="default", version=version, classes=classes, feature_names=FEATURES,
        feature_version=FEATURE_VERSION, training={"n_train": 300, "seed": 0},
        metrics={"macro_f1": 0.9}, command=["dipshape", "train", "--seed", "0"],
    )
    kwargs.update(overrides)
    return save_model(root, model, **kwargs)


def _reordered(model, X, classes) -> np.ndarray:
    """The estimator's own probabilities with columns in ``classes`` order."""
    fitted = list(model.classes_)
    return model.predict_proba(X)[:, [fitted.index(c) for c in classes]]


def _rewrite_card(folder: Path, edit) -> None:
    card = json.loads((folder / "card.json").read_text())
    edit(card)
    (folder / "card.json").write_text(json.dumps(card))


# --- round trips -----------------------------------------------------------------------------


def test_round_trip_gives_the_original_predictions(tmp_path, five):
    model, X = five
    report = tmp_path / "out"
    (report / "figs").mkdir(parents=True)
    (report / "report.html").write_text("<html></html>")
    (report / "figs" / "cm.png").write_bytes(b"\x89PNG fake")
    card = _save(tmp_path / "reg", model, extra_files={
        "report": report, "metrics.json": b'{"macro_f1": 0.9}'})
    activate(tmp_path / "reg", "v1")

    listed = list_models(tmp_path / "reg")
    assert [c.version for c in listed] == ["v1"] and listed[0].active
    assert set(card.files) == {MODEL_FILE, "metrics.json", "report/report.html",
                               "report/figs/cm.png"}
    assert card.command == "dipshape train --seed 0"
    assert set(card.library_versions) == {"python", "numpy", "scipy", "sklearn", "skops",
                                          "astropy", "dipshape"}

    loaded = load_model(tmp_path / "reg", expected_feature_version=FEATURE_VERSION)
    # reference: hashlib over the bytes on disk
    on_disk = (tmp_path / "reg" / "v1" / MODEL_FILE).read_bytes()
    assert loaded.sha256 == hashlib.sha256(on_disk).hexdigest() == card.files[MODEL_FILE]
    assert loaded.card.classes == CLASSES and loaded.card.active
    # reference: the original scikit-learn estimator, columns put in CLASSES order
    np.testing.assert_allclose(loaded.predict_proba(X[:50]), _reordered(model, X[:50], CLASSES),
                               rtol=0, atol=1e-12)
    one_row = loaded.predict_proba(X[:1])
    assert one_row.shape == (1, len(CLASSES))


def test_classes_beyond_the_built_in_five_survive(tmp_path, seven):
    model, X = seven
    order = tuple(reversed(EXTRA_CLASSES))
    _save(tmp_path, model, classes=order)
    loaded = load_model(tmp_path, "v1", expected_feature_version=FEATURE_VERSION)
    assert loaded.card.classes == order
    assert read_card(tmp_path, "v1").classes == order
    np.testing.assert_allclose(loaded.predict_proba(X[:40]), _reordered(model, X[:40], order),
                               rtol=0, atol=1e-12)


def test_listing_is_by_creation_time_and_marks_the_active_one(tmp_path, five):
    model, _ = five
    _save(tmp_path, model, version="zeta", now=T0)
    _save(tmp_path, model, version="alpha", now=T0 + timedelta(hours=1))
    _save(tmp_path, model, version="mid", now=T0 + timedelta(minutes=5))
    (tmp_path / ".tmp-leftover").mkdir()
    activate(tmp_path, "mid")
    listed = list_models(tmp_path)
    assert [c.version for c in listed] == ["zeta", "mid", "alpha"]
    assert [c.active for c in listed] == [False, True, False]
    assert active_version(tmp_path) == "mid"
    assert list_models(tmp_path / "absent") == []


def test_default_version_is_name_and_utc_minute(tmp_path, five):
    model, _ = five
    card = _save(tmp_path, model, version=None, now=T0)
    assert card.version == "default-2026-12-02T0130Z"
    assert (tmp_path / card.version / "card.json").is_file()


def test_trusted_types_are_exactly_what_skops_flags_for_our_estimators():
    # reference: skops.io.get_untrusted_types on each calibration method the product may use
    X, y = _data(3, seed=3)
    flagged: set[str] = set()
    for method in ("sigmoid", "isotonic", "temperature"):
        flagged |= set(sio.get_untrusted_types(data=sio.dumps(_calibrated(X, y, method))))
    assert flagged == set(TRUSTED_TYPES)


# --- integrity -------------------------------------------------------------------------------


def _flip_model_byte(folder: Path) -> None:
    path = folder / MODEL_FILE
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))


def _edit_hash(folder: Path) -> None:
    _rewrite_card(folder, lambda c: c["files"].update({MODEL_FILE: "0" * 64}))


def _delete_report(folder: Path) -> None:
    (folder / "report" / "report.html").unlink()


def _add_unlisted(folder: Path) -> None:
    (folder / "notes.txt").write_text("added later")


def _drop_model_from_card(folder: Path) -> None:
    _rewrite_card(folder, lambda c: c["files"].pop(MODEL_FILE))


def _card_lies_about_classes(folder: Path) -> None:
    _rewrite_card(folder, lambda c: c.update(classes=[*c["classes"][:-1], "something_else"]))


def _break_card_json(folder: Path) -> None:
    (folder / "card.json").write_text("{not json")


def _symlink_out_of_the_folder(folder: Path) -> None:
    # same bytes, so the hash matches: only the location gives it away
    outside = folder.parent.parent / "elsewhere.html"
    outside.write_bytes((folder / "report" / "report.html").read_bytes())
    (folder / "report" / "report.html").unlink()
    (folder / "report" / "report.html").symlink_to(outside)


def _card_from_the_future(folder: Path) -> None:
    _rewrite_card(folder, lambda c: c.update(card_version="99"))


@pytest.mark.parametrize(
    ("damage", "code", "match"),
    [
        (_flip_model_byte, "model_integrity", r"sha256 of .*model\.skops .*altered"),
        (_edit_hash, "model_integrity", r"sha256 of .*model\.skops .*card says 0{64}"),
        (_delete_report, "model_integrity", r"report\.html is listed in the card but missing"),
        (_add_unlisted, "model_integrity", r"not listed in its card: \['notes\.txt'\]"),
        (_drop_model_from_card, "model_integrity", r"does not list model\.skops"),
        (_card_lies_about_classes, "model_integrity", r"its card says"),
        (_symlink_out_of_the_folder, "model_integrity", r"report\.html points outside"),
        (_break_card_json, "invalid_card", r"card\.json cannot be read"),
        (_card_from_the_future, "invalid_card", r"card_version '99'"),
    ],
)
def test_damaged_versions_are_refused(tmp_path, five, damage, code, match):
    model, _ = five
    root = tmp_path / "registry"
    _save(root, model, extra_files={"report/report.html": b"<html></html>"})
    damage(root / "v1")
    with pytest.raises(ModelError, match=match) as info:
        load_model(root, "v1", expected_feature_version=FEATURE_VERSION)
    assert info.value.code == code


def test_a_version_folder_linked_from_outside_the_root_is_refused(tmp_path, five):
    model, _ = five
    _save(tmp_path / "other", model)
    (tmp_path / "registry").mkdir()
    (tmp_path / "registry" / "v1").symlink_to(tmp_path / "other" / "v1")
    with pytest.raises(ModelError, match="points outside the registry"):
        load_model(tmp_path / "registry", "v1", expected_feature_version=FEATURE_VERSION)


class _Sneaky:
    """A class skops does not know: its presence in a model file must be refused."""

    def __init__(self) -> None:
        self.payload = "anything"


class _SneakyClassifier:
    """Looks like a fitted classifier but is an unknown type."""

    def __init__(self, classes, n_features) -> None:
        self.classes_ = np.array(classes)
        self.n_features_in_ = n_features

    def predict_proba(self, X):
        return np.full((len(X), len(self.classes_)), 1 / len(self.classes_))


def test_a_model_file_with_an_untrusted_type_is_refused(tmp_path, five):
    model, _ = five
    _save(tmp_path, model)
    folder = tmp_path / "v1"
    # A consistent but hostile version: the model file replaced and the card's hash updated.
    hostile = sio.dumps({"model": model, "extra": _Sneaky()})
    (folder / MODEL_FILE).write_bytes(hostile)
    _rewrite_card(folder, lambda c: c["files"].update(
        {MODEL_FILE: hashlib.sha256(hostile).hexdigest()}))
    with pytest.raises(ModelError, match=r"outside TRUSTED_TYPES: .*_Sneaky") as info:
        load_model(tmp_path, "v1", expected_feature_version=FEATURE_VERSION)
    assert info.value.code == "untrusted_model"


def test_saving_an_estimator_with_an_untrusted_type_is_refused(tmp_path):
    with pytest.raises(ModelError, match=r"load_model would refuse: .*_SneakyClassifier"):
        _save(tmp_path, _SneakyClassifier(CLASSES, N_FEATURES))
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(
    ("setup", "version", "expected", "code", "match"),
    [
        ("none", "v1", "0", "feature_version_mismatch",
         r"feature version '1'.* computes version '0'"),
        ("none", "v9", FEATURE_VERSION, "model_not_found", r"no model version 'v9'.*\['v1'\]"),
        ("none", None, FEATURE_VERSION, "no_active_model", r"no active model"),
        ("dangling", None, FEATURE_VERSION, "model_not_found",
         r"ACTIVE names version 'gone', but .*gone does not exist"),
        ("garbage", None, FEATURE_VERSION, "invalid_version", r"invalid version in .*ACTIVE"),
    ],
)
def test_load_failures(tmp_path, five, setup, version, expected, code, match):
    model, _ = five
    _save(tmp_path, model, feature_version="1")
    if setup == "dangling":
        (tmp_path / ACTIVE_FILE).write_text("gone\n")
    elif setup == "garbage":
        (tmp_path / ACTIVE_FILE).write_text("../etc\n")
    with pytest.raises(ModelError, match=match) as info:
        load_model(tmp_path, version, expected_feature_version=expected)
    assert info.value.code == code


# --- activation ------------------------------------------------------------------------------


def test_activation_switches_and_refuses_unknown_or_broken_versions(tmp_path, five):
    model, _ = five
    _save(tmp_path, model, version="v1")
    _save(tmp_path, model, version="v2")
    assert active_version(tmp_path) is None
    activate(tmp_path, "v1")
    activate(tmp_path, "v2")
    assert (tmp_path / ACTIVE_FILE).read_text() == "v2\n"
    with pytest.raises(ModelError, match=r"no model version 'v3'"):
        activate(tmp_path, "v3")
    _flip_model_byte(tmp_path / "v1")
    with pytest.raises(ModelError, match=r"sha256 of .*model\.skops"):
        activate(tmp_path, "v1")
    assert active_version(tmp_path) == "v2"
    assert sorted(p.name for p in tmp_path.iterdir()) == [ACTIVE_FILE, "v1", "v2"]


def test_activation_interrupted_before_the_rename_keeps_the_old_pointer(tmp_path, five,
                                                                         monkeypatch):
    model, _ = five
    _save(tmp_path, model, version="v1")
    _save(tmp_path, model, version="v2")
    activate(tmp_path, "v1")

    def crash(*args, **kwargs):
        raise OSError("simulated crash")

    monkeypatch.setattr(os, "replace", crash)
    with pytest.raises(OSError, match="simulated crash"):
        activate(tmp_path, "v2")
    monkeypatch.undo()
    assert active_version(tmp_path) == "v1"
    assert sorted(p.name for p in tmp_path.iterdir()) == [ACTIVE_FILE, "v1", "v2"]


def test_save_interrupted_before_the_rename_leaves_no_version(tmp_path, five, monkeypatch):
    model, _ = five

    def crash(*args, **kwargs):
        raise OSError("simulated crash")

    monkeypatch.setattr(os, "rename", crash)
    with pytest.raises(ModelError, match="simulated crash"):
        _save(tmp_path, model)
    monkeypatch.undo()
    assert list(tmp_path.iterdir()) == []
    assert list_models(tmp_path) == []


# --- argument validation ---------------------------------------------------------------------


@pytest.mark.parametrize(
    "bad", ["", ".", "..", "../escape", "a/b", "a\\b", ".hidden", "x..y", "ACTIVE", "active",
            "with space", "ünïcode", "x" * 129],
)
def test_invalid_version_names_are_refused_everywhere(tmp_path, five, bad):
    model, _ = five
    for call in (
        lambda: _save(tmp_path, model, version=bad),
        lambda: load_model(tmp_path, bad, expected_feature_version=FEATURE_VERSION),
        lambda: activate(tmp_path, bad),
        lambda: read_card(tmp_path, bad),
    ):
        with pytest.raises(ModelError, match="invalid version") as info:
            call()
        assert info.value.code == "invalid_version"
    assert not any(tmp_path.iterdir())


def test_saving_over_an_existing_version_is_refused(tmp_path, five):
    model, _ = five
    _save(tmp_path, model)
    with pytest.raises(ModelError, match="already exists") as info:
        _save(tmp_path, model)
    assert info.value.code == "version_exists"


@pytest.mark.parametrize(
    ("overrides", "code", "match"),
    [
        ({"classes": CLASSES[:4]}, "class_mismatch", "differ from the estimator's classes"),
        ({"classes": (*CLASSES[:4], "planet")}, "invalid_parameter", "duplicates"),
        ({"feature_names": FEATURES[:3]}, "feature_mismatch", "fitted on 8 features"),
        ({"metrics": {"ece": float("nan")}}, "invalid_parameter", "not strict JSON"),
        ({"training": {"when": datetime(2026, 1, 1)}}, "invalid_parameter", "not strict JSON"),
        ({"extra_files": {"../x": b""}}, "invalid_parameter", "relative POSIX path"),
        ({"extra_files": {"/abs": b""}}, "invalid_parameter", "relative POSIX path"),
        ({"extra_files": {MODEL_FILE: b""}}, "invalid_parameter", "may not contain"),
        ({"extra_files": {"r.txt": Path("no/such/file")}}, "invalid_parameter", "existing Path"),
        ({"feature_version": ""}, "invalid_parameter", "feature_version"),
        ({"now": datetime(2026, 1, 1)}, "invalid_parameter", "timezone-aware"),
    ],
)
def test_bad_save_arguments(tmp_path, five, overrides, code, match):
    model, _ = five
    with pytest.raises(ParameterError, match=match) as info:
        _save(tmp_path, model, **overrides)
    assert info.value.code == code


@pytest.mark.parametrize(
    ("X", "code", "match"),
    [
        (np.zeros((2, N_FEATURES + 1)), "feature_mismatch", "has 9 columns.*expects 8"),
        (np.zeros((2, N_FEATURES - 1)), "feature_mismatch", "has 7 columns"),
        (np.zeros(N_FEATURES), "invalid_parameter", "must be 2-D"),
        ([["a"] * N_FEATURES], "invalid_parameter", "not numeric"),
    ],
)
def test_prediction_refuses_the_wrong_shape(loaded_five, X, code, match):
    with pytest.raises(ParameterError, match=match) as info:
        loaded_five.predict_proba(X)
    assert info.value.code == code


class _ThreadSpy:
    """Records the native thread-pool sizes seen while predicting."""

    classes_ = np.array(["a", "b"])

    def __init__(self) -> None:
        self.seen: list[list[int]] = []

    def predict_proba(self, X):
        self.seen.append([pool["num_threads"] for pool in threadpool_info()])
        return np.tile([0.25, 0.75], (len(X), 1))


def test_prediction_runs_single_threaded_and_restores_the_pools(loaded_five):
    # reference: threadpoolctl.threadpool_info, read inside and after the call
    spy = _ThreadSpy()
    model = LoadedModel(card=loaded_five.card, estimator=spy, sha256="0" * 64,
                        column_order=(1, 0), thread_control=ThreadpoolController())
    with ThreadpoolController().limit(limits=2):  # so that 1 inside is a change
        before = [pool["num_threads"] for pool in threadpool_info()]
        proba = model.predict_proba(np.zeros((3, N_FEATURES)))
        after = [pool["num_threads"] for pool in threadpool_info()]
    assert before and all(n == 2 for n in before)
    assert spy.seen and all(n == 1 for n in spy.seen[0])
    assert after == before
    np.testing.assert_array_equal(proba, np.tile([0.75, 0.25], (3, 1)))  # columns reordered
