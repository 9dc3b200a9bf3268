"""Python client of the dipshape REST service, for pipelines and alert brokers.

:class:`DipshapeClient` wraps every route of ``dipshape serve`` (scoring one segment, a batch,
an uploaded file; the diagnostic plot; labels; the model registry; health and readiness) over
one pooled ``httpx.Client``. :func:`enrich_stream` adds a ``"dipshape"`` verdict to every line
of a stream of alert-like JSON objects.

A score is triage, not a discovery: a ``planet`` or ``exocomet`` label asks for follow-up
(pixel-level and centroid checks, more events, spectroscopy) before any claim.

Errors
------
Every error the service answers with becomes a :class:`DipshapeClientError` carrying the HTTP
``status`` and the server's stable ``error`` code and ``detail``::

    features.errors.DipshapeError
    └── DipshapeClientError      .status (int, or None when no response arrived)
          <server codes>           the server's own code, e.g. too_few_points, unauthorized
          http_<status>            an error response whose body is not the JSON error object
          invalid_response         a 2xx answer that is not what the route promises
          connection_error         no connection could be made (after the retries)
          timeout                  the service did not answer in time (after the retries)
          transport_error          any other transport failure (after the retries)

Arguments that are wrong before anything is sent raise the usual families instead:
:class:`features.errors.ParameterError` (``invalid_parameter``),
:class:`features.errors.SegmentError` (``invalid_type``, ``invalid_shape``, ``length_mismatch``,
``missing_columns``, ``invalid_id``) and :class:`features.errors.FileFormatError`
(``file_not_found``, ``unreadable_file``).

Retries
-------
A request is sent again, at most ``retries`` times, when

- the service answers 503 Service Unavailable (not ready, overloaded): the wait is the
  ``Retry-After`` header when it holds delay-seconds (RFC 9110 §10.2.3), otherwise the
  exponential backoff ``backoff_s * 2**attempt``; both are capped at :data:`MAX_RETRY_DELAY_S`;
- the transport fails (``httpx.TransportError``: connection refused, timeouts, a dropped
  connection), after the same exponential backoff.

Any other status (4xx, 500, 504 ...) is answered at once, since sending the same request again
would give the same answer. A label submission is not idempotent (RFC 9110 §9.2.2: a client
should not automatically retry a non-idempotent request), so it is retried only when the
request surely did not reach the service: on 503 and on connection failures
(``httpx.ConnectError``, ``httpx.ConnectTimeout``), never after a read timeout.
"""

from __future__ import annotations

import io
import json
import math
import os
import time as _time
import zipfile
from collections.abc import Callable, Iterable, Mapping, Sequence
from pathlib import Path
from types import TracebackType
from typing import Any, Protocol

import httpx
import numpy as np

from features.errors import DipshapeError, FileFormatError, ParameterError, SegmentError

__all__ = [
    "API_KEY_HEADER",
    "BATCH_CHUNK",
    "MAX_RETRY_DELAY_S",
    "DipshapeClient",
    "DipshapeClientError",
    "enrich_stream",
]

API_KEY_HEADER = "X-API-Key"
"""Request header that carries the API key."""

MAX_RETRY_DELAY_S = 30.0
"""Longest wait before a retry [s], whatever the backoff or a ``Retry-After`` header asks."""

BATCH_CHUNK = 256
"""Segments per ``/v1/score/batch`` request (the service's default limit)."""

_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (W3C, 2003), section 5.2
_USER_AGENT = "dipshape-client/1"
_DETAIL_EXCERPT = 200
_SEGMENT_KEYS = ("time", "flux", "flux_err")
_EPHEMERIS_KEYS = ("period", "epoch", "duration")
# connection failures after which the request cannot have reached the service
_NOT_SENT = (httpx.ConnectError, httpx.ConnectTimeout)


