"""Readers: light-curve files (CSV, JSON, FITS binary tables, Parquet) to :class:`Segment`.

Every reader ends in :func:`features.segment.make_segment`, so files are validated by exactly the
rules that arrays are. Problems with the file itself raise :class:`FileFormatError`:

=======================  ================================================================
code                     raised when
=======================  ================================================================
``file_not_found``       the path does not exist
``unreadable_file``      the bytes cannot be parsed (garbage FITS, invalid JSON, a directory)
``empty_file``           zero bytes, or a header with no data rows
``unsupported_format``   the suffix (or ``fmt``) is not one of :data:`SUPPORTED_FORMATS`
``missing_columns``      no time or flux column could be found (the detail lists those found)
``ambiguous_columns``    two columns differ only in letter case
``invalid_type``         a column holds non-numeric values (the detail names column and row)
``multiple_segments``    :func:`read_segment` on a file holding several segments
``invalid_segment_id``   a batch table row without ``segment_id``
``duplicate_segment_ids``  a JSON list with two segments of the same id
``unsupported_time_unit``  a FITS TIMEUNIT that is not a time unit
=======================  ================================================================

Validation failures of the data (too few points, duplicate times...) keep their
:class:`SegmentError` code; the detail is prefixed by the file name.

Column names (CSV, Parquet, FITS) are matched case-insensitively; the first alias present wins:

- time: ``time, time_btjd, time_bkjd, time_bjd, bjd, btjd, bkjd, t``
- flux: ``pdcsap_flux, sap_flux, flux, flux_norm, fcor``; when none is present, a magnitude
  column ``mag, mag_rel`` (converted, see :func:`read_segments`)
- flux_err: ``<flux>_err`` or ``<flux>_error`` of the chosen flux column only
- groups (each normalised by its own median): ``quarter, sector, season``
- quality (rows with a non-zero value are dropped and counted): ``quality, sap_quality``
- batch tables: a ``segment_id`` column splits a CSV or Parquet table into segments.
"""

from __future__ import annotations

import dataclasses
import gzip
import json
import logging
import os
import re
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from features.errors import DipshapeError, FileFormatError, ParameterError, SegmentError
from features.segment import Segment, _mapping_to_segment, make_segment

__all__ = ["SUPPORTED_FORMATS", "read_segment", "read_segments"]

logger = logging.getLogger(__name__)

#: Formats and the file-name suffixes that select them (matched case-insensitively).
SUPPORTED_FORMATS: Mapping[str, tuple[str, ...]] = {
    "csv": (".csv", ".csv.gz", ".tsv", ".txt"),
    "json": (".json",),
    "fits": (".fits", ".fit", ".fts", ".fits.gz", ".fit.gz"),
    "parquet": (".parquet", ".pq"),
}

_TIME_ALIASES = ("time", "time_btjd", "time_bkjd", "time_bjd", "bjd", "btjd", "bkjd", "t")
_FLUX_ALIASES = ("pdcsap_flux", "sap_flux", "flux", "flux_norm", "fcor")
_MAG_ALIASES = ("mag", "mag_rel")
_GROUP_ALIASES = ("quarter", "sector", "season")
_QUALITY_ALIASES = ("quality", "sap_quality")
_SEGMENT_ID = "segment_id"
_MAGNITUDE_NAME = re.compile(r"^mag(nitude)?(_|$)", re.IGNORECASE)

#: Time systems implied by a column name: (label, offset added to get BJD in days).
#: BTJD = BJD - 2457000 (TESS), BKJD = BJD - 2454833 (Kepler/K2): mission conventions.
_TIME_SYSTEMS: Mapping[str, tuple[str, float | None]] = {
    "time_btjd": ("BTJD", 2457000.0),
    "btjd": ("BTJD", 2457000.0),
    "time_bkjd": ("BKJD", 2454833.0),
    "bkjd": ("BKJD", 2454833.0),
    "time_bjd": ("BJD", None),
    "bjd": ("BJD", None),
}

#: d mag -> d flux / flux: 0.4 ln 10 (first-order propagation of m = -2.5 log10 f; Pogson 1856).
_MAG_TO_REL_FLUX = 0.4 * np.log(10.0)


@dataclass(frozen=True, slots=True)
class _Options:
    time_col: str | None
    flux_col: str | None
    flux_err_col: str | None
    group_col: str | None


