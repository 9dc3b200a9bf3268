"""Write the demo light curves of the (invented) Lumen Survey: simulated, seeded, reproducible.

Every segment is drawn by :func:`training.simulate.simulate_segment` from the simulator's prior
table, narrowed per segment (a subtype, a window, a noise range) so that each file is a clear
example of its class, and written as a CSV (``time,flux,flux_err``) or a FITS binary table
(``TIME, PDCSAP_FLUX, PDCSAP_FLUX_ERR, QUALITY``, with a few flagged cadences whose flux is
corrupted, as flagged cadences are). The same seeds give the same files; nothing here is real.

Usage (from the repository root)::

    .venv/bin/python demo_data/make_demo_data.py                # rewrite demo_data/
    .venv/bin/python demo_data/make_demo_data.py --out some/folder   # somewhere else
    .venv/bin/python demo_data/make_demo_data.py --check        # and score with the model
    .venv/bin/python demo_data/make_demo_data.py --search LS-0042-s3 --tries 40

``--check`` scores every file with the active model of ``models/`` and exits with status 1
when a file does not get its intended class; ``--search`` tries the seeds 0..N-1 for one
segment and prints the label and probability the model gives each (to choose seeds again after
the model is retrained).
"""

from __future__ import annotations

import argparse
import logging
import sys
import tempfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

_REPO = Path(__file__).resolve().parents[1]
if str(_REPO) not in sys.path:  # run as a script from anywhere
    sys.path.insert(0, str(_REPO))

from training.priors import PRIORS, Prior, PriorTable  # noqa: E402
from training.simulate import SimulatedSegment, simulate_segment  # noqa: E402

__all__ = ["SEGMENTS", "DemoSpec", "build", "main", "write_all", "write_segment"]

_log = logging.getLogger("make_demo_data")

_HERE = Path(__file__).resolve().parent
_MIN_PER_DAY = 1440.0
_MIN_DIP_SNR = 15.0
_QUALITY_FRACTION = 0.004
#: Invented QUALITY bits of the Lumen pipeline: 1 attitude tweak, 4 cosmic ray in the
#: aperture, 32 scattered-light warning.
_QUALITY_BITS = (1, 4, 32)
_BJDREF = 2460000  # Lumen Julian Date: LJD = BJD - 2460000 (an invented convention)


def _only(name: str, value: Any, why: str) -> Prior:
    """A prior that always draws ``value``."""
    return Prior(name, "choice", options=(value,), weights=(1.0,), why=why)


def _uniform(name: str, low: float, high: float, unit: str, why: str) -> Prior:
    return Prior(name, "uniform", low, high, unit, why)


def _loguniform(name: str, low: float, high: float, unit: str, why: str) -> Prior:
    return Prior(name, "loguniform", low, high, unit, why)


_QUIET = _loguniform("obs.white_ppm", 100.0, 600.0, "ppm", "demo: a bright, quiet target")
_SECTOR_45 = {
    "obs.window": _only("obs.window", "sector", "demo: a whole Lumen sector"),
    "obs.sector_days": _uniform("obs.sector_days", 44.0, 45.5, "d", "demo: a 45-day sector"),
}
_ORBIT = {
    "obs.window": _only("obs.window", "multi", "demo: one Lumen orbit"),
    "obs.multi_days": _uniform("obs.multi_days", 15.0, 20.0, "d", "demo: one 20-day orbit"),
}
_STAMP = {
    "obs.window": _only("obs.window", "multi", "demo: a postage-stamp cut-out"),
    "obs.multi_days": _uniform("obs.multi_days", 6.0, 10.0, "d", "demo: a cut-out"),
}


