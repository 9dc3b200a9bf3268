"""Orbital geometry for transits and eclipses: Kepler's third law, durations, sky separation.

All times are in days and all lengths in radii of the (primary) star. The functions are pure and
vectorised over the time array; physical parameters are keyword-only scalars, checked once at the
boundary (cheaply: the simulator calls these thousands of times).

Conventions (Winn 2010, "Transits and Occultations", eqs. 1-7)
------------------------------------------------------------------
The sky plane is X-Y and +Z points to the observer. For an orbit of semi-major axis ``a`` (in
stellar radii), eccentricity ``e``, argument of periastron ``omega`` (of the orbiting body) and
inclination ``i``::

    r = a (1 - e^2) / (1 + e cos f)
    X = -r cos(omega + f),  Y = -r sin(omega + f) cos i,  Z = r sin(omega + f) sin i

The body is in front of the star (transit, primary eclipse) when ``Z > 0`` and behind it
(occultation, secondary eclipse) when ``Z < 0``. Conjunction (mid-transit, time ``t0``) is at true
anomaly ``f = pi/2 - omega``. The impact parameter is ``b = a cos i (1 - e^2) / (1 + e sin omega)``
(Winn 2010 eq. 7).

Errors
------
Bad physical parameters raise :class:`features.errors.ParameterError` with one of the codes
``non_finite_parameter``, ``non_positive_parameter``, ``negative_parameter``,
``orbit_inside_star``, ``eccentricity_out_of_range``, ``impact_parameter_out_of_range``,
``inclination_out_of_range``; the message names the argument.
"""

from __future__ import annotations

import math

import numpy as np
from astropy import constants as _const
from numpy.typing import ArrayLike, NDArray

from features.errors import ParameterError

__all__ = [
    "a_over_rstar",
    "a_over_rstar_from_density",
    "impact_parameter",
    "inclination_deg",
    "sky_separation",
    "transit_durations_days",
]

_G_SI = float(_const.G.si.value)
_M_SUN_KG = float(_const.M_sun.si.value)
_R_SUN_M = float(_const.R_sun.si.value)
_SECONDS_PER_DAY = 86400.0


# --------------------------------------------------------------------------------------------
# Cheap scalar validation shared with features.shapes (private to the features package).
# --------------------------------------------------------------------------------------------