@dataclass(frozen=True, slots=True)
class _Columns:
    time: str
    flux: str
    flux_err: str | None
    group: str | None
    quality: str | None
    magnitude: bool
    flux_candidates: tuple[str, ...]
    ignored_err: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class _Raw:
    """Columns of one segment as read, before validation."""

    time: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray | None
    groups: np.ndarray | None
    id: str
    source: str
    meta: dict[str, Any]
    context: str

    def build(self, id: str | None) -> Segment:
        """Validate through :func:`make_segment`, prefixing errors with where the data came from."""
        try:
            return make_segment(
                self.time,
                self.flux,
                self.flux_err,
                id=self.id if id is None else id,
                source=self.source,
                meta=self.meta,
                groups=self.groups,
            )
        except SegmentError as exc:
            if exc.code == "invalid_id":
                raise
            raise SegmentError(exc.code, f"{self.context}: {exc.detail}") from exc


# --------------------------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------------------------


def read_segments(
    path: str | os.PathLike[str],
    *,
    fmt: str | None = None,
    time_col: str | None = None,
    flux_col: str | None = None,
    flux_err_col: str | None = None,
    group_col: str | None = None,
    id: str | None = None,
) -> list[Segment]:
    """Read every segment in a light-curve file.

    Parameters
    ----------
    path : str or os.PathLike
        The file. Its suffix selects the format (see :data:`SUPPORTED_FORMATS`) unless ``fmt``
        is given.
    fmt : {"csv", "json", "fits", "parquet"}, optional
        Format, overriding the suffix.
    time_col, flux_col, flux_err_col, group_col : str, optional
        Column (or JSON key) names overriding the aliases (matched case-insensitively). A
        ``flux_col`` named like a magnitude (``mag``, ``mag_*``, ``magnitude*``) is read as
        magnitudes.
    id : str, optional
        Segment id for a single-segment file; defaults to the file stem (``"b.fits.gz"`` ->
        ``"b"``), or to the ``id`` in a JSON object, or to ``segment_id`` in a batch table.

    Returns
    -------
    list of Segment
        One per segment, in file order. CSV and FITS give one (unless a CSV has a
        ``segment_id`` column); a JSON list or a batch table gives one per entry.

    Raises
    ------
    FileFormatError
        File problems, codes listed in the module docstring.
    SegmentError
        The data fail validation (:func:`features.segment.make_segment`); the detail starts
        with the file name (and the segment id in a batch).
    ParameterError
        ``path`` is not a path, ``id`` given for a multi-segment file, or an option is not a
        string.

    Notes
    -----
    - CSV (also ``.tsv``/``.txt``/``.csv.gz``): one header row; separator ``,`` / tab / ``;``
      / whitespace detected from the header line; ``#`` starts a comment. Empty cells and
      NaN/null are missing points.
    - JSON: one object ``{"id"?, "time", "flux", "flux_err"?}`` or a list of such objects (a
      batch; ids default to ``<stem>-<index>`` when absent).
    - FITS: the first BINTABLE with the time column (``TIME`` or ``T``); rows flagged by
      QUALITY/SAP_QUALITY are dropped, then rows with non-finite time or flux (in mission
      products a NaN time goes with a gap: dropped and counted, not refused). The header's
      ``BJDREFI + BJDREFF`` goes to ``meta["time_offset_bjd"]``, TIMESYS and TIMEUNIT to
      ``meta["time_system"]`` / ``meta["time_unit"]``; a TIMEUNIT other than days is converted
      to days; the time column's TUNIT (e.g. ``"BJD - 2457000, days"``) goes to
      ``meta["time_label"]``. Checksums are not verified.
    - CSV/Parquet time columns named for a mission convention set ``meta["time_label"]`` and
      ``meta["time_offset_bjd"]``: BTJD = BJD - 2457000 (TESS), BKJD = BJD - 2454833 (Kepler).
    - Parquet: a single-segment table, or a long batch table with ``segment_id``.
    - Magnitudes: :math:`f = 10^{-0.4 (m - \\tilde m)}` with :math:`\\tilde m` the median
      magnitude, and :math:`\\sigma_f = 0.4 \\ln 10 \\, f \\, \\sigma_m` (first-order error
      propagation of Pogson's relation :math:`m = -2.5 \\log_{10} f`). ``meta`` records
      ``flux_from_magnitude`` and ``magnitude_col``.

    ``meta`` always records ``format``, ``time_col``, ``flux_col``, ``flux_err_col``,
    ``group_col``, ``quality_col``, ``n_rows_read``, ``n_dropped_quality`` and
    ``n_dropped_nonfinite``; so ``n_points + n_dropped_quality + n_dropped_nonfinite ==
    n_rows_read``.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> rows = "\\n".join(f"{0.02 * i:.2f},{1000 + (i * 7) % 5}" for i in range(40))
    >>> _ = (folder / "demo.csv").write_text("time,flux\\n" + rows + "\\n")
    >>> [s.id for s in read_segments(folder / "demo.csv")]
    ['demo']
    """
    opts = _Options(
        time_col=_check_option(time_col, "time_col"),
        flux_col=_check_option(flux_col, "flux_col"),
        flux_err_col=_check_option(flux_err_col, "flux_err_col"),
        group_col=_check_option(group_col, "group_col"),
    )
    p = _check_path(path)
    kind = _format_of(p, fmt)
    raws = _READERS[kind](p, opts)
    if id is not None and len(raws) > 1:
        raise ParameterError(
            "invalid_parameter",
            f"id={id!r} names one segment but {p.name} holds {len(raws)}; their ids come from "
            "the file",
        )
    return [_finish(raw, id) for raw in raws]


