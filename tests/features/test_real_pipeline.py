"""The extractor on real mission light curves (skipped when ../shared/real_lc is absent).

References: the periods listed in the folder's MANIFEST.csv (literature values: Pal et al. 2008
for HAT-P-7 b, Maxted et al. 2016 for WASP-126 b, and the eclipsing-binary ephemerides given
there); the exocomet dips of beta Pic in TESS sectors 4-7 (Zieba et al. 2019).
"""

from __future__ import annotations

import csv

import numpy as np
import pytest

from features.io import read_segment
from features.pipeline import extract

pytestmark = pytest.mark.real_lc

# file -> published period [days] (MANIFEST.csv, literature or fitted there)
PERIODS = {
    "kepler_HAT-P-7_Q0.fits": 2.2047354,
    "tess_WASP-126_s01.fits": 3.2888,
    "kepler_Kepler-75_Q17.csv": 8.884924,
    "tess_CW-Eri_s04.fits": 2.72837,
    "tess_CM-Dra_s24.fits": 1.268390,
    "tess_IT-Cas_s17.fits": 3.8966,
    "kepler_KIC1026032_Q17.csv": 8.46042,
    # four unstitched quarters whose post-gap ramps are the strongest dips (MANIFEST: fitted
    # by the source repository, P = 2.305913 d)
    "kepler_KIC10727668_Q14-Q17.csv": 2.305913,
}

_COLUMNS = {"tess_beta-Pic_s04-s07_pulsations-removed.csv": {"flux_col": "flux_resid_norm"}}


def _read(folder, name):
    return read_segment(folder / name, **_COLUMNS.get(name, {}))


def test_every_real_light_curve_gives_finite_or_nan_features(real_lc_dir):
    with open(real_lc_dir / "MANIFEST.csv", newline="") as fh:
        names = [row["file"] for row in csv.DictReader(fh)]
    assert len(names) >= 10
    for name in names:
        feats = extract(_read(real_lc_dir, name))
        assert not np.isinf(feats.values).any(), name


@pytest.mark.parametrize(("name", "period"), sorted(PERIODS.items()))
def test_published_periods_are_recovered(real_lc_dir, name, period):
    feats = extract(_read(real_lc_dir, name))
    assert feats["periodic"] == 1, name
    assert feats["period_days"] == pytest.approx(period, rel=3e-3)


@pytest.mark.parametrize("name", ["tess_CW-Eri_s04.fits", "tess_CM-Dra_s24.fits",
                                  "tess_IT-Cas_s17.fits"])
def test_detached_binaries_show_their_secondary_eclipse(real_lc_dir, name):
    feats = extract(_read(real_lc_dir, name))
    # the secondary eclipses are obvious in these sectors (MANIFEST: phase ~0.5, 0.45 for IT Cas)
    assert max(feats["secondary_snr"], feats["secondary_search_snr"]) > 20
    assert feats.fits.best_family == "eclipse"


@pytest.mark.parametrize("name", ["tess_beta-Pic_s04-s07.csv",
                                  "tess_beta-Pic_s04-s07_pulsations-removed.csv"])
def test_beta_pic_comet_dips_are_skewed_the_comet_way(real_lc_dir, name):
    feats = extract(_read(real_lc_dir, name))
    assert feats["periodic"] == 0
    assert feats["skewness"] > 0.2
    assert feats.fits.best_family == "comet"


def test_planet_transits_are_symmetric(real_lc_dir):
    for name in ("kepler_HAT-P-7_Q0.fits", "tess_WASP-126_s01.fits"):
        feats = extract(_read(real_lc_dir, name))
        assert abs(feats["skewness"]) < 0.1, name
        assert feats.fits.best_family == "transit", name
