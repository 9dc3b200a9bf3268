"""Model curves of fitted shapes: each curve is the model its fit minimised.

References outside the project: batman-package (Kreidberg 2015, PASP 127, 1161) for the
limb-darkened transit light curve; the weighted chi-square sum_i w_i (y_i - m_i)^2 (common
practice) recomputed here from the curves, against the values ``fit_event`` recorded.
"""

from __future__ import annotations

from dataclasses import replace

import batman
import numpy as np
import pytest

from features import shapes
from features.curves import family_curve, template_curve
from features.errors import ParameterError
from features.fits import FAMILIES, TEMPLATES, FamilyFit, Window, fit_event, make_window

CAD = 2.0 / 1440.0
# the FGK quadratic limb darkening the transit family assumes (features.fits, _U1 and _U2)
U_FIT = (0.45, 0.20)


def _batman(t, *, t0=1.5, per=10.0, rp=0.1, a=30.0, inc=89.7, u=U_FIT):
    p = batman.TransitParams()
    p.t0, p.per, p.rp, p.a, p.inc, p.ecc, p.w = t0, per, rp, a, inc, 0.0, 90.0
    p.limb_dark, p.u = "quadratic", list(u)
    return batman.TransitModel(p, t).light_curve(p)


def _comet(t, *, t0, crossing=0.25):
    return shapes.comet_flux(t, t0=t0, crossing_time_days=crossing, b=0.3,
                             tail_length_rstar=2.0, peak_optical_depth=0.02, height_rstar=0.2,
                             u1=0.4, u2=0.25)


def _eclipsing_binary(t):
    return shapes.eclipsing_binary_flux(
        t, t0=1.0, period_days=2.0, radius_ratio=0.6, a_over_r1=5.0, b=0.3,
        surface_brightness_ratio=0.4, u1_primary=0.4, u2_primary=0.25, u1_secondary=0.4,
        u2_secondary=0.25, third_light=0.9)


def _case(name: str, seed: int) -> Window:
    """A noisy event of each kind, binned by make_window as the extractor does."""
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, 4.0, CAD)
    period = None
    if name == "transit":
        clean, sigma, t_mid, dur, depth = _batman(t), 1e-3, 1.5, 0.1, 0.012
    elif name == "comet":
        clean, sigma, t_mid, dur, depth = _comet(t, t0=1.5), 4e-4, 1.7, 0.6, 0.002
    elif name == "faint_comet":
        # low SNR and a poor duration guess: for seed 8 the artefact fit keeps the chi-square
        # of its grid box, which beats the refined box (measured)
        t = np.arange(0.0, 6.0, CAD)
        clean, sigma, t_mid, dur, depth = _comet(t, t0=2.0, crossing=0.2), 3e-3, 2.0, 0.15, 2e-3
    elif name == "box":
        clean = shapes.box_dip(t, t_start=1.9, duration_days=0.2, depth=0.003)
        sigma, t_mid, dur, depth = 1e-3, 2.0, 0.2, 0.003
    elif name == "step":
        clean = shapes.step(t, t_step=2.0, size=-0.004)
        sigma, t_mid, dur, depth = 1e-3, 2.0, 0.3, 0.004
    elif name == "sinusoid":
        clean, sigma, t_mid, dur, depth = 1 + 0.004 * np.sin(np.pi * t), 1e-3, 1.5, 0.8, 0.004
    elif name == "eclipse_fold":
        t = np.arange(0.0, 27.0, 10.0 / 1440.0)
        clean, sigma, t_mid, dur, period = _eclipsing_binary(t), 5e-4, 1.0, 0.2, 2.0
        depth = 1 - clean.min()
    else:  # pragma: no cover - a typo in the table below
        raise KeyError(name)
    flux = clean + rng.normal(0.0, sigma, t.size)
    cadence = float(np.median(np.diff(t)))
    return make_window(t, flux, np.full(t.size, sigma), t_mid=t_mid, duration_days=dur,
                       depth=depth, cadence_days=cadence, period_days=period)


def _chi2(y, w, model) -> float:
    # weighted chi-square (common practice)
    return float(np.sum(w * (y - model) ** 2))