def read_segment(
    path: str | os.PathLike[str],
    *,
    fmt: str | None = None,
    time_col: str | None = None,
    flux_col: str | None = None,
    flux_err_col: str | None = None,
    group_col: str | None = None,
    id: str | None = None,
) -> Segment:
    """Read a file holding exactly one light-curve segment.

    Same parameters, formats and errors as :func:`read_segments`.

    Returns
    -------
    Segment

    Raises
    ------
    FileFormatError
        Code ``multiple_segments`` when the file holds more than one segment (a JSON list or a
        batch table): use :func:`read_segments`. Every error of :func:`read_segments`.

    Examples
    --------
    >>> import json, tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "demo.json"
    >>> _ = path.write_text(json.dumps({"time": [0.5 * i for i in range(30)],
    ...                                 "flux": [2.0 + 0.01 * (i % 4) for i in range(30)]}))
    >>> seg = read_segment(path)
    >>> seg.id, seg.n_points, seg.flux_err_estimated
    ('demo', 30, True)
    """
    opts = _Options(
        time_col=_check_option(time_col, "time_col"),
        flux_col=_check_option(flux_col, "flux_col"),
        flux_err_col=_check_option(flux_err_col, "flux_err_col"),
        group_col=_check_option(group_col, "group_col"),
    )
    p = _check_path(path)
    kind = _format_of(p, fmt)
    raws = _READERS[kind](p, opts)
    if len(raws) > 1:
        ids = ", ".join(repr(r.id) for r in raws[:5]) + (", ..." if len(raws) > 5 else "")
        raise FileFormatError(
            "multiple_segments",
            f"{p.name} holds {len(raws)} segments ({ids}); use read_segments() to read them all",
        )
    return _finish(raws[0], id)


# --------------------------------------------------------------------------------------------
# Paths, formats, options
# --------------------------------------------------------------------------------------------


def _check_path(path: Any) -> Path:
    if not isinstance(path, (str, os.PathLike)):
        raise ParameterError(
            "invalid_parameter", f"path must be a str or os.PathLike; got {type(path).__name__}"
        )
    p = Path(path)
    if not p.exists():
        raise FileFormatError("file_not_found", f"no such file: {p.name!r} ({os.fspath(p)})")
    if not p.is_file():
        raise FileFormatError("unreadable_file", f"{p.name!r} is not a regular file")
    if p.stat().st_size == 0:
        raise FileFormatError("empty_file", f"{p.name!r} is empty (0 bytes)")
    return p


def _supported_text() -> str:
    return "; ".join(f"{k}: {', '.join(v)}" for k, v in SUPPORTED_FORMATS.items())


def _format_of(path: Path, fmt: str | None) -> str:
    if fmt is not None:
        key = str(fmt).strip().lower().lstrip(".")
        if key not in SUPPORTED_FORMATS:
            raise FileFormatError(
                "unsupported_format",
                f"fmt={fmt!r} is not supported; formats: {', '.join(SUPPORTED_FORMATS)}",
            )
        return key
    name = path.name.lower()
    matches = [
        (len(suffix), kind)
        for kind, suffixes in SUPPORTED_FORMATS.items()
        for suffix in suffixes
        if name.endswith(suffix)
    ]
    if not matches:
        raise FileFormatError(
            "unsupported_format",
            f"cannot tell the format of {path.name!r} from its suffix; supported: "
            f"{_supported_text()} (or pass fmt=)",
        )
    return max(matches)[1]


