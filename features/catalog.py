"""The feature catalogue: every feature's name, unit, definition and what it separates.

This table is the single source of the feature vector's order (models store it with
``FEATURE_VERSION``) and of ``docs/features.md`` (generated from it; a test fails when the docs
drift). Change a definition -> bump ``FEATURE_VERSION``.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "FEATURES",
    "FEATURE_NAMES",
    "FEATURE_VERSION",
    "SNR_SCAN_DURATIONS_DAYS",
    "FeatureSpec",
    "features_markdown",
    "fill_markers",
    "flags_markdown",
]

FEATURE_VERSION = "2"
"""Changes whenever a feature definition changes; a model trained on another version is refused."""

SNR_SCAN_DURATIONS_DAYS: tuple[float, ...] = tuple(
    float(f"{d:.4g}") for d in (0.02 * 100 ** (i / 11) for i in range(12)))
"""The 12 trial durations of the significance scan, log-spaced from 0.02 to 2 days."""


@dataclass(frozen=True, slots=True)
class FeatureSpec:
    """One feature: its name, unit, definition and what it separates."""

    name: str
    unit: str
    definition: str
    separates: str
    group: str


def _f(group: str, name: str, unit: str, definition: str, separates: str) -> FeatureSpec:
    return FeatureSpec(name=name, unit=unit, definition=definition, separates=separates,
                       group=group)


_SCAN = tuple(
    _f("detection", f"snr_scan_{i:02d}", "",
       f"best detection SNR of a box of {d:g} d around the strongest event (NaN if the duration "
       "is shorter than two cadences or longer than a third of the segment)",
       "the scan's shape: artefacts peak at the shortest durations, comets and variability at "
       "long ones")
    for i, d in enumerate(SNR_SCAN_DURATIONS_DAYS)
)

FEATURES: tuple[FeatureSpec, ...] = (
    # --- data and noise ------------------------------------------------------------------
    _f("data", "n_points", "count", "number of finite points in the segment", "context"),
    _f("data", "cadence_min", "min", "median time step", "context (ingress resolution)"),
    _f("data", "span_days", "d", "time from first to last point", "context"),
    _f("data", "flux_err_estimated", "0/1",
       "1 when the errors were estimated from the scatter", "context"),
    _f("noise", "sigma_white_ppm", "ppm",
       "per-point white noise: 1.4826 x MAD of the detrended flux out of event", "context"),
    _f("noise", "red_noise_beta", "",
       "red-noise factor: time-averaging method of Pont, Zucker & Queloz (2006) and Winn et al. "
       "(2008), binned rms over the white-noise expectation, >= 1", "correlated noise: "
       "variability and systematics"),
    # --- detection -----------------------------------------------------------------------
    _f("detection", "n_events", "count", "significant dips found by the matched-filter search",
       "periodic planets/binaries vs single comets/artefacts"),
    _f("detection", "snr", "",
       "detection SNR of the strongest event: box depth over its red-noise-inflated error "
       "(Pont et al. 2006), or of the folded transit when periodic", "reliability of all else"),
    _f("detection", "depth_ppm", "ppm", "depth of the strongest (or folded) event, box estimate",
       "binaries are deep; comets shallow"),
    _f("detection", "duration_days", "d", "duration of the best box of the strongest event",
       "comets and variability are long"),
    _f("detection", "duration_depth_ratio", "d",
       "duration_days / depth (relative): long shallow dips score high",
       "comets and variability vs deep short eclipses"),
    _f("detection", "points_in_event", "count", "points inside the strongest event's box",
       "reliability of the shape measures"),
    *_SCAN,
    _f("detection", "snr_scan_peak_days", "d",
       "trial duration at which the scan peaks", "characteristic time scale of the dip"),
    _f("detection", "narrowest_feature_cadences", "cadences",
       "full width at half depth of the strongest dip, in cadences",
       "one-to-three-cadence artefacts"),
    # --- profile (model free) --------------------------------------------------------------
    _f("profile", "skewness", "",
       "third standardised moment of time weighted by the flux deficit max(1 - f, 0) in the "
       "event window", "comets (tail after the head: > 0) vs symmetric transits (~0)"),
    _f("profile", "ingress_egress_ratio", "",
       "time from first contact to the centre over time from the centre to last contact, of "
       "the fitted limb-darkened transit profile with its time axis stretched independently "
       "on each side",
       "comets (short ingress, long egress: << 1) vs planets and binaries (~1)"),
    _f("profile", "ingress_days", "d",
       "ingress ramp (first contact to full depth) of an asymmetric trapezoid fitted to the dip",
       "shape"),
    _f("profile", "egress_days", "d",
       "egress ramp (full depth to last contact) of the asymmetric trapezoid", "shape"),
    _f("profile", "flat_bottom_fraction", "",
       "T23/T14 of the asymmetric trapezoid: flat part over total duration",
       "planets (flat, U-shaped) vs grazing binaries and V shapes (0)"),
    _f("profile", "width_10_days", "d", "width at 10 % of the depth (smoothed profile)", "shape"),
    _f("profile", "width_50_days", "d", "width at 50 % of the depth", "shape"),
    _f("profile", "width_90_days", "d", "width at 90 % of the depth", "shape"),
    _f("profile", "width_ratio_90_10", "", "width_90_days / width_10_days",
       "box-like artefacts (~1) and flat transits vs V shapes (~0.1)"),
    _f("profile", "symmetry_residual", "",
       "rms difference between the dip and its mirror image about the most symmetric centre, "
       "white noise removed in quadrature, in units of the depth", "comets vs symmetric dips"),
    # --- shape fits -------------------------------------------------------------------------
    _f("fits", "delta_bic_transit", "",
       "BIC of the limb-darkened transit fit (Mandel & Agol 2002) minus the best family's BIC",
       "planets"),
    _f("fits", "delta_bic_eclipse", "",
       "BIC of the eclipse family (primary with free radius ratio up to 2, plus a secondary at "
       "phase 0.5 when periodic) minus the best", "eclipsing binaries"),
    _f("fits", "delta_bic_comet", "",
       "BIC of the exponential-tail comet profile integrated over the limb-darkened disk minus "
       "the best", "exocomets"),
    _f("fits", "delta_bic_variability", "",
       "BIC of a smooth sinusoid-plus-trend model minus the best", "stellar variability"),
    _f("fits", "delta_bic_artefact", "",
       "BIC of the better of a sharp box and a step minus the best", "instrument artefacts"),
    _f("fits", "transit_k", "", "radius ratio of the transit fit", "planet vs stellar sizes"),
    _f("fits", "transit_b", "", "impact parameter of the transit fit", "grazing geometry"),
    _f("fits", "transit_t14_days", "d", "T14 of the transit fit", "duration"),
    _f("fits", "comet_tail_days", "d",
       "e-folding time of the fitted comet tail", "comets: long tails"),
    _f("fits", "comet_tail_crossing_ratio", "",
       "tail e-folding time over the head's crossing time (fitted)", "comets"),
    _f("fits", "template_box_frac", "",
       "chi-square improvement over a flat line of the best box, over the best template's",
       "box-like artefacts"),
    _f("fits", "template_trapezoid_frac", "", "same for a symmetric trapezoid", "transits"),
    _f("fits", "template_v_frac", "", "same for a V (triangle)", "grazing binaries"),
    _f("fits", "template_gaussian_frac", "", "same for a Gaussian dip", "smooth variability"),
    _f("fits", "template_comet_frac", "", "same for the comet profile", "comets"),
    _f("fits", "template_comet_mirrored_frac", "",
       "same for the time-mirrored comet profile (tail before the head)",
       "comets: the right way round fits better"),
    _f("fits", "v_shape_index", "",
       "chi-square lost by forcing a V instead of a trapezoid, over the trapezoid's improvement "
       "on a flat line: 0 for V shapes, large for flat-bottomed dips", "V vs U"),
    # --- multiple events and periodicity -------------------------------------------------
    _f("periodic", "periodic", "0/1", "1 when a period was found or supplied",
       "planets and binaries vs comets and artefacts"),
    _f("periodic", "period_days", "d", "period (box least squares or the supplied ephemeris)",
       "context"),
    _f("periodic", "odd_even_sigma", "",
       "difference of the mean odd and even event depths over its combined uncertainty",
       "binaries folded at half their period"),
    _f("periodic", "secondary_depth_ppm", "ppm",
       "depth of a box of the primary's duration at phase 0.5", "binaries"),
    _f("periodic", "secondary_snr", "", "its SNR (phase 0.5)", "binaries"),
    _f("periodic", "secondary_search_snr", "",
       "highest SNR of a secondary dip over all phases away from the primary",
       "eccentric binaries"),
    _f("periodic", "secondary_search_phase", "", "phase of that highest secondary", "eccentric"),
    _f("periodic", "depth_scatter", "",
       "standard deviation of single-event depths over their mean", "comets (varying depth)"),
    _f("periodic", "depth_consistency_chi2", "",
       "reduced chi-square of the single-event depths about their weighted mean",
       "comets and artefacts vs constant-depth transits"),
    # --- context around the events --------------------------------------------------------
    _f("context", "variability_to_depth", "",
       "5-95 % range of the baseline within three durations of the event, over the depth",
       "dips of the same scale as the surrounding variation"),
    _f("context", "psd_peak_period_days", "d",
       "period of the strongest peak of the out-of-event power spectrum", "rotation, pulsation"),
    _f("context", "psd_peak_fraction", "", "share of the power in that peak",
       "coherent variability"),
    _f("context", "psd_peak_to_depth", "", "semi-amplitude of that peak over the depth",
       "variability"),
    _f("context", "acf_at_duration", "",
       "autocorrelation of the out-of-event flux at a lag of one event duration",
       "correlated variability on the dip's time scale"),
    _f("context", "acf_max", "",
       "largest autocorrelation at lags from 0.25 d to half the span", "quasi-periodic stars"),
    _f("context", "step_snr", "", "largest jump between adjacent windows, in noise units",
       "steps"),
    _f("context", "ramp_snr", "", "strongest ramp at the start or after a gap, in noise units",
       "ramps after gaps"),
    _f("context", "n_outliers", "count", "isolated single-cadence outliers (> 5 sigma)",
       "cosmic rays, momentum dumps"),
    _f("context", "outlier_max_sigma", "", "largest outlier deviation", "outliers"),
    _f("context", "gap_distance_durations", "",
       "distance from the strongest event to the nearest gap or edge, in event durations",
       "artefacts tied to gaps"),
)

FEATURE_NAMES: tuple[str, ...] = tuple(f.name for f in FEATURES)
"""The order of the feature vector."""


def features_markdown() -> str:
    """The catalogue as a Markdown table (the body of ``docs/features.md``)."""
    lines = ["| # | feature | unit | definition | separates |", "|---|---|---|---|---|"]
    for i, spec in enumerate(FEATURES):
        lines.append(f"| {i} | `{spec.name}` | {spec.unit} | {spec.definition} | "
                     f"{spec.separates} |")
    return "\n".join(lines) + "\n"


def flags_markdown(flags: dict[str, str]) -> str:
    """A flag table (``flag -> meaning``) as Markdown."""
    lines = ["| flag | meaning |", "|---|---|"]
    lines += [f"| `{name}` | {meaning} |" for name, meaning in flags.items()]
    return "\n".join(lines) + "\n"


def fill_markers(text: str, marker: str, body: str) -> str:
    """Replace what stands between ``<!-- marker:start -->`` and ``<!-- marker:end -->``."""
    start, end = f"<!-- {marker}:start -->", f"<!-- {marker}:end -->"
    a = text.index(start) + len(start)
    b = text.index(end)
    return text[:a] + "\n" + body + text[b:]
