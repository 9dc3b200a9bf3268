"""Simulation of labelled light-curve segments for the five classes.

Each segment is drawn from the prior table of :mod:`training.priors` in physical units (stellar
mass and radius, orbital period, radius ratio ...), converted with astropy constants (Kepler's
third law in :func:`features.orbits.a_over_rstar`), passed through the physical shape models of
:mod:`features.shapes`, multiplied by a background stellar rotation, and observed: a cadence, a
window (single event cut-out, half sector or whole sector with its mid-sector gap), white and
correlated noise, missing cadences, an arbitrary flux scale.

Derived quantities
------------------
- stellar radius: R = M^0.8 * 10^scatter  [R_sun]  (main-sequence mass-radius relation,
  common practice)
- a/R*: Kepler's third law, a^3 = G (M1 + M2) P^2 / (4 pi^2)
- binary companion: R2/R1 = q^0.8 * 10^scatter, surface-brightness ratio = q^2.4 * 10^scatter
  (L ~ M^4 and R ~ M^0.8 on the main sequence give T^4 ~ M^2.4; common practice)
- diluted binaries: third light l3 = 1 - target_depth / undiluted_depth
- ellipsoidal amplitude: Morris & Naftilan (1993) via :func:`features.shapes.ellipsoidal_amplitude`;
  reflection amplitude ~ albedo * (R2 / a)^2 (order of magnitude, approximate)
- exocomet optical depth: scaled so the dip reaches the drawn depth (thin-dust regime)

Signal-to-noise ratio
---------------------
The SNR recorded per segment is that of its deepest dip-like structure in the noiseless signal,
in the white-noise limit of Pont, Zucker & Queloz (2006, eq. 12 with sigma_r = 0):

    SNR = depth / sigma_white * sqrt(n_in),

with depth the largest deficit below the signal's median and n_in the number of observed points
deeper than half that depth (its full width at half maximum, all events together).

Everything is deterministic given the seed: each segment has its own child of
``numpy.random.SeedSequence(seed)``, so results do not depend on ``n_jobs`` or chunking.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from features import orbits, shapes
from features.errors import ParameterError
from training.classes import CLASSES
from training.noise import ou_noise
from training.priors import PRIORS, PriorTable

__all__ = [
    "DIP_CLASSES",
    "SimulatedSegment",
    "labels_table",
    "observing_grid",
    "simulate_dataset",
    "simulate_segment",
    "write_dataset",
]

logger = logging.getLogger(__name__)

_MIN_PER_DAY = 1440.0


@dataclass(frozen=True)
class SimulatedSegment:
    """A simulated light-curve segment with its truth.

    Attributes
    ----------
    id : str
        Segment id.
    label : str
        True class (one of :data:`training.classes.CLASSES`).
    subtype : str
        Finer truth (e.g. ``"diluted"`` for an eclipsing binary).
    time : ndarray
        Times [days] in the fictional survey's time system.
    flux : ndarray
        Observed flux in arbitrary units (NaN at missing cadences).
    flux_err : ndarray or None
        Per-point error in the same units, or None when the product has none.
    model : ndarray
        Noiseless relative signal (1 = no signal), without background rotation.
    truth : dict
        Every drawn and derived parameter (flat; physical parameters prefixed by their group).
    """

    id: str
    label: str
    subtype: str
    time: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray | None
    model: np.ndarray
    truth: dict[str, Any] = field(default_factory=dict)

    @property
    def snr(self) -> float:
        """Dip SNR of the noiseless signal (see module docstring)."""
        return float(self.truth["snr"])


# --------------------------------------------------------------------------------------------
# observing grid


def observing_grid(
    rng: np.random.Generator,
    priors: PriorTable = PRIORS,
    *,
    cadence_min: float | None = None,
    window_days: float | None = None,
) -> tuple[np.ndarray, dict[str, Any]]:
    """Draw the sampling of one segment.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of randomness.
    priors : PriorTable
        Prior table.
    cadence_min : float, optional
        Force the cadence [min] instead of drawing it.
    window_days : float, optional
        Force a contiguous window of this length [days] (no gap) instead of drawing one.

    Returns
    -------
    time : ndarray
        Sample times [days], sorted.
    info : dict
        ``cadence_min``, ``window`` (kind), ``window_days``, ``gap_days``, ``t_start``.
    """
    cad = float(cadence_min) if cadence_min is not None else float(
        priors.draw("obs.cadence_min", rng))
    if cad <= 0:
        raise ParameterError("invalid_parameter", f"cadence_min must be > 0, got {cad}")
    t_start = float(priors.draw("obs.t_start_days", rng))
    gap = 0.0
    if window_days is not None:
        if window_days <= 0:
            raise ParameterError("invalid_parameter", f"window_days must be > 0, got {window_days}")
        kind, length = "fixed", float(window_days)
    else:
        kind = str(priors.draw("obs.window", rng))
        length = float(priors.draw(f"obs.{kind}_days", rng))
        if kind == "sector":
            gap = float(priors.draw("obs.gap_days", rng))
    step = cad / _MIN_PER_DAY
    n = max(int(np.floor(length / step)), 1)
    time = t_start + step * np.arange(n)
    if gap > 0:
        mid = t_start + 0.5 * length
        time = time[np.abs(time - mid) > 0.5 * gap]
    info = {"cadence_min": cad, "window": kind, "window_days": length, "gap_days": gap,
            "t_start": t_start}
    return time, info


def _event_anchor(rng: np.random.Generator, time: np.ndarray, margin_days: float) -> float:
    """A time of an observed point away from the segment's edges (where an event is placed)."""
    lo, hi = time[0] + margin_days, time[-1] - margin_days
    inner = time[(time >= lo) & (time <= hi)]
    pool = inner if inner.size else time
    return float(pool[rng.integers(pool.size)])