def _stem(path: Path) -> str:
    name = path.name
    lowered = name.lower()
    for suffixes in SUPPORTED_FORMATS.values():
        for suffix in sorted(suffixes, key=len, reverse=True):
            if lowered.endswith(suffix) and len(name) > len(suffix):
                return name[: -len(suffix)]
    return path.stem or name


def _check_option(value: Any, name: str) -> str | None:
    if value is None:
        return None
    if not isinstance(value, str) or not value.strip():
        raise ParameterError(
            "invalid_parameter", f"{name} must be a non-empty string; got {value!r}"
        )
    return value.strip()


# --------------------------------------------------------------------------------------------
# Column resolution (shared by CSV, Parquet and FITS)
# --------------------------------------------------------------------------------------------


def _resolve_columns(names: Sequence[str], opts: _Options, where: str) -> _Columns:
    """Choose the time / flux / error / group / quality columns among ``names``."""
    by_lower: dict[str, list[str]] = {}
    for name in names:
        by_lower.setdefault(name.strip().lower(), []).append(name)
    found = list(names)

    def lookup(key: str) -> str | None:
        hits = by_lower.get(key.lower())
        if not hits:
            return None
        if len(hits) > 1:
            raise FileFormatError(
                "ambiguous_columns",
                f"{where}: columns {hits} differ only in letter case; rename one or pass the "
                "exact name",
            )
        return hits[0]

    def explicit(value: str, option: str) -> str:
        if value in names:
            return value
        hit = lookup(value)
        if hit is None:
            raise FileFormatError(
                "missing_columns",
                f"{where}: no column {value!r} ({option}); columns found: {found}",
            )
        return hit

    def first(aliases: Sequence[str]) -> str | None:
        for alias in aliases:
            hit = lookup(alias)
            if hit is not None:
                return hit
        return None

    if opts.time_col is not None:
        time = explicit(opts.time_col, "time_col")
    else:
        time = first(_TIME_ALIASES)
        if time is None:
            raise FileFormatError(
                "missing_columns",
                f"{where}: no time column (looked for {', '.join(_TIME_ALIASES)}; or pass "
                f"time_col=); columns found: {found}{_header_hint(found)}",
            )

    candidates = tuple(c for c in (lookup(a) for a in _FLUX_ALIASES) if c is not None)
    if opts.flux_col is not None:
        flux = explicit(opts.flux_col, "flux_col")
        magnitude = bool(_MAGNITUDE_NAME.match(flux.strip()))
    elif candidates:
        flux, magnitude = candidates[0], False
    else:
        flux = first(_MAG_ALIASES)
        magnitude = True
        if flux is None:
            raise FileFormatError(
                "missing_columns",
                f"{where}: no flux column (looked for {', '.join(_FLUX_ALIASES)}, or magnitudes "
                f"{', '.join(_MAG_ALIASES)}; or pass flux_col=); columns found: {found}"
                f"{_header_hint(found)}",
            )
    if len(candidates) > 1 and opts.flux_col is None:
        logger.debug("%s: flux columns %s present; using %r", where, list(candidates), flux)

    if opts.flux_err_col is not None:
        flux_err = explicit(opts.flux_err_col, "flux_err_col")
    else:
        base = flux.strip().lower()
        flux_err = first((f"{base}_err", f"{base}_error"))
    used = {time, flux, flux_err}
    ignored_err = tuple(
        n for n in names if n not in used and re.search(r"_err(or)?$", n.strip(), re.IGNORECASE)
    )
    if flux_err is None and ignored_err:
        logger.warning(
            "%s: error column(s) %s do not belong to flux column %r and are ignored; pass "
            "flux_err_col= to use one",
            where,
            list(ignored_err),
            flux,
        )

    group = explicit(opts.group_col, "group_col") if opts.group_col else first(_GROUP_ALIASES)
    quality = first(_QUALITY_ALIASES)
    return _Columns(
        time=time,
        flux=flux,
        flux_err=flux_err,
        group=group,
        quality=quality,
        magnitude=magnitude,
        flux_candidates=candidates,
        ignored_err=ignored_err if flux_err is None else (),
    )


def _header_hint(names: Sequence[str]) -> str:
    def numeric(text: str) -> bool:
        try:
            float(text)
        except ValueError:
            return False
        return True

    if names and all(numeric(str(n)) for n in names):
        return " (the first line looks like data: a header row naming the columns is required)"
    return ""


