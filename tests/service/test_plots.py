"""The diagnostic plot: a valid PNG of the requested size that shows what the segment holds.

References outside the project: the PNG specification (W3C Recommendation / ISO/IEC 15948,
section 5.2 for the signature, 5.3 for the chunk layout and its CRC-32, 5.6 for the chunk
order, 11.2.2 for IHDR), Python's ``zlib.crc32`` (the ISO 3309 CRC the specification names)
and Pillow's PNG decoder as an independent reader. The segments come from the simulator and
the results from the shipped model; the plotted shape fits are checked against the extractor's
own (``features.fits``) numbers.
"""

from __future__ import annotations

import io
import logging
import struct
import zlib
from pathlib import Path

import matplotlib
import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.lines import Line2D
from matplotlib.text import Text
from PIL import Image

from features.catalog import FEATURE_VERSION
from features.errors import ParameterError
from features.fits import FAMILIES
from features.pipeline import extract
from features.segment import make_segment
from service.plots import CAUTION_LINE, diagnostic_figure, diagnostic_png
from service.scoring import score_segment
from training.registry import load_model
from training.simulate import simulate_segment

SHIPPED = Path(__file__).resolve().parents[2] / "models"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification, section 5.2

# (simulated class, seed): chosen so that the extractor finds what the name says (checked in
# the fixture); 10-minute cadence over 12 days keeps the segments small
CASES = {
    "periodic_planet": ("planet", 1),
    "periodic_eclipsing_binary": ("eclipsing_binary", 1),
    "single_comet": ("exocomet", 2),
    "no_dip_variability": ("variability", 0),
}


@pytest.fixture(scope="module")
def model():
    return load_model(SHIPPED, expected_feature_version=FEATURE_VERSION)


@pytest.fixture(scope="module")
def scored(model):
    """Segment, features and result of every case, with the property the case is named for."""
    out = {}
    for name, (label, seed) in CASES.items():
        sim = simulate_segment(label, np.random.default_rng(seed), id=f"LS-{40 + seed:04d}",
                               cadence_min=10.0, window_days=12.0)
        seg = make_segment(sim.time, sim.flux, sim.flux_err, id=sim.id)
        feats = extract(seg)
        out[name] = (seg, feats, score_segment(seg, model).to_dict())
    planet, binary = out["periodic_planet"][1], out["periodic_eclipsing_binary"][1]
    assert planet.ephemeris is not None and len(planet.events) >= 3
    assert binary.ephemeris is not None and binary["secondary_snr"] > 5
    comet = out["single_comet"][1]
    assert len(comet.events) == 1 and "not_periodic" in comet.flags
    assert "no_significant_dip" in out["no_dip_variability"][1].flags
    return out


def _chunks(png: bytes) -> list[tuple[bytes, bytes]]:
    """(type, data) of every chunk, each CRC checked (PNG specification, section 5.3)."""
    chunks, pos = [], len(PNG_SIGNATURE)
    while pos < len(png):
        (length,) = struct.unpack(">I", png[pos:pos + 4])
        kind, data = png[pos + 4:pos + 8], png[pos + 8:pos + 8 + length]
        (crc,) = struct.unpack(">I", png[pos + 8 + length:pos + 12 + length])
        assert crc == zlib.crc32(kind + data), kind  # CRC-32 over type and data
        chunks.append((kind, data))
        pos += 12 + length
    return chunks


def _texts(fig) -> list[str]:
    return [t.get_text() for t in fig.findobj(Text) if t.get_text()]


def _axes_titled(fig, start: str):
    """The axes whose panel title (a text above the axes) starts with ``start``."""
    found = [ax for ax in fig.axes for t in ax.texts if t.get_text().startswith(start)]
    assert len(found) == 1, (start, len(found))
    return found[0]


# --- the PNG ---------------------------------------------------------------------------------


@pytest.mark.parametrize(("case", "size"), [
    ("periodic_planet", (1200, 900)),
    ("periodic_eclipsing_binary", (1157, 901)),
    ("single_comet", (300, 300)),
    ("no_dip_variability", (2001, 777)),
])
def test_output_is_a_png_of_exactly_the_requested_pixels(scored, case, size):
    seg, feats, result = scored[case]
    width, height = size
    png = diagnostic_png(seg, feats, result, width_px=width, height_px=height)
    # PNG specification 5.2: the eight-byte signature
    assert png[:8] == PNG_SIGNATURE
    chunks = _chunks(png)
    # 5.6: IHDR first, IEND last; 11.2.2: IHDR holds width, height (4-byte big-endian),
    # bit depth, colour type, compression, filter and interlace methods (13 bytes)
    assert chunks[0][0] == b"IHDR" and chunks[-1][0] == b"IEND"
    ihdr = chunks[0][1]
    assert len(ihdr) == 13
    assert struct.unpack(">II", ihdr[:8]) == (width, height)
    assert any(kind == b"IDAT" for kind, _ in chunks)
    # Pillow, an independent decoder, reads the same size and finds the data intact
    with Image.open(io.BytesIO(png)) as img:
        assert img.size == (width, height)
        img.verify()


