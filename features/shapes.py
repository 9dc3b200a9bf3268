"""Physical shape models of dips: transits, eclipsing binaries, exocomets, variability, artefacts.

Every model is a pure, vectorised function of a time array [days] returning the relative flux
(1 outside the event). Lengths are in radii of the (primary) star. Physical parameters are
keyword-only scalars, validated once (cheaply) at the boundary: the simulator and the shape fits
call these functions many thousands of times.

Contents
--------
* Occultation of a limb-darkened disk: :func:`occulted_flux_uniform`,
  :func:`occulted_flux_quadratic` (Mandel & Agol 2002).
* :func:`transit_flux`: a planet crossing a quadratically limb-darkened star.
* :func:`eclipsing_binary_flux`: two limb-darkened stars, any radius ratio, third light,
  ellipsoidal and reflection modulation; :func:`ellipsoidal_amplitude` (Morris & Naftilan 1993).
* :func:`comet_flux`: a dust tail with an exponential optical-depth profile crossing the disk.
* Stellar variability: :func:`spot_modulation`, :func:`pulsation`.
* Instrument artefacts: :func:`box_dip`, :func:`step`, :func:`exponential_ramp`,
  :func:`scattered_light_hump`, :func:`cadence_dip`.

Errors
------
Bad parameters raise :class:`features.errors.ParameterError` naming the argument, with one of the
codes ``non_finite_parameter``, ``non_positive_parameter``, ``negative_parameter``,
``orbit_inside_star``, ``eccentricity_out_of_range``, ``impact_parameter_out_of_range``,
``invalid_limb_darkening``, ``third_light_out_of_range``, ``strip_height_out_of_range``,
``depth_out_of_range``, ``amplitude_out_of_range``, ``invalid_cadence_count``,
``parameter_length_mismatch``, ``inclination_out_of_range``. Time arrays are not checked (that
is the segment validator's job).
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import fft as _fft
from scipy import special as _special

from features.errors import ParameterError
from features.orbits import (
    _finite,
    _non_negative,
    _orbit_size,
    _positive,
    sky_separation,
)

__all__ = [
    "box_dip",
    "cadence_dip",
    "comet_flux",
    "eclipsing_binary_flux",
    "ellipsoidal_amplitude",
    "exponential_ramp",
    "occulted_flux_quadratic",
    "occulted_flux_uniform",
    "pulsation",
    "scattered_light_hump",
    "spot_modulation",
    "step",
    "transit_flux",
]

FloatArray = NDArray[np.float64]

# Half-widths of the bands around the special separations z = k and z = 1 - k of Mandel & Agol
# (2002) Table 1, where the general expressions become 0 * inf or lose digits; inside a band the
# closed form at the special separation is used. Measured against a direct radial integral the
# flux error stays below 2e-8 on both sides of each band edge (tests/features/test_shapes.py).
_TOL_Z_EQ_K = 1e-8
_TOL_Z_EQ_1MK = 1e-11
_TOL_K_HALF = 1e-12

# Bulirsch's cel: stop when the AGM ratio agrees to this (result then good to ~1e-16).
_CEL_TOL = 1e-9
_CEL_MAX_ITER = 40

# Comet profile grid (see comet_flux Notes).
_COMET_MIN_CHORD_CELLS = 128
_COMET_CELLS_PER_TAIL = 8
_COMET_MAX_NODES = 4096
_COMET_THIN_TOL = 1e-5
_COMET_DIRECT_CONV_MAX = 300_000


# --------------------------------------------------------------------------------------------
# Validation helpers
# --------------------------------------------------------------------------------------------


def _limb_darkening(u1: float, u2: float, *, names: tuple[str, str] = ("u1", "u2")) -> None:
    """Check a quadratic law: positive intensity that decreases towards the limb.

    Conditions ``u1 + u2 <= 1``, ``u1 >= 0``, ``u1 + 2 u2 >= 0`` (Kipping 2013, MNRAS 435,
    2152, sec. 2), i.e. ``I(mu) >= 0`` at the limb and ``dI/dmu >= 0`` everywhere.
    """
    a = _finite(names[0], u1)
    b = _finite(names[1], u2)
    if a + b > 1.0 or a < 0.0 or a + 2.0 * b < 0.0:
        raise ParameterError(
            "invalid_limb_darkening",
            f"{names[0]}={a!r}, {names[1]}={b!r} must satisfy {names[0]} + {names[1]} <= 1, "
            f"{names[0]} >= 0 and {names[0]} + 2 {names[1]} >= 0",
        )


def _fraction_below_one(name: str, value: float, code: str) -> float:
    """Return ``value`` in [0, 1), else raise ``code``."""
    v = _finite(name, value)
    if not 0.0 <= v < 1.0:
        raise ParameterError(code, f"{name} must be in [0, 1), got {v!r}")
    return v


def _above_minus_one(name: str, value: float) -> float:
    """Return a relative amplitude > -1 (flux stays positive), else ``amplitude_out_of_range``."""
    v = _finite(name, value)
    if v <= -1.0:
        raise ParameterError("amplitude_out_of_range", f"{name} must be > -1, got {v!r}")
    return v


def _float_vector(name: str, value: ArrayLike) -> FloatArray:
    """Return a finite 1-D float64 vector (a scalar becomes length 1)."""
    arr = np.atleast_1d(np.asarray(value, dtype=np.float64))
    if arr.ndim != 1 or not np.all(np.isfinite(arr)):
        raise ParameterError("non_finite_parameter", f"{name} must be a finite 1-D sequence")
    return arr


def _same_length(**vectors: FloatArray) -> None:
    """Raise ``parameter_length_mismatch`` unless all vectors have the same length."""
    lengths = {name: len(v) for name, v in vectors.items()}
    if len(set(lengths.values())) > 1:
        raise ParameterError(
            "parameter_length_mismatch",
            "lengths differ: " + ", ".join(f"{n}={n_}" for n, n_ in lengths.items()),
        )


# --------------------------------------------------------------------------------------------
# Mandel & Agol (2002) occultation kernels (no validation; z >= 0, k > 0 assumed)
# --------------------------------------------------------------------------------------------


def _overlap_angles(z: FloatArray, k: float) -> tuple[FloatArray, FloatArray, FloatArray]:
    """kappa_0, kappa_1 and the kite term of Mandel & Agol (2002) eq. 1 for partial overlap."""
    kappa1 = np.arccos(np.clip((1.0 - k * k + z * z) / (2.0 * z), -1.0, 1.0))
    kappa0 = np.arccos(np.clip((k * k + z * z - 1.0) / (2.0 * k * z), -1.0, 1.0))
    kite = np.sqrt(np.clip(4.0 * z * z - (1.0 + z * z - k * k) ** 2, 0.0, None))
    return kappa0, kappa1, kite


def _uniform_fraction(z: FloatArray, k: float) -> FloatArray:
    """Occulted fraction lambda^e of a uniform disk (Mandel & Agol 2002, eq. 1)."""
    lam = np.zeros_like(z)
    if k < 1.0:
        lam[z <= 1.0 - k] = k * k
    else:
        lam[z <= k - 1.0] = 1.0
    part = (z > abs(1.0 - k)) & (z < 1.0 + k)
    if np.any(part):
        zp = z[part]
        kappa0, kappa1, kite = _overlap_angles(zp, k)
        # arccos near 1 limits the absolute accuracy to ~1e-8 at contact: keep within [0, 1]
        lam[part] = np.clip((k * k * kappa0 + kappa1 - 0.5 * kite) / np.pi, 0.0, 1.0)
    return lam


def _cel_iterations(kc_min: float) -> int:
    """Number of Bulirsch iterations that converge ``cel`` for every ``kc >= kc_min``.

    The convergence test of Bulirsch's algorithm involves only the arithmetic-geometric-mean
    sequence started from ``kc`` (not ``p``, ``a``, ``b``), and the smallest ``kc`` converges
    last, so one scalar run decides for the whole array.
    """
    qc = max(kc_min, 1e-300)
    e = qc
    em = 1.0
    for n in range(1, _CEL_MAX_ITER + 1):
        g = em
        em += qc
        if abs(g - qc) <= g * _CEL_TOL:
            return n
        qc = 2.0 * math.sqrt(e)
        e = qc * em
    return _CEL_MAX_ITER


def _cel(kc: FloatArray, p: FloatArray, a: FloatArray) -> FloatArray:
    """Bulirsch's general complete elliptic integral ``cel(kc, p, a, a)`` for ``p > 0``.

    ``cel(kc, p, a, b)`` is the integral over ``0 <= t <= pi/2`` of ``(a cos^2 t + b sin^2 t) /
    ((cos^2 t + p sin^2 t) sqrt(cos^2 t + kc^2 sin^2 t))``; with ``b = a`` it is
    ``a Pi(n, m)`` for ``p = 1 - n``, ``m = 1 - kc^2``. Algorithm of Bulirsch (1969, Numer. Math.
    13, 305) as given by Press et al., Numerical Recipes (2nd ed., sec. 6.11), vectorised with a
    common iteration count. Unlike Carlson's ``RF + n/3 RJ`` it does not cancel as
    ``n -> -inf``, and it is several times faster than ``scipy.special.elliprj``; the tests
    check it against Carlson's form.
    """
    n_iter = _cel_iterations(float(np.min(kc)))
    qc = kc.copy()
    root_p = np.sqrt(p)
    a = a.copy()
    b = a / root_p
    e = qc.copy()
    em = np.ones_like(qc)
    g = np.empty_like(qc)
    t = np.empty_like(qc)
    for i in range(n_iter):
        np.divide(b, root_p, out=t)
        np.divide(e, root_p, out=g)
        b += a * g
        b *= 2.0
        a += t
        root_p += g
        em += qc
        if i == n_iter - 1:
            break
        np.sqrt(e, out=qc)
        qc *= 2.0
        np.multiply(qc, em, out=e)
    return 0.5 * np.pi * (b + a * em) / (em * (em + root_p))


def _lambda1_terms(z: FloatArray, k: float) -> tuple[FloatArray, ...]:
    """Terms of lambda_1, Mandel & Agol (2002) Table 2 (partial overlap, z != k, 1 - k).

    ``lambda_1 = pref [c_K K(m) + c_E E(m) - 3 (q/a) Pi((a-1)/a, m)]`` with
    ``m = (1 - a) / (4 z k)``; ``1 - m = (b - 1) / (4 z k)`` is formed without cancellation.
    Returns ``(1 - m, m, 1 - n, -3 q / a, c_K, c_E, pref)``.
    """
    a = (z - k) ** 2
    b = (z + k) ** 2
    q = k * k - z * z
    four_zk = 4.0 * z * k
    c_k = (1.0 - b) * (2.0 * b + a - 3.0) - 3.0 * q * (b - 2.0)
    c_e = four_zk * (z * z + 7.0 * k * k - 4.0)
    pref = 1.0 / (9.0 * np.pi * np.sqrt(z * k))
    return (b - 1.0) / four_zk, (1.0 - a) / four_zk, 1.0 / a, -3.0 * q / a, c_k, c_e, pref


def _lambda2_terms(z: FloatArray, k: float) -> tuple[FloatArray, ...]:
    """Terms of lambda_2, Mandel & Agol (2002) Table 2 (occultor inside the disk, z != k).

    Modulus ``1/kk``: ``m = 4 z k / (1 - a)``, ``1 - m = (1 - b) / (1 - a)``; characteristic
    ``n = (a - b)/a``; z = 0 is the regular limit (lambda_6). Same return layout as
    :func:`_lambda1_terms`.
    """
    a = (z - k) ** 2
    b = (z + k) ** 2
    q = k * k - z * z
    one_minus_a = 1.0 - a
    c_k = 1.0 - 5.0 * z * z + k * k + q * q
    c_e = one_minus_a * (z * z + 7.0 * k * k - 4.0)
    pref = 2.0 / (9.0 * np.pi * np.sqrt(one_minus_a))
    return (
        (1.0 - b) / one_minus_a, 4.0 * z * k / one_minus_a, b / a, -3.0 * q / a, c_k, c_e, pref
    )


def _lambda_from_terms(terms: tuple[FloatArray, ...]) -> FloatArray:
    """Evaluate ``pref [c_K K + c_E E + c cel(kc, p, c, c)]`` (one call for all points).

    K from ``scipy.special.ellipkm1(1 - m)`` (accurate as m -> 1), E from
    ``scipy.special.ellipe``, the third-kind term from :func:`_cel`.
    """
    y, m, p, c_pi, c_k, c_e, pref = terms
    third = _cel(np.sqrt(y), p, c_pi)
    return pref * (c_k * _special.ellipkm1(y) + c_e * _special.ellipe(m) + third)


def _lambda_at_z_eq_k(k: float) -> float:
    """lambda^d at z = k: lambda_4 (k < 1/2), case 6 (k = 1/2), lambda_3 (k > 1/2)."""
    if abs(k - 0.5) < _TOL_K_HALF:
        return 1.0 / 3.0 - 4.0 / (9.0 * np.pi)
    if k < 0.5:
        m = 4.0 * k * k
        return 1.0 / 3.0 + 2.0 / (9.0 * np.pi) * (
            4.0 * (2.0 * k * k - 1.0) * _special.ellipe(m)
            + (1.0 - 4.0 * k * k) * _special.ellipk(m)
        )
    m = 1.0 / (4.0 * k * k)
    return (
        1.0 / 3.0
        + 16.0 * k / (9.0 * np.pi) * (2.0 * k * k - 1.0) * _special.ellipe(m)
        - (1.0 - 4.0 * k * k) * (3.0 - 8.0 * k * k) / (9.0 * np.pi * k) * _special.ellipk(m)
    )


def _lambda_mu_at_edge(k: float) -> float:
    """lambda^d + 2/3 Theta(k - z) at z = 1 - k: lambda_5 with its Theta(k - 1/2) cancelled."""
    return 2.0 / (3.0 * np.pi) * math.acos(1.0 - 2.0 * k) - 4.0 / (9.0 * np.pi) * (
        3.0 + 2.0 * k - 8.0 * k * k
    ) * math.sqrt(k * (1.0 - k))


def _quadratic_fraction(z: FloatArray, k: float, u1: float, u2: float) -> FloatArray:
    """Occulted fraction of a quadratically limb-darkened disk (Mandel & Agol 2002, Table 1).

    Returns ``1 - F``; ``z`` is a 1-D array of separations with ``0 <= z < 1 + k``.
    """
    kk = k * k
    lam_e = np.empty_like(z)  # lambda^e: occulted part of the uniform disk
    lam_mu = np.empty_like(z)  # lambda^d + 2/3 Theta(k - z): occulted part of int mu dA / pi
    eta = np.empty_like(z)  # eta^d: occulted part of int r^2 dA / pi
    partial = z > abs(1.0 - k)  # cases 2, 7, 8
    i_part = np.flatnonzero(partial)
    i_rest = np.flatnonzero(~partial)  # inside (k < 1, cases 3-6, 9, 10) or covered (case 11)

    z_part = z[i_part]
    kappa0, kappa1, kite = _overlap_angles(z_part, k)
    lam_e[i_part] = (kk * kappa0 + kappa1 - 0.5 * kite) / np.pi
    root = np.sqrt(np.clip(((1.0 - (z_part - k) ** 2) * ((z_part + k) ** 2 - 1.0)), 0.0, None))
    eta[i_part] = (  # eta_1
        kappa1 + kk * (kk + 2.0 * z_part**2) * kappa0 - 0.25 * (1.0 + 5.0 * kk + z_part**2) * root
    ) / (2.0 * np.pi)
    z_rest = z[i_rest]
    if k < 1.0:
        lam_e[i_rest] = kk
        eta[i_rest] = 0.5 * kk * (kk + 2.0 * z_rest**2)  # eta_2
    else:
        lam_e[i_rest] = 1.0
        lam_mu[i_rest] = 2.0 / 3.0
        eta[i_rest] = 0.5
    c2 = u1 + 2.0 * u2
    if c2 == 0.0 and u2 == 0.0:
        return np.clip(lam_e, 0.0, 1.0)

    # lambda^d: general expressions away from the special separations z = k and z = 1 - k.
    near_k_part = np.abs(z_part - k) < _TOL_Z_EQ_K  # case 7
    skip = near_k_part
    if k < 1.0:  # case 4 approached from outside (1 - m underflows to 0 there)
        near_edge_part = (np.abs(z_part - (1.0 - k)) < _TOL_Z_EQ_1MK) & ~near_k_part
        lam_mu[i_part[near_edge_part]] = _lambda_mu_at_edge(k)
        skip = skip | near_edge_part
    groups = []
    gen = i_part[~skip]
    if gen.size:
        groups.append((gen, _lambda1_terms(z[gen], k)))
    if k < 1.0:
        near_k_rest = np.abs(z_rest - k) < _TOL_Z_EQ_K  # cases 5, 6
        near_edge = np.abs(z_rest - (1.0 - k)) < _TOL_Z_EQ_1MK  # case 4
        near_edge &= ~near_k_rest
        lam_mu[i_rest[near_edge]] = _lambda_mu_at_edge(k)
        lam_mu[i_rest[near_k_rest]] = _lambda_at_z_eq_k(k)
        gen = i_rest[~(near_k_rest | near_edge)]
        if gen.size:
            groups.append((gen, _lambda2_terms(z[gen], k)))
    lam_mu[i_part[near_k_part]] = _lambda_at_z_eq_k(k)
    if groups:
        idx = np.concatenate([g[0] for g in groups]) if len(groups) > 1 else groups[0][0]
        terms = (
            tuple(np.concatenate(parts) for parts in zip(*(g[1] for g in groups), strict=True))
            if len(groups) > 1
            else groups[0][1]
        )
        z_gen = z[idx]
        lam_mu[idx] = _lambda_from_terms(terms) + np.where(z_gen < k, 2.0 / 3.0, 0.0)

    norm = 1.0 - u1 / 3.0 - u2 / 6.0
    # clip: rounding near contact (arccos of arguments near 1) may leave ~-1e-8
    return np.clip(((1.0 - c2) * lam_e + c2 * lam_mu + u2 * eta) / norm, 0.0, 1.0)


def occulted_flux_uniform(z: ArrayLike, k: float) -> FloatArray:
    """Relative flux of a uniform disk occulted by a disk of radius ratio ``k``.

    Parameters
    ----------
    z : array_like
        Centre-to-centre sky separation [radii of the occulted disk], >= 0 (the absolute value
        is used).
    k : float
        Radius of the occulting disk over that of the occulted one (> 0; k > 1 allowed).

    Returns
    -------
    ndarray of float64
        ``1 - lambda^e``: 1 without overlap, ``1 - k^2`` when fully inside, 0 when fully covered.

    Raises
    ------
    ParameterError
        ``non_positive_parameter`` (k <= 0), ``non_finite_parameter``.

    Notes
    -----
    Mandel & Agol (2002, ApJ 580, L171), eq. 1: for ``|1 - k| < z < 1 + k``,
    ``lambda^e = [k^2 kappa_0 + kappa_1 - sqrt((4 z^2 - (1 + z^2 - k^2)^2) / 4)] / pi`` with
    ``kappa_1 = arccos[(1 - k^2 + z^2) / (2 z)]`` and
    ``kappa_0 = arccos[(k^2 + z^2 - 1) / (2 k z)]``.

    Examples
    --------
    >>> occulted_flux_uniform([0.0, 0.5, 2.0], 0.1)
    array([0.99, 0.99, 1.  ])
    """
    kk = _positive("k", k)
    zz = np.abs(np.asarray(z, dtype=np.float64))
    flat = zz.reshape(-1)
    return (1.0 - _uniform_fraction(flat, kk)).reshape(zz.shape)


def occulted_flux_quadratic(z: ArrayLike, k: float, u1: float, u2: float) -> FloatArray:
    """Relative flux of a quadratically limb-darkened disk occulted by a dark disk.

    Parameters
    ----------
    z : array_like
        Centre-to-centre sky separation [radii of the occulted disk], >= 0 (absolute value used).
    k : float
        Radius ratio occulter / occulted (> 0; k > 1 allowed).
    u1, u2 : float
        Quadratic limb-darkening coefficients, ``I(mu)/I(1) = 1 - u1 (1 - mu) - u2 (1 - mu)^2``.

    Returns
    -------
    ndarray of float64
        Relative flux ``F`` (1 without overlap, 0 when fully covered).

    Raises
    ------
    ParameterError
        ``non_positive_parameter`` (k), ``invalid_limb_darkening``, ``non_finite_parameter``.

    Notes
    -----
    Mandel & Agol (2002), sec. 4 and Tables 1-2, with ``c2 = u1 + 2 u2`` and ``c4 = -u2``::

        F = 1 - [(1 - c2) lambda^e + c2 (lambda^d + 2/3 Theta(k - z)) - c4 eta^d]
                / (1 - u1/3 - u2/6)

    All eleven cases of their Table 1 are evaluated in closed form, including ``k > 1`` (cases
    2, 7, 8, 11), so no numerical integration is needed. K and E come from
    ``scipy.special.ellipkm1`` (with ``1 - m`` formed without cancellation) and ``ellipe``; the
    third-kind integral from Bulirsch's ``cel`` (vectorised), which is free of the cancellation
    of Carlson's ``RF + n/3 RJ`` as ``n -> -inf`` (z -> k) and 3-4 times faster than
    ``scipy.special.elliprj``; the tests check it against Carlson's form.

    Examples
    --------
    >>> f = occulted_flux_quadratic([0.0, 0.95, 1.2], 0.1, 0.4, 0.26)
    >>> [round(float(v), 5) for v in f]
    [0.98787, 0.99403, 1.0]
    """
    kk = _positive("k", k)
    _limb_darkening(u1, u2)
    zz = np.abs(np.asarray(z, dtype=np.float64))
    flat = zz.reshape(-1)
    out = np.ones_like(flat)
    hit = flat < 1.0 + kk
    if np.any(hit):
        out[hit] = 1.0 - _quadratic_fraction(flat[hit], kk, float(u1), float(u2))
    return out.reshape(zz.shape)


# --------------------------------------------------------------------------------------------
# Transit and eclipsing binary
# --------------------------------------------------------------------------------------------


def transit_flux(
    time_days: ArrayLike,
    *,
    t0: float,
    period_days: float,
    k: float,
    a_over_rstar: float,
    b: float,
    u1: float,
    u2: float,
    ecc: float = 0.0,
    omega_deg: float = 90.0,
) -> FloatArray:
    """Light curve of a dark planet transiting a quadratically limb-darkened star.

    Parameters
    ----------
    time_days : array_like
        Times [days].
    t0 : float
        Time of mid-transit (conjunction) [days].
    period_days : float
        Orbital period [days], > 0.
    k : float
        Radius ratio R_p / R*, > 0.
    a_over_rstar : float
        Semi-major axis [stellar radii], > 1.
    b : float
        Impact parameter [stellar radii], >= 0 (values above ``1 + k`` give no transit).
    u1, u2 : float
        Quadratic limb-darkening coefficients of the star.
    ecc : float, optional
        Eccentricity, in [0, 1).
    omega_deg : float, optional
        Argument of periastron of the planet [degrees].

    Returns
    -------
    ndarray of float64
        Relative flux, 1 out of transit (the planet's own light and occultations are ignored).

    Raises
    ------
    ParameterError
        See :func:`features.orbits.sky_separation` and :func:`occulted_flux_quadratic`.

    Notes
    -----
    Sky separation from :func:`features.orbits.sky_separation` (Winn 2010), occulted flux from
    Mandel & Agol (2002), evaluated only where the planet is in front and within ``1 + k``.

    Examples
    --------
    >>> f = transit_flux([0.0, 0.05, 0.5], t0=0.0, period_days=3.0, k=0.1,
    ...                  a_over_rstar=8.75, b=0.0, u1=0.4, u2=0.26)
    >>> [round(float(v), 5) for v in f]
    [0.98787, 0.99234, 1.0]
    """
    kk = _positive("k", k)
    _limb_darkening(u1, u2)
    z, front = sky_separation(
        time_days,
        t0=t0,
        period_days=period_days,
        a_over_rstar=a_over_rstar,
        b=b,
        ecc=ecc,
        omega_deg=omega_deg,
    )
    flux = np.ones_like(z)
    hit = front & (z < 1.0 + kk)
    if np.any(hit):
        flux[hit] = 1.0 - _quadratic_fraction(z[hit], kk, float(u1), float(u2))
    return flux


def eclipsing_binary_flux(
    time_days: ArrayLike,
    *,
    t0: float,
    period_days: float,
    radius_ratio: float,
    a_over_r1: float,
    b: float,
    surface_brightness_ratio: float,
    u1_primary: float,
    u2_primary: float,
    u1_secondary: float,
    u2_secondary: float,
    third_light: float = 0.0,
    ellipsoidal_amplitude: float = 0.0,
    reflection_amplitude: float = 0.0,
    ecc: float = 0.0,
    omega_deg: float = 90.0,
) -> FloatArray:
    """Light curve of two limb-darkened stars eclipsing each other.

    Parameters
    ----------
    time_days : array_like
        Times [days].
    t0 : float
        Time of primary eclipse (star 2 in front of star 1) [days].
    period_days : float
        Orbital period [days], > 0.
    radius_ratio : float
        R2 / R1, > 0 (values above 1 allowed).
    a_over_r1 : float
        Semi-major axis [radii of star 1], > 1.
    b : float
        Impact parameter of the primary eclipse [radii of star 1], >= 0.
    surface_brightness_ratio : float
        Central surface brightness of star 2 over that of star 1, >= 0 (0: dark companion).
    u1_primary, u2_primary, u1_secondary, u2_secondary : float
        Quadratic limb-darkening coefficients of stars 1 and 2.
    third_light : float, optional
        Fraction l3 of the total light from unrelated sources, in [0, 1).
    ellipsoidal_amplitude : float, optional
        Relative semi-amplitude A of the ``cos(4 pi phase)`` term, >= 0.
    reflection_amplitude : float, optional
        Relative semi-amplitude R of the ``cos(2 pi phase)`` term, >= 0.
    ecc : float, optional
        Eccentricity, in [0, 1).
    omega_deg : float, optional
        Argument of periastron of star 2's orbit [degrees].

    Returns
    -------
    ndarray of float64
        Relative flux; out of eclipse and without modulation exactly 1.

    Raises
    ------
    ParameterError
        ``third_light_out_of_range``, ``amplitude_out_of_range`` (A + R >= 1),
        ``negative_parameter``, ``invalid_limb_darkening`` and those of
        :func:`features.orbits.sky_separation`.

    Notes
    -----
    Light fractions ``L_i = l_i / (l_1 + l_2)`` with ``l_1 = 1 - u1/3 - u2/6`` (star 1) and
    ``l_2 = S (R2/R1)^2 (1 - u1'/3 - u2'/6)`` (each star's disk integral of its limb-darkening
    law, in units of star 1's central intensity; S the surface-brightness ratio). In primary
    eclipse the flux drops by ``L_1`` times the occulted fraction of star 1 (separation ``z``,
    ratio ``k``); in secondary eclipse by ``L_2`` times that of star 2 (separation ``z / k``,
    ratio ``1 / k``), both from Mandel & Agol (2002). With phase ``phi = (t - t0)/P`` (mod 1) the
    eclipse light curve is multiplied by ``1 - A cos(4 pi phi) - R cos(2 pi phi)`` (mean 1 over
    an orbit: ellipsoidal minima at both conjunctions, reflection maximum at phase 0.5; common
    practice) and finally diluted, ``f -> (1 - l3) f + l3``.

    Examples
    --------
    >>> f = eclipsing_binary_flux([0.0, 1.0, 2.0], t0=0.0, period_days=4.0, radius_ratio=0.8,
    ...     a_over_r1=10.0, b=0.2, surface_brightness_ratio=0.5, u1_primary=0.4,
    ...     u2_primary=0.2, u1_secondary=0.5, u2_secondary=0.2)
    >>> [round(float(v), 4) for v in f]
    [0.4735, 1.0, 0.765]
    """
    kk = _positive("radius_ratio", radius_ratio)
    sb = _non_negative("surface_brightness_ratio", surface_brightness_ratio)
    _limb_darkening(u1_primary, u2_primary, names=("u1_primary", "u2_primary"))
    _limb_darkening(u1_secondary, u2_secondary, names=("u1_secondary", "u2_secondary"))
    l3 = _fraction_below_one("third_light", third_light, "third_light_out_of_range")
    amp_ell = _non_negative("ellipsoidal_amplitude", ellipsoidal_amplitude)
    amp_ref = _non_negative("reflection_amplitude", reflection_amplitude)
    if amp_ell + amp_ref >= 1.0:
        raise ParameterError(
            "amplitude_out_of_range",
            f"ellipsoidal_amplitude + reflection_amplitude must be < 1, got {amp_ell + amp_ref!r}",
        )
    t0_ = _finite("t0", t0)
    period = _positive("period_days", period_days)
    z, front = sky_separation(
        time_days,
        t0=t0_,
        period_days=period,
        a_over_rstar=a_over_r1,
        b=b,
        ecc=ecc,
        omega_deg=omega_deg,
    )
    u1p, u2p, u1s, u2s = map(float, (u1_primary, u2_primary, u1_secondary, u2_secondary))
    light1 = 1.0 - u1p / 3.0 - u2p / 6.0
    light2 = sb * kk * kk * (1.0 - u1s / 3.0 - u2s / 6.0)
    frac1 = light1 / (light1 + light2)
    frac2 = light2 / (light1 + light2)

    loss = np.zeros_like(z)
    close = z < 1.0 + kk
    primary = close & front
    if np.any(primary):
        loss[primary] = frac1 * _quadratic_fraction(z[primary], kk, u1p, u2p)
    secondary = close & ~front
    if frac2 > 0.0 and np.any(secondary):
        loss[secondary] = frac2 * _quadratic_fraction(z[secondary] / kk, 1.0 / kk, u1s, u2s)
    flux = 1.0 - loss
    if amp_ell > 0.0 or amp_ref > 0.0:
        phase = 2.0 * np.pi * ((np.asarray(time_days, dtype=np.float64) - t0_) / period)
        flux *= 1.0 - amp_ell * np.cos(2.0 * phase) - amp_ref * np.cos(phase)
    if l3 > 0.0:
        flux = (1.0 - l3) * flux + l3
    return flux


def ellipsoidal_amplitude(
    *, mass_ratio: float, a_over_r1: float, inc_deg: float, u1: float, gravity_darkening: float
) -> float:
    """Approximate relative semi-amplitude of ellipsoidal variation of star 1.

    Parameters
    ----------
    mass_ratio : float
        q = M2 / M1, > 0.
    a_over_r1 : float
        Semi-major axis [radii of star 1], > 1.
    inc_deg : float
        Orbital inclination [degrees], in [0, 180].
    u1 : float
        Linear limb-darkening coefficient of star 1, in [0, 1].
    gravity_darkening : float
        Gravity-darkening coefficient tau of star 1, >= 0 (about 0.3-0.4 for convective
        envelopes, about 1 for radiative ones).

    Returns
    -------
    float
        A, to be used as ``ellipsoidal_amplitude`` in :func:`eclipsing_binary_flux`.

    Raises
    ------
    ParameterError
        ``non_positive_parameter``, ``orbit_inside_star``, ``inclination_out_of_range``,
        ``invalid_limb_darkening``, ``negative_parameter``.

    Notes
    -----
    Morris & Naftilan (1993, ApJ 419, 344), leading ``cos 2 theta`` term::

        alpha = 0.15 (15 + u1) (1 + tau) / (3 - u1)
        A     = alpha q (R1 / a)^3 sin^2 i

    This is an approximation: first order in the tidal distortion, no higher harmonics, star 2's
    own ellipsoidal light ignored.

    Examples
    --------
    >>> round(ellipsoidal_amplitude(mass_ratio=0.5, a_over_r1=4.0, inc_deg=90.0, u1=0.5,
    ...                             gravity_darkening=0.32), 6)
    0.009591
    """
    q = _positive("mass_ratio", mass_ratio)
    a = _orbit_size("a_over_r1", a_over_r1)
    inc = _finite("inc_deg", inc_deg)
    if not 0.0 <= inc <= 180.0:
        raise ParameterError("inclination_out_of_range", f"inc_deg must be in [0, 180], got {inc}")
    u = _finite("u1", u1)
    if not 0.0 <= u <= 1.0:
        raise ParameterError("invalid_limb_darkening", f"u1 must be in [0, 1], got {u!r}")
    tau = _non_negative("gravity_darkening", gravity_darkening)
    alpha = 0.15 * (15.0 + u) * (1.0 + tau) / (3.0 - u)
    return alpha * q * a**-3 * math.sin(math.radians(inc)) ** 2


# --------------------------------------------------------------------------------------------
# Exocomet
# --------------------------------------------------------------------------------------------


def _chord_intensity_means(
    edges: FloatArray, half_chord: float, u1: float, u2: float
) -> FloatArray:
    """Exact mean of the normalised quadratic-law intensity over chord cells.

    Along the chord at impact b, ``mu = sqrt(X^2 - x^2)`` with ``X = sqrt(1 - b^2)``, and the
    intensity normalised to unit disk flux is ``I0 [(1 - u1 - u2) + (u1 + 2 u2) mu - u2 mu^2]``,
    ``I0 = 1 / (pi (1 - u1/3 - u2/6))``. The integrals of ``mu`` and ``mu^2`` are elementary.
    """
    x = np.clip(edges, -half_chord, half_chord)
    x2 = half_chord * half_chord
    width = np.diff(x)
    prim_mu = 0.5 * (x * np.sqrt(np.clip(x2 - x * x, 0.0, None)) + x2 * np.arcsin(x / half_chord))
    mean_mu = np.diff(prim_mu) / width
    mean_mu2 = x2 - np.diff(x**3) / (3.0 * width)
    i0 = 1.0 / (np.pi * (1.0 - u1 / 3.0 - u2 / 6.0))
    return i0 * ((1.0 - u1 - u2) + (u1 + 2.0 * u2) * mean_mu - u2 * mean_mu2)


def _tail_kernel_means(
    n_cells: int, dx: float, tail: float, tau0: float, n_resolved: int
) -> FloatArray:
    """Mean of ``1 - exp(-tau0 exp(-s/L))`` over lag cells ``[(n-1) dx, n dx]``, n = 1..n_cells.

    Simpson's rule per cell; when a cell is wider than L/8 (very short tails), the first
    ``n_resolved`` cells are subdivided so that each Simpson panel is at most L/8 wide.
    """

    def kernel(s: FloatArray) -> FloatArray:
        return -np.expm1(-tau0 * np.exp(-s / tail))

    s_edges = dx * np.arange(n_cells + 1)
    k_edges = kernel(s_edges)
    k_mid = kernel(s_edges[:-1] + 0.5 * dx)
    means = (k_edges[:-1] + 4.0 * k_mid + k_edges[1:]) / 6.0
    n_sub = min(math.ceil(_COMET_CELLS_PER_TAIL * dx / tail), 4096)
    if n_sub > 1:
        n_res = min(n_resolved, n_cells)
        sub = dx / n_sub
        s_fine = sub * np.arange(n_res * n_sub + 1)
        kf_edges = kernel(s_fine)
        kf_mid = kernel(s_fine[:-1] + 0.5 * sub)
        panels = (kf_edges[:-1] + 4.0 * kf_mid + kf_edges[1:]) / 6.0
        means[:n_res] = panels.reshape(n_res, n_sub).mean(axis=1)
    return means


def _convolve(signal: FloatArray, kernel: FloatArray, n_out: int) -> FloatArray:
    """First ``n_out`` samples of the full linear convolution (direct or FFT by size)."""
    if signal.size * kernel.size <= _COMET_DIRECT_CONV_MAX:
        return np.convolve(signal, kernel)[:n_out]
    n_fft = _fft.next_fast_len(signal.size + kernel.size - 1, real=True)
    spec = _fft.rfft(signal, n_fft) * _fft.rfft(kernel, n_fft)
    return _fft.irfft(spec, n_fft)[:n_out]


def _piecewise_cubic(pos: FloatArray, values: FloatArray, kink: int) -> FloatArray:
    """Cubic Lagrange interpolation of node values at fractional node positions ``pos``.

    ``pos`` lies in ``[0, len(values) - 1]``. Four-node stencils are kept on one side of the
    node ``kink`` (and of both ends), so no stencil straddles a kink of the interpolated curve.
    """
    last = values.size - 1
    idx = pos.astype(np.int64)  # floor: pos >= 0
    start = np.where(
        pos > kink, np.clip(idx - 1, kink, last - 3), np.clip(idx - 1, 0, kink - 3)
    )
    x = pos - start
    d1 = x - 1.0
    d2 = x - 2.0
    d3 = x - 3.0
    x_d1 = x * d1
    d2_d3 = d2 * d3
    return (
        (-d1 * d2_d3) * values[start]
        + (3.0 * x * d2_d3) * values[start + 1]
        + (-3.0 * x_d1 * d3) * values[start + 2]
        + (x_d1 * d2) * values[start + 3]
    ) / 6.0


def comet_flux(
    time_days: ArrayLike,
    *,
    t0: float,
    crossing_time_days: float,
    b: float,
    tail_length_rstar: float,
    peak_optical_depth: float,
    height_rstar: float = 0.1,
    u1: float = 0.0,
    u2: float = 0.0,
) -> FloatArray:
    """Transit of a comet whose dust tail has an exponential optical-depth profile.

    Parameters
    ----------
    time_days : array_like
        Times [days].
    t0 : float
        Time at which the head crosses the mid-point of the chord [days].
    crossing_time_days : float
        Time T for the head to cross the chord [days], > 0.
    b : float
        Impact parameter of the chord [stellar radii], in [0, 1).
    tail_length_rstar : float
        e-folding length L of the optical depth behind the head [stellar radii], > 0.
    peak_optical_depth : float
        Optical depth tau0 at the head, >= 0.
    height_rstar : float, optional
        Height h of the (thin) dust strip [stellar radii], in (0, 1].
    u1, u2 : float, optional
        Quadratic limb-darkening coefficients of the star (default: uniform disk).

    Returns
    -------
    ndarray of float64
        Relative flux (1 before the head reaches the disk; recovers exponentially afterwards).

    Raises
    ------
    ParameterError
        ``non_positive_parameter``, ``negative_parameter``, ``impact_parameter_out_of_range``
        (b >= 1), ``strip_height_out_of_range``, ``invalid_limb_darkening``,
        ``non_finite_parameter``.

    Notes
    -----
    Dust-tail picture of Lecavelier des Etangs et al. (1999, A&A 343, 916); exponential-tail
    profiles as fitted by Brogi et al. (2012, A&A 545, L5) and Kennedy et al. (2019, MNRAS 482,
    5587). The head moves at constant speed ``v = 2 X / T`` along the chord ``|x| <= X``,
    ``X = sqrt(1 - b^2)``, reaching ``x_h = 0`` at ``t0``. Behind it the optical depth is
    ``tau(d) = tau0 exp(-d / L)`` at distance ``d = x_h - x``; nothing is ahead of the head. The
    flux lost is::

        loss(t) = h * integral_{-X}^{X} (1 - exp(-tau(x_h(t) - x))) I(x) dx

    with ``I`` the quadratic-law intensity normalised to unit disk flux. This is a convolution in
    the head position. It is evaluated on a uniform grid of head positions (spacing
    ``dx = min(2X/128, L/8)``, coarsened when more than 4096 nodes would be needed) with exact
    cell means of ``I`` and Simpson means of the kernel, by direct or FFT convolution, then
    interpolated to the requested times with piecewise cubics that do not straddle the kinks at
    first contact and at the head's exit. Once the whole on-disk tail is optically thin to 1e-5
    the loss decays exactly as ``exp(-d_exit / L)`` and is extrapolated so. Against direct
    quadrature the error is below 2e-4 of the depth for tails from 4e-3 to 50 stellar radii and
    optical depths up to 5; still shorter tails are exact at the grid nodes but resolved only to
    one grid cell between them.

    Examples
    --------
    >>> f = comet_flux([-1.0, 0.0, 0.5, 2.0], t0=0.0, crossing_time_days=0.5, b=0.2,
    ...                tail_length_rstar=1.0, peak_optical_depth=0.05, height_rstar=0.2)
    >>> [round(float(v), 6) for v in f]
    [1.0, 0.998046, 0.998979, 0.999997]
    """
    t0_ = _finite("t0", t0)
    crossing = _positive("crossing_time_days", crossing_time_days)
    bb = _non_negative("b", b)
    if bb >= 1.0:
        raise ParameterError(
            "impact_parameter_out_of_range", f"b must be < 1 for a comet chord, got {bb!r}"
        )
    tail = _positive("tail_length_rstar", tail_length_rstar)
    tau0 = _non_negative("peak_optical_depth", peak_optical_depth)
    height = _finite("height_rstar", height_rstar)
    if not 0.0 < height <= 1.0:
        raise ParameterError(
            "strip_height_out_of_range", f"height_rstar must be in (0, 1], got {height!r}"
        )
    _limb_darkening(u1, u2)
    t = np.asarray(time_days, dtype=np.float64)
    if tau0 == 0.0:
        return np.ones_like(t)

    half_chord = math.sqrt(1.0 - bb * bb)
    chord = 2.0 * half_chord
    # Beyond this lag behind the exit the tail is optically thin to _COMET_THIN_TOL.
    thin_lag = tail * max(math.log(tau0 / (2.0 * _COMET_THIN_TOL)), 0.0)
    dx = min(chord / _COMET_MIN_CHORD_CELLS, tail / _COMET_CELLS_PER_TAIL)
    dx = max(dx, (chord + thin_lag) / (_COMET_MAX_NODES - 8))
    n_chord = max(math.ceil(chord / dx - 1e-9), 4)
    dx = chord / n_chord
    n_after = max(math.ceil(thin_lag / dx), 4)
    n_nodes = n_chord + n_after + 1  # head positions p_m = m dx after first contact

    edges = -half_chord + dx * np.arange(n_chord + 1)
    intensity = _chord_intensity_means(edges, half_chord, float(u1), float(u2))
    n_resolved = math.ceil(40.0 * tail / dx) + 1
    kernel = np.empty(n_nodes)
    kernel[0] = 0.0
    kernel[1:] = _tail_kernel_means(n_nodes - 1, dx, tail, tau0, n_resolved)
    loss_nodes = (height * dx) * _convolve(intensity, kernel, n_nodes)

    pos = (2.0 * half_chord / crossing) * (t - t0_ + 0.5 * crossing) / dx  # in units of dx
    last = n_nodes - 1
    loss = _piecewise_cubic(np.clip(pos, 0.0, last), loss_nodes, n_chord)
    loss[pos <= 0.0] = 0.0
    beyond = pos > last
    if np.any(beyond):
        loss[beyond] = loss_nodes[last] * np.exp(-(pos[beyond] - last) * dx / tail)
    return 1.0 - loss


# --------------------------------------------------------------------------------------------
# Stellar variability
# --------------------------------------------------------------------------------------------


def spot_modulation(
    time_days: ArrayLike,
    *,
    period_days: float,
    amplitudes: ArrayLike,
    phases: ArrayLike,
    decay_days: float | None = None,
    t_ref_days: float = 0.0,
) -> FloatArray:
    """Rotational modulation by star spots: a fundamental and a few harmonics.

    Parameters
    ----------
    time_days : array_like
        Times [days].
    period_days : float
        Rotation period P [days], > 0.
    amplitudes : sequence of float
        Relative semi-amplitudes A_n of harmonics n = 1, 2, ... (any sign); ``sum |A_n| < 1``.
    phases : sequence of float
        Phases phi_n [radians], same length as ``amplitudes``.
    decay_days : float or None, optional
        If given (> 0), the spot pattern grows and decays with the envelope
        ``1 / cosh((t - t_ref) / decay_days)`` (e-folding time ``decay_days`` far from
        ``t_ref``); None keeps the amplitudes constant.
    t_ref_days : float, optional
        Reference time of the phases and of the envelope peak [days].

    Returns
    -------
    ndarray of float64
        ``1 + g(t) sum_n A_n sin(2 pi n (t - t_ref) / P + phi_n)``, ``g`` the envelope.

    Raises
    ------
    ParameterError
        ``non_positive_parameter``, ``parameter_length_mismatch``, ``amplitude_out_of_range``,
        ``non_finite_parameter``.

    Notes
    -----
    A truncated Fourier series in the rotation phase is the usual description of spot
    modulation (common practice); the smooth ``sech`` envelope stands for spot evolution.

    Examples
    --------
    >>> f = spot_modulation([0.0, 2.5], period_days=10.0, amplitudes=[0.01], phases=[0.0])
    >>> [round(float(v), 6) for v in f]
    [1.0, 1.01]
    """
    period = _positive("period_days", period_days)
    amps = _float_vector("amplitudes", amplitudes)
    phis = _float_vector("phases", phases)
    _same_length(amplitudes=amps, phases=phis)
    if np.sum(np.abs(amps)) >= 1.0:
        raise ParameterError("amplitude_out_of_range", "sum of |amplitudes| must be < 1")
    t_ref = _finite("t_ref_days", t_ref_days)
    dt = np.asarray(time_days, dtype=np.float64) - t_ref
    harmonics = np.arange(1, amps.size + 1, dtype=np.float64)
    arg = np.multiply.outer(dt, (2.0 * np.pi / period) * harmonics) + phis
    signal = np.sin(arg) @ amps
    if decay_days is not None:
        decay = _positive("decay_days", decay_days)
        signal = signal / np.cosh(np.clip(dt / decay, -700.0, 700.0))
    return 1.0 + signal


def pulsation(
    time_days: ArrayLike,
    *,
    frequencies_per_day: ArrayLike,
    amplitudes: ArrayLike,
    phases: ArrayLike,
    t_ref_days: float = 0.0,
) -> FloatArray:
    """Multi-periodic stellar pulsation as a sum of sinusoids.

    Parameters
    ----------
    time_days : array_like
        Times [days].
    frequencies_per_day : sequence of float
        Mode frequencies [cycles per day], > 0.
    amplitudes : sequence of float
        Relative semi-amplitudes (any sign); ``sum |A_j| < 1``.
    phases : sequence of float
        Phases [radians].
    t_ref_days : float, optional
        Reference time of the phases [days].

    Returns
    -------
    ndarray of float64
        ``1 + sum_j A_j sin(2 pi f_j (t - t_ref) + phi_j)``.

    Raises
    ------
    ParameterError
        ``non_positive_parameter``, ``parameter_length_mismatch``, ``amplitude_out_of_range``,
        ``non_finite_parameter``.

    Notes
    -----
    Coherent modes are described by a sum of sines (common practice in asteroseismology).

    Examples
    --------
    >>> f = pulsation([0.0, 0.125], frequencies_per_day=[2.0], amplitudes=[0.002], phases=[0.0])
    >>> [round(float(v), 6) for v in f]
    [1.0, 1.002]
    """
    freqs = _float_vector("frequencies_per_day", frequencies_per_day)
    amps = _float_vector("amplitudes", amplitudes)
    phis = _float_vector("phases", phases)
    _same_length(frequencies_per_day=freqs, amplitudes=amps, phases=phis)
    if np.any(freqs <= 0.0):
        raise ParameterError("non_positive_parameter", "frequencies_per_day must all be > 0")
    if np.sum(np.abs(amps)) >= 1.0:
        raise ParameterError("amplitude_out_of_range", "sum of |amplitudes| must be < 1")
    dt = np.asarray(time_days, dtype=np.float64) - _finite("t_ref_days", t_ref_days)
    arg = np.multiply.outer(dt, 2.0 * np.pi * freqs) + phis
    return 1.0 + np.sin(arg) @ amps


# --------------------------------------------------------------------------------------------
# Instrument artefacts
# --------------------------------------------------------------------------------------------


def box_dip(
    time_days: ArrayLike, *, t_start: float, duration_days: float, depth: float
) -> FloatArray:
    """Box-shaped dip with sharp edges (e.g. a pointing excursion).

    Parameters
    ----------
    time_days : array_like
        Times [days].
    t_start : float
        Start of the dip [days].
    duration_days : float
        Duration [days], > 0; the dip covers ``t_start <= t < t_start + duration_days``.
    depth : float
        Relative depth, in [0, 1).

    Returns
    -------
    ndarray of float64
        ``1 - depth`` inside the box, 1 outside.

    Raises
    ------
    ParameterError
        ``non_positive_parameter``, ``depth_out_of_range``, ``non_finite_parameter``.

    Examples
    --------
    >>> box_dip([0.0, 1.0, 2.0], t_start=0.5, duration_days=1.0, depth=0.01)
    array([1.  , 0.99, 1.  ])
    """
    start = _finite("t_start", t_start)
    duration = _positive("duration_days", duration_days)
    d = _fraction_below_one("depth", depth, "depth_out_of_range")
    t = np.asarray(time_days, dtype=np.float64)
    return np.where((t >= start) & (t < start + duration), 1.0 - d, 1.0)


def step(time_days: ArrayLike, *, t_step: float, size: float) -> FloatArray:
    """Sudden, persistent jump of the flux level (e.g. after a pixel-sensitivity change).

    Parameters
    ----------
    time_days : array_like
        Times [days].
    t_step : float
        Time of the jump [days].
    size : float
        Relative change of level, > -1 (negative: drop).

    Returns
    -------
    ndarray of float64
        1 before ``t_step``, ``1 + size`` from ``t_step`` on.

    Raises
    ------
    ParameterError
        ``amplitude_out_of_range``, ``non_finite_parameter``.

    Examples
    --------
    >>> step([0.0, 1.0], t_step=0.5, size=-0.002)
    array([1.   , 0.998])
    """
    ts = _finite("t_step", t_step)
    s = _above_minus_one("size", size)
    t = np.asarray(time_days, dtype=np.float64)
    return np.where(t >= ts, 1.0 + s, 1.0)


def exponential_ramp(
    time_days: ArrayLike, *, t_start: float, amplitude: float, timescale_days: float
) -> FloatArray:
    """Exponentially relaxing ramp after a data gap (e.g. thermal settling).

    Parameters
    ----------
    time_days : array_like
        Times [days].
    t_start : float
        Time the ramp starts (end of the gap) [days].
    amplitude : float
        Relative offset at ``t_start``, > -1 (negative: the flux starts low).
    timescale_days : float
        e-folding time of the relaxation [days], > 0.

    Returns
    -------
    ndarray of float64
        1 before ``t_start``; ``1 + amplitude exp(-(t - t_start)/timescale_days)`` after.

    Raises
    ------
    ParameterError
        ``amplitude_out_of_range``, ``non_positive_parameter``, ``non_finite_parameter``.

    Examples
    --------
    >>> f = exponential_ramp([0.0, 1.0, 1.5], t_start=1.0, amplitude=-0.01, timescale_days=0.5)
    >>> [round(float(v), 6) for v in f]
    [1.0, 0.99, 0.996321]
    """
    ts = _finite("t_start", t_start)
    amp = _above_minus_one("amplitude", amplitude)
    tau = _positive("timescale_days", timescale_days)
    t = np.asarray(time_days, dtype=np.float64)
    after = t >= ts
    out = np.ones_like(t)
    out[after] += amp * np.exp(-(t[after] - ts) / tau)
    return out


def scattered_light_hump(
    time_days: ArrayLike, *, t_peak: float, width_days: float, amplitude: float
) -> FloatArray:
    """Smooth Gaussian hump (or trough) from scattered light.

    Parameters
    ----------
    time_days : array_like
        Times [days].
    t_peak : float
        Time of the extremum [days].
    width_days : float
        Gaussian standard deviation [days], > 0.
    amplitude : float
        Relative height at the peak, > -1 (negative: a trough).

    Returns
    -------
    ndarray of float64
        ``1 + amplitude exp(-(t - t_peak)^2 / (2 width^2))``.

    Raises
    ------
    ParameterError
        ``amplitude_out_of_range``, ``non_positive_parameter``, ``non_finite_parameter``.

    Examples
    --------
    >>> f = scattered_light_hump([0.0, 1.0], t_peak=0.0, width_days=1.0, amplitude=0.01)
    >>> [round(float(v), 6) for v in f]
    [1.01, 1.006065]
    """
    tp = _finite("t_peak", t_peak)
    width = _positive("width_days", width_days)
    amp = _above_minus_one("amplitude", amplitude)
    x = (np.asarray(time_days, dtype=np.float64) - tp) / width
    return 1.0 + amp * np.exp(-0.5 * x * x)


def cadence_dip(
    time_days: ArrayLike, *, t_mid: float, n_cadences: int, cadence_days: float, depth: float
) -> FloatArray:
    """Dip lasting a few cadences (e.g. a cosmic-ray or momentum-dump outlier).

    Parameters
    ----------
    time_days : array_like
        Times [days].
    t_mid : float
        Centre of the dip [days].
    n_cadences : int
        Length of the dip in cadences (typically 1-3), >= 1.
    cadence_days : float
        Sampling interval [days], > 0.
    depth : float
        Relative depth, in [0, 1).

    Returns
    -------
    ndarray of float64
        ``1 - depth`` for ``t_mid - n c / 2 <= t < t_mid + n c / 2``, 1 elsewhere.

    Raises
    ------
    ParameterError
        ``invalid_cadence_count``, ``non_positive_parameter``, ``depth_out_of_range``,
        ``non_finite_parameter``.

    Examples
    --------
    >>> cadence_dip([0.0, 0.02, 0.04], t_mid=0.02, n_cadences=1, cadence_days=0.02, depth=0.005)
    array([1.   , 0.995, 1.   ])
    """
    if isinstance(n_cadences, bool) or int(n_cadences) != n_cadences or n_cadences < 1:
        raise ParameterError(
            "invalid_cadence_count", f"n_cadences must be an integer >= 1, got {n_cadences!r}"
        )
    tm = _finite("t_mid", t_mid)
    cadence = _positive("cadence_days", cadence_days)
    d = _fraction_below_one("depth", depth, "depth_out_of_range")
    half = 0.5 * int(n_cadences) * cadence
    t = np.asarray(time_days, dtype=np.float64)
    return np.where((t >= tm - half) & (t < tm + half), 1.0 - d, 1.0)
