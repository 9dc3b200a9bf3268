"""Shape fits of one event: five physical families and a set of templates, with chi-square and BIC.

The event is first averaged into at most ``max_bins`` bins of a window around it (a folded window
for periodic signals), so every fit costs the same whatever the segment length. Each model is
``c * (1 - a * u(t; theta))``: a baseline ``c`` and an amplitude ``a`` that enter linearly (solved
exactly for every trial) and a unit-depth profile ``u`` whose shape parameters ``theta`` are
found by a vectorised grid search followed by a short bounded least-squares refinement
(``scipy.optimize.least_squares``, trust-region reflective).

Families (the physical hypotheses, compared by BIC = chi^2 + n_params ln n_bins, Schwarz 1978):

``transit``      limb-darkened planet transit, Mandel & Agol (2002) quadratic law with FGK
                 coefficients; amplitude tied to the radius ratio (no dilution), k <= 0.3
``eclipse``      stellar eclipse: radius ratio up to 2, free amplitude (third light) and, when
                 periodic, a free secondary eclipse at phase 0.5
``comet``        exponential-tail comet profile integrated over the limb-darkened disk
                 (:func:`features.shapes.comet_flux`)
``variability``  sinusoid of free period plus a linear trend
``artefact``     the better of a sharp-edged box and a step

Templates (shape only; reported as chi-square improvements over a flat line): box, symmetric
trapezoid, V, Gaussian, comet, time-mirrored comet, and an asymmetric trapezoid whose ingress and
egress durations give the ingress/egress ratio.

The transit and comet profiles come from banks of unit-depth profiles computed once per process
from :mod:`features.shapes` on a dimensionless time grid and interpolated (linear in time,
bilinear in shape) during the fits.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
from scipy.optimize import least_squares

from features import shapes
from features.errors import ParameterError

__all__ = [
    "FAMILIES",
    "TEMPLATES",
    "EventFits",
    "FamilyFit",
    "Window",
    "asymmetric_trapezoid",
    "fit_asymmetric",
    "fit_event",
    "fit_stretched_transit",
    "make_window",
]

FAMILIES: tuple[str, ...] = ("transit", "eclipse", "comet", "variability", "artefact")
TEMPLATES: tuple[str, ...] = ("box", "trapezoid", "v", "gaussian", "comet", "comet_mirrored")

# quadratic limb darkening of a typical FGK dwarf in a red-optical band (Claret 2011; from memory)
_U1, _U2 = 0.45, 0.20
_TRANSIT_K_MAX = 0.3


# --------------------------------------------------------------------------------------------
# the binned window


@dataclass(frozen=True)
class Window:
    """Binned data around one event.

    Attributes
    ----------
    t : ndarray
        Bin centres [days] (absolute time, or epoch-0 time of a fold).
    y : ndarray
        Mean detrended flux per bin.
    w : ndarray
        Weights 1 / sigma^2 per bin (sigma includes the red-noise factor).
    t_mid, duration_days, depth : float
        The event as detected (starting point of the fits).
    sec_y, sec_w : ndarray
        Binned data around phase 0.5 (empty when not periodic).
    sec_t : ndarray
        Their times relative to the secondary's centre [days].
    n_points : int
        Points that went into the window.
    """

    t: np.ndarray
    y: np.ndarray
    w: np.ndarray
    t_mid: float
    duration_days: float
    depth: float
    sec_t: np.ndarray = field(default_factory=lambda: np.empty(0))
    sec_y: np.ndarray = field(default_factory=lambda: np.empty(0))
    sec_w: np.ndarray = field(default_factory=lambda: np.empty(0))
    n_points: int = 0

    @property
    def n_bins(self) -> int:
        """Bins in the event window and the secondary window together."""
        return int(self.t.size + self.sec_t.size)


def _bin(t: np.ndarray, y: np.ndarray, sigma: np.ndarray, lo: float, hi: float,
         width: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    sel = (t >= lo) & (t < hi)
    t, y, s = t[sel], y[sel], sigma[sel]
    if t.size == 0:
        return np.empty(0), np.empty(0), np.empty(0)
    n_bins = max(int(np.ceil((hi - lo) / width)), 1)
    idx = np.minimum(((t - lo) / width).astype(int), n_bins - 1)
    w = 1.0 / (s * s)
    sw = np.bincount(idx, weights=w, minlength=n_bins)
    swy = np.bincount(idx, weights=w * y, minlength=n_bins)
    swt = np.bincount(idx, weights=w * t, minlength=n_bins)
    keep = sw > 0
    return swt[keep] / sw[keep], swy[keep] / sw[keep], sw[keep]


def make_window(
    time_days: np.ndarray,
    flux: np.ndarray,
    sigma: np.ndarray,
    *,
    t_mid: float,
    duration_days: float,
    depth: float,
    cadence_days: float,
    period_days: float | None = None,
    before: float = 2.5,
    after: float = 4.0,
    max_bins: int = 160,
) -> Window:
    """Bin the data around an event (or around phase 0 of a fold) for fitting.

    Parameters
    ----------
    time_days, flux, sigma : ndarray
        Times [days], detrended relative flux and per-point errors (red noise included).
    t_mid, duration_days, depth : float
        The detected event.
    cadence_days : float
        Cadence [days]; bins are never narrower.
    period_days : float, optional
        When given, the data are folded on it (epoch ``t_mid``) and a second window is binned
        around phase 0.5 for the secondary eclipse.
    before, after : float
        Window extent before and after ``t_mid`` in event durations (more room after, for tails).
    max_bins : int
        Upper limit on the number of bins in the event window.
    """
    t = np.asarray(time_days, dtype=float)
    if period_days is not None:
        phase = (t - t_mid + 0.5 * period_days) % period_days - 0.5 * period_days
        t_rel = phase
        half = 0.5 * period_days
        before = min(before, half / duration_days)
        after = min(after, half / duration_days)
    else:
        t_rel = t - t_mid
    lo, hi = -before * duration_days, after * duration_days
    width = max(cadence_days, (hi - lo) / max_bins)
    bt, by, bw = _bin(t_rel, flux, sigma, lo, hi, width)
    n_in = int(np.count_nonzero((t_rel >= lo) & (t_rel < hi)))
    st = sy = sw = np.empty(0)
    if period_days is not None:
        sec = (t - t_mid) % period_days - 0.5 * period_days  # 0 at phase 0.5
        w2 = min(2.0 * duration_days, 0.25 * period_days)
        st, sy, sw = _bin(sec, flux, sigma, -w2, w2, width)
    return Window(t=bt + t_mid, y=by, w=bw, t_mid=float(t_mid),
                  duration_days=float(duration_days), depth=float(depth), sec_t=st, sec_y=sy,
                  sec_w=sw, n_points=n_in)


# --------------------------------------------------------------------------------------------
# linear part: c * (1 - a u) = c - (c a) u, solved exactly for many profiles at once


def _linear(u: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray,
                                                                 np.ndarray]:
    """Best ``c, a`` and chi^2 for each row of ``u`` (shape (m, n)) under model c (1 - a u)."""
    sw = w.sum()
    swy = w @ y
    swyy = w @ (y * y)
    su = u @ w
    suu = (u * u) @ w
    suy = u @ (w * y)
    det = sw * suu - su * su
    bad = ~(det > 1e-300 * sw * np.maximum(suu, 1e-300))  # flat profile: no amplitude
    det = np.where(bad, 1.0, det)
    c = (suu * swy - su * suy) / det
    ca = (su * swy - sw * suy) / det
    chi2 = swyy - c * swy + ca * suy
    bad |= ~(np.abs(c) > 0)
    c = np.where(bad, swy / sw, c)
    a = np.where(bad, 0.0, ca / np.where(bad, 1.0, c))
    chi2 = np.where(bad, swyy - swy * swy / sw, chi2)
    return c, a, np.maximum(chi2, 0.0)


def _linear1(u: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[float, float, float]:
    """:func:`_linear` for one profile ``u`` (shape (n,)), with plain floats (hot path)."""
    wu = w * u
    sw = float(w.sum())
    swy = float(w @ y)
    su = float(wu.sum())
    suu = float(wu @ u)
    suy = float(wu @ y)
    det = sw * suu - su * su
    if not det > 0:
        return swy / sw, 0.0, max(float(w @ (y * y)) - swy * swy / sw, 0.0)
    c = (suu * swy - su * suy) / det
    ca = (su * swy - sw * suy) / det
    chi2 = float(w @ (y * y)) - c * swy + ca * suy
    return c, (ca / c if c != 0 else 0.0), max(chi2, 0.0)


def _best_dip(u: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[int, np.ndarray,
                                                                  np.ndarray]:
    """Index of the best dip-shaped (positive amplitude) row of ``u``, with chi^2 and amplitudes
    of every row (rows that would need a negative amplitude get chi^2 = inf)."""
    _, a, chi = _linear(u, y, w)
    chi = np.where(a > 0, chi, np.inf)
    return int(np.argmin(chi)), chi, a


def _linear_tied(u: np.ndarray, amp: np.ndarray | float, y: np.ndarray,
                 w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Best ``c`` and chi^2 for model c (1 - amp u) with the amplitude fixed."""
    g = 1.0 - np.asarray(amp)[..., None] * u
    sgy = g @ (w * y)
    sgg = (g * g) @ w
    c = sgy / sgg
    chi2 = (w @ (y * y)) - c * sgy
    return c, np.maximum(chi2, 0.0)


