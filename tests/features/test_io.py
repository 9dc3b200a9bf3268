"""Tests of features.io: the CSV, JSON, FITS and Parquet readers.

Every file is written here, in a temporary folder, with an independent writer (pandas, astropy,
json) so a reading bug cannot hide behind a matching writing bug.
"""

from __future__ import annotations

import gzip
import json
import logging
import os
import tempfile
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from astropy import units as u
from astropy.io import fits
from hypothesis import given, settings
from hypothesis import strategies as st

from features.errors import DipshapeError, FileFormatError, ParameterError, SegmentError
from features.io import SUPPORTED_FORMATS, read_segment, read_segments
from features.segment import Segment, make_segment

TWO_MIN_DAYS = 2.0 / 1440.0


def _arrays(n: int = 41, *, seed: int = 0, level: float = 1200.0, sigma: float = 1.5):
    rng = np.random.default_rng(seed)
    time = 1400.0 + TWO_MIN_DAYS * np.arange(n)
    flux = level + rng.normal(0.0, sigma, n)
    err = sigma * (1.0 + 0.1 * rng.random(n))
    return time, flux, err


def _csv(path: Path, text: str) -> Path:
    path.write_text(text)
    return path


def _table_csv(path: Path, columns: dict[str, np.ndarray | list]) -> Path:
    pd.DataFrame(columns).to_csv(path, index=False)
    return path


def _fits(
    path: Path,
    columns: dict[str, np.ndarray],
    *,
    header: dict[str, object] | None = None,
    extname: str = "LIGHTCURVE",
    before: list[fits.hdu.base.ExtensionHDU] | None = None,
) -> Path:
    """A mission-style FITS file: primary HDU, optional HDUs, then one binary table."""
    cols = []
    for name, values in columns.items():
        values = np.asarray(values)
        code = {"f": "D", "i": "J", "U": "20A"}[values.dtype.kind]
        cols.append(fits.Column(name=name, format=code, array=values))
    table = fits.BinTableHDU.from_columns(cols, name=extname)
    for key, value in (header or {}).items():
        table.header[key] = value
    fits.HDUList([fits.PrimaryHDU(), *(before or []), table]).writeto(path, overwrite=True)
    return path


def _parquet(path: Path, columns: dict[str, object]) -> Path:
    pd.DataFrame(columns).to_parquet(path, index=False)
    return path


# --------------------------------------------------------------------------------------------
# Failure modes: (builder(tmp_path) -> (path, kwargs), error class, code, message regex)
# --------------------------------------------------------------------------------------------

T, F, E = _arrays()
_GOOD = {"time": T, "flux": F, "flux_err": E}
_BATCH = {
    "segment_id": ["a"] * 41 + ["b"] * 41,
    "time": np.r_[T, T],
    "flux": np.r_[F, F + 10.0],
}


def _garbage(name: str, data: bytes = b"\x00\x9f garbage \xff" * 40):
    def build(tmp: Path):
        (tmp / name).write_bytes(data)
        return tmp / name, {}

    return build


def _text(name: str, text: str, **kwargs):
    def build(tmp: Path):
        (tmp / name).write_text(text)
        return tmp / name, kwargs

    return build


def _build(function: Callable[[Path], Path], **kwargs):
    def build(tmp: Path):
        return function(tmp), kwargs

    return build


def _directory(tmp: Path):
    (tmp / "folder.csv").mkdir()
    return tmp / "folder.csv", {}


def _truncated_fits(tmp: Path):
    path = _fits(tmp / "whole.fits", {"TIME": T, "PDCSAP_FLUX": F})
    data = path.read_bytes()
    (tmp / "cut.fits").write_bytes(data[: len(data) - 2880])
    return tmp / "cut.fits", {}


def _truncated_header_fits(tmp: Path):
    path = _fits(tmp / "whole.fits", {"TIME": T, "PDCSAP_FLUX": F})
    (tmp / "cut.fits").write_bytes(path.read_bytes()[: 2880 + 200])
    return tmp / "cut.fits", {}


def _image_only_fits(tmp: Path):
    fits.HDUList([fits.PrimaryHDU(np.zeros((4, 4)))]).writeto(tmp / "image.fits")
    return tmp / "image.fits", {}


_CSV_ROWS = "\n".join(f"{float(t)!r},{float(f)!r}" for t, f in zip(T, F, strict=True))

