"""The demo data of the invented Lumen Survey: readable, consistent, documented, reproducible.

References outside the project: the FITS standard (4.0) as checked by ``astropy.io.fits``
(``HDUList.verify``) and read by it directly, the CSV format as read by the standard library's
``csv`` module (RFC 4180), and the five contract classes of the design reference.
"""

from __future__ import annotations

import csv
import importlib.util
import re
import sys
from pathlib import Path
from types import ModuleType

import numpy as np
import pytest
from astropy.io import fits

from features.catalog import FEATURE_VERSION
from features.io import read_segment
from service.scoring import load_ood, score_path
from tests.conftest import REPO_ROOT
from training.classes import CLASSES
from training.registry import load_model

DEMO = REPO_ROOT / "demo_data"
SCRIPT = DEMO / "make_demo_data.py"
LIGHT_CURVE_SUFFIXES = (".csv", ".fits")
NOT_LIGHT_CURVES = {"labels.csv"}


def _light_curves(folder: Path) -> list[Path]:
    return sorted(p for p in folder.iterdir()
                  if p.suffix in LIGHT_CURVE_SUFFIXES and p.name not in NOT_LIGHT_CURVES)


def _labels(folder: Path) -> dict[str, str]:
    with (folder / "labels.csv").open(newline="") as handle:
        rows = list(csv.DictReader(handle))
    ids = [r["id"] for r in rows]
    assert len(ids) == len(set(ids)), "labels.csv repeats an id"
    return {r["id"]: r["label"] for r in rows}


def _readme_table(folder: Path) -> list[tuple[str, str]]:
    """(file, intended class) of every row of the README's segment table."""
    text = (folder / "README.md").read_text(encoding="utf-8")
    return re.findall(r"^\| `([^`]+)` \|.*\| `([a-z_]+)` \|$", text, flags=re.MULTILINE)