def _flat_chi2(y: np.ndarray, w: np.ndarray) -> float:
    if y.size == 0:
        return 0.0
    return float(w @ (y * y) - (w @ y) ** 2 / w.sum())


# --------------------------------------------------------------------------------------------
# analytic unit profiles (vectorised over leading parameter axes)


def _box(t, t0, dur):
    return (np.abs(t - t0) <= 0.5 * dur).astype(float)


def _trapezoid(t, t0, t14, flat):
    """Symmetric trapezoid of total width t14 and flat part flat * t14 (unit depth)."""
    edge = 0.5 * t14 * (1.0 - flat)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.clip((0.5 * t14 - np.abs(t - t0)) / np.maximum(edge, 1e-12), 0.0, 1.0)
    return out


def _asym_trapezoid(t, t1, t_in, t_flat, t_out):
    """Trapezoid from first contact t1: ingress t_in, flat t_flat, egress t_out (unit depth)."""
    x = t - t1
    rise = np.clip(x / np.maximum(t_in, 1e-12), 0.0, 1.0)
    fall = np.clip((t_in + t_flat + t_out - x) / np.maximum(t_out, 1e-12), 0.0, 1.0)
    return np.minimum(rise, fall)


def asymmetric_trapezoid(
    time_days: np.ndarray, *, t1: float, ingress_days: float, flat_days: float,
    egress_days: float,
) -> np.ndarray:
    """Unit-depth asymmetric trapezoid (0 outside, 1 on the flat bottom).

    Parameters
    ----------
    time_days : ndarray
        Times [days].
    t1 : float
        First contact [days].
    ingress_days, flat_days, egress_days : float
        Durations of the ingress ramp, the flat bottom and the egress ramp [days].
    """
    return _asym_trapezoid(np.asarray(time_days, dtype=float), t1, ingress_days, flat_days,
                           egress_days)


