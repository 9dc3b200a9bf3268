"""Tests of features.events: box search, duration scan, period test, folding and windows.

References named beside each check: batman-package (Kreidberg 2015) for injected transits and
Winn (2010, "Transits and Occultations", eq. 14) for their total duration T14; astropy
``BoxLeastSquares`` (Kovacs, Zucker & Mazeh 2002) for periods; the Gaussian tail probability for
false alarms; numpy's modular arithmetic for folding.
"""

from __future__ import annotations

import math

import batman
import numpy as np
import pytest
from astropy.timeseries import BoxLeastSquares

from features.detrend import detrend
from features.errors import ParameterError, SegmentError
from features.events import (
    Ephemeris,
    Event,
    _box_stats,
    _evaluate_trials,
    _prepare,
    _slow_box_stats,
    _slow_evaluate_candidate,
    dip_significance_scan,
    estimate_period,
    event_windows,
    fold,
    search_dips,
)

TWO_MIN = 2.0 / 1440.0
THIRTY_MIN = 30.0 / 1440.0


def _params(*, t0, per, rp, a, inc, u=(0.4, 0.26)):
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc, p.ecc, p.w = t0, per, rp, a, inc, 0.0, 90.0
    p.limb_dark, p.u = "quadratic", list(u)
    return p


def _batman(t, p):
    return batman.TransitModel(p, t).light_curve(p)


def _t14(p):
    """Winn (2010) eq. 14, circular orbit: T14 = P/pi asin(sqrt((1+k)^2 - b^2) / (a sin i))."""
    inc = math.radians(p.inc)
    b = p.a * math.cos(inc)
    return p.per / math.pi * math.asin(math.sqrt((1 + p.rp) ** 2 - b**2) / (p.a * math.sin(inc)))


def _box(t, *, t0, duration, depth):
    return 1.0 - depth * (np.abs(t - t0) < 0.5 * duration)


# --------------------------------------------------------------------------------------------
# injection and recovery
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("cadence", [TWO_MIN, THIRTY_MIN])
def test_batman_transit_is_recovered(cadence):
    """SNR-50 transit: t_mid, depth and duration come back (batman model, Winn 2010 T14).

    The box duration is coarse (12 trial durations per two decades, refined by a factor
    1.5^(1/4)): the best box of a limb-darkened transit lies between T23 and T14, hence the
    30 % tolerance on duration.
    """
    rng = np.random.default_rng(int(1 / cadence))
    t = np.arange(0.0, 10.0, cadence)
    p = _params(t0=5.0 + 0.37 * cadence, per=30.0, rp=0.1, a=20.0, inc=89.5)
    model = _batman(t, p)
    t14 = _t14(p)
    inside = model < 1.0
    sigma = np.mean(1.0 - model[inside]) * math.sqrt(inside.sum()) / 50.0  # SNR 50
    errors = []
    for _ in range(8):
        f = model + rng.normal(0.0, sigma, t.size)
        d = detrend(t, f, np.full(t.size, sigma))
        events = search_dips(t, d.flux, np.full(t.size, sigma), sigma_white=d.sigma_white,
                             beta_red=d.beta_red)
        assert len(events) == 1
        e = events[0]
        errors.append(abs(e.t_mid - p.t0))
        box = (t >= e.t_start) & (t < e.t_end)
        # the box depth is the mean batman deficit inside that box
        assert e.depth == pytest.approx(np.mean(1.0 - model[box]), rel=0.10)
        assert e.duration_days == pytest.approx(t14, rel=0.30)
        assert 35.0 < e.snr < 65.0  # injected 50; noise and box mismatch move it a little
    tolerance = max(cadence, 0.02 * t14)
    # the box-centre timing scatter is a few minutes here: the median error is well inside the
    # tolerance and no realisation is off by more than twice it
    assert np.median(errors) <= tolerance
    assert max(errors) <= 2.0 * tolerance


def test_several_dips_are_found_strongest_first():
    rng = np.random.default_rng(21)
    t = np.arange(0.0, 20.0, THIRTY_MIN)
    f = _box(t, t0=4.0, duration=0.3, depth=0.004) * _box(t, t0=12.0, duration=0.8, depth=0.002)
    f = f + rng.normal(0.0, 5e-4, t.size)
    events = search_dips(t, f, None)
    assert len(events) == 2
    assert events[0].snr >= events[1].snr
    assert sorted(round(e.t_mid) for e in events) == [4, 12]
    long_dip = min(events, key=lambda e: abs(e.t_mid - 12.0))
    assert long_dip.depth == pytest.approx(0.002, rel=0.1)
    assert long_dip.duration_days == pytest.approx(0.8, rel=0.3)


