"""dipshape.features: the measurement science (segment I/O, shape models, feature vector).

Pure functions on numpy arrays; imports nothing from ``training`` or ``service``. The public
surface is re-exported here; the modules hold the details.
"""

from features.catalog import FEATURE_NAMES, FEATURE_VERSION, FEATURES, FeatureSpec
from features.errors import (
    DipshapeError,
    FileFormatError,
    InputError,
    ModelError,
    ParameterError,
    SegmentError,
)
from features.events import Ephemeris, Event
from features.io import read_segment, read_segments
from features.pipeline import FLAGS, Features, extract
from features.segment import MIN_POINTS, Segment, make_segment, segment_from_mapping

__all__ = [
    "FEATURES",
    "FEATURE_NAMES",
    "FEATURE_VERSION",
    "FLAGS",
    "MIN_POINTS",
    "DipshapeError",
    "Ephemeris",
    "Event",
    "FeatureSpec",
    "Features",
    "FileFormatError",
    "InputError",
    "ModelError",
    "ParameterError",
    "Segment",
    "SegmentError",
    "extract",
    "make_segment",
    "read_segment",
    "read_segments",
    "segment_from_mapping",
]
