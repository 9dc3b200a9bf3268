"""The REST scoring service (FastAPI): score segments, draw them, take labels, swap models.

:func:`create_app` builds the app from one :class:`service.settings.ServiceSettings`;
``dipshape serve`` runs it with uvicorn (:func:`app_from_env` is the factory each worker
process calls). The routes, all answering JSON unless said otherwise:

=======  ===========================  ======  =============================================
method   path                         role    what
=======  ===========================  ======  =============================================
POST     /v1/score                    score   one segment -> the result JSON
POST     /v1/score/batch              score   a list of segments -> results, in order
POST     /v1/score/file               score   an uploaded light-curve file -> results
POST     /v1/plot                     score   one segment -> diagnostic PNG
POST     /v1/labels                   label   store a labelled segment (201 after commit)
GET      /v1/labels/export            label   zip of labels.csv + segments/ for training
GET      /v1/models                   score   registry versions and the active one
GET      /v1/models/active            score   the model in use
POST     /v1/models/{version}/activate admin  make a version active (atomic)
GET      /v1/schema/result            -       the result JSON Schema
GET      /healthz, /readyz, /metrics  -       alive, model loaded, Prometheus text
=======  ===========================  ======  =============================================

Scoring is CPU-bound and runs in worker threads (``max_concurrency`` per process) off the event
loop; a working request beyond ``max_concurrency + max_queue`` in progress gets 503
``overloaded`` with ``Retry-After`` at once, before its body is read. A request whose scoring
exceeds ``request_timeout_s`` gets 504 ``timeout`` (its thread finishes in the background:
Python threads cannot be killed). Errors are always
``{"error": code, "detail": text}`` with the codes of :mod:`service.errors`; no stack trace
reaches a client.

Model swaps: each request takes the :class:`ActiveModel` in use when it starts and keeps it to
the end; activation writes the registry's ``ACTIVE`` file atomically (write, then rename) and
every worker process re-reads it at most ``active_check_s`` seconds later.
"""

from __future__ import annotations

import contextlib
import json
import logging
import tempfile
import threading
import time
from collections.abc import AsyncIterator, Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, TypeVar

import anyio
import anyio.to_thread
from fastapi import Body, FastAPI, File, Form, Query, Request, UploadFile
from fastapi.exceptions import RequestValidationError
from fastapi.middleware.cors import CORSMiddleware
from fastapi.responses import JSONResponse, Response
from pydantic import ValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException

from features.catalog import FEATURE_VERSION
from features.errors import DipshapeError
from features.io import SUPPORTED_FORMATS
from service.auth import KeyRing
from service.bodies import LabelBody, SegmentBody, to_ephemeris, to_segment
from service.errors import ServiceError, http_body, http_status
from service.metrics import CONTENT_TYPE, ServiceMetrics
from service.scoring import (
    default_registry_root,
    load_ood,
    parse_ephemeris,
    result_schema,
    score_error,
    score_path,
    score_segment_with_features,
)
from service.settings import ServiceSettings, is_loopback
from training.registry import LoadedModel, activate, active_version, list_models, load_model

__all__ = ["ActiveModel", "ModelHolder", "app_from_env", "check_bind", "create_app"]

_log = logging.getLogger(__name__)
T = TypeVar("T")

API_KEY_HEADER = "X-API-Key"


# --------------------------------------------------------------------------------------------
# The model in use
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class ActiveModel:
    """A loaded model with its out-of-distribution table: what one request scores with."""

    model: LoadedModel
    ood: Mapping[str, Any] | None

    @property
    def version(self) -> str:
        """The registry version."""
        return self.model.card.version