def test_max_events_and_threshold_limit_the_list():
    rng = np.random.default_rng(22)
    t = np.arange(0.0, 30.0, THIRTY_MIN)
    f = np.ones(t.size)
    for t0 in (3.0, 9.0, 15.0, 21.0, 27.0):
        f *= _box(t, t0=t0, duration=0.2, depth=0.003)
    f = f + rng.normal(0.0, 4e-4, t.size)
    assert len(search_dips(t, f, None, max_events=3)) == 3
    assert len(search_dips(t, f, None)) == 5
    assert search_dips(t, f, None, snr_threshold=1e3) == []


# --------------------------------------------------------------------------------------------
# pure noise: false alarms
# --------------------------------------------------------------------------------------------


def test_false_alarm_rate_on_white_noise():
    """200 noise-only 2,000-point segments: the default threshold (SNR 7) almost never fires.

    With ~10^3 effectively independent boxes per segment and a one-sided Gaussian tail of
    1.3e-12 at 7 sigma, the expected rate is ~1e-9; the measured rate (0 / 200 when written) is
    bounded at 1 %.
    """
    rng = np.random.default_rng(23)
    t = np.arange(2000) * TWO_MIN
    err = np.full(t.size, 1e-3)
    fired = 0
    for _ in range(200):
        f = 1.0 + rng.normal(0.0, 1e-3, t.size)
        d = detrend(t, f, err)
        fired += bool(search_dips(t, d.flux, err, sigma_white=d.sigma_white,
                                  beta_red=d.beta_red))
    assert fired / 200 <= 0.01


def test_false_alarms_on_red_noise_need_beta():
    """AR(1) noise (correlation length 20 cadences): with beta from detrend, few false alarms;
    with beta forced to 1 nearly every segment fires (measured 3 % and 100 % when written)."""
    rng = np.random.default_rng(24)
    t = np.arange(2000) * TWO_MIN
    phi = 0.95
    with_beta = without = 0
    for _ in range(40):
        e = rng.normal(0.0, 1e-3 * math.sqrt(1 - phi * phi), t.size)
        x = np.empty(t.size)
        x[0] = rng.normal(0.0, 1e-3)
        for i in range(1, t.size):
            x[i] = phi * x[i - 1] + e[i]
        d = detrend(t, 1.0 + x, None)
        with_beta += bool(search_dips(t, d.flux, None, sigma_white=d.sigma_white,
                                      beta_red=d.beta_red))
        without += bool(search_dips(t, d.flux, None, sigma_white=d.sigma_white))
    assert with_beta / 40 <= 0.15
    assert without / 40 >= 0.5


# --------------------------------------------------------------------------------------------
# fast kernels against the slow references
# --------------------------------------------------------------------------------------------