def _gaussian(t, t0, sig):
    return np.exp(-0.5 * ((t - t0) / sig) ** 2)


# --------------------------------------------------------------------------------------------
# profile banks from the physical models


_BANK_X = np.linspace(-0.55, 0.55, 441)  # time in units of T14, centred on mid-transit
_BANK_K = np.array([0.01, 0.02, 0.04, 0.07, 0.1, 0.14, 0.2, 0.3, 0.45, 0.7, 1.0, 1.4, 2.0])
_BANK_BETA = np.array([0.0, 0.25, 0.45, 0.6, 0.72, 0.82, 0.9, 0.95, 0.985])  # b / (1 + k)
_LOG_BANK_K_LIST = [math.log(k) for k in _BANK_K]
_BANK_BETA_LIST = [float(b) for b in _BANK_BETA]


def _fractional_index(value: float, grid: list[float]) -> float:
    """Position of ``value`` in the increasing ``grid`` as a fractional index (clamped)."""
    if value <= grid[0]:
        return 0.0
    if value >= grid[-1]:
        return float(len(grid) - 1)
    i = bisect.bisect_right(grid, value) - 1
    return i + (value - grid[i]) / (grid[i + 1] - grid[i])


@lru_cache(maxsize=1)
def _transit_bank() -> tuple[np.ndarray, np.ndarray]:
    """Unit-depth transit profiles u[k, beta, x] and their true depths D[k, beta].

    Straight-chord geometry (a/R* >> 1): z(x) = sqrt(b^2 + (2 x sqrt((1 + k)^2 - b^2))^2), with
    x = (t - t0) / T14, so first and last contact fall at x = -1/2 and +1/2.
    """
    u = np.empty((_BANK_K.size, _BANK_BETA.size, _BANK_X.size))
    depth = np.empty((_BANK_K.size, _BANK_BETA.size))
    for i, k in enumerate(_BANK_K):
        for j, beta in enumerate(_BANK_BETA):
            b = beta * (1.0 + k)
            half_chord = np.sqrt((1.0 + k) ** 2 - b * b)
            z = np.sqrt(b * b + (2.0 * _BANK_X * half_chord) ** 2)
            deficit = 1.0 - shapes.occulted_flux_quadratic(z, float(k), _U1, _U2)
            d = float(deficit.max())
            depth[i, j] = d
            u[i, j] = deficit / d if d > 0 else 0.0
    return u, depth


_COMET_X = np.linspace(-0.6, 14.0, 1461)  # time in units of the crossing time, head mid-chord at 0
_COMET_R = np.geomspace(0.05, 10.0, 14)  # tail e-folding time over crossing time
_COMET_B = 0.3
_LOG_COMET_R_LIST = [math.log(r) for r in _COMET_R]


@lru_cache(maxsize=1)
def _comet_bank() -> np.ndarray:
    """Unit-depth comet profiles u[r, x] for a thin tail (optically thin limit)."""
    chord = 2.0 * np.sqrt(1.0 - _COMET_B**2)
    out = np.empty((_COMET_R.size, _COMET_X.size))
    for i, r in enumerate(_COMET_R):
        f = shapes.comet_flux(_COMET_X, t0=0.0, crossing_time_days=1.0, b=_COMET_B,
                              tail_length_rstar=float(r * chord), peak_optical_depth=1e-4,
                              height_rstar=0.1, u1=_U1, u2=_U2)
        deficit = 1.0 - f
        out[i] = deficit / deficit.max()
    return out


@lru_cache(maxsize=256)
def _transit_cell(i: int, j: int) -> tuple[np.ndarray, np.ndarray]:
    """The four bank profiles (4, n_x) and depths (4,) at the corners of cell (i, j)."""
    u_bank, d_bank = _transit_bank()
    cells = ((i, j), (i + 1, j), (i, j + 1), (i + 1, j + 1))
    return (np.stack([u_bank[c] for c in cells]), np.array([d_bank[c] for c in cells]))


def _transit_row(k: float, beta: float) -> tuple[np.ndarray, float]:
    """Unit profile on the bank grid and true depth for continuous (k, beta), bilinear."""
    lk = _fractional_index(math.log(k), _LOG_BANK_K_LIST)
    lb = _fractional_index(beta, _BANK_BETA_LIST)
    i, j = min(int(lk), _BANK_K.size - 2), min(int(lb), _BANK_BETA.size - 2)
    fk, fb = lk - i, lb - j
    corners, depths = _transit_cell(i, j)
    wts = np.array([(1 - fk) * (1 - fb), fk * (1 - fb), (1 - fk) * fb, fk * fb])
    return wts @ corners, float(wts @ depths)