@dataclass(frozen=True)
class DemoSpec:
    """One demo segment: where it comes from in the scenario and how it is drawn.

    Attributes
    ----------
    id : str
        File stem and segment id, ``<star>-s<sector>``.
    label : str
        Intended class.
    cadence_min : float
        Cadence [min].
    fmt : {"csv", "fits"}
        File format.
    seed : int
        Seed of ``numpy.random.default_rng``.
    priors : Mapping of str to Prior
        Rows of the simulator's prior table replaced for this segment.
    note : str
        What else a vetter should notice (appended to the README description).
    """

    id: str
    label: str
    cadence_min: float
    fmt: str
    seed: int
    priors: Mapping[str, Prior] = field(default_factory=dict)
    note: str = ""

    @property
    def star(self) -> str:
        return self.id.rsplit("-", 1)[0]

    @property
    def file_name(self) -> str:
        return f"{self.id}.{self.fmt}"

    def prior_table(self) -> PriorTable:
        return PRIORS.replace(**{k.replace(".", "__"): v for k, v in self.priors.items()})


def _p(*groups: Mapping[str, Prior], **rows: Prior) -> dict[str, Prior]:
    table: dict[str, Prior] = {}
    for group in groups:
        table.update(group)
    table.update({k.replace("__", "."): v for k, v in rows.items()})
    return table


