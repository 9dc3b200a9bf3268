"""The shipped model on the real mission light curves of ../shared/real_lc (when present).

Each file is scored as one whole segment with the active model; prints a Markdown table: file,
published class (MANIFEST.csv), label given, its probability, and the flags. Two files need a
column named explicitly, as their MANIFEST notes say: the K2 systematics case is the raw
aperture flux FRAW, and the pulsation-removed beta Pictoris file holds its flux in
flux_resid_norm.

    .venv/bin/python bench/real_lc.py [--dir ../shared/real_lc] [--registry models]
"""

from __future__ import annotations

import sys
from pathlib import Path

# bench/features.py is named like the package: keep this folder off the import path
sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != Path(__file__).parent.resolve()]

import argparse  # noqa: E402
import csv  # noqa: E402
import os  # noqa: E402

from features.catalog import FEATURE_VERSION  # noqa: E402
from features.errors import DipshapeError  # noqa: E402
from features.io import read_segment  # noqa: E402
from service.scoring import load_ood, score_segment  # noqa: E402
from training.registry import load_model  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
COLUMNS = {"k2_K2-3_c01.fits": "FRAW",
           "tess_beta-Pic_s04-s07_pulsations-removed.csv": "flux_resid_norm"}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    default = os.environ.get("DIPSHAPE_REAL_LC", str(REPO.parent / "shared" / "real_lc"))
    parser.add_argument("--dir", type=Path, default=Path(default))
    parser.add_argument("--registry", type=Path, default=REPO / "models")
    args = parser.parse_args()
    manifest = args.dir / "MANIFEST.csv"
    if not manifest.is_file():
        raise SystemExit(f"no {manifest}: nothing to score")
    model = load_model(args.registry, expected_feature_version=FEATURE_VERSION)
    ood = load_ood(args.registry, model.card.version)
    print(f"model {model.card.version}\n")
    print("| file | published class | label | p(label) | p(published) | flags |")
    print("|---|---|---|---|---|---|")
    right = 0
    rows = list(csv.DictReader(manifest.open()))
    for row in rows:
        name, want = row["file"], row["expected_class"]
        try:
            seg = read_segment(args.dir / name, flux_col=COLUMNS.get(name))
            r = score_segment(seg, model, ood=ood)
        except DipshapeError as err:
            print(f"| {name} | {want} | error {err.code} | | | {err.detail} |")
            continue
        right += r.label == want
        print(f"| {name} | {want} | {r.label} | {r.probabilities[r.label]:.2f} | "
              f"{r.probabilities[want]:.2f} | {', '.join(r.flags)} |")
    print(f"\n{right} of {len(rows)} files get their published class")


if __name__ == "__main__":
    main()
