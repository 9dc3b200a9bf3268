"""The diagnostic plot of one scored segment: a PNG a vetting scientist reads at a glance.

:func:`diagnostic_png` draws (and :func:`diagnostic_figure` builds, for other formats), from top
to bottom:

1. the whole normalised segment with the detrending baseline, the significant dips shaded over
   ``t_mid +- duration / 2`` and labelled with their SNR (and, for a periodic signal, a tick at
   every mid-event time of the ephemeris);
2. up to four dips zoomed, strongest first: the detrended points, the binned data and the best
   fit of each shape family (:func:`features.curves.family_curve`), the lowest-BIC family solid
   and thicker;
3. when a period was found or supplied, the fold in hours from mid-event with odd and even
   events in different colours, and the window around phase 0.5 where a secondary eclipse
   would be; then the class probabilities as bars with the label highlighted, the flags, the
   model version and the caution that a score is triage, not a discovery.

The shape fits shown are the ones the classifier saw: the extractor's binned window is rebuilt
from the segment (the same detrending, noise and binning as :func:`features.pipeline.extract`)
and the family curves are evaluated on it, so the legend's BIC differences are the features'.
A dip the extractor did not fit (only the strongest dip, or the fold, is fitted) is fitted
here with :func:`features.fits.fit_event` for the picture only, and its panel says so.

Figures are built with matplotlib's object-oriented API on an Agg canvas (no ``pyplot``, no
change to ``matplotlib.rcParams``); text sizes scale with the requested pixel size.
"""

from __future__ import annotations

import io
import logging
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from features.curves import family_curve
from features.detrend import detrend
from features.errors import ParameterError
from features.events import Event
from features.fits import FAMILIES, EventFits, Window, fit_event, make_window
from features.pipeline import Features, _near_epoch, _strongest
from features.segment import Segment
from service.scoring import OOD_FLAG

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

__all__ = ["CAUTION_LINE", "MAX_PLOT_PX", "MIN_PLOT_PX", "diagnostic_figure", "diagnostic_png"]

_log = logging.getLogger(__name__)

MIN_PLOT_PX = 300
"""Smallest accepted width or height of the plot [pixels]."""

MAX_PLOT_PX = 4000
"""Largest accepted width or height of the plot [pixels]."""

CAUTION_LINE = ("A score is triage, not a discovery — follow-up needed (pixel-level and "
                "centroid checks, more events, spectroscopy) before any claim.")
"""The caution printed at the foot of every plot."""

_MAX_PANELS = 4
_MIN_EVENT_POINTS = 6  # as the extractor: fewer points inside a dip and no shape is fitted
_MIN_WINDOW_BINS = 10
_DENSE = 600  # model samples across a zoom panel
_RESULT_KEYS = ("id", "label", "probabilities", "flags", "model")

# Okabe & Ito (2008) colour-blind-safe palette
_FAMILY_COLOURS = {"transit": "#0072B2", "eclipse": "#D55E00", "comet": "#009E73",
                   "variability": "#CC79A7", "artefact": "#E69F00"}
_ODD, _EVEN = "#332288", "#CC6677"
_DATA, _RAW, _SEGMENT = "#222222", "#B8B8B8", "#8C8C8C"
_SHADE = "#F0E442"
_BASELINE = "#D55E00"
_LABEL_BAR, _OTHER_BAR = "#0072B2", "#C8C8C8"


# --------------------------------------------------------------------------------------------
# what the extractor fitted, rebuilt from the segment


@dataclass(frozen=True)
class _Rebuilt:
    """The detrended segment and the binned window of the extractor's shape fits."""

    time: np.ndarray
    flux: np.ndarray
    baseline: np.ndarray
    detrended: np.ndarray
    sigma: float
    cadence_days: float
    window: Window | None  # the window features.fits was fitted on (None when not fitted)
    fold: Window | None  # the folded window (periodic signals), fitted or not
    t_mid: float
    period: float | None
    duration: float


def _rebuild(segment: Segment, features: Features, max_dip_days: float) -> _Rebuilt:
    """Repeat the extractor's detrending, noise estimate and binning (features.pipeline)."""
    t, f = segment.time, segment.flux
    eph = features.ephemeris
    if "ephemeris_supplied" in features.flags and eph is not None:
        max_dip_days = max(max_dip_days, eph.duration_days)
    det = detrend(t, f, segment.flux_err, max_dip_days=max_dip_days)
    beta = det.beta_red if math.isfinite(det.beta_red) else 1.0
    sigma = float(det.sigma_white) * beta
    fd = np.asarray(det.flux)
    cadence = segment.cadence_min / 1440.0
    period = eph.period_days if eph is not None else None
    if eph is not None:
        t_mid, duration = _near_epoch(eph, t), eph.duration_days
    elif features.events:
        main = _strongest(list(features.events))
        t_mid, duration = main.t_mid, main.duration_days
    else:
        t_mid = duration = math.nan
    depth = _strongest(list(features.events)).depth if features.events else 0.0
    window = fold = None
    if math.isfinite(t_mid):
        built = make_window(t, fd, np.full(t.size, sigma), t_mid=t_mid, duration_days=duration,
                            depth=depth, cadence_days=cadence, period_days=period)
        window = built if features.fits is not None else None
        fold = built if period is not None else None
    return _Rebuilt(time=t, flux=f, baseline=np.asarray(det.baseline), detrended=fd,
                    sigma=sigma, cadence_days=cadence, window=window, fold=fold, t_mid=t_mid,
                    period=period, duration=duration)


