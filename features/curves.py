"""Model light curves of fitted shapes: the best fit of each family, as a curve to overlay.

:func:`features.fits.fit_event` records, for every shape family and template, the shape
parameters it found and the chi-square it reached. The baseline ``c`` and the amplitude ``a``
of every model ``c * (1 - a * u(t; theta))`` are solved linearly for each trial and are not all
stored, so this module solves them again, in the same way, from the binned window the fit was
made on. The curve of :func:`family_curve` is therefore exactly the model the fit minimised:
its chi-square against the window is the recorded one.

What each family's curve is (``u`` the unit-depth profiles of :mod:`features.fits`)::

    transit      c (1 - D(k, b) u_transit(t; t0, T14, k, b))   D the true depth: amplitude tied
    eclipse      c (1 - a u_transit(t; t0, T14, k, b))         free amplitude (third light)
                 secondary window: c2 (1 - a2 u_transit(t'; 0, T14, k, b)), a2 > 0, else flat
    comet        c (1 - a u_comet(t; t0, crossing, tail ratio))
    variability  c0 + c1 (t - t_mid) + s sin(2 pi (t - t_mid) / P) + q cos(...)
    artefact     a box with edges one bin wide, or a step c + s H(t - t_step)

Every family but the eclipse predicts a flat secondary window (its weighted mean).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from features.errors import ParameterError
from features.fits import (
    _BANK_X,
    _COMET_X,
    FAMILIES,
    TEMPLATES,
    FamilyFit,
    Window,
    _box,
    _box_binned,
    _comet_profile,
    _comet_row,
    _gaussian,
    _interp_rows,
    _linear,
    _linear1,
    _transit_profile,
    _transit_row,
    _trapezoid,
)

__all__ = ["family_curve", "template_curve"]

_FAMILY_PARAMS: dict[str, tuple[str, ...]] = {
    "transit": ("t0", "t14_days", "k", "b"),
    "eclipse": ("t0", "t14_days", "k", "b"),
    "comet": ("t0", "crossing_days", "tail_ratio"),
    "variability": ("period_days",),
    "artefact": ("kind",),
}
_ARTEFACT_PARAMS: dict[float, tuple[str, ...]] = {0.0: ("t0", "duration_days"),
                                                  1.0: ("t_step",)}
_TEMPLATE_PARAMS: dict[str, tuple[str, ...]] = {
    "box": ("t0", "duration_days"),
    "trapezoid": ("t0", "t14_days", "flat_fraction"),
    "v": ("t0", "t14_days"),
    "gaussian": ("t0", "sigma_days"),
    "comet": ("t0", "crossing_days", "tail_ratio"),
    "comet_mirrored": ("t0", "crossing_days", "tail_ratio"),
}


# --------------------------------------------------------------------------------------------
# validation


def _times(t_days: ArrayLike) -> NDArray[np.float64]:
    t = np.asarray(t_days, dtype=float)
    if t.ndim != 1:
        raise ParameterError("invalid_time", f"t_days must be one-dimensional, got shape "
                                             f"{t.shape}")
    if not np.isfinite(t).all():
        raise ParameterError("invalid_time", "t_days must be finite")
    return t


def _check_window(window: Window, *, secondary: bool) -> None:
    if not isinstance(window, Window):
        raise ParameterError("invalid_window",
                             f"window must be a features.fits.Window, got {type(window).__name__}")
    if window.t.size == 0:
        raise ParameterError("empty_window", "the window holds no binned data")
    if secondary and window.sec_t.size == 0:
        raise ParameterError("no_secondary_window",
                             "the window has no secondary (phase 0.5) data: it is not a fold")


def _params(fit: FamilyFit, needed: tuple[str, ...], what: str) -> dict[str, float]:
    missing = [p for p in needed if p not in fit.params]
    if missing:
        raise ParameterError("missing_fit_parameter",
                             f"{what} fit {fit.name!r} lacks parameter(s) {', '.join(missing)}")
    values = {p: float(fit.params[p]) for p in needed}
    bad = [p for p, v in values.items() if not np.isfinite(v)]
    if bad:
        raise ParameterError("missing_fit_parameter",
                             f"{what} fit {fit.name!r} has non-finite {', '.join(bad)}")
    return values


def _check_fit(fit: FamilyFit, names: tuple[str, ...], what: str) -> None:
    if not isinstance(fit, FamilyFit):
        raise ParameterError("invalid_fit",
                             f"fit must be a features.fits.FamilyFit, got {type(fit).__name__}")
    if fit.name not in names:
        raise ParameterError(f"unknown_{what}",
                             f"{fit.name!r} is not a {what}; expected one of {', '.join(names)}")


# --------------------------------------------------------------------------------------------
# the families


def _beta(p: dict[str, float]) -> float:
    """The bank's impact coordinate b / (1 + k), as the fit parametrised it."""
    return p["b"] / (1.0 + p["k"])