def _transit_profile(t, t0, t14, k, beta):
    """Unit-depth transit profile at times ``t`` and its true depth."""
    row, depth = _transit_row(k, beta)
    return np.interp((t - t0) / t14, _BANK_X, row, left=0.0, right=0.0), depth


def _comet_row(r: float) -> np.ndarray:
    bank = _comet_bank()
    lr = _fractional_index(math.log(r), _LOG_COMET_R_LIST)
    i = min(int(lr), _COMET_R.size - 2)
    f = lr - i
    return (1 - f) * bank[i] + f * bank[i + 1]


def _comet_profile(t, t0, cross, r, mirrored=False):
    """Unit-depth comet profile (head mid-chord at t0); mirrored: time reversed about t0."""
    x = (np.asarray(t) - t0) / cross
    if mirrored:
        x = -x
    return np.interp(x, _COMET_X, _comet_row(r), left=0.0, right=0.0)


# --------------------------------------------------------------------------------------------
# results


@dataclass(frozen=True)
class FamilyFit:
    """One fitted model.

    Attributes
    ----------
    name : str
        Family or template name.
    chi2 : float
        Chi-square on the binned window (plus the secondary window when periodic).
    n_params : int
        Free parameters (baseline and amplitude included).
    bic : float
        chi2 + n_params ln(n_bins) (Schwarz 1978).
    params : dict
        Best-fit parameters (days, relative flux, stellar radii).
    """

    name: str
    chi2: float
    n_params: int
    bic: float
    params: dict[str, float]


@dataclass(frozen=True)
class EventFits:
    """All fits of one event."""

    families: dict[str, FamilyFit]
    templates: dict[str, FamilyFit]
    chi2_flat: float
    n_bins: int

    @property
    def best_family(self) -> str:
        """The family with the lowest BIC."""
        return min(self.families.values(), key=lambda f: f.bic).name

    def delta_bic(self, name: str) -> float:
        """BIC of family ``name`` minus the best family's."""
        best = min(f.bic for f in self.families.values())
        return self.families[name].bic - best

    def template_fraction(self, name: str) -> float:
        """Chi-square improvement of a template over a flat line, relative to the best one's."""
        gains = {k: max(self.chi2_flat - v.chi2, 0.0) for k, v in self.templates.items()}
        top = max(gains.values())
        return gains[name] / top if top > 0 else float("nan")


def _fit(name: str, chi2: float, n_params: int, n_bins: int, **params: float) -> FamilyFit:
    return FamilyFit(name=name, chi2=float(chi2), n_params=n_params,
                     bic=float(chi2 + n_params * np.log(max(n_bins, 2))),
                     params={k: float(v) for k, v in params.items()})


# --------------------------------------------------------------------------------------------
# the fits


def _grid_t0(win: Window, n: int = 11, span: float = 0.35) -> np.ndarray:
    return win.t_mid + win.duration_days * np.linspace(-span, span, n)