BAD_FILES = [
    pytest.param(
        lambda tmp: (tmp / "absent.csv", {}),
        FileFormatError,
        "file_not_found",
        r"no such file: 'absent\.csv'",
        id="absent",
    ),
    pytest.param(
        _directory, FileFormatError, "unreadable_file", r"not a regular file", id="directory"
    ),
    pytest.param(
        _garbage("empty.csv", b""),
        FileFormatError,
        "empty_file",
        r"empty \(0 bytes\)",
        id="empty-csv",
    ),
    pytest.param(
        _garbage("empty.fits", b""), FileFormatError, "empty_file", r"0 bytes", id="empty-fits"
    ),
    pytest.param(
        _text("header.csv", "time,flux\n"),
        FileFormatError,
        "empty_file",
        r"no data rows \(columns: \['time', 'flux'\]\)",
        id="header-only",
    ),
    pytest.param(
        _text("comments.csv", "# a comment\n\n# another\n"),
        FileFormatError,
        "empty_file",
        r"no header row",
        id="comments-only",
    ),
    pytest.param(
        _text("blank.json", "  \n "),
        FileFormatError,
        "empty_file",
        r"only whitespace",
        id="blank-json",
    ),
    pytest.param(
        _text("list.json", "[]"), FileFormatError, "empty_file", r"empty list", id="empty-list-json"
    ),
    pytest.param(
        _build(lambda tmp: _fits(tmp / "norows.fits", {"TIME": np.zeros(0), "FLUX": np.zeros(0)})),
        FileFormatError,
        "empty_file",
        r"no rows",
        id="fits-no-rows",
    ),
    pytest.param(
        _build(
            lambda tmp: _parquet(tmp / "norows.parquet", {"time": np.zeros(0), "flux": np.zeros(0)})
        ),
        FileFormatError,
        "empty_file",
        r"no data rows",
        id="parquet-no-rows",
    ),
    pytest.param(
        _text("a.xlsx", "x"),
        FileFormatError,
        "unsupported_format",
        r"'a\.xlsx'.*csv: \.csv.*fits: \.fits.*parquet: \.parquet",
        id="suffix",
    ),
    pytest.param(
        _text("a.csv", "x", fmt="hdf5"),
        FileFormatError,
        "unsupported_format",
        r"fmt='hdf5'.*csv, json, fits, parquet",
        id="fmt",
    ),
    pytest.param(
        _garbage("bad.fits"),
        FileFormatError,
        "unreadable_file",
        r"cannot be read as FITS",
        id="garbage-fits",
    ),
    pytest.param(
        _garbage("bad.fits.gz"),
        FileFormatError,
        "unreadable_file",
        r"cannot be read as FITS",
        id="garbage-fits-gz",
    ),
    pytest.param(
        _truncated_fits,
        FileFormatError,
        "unreadable_file",
        r"cannot be read as FITS.*truncated",
        id="truncated-data",
    ),
    pytest.param(
        _truncated_header_fits,
        FileFormatError,
        "unreadable_file",
        r"damaged",
        id="truncated-header",
    ),
    pytest.param(
        _garbage("bad.parquet"),
        FileFormatError,
        "unreadable_file",
        r"cannot be read as Parquet",
        id="garbage-parquet",
    ),
    pytest.param(
        _garbage("bad.csv.gz"),
        FileFormatError,
        "unreadable_file",
        r"cannot be read",
        id="garbage-gz",
    ),
    pytest.param(
        _text("bad.json", '{"time": [1, 2,, 3]}'),
        FileFormatError,
        "unreadable_file",
        r"not valid JSON \(line 1, column 16: Expecting value",
        id="invalid-json",
    ),
    pytest.param(
        _garbage("latin.json", '{"id": "caf\u00e9"}'.encode("latin-1")),
        FileFormatError,
        "unreadable_file",
        r"not UTF-8",
        id="not-utf8",
    ),
    pytest.param(
        _text("ragged.csv", "time,flux\n1,2\n3,4,5,6\n"),
        FileFormatError,
        "unreadable_file",
        r"cannot be parsed as CSV",
        id="ragged-csv",
    ),
    pytest.param(
        _text("noflux.csv", "time,value\n" + _CSV_ROWS),
        FileFormatError,
        "missing_columns",
        r"no flux column.*columns found: \['time', 'value'\]",
        id="csv-no-flux",
    ),
    pytest.param(
        _text("notime.csv", "when,flux\n" + _CSV_ROWS),
        FileFormatError,
        "missing_columns",
        r"no time column.*time_col=.*columns found: \['when', 'flux'\]",
        id="csv-no-time",
    ),
    pytest.param(
        _text("noheader.csv", _CSV_ROWS),
        FileFormatError,
        "missing_columns",
        r"looks like data: a header row",
        id="csv-no-header",
    ),
    pytest.param(
        _text("a.csv", "time,flux\n" + _CSV_ROWS, flux_col="pdcsap"),
        FileFormatError,
        "missing_columns",
        r"no column 'pdcsap' \(flux_col\); columns found",
        id="csv-explicit-missing",
    ),
    pytest.param(
        _text("a.csv", "time,flux\n" + _CSV_ROWS, flux_err_col="err"),
        FileFormatError,
        "missing_columns",
        r"no column 'err' \(flux_err_col\)",
        id="csv-err-missing",
    ),
    pytest.param(
        _text("a.csv", "time,flux\n" + _CSV_ROWS, group_col="sector"),
        FileFormatError,
        "missing_columns",
        r"no column 'sector' \(group_col\)",
        id="csv-group-missing",
    ),
    pytest.param(
        _text("case.csv", "time,flux,FLUX\n1,2,3\n"),
        FileFormatError,
        "ambiguous_columns",
        r"\['flux', 'FLUX'\] differ only in letter case",
        id="csv-case",
    ),
    pytest.param(
        _text("words.csv", "time,flux\n1,2\n2,3\n3,abc\n"),
        FileFormatError,
        "invalid_type",
        r"column 'flux' holds 1 non-numeric value\(s\), first 'abc' in data row 3",
        id="csv-text-cell",
    ),
    pytest.param(
        _build(lambda tmp: _fits(tmp / "notime.fits", {"FOO": T, "PDCSAP_FLUX": F})),
        FileFormatError,
        "missing_columns",
        r"no binary table with a time column.*LIGHTCURVE: \['FOO', 'PDCSAP_FLUX'\]",
        id="fits-no-time",
    ),
    pytest.param(
        _build(lambda tmp: _fits(tmp / "noflux.fits", {"TIME": T, "CENTROID": F})),
        FileFormatError,
        "missing_columns",
        r"no flux column.*\['TIME', 'CENTROID'\]",
        id="fits-no-flux",
    ),
    pytest.param(
        _image_only_fits,
        FileFormatError,
        "missing_columns",
        r"tables found: none; HDUs: PRIMARY",
        id="fits-image-only",
    ),
    pytest.param(
        _build(
            lambda tmp: _fits(
                tmp / "strflux.fits", {"TIME": T[:3], "FLUX": np.array(["a", "b", "c"])}
            )
        ),
        FileFormatError,
        "invalid_type",
        r"column 'FLUX' has dtype",
        id="fits-text-flux",
    ),
    pytest.param(
        _build(
            lambda tmp: _fits(tmp / "unit.fits", {"TIME": T, "FLUX": F}, header={"TIMEUNIT": "m"})
        ),
        FileFormatError,
        "unsupported_time_unit",
        r"TIMEUNIT='m'",
        id="fits-time-unit",
    ),
    pytest.param(
        _build(lambda tmp: _parquet(tmp / "bool.parquet", {"time": T, "flux": F > 1200})),
        FileFormatError,
        "invalid_type",
        r"column 'flux' is boolean",
        id="parquet-bool",
    ),
    pytest.param(
        _build(lambda tmp: _parquet(tmp / "batch.parquet", _BATCH)),
        FileFormatError,
        "multiple_segments",
        r"holds 2 segments \('a', 'b'\); use read_segments",
        id="parquet-batch",
    ),
    pytest.param(
        _build(
            lambda tmp: _parquet(
                tmp / "nullid.parquet", {**_BATCH, "segment_id": [None, *_BATCH["segment_id"][1:]]}
            )
        ),
        FileFormatError,
        "invalid_segment_id",
        r"1 row\(s\) have no 'segment_id' \(first at data row 1\)",
        id="parquet-null-id",
    ),
    pytest.param(
        _text("two.json", json.dumps([{"time": list(T), "flux": list(F)}] * 2)),
        FileFormatError,
        "multiple_segments",
        r"holds 2 segments \('two-0', 'two-1'\)",
        id="json-two",
    ),
    pytest.param(
        _text("dup.json", json.dumps([{"id": "x", "time": list(T), "flux": list(F)}] * 2)),
        FileFormatError,
        "duplicate_segment_ids",
        r"\['x'\] occur more than once",
        id="json-dup-ids",
    ),
    pytest.param(
        _text("num.json", "3.5"),
        FileFormatError,
        "invalid_type",
        r"top level must be an object.*got float",
        id="json-number",
    ),
    pytest.param(
        _text("items.json", "[1, 2]"),
        FileFormatError,
        "invalid_type",
        r"item 0: expected an object",
        id="json-list-numbers",
    ),
    pytest.param(
        _text("noflux.json", json.dumps({"time": list(T)})),
        FileFormatError,
        "missing_columns",
        r"noflux\.json: segment object lacks 'flux'; keys found: \['time'\]",
        id="json-no-flux",
    ),
    pytest.param(
        _text("noerr.json", json.dumps({"time": list(T), "flux": list(F)}), flux_err_col="sigma"),
        FileFormatError,
        "missing_columns",
        r"no key 'sigma'",
        id="json-err-missing",
    ),
    pytest.param(
        _text("strs.json", json.dumps({"time": list(T), "flux": ["1"] * 41})),
        SegmentError,
        "invalid_type",
        r"strs\.json: flux\[0\] is str",
        id="json-strings",
    ),
    pytest.param(
        _text("dup.csv", "time,flux\n" + _CSV_ROWS + "\n" + _CSV_ROWS.splitlines()[5]),
        SegmentError,
        "duplicate_times",
        r"^\[duplicate_times\] dup\.csv \(time='time', flux='flux'\): time has 1 duplicated",
        id="csv-dup-times",
    ),
    pytest.param(
        _text("nantime.csv", "time,flux\n" + _CSV_ROWS + "\nnan,1200.0\n"),
        SegmentError,
        "non_finite_time",
        r"nantime\.csv.*refused rather than guessed",
        id="csv-nan-time",
    ),
    pytest.param(
        _text("short.csv", "time,flux\n" + "\n".join(_CSV_ROWS.splitlines()[:10])),
        SegmentError,
        "too_few_points",
        r"short\.csv.*10 usable points left of 10 rows",
        id="csv-short",
    ),
    pytest.param(
        _build(
            lambda tmp: _fits(
                tmp / "flagged.fits",
                {
                    "TIME": T,
                    "PDCSAP_FLUX": F,
                    "QUALITY": np.r_[np.zeros(15, int), np.ones(26, int)],
                },
            )
        ),
        SegmentError,
        "too_few_points",
        r"flagged\.fits\[LIGHTCURVE\].*15 usable.*26 flagged by quality",
        id="fits-flagged",
    ),
    pytest.param(
        _build(lambda tmp: tmp / "anything.csv", time_col=""),
        ParameterError,
        "invalid_parameter",
        r"time_col must be a non-empty string",
        id="empty-option",
    ),
    pytest.param(
        lambda tmp: (123, {}),
        ParameterError,
        "invalid_parameter",
        r"path must be a str or os\.PathLike; got int",
        id="path-int",
    ),
]


