"""The class labels of dipshape (part of the JSON contract: never rename one)."""

from __future__ import annotations

__all__ = ["CLASSES", "CLASS_DESCRIPTIONS"]

CLASSES: tuple[str, ...] = (
    "planet",
    "eclipsing_binary",
    "exocomet",
    "variability",
    "systematic",
)
"""The five built-in classes, in their canonical order."""

CLASS_DESCRIPTIONS: dict[str, str] = {
    "planet": "a planet transiting its star: symmetric U shape, flat bottom unless grazing",
    "eclipsing_binary": "a stellar eclipse, possibly diluted by third light: V shape or deep, "
    "secondary eclipse, odd/even depth difference",
    "exocomet": "a comet with a dust tail crossing the star: short steep ingress, long shallow "
    "egress, not periodic",
    "variability": "the star itself: spots, pulsation, granulation",
    "systematic": "an instrument or processing artefact: steps, ramps, outliers, boxy dips",
}