SEGMENTS: tuple[DemoSpec, ...] = (
    # --- planets ---------------------------------------------------------------------------
    DemoSpec("LS-0042-s3", "planet", 2.0, "fits", 42, _p(
        _STAMP,
        planet__k=_uniform("planet.k", 0.08, 0.12, "", "demo: a warm Saturn"),
        planet__period_days=_uniform("planet.period_days", 1.5, 3.5, "d", "demo"),
        planet__b=_uniform("planet.b", 0.0, 0.5, "", "demo: a central transit"),
        planet__is_eccentric=Prior("planet.is_eccentric", "bernoulli", 0.0))),
    DemoSpec("LS-0117-s3", "planet", 10.0, "csv", 117, _p(
        _ORBIT,
        planet__k=_uniform("planet.k", 0.04, 0.07, "", "demo: a sub-Saturn"),
        planet__period_days=_uniform("planet.period_days", 3.0, 6.0, "d", "demo"),
        planet__b=_uniform("planet.b", 0.0, 0.6, "", "demo"),
        obs__white_ppm=_QUIET)),
    DemoSpec("LS-0256-s4", "planet", 30.0, "fits", 256, _p(
        _SECTOR_45,
        planet__k=_uniform("planet.k", 0.1, 0.15, "", "demo: a hot Jupiter"),
        planet__period_days=_uniform("planet.period_days", 4.0, 8.0, "d", "demo"),
        planet__b=_uniform("planet.b", 0.0, 0.5, "", "demo"))),
    DemoSpec("LS-0389-s5", "planet", 2.0, "csv", 389, _p(
        _STAMP,
        planet__k=_uniform("planet.k", 0.03, 0.05, "", "demo: a Neptune"),
        planet__period_days=_uniform("planet.period_days", 0.8, 2.0, "d", "demo: short period"),
        planet__b=_uniform("planet.b", 0.0, 0.5, "", "demo"),
        obs__white_ppm=_QUIET)),
    # --- eclipsing binaries ----------------------------------------------------------------
    DemoSpec("LS-0511-s3", "eclipsing_binary", 10.0, "csv", 511, _p(
        _ORBIT,
        eb__subtype=_only("eb.subtype", "detached", "demo"),
        eb__period_days=_uniform("eb.period_days", 1.5, 4.0, "d", "demo")),
        note="deep, so no planet could make it"),
    DemoSpec("LS-0623-s4", "eclipsing_binary", 2.0, "fits", 9, _p(
        _STAMP,
        eb__subtype=_only("eb.subtype", "diluted", "demo: a blended binary"),
        eb__period_days=_uniform("eb.period_days", 1.0, 3.0, "d", "demo"),
        eb__diluted_depth=_uniform("eb.diluted_depth", 0.004, 0.008, "", "demo: planet-like"),
        obs__white_ppm=_QUIET),
        note="diluted by a neighbour's light until it looks planet-sized: the shallow "
             "secondary at phase 0.5 gives it away"),
    DemoSpec("LS-0734-s5", "eclipsing_binary", 2.0, "csv", 734, _p(
        _STAMP,
        eb__subtype=_only("eb.subtype", "grazing", "demo"),
        eb__period_days=_uniform("eb.period_days", 0.8, 2.5, "d", "demo")),
        note="grazing: V-shaped, no flat bottom"),
    DemoSpec("LS-0845-s4", "eclipsing_binary", 30.0, "fits", 845, _p(
        _SECTOR_45,
        eb__subtype=_only("eb.subtype", "eccentric", "demo"),
        eb__period_days=_uniform("eb.period_days", 3.0, 9.0, "d", "demo")),
        note="eccentric: the secondary is not at phase 0.5"),
    # --- exocomets -------------------------------------------------------------------------
    DemoSpec("LS-0958-s3", "exocomet", 2.0, "csv", 958, _p(
        _STAMP,
        comet__n_events=_only("comet.n_events", 1, "demo: a lone comet"),
        comet__depth=_uniform("comet.depth", 0.0015, 0.004, "", "demo: a clear dip"),
        obs__white_ppm=_QUIET)),
    DemoSpec("LS-1066-s4", "exocomet", 10.0, "fits", 1, _p(
        _ORBIT,
        comet__n_events=_only("comet.n_events", 2, "demo: two comets"),
        comet__depth=_uniform("comet.depth", 0.0015, 0.004, "", "demo: clear dips"),
        obs__white_ppm=_QUIET),
        note="two dips of different depths at unrelated times"),
    DemoSpec("LS-1172-s5", "exocomet", 10.0, "csv", 1172, _p(
        _ORBIT,
        comet__n_events=_only("comet.n_events", 1, "demo: a lone comet"),
        comet__depth=_uniform("comet.depth", 0.001, 0.003, "", "demo"),
        obs__white_ppm=_QUIET)),
    # --- stellar variability ---------------------------------------------------------------
    DemoSpec("LS-1283-s3", "variability", 10.0, "csv", 2, _p(
        _ORBIT,
        var__subtype=_only("var.subtype", "spots", "demo: a spotted star"),
        obs__white_ppm=_QUIET)),
    DemoSpec("LS-1391-s4", "variability", 2.0, "fits", 12, _p(
        _STAMP,
        var__subtype=_only("var.subtype", "pulsation", "demo: a pulsator"),
        var__mode_amp=_loguniform("var.mode_amp", 1e-3, 5e-3, "", "demo: clear modes"),
        obs__white_ppm=_QUIET)),
    DemoSpec("LS-1402-s5", "variability", 10.0, "fits", 6, _p(
        _ORBIT,
        var__subtype=_only("var.subtype", "stochastic", "demo: granulation-like wander"),
        var__stochastic_amp=_loguniform("var.stochastic_amp", 2e-3, 5e-3, "",
                                        "demo: a clear wander"),
        obs__white_ppm=_QUIET)),
    # --- instrument artefacts --------------------------------------------------------------
    DemoSpec("LS-1517-s3", "systematic", 10.0, "csv", 1517, _p(
        _SECTOR_45,
        sys__subtype=_only("sys.subtype", "ramp", "demo: thermal settling"),
        sys__n_artefacts=Prior("sys.n_artefacts", "integers", 1, 1),
        sys__depth=_uniform("sys.depth", 0.003, 0.01, "", "demo: a clear artefact"),
        obs__white_ppm=_QUIET)),
    DemoSpec("LS-1628-s4", "systematic", 2.0, "fits", 1628, _p(
        _STAMP,
        sys__subtype=_only("sys.subtype", "pointing_dip", "demo: a pointing excursion"),
        sys__n_artefacts=Prior("sys.n_artefacts", "integers", 1, 2),
        sys__depth=_uniform("sys.depth", 0.003, 0.01, "", "demo: a clear artefact"),
        obs__white_ppm=_QUIET)),
    DemoSpec("LS-1739-s5", "systematic", 30.0, "csv", 7, _p(
        _SECTOR_45,
        sys__subtype=_only("sys.subtype", "cadence_dip", "demo: one-to-three-cadence dips"),
        sys__n_artefacts=Prior("sys.n_artefacts", "integers", 2, 3),
        sys__depth=_uniform("sys.depth", 0.005, 0.02, "", "demo: clear artefacts"),
        obs__white_ppm=_QUIET)),
)
"""The demo segments, in the order of the README table."""