def _transit_unit(t: np.ndarray, p: dict[str, float]) -> tuple[np.ndarray, float]:
    """Unit profile and true depth, interpolated as the fit's residuals were."""
    row, depth = _transit_row(p["k"], _beta(p))
    u = _interp_rows(((t - p["t0"]) / p["t14_days"])[None, :], row[None, :], _BANK_X)[0]
    return u, depth


def _transit(fit: FamilyFit, t: np.ndarray, win: Window) -> np.ndarray:
    p = _params(fit, _FAMILY_PARAMS["transit"], "family")
    u_win, depth = _transit_unit(win.t, p)
    g = 1.0 - depth * u_win
    wg = win.w * g
    c = float(np.sum(wg * win.y) / np.sum(wg * g))
    u, _ = _transit_unit(t, p)
    return c * (1.0 - depth * u)


def _eclipse(fit: FamilyFit, t: np.ndarray, win: Window) -> np.ndarray:
    p = _params(fit, _FAMILY_PARAMS["eclipse"], "family")
    u_win, _ = _transit_unit(win.t, p)
    c, a, _ = _linear1(u_win, win.y, win.w)
    u, _ = _transit_unit(t, p)
    return c * (1.0 - a * u)


def _eclipse_secondary(fit: FamilyFit, t: np.ndarray, win: Window) -> np.ndarray:
    p = _params(fit, _FAMILY_PARAMS["eclipse"], "family")
    u_win, _ = _transit_profile(win.sec_t, 0.0, p["t14_days"], p["k"], _beta(p))
    c, a, _ = _linear(u_win[None, :], win.sec_y, win.sec_w)
    if not a[0] > 0:  # the fit keeps a flat secondary window when no dip is preferred
        return _flat(t, win.sec_y, win.sec_w)
    u, _ = _transit_profile(t, 0.0, p["t14_days"], p["k"], _beta(p))
    return float(c[0]) * (1.0 - float(a[0]) * u)


def _comet(fit: FamilyFit, t: np.ndarray, win: Window) -> np.ndarray:
    p = _params(fit, _FAMILY_PARAMS["comet"], "family")
    args = (p["t0"], p["crossing_days"], p["tail_ratio"])
    c, a, _ = _linear1(_comet_profile(win.t, *args), win.y, win.w)
    return c * (1.0 - a * _comet_profile(t, *args))


def _variability_design(x: np.ndarray, period: float) -> np.ndarray:
    phase = 2.0 * np.pi * x / period
    return np.stack([np.ones_like(x), x, np.sin(phase), np.cos(phase)], axis=1)


def _variability(fit: FamilyFit, t: np.ndarray, win: Window) -> np.ndarray:
    period = _params(fit, _FAMILY_PARAMS["variability"], "family")["period_days"]
    design = _variability_design(win.t - win.t_mid, period)
    dw = design * win.w[:, None]
    normal = dw.T @ design + 1e-12 * np.eye(4)  # the fit's regularisation
    coef = np.linalg.solve(normal, dw.T @ win.y)
    return _variability_design(t - win.t_mid, period) @ coef