def _check_rebuilt(fits: EventFits, window: Window) -> None:
    """Log when the rebuilt window does not reproduce the extractor's chi-square."""
    best = fits.families[fits.best_family]
    chi2 = float(window.w @ (window.y - family_curve(best, window.t, window)) ** 2)
    if window.sec_t.size:
        sec = family_curve(best, window.sec_t, window, secondary=True)
        chi2 += float(window.sec_w @ (window.sec_y - sec) ** 2)
    if not math.isclose(chi2, best.chi2, rel_tol=1e-4, abs_tol=1e-6):
        _log.warning("the plot's window gives chi2 %.6g for %s, the extractor recorded %.6g: "
                     "was extract called with another max_dip_days?", chi2, best.name,
                     best.chi2)


# --------------------------------------------------------------------------------------------
# one zoom panel


_Model = Callable[[np.ndarray], np.ndarray]


@dataclass(frozen=True)
class _Zoom:
    """What one zoom panel shows."""

    number: int
    event: Event
    centre: float
    half_before: float
    half_after: float
    bins: Window | None
    models: dict[str, _Model]
    delta_bic: dict[str, float]
    note: str
    on_fold: bool = False  # a primary event of the ephemeris, drawn with the fold's fit
    at_secondary: bool = False  # an event at phase 0.5, drawn with the eclipse's secondary


def _own_fit(reb: _Rebuilt, ev: Event) -> tuple[Window, EventFits | None]:
    win = make_window(reb.time, reb.detrended, np.full(reb.time.size, reb.sigma),
                      t_mid=ev.t_mid, duration_days=ev.duration_days, depth=ev.depth,
                      cadence_days=reb.cadence_days)
    inside = np.count_nonzero(np.abs(reb.time - ev.t_mid) <= 0.5 * ev.duration_days)
    if inside < _MIN_EVENT_POINTS or win.t.size < _MIN_WINDOW_BINS:
        return win, None
    fits, _ = fit_event(win, with_asymmetric=False)
    return win, fits


def _curves(fits: EventFits, win: Window, shift: float = 0.0,
            secondary: bool = False) -> dict[str, _Model]:
    box = fits.templates["box"]

    def make(name: str) -> _Model:
        fit = fits.families[name]
        return lambda t: family_curve(fit, t - shift, win, secondary=secondary,
                                      box_template=None if secondary else box)

    return {name: make(name) for name in FAMILIES}


def _dbic(fits: EventFits) -> dict[str, float]:
    return {name: fits.delta_bic(name) for name in FAMILIES}


def _zoom(number: int, ev: Event, reb: _Rebuilt, features: Features) -> _Zoom:
    fits = features.fits
    before, after = 2.5 * ev.duration_days, 4.0 * ev.duration_days
    if reb.period is not None and fits is not None and reb.window is not None:
        period, dur = reb.period, reb.duration
        n = round((ev.t_mid - reb.t_mid) / period)
        offset = ev.t_mid - (reb.t_mid + n * period)
        half = 0.5 * period if offset > 0 else -0.5 * period
        if abs(offset) <= dur:  # a primary event of the ephemeris: the fold's fit, shifted
            centre = reb.t_mid + n * period
            bins = _bins_at(reb, centre, dur)
            return _Zoom(number, ev, centre, 2.5 * dur, 4.0 * dur, bins,
                         _curves(fits, reb.window, shift=n * period), _dbic(fits),
                         "fit of the fold", on_fold=True)
        if abs(offset - half) <= dur:  # at phase 0.5: the secondary models of the fold
            centre = reb.t_mid + n * period + half
            bins = _bins_at(reb, centre, dur)
            secondary = _curves(fits, reb.window, shift=centre, secondary=True)
            return _Zoom(number, ev, centre, 2.0 * dur, 2.0 * dur, bins,
                         {"eclipse": secondary["eclipse"]}, {},
                         "phase 0.5: the fold's eclipse secondary", at_secondary=True)
    if fits is not None and reb.window is not None and reb.period is None \
            and ev.t_mid == reb.window.t_mid:
        return _Zoom(number, ev, ev.t_mid, before, after, reb.window,
                     _curves(fits, reb.window), _dbic(fits), "")
    win, own = _own_fit(reb, ev)
    if own is None:
        return _Zoom(number, ev, ev.t_mid, before, after, win if win.t.size else None, {}, {},
                     "too few points to fit shapes")
    return _Zoom(number, ev, ev.t_mid, before, after, win, _curves(own, win), _dbic(own),
                 "fitted for this plot")