# --------------------------------------------------------------------------------------------
# Drawing and writing


def build(spec: DemoSpec, seed: int | None = None) -> tuple[SimulatedSegment, np.ndarray]:
    """Simulate one demo segment.

    Parameters
    ----------
    spec : DemoSpec
        What to draw.
    seed : int, optional
        Overrides ``spec.seed`` (for a seed search).

    Returns
    -------
    segment : SimulatedSegment
        The simulated segment; its ``flux_err`` is always set (the survey ships errors), and
        the flux of QUALITY-flagged cadences is corrupted.
    quality : ndarray of int32
        QUALITY of every cadence (0 = good). Only FITS files carry it; a CSV gets only the
        good cadences.
    """
    rng = np.random.default_rng(spec.seed if seed is None else seed)
    seg = simulate_segment(spec.label, rng, id=spec.id, priors=spec.prior_table(),
                           cadence_min=spec.cadence_min, min_dip_snr=_MIN_DIP_SNR)
    sigma = seg.truth["white_ppm"] * 1e-6 * seg.truth["flux_level"]
    flux_err = np.full(seg.time.size, sigma)
    flux = seg.flux.copy()
    quality = np.zeros(seg.time.size, dtype=np.int32)
    flagged = rng.choice(seg.time.size, max(3, round(_QUALITY_FRACTION * seg.time.size)),
                         replace=False)
    quality[flagged] = rng.choice(_QUALITY_BITS, flagged.size)
    # a flagged cadence is a bad one: a jump of a few per cent that the reader must drop
    flux[flagged] *= 1.0 + rng.choice((-1.0, 1.0), flagged.size) * rng.uniform(
        0.01, 0.05, flagged.size)
    seg = SimulatedSegment(id=seg.id, label=seg.label, subtype=seg.subtype, time=seg.time,
                           flux=flux, flux_err=flux_err, model=seg.model, truth=seg.truth)
    return seg, quality


def write_segment(spec: DemoSpec, seg: SimulatedSegment, quality: np.ndarray,
                  folder: Path) -> Path:
    """Write one segment as ``<id>.csv`` or ``<id>.fits`` into ``folder``; return the path."""
    path = Path(folder) / spec.file_name
    if spec.fmt == "csv":
        good = quality == 0
        rows = ["time,flux,flux_err"]
        for t, f, e in zip(seg.time[good], seg.flux[good], seg.flux_err[good], strict=True):
            rows.append(f"{t:.6f},{'' if not np.isfinite(f) else f'{f:.8g}'},{e:.5g}")
        path.write_text("\n".join(rows) + "\n", encoding="utf-8")
        return path
    _write_fits(path, spec, seg, quality)
    return path


def _write_fits(path: Path, spec: DemoSpec, seg: SimulatedSegment, quality: np.ndarray) -> None:
    from astropy.io import fits

    sector = int(spec.id.rsplit("-s", 1)[1])
    primary = fits.PrimaryHDU()
    for key, value, comment in (
        ("TELESCOP", "LUMEN", "the Lumen Survey (invented)"),
        ("OBJECT", spec.star, "invented star id"),
        ("SECTOR", sector, "observing sector"),
        ("CADENCE", spec.cadence_min, "[min] exposure cadence"),
        ("ORIGIN", "dipshape demo_data", "simulated by make_demo_data.py"),
    ):
        primary.header[key] = (value, comment)
    primary.header["COMMENT"] = "Invented, simulated light curve: not an observation."
    columns = [
        fits.Column(name="TIME", format="D", unit="LJD = BJD - 2460000, days", array=seg.time),
        fits.Column(name="PDCSAP_FLUX", format="E", unit="e-/s", array=seg.flux),
        fits.Column(name="PDCSAP_FLUX_ERR", format="E", unit="e-/s", array=seg.flux_err),
        fits.Column(name="QUALITY", format="J", array=quality),
    ]
    table = fits.BinTableHDU.from_columns(columns, name="LUMEN_LC")
    for key, value, comment in (
        ("TIMESYS", "TDB", "time scale"),
        ("TIMEUNIT", "d", "unit of TIME"),
        ("BJDREFI", _BJDREF, "integer part of the BJD reference"),
        ("BJDREFF", 0.0, "fraction of the BJD reference"),
        ("TIMEREF", "SOLARSYSTEM", "barycentric times"),
    ):
        table.header[key] = (value, comment)
    fits.HDUList([primary, table]).writeto(path, overwrite=True)


