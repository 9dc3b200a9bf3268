"""Tests of features.segment: the Segment type, make_segment and segment_from_mapping."""

from __future__ import annotations

import copy
import dataclasses
import json
import pickle

import numpy as np
import pytest
from astropy import units as u
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

from features.errors import DipshapeError, SegmentError
from features.segment import MIN_POINTS, Segment, make_segment, segment_from_mapping

TWO_MIN_DAYS = 2.0 / 1440.0


def _clean(n: int = 50, *, seed: int = 0, level: float = 1000.0, sigma: float = 1.0):
    """Evenly sampled (2-min) time, noisy flux around ``level`` and a constant error."""
    rng = np.random.default_rng(seed)
    time = 100.0 + TWO_MIN_DAYS * np.arange(n)
    flux = level + rng.normal(0.0, sigma, n)
    flux_err = np.full(n, sigma)
    return time, flux, flux_err


def _with(array: np.ndarray, index: int | slice, value: float) -> np.ndarray:
    out = np.array(array, dtype=float)
    out[index] = value
    return out


# --------------------------------------------------------------------------------------------
# Failure modes of make_segment: (arguments, code, message regex)
# --------------------------------------------------------------------------------------------

T, F, E = _clean()


def _dup_time() -> np.ndarray:
    t = T.copy()
    t[10] = t[9]
    t[30] = t[29]
    return t