def _event_anchor_span(
    rng: np.random.Generator, time: np.ndarray, before_days: float, after_days: float
) -> float:
    """Like :func:`_event_anchor` with different room before and after (asymmetric events)."""
    lo, hi = time[0] + before_days, time[-1] - after_days
    inner = time[(time >= lo) & (time <= hi)]
    if inner.size:
        return float(inner[rng.integers(inner.size)])
    # the window is too short for the whole tail: keep the ingress and as much tail as fits
    return _event_anchor(rng, time, before_days)


# --------------------------------------------------------------------------------------------
# host star


def _star(rng: np.random.Generator, priors: PriorTable) -> dict[str, float]:
    mass = priors.draw("star.mass_msun", rng)
    radius = mass**0.8 * 10 ** priors.draw("star.radius_scatter_dex", rng)
    return {
        "star.mass_msun": mass,
        "star.radius_rsun": float(radius),
        "star.u1": priors.draw("star.u1", rng),
        "star.u2": priors.draw("star.u2", rng),
    }


# --------------------------------------------------------------------------------------------
# the five classes: each returns (relative signal, subtype, params, event times)

_Signal = tuple[np.ndarray, str, dict[str, Any], list[float]]


def _planet(rng: np.random.Generator, priors: PriorTable, time: np.ndarray) -> _Signal:
    star = _star(rng, priors)
    period = priors.draw("planet.period_days", rng)
    k = priors.draw("planet.k", rng)
    b = priors.draw("planet.b", rng)
    ecc, omega = 0.0, 90.0
    if priors.draw("planet.is_eccentric", rng):
        ecc = priors.draw("planet.ecc", rng)
        omega = priors.draw("planet.omega_deg", rng)
    a_rs = float(orbits.a_over_rstar(period_days=period, mass_msun=star["star.mass_msun"],
                                     radius_rsun=star["star.radius_rsun"]))
    t14, _ = orbits.transit_durations_days(period_days=period, k=k, a_over_rstar=a_rs,
                                            b=min(b, 1 + k - 1e-6))
    t0 = _event_anchor(rng, time, 0.5 * t14)
    flux = shapes.transit_flux(time, t0=t0, period_days=period, k=k, a_over_rstar=a_rs, b=b,
                               u1=star["star.u1"], u2=star["star.u2"], ecc=ecc, omega_deg=omega)
    subtype = "grazing" if b > 1 - k else ("eccentric" if ecc > 0 else "circular")
    params = {**star, "planet.period_days": period, "planet.k": k, "planet.b": b,
              "planet.a_over_rstar": a_rs, "planet.ecc": ecc, "planet.omega_deg": omega,
              "planet.t0": t0, "planet.t14_days": float(t14)}
    events = _epochs_in(time, t0, period, 0.5 * t14)
    return flux, subtype, params, events