@pytest.mark.parametrize(("build", "cls", "code", "pattern"), BAD_FILES)
def test_readers_reject_bad_files(tmp_path, build, cls, code, pattern):
    # Table of (bad file, code, message) in the style of scikit-learn's validation tests
    # (common practice). Only the project's errors may come out, never a bare library error.
    path, kwargs = build(tmp_path)
    with pytest.raises(cls, match=pattern) as info:
        read_segment(path, **kwargs)
    assert info.value.code == code


def test_library_errors_are_chained(tmp_path):
    path, _ = _garbage("bad.parquet")(tmp_path)
    with pytest.raises(FileFormatError) as info:
        read_segment(path)
    assert info.value.__cause__ is not None  # raised `from exc`, traceback kept


def test_batch_errors_name_the_segment(tmp_path):
    path = _parquet(tmp_path / "badseg.parquet", {**_BATCH, "flux": np.r_[F, np.full(41, 5.0)]})
    with pytest.raises(SegmentError, match=r"badseg\.parquet segment 'b'.*constant") as info:
        read_segments(path)
    assert info.value.code == "constant_flux"


def test_read_segments_refuses_an_id_for_a_batch(tmp_path):
    path = _parquet(tmp_path / "batch.parquet", _BATCH)
    with pytest.raises(ParameterError, match=r"id='x' names one segment but batch\.parquet"):
        read_segments(path, id="x")