def _artefact(fit: FamilyFit, t: np.ndarray, win: Window,
              box_template: FamilyFit | None) -> np.ndarray:
    kind = _params(fit, _FAMILY_PARAMS["artefact"], "family")["kind"]
    if kind not in _ARTEFACT_PARAMS:
        raise ParameterError("missing_fit_parameter",
                             f"artefact fit has kind {kind!r}; expected 0 (box) or 1 (step)")
    p = _params(fit, _ARTEFACT_PARAMS[kind], "family")
    if kind == 1.0:
        u_win = (win.t >= p["t_step"]).astype(float)
        c, a, _ = _linear(u_win[None, :], win.y, win.w)
        return float(c[0]) * (1.0 - float(a[0]) * (t >= p["t_step"]).astype(float))
    edge = float(np.median(np.diff(win.t))) if win.t.size > 1 else win.duration_days
    c1, a1, chi1 = _linear1(_box_binned(win.t, p["t0"], p["duration_days"], edge), win.y, win.w)
    if box_template is not None and box_template.chi2 < chi1:
        # the fit kept the chi-square of the grid box, which beat the refined one
        return template_curve(box_template, t, win)
    return c1 * (1.0 - a1 * _box_binned(t, p["t0"], p["duration_days"], edge))


def _flat(t: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    return np.full(t.size, float(w @ y / w.sum()))


_PRIMARY = {"transit": _transit, "eclipse": _eclipse, "comet": _comet,
            "variability": _variability}


def family_curve(
    fit: FamilyFit,
    t_days: ArrayLike,
    window: Window,
    *,
    secondary: bool = False,
    box_template: FamilyFit | None = None,
) -> NDArray[np.float64]:
    """The model light curve of a fitted shape family.

    Parameters
    ----------
    fit : FamilyFit
        One of ``EventFits.families`` (``transit``, ``eclipse``, ``comet``, ``variability``,
        ``artefact``) from :func:`features.fits.fit_event`.
    t_days : array_like, shape (n,)
        Times [days] in the window's frame: absolute times near a single event, or
        ``window.t_mid`` plus the phase offset [days] for a fold (as ``window.t``). With
        ``secondary=True``: times relative to the centre of the phase-0.5 window (as
        ``window.sec_t``).
    window : Window
        The binned window the fit was made on (:func:`features.fits.make_window`); its data
        fix the baseline and amplitude, which enter the models linearly.
    secondary : bool
        Return the model of the secondary (phase 0.5) window instead: the eclipse family's
        secondary eclipse, flat for every other family.
    box_template : FamilyFit, optional
        The ``box`` template of the same fit (``EventFits.templates["box"]``); used only by a
        box-shaped ``artefact``. The artefact fit records the chi-square of the better of its
        refined box and this grid box but always the refined box's parameters, so when the grid
        box was better, its curve is the one fitted. Without it the refined box is drawn.

    Returns
    -------
    ndarray, shape (n,)
        Model flux [relative flux, 1 = baseline of the detrended data].

    Raises
    ------
    ParameterError
        ``invalid_fit`` / ``unknown_family`` (not a family fit), ``missing_fit_parameter``,
        ``invalid_window`` / ``empty_window``, ``no_secondary_window`` (``secondary=True`` on a
        window that is not a fold), ``invalid_time`` (not 1-D or not finite).

    Notes
    -----
    The baseline ``c`` and amplitude ``a`` of ``c (1 - a u)`` are the weighted least-squares
    solution on the window, computed with the same kernels as the fit (the transit's amplitude
    is tied to its radius ratio, so only ``c`` is solved; the variability family solves its four
    linear coefficients). The chi-square of the curve against the window, secondary window
    included, is the one recorded in ``fit.chi2``.

    Examples
    --------
    >>> import numpy as np
    >>> from features.fits import fit_event, make_window
    >>> t = np.arange(0.0, 2.0, 0.01)
    >>> f = 1 - 0.01 * (np.abs(t - 1.0) < 0.05)
    >>> win = make_window(t, f, np.full(t.size, 1e-3), t_mid=1.0, duration_days=0.1,
    ...                   depth=0.01, cadence_days=0.01)
    >>> fits, _ = fit_event(win)
    >>> model = family_curve(fits.families["artefact"], win.t, win)
    >>> bool(abs(model.min() - 0.99) < 1e-3)
    True
    """
    _check_fit(fit, FAMILIES, "family")
    t = _times(t_days)
    _check_window(window, secondary=secondary)
    if secondary:
        if fit.name == "eclipse":
            return _eclipse_secondary(fit, t, window)
        return _flat(t, window.sec_y, window.sec_w)
    if fit.name == "artefact":
        if box_template is not None:
            _check_fit(box_template, ("box",), "template")
        return _artefact(fit, t, window, box_template)
    return _PRIMARY[fit.name](fit, t, window)


# --------------------------------------------------------------------------------------------
# the templates


def _template_unit(name: str, t: np.ndarray, p: dict[str, float]) -> np.ndarray:
    if name == "box":
        return _box(t, p["t0"], p["duration_days"])
    if name == "trapezoid":
        return _trapezoid(t, p["t0"], p["t14_days"], p["flat_fraction"])
    if name == "v":
        return _trapezoid(t, p["t0"], p["t14_days"], 0.0)
    if name == "gaussian":
        return _gaussian(t, p["t0"], p["sigma_days"])
    x = (t - p["t0"]) / p["crossing_days"]
    if name == "comet_mirrored":
        x = -x
    return np.interp(x, _COMET_X, _comet_row(p["tail_ratio"]), left=0.0, right=0.0)


def template_curve(fit: FamilyFit, t_days: ArrayLike, window: Window) -> NDArray[np.float64]:
    """The model light curve of a fitted template (shape only, no physics).

    Parameters
    ----------
    fit : FamilyFit
        One of ``EventFits.templates`` (``box``, ``trapezoid``, ``v``, ``gaussian``, ``comet``,
        ``comet_mirrored``) from :func:`features.fits.fit_event`.
    t_days : array_like, shape (n,)
        Times [days] in the window's frame (see :func:`family_curve`).
    window : Window
        The binned window the template was fitted to.

    Returns
    -------
    ndarray, shape (n,)
        Model flux [relative flux]. Its chi-square against the event window (templates ignore
        the secondary window) is ``fit.chi2``.

    Raises
    ------
    ParameterError
        ``invalid_fit`` / ``unknown_template``, ``missing_fit_parameter``, ``invalid_window`` /
        ``empty_window``, ``invalid_time``.

    Examples
    --------
    >>> import numpy as np
    >>> from features.fits import fit_event, make_window
    >>> t = np.arange(0.0, 2.0, 0.01)
    >>> f = 1 - 0.01 * (np.abs(t - 1.0) < 0.05)
    >>> win = make_window(t, f, np.full(t.size, 1e-3), t_mid=1.0, duration_days=0.1,
    ...                   depth=0.01, cadence_days=0.01)
    >>> fits, _ = fit_event(win)
    >>> template_curve(fits.templates["box"], [0.5, 1.0], win).round(4).tolist()
    [1.0, 0.99]
    """
    _check_fit(fit, TEMPLATES, "template")
    t = _times(t_days)
    _check_window(window, secondary=False)
    p = _params(fit, _TEMPLATE_PARAMS[fit.name], "template")
    c, a, _ = _linear(_template_unit(fit.name, window.t, p)[None, :], window.y, window.w)
    return float(c[0]) * (1.0 - float(a[0]) * _template_unit(fit.name, t, p))