def _epochs_in(time: np.ndarray, t0: float, period: float, half_width: float) -> list[float]:
    n = np.round((time - t0) / period)
    near = np.abs(time - (t0 + n * period)) <= half_width
    return [float(t0 + e * period) for e in np.unique(n[near])]


def _eclipsing_binary(rng: np.random.Generator, priors: PriorTable, time: np.ndarray) -> _Signal:
    star = _star(rng, priors)
    subtype = str(priors.draw("eb.subtype", rng))
    period = priors.draw("eb.period_days", rng)
    if subtype == "low_mass_companion":
        q = priors.draw("eb.low_mass_ratio", rng)
    else:
        q = priors.draw("eb.mass_ratio", rng)
    k = float(q**0.8 * 10 ** priors.draw("star.radius_scatter_dex", rng))
    sbr = float(q**2.4 * 10 ** priors.draw("eb.sbr_scatter_dex", rng))
    a_r1 = float(orbits.a_over_rstar(period_days=period,
                                     mass_msun=star["star.mass_msun"] * (1.0 + q),
                                     radius_rsun=star["star.radius_rsun"]))
    # keep the pair detached: a/R1 well beyond the sum of the radii
    a_r1 = max(a_r1, 2.5 * (1.0 + k))
    ecc, omega = 0.0, 90.0
    if subtype == "grazing":
        overlap = priors.draw("eb.grazing_overlap", rng)
        b = 1.0 + k - overlap * 2.0 * min(k, 1.0)
    else:
        b = priors.draw("eb.b", rng)
    if subtype == "eccentric":
        ecc = priors.draw("eb.ecc", rng)
        omega = priors.draw("eb.omega_deg", rng)
        a_r1 = max(a_r1, 2.5 * (1.0 + k) / (1.0 - ecc))
    inc = float(orbits.inclination_deg(a_over_rstar=a_r1, b=b, ecc=ecc, omega_deg=omega))
    u1s, u2s = priors.draw("star.u1", rng), priors.draw("star.u2", rng)
    ell = float(shapes.ellipsoidal_amplitude(mass_ratio=q, a_over_r1=a_r1, inc_deg=inc,
                                             u1=star["star.u1"],
                                             gravity_darkening=priors.draw("eb.gravity_darkening",
                                                                           rng)))
    refl = float(priors.draw("eb.albedo", rng) * (k / a_r1) ** 2)
    t14, _ = orbits.transit_durations_days(period_days=period, k=k, a_over_rstar=a_r1,
                                            b=min(b, 1 + k - 1e-6))
    t0 = _event_anchor(rng, time, 0.5 * t14)
    kwargs = dict(t0=t0, period_days=period, radius_ratio=k, a_over_r1=a_r1, b=b,
                  surface_brightness_ratio=sbr, u1_primary=star["star.u1"],
                  u2_primary=star["star.u2"], u1_secondary=u1s, u2_secondary=u2s,
                  ellipsoidal_amplitude=ell, reflection_amplitude=refl, ecc=ecc, omega_deg=omega)
    l3 = 0.0
    if subtype == "diluted":
        target = priors.draw("eb.diluted_depth", rng)
        # undiluted depth of the deeper eclipse (for R2 > R1 the secondary can be the deeper
        # one), from a grid over the whole orbit fine enough to resolve the eclipses
        n_grid = int(min(max(2000, 40.0 * period / max(t14, 1e-3)), 200_000))
        grid = t0 + period * (np.arange(n_grid) / n_grid - 0.25)
        d0 = 1.0 - float(np.min(shapes.eclipsing_binary_flux(grid, **kwargs)))
        l3 = float(np.clip(1.0 - target / d0, 0.0, 0.999)) if d0 > target else 0.0
    flux = shapes.eclipsing_binary_flux(time, third_light=l3, **kwargs)
    params = {**star, "eb.period_days": period, "eb.mass_ratio": q, "eb.radius_ratio": k,
              "eb.surface_brightness_ratio": sbr, "eb.a_over_r1": a_r1, "eb.b": b,
              "eb.inc_deg": inc, "eb.ecc": ecc, "eb.omega_deg": omega, "eb.third_light": l3,
              "eb.ellipsoidal_amplitude": ell, "eb.reflection_amplitude": refl, "eb.t0": t0,
              "eb.t14_days": float(t14)}
    return flux, subtype, params, _epochs_in(time, t0, period, 0.5 * t14)