# --------------------------------------------------------------------------------------------
# CSV
# --------------------------------------------------------------------------------------------


def test_csv_aliases_prefer_pdcsap_and_its_error(tmp_path):
    time, flux, err = _arrays()
    path = _table_csv(
        tmp_path / "lc.csv",
        {
            "TIME_BKJD": time,
            "SAP_FLUX": flux * 1.1,
            "SAP_FLUX_ERR": err * 1.1,
            "PDCSAP_FLUX": flux,
            "PDCSAP_FLUX_ERR": err,
        },
    )
    seg = read_segment(path)
    assert seg == make_segment(time, flux, err, id="lc")
    assert (seg.meta["time_col"], seg.meta["flux_col"], seg.meta["flux_err_col"]) == (
        "TIME_BKJD",
        "PDCSAP_FLUX",
        "PDCSAP_FLUX_ERR",
    )
    # BKJD = BJD - 2454833 (Kepler mission convention; Kepler Archive Manual).
    assert seg.meta["time_label"] == "BKJD" and seg.meta["time_offset_bjd"] == 2454833.0
    assert seg.source == "lc.csv" and seg.meta["format"] == "csv"
    assert seg.meta["flux_candidates"] == ("PDCSAP_FLUX", "SAP_FLUX")


def test_csv_explicit_columns_override_aliases(tmp_path):
    time, flux, err = _arrays()
    path = _table_csv(
        tmp_path / "lc.csv",
        {"t": time, "pdcsap_flux": flux, "sap_flux": flux * 2, "sap_flux_err": err * 2},
    )
    seg = read_segment(path, flux_col="SAP_FLUX", id="chosen")
    assert seg.meta["flux_col"] == "sap_flux" and seg.meta["flux_err_col"] == "sap_flux_err"
    assert seg == make_segment(time, flux * 2, err * 2, id="chosen")


def test_csv_error_column_of_another_flux_is_not_used(tmp_path, caplog):
    time, flux, err = _arrays()
    path = _table_csv(tmp_path / "lc.csv", {"time": time, "pdcsap_flux": flux, "sap_flux_err": err})
    with caplog.at_level(logging.WARNING, logger="features.io"):
        seg = read_segment(path)
    assert seg.flux_err_estimated is True
    assert seg.meta["ignored_error_columns"] == ("sap_flux_err",)
    assert "sap_flux_err" in caplog.text and "flux_err_col" in caplog.text


@pytest.mark.parametrize(
    ("name", "sep", "extra"),
    [
        ("tab.tsv", "\t", ""),
        ("semi.csv", ";", ""),
        ("space.txt", " ", ""),
        ("c.csv", ",", "# note\n"),
    ],
)
def test_csv_separators_and_comments(tmp_path, name, sep, extra):
    time, flux, err = _arrays()
    lines = [sep.join(("time", "flux", "flux_err"))]
    lines += [sep.join(repr(float(v)) for v in row) for row in zip(time, flux, err, strict=True)]
    path = _csv(tmp_path / name, extra + "\n".join(lines) + "\n")
    assert read_segment(path) == make_segment(time, flux, err, id=Path(name).stem)