def _column_float(values: Any, name: str, where: str) -> np.ndarray:
    """One column as float64 (missing -> NaN), refusing non-numeric content by row."""
    import pandas as pd

    if isinstance(values, pd.Series):
        if pd.api.types.is_bool_dtype(values.dtype):
            raise FileFormatError(
                "invalid_type", f"{where}: column {name!r} is boolean, expected numbers"
            )
        if pd.api.types.is_numeric_dtype(values.dtype):
            return values.to_numpy(dtype=np.float64, na_value=np.nan)
        try:
            converted = pd.to_numeric(values, errors="coerce")
        except (TypeError, ValueError) as exc:
            raise FileFormatError(
                "invalid_type", f"{where}: column {name!r} is not numeric ({exc})"
            ) from exc
        bad = np.flatnonzero((converted.isna() & values.notna()).to_numpy())
        if bad.size:
            row = int(bad[0])
            raise FileFormatError(
                "invalid_type",
                f"{where}: column {name!r} holds {bad.size} non-numeric value(s), first "
                f"{values.iloc[row]!r} in data row {row + 1}",
            )
        return converted.to_numpy(dtype=np.float64, na_value=np.nan)
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise FileFormatError(
            "invalid_type",
            f"{where}: column {name!r} has shape {arr.shape}; expected one value per row",
        )
    if arr.dtype.kind not in "iuf":
        raise FileFormatError(
            "invalid_type", f"{where}: column {name!r} has dtype {arr.dtype}, expected numbers"
        )
    return arr.astype(np.float64)


def _raw_from_columns(
    get: Callable[[str], Any],
    n_rows: int,
    cols: _Columns,
    *,
    fmt: str,
    where: str,
    source: str,
    seg_id: str,
    extra_meta: Mapping[str, Any] | None = None,
    drop_nonfinite_time: bool = False,
    time_scale: float = 1.0,
) -> _Raw:
    """Pull the chosen columns, apply quality flags and magnitude conversion."""
    time = _column_float(get(cols.time), cols.time, where) * time_scale
    flux = _column_float(get(cols.flux), cols.flux, where)
    err = None if cols.flux_err is None else _column_float(get(cols.flux_err), cols.flux_err, where)
    groups = None
    if cols.group is not None:
        raw_groups = get(cols.group)
        to_numpy = getattr(raw_groups, "to_numpy", None)
        groups = np.asarray(to_numpy() if to_numpy is not None else raw_groups)
    keep = np.ones(n_rows, dtype=bool)
    if cols.quality is not None:
        quality = _column_float(get(cols.quality), cols.quality, where)
        keep &= quality == 0  # NaN quality counts as flagged
    n_quality = int(n_rows - keep.sum())
    n_time = 0
    if drop_nonfinite_time:
        bad_time = keep & ~np.isfinite(time)
        n_time = int(bad_time.sum())
        keep &= ~bad_time

    meta: dict[str, Any] = {
        "format": fmt,
        "time_col": cols.time,
        "flux_col": cols.flux,
        "flux_err_col": cols.flux_err,
        "group_col": cols.group,
        "quality_col": cols.quality,
        "n_rows_read": int(n_rows),
        "n_dropped_quality": n_quality,
        "n_dropped_nonfinite": n_time,
        "n_dropped_nonfinite_time": n_time,
        "flux_from_magnitude": cols.magnitude,
        "time_offset_bjd": None,
        "time_system": None,
        "time_label": None,
    }
    if len(cols.flux_candidates) > 1:
        meta["flux_candidates"] = cols.flux_candidates
    if cols.ignored_err:
        meta["ignored_error_columns"] = cols.ignored_err
    system = _TIME_SYSTEMS.get(cols.time.strip().lower())
    if system is not None:
        meta["time_label"], meta["time_offset_bjd"] = system
    meta.update(extra_meta or {})

    time, flux = time[keep], flux[keep]
    err = None if err is None else err[keep]
    groups = None if groups is None else groups[keep]
    if cols.magnitude:
        flux, err, reference = _magnitudes_to_flux(flux, err)
        meta["magnitude_col"] = cols.flux
        meta["magnitude_reference"] = reference
    context = f"{where} (time={cols.time!r}, flux={cols.flux!r})"
    return _Raw(time, flux, err, groups, seg_id, source, meta, context)


