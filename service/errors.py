"""Where the error hierarchy meets the outside: CLI messages and exit codes, HTTP statuses.

This is the one place that maps :class:`features.errors.DipshapeError` families and codes to
what a user sees; commands and routes never choose a message format or a status themselves.

Errors raised only by the service (all :class:`ServiceError`)::

    code                 status  meaning
    invalid_json         400     the body is not strict JSON (NaN and Infinity are not JSON)
    invalid_request      422     a body or parameter of the wrong shape or type
    too_many_points      422     a segment longer than the configured limit
    batch_too_large      422     more segments in a batch than the configured limit
    body_too_large       413     a request body above the configured byte limit
    unsupported_media_type 415   a body that is not JSON where JSON is expected
    missing_api_key      401     no X-API-Key header while keys are configured
    invalid_api_key      401     a key that matches no configured key
    forbidden            403     a valid key without the role the route needs
    not_found            404     no such route (or model version: ``model_not_found``)
    method_not_allowed   405     the route exists for other methods
    overloaded           503     more requests waiting than the service queues (Retry-After)
    model_not_ready      503     no model is loaded yet
    timeout              504     scoring took longer than the per-request time limit
    internal_error       500     an unexpected failure (logged; no trace reaches a client)
    open_bind_refused    -       ``dipshape serve`` beyond loopback without API keys

Batch scoring (``service/batch.py``, all :class:`~features.errors.ParameterError`, exit 2):
``output_exists``, ``resume_mismatch``, ``invalid_run_manifest``, ``invalid_manifest``,
``invalid_chunk_size``, ``scheduler_unreachable``, ``no_workers``.
"""

from __future__ import annotations

from features.errors import (
    DipshapeError,
    FileFormatError,
    InputError,
    ModelError,
    ParameterError,
)

__all__ = [
    "EXIT_FAILURE",
    "EXIT_INTERRUPTED",
    "EXIT_USAGE",
    "ServiceError",
    "cli_exit_code",
    "cli_message",
    "http_body",
    "http_status",
]

EXIT_FAILURE = 1
"""Exit code when the work ran but some of it failed (e.g. a segment could not be scored)."""
EXIT_USAGE = 2
"""Exit code for bad arguments or unusable input."""
EXIT_INTERRUPTED = 130
"""Exit code after Ctrl-C: 128 + SIGINT, the shells' convention (common practice)."""


class ServiceError(DipshapeError):
    """An error of the HTTP face itself (authentication, limits, malformed requests)."""

    default_code = "service_error"


# Codes whose status is not their family's.
_STATUS_BY_CODE: dict[str, int] = {
    "invalid_json": 400,
    "invalid_request": 422,
    "too_many_points": 422,
    "batch_too_large": 422,
    "missing_api_key": 401,
    "invalid_api_key": 401,
    "forbidden": 403,
    "not_found": 404,
    "model_not_found": 404,
    "file_not_found": 404,
    "method_not_allowed": 405,
    "body_too_large": 413,
    "unsupported_media_type": 415,
    "overloaded": 503,
    "model_not_ready": 503,
    "store_unavailable": 503,
    "label_not_found": 404,
    "no_active_model": 503,
    "timeout": 504,
    "internal_error": 500,
}


def cli_exit_code(err: DipshapeError) -> int:
    """Exit code for an error that stopped a command."""
    return EXIT_USAGE if isinstance(err, InputError | ParameterError | ServiceError) \
        else EXIT_FAILURE


def cli_message(err: DipshapeError) -> str:
    """One-line message for the terminal, e.g. ``error [too_few_points]: ...``."""
    return f"error [{err.code}]: {err.detail}"


def http_status(err: DipshapeError) -> int:
    """HTTP status of an error answered by the REST service.

    Parameters
    ----------
    err : DipshapeError

    Returns
    -------
    int
        The status of its code when listed in the module table, else by family: input that
        cannot be scored and out-of-range parameters 422 (RFC 9110 §15.5.21), service errors
        400, model registry problems 500, anything else 500.

    Examples
    --------
    >>> from features.errors import SegmentError
    >>> http_status(SegmentError("too_few_points", "3 points"))
    422
    """
    if err.code in _STATUS_BY_CODE:
        return _STATUS_BY_CODE[err.code]
    if isinstance(err, FileFormatError | InputError | ParameterError):
        return 422
    if isinstance(err, ServiceError):
        return 400
    if isinstance(err, ModelError):
        return 500
    return 500


def http_body(err: DipshapeError) -> dict[str, str]:
    """The JSON error body of the REST service: ``{"error": code, "detail": text}``."""
    return {"error": err.code, "detail": err.detail}