def write_all(folder: Path, specs: Sequence[DemoSpec] = SEGMENTS) -> list[Path]:
    """Write every demo segment, ``labels.csv`` and ``README.md`` into ``folder``.

    Parameters
    ----------
    folder : Path
        Created when missing.
    specs : sequence of DemoSpec
        The segments (default :data:`SEGMENTS`).

    Returns
    -------
    list of Path
        The light-curve files, in ``specs`` order.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    paths, rows = [], []
    for spec in specs:
        seg, quality = build(spec)
        paths.append(write_segment(spec, seg, quality, folder))
        rows.append(_readme_row(spec, seg))
        _log.info("%s: %s (%s), SNR %.0f, %d points", spec.file_name, spec.label, seg.subtype,
                  seg.snr, seg.time.size)
    labels = ["id,label"] + [f"{s.id},{s.label}" for s in specs]
    (folder / "labels.csv").write_text("\n".join(labels) + "\n", encoding="utf-8")
    (folder / "README.md").write_text(_readme(rows), encoding="utf-8")
    return paths


# --------------------------------------------------------------------------------------------
# The README


_README_HEAD = """\
# Demo data: the Lumen Survey (invented)

**Everything in this folder is invented and simulated.** The Lumen Survey, its stars (`LS-0042`
...), its sectors and every light curve here are fictional: they were drawn by dipshape's own
simulator (`training/simulate.py`, priors in `training/priors.py`) and written by
`make_demo_data.py` in this folder, with fixed seeds, so that the demo and the docs' examples
have something to score. No real star, mission or observation is behind any of them.

## The scenario

The Lumen Survey is a space photometry survey that stares at one field for a 45-day *sector*
(`s3`, `s4`, `s5` ...), with a one-day gap in the middle to send its data home. Its pipeline
finds dips and sends each star's light curve to be triaged:

- **30-minute** full-frame light curves cover the whole sector;
- **10-minute** full-frame light curves cover one orbit of the spacecraft (15-20 days);
- **2-minute** postage-stamp light curves of selected stars are cut out around an alert
  (6-10 days).

Times are in LJD = BJD - 2460000 (an invented convention) in days. CSV files have the columns
`time,flux,flux_err` (flux in e-/s; an empty flux is a missing cadence). FITS files hold one
binary table with `TIME`, `PDCSAP_FLUX`, `PDCSAP_FLUX_ERR` and `QUALITY`; a few cadences are
flagged in `QUALITY` (invented bits: 1 attitude tweak, 4 cosmic ray, 32 scattered light) and
their flux is bad, so readers must drop them (dipshape does). `labels.csv` gives the intended
class of each segment.

Each file is named `<star>-s<sector>`, which is also its segment id.

## The segments

Depths are of the noiseless signal; "SNR" is the white-noise SNR of its deepest dip (for
variability and artefacts, of their deepest excursion).

| file | star | cadence | what a vetter should see in the diagnostic plot | intended class |
|---|---|---|---|---|
"""

_README_TAIL = """
## Caution

These are clear, textbook cases chosen so that the shipped model gets them right. Real dips are
often less clear, and a dipshape score is **triage, not a discovery**: a `planet` or `exocomet`
call needs follow-up (pixel-level and centroid checks for a blended background binary, more
transits, spectroscopy) before any claim.