def _magnitudes_to_flux(
    mag: np.ndarray, mag_err: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray | None, float | None]:
    """Relative flux f = 10**(-0.4 (m - median m)) and its error 0.4 ln10 f sigma_m."""
    finite = np.isfinite(mag)
    if not finite.any():
        return mag, mag_err, None
    reference = float(np.median(mag[finite]))
    with np.errstate(over="ignore"):
        flux = np.power(10.0, -0.4 * (mag - reference))
    err = None if mag_err is None else _MAG_TO_REL_FLUX * flux * mag_err
    return flux, err, reference


def _finish(raw: _Raw | _JsonRaw, id: str | None) -> Segment:
    """Validate one raw segment (``id`` overrides its own id)."""
    return raw.build(id)


# --------------------------------------------------------------------------------------------
# Tables: CSV and Parquet
# --------------------------------------------------------------------------------------------


def _sniff_separator(path: Path) -> str:
    opener = gzip.open if path.name.lower().endswith(".gz") else open
    try:
        with opener(path, "rb") as handle:
            head = handle.read(65536)
    except (OSError, EOFError) as exc:
        raise FileFormatError("unreadable_file", f"{path.name!r} cannot be read: {exc}") from exc
    for line in head.decode("utf-8", errors="replace").splitlines():
        text = line.strip()
        if not text or text.startswith("#"):
            continue
        for sep in (",", "\t", ";"):
            if sep in text:
                return sep
        return r"\s+"
    raise FileFormatError(
        "empty_file", f"{path.name!r} has no header row (only blank or comment lines)"
    )


def _read_csv(path: Path, opts: _Options) -> list[_Raw]:
    import pandas as pd

    sep = _sniff_separator(path)
    try:
        frame = pd.read_csv(path, sep=sep, comment="#", skipinitialspace=True, low_memory=False)
    except pd.errors.EmptyDataError as exc:
        raise FileFormatError("empty_file", f"{path.name!r} holds no table: {exc}") from exc
    except Exception as exc:  # ParserError, UnicodeDecodeError, OSError...
        raise FileFormatError(
            "unreadable_file", f"{path.name!r} cannot be parsed as CSV: {exc}"
        ) from exc
    return _raws_from_frame(frame, opts, path, "csv")


def _read_parquet(path: Path, opts: _Options) -> list[_Raw]:
    import pandas as pd

    try:
        frame = pd.read_parquet(path)
    except Exception as exc:  # pyarrow ArrowInvalid, OSError...
        raise FileFormatError(
            "unreadable_file", f"{path.name!r} cannot be read as Parquet: {exc}"
        ) from exc
    return _raws_from_frame(frame, opts, path, "parquet")


def _raws_from_frame(frame: Any, opts: _Options, path: Path, fmt: str) -> list[_Raw]:
    frame = frame.rename(columns=lambda c: str(c).strip())
    if len(frame) == 0:
        raise FileFormatError(
            "empty_file", f"{path.name!r} has no data rows (columns: {list(frame.columns)})"
        )
    names = [str(c) for c in frame.columns]
    id_hits = [n for n in names if n.lower() == _SEGMENT_ID]
    if len(id_hits) > 1:
        raise FileFormatError(
            "ambiguous_columns", f"{path.name!r}: columns {id_hits} differ only in letter case"
        )
    stem = _stem(path)
    if not id_hits:
        cols = _resolve_columns(names, opts, path.name)
        raw = _raw_from_columns(
            frame.__getitem__,
            len(frame),
            cols,
            fmt=fmt,
            where=path.name,
            source=path.name,
            seg_id=stem,
        )
        return [raw]

    id_col = id_hits[0]
    cols = _resolve_columns([n for n in names if n != id_col], opts, path.name)
    ids = frame[id_col]
    missing = np.flatnonzero(ids.isna().to_numpy())
    if missing.size:
        raise FileFormatError(
            "invalid_segment_id",
            f"{path.name!r}: {missing.size} row(s) have no {id_col!r} (first at data row "
            f"{int(missing[0]) + 1})",
        )
    raws = []
    for seg_id, sub in frame.groupby(id_col, sort=False):
        label = str(seg_id)
        where = f"{path.name} segment {label!r}"
        raw = _raw_from_columns(
            sub.__getitem__,
            len(sub),
            cols,
            fmt=fmt,
            where=where,
            source=path.name,
            seg_id=label,
            extra_meta={"segment_id_col": id_col},
        )
        if raw.flux_err is not None and not np.isfinite(raw.flux_err).any():
            # a long table shares one flux_err column: a segment without errors has it empty,
            # which means "estimate them", as an absent column does
            raw = dataclasses.replace(raw, flux_err=None)
        raws.append(raw)
    return raws