def _fit_templates(win: Window) -> tuple[dict[str, FamilyFit], dict[str, float]]:
    t, y, w, n = win.t, win.y, win.w, win.n_bins
    d = win.duration_days
    t0s = _grid_t0(win)
    out: dict[str, FamilyFit] = {}
    # box: t0 x duration
    durs = d * np.geomspace(0.4, 2.0, 10)
    tt0, dd = np.meshgrid(t0s, durs, indexing="ij")
    u = _box(t[None, :], tt0.reshape(-1, 1), dd.reshape(-1, 1))
    k, chi, a = _best_dip(u, y, w)
    out["box"] = _fit("box", chi[k], 4, n, t0=tt0.flat[k], duration_days=dd.flat[k], depth=a[k])
    # symmetric trapezoid (flat fraction > 0) and V (flat fraction 0): t0 x T14 x flat
    t14s = d * np.geomspace(0.6, 2.5, 9)
    flats = np.array([0.0, 0.25, 0.5, 0.7, 0.85])
    g0, g1, g2 = np.meshgrid(t0s, t14s, flats, indexing="ij")
    u = _trapezoid(t[None, :], g0.reshape(-1, 1), g1.reshape(-1, 1), g2.reshape(-1, 1))
    _, chi, a = _best_dip(u, y, w)
    is_v = g2.reshape(-1) == 0.0
    kv = int(np.argmin(np.where(is_v, chi, np.inf)))
    kt = int(np.argmin(np.where(~is_v, chi, np.inf)))
    out["v"] = _fit("v", chi[kv], 4, n, t0=g0.flat[kv], t14_days=g1.flat[kv], depth=a[kv])
    out["trapezoid"] = _fit("trapezoid", chi[kt], 5, n, t0=g0.flat[kt], t14_days=g1.flat[kt],
                            flat_fraction=g2.flat[kt], depth=a[kt])
    # Gaussian: t0 x sigma
    sigs = d * np.geomspace(0.12, 1.2, 10)
    g0, g1 = np.meshgrid(t0s, sigs, indexing="ij")
    u = _gaussian(t[None, :], g0.reshape(-1, 1), g1.reshape(-1, 1))
    k, chi, a = _best_dip(u, y, w)
    out["gaussian"] = _fit("gaussian", chi[k], 4, n, t0=g0.flat[k], sigma_days=g1.flat[k],
                           depth=a[k])
    # comet and mirrored comet on a grid of crossing time x tail ratio x head time
    crosses = d * np.array([0.15, 0.35, 0.7])
    for mirrored in (False, True):
        shift = d * (np.linspace(-0.2, 0.5, 7) if mirrored else np.linspace(-0.5, 0.2, 7))
        g0, g1 = np.meshgrid(win.t_mid + shift, crosses, indexing="ij")
        x = (t[None, :] - g0.reshape(-1, 1)) / g1.reshape(-1, 1)
        if mirrored:
            x = -x
        # start from the middle of the grid, so that a window where no row is finite (e.g.
        # every bin weight zero) still gives usable parameters
        best = (np.inf, float(win.t_mid), float(crosses[1]),
                float(_COMET_R[len(_COMET_R) // 2]), 0.0)
        for r in _COMET_R[1::3]:
            u = np.interp(x, _COMET_X, _comet_row(float(r)), left=0.0, right=0.0)
            k, chi, a = _best_dip(u, y, w)
            if chi[k] < best[0]:
                best = (chi[k], g0.flat[k], g1.flat[k], float(r), a[k])
        name = "comet_mirrored" if mirrored else "comet"
        out[name] = _fit(name, best[0], 5, n, t0=best[1], crossing_days=best[2],
                         tail_ratio=best[3], depth=best[4])
    start = {"t0": out["trapezoid"].params["t0"], "t14": out["trapezoid"].params["t14_days"],
             "flat": out["trapezoid"].params["flat_fraction"]}
    return out, start


def _refine_scipy(residuals, x0, lo, hi) -> np.ndarray:
    """Reference refinement: scipy's bounded trust-region-reflective least squares."""
    try:
        return least_squares(lambda p: residuals(p[None, :])[0], x0, bounds=(lo, hi),
                             method="trf", max_nfev=200, x_scale="jac").x
    except (ValueError, np.linalg.LinAlgError):
        return x0


def _refine_fast(residuals, x0, lo, hi, *, max_iter: int = 6, rtol: float = 1e-3) -> np.ndarray:
    """Projected Levenberg-Marquardt (Levenberg 1944; Marquardt 1963) with bounds by clipping.

    A small dense solver for 2-5 parameters. ``residuals`` takes a batch of parameter vectors
    (shape (m, n_par)) and returns the weighted residuals of each (shape (m, n_res)), so the
    finite-difference Jacobian costs one vectorised call per iteration.
    :func:`_refine_scipy` is its slow, obvious twin and the tests check they agree.
    """
    x = x0.copy()
    n_par = x.size
    r = residuals(x[None, :])[0]
    cost = float(r @ r)
    lam = 1e-3
    h = 1e-6 * np.maximum(hi - lo, 1e-12)
    eye = np.eye(n_par)
    for _ in range(max_iter):
        # one-sided differences stepping away from the nearer bound
        hh = np.where(x + h > hi, -h, h)
        jac = ((residuals(x[None, :] + eye * hh[:, None]) - r[None, :]) / hh[:, None]).T
        a = jac.T @ jac
        g = jac.T @ r
        diag = np.diag(a).copy()
        diag[diag <= 0] = 1e-12
        improved = False
        gain = 0.0
        for _ in range(6):
            try:
                step = np.linalg.solve(a + lam * np.diag(diag), -g)
            except np.linalg.LinAlgError:
                lam *= 10.0
                continue
            xn = np.clip(x + step, lo, hi)
            rn = residuals(xn[None, :])[0]
            cn = float(rn @ rn)
            if cn < cost:
                improved = True
                gain = cost - cn
                x, r, cost = xn, rn, cn
                lam = max(lam / 3.0, 1e-9)
                break
            lam *= 4.0
        if not improved or gain <= rtol * max(cost, 1e-300):
            break
    return x


def _refine(residuals, x0, lo, hi, method: str = "fast", max_iter: int = 6) -> np.ndarray:
    x0 = np.clip(np.asarray(x0, dtype=float), lo + 1e-9 * (hi - lo), hi - 1e-9 * (hi - lo))
    if method == "scipy":
        return _refine_scipy(residuals, x0, lo, hi)
    return _refine_fast(residuals, x0, lo, hi, max_iter=max_iter)


def _weighted_residuals(u: np.ndarray, y: np.ndarray, w: np.ndarray,
                        sw: np.ndarray) -> np.ndarray:
    """sqrt(w) (y - c (1 - a u)) with c, a solved for each row of ``u`` (m, n)."""
    if u.shape[0] == 1:
        c1, a1, _ = _linear1(u[0], y, w)
        return (sw * (y - c1 * (1.0 - a1 * u[0])))[None, :]
    c, a, _ = _linear(u, y, w)
    return sw * (y - c[:, None] * (1.0 - a[:, None] * u))


def _interp_rows(x: np.ndarray, rows: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Row-wise linear interpolation of ``rows`` (m, n_grid) on a uniform ``grid`` at ``x``
    (m, n); 0 outside the grid."""
    n_grid = grid.size
    pos = (x - grid[0]) * (1.0 / (grid[1] - grid[0]))
    inside = (pos >= 0) & (pos <= n_grid - 1)
    i = np.clip(pos.astype(np.intp), 0, n_grid - 2)
    frac = pos - i
    flat = np.ascontiguousarray(rows).ravel()
    idx = i + (np.arange(rows.shape[0]) * n_grid)[:, None]
    lo = flat.take(idx)
    v = lo + (flat.take(idx + 1) - lo) * frac
    return np.where(inside, v, 0.0)


def fit_stretched_transit(
    win: Window, *, t0: float, t14_days: float, k: float, b: float, method: str = "fast"
) -> dict[str, float]:
    """Fit a transit profile whose time axis is stretched independently on each side.

    The limb-darkened profile of the fitted transit (radius ratio ``k``, impact ``b``) keeps its
    shape, but the time from first contact to its centre (``before_days``) and from its centre
    to last contact (``after_days``) are free. A symmetric transit gives equal halves whatever
    the noise does to its ramps, because every in-transit point constrains its half; a dip with a
    trailing tail gives ``after_days >> before_days``.

    Returns
    -------
    dict
        ``t0`` (centre), ``before_days``, ``after_days``, ``depth``, ``chi2``.
    """
    t, y, w = win.t, win.y, win.w
    sw = np.sqrt(w)
    k = float(np.clip(k, _BANK_K[0], _BANK_K[-1]))
    beta = float(np.clip(b / (1.0 + k), 0.0, _BANK_BETA[-1]))
    row, _ = _transit_row(k, beta)

    rows = row[None, :]

    def profile(p):  # p: (m, 3)
        dt = t[None, :] - p[:, :1]
        x = np.where(dt < 0, 0.5 * dt / p[:, 1:2], 0.5 * dt / p[:, 2:3])
        return _interp_rows(x, np.broadcast_to(rows, (p.shape[0], row.size)), _BANK_X)

    def resid(p):
        return _weighted_residuals(profile(p), y, w, sw)

    half = 0.5 * t14_days
    d = win.duration_days
    # start from the best of a few asymmetric guesses (comet tails need a long after-side)
    starts = [np.array([t0 + s * half, half * fb, half * fa])
              for s, fb, fa in ((0.0, 1.0, 1.0), (-0.3, 0.6, 1.6), (0.3, 1.6, 0.6),
                                (-0.5, 0.4, 3.0))]
    x0 = starts[int(np.argmin(np.sum(resid(np.stack(starts)) ** 2, axis=1)))]
    lo = np.array([win.t_mid - 1.5 * d, 1e-3 * d, 1e-3 * d])
    hi = np.array([win.t_mid + 1.5 * d, 4.0 * d, 8.0 * d])
    p = _refine(resid, x0, lo, hi, method)
    _, a, chi2 = _linear1(profile(p[None, :])[0], y, w)
    return {"t0": float(p[0]), "before_days": float(p[1]), "after_days": float(p[2]),
            "depth": float(a), "chi2": float(chi2)}


def fit_asymmetric(
    win: Window, *, t0: float, t14_days: float, method: str = "fast"
) -> dict[str, float]:
    """Fit an asymmetric trapezoid (separate ingress and egress) to a binned window.

    A vectorised grid over total duration, ingress share, egress share and first contact around
    ``t0`` and ``t14_days`` gives the start; a bounded refinement follows.

    Returns
    -------
    dict
        ``t1`` (first contact), ``ingress_days``, ``flat_days``, ``egress_days``, ``depth``,
        ``chi2``.
    """
    return _asymmetric(win, {"t0": t0, "t14": t14_days}, method)


def _asymmetric(win: Window, start: dict[str, float], method: str) -> dict[str, float]:
    """Asymmetric trapezoid: a vectorised grid for the start, then a bounded refinement."""
    t, y, w = win.t, win.y, win.w
    sw = np.sqrt(w)
    d = win.duration_days
    t14 = start["t14"]
    # grid: total duration x ingress share x egress share x position of first contact
    totals = t14 * np.array([0.8, 1.2, 1.8])
    shares = np.array([0.05, 0.2, 0.45, 0.8])
    starts = start["t0"] + t14 * np.linspace(-0.9, 0.1, 7)
    g_tot, g_in, g_out, g_t1 = np.meshgrid(totals, shares, shares, starts, indexing="ij")
    ok = (g_in + g_out) <= 1.0
    g_tot, g_in, g_out, g_t1 = g_tot[ok], g_in[ok], g_out[ok], g_t1[ok]
    t_in, t_out = g_in * g_tot, g_out * g_tot
    t_flat = g_tot - t_in - t_out
    u = _asym_trapezoid(t[None, :], g_t1[:, None], t_in[:, None], t_flat[:, None],
                        t_out[:, None])
    k, _, _ = _best_dip(u, y, w)
    x0 = np.array([g_t1[k], t_in[k], t_flat[k], t_out[k]])
    lo = np.array([t[0] - d, 1e-3 * d, 0.0, 1e-3 * d])
    hi = np.array([win.t_mid + d, 6.0 * d, 4.0 * d, 8.0 * d])

    def resid(p):  # p: (m, 4)
        u = _asym_trapezoid(t[None, :], p[:, :1], p[:, 1:2], p[:, 2:3], p[:, 3:4])
        return _weighted_residuals(u, y, w, sw)

    p = _refine(resid, x0, lo, hi, method)
    _, a, chi2 = _linear1(_asym_trapezoid(t, *p), y, w)
    return {"t1": float(p[0]), "ingress_days": float(p[1]), "flat_days": float(p[2]),
            "egress_days": float(p[3]), "depth": float(a), "chi2": float(chi2)}


def _secondary_gain(win: Window, t14: float, k: float, beta: float) -> tuple[float, float]:
    """Chi-square gain and depth of a secondary eclipse of the primary's shape at phase 0.5."""
    if win.sec_t.size == 0:
        return 0.0, 0.0
    u, _ = _transit_profile(win.sec_t, 0.0, t14, k, beta)
    y, w = win.sec_y, win.sec_w
    _, a, chi = _linear(u[None, :], y, w)
    flat = _flat_chi2(y, w)
    if not a[0] > 0:
        return 0.0, 0.0
    return max(flat - float(chi[0]), 0.0), float(a[0])


def _fit_transit(win: Window, start: dict[str, float], *, eclipse: bool,
                 method: str) -> FamilyFit:
    t, y, w, n = win.t, win.y, win.w, win.n_bins
    sw = np.sqrt(w)
    d = win.duration_days
    k_max = 2.0 if eclipse else _TRANSIT_K_MAX
    depth0 = max(win.depth, 1e-6)
    k0 = float(np.clip(np.sqrt(depth0 / 1.1), 0.011, k_max * 0.99))
    # vectorised grid over impact parameter x duration, started at the trapezoid's centre
    rows, deps, ks, betas = [], [], [], []
    for beta in (0.0, 0.45, 0.72, 0.9, 0.985):
        kk = k0 if eclipse or beta < 0.8 else min(k0 * 1.5, k_max * 0.99)
        row, dep = _transit_row(kk, beta)
        rows.append(row)
        deps.append(dep)
        ks.append(kk)
        betas.append(beta)
    t14s = start["t14"] * np.array([0.8, 1.0, 1.25])
    x = (t[None, :] - start["t0"]) / t14s[:, None]  # (3, n)
    u = np.stack([np.interp(x, _BANK_X, row, left=0.0, right=0.0) for row in rows])  # (5, 3, n)
    u = u.reshape(-1, t.size)
    if eclipse:
        _, _, chi = _linear(u, y, w)
    else:
        _, chi = _linear_tied(u, np.repeat(deps, t14s.size), y, w)
    kbest = int(np.argmin(chi))
    i_beta, i_t14 = divmod(kbest, t14s.size)
    best = (float(chi[kbest]), float(t14s[i_t14]), ks[i_beta], betas[i_beta])
    _, t14_0, k_0, beta_0 = best
    lo = np.array([win.t_mid - d, 0.2 * d, 0.01, 0.0])
    hi = np.array([win.t_mid + d, 4.0 * d, k_max, 0.985])

    def resid(p):  # p: (m, 4) = t0, t14, k, beta
        rows_dep = [_transit_row(float(q[2]), float(q[3])) for q in p]
        rows = np.stack([rd[0] for rd in rows_dep])
        u = _interp_rows((t[None, :] - p[:, :1]) / p[:, 1:2], rows, _BANK_X)
        if eclipse:
            return _weighted_residuals(u, y, w, sw)
        g = 1.0 - np.array([rd[1] for rd in rows_dep])[:, None] * u
        wg = w * g
        c = np.sum(wg * y, axis=1) / np.sum(wg * g, axis=1)
        return sw * (y - c[:, None] * g)

    p = _refine(resid, [start["t0"], t14_0, k_0, beta_0], lo, hi, method)
    chi2 = float(np.sum(resid(p[None, :])[0] ** 2))
    u, dep = _transit_profile(t, *p)
    params = {"t0": p[0], "t14_days": p[1], "k": p[2], "b": p[3] * (1.0 + p[2])}
    if eclipse:
        _, a, _ = _linear(u[None, :], y, w)
        gain, sec_depth = _secondary_gain(win, p[1], p[2], p[3])
        n_par = 6 + (1 if win.sec_t.size else 0)
        chi2_total = chi2 + _flat_chi2(win.sec_y, win.sec_w) - gain
        return _fit("eclipse", chi2_total, n_par, n, **params, depth=float(a[0]),
                    dilution=float(a[0] / dep) if dep > 0 else float("nan"),
                    secondary_depth=sec_depth)
    return _fit("transit", chi2 + _flat_chi2(win.sec_y, win.sec_w), 5, n, **params, depth=dep)


def _fit_comet(win: Window, tmpl: FamilyFit, method: str) -> FamilyFit:
    t, y, w, n = win.t, win.y, win.w, win.n_bins
    sw = np.sqrt(w)
    d = win.duration_days
    # the tail ratio is refined in log space (it spans two decades)
    p0 = [tmpl.params["t0"], tmpl.params["crossing_days"], math.log(tmpl.params["tail_ratio"])]
    lo = np.array([win.t_mid - 1.5 * d, 0.02 * d, math.log(_COMET_R[0])])
    hi = np.array([win.t_mid + d, 3.0 * d, math.log(_COMET_R[-1])])

    def resid(p):  # p: (m, 3) = t0, crossing, log tail ratio
        rows = np.stack([_comet_row(math.exp(q[2])) for q in p])
        u = _interp_rows((t[None, :] - p[:, :1]) / p[:, 1:2], rows, _COMET_X)
        return _weighted_residuals(u, y, w, sw)

    p = _refine(resid, p0, lo, hi, method, max_iter=12)  # the tail converges slowly
    p[2] = math.exp(p[2])
    _, a, chi2 = _linear1(_comet_profile(t, p[0], p[1], p[2]), y, w)
    chi2 = chi2 + _flat_chi2(win.sec_y, win.sec_w)
    return _fit("comet", chi2, 5, n, t0=p[0], crossing_days=p[1], tail_ratio=p[2],
                tail_days=p[1] * p[2], depth=abs(float(a)))


def _fit_variability(win: Window) -> FamilyFit:
    t, y, w, n = win.t, win.y, win.w, win.n_bins
    span = max(t[-1] - t[0], win.duration_days)
    x = t - win.t_mid
    periods = np.geomspace(0.5 * win.duration_days, 4.0 * span, 24)
    phase = 2.0 * np.pi * x[None, :] / periods[:, None]
    ones = np.ones_like(phase)
    design = np.stack([ones, ones * x, np.sin(phase), np.cos(phase)], axis=2)  # (P, n, 4)
    dw = design * w[None, :, None]
    normal = np.einsum("pni,pnj->pij", dw, design) + 1e-12 * np.eye(4)
    rhs = np.einsum("pni,n->pi", dw, y)
    coef = np.linalg.solve(normal, rhs[..., None])[..., 0]
    chi = (w @ (y * y)) - np.einsum("pi,pi->p", coef, rhs)
    k = int(np.argmin(chi))
    chi2 = max(float(chi[k]), 0.0) + _flat_chi2(win.sec_y, win.sec_w)
    return _fit("variability", chi2, 5, n, period_days=periods[k],
                amplitude=float(np.hypot(coef[k, 2], coef[k, 3])))


def _box_binned(t, t0, dur, edge):
    """A sharp box as seen in bins of width ``edge``: its edges ramp over one bin."""
    return np.clip((0.5 * (dur + edge) - np.abs(t - t0)) / edge, 0.0, 1.0)


def _fit_artefact(win: Window, box: FamilyFit, method: str) -> FamilyFit:
    t, y, w, n = win.t, win.y, win.w, win.n_bins
    sw = np.sqrt(w)
    sec = _flat_chi2(win.sec_y, win.sec_w)
    # step at each bin boundary: c + s H(t - t_s), linear in (c, s)
    u = (t[None, :] >= t[1:, None]).astype(float)  # one row per trial step time
    c, a, chi = _linear(u, y, w)
    k = int(np.argmin(chi))
    step = _fit("artefact", chi[k] + sec, 3, n, kind=1.0, t_step=t[k + 1], size=-a[k] * c[k])
    # box refined from the template grid (edges one bin wide, so the fit is continuous)
    edge = float(np.median(np.diff(t))) if t.size > 1 else win.duration_days
    d = win.duration_days

    def resid(p):  # p: (m, 2) = t0, duration
        return _weighted_residuals(_box_binned(t[None, :], p[:, :1], p[:, 1:2], edge), y, w, sw)

    x0 = [box.params["t0"], box.params["duration_days"]]
    p = _refine(resid, x0, np.array([win.t_mid - d, 0.5 * edge]),
                np.array([win.t_mid + d, 4.0 * d]), method)
    _, a1, chi1 = _linear1(_box_binned(t, p[0], p[1], edge), y, w)
    boxfit = _fit("artefact", min(chi1, box.chi2) + sec, 4, n, kind=0.0, t0=p[0],
                  duration_days=p[1], depth=a1)
    return step if step.bic < boxfit.bic else boxfit


def fit_event(
    win: Window, *, method: str = "fast", with_asymmetric: bool = True
) -> tuple[EventFits, dict[str, float] | None]:
    """Fit every family and template to one binned event window.

    Parameters
    ----------
    win : Window
        From :func:`make_window`.
    method : {"fast", "scipy"}
        Refinement solver: the projected Levenberg-Marquardt kernel (default) or its reference,
        ``scipy.optimize.least_squares`` with bounds (trust-region reflective).

    Returns
    -------
    fits : EventFits
        Families (with BIC) and templates (with chi-square).
    asym : dict or None
        The asymmetric trapezoid (:func:`fit_asymmetric`) on this window, when
        ``with_asymmetric``.

    Notes
    -----
    BIC = chi^2 + n_params ln(n_bins) (Schwarz 1978). All families are evaluated on the same
    bins: the event window and, for periodic signals, the window at phase 0.5 (where only the
    eclipse family predicts a dip).
    """
    templates, start = _fit_templates(win)
    if method not in ("fast", "scipy"):
        raise ParameterError("invalid_parameter",
                             f"method must be 'fast' or 'scipy', got {method!r}")
    asym = _asymmetric(win, start, method) if with_asymmetric else None
    families = {
        "transit": _fit_transit(win, start, eclipse=False, method=method),
        "eclipse": _fit_transit(win, start, eclipse=True, method=method),
        "comet": _fit_comet(win, templates["comet"], method),
        "variability": _fit_variability(win),
        "artefact": _fit_artefact(win, templates["box"], method),
    }
    fits = EventFits(families=families, templates=templates, chi2_flat=_flat_chi2(win.y, win.w),
                     n_bins=win.n_bins)
    return fits, asym
