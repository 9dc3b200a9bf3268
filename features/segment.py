"""The validated light-curve segment every other part of dipshape works on.

A :class:`Segment` is one stretch of photometry of one star: time in days (strictly increasing),
flux normalised by its median, and a per-point flux uncertainty on the same scale. It is frozen and
its arrays are read-only, so a segment handed to feature code, the classifier or the REST service
cannot be changed behind anyone's back.

:func:`make_segment` is the one validator. Readers (:mod:`features.io`), the REST service and the
Python API all go through it, so every input is checked by the same rules and fails with the same
stable error codes (see :mod:`features.errors`):

===========================  ==========================================================
code                         raised when
===========================  ==========================================================
``invalid_type``             an array holds strings, booleans, nested lists, objects...
``invalid_shape``            an array is not one-dimensional
``invalid_unit``             an astropy Quantity with a unit that cannot be converted
``invalid_id``               ``id`` is not a non-empty string
``invalid_groups``           a group label is missing (None / NaN) or of an unusable type
``length_mismatch``          time, flux, flux_err and groups differ in length
``non_finite_time``          time is NaN/inf where the flux is finite (corrupt time column)
``non_finite_flux_err``      flux_err was given but is non-finite wherever flux is finite
``too_few_points``           fewer than :data:`MIN_POINTS` usable points remain
``duplicate_times``          two points share a time stamp
``non_positive_flux_err``    a flux_err value is zero or negative
``constant_flux``            the flux does not vary at all
``non_positive_flux``        the median flux (of the segment or of a group) is <= 0
``out_of_range``             values so extreme that normalising overflows float64
===========================  ==========================================================
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np

from features.errors import SegmentError

__all__ = ["MIN_POINTS", "Segment", "make_segment", "segment_from_mapping"]

logger = logging.getLogger(__name__)

#: Fewest usable points a segment may have. Below this no dip shape can be measured.
MIN_POINTS = 20

#: 1 / Phi^-1(3/4): makes the median absolute deviation a consistent estimator of the standard
#: deviation of a Gaussian (Rousseeuw & Croux 1993, eq. 1; Hampel 1974).
_MAD_TO_SIGMA = 1.482602218505602

_MINUTES_PER_DAY = 1440.0


# --------------------------------------------------------------------------------------------
# The Segment type
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True, eq=False, repr=False)
class Segment:
    """One validated, normalised light-curve segment (immutable).

    Build it with :func:`make_segment` (or a reader in :mod:`features.io`), which validates and
    normalises; constructing it directly only checks the structural invariants below.

    Parameters
    ----------
    time : ndarray of float64, shape (n,)
        Time stamps in days, finite and strictly increasing. The zero point is the file's own
        (e.g. BJD - 2457000); see ``meta["time_offset_bjd"]``.
    flux : ndarray of float64, shape (n,)
        Flux divided by its median (per group when groups were given): dimensionless, ~1.
    flux_err : ndarray of float64, shape (n,)
        One-sigma flux uncertainty on the same scale as ``flux``; finite and > 0.
    id : str
        Identifier of the segment (non-empty).
    cadence_min : float
        Median time step in minutes.
    source : str, optional
        File name the data came from, or ``"array"``.
    flux_err_estimated : bool, optional
        True when ``flux_err`` was estimated from the scatter rather than given.
    meta : Mapping[str, Any], optional
        Provenance: columns used, rows read and dropped, time system, group medians... Stored as
        a read-only mapping; :meth:`meta_dict` returns a plain, JSON-ready copy.

    Raises
    ------
    SegmentError
        When the arrays break the invariants (codes ``invalid_shape``, ``length_mismatch``,
        ``non_finite_time``, ``duplicate_times``, ``non_positive_flux_err``, ``invalid_id``).

    Notes
    -----
    Arrays are copied on construction and marked read-only (``setflags(write=False)``). Two
    segments compare equal when their id, arrays (exactly), cadence and ``flux_err_estimated``
    agree; ``source`` and ``meta`` are provenance and do not take part. Segments are unhashable.

    Examples
    --------
    >>> import numpy as np
    >>> seg = make_segment(np.arange(30) * 0.02, 1000.0 + np.sin(np.arange(30.0)), id="demo-1")
    >>> seg.n_points, round(seg.cadence_min, 6), seg.flux.flags.writeable
    (30, 28.8, False)
    """

    time: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray
    id: str
    cadence_min: float
    source: str = "array"
    flux_err_estimated: bool = False
    meta: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if not isinstance(self.id, str) or not self.id:
            raise SegmentError("invalid_id", f"id must be a non-empty string; got {self.id!r}")
        arrays = {}
        for name in ("time", "flux", "flux_err"):
            arr = np.array(getattr(self, name), dtype=np.float64)
            if arr.ndim != 1:
                raise SegmentError(
                    "invalid_shape", f"{name} must be one-dimensional; got shape {arr.shape}"
                )
            arrays[name] = arr
        n = arrays["time"].size
        if arrays["flux"].size != n or arrays["flux_err"].size != n:
            raise SegmentError(
                "length_mismatch",
                f"time, flux and flux_err must have equal lengths; got {n}, "
                f"{arrays['flux'].size} and {arrays['flux_err'].size}",
            )
        for name, arr in arrays.items():
            if not np.all(np.isfinite(arr)):
                code = "non_finite_time" if name == "time" else f"non_finite_{name}"
                raise SegmentError(code, f"{name} must be finite everywhere in a Segment")
        steps = np.diff(arrays["time"])
        if np.any(steps <= 0):
            code = "duplicate_times" if np.any(steps == 0) else "unsorted_time"
            raise SegmentError(code, "time must be strictly increasing in a Segment")
        if np.any(arrays["flux_err"] <= 0):
            raise SegmentError("non_positive_flux_err", "flux_err must be > 0 in a Segment")
        for name, arr in arrays.items():
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        object.__setattr__(self, "cadence_min", float(self.cadence_min))
        object.__setattr__(self, "source", str(self.source))
        object.__setattr__(self, "flux_err_estimated", bool(self.flux_err_estimated))
        object.__setattr__(self, "meta", _freeze(dict(self.meta)))

    @property
    def n_points(self) -> int:
        """Number of points in the segment."""
        return int(self.time.size)

    @property
    def duration_days(self) -> float:
        """Time from the first to the last point, in days (0 for a single point)."""
        return float(self.time[-1] - self.time[0]) if self.time.size else 0.0

    def meta_dict(self) -> dict[str, Any]:
        """Return ``meta`` as a plain, mutable, JSON-ready ``dict`` (a deep copy)."""
        return _thaw(self.meta)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Segment):
            return NotImplemented
        return (
            self.id == other.id
            and self.cadence_min == other.cadence_min
            and self.flux_err_estimated == other.flux_err_estimated
            and np.array_equal(self.time, other.time)
            and np.array_equal(self.flux, other.flux)
            and np.array_equal(self.flux_err, other.flux_err)
        )

    __hash__ = None  # type: ignore[assignment]  # value equality over arrays: unhashable

    def __repr__(self) -> str:
        return (
            f"Segment(id={self.id!r}, n_points={self.n_points}, "
            f"duration_days={self.duration_days:.4g}, cadence_min={self.cadence_min:.4g}, "
            f"source={self.source!r}, flux_err_estimated={self.flux_err_estimated})"
        )

    def __reduce__(self) -> tuple[Any, tuple[Any, ...]]:
        # A read-only mapping proxy cannot be pickled: rebuild from plain values (and re-check).
        return (
            Segment,
            (
                self.time,
                self.flux,
                self.flux_err,
                self.id,
                self.cadence_min,
                self.source,
                self.flux_err_estimated,
                _thaw(self.meta),
            ),
        )


def _freeze(value: Any) -> Any:
    """Recursively turn mappings into read-only proxies and sequences into tuples."""
    if isinstance(value, Mapping):
        return MappingProxyType({str(k): _freeze(v) for k, v in value.items()})
    if isinstance(value, (list, tuple, set, frozenset)):
        items = sorted(value, key=str) if isinstance(value, (set, frozenset)) else value
        return tuple(_freeze(v) for v in items)
    if isinstance(value, np.ndarray):
        return tuple(_freeze(v) for v in value.tolist())
    if isinstance(value, np.generic):
        return value.item()
    return value


def _thaw(value: Any) -> Any:
    """Inverse of :func:`_freeze`: plain dicts and lists."""
    if isinstance(value, Mapping):
        return {k: _thaw(v) for k, v in value.items()}
    if isinstance(value, tuple):
        return [_thaw(v) for v in value]
    return value


# --------------------------------------------------------------------------------------------
# Conversion of inputs
# --------------------------------------------------------------------------------------------

_NUMBER_TYPES = (int, float, np.integer, np.floating)


def _is_number_or_none(value: Any) -> bool:
    if value is None:
        return True
    return isinstance(value, _NUMBER_TYPES) and not isinstance(value, (bool, np.bool_))


def _numbers_to_float(values: Any, name: str) -> np.ndarray:
    """Convert a sequence of numbers / None (None -> NaN) to float64, naming any bad element."""
    seq = values.tolist() if isinstance(values, np.ndarray) else list(values)
    if not {type(v) for v in seq} <= {int, float, type(None)}:
        for i, v in enumerate(seq):
            if not _is_number_or_none(v):
                raise SegmentError(
                    "invalid_type",
                    f"{name}[{i}] is {type(v).__name__} {_short(v)}; expected a number "
                    "(or null for a missing point)",
                )
    try:
        return np.array(seq, dtype=np.float64)
    except (OverflowError, ValueError, TypeError) as exc:
        raise SegmentError("invalid_type", f"{name} cannot be converted to float64: {exc}") from exc


def _num(value: Any) -> str:
    """A number as plain text (``1.5``, not ``np.float64(1.5)``)."""
    return repr(float(value))


def _short(value: Any, limit: int = 40) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _strip_unit(x: Any, name: str, unit: Any) -> tuple[Any, Any]:
    """Return (plain values, unit) for an astropy Quantity, converting to ``unit`` if given."""
    x_unit = getattr(x, "unit", None)
    if x_unit is None or not hasattr(x, "to_value"):
        return x, None
    try:
        values = x.to_value(unit) if unit is not None else x.to_value()
    except Exception as exc:  # astropy UnitConversionError / UnitsError
        wanted = "days" if unit is not None and str(unit) == "d" else (unit or "a compatible unit")
        raise SegmentError(
            "invalid_unit", f"{name} has unit '{x_unit}', which cannot be converted to {wanted}"
        ) from exc
    return values, (unit if unit is not None else x_unit)


def _as_float_1d(x: Any, name: str) -> np.ndarray:
    """Coerce array-like ``x`` to a fresh 1-D float64 array (masked entries -> NaN)."""
    if x is None or isinstance(x, (str, bytes, Mapping)):
        raise SegmentError(
            "invalid_type", f"{name} must be a 1-D array of numbers; got {type(x).__name__}"
        )
    if np.ma.isMaskedArray(x):
        if x.dtype.kind not in "iuf":
            raise SegmentError("invalid_type", f"{name} must hold real numbers; got {x.dtype}")
        x = np.ma.filled(x.astype(np.float64), np.nan)
    try:
        arr = np.asarray(x)
    except (ValueError, TypeError) as exc:  # e.g. ragged nested lists
        if isinstance(x, (list, tuple)):
            return _numbers_to_float(x, name)  # names the offending element
        raise SegmentError(
            "invalid_type", f"{name} is not a 1-D array of numbers (ragged or nested?): {exc}"
        ) from exc
    if arr.ndim != 1:
        raise SegmentError(
            "invalid_shape", f"{name} must be one-dimensional; got shape {arr.shape}"
        )
    if arr.dtype.kind in "iuf":
        return arr.astype(np.float64, copy=True)
    if arr.dtype.kind == "O":
        return _numbers_to_float(arr, name)
    raise SegmentError("invalid_type", f"{name} must hold real numbers; got dtype {arr.dtype}")


def _group_labels(groups: Any, n_expected: int) -> np.ndarray:
    """Validate group labels and return them as a 1-D array usable by ``np.unique``."""
    if isinstance(groups, (str, bytes, Mapping)):
        raise SegmentError(
            "invalid_groups", f"groups must be a 1-D array of labels; got {type(groups).__name__}"
        )
    try:
        g = np.asarray(groups)
    except (ValueError, TypeError) as exc:
        raise SegmentError("invalid_groups", f"groups is not a 1-D array of labels: {exc}") from exc
    if g.ndim != 1:
        raise SegmentError("invalid_groups", f"groups must be one-dimensional; got shape {g.shape}")
    if g.size != n_expected:
        raise SegmentError(
            "length_mismatch", f"groups has {g.size} elements but time has {n_expected}"
        )
    if g.dtype.kind == "O":
        for i, v in enumerate(g.tolist()):
            if v is None or (isinstance(v, float) and not np.isfinite(v)):
                raise SegmentError("invalid_groups", f"groups[{i}] is missing ({v!r})")
            if not isinstance(v, (str, int, np.integer)) or isinstance(v, (bool, np.bool_)):
                raise SegmentError(
                    "invalid_groups",
                    f"groups[{i}] is {type(v).__name__} {_short(v)}; expected a string or integer",
                )
        return np.array([str(v) for v in g.tolist()])
    if g.dtype.kind not in "iufUSb":
        raise SegmentError("invalid_groups", f"groups has unusable dtype {g.dtype}")
    return g


def _label_text(label: Any) -> str:
    if isinstance(label, (float, np.floating)) and float(label).is_integer():
        return str(int(label))
    if isinstance(label, np.generic):
        return str(label.item())
    return str(label)


# --------------------------------------------------------------------------------------------
# Statistics
# --------------------------------------------------------------------------------------------


def _is_constant(flux: np.ndarray) -> bool:
    """True when the flux does not vary: peak-to-peak zero, or MAD and std both zero."""
    if np.ptp(flux) == 0.0:
        return True
    mad = np.median(np.abs(flux - np.median(flux)))
    return bool(mad == 0.0 and np.std(flux) == 0.0)


def _white_sigma_from_differences(
    flux: np.ndarray, group_index: np.ndarray | None
) -> tuple[float, str]:
    """Point-to-point white-noise sigma: 1.4826 MAD(diff) / sqrt(2); std fallback.

    Differences are taken between time-consecutive points of the same group. Returns
    (sigma, method).
    """
    if group_index is None:
        diffs = np.diff(flux)
    else:  # time order within each group: a stable sort by group keeps it
        order = np.argsort(group_index, kind="stable")
        index = group_index[order]
        diffs = np.diff(flux[order])[index[1:] == index[:-1]]
    if diffs.size == 0:
        raise SegmentError(
            "too_few_points",
            "cannot estimate flux_err: every group has a single point",
        )
    mad = np.median(np.abs(diffs - np.median(diffs)))
    sigma = _MAD_TO_SIGMA * mad / np.sqrt(2.0)
    if np.isfinite(sigma) and sigma > 0.0:
        return float(sigma), "mad_first_differences"
    sigma = np.std(diffs) / np.sqrt(2.0)
    logger.info(
        "MAD of first differences is zero (quantised flux?); flux_err from their std instead"
    )
    if not (np.isfinite(sigma) and sigma > 0.0):
        raise SegmentError(
            "constant_flux", "flux does not change between consecutive points of any group"
        )
    return float(sigma), "std_first_differences"


# --------------------------------------------------------------------------------------------
# The validator
# --------------------------------------------------------------------------------------------


def make_segment(
    time: Any,
    flux: Any,
    flux_err: Any = None,
    *,
    id: str = "segment",
    source: str = "array",
    meta: Mapping[str, Any] | None = None,
    groups: Any = None,
) -> Segment:
    """Validate and normalise time/flux arrays into a :class:`Segment`.

    Parameters
    ----------
    time : array_like, shape (n,)
        Time stamps in days (any zero point), or an astropy Quantity convertible to days.
    flux : array_like, shape (n,)
        Flux in any unit and scale (e-/s, relative...). NaN/inf/None mark missing points.
    flux_err : array_like, shape (n,), optional
        One-sigma flux uncertainty in the unit of ``flux``. When omitted it is estimated from
        the point-to-point scatter (see Notes) and ``flux_err_estimated`` is set.
    id : str, optional
        Identifier of the segment.
    source : str, optional
        File name the data came from, or ``"array"``.
    meta : Mapping, optional
        Provenance recorded by a reader. Counts already present (``n_dropped_nonfinite``) are
        added to; ``n_rows_read`` defaults to ``n``.
    groups : array_like, shape (n,), optional
        Labels (quarter, sector, season...). Each group is normalised by its own median.

    Returns
    -------
    Segment
        Sorted by time, flux normalised by its median, read-only arrays. ``meta`` records
        ``n_rows_read``, ``n_dropped_nonfinite`` (and its split into ``_flux``/``_flux_err``),
        ``resorted``, ``normalisation``, ``flux_median`` or ``groups_normalised`` /
        ``group_medians`` / ``group_n_points``, and ``flux_err_method``.

    Raises
    ------
    SegmentError
        With code ``invalid_type``, ``invalid_shape``, ``invalid_unit``, ``invalid_id``,
        ``invalid_groups``, ``length_mismatch``, ``non_finite_time``, ``non_finite_flux_err``,
        ``too_few_points``, ``duplicate_times``, ``non_positive_flux_err``, ``constant_flux``,
        ``non_positive_flux`` or ``out_of_range``; the detail names the argument and the value.

    Notes
    -----
    Steps, in order: coerce to 1-D float64; check lengths; drop rows whose flux (or given
    flux_err) is non-finite, refusing rows whose time is non-finite while the flux is finite;
    require :data:`MIN_POINTS` points; sort by time (stable) and refuse duplicate times; refuse
    flux_err <= 0, constant flux and a median flux <= 0; divide flux and flux_err by the
    median (per group). A missing flux_err is estimated as one constant,

    .. math:: \\sigma = 1.4826\\,\\mathrm{MAD}(\\Delta f) / \\sqrt{2},

    where :math:`\\Delta f` are first differences of the normalised flux within a group: the
    difference of two independent points has variance :math:`2\\sigma^2`, slow trends cancel,
    and the MAD scaled by 1.4826 is a robust estimate of a Gaussian standard deviation
    (Rousseeuw & Croux 1993). This is common practice for white-noise estimates in photometry.
    If the MAD is zero (heavily quantised flux) the standard deviation of the differences is
    used instead.

    Examples
    --------
    >>> import numpy as np
    >>> t = np.linspace(0.0, 2.0, 50)
    >>> f = 5000.0 * (1.0 + 1e-3 * np.cos(7.0 * t))
    >>> seg = make_segment(t[::-1], f[::-1], id="demo-2")
    >>> bool(np.all(np.diff(seg.time) > 0)), float(np.median(seg.flux))
    (True, 1.0)
    >>> seg.flux_err_estimated
    True
    """
    if not isinstance(id, str) or not id:
        raise SegmentError("invalid_id", f"id must be a non-empty string; got {id!r}")
    time, _ = _strip_unit(time, "time", _day_unit() if hasattr(time, "unit") else None)
    flux, flux_unit = _strip_unit(flux, "flux", None)
    if flux_err is not None:
        if flux_unit is None and getattr(flux_err, "unit", None) is not None:
            raise SegmentError(
                "invalid_unit",
                f"flux_err has unit '{flux_err.unit}' but flux has none; give both or neither",
            )
        flux_err, _ = _strip_unit(flux_err, "flux_err", flux_unit)
    t = _as_float_1d(time, "time")
    f = _as_float_1d(flux, "flux")
    e = None if flux_err is None else _as_float_1d(flux_err, "flux_err")

    lengths = {"time": t.size, "flux": f.size}
    if e is not None:
        lengths["flux_err"] = e.size
    if len(set(lengths.values())) > 1:
        listing = ", ".join(f"{k} has {v}" for k, v in lengths.items())
        raise SegmentError("length_mismatch", f"arrays must have equal lengths: {listing}")
    n_in = t.size
    g = None if groups is None else _group_labels(groups, n_in)

    info: dict[str, Any] = dict(meta or {})
    info.setdefault("n_rows_read", n_in)
    info.setdefault("n_dropped_quality", 0)
    upstream = int(info.get("n_dropped_nonfinite", 0))

    # --- missing points --------------------------------------------------------------------
    finite_f = np.isfinite(f)
    keep = finite_f.copy()
    n_bad_err = 0
    if e is not None:
        finite_e = np.isfinite(e)
        if finite_f.any() and not np.any(finite_f & finite_e):
            raise SegmentError(
                "non_finite_flux_err",
                f"flux_err is non-finite at all {int(finite_f.sum())} points where flux is "
                "finite; pass flux_err=None to have it estimated from the scatter",
            )
        keep &= finite_e
        n_bad_err = int(np.count_nonzero(finite_f & ~finite_e))
    bad_time = keep & ~np.isfinite(t)
    if bad_time.any():
        first = int(np.flatnonzero(bad_time)[0])
        raise SegmentError(
            "non_finite_time",
            f"time is non-finite at {int(bad_time.sum())} rows where flux is finite (first at "
            f"row {first}: time={_num(t[first])}, flux={_num(f[first])}); a corrupt time column is "
            "refused rather than guessed",
        )
    n_bad_flux = int(n_in - finite_f.sum())
    t, f = t[keep], f[keep]
    e = None if e is None else e[keep]
    if g is not None:
        g = g[keep]
    n = t.size
    info["n_dropped_nonfinite_flux"] = int(info.get("n_dropped_nonfinite_flux", 0)) + n_bad_flux
    info["n_dropped_nonfinite_flux_err"] = n_bad_err
    info["n_dropped_nonfinite"] = upstream + n_bad_flux + n_bad_err
    if g is not None and g.dtype.kind == "f" and not np.all(np.isfinite(g)):
        first = int(np.flatnonzero(~np.isfinite(g))[0])
        raise SegmentError(
            "invalid_groups",
            f"group label is missing (NaN) at kept point {first} (time {_num(t[first])})",
        )

    if n < MIN_POINTS:
        reasons = [f"{n_bad_flux} with non-finite flux"]
        if e is not None:
            reasons.append(f"{n_bad_err} with non-finite flux_err")
        if upstream:
            reasons.append(f"{upstream} non-finite before validation")
        if info["n_dropped_quality"]:
            reasons.append(f"{info['n_dropped_quality']} flagged by quality")
        raise SegmentError(
            "too_few_points",
            f"{n} usable points left of {info['n_rows_read']} rows read "
            f"(dropped: {', '.join(reasons)}); at least MIN_POINTS={MIN_POINTS} are needed",
        )

    # --- order -----------------------------------------------------------------------------
    resorted = bool(np.any(np.diff(t) < 0))
    if resorted:
        order = np.argsort(t, kind="stable")
        t, f = t[order], f[order]
        e = None if e is None else e[order]
        g = None if g is None else g[order]
    dup = np.diff(t) == 0
    if dup.any():
        first = float(t[1:][dup][0])
        raise SegmentError(
            "duplicate_times",
            f"time has {int(dup.sum())} duplicated value(s) (first at time={_num(first)} days); "
            "each point needs its own time stamp",
        )
    info["resorted"] = resorted

    # Huge or tiny values may overflow below: the results are checked for finiteness at the end.
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        # --- values ----------------------------------------------------------------------------
        if e is not None:
            nonpos = e <= 0
            if nonpos.any():
                first = int(np.flatnonzero(nonpos)[0])
                raise SegmentError(
                    "non_positive_flux_err",
                    f"flux_err must be > 0; {int(nonpos.sum())} value(s) are <= 0 (first "
                    f"flux_err={_num(e[first])} at time={_num(t[first])})",
                )
        if _is_constant(f):
            raise SegmentError(
                "constant_flux", f"flux is constant (every one of {n} points equals {_num(f[0])})"
            )

        # --- normalisation ---------------------------------------------------------------------
        group_index = None
        if g is None:
            median = float(np.median(f))
            if not median > 0.0:
                raise SegmentError(
                    "non_positive_flux",
                    f"median flux is {_num(median)} (<= 0): it cannot be normalised; flux must be "
                    "positive (e.g. not a background-subtracted difference)",
                )
            scale = np.full(n, median)
            info["normalisation"] = "median"
            info["flux_median"] = median
        else:
            labels, group_index = np.unique(g, return_inverse=True)
            medians = np.empty(labels.size)
            counts = np.bincount(group_index, minlength=labels.size)
            for k in range(labels.size):
                medians[k] = np.median(f[group_index == k])
            label_text = [_label_text(v) for v in labels]
            bad = np.flatnonzero(~(medians > 0.0))
            if bad.size:
                k = int(bad[0])
                raise SegmentError(
                    "non_positive_flux",
                    f"median flux of group {label_text[k]!r} is {_num(medians[k])} (<= 0): it "
                    "cannot be normalised",
                )
            scale = medians[group_index]
            info["normalisation"] = "median_per_group"
            info["groups_normalised"] = tuple(label_text)
            info["group_medians"] = tuple(float(m) for m in medians)
            info["group_n_points"] = tuple(int(c) for c in counts)
        f = f / scale
        if not np.all(np.isfinite(f)):
            raise SegmentError(
                "out_of_range",
                f"flux spans too many orders of magnitude for float64: dividing by the median "
                f"{_num(np.min(scale))} overflows",
            )
        if group_index is not None and _is_constant(f):
            raise SegmentError(
                "constant_flux",
                "flux is constant within every group (nothing left after normalising)",
            )

        if e is not None:
            e = e / scale
            estimated = False
            info["flux_err_method"] = "given"
        else:
            sigma, method = _white_sigma_from_differences(f, group_index)
            e = np.full(n, sigma)
            estimated = True
            info["flux_err_method"] = method

        cadence_min = float(np.median(np.diff(t))) * _MINUTES_PER_DAY
    if not (np.all(np.isfinite(e)) and np.isfinite(cadence_min)):
        raise SegmentError(
            "out_of_range",
            "flux_err or the time steps are too large for float64 arithmetic "
            f"(flux_err up to {_num(np.max(e))}, cadence {_num(cadence_min)} min)",
        )
    return Segment(
        time=t,
        flux=f,
        flux_err=e,
        id=id,
        cadence_min=cadence_min,
        source=source,
        flux_err_estimated=estimated,
        meta=info,
    )


def _day_unit() -> Any:
    from astropy import units as u  # only needed when a Quantity comes in

    return u.day


# --------------------------------------------------------------------------------------------
# JSON-like mappings
# --------------------------------------------------------------------------------------------


def _mapping_to_segment(
    obj: Any,
    *,
    id: str | None,
    default_id: str,
    source: str,
    keys: tuple[str, str, str] = ("time", "flux", "flux_err"),
    group_key: str | None = None,
    meta: Mapping[str, Any] | None = None,
) -> Segment:
    """Shared core of :func:`segment_from_mapping` and the JSON reader."""
    if not isinstance(obj, Mapping):
        raise SegmentError(
            "invalid_type",
            f"a segment must be a JSON object (mapping) with 'time' and 'flux'; got "
            f"{type(obj).__name__}",
        )
    time_key, flux_key, err_key = keys
    wanted = [time_key, flux_key] + ([group_key] if group_key else [])
    missing = [k for k in wanted if k not in obj]
    if missing:
        found = sorted(str(k) for k in obj)
        raise SegmentError(
            "missing_columns",
            f"segment object lacks {', '.join(repr(k) for k in missing)}; keys found: {found}",
        )
    seg_id = id
    if seg_id is None:
        seg_id = obj.get("id", default_id)
        if not isinstance(seg_id, str) or not seg_id:
            raise SegmentError(
                "invalid_type", f"'id' must be a non-empty string; got {_short(seg_id)}"
            )
    arrays = {}
    for key in (time_key, flux_key, err_key):
        value = obj.get(key)
        if value is None:
            if key == err_key:
                arrays[key] = None
                continue
            raise SegmentError("invalid_type", f"{key!r} is null; expected a list of numbers")
        if isinstance(value, np.ndarray) and value.ndim == 1 and value.dtype.kind in "iuf":
            arrays[key] = value.astype(np.float64)
            continue
        if not isinstance(value, (list, tuple, np.ndarray)):
            raise SegmentError(
                "invalid_type",
                f"{key!r} must be a list of numbers; got {type(value).__name__} {_short(value)}",
            )
        arrays[key] = _numbers_to_float(value, key)
    groups = None
    if group_key:
        groups = obj[group_key]
        if not isinstance(groups, (list, tuple, np.ndarray)):
            raise SegmentError(
                "invalid_groups",
                f"{group_key!r} must be a list of labels; got {type(groups).__name__}",
            )
    return make_segment(
        arrays[time_key],
        arrays[flux_key],
        arrays[err_key],
        id=seg_id,
        source=source,
        meta=meta,
        groups=groups,
    )


def segment_from_mapping(obj: Mapping[str, Any], *, id: str | None = None) -> Segment:
    """Build a :class:`Segment` from a JSON-like object.

    Parameters
    ----------
    obj : Mapping
        ``{"id"?: str, "time": [days...], "flux": [...], "flux_err"?: [...]}``. ``null``
        (None) entries in ``flux``/``flux_err`` are missing points and are dropped like NaN;
        a ``null`` or absent ``flux_err`` means "estimate it". Other keys are ignored.
    id : str, optional
        Overrides ``obj["id"]``; when both are absent the id is ``"segment"``.

    Returns
    -------
    Segment
        Validated by :func:`make_segment` (``source="array"``).

    Raises
    ------
    SegmentError
        ``missing_columns`` when ``time`` or ``flux`` is absent (the detail lists the keys
        found); ``invalid_type`` when ``obj`` is not a mapping, a value is not a list, or an
        element is a string, boolean, list or object (the detail gives key and index); and
        every code of :func:`make_segment`.

    Examples
    --------
    >>> obj = {"id": "demo-3", "time": [0.1 * i for i in range(25)],
    ...        "flux": [100.0 + (i % 3) for i in range(24)] + [None]}
    >>> seg = segment_from_mapping(obj)
    >>> seg.id, seg.n_points, seg.meta["n_dropped_nonfinite"]
    ('demo-3', 24, 1)
    """
    return _mapping_to_segment(obj, id=id, default_id="segment", source="array")
