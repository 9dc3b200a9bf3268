"""Tests of features.orbits against astropy constants, Winn (2010) and batman-package."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy import constants as const
from astropy import units as u

from features.errors import ParameterError
from features.orbits import (
    _solve_kepler,
    a_over_rstar,
    a_over_rstar_from_density,
    impact_parameter,
    inclination_deg,
    sky_separation,
    transit_durations_days,
)

batman = pytest.importorskip("batman")


# ------------------------------------------------------------------------------------------
# Kepler's third law and the density relation
# ------------------------------------------------------------------------------------------


def test_a_over_rstar_earth_is_one_au():
    # IAU 2012 Resolution B2: 1 au = 149 597 870.7 km; IAU 2015 B3 nominal R_sun. A year of
    # 365.25 d around 1 M_sun gives a = 1 au to ~2e-5 (Earth's mass and the sidereal year
    # differ by ~3e-6 and ~2.6e-5; from memory), so a/R_sun ~ 215.03.
    expected = (const.au / const.R_sun).decompose().value
    got = a_over_rstar(period_days=365.25, mass_msun=1.0, radius_rsun=1.0)
    assert isinstance(got, float)
    assert got == pytest.approx(expected, rel=1e-4)


def test_a_over_rstar_matches_astropy_quantities_and_broadcasts():
    # Kepler's third law written with astropy units (independent of our unit handling).
    periods = np.array([0.5, 3.0, 100.0])
    expected = (
        (const.G * 1.3 * u.M_sun * (periods * u.day) ** 2 / (4 * np.pi**2)) ** (1 / 3)
        / (0.8 * u.R_sun)
    ).decompose().value
    got = a_over_rstar(period_days=periods, mass_msun=1.3, radius_rsun=0.8)
    np.testing.assert_allclose(got, expected, rtol=1e-12)


def test_density_form_agrees_with_mass_radius_form():
    # Seager & Mallen-Ornelas (2003) eq. 30: rho = 3 pi (a/R)^3 / (G P^2) for M_p << M_*.
    mass, radius = 0.9, 1.1
    rho_gcc = (mass * const.M_sun / (4 / 3 * np.pi * (radius * const.R_sun) ** 3)).to(
        u.g / u.cm**3
    ).value
    for period in (0.7, 12.0):
        got = a_over_rstar_from_density(period_days=period, density_gcc=rho_gcc)
        ref = a_over_rstar(period_days=period, mass_msun=mass, radius_rsun=radius)
        assert got == pytest.approx(ref, rel=1e-12)


# ------------------------------------------------------------------------------------------
# Impact parameter and inclination (Winn 2010, eq. 7)
# ------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("a", "inc", "ecc", "omega"),
    [(10.0, 87.0, 0.0, 90.0), (25.0, 89.1, 0.3, 40.0), (6.0, 80.0, 0.6, 250.0)],
)
def test_impact_parameter_formula_and_round_trip(a, inc, ecc, omega):
    # Winn (2010) eq. 7.
    expected = (
        a * math.cos(math.radians(inc)) * (1 - ecc**2) / (1 + ecc * math.sin(math.radians(omega)))
    )
    b = impact_parameter(a_over_rstar=a, inc_deg=inc, ecc=ecc, omega_deg=omega)
    assert b == pytest.approx(expected, rel=1e-13)
    assert inclination_deg(a_over_rstar=a, b=b, ecc=ecc, omega_deg=omega) == pytest.approx(
        inc, abs=1e-10
    )


# ------------------------------------------------------------------------------------------
# Durations (Winn 2010, eqs. 14-15)
# ------------------------------------------------------------------------------------------


def test_durations_worked_example_earth_across_the_sun():
    # Earth across the Sun's centre: T14 about 13 h (common textbook value, 13.1 h with
    # R_earth/R_sun = 0.00916; Winn 2010 sec. 2.4 quotes ~13 h).
    a = a_over_rstar(period_days=365.25, mass_msun=1.0, radius_rsun=1.0)
    k = (const.R_earth / const.R_sun).decompose().value
    t14, t23 = transit_durations_days(period_days=365.25, k=k, a_over_rstar=a, b=0.0)
    assert t14 * 24 == pytest.approx(13.1, abs=0.05)
    assert t23 < t14
    # Winn (2010) eq. 14 small-angle limit: T14 ~ (P / pi) (1 + k) / (a/R*).
    assert t14 == pytest.approx(365.25 / np.pi * (1 + k) / a, rel=1e-4)


def test_durations_worked_example_hot_jupiter():
    # k = 0.1, P = 3 d, 1 M_sun, 1 R_sun, b = 0: T14 ~ 2.89 h, T23 ~ 2.36 h (Winn 2010 eqs.
    # 14-15 with astropy constants; values worked by hand).
    a = a_over_rstar(period_days=3.0, mass_msun=1.0, radius_rsun=1.0)
    t14, t23 = transit_durations_days(period_days=3.0, k=0.1, a_over_rstar=a, b=0.0)
    assert t14 * 24 == pytest.approx(2.89, abs=0.01)
    assert t23 * 24 == pytest.approx(2.36, abs=0.01)


def test_durations_grazing_and_missing_transit():
    # Winn (2010) eq. 15 has no real solution for b > 1 - k: we document T23 = 0.
    t14, t23 = transit_durations_days(period_days=3.0, k=0.1, a_over_rstar=9.0, b=1.0)
    assert t14 > 0.0
    assert t23 == 0.0
    assert transit_durations_days(period_days=3.0, k=0.1, a_over_rstar=9.0, b=1.2) == (0.0, 0.0)
    # A companion larger than the star never has a "full" phase.
    assert transit_durations_days(period_days=3.0, k=1.5, a_over_rstar=9.0, b=0.0)[1] == 0.0


# ------------------------------------------------------------------------------------------
# Sky separation
# ------------------------------------------------------------------------------------------


def test_circular_separation_geometry():
    # Winn (2010) eqs. 2-5 with e = 0: z(t0) = b, z(t0 + P/4) = a/R*, behind at t0 + P/2.
    a, b, period = 8.0, 0.4, 2.5
    z, front = sky_separation(
        [10.0, 10.0 + period / 4, 10.0 + period / 2], t0=10.0, period_days=period,
        a_over_rstar=a, b=b,
    )
    np.testing.assert_allclose(z, [b, a, b], rtol=1e-12)
    _, front = sky_separation(
        [10.0 - 0.2 * period, 10.0 + 0.3 * period, 10.0 + 0.7 * period], t0=10.0,
        period_days=period, a_over_rstar=a, b=b,
    )
    assert front.tolist() == [True, False, False]


@pytest.mark.parametrize(("ecc", "omega"), [(0.0, 90.0), (0.3, 40.0), (0.6, 250.0)])
def test_separation_matches_batman_rsky(ecc, omega):
    # batman-package's sky separation (Kreidberg 2015), in-transit branch.
    a, period = 30.0, 7.0
    inc = 88.5
    b = impact_parameter(a_over_rstar=a, inc_deg=inc, ecc=ecc, omega_deg=omega)
    t = np.linspace(-3.0, 10.0, 4001)
    params = batman.TransitParams()
    params.t0, params.per, params.rp, params.a = 0.0, period, 0.1, a
    params.inc, params.ecc, params.w = inc, ecc, omega
    params.limb_dark, params.u = "uniform", []
    ref = batman.TransitModel(params, t).ds
    z, front = sky_separation(
        t, t0=0.0, period_days=period, a_over_rstar=a, b=b, ecc=ecc, omega_deg=omega
    )
    assert front.any() and (~front).any()
    # batman's own Kepler iteration stops at a looser tolerance: ~1e-6 relative far from
    # conjunction; near the star (where the flux is computed) the two agree to 1e-8.
    np.testing.assert_allclose(z[front], ref[front], rtol=2e-6)
    near = front & (z < 3.0)
    assert near.any()
    np.testing.assert_allclose(z[near], ref[near], atol=1e-8)


def test_very_eccentric_separation_against_winn_equations():
    # Winn (2010) eqs. 1-4 evaluated the slow, obvious way: bisection for E, true anomaly f,
    # r = a (1 - e^2) / (1 + e cos f), X = -r cos(w + f), Y = -r sin(w + f) cos i, Z > 0 in front.
    a, period, ecc, omega_deg, inc_deg = 30.0, 7.0, 0.9, 10.0, 89.5
    w, inc = math.radians(omega_deg), math.radians(inc_deg)
    b = impact_parameter(a_over_rstar=a, inc_deg=inc_deg, ecc=ecc, omega_deg=omega_deg)
    t = np.linspace(-3.0, 10.0, 3001)
    f_conj = np.pi / 2 - w
    e_conj = 2 * np.arctan(np.sqrt((1 - ecc) / (1 + ecc)) * np.tan(f_conj / 2))
    m = e_conj - ecc * np.sin(e_conj) + 2 * np.pi * t / period
    m = np.remainder(m + np.pi, 2 * np.pi) - np.pi
    lo, hi = np.full_like(m, -np.pi), np.full_like(m, np.pi)
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        above = mid - ecc * np.sin(mid) > m
        hi, lo = np.where(above, mid, hi), np.where(above, lo, mid)
    ecc_anom = 0.5 * (lo + hi)
    f = 2 * np.arctan(np.sqrt((1 + ecc) / (1 - ecc)) * np.tan(ecc_anom / 2))
    r = a * (1 - ecc**2) / (1 + ecc * np.cos(f))
    x = -r * np.cos(w + f)
    y = -r * np.sin(w + f) * np.cos(inc)
    z_ref = np.hypot(x, y)
    z, front = sky_separation(
        t, t0=0.0, period_days=period, a_over_rstar=a, b=b, ecc=ecc, omega_deg=omega_deg
    )
    np.testing.assert_allclose(z, z_ref, rtol=1e-9, atol=1e-9)
    assert np.array_equal(front, r * np.sin(w + f) * np.sin(inc) > 0)


def test_kepler_solver_against_converged_newton():
    # Kepler's equation E - e sin E = M; reference: bisection on the monotonic function
    # E - e sin E over [-pi, pi] (obvious and slow), for e up to 0.999.
    m = np.linspace(-20.0, 20.0, 5001)
    m_wrapped = np.remainder(m + np.pi, 2 * np.pi) - np.pi
    for ecc in (0.0, 0.1, 0.5, 0.9, 0.999):
        lo, hi = np.full_like(m, -np.pi), np.full_like(m, np.pi)
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            above = mid - ecc * np.sin(mid) > m_wrapped
            hi = np.where(above, mid, hi)
            lo = np.where(above, lo, mid)
        got = _solve_kepler(m, ecc)
        assert np.max(np.abs(got - ecc * np.sin(got) - m_wrapped)) < 1e-13
        np.testing.assert_allclose(got, 0.5 * (lo + hi), atol=1e-6 if ecc > 0.99 else 1e-10)


# ------------------------------------------------------------------------------------------
# Bad parameters
# ------------------------------------------------------------------------------------------

_GOOD_SKY = dict(t0=0.0, period_days=3.0, a_over_rstar=9.0, b=0.3, ecc=0.0, omega_deg=90.0)


@pytest.mark.parametrize(
    ("overrides", "code", "name"),
    [
        ({"period_days": 0.0}, "non_positive_parameter", "period_days"),
        ({"period_days": -1.0}, "non_positive_parameter", "period_days"),
        ({"a_over_rstar": 1.0}, "orbit_inside_star", "a_over_rstar"),
        ({"b": -0.1}, "negative_parameter", "b"),
        ({"b": 9.5}, "impact_parameter_out_of_range", "b"),
        ({"ecc": 1.0}, "eccentricity_out_of_range", "ecc"),
        ({"ecc": -0.1}, "eccentricity_out_of_range", "ecc"),
        ({"ecc": 0.95}, "orbit_inside_star", "periastron"),
        ({"t0": float("nan")}, "non_finite_parameter", "t0"),
        ({"omega_deg": float("inf")}, "non_finite_parameter", "omega_deg"),
        ({"b": "wide"}, "non_finite_parameter", "b"),
    ],
)
def test_sky_separation_bad_parameters(overrides, code, name):
    # Table of bad inputs -> stable error code naming the argument (common practice).
    kwargs = {**_GOOD_SKY, **overrides}
    with pytest.raises(ParameterError, match=name) as info:
        sky_separation([0.0, 1.0], **kwargs)
    assert info.value.code == code


@pytest.mark.parametrize(
    ("call", "code", "name"),
    [
        (lambda: a_over_rstar(period_days=3.0, mass_msun=0.0, radius_rsun=1.0),
         "non_positive_parameter", "mass_msun"),
        (lambda: a_over_rstar(period_days=[3.0, -1.0], mass_msun=1.0, radius_rsun=1.0),
         "non_positive_parameter", "period_days"),
        (lambda: a_over_rstar(period_days=3.0, mass_msun=1.0, radius_rsun=np.nan),
         "non_finite_parameter", "radius_rsun"),
        (lambda: a_over_rstar_from_density(period_days=3.0, density_gcc=-1.0),
         "non_positive_parameter", "density_gcc"),
        (lambda: impact_parameter(a_over_rstar=10.0, inc_deg=181.0),
         "inclination_out_of_range", "inc_deg"),
        (lambda: impact_parameter(a_over_rstar=0.5, inc_deg=90.0),
         "orbit_inside_star", "a_over_rstar"),
        (lambda: inclination_deg(a_over_rstar=10.0, b=11.0),
         "impact_parameter_out_of_range", "b"),
        (lambda: transit_durations_days(period_days=3.0, k=0.0, a_over_rstar=9.0, b=0.0),
         "non_positive_parameter", "k"),
        (lambda: transit_durations_days(period_days=3.0, k=0.1, a_over_rstar=9.0, b=-1.0),
         "negative_parameter", "b"),
    ],
)
def test_orbit_helpers_bad_parameters(call, code, name):
    # Table of bad inputs -> stable error code naming the argument (common practice).
    with pytest.raises(ParameterError, match=name) as info:
        call()
    assert info.value.code == code