def _rounding(win: Window) -> float:
    """Absolute rounding floor of a chi-square obtained from expanded sums (sum w y^2 - ...).

    The fits compute chi-square as differences of sums of order sum w y^2; those lose about
    eps * sum w y^2 (times a small factor), which is what the recomputed value may differ by.
    """
    big = float(win.w @ (win.y**2)) + float(win.sec_w @ (win.sec_y**2))
    return 64.0 * np.finfo(float).eps * big


CASES = [(name, seed) for name in ("transit", "comet", "box", "step", "sinusoid",
                                   "eclipse_fold") for seed in (0, 1)] + [("faint_comet", 8)]


# --- the curve is the fitted model -----------------------------------------------------------


@pytest.mark.parametrize(("name", "seed"), CASES)
def test_family_curves_reproduce_the_recorded_chi_square(name, seed):
    win = _case(name, seed)
    fits, _ = fit_event(win, with_asymmetric=False)
    box = fits.templates["box"]
    for family in FAMILIES:
        fit = fits.families[family]
        chi2 = _chi2(win.y, win.w, family_curve(fit, win.t, win, box_template=box))
        if win.sec_t.size:
            chi2 += _chi2(win.sec_y, win.sec_w,
                          family_curve(fit, win.sec_t, win, secondary=True))
        assert chi2 == pytest.approx(fit.chi2, rel=1e-6, abs=_rounding(win)), family


@pytest.mark.parametrize(("name", "seed"), CASES[::2])
def test_template_curves_reproduce_the_recorded_chi_square(name, seed):
    win = _case(name, seed)
    fits, _ = fit_event(win, with_asymmetric=False)
    for template in TEMPLATES:
        fit = fits.templates[template]
        chi2 = _chi2(win.y, win.w, template_curve(fit, win.t, win))
        # templates are fitted to the event window only
        assert chi2 == pytest.approx(fit.chi2, rel=1e-6, abs=_rounding(win)), template


def test_transit_curve_of_a_noiseless_batman_transit_matches_batman():
    # batman-package (Kreidberg 2015): quadratic limb darkening with the coefficients the
    # transit family assumes; a/R* = 30 so the chord is straight, as in the family's profiles
    t = np.arange(0.0, 3.0, CAD)
    for rp, inc in ((0.1, 89.7), (0.05, 89.0), (0.15, 89.5), (0.1, 88.6)):
        clean = _batman(t, rp=rp, inc=inc)
        depth = 1.0 - clean.min()
        t14 = np.ptp(t[clean < 1.0])
        win = make_window(t, clean, np.full(t.size, 1e-4), t_mid=1.5, duration_days=0.8 * t14,
                          depth=0.9 * depth, cadence_days=CAD)
        fits, _ = fit_event(win, with_asymmetric=False)
        dense = np.linspace(1.5 - 1.5 * t14, 1.5 + 1.5 * t14, 3001)
        diff = family_curve(fits.families["transit"], dense, win) - _batman(dense, rp=rp,
                                                                            inc=inc)
        # measured: rms <= 0.6 % and max <= 3.8 % of the depth (interpolation of the profile
        # bank in radius ratio and impact parameter, and 160 bins across the window)
        assert np.sqrt(np.mean(diff**2)) < 0.01 * depth, (rp, inc)
        assert np.max(np.abs(diff)) < 0.05 * depth, (rp, inc)
        assert np.max(np.abs(diff[np.abs(dense - 1.5) > 0.6 * t14])) < 1e-3 * depth  # flat outside


def test_curves_have_the_shape_their_parameters_say():
    win = _case("eclipse_fold", 0)
    fits, _ = fit_event(win, with_asymmetric=False)
    t = np.linspace(win.t[0], win.t[-1], 4001)
    for name in ("transit", "eclipse"):
        fit = fits.families[name]
        model = family_curve(fit, t, win)
        baseline = model[np.argmin(np.abs(t - (fit.params["t0"] - fit.params["t14_days"])))]
        # the deepest point of the model is its recorded depth below its baseline
        assert 1.0 - model.min() / baseline == pytest.approx(fit.params["depth"], rel=2e-3)
        # last contact: flat from t0 + T14 / 2 on
        after = t > fit.params["t0"] + 0.5 * fit.params["t14_days"]
        assert np.ptp(model[after]) == pytest.approx(0.0, abs=1e-12)
    ecl = fits.families["eclipse"]
    sec_t = np.linspace(win.sec_t[0], win.sec_t[-1], 1001)
    sec = family_curve(ecl, sec_t, win, secondary=True)
    assert 1.0 - sec.min() / sec[0] == pytest.approx(ecl.params["secondary_depth"], rel=2e-3)
    # every other family predicts a flat secondary window: its weighted mean
    mean = float(win.sec_w @ win.sec_y / win.sec_w.sum())
    flat = family_curve(fits.families["comet"], sec_t, win, secondary=True)
    np.testing.assert_allclose(flat, mean, rtol=0, atol=1e-15)