BAD_ARRAYS = [
    pytest.param(
        dict(time=T, flux=F[:-1]), "length_mismatch", r"time has 50, flux has 49", id="len-flux"
    ),
    pytest.param(
        dict(time=T, flux=F, flux_err=E[:10]), "length_mismatch", r"flux_err has 10", id="len-err"
    ),
    pytest.param(
        dict(time=T, flux=F, groups=np.zeros(3)),
        "length_mismatch",
        r"groups has 3",
        id="len-groups",
    ),
    pytest.param(
        dict(time=T, flux=F.astype(str)),
        "invalid_type",
        r"flux must hold real numbers",
        id="str-array",
    ),
    pytest.param(
        dict(time=T, flux=F > 1000),
        "invalid_type",
        r"flux must hold real numbers.*bool",
        id="bool-array",
    ),
    pytest.param(
        dict(time=T, flux=F + 1j),
        "invalid_type",
        r"flux must hold real numbers.*complex",
        id="complex",
    ),
    pytest.param(
        dict(time=T, flux=[*F[:5], "x", *F[6:]]), "invalid_type", r"flux", id="str-in-list"
    ),
    pytest.param(
        dict(time=T, flux=np.array([*F[:3], "x"], dtype=object)),
        "invalid_type",
        r"flux\[3\] is str",
        id="str-in-object",
    ),
    pytest.param(
        dict(time=T, flux=[[1.0, 2.0], [3.0]]), "invalid_type", r"flux\[0\] is list", id="ragged"
    ),
    pytest.param(
        dict(time=None, flux=F),
        "invalid_type",
        r"time must be a 1-D array.*NoneType",
        id="time-none",
    ),
    pytest.param(
        dict(time="0,1,2", flux=F), "invalid_type", r"time must be a 1-D array.*str", id="time-str"
    ),
    pytest.param(dict(time={"a": 1}, flux=F), "invalid_type", r"time.*dict", id="time-dict"),
    pytest.param(
        dict(time=T.reshape(5, 10), flux=F),
        "invalid_shape",
        r"time must be one-dimensional; got shape \(5, 10\)",
        id="2d",
    ),
    pytest.param(dict(time=3.0, flux=F), "invalid_shape", r"shape \(\)", id="scalar"),
    pytest.param(dict(time=T, flux=F, id=""), "invalid_id", r"non-empty string", id="id-empty"),
    pytest.param(dict(time=T, flux=F, id=7), "invalid_id", r"got 7", id="id-int"),
    pytest.param(
        dict(time=_with(T, 3, np.nan), flux=F),
        "non_finite_time",
        r"1 rows where flux is finite \(first at row 3",
        id="nan-time",
    ),
    pytest.param(
        dict(time=_with(T, 7, np.inf), flux=F), "non_finite_time", r"row 7", id="inf-time"
    ),
    pytest.param(
        dict(time=T, flux=F, flux_err=np.full(50, np.nan)),
        "non_finite_flux_err",
        r"non-finite at all 50 points.*flux_err=None",
        id="err-all-nan",
    ),
    pytest.param(
        dict(time=T[:19], flux=F[:19]),
        "too_few_points",
        r"19 usable points left of 19 rows.*MIN_POINTS=20",
        id="19-points",
    ),
    pytest.param(
        dict(time=T, flux=_with(F, slice(0, 35), np.nan)),
        "too_few_points",
        r"15 usable points left of 50 rows read \(dropped: 35 with non-finite flux\)",
        id="mostly-nan",
    ),
    pytest.param(
        dict(time=T, flux=F, flux_err=_with(E, slice(0, 40), np.inf)),
        "too_few_points",
        r"10 usable.*0 with non-finite flux, 40 with non-finite flux_err",
        id="err-nan",
    ),
    pytest.param(
        dict(time=[], flux=[]), "too_few_points", r"0 usable points left of 0 rows", id="empty"
    ),
    pytest.param(
        dict(time=_dup_time(), flux=F),
        "duplicate_times",
        r"2 duplicated value\(s\) \(first at time=100\.0125",
        id="dup",
    ),
    pytest.param(
        dict(time=T, flux=F, flux_err=_with(E, 4, 0.0)),
        "non_positive_flux_err",
        r"1 value\(s\) are <= 0 \(first flux_err=0\.0",
        id="err-zero",
    ),
    pytest.param(
        dict(time=T, flux=F, flux_err=-E),
        "non_positive_flux_err",
        r"50 value\(s\)",
        id="err-negative",
    ),
    pytest.param(
        dict(time=T, flux=np.full(50, 7.0)),
        "constant_flux",
        r"every one of 50 points equals 7\.0",
        id="constant",
    ),
    pytest.param(dict(time=T, flux=np.zeros(50)), "constant_flux", r"constant", id="zeros"),
    pytest.param(
        dict(time=T, flux=F - 2000.0),
        "non_positive_flux",
        r"median flux is -\d+\.\d+ \(<= 0\)",
        id="negative",
    ),
    pytest.param(
        dict(time=T, flux=np.r_[F[:25], F[25:] - 2000.0], groups=np.repeat([1, 2], 25)),
        "non_positive_flux",
        r"group '2'",
        id="group-negative",
    ),
    pytest.param(
        dict(time=T, flux=np.r_[np.full(25, 3.0), np.full(25, 5.0)], groups=np.repeat([1, 2], 25)),
        "constant_flux",
        r"within every group",
        id="group-constant",
    ),
    pytest.param(
        dict(time=T, flux=F, groups=np.array([None, *range(49)], dtype=object)),
        "invalid_groups",
        r"groups\[0\] is missing",
        id="group-none",
    ),
    pytest.param(
        dict(time=T, flux=F, groups=_with(np.zeros(50), 5, np.nan)),
        "invalid_groups",
        r"missing \(NaN\)",
        id="group-nan",
    ),
    pytest.param(
        dict(time=T, flux=F, groups=np.array([1.5 + 0j] * 50)),
        "invalid_groups",
        r"unusable dtype",
        id="group-complex",
    ),
    pytest.param(
        dict(time=T * u.m, flux=F), "invalid_unit", r"time has unit 'm'.*days?", id="time-metres"
    ),
    pytest.param(
        dict(time=T, flux=F, flux_err=E * u.adu),
        "invalid_unit",
        r"flux_err has unit 'adu' but flux has none",
        id="err-unit-only",
    ),
    pytest.param(
        dict(time=T, flux=F * u.adu, flux_err=E * u.s),
        "invalid_unit",
        r"flux_err has unit 's'",
        id="err-unit-mismatch",
    ),
    pytest.param(
        dict(time=T, flux=np.r_[1e300, np.full(49, 1e-300)]),
        "out_of_range",
        r"too many orders of magnitude",
        id="overflow",
    ),
]


@pytest.mark.parametrize(("kwargs", "code", "pattern"), BAD_ARRAYS)
def test_make_segment_rejects_bad_input(kwargs, code, pattern):
    # Failure modes tested as a table of (input, code, message), as in scikit-learn's parameter
    # validation tests (common practice).
    with pytest.raises(SegmentError, match=pattern) as info:
        make_segment(**kwargs)
    assert info.value.code == code
    assert info.value.to_dict() == {"error": code, "detail": info.value.detail}