## Regenerating

```bash
.venv/bin/python demo_data/make_demo_data.py            # rewrites this folder
.venv/bin/python demo_data/make_demo_data.py --check    # also scores every file
```

The same seeds give identical arrays (`tests/test_demo_data.py` checks it). When the shipped
model is retrained, `--check` tells whether every file still gets its intended class, and
`--search ID --tries N` helps choose another seed for one that does not.
"""


def _readme(rows: Sequence[str]) -> str:
    return _README_HEAD + "\n".join(rows) + "\n" + _README_TAIL


def _pct(x: float) -> str:
    return f"{100 * x:.2g} %" if x < 0.1 else f"{100 * x:.0f} %"


def _readme_row(spec: DemoSpec, seg: SimulatedSegment) -> str:
    text = _describe(seg)
    if spec.note:
        text += f"; {spec.note}"
    n_days = seg.time[-1] - seg.time[0]
    cadence = f"{spec.cadence_min:g} min, {n_days:.0f} d"
    return (f"| `{spec.file_name}` | {spec.star} | {cadence} | {text} (SNR {seg.snr:.0f}) "
            f"| `{spec.label}` |")


def _describe(seg: SimulatedSegment) -> str:
    """A vetter's one-line description of a simulated segment, from its truth."""
    t = seg.truth
    if seg.label == "planet":
        shape = "V-shaped" if seg.subtype == "grazing" else "flat-bottomed, U-shaped"
        return (f"{shape} {_pct(t['depth'])} dips every {t['planet.period_days']:.2f} d "
                f"lasting {24 * t['planet.t14_days']:.1f} h, {t['n_events']} transits of one "
                "depth, no secondary eclipse")
    if seg.label == "eclipsing_binary":
        primary, secondary, phase = _eclipse_depths(seg)
        return (f"{_pct(primary)} eclipses every {t['eb.period_days']:.2f} d "
                f"({t['n_events']} seen) with a {_pct(secondary)} secondary eclipse at phase "
                f"{phase:.2f}")
    if seg.label == "exocomet":
        n = int(t["comet.n_events"])
        depths = ", ".join(_pct(t[f"comet.{i}.depth"]) for i in range(n))
        tails = ", ".join(f"{24 * t[f'comet.{i}.tail_days']:.0f} h" for i in range(n))
        what = "one lone dip" if n == 1 else f"{n} unrelated dips"
        return (f"{what} ({depths} deep): a steep ingress of hours, then a long shallow egress "
                f"(tail e-folding {tails}); not periodic")
    if seg.label == "variability":
        if seg.subtype == "spots":
            return (f"smooth spot modulation of {_pct(t['var.spot_amp'])} with a "
                    f"{t['var.spot_period_days']:.2f} d period; dips no deeper than the rest "
                    "of the variation")
        if seg.subtype == "pulsation":
            n = int(t["var.n_modes"])
            modes = "a single pulsation mode" if n == 1 else f"{n} beating pulsation modes"
            return (f"{modes}, the strongest {_pct(t['var.max_mode_amp'])} at "
                    f"{t['var.main_freq_per_day']:.1f} cycles per day; no isolated dip")
        return (f"a stochastic, granulation-like wander of {_pct(t['var.stochastic_amp'])} "
                f"(correlation time {24 * t['var.stochastic_days']:.0f} h); no isolated dip")
    kinds = [str(t[f"sys.{j}.kind"]) for j in range(int(t["sys.n_artefacts"]))]
    after = "after the mid-sector gap" if t["gap_days"] > 0 else "at the start of the data"
    words = {"ramp": (f"an exponential ramp {after}", f"exponential ramps {after}"),
             "cadence_dip": ("a one-to-three-cadence drop", "one-to-three-cadence drops"),
             "step": ("a step in the flux", "steps in the flux"),
             "outliers": ("single-cadence outliers", "groups of single-cadence outliers"),
             "scattered_light": ("a scattered-light hump", "scattered-light humps"),
             "pointing_dip": ("a box-shaped pointing dip", "box-shaped pointing dips")}
    counts = {k: kinds.count(k) for k in dict.fromkeys(kinds)}
    parts = [words[k][0] if n == 1 else f"{n} {words[k][1]}" for k, n in counts.items()]
    return (", ".join(parts) + f" ({_pct(max(t[f'sys.{j}.depth'] for j in range(len(kinds))))})"
            "; instrumental, unlike any astrophysical dip")


