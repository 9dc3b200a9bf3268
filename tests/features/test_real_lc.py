"""Real mission light curves: every FITS and CSV listed in the folder's MANIFEST.csv reads cleanly.

The folder (``../shared/real_lc`` beside the repository, or ``$DIPSHAPE_REAL_LC``) is not part of
the repository; this module is skipped when it is absent. The expected numbers (row counts,
cadences, good-point counts, time zero points) come from its MANIFEST.csv and README.md, written
independently of this code.
"""

from __future__ import annotations

import csv
import functools
import re

import numpy as np
import pytest

from features.errors import FileFormatError
from features.io import read_segment
from features.segment import Segment
from tests.conftest import REAL_LC_ENV, real_lc_path

pytestmark = pytest.mark.real_lc

REAL_LC = real_lc_path()
if REAL_LC is None:
    pytest.skip(
        f"real light curves absent (../shared/real_lc beside the repository, or ${REAL_LC_ENV})",
        allow_module_level=True,
    )

with open(REAL_LC / "MANIFEST.csv", newline="") as _handle:
    ROWS = [r for r in csv.DictReader(_handle) if r["file"].lower().endswith((".fits", ".csv"))]

# Time zero points from the folder's README ("Time systems"): BKJD = BJD - 2454833 (Kepler, K2),
# BTJD = BJD - 2457000 (TESS); the mission conventions of the archive manuals.
_OFFSET_BY_MISSION = {"Kepler": 2454833.0, "K2": 2454833.0, "TESS": 2457000.0}

# Counts of good points quoted in the MANIFEST notes, e.g. "QUALITY==0: 16087 points".
_GOOD_POINTS = re.compile(r"QUALITY==0[^.;]*?(\d{3,}) (?:good )?points")


def _options(path) -> dict[str, str]:
    """Reading options for a CSV whose flux column has no standard name.

    Per the README, the residual beta Pic export stores a normalised flux under a non-standard
    name ending in ``_norm``; pick that column explicitly. Standard files need no options.
    """
    if path.suffix.lower() != ".csv":
        return {}
    header = [h.strip().lower() for h in path.open().readline().split(",")]
    standard = {"pdcsap_flux", "sap_flux", "flux", "flux_norm", "fcor"}
    if standard & set(header):
        return {}
    normalised = [h for h in header if h.endswith("_norm")]
    return {"flux_col": normalised[0]} if normalised else {}


@functools.cache
def _read(name: str) -> Segment:
    path = REAL_LC / name
    return read_segment(path, **_options(path))


@pytest.mark.parametrize("row", ROWS, ids=[r["file"] for r in ROWS])
def test_real_light_curve_reads_with_manifest_counts(row):
    seg = _read(row["file"])
    meta = seg.meta
    n_rows = int(row["n_points"])
    # Every row of the table is accounted for: kept, flagged by quality, or non-finite.
    assert meta["n_rows_read"] == n_rows
    assert seg.n_points + meta["n_dropped_quality"] + meta["n_dropped_nonfinite"] == n_rows
    # Cadence as listed in the MANIFEST (2 % tolerance: the listed values are rounded).
    assert seg.cadence_min == pytest.approx(float(row["cadence_minutes"]), rel=0.02)
    # Non-trivially long: most rows kept, and at least several days of data.
    assert seg.n_points >= 0.5 * n_rows and seg.n_points >= 1000
    assert seg.duration_days > 5.0
    assert np.all(np.isfinite(seg.flux_err)) and np.all(seg.flux_err > 0)
    assert seg.id == row["file"].rsplit(".", 1)[0]


_COUNTED = [(r["file"], int(m.group(1))) for r in ROWS if (m := _GOOD_POINTS.search(r["notes"]))]


@pytest.mark.parametrize(("name", "n_good"), _COUNTED, ids=[name for name, _ in _COUNTED])
def test_real_light_curve_good_point_counts_match_the_notes(name, n_good):
    # Quality-flagged rows and rows with non-finite time or flux removed, as the notes describe.
    assert _read(name).n_points == n_good


