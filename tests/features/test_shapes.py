"""Tests of features.shapes against batman-package, direct integrals and published formulas."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from astropy import constants as const
from astropy.timeseries import LombScargle
from scipy import integrate, special

from features import shapes
from features.errors import ParameterError
from features.orbits import a_over_rstar, inclination_deg, transit_durations_days
from features.shapes import (
    box_dip,
    cadence_dip,
    comet_flux,
    eclipsing_binary_flux,
    ellipsoidal_amplitude,
    exponential_ramp,
    occulted_flux_quadratic,
    occulted_flux_uniform,
    pulsation,
    scattered_light_hump,
    spot_modulation,
    step,
    transit_flux,
)

batman = pytest.importorskip("batman")

LD_PAIRS = [(0.40, 0.26), (0.1, 0.3)]


# ------------------------------------------------------------------------------------------
# Slow, obvious references (computed here, independent of the module)
# ------------------------------------------------------------------------------------------


def _radial_occulted_flux(z: float, k: float, u1: float, u2: float) -> float:
    """Flux of a quadratic-law disk behind a dark disk, by direct radial integration.

    The occulted flux is int_0^1 I(r) 2 theta(r) r dr, theta the half-angle of the circle of
    radius r inside the occulter: cos theta = (r^2 + z^2 - k^2) / (2 r z) (plane geometry).
    """

    def intensity(r):
        mu = math.sqrt(max(1.0 - r * r, 0.0))
        return 1.0 - u1 * (1.0 - mu) - u2 * (1.0 - mu) ** 2

    def half_angle(r):
        if z == 0.0:
            return math.pi if r < k else 0.0
        c = (r * r + z * z - k * k) / (2.0 * r * z)
        return math.acos(min(max(c, -1.0), 1.0))

    breaks = [p for p in (abs(z - k), z + k) if 0.0 < p < 1.0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", integrate.IntegrationWarning)
        occ = integrate.quad(
            lambda r: intensity(r) * 2.0 * half_angle(r) * r, 0.0, 1.0,
            points=breaks or None, limit=400, epsabs=1e-14, epsrel=1e-12,
        )[0]
    total = integrate.quad(lambda r: intensity(r) * 2.0 * math.pi * r, 0.0, 1.0,
                           epsabs=1e-14, epsrel=1e-13)[0]
    return 1.0 - occ / total


def _batman_flux(t, *, k, a, b, u, ecc=0.0, omega=90.0, period=3.0):
    """batman-package (Kreidberg 2015) quadratic-law light curve with t0 = 0."""
    params = batman.TransitParams()
    params.t0, params.per, params.rp, params.a = 0.0, period, k, a
    params.inc = inclination_deg(a_over_rstar=a, b=b, ecc=ecc, omega_deg=omega)
    params.ecc, params.w = ecc, omega
    params.limb_dark, params.u = "quadratic", list(u)
    return batman.TransitModel(params, t).light_curve(params)


# ------------------------------------------------------------------------------------------
# Mandel & Agol occultation kernels
# ------------------------------------------------------------------------------------------


@pytest.mark.parametrize("k", [0.01, 0.1, 0.3, 0.5, 0.7, 1.0, 1.5, 4.0])
def test_quadratic_occultation_matches_radial_integral(k):
    # Mandel & Agol (2002) closed form vs the defining radial integral, all cases of their
    # Table 1: z = 0, z < k, z = k, z = 1 - k, contact, k > 1 (cases 2, 7, 8, 11).
    special_z = [0.0, k, abs(1.0 - k), 1.0 + k, 0.5 * k, k + 1e-9, k - 1e-9]
    if k < 1.0:
        special_z += [1.0 - k + 1e-9, 1.0 - k - 1e-9]
    z = np.unique(np.concatenate([np.linspace(0.0, 1.0 + k + 0.05, 23), special_z]))
    for u1, u2 in [*LD_PAIRS, (1.0, 0.0), (0.6, -0.1)]:
        got = occulted_flux_quadratic(z, k, u1, u2)
        ref = np.array([_radial_occulted_flux(float(zi), k, u1, u2) for zi in z])
        np.testing.assert_allclose(got, ref, atol=3e-8, rtol=0)


@pytest.mark.parametrize("k", [0.1, 0.5, 1.0, 10.0])
def test_special_separation_bands_are_continuous(k):
    # Either side of the z = k and z = 1 - k bands (Mandel & Agol 2002 cases 4-7) the flux
    # agrees with the radial integral; the band edges are at 1e-8 and 1e-11.
    offsets = np.array([-3e-8, -1.01e-8, -0.99e-8, 0.0, 0.99e-8, 1.01e-8, 3e-8])
    centres = [k, 1.0 - k] if k < 1.0 else [k]
    u1, u2 = LD_PAIRS[0]
    for centre in centres:
        z = np.clip(centre + offsets, 0.0, None)
        got = occulted_flux_quadratic(z, k, u1, u2)
        ref = np.array([_radial_occulted_flux(float(zi), k, u1, u2) for zi in z])
        np.testing.assert_allclose(got, ref, atol=3e-8, rtol=0)


def test_uniform_occultation_is_the_lens_area():
    # Mandel & Agol (2002) eq. 1 is the circle-circle overlap area over pi; check against the
    # radial integral with no limb darkening, and the limits k^2 (inside) and 0/1.
    for k in (0.05, 0.4, 2.0):
        z = np.linspace(0.0, 1.0 + k + 0.1, 31)
        ref = np.array([_radial_occulted_flux(float(zi), k, 0.0, 0.0) for zi in z])
        np.testing.assert_allclose(occulted_flux_uniform(z, k), ref, atol=1e-10)
        np.testing.assert_allclose(occulted_flux_quadratic(z, k, 0.0, 0.0), ref, atol=1e-10)
    assert occulted_flux_uniform(0.3, 0.1) == pytest.approx(1.0 - 0.01, abs=1e-15)
    assert occulted_flux_uniform(0.5, 2.0) == 0.0


def test_third_kind_integral_matches_carlson():
    # Bulirsch's cel vs Carlson's form Pi(n, m) = RF(0, 1-m, 1) + n/3 RJ(0, 1-m, 1, 1-n)
    # (DLMF 19.25.2), for the negative characteristics used by Mandel & Agol (2002).
    rng = np.random.default_rng(7)
    m = rng.uniform(0.0, 0.999, 400)
    n = -(10.0 ** rng.uniform(-3.0, 3.0, 400))
    y = 1.0 - m
    carlson = special.elliprf(0.0, y, 1.0) + n / 3.0 * special.elliprj(0.0, y, 1.0, 1.0 - n)
    a = rng.uniform(-5.0, 5.0, 400)
    got = shapes._cel(np.sqrt(y), 1.0 - n, a)
    np.testing.assert_allclose(got, a * carlson, rtol=1e-11)


# ------------------------------------------------------------------------------------------
# Transit light curves
# ------------------------------------------------------------------------------------------


@pytest.mark.parametrize("k", [0.01, 0.1, 0.3])
@pytest.mark.parametrize("b_kind", ["0", "0.5", "0.9", "grazing"])
@pytest.mark.parametrize("ld", LD_PAIRS)
def test_transit_matches_batman(k, b_kind, ld):
    # batman-package (Kreidberg 2015, quadratic law): max |difference| <= 2 ppm, dense
    # sampling through the whole transit including contacts.
    b = 1.0 + k / 2.0 if b_kind == "grazing" else float(b_kind)
    a = 8.75
    t = np.linspace(-0.1, 0.1, 8001)
    ours = transit_flux(t, t0=0.0, period_days=3.0, k=k, a_over_rstar=a, b=b, u1=ld[0], u2=ld[1])
    ref = _batman_flux(t, k=k, a=a, b=b, u=ld)
    assert np.min(ref) < 1.0  # the transit happens
    assert np.max(np.abs(ours - ref)) <= 2e-6


@pytest.mark.parametrize(("ecc", "omega"), [(0.35, 60.0), (0.6, 200.0)])
def test_eccentric_transit_matches_batman(ecc, omega):
    # batman-package with e, omega (Kreidberg 2015): same orbit convention (Winn 2010).
    a, k, b = 15.0, 0.12, 0.4
    t = np.linspace(-0.3, 0.3, 6001)
    ours = transit_flux(t, t0=0.0, period_days=5.0, k=k, a_over_rstar=a, b=b, u1=0.4, u2=0.26,
                        ecc=ecc, omega_deg=omega)
    ref = _batman_flux(t, k=k, a=a, b=b, u=(0.4, 0.26), ecc=ecc, omega=omega, period=5.0)
    assert np.min(ref) < 0.99
    assert np.max(np.abs(ours - ref)) <= 2e-6


def test_uniform_disk_depth_is_k_squared():
    # Mandel & Agol (2002) eq. 1, planet fully inside: lambda^e = k^2.
    for k in (0.02, 0.1, 0.25):
        f = transit_flux([0.0], t0=0.0, period_days=4.0, k=k, a_over_rstar=12.0, b=0.0,
                         u1=0.0, u2=0.0)
        assert 1.0 - f[0] == pytest.approx(k * k, rel=1e-12)


def test_transit_is_time_symmetric_for_circular_orbits():
    # Circular orbit: z(t0 + dt) = z(t0 - dt) (Winn 2010 eq. 5), so the light curve is even.
    dt = np.linspace(0.0, 0.1, 501)
    kw = dict(t0=1.3, period_days=3.0, k=0.1, a_over_rstar=8.75, b=0.6, u1=0.4, u2=0.26)
    np.testing.assert_allclose(transit_flux(1.3 + dt, **kw), transit_flux(1.3 - dt, **kw),
                               atol=1e-13)


@pytest.mark.parametrize(("k", "b"), [(0.1, 0.0), (0.05, 0.7), (0.2, 0.3)])
def test_measured_durations_equal_winn(k, b):
    # Winn (2010) eqs. 14-15: contacts read off the uniform-disk model (flux < 1 for T14, flux
    # at the k^2 floor for T23) agree with the formula to within one sample.
    period, a = 3.0, 8.75
    t14, t23 = transit_durations_days(period_days=period, k=k, a_over_rstar=a, b=b)
    dt = 2e-5
    t = np.arange(-0.6 * t14, 0.6 * t14, dt)
    f = transit_flux(t, t0=0.0, period_days=period, k=k, a_over_rstar=a, b=b, u1=0.0, u2=0.0)
    in_transit = t[f < 1.0]
    full = t[np.abs(f - (1.0 - k * k)) < 1e-12]
    assert abs((in_transit[-1] - in_transit[0]) - t14) <= 2 * dt
    assert abs((full[-1] - full[0]) - t23) <= 2 * dt


def test_worked_example_earth_depth():
    # Earth across the Sun's centre: depth k^2 ~ 84 ppm with k = R_earth/R_sun (astropy).
    k = (const.R_earth / const.R_sun).decompose().value
    a = a_over_rstar(period_days=365.25, mass_msun=1.0, radius_rsun=1.0)
    f = transit_flux([0.0], t0=0.0, period_days=365.25, k=k, a_over_rstar=a, b=0.0, u1=0.0,
                     u2=0.0)
    assert (1.0 - f[0]) * 1e6 == pytest.approx(84.0, abs=0.5)


def test_worked_example_limb_darkened_central_depth():
    # k = 0.1, b = 0, (u1, u2) = (0.40, 0.26): central depth ~ 0.01213 (approximately
    # k^2 / (1 - u1/3 - u2/6), Mandel & Agol 2002 small-planet limit; value worked by hand),
    # and equal to the exact radial integral.
    f = transit_flux([0.0], t0=0.0, period_days=3.0, k=0.1, a_over_rstar=8.75, b=0.0, u1=0.40,
                     u2=0.26)
    depth = 1.0 - f[0]
    assert depth == pytest.approx(0.01213, abs=1e-5)
    assert f[0] == pytest.approx(_radial_occulted_flux(0.0, 0.1, 0.40, 0.26), abs=1e-10)


# ------------------------------------------------------------------------------------------
# Eclipsing binaries
# ------------------------------------------------------------------------------------------

_EB = dict(t0=0.0, period_days=4.0, radius_ratio=0.7, a_over_r1=9.0, b=0.2,
           surface_brightness_ratio=0.4, u1_primary=0.4, u2_primary=0.25, u1_secondary=0.5,
           u2_secondary=0.2)


def _light_fraction_2(*, radius_ratio, surface_brightness_ratio, u1_primary, u2_primary,
                      u1_secondary, u2_secondary, **_):
    """Star 2's share of the light: disk integral of the quadratic law, int I dA = pi I(1)
    (1 - u1/3 - u2/6) (Mandel & Agol 2002, normalisation 4 Omega; standard result)."""
    l1 = 1.0 - u1_primary / 3.0 - u2_primary / 6.0
    l2 = surface_brightness_ratio * radius_ratio**2 * (1.0 - u1_secondary / 3.0
                                                       - u2_secondary / 6.0)
    return l2 / (l1 + l2)


def test_eb_out_of_eclipse_is_one_and_secondary_at_half_phase():
    # Circular orbit: secondary eclipse at phase 0.5 (Winn 2010 sec. 2.3); flat 1 elsewhere.
    t = np.linspace(-1.0, 3.0, 40001)
    f = eclipsing_binary_flux(t, **_EB)
    z_far = np.abs(np.sin(2 * np.pi * t / 4.0)) * 9.0 > 1.0 + 0.7 + 1e-6
    np.testing.assert_array_equal(f[z_far], 1.0)
    half = (t > 1.0) & (t < 3.0)
    in_secondary = t[half][f[half] < 1.0]  # this secondary is total (flat-bottomed)
    assert in_secondary.size > 0
    assert 0.5 * (in_secondary[0] + in_secondary[-1]) == pytest.approx(2.0, abs=1e-4)


def test_eccentric_secondary_eclipse_time_matches_batman():
    # The eclipse of star 2 happens at batman-package's secondary-eclipse time (Kreidberg 2015,
    # TransitModel.get_t_secondary) for an eccentric orbit, not at phase 0.5.
    ecc, omega, period, a = 0.3, 60.0, 4.0, 9.0
    params = batman.TransitParams()
    params.t0, params.per, params.rp, params.a = 0.0, period, 0.7, a
    params.inc = inclination_deg(a_over_rstar=a, b=0.2, ecc=ecc, omega_deg=omega)
    params.ecc, params.w, params.limb_dark, params.u = ecc, omega, "uniform", []
    params.fp, params.t_secondary = 0.1, 2.0
    t_sec = batman.TransitModel(params, np.array([0.0])).get_t_secondary(params) % period
    t = np.linspace(0.3, period - 0.3, 60001)
    f = eclipsing_binary_flux(t, **{**_EB, "ecc": ecc, "omega_deg": omega})
    eclipsed = t[f < 1.0]
    assert abs(t_sec - 0.5 * period) > 0.1  # genuinely displaced from phase 0.5
    assert 0.5 * (eclipsed[0] + eclipsed[-1]) == pytest.approx(t_sec, abs=5e-4)


def test_total_secondary_eclipse_removes_companion_light():
    # A small star fully behind a big one: the flux drops by exactly its light fraction.
    params = {**_EB, "radius_ratio": 0.3, "b": 0.1}
    f = eclipsing_binary_flux([2.0], **params)
    assert 1.0 - f[0] == pytest.approx(_light_fraction_2(**params), rel=1e-12)


def test_third_light_scales_every_depth():
    # Dilution f -> (1 - l3) f + l3 (common practice): every depth scales by (1 - l3).
    t = np.linspace(-0.3, 2.3, 3001)
    l3 = 0.37
    undiluted = 1.0 - eclipsing_binary_flux(t, **_EB)
    diluted = 1.0 - eclipsing_binary_flux(t, **_EB, third_light=l3)
    np.testing.assert_allclose(diluted, (1.0 - l3) * undiluted, atol=1e-15)


def test_dark_companion_equals_transit():
    # Identity: surface_brightness_ratio = 0 is a dark transiting body (Mandel & Agol 2002).
    t = np.linspace(-0.3, 0.3, 2001)
    params = {**_EB, "surface_brightness_ratio": 0.0, "ecc": 0.2, "omega_deg": 70.0}
    eb = eclipsing_binary_flux(t, **params)
    tr = transit_flux(t, t0=0.0, period_days=4.0, k=0.7, a_over_rstar=9.0, b=0.2, u1=0.4,
                      u2=0.25, ecc=0.2, omega_deg=70.0)
    np.testing.assert_array_equal(eb, tr)


def test_eb_with_bigger_companion_matches_radial_integral():
    # R2 > R1: primary eclipse by a larger star (Mandel & Agol 2002 cases 2, 7, 8, 11) and
    # secondary eclipse of the larger star, both against the radial integral.
    params = {**_EB, "radius_ratio": 1.6, "b": 0.5, "a_over_r1": 12.0}
    frac2 = _light_fraction_2(**params)
    period, a = 4.0, 12.0
    cos_i = 0.5 / a
    for t in (0.0, 0.02, 0.05, 2.0, 2.03, 2.06):
        phase = 2 * np.pi * t / period
        z = a * math.sqrt(math.sin(phase) ** 2 + (cos_i * math.cos(phase)) ** 2)
        got = eclipsing_binary_flux([t], **params)[0]
        if math.cos(phase) > 0:  # star 2 in front
            ref = 1.0 - (1.0 - frac2) * (1.0 - _radial_occulted_flux(z, 1.6, 0.4, 0.25))
        else:
            ref = 1.0 - frac2 * (1.0 - _radial_occulted_flux(z / 1.6, 1.0 / 1.6, 0.5, 0.2))
        assert got == pytest.approx(ref, abs=1e-9)


def test_modulation_shape_and_mean():
    # Ellipsoidal ~ -A cos(4 pi phase) and reflection ~ -R cos(2 pi phase) (common practice):
    # mean over an orbit is 1; out of eclipse the curve is exactly that product.
    period = 4.0
    t = np.linspace(0.0, period, 4000, endpoint=False)
    params = {**_EB, "b": 3.0, "ellipsoidal_amplitude": 2e-3, "reflection_amplitude": 5e-4}
    f = eclipsing_binary_flux(t, **params)  # b = 3 > 1 + k: no eclipses
    phase = t / period
    ref = 1.0 - 2e-3 * np.cos(4 * np.pi * phase) - 5e-4 * np.cos(2 * np.pi * phase)
    np.testing.assert_allclose(f, ref, atol=1e-15)
    assert np.mean(f) == pytest.approx(1.0, abs=1e-14)


def test_ellipsoidal_amplitude_scaling():
    # Morris & Naftilan (1993): A = 0.15 (15 + u)(1 + tau)/(3 - u) q (R1/a)^3 sin^2 i.
    base = dict(mass_ratio=0.5, a_over_r1=4.0, inc_deg=90.0, u1=0.5, gravity_darkening=0.32)
    a0 = ellipsoidal_amplitude(**base)
    # worked by hand: 0.15 * 15.5 * 1.32 / 2.5 * 0.5 / 64 = 0.0095906
    assert a0 == pytest.approx(0.0095906, rel=1e-4)
    assert ellipsoidal_amplitude(**{**base, "mass_ratio": 1.0}) == pytest.approx(2 * a0)
    assert ellipsoidal_amplitude(**{**base, "a_over_r1": 8.0}) == pytest.approx(a0 / 8)
    assert ellipsoidal_amplitude(**{**base, "inc_deg": 30.0}) == pytest.approx(a0 / 4)


# ------------------------------------------------------------------------------------------
# Exocomets
# ------------------------------------------------------------------------------------------


def _comet_by_quadrature(t, *, t0, crossing, b, tail, tau0, height, u1, u2):
    """The defining integral loss = h int (1 - exp(-tau)) I dx, one quad per time (slow)."""
    half = math.sqrt(1.0 - b * b)
    i0 = 1.0 / (math.pi * (1.0 - u1 / 3.0 - u2 / 6.0))

    def integrand(x, xh):
        mu = math.sqrt(max(half * half - x * x, 0.0))
        inten = i0 * (1.0 - u1 * (1.0 - mu) - u2 * (1.0 - mu) ** 2)
        return -math.expm1(-tau0 * math.exp(-(xh - x) / tail)) * inten

    out = []
    for ti in t:
        xh = -half + 2.0 * half * (ti - t0 + 0.5 * crossing) / crossing
        if xh <= -half:
            out.append(1.0)
            continue
        hi = min(xh, half)
        pts = [p for p in (xh - tail, xh - 4 * tail) if -half < p < hi]
        val = integrate.quad(integrand, -half, hi, args=(xh,), points=pts or None, limit=400,
                             epsabs=1e-15, epsrel=1e-11)[0]
        out.append(1.0 - height * val)
    return np.array(out)


def test_comet_thin_uniform_matches_closed_form():
    # Closed form for a uniform disk, optically thin (integral of an exponential tail over a
    # constant chord): with c = 2 h tau0 sqrt(1 - b^2)/pi and tau = L T / chord,
    # head inside: loss = c (tau/T)(1 - exp(-(t - t0 + T/2)/tau));
    # after exit:  loss = c (tau/T)(exp(-(t - t0 - T/2)/tau) - exp(-(t - t0 + T/2)/tau)).
    b, crossing, tau_days = 0.3, 1.0, 0.25
    chord = 2 * math.sqrt(1 - b * b)
    tail = tau_days * chord / crossing
    tau0, height = 1e-5, 0.2  # thin: relative non-linearity tau0/2
    c = 2 * height * tau0 * math.sqrt(1 - b * b) / math.pi
    t = np.linspace(-0.6, 2.5, 1201)
    loss = 1.0 - comet_flux(t, t0=0.0, crossing_time_days=crossing, b=b, tail_length_rstar=tail,
                            peak_optical_depth=tau0, height_rstar=height)
    s_in = t + 0.5 * crossing
    s_out = t - 0.5 * crossing
    ref = np.where(
        s_in <= 0, 0.0,
        np.where(s_out <= 0, c * tau_days / crossing * (1 - np.exp(-np.clip(s_in, 0, None)
                                                                    / tau_days)),
                 c * tau_days / crossing * (np.exp(-np.clip(s_out, 0, None) / tau_days)
                                            - np.exp(-s_in / tau_days))),
    )
    assert np.max(np.abs(loss - ref)) <= 1e-3 * np.max(ref)
    # Worked values of the closed form for c = 1e-3, T = 1 d, tau = 0.25 d (scaled by 1e-3/c):
    scaled = 1.0 - comet_flux([0.0, 0.5, 1.0], t0=0.0, crossing_time_days=crossing, b=b,
                              tail_length_rstar=tail, peak_optical_depth=tau0,
                              height_rstar=height)
    scaled *= 1e-3 / c
    np.testing.assert_allclose(scaled, [2.1617e-4, 2.4542e-4, 3.321e-5],
                               atol=1e-3 * 2.4542e-4)


@pytest.mark.parametrize(
    ("b", "tail", "tau0", "height", "u1", "u2"),
    [
        (0.3, 0.5, 0.5, 0.1, 0.4, 0.26),
        (0.0, 0.05, 2.0, 0.2, 0.6, 0.1),
        (0.85, 3.0, 0.1, 0.1, 0.3, 0.2),
        (0.5, 12.0, 1.0, 0.3, 0.4, 0.26),
        (0.2, 0.004, 5.0, 0.1, 0.4, 0.26),
    ],
)
def test_comet_matches_direct_quadrature(b, tail, tau0, height, u1, u2):
    # The optically thick, limb-darkened profile vs the defining integral evaluated by
    # scipy.integrate.quad at each time: within 1e-3 of the depth.
    crossing = 0.4
    tail_days = tail * crossing / (2 * math.sqrt(1 - b * b))
    t = np.linspace(-0.3, 0.25 + 4 * tail_days, 150)
    got = comet_flux(t, t0=0.0, crossing_time_days=crossing, b=b, tail_length_rstar=tail,
                     peak_optical_depth=tau0, height_rstar=height, u1=u1, u2=u2)
    ref = _comet_by_quadrature(t, t0=0.0, crossing=crossing, b=b, tail=tail, tau0=tau0,
                               height=height, u1=u1, u2=u2)
    depth = 1.0 - ref.min()
    assert np.max(np.abs(got - ref)) <= 1e-3 * depth


def _ingress_egress(t, f, level=0.01):
    """Times from first contact to minimum, and from minimum until the loss falls below
    ``level`` times the depth (our operational 'last contact' for an exponential tail)."""
    loss = 1.0 - f
    i_min = int(np.argmax(loss))
    start = t[np.argmax(loss > 0.0)]
    after = np.nonzero(loss[i_min:] < level * loss[i_min])[0]
    end = t[i_min + after[0]]
    return t[i_min] - start, end - t[i_min]


def test_comet_ingress_shorter_than_egress_and_grows_with_tail():
    # Dust-tail transits are asymmetric: steep ingress, long egress (Lecavelier des Etangs
    # et al. 1999); the asymmetry grows with the tail length.
    t = np.linspace(-1.0, 12.0, 26001)
    ratios = []
    for tail in (0.3, 1.0, 3.0):
        f = comet_flux(t, t0=0.0, crossing_time_days=0.5, b=0.2, tail_length_rstar=tail,
                       peak_optical_depth=0.05, height_rstar=0.2, u1=0.4, u2=0.26)
        ingress, egress = _ingress_egress(t, f)
        assert ingress < egress
        ratios.append(egress / ingress)
    assert ratios[0] < ratios[1] < ratios[2]


def test_comet_depth_linear_in_thin_limit():
    # Optically thin: 1 - exp(-tau) ~ tau, so the loss is linear in tau0 (to ~tau0/2).
    t = np.linspace(-0.5, 2.0, 801)
    kw = dict(t0=0.0, crossing_time_days=0.5, b=0.4, tail_length_rstar=0.8, height_rstar=0.2,
              u1=0.4, u2=0.26)
    d1 = 1.0 - comet_flux(t, peak_optical_depth=1e-4, **kw)
    d2 = 1.0 - comet_flux(t, peak_optical_depth=2e-4, **kw)
    assert np.max(d2) / np.max(d1) == pytest.approx(2.0, rel=2e-4)
    # thick clouds saturate: doubling tau0 = 2 gives far less than twice the loss
    d3 = 1.0 - comet_flux(t, peak_optical_depth=2.0, **kw)
    d4 = 1.0 - comet_flux(t, peak_optical_depth=4.0, **kw)
    assert np.max(d4) / np.max(d3) < 1.6


def test_comet_short_tail_tends_to_symmetric_dip():
    # L -> 0 leaves a thin moving strip, a dip symmetric about t0 (the chord is symmetric).
    # With a finite tail the dip lags and has a sharp egress edge a tail-time late, so a
    # point-wise comparison keeps an O(1) mismatch within ~L of the limb; the integrated
    # asymmetry int |f(t0 + dt) - f(t0 - dt)| dt / (depth * T) shrinks in proportion to L.
    dt = np.linspace(0.0, 0.4, 4001)
    asym = []
    for tail in (0.1, 0.02, 0.004):
        kw = dict(t0=0.0, crossing_time_days=0.5, b=0.3, tail_length_rstar=tail,
                  peak_optical_depth=0.5, height_rstar=0.2, u1=0.4, u2=0.26)
        f_plus = comet_flux(dt, **kw)
        f_minus = comet_flux(-dt, **kw)
        depth = 1.0 - min(f_plus.min(), f_minus.min())
        asym.append(integrate.trapezoid(np.abs(f_plus - f_minus), dt) / (depth * 0.5))
    assert asym[0] > 3 * asym[1] > 9 * asym[2]
    assert asym[2] < 0.01


def test_comet_zero_optical_depth_is_flat():
    # No dust, no dip (definition).
    f = comet_flux(np.linspace(-1, 1, 11), t0=0.0, crossing_time_days=0.5, b=0.3,
                   tail_length_rstar=1.0, peak_optical_depth=0.0)
    np.testing.assert_array_equal(f, 1.0)


# ------------------------------------------------------------------------------------------
# Variability and artefacts
# ------------------------------------------------------------------------------------------


def test_spot_modulation_periodic_mean_one_and_envelope():
    # A Fourier series in rotation phase (common practice): periodic, mean 1 over a period.
    kw = dict(period_days=5.0, amplitudes=[0.01, 0.004, -0.002], phases=[0.1, 1.0, 2.0])
    t = np.linspace(0.0, 5.0, 5000, endpoint=False)
    f = spot_modulation(t, **kw)
    np.testing.assert_allclose(spot_modulation(t + 5.0, **kw), f, atol=1e-14)
    assert np.mean(f) == pytest.approx(1.0, abs=1e-15)
    # sech envelope: at |t - t_ref| = decay_days the amplitude is 1/cosh(1) of the peak.
    one = dict(period_days=1.0, amplitudes=[0.01], phases=[np.pi / 2], decay_days=3.0,
               t_ref_days=10.0)
    peak, later = spot_modulation([10.0, 13.0], **one) - 1.0
    assert later / peak == pytest.approx(1.0 / math.cosh(1.0), rel=1e-12)


def test_pulsation_frequencies_recovered_by_periodogram():
    # astropy LombScargle (Lomb 1976; Scargle 1982) finds the strongest mode.
    t = np.linspace(0.0, 20.0, 4000)
    f = pulsation(t, frequencies_per_day=[3.7, 5.3], amplitudes=[0.003, 0.001],
                  phases=[0.0, 1.0])
    freq, power = LombScargle(t, f).autopower(minimum_frequency=0.5, maximum_frequency=10.0,
                                              samples_per_peak=20)
    assert freq[np.argmax(power)] == pytest.approx(3.7, abs=0.01)
    assert np.max(np.abs(f - 1.0)) <= 0.004 + 1e-15


def test_artefact_shapes():
    # Definitions (common practice for instrument systematics).
    cadence = 0.02
    t = np.arange(0.0, 2.0, cadence)
    box = box_dip(t, t_start=0.5, duration_days=0.3, depth=0.01)
    assert set(np.round(box, 12)) == {1.0, 0.99}
    assert np.count_nonzero(box < 1.0) == pytest.approx(0.3 / cadence, abs=1)
    for n in (1, 2, 3):
        dip = cadence_dip(t, t_mid=1.01, n_cadences=n, cadence_days=cadence, depth=0.005)
        assert np.count_nonzero(dip < 1.0) == n
    st = step(t, t_step=1.0, size=-0.003)
    assert np.all(st[t < 1.0] == 1.0) and np.allclose(st[t >= 1.0], 0.997)
    ramp = exponential_ramp(t, t_start=1.0, amplitude=-0.01, timescale_days=0.2)
    assert np.all(ramp[t < 1.0] == 1.0)
    # e-folding: offset at t_start + tau is exp(-1) of the initial offset
    r = exponential_ramp([1.0, 1.2], t_start=1.0, amplitude=-0.01, timescale_days=0.2) - 1.0
    assert r[1] / r[0] == pytest.approx(math.exp(-1.0), rel=1e-12)
    # Gaussian hump: full width at half maximum = 2 sqrt(2 ln 2) sigma
    tt = np.linspace(-1.0, 1.0, 200001)
    hump = scattered_light_hump(tt, t_peak=0.0, width_days=0.1, amplitude=0.02) - 1.0
    above = tt[hump >= 0.01]
    assert above[-1] - above[0] == pytest.approx(2 * math.sqrt(2 * math.log(2)) * 0.1,
                                                 abs=2e-5)


# ------------------------------------------------------------------------------------------
# Bad parameters
# ------------------------------------------------------------------------------------------

_TRANSIT = dict(t0=0.0, period_days=3.0, k=0.1, a_over_rstar=9.0, b=0.3, u1=0.4, u2=0.26)
_COMET = dict(t0=0.0, crossing_time_days=0.5, b=0.3, tail_length_rstar=1.0,
              peak_optical_depth=0.1)


@pytest.mark.parametrize(
    ("func", "good", "overrides", "code", "name"),
    [
        (transit_flux, _TRANSIT, {"k": 0.0}, "non_positive_parameter", "k"),
        (transit_flux, _TRANSIT, {"k": -0.1}, "non_positive_parameter", "k"),
        (transit_flux, _TRANSIT, {"b": -0.2}, "negative_parameter", "b"),
        (transit_flux, _TRANSIT, {"a_over_rstar": 0.9}, "orbit_inside_star", "a_over_rstar"),
        (transit_flux, _TRANSIT, {"u1": 0.8, "u2": 0.3}, "invalid_limb_darkening", "u1"),
        (transit_flux, _TRANSIT, {"u1": -0.1, "u2": 0.3}, "invalid_limb_darkening", "u2"),
        (transit_flux, _TRANSIT, {"u1": float("nan")}, "non_finite_parameter", "u1"),
        (transit_flux, _TRANSIT, {"ecc": 1.2}, "eccentricity_out_of_range", "ecc"),
        (transit_flux, _TRANSIT, {"period_days": 0.0}, "non_positive_parameter", "period_days"),
        (eclipsing_binary_flux, _EB, {"third_light": 1.0}, "third_light_out_of_range",
         "third_light"),
        (eclipsing_binary_flux, _EB, {"third_light": -0.1}, "third_light_out_of_range",
         "third_light"),
        (eclipsing_binary_flux, _EB, {"radius_ratio": 0.0}, "non_positive_parameter",
         "radius_ratio"),
        (eclipsing_binary_flux, _EB, {"surface_brightness_ratio": -1.0}, "negative_parameter",
         "surface_brightness_ratio"),
        (eclipsing_binary_flux, _EB, {"u1_secondary": 0.9, "u2_secondary": 0.2},
         "invalid_limb_darkening", "u1_secondary"),
        (eclipsing_binary_flux, _EB, {"ellipsoidal_amplitude": -0.01}, "negative_parameter",
         "ellipsoidal_amplitude"),
        (eclipsing_binary_flux, _EB, {"ellipsoidal_amplitude": 0.6, "reflection_amplitude": 0.5},
         "amplitude_out_of_range", "reflection_amplitude"),
        (comet_flux, _COMET, {"peak_optical_depth": -0.1}, "negative_parameter",
         "peak_optical_depth"),
        (comet_flux, _COMET, {"crossing_time_days": 0.0}, "non_positive_parameter",
         "crossing_time_days"),
        (comet_flux, _COMET, {"tail_length_rstar": 0.0}, "non_positive_parameter",
         "tail_length_rstar"),
        (comet_flux, _COMET, {"b": 1.0}, "impact_parameter_out_of_range", "b"),
        (comet_flux, _COMET, {"b": -0.5}, "negative_parameter", "b"),
        (comet_flux, _COMET, {"height_rstar": 0.0}, "strip_height_out_of_range",
         "height_rstar"),
        (comet_flux, _COMET, {"height_rstar": 1.5}, "strip_height_out_of_range",
         "height_rstar"),
        (comet_flux, _COMET, {"u1": 1.2, "u2": -0.1}, "invalid_limb_darkening", "u1"),
    ],
)
def test_model_bad_parameters(func, good, overrides, code, name):
    # Table of bad inputs -> stable error code naming the argument (common practice).
    with pytest.raises(ParameterError, match=name) as info:
        func(np.linspace(-0.1, 0.1, 5), **{**good, **overrides})
    assert info.value.code == code


@pytest.mark.parametrize(
    ("call", "code", "name"),
    [
        (lambda: occulted_flux_uniform([0.1], 0.0), "non_positive_parameter", "k"),
        (lambda: occulted_flux_quadratic([0.1], 0.1, 0.9, 0.2), "invalid_limb_darkening", "u1"),
        (lambda: ellipsoidal_amplitude(mass_ratio=0.0, a_over_r1=5.0, inc_deg=90.0, u1=0.5,
                                       gravity_darkening=0.3),
         "non_positive_parameter", "mass_ratio"),
        (lambda: ellipsoidal_amplitude(mass_ratio=0.5, a_over_r1=5.0, inc_deg=90.0, u1=1.5,
                                       gravity_darkening=0.3),
         "invalid_limb_darkening", "u1"),
        (lambda: ellipsoidal_amplitude(mass_ratio=0.5, a_over_r1=5.0, inc_deg=90.0, u1=0.5,
                                       gravity_darkening=-0.3),
         "negative_parameter", "gravity_darkening"),
        (lambda: spot_modulation([0.0], period_days=5.0, amplitudes=[0.01, 0.02],
                                 phases=[0.0]),
         "parameter_length_mismatch", "phases"),
        (lambda: spot_modulation([0.0], period_days=5.0, amplitudes=[0.6, 0.5],
                                 phases=[0.0, 0.0]),
         "amplitude_out_of_range", "amplitudes"),
        (lambda: spot_modulation([0.0], period_days=-5.0, amplitudes=[0.01], phases=[0.0]),
         "non_positive_parameter", "period_days"),
        (lambda: spot_modulation([0.0], period_days=5.0, amplitudes=[0.01], phases=[0.0],
                                 decay_days=0.0),
         "non_positive_parameter", "decay_days"),
        (lambda: pulsation([0.0], frequencies_per_day=[-1.0], amplitudes=[0.01], phases=[0.0]),
         "non_positive_parameter", "frequencies_per_day"),
        (lambda: pulsation([0.0], frequencies_per_day=[1.0], amplitudes=[np.inf], phases=[0.0]),
         "non_finite_parameter", "amplitudes"),
        (lambda: box_dip([0.0], t_start=0.0, duration_days=0.0, depth=0.01),
         "non_positive_parameter", "duration_days"),
        (lambda: box_dip([0.0], t_start=0.0, duration_days=0.1, depth=1.0),
         "depth_out_of_range", "depth"),
        (lambda: step([0.0], t_step=0.0, size=-1.0), "amplitude_out_of_range", "size"),
        (lambda: exponential_ramp([0.0], t_start=0.0, amplitude=0.01, timescale_days=0.0),
         "non_positive_parameter", "timescale_days"),
        (lambda: scattered_light_hump([0.0], t_peak=0.0, width_days=0.1, amplitude=-1.5),
         "amplitude_out_of_range", "amplitude"),
        (lambda: cadence_dip([0.0], t_mid=0.0, n_cadences=0, cadence_days=0.02, depth=0.01),
         "invalid_cadence_count", "n_cadences"),
        (lambda: cadence_dip([0.0], t_mid=0.0, n_cadences=1.5, cadence_days=0.02, depth=0.01),
         "invalid_cadence_count", "n_cadences"),
        (lambda: cadence_dip([0.0], t_mid=0.0, n_cadences=2, cadence_days=0.02, depth=-0.1),
         "depth_out_of_range", "depth"),
    ],
)
def test_helper_bad_parameters(call, code, name):
    # Table of bad inputs -> stable error code naming the argument (common practice).
    with pytest.raises(ParameterError, match=name) as info:
        call()
    assert info.value.code == code