class ModelHolder:
    """The active model of one process, swapped atomically.

    Parameters
    ----------
    root : Path
        The registry folder.
    check_s : float
        Re-read the registry's ACTIVE file at most this often [s] (0: on every request).
    """

    def __init__(self, root: Path, *, check_s: float = 1.0) -> None:
        self.root = Path(root)
        self.check_s = float(check_s)
        self._lock = threading.Lock()
        self._current: ActiveModel | None = None
        self._checked = float("-inf")

    def _load(self, version: str | None) -> ActiveModel:
        model = load_model(self.root, version, expected_feature_version=FEATURE_VERSION)
        return ActiveModel(model=model, ood=load_ood(self.root, model.card.version))

    def load(self) -> ActiveModel:
        """Load the registry's active model now (at start-up).

        Raises
        ------
        ModelError
            Every refusal of :func:`training.registry.load_model`.
        """
        loaded = self._load(None)
        with self._lock:
            self._current = loaded
            self._checked = time.monotonic()
        return loaded

    @property
    def loaded(self) -> ActiveModel | None:
        """The model in use, or None before the first successful load."""
        return self._current

    def get(self) -> ActiveModel:
        """The model to score one request with (following an activation by another process).

        Raises
        ------
        ServiceError
            ``model_not_ready`` when no model could be loaded.
        """
        now = time.monotonic()
        if now - self._checked >= self.check_s:
            self._follow_registry(now)
        current = self._current
        if current is None:
            raise ServiceError("model_not_ready", "no model is loaded; see the service log")
        return current

    def _follow_registry(self, now: float) -> None:
        with self._lock:
            if now - self._checked < self.check_s:
                return
            self._checked = now
            try:
                version = active_version(self.root)
            except DipshapeError as err:
                _log.warning("cannot read the active version: %s", err)
                return
            current = self._current
            if version is None or (current is not None and current.version == version):
                return
            try:
                self._current = self._load(version)
                _log.info("now scoring with model %s", version)
            except DipshapeError as err:  # keep the model in use
                _log.error("cannot load the newly active model %s: %s", version, err)

    def activate(self, version: str) -> ActiveModel:
        """Verify and load ``version``, make it the registry's active one, then swap.

        Loading first means a version that fails verification is refused and nothing changes.

        Raises
        ------
        ModelError
            ``model_not_found`` and every refusal of :func:`training.registry.load_model`.
        """
        loaded = self._load(version)
        with self._lock:
            activate(self.root, version)
            self._current = loaded
            self._checked = time.monotonic()
        return loaded


# --------------------------------------------------------------------------------------------
# Running scoring off the event loop
# --------------------------------------------------------------------------------------------


class _Gate:
    """Jobs in threads, at most ``concurrency`` at once, each within ``timeout_s``.

    Refusing work beyond the queue is :class:`_Admission`'s, before any body is read.
    """

    def __init__(self, concurrency: int, timeout_s: float):
        self.limiter = anyio.CapacityLimiter(concurrency)
        self.timeout_s = timeout_s

    async def run(self, fn: Callable[..., T], *args: Any) -> T:
        try:
            with anyio.fail_after(self.timeout_s):
                return await anyio.to_thread.run_sync(fn, *args, limiter=self.limiter,
                                                      abandon_on_cancel=True)
        except TimeoutError:
            raise ServiceError("timeout", f"scoring took longer than {self.timeout_s:g} s "
                               "(the request time limit)") from None


_ADMITTED_ROUTES = frozenset({"/v1/score", "/v1/score/batch", "/v1/score/file", "/v1/plot",
                              "/v1/labels"})
"""POST routes whose work goes through the gate, so they are admitted (or refused) first."""


class _Admission:
    """Pure ASGI: refuse work beyond ``concurrency + queue`` before reading any body.

    A request counts from its start to the end of its response, so bodies still being read
    are counted too, and a refusal costs neither an upload nor a parse.
    """

    def __init__(self, app: Any, capacity: int, retry_after_s: int) -> None:
        self.app = app
        self.capacity = capacity
        self.retry_after_s = retry_after_s
        self.in_flight = 0

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] != "http" or scope.get("method") != "POST" \
                or scope.get("path") not in _ADMITTED_ROUTES:
            await self.app(scope, receive, send)
            return
        if self.in_flight >= self.capacity:
            err = ServiceError("overloaded", f"{self.in_flight} requests are in progress or "
                               f"waiting; retry after {self.retry_after_s} s")
            body = json.dumps(http_body(err)).encode()
            await send({"type": "http.response.start", "status": http_status(err), "headers": [
                (b"content-type", b"application/json"),
                (b"content-length", str(len(body)).encode()),
                (b"retry-after", str(self.retry_after_s).encode())]})
            await send({"type": "http.response.body", "body": body})
            return
        self.in_flight += 1
        try:
            await self.app(scope, receive, send)
        finally:
            self.in_flight -= 1


