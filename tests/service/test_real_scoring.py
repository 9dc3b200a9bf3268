"""The shipped model on real mission light curves (skipped when ../shared/real_lc is absent).

References: the published classes in the folder's MANIFEST.csv (planets: Pal et al. 2008,
Maxted et al. 2016, and the Kepler-75 b literature ephemeris listed there; detached eclipsing
binaries with the ephemerides listed there).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from features.catalog import FEATURE_VERSION
from features.io import read_segment
from service.scoring import load_ood, score_segment
from training.registry import load_model

pytestmark = pytest.mark.real_lc

SHIPPED = Path(__file__).resolve().parents[2] / "models"

EXPECTED = {
    "kepler_HAT-P-7_Q0.fits": "planet",
    "tess_WASP-126_s01.fits": "planet",
    "kepler_Kepler-75_Q17.csv": "planet",
    "tess_CW-Eri_s04.fits": "eclipsing_binary",
    "tess_CM-Dra_s24.fits": "eclipsing_binary",
    "tess_IT-Cas_s17.fits": "eclipsing_binary",
    "kepler_KIC1026032_Q17.csv": "eclipsing_binary",
    # four unstitched quarters with post-gap ramps (its period is found since FEATURE_VERSION 2)
    "kepler_KIC10727668_Q14-Q17.csv": "eclipsing_binary",
}


@pytest.fixture(scope="module")
def model():
    return load_model(SHIPPED, expected_feature_version=FEATURE_VERSION)


@pytest.mark.parametrize(("name", "label"), sorted(EXPECTED.items()))
def test_planets_and_detached_binaries_get_their_published_class(real_lc_dir, model, name,
                                                                 label):
    result = score_segment(read_segment(real_lc_dir / name), model,
                           ood=load_ood(SHIPPED, model.card.version))
    assert result.label == label, result.probabilities
    assert result.probabilities[label] > 0.5