def _exocomet(rng: np.random.Generator, priors: PriorTable, time: np.ndarray) -> _Signal:
    u1, u2 = priors.draw("star.u1", rng), priors.draw("star.u2", rng)
    n_events = int(priors.draw("comet.n_events", rng))
    flux = np.ones_like(time)
    params: dict[str, Any] = {"star.u1": u1, "star.u2": u2, "comet.n_events": n_events}
    events: list[float] = []
    for i in range(n_events):
        cross = priors.draw("comet.crossing_days", rng)
        tail = priors.draw("comet.tail_rstar", rng)
        b = priors.draw("comet.b", rng)
        height = priors.draw("comet.height_rstar", rng)
        depth = priors.draw("comet.depth", rng)
        chord = 2.0 * np.sqrt(1.0 - b * b)
        tail_days = tail * cross / chord
        # place the head so that the crossing and most of the tail (5 e-folds) are observed
        # when the window allows it
        t0 = _event_anchor_span(rng, time, 0.5 * cross, 0.5 * cross + 5.0 * tail_days)
        # depth of a thin reference cloud on a fine grid, then scale the optical depth to it
        tau_ref = 1e-3
        grid = t0 + np.linspace(-0.5 * cross, 0.5 * cross + 3.0 * tail_days, 400)
        ref = shapes.comet_flux(grid, t0=t0, crossing_time_days=cross, b=b,
                                tail_length_rstar=tail, peak_optical_depth=tau_ref,
                                height_rstar=height, u1=u1, u2=u2)
        tau0 = tau_ref * depth / (1.0 - float(ref.min()))
        one = shapes.comet_flux(time, t0=t0, crossing_time_days=cross, b=b,
                                tail_length_rstar=tail, peak_optical_depth=tau0,
                                height_rstar=height, u1=u1, u2=u2)
        flux *= one
        events.append(t0)
        params.update({f"comet.{i}.t0": t0, f"comet.{i}.crossing_days": cross,
                       f"comet.{i}.tail_rstar": tail, f"comet.{i}.tail_days": tail_days,
                       f"comet.{i}.b": b, f"comet.{i}.height_rstar": height,
                       f"comet.{i}.depth": depth, f"comet.{i}.peak_optical_depth": tau0})
    return flux, "tail", params, sorted(events)