@pytest.fixture(scope="module")
def script() -> ModuleType:
    spec = importlib.util.spec_from_file_location("make_demo_data", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    sys.modules["make_demo_data"] = module  # dataclasses resolve their module by name
    spec.loader.exec_module(module)
    return module


FILES = _light_curves(DEMO)


def test_the_demo_folder_holds_12_to_20_segments_in_csv_and_fits_under_3_mb():
    assert 12 <= len(FILES) <= 20
    assert {p.suffix for p in FILES} == {".csv", ".fits"}
    total = sum(p.stat().st_size for p in DEMO.iterdir() if p.is_file())
    assert total < 3 * 1024 * 1024


@pytest.mark.parametrize("path", FILES, ids=lambda p: p.name)
def test_every_demo_file_is_read_with_its_stem_as_id(path: Path):
    seg = read_segment(path)
    assert seg.id == path.stem
    assert re.fullmatch(r"LS-\d{4}-s\d+", seg.id)
    assert 2_000 <= seg.n_points <= 15_000
    assert not seg.flux_err_estimated  # the survey ships errors


def test_segment_ids_are_unique():
    ids = [read_segment(p).id for p in FILES]
    assert len(ids) == len(set(ids))


def test_cadences_are_mixed_with_at_least_two_at_30_minutes():
    cadences = [round(read_segment(p).cadence_min) for p in FILES]
    assert set(cadences) <= {2, 10, 30}
    assert cadences.count(30) >= 2
    assert cadences.count(2) + cadences.count(10) > len(cadences) / 2


@pytest.mark.parametrize("path", [p for p in FILES if p.suffix == ".fits"], ids=lambda p: p.name)
def test_fits_files_follow_the_standard_and_quality_flags_are_dropped(path: Path):
    with fits.open(path) as hdul:
        hdul.verify("exception")  # FITS standard conformance as astropy checks it
        table = next(h for h in hdul if isinstance(h, fits.BinTableHDU))
        names = set(table.columns.names)
        time = np.array(table.data["TIME"], dtype=float)
        flux = np.array(table.data["PDCSAP_FLUX"], dtype=float)
        quality = np.array(table.data["QUALITY"])
    assert {"TIME", "PDCSAP_FLUX", "PDCSAP_FLUX_ERR", "QUALITY"} <= names
    flagged = quality != 0
    assert 3 <= flagged.sum() <= 0.01 * quality.size  # "a few" flagged cadences
    seg = read_segment(path)
    keep = ~flagged & np.isfinite(time) & np.isfinite(flux)
    np.testing.assert_array_equal(seg.time, time[keep])
    assert seg.meta["n_dropped_quality"] == int(flagged.sum())


@pytest.mark.parametrize("path", [p for p in FILES if p.suffix == ".csv"], ids=lambda p: p.name)
def test_csv_files_have_the_three_columns_and_empty_cells_are_missing_points(path: Path):
    with path.open(newline="") as handle:  # RFC 4180 as the standard library reads it
        reader = csv.reader(handle)
        header = next(reader)
        rows = list(reader)
    assert header == ["time", "flux", "flux_err"]
    present = [r for r in rows if r[1] != ""]
    seg = read_segment(path)
    assert seg.n_points == len(present)
    np.testing.assert_allclose(seg.time, [float(r[0]) for r in present], rtol=0, atol=0)


def test_labels_cover_the_five_classes_and_match_the_files_one_to_one():
    labels = _labels(DEMO)
    assert set(labels.values()) == set(CLASSES)  # the five classes of the contract
    assert set(labels) == {p.stem for p in FILES}


def test_readme_table_lists_exactly_the_files_present_with_their_labels():
    rows = _readme_table(DEMO)
    assert sorted(f for f, _ in rows) == sorted(p.name for p in FILES)
    labels = _labels(DEMO)
    assert {Path(f).stem: c for f, c in rows} == labels


def test_readme_says_the_data_are_invented_and_simulated_and_cautions():
    text = (DEMO / "README.md").read_text(encoding="utf-8")
    assert "invented and simulated" in text
    assert "triage, not a discovery" in text and "follow-up" in text


def test_the_diluted_binary_is_planet_like_with_a_shallow_secondary(script: ModuleType):
    diluted = [s for s in script.SEGMENTS if s.label == "eclipsing_binary"
               and s.priors.get("eb.subtype") is not None
               and s.priors["eb.subtype"].options == ("diluted",)]
    assert len(diluted) == 1
    seg, _ = script.build(diluted[0])
    primary, secondary, phase = script._eclipse_depths(seg)
    assert primary < 0.015  # planet-like depths are below ~1.5 % (common practice)
    assert 0.0 < secondary < 0.5 * primary
    assert phase == pytest.approx(0.5, abs=0.02)  # circular orbit: secondary at phase 0.5


def test_regenerating_reproduces_identical_arrays(script: ModuleType, tmp_path: Path):
    paths = script.write_all(tmp_path)
    assert sorted(p.name for p in paths) == sorted(p.name for p in FILES)
    for path in FILES:
        shipped, again = read_segment(path), read_segment(tmp_path / path.name)
        np.testing.assert_array_equal(shipped.time, again.time)
        np.testing.assert_array_equal(shipped.flux, again.flux)
        np.testing.assert_array_equal(shipped.flux_err, again.flux_err)
    for name in ("labels.csv", "README.md"):
        assert (tmp_path / name).read_text() == (DEMO / name).read_text()


def test_the_script_refuses_an_unknown_segment_id(script: ModuleType, capsys):
    with pytest.raises(SystemExit) as info:
        script.main(["--search", "LS-9999-s1"])
    assert info.value.code == 2
    assert "no demo segment 'LS-9999-s1'" in capsys.readouterr().err


def test_the_shipped_model_gives_every_demo_file_its_intended_class():
    # fails when a retrained model no longer agrees: re-pick seeds with
    # `make_demo_data.py --check` / `--search ID`
    root = REPO_ROOT / "models"
    model = load_model(root, expected_feature_version=FEATURE_VERSION)
    ood = load_ood(root, model.card.version)
    labels = _labels(DEMO)
    wrong = {}
    for path in FILES:
        (result,) = score_path(path, model, ood=ood)
        assert "error" not in result, result
        if result["label"] != labels[path.stem]:
            wrong[path.name] = (labels[path.stem], result["label"])
    assert not wrong, f"{model.card.version} disagrees with the intended classes: {wrong}"