# --------------------------------------------------------------------------------------------
# The app
# --------------------------------------------------------------------------------------------


@dataclass
class _State:
    settings: ServiceSettings
    keys: KeyRing
    holder: ModelHolder
    gate: _Gate
    metrics: ServiceMetrics
    store: Any = None  # service.store.LabelStore, opened in the lifespan


def check_bind(settings: ServiceSettings) -> KeyRing:
    """Refuse to listen beyond loopback with no API keys configured.

    Returns
    -------
    KeyRing
        The configured keys.

    Raises
    ------
    ServiceError
        ``open_bind_refused`` for a non-loopback host and no keys.
    ParameterError
        ``invalid_keys`` for a malformed keys file or ``DIPSHAPE_API_KEYS``.
    """
    keys = KeyRing.load(settings.keys_file, settings.api_keys)
    if keys.open and not is_loopback(settings.host):
        raise ServiceError("open_bind_refused", f"no API keys are configured, so the service "
                           f"only listens on loopback (127.0.0.1 or ::1), not {settings.host!r}; "
                           "add keys with --keys-file or DIPSHAPE_API_KEYS")
    return keys


def app_from_env() -> FastAPI:
    """The app configured from the environment (the factory uvicorn workers call)."""
    return create_app(ServiceSettings())


def create_app(settings: ServiceSettings | None = None) -> FastAPI:
    """Build the REST service.

    Parameters
    ----------
    settings : ServiceSettings, optional
        Default: read from the environment.

    Returns
    -------
    fastapi.FastAPI

    Raises
    ------
    ParameterError
        ``invalid_keys`` for a malformed keys file.
    """
    settings = settings or ServiceSettings()
    keys = KeyRing.load(settings.keys_file, settings.api_keys)
    root = settings.registry or default_registry_root()
    state = _State(
        settings=settings, keys=keys, holder=ModelHolder(root, check_s=settings.active_check_s),
        gate=_Gate(settings.max_concurrency, settings.request_timeout_s),
        metrics=ServiceMetrics(),
    )

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        from service.store import LabelStore

        try:
            loaded = await anyio.to_thread.run_sync(state.holder.load)
            state.metrics.set_model(loaded.model.card.name, loaded.version)
            _log.info("scoring with model %s from %s", loaded.version, root)
        except DipshapeError as err:
            _log.error("no model loaded from %s: %s", root, err)
        state.store = LabelStore(settings.db)
        try:
            yield
        finally:
            state.store.close()

    app = _App(
        title="dipshape",
        version="1",
        summary="Shape-based triage of dips in stellar light curves.",
        description=(
            "Scores light-curve segments as planet, eclipsing_binary, exocomet, variability "
            "or systematic with calibrated probabilities. A score is triage, not a discovery: "
            "a planet or exocomet call needs follow-up (pixel-level and centroid checks, "
            "spectroscopy) before any claim."),
        lifespan=lifespan,
        max_body_size=settings.max_body_bytes,
    )
    app.state.dipshape = state
    if settings.cors_origins:
        app.add_middleware(CORSMiddleware, allow_origins=settings.cors_origins,
                           allow_methods=["GET", "POST"], allow_headers=[API_KEY_HEADER,
                                                                         "Content-Type"])
    _add_error_handlers(app, state)
    # inside the metrics, so refusals are counted
    app.add_middleware(_Admission, capacity=settings.max_concurrency + settings.max_queue,
                       retry_after_s=settings.retry_after_s)
    _add_metrics_middleware(app, state)
    _add_routes(app, state)
    return app


class _App(FastAPI):
    """FastAPI whose framework body-limit answer (plain text) becomes our JSON error."""

    def build_middleware_stack(self) -> Any:
        return _JsonTooLarge(super().build_middleware_stack(), self.max_body_size)