class DipshapeClientError(DipshapeError):
    """An error answer of the service, or no answer at all.

    Parameters
    ----------
    status : int or None
        HTTP status of the response; None when no response arrived (connection failure,
        timeout).
    code : str
        The server's stable ``error`` code, or one of the client's codes (module docstring).
    detail : str
        The server's ``detail``, or the client's explanation.

    Examples
    --------
    >>> err = DipshapeClientError(422, "too_few_points", "fewer than 20 finite points")
    >>> err.status, err.code
    (422, 'too_few_points')
    """

    default_code = "client_error"

    def __init__(self, status: int | None, code: str, detail: str = "") -> None:
        self.status = status
        super().__init__(code, detail)

    def to_dict(self) -> dict[str, Any]:
        """Return ``{"error": code, "detail": detail, "status": status}``."""
        return {**super().to_dict(), "status": self.status}


class _Writable(Protocol):
    def write(self, text: str, /) -> Any: ...


class DipshapeClient:
    """Client of one dipshape service.

    Parameters
    ----------
    base_url : str
        Root of the service, e.g. ``"http://127.0.0.1:8000"`` (http or https).
    api_key : str, optional
        Sent as the ``X-API-Key`` header; None sends none (a service without keys).
    timeout_s : float
        Connect, read, write and pool timeout of every request [s], > 0.
    retries : int
        Times a request is sent again after a 503 or a transport failure (module docstring),
        >= 0.
    backoff_s : float
        First backoff delay [s], doubled after each attempt, >= 0.
    transport : httpx.BaseTransport, optional
        Transport to use instead of the network (e.g. ``httpx.MockTransport`` in tests).
    sleep : callable
        Called with the delay in seconds before a retry (default :func:`time.sleep`).

    Raises
    ------
    ParameterError
        ``invalid_parameter`` naming the argument that is out of range.

    Examples
    --------
    >>> with DipshapeClient("http://127.0.0.1:8000") as client:  # doctest: +SKIP
    ...     result = client.score(time, flux, id="LS-0042-s3")
    ...     result["label"], result["probabilities"][result["label"]]
    ('exocomet', 0.93)
    """

    def __init__(
        self,
        base_url: str,
        *,
        api_key: str | None = None,
        timeout_s: float = 30.0,
        retries: int = 3,
        backoff_s: float = 0.5,
        transport: httpx.BaseTransport | None = None,
        sleep: Callable[[float], Any] = _time.sleep,
    ) -> None:
        url = _check_base_url(base_url)
        if api_key is not None and (not isinstance(api_key, str) or not api_key.strip()):
            raise ParameterError("invalid_parameter",
                                 "api_key must be a non-empty string or None")
        timeout = _number(timeout_s, "timeout_s")
        if timeout <= 0:
            raise ParameterError("invalid_parameter", f"timeout_s must be > 0, got {timeout_s!r}")
        if isinstance(retries, bool) or not isinstance(retries, int) or retries < 0:
            raise ParameterError("invalid_parameter",
                                 f"retries must be an integer >= 0, got {retries!r}")
        backoff = _number(backoff_s, "backoff_s")
        if backoff < 0:
            raise ParameterError("invalid_parameter", f"backoff_s must be >= 0, got {backoff_s!r}")
        if not callable(sleep):
            raise ParameterError("invalid_parameter", "sleep must be callable")
        self.base_url = url
        self.retries = retries
        self.backoff_s = backoff
        self._sleep = sleep
        headers = {"User-Agent": _USER_AGENT, "Accept": "application/json"}
        if api_key is not None:
            headers[API_KEY_HEADER] = api_key
        self._http = httpx.Client(base_url=url, headers=headers,
                                  timeout=httpx.Timeout(timeout), transport=transport)

    # -- lifetime --------------------------------------------------------------------------

    def close(self) -> None:
        """Close the connection pool (the client cannot be used afterwards)."""
        self._http.close()

    def __enter__(self) -> DipshapeClient:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"DipshapeClient({self.base_url!r}, retries={self.retries})"

    # -- scoring ---------------------------------------------------------------------------

    def score(
        self,
        time: Any,
        flux: Any,
        flux_err: Any = None,
        *,
        id: str | None = None,
        ephemeris: Any = None,
    ) -> dict[str, Any]:
        """Score one segment given as arrays (``POST /v1/score``).

        Parameters
        ----------
        time : array_like, shape (n,)
            Times [days].
        flux : array_like, shape (n,)
            Flux in any units; NaN, infinity and None become JSON null (missing points).
        flux_err : array_like, shape (n,), optional
            One-sigma flux errors in the units of ``flux``.
        id : str, optional
            Segment id, echoed in the result.
        ephemeris : Mapping or features.events.Ephemeris, optional
            ``{"period", "epoch", "duration"}`` in days (or an ``Ephemeris``): no period is
            searched.

        Returns
        -------
        dict
            The result object (``schema_version``, ``id``, ``label``, ``probabilities``,
            ``flags``, ``features``, ``events``, ``ephemeris``, ``model``, ``elapsed_ms``).

        Raises
        ------
        SegmentError
            ``invalid_type``, ``invalid_shape``, ``length_mismatch`` or ``invalid_id`` before
            sending.
        DipshapeClientError
            The service refused the segment (e.g. status 422, code ``too_few_points``) or
            could not be reached.
        """
        obj: dict[str, Any] = {"time": time, "flux": flux}
        if flux_err is not None:
            obj["flux_err"] = flux_err
        if id is not None:
            obj["id"] = id
        if ephemeris is not None:
            obj["ephemeris"] = ephemeris
        return self.score_segment(obj)

    def score_segment(self, obj: Mapping[str, Any] | Any) -> dict[str, Any]:
        """Score one segment object (``POST /v1/score``).

        Parameters
        ----------
        obj : Mapping or features.segment.Segment
            ``{"id"?, "time", "flux", "flux_err"?, "ephemeris"?}`` with array-like values,
            or a :class:`features.segment.Segment` (its estimated errors are not sent, so the
            service estimates them again).

        Returns
        -------
        dict
            The result object (see :meth:`score`).

        Raises
        ------
        SegmentError, DipshapeClientError
            As :meth:`score`.
        """
        return self._json("POST", "/v1/score", json_body=_segment_body(obj))

    def score_batch(self, segments: Iterable[Mapping[str, Any] | Any]) -> list[dict[str, Any]]:
        """Score many segments (``POST /v1/score/batch``), in requests of :data:`BATCH_CHUNK`.

        Parameters
        ----------
        segments : iterable of Mapping or Segment
            Segment objects as for :meth:`score_segment`.

        Returns
        -------
        list of dict
            One object per segment, in the order given: a result, or an error object
            ``{"schema_version", "id", "error", "detail"}`` for a segment the service could
            not score.

        Raises
        ------
        SegmentError
            A segment that cannot even be sent (its position is named).
        DipshapeClientError
            A request the service refused as a whole (e.g. 413) or that did not arrive.
        """
        bodies = []
        for i, seg in enumerate(segments):
            try:
                bodies.append(_segment_body(seg))
            except SegmentError as err:
                raise SegmentError(err.code, f"segment {i}: {err.detail}") from err
        results: list[dict[str, Any]] = []
        for start in range(0, len(bodies), BATCH_CHUNK):
            chunk = bodies[start:start + BATCH_CHUNK]
            answer = self._json("POST", "/v1/score/batch", json_body=chunk)
            if not isinstance(answer, list) or len(answer) != len(chunk):
                raise DipshapeClientError(
                    200, "invalid_response",
                    f"/v1/score/batch answered {_kind(answer)} for {len(chunk)} segments; "
                    "expected a list of the same length")
            results.extend(answer)
        return results

    def score_file(
        self, path: str | os.PathLike[str], *, ephemeris: str | None = None
    ) -> list[dict[str, Any]]:
        """Upload a light-curve file and score every segment in it (``POST /v1/score/file``).

        Parameters
        ----------
        path : path
            A CSV, JSON or FITS light curve; the service names its segment after the file
            stem.
        ephemeris : str, optional
            ``"PERIOD,EPOCH,DURATION"`` in days, applied to every segment.

        Returns
        -------
        list of dict
            One result or error object per segment of the file.

        Raises
        ------
        FileFormatError
            ``file_not_found`` / ``unreadable_file`` for the local file.
        DipshapeClientError
            The service refused the upload (e.g. 413 too large) or could not be reached.
        """
        if not isinstance(path, str | os.PathLike):
            raise ParameterError("invalid_parameter",
                                 f"path must be a str or os.PathLike; got {type(path).__name__}")
        p = Path(path)
        if not p.is_file():
            raise FileFormatError("file_not_found", f"no such file: {p.name!r}")
        try:
            content = p.read_bytes()
        except OSError as exc:
            raise FileFormatError("unreadable_file", f"{p.name!r} cannot be read: {exc}") from exc
        data = None
        if ephemeris is not None:
            if not isinstance(ephemeris, str) or not ephemeris.strip():
                raise ParameterError("invalid_parameter",
                                     "ephemeris must be a 'PERIOD,EPOCH,DURATION' string")
            data = {"ephemeris": ephemeris}
        files = {"file": (p.name, content, "application/octet-stream")}
        answer = self._json("POST", "/v1/score/file", files=files, data=data)
        if not isinstance(answer, list):
            raise DipshapeClientError(200, "invalid_response",
                                      f"/v1/score/file answered {_kind(answer)}; expected a list")
        return answer

    # -- plots and labels ------------------------------------------------------------------

    def plot(self, segment: Mapping[str, Any] | Any, *, width: int = 1200,
             height: int = 900) -> bytes:
        """The diagnostic plot of one segment as PNG bytes (``POST /v1/plot``).

        Parameters
        ----------
        segment : Mapping or Segment
            A segment object as for :meth:`score_segment`.
        width, height : int
            Size of the picture [pixels], > 0.

        Returns
        -------
        bytes
            The PNG file.

        Raises
        ------
        ParameterError
            ``invalid_parameter`` for a size that is not a positive integer.
        DipshapeClientError
            An error answer, or ``invalid_response`` when the body is not a PNG.
        """
        for name, value in (("width", width), ("height", height)):
            if isinstance(value, bool) or not isinstance(value, int) or value <= 0:
                raise ParameterError("invalid_parameter",
                                     f"{name} must be a positive integer [pixels], got {value!r}")
        response = self._request("POST", "/v1/plot", json_body=_segment_body(segment),
                                 params={"width": width, "height": height},
                                 accept="image/png")
        if not response.content.startswith(_PNG_SIGNATURE):
            raise DipshapeClientError(
                response.status_code, "invalid_response",
                f"/v1/plot answered {response.headers.get('content-type', 'no content type')} "
                "that is not a PNG file")
        return response.content

    def submit_label(
        self,
        segment: Mapping[str, Any] | Any,
        label: str,
        *,
        note: str | None = None,
        submitter: str | None = None,
    ) -> dict[str, Any]:
        """Submit a vetter's label for a segment (``POST /v1/labels``).

        Parameters
        ----------
        segment : Mapping or Segment
            The segment, with its ``id``.
        label : str
            The class the vetter gives it (e.g. ``"eclipsing_binary"``).
        note, submitter : str, optional
            Free text, and who labelled it.

        Returns
        -------
        dict
            ``{"label_id", "id", "label", "created_utc"}``.

        Raises
        ------
        SegmentError
            ``invalid_id`` when the segment has no id.
        ParameterError
            ``invalid_parameter`` for an empty label or a non-string note or submitter.
        DipshapeClientError
            The service refused the label (e.g. 422 for an unknown class, 403 without the
            ``label`` role).
        """
        body = _segment_body(segment)
        if "id" not in body:
            raise SegmentError("invalid_id", "a labelled segment needs an id")
        if not isinstance(label, str) or not label.strip():
            raise ParameterError("invalid_parameter",
                                 f"label must be a non-empty string, got {label!r}")
        payload: dict[str, Any] = {"segment": body, "label": label}
        for name, value in (("note", note), ("submitter", submitter)):
            if value is not None:
                if not isinstance(value, str):
                    raise ParameterError("invalid_parameter",
                                         f"{name} must be a string, got {type(value).__name__}")
                payload[name] = value
        return self._json("POST", "/v1/labels", json_body=payload, idempotent=False)

    def export_labels(self) -> bytes:
        """Every submitted label as a ZIP archive (``GET /v1/labels/export``).

        Returns
        -------
        bytes
            The ZIP file.

        Raises
        ------
        DipshapeClientError
            An error answer, or ``invalid_response`` when the body is not a ZIP archive.
        """
        response = self._request("GET", "/v1/labels/export", accept="application/zip")
        if not zipfile.is_zipfile(io.BytesIO(response.content)):
            raise DipshapeClientError(response.status_code, "invalid_response",
                                      "/v1/labels/export answered a body that is not a ZIP file")
        return response.content

    # -- models ----------------------------------------------------------------------------

    def models(self) -> dict[str, Any]:
        """The registered models (``GET /v1/models``): ``{"active", "models"}``."""
        return self._json_object("GET", "/v1/models")

    def active_model(self) -> dict[str, Any]:
        """The model that scores (``GET /v1/models/active``).

        Returns
        -------
        dict
            ``{"name", "version", "sha256", "classes", "feature_version"}``.
        """
        return self._json_object("GET", "/v1/models/active")

    def activate(self, version: str) -> dict[str, Any]:
        """Make a registered version the one that scores (admin role).

        Parameters
        ----------
        version : str
            A version listed by :meth:`models`.

        Returns
        -------
        dict
            ``{"active": version}``.

        Raises
        ------
        ParameterError
            ``invalid_parameter`` for a version that is not a plain name.
        DipshapeClientError
            E.g. 404 for an unknown version, 403 without the admin role.
        """
        if not isinstance(version, str) or not version.strip() or "/" in version \
                or version in {".", ".."}:
            raise ParameterError("invalid_parameter",
                                 f"version must be a plain version name, got {version!r}")
        return self._json_object("POST", f"/v1/models/{version}/activate")

    # -- probes ----------------------------------------------------------------------------

    def health(self) -> bool:
        """True when the service answers ``GET /healthz`` with ``{"status": "ok"}``.

        One attempt, no retry; a service that cannot be reached is not healthy.
        """
        answer = self._probe("/healthz")
        return answer is not None and answer.get("status") == "ok"

    def ready(self) -> bool:
        """True when the service can score (``GET /readyz`` answers 200); 503 gives False.

        One attempt, no retry (a 503 is the answer here, not a reason to wait).
        """
        answer = self._probe("/readyz")
        return answer is not None and answer.get("status") == "ready"

    # -- transport -------------------------------------------------------------------------

    def _probe(self, path: str) -> dict[str, Any] | None:
        try:
            response = self._http.get(path)
        except httpx.TransportError:
            return None
        if response.status_code != 200:
            return None
        try:
            answer = response.json()
        except ValueError:
            return None
        return answer if isinstance(answer, dict) else None

    def _json_object(self, method: str, path: str) -> dict[str, Any]:
        answer = self._json(method, path)
        if not isinstance(answer, dict):
            raise DipshapeClientError(200, "invalid_response",
                                      f"{path} answered {_kind(answer)}; expected an object")
        return answer

    def _json(self, method: str, path: str, **kwargs: Any) -> Any:
        response = self._request(method, path, **kwargs)
        try:
            return response.json()
        except ValueError as exc:
            raise DipshapeClientError(
                response.status_code, "invalid_response",
                f"{path} answered a body that is not JSON: {_excerpt(response.text)}") from exc

    def _request(
        self,
        method: str,
        path: str,
        *,
        json_body: Any = None,
        params: Mapping[str, Any] | None = None,
        files: Mapping[str, Any] | None = None,
        data: Mapping[str, Any] | None = None,
        accept: str = "application/json",
        idempotent: bool = True,
    ) -> httpx.Response:
        """Send one request with the retry rule of the module docstring; raise error answers."""
        content = None
        headers = {"Accept": accept}
        if json_body is not None:
            content = json.dumps(json_body, allow_nan=False, separators=(",", ":"))
            headers["Content-Type"] = "application/json"
        attempt = 0
        while True:
            try:
                response = self._http.request(method, path, content=content, params=params,
                                              files=files, data=data, headers=headers)
            except httpx.TransportError as exc:
                retryable = idempotent or isinstance(exc, _NOT_SENT)
                if not retryable or attempt >= self.retries:
                    raise _transport_error(exc, method, path, attempt + 1) from exc
                self._sleep(self._backoff(attempt))
                attempt += 1
                continue
            if response.status_code == 503 and attempt < self.retries:
                self._sleep(self._retry_delay(response, attempt))
                attempt += 1
                continue
            if response.status_code >= 400:
                raise _error_from_response(response)
            return response

    def _backoff(self, attempt: int) -> float:
        return min(self.backoff_s * 2.0**attempt, MAX_RETRY_DELAY_S)

    def _retry_delay(self, response: httpx.Response, attempt: int) -> float:
        seconds = _retry_after_seconds(response.headers.get("Retry-After"))
        if seconds is None:
            return self._backoff(attempt)
        return min(seconds, MAX_RETRY_DELAY_S)