def _hand_fit(name: str, chi2: float, **params: float) -> FamilyFit:
    return FamilyFit(name=name, chi2=chi2, n_params=4, bic=chi2, params=params)


def test_artefact_box_follows_the_better_of_refined_and_grid_box():
    win = _case("box", 0)
    refined = _hand_fit("artefact", 1.0, kind=0.0, t0=2.01, duration_days=0.15, depth=0.003)
    grid = _hand_fit("box", 0.0, t0=2.0, duration_days=0.2, depth=0.003)
    # a grid box with a lower chi-square than the refined one is what the fit kept
    better = replace(grid, chi2=0.0)
    np.testing.assert_array_equal(family_curve(refined, win.t, win, box_template=better),
                                  template_curve(grid, win.t, win))
    worse = replace(grid, chi2=1e30)
    np.testing.assert_array_equal(family_curve(refined, win.t, win, box_template=worse),
                                  family_curve(refined, win.t, win))
    assert not np.array_equal(family_curve(refined, win.t, win),
                              template_curve(grid, win.t, win))


# --- bad input ------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def fitted():
    win = _case("transit", 0)
    fits, _ = fit_event(win, with_asymmetric=False)
    return win, fits


@pytest.mark.parametrize(
    ("change", "code", "message"),
    [
        ({"fit": "template"}, "unknown_family", "not a family"),
        ({"fit": "not a fit"}, "invalid_fit", "FamilyFit"),
        ({"fit": "no_k"}, "missing_fit_parameter", "lacks parameter"),
        ({"fit": "nan_k"}, "missing_fit_parameter", "non-finite"),
        ({"fit": "bad_kind"}, "missing_fit_parameter", "kind"),
        ({"t": "nan"}, "invalid_time", "finite"),
        ({"t": "2d"}, "invalid_time", "one-dimensional"),
        ({"window": "empty"}, "empty_window", "no binned data"),
        ({"window": "not a window"}, "invalid_window", "Window"),
        ({"secondary": True}, "no_secondary_window", "not a fold"),
        ({"box_template": "transit"}, "unknown_template", "not a template"),
    ],
)
def test_family_curve_refuses_bad_input(fitted, change, code, message):
    win, fits = fitted
    fit = fits.families["transit"]
    fit = {"template": fits.templates["box"], "not a fit": {"name": "transit"},
           "no_k": replace(fit, params={k: v for k, v in fit.params.items() if k != "k"}),
           "nan_k": replace(fit, params={**fit.params, "k": float("nan")}),
           "bad_kind": replace(fits.families["artefact"],
                               params={**fits.families["artefact"].params, "kind": 2.0}),
           }.get(change.get("fit"), fit)
    t = {"nan": np.array([1.0, np.nan]), "2d": np.ones((2, 2))}.get(change.get("t"), win.t)
    window = {"empty": replace(win, t=np.empty(0), y=np.empty(0), w=np.empty(0)),
              "not a window": {"t": win.t}}.get(change.get("window"), win)
    box = fits.families["transit"] if "box_template" in change else None
    if box is not None:
        fit = fits.families["artefact"]
    with pytest.raises(ParameterError, match=message) as info:
        family_curve(fit, t, window, secondary=change.get("secondary", False), box_template=box)
    assert info.value.code == code


def test_template_curve_refuses_a_family_fit(fitted):
    win, fits = fitted
    with pytest.raises(ParameterError, match="not a template") as info:
        template_curve(fits.families["transit"], win.t, win)
    assert info.value.code == "unknown_template"