def _bins_at(reb: _Rebuilt, centre: float, duration: float) -> Window | None:
    win = make_window(reb.time, reb.detrended, np.full(reb.time.size, reb.sigma),
                      t_mid=centre, duration_days=duration, depth=0.0,
                      cadence_days=reb.cadence_days)
    return win if win.t.size else None


# --------------------------------------------------------------------------------------------
# drawing


@dataclass(frozen=True)
class _Style:
    """Text and line sizes in points, scaled with the figure."""

    scale: float

    def size(self, points: float) -> float:
        return points * self.scale


def _best(delta_bic: Mapping[str, float]) -> str | None:
    finite = {k: v for k, v in delta_bic.items() if math.isfinite(v)}
    return min(finite, key=finite.__getitem__) if finite else None


def _prepare(ax: Axes, st: _Style, *, x_ticks: int = 6, y_ticks: int = 5) -> None:
    """Few ticks, no offset notation (relative flux near 1 must read as such)."""
    from matplotlib.ticker import MaxNLocator, ScalarFormatter

    ax.xaxis.set_major_locator(MaxNLocator(x_ticks))
    ax.yaxis.set_major_locator(MaxNLocator(y_ticks))
    for axis in (ax.xaxis, ax.yaxis):
        axis.set_major_formatter(ScalarFormatter(useOffset=False))
    ax.tick_params(labelsize=st.size(7), length=st.size(3), width=st.size(0.6),
                   pad=st.size(2))
    for spine in ax.spines.values():
        spine.set_linewidth(st.size(0.6))


def _title(ax: Axes, text: str, st: _Style, *, size: float = 8.0) -> None:
    """A left-aligned panel title (plain text above the axes; no title layout pass)."""
    ax.text(0.0, 1.03, text, transform=ax.transAxes, ha="left", va="bottom",
            fontsize=st.size(size), parse_math=False)


def _draw_models(ax: Axes, x: np.ndarray, curves: Mapping[str, np.ndarray], best: str | None,
                 st: _Style) -> None:
    """Family curves; the lowest-BIC family solid and thicker, the others dashed."""
    for name, y in curves.items():
        is_best = name == best
        ax.plot(x, y, color=_FAMILY_COLOURS[name], lw=st.size(2.2 if is_best else 0.9),
                ls="-" if is_best else (0, (4, 2)), zorder=4 if is_best else 3)


def _limits(values: list[np.ndarray], pad: float = 0.1) -> tuple[float, float]:
    finite = [v[np.isfinite(v)] for v in values]
    vals = np.concatenate(finite) if finite else np.empty(0)
    if vals.size == 0:
        return 0.99, 1.01
    lo, hi = float(vals.min()), float(vals.max())
    span = max(hi - lo, 1e-6)
    return lo - pad * span, hi + pad * span


def _spaced(events: list[Event], span: float, min_gap: float, limit: int) -> list[Event]:
    """The strongest events whose labels do not collide (greedy, strongest first)."""
    chosen: list[Event] = []
    for ev in sorted(events, key=lambda e: e.snr, reverse=True):
        if all(abs(ev.t_mid - c.t_mid) >= min_gap * span for c in chosen):
            chosen.append(ev)
        if len(chosen) == limit:
            break
    return chosen


def _binned_errorbars(ax: Axes, x: np.ndarray, y: np.ndarray, err: np.ndarray, st: _Style,
                      *, colour: str = _DATA, marker: str = "o", filled: bool = True,
                      label: str | None = None) -> None:
    ax.errorbar(x, y, yerr=err, ls="none", ecolor="#9A9A9A", elinewidth=st.size(0.5),
                zorder=5, marker=marker, ms=st.size(2.4), color=colour, mec=colour,
                mew=st.size(0.6), mfc=colour if filled else "white", label=label)