def test_csv_gzip(tmp_path):
    time, flux, err = _arrays()
    text = pd.DataFrame({"time": time, "flux": flux, "flux_err": err}).to_csv(index=False)
    with gzip.open(tmp_path / "lc.csv.gz", "wt") as handle:
        handle.write(text)
    seg = read_segment(tmp_path / "lc.csv.gz")
    assert seg.id == "lc" and seg == make_segment(time, flux, err, id="lc")


def test_csv_missing_cells_are_dropped_and_counted(tmp_path):
    time, flux, _ = _arrays()
    rows = [f"{float(t)!r},{float(f)!r}" for t, f in zip(time, flux, strict=True)]
    rows[3] = f"{float(time[3])!r},"
    rows[7] = f"{float(time[7])!r},NaN"
    rows[9] = f"{float(time[9])!r},null"
    seg = read_segment(_csv(tmp_path / "gaps.csv", "time,flux\n" + "\n".join(rows)))
    assert seg.n_points == 38 and seg.meta["n_dropped_nonfinite"] == 3
    assert seg.meta["n_rows_read"] == 41


def test_csv_quarters_are_normalised_separately(tmp_path):
    # Un-stitched quarters with different levels (common practice: per-quarter median).
    n = 61
    rng = np.random.default_rng(5)
    time = np.arange(n) * 0.0204
    quarter = np.repeat([14, 15, 16], [21, 19, 21])
    flux = np.repeat([3773.0, 3650.0, 3901.0], [21, 19, 21]) * (1 + rng.normal(0, 1e-3, n))
    path = _table_csv(
        tmp_path / "q.csv", {"time_bkjd": time, "pdcsap_flux": flux, "quarter": quarter}
    )
    seg = read_segment(path)
    assert seg.meta["group_col"] == "quarter"
    assert seg.meta["groups_normalised"] == ("14", "15", "16")
    for label in (14, 15, 16):
        assert np.median(seg.flux[quarter == label]) == pytest.approx(1.0, abs=1e-15)
    renamed = _table_csv(tmp_path / "cam.csv", {"time": time, "flux": flux, "camera": quarter})
    assert read_segment(renamed, group_col="camera").meta["groups_normalised"] == ("14", "15", "16")
    assert "groups_normalised" not in read_segment(renamed).meta


def test_csv_quality_flags_are_masked_and_counted(tmp_path):
    time, flux, err = _arrays()
    quality = np.zeros(41, dtype=int)
    quality[[2, 5, 6]] = [1, 128, 4096]
    path = _table_csv(
        tmp_path / "q.csv", {"time": time, "flux": flux, "flux_err": err, "quality": quality}
    )
    seg = read_segment(path)
    keep = quality == 0
    assert seg.meta["n_dropped_quality"] == 3 and seg.meta["quality_col"] == "quality"
    assert seg == make_segment(time[keep], flux[keep], err[keep], id="q")


def test_csv_magnitudes_are_converted_to_flux(tmp_path):
    # Reference: astropy's logarithmic unit u.Magnitude(m).physical = 10**(-0.4 m) (Pogson
    # 1856); the error from a central finite difference of the same astropy conversion.
    rng = np.random.default_rng(6)
    time = np.arange(41) * TWO_MIN_DAYS
    mag = 8.3 + rng.normal(0.0, 0.002, 41)
    mag_err = np.full(41, 0.001)
    path = _table_csv(tmp_path / "m.csv", {"time_btjd": time, "mag": mag, "mag_err": mag_err})
    seg = read_segment(path)
    reference = u.Magnitude(mag).physical
    np.testing.assert_allclose(seg.flux, reference / np.median(reference), rtol=1e-12)
    step = 1e-6
    slope = (u.Magnitude(mag - step).physical - u.Magnitude(mag + step).physical) / (2 * step)
    np.testing.assert_allclose(seg.flux_err, slope * mag_err / np.median(reference), rtol=1e-6)
    assert seg.meta["flux_from_magnitude"] is True and seg.meta["magnitude_col"] == "mag"
    assert seg.meta["time_offset_bjd"] == 2457000.0  # BTJD = BJD - 2457000 (TESS convention)


def test_flux_column_wins_over_magnitudes_unless_asked(tmp_path):
    rng = np.random.default_rng(7)
    mag_rel = rng.normal(0.0, 0.001, 41)
    flux_norm = 10 ** (-0.4 * mag_rel) * 1.0001
    path = _table_csv(
        tmp_path / "b.csv", {"time_btjd": T, "flux_norm": flux_norm, "mag_rel": mag_rel}
    )
    assert read_segment(path).meta["flux_col"] == "flux_norm"
    from_mag = read_segment(path, flux_col="mag_rel")
    assert from_mag.meta["flux_from_magnitude"] is True
    np.testing.assert_allclose(from_mag.flux, read_segment(path).flux, rtol=1e-12)


def test_csv_batch_with_segment_id(tmp_path):
    path = _table_csv(tmp_path / "batch.csv", _BATCH)
    segs = read_segments(path)
    assert [s.id for s in segs] == ["a", "b"]
    assert all(s.n_points == 41 for s in segs)