# --------------------------------------------------------------------------------------------
# JSON
# --------------------------------------------------------------------------------------------


def _read_json(path: Path, opts: _Options) -> list[_JsonRaw]:
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise FileFormatError("unreadable_file", f"{path.name!r} is not UTF-8 text: {exc}") from exc
    if not text.strip():
        raise FileFormatError("empty_file", f"{path.name!r} holds only whitespace")
    try:
        obj = json.loads(text)
    except json.JSONDecodeError as exc:
        raise FileFormatError(
            "unreadable_file",
            f"{path.name!r} is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})",
        ) from exc
    except (RecursionError, ValueError) as exc:
        raise FileFormatError("unreadable_file", f"{path.name!r} cannot be parsed: {exc}") from exc

    if isinstance(obj, Mapping):
        items = [obj]
    elif isinstance(obj, list):
        if not obj:
            raise FileFormatError("empty_file", f"{path.name!r} holds an empty list")
        items = obj
    else:
        raise FileFormatError(
            "invalid_type",
            f"{path.name!r}: the top level must be an object or a list of objects; got "
            f"{type(obj).__name__}",
        )
    keys = (opts.time_col or "time", opts.flux_col or "flux", opts.flux_err_col or "flux_err")
    stem = _stem(path)
    raws: list[_JsonRaw] = []
    for i, item in enumerate(items):
        where = path.name if len(items) == 1 else f"{path.name} item {i}"
        default_id = stem if len(items) == 1 else f"{stem}-{i}"
        raws.append(_JsonRaw(item, keys, opts, where, default_id, path.name))
    ids = [r.id for r in raws]
    duplicates = sorted({x for x in ids if ids.count(x) > 1})
    if duplicates:
        raise FileFormatError(
            "duplicate_segment_ids", f"{path.name!r}: segment ids {duplicates} occur more than once"
        )
    return raws


class _JsonRaw:
    """A JSON object awaiting validation (the JSON counterpart of :class:`_Raw`)."""

    __slots__ = ("context", "default_id", "id", "item", "keys", "opts", "source")

    def __init__(
        self,
        item: Any,
        keys: tuple[str, str, str],
        opts: _Options,
        where: str,
        default_id: str,
        source: str,
    ) -> None:
        if not isinstance(item, Mapping):
            raise FileFormatError(
                "invalid_type",
                f"{where}: expected an object with time and flux; got {type(item).__name__}",
            )
        if opts.flux_err_col is not None and opts.flux_err_col not in item:
            raise FileFormatError(
                "missing_columns",
                f"{where}: no key {opts.flux_err_col!r} (flux_err_col); keys found: "
                f"{sorted(map(str, item))}",
            )
        item_id = item.get("id", default_id)
        self.item, self.keys, self.opts = item, keys, opts
        self.context, self.source, self.default_id = where, source, default_id
        self.id = item_id if isinstance(item_id, str) and item_id else default_id

    def build(self, id: str | None) -> Segment:
        meta = {
            "format": "json",
            "time_col": self.keys[0],
            "flux_col": self.keys[1],
            "flux_err_col": self.keys[2] if self.item.get(self.keys[2]) is not None else None,
            "group_col": self.opts.group_col,
            "quality_col": None,
            "time_offset_bjd": None,
            "time_system": None,
            "time_label": None,
        }
        try:
            return _mapping_to_segment(
                self.item,
                id=id,
                default_id=self.default_id,
                source=self.source,
                keys=self.keys,
                group_key=self.opts.group_col,
                meta=meta,
            )
        except SegmentError as exc:
            cls = FileFormatError if exc.code == "missing_columns" else SegmentError
            raise cls(exc.code, f"{self.context}: {exc.detail}") from exc


# --------------------------------------------------------------------------------------------
# FITS
# --------------------------------------------------------------------------------------------