def _draw_segment(ax: Axes, segment: Segment, reb: _Rebuilt, features: Features,
                  shown: list[_Zoom], st: _Style, no_dip: bool) -> None:
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    t, f = reb.time, reb.flux
    _prepare(ax, st, x_ticks=9, y_ticks=4)
    # points shrink as they crowd: 2.5 pt for 1,000 points, 2 pt for 20,000
    ms = float(np.clip(2.5 - 0.4 * math.log10(max(t.size, 1) / 1000.0), 1.2, 2.5))
    ax.plot(t, f, ls="none", marker=".", ms=st.size(ms), color=_SEGMENT, mec="none")
    ax.plot(t, reb.baseline, color=_BASELINE, lw=st.size(1.0))
    lo, hi = (float(v) for v in np.percentile(f, [0.5, 99.5]))
    for ev in features.events:
        sel = np.abs(t - ev.t_mid) <= 0.5 * ev.duration_days
        if sel.any():
            lo = min(lo, float(f[sel].min()))
    span_y = max(hi - lo, 1e-6)
    ax.set_ylim(lo - 0.06 * span_y, hi + 0.2 * span_y)
    for ev in features.events:
        ax.axvspan(ev.t_mid - 0.5 * ev.duration_days, ev.t_mid + 0.5 * ev.duration_days,
                   color=_SHADE, alpha=0.6, lw=0, zorder=0)
    trans = ax.get_xaxis_transform()
    numbers = {id(z.event): z.number for z in shown}
    span_t = float(t[-1] - t[0])
    for ev in _spaced(list(features.events), span_t, 0.055, 14):
        tag = f"#{numbers[id(ev)]} " if id(ev) in numbers else ""
        where = (ev.t_mid - t[0]) / span_t if span_t > 0 else 0.5
        ha = "left" if where < 0.04 else "right" if where > 0.96 else "center"
        ax.text(ev.t_mid, 0.975, f"{tag}SNR {ev.snr:.0f}", transform=trans, ha=ha,
                va="top", fontsize=st.size(6.5), color="#333333")
    if reb.period is not None:
        n0 = math.ceil((t[0] - reb.t_mid) / reb.period)
        n1 = math.floor((t[-1] - reb.t_mid) / reb.period)
        ticks = reb.t_mid + reb.period * np.arange(n0, n1 + 1)
        ax.plot(ticks, np.full(ticks.size, 0.0), transform=trans, ls="none", marker="^",
                ms=st.size(4.5), color=_ODD, clip_on=False)
    if no_dip:
        ax.text(0.5, 0.5, "no significant dip", transform=ax.transAxes, ha="center",
                va="center", fontsize=st.size(15), color="#444444",
                bbox={"boxstyle": "round", "fc": "white", "ec": "#999999", "alpha": 0.9})
    ax.set_xlim(t[0] - 0.01 * span_t, t[-1] + 0.01 * span_t)
    ax.set_xlabel("Time [days]", fontsize=st.size(8))
    ax.set_ylabel("Relative flux", fontsize=st.size(8))
    _title(ax, f"Segment: {segment.n_points} points, cadence {segment.cadence_min:.1f} min, "
               f"{span_t:.1f} days", st)
    handles: list[Any] = [Line2D([], [], ls="none", marker=".", ms=st.size(6), color=_SEGMENT),
                          Line2D([], [], color=_BASELINE, lw=st.size(1.0))]
    labels = ["normalised flux", "baseline (detrending)"]
    if features.events:
        handles.append(Patch(color=_SHADE, alpha=0.6))
        labels.append("significant dip")
    if reb.period is not None:
        handles.append(Line2D([], [], ls="none", marker="^", ms=st.size(4.5), color=_ODD))
        labels.append("mid-event (ephemeris)")
    ax.legend(handles, labels, fontsize=st.size(6.5), loc="lower right",
              bbox_to_anchor=(1.0, 1.0), ncols=len(handles), frameon=False, borderpad=0.1,
              borderaxespad=0.2, handlelength=1.5, columnspacing=1.2)


def _draw_zoom(ax: Axes, z: _Zoom, reb: _Rebuilt, st: _Style) -> tuple[float, float] | None:
    """One zoomed dip; returns the flux range it needs (None when it has nothing to show)."""
    _prepare(ax, st, x_ticks=4, y_ticks=4)
    t = reb.time
    lo_t, hi_t = z.centre - z.half_before, z.centre + z.half_after
    sel = (t >= lo_t) & (t <= hi_t)
    hours = 24.0
    ax.plot((t[sel] - z.centre) * hours, reb.detrended[sel], ls="none", marker=".",
            ms=st.size(1.8), color=_RAW, mec="none", zorder=1)
    keep: list[np.ndarray] = []
    if z.bins is not None:
        bsel = (z.bins.t >= lo_t) & (z.bins.t <= hi_t)
        bt, by, err = z.bins.t[bsel], z.bins.y[bsel], 1.0 / np.sqrt(z.bins.w[bsel])
        _binned_errorbars(ax, (bt - z.centre) * hours, by, err, st)
        keep += [by - err, by + err]
    dense = np.linspace(lo_t, hi_t, _DENSE)
    curves = {name: model(dense) for name, model in z.models.items()}
    best = _best(z.delta_bic) if z.delta_bic else ("eclipse" if "eclipse" in curves else None)
    _draw_models(ax, (dense - z.centre) * hours, curves, best, st)
    if best is not None and best in curves:
        keep.append(curves[best])
    limits = _limits(keep) if keep else None
    if limits is not None:
        ax.set_ylim(*limits)
    ax.set_xlim((lo_t - z.centre) * hours, (hi_t - z.centre) * hours)
    _title(ax, f"#{z.number}   t = {z.event.t_mid:.3f} d   SNR {z.event.snr:.1f}", st)
    note = z.note
    if best is not None and z.delta_bic and note:
        note = f"{note}; best: {best}"
    if note:
        ax.text(0.03, 0.04, note, transform=ax.transAxes, fontsize=st.size(6.5),
                color="#444444", va="bottom",
                bbox={"boxstyle": "square,pad=0.15", "fc": "white", "ec": "none",
                      "alpha": 0.8})
    ax.set_xlabel("Hours from phase 0.5" if z.at_secondary else "Hours from mid-event",
                  fontsize=st.size(7.5))
    return limits