class _JsonTooLarge:
    """Outermost ASGI wrapper: rewrite the body-limit middleware's plain 413 as JSON."""

    def __init__(self, app: Any, limit: int | None) -> None:
        self.app = app
        self.body = json.dumps({"error": "body_too_large", "detail": f"the request body is "
                                f"larger than {limit} bytes"}).encode()

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        rewriting = False

        async def send_json(message: Any) -> None:
            nonlocal rewriting
            if message["type"] == "http.response.start" and message["status"] == 413:
                headers = dict(message.get("headers", []))
                if not headers.get(b"content-type", b"").startswith(b"application/json"):
                    rewriting = True
                    await send({"type": "http.response.start", "status": 413, "headers": [
                        (b"content-type", b"application/json"),
                        (b"content-length", str(len(self.body)).encode())]})
                    await send({"type": "http.response.body", "body": self.body})
                    return
            if rewriting:
                return
            await send(message)

        await self.app(scope, receive, send_json)


def _error_response(err: DipshapeError, state: _State) -> JSONResponse:
    status = http_status(err)
    headers = {"Retry-After": str(state.settings.retry_after_s)} if status == 503 else None
    return JSONResponse(http_body(err), status_code=status, headers=headers)


def _validation_detail(errors: list[dict[str, Any]]) -> str:
    parts = []
    for e in errors[:5]:
        loc = ".".join(str(x) for x in e.get("loc", ()) if x != "body") or "body"
        parts.append(f"{loc}: {e.get('msg', 'invalid')}")
    more = f" (and {len(errors) - 5} more)" if len(errors) > 5 else ""
    return "; ".join(parts) + more


def _add_error_handlers(app: FastAPI, state: _State) -> None:
    @app.exception_handler(DipshapeError)
    async def _dipshape_error(request: Request, exc: DipshapeError) -> JSONResponse:
        return _error_response(exc, state)

    @app.exception_handler(RequestValidationError)
    async def _invalid(request: Request, exc: RequestValidationError) -> JSONResponse:
        errors = list(exc.errors())
        if any(e.get("type") == "json_invalid" for e in errors):
            return _error_response(ServiceError(
                "invalid_json", "the body is not valid JSON (NaN and Infinity are not JSON; "
                "use null for a missing point)"), state)
        return _error_response(ServiceError("invalid_request", _validation_detail(errors)),
                               state)

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        code = {404: "not_found", 405: "method_not_allowed", 413: "body_too_large",
                415: "unsupported_media_type"}.get(exc.status_code, f"http_{exc.status_code}")
        detail = {413: f"the request body is larger than {state.settings.max_body_bytes} "
                       "bytes", 404: f"no route {request.url.path}"}.get(
            exc.status_code, str(exc.detail))
        return JSONResponse({"error": code, "detail": detail}, status_code=exc.status_code,
                            headers=getattr(exc, "headers", None))

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception) -> JSONResponse:
        _log.exception("unexpected failure on %s %s", request.method, request.url.path)
        return JSONResponse({"error": "internal_error",
                             "detail": "an unexpected error; it has been logged"},
                            status_code=500)


def _add_metrics_middleware(app: FastAPI, state: _State) -> None:
    @app.middleware("http")
    async def _observe(request: Request, call_next: Callable[[Request], Any]) -> Response:
        start = time.perf_counter()
        status = 500
        try:
            response = await call_next(request)
            status = response.status_code
            return response
        finally:
            route = request.scope.get("route")
            path = getattr(route, "path", None) or (
                request.url.path if request.url.path in _ADMITTED_ROUTES else "unmatched")
            state.metrics.observe_request(path, request.method, status,
                                          time.perf_counter() - start)