# --------------------------------------------------------------------------------------------
# FITS
# --------------------------------------------------------------------------------------------

_TESS_HEADER = {"BJDREFI": 2457000, "BJDREFF": 0.0, "TIMESYS": "TDB", "TIMEUNIT": "d"}


def _mission_table(n: int = 60, seed: int = 8):
    """A mission-like table: gaps with NaN time and zero flux, flagged cadences, NaN flux."""
    time, flux, err = _arrays(n, seed=seed)
    quality = np.zeros(n, dtype=int)
    quality[[4, 5, 20]] = [32, 32, 1024]
    time[[30, 31, 32]] = np.nan
    flux[[30, 31, 32]] = 0.0  # as in real mission files: a gap row with NaN time, flux 0
    flux[40] = np.nan
    return time, flux, err, quality


def test_fits_mission_light_curve(tmp_path):
    time, flux, err, quality = _mission_table()
    path = _fits(
        tmp_path / "lc.fits",
        {
            "TIME": time,
            "SAP_FLUX": flux * 1.2,
            "PDCSAP_FLUX": flux,
            "PDCSAP_FLUX_ERR": err,
            "QUALITY": quality,
        },
        header=_TESS_HEADER,
    )
    seg = read_segment(path)
    keep = (quality == 0) & np.isfinite(time) & np.isfinite(flux)
    assert seg == make_segment(time[keep], flux[keep], err[keep], id="lc")
    meta = seg.meta
    assert meta["n_rows_read"] == 60 and meta["n_dropped_quality"] == 3
    assert meta["n_dropped_nonfinite"] == 4 and meta["n_dropped_nonfinite_time"] == 3
    assert seg.n_points + meta["n_dropped_quality"] + meta["n_dropped_nonfinite"] == 60
    assert meta["time_offset_bjd"] == 2457000.0 and meta["time_system"] == "TDB"
    assert meta["time_unit"] == "d" and meta["hdu"] == "LIGHTCURVE"
    assert (meta["flux_col"], meta["flux_err_col"], meta["quality_col"]) == (
        "PDCSAP_FLUX",
        "PDCSAP_FLUX_ERR",
        "QUALITY",
    )


def test_fits_kepler_style_sap_quality_and_fractional_reference(tmp_path):
    time, flux, err, quality = _mission_table(seed=9)
    path = _fits(
        tmp_path / "k.fits.gz",
        {"TIME": time, "SAP_FLUX": flux, "SAP_FLUX_ERR": err, "SAP_QUALITY": quality},
        header={"BJDREFI": 2400000, "BJDREFF": 0.5},
    )
    seg = read_segment(path)
    assert seg.id == "k" and seg.meta["quality_col"] == "SAP_QUALITY"
    assert seg.meta["flux_col"] == "SAP_FLUX" and seg.meta["n_dropped_quality"] == 3
    assert seg.meta["time_offset_bjd"] == 2400000.5


def test_fits_first_table_with_a_time_column_and_k2_style_columns(tmp_path):
    time, flux, _ = _arrays()
    image = fits.ImageHDU(np.zeros((3, 3)), name="STAMP")
    other = fits.BinTableHDU.from_columns(
        [fits.Column(name="CADENCE", format="J", array=np.arange(5))], name="AUX"
    )
    path = _fits(
        tmp_path / "k2.fits",
        {"T": time, "FRAW": flux * 3.0, "FCOR": flux, "MOVING": np.zeros(41, dtype=int)},
        extname="BESTAPER",
        before=[image, other],
    )
    seg = read_segment(path)
    assert seg.meta["hdu"] == "BESTAPER" and seg.meta["flux_col"] == "FCOR"
    assert seg.flux_err_estimated is True
    assert seg == make_segment(time, flux, id="k2")
    raw = read_segment(path, flux_col="fraw")
    assert raw.meta["flux_col"] == "FRAW"


def test_fits_time_unit_other_than_days_is_converted(tmp_path):
    time, flux, err = _arrays()
    path = _fits(
        tmp_path / "s.fits",
        {"TIME": time * 86400.0, "FLUX": flux, "FLUX_ERR": err},
        header={"TIMEUNIT": "s"},
    )
    seg = read_segment(path)
    np.testing.assert_allclose(seg.time, time, rtol=1e-15)  # 1 d = 86400 s (astropy.units)
    assert seg.meta["time_unit"] == "s" and seg.meta["time_unit_converted_to"] == "d"


@pytest.mark.skipif(not Path("/proc/self/fd").is_dir(), reason="needs /proc (Linux)")
def test_fits_file_is_closed_after_reading(tmp_path):
    time, flux, _, quality = _mission_table()
    path = _fits(tmp_path / "lc.fits", {"TIME": time, "FLUX": flux, "QUALITY": quality})

    def open_handles() -> int:
        targets = []
        for fd in os.listdir("/proc/self/fd"):
            try:
                targets.append(os.readlink(f"/proc/self/fd/{fd}"))
            except OSError:
                continue
        return sum(Path(t) == path for t in targets)

    read_segment(path)
    with pytest.raises(FileFormatError):
        read_segment(path, flux_col="NOPE")
    assert open_handles() == 0