def _eclipse_depths(seg: SimulatedSegment) -> tuple[float, float, float]:
    """Primary depth, secondary depth and the secondary's phase, from the noiseless model."""
    t = seg.truth
    period, t0, t14 = t["eb.period_days"], t["eb.t0"], t["eb.t14_days"]
    phase = ((seg.time - t0) / period + 0.25) % 1.0 - 0.25  # primary at 0, in [-0.25, 0.75)
    base = float(np.median(seg.model))
    near = np.abs(phase) < 0.75 * t14 / period
    primary = base - float(seg.model[near].min()) if near.any() else 0.0
    away = ~near
    if not away.any():
        return primary, 0.0, 0.5
    i = int(np.argmin(seg.model[away]))
    secondary = max(base - float(seg.model[away][i]), 0.0)
    return primary, secondary, float(phase[away][i])


# --------------------------------------------------------------------------------------------
# Checking against the model


def _load_model() -> tuple[Any, Any]:
    from features.catalog import FEATURE_VERSION
    from service.scoring import load_ood
    from training.registry import load_model

    root = _REPO / "models"
    model = load_model(root, expected_feature_version=FEATURE_VERSION)
    return model, load_ood(root, model.card.version)


def _score(path: Path, model: Any, ood: Any) -> dict[str, Any]:
    from service.scoring import score_path

    return score_path(path, model, ood=ood)[0]


def _check(folder: Path, specs: Sequence[DemoSpec]) -> int:
    model, ood = _load_model()
    wrong = 0
    print(f"model {model.card.version}")
    for spec in specs:
        result = _score(folder / spec.file_name, model, ood)
        if "error" in result:
            print(f"{spec.file_name:24s} ERROR {result['error']}: {result['detail']}")
            wrong += 1
            continue
        got = result["label"]
        mark = "ok" if got == spec.label else "WRONG"
        wrong += got != spec.label
        print(f"{spec.file_name:24s} intended {spec.label:17s} got {got:17s} "
              f"p={result['probabilities'][got]:.3f} {mark} flags={','.join(result['flags'])}")
    return 1 if wrong else 0


def _search(spec: DemoSpec, tries: int) -> None:
    model, ood = _load_model()
    with tempfile.TemporaryDirectory() as tmp:
        for seed in range(tries):
            seg, quality = build(spec, seed)
            path = write_segment(spec, seg, quality, Path(tmp))
            result = _score(path, model, ood)
            if "error" in result:
                print(f"seed {seed:3d} ERROR {result['error']}")
                continue
            p = result["probabilities"]
            print(f"seed {seed:3d} {result['label']:17s} p_intended={p[spec.label]:.3f} "
                  f"snr={seg.snr:6.1f} n={seg.time.size} flags={','.join(result['flags'])}")


def main(argv: Sequence[str] | None = None) -> int:
    """Command line (module docstring); returns the exit status."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, default=_HERE, help="folder to write into")
    parser.add_argument("--check", action="store_true", help="score every file afterwards")
    parser.add_argument("--search", metavar="ID", help="try seeds for one segment id")
    parser.add_argument("--tries", type=int, default=30, help="seeds tried by --search")
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(message)s")
    _log.setLevel(logging.INFO)
    if args.search:
        chosen = [s for s in SEGMENTS if s.id == args.search]
        if not chosen:
            parser.error(f"no demo segment {args.search!r}; ids: "
                         + ", ".join(s.id for s in SEGMENTS))
        _search(chosen[0], args.tries)
        return 0
    write_all(args.out)
    return _check(args.out, SEGMENTS) if args.check else 0


if __name__ == "__main__":
    sys.exit(main())
