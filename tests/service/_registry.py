"""Test helpers: copies of the shipped model into throw-away registries."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

REPO_MODELS = Path(__file__).resolve().parents[2] / "models"


def shipped_version() -> str:
    """The version the shipped registry marks active."""
    return (REPO_MODELS / "ACTIVE").read_text().strip()


def copy_version(root: Path, *, as_version: str | None = None, active: bool = True) -> str:
    """Copy the shipped active model into ``root`` (optionally under another version name,
    with its card's ``version`` rewritten: the card is not among the hashed files) and return
    the version name."""
    src = shipped_version()
    name = as_version or src
    shutil.copytree(REPO_MODELS / src, root / name)
    if as_version is not None:
        card_path = root / name / "card.json"
        card = json.loads(card_path.read_text())
        card["version"] = name
        card_path.write_text(json.dumps(card, indent=2) + "\n")
    if active:
        (root / "ACTIVE").write_text(name + "\n")
    return name


def tiny_estimator(*, seed: int):
    """A tiny calibrated gradient-boosted model on blob features, for registry plumbing tests
    (one OpenMP thread: the machine is shared)."""
    import numpy as np
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.datasets import make_blobs
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.frozen import FrozenEstimator
    from threadpoolctl import threadpool_limits

    from features.catalog import FEATURE_NAMES
    from training.classes import CLASSES

    X, y = make_blobs(n_samples=300, n_features=len(FEATURE_NAMES), centers=len(CLASSES),
                      random_state=seed)
    labels = np.array(CLASSES)[y]
    with threadpool_limits(limits=1):
        hgb = HistGradientBoostingClassifier(max_iter=20, random_state=seed).fit(
            X[:150], labels[:150])
        return CalibratedClassifierCV(FrozenEstimator(hgb)).fit(X[150:], labels[150:])