@pytest.mark.parametrize("row", ROWS, ids=[r["file"] for r in ROWS])
def test_real_light_curve_time_zero_point_and_ephemeris(row):
    seg = _read(row["file"])
    assert seg.meta["time_offset_bjd"] == _OFFSET_BY_MISSION[row["mission"]]
    # A listed reference epoch (in the file's own time system) falls inside the segment.
    epoch = re.search(r"T0=(\d+\.\d+)", row["known_event_times_or_ephemeris"])
    if epoch is not None:
        assert seg.time[0] <= float(epoch.group(1)) <= seg.time[-1]


@pytest.mark.parametrize("row", ROWS, ids=[r["file"] for r in ROWS])
def test_real_light_curve_normalisation(row):
    seg = _read(row["file"])
    labels = seg.meta.get("groups_normalised")
    if labels is None:
        assert np.median(seg.flux) == pytest.approx(1.0, abs=1e-12)
        return
    # Multi-quarter / multi-sector files are normalised per group; the groups are the ones the
    # MANIFEST lists (e.g. "Q14-Q17" -> 14, 15, 16, 17).
    first, last = (int(x) for x in re.findall(r"\d+", row["sector_or_quarter"]))
    assert labels == tuple(str(k) for k in range(first, last + 1))
    group_col = seg.meta["group_col"]
    assert group_col in {"quarter", "sector"}
    sizes = seg.meta["group_n_points"]
    start = 0
    for size in sizes:
        chunk = seg.flux[start : start + size]  # groups are contiguous in time in these files
        assert np.median(chunk) == pytest.approx(1.0, abs=1e-12)
        start += size


def test_k2sff_raw_flux_column_can_be_chosen(real_lc_dir):
    rows = [r for r in ROWS if r["mission"] == "K2"]
    if not rows:
        pytest.skip("no K2 file in the MANIFEST")
    path = real_lc_dir / rows[0]["file"]
    raw = read_segment(path, flux_col="FRAW")
    corrected = _read(rows[0]["file"])
    assert raw.meta["flux_col"] == "FRAW" and corrected.meta["flux_col"] == "FCOR"
    np.testing.assert_array_equal(raw.time, corrected.time)
    # README: point-to-point scatter after a 1-d high-pass is 593 ppm in FRAW vs 219 ppm in FCOR.
    # The roll systematics make the raw flux the noisier one here too.
    assert np.std(np.diff(raw.flux)) > 1.5 * np.std(np.diff(corrected.flux))


def test_magnitudes_reproduce_the_exported_flux():
    # README: in the beta Pic export flux_norm = 10**(-0.4 mag_rel), per sector. Reading the
    # magnitude column through our conversion must give the same normalised flux.
    csvs = [r for r in ROWS if r["file"].lower().endswith(".csv")]
    rows = [r for r in csvs if "mag_rel" in (REAL_LC / r["file"]).open().readline()]
    if not rows:
        pytest.skip("no CSV with a mag_rel column in the MANIFEST")
    path = REAL_LC / rows[0]["file"]
    from_mag = read_segment(path, flux_col="mag_rel")
    from_flux = _read(rows[0]["file"])
    assert from_mag.meta["flux_from_magnitude"] is True
    np.testing.assert_allclose(from_mag.flux, from_flux.flux, rtol=1e-7)


def test_non_standard_flux_name_is_refused_without_options():
    odd = [r for r in ROWS if _options(REAL_LC / r["file"])]
    if not odd:
        pytest.skip("every CSV in the MANIFEST uses a standard flux column name")
    with pytest.raises(FileFormatError, match=r"no flux column.*columns found") as info:
        read_segment(REAL_LC / odd[0]["file"])
    assert info.value.code == "missing_columns"