# --------------------------------------------------------------------------------------------
# Parquet and JSON
# --------------------------------------------------------------------------------------------


def test_parquet_batch_table(tmp_path):
    rng = np.random.default_rng(10)
    ids, times, fluxes = [], [], []
    for k, level in enumerate((100.0, 2000.0, 35.0)):
        n = 25 + 5 * k
        ids += [f"s{k}"] * n
        times.append(np.sort(rng.uniform(0.0, 3.0, n)))
        fluxes.append(level * (1 + rng.normal(0, 1e-3, n)))
    path = _parquet(
        tmp_path / "many.pq",
        {"SEGMENT_ID": ids, "time": np.concatenate(times), "flux": np.concatenate(fluxes)},
    )
    segs = read_segments(path)
    assert [s.id for s in segs] == ["s0", "s1", "s2"]
    for seg, t, f in zip(segs, times, fluxes, strict=True):
        assert seg == make_segment(t, f, id=seg.id)
        assert seg.meta["segment_id_col"] == "SEGMENT_ID" and seg.meta["format"] == "parquet"
    single = _parquet(
        tmp_path / "one.parquet", {"segment_id": ["only"] * 25, "time": times[0], "flux": fluxes[0]}
    )
    assert read_segment(single).id == "only"


def test_batch_table_segment_without_errors_gets_them_estimated(tmp_path):
    # one shared flux_err column: empty (all NaN) for a segment means "no errors given", as
    # for an absent column; a partly missing one still drops those points
    rng = np.random.default_rng(12)
    t = np.sort(rng.uniform(0.0, 3.0, 30))
    f = 100.0 * (1 + rng.normal(0, 1e-3, 30))
    err = np.full(30, 0.1)
    path = _parquet(tmp_path / "mixed.parquet", {
        "segment_id": ["with"] * 30 + ["without"] * 30,
        "time": np.concatenate([t, t]), "flux": np.concatenate([f, f]),
        "flux_err": np.concatenate([err, np.full(30, np.nan)])})
    with_err, without = read_segments(path)
    assert with_err == make_segment(t, f, err, id="with")
    assert without == make_segment(t, f, id="without")
    assert without.flux_err_estimated and not with_err.flux_err_estimated
    with pytest.raises(SegmentError) as info:
        make_segment(t, f, np.full(30, np.nan))  # the direct API stays strict
    assert info.value.code == "non_finite_flux_err"


def test_parquet_nullable_columns(tmp_path):
    time, flux, _ = _arrays()
    frame = pd.DataFrame({"time": time, "flux": pd.array([*flux[:-1], None], dtype="Float64")})
    frame.to_parquet(tmp_path / "n.parquet")
    seg = read_segment(tmp_path / "n.parquet")
    assert seg.n_points == 40 and seg.meta["n_dropped_nonfinite"] == 1


def test_json_forms(tmp_path):
    time, flux, err = _arrays()
    obj = {"time": list(time), "flux": list(flux), "flux_err": list(err)}
    (tmp_path / "one.json").write_text(json.dumps(obj))
    (tmp_path / "listed.json").write_text(json.dumps([obj]))
    (tmp_path / "named.json").write_text(json.dumps({**obj, "id": "given"}))
    expected = make_segment(time, flux, err, id="one")
    assert read_segment(tmp_path / "one.json") == expected
    assert read_segment(tmp_path / "listed.json", id="one") == expected
    assert read_segment(tmp_path / "named.json").id == "given"
    assert read_segment(tmp_path / "named.json", id="over").id == "over"
    many = [{**obj, "flux": list(flux * k)} for k in (1, 2, 3)]
    (tmp_path / "many.json").write_text(json.dumps(many))
    assert [s.id for s in read_segments(tmp_path / "many.json")] == ["many-0", "many-1", "many-2"]


def test_json_column_options_and_groups(tmp_path):
    time, flux, err = _arrays()
    sector = [4] * 20 + [5] * 21
    obj = {"bjd": list(time), "f": list(flux), "s": list(err), "sector": sector}
    (tmp_path / "k.json").write_text(json.dumps(obj))
    seg = read_segment(
        tmp_path / "k.json", time_col="bjd", flux_col="f", flux_err_col="s", group_col="sector"
    )
    assert seg == make_segment(time, flux, err, id="k", groups=sector)
    assert seg.meta["groups_normalised"] == ("4", "5")


# --------------------------------------------------------------------------------------------
# Round trips: write with an independent writer, read back, compare exactly
# --------------------------------------------------------------------------------------------


def _segment(n: int = 101, *, estimated: bool = False) -> Segment:
    # Odd n: the median of an already normalised flux is one of its points, and x / x == 1
    # exactly in IEEE-754 arithmetic, so re-normalising on reading is the identity.
    time, flux, err = _arrays(n, seed=12)
    return make_segment(time, flux, None if estimated else err, id="rt")


def _write_csv(seg: Segment, path: Path) -> Path:
    return _table_csv(path, {"time": seg.time, "flux": seg.flux, "flux_err": seg.flux_err})