# --------------------------------------------------------------------------------------------
# The alert stream
# --------------------------------------------------------------------------------------------


def enrich_stream(
    client: DipshapeClient, lines_in: Iterable[str | bytes], lines_out: _Writable
) -> tuple[int, int]:
    """Score every alert of a JSON-lines stream and write it back with its verdict.

    Each non-blank input line is a JSON object holding a light-curve segment, e.g.
    ``{"alert_id": 1712, "time": [...], "flux": [...], "flux_err": [...]}`` (other keys are
    kept as they are; ``ephemeris`` is passed on). The segment id sent is ``alert_id``, else
    ``id``, else ``line-<n>``. The same object is written back, one line each, with a
    ``"dipshape"`` key holding ``{"label", "probabilities", "flags", "model"}``, or
    ``{"error": code, "detail": ...}`` for a line that cannot be read or scored; the stream
    goes on after such a line. A line that is not a JSON object is written back as
    ``{"raw": <the line>, "dipshape": {"error": "unreadable_alert", ...}}``. The output is
    strict JSON (RFC 8259): a ``NaN`` or ``Infinity`` that a producer wrote into an alert is
    read, sent as a missing point and written back as ``null``. Each line is flushed when
    ``lines_out`` can flush, so a live stream is not held back.

    Parameters
    ----------
    client : DipshapeClient
        An open client.
    lines_in : iterable of str or bytes
        The input lines (e.g. an open file or ``sys.stdin``).
    lines_out : writable text stream
        Receives one JSON line (ending in ``"\\n"``) per non-blank input line, in order.

    Returns
    -------
    scored : int
        Lines written with a verdict.
    failed : int
        Lines written with an error.

    Raises
    ------
    DipshapeClientError
        Status 401 or 403: the key is missing or lacks the ``score`` role, so every line
        would fail the same way; the stream stops.

    Examples
    --------
    >>> import io
    >>> with DipshapeClient("http://127.0.0.1:8000") as client:  # doctest: +SKIP
    ...     scored, failed = enrich_stream(client, open("alerts.jsonl"), io.StringIO())
    """
    scored = failed = 0
    flush = getattr(lines_out, "flush", None)
    for number, raw in enumerate(lines_in, start=1):
        text = raw.decode("utf-8", errors="replace") if isinstance(raw, bytes) else str(raw)
        if not text.strip():
            continue
        alert, verdict = _enrich_one(client, text, number)
        if "error" in verdict:
            failed += 1
        else:
            scored += 1
        alert["dipshape"] = verdict
        lines_out.write(json.dumps(_strict_json(alert), allow_nan=False,
                                   separators=(",", ":")) + "\n")
        if callable(flush):
            flush()
    return scored, failed