def _draw_fold(ax: Axes, fold: Window, period: float, reb: _Rebuilt, features: Features,
               st: _Style) -> None:
    _prepare(ax, st, x_ticks=5, y_ticks=4)
    t, fd = reb.time, reb.detrended
    lo, hi = fold.t[0] - reb.t_mid, fold.t[-1] - reb.t_mid
    phase = (t - reb.t_mid + 0.5 * period) % period - 0.5 * period
    sel = (phase >= lo) & (phase <= hi)
    hours = 24.0
    ax.plot(phase[sel] * hours, fd[sel], ls="none", marker=".", ms=st.size(1.5), color=_RAW,
            mec="none", zorder=1)
    epoch = np.round((t - reb.t_mid) / period).astype(np.int64)
    keep: list[np.ndarray] = []
    for parity, colour, marker, name in ((1, _ODD, "o", "odd"), (0, _EVEN, "s", "even")):
        mask = (epoch % 2) == parity
        if np.count_nonzero(mask) < 3:
            continue
        win = make_window(t[mask], fd[mask], np.full(int(mask.sum()), reb.sigma),
                          t_mid=reb.t_mid, duration_days=reb.duration, depth=0.0,
                          cadence_days=reb.cadence_days, period_days=period)
        if win.t.size == 0:
            continue
        err = 1.0 / np.sqrt(win.w)
        _binned_errorbars(ax, (win.t - reb.t_mid) * hours, win.y, err, st, colour=colour,
                          marker=marker, filled=bool(parity), label=f"{name} events")
        keep += [win.y - err, win.y + err]
    if features.fits is not None and reb.window is not None:
        dense = reb.t_mid + np.linspace(lo, hi, _DENSE)
        curves = {name: model(dense) for name, model in _curves(features.fits,
                                                                 reb.window).items()}
        best = features.fits.best_family
        _draw_models(ax, (dense - reb.t_mid) * hours, curves, best, st)
        keep.append(curves[best])
    if keep:
        ax.set_ylim(*_limits(keep))
    ax.set_xlim(lo * hours, hi * hours)
    if keep:
        ax.legend(fontsize=st.size(6.5), loc="lower left", framealpha=0.85, borderpad=0.3,
                  labelspacing=0.25, handletextpad=0.3)
    odd_even = features["odd_even_sigma"]
    note = f"   odd/even {odd_even:.1f}σ" if math.isfinite(odd_even) else ""
    _title(ax, f"Fold   P = {period:.5f} d{note}", st)
    ax.set_xlabel("Hours from mid-event", fontsize=st.size(7.5))
    ax.set_ylabel("Detrended flux", fontsize=st.size(7.5))


def _draw_secondary(ax: Axes, fold: Window, reb: _Rebuilt, features: Features,
                    st: _Style) -> None:
    _prepare(ax, st, x_ticks=4, y_ticks=4)
    hours = 24.0
    _title(ax, "Phase 0.5 (secondary eclipse?)", st)
    if fold.sec_t.size == 0:
        ax.text(0.5, 0.5, "no data at phase 0.5", transform=ax.transAxes, ha="center",
                fontsize=st.size(7))
        return
    err = 1.0 / np.sqrt(fold.sec_w)
    _binned_errorbars(ax, fold.sec_t * hours, fold.sec_y, err, st)
    keep = [fold.sec_y - err, fold.sec_y + err]
    if features.fits is not None and reb.window is not None:
        dense = np.linspace(fold.sec_t[0], fold.sec_t[-1], _DENSE)
        ecl = features.fits.families["eclipse"]
        sec = family_curve(ecl, dense, reb.window, secondary=True)
        flat = family_curve(features.fits.families["transit"], dense, reb.window,
                            secondary=True)
        ax.plot(dense * hours, flat, color="#666666", lw=st.size(0.9), ls=(0, (4, 2)))
        ax.plot(dense * hours, sec, color=_FAMILY_COLOURS["eclipse"], lw=st.size(1.6))
        keep.append(sec)
    ax.set_ylim(*_limits(keep))
    snr, depth = features["secondary_snr"], features["secondary_depth_ppm"]
    if math.isfinite(snr) and math.isfinite(depth):
        ax.text(0.03, 0.04, f"depth {depth:.0f} ppm, SNR {snr:.1f}", transform=ax.transAxes,
                fontsize=st.size(6.5), color="#444444", va="bottom")
    ax.set_xlabel("Hours from phase 0.5", fontsize=st.size(7.5))


@dataclass(frozen=True)
class _Box:
    """A rectangle of the figure [figure fraction]: text panels are drawn without axes."""

    x0: float
    y0: float
    width: float
    height: float

    def at(self, fx: float, fy: float) -> tuple[float, float]:
        """Figure coordinates of the point at fractions ``fx, fy`` of the box."""
        return self.x0 + fx * self.width, self.y0 + fy * self.height


