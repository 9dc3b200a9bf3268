"""The public surface of ``features`` is deliberate: everything in ``__all__`` exists."""

from __future__ import annotations

import features


def test_all_members_exist_and_nothing_private_is_exported():
    for name in features.__all__:
        assert hasattr(features, name), name
        assert not name.startswith("_")
    assert {"extract", "Segment", "read_segment", "DipshapeError"} <= set(features.__all__)