def _finite(name: str, value: float) -> float:
    """Return ``value`` as a float, or raise ``non_finite_parameter`` naming ``name``."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ParameterError(
            "non_finite_parameter", f"{name} must be a finite real number, got {value!r}"
        ) from None
    if not math.isfinite(v):
        raise ParameterError("non_finite_parameter", f"{name} must be finite, got {value!r}")
    return v


def _positive(name: str, value: float) -> float:
    """Return ``value`` if finite and > 0, else raise ``non_positive_parameter``."""
    v = _finite(name, value)
    if v <= 0.0:
        raise ParameterError("non_positive_parameter", f"{name} must be > 0, got {v!r}")
    return v


def _non_negative(name: str, value: float) -> float:
    """Return ``value`` if finite and >= 0, else raise ``negative_parameter``."""
    v = _finite(name, value)
    if v < 0.0:
        raise ParameterError("negative_parameter", f"{name} must be >= 0, got {v!r}")
    return v


def _orbit_size(name: str, value: float) -> float:
    """Return a semi-major axis in stellar radii; it must exceed 1 (``orbit_inside_star``)."""
    v = _finite(name, value)
    if v <= 1.0:
        raise ParameterError("orbit_inside_star", f"{name} must be > 1 stellar radius, got {v!r}")
    return v


def _eccentricity(name: str, value: float) -> float:
    """Return an eccentricity in [0, 1), else raise ``eccentricity_out_of_range``."""
    v = _finite(name, value)
    if not 0.0 <= v < 1.0:
        raise ParameterError("eccentricity_out_of_range", f"{name} must be in [0, 1), got {v!r}")
    return v


def _positive_array(name: str, value: ArrayLike) -> NDArray[np.float64]:
    """Return ``value`` as a float64 array whose elements are all finite and > 0."""
    arr = np.asarray(value, dtype=np.float64)
    if not np.all(np.isfinite(arr)):
        raise ParameterError("non_finite_parameter", f"{name} must be finite everywhere")
    if np.any(arr <= 0.0):
        raise ParameterError("non_positive_parameter", f"{name} must be > 0 everywhere")
    return arr


def _as_float_or_array(arr: NDArray[np.float64]) -> float | NDArray[np.float64]:
    """Return a Python float for 0-d input, the array otherwise."""
    return float(arr) if arr.ndim == 0 else arr


def _cos_inclination(*, a_over_rstar: float, b: float, ecc: float, omega_rad: float) -> float:
    """cos i from the impact parameter (Winn 2010 eq. 7); raise if it would exceed 1."""
    cos_i = b * (1.0 + ecc * math.sin(omega_rad)) / (a_over_rstar * (1.0 - ecc * ecc))
    if cos_i > 1.0:
        raise ParameterError(
            "impact_parameter_out_of_range",
            f"b={b!r} is impossible for a_over_rstar={a_over_rstar!r}, ecc={ecc!r} "
            "(it implies cos i > 1)",
        )
    return cos_i


# --------------------------------------------------------------------------------------------
# Public functions
# --------------------------------------------------------------------------------------------


def a_over_rstar(
    *, period_days: ArrayLike, mass_msun: ArrayLike, radius_rsun: ArrayLike
) -> float | NDArray[np.float64]:
    """Scaled semi-major axis a/R* from Kepler's third law.

    Parameters
    ----------
    period_days : float or array_like
        Orbital period [days].
    mass_msun : float or array_like
        Total mass of the system [solar masses] (the star's mass for a planet).
    radius_rsun : float or array_like
        Stellar radius [solar radii].

    Returns
    -------
    float or ndarray
        a / R* [dimensionless]; an array if any input is an array (inputs broadcast).

    Raises
    ------
    ParameterError
        ``non_finite_parameter`` or ``non_positive_parameter``, naming the argument.

    Notes
    -----
    Kepler's third law, ``a^3 = G M P^2 / (4 pi^2)``, with G, M_sun and R_sun from
    ``astropy.constants`` (IAU 2015 nominal solar values).

    Examples
    --------
    >>> round(a_over_rstar(period_days=3.0, mass_msun=1.0, radius_rsun=1.0), 2)
    8.75
    """
    period = _positive_array("period_days", period_days)
    mass = _positive_array("mass_msun", mass_msun)
    radius = _positive_array("radius_rsun", radius_rsun)
    period_s = period * _SECONDS_PER_DAY
    a_m = np.cbrt(_G_SI * mass * _M_SUN_KG * period_s**2 / (4.0 * np.pi**2))
    return _as_float_or_array(a_m / (radius * _R_SUN_M))


def a_over_rstar_from_density(
    *, period_days: ArrayLike, density_gcc: ArrayLike
) -> float | NDArray[np.float64]:
    """Scaled semi-major axis a/R* from the mean stellar density.

    Parameters
    ----------
    period_days : float or array_like
        Orbital period [days].
    density_gcc : float or array_like
        Mean stellar density [g cm^-3] (the Sun: about 1.41).

    Returns
    -------
    float or ndarray
        a / R* [dimensionless].

    Raises
    ------
    ParameterError
        ``non_finite_parameter`` or ``non_positive_parameter``, naming the argument.

    Notes
    -----
    ``rho_* = 3 pi (a/R*)^3 / (G P^2)`` for a companion of negligible mass (Seager &
    Mallen-Ornelas 2003, eq. 30), hence ``a/R* = (G rho_* P^2 / (3 pi))^(1/3)``.

    Examples
    --------
    >>> round(a_over_rstar_from_density(period_days=10.0, density_gcc=1.41), 1)
    19.5
    """
    period = _positive_array("period_days", period_days)
    density = _positive_array("density_gcc", density_gcc)
    period_s = period * _SECONDS_PER_DAY
    rho_si = density * 1000.0
    return _as_float_or_array(np.cbrt(_G_SI * rho_si * period_s**2 / (3.0 * np.pi)))


def impact_parameter(
    *, a_over_rstar: float, inc_deg: float, ecc: float = 0.0, omega_deg: float = 90.0
) -> float:
    """Impact parameter of the transit (primary eclipse) in stellar radii.

    Parameters
    ----------
    a_over_rstar : float
        Semi-major axis [stellar radii], > 1.
    inc_deg : float
        Orbital inclination [degrees], in [0, 180].
    ecc : float, optional
        Eccentricity, in [0, 1).
    omega_deg : float, optional
        Argument of periastron of the orbiting body [degrees].

    Returns
    -------
    float
        b [stellar radii], >= 0.

    Raises
    ------
    ParameterError
        ``orbit_inside_star``, ``inclination_out_of_range``, ``eccentricity_out_of_range``,
        ``non_finite_parameter``.

    Notes
    -----
    ``b = (a cos i / R*) (1 - e^2) / (1 + e sin omega)`` (Winn 2010, eq. 7).

    Examples
    --------
    >>> round(impact_parameter(a_over_rstar=10.0, inc_deg=87.0), 4)
    0.5234
    """
    a = _orbit_size("a_over_rstar", a_over_rstar)
    inc = _finite("inc_deg", inc_deg)
    if not 0.0 <= inc <= 180.0:
        raise ParameterError("inclination_out_of_range", f"inc_deg must be in [0, 180], got {inc}")
    e = _eccentricity("ecc", ecc)
    w = math.radians(_finite("omega_deg", omega_deg))
    return abs(a * math.cos(math.radians(inc)) * (1.0 - e * e) / (1.0 + e * math.sin(w)))


def inclination_deg(
    *, a_over_rstar: float, b: float, ecc: float = 0.0, omega_deg: float = 90.0
) -> float:
    """Orbital inclination (in [0, 90] degrees) giving impact parameter ``b``.

    Parameters
    ----------
    a_over_rstar : float
        Semi-major axis [stellar radii], > 1.
    b : float
        Impact parameter [stellar radii], >= 0.
    ecc : float, optional
        Eccentricity, in [0, 1).
    omega_deg : float, optional
        Argument of periastron of the orbiting body [degrees].

    Returns
    -------
    float
        Inclination [degrees].

    Raises
    ------
    ParameterError
        ``impact_parameter_out_of_range`` when ``b`` would need cos i > 1; also
        ``orbit_inside_star``, ``negative_parameter``, ``eccentricity_out_of_range``.

    Notes
    -----
    Inverse of Winn (2010) eq. 7: ``cos i = b (1 + e sin omega) / ((a/R*) (1 - e^2))``.

    Examples
    --------
    >>> round(inclination_deg(a_over_rstar=10.0, b=0.5), 3)
    87.134
    """
    a = _orbit_size("a_over_rstar", a_over_rstar)
    bb = _non_negative("b", b)
    e = _eccentricity("ecc", ecc)
    w = math.radians(_finite("omega_deg", omega_deg))
    cos_i = _cos_inclination(a_over_rstar=a, b=bb, ecc=e, omega_rad=w)
    return math.degrees(math.acos(cos_i))


def transit_durations_days(
    *, period_days: float, k: float, a_over_rstar: float, b: float
) -> tuple[float, float]:
    """Total (T14) and full (T23) transit durations for a circular orbit.

    Parameters
    ----------
    period_days : float
        Orbital period [days].
    k : float
        Radius ratio R_p / R* (> 0).
    a_over_rstar : float
        Semi-major axis [stellar radii], > 1.
    b : float
        Impact parameter [stellar radii], >= 0.

    Returns
    -------
    (t14_days, t23_days) : tuple of float
        First-to-fourth and second-to-third contact durations [days]. ``t23_days`` is 0.0 when
        the transit is grazing (``b > 1 - k``, no second and third contact) and both are 0.0 when
        there is no transit (``b >= 1 + k``).

    Raises
    ------
    ParameterError
        ``non_positive_parameter``, ``negative_parameter``, ``orbit_inside_star``,
        ``impact_parameter_out_of_range`` (b > a/R*).

    Notes
    -----
    Winn (2010) eqs. 14-15 with ``e = 0``::

        T14 = P/pi * arcsin( sqrt((1 + k)^2 - b^2) / ((a/R*) sin i) )
        T23 = P/pi * arcsin( sqrt((1 - k)^2 - b^2) / ((a/R*) sin i) )

    An arcsin argument above 1 (possible only for very close orbits) is clipped to 1.

    Examples
    --------
    >>> t14, t23 = transit_durations_days(period_days=3.0, k=0.1, a_over_rstar=8.75, b=0.0)
    >>> round(t14 * 24, 2), round(t23 * 24, 2)
    (2.89, 2.36)
    """
    period = _positive("period_days", period_days)
    kk = _positive("k", k)
    a = _orbit_size("a_over_rstar", a_over_rstar)
    bb = _non_negative("b", b)
    cos_i = _cos_inclination(a_over_rstar=a, b=bb, ecc=0.0, omega_rad=0.0)
    sin_i = math.sqrt(1.0 - cos_i * cos_i)

    def _duration(chord_sq: float) -> float:
        if chord_sq <= 0.0:
            return 0.0
        arg = min(math.sqrt(chord_sq) / (a * sin_i), 1.0)
        return period / math.pi * math.asin(arg)

    t14 = _duration((1.0 + kk) ** 2 - bb * bb)
    t23 = _duration((1.0 - kk) ** 2 - bb * bb) if kk < 1.0 else 0.0
    return t14, t23


def _solve_kepler(mean_anomaly: NDArray[np.float64], ecc: float) -> NDArray[np.float64]:
    """Eccentric anomaly E solving ``E - e sin E = M``, vectorised and non-iterative.

    Markley (1995, Celest. Mech. Dyn. Astron. 63, 101): a cubic starter followed by one
    fifth-order correction; the residual ``|E - e sin E - M|`` is below 1e-15 for every
    ``0 <= e < 1`` (checked in the tests against a converged Newton iteration).
    """
    m = np.remainder(mean_anomaly + np.pi, 2.0 * np.pi) - np.pi
    sign = np.where(m < 0.0, -1.0, 1.0)
    m = np.abs(m)
    pi2 = np.pi * np.pi
    alpha = (3.0 * pi2 + 1.6 * np.pi * (np.pi - m) / (1.0 + ecc)) / (pi2 - 6.0)
    d = 3.0 * (1.0 - ecc) + alpha * ecc
    q = 2.0 * alpha * d * (1.0 - ecc) - m * m
    r = 3.0 * alpha * d * (d - 1.0 + ecc) * m + m * m * m
    w = np.cbrt(np.abs(r) + np.sqrt(q * q * q + r * r)) ** 2
    ecc_anom = (2.0 * r * w / (w * w + w * q + q * q) + m) / d
    f2 = ecc * np.sin(ecc_anom)
    f3 = ecc * np.cos(ecc_anom)
    f0 = ecc_anom - f2 - m
    f1 = 1.0 - f3
    d3 = -f0 / (f1 - 0.5 * f0 * f2 / f1)
    d4 = -f0 / (f1 + 0.5 * d3 * f2 + d3 * d3 * f3 / 6.0)
    d5 = -f0 / (f1 + 0.5 * d4 * f2 + d4 * d4 * f3 / 6.0 - d4 * d4 * d4 * f2 / 24.0)
    return sign * (ecc_anom + d5)


def sky_separation(
    time_days: ArrayLike,
    *,
    t0: float,
    period_days: float,
    a_over_rstar: float,
    b: float,
    ecc: float = 0.0,
    omega_deg: float = 90.0,
) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Projected star-body separation and whether the body is in front of the star.

    Parameters
    ----------
    time_days : array_like
        Times [days].
    t0 : float
        Time of conjunction with the body in front (mid-transit / primary eclipse) [days].
    period_days : float
        Orbital period [days].
    a_over_rstar : float
        Semi-major axis [stellar radii], > 1.
    b : float
        Impact parameter of the transit [stellar radii], >= 0 (sets the inclination through
        Winn 2010 eq. 7).
    ecc : float, optional
        Eccentricity, in [0, 1). ``0`` uses a closed-form circular path.
    omega_deg : float, optional
        Argument of periastron of the orbiting body [degrees] (ignored when ``ecc == 0``).

    Returns
    -------
    z : ndarray of float64
        Sky-projected centre-to-centre separation [stellar radii], same shape as ``time_days``.
    in_front : ndarray of bool
        True where the body is between the star and the observer (``Z > 0``).

    Raises
    ------
    ParameterError
        ``non_positive_parameter``, ``negative_parameter``, ``orbit_inside_star`` (also when the
        periastron distance ``a (1 - e)`` is <= 1), ``eccentricity_out_of_range``,
        ``impact_parameter_out_of_range``, ``non_finite_parameter``.

    Notes
    -----
    Circular: with ``phi = 2 pi (t - t0) / P``, ``z = (a/R*) sqrt(sin^2 phi + cos^2 i cos^2 phi)``
    and the body is in front when ``cos phi > 0``. Eccentric: the mean anomaly at conjunction
    follows from ``f = pi/2 - omega``; Kepler's equation is solved with Markley's (1995) method and
    ``z = r sqrt(1 - sin^2(omega + f) sin^2 i)`` (Winn 2010, eqs. 2-5).

    Examples
    --------
    >>> z, front = sky_separation([0.0, 1.5], t0=0.0, period_days=3.0, a_over_rstar=8.5, b=0.3)
    >>> round(float(z[0]), 6), bool(front[0]), bool(front[1])
    (0.3, True, False)
    """
    t = np.asarray(time_days, dtype=np.float64)
    t0_ = _finite("t0", t0)
    period = _positive("period_days", period_days)
    a = _orbit_size("a_over_rstar", a_over_rstar)
    bb = _non_negative("b", b)
    e = _eccentricity("ecc", ecc)
    w = math.radians(_finite("omega_deg", omega_deg))
    if e > 0.0 and a * (1.0 - e) <= 1.0:
        raise ParameterError(
            "orbit_inside_star",
            f"periastron distance a_over_rstar*(1-ecc)={a * (1.0 - e)!r} must be > 1",
        )
    cos_i = _cos_inclination(a_over_rstar=a, b=bb, ecc=e, omega_rad=w if e > 0.0 else 0.0)

    if e == 0.0:
        cycles = (t - t0_) / period
        cycles -= np.round(cycles)  # orbital phase in [-1/2, 1/2], 0 at conjunction
        sin_sq = np.sin((2.0 * np.pi) * cycles) ** 2
        # sin^2 + cos^2 i cos^2 = cos^2 i + sin^2 i sin^2 (one trigonometric call)
        z = a * np.sqrt(cos_i * cos_i + (1.0 - cos_i * cos_i) * sin_sq)
        return z, np.abs(cycles) < 0.25

    f_conj = 0.5 * math.pi - w
    e_conj = 2.0 * math.atan2(
        math.sqrt(1.0 - e) * math.sin(0.5 * f_conj), math.sqrt(1.0 + e) * math.cos(0.5 * f_conj)
    )
    m_conj = e_conj - e * math.sin(e_conj)
    ecc_anom = _solve_kepler(m_conj + (2.0 * np.pi / period) * (t - t0_), e)
    # Position in the orbital plane (x towards periastron), in stellar radii.
    x_orb = a * (np.cos(ecc_anom) - e)
    y_orb = a * math.sqrt(1.0 - e * e) * np.sin(ecc_anom)
    # r cos(omega + f) and r sin(omega + f).
    r_cos = x_orb * math.cos(w) - y_orb * math.sin(w)
    r_sin = x_orb * math.sin(w) + y_orb * math.cos(w)
    z = np.sqrt(r_cos * r_cos + (r_sin * cos_i) ** 2)
    return z, r_sin > 0.0