def _box(fig: Figure, slot: Any) -> _Box:
    pos = slot.get_position(fig)
    return _Box(pos.x0, pos.y0, pos.width, pos.height)


def _draw_probabilities(fig: Figure, box: _Box, result: Mapping[str, Any],
                        st: _Style) -> None:
    """Class probabilities as horizontal bars with the label highlighted (figure artists)."""
    from matplotlib.patches import Rectangle

    probs = result["probabilities"]
    names = list(probs)
    label = result["label"]
    tf = fig.transFigure
    fig.text(*box.at(0.0, 1.0), "Class probabilities", fontsize=st.size(8), va="bottom",
             transform=tf)
    bar_left, bar_width = 0.42, 0.44
    row = 1.0 / max(len(names), 5)
    for i, name in enumerate(names):
        value = min(max(float(probs[name]), 0.0), 1.0)
        is_label = name == label
        y = 1.0 - (i + 0.5) * row
        weight = "bold" if is_label else "normal"
        fig.text(*box.at(bar_left - 0.03, y), name, ha="right", va="center",
                 fontsize=st.size(7.5), color=_LABEL_BAR if is_label else "#333333",
                 fontweight=weight, parse_math=False, transform=tf)
        x0, y0 = box.at(bar_left, y - 0.3 * row)
        height = 0.6 * row * box.height
        fig.add_artist(Rectangle((x0, y0), bar_width * box.width, height, transform=tf,
                                 color="#EFEFEF", lw=0))
        fig.add_artist(Rectangle((x0, y0), value * bar_width * box.width, height,
                                 transform=tf, color=_LABEL_BAR if is_label else _OTHER_BAR,
                                 lw=0))
        fig.text(*box.at(bar_left + bar_width + 0.03, y), f"{value:.2f}", va="center",
                 fontsize=st.size(7.5), fontweight=weight, transform=tf)


def _draw_info(fig: Figure, box: _Box, result: Mapping[str, Any], features: Features,
               st: _Style, *, fits_of: str) -> None:
    """The shape-fit legend (with BIC differences), then the flags and the model."""
    from matplotlib.lines import Line2D

    tf = fig.transFigure
    top = 1.0
    if features.fits is not None:
        fits = features.fits
        best = fits.best_family
        handles = [Line2D([], [], color=_FAMILY_COLOURS[n],
                          lw=st.size(2.2 if n == best else 0.9),
                          ls="-" if n == best else (0, (4, 2))) for n in FAMILIES]
        labels = [f"{n}   ΔBIC {fits.delta_bic(n):.1f}" for n in FAMILIES]
        fig.text(*box.at(0.0, 1.0), f"Shape fits of {fits_of} (solid: best)",
                 fontsize=st.size(8), va="bottom", transform=tf)
        fig.legend(handles, labels, loc="upper left", bbox_to_anchor=box.at(0.0, 0.98),
                   fontsize=st.size(7), frameon=False, borderaxespad=0.0, borderpad=0.0,
                   handlelength=2.4, labelspacing=0.3)
        top = 0.45
    flags = [str(f) for f in result["flags"]]
    shown = flags[:6]
    lines = ["Flags:" + ("" if flags else " none"), *(f"  {f}" for f in shown)]
    if len(flags) > len(shown):
        lines.append(f"  ... and {len(flags) - len(shown)} more")
    model = result["model"]
    lines += ["", f"Model: {model.get('name', '?')} {model.get('version', '?')}"]
    fig.text(*box.at(0.0, top), "\n".join(lines), va="top", fontsize=st.size(7),
             color="#333333", linespacing=1.4, parse_math=False, transform=tf)


# --------------------------------------------------------------------------------------------
# the public function