def _read_fits(path: Path, opts: _Options) -> list[_Raw]:
    from astropy.io import fits

    # astropy reports damaged headers and truncation as warnings and carries on; collect them so
    # that a failure can say why, and pass them on through logging.
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            with fits.open(path, memmap=False, checksum=False) as hdul:
                raw = _raw_from_hdul(hdul, fits, opts, path)
        except DipshapeError as exc:
            damage = _fits_damage(caught)
            if damage and exc.code in {"missing_columns", "empty_file"}:
                raise FileFormatError(
                    "unreadable_file", f"{path.name!r} is damaged ({damage}); {exc.detail}"
                ) from exc
            raise
        except Exception as exc:  # OSError "empty or corrupt", VerifyError, truncated data...
            damage = _fits_damage(caught)
            hint = f" ({damage})" if damage else ""
            raise FileFormatError(
                "unreadable_file", f"{path.name!r} cannot be read as FITS: {exc}{hint}"
            ) from exc
    for message in dict.fromkeys(str(w.message).splitlines()[0] for w in caught):
        logger.warning("%s: %s", path.name, message)
    return [raw]


def _fits_damage(caught: Sequence[warnings.WarningMessage]) -> str:
    """First astropy warning that signals a damaged file (truncation, invalid header)."""
    for w in caught:
        text = " ".join(str(w.message).split())
        if "truncated" in text or "Error validating header" in text:
            return text[:200]
    return ""


def _raw_from_hdul(hdul: Any, fits: Any, opts: _Options, path: Path) -> _Raw:
    tables = [(i, h) for i, h in enumerate(hdul) if isinstance(h, fits.BinTableHDU)]
    wanted = (opts.time_col,) if opts.time_col else ("time", "t")
    chosen = None
    for index, hdu in tables:
        lowered = [n.lower() for n in hdu.columns.names]
        if any(w.lower() in lowered for w in wanted):
            chosen = (index, hdu)
            break
    if chosen is None:
        listing = "; ".join(f"{h.name or i}: {list(h.columns.names)}" for i, h in tables)
        others = ", ".join(f"{h.name or i} ({type(h).__name__})" for i, h in enumerate(hdul))
        raise FileFormatError(
            "missing_columns",
            f"{path.name!r}: no binary table with a time column ({' or '.join(wanted)}); "
            f"tables found: {listing or 'none'}; HDUs: {others}",
        )
    index, hdu = chosen
    extname = hdu.name or str(index)
    where = f"{path.name}[{extname}]"
    names = list(hdu.columns.names)
    n_rows = int(hdu.header.get("NAXIS2", 0))
    if n_rows == 0:
        raise FileFormatError("empty_file", f"{where}: the table has no rows")
    cols = _resolve_columns(names, opts, where)
    data = hdu.data
    header, primary = hdu.header, hdul[0].header

    def card(key: str) -> Any:
        return header.get(key, primary.get(key))

    refi, reff = card("BJDREFI"), card("BJDREFF")
    offset = None
    if refi is not None or reff is not None:
        offset = float(refi or 0) + float(reff or 0.0)
    unit_text = card("TIMEUNIT")
    scale = _time_unit_to_days(unit_text, where)
    extra: dict[str, Any] = {
        "hdu": extname,
        "time_offset_bjd": offset,
        "time_system": card("TIMESYS"),
        "time_unit": unit_text,
        "time_ref": card("TIMEREF"),
        "time_label": _column_unit(hdu, cols.time),
        "telescope": primary.get("TELESCOP"),
    }
    if scale != 1.0:
        extra["time_unit_converted_to"] = "d"

    def get(name: str) -> np.ndarray:
        return np.array(data[name])  # a copy: safe after the file closes

    return _raw_from_columns(
        get,
        n_rows,
        cols,
        fmt="fits",
        where=where,
        source=path.name,
        seg_id=_stem(path),
        extra_meta=extra,
        drop_nonfinite_time=True,
        time_scale=scale,
    )


def _column_unit(hdu: Any, name: str) -> str | None:
    """TUNITn of a FITS column (e.g. 'BJD - 2457000, days'), or None."""
    for column in hdu.columns:
        if column.name == name:
            return None if column.unit is None else str(column.unit)
    return None


def _time_unit_to_days(unit_text: Any, where: str) -> float:
    if unit_text is None or str(unit_text).strip().lower() in {"d", "day", "days"}:
        return 1.0
    from astropy import units as u

    try:
        return float(u.Unit(str(unit_text).strip()).to(u.day))
    except Exception as exc:  # unparseable or not a time unit
        raise FileFormatError(
            "unsupported_time_unit",
            f"{where}: TIMEUNIT={unit_text!r} is not a time unit convertible to days",
        ) from exc


_READERS: Mapping[str, Callable[[Path, _Options], Sequence[_Raw | _JsonRaw]]] = {
    "csv": _read_csv,
    "json": _read_json,
    "fits": _read_fits,
    "parquet": _read_parquet,
}