def test_the_same_input_gives_the_same_image_and_a_result_object_is_accepted(model, scored):
    seg, feats, result = scored["single_comet"]
    as_object = score_segment(seg, model)
    first = diagnostic_png(seg, feats, result, width_px=600, height_px=450)
    assert diagnostic_png(seg, feats, as_object, width_px=600, height_px=450) == first


def test_matplotlib_global_state_is_left_alone(scored):
    seg, feats, result = scored["periodic_eclipsing_binary"]
    before = dict(matplotlib.rcParams)
    fig = diagnostic_figure(seg, feats, result)
    diagnostic_png(seg, feats, result, width_px=600, height_px=450)
    assert dict(matplotlib.rcParams) == before
    # its own Agg canvas, not a pyplot-managed figure
    assert isinstance(fig.canvas, FigureCanvasAgg)
    assert fig.canvas.manager is None


# --- what the plot shows ---------------------------------------------------------------------


def test_every_plot_carries_the_probabilities_flags_model_and_caution(scored):
    assert "triage, not a discovery" in CAUTION_LINE and "follow-up needed" in CAUTION_LINE
    for seg, feats, result in scored.values():
        fig = diagnostic_figure(seg, feats, result)
        texts = _texts(fig)
        assert CAUTION_LINE in texts
        assert "Class probabilities" in texts
        for cls, p in result["probabilities"].items():
            assert cls in texts and f"{min(max(p, 0.0), 1.0):.2f}" in texts
        # the label is the one class name drawn in bold
        bold = [t.get_text() for t in fig.findobj(Text)
                if t.get_text() in result["probabilities"] and t.get_fontweight() == "bold"]
        assert bold == [result["label"]]
        block = next(t for t in texts if t.startswith("Flags:"))
        for flag in result["flags"]:
            assert flag in block
        assert result["model"]["version"] in block
        # the headline: id and label with its probability
        p = result["probabilities"][result["label"]]
        assert any(t.startswith(f"{result['id']}   {result['label']}  (p = {p:.2f})")
                   for t in texts)


@pytest.mark.parametrize("case", ["periodic_planet", "periodic_eclipsing_binary"])
def test_a_periodic_signal_gets_its_dips_its_fold_and_its_secondary_window(scored, case,
                                                                          caplog):
    seg, feats, result = scored[case]
    with caplog.at_level(logging.WARNING, logger="service.plots"):
        fig = diagnostic_figure(seg, feats, result)
    # the plot's rebuilt window reproduced the extractor's chi-square (no warning)
    assert not caplog.records
    texts = _texts(fig)
    n_zooms = min(4, len(feats.events))
    strongest = sorted(feats.events, key=lambda e: e.snr, reverse=True)[:n_zooms]
    for i, ev in enumerate(strongest, start=1):
        assert f"#{i}   t = {ev.t_mid:.3f} d   SNR {ev.snr:.1f}" in texts
    assert f"#{n_zooms + 1}   t" not in " ".join(texts)
    fold = _axes_titled(fig, "Fold")
    legend = [t.get_text() for t in fold.get_legend().get_texts()]
    assert legend == ["odd events", "even events"]
    # the shape-fit legend lists every family with the extractor's BIC difference
    fits = feats.fits
    for family in FAMILIES:
        assert f"{family}   ΔBIC {fits.delta_bic(family):.1f}" in texts
    # the best family is drawn solid and thicker than every other family in the fold
    colours = {"#0072B2": "transit", "#D55E00": "eclipse", "#009E73": "comet",
               "#CC79A7": "variability", "#E69F00": "artefact"}
    lines = {colours[ln.get_color()]: ln for ln in fold.get_lines()
             if ln.get_color() in colours}
    assert set(lines) == set(FAMILIES)
    best = lines[fits.best_family]
    assert best.get_linestyle() == "-"
    assert all(best.get_linewidth() > ln.get_linewidth()
               for name, ln in lines.items() if name != fits.best_family)
    secondary = _axes_titled(fig, "Phase 0.5")
    assert secondary.get_xlabel() == "Hours from phase 0.5"
    assert fold.get_xlabel() == "Hours from mid-event"


def test_the_binary_secondary_eclipse_is_drawn_at_its_fitted_depth(scored):
    seg, feats, result = scored["periodic_eclipsing_binary"]
    fig = diagnostic_figure(seg, feats, result)
    secondary = _axes_titled(fig, "Phase 0.5")
    eclipse = [ln for ln in secondary.get_lines() if ln.get_color() == "#D55E00"]
    assert len(eclipse) == 1
    y = np.asarray(eclipse[0].get_ydata())
    depth = feats.fits.families["eclipse"].params["secondary_depth"]
    # the drawn model dips by the fitted secondary depth below its own baseline (relative)
    assert depth > 0
    assert 1.0 - y.min() / np.median(y) == pytest.approx(depth, rel=0.05)