def _variability(rng: np.random.Generator, priors: PriorTable, time: np.ndarray) -> _Signal:
    subtype = str(priors.draw("var.subtype", rng))
    params: dict[str, Any] = {}
    if subtype == "spots":
        period = priors.draw("var.spot_period_days", rng)
        amp = priors.draw("var.spot_amp", rng)
        nh = int(priors.draw("var.n_harmonics", rng))
        amps = [amp * float(rng.uniform(0.2, 1.0)) ** h for h in range(nh)]
        phases = list(rng.uniform(0, 2 * np.pi, nh))
        decay = priors.draw("var.spot_decay_days", rng)
        t_ref = float(rng.uniform(time[0], time[-1]))  # when the spot pattern peaks
        flux = shapes.spot_modulation(time, period_days=period, amplitudes=amps, phases=phases,
                                      decay_days=decay, t_ref_days=t_ref)
        params = {"var.spot_period_days": period, "var.spot_amp": amp, "var.n_harmonics": nh,
                  "var.spot_decay_days": decay}
    elif subtype == "pulsation":
        nm = int(priors.draw("var.n_modes", rng))
        freqs = [priors.draw("var.mode_freq_per_day", rng) for _ in range(nm)]
        amps = [priors.draw("var.mode_amp", rng) for _ in range(nm)]
        phases = list(rng.uniform(0, 2 * np.pi, nm))
        flux = shapes.pulsation(time, frequencies_per_day=freqs, amplitudes=amps, phases=phases)
        params = {"var.n_modes": nm, "var.max_mode_amp": max(amps),
                  "var.main_freq_per_day": freqs[int(np.argmax(amps))]}
    else:
        amp = priors.draw("var.stochastic_amp", rng)
        tau = priors.draw("var.stochastic_days", rng)
        flux = 1.0 + ou_noise(time, sigma=amp, timescale_days=tau, rng=rng)
        params = {"var.stochastic_amp": amp, "var.stochastic_days": tau}
    return flux, subtype, params, []


def _systematic(rng: np.random.Generator, priors: PriorTable, time: np.ndarray,
                cadence_days: float) -> _Signal:
    n_art = int(priors.draw("sys.n_artefacts", rng))
    kinds = [str(priors.draw("sys.subtype", rng)) for _ in range(n_art)]
    flux = np.ones_like(time)
    params: dict[str, Any] = {"sys.n_artefacts": n_art, "sys.kinds": "+".join(kinds)}
    events: list[float] = []
    # where a gap is (the largest step), or the segment start: where ramps begin
    steps = np.diff(time)
    i_gap = int(np.argmax(steps)) if steps.size else 0
    after_gap = time[i_gap + 1] if steps.size and steps[i_gap] > 5 * cadence_days else time[0]
    for j, kind in enumerate(kinds):
        depth = priors.draw("sys.depth", rng)
        if kind == "cadence_dip":
            t_mid = _event_anchor(rng, time, 0.0)
            n_cad = int(priors.draw("sys.cadences", rng))
            part = shapes.cadence_dip(time, t_mid=t_mid, n_cadences=n_cad,
                                      cadence_days=cadence_days, depth=depth)
            events.append(t_mid)
        elif kind == "ramp":
            sign = -1.0 if rng.random() < 0.7 else 1.0
            part = shapes.exponential_ramp(time, t_start=float(after_gap), amplitude=sign * depth,
                                           timescale_days=priors.draw("sys.ramp_days", rng))
            events.append(float(after_gap))
        elif kind == "step":
            t_step = _event_anchor(rng, time, 0.1 * (time[-1] - time[0]))
            sign = -1.0 if rng.random() < 0.5 else 1.0
            part = shapes.step(time, t_step=t_step, size=sign * depth)
            events.append(t_step)
        elif kind == "outliers":
            part = np.ones_like(time)
            n_out = min(int(priors.draw("sys.n_outliers", rng)), time.size)
            idx = rng.choice(time.size, n_out, replace=False)
            signs = np.where(rng.random(n_out) < 0.7, -1.0, 1.0)
            part[idx] += signs * depth * rng.uniform(0.5, 1.5, n_out)
            events.extend(float(t) for t in time[idx])
        elif kind == "scattered_light":
            t_peak = _event_anchor(rng, time, 0.0)
            sign = -1.0 if rng.random() < 0.5 else 1.0
            part = shapes.scattered_light_hump(time, t_peak=t_peak,
                                               width_days=priors.draw("sys.hump_days", rng),
                                               amplitude=sign * depth)
            events.append(t_peak)
        else:  # pointing_dip
            dur = priors.draw("sys.box_days", rng)
            t_s = _event_anchor(rng, time, dur) - 0.5 * dur
            part = shapes.box_dip(time, t_start=t_s, duration_days=dur, depth=depth)
            events.append(t_s + 0.5 * dur)
        flux = flux * part
        params[f"sys.{j}.kind"] = kind
        params[f"sys.{j}.depth"] = depth
    return flux, kinds[0], params, sorted(events)


