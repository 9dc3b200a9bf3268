"""The one error hierarchy of dipshape.

Every error the product raises on purpose is a :class:`DipshapeError` carrying a stable, machine
readable ``code`` (part of the CLI and HTTP contract: never rename one) and a human ``detail``.
The CLI and the REST service each map these to messages and status codes in one place.

Hierarchy::

    DipshapeError                   code            meaning
    ├── InputError                  (invalid_input) the data handed in cannot be scored
    │   ├── SegmentError                            arrays that fail validation
    │   │     too_few_points, length_mismatch, non_finite_time, constant_flux,
    │   │     non_positive_flux, non_positive_flux_err, duplicate_times, invalid_type, ...
    │   └── FileFormatError                         a file that cannot be read as a light curve
    │         unreadable_file, empty_file, unsupported_format, missing_columns,
    │         file_not_found, multiple_segments
    ├── ParameterError              (invalid_parameter) an argument out of its allowed range
    └── ModelError                  (model_error)   model registry problems (later issues)
          model_not_found, model_integrity, feature_version_mismatch

Callers catch families through the shared bases (``except InputError``).
"""

from __future__ import annotations

__all__ = [
    "DipshapeError",
    "FileFormatError",
    "InputError",
    "ModelError",
    "ParameterError",
    "SegmentError",
]


class DipshapeError(Exception):
    """Base of every error dipshape raises on purpose.

    Parameters
    ----------
    code : str
        Stable machine-readable code (snake_case), e.g. ``"too_few_points"``.
    detail : str
        Human-readable explanation naming the offending argument or value.
    """

    default_code = "dipshape_error"

    def __init__(self, code: str | None = None, detail: str = "") -> None:
        self.code = code or self.default_code
        self.detail = detail
        super().__init__(f"[{self.code}] {detail}" if detail else self.code)

    def to_dict(self) -> dict[str, str]:
        """Return the JSON error object ``{"error": code, "detail": detail}``."""
        return {"error": self.code, "detail": self.detail}


class InputError(DipshapeError):
    """The data handed in cannot be scored."""

    default_code = "invalid_input"


class SegmentError(InputError):
    """Time/flux/flux_err arrays that fail validation."""

    default_code = "invalid_segment"


class FileFormatError(InputError):
    """A file that cannot be read as a light curve."""

    default_code = "unreadable_file"


class ParameterError(DipshapeError):
    """A physical or numerical argument outside its allowed range."""

    default_code = "invalid_parameter"


class ModelError(DipshapeError):
    """A model artefact that is missing, tampered with or incompatible."""

    default_code = "model_error"