# --------------------------------------------------------------------------------------------
# Behaviour of make_segment
# --------------------------------------------------------------------------------------------


def test_unsorted_input_is_sorted_stably_with_rows_kept_together():
    time, flux, err = _clean(60, seed=1)
    err = err * (1.0 + np.arange(60) / 100.0)  # unique errors to track the pairing
    order = np.random.default_rng(2).permutation(60)
    seg = make_segment(time[order], flux[order], err[order])
    assert np.all(np.diff(seg.time) > 0)
    np.testing.assert_array_equal(seg.time, time)
    median = np.median(flux)
    np.testing.assert_allclose(seg.flux * median, flux, rtol=1e-15)
    np.testing.assert_allclose(seg.flux_err * median, err, rtol=1e-15)
    assert seg.meta["resorted"] is True
    assert make_segment(time, flux, err).meta["resorted"] is False


def test_nan_flux_rows_are_dropped_and_counted():
    time, flux, err = _clean(80)
    flux[[3, 10, 11]] = np.nan
    flux[20] = np.inf
    err[40] = np.nan
    time[10] = np.nan  # a non-finite time where the flux is missing too: dropped, not refused
    seg = make_segment(time, flux, err)
    assert seg.n_points == 75
    assert seg.meta["n_dropped_nonfinite"] == 5
    assert seg.meta["n_dropped_nonfinite_flux"] == 4
    assert seg.meta["n_dropped_nonfinite_flux_err"] == 1
    assert seg.meta["n_rows_read"] == 80
    assert not np.isin(time[[3, 11, 20, 40]], seg.time).any()


def test_upstream_counts_in_meta_are_added_to():
    time, flux, _ = _clean(40)
    flux[0] = np.nan
    seg = make_segment(time, flux, meta={"n_dropped_nonfinite": 3, "n_rows_read": 50})
    assert seg.meta["n_dropped_nonfinite"] == 4
    assert seg.meta["n_rows_read"] == 50


def test_normalisation_by_median_scales_flux_err_alike():
    time, flux, err = _clean(101, level=5432.1, sigma=3.0)
    seg = make_segment(time, flux, err)
    assert np.median(seg.flux) == 1.0  # odd n: the median is one of the points, x / x == 1
    np.testing.assert_allclose(seg.flux_err / seg.flux, err / flux, rtol=1e-14)
    assert seg.meta["flux_median"] == pytest.approx(np.median(flux), rel=1e-15)
    assert seg.flux_err_estimated is False
    assert seg.meta["flux_err_method"] == "given"


def test_normalisation_per_group_uses_each_group_median():
    # Two quarters with different flux levels, as in un-stitched mission data (common practice:
    # normalise each quarter/sector by its own median before joining them).
    rng = np.random.default_rng(3)
    n = 60
    time = np.arange(n) * TWO_MIN_DAYS
    groups = np.repeat([14, 15, 16], 20)
    level = np.repeat([1000.0, 2500.0, 400.0], 20)
    flux = level * (1.0 + rng.normal(0.0, 1e-3, n))
    seg = make_segment(time, flux, np.full(n, 0.5), groups=groups)
    for label in (14, 15, 16):
        in_group = groups == label
        assert np.median(seg.flux[in_group]) == pytest.approx(1.0, abs=1e-15)
        np.testing.assert_allclose(
            seg.flux_err[in_group], 0.5 / np.median(flux[in_group]), rtol=1e-14
        )
    assert seg.meta["groups_normalised"] == ("14", "15", "16")
    np.testing.assert_allclose(seg.meta["group_medians"], [1000.0, 2500.0, 400.0], rtol=5e-3)
    assert seg.meta["group_n_points"] == (20, 20, 20)
    assert seg.meta["normalisation"] == "median_per_group"