# --------------------------------------------------------------------------------------------
# one segment


def _dip_snr(time: np.ndarray, model: np.ndarray, sigma_white: float) -> tuple[float, float]:
    """Depth and white-noise SNR of the deepest dip-like structure (module docstring)."""
    base = float(np.median(model))
    deficit = base - model
    depth = float(deficit.max()) if deficit.size else 0.0
    if depth <= 0 or sigma_white <= 0:
        return max(depth, 0.0), 0.0
    n_in = int(np.count_nonzero(deficit >= 0.5 * depth))
    return depth, depth / sigma_white * np.sqrt(n_in)


DIP_CLASSES: tuple[str, ...] = ("planet", "eclipsing_binary", "exocomet")
"""Classes whose segments reach the product because a survey detected their dip."""

_MAX_DRAWS = 200


def simulate_segment(
    label: str,
    rng: np.random.Generator,
    *,
    id: str = "sim",
    priors: PriorTable = PRIORS,
    cadence_min: float | None = None,
    window_days: float | None = None,
    min_dip_snr: float = 0.0,
) -> SimulatedSegment:
    """Simulate one labelled segment.

    Parameters
    ----------
    label : str
        One of :data:`training.classes.CLASSES`.
    rng : numpy.random.Generator
        Source of randomness (the only one).
    id : str
        Id of the segment.
    priors : PriorTable
        Prior table (default :data:`training.priors.PRIORS`).
    cadence_min, window_days : float, optional
        Force the cadence [min] and a contiguous window [days] (e.g. for benchmarks).
    min_dip_snr : float
        Detection selection: a planet, binary or comet segment is drawn again (observing
        conditions included) until its dip SNR reaches this value, as a survey only passes on
        dips it detected; 0 (default) keeps every draw, so the samples follow the priors.
        Variability and artefacts are never selected. ``truth["draws"]`` records the draws.

    Returns
    -------
    SimulatedSegment

    Raises
    ------
    ParameterError
        Unknown label (code ``unknown_class``) or bad forced cadence/window.

    Examples
    --------
    >>> import numpy as np
    >>> seg = simulate_segment("exocomet", np.random.default_rng(3))
    >>> seg.label, seg.time.size > 20
    ('exocomet', True)
    """
    if min_dip_snr < 0:
        raise ParameterError("invalid_parameter", f"min_dip_snr must be >= 0, got {min_dip_snr}")
    draws = 0
    while True:
        draws += 1
        seg = _simulate_once(label, rng, id=id, priors=priors, cadence_min=cadence_min,
                             window_days=window_days)
        if label not in DIP_CLASSES or seg.snr >= min_dip_snr or draws >= _MAX_DRAWS:
            break
    seg.truth["draws"] = draws
    return seg


