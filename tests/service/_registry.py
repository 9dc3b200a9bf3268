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