def test_a_single_comet_dip_gets_one_zoom_without_a_fold(scored):
    seg, feats, result = scored["single_comet"]
    fig = diagnostic_figure(seg, feats, result)
    texts = _texts(fig)
    ev = feats.events[0]
    zoom = _axes_titled(fig, "#1   t = ")
    assert f"#1   t = {ev.t_mid:.3f} d   SNR {ev.snr:.1f}" in texts
    assert not any(t.startswith(("Fold", "Phase 0.5", "#2")) for t in texts)
    assert "Shape fits of #1 (solid: best)" in texts
    # the comet family wins and is the thick solid curve of the zoom
    assert feats.fits.best_family == "comet"
    thick = max((ln for ln in zoom.get_lines() if isinstance(ln, Line2D)),
                key=lambda ln: ln.get_linewidth())
    assert thick.get_color() == "#009E73" and thick.get_linestyle() == "-"
    # the dip is shaded on the whole segment over t_mid +- duration / 2
    top = fig.axes[0]
    spans = [p.get_x() for p in top.patches]
    assert spans and min(abs(x - (ev.t_mid - 0.5 * ev.duration_days)) for x in spans) < 1e-9
    assert top.get_xlabel() == "Time [days]"


def test_a_segment_without_a_dip_shows_the_segment_the_bars_and_says_so(scored):
    seg, feats, result = scored["no_dip_variability"]
    assert feats.fits is None and not feats.events
    fig = diagnostic_figure(seg, feats, result)
    texts = _texts(fig)
    assert "no significant dip" in texts
    assert len(fig.axes) == 1  # the segment; the bars and the text are figure artists
    assert fig.axes[0].get_xlabel() == "Time [days]"
    assert not any(t.startswith(("#1", "Fold", "Phase 0.5", "Shape fits")) for t in texts)
    assert "Class probabilities" in texts


def test_a_plot_rebuilt_with_another_detrending_window_says_so(scored, caplog):
    seg, _, result = scored["single_comet"]
    feats = extract(seg, max_dip_days=0.5)
    with caplog.at_level(logging.WARNING, logger="service.plots"):
        diagnostic_figure(seg, feats, result, max_dip_days=2.0)
    assert any("max_dip_days" in r.getMessage() for r in caplog.records)
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="service.plots"):
        diagnostic_figure(seg, feats, result, max_dip_days=0.5)
    assert not caplog.records


# --- what is refused -------------------------------------------------------------------------


@pytest.mark.parametrize(("width", "height", "message"), [
    (299, 900, "between 300 and 4000"),
    (1200, 4001, "between 300 and 4000"),
    (0, 900, "between 300 and 4000"),
    (-1200, 900, "between 300 and 4000"),
    (1200.0, 900, "integer"),
    ("1200", 900, "integer"),
    (True, 900, "integer"),
    (1200, None, "integer"),
])
def test_sizes_outside_300_to_4000_pixels_are_refused(scored, width, height, message):
    seg, feats, result = scored["single_comet"]
    with pytest.raises(ParameterError, match=message) as info:
        diagnostic_png(seg, feats, result, width_px=width, height_px=height)
    assert info.value.code == "invalid_plot_size"


def _broken(result: dict, change: str) -> dict:
    out = {**result, "probabilities": dict(result["probabilities"])}
    if change == "no_probabilities":
        del out["probabilities"]
    elif change == "nan_probability":
        out["probabilities"]["planet"] = float("nan")
    elif change == "label_not_a_class":
        out["label"] = "stellar_flare"
    elif change == "other_id":
        out["id"] = "LS-9999"
    return out


@pytest.mark.parametrize(("change", "code", "message"), [
    ("no_probabilities", "invalid_plot_input", "lacks probabilities"),
    ("nan_probability", "invalid_plot_input", "finite numbers"),
    ("label_not_a_class", "invalid_plot_input", "not one of its classes"),
    ("other_id", "plot_input_mismatch", "LS-9999"),
    ("not_a_mapping", "invalid_plot_input", "result mapping"),
    ("not_a_segment", "invalid_plot_input", "Segment"),
    ("features_of_another_segment", "plot_input_mismatch", "points"),
    ("max_dip_days", "invalid_plot_input", "max_dip_days"),
])
def test_bad_inputs_are_refused_with_a_specific_code(scored, change, code, message):
    seg, feats, result = scored["single_comet"]
    kwargs = {}
    if change == "not_a_mapping":
        result = ["planet"]
    elif change == "not_a_segment":
        seg = {"time": seg.time, "flux": seg.flux}
    elif change == "features_of_another_segment":
        feats = scored["periodic_planet"][1]
    elif change == "max_dip_days":
        kwargs["max_dip_days"] = 0.0
    else:
        result = _broken(result, change)
    with pytest.raises(ParameterError, match=message) as info:
        diagnostic_png(seg, feats, result, **kwargs)
    assert info.value.code == code