def test_box_kernel_equals_slow_loop():
    rng = np.random.default_rng(25)
    t = np.sort(rng.uniform(0.0, 5.0, 1500))
    f = 1.0 + rng.normal(0.0, 1e-3, t.size)
    f[rng.choice(t.size, 20, replace=False)] = np.nan
    err = rng.uniform(5e-4, 2e-3, t.size)
    boxes = _prepare(t, f, err, 1.1e-3, 1.3)
    finite = np.isfinite(f)
    eff = err * 1.1e-3 / np.median(err[finite])  # errors rescaled to sigma_white
    weight = np.where(finite, 1.0 / eff**2, 0.0)
    centres = np.linspace(-0.1, 5.1, 301)
    for duration in (0.01, 0.05, 0.3, 1.2):
        fast = _box_stats(boxes, centres, duration)
        slow = _slow_box_stats(boxes, f, weight, centres, duration)
        np.testing.assert_array_equal(fast[2], slow[2])
        np.testing.assert_allclose(fast[0], slow[0], rtol=1e-9, atol=1e-14)
        np.testing.assert_allclose(fast[1], slow[1], rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("periodic", [True, False])
def test_vectorised_period_rules_equal_slow_loop(periodic):
    rng = np.random.default_rng(26)
    t = np.arange(0.0, 27.0, THIRTY_MIN)
    f = np.ones(t.size)
    times = [2.3, 5.5, 8.7, 11.9, 18.3, 21.5] if periodic else [3.1, 7.4, 16.0]
    for i, t0 in enumerate(times):
        f *= _box(t, t0=t0, duration=0.15, depth=0.003 if periodic else 0.002 + 0.001 * i)
    f = f + rng.normal(0.0, 4e-4, t.size)
    events = search_dips(t, f, None)
    boxes = _prepare(t, f, None, None, 1.0)
    ref = max(events, key=lambda e: e.snr).t_mid
    trials = np.unique([abs(e.t_mid - ref) / k for e in events for k in range(1, 12)
                        if abs(e.t_mid - ref) / k > 0.3])
    fast = {round(c.period, 9): c for c in _evaluate_trials(boxes, events, trials, ref)}
    slow = {}
    for p in trials:
        c = _slow_evaluate_candidate(boxes, events, float(p), ref)
        if c is not None:
            slow[round(c.period, 9)] = c
    assert fast.keys() == slow.keys()
    for key, c in fast.items():
        assert c.score == pytest.approx(slow[key].score, rel=1e-9)
        assert c.members == slow[key].members
    assert bool(fast) == periodic


# --------------------------------------------------------------------------------------------
# period
# --------------------------------------------------------------------------------------------


def test_period_equals_astropy_bls_on_the_same_data():
    rng = np.random.default_rng(27)
    t = np.arange(0.0, 27.0, TWO_MIN)
    p = _params(t0=1.7, per=3.37, rp=0.08, a=10.0, inc=88.5)
    f = _batman(t, p) + rng.normal(0.0, 2e-3, t.size)
    d = detrend(t, f, None)
    events = search_dips(t, d.flux, None, sigma_white=d.sigma_white, beta_red=d.beta_red)
    assert len(events) >= 6
    eph = estimate_period(t, d.flux, None, events, sigma_white=d.sigma_white)
    assert eph is not None
    # reference: astropy BoxLeastSquares, its own automatic period grid, on the same data
    bls = BoxLeastSquares(t, d.flux)
    durations = [0.05, 0.08, 0.1, 0.12, 0.15]
    res = bls.power(bls.autoperiod(durations, minimum_period=2.0, maximum_period=6.0),
                    durations)
    best = float(res.period[np.argmax(res.power)])
    assert eph.period_days == pytest.approx(best, rel=1e-3)
    assert eph.period_days == pytest.approx(p.per, rel=1e-3)
    phase, _ = fold(np.array([p.t0]), eph)
    assert abs(phase[0]) < 0.01  # epoch within ~15 min of the injected one


def test_no_period_for_a_single_event():
    rng = np.random.default_rng(28)
    t = np.arange(0.0, 20.0, THIRTY_MIN)
    f = _box(t, t0=8.0, duration=0.3, depth=0.004) + rng.normal(0.0, 4e-4, t.size)
    events = search_dips(t, f, None)
    assert len(events) == 1
    assert estimate_period(t, f, None, events) is None


def test_no_period_for_two_unrelated_dips():
    rng = np.random.default_rng(29)
    t = np.arange(0.0, 25.0, THIRTY_MIN)
    # a short dip and a long one: very different durations (comet-like pair)
    f = _box(t, t0=6.0, duration=0.1, depth=0.004) * _box(t, t0=17.3, duration=1.2, depth=0.002)
    f = f + rng.normal(0.0, 3e-4, t.size)
    events = search_dips(t, f, None)
    assert len(events) == 2
    assert estimate_period(t, f, None, events) is None
    # similar durations but depths a factor 3 apart
    g = _box(t, t0=6.0, duration=0.3, depth=0.006) * _box(t, t0=17.3, duration=0.3, depth=0.002)
    g = g + rng.normal(0.0, 3e-4, t.size)
    events = search_dips(t, g, None)
    assert len(events) == 2
    assert estimate_period(t, g, None, events) is None


def test_subharmonic_with_empty_epochs_is_rejected():
    # two alike dips 8 days apart with data in between: 8 d is accepted, 4 d and 8/3 d are not
    rng = np.random.default_rng(30)
    t = np.arange(0.0, 14.0, THIRTY_MIN)
    f = _box(t, t0=3.0, duration=0.25, depth=0.004) * _box(t, t0=11.0, duration=0.25,
                                                            depth=0.004)
    f = f + rng.normal(0.0, 4e-4, t.size)
    events = search_dips(t, f, None)
    eph = estimate_period(t, f, None, events)
    assert eph is not None
    assert eph.period_days == pytest.approx(8.0, rel=0.01)


def test_long_ramp_does_not_hide_a_periodic_family_of_short_eclipses():
    # A thermal ramp after a data gap is the strongest "dip" and has another duration; the
    # period must still come from the short eclipses, and box least squares on the same
    # points agrees (astropy). The real case is a Kepler binary (tests/features/
    # test_real_pipeline.py, KIC 10727668).
    rng = np.random.default_rng(33)
    t = np.arange(0.0, 80.0, THIRTY_MIN)
    t = t[(t < 39.0) | (t > 42.0)]  # a 3-day gap
    period, depth = 2.3059, 0.022
    f = np.ones(t.size)
    for n in range(-1, 36):
        f *= _box(t, t0=0.7 + period * n, duration=0.11, depth=depth)
    ramp = (t > 42.0) & (t < 43.8)
    f[ramp] -= 0.03 * np.exp(-(t[ramp] - 42.0) / 0.6)  # the strongest event
    f = f + rng.normal(0.0, 1e-3, t.size)
    events = search_dips(t, f, None, max_events=10)
    strongest = max(events, key=lambda e: e.snr)
    # the ramp outshines the eclipses and is of another duration family (> 2x longer)
    assert 42.0 < strongest.t_mid < 43.8 and strongest.duration_days > 2 * 0.11
    eph = estimate_period(t, f, None, events)
    assert eph is not None
    assert eph.period_days == pytest.approx(period, rel=2e-3)
    res = BoxLeastSquares(t, f).power(np.linspace(2.2, 2.4, 2001), [0.08, 0.11, 0.14])
    assert eph.period_days == pytest.approx(float(res.period[np.argmax(res.power)]), rel=1e-3)


def test_eclipsing_binary_with_unequal_eclipses_folds_at_its_period():
    rng = np.random.default_rng(31)
    t = np.arange(0.0, 27.0, THIRTY_MIN)
    f = np.ones(t.size)
    for n in range(-1, 12):
        f *= _box(t, t0=1.0 + 2.6 * n, duration=0.2, depth=0.02)  # primaries
        f *= _box(t, t0=2.3 + 2.6 * n, duration=0.2, depth=0.006)  # secondaries at phase 0.5
    f = f + rng.normal(0.0, 1e-3, t.size)
    events = search_dips(t, f, None, max_events=20)
    eph = estimate_period(t, f, None, events)
    assert eph is not None
    assert eph.period_days == pytest.approx(2.6, rel=0.005)


# --------------------------------------------------------------------------------------------
# duration scan
# --------------------------------------------------------------------------------------------


def test_duration_scan_peaks_near_the_dip_duration():
    rng = np.random.default_rng(32)
    t = np.arange(0.0, 10.0, TWO_MIN)
    f = _box(t, t0=4.0, duration=0.4, depth=0.002) + rng.normal(0.0, 1e-3, t.size)
    scan = dip_significance_scan(t, f, None)
    best = scan.durations_days[np.nanargmax(scan.snr)]
    assert 0.4 / 1.6 < best < 0.4 * 1.6
    # every best box overlaps the dip centre (short boxes sit inside the dip)
    assert np.all(np.abs(scan.t_mid - 4.0) <= 0.5 * np.maximum(scan.durations_days, 0.4))
    # a box SNR scales as sqrt(n): halving the duration of a matched box loses ~sqrt(2)
    short = scan.snr[np.argmin(np.abs(scan.durations_days - 0.1))]
    assert short < 0.75 * np.nanmax(scan.snr)


def test_duration_scan_of_a_single_outlier_peaks_at_short_durations():
    rng = np.random.default_rng(33)
    t = np.arange(0.0, 10.0, TWO_MIN)
    f = 1.0 + rng.normal(0.0, 1e-3, t.size)
    f[3000:3004] -= 0.02  # an 8-minute artefact
    scan = dip_significance_scan(t, f, None)
    assert np.nanargmax(scan.snr) == 0
    assert scan.snr[-1] < 0.3 * scan.snr[0]


# --------------------------------------------------------------------------------------------
# folding and windows
# --------------------------------------------------------------------------------------------


def test_fold_matches_modular_arithmetic():
    rng = np.random.default_rng(34)
    t = np.sort(rng.uniform(-50.0, 80.0, 5000))
    eph = Ephemeris(period_days=3.3, epoch=12.4, duration_days=0.2)
    phase, n = fold(t, eph)
    # reference: numpy modular arithmetic for the same half-open interval
    ref = np.mod(t - eph.epoch + 0.5 * eph.period_days, eph.period_days) - 0.5 * eph.period_days
    np.testing.assert_allclose(phase, ref, atol=1e-9)
    assert np.all((phase >= -1.65) & (phase < 1.65))
    np.testing.assert_allclose(eph.epoch + n * eph.period_days + phase, t, atol=1e-9)
    # odd/even split: consecutive epochs alternate parity
    assert set(np.unique(n % 2)) == {0, 1}


def test_fold_puts_half_period_at_the_next_epoch():
    eph = Ephemeris(period_days=2.0, epoch=0.0, duration_days=0.1)
    phase, n = fold(np.array([1.0, -1.0, 3.0]), eph)
    assert phase.tolist() == [-1.0, -1.0, -1.0]
    assert n.tolist() == [1, 0, 2]


def test_event_windows_for_events_and_ephemeris():
    t = np.arange(0.0, 10.0, 0.01) + 0.003  # no sample exactly on a window edge
    ev = [Event(2.0, 0.01, 0.4, 20.0, 40, 1.8, 2.2), Event(7.0, 0.01, 0.2, 10.0, 20, 6.9, 7.1)]
    w = event_windows(t, ev)
    assert np.array_equal(w.in_event, (np.abs(t - 2.0) <= 0.2) | (np.abs(t - 7.0) <= 0.1))
    around = ((np.abs(t - 2.0) > 0.2) & (np.abs(t - 2.0) <= 0.6)) | (
        (np.abs(t - 7.0) > 0.1) & (np.abs(t - 7.0) <= 0.3))
    assert np.array_equal(w.around_event, around)
    assert set(w.event_index[w.in_event | w.around_event]) == {0, 1}
    assert np.all(w.event_index[~(w.in_event | w.around_event)] == -1)
    eph = Ephemeris(period_days=2.5, epoch=1.0, duration_days=0.3)
    we = event_windows(t, eph, half_width_factor=2.0)
    phase, n = fold(t, eph)
    assert np.array_equal(we.in_event, np.abs(phase) <= 0.15)
    assert np.array_equal(we.around_event, (np.abs(phase) > 0.15) & (np.abs(phase) <= 0.6))
    assert np.array_equal(we.event_index, n)


# --------------------------------------------------------------------------------------------
# bad input tables
# --------------------------------------------------------------------------------------------

_T = np.arange(200) * THIRTY_MIN
_F = np.ones(200)
_F[::7] += 1e-3


@pytest.mark.parametrize(
    ("kwargs", "error", "code"),
    [
        ({"durations_days": [0.1, 0.0]}, ParameterError, "non_positive_parameter"),
        ({"durations_days": [-0.1]}, ParameterError, "non_positive_parameter"),
        ({"durations_days": [np.nan]}, ParameterError, "non_finite_parameter"),
        ({"durations_days": []}, ParameterError, "invalid_parameter"),
        ({"snr_threshold": 0.0}, ParameterError, "non_positive_parameter"),
        ({"snr_threshold": -3.0}, ParameterError, "non_positive_parameter"),
        ({"max_events": 0}, ParameterError, "invalid_parameter"),
        ({"max_events": 2.0}, ParameterError, "invalid_parameter"),
        ({"sigma_white": 0.0}, ParameterError, "non_positive_parameter"),
        ({"beta_red": 0.5}, ParameterError, "invalid_parameter"),
        ({"beta_red": float("inf")}, ParameterError, "invalid_parameter"),
    ],
)
def test_search_rejects_bad_parameters(kwargs, error, code):
    with pytest.raises(error, match=code) as info:
        search_dips(_T, _F, None, **kwargs)
    assert info.value.code == code


@pytest.mark.parametrize(
    ("args", "code"),
    [
        ((_T, _F[:199], None), "length_mismatch"),
        ((_T, _F, np.ones(150)), "length_mismatch"),
        ((_T[::-1].copy(), _F, None), "unsorted_time"),
        ((_T, _F, np.zeros(200)), "non_positive_flux_err"),
        ((_T[:5], _F[:5], None), "too_few_points"),
        ((_T, np.ones(200), None), "constant_flux"),
        ((_T, np.full(200, np.nan), None), "too_few_points"),
    ],
)
def test_search_rejects_bad_arrays(args, code):
    with pytest.raises(SegmentError, match=code):
        search_dips(*args)
    with pytest.raises(SegmentError, match=code):
        dip_significance_scan(*args)


@pytest.mark.parametrize(
    ("kwargs", "code"),
    [
        ({"period_days": 0.0, "epoch": 1.0, "duration_days": 0.1}, "non_positive_parameter"),
        ({"period_days": -2.0, "epoch": 1.0, "duration_days": 0.1}, "non_positive_parameter"),
        ({"period_days": np.nan, "epoch": 1.0, "duration_days": 0.1}, "non_finite_parameter"),
        ({"period_days": 2.0, "epoch": np.inf, "duration_days": 0.1}, "non_finite_parameter"),
        ({"period_days": 2.0, "epoch": 1.0, "duration_days": 0.0}, "non_positive_parameter"),
        ({"period_days": 2.0, "epoch": 1.0, "duration_days": 2.5}, "duration_exceeds_period"),
    ],
)
def test_ephemeris_validates(kwargs, code):
    with pytest.raises(ParameterError, match=code):
        Ephemeris(**kwargs)


def test_other_entry_points_validate():
    ev = [Event(1.0, 0.01, 0.1, 10.0, 5, 0.95, 1.05), Event(3.0, 0.01, 0.1, 10.0, 5, 2.95, 3.05)]
    with pytest.raises(ParameterError, match="non_positive_parameter"):
        estimate_period(_T, _F, None, ev, min_period_days=0.0)
    with pytest.raises(ParameterError, match="invalid_parameter"):
        estimate_period(_T, _F, None, [(1.0, 0.1)])
    with pytest.raises(SegmentError, match="length_mismatch"):
        estimate_period(_T, _F[:10], None, ev)
    with pytest.raises(ParameterError, match="invalid_parameter"):
        event_windows(_T, ev, half_width_factor=0.5)
    with pytest.raises(ParameterError, match="invalid_parameter"):
        fold(_T, (2.0, 1.0))
    with pytest.raises(SegmentError, match="non_finite_time"):
        fold(np.array([1.0, np.nan]), Ephemeris(period_days=2.0, epoch=0.0, duration_days=0.1))
    with pytest.raises(ParameterError, match="non_positive_parameter"):
        Event(1.0, 0.01, 0.0, 10.0, 5, 1.0, 1.0)
    with pytest.raises(ParameterError, match="invalid_parameter"):
        Event(1.0, 0.01, 0.1, 10.0, 5, 1.2, 1.3)


# --------------------------------------------------------------------------------------------
# real light curve (skipped when the shared folder is absent)
# --------------------------------------------------------------------------------------------


@pytest.mark.real_lc
def test_real_tess_planet_transits_and_period(real_lc_dir):
    """A TESS 2-min sector of a known hot Jupiter (MANIFEST.csv: 8 transits, P = 3.2888 d
    in the literature, mid-times listed there)."""
    path = real_lc_dir / "tess_WASP-126_s01.fits"
    from astropy.io import fits

    with fits.open(path) as hdul:
        data = hdul[1].data
        t = np.asarray(data["TIME"], dtype=np.float64)
        f = np.asarray(data["PDCSAP_FLUX"], dtype=np.float64)
        e = np.asarray(data["PDCSAP_FLUX_ERR"], dtype=np.float64)
        q = np.asarray(data["QUALITY"])
    ok = (q == 0) & np.isfinite(t) & np.isfinite(f) & np.isfinite(e)
    t, f, e = t[ok], f[ok], e[ok]
    med = np.median(f)
    f, e = f / med, e / med
    d = detrend(t, f, e)
    events = search_dips(t, d.flux, e, sigma_white=d.sigma_white, beta_red=d.beta_red)
    listed = np.array([1327.522, 1330.810, 1334.098, 1337.389, 1340.677, 1343.967, 1347.251,
                       1350.543])
    found = np.array([e.t_mid for e in events])
    nearest = np.min(np.abs(found[:, None] - listed[None, :]), axis=0)
    assert np.all(nearest < 0.01)  # every listed transit found within ~15 min
    eph = estimate_period(t, d.flux, e, events, sigma_white=d.sigma_white, beta_red=d.beta_red)
    assert eph is not None
    assert eph.period_days == pytest.approx(3.2888, rel=1e-3)