def _enrich_one(
    client: DipshapeClient, text: str, number: int
) -> tuple[dict[str, Any], dict[str, Any]]:
    """The alert object to write back and its ``"dipshape"`` verdict."""
    try:
        alert = json.loads(text)
    except ValueError as exc:
        return {"raw": text.rstrip("\r\n")}, {
            "error": "unreadable_alert", "detail": f"line {number} is not JSON: {exc}"}
    if not isinstance(alert, dict):
        return {"raw": text.rstrip("\r\n")}, {
            "error": "unreadable_alert",
            "detail": f"line {number} is {_kind(alert)}, not a JSON object"}
    missing = [k for k in ("time", "flux") if k not in alert]
    if missing:
        return alert, {"error": "missing_columns",
                       "detail": f"line {number} has no {' or '.join(missing)} "
                                 f"(keys: {sorted(alert)})"}
    segment: dict[str, Any] = {k: alert[k] for k in (*_SEGMENT_KEYS, "ephemeris")
                               if alert.get(k) is not None}
    ident = alert.get("alert_id", alert.get("id"))
    segment["id"] = f"line-{number}" if ident is None or ident == "" else str(ident)
    try:
        result = client.score_segment(segment)
    except DipshapeClientError as err:
        if err.status in (401, 403):
            raise
        return alert, {"error": err.code, "detail": err.detail}
    except DipshapeError as err:  # refused before sending (types, shapes, lengths)
        return alert, {"error": err.code, "detail": err.detail}
    if not isinstance(result, dict) or "label" not in result:
        code = result.get("error", "invalid_response") if isinstance(result, dict) \
            else "invalid_response"
        detail = result.get("detail", "") if isinstance(result, dict) else _kind(result)
        return alert, {"error": str(code), "detail": str(detail)}
    return alert, {k: result.get(k) for k in ("label", "probabilities", "flags", "model")}