def _add_routes(app: FastAPI, state: _State) -> None:
    settings = state.settings

    def need(request: Request, role: str) -> None:
        state.keys.authorise(request.headers.get(API_KEY_HEADER), role)

    def score_one(active: ActiveModel, body: SegmentBody) -> dict[str, Any]:
        segment = to_segment(body, max_points=settings.max_points)
        result, _ = score_segment_with_features(segment, active.model,
                                                ephemeris=to_ephemeris(body.ephemeris),
                                                ood=active.ood)
        return result.to_dict()

    def count(results: list[dict[str, Any]]) -> None:
        for r in results:
            state.metrics.observe_score(r.get("label") or f"error:{r.get('error')}")
        if settings.score_log and state.store is not None:
            for r in results:
                state.store.log_score(r)

    @app.get("/healthz", tags=["health"])
    async def healthz() -> dict[str, str]:
        """The process is alive."""
        return {"status": "ok"}

    @app.get("/readyz", tags=["health"])
    async def readyz() -> JSONResponse:
        """A model is loaded and scoring can start (503 otherwise)."""
        loaded = state.holder.loaded
        if loaded is None:
            return JSONResponse({"error": "model_not_ready", "detail": "no model is loaded"},
                                status_code=503, headers={"Retry-After": "5"})
        return JSONResponse({"status": "ready", "model": loaded.version})

    @app.get("/metrics", tags=["health"])
    async def metrics() -> Response:
        """Prometheus text: requests, latency, scores by label, the active model."""
        loaded = state.holder.loaded
        if loaded is not None:
            state.metrics.set_model(loaded.model.card.name, loaded.version)
        return Response(state.metrics.render(), media_type=CONTENT_TYPE)

    @app.get("/v1/schema/result", tags=["scoring"])
    async def schema() -> dict[str, Any]:
        """The JSON Schema of a result (and of an error object in place of a result)."""
        return result_schema()

    @app.post("/v1/score", tags=["scoring"])
    async def score(request: Request, body: SegmentBody) -> JSONResponse:
        """Score one segment; the answer is the result JSON, as `dipshape score` writes it."""
        need(request, "score")
        active = state.holder.get()
        result = await state.gate.run(score_one, active, body)
        count([result])
        return JSONResponse(result)

    @app.post("/v1/score/batch", tags=["scoring"])
    async def score_batch(
        request: Request,
        items: Annotated[list[Any], Body(description="Segment objects as for /v1/score.")],
    ) -> JSONResponse:
        """Score a list of segments: results in input order, an error object for a bad item."""
        need(request, "score")
        if len(items) > settings.max_batch:
            raise ServiceError("batch_too_large", f"{len(items)} segments in one batch; the "
                               f"limit is {settings.max_batch}")
        active = state.holder.get()

        def run() -> list[dict[str, Any]]:
            out = []
            for i, item in enumerate(items):
                fallback = f"item-{i}"
                item_id = item.get("id") if isinstance(item, dict) else None
                item_id = item_id if isinstance(item_id, str) and item_id else fallback
                try:
                    body = SegmentBody.model_validate(item)
                    out.append(score_one(active, body))
                except ValidationError as exc:
                    out.append(score_error(item_id, ServiceError(
                        "invalid_request", _validation_detail(list(exc.errors())))))
                except DipshapeError as err:
                    if http_status(err) >= 500:
                        raise
                    out.append(score_error(item_id, err))
            return out

        results = await state.gate.run(run)
        count(results)
        return JSONResponse(results)

    @app.post("/v1/score/file", tags=["scoring"])
    async def score_file(
        request: Request,
        file: Annotated[UploadFile, File(description="A CSV, JSON or FITS light curve.")],
        ephemeris: Annotated[str | None, Form(description="PERIOD,EPOCH,DURATION [days].")]
        = None,
    ) -> JSONResponse:
        """Score an uploaded light-curve file: one result (or error) object per segment."""
        need(request, "score")
        name = Path(file.filename or "").name
        suffixes = tuple(x for group in SUPPORTED_FORMATS.values() for x in group)
        if not name or name.startswith(".") or not name.lower().endswith(suffixes):
            raise ServiceError("unsupported_media_type", f"{name!r}: the file name must end "
                               f"in one of {', '.join(suffixes)}")
        eph = parse_ephemeris(ephemeris) if ephemeris else None
        data = await file.read()
        active = state.holder.get()

        def run() -> list[dict[str, Any]]:
            with tempfile.TemporaryDirectory(prefix="dipshape-upload-") as tmp:
                path = Path(tmp) / name
                path.write_bytes(data)
                return score_path(path, active.model, ephemeris=eph, ood=active.ood,
                                  max_points=settings.max_points)

        results = await state.gate.run(run)
        count(results)
        return JSONResponse(results)

    @app.post("/v1/plot", tags=["scoring"],
              responses={200: {"content": {"image/png": {}}, "description": "A PNG image."}})
    async def plot(
        request: Request,
        body: SegmentBody,
        width: Annotated[int, Query(ge=300, le=4000, description="Width [px].")] = 1200,
        height: Annotated[int, Query(ge=300, le=4000, description="Height [px].")] = 900,
    ) -> Response:
        """The diagnostic plot of a segment: events, shape fits, fold and probabilities."""
        need(request, "score")
        active = state.holder.get()

        def run() -> tuple[bytes, str]:
            from service.plots import diagnostic_png

            segment = to_segment(body, max_points=settings.max_points)
            result, feats = score_segment_with_features(
                segment, active.model, ephemeris=to_ephemeris(body.ephemeris), ood=active.ood)
            return (diagnostic_png(segment, feats, result.to_dict(), width_px=width,
                                   height_px=height), result.label)

        png, label = await state.gate.run(run)
        state.metrics.observe_score(label)
        return Response(png, media_type="image/png")

    @app.post("/v1/labels", tags=["labels"], status_code=201)
    async def submit_label(request: Request, body: LabelBody) -> JSONResponse:
        """Store a labelled segment; answered only after the store has committed it."""
        need(request, "label")

        def run() -> dict[str, Any]:
            segment = to_segment(body.segment, max_points=settings.max_points,
                                 id_required=True)
            stored = state.store.add_label(segment, body.label, note=body.note,
                                           submitter=body.submitter)
            return {"label_id": stored.label_id, "id": stored.id, "label": stored.label,
                    "created_utc": stored.created_utc}

        return JSONResponse(await state.gate.run(run), status_code=201)

    @app.get("/v1/labels/export", tags=["labels"],
             responses={200: {"content": {"application/zip": {}},
                              "description": "labels.csv and segments/<id>.csv"}})
    async def export_labels(request: Request) -> Response:
        """Every label (the latest per id) as a zip that `dipshape train --labels labels.csv
        --segments segments` reads once unpacked."""
        need(request, "label")
        data = await anyio.to_thread.run_sync(state.store.export_zip)
        return Response(data, media_type="application/zip", headers={
            "Content-Disposition": 'attachment; filename="dipshape-labels.zip"'})

    @app.get("/v1/models", tags=["models"])
    async def models(request: Request) -> dict[str, Any]:
        """The registry's versions, newest last, and the active one."""
        need(request, "score")

        def run() -> dict[str, Any]:
            cards = list_models(state.holder.root)
            return {"active": active_version(state.holder.root),
                    "models": [_card_summary(c) for c in cards]}

        return await anyio.to_thread.run_sync(run)

    @app.get("/v1/models/active", tags=["models"])
    async def active_model(request: Request) -> dict[str, Any]:
        """The model this process scores with."""
        need(request, "score")
        active = state.holder.get()
        card = active.model.card
        return {"name": card.name, "version": card.version, "sha256": active.model.sha256,
                "classes": list(card.classes), "feature_version": card.feature_version}

    @app.post("/v1/models/{version}/activate", tags=["models"])
    async def activate_model(request: Request, version: str) -> dict[str, Any]:
        """Make a version active for every worker; requests in flight finish on their model."""
        need(request, "admin")
        loaded = await anyio.to_thread.run_sync(state.holder.activate, version)
        state.metrics.set_model(loaded.model.card.name, loaded.version)
        return {"active": loaded.version}


def _card_summary(card: Any) -> dict[str, Any]:
    out: dict[str, Any] = {"name": card.name, "version": card.version,
                           "created_utc": card.created_utc, "classes": list(card.classes),
                           "feature_version": card.feature_version}
    for m in (card.metrics or {}).get("models", []):
        if m.get("name") == "calibrated":
            out["macro_f1"] = m.get("macro_f1")
            out["ece"] = m.get("ece")
    return out