def test_string_group_labels_work():
    time, flux, err = _clean(40)
    seg = make_segment(time, flux, err, groups=np.array(["s4"] * 20 + ["s5"] * 20, dtype=object))
    assert seg.meta["groups_normalised"] == ("s4", "s5")


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_estimated_flux_err_recovers_injected_white_noise(seed):
    # Injected Gaussian white noise of known sigma. The MAD has asymptotic efficiency ~0.37 for
    # Gaussian data (Rousseeuw & Croux 1993, Table 1; value from memory), so the relative
    # scatter of the estimate is ~1/sqrt(2 * 0.37 * N) ~= 0.8 % for N = 20000 (a simulation of
    # the differenced estimator gave 0.82 %). A 5 % bound is > 5 standard deviations.
    n, sigma = 20000, 1e-3
    rng = np.random.default_rng(seed)
    time = np.arange(n) * TWO_MIN_DAYS
    flux = 1.0 + rng.normal(0.0, sigma, n)
    seg = make_segment(time, flux)
    assert seg.flux_err_estimated is True
    assert seg.meta["flux_err_method"] == "mad_first_differences"
    assert np.ptp(seg.flux_err) == 0.0  # one constant per-point error
    assert seg.flux_err[0] == pytest.approx(sigma * np.median(flux) ** -1, rel=0.05)


def test_estimated_flux_err_matches_scipy_reference():
    # Reference implementation: scipy.stats.median_abs_deviation(scale="normal") of the first
    # differences, divided by sqrt(2) (difference of two independent points: variance 2 sigma^2).
    time, flux, _ = _clean(3001, seed=4)
    seg = make_segment(time, flux)
    expected = stats.median_abs_deviation(np.diff(seg.flux), scale="normal") / np.sqrt(2.0)
    assert seg.flux_err[0] == pytest.approx(expected, rel=1e-12)


def test_estimated_flux_err_is_robust_to_slow_trends():
    # A sinusoidal trend of 50 sigma amplitude: first differences cancel it (common practice).
    n, sigma = 20000, 1e-3
    rng = np.random.default_rng(21)
    time = np.arange(n) * TWO_MIN_DAYS
    trend = 50 * sigma * np.sin(2 * np.pi * time / 5.0)
    flux = 1.0 + trend + rng.normal(0.0, sigma, n)
    seg = make_segment(time, flux)
    assert seg.flux_err[0] == pytest.approx(sigma, rel=0.05)
    assert np.std(flux) > 10 * sigma  # the plain scatter would be badly wrong