def _simulate_once(
    label: str,
    rng: np.random.Generator,
    *,
    id: str,
    priors: PriorTable,
    cadence_min: float | None,
    window_days: float | None,
) -> SimulatedSegment:
    """One draw of a segment (see :func:`simulate_segment`)."""
    if label not in CLASSES:
        raise ParameterError("unknown_class",
                             f"label {label!r} is not simulated; choose from {', '.join(CLASSES)}")
    time, info = observing_grid(rng, priors, cadence_min=cadence_min, window_days=window_days)
    cadence_days = info["cadence_min"] / _MIN_PER_DAY
    if label == "planet":
        model, subtype, params, events = _planet(rng, priors, time)
    elif label == "eclipsing_binary":
        model, subtype, params, events = _eclipsing_binary(rng, priors, time)
    elif label == "exocomet":
        model, subtype, params, events = _exocomet(rng, priors, time)
    elif label == "variability":
        model, subtype, params, events = _variability(rng, priors, time)
    else:
        model, subtype, params, events = _systematic(rng, priors, time, cadence_days)

    # background rotation (multiplicative), then correlated and white noise (additive)
    flux_rel = model
    rot_amp = 0.0
    if priors.draw("obs.has_rotation", rng):
        rot_amp = priors.draw("obs.rotation_amp", rng)
        rot = shapes.spot_modulation(time, period_days=priors.draw("obs.rotation_days", rng),
                                     amplitudes=[rot_amp],
                                     phases=[float(rng.uniform(0, 2 * np.pi))])
        flux_rel = model * rot
    sigma_w = priors.draw("obs.white_ppm", rng) * 1e-6
    red_frac = priors.draw("obs.red_fraction", rng)
    red_tau = priors.draw("obs.red_timescale_days", rng)
    noisy = (flux_rel + ou_noise(time, sigma=red_frac * sigma_w, timescale_days=red_tau, rng=rng)
             + rng.normal(0.0, sigma_w, time.size))
    level = float(priors.draw("obs.flux_level", rng))
    flux = noisy * level
    nan_frac = priors.draw("obs.nan_fraction", rng)
    n_nan = round(nan_frac * time.size)
    if n_nan:
        flux[rng.choice(time.size, n_nan, replace=False)] = np.nan
    flux_err = np.full(time.size, sigma_w * level) if priors.draw("obs.has_flux_err", rng) else None

    depth, snr = _dip_snr(time, model, sigma_w)
    truth: dict[str, Any] = {
        "id": id, "label": label, "subtype": subtype, "snr": float(snr), "depth": depth,
        "n_events": len(events), "event_times": ";".join(f"{t:.6f}" for t in events),
        "n_points": int(time.size), **info, "white_ppm": sigma_w * 1e6, "red_fraction": red_frac,
        "red_timescale_days": red_tau, "rotation_amp": rot_amp, "nan_fraction": nan_frac,
        "flux_level": level, "has_flux_err": flux_err is not None, **params,
    }
    return SimulatedSegment(id=id, label=label, subtype=subtype, time=time, flux=flux,
                            flux_err=flux_err, model=model, truth=truth)


# --------------------------------------------------------------------------------------------
# data sets


def _simulate_chunk(
    jobs: Sequence[tuple[int, str, np.random.SeedSequence]],
    id_prefix: str,
    kwargs: dict[str, Any],
) -> list[SimulatedSegment]:
    return [
        simulate_segment(label, np.random.default_rng(ss), id=f"{id_prefix}{i:06d}", **kwargs)
        for i, label, ss in jobs
    ]


