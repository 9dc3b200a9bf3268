"""Shared pytest helpers for the dipshape test suite."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

#: The repository root (this file is tests/conftest.py).
REPO_ROOT = Path(__file__).resolve().parents[1]

#: Environment variable that points the real light-curve tests at another folder.
REAL_LC_ENV = "DIPSHAPE_REAL_LC"


def real_lc_path() -> Path | None:
    """Folder of real mission light curves, or None when it is absent.

    The folder is ``<repo_root>/../shared/real_lc`` (a copy of ``shared/`` sits beside the
    repository in CI), overridable with the environment variable ``DIPSHAPE_REAL_LC``. It
    counts as present only when it holds ``MANIFEST.csv``.
    """
    override = os.environ.get(REAL_LC_ENV)
    folder = Path(override) if override else REPO_ROOT.parent / "shared" / "real_lc"
    return folder if (folder / "MANIFEST.csv").is_file() else None


@pytest.fixture(scope="session")
def real_lc_dir() -> Path:
    """The real light-curve folder; skips the test when it is absent."""
    folder = real_lc_path()
    if folder is None:
        pytest.skip(
            f"real light curves not found (../shared/real_lc beside the repository, or set "
            f"{REAL_LC_ENV})"
        )
    return folder