def test_estimated_flux_err_is_robust_to_outliers():
    # 1 % of points pushed up by 20 sigma contaminate eps = 2 % of the differences. For far
    # outliers the MAD then sits at the half-normal quantile 0.5 / (1 - eps) instead of 0.5
    # (Huber 1981, maximum-bias of the MAD; from memory): bias = Phi^-1(0.7551) / Phi^-1(0.75)
    # - 1 = +2.4 %. The plain std of the differences is inflated by more than 2x.
    n, sigma = 20000, 1e-3
    rng = np.random.default_rng(22)
    time = np.arange(n) * TWO_MIN_DAYS
    flux = 1.0 + rng.normal(0.0, sigma, n)
    flux[rng.choice(n, n // 100, replace=False)] += 20 * sigma
    eps = 2 * 0.01
    expected_bias = stats.norm.ppf(0.5 + 0.5 / (1 - eps) / 2) / stats.norm.ppf(0.75)
    seg = make_segment(time, flux)
    assert seg.flux_err[0] == pytest.approx(sigma * expected_bias, rel=0.04)
    assert np.std(np.diff(flux)) / np.sqrt(2) > 2 * sigma


def test_estimated_flux_err_ignores_jumps_between_groups():
    n = 4000
    rng = np.random.default_rng(23)
    time = np.arange(n) * TWO_MIN_DAYS
    groups = np.arange(n) % 2  # interleaved groups at very different levels
    flux = np.where(groups == 0, 1000.0, 3000.0) * (1.0 + rng.normal(0.0, 1e-3, n))
    seg = make_segment(time, flux, groups=groups)
    assert seg.flux_err[0] == pytest.approx(1e-3, rel=0.1)


def test_quantised_flux_falls_back_to_std_of_differences():
    # Integer counts that mostly repeat: the MAD of the differences is 0.
    time = np.arange(100) * TWO_MIN_DAYS
    flux = np.full(100, 500.0)
    flux[::10] = 501.0
    seg = make_segment(time, flux)
    assert seg.meta["flux_err_method"] == "std_first_differences"
    expected = np.std(np.diff(flux / 500.0)) / np.sqrt(2)
    assert seg.flux_err[0] == pytest.approx(expected, rel=1e-12)


def test_cadence_is_the_median_step_in_minutes():
    time, flux, err = _clean(200)
    time[100:] += 3.0  # a 3-day gap does not move the median step
    seg = make_segment(time, flux, err)
    assert seg.cadence_min == pytest.approx(2.0, rel=1e-9)
    assert seg.duration_days == pytest.approx(199 * TWO_MIN_DAYS + 3.0, rel=1e-12)
    assert seg.n_points == 200


def test_quantities_are_converted_to_days():
    time, flux, err = _clean(40)
    seg = make_segment((time * 24.0) * u.hour, flux * u.electron / u.s, err * u.electron / u.s)
    np.testing.assert_allclose(seg.time, time, rtol=1e-15)
    flux_mjy = make_segment(time, flux * u.mJy, (err / 1000.0) * u.Jy)  # mJy vs Jy errors
    np.testing.assert_allclose(flux_mjy.flux_err, err / np.median(flux), rtol=1e-12)


def test_masked_arrays_and_none_entries_are_missing_points():
    time, flux, err = _clean(40)
    masked = np.ma.masked_array(flux, mask=np.arange(40) < 5)
    assert make_segment(time, masked, err).n_points == 35
    with_none = np.array([None, *flux[1:]], dtype=object)
    seg = make_segment(time, with_none, err)
    assert seg.n_points == 39 and seg.meta["n_dropped_nonfinite"] == 1


def test_minimum_point_count_is_accepted():
    time, flux, err = _clean(MIN_POINTS)
    assert make_segment(time, flux, err).n_points == MIN_POINTS


# --------------------------------------------------------------------------------------------
# The Segment type
# --------------------------------------------------------------------------------------------


def test_segment_is_immutable():
    time, flux, err = _clean(40)
    seg = make_segment(time, flux, err, meta={"note": {"a": [1, 2]}})
    for name in ("time", "flux", "flux_err"):
        array = getattr(seg, name)
        assert array.dtype == np.float64 and not array.flags.writeable
        with pytest.raises(ValueError, match="read-only"):
            array[0] = 0.0
    with pytest.raises(dataclasses.FrozenInstanceError):
        seg.id = "other"  # type: ignore[misc]
    with pytest.raises(TypeError):
        seg.meta["x"] = 1  # type: ignore[index]
    with pytest.raises(TypeError):
        seg.meta["note"]["a"] = 3  # type: ignore[index]
    assert seg.meta["note"]["a"] == (1, 2)


def test_segment_does_not_alias_caller_arrays():
    time, flux, err = _clean(40)
    seg = make_segment(time, flux, err)
    before = seg.time.copy(), seg.flux.copy()
    time[:] = 0.0
    flux[:] = 0.0
    np.testing.assert_array_equal(seg.time, before[0])
    np.testing.assert_array_equal(seg.flux, before[1])


def test_segment_equality_pickle_and_copy():
    time, flux, err = _clean(40)
    seg = make_segment(time, flux, err, id="demo", meta={"n_rows_read": 40, "nested": {"k": 1}})
    assert seg == make_segment(time, flux, err, id="demo")
    assert seg != make_segment(time, flux, err, id="other")
    assert seg != make_segment(time, flux * _with(np.ones(40), 0, 1.01), err, id="demo")
    for clone in (pickle.loads(pickle.dumps(seg)), copy.deepcopy(seg), copy.copy(seg)):
        assert clone == seg
        assert not clone.flux.flags.writeable
        assert clone.meta_dict() == seg.meta_dict()
    with pytest.raises(TypeError):
        hash(seg)
    assert "n_points=40" in repr(seg) and "demo" in repr(seg)


def test_meta_dict_is_json_ready():
    time, flux, err = _clean(40)
    seg = make_segment(time, flux, err, groups=np.repeat([1, 2], 20))
    text = json.dumps(seg.meta_dict())
    assert json.loads(text)["groups_normalised"] == ["1", "2"]


def test_dataclasses_replace_revalidates():
    time, flux, err = _clean(40)
    seg = make_segment(time, flux, err)
    assert dataclasses.replace(seg, id="renamed").id == "renamed"
    with pytest.raises(SegmentError, match="strictly increasing") as info:
        dataclasses.replace(seg, time=seg.time[::-1])
    assert info.value.code == "unsorted_time"


DIRECT_BAD = [
    (dict(time=[0.0, 1.0, 1.0], flux=[1.0, 1.0, 1.0], flux_err=[1.0] * 3), "duplicate_times"),
    (dict(time=[0.0, 1.0], flux=[1.0, 1.0, 1.0], flux_err=[1.0] * 3), "length_mismatch"),
    (dict(time=[0.0, 1.0], flux=[1.0, np.nan], flux_err=[1.0] * 2), "non_finite_flux"),
    (dict(time=[0.0, 1.0], flux=[1.0, 1.0], flux_err=[1.0, 0.0]), "non_positive_flux_err"),
    (dict(time=[[0.0, 1.0]], flux=[1.0, 1.0], flux_err=[1.0, 1.0]), "invalid_shape"),
]


@pytest.mark.parametrize(("kwargs", "code"), DIRECT_BAD)
def test_direct_construction_checks_invariants(kwargs, code):
    with pytest.raises(SegmentError) as info:
        Segment(id="x", cadence_min=1.0, **kwargs)
    assert info.value.code == code


# --------------------------------------------------------------------------------------------
# segment_from_mapping
# --------------------------------------------------------------------------------------------

_TIMES = [0.1 * i for i in range(30)]
_FLUX = [100.0 + (i % 4) for i in range(30)]

BAD_MAPPINGS = [
    pytest.param([_TIMES, _FLUX], "invalid_type", r"JSON object.*got list", id="not-mapping"),
    pytest.param(
        {"time": _TIMES}, "missing_columns", r"lacks 'flux'; keys found: \['time'\]", id="no-flux"
    ),
    pytest.param(
        {"flux": _FLUX, "t": _TIMES},
        "missing_columns",
        r"lacks 'time'; keys found: \['flux', 't'\]",
        id="no-time",
    ),
    pytest.param(
        {"time": _TIMES, "flux": "1,2,3"},
        "invalid_type",
        r"'flux' must be a list of numbers; got str",
        id="flux-str",
    ),
    pytest.param({"time": _TIMES, "flux": 3.0}, "invalid_type", r"got float", id="flux-scalar"),
    pytest.param({"time": _TIMES, "flux": None}, "invalid_type", r"'flux' is null", id="flux-null"),
    pytest.param(
        {"time": _TIMES, "flux": [*_FLUX[:2], "1.5", *_FLUX[3:]]},
        "invalid_type",
        r"flux\[2\] is str '1\.5'",
        id="str-element",
    ),
    pytest.param(
        {"time": _TIMES, "flux": [[1.0]] * 30}, "invalid_type", r"flux\[0\] is list", id="nested"
    ),
    pytest.param(
        {"time": _TIMES, "flux": [True] * 30},
        "invalid_type",
        r"flux\[0\] is bool",
        id="bool-element",
    ),
    pytest.param(
        {"time": _TIMES, "flux": [{"v": 1}] * 30},
        "invalid_type",
        r"flux\[0\] is dict",
        id="dict-element",
    ),
    pytest.param(
        {"time": _TIMES, "flux": _FLUX, "flux_err": "none"},
        "invalid_type",
        r"'flux_err' must be a list",
        id="err-str",
    ),
    pytest.param(
        {"time": [*_TIMES[:29], "x"], "flux": _FLUX},
        "invalid_type",
        r"time\[29\] is str",
        id="time-str-element",
    ),
    pytest.param(
        {"time": _TIMES, "flux": _FLUX, "id": 42},
        "invalid_type",
        r"'id' must be a non-empty string; got 42",
        id="id-int",
    ),
    pytest.param(
        {"time": _TIMES, "flux": [*_FLUX[:29], 10**400]},
        "invalid_type",
        r"cannot be converted to float64",
        id="huge-int",
    ),
    pytest.param(
        {"time": [*_TIMES[:5], None, *_TIMES[6:]], "flux": _FLUX},
        "non_finite_time",
        r"row 5",
        id="time-null",
    ),
    pytest.param(
        {"time": _TIMES[:10], "flux": _FLUX[:10]}, "too_few_points", r"10 usable points", id="short"
    ),
]


@pytest.mark.parametrize(("obj", "code", "pattern"), BAD_MAPPINGS)
def test_segment_from_mapping_rejects_bad_objects(obj, code, pattern):
    with pytest.raises(SegmentError, match=pattern) as info:
        segment_from_mapping(obj)
    assert info.value.code == code


def test_segment_from_mapping_drops_null_points_and_takes_ids():
    flux = list(_FLUX)
    flux[4] = None
    err = [0.5] * 30
    err[7] = None
    seg = segment_from_mapping({"id": "demo-7", "time": _TIMES, "flux": flux, "flux_err": err})
    assert seg.id == "demo-7" and seg.n_points == 28
    assert seg.meta["n_dropped_nonfinite"] == 2
    assert seg.flux_err_estimated is False
    assert segment_from_mapping({"time": _TIMES, "flux": _FLUX}).id == "segment"
    assert segment_from_mapping({"id": "a", "time": _TIMES, "flux": _FLUX}, id="b").id == "b"
    estimated = segment_from_mapping({"time": _TIMES, "flux": _FLUX, "flux_err": None})
    assert estimated.flux_err_estimated is True


def test_segment_from_mapping_equals_make_segment():
    obj = {"time": _TIMES, "flux": _FLUX, "flux_err": [0.5] * 30, "extra": "ignored"}
    assert segment_from_mapping(obj) == make_segment(_TIMES, _FLUX, [0.5] * 30)


# --------------------------------------------------------------------------------------------
# Property-based tests (Hypothesis)
# --------------------------------------------------------------------------------------------

_FLUX_VALUES = st.floats(min_value=1e-3, max_value=1e6, allow_nan=False)


@st.composite
def _valid_inputs(draw):
    n = draw(st.integers(min_value=MIN_POINTS, max_value=120))
    times = draw(
        st.lists(
            st.floats(min_value=-1e4, max_value=1e4, allow_nan=False, allow_subnormal=False),
            min_size=n,
            max_size=n,
            unique=True,
        )
    )
    flux = draw(st.lists(_FLUX_VALUES, min_size=n, max_size=n).filter(lambda v: min(v) < max(v)))
    with_err = draw(st.booleans())
    err = (
        draw(st.lists(st.floats(min_value=1e-6, max_value=1e3), min_size=n, max_size=n))
        if with_err
        else None
    )
    return np.array(times), np.array(flux), (None if err is None else np.array(err))


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_valid_inputs())
def test_valid_arrays_always_give_a_sorted_normalised_segment(data):
    time, flux, err = data
    seg = make_segment(time, flux, err)
    assert seg.n_points == time.size
    assert np.all(np.diff(seg.time) > 0)
    assert abs(np.median(seg.flux) - 1.0) < 1e-12
    assert np.all(seg.flux_err > 0) and np.all(np.isfinite(seg.flux_err))
    assert seg.flux_err_estimated is (err is None)
    np.testing.assert_array_equal(seg.time, np.sort(time))


_GARBAGE_SCALARS = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(10**30), max_value=10**30),
    st.floats(),
    st.text(max_size=5),
    st.binary(max_size=5),
)
_GARBAGE = st.recursive(
    _GARBAGE_SCALARS,
    lambda inner: st.one_of(
        st.lists(inner, max_size=30), st.dictionaries(st.text(max_size=4), inner, max_size=4)
    ),
    max_leaves=40,
)
_NUMERIC_LISTS = st.lists(st.one_of(st.floats(), st.none(), st.integers(-5, 5)), max_size=40)


@settings(max_examples=150, deadline=None)
@given(
    time=st.one_of(_GARBAGE, _NUMERIC_LISTS),
    flux=st.one_of(_GARBAGE, _NUMERIC_LISTS),
    flux_err=st.one_of(st.none(), _GARBAGE, _NUMERIC_LISTS),
    groups=st.one_of(st.none(), _GARBAGE),
)
def test_garbage_arrays_raise_only_dipshape_errors(time, flux, flux_err, groups):
    try:
        seg = make_segment(time, flux, flux_err, groups=groups)
    except DipshapeError:
        return
    assert seg.n_points >= MIN_POINTS  # rarely, garbage happens to be valid


@settings(max_examples=150, deadline=None)
@given(
    st.one_of(
        _GARBAGE,
        st.fixed_dictionaries(
            {
                "time": st.one_of(_GARBAGE, _NUMERIC_LISTS),
                "flux": st.one_of(_GARBAGE, _NUMERIC_LISTS),
            },
            optional={"flux_err": _GARBAGE, "id": _GARBAGE},
        ),
    )
)
def test_garbage_mappings_raise_only_dipshape_errors(obj):
    try:
        segment_from_mapping(obj)
    except DipshapeError:
        pass