def _check_size(name: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise ParameterError("invalid_plot_size",
                             f"{name} must be an integer number of pixels, got {value!r}")
    if not MIN_PLOT_PX <= int(value) <= MAX_PLOT_PX:
        raise ParameterError("invalid_plot_size",
                             f"{name} must be between {MIN_PLOT_PX} and {MAX_PLOT_PX} pixels, "
                             f"got {value}")
    return int(value)


def _check_inputs(segment: Any, features: Any, result: Any) -> Mapping[str, Any]:
    if not isinstance(segment, Segment):
        raise ParameterError("invalid_plot_input",
                             f"segment must be a features.Segment, got {type(segment).__name__}")
    if not isinstance(features, Features):
        raise ParameterError("invalid_plot_input",
                             f"features must be a features.Features, got "
                             f"{type(features).__name__}")
    if hasattr(result, "to_dict"):
        result = result.to_dict()
    if not isinstance(result, Mapping):
        raise ParameterError("invalid_plot_input",
                             f"result must be a result mapping, got {type(result).__name__}")
    missing = [k for k in _RESULT_KEYS if k not in result]
    if missing:
        raise ParameterError("invalid_plot_input", f"result lacks {', '.join(missing)}")
    probs = result["probabilities"]
    if not isinstance(probs, Mapping) or not probs or not all(
            isinstance(v, int | float) and math.isfinite(v) for v in probs.values()):
        raise ParameterError("invalid_plot_input",
                             "result probabilities must map class names to finite numbers")
    if result["label"] not in probs:
        raise ParameterError("invalid_plot_input",
                             f"result label {result['label']!r} is not one of its classes")
    if result["id"] != segment.id:
        raise ParameterError("plot_input_mismatch",
                             f"result is for {result['id']!r} but the segment is {segment.id!r}")
    if features["n_points"] != segment.n_points:
        raise ParameterError("plot_input_mismatch",
                             f"features were measured on {features['n_points']:.0f} points, the "
                             f"segment has {segment.n_points}")
    return result


def _figure(width_px: int, height_px: int) -> tuple[Figure, _Style]:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    # text scales with the area, but never so much that it overflows the narrower side
    fit = min(width_px / 1200.0, height_px / 900.0)
    scale = min(math.sqrt(width_px * height_px / (1200.0 * 900.0)), 1.25 * fit)
    dpi = 100.0 * scale
    # a hair over the requested size: Agg truncates the pixel count to an integer
    fig = Figure(figsize=((width_px + 1e-3) / dpi, (height_px + 1e-3) / dpi), dpi=dpi,
                 facecolor="white")
    FigureCanvasAgg(fig)
    return fig, _Style(scale)


def diagnostic_figure(
    segment: Segment,
    features: Features,
    result: Mapping[str, Any],
    *,
    width_px: int = 1200,
    height_px: int = 900,
    max_dip_days: float = 2.0,
) -> Figure:
    """Build the diagnostic plot of one scored segment as a matplotlib figure.

    The figure sits on its own Agg canvas and is not registered with ``pyplot``; save it in any
    format matplotlib writes (``fig.savefig(path, dpi=fig.dpi)`` keeps the requested pixels).
    :func:`diagnostic_png` is this figure as PNG bytes; the parameters are the same.

    Parameters
    ----------
    segment : Segment
        The validated segment that was scored.
    features : Features
        Its features, ``features.extract(segment)`` (with the same ephemeris, if any).
    result : Mapping
        Its score, :meth:`service.scoring.Result.to_dict` (a ``Result`` is accepted too): the
        plot uses ``id``, ``label``, ``probabilities``, ``flags`` and ``model``.
    width_px, height_px : int
        Size of the image [pixels], each in ``[MIN_PLOT_PX, MAX_PLOT_PX]`` (300..4000).
    max_dip_days : float
        The ``max_dip_days`` :func:`features.extract` was called with (its default, 2 days,
        unless changed): the detrending is repeated to show the baseline and the fitted bins.

    Returns
    -------
    matplotlib.figure.Figure
        ``width_px / dpi`` by ``height_px / dpi`` inches at ``fig.dpi``.

    Raises
    ------
    ParameterError
        ``invalid_plot_size`` (a size that is not an integer in range), ``invalid_plot_input``
        (not a Segment, Features or result; a result missing a field, with non-finite
        probabilities or a label outside its classes; a non-positive ``max_dip_days``),
        ``plot_input_mismatch`` (the result or the features belong to another segment).
    """
    width_px = _check_size("width_px", width_px)
    height_px = _check_size("height_px", height_px)
    result = _check_inputs(segment, features, result)
    if isinstance(max_dip_days, bool) or not isinstance(max_dip_days, int | float) \
            or not max_dip_days > 0 or not math.isfinite(max_dip_days):
        raise ParameterError("invalid_plot_input",
                             f"max_dip_days must be a positive number, got {max_dip_days!r}")
    reb = _rebuild(segment, features, float(max_dip_days))
    if features.fits is not None and reb.window is not None:
        _check_rebuilt(features.fits, reb.window)
    strongest = sorted(features.events, key=lambda e: e.snr, reverse=True)[:_MAX_PANELS]
    zooms = [_zoom(i + 1, ev, reb, features) for i, ev in enumerate(strongest)]
    fig, st = _figure(width_px, height_px)
    _layout(fig, st, segment, features, result, reb, zooms)
    return fig


def diagnostic_png(
    segment: Segment,
    features: Features,
    result: Mapping[str, Any],
    *,
    width_px: int = 1200,
    height_px: int = 900,
    max_dip_days: float = 2.0,
) -> bytes:
    """Draw the diagnostic plot of one scored segment as PNG bytes.

    Parameters
    ----------
    segment : Segment
        The validated segment that was scored.
    features : Features
        Its features, ``features.extract(segment)`` (with the same ephemeris, if any).
    result : Mapping
        Its score, :meth:`service.scoring.Result.to_dict` (a ``Result`` is accepted too): the
        plot uses ``id``, ``label``, ``probabilities``, ``flags`` and ``model``.
    width_px, height_px : int
        Size of the image [pixels], each in ``[MIN_PLOT_PX, MAX_PLOT_PX]`` (300..4000).
    max_dip_days : float
        The ``max_dip_days`` :func:`features.extract` was called with (its default, 2 days,
        unless changed): the detrending is repeated to show the baseline and the fitted bins.

    Returns
    -------
    bytes
        A PNG image of exactly ``width_px`` x ``height_px`` pixels (RGBA, 8 bits per channel).

    Raises
    ------
    ParameterError
        As :func:`diagnostic_figure`: ``invalid_plot_size``, ``invalid_plot_input``,
        ``plot_input_mismatch``.

    Notes
    -----
    The picture is triage, as the score is: a dip that looks like a planet here still needs
    follow-up (pixel-level and centroid checks, more events, spectroscopy) before any claim.

    Examples
    --------
    >>> import numpy as np
    >>> from features import extract, make_segment
    >>> rng = np.random.default_rng(0)
    >>> t = np.arange(0, 3, 0.01)
    >>> seg = make_segment(t, 1 - 0.01 * (np.abs(t - 1.5) < 0.05) + rng.normal(0, 1e-3, t.size),
    ...                    id="LS-0001")
    >>> result = {"id": "LS-0001", "label": "systematic", "flags": [],
    ...           "probabilities": {"planet": 0.2, "systematic": 0.8},
    ...           "model": {"name": "demo", "version": "demo-1", "sha256": ""}}
    >>> png = diagnostic_png(seg, extract(seg), result, width_px=600, height_px=450)
    >>> png[:8] == b"\\x89PNG\\r\\n\\x1a\\n"
    True
    """
    fig = diagnostic_figure(segment, features, result, width_px=width_px, height_px=height_px,
                            max_dip_days=max_dip_days)
    buf = io.BytesIO()
    # zlib level 3: measured about two thirds of the default level's (6) time, 1-2 % larger
    fig.savefig(buf, format="png", dpi=fig.dpi, facecolor="white",
                pil_kwargs={"compress_level": 3})
    return buf.getvalue()


def _layout(fig: Figure, st: _Style, segment: Segment, features: Features,
            result: Mapping[str, Any], reb: _Rebuilt, zooms: list[_Zoom]) -> None:
    fold, period = reb.fold, reb.period
    rows = [1.0, 1.05, 1.0] if zooms else [1.7, 1.0]
    grid = fig.add_gridspec(len(rows), 1, height_ratios=rows, left=0.06, right=0.985,
                            top=0.905, bottom=0.085, hspace=0.55 if zooms else 0.35)
    _draw_segment(fig.add_subplot(grid[0]), segment, reb, features, zooms, st,
                  no_dip=not features.events)
    if zooms:
        sub = grid[1].subgridspec(1, _MAX_PANELS, wspace=0.25)
        cols = 2 if len(zooms) <= 2 else 1  # one or two dips get wider panels
        on_fold: list[tuple[Axes, tuple[float, float]]] = []
        for i, z in enumerate(zooms):
            ax = fig.add_subplot(sub[0, i * cols:(i + 1) * cols])
            limits = _draw_zoom(ax, z, reb, st)
            if i == 0:
                ax.set_ylabel("Detrended flux", fontsize=st.size(7.5))
            if z.on_fold and limits is not None:
                on_fold.append((ax, limits))
        # the epochs of one ephemeris share one model: one flux scale makes them comparable
        if len(on_fold) > 1:
            lo = min(lim[0] for _, lim in on_fold)
            hi = max(lim[1] for _, lim in on_fold)
            for ax, _ in on_fold:
                ax.set_ylim(lo, hi)
    if fold is not None and period is not None:
        sub = grid[-1].subgridspec(1, 4, width_ratios=[1.55, 1.0, 0.95, 1.05], wspace=0.28)
        _draw_fold(fig.add_subplot(sub[0, 0]), fold, period, reb, features, st)
        _draw_secondary(fig.add_subplot(sub[0, 1]), fold, reb, features, st)
        prob_slot, info_slot = sub[0, 2], sub[0, 3]
        fits_of = "the fold"
    else:
        sub = grid[-1].subgridspec(1, 3, width_ratios=[1.0, 0.9, 1.4], wspace=0.15)
        prob_slot, info_slot = sub[0, 0], sub[0, 1]
        fits_of = "#1"
    _draw_probabilities(fig, _box(fig, prob_slot), result, st)
    _draw_info(fig, _box(fig, info_slot), result, features, st, fits_of=fits_of)
    label = result["label"]
    p = float(result["probabilities"][label])
    extra = f"   P = {period:.4f} d" if period is not None else ""
    fig.text(0.06, 0.962, f"{result['id']}   {label}  (p = {p:.2f}){extra}",
             fontsize=st.size(13), fontweight="bold", va="center", parse_math=False)
    if OOD_FLAG in result["flags"]:
        fig.text(0.985, 0.962, "out of distribution: unlike the training simulations",
                 ha="right", va="center", fontsize=st.size(9), color="#CC3311",
                 fontweight="bold")
    fig.text(0.5, 0.022, CAUTION_LINE, ha="center", va="center", fontsize=st.size(8),
             color="#6B4E00", bbox={"boxstyle": "round,pad=0.35", "fc": "#FFF4D6",
                                    "ec": "#E0A800", "lw": st.size(0.8)})