def _write_fits(seg: Segment, path: Path) -> Path:
    return _fits(path, {"TIME": seg.time, "FLUX": seg.flux, "FLUX_ERR": seg.flux_err})


def _write_parquet(seg: Segment, path: Path) -> Path:
    return _parquet(path, {"time": seg.time, "flux": seg.flux, "flux_err": seg.flux_err})


def _write_json(seg: Segment, path: Path) -> Path:
    obj = {
        "id": seg.id,
        "time": seg.time.tolist(),
        "flux": seg.flux.tolist(),
        "flux_err": seg.flux_err.tolist(),
    }
    path.write_text(json.dumps(obj))
    return path


@pytest.mark.parametrize(
    ("writer", "name"),
    [
        (_write_csv, "rt.csv"),
        (_write_fits, "rt.fits"),
        (_write_parquet, "rt.parquet"),
        (_write_json, "rt.json"),
    ],
)
def test_round_trip_is_exact(tmp_path, writer, name):
    seg = _segment()
    back = read_segment(writer(seg, tmp_path / name))
    assert back == seg
    assert back.flux_err_estimated is False


def test_round_trip_without_errors_re_estimates_the_same_errors(tmp_path):
    seg = _segment(estimated=True)
    path = _table_csv(tmp_path / "rt.csv", {"time": seg.time, "flux": seg.flux})
    back = read_segment(path)
    assert back == seg and back.flux_err_estimated is True


def test_round_trip_even_length_agrees_to_rounding(tmp_path):
    seg = _segment(100)
    back = read_segment(_write_parquet(seg, tmp_path / "even.parquet"))
    np.testing.assert_array_equal(back.time, seg.time)
    np.testing.assert_allclose(back.flux, seg.flux, rtol=4e-16)  # median of two: <= 1 ulp
    np.testing.assert_allclose(back.flux_err, seg.flux_err, rtol=4e-16)


def test_supported_formats_cover_every_reader():
    assert set(SUPPORTED_FORMATS) == {"csv", "json", "fits", "parquet"}


# --------------------------------------------------------------------------------------------
# Hypothesis: garbage files give only the project's errors
# --------------------------------------------------------------------------------------------

_SUFFIXES = [s for suffixes in SUPPORTED_FORMATS.values() for s in suffixes]


@settings(max_examples=80, deadline=None)
@given(data=st.binary(max_size=3000), suffix=st.sampled_from(_SUFFIXES))
def test_garbage_bytes_raise_only_dipshape_errors(data, suffix):
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / f"garbage{suffix}"
        path.write_bytes(data)
        try:
            read_segments(path)
        except DipshapeError:
            pass


_CELLS = st.one_of(
    st.floats().map(repr),
    st.integers(-3, 3).map(str),
    st.sampled_from(["", "nan", "inf", "-", "abc", '"', "1e999", " "]),
)


@settings(max_examples=80, deadline=None)
@given(
    header=st.lists(
        st.sampled_from(["time", "flux", "flux_err", "quarter", "quality", "x"]),
        min_size=1,
        max_size=5,
    ),
    cells=st.lists(st.lists(_CELLS, min_size=1, max_size=5), max_size=40),
    sep=st.sampled_from([",", "\t", " "]),
)
def test_garbage_csv_cells_raise_only_dipshape_errors(header, cells, sep):
    text = sep.join(header) + "\n" + "\n".join(sep.join(row) for row in cells)
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "cells.csv"
        path.write_text(text)
        try:
            read_segments(path)
        except DipshapeError:
            pass


_JSON = st.recursive(
    st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text(max_size=4)),
    lambda inner: st.one_of(
        st.lists(inner, max_size=30),
        st.dictionaries(
            st.sampled_from(["time", "flux", "flux_err", "id", "x"]), inner, max_size=5
        ),
    ),
    max_leaves=60,
)


@settings(max_examples=80, deadline=None)
@given(obj=_JSON)
def test_garbage_json_raises_only_dipshape_errors(obj):
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "obj.json"
        path.write_text(json.dumps(obj))
        try:
            read_segments(path)
        except DipshapeError:
            pass


_COLUMN_NAMES = [
    "TIME",
    "T",
    "PDCSAP_FLUX",
    "SAP_FLUX",
    "FLUX",
    "FCOR",
    "PDCSAP_FLUX_ERR",
    "QUALITY",
]


@settings(max_examples=40, deadline=None)
@given(
    names=st.lists(st.sampled_from(_COLUMN_NAMES), min_size=1, max_size=5, unique=True),
    n=st.integers(0, 40),
    data=st.data(),
)
def test_garbage_fits_tables_raise_only_dipshape_errors(names, n, data):
    columns = []
    for name in names:
        if name == "QUALITY":
            values = np.array(
                data.draw(st.lists(st.integers(0, 3), min_size=n, max_size=n)), dtype=np.int32
            )
            columns.append(fits.Column(name=name, format="J", array=values))
        else:
            values = np.array(
                data.draw(st.lists(st.floats(width=32), min_size=n, max_size=n)), dtype=float
            )
            columns.append(fits.Column(name=name, format="D", array=values))
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "t.fits"
        fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(columns)]).writeto(path)
        try:
            read_segments(path)
        except DipshapeError:
            pass