def simulate_dataset(
    n: int,
    *,
    seed: int = 0,
    classes: Iterable[str] = CLASSES,
    n_jobs: int = 1,
    progress: bool = False,
    priors: PriorTable = PRIORS,
    cadence_min: float | None = None,
    window_days: float | None = None,
    id_prefix: str | None = None,
    on_chunk: Callable[[int], None] | None = None,
    min_dip_snr: float = 0.0,
) -> list[SimulatedSegment]:
    """Simulate ``n`` segments balanced across ``classes``.

    Parameters
    ----------
    n : int
        Number of segments (class i % len(classes) for the i-th).
    seed : int
        Master seed; segment i uses child i of ``numpy.random.SeedSequence(seed)``.
    classes : iterable of str
        Classes to simulate (default: all five).
    n_jobs : int
        Parallel processes (joblib); results do not depend on it.
    progress : bool
        Show a progress bar on stderr.
    priors : PriorTable
        Prior table.
    cadence_min, window_days : float, optional
        Forwarded to :func:`simulate_segment`.
    id_prefix : str, optional
        Prefix of the ids (default ``"SIM{seed}-"``).
    min_dip_snr : float
        Detection selection of the dip classes, see :func:`simulate_segment`.
    on_chunk : callable, optional
        Called with the number of segments finished after each chunk.

    Returns
    -------
    list of SimulatedSegment
        In index order.
    """
    if n < 1:
        raise ParameterError("invalid_parameter", f"n must be >= 1, got {n}")
    classes = tuple(classes)
    unknown = [c for c in classes if c not in CLASSES]
    if not classes or unknown:
        raise ParameterError("unknown_class",
                             f"unknown classes {unknown or '(none given)'}; "
                             f"choose from {', '.join(CLASSES)}")
    prefix = id_prefix if id_prefix is not None else f"SIM{seed}-"
    children = np.random.SeedSequence(seed).spawn(n)
    jobs = [(i, classes[i % len(classes)], children[i]) for i in range(n)]
    chunk = max(1, min(200, n // (4 * max(n_jobs, 1)) or 1))
    chunks = [jobs[i : i + chunk] for i in range(0, n, chunk)]
    kwargs = {"priors": priors, "cadence_min": cadence_min, "window_days": window_days,
              "min_dip_snr": min_dip_snr}
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=n, desc="simulating", unit="seg", leave=False)
    out: list[SimulatedSegment] = []
    if n_jobs == 1:
        results: Iterable[list[SimulatedSegment]] = (
            _simulate_chunk(c, prefix, kwargs) for c in chunks)
    else:
        from joblib import Parallel, delayed

        results = Parallel(n_jobs=n_jobs, return_as="generator")(
            delayed(_simulate_chunk)(c, prefix, kwargs) for c in chunks)
    for part in results:
        out.extend(part)
        if bar is not None:
            bar.update(len(part))
        if on_chunk is not None:
            on_chunk(len(part))
    if bar is not None:
        bar.close()
    return out


def labels_table(segments: Sequence[SimulatedSegment]):
    """The truth of ``segments`` as a pandas DataFrame, one row per segment.

    Columns: ``id, label, subtype, snr, cadence_min, n_events, ...`` and every physical
    parameter (NaN where a parameter does not apply to a class).
    """
    import pandas as pd

    first = ["id", "label", "subtype", "snr", "depth", "cadence_min", "n_events", "n_points",
             "window", "window_days"]
    frame = pd.DataFrame.from_records([s.truth for s in segments])
    rest = [c for c in frame.columns if c not in first]
    return frame[first + sorted(rest)]


def write_dataset(
    segments: Sequence[SimulatedSegment], out_dir: str | Path, *, fmt: str = "csv"
) -> Path:
    """Write simulated segments and their labels table.

    Parameters
    ----------
    segments : sequence of SimulatedSegment
        What to write.
    out_dir : path
        Folder (created if needed).
    fmt : {"csv", "parquet"}
        ``csv``: one ``<id>.csv`` per segment with columns ``time, flux[, flux_err]``;
        ``parquet``: one long table ``segments.parquet`` with columns
        ``segment_id, time, flux, flux_err``.

    Returns
    -------
    Path
        The labels table, ``labels.csv`` (``id,label,...`` with every true parameter).
    """
    import pandas as pd

    if fmt not in ("csv", "parquet"):
        raise ParameterError("unsupported_format", f"fmt must be 'csv' or 'parquet', got {fmt!r}")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    if fmt == "csv":
        for s in segments:
            cols = {"time": s.time, "flux": s.flux}
            if s.flux_err is not None:
                cols["flux_err"] = s.flux_err
            pd.DataFrame(cols).to_csv(out / f"{s.id}.csv", index=False, float_format="%.12g")
    else:
        frames = [
            pd.DataFrame({
                "segment_id": s.id, "time": s.time, "flux": s.flux,
                "flux_err": s.flux_err if s.flux_err is not None else np.full(s.time.size, np.nan),
            })
            for s in segments
        ]
        tmp = out / "segments.parquet.tmp"
        pd.concat(frames, ignore_index=True).to_parquet(tmp, index=False)
        tmp.replace(out / "segments.parquet")
    labels = out / "labels.csv"
    labels_table(segments).to_csv(labels, index=False)
    return labels
