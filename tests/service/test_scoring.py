"""The scoring pipeline: results, the result schema, out-of-distribution flag, refused models.

References outside the project: the JSON Schema draft 2020-12 meta-schema and validator of the
``jsonschema`` package (the result contract), scikit-learn's own ``predict_proba`` on the
in-memory estimator (probabilities), Python's strict ``json`` parser (RFC 8259 has no NaN),
``numpy.nanquantile`` (training ranges) and ``hashlib.sha256`` (file integrity).
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
from dataclasses import replace
from pathlib import Path

import jsonschema
import numpy as np
import pytest
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import make_blobs
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.frozen import FrozenEstimator
from threadpoolctl import threadpool_limits

import service
from features.catalog import FEATURE_NAMES, FEATURE_VERSION
from features.errors import FileFormatError, ModelError, ParameterError
from features.events import Ephemeris
from features.pipeline import extract
from features.segment import make_segment
from service.scoring import (
    OOD_FILE,
    OOD_MAX_OUTSIDE,
    SCHEMA_VERSION,
    default_registry_root,
    file_stem,
    find_inputs,
    load_ood,
    ood_outside,
    parse_ephemeris,
    result_schema,
    score_error,
    score_segment,
)
from training.classes import CLASSES
from training.registry import load_model, save_model
from training.simulate import simulate_segment

EXTRA_CLASSES = (*CLASSES, "stellar_flare", "blended_neighbour")


def _estimator(classes: tuple[str, ...], *, seed: int) -> CalibratedClassifierCV:
    """A tiny calibrated HGB on blob features, one column per catalogue feature.

    Fitted with one OpenMP thread: on a shared two-core machine, OpenMP threads that wait for
    a busy core make a fit of milliseconds take seconds.
    """
    X, y = make_blobs(n_samples=60 * len(classes), n_features=len(FEATURE_NAMES),
                      centers=len(classes), random_state=seed)
    labels = np.array(classes)[y]
    half = X.shape[0] // 2
    with threadpool_limits(limits=1):
        hgb = HistGradientBoostingClassifier(max_iter=20, random_state=seed).fit(
            X[:half], labels[:half])
        return CalibratedClassifierCV(FrozenEstimator(hgb)).fit(X[half:], labels[half:])


def _save(root: Path, estimator, *, version: str, classes, feature_names=FEATURE_NAMES,
          extra_files=None) -> None:
    save_model(root, estimator, name="tiny", version=version, classes=classes,
               feature_names=feature_names, feature_version=FEATURE_VERSION,
               training={"n": 1}, metrics={}, command="pytest", extra_files=extra_files)


def _segment(label: str, seed: int, *, cadence_min: float = 30.0, window_days: float = 4.0,
             id: str | None = None):
    sim = simulate_segment(label, np.random.default_rng(seed), id=id or f"LS-{seed:04d}",
                           cadence_min=cadence_min, window_days=window_days)
    return make_segment(sim.time, sim.flux, sim.flux_err, id=sim.id)


@pytest.fixture(scope="module")
def registry(tmp_path_factory):
    """A registry with a five-class and a seven-class model; the in-memory estimators too."""
    root = tmp_path_factory.mktemp("registry")
    five = _estimator(CLASSES, seed=1)
    seven = _estimator(EXTRA_CLASSES, seed=2)
    _save(root, five, version="tiny-5", classes=CLASSES)
    _save(root, seven, version="tiny-7", classes=EXTRA_CLASSES)
    return root, {"tiny-5": five, "tiny-7": seven}


@pytest.fixture(scope="module")
def model5(registry):
    return load_model(registry[0], "tiny-5", expected_feature_version=FEATURE_VERSION)


@pytest.fixture(scope="module")
def segments():
    """One short simulated segment of each class (30-min cadence, 4 days)."""
    return [_segment(label, seed) for seed, label in enumerate(CLASSES)]


@pytest.fixture(scope="module")
def schema():
    doc = result_schema()
    # jsonschema: the schema itself is valid draft 2020-12
    jsonschema.Draft202012Validator.check_schema(doc)
    return doc


def _validator(schema, part: str | None = None) -> jsonschema.Draft202012Validator:
    target = schema if part is None else {"$ref": f"#/$defs/{part}", "$defs": schema["$defs"]}
    return jsonschema.Draft202012Validator(target)


# --- results ---------------------------------------------------------------------------------


@pytest.mark.parametrize("version", ["tiny-5", "tiny-7"])
def test_result_validates_and_matches_scikit_learn(registry, segments, schema, version):
    root, estimators = registry
    model = load_model(root, version, expected_feature_version=FEATURE_VERSION)
    validator = _validator(schema)
    for seg in segments:
        result = score_segment(seg, model)
        as_json = json.loads(result.to_json())
        # jsonschema draft 2020-12: the real output satisfies the contract
        validator.validate(as_json)
        assert as_json == result.to_dict()
        # every class of the model, in the card's order
        assert list(as_json["probabilities"]) == list(model.card.classes)
        # scikit-learn: the same estimator, never saved, gives the same probabilities
        est = estimators[version]
        ref = est.predict_proba(extract(seg).values[np.newaxis, :])[0]
        ref_by_class = dict(zip((str(c) for c in est.classes_), ref, strict=True))
        for cls, p in as_json["probabilities"].items():
            assert p == pytest.approx(ref_by_class[cls], abs=1e-12)
        assert as_json["label"] == str(est.classes_[int(np.argmax(ref))])
        assert math.fsum(as_json["probabilities"].values()) == pytest.approx(1.0, abs=1e-9)
        assert as_json["id"] == seg.id
        assert as_json["schema_version"] == SCHEMA_VERSION
        assert as_json["model"] == {"name": "tiny", "version": version, "sha256": model.sha256}


def test_features_events_and_flags_follow_the_extractor(model5, segments):
    for seg in segments:
        feats = extract(seg)
        out = score_segment(seg, model5).to_dict()
        assert list(out["features"]) == list(FEATURE_NAMES)
        for name, value in zip(FEATURE_NAMES, feats.values, strict=True):
            if np.isnan(value):
                assert out["features"][name] is None
            else:
                assert out["features"][name] == float(value)
        assert out["flags"] == list(feats.flags)
        assert out["events"] == [{"t_mid": e.t_mid, "depth": e.depth,
                                  "duration_days": e.duration_days, "snr": e.snr}
                                 for e in feats.events]
    flagged = {f for seg in segments for f in score_segment(seg, model5).flags}
    # the simulated set holds a segment without a significant dip: the flag is passed through
    assert "no_significant_dip" in flagged


def test_to_json_is_strict_json_without_nan(model5, segments):
    def refuse(token: str):
        raise ValueError(f"non-standard JSON constant {token}")

    for seg in segments:
        text = score_segment(seg, model5).to_json()
        # Python's json with parse_constant refusing NaN/Infinity: strict RFC 8259 JSON
        parsed = json.loads(text, parse_constant=refuse)
        assert "\n" not in text
        assert any(v is None for v in parsed["features"].values())


def test_supplied_ephemeris_is_reported(model5):
    seg = _segment("planet", 11)
    eph = Ephemeris(period_days=1.7, epoch=float(seg.time[0]) + 0.4, duration_days=0.1)
    out = score_segment(seg, model5, ephemeris=eph).to_dict()
    assert out["ephemeris"] == {"period_days": 1.7, "epoch": eph.epoch, "duration_days": 0.1}
    assert "ephemeris_supplied" in out["flags"]


def test_error_object(schema):
    err = FileFormatError("empty_file", "'LS-0042.csv' is empty (0 bytes)")
    line = score_error("LS-0042", err)
    assert line == {"schema_version": "1", "id": "LS-0042", "error": "empty_file",
                    "detail": "'LS-0042.csv' is empty (0 bytes)"}
    _validator(schema).validate(line)  # jsonschema: an error line is a valid line too


# --- the schema refuses what breaks the contract --------------------------------------------


def _drop_class(d):
    del d["probabilities"]["systematic"]


def _nan_feature(d):
    d["features"]["skewness"] = float("nan")


def _inf_feature(d):
    d["features"]["skewness"] = float("inf")


def _nan_probability(d):
    d["probabilities"]["planet"] = float("nan")


def _label_not_string(d):
    d["label"] = 3


def _feature_is_text(d):
    d["features"]["snr"] = "12.5"


def _events_not_list(d):
    d["events"] = {"t_mid": 1.0}


def _probability_above_one(d):
    d["probabilities"]["planet"] = 1.5


def _missing_elapsed(d):
    del d["elapsed_ms"]


def _extra_field(d):
    d["score"] = 1.0


def _bad_sha(d):
    d["model"]["sha256"] = "abc"


def _wrong_version(d):
    d["schema_version"] = 1


@pytest.mark.parametrize(("mutate", "match"), [
    (_drop_class, "'systematic' is a required property"),
    (_nan_feature, "nan"),
    (_inf_feature, "inf"),
    (_nan_probability, "nan"),
    (_label_not_string, "3 is not of type 'string'"),
    (_feature_is_text, "'12.5'"),
    (_events_not_list, "is not of type 'array'"),
    (_probability_above_one, "1.5 is greater than the maximum of 1"),
    (_missing_elapsed, "'elapsed_ms' is a required property"),
    (_extra_field, "Additional properties are not allowed"),
    (_bad_sha, "'abc' does not match"),
    (_wrong_version, "'1' was expected"),
])
def test_schema_rejects_broken_results(model5, segments, schema, mutate, match):
    good = score_segment(segments[0], model5).to_dict()
    bad = copy.deepcopy(good)
    mutate(bad)
    # jsonschema draft 2020-12, against the result definition and the whole line schema
    with pytest.raises(jsonschema.ValidationError, match=match):
        jsonschema.validate(bad, {"$ref": "#/$defs/result", "$defs": schema["$defs"]},
                            cls=jsonschema.Draft202012Validator)
    assert not _validator(schema).is_valid(bad)
    assert _validator(schema).is_valid(good)


@pytest.mark.parametrize(("line", "match"), [
    ({"schema_version": "1", "id": "LS-0042", "error": "empty_file"},
     "'detail' is a required property"),
    ({"schema_version": "1", "id": "LS-0042", "error": "Empty File", "detail": ""},
     "does not match"),
    ({"schema_version": "1", "id": "", "error": "empty_file", "detail": ""}, "should be non-empty"),
])
def test_schema_rejects_broken_error_lines(schema, line, match):
    with pytest.raises(jsonschema.ValidationError, match=match):
        jsonschema.validate(line, {"$ref": "#/$defs/error", "$defs": schema["$defs"]},
                            cls=jsonschema.Draft202012Validator)
    assert not _validator(schema).is_valid(line)


# --- out of distribution ---------------------------------------------------------------------


def _ood_table(rows: np.ndarray) -> dict[str, dict[str, float | None]]:
    """Training ranges as numpy computes them: min/max quantiles and the NaN fraction."""
    table = {}
    for j, name in enumerate(FEATURE_NAMES):
        col = rows[:, j]
        finite = col[np.isfinite(col)]
        table[name] = {
            "q_lo": float(np.nanquantile(col, 0.0)) if finite.size else None,
            "q_hi": float(np.nanquantile(col, 1.0)) if finite.size else None,
            "nan_fraction": float(np.mean(np.isnan(col))),
        }
    return table


@pytest.fixture(scope="module")
def training_like():
    """Features of a few 30-min, 4-day segments and the ood table made from them."""
    segs = [_segment(label, 100 + i) for i, label in enumerate(CLASSES * 2)]
    rows = np.vstack([extract(s).values for s in segs])
    return segs, _ood_table(rows)


def test_ood_flag_inside_and_far_outside(model5, training_like):
    segs, table = training_like
    inside = score_segment(segs[0], model5, ood=table)
    assert "out_of_distribution" not in inside.flags
    assert ood_outside(inside.features, table) == ()
    # 2-min cadence over 12 days: point count, cadence and span lie far beyond the table
    far = score_segment(_segment("planet", 7, cadence_min=2.0, window_days=12.0), model5,
                        ood=table)
    outside = ood_outside(far.features, table)
    assert {"n_points", "cadence_min", "span_days"} <= set(outside)
    assert len(outside) > OOD_MAX_OUTSIDE
    assert far.flags[-1] == "out_of_distribution"
    assert "out_of_distribution" not in score_segment(segs[0], model5).flags  # no table


@pytest.mark.parametrize("n_out", [OOD_MAX_OUTSIDE, OOD_MAX_OUTSIDE + 1])
def test_ood_threshold_is_more_than_the_documented_number(model5, segments, n_out):
    seg = segments[0]
    values = extract(seg).values
    finite = [n for n, v in zip(FEATURE_NAMES, values, strict=True) if np.isfinite(v)]
    table = {n: {"q_lo": v - 1.0, "q_hi": v + 1.0, "nan_fraction": 0.0} if np.isfinite(v)
             else {"q_lo": 0.0, "q_hi": 1.0, "nan_fraction": 0.5}
             for n, v in zip(FEATURE_NAMES, values, strict=True)}
    for name in finite[:n_out]:
        v = values[FEATURE_NAMES.index(name)]
        table[name] = {"q_lo": v + 10.0, "q_hi": v + 20.0, "nan_fraction": 0.0}
    flags = score_segment(seg, model5, ood=table).flags
    assert ("out_of_distribution" in flags) == (n_out > OOD_MAX_OUTSIDE)


def test_nan_counts_as_outside_only_when_training_never_missed_it():
    table = {"skewness": {"q_lo": -1.0, "q_hi": 1.0, "nan_fraction": 0.0},
             "snr": {"q_lo": 7.0, "q_hi": 50.0, "nan_fraction": 0.2}}
    assert ood_outside({"skewness": None, "snr": float("nan")}, table) == ("skewness",)


def test_load_ood_reads_the_model_folder(tmp_path, segments):
    table = {n: {"q_lo": -1.0, "q_hi": 1.0, "nan_fraction": 0.1} for n in FEATURE_NAMES}
    est = _estimator(CLASSES, seed=3)
    _save(tmp_path, est, version="with-ood", classes=CLASSES,
          extra_files={OOD_FILE: json.dumps(table).encode()})
    _save(tmp_path, est, version="without-ood", classes=CLASSES)
    assert load_ood(tmp_path, "without-ood") is None
    loaded = load_ood(tmp_path, "with-ood")
    assert {k: dict(v) for k, v in loaded.items()} == table
    model = load_model(tmp_path, "with-ood", expected_feature_version=FEATURE_VERSION)
    assert "out_of_distribution" in score_segment(segments[0], model, ood=loaded).flags


def test_load_ood_refuses_a_changed_file(tmp_path):
    table = {"snr": {"q_lo": 7.0, "q_hi": 50.0, "nan_fraction": 0.0}}
    data = json.dumps(table).encode()
    _save(tmp_path, _estimator(CLASSES, seed=3), version="v1", classes=CLASSES,
          extra_files={OOD_FILE: data})
    path = tmp_path / "v1" / OOD_FILE
    path.write_bytes(data.replace(b"50.0", b"99.0"))
    assert hashlib.sha256(path.read_bytes()).hexdigest() != hashlib.sha256(data).hexdigest()
    with pytest.raises(ModelError, match="model_integrity"):
        load_ood(tmp_path, "v1")


@pytest.mark.parametrize(("ood", "match"), [
    ([1, 2], "must map feature names"),
    ({"snr": {"q_lo": 1.0, "q_hi": 2.0}}, "must hold q_lo, q_hi, nan_fraction"),
    ({"snr": {"q_lo": 3.0, "q_hi": 2.0, "nan_fraction": 0.0}}, "q_lo <= q_hi"),
    ({"snr": {"q_lo": 1.0, "q_hi": 2.0, "nan_fraction": 1.5}}, "0 <= nan_fraction <= 1"),
    ({"snr": {"q_lo": "low", "q_hi": 2.0, "nan_fraction": 0.0}}, "snr.q_lo must be a finite"),
    ({"snr": {"q_lo": 1.0, "q_hi": 2.0, "nan_fraction": None}}, "snr.nan_fraction must be"),
])
def test_malformed_ood_is_refused(model5, segments, ood, match):
    with pytest.raises(ModelError, match=match) as info:
        score_segment(segments[0], model5, ood=ood)
    assert info.value.code == "invalid_ood"


# --- refused models --------------------------------------------------------------------------


@pytest.fixture(scope="module")
def other_models(tmp_path_factory):
    root = tmp_path_factory.mktemp("others")
    renamed = tuple(f"column_{i:02d}" for i in range(len(FEATURE_NAMES)))
    _save(root, _estimator(CLASSES, seed=4), version="renamed", classes=CLASSES,
          feature_names=renamed)
    _save(root, _estimator(CLASSES, seed=4), version="reordered", classes=CLASSES,
          feature_names=FEATURE_NAMES[::-1])
    four = CLASSES[:4]
    _save(root, _estimator(four, seed=5), version="four", classes=four)
    return root


@pytest.mark.parametrize(("version", "match"), [
    ("renamed", r"feature_names_mismatch.*position 0"),
    ("reordered", r"feature_names_mismatch"),
    ("four", r"missing_classes.*'systematic'"),
])
def test_incompatible_models_are_refused(other_models, segments, version, match):
    model = load_model(other_models, version, expected_feature_version=FEATURE_VERSION)
    with pytest.raises(ModelError, match=match):
        score_segment(segments[0], model)


def test_feature_version_mismatch_is_refused(registry, model5, segments):
    with pytest.raises(ModelError, match="feature_version_mismatch"):
        load_model(registry[0], "tiny-5", expected_feature_version=FEATURE_VERSION + ".x")
    stale = replace(model5, card=replace(model5.card, feature_version=FEATURE_VERSION + ".x"))
    with pytest.raises(ModelError, match="feature_version_mismatch"):
        score_segment(segments[0], stale)


# --- arguments, files and folders ------------------------------------------------------------


@pytest.mark.parametrize(("text", "match"), [
    ("3.5,1412.3", r"PERIOD,EPOCH,DURATION.*2 value"),
    ("3.5,1412.3,0.1,7", r"4 value"),
    ("", r"1 value"),
    ("three,1412.3,0.1", r"PERIOD 'three' is not a number"),
    ("3.5,,0.1", r"EPOCH '' is not a number"),
    ("-3.5,1412.3,0.1", r"period_days"),
    ("3.5,1412.3,0", r"duration_days"),
    ("3.5,1412.3,4.0", r"shorter than period_days"),
    ("nan,1412.3,0.1", r"period_days"),
    ("3.5,inf,0.1", r"epoch must be finite"),
])
def test_parse_ephemeris_refuses(text, match):
    with pytest.raises(ParameterError, match=match) as info:
        parse_ephemeris(text)
    assert info.value.code == "invalid_ephemeris"


def test_parse_ephemeris_reads_three_numbers():
    assert parse_ephemeris(" 3.52, 1412.37 ,0.12") == Ephemeris(
        period_days=3.52, epoch=1412.37, duration_days=0.12)


def test_find_inputs_expands_folders(tmp_path):
    for name in ("LS-0002.csv", "LS-0001.fits", "labels.csv", ".hidden.csv", "notes.md",
                 "batch.parquet"):
        (tmp_path / name).write_text("x")
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "LS-0003.csv").write_text("x")
    lone = tmp_path / "sub" / "LS-0003.csv"
    got = find_inputs([tmp_path, lone, tmp_path / "missing.csv", lone])
    names = [p.name for p in got]
    assert names == ["LS-0001.fits", "LS-0002.csv", "batch.parquet", "LS-0003.csv",
                     "missing.csv"]


def test_find_inputs_refuses_nothing_to_score(tmp_path):
    (tmp_path / "notes.md").write_text("x")
    with pytest.raises(ParameterError, match="no_input_files"):
        find_inputs([tmp_path])


@pytest.mark.parametrize("name", ["LS-0042.csv", "LS-0042.csv.gz", "LS-0042.v2.json",
                                  "LS-0042.fits"])
def test_file_stem_is_the_readers_id(tmp_path, name):
    from features.io import read_segments

    seg = _segment("planet", 3)
    path = tmp_path / name
    if name.endswith(".fits"):
        from astropy.io import fits

        cols = [fits.Column(name="TIME", format="D", array=seg.time),
                fits.Column(name="FLUX", format="D", array=seg.flux)]
        fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)]).writeto(path)
    elif name.endswith(".json"):
        path.write_text(json.dumps({"time": seg.time.tolist(), "flux": seg.flux.tolist()}))
    else:
        import pandas as pd

        pd.DataFrame({"time": seg.time, "flux": seg.flux}).to_csv(path, index=False)
    # the reader (features.io) names a single-segment file by its stem
    assert file_stem(path) == read_segments(path)[0].id


def test_default_registry_root(tmp_path):
    shipped = Path(service.__file__).resolve().parents[1] / "models"
    assert default_registry_root(cwd=tmp_path) == shipped
    (tmp_path / "models").mkdir()
    assert default_registry_root(cwd=tmp_path) == tmp_path / "models"

