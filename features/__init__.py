"""dipshape.features: the measurement science (segment I/O, shape models, feature vector).

Pure functions on numpy arrays; imports nothing from ``training`` or ``service``.
"""

from features.errors import (
    DipshapeError,
    FileFormatError,
    InputError,
    ModelError,
    ParameterError,
    SegmentError,
)

__all__ = [
    "DipshapeError",
    "FileFormatError",
    "InputError",
    "ModelError",
    "ParameterError",
    "SegmentError",
]
