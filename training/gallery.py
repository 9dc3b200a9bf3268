"""A picture of simulated examples: a grid of segments, one row per class.

Used to look at what the simulator makes (``dipshape simulate --plot``) and for the docs.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from training.classes import CLASSES
from training.simulate import SimulatedSegment

__all__ = ["plot_gallery"]


def _zoom_window(seg: SimulatedSegment) -> tuple[float, float]:
    """A time window around the first event, wide enough to show its baseline."""
    t = seg.time
    times = [float(x) for x in str(seg.truth.get("event_times", "")).split(";") if x]
    if not times or seg.label in ("variability",):
        return float(t[0]), float(t[-1])
    width = 3.0 * float(seg.truth.get("planet.t14_days", seg.truth.get("eb.t14_days", 0.0)) or 0)
    if seg.label == "exocomet":
        width = 2.5 * (seg.truth["comet.0.crossing_days"] + 4 * seg.truth["comet.0.tail_days"])
    if seg.label == "systematic":
        width = 1.0
    width = min(max(width, 0.3), float(t[-1] - t[0]))
    centre = times[0] + (0.3 * width if seg.label == "exocomet" else 0.0)
    return centre - 0.5 * width, centre + 0.5 * width


def plot_gallery(
    segments: Sequence[SimulatedSegment], path: str | Path, *, per_class: int = 4
) -> Path:
    """Plot ``per_class`` examples of each class present, zoomed on an event, to a PNG.

    Parameters
    ----------
    segments : sequence of SimulatedSegment
        Simulated segments (with their truth).
    path : path
        Output PNG.
    per_class : int
        Columns: examples per class.

    Returns
    -------
    Path
        The file written.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    present = [c for c in CLASSES if any(s.label == c for s in segments)]
    fig, axes = plt.subplots(len(present), per_class, figsize=(3.2 * per_class, 2.3 * len(present)),
                             squeeze=False)
    for row, label in enumerate(present):
        chosen = [s for s in segments if s.label == label][:per_class]
        for col in range(per_class):
            ax = axes[row, col]
            if col >= len(chosen):
                ax.axis("off")
                continue
            seg = chosen[col]
            lo, hi = _zoom_window(seg)
            sel = (seg.time >= lo) & (seg.time <= hi)
            # both on the same scale: each divided by its own median over the whole segment
            flux = seg.flux / np.nanmedian(seg.flux)
            model = seg.model / np.median(seg.model)
            ax.plot(seg.time[sel] - lo, flux[sel], ".", ms=1.5, color="0.45")
            ax.plot(seg.time[sel] - lo, model[sel], "-", lw=1.0, color="C3")
            ax.set_title(f"{label} / {seg.subtype}\nSNR {seg.snr:.0f}, "
                         f"{seg.truth['cadence_min']:g} min", fontsize=8)
            ax.tick_params(labelsize=7)
            if col == 0:
                ax.set_ylabel("relative flux", fontsize=8)
            if row == len(present) - 1:
                ax.set_xlabel("days from window start", fontsize=8)
    fig.suptitle("Simulated training segments (grey: observed; red: noiseless signal)", fontsize=10)
    fig.tight_layout()
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(out, dpi=110)
    plt.close(fig)
    return out