def _strict_json(value: Any) -> Any:
    """``value`` with every NaN or infinity replaced by None (RFC 8259 JSON has neither)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _strict_json(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_strict_json(v) for v in value]
    return value


# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------


def _check_base_url(base_url: Any) -> str:
    if not isinstance(base_url, str):
        raise ParameterError("invalid_parameter",
                             f"base_url must be a string, got {type(base_url).__name__}")
    try:
        url = httpx.URL(base_url.strip())
    except httpx.InvalidURL as exc:
        raise ParameterError("invalid_parameter", f"base_url {base_url!r}: {exc}") from exc
    if url.scheme not in ("http", "https") or not url.host:
        raise ParameterError(
            "invalid_parameter",
            f"base_url must be an http:// or https:// URL with a host, got {base_url!r}")
    return str(url).rstrip("/")


def _number(value: Any, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) \
            or not math.isfinite(float(value)):
        raise ParameterError("invalid_parameter",
                             f"{name} must be a finite number, got {value!r}")
    return float(value)


def _segment_body(obj: Any) -> dict[str, Any]:
    """A segment (Mapping or Segment) as the JSON body of the scoring routes."""
    if isinstance(obj, Mapping):
        source: Mapping[str, Any] = obj
    elif all(hasattr(obj, k) for k in ("time", "flux", "id")):  # features.segment.Segment
        source = {"id": obj.id, "time": obj.time, "flux": obj.flux}
        if not getattr(obj, "flux_err_estimated", False):
            source = {**source, "flux_err": obj.flux_err}
    else:
        raise SegmentError("invalid_type",
                           f"a segment must be a mapping with time and flux (or a Segment); "
                           f"got {type(obj).__name__}")
    missing = [k for k in ("time", "flux") if source.get(k) is None]
    if missing:
        raise SegmentError("missing_columns",
                           f"the segment has no {' or '.join(missing)}; keys: "
                           f"{sorted(map(str, source))}")
    body: dict[str, Any] = {}
    if source.get("id") is not None:
        ident = source["id"]
        if not isinstance(ident, str) or not ident:
            raise SegmentError("invalid_id", f"id must be a non-empty string; got {ident!r}")
        body["id"] = ident
    lengths = {}
    for key in _SEGMENT_KEYS:
        if source.get(key) is not None:
            body[key] = _json_array(source[key], key)
            lengths[key] = len(body[key])
    if len(set(lengths.values())) > 1:
        raise SegmentError("length_mismatch",
                           "time, flux and flux_err must have one length; got "
                           + ", ".join(f"{k} {n}" for k, n in lengths.items()))
    if source.get("ephemeris") is not None:
        body["ephemeris"] = _ephemeris_body(source["ephemeris"])
    return body


def _json_array(values: Any, name: str) -> list[float | None]:
    """A 1-D array as a JSON list: float64 values, NaN and +-inf as None (null)."""
    if isinstance(values, str | bytes | Mapping):
        raise SegmentError("invalid_type",
                           f"{name} must be a sequence of numbers, got {type(values).__name__}")
    try:
        array = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise SegmentError("invalid_type", f"{name} must hold numbers: {exc}") from exc
    if array.ndim != 1:
        raise SegmentError("invalid_shape",
                           f"{name} must be one-dimensional, got shape {array.shape}")
    return [float(x) if math.isfinite(x) else None for x in array.tolist()]


def _ephemeris_body(eph: Any) -> dict[str, float]:
    if isinstance(eph, Mapping):
        values = {k: eph.get(k) for k in _EPHEMERIS_KEYS}
    elif all(hasattr(eph, k) for k in ("period_days", "epoch", "duration_days")):
        values = {"period": eph.period_days, "epoch": eph.epoch, "duration": eph.duration_days}
    else:
        raise ParameterError("invalid_parameter",
                             "ephemeris must be {'period', 'epoch', 'duration'} in days or an "
                             f"Ephemeris; got {type(eph).__name__}")
    out = {}
    for key, value in values.items():
        if value is None:
            raise ParameterError("invalid_parameter", f"ephemeris has no {key!r}")
        out[key] = _number(value, f"ephemeris {key}")
    return out


def _retry_after_seconds(value: str | None) -> float | None:
    """Delay-seconds of a Retry-After header (RFC 9110 §10.2.3), or None.

    The header is either an HTTP-date or a non-negative integer of seconds; only the second
    form is honoured (an HTTP-date, or anything else, falls back to the backoff).
    """
    if value is None:
        return None
    text = value.strip()
    if not text.isdigit():
        return None
    return float(int(text))


def _error_from_response(response: httpx.Response) -> DipshapeClientError:
    status = response.status_code
    try:
        body = response.json()
    except ValueError:
        body = None
    if isinstance(body, dict) and isinstance(body.get("error"), str) and body["error"]:
        detail = body.get("detail", "")
        return DipshapeClientError(status, body["error"],
                                   detail if isinstance(detail, str) else json.dumps(detail))
    reason = response.reason_phrase or "error"
    text = _excerpt(response.text)
    return DipshapeClientError(status, f"http_{status}",
                               f"{status} {reason}" + (f": {text}" if text else ""))


def _transport_error(exc: httpx.TransportError, method: str, path: str,
                     attempts: int) -> DipshapeClientError:
    if isinstance(exc, httpx.TimeoutException):
        code = "timeout"
    elif isinstance(exc, httpx.ConnectError):
        code = "connection_error"
    else:
        code = "transport_error"
    times = "1 attempt" if attempts == 1 else f"{attempts} attempts"
    return DipshapeClientError(None, code, f"{method} {path} failed after {times}: "
                                           f"{type(exc).__name__}: {exc}")


def _excerpt(text: str) -> str:
    flat = " ".join(text.split())
    return flat if len(flat) <= _DETAIL_EXCERPT else flat[:_DETAIL_EXCERPT] + "..."


def _kind(value: Any) -> str:
    if isinstance(value, Sequence) and not isinstance(value, str):
        return f"a list of {len(value)}"
    return f"a {type(value).__name__}"
