"""The Python client: what it sends, how it retries, how it maps errors, the alert stream.

The service is replaced by ``httpx.MockTransport`` (a fake transport passed in, as httpx's own
tests do), so every request the client makes can be inspected and every answer scripted.
References outside the project, named beside each check:

- RFC 9110 (HTTP Semantics): §15.6.4 503 Service Unavailable, §10.2.3 Retry-After
  (delay-seconds or an HTTP-date), §9.2.2 idempotent methods (a client should not retry a
  non-idempotent request automatically);
- RFC 8259 (JSON): no NaN or Infinity, checked with Python's strict parser;
- RFC 7578 (multipart/form-data), parsed with the standard library's ``email`` parser;
- the PNG specification (W3C, 2003, §5.2 signature), a real PNG written by matplotlib;
- the ZIP format (PKWARE APPNOTE), a real archive written by ``zipfile``.
"""

from __future__ import annotations

import email.parser
import email.policy
import io
import json
import math
import zipfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

import service.client as client_module
from features.errors import DipshapeError, FileFormatError, ParameterError, SegmentError
from features.events import Ephemeris
from features.segment import make_segment
from service.client import (
    API_KEY_HEADER,
    BATCH_CHUNK,
    MAX_RETRY_DELAY_S,
    DipshapeClient,
    DipshapeClientError,
    enrich_stream,
)

BASE = "http://127.0.0.1:8000"


# --------------------------------------------------------------------------------------------
# A scripted stand-in for the service
# --------------------------------------------------------------------------------------------


def _result(seg_id: str, label: str = "planet") -> dict[str, Any]:
    """A stand-in answer shaped like a result of service/result.schema.json."""
    classes = ("planet", "eclipsing_binary", "exocomet", "variability", "systematic")
    probabilities = {c: (0.8 if c == label else 0.05) for c in classes}
    return {"schema_version": "1", "id": seg_id, "label": label,
            "probabilities": probabilities, "flags": [], "features": {"skewness": 0.1},
            "events": [], "ephemeris": None,
            "model": {"name": "default", "version": "default-v1", "sha256": "0" * 64},
            "elapsed_ms": 3.0}


def _strict_loads(data: bytes) -> Any:
    """RFC 8259 JSON: NaN and Infinity are not JSON, so the parser must refuse them."""
    def refuse(name: str) -> Any:
        raise AssertionError(f"{name} sent on the wire: not JSON (RFC 8259)")
    return json.loads(data, parse_constant=refuse)


class FakeService:
    """Records every request; answers with ``script`` (one entry per attempt) or ``default``.

    A script entry is an ``httpx.Response``, an exception instance to raise (a transport
    failure), or a callable ``request -> Response``.
    """

    def __init__(self, *script: Any, default: Callable[[httpx.Request], httpx.Response]
                 | None = None) -> None:
        self.script = list(script)
        self.default = default
        self.requests: list[httpx.Request] = []
        self.sleeps: list[float] = []

    def __call__(self, request: httpx.Request) -> httpx.Response:
        self.requests.append(request)
        entry = self.script.pop(0) if self.script else self.default
        if entry is None:
            raise AssertionError(f"unexpected request {request.method} {request.url}")
        if isinstance(entry, BaseException):
            raise entry
        if callable(entry):
            return entry(request)
        return entry

    def client(self, **kwargs: Any) -> DipshapeClient:
        kwargs.setdefault("sleep", self.sleeps.append)
        return DipshapeClient(BASE, transport=httpx.MockTransport(self), **kwargs)

    @property
    def attempts(self) -> int:
        return len(self.requests)

    def body(self, i: int = -1) -> Any:
        return _strict_loads(self.requests[i].content)


def _echo_score(request: httpx.Request) -> httpx.Response:
    body = _strict_loads(request.content)
    return httpx.Response(200, json=_result(body.get("id", "anonymous")))


def _error(status: int, code: str, detail: str = "", **headers: str) -> httpx.Response:
    return httpx.Response(status, json={"error": code, "detail": detail}, headers=headers)


# --------------------------------------------------------------------------------------------
# The public surface
# --------------------------------------------------------------------------------------------


def test_module_exports_exactly_its_public_surface():
    assert sorted(client_module.__all__) == sorted(
        ["API_KEY_HEADER", "BATCH_CHUNK", "MAX_RETRY_DELAY_S", "DipshapeClient",
         "DipshapeClientError", "enrich_stream"])


def test_client_error_is_a_dipshape_error_carrying_the_status():
    err = DipshapeClientError(422, "too_few_points", "fewer than 20 points")
    assert isinstance(err, DipshapeError)
    assert (err.status, err.code, err.detail) == (422, "too_few_points", "fewer than 20 points")
    assert err.to_dict() == {"error": "too_few_points", "detail": "fewer than 20 points",
                             "status": 422}


def test_context_manager_closes_the_connection_pool():
    fake = FakeService()
    with fake.client() as client:
        assert not client._http.is_closed
    assert client._http.is_closed


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"base_url": "ftp://127.0.0.1"}, "http:// or https://"),
        ({"base_url": "127.0.0.1:8000"}, "http:// or https://"),
        ({"base_url": 8000}, "base_url must be a string"),
        ({"timeout_s": 0}, "timeout_s must be > 0"),
        ({"timeout_s": math.nan}, "timeout_s must be a finite number"),
        ({"retries": -1}, "retries must be an integer >= 0"),
        ({"retries": 1.5}, "retries must be an integer >= 0"),
        ({"retries": True}, "retries must be an integer >= 0"),
        ({"backoff_s": -0.1}, "backoff_s must be >= 0"),
        ({"api_key": ""}, "api_key must be a non-empty string"),
        ({"sleep": 3}, "sleep must be callable"),
    ],
)
def test_bad_constructor_arguments_are_refused_by_name(kwargs, message):
    kwargs = {"base_url": BASE, **kwargs}
    with pytest.raises(ParameterError, match=message) as info:
        DipshapeClient(kwargs.pop("base_url"), **kwargs)
    assert info.value.code == "invalid_parameter"


# --------------------------------------------------------------------------------------------
# What is sent
# --------------------------------------------------------------------------------------------


def test_score_posts_the_segment_as_strict_json_to_v1_score():
    fake = FakeService(default=_echo_score)
    time = np.linspace(1000.0, 1001.0, 5)
    flux = np.array([1.0, np.nan, 0.99, np.inf, -np.inf])
    with fake.client() as client:
        result = client.score(time, flux, np.full(5, 1e-3), id="LS-0042-s3",
                              ephemeris={"period": 3.1, "epoch": 1000.5, "duration": 0.1})
    request = fake.requests[0]
    assert (request.method, request.url.path) == ("POST", "/v1/score")
    assert request.headers["content-type"] == "application/json"
    body = fake.body()  # RFC 8259: parsed without NaN/Infinity
    assert body["id"] == "LS-0042-s3"
    assert body["time"] == pytest.approx(time.tolist())
    assert body["flux"] == [1.0, None, 0.99, None, None]  # NaN and +-inf become null
    assert body["flux_err"] == [1e-3] * 5
    assert body["ephemeris"] == {"period": 3.1, "epoch": 1000.5, "duration": 0.1}
    assert result["id"] == "LS-0042-s3" and result["label"] == "planet"


def test_score_omits_what_is_not_given_and_accepts_plain_lists_with_none():
    fake = FakeService(default=_echo_score)
    with fake.client() as client:
        client.score([0.0, 0.1, 0.2], [1.0, None, 1.0])
    assert fake.body() == {"time": [0.0, 0.1, 0.2], "flux": [1.0, None, 1.0]}


def test_an_ephemeris_object_is_sent_in_the_wire_names():
    fake = FakeService(default=_echo_score)
    with fake.client() as client:
        client.score([0.0, 0.1], [1.0, 1.0],
                     ephemeris=Ephemeris(period_days=2.5, epoch=0.05, duration_days=0.1))
    assert fake.body()["ephemeris"] == {"period": 2.5, "epoch": 0.05, "duration": 0.1}


def test_a_segment_object_is_sent_without_its_estimated_errors():
    rng = np.random.default_rng(1)
    t = np.arange(40) * 0.02
    given = make_segment(t, 1.0 + 1e-3 * rng.standard_normal(40), np.full(40, 1e-3), id="a")
    estimated = make_segment(t, 1.0 + 1e-3 * rng.standard_normal(40), id="b")
    fake = FakeService(default=_echo_score)
    with fake.client() as client:
        client.score_segment(given)
        client.score_segment(estimated)
    sent_given, sent_estimated = fake.body(0), fake.body(1)
    assert sent_given["id"] == "a" and sent_given["flux"] == pytest.approx(given.flux.tolist())
    assert sent_given["flux_err"] == pytest.approx(given.flux_err.tolist())
    assert "flux_err" not in sent_estimated  # the service estimates them again


def test_the_api_key_travels_in_the_x_api_key_header_and_only_when_given():
    fake = FakeService(default=_echo_score)
    with fake.client(api_key="s3cret-score") as client:
        client.score([0.0, 0.1], [1.0, 1.0])
    with fake.client() as client:
        client.score([0.0, 0.1], [1.0, 1.0])
    assert fake.requests[0].headers[API_KEY_HEADER] == "s3cret-score"
    assert API_KEY_HEADER not in fake.requests[1].headers


@pytest.mark.parametrize(
    ("segment", "code"),
    [
        ({"time": [[0.0, 1.0]], "flux": [[1.0, 1.0]]}, "invalid_shape"),
        ({"time": [0.0, 1.0], "flux": ["a", "b"]}, "invalid_type"),
        ({"time": "0,1", "flux": [1.0, 1.0]}, "invalid_type"),
        ({"time": [0.0, 1.0, 2.0], "flux": [1.0, 1.0]}, "length_mismatch"),
        ({"time": [0.0, 1.0], "flux": [1.0, 1.0], "flux_err": [1.0]}, "length_mismatch"),
        ({"time": [0.0, 1.0]}, "missing_columns"),
        ({"id": "", "time": [0.0, 1.0], "flux": [1.0, 1.0]}, "invalid_id"),
        ({"id": 42, "time": [0.0, 1.0], "flux": [1.0, 1.0]}, "invalid_id"),
        ([0.0, 1.0], "invalid_type"),
    ],
)
def test_a_segment_that_cannot_be_sent_is_refused_before_any_request(segment, code):
    fake = FakeService()
    with fake.client() as client, pytest.raises(SegmentError) as info:
        client.score_segment(segment)
    assert info.value.code == code
    assert fake.attempts == 0


@pytest.mark.parametrize(
    ("ephemeris", "message"),
    [
        ({"period": 3.0, "epoch": 1.0}, "ephemeris has no 'duration'"),
        ({"period": math.nan, "epoch": 1.0, "duration": 0.1}, "ephemeris period"),
        ("3,1,0.1", "ephemeris must be"),
    ],
)
def test_a_malformed_ephemeris_is_refused_before_any_request(ephemeris, message):
    fake = FakeService()
    with fake.client() as client, pytest.raises(ParameterError, match=message):
        client.score([0.0, 1.0], [1.0, 1.0], ephemeris=ephemeris)
    assert fake.attempts == 0


def test_score_batch_keeps_the_order_and_error_objects_in_place():
    def answer(request: httpx.Request) -> httpx.Response:
        items = _strict_loads(request.content)
        out = [_result(it["id"]) if len(it["time"]) > 2 else
               {"schema_version": "1", "id": it["id"], "error": "too_few_points",
                "detail": "fewer than 20 finite points"} for it in items]
        return httpx.Response(200, json=out)

    fake = FakeService(default=answer)
    segments = [{"id": f"LS-{i:04d}", "time": [0.0, 0.1, 0.2][: 3 - (i == 1)],
                 "flux": [1.0, 1.0, 1.0][: 3 - (i == 1)]} for i in range(3)]
    with fake.client() as client:
        results = client.score_batch(segments)
    assert fake.requests[0].url.path == "/v1/score/batch"
    assert [r["id"] for r in results] == ["LS-0000", "LS-0001", "LS-0002"]
    assert results[1]["error"] == "too_few_points" and "label" in results[2]


def test_score_batch_splits_long_batches_into_requests_of_the_service_limit():
    def answer(request: httpx.Request) -> httpx.Response:
        return httpx.Response(200, json=[_result(it["id"]) for it in
                                         _strict_loads(request.content)])

    fake = FakeService(default=answer)
    n = BATCH_CHUNK + 44
    segments = [{"id": f"s{i}", "time": [0.0, 0.1], "flux": [1.0, 1.0]} for i in range(n)]
    with fake.client() as client:
        results = client.score_batch(segments)
    assert [len(fake.body(i)) for i in range(fake.attempts)] == [BATCH_CHUNK, 44]
    assert [r["id"] for r in results] == [f"s{i}" for i in range(n)]


def test_score_batch_names_the_position_of_a_segment_that_cannot_be_sent():
    fake = FakeService()
    segments = [{"time": [0.0, 0.1], "flux": [1.0, 1.0]}, {"time": [0.0], "flux": [1.0, 1.0]}]
    with fake.client() as client, pytest.raises(SegmentError, match="segment 1") as info:
        client.score_batch(segments)
    assert info.value.code == "length_mismatch" and fake.attempts == 0


def test_score_batch_refuses_an_answer_of_the_wrong_length():
    fake = FakeService(httpx.Response(200, json=[]))
    with fake.client() as client, pytest.raises(DipshapeClientError) as info:
        client.score_batch([{"time": [0.0, 0.1], "flux": [1.0, 1.0]}])
    assert info.value.code == "invalid_response"


def test_score_file_uploads_a_multipart_form_with_the_file_and_the_ephemeris(tmp_path: Path):
    path = tmp_path / "LS-0042-s3.csv"
    path.write_text("time,flux,flux_err\n0.0,1.0,0.001\n0.1,0.99,0.001\n")
    fake = FakeService(httpx.Response(200, json=[_result("LS-0042-s3")]))
    with fake.client() as client:
        results = client.score_file(path, ephemeris="3.1,1000.5,0.1")
    request = fake.requests[0]
    assert (request.method, request.url.path) == ("POST", "/v1/score/file")
    # RFC 7578 multipart/form-data, parsed by the standard library's MIME parser
    message = email.parser.BytesParser(policy=email.policy.HTTP).parsebytes(
        b"Content-Type: " + request.headers["content-type"].encode() + b"\r\n\r\n"
        + request.content)
    assert message.is_multipart()
    parts = {p.get_param("name", header="content-disposition"): p for p in message.iter_parts()}
    assert parts["file"].get_filename() == "LS-0042-s3.csv"
    assert parts["file"].get_payload(decode=True) == path.read_bytes()
    assert parts["ephemeris"].get_payload(decode=True) == b"3.1,1000.5,0.1"
    assert results == [_result("LS-0042-s3")]


def test_score_file_refuses_a_missing_local_file_without_a_request(tmp_path: Path):
    fake = FakeService()
    with fake.client() as client, pytest.raises(FileFormatError) as info:
        client.score_file(tmp_path / "absent.fits")
    assert info.value.code == "file_not_found" and fake.attempts == 0


def test_plot_returns_the_png_bytes_and_sends_the_size(tmp_path: Path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    buffer = io.BytesIO()
    plt.imsave(buffer, np.zeros((4, 6)), format="png")  # a real PNG file
    png = buffer.getvalue()
    fake = FakeService(httpx.Response(200, content=png, headers={"content-type": "image/png"}))
    with fake.client() as client:
        got = client.plot({"id": "LS-0042-s3", "time": [0.0, 0.1], "flux": [1.0, 1.0]},
                          width=640, height=480)
    request = fake.requests[0]
    assert got == png and got[:8] == b"\x89PNG\r\n\x1a\n"  # PNG specification §5.2
    assert (request.method, request.url.path) == ("POST", "/v1/plot")
    assert dict(request.url.params) == {"width": "640", "height": "480"}
    assert request.headers["accept"] == "image/png"
    assert fake.body()["id"] == "LS-0042-s3"


def test_plot_refuses_a_body_that_is_not_a_png():
    fake = FakeService(httpx.Response(200, json={"status": "ok"}))
    with fake.client() as client, pytest.raises(DipshapeClientError) as info:
        client.plot({"time": [0.0, 0.1], "flux": [1.0, 1.0]})
    assert info.value.code == "invalid_response"


@pytest.mark.parametrize(("width", "height"), [(0, 900), (1200, -1), (12.5, 900), (True, 900)])
def test_plot_refuses_a_size_that_is_not_a_positive_integer(width, height):
    fake = FakeService()
    with fake.client() as client, pytest.raises(ParameterError, match="positive integer"):
        client.plot({"time": [0.0, 0.1], "flux": [1.0, 1.0]}, width=width, height=height)
    assert fake.attempts == 0


def test_submit_label_posts_segment_label_note_and_submitter():
    answer = {"label_id": 7, "id": "LS-0042-s3", "label": "eclipsing_binary",
              "created_utc": "2026-12-02T03:00:00Z"}
    fake = FakeService(httpx.Response(201, json=answer))
    with fake.client(api_key="k-label") as client:
        got = client.submit_label({"id": "LS-0042-s3", "time": [0.0, 0.1], "flux": [1.0, 0.9]},
                                  "eclipsing_binary", note="secondary at phase 0.5",
                                  submitter="vetter-3")
    request = fake.requests[0]
    assert (request.method, request.url.path) == ("POST", "/v1/labels")
    assert fake.body() == {"segment": {"id": "LS-0042-s3", "time": [0.0, 0.1],
                                       "flux": [1.0, 0.9]},
                           "label": "eclipsing_binary", "note": "secondary at phase 0.5",
                           "submitter": "vetter-3"}
    assert request.headers[API_KEY_HEADER] == "k-label"
    assert got == answer  # 201 Created is a success (RFC 9110 §15.3.2)


@pytest.mark.parametrize(
    ("segment", "label", "kwargs", "error", "code"),
    [
        ({"time": [0.0], "flux": [1.0]}, "planet", {}, SegmentError, "invalid_id"),
        ({"id": "a", "time": [0.0], "flux": [1.0]}, "", {}, ParameterError,
         "invalid_parameter"),
        ({"id": "a", "time": [0.0], "flux": [1.0]}, "planet", {"note": 3}, ParameterError,
         "invalid_parameter"),
    ],
)
def test_submit_label_refuses_what_the_service_would_refuse(segment, label, kwargs, error, code):
    fake = FakeService()
    with fake.client() as client, pytest.raises(error) as info:
        client.submit_label(segment, label, **kwargs)
    assert info.value.code == code and fake.attempts == 0


def test_export_labels_returns_the_zip_archive():
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:  # a real archive (PKWARE APPNOTE format)
        archive.writestr("labels.csv", "id,label\nLS-0042-s3,planet\n")
    fake = FakeService(httpx.Response(200, content=buffer.getvalue(),
                                      headers={"content-type": "application/zip"}))
    with fake.client() as client:
        data = client.export_labels()
    assert (fake.requests[0].method, fake.requests[0].url.path) == ("GET", "/v1/labels/export")
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        assert archive.read("labels.csv").startswith(b"id,label")


def test_export_labels_refuses_a_body_that_is_not_a_zip():
    fake = FakeService(httpx.Response(200, content=b"id,label\n"))
    with fake.client() as client, pytest.raises(DipshapeClientError) as info:
        client.export_labels()
    assert info.value.code == "invalid_response"


def test_model_routes():
    listing = {"active": "default-v1", "models": [{"version": "default-v0"},
                                                  {"version": "default-v1"}]}
    active = {"name": "default", "version": "default-v1", "sha256": "0" * 64,
              "classes": ["planet"], "feature_version": "1"}
    fake = FakeService(httpx.Response(200, json=listing), httpx.Response(200, json=active),
                       httpx.Response(200, json={"active": "default-v0"}))
    with fake.client(api_key="k-admin") as client:
        assert client.models() == listing
        assert client.active_model() == active
        assert client.activate("default-v0") == {"active": "default-v0"}
    assert [(r.method, r.url.path) for r in fake.requests] == [
        ("GET", "/v1/models"), ("GET", "/v1/models/active"),
        ("POST", "/v1/models/default-v0/activate")]


@pytest.mark.parametrize("version", ["", "../models", ".."])
def test_activate_refuses_a_version_that_is_not_a_plain_name(version):
    fake = FakeService()
    with fake.client() as client, pytest.raises(ParameterError, match="plain version name"):
        client.activate(version)
    assert fake.attempts == 0


def test_a_success_that_is_not_json_is_an_invalid_response():
    fake = FakeService(httpx.Response(200, text="<html>proxy</html>"))
    with fake.client() as client, pytest.raises(DipshapeClientError) as info:
        client.models()
    assert (info.value.status, info.value.code) == (200, "invalid_response")


# --------------------------------------------------------------------------------------------
# Probes
# --------------------------------------------------------------------------------------------


def test_health_and_ready_report_the_probes():
    fake = FakeService(httpx.Response(200, json={"status": "ok"}),
                       httpx.Response(200, json={"status": "ready", "model": "default-v1"}))
    with fake.client() as client:
        assert client.health() is True
        assert client.ready() is True
    assert [r.url.path for r in fake.requests] == ["/healthz", "/readyz"]


def test_ready_is_false_on_503_at_once_without_retrying():
    fake = FakeService(_error(503, "not_ready", "no model loaded", **{"Retry-After": "5"}))
    with fake.client(retries=3) as client:
        assert client.ready() is False
    assert fake.attempts == 1 and fake.sleeps == []


def test_probes_are_false_when_the_service_cannot_be_reached():
    fake = FakeService(httpx.ConnectError("connection refused"),
                       httpx.ConnectError("connection refused"))
    with fake.client() as client:
        assert client.health() is False
        assert client.ready() is False
    assert fake.attempts == 2 and fake.sleeps == []


# --------------------------------------------------------------------------------------------
# Retries
# --------------------------------------------------------------------------------------------


def test_503_is_retried_with_exponential_backoff_then_succeeds():
    fake = FakeService(_error(503, "not_ready"), _error(503, "not_ready"), default=_echo_score)
    with fake.client(retries=3, backoff_s=0.5) as client:
        result = client.score([0.0, 0.1], [1.0, 1.0], id="LS-0042-s3")
    assert fake.attempts == 3
    assert fake.sleeps == [0.5, 1.0]  # backoff_s * 2**attempt
    assert result["id"] == "LS-0042-s3"
    assert fake.body(0) == fake.body(2)  # the same request each time


def test_retry_after_in_seconds_sets_the_wait():
    # RFC 9110 §10.2.3: Retry-After = HTTP-date / delay-seconds
    fake = FakeService(_error(503, "overloaded", **{"Retry-After": "7"}), default=_echo_score)
    with fake.client() as client:
        client.score([0.0, 0.1], [1.0, 1.0])
    assert fake.sleeps == [7.0] and fake.attempts == 2


def test_a_long_retry_after_is_capped():
    fake = FakeService(_error(503, "overloaded", **{"Retry-After": "3600"}), default=_echo_score)
    with fake.client() as client:
        client.score([0.0, 0.1], [1.0, 1.0])
    assert fake.sleeps == [MAX_RETRY_DELAY_S]


@pytest.mark.parametrize("value", ["Fri, 31 Dec 1999 23:59:59 GMT", "soon", "-5", "1.5"])
def test_a_retry_after_that_is_not_delay_seconds_falls_back_to_the_backoff(value):
    # RFC 9110 §10.2.3: delay-seconds is a non-negative integer; the HTTP-date form is not
    # honoured by this client
    fake = FakeService(_error(503, "overloaded", **{"Retry-After": value}), default=_echo_score)
    with fake.client(backoff_s=0.25) as client:
        client.score([0.0, 0.1], [1.0, 1.0])
    assert fake.sleeps == [0.25]


def test_503_after_the_last_retry_is_raised_with_the_servers_code():
    fake = FakeService(default=lambda r: _error(503, "not_ready", "model loading"))
    with fake.client(retries=2, backoff_s=1.0) as client, \
            pytest.raises(DipshapeClientError) as info:
        client.score([0.0, 0.1], [1.0, 1.0])
    assert fake.attempts == 3 and fake.sleeps == [1.0, 2.0]
    assert (info.value.status, info.value.code, info.value.detail) == (
        503, "not_ready", "model loading")


@pytest.mark.parametrize(
    ("status", "code"),
    [(400, "invalid_json"), (401, "unauthorized"), (403, "forbidden"), (404, "not_found"),
     (413, "payload_too_large"), (422, "too_few_points"), (500, "internal_error"),
     (504, "scoring_timeout")],
)
def test_other_error_statuses_are_never_retried(status, code):
    fake = FakeService(default=lambda r: _error(status, code, "as the server said"))
    with fake.client(retries=3) as client, pytest.raises(DipshapeClientError) as info:
        client.score([0.0, 0.1], [1.0, 1.0])
    assert fake.attempts == 1 and fake.sleeps == []
    assert (info.value.status, info.value.code, info.value.detail) == (
        status, code, "as the server said")


def test_a_connection_error_is_retried_then_raised():
    fake = FakeService(default=None)
    fake.script = [httpx.ConnectError("connection refused")] * 4
    with fake.client(retries=3, backoff_s=0.5) as client, \
            pytest.raises(DipshapeClientError) as info:
        client.score([0.0, 0.1], [1.0, 1.0])
    assert fake.attempts == 4 and fake.sleeps == [0.5, 1.0, 2.0]
    assert info.value.status is None and info.value.code == "connection_error"
    assert "4 attempts" in info.value.detail
    assert isinstance(info.value.__cause__, httpx.ConnectError)


def test_a_timeout_is_retried_then_succeeds():
    fake = FakeService(httpx.ReadTimeout("read timed out"), default=_echo_score)
    with fake.client() as client:
        assert client.score([0.0, 0.1], [1.0, 1.0], id="x")["id"] == "x"
    assert fake.attempts == 2 and fake.sleeps == [0.5]


def test_a_timeout_after_the_last_retry_is_a_timeout_error():
    fake = FakeService(httpx.ReadTimeout("slow"), httpx.ReadTimeout("slow"))
    with fake.client(retries=1) as client, pytest.raises(DipshapeClientError) as info:
        client.models()
    assert (info.value.status, info.value.code) == (None, "timeout")


def test_retries_zero_sends_once():
    fake = FakeService(httpx.ConnectError("refused"))
    with fake.client(retries=0) as client, pytest.raises(DipshapeClientError):
        client.models()
    assert fake.attempts == 1 and fake.sleeps == []


def test_a_label_is_not_sent_again_after_a_read_timeout():
    # RFC 9110 §9.2.2: the service may have stored the label before the answer was lost
    fake = FakeService(httpx.ReadTimeout("slow"), default=None)
    with fake.client(retries=3) as client, pytest.raises(DipshapeClientError) as info:
        client.submit_label({"id": "a", "time": [0.0], "flux": [1.0]}, "planet")
    assert fake.attempts == 1 and info.value.code == "timeout"


def test_a_label_is_sent_again_when_the_connection_could_not_be_made():
    answer = {"label_id": 1, "id": "a", "label": "planet", "created_utc": "2026-12-02T03:00Z"}
    fake = FakeService(httpx.ConnectError("refused"), _error(503, "store_busy"),
                       httpx.Response(201, json=answer))
    with fake.client(retries=3) as client:
        assert client.submit_label({"id": "a", "time": [0.0], "flux": [1.0]}, "planet") \
            == answer
    assert fake.attempts == 3 and fake.sleeps == [0.5, 1.0]


# --------------------------------------------------------------------------------------------
# Error mapping
# --------------------------------------------------------------------------------------------


def test_a_non_json_error_body_still_gives_a_clear_error():
    fake = FakeService(httpx.Response(502, text="<html>Bad Gateway</html>"))
    with fake.client() as client, pytest.raises(DipshapeClientError) as info:
        client.models()
    err = info.value
    assert (err.status, err.code) == (502, "http_502")
    assert "502 Bad Gateway" in err.detail and "<html>Bad Gateway</html>" in err.detail


def test_a_json_error_body_without_an_error_code_is_named_by_its_status():
    fake = FakeService(httpx.Response(404, json={"message": "no route"}))
    with fake.client() as client, pytest.raises(DipshapeClientError) as info:
        client.models()
    assert (info.value.status, info.value.code) == (404, "http_404")


def test_a_long_error_body_is_cut_in_the_detail():
    fake = FakeService(httpx.Response(500, text="x" * 5000))
    with fake.client() as client, pytest.raises(DipshapeClientError) as info:
        client.models()
    assert len(info.value.detail) < 300


def test_client_errors_are_caught_as_dipshape_errors():
    fake = FakeService(_error(422, "constant_flux", "flux does not vary"))
    with fake.client() as client, pytest.raises(DipshapeError, match=r"\[constant_flux\]"):
        client.score([0.0, 0.1], [1.0, 1.0])


# --------------------------------------------------------------------------------------------
# The alert stream
# --------------------------------------------------------------------------------------------


def _alert_service(request: httpx.Request) -> httpx.Response:
    body = _strict_loads(request.content)
    if len(body["time"]) < 3:
        return _error(422, "too_few_points", f"{body['id']}: fewer than 20 finite points")
    return httpx.Response(200, json=_result(body["id"], label="exocomet"))


def test_enrich_stream_adds_a_verdict_to_every_alert_and_goes_on_after_failures():
    lines = [
        json.dumps({"alert_id": 1712, "time": [0.0, 0.1, 0.2], "flux": [1.0, 0.99, 1.0],
                    "flux_err": [1e-3] * 3, "ra": 10.5}) + "\n",
        "this is not json\n",
        "\n",
        json.dumps({"alert_id": "A-2", "time": [0.0, 0.1], "flux": [1.0, 1.0]}) + "\n",
        json.dumps({"alert_id": 3, "time": [0.0, 0.1, 0.2]}) + "\n",
        json.dumps([1, 2, 3]) + "\n",
        '{"id": "A-4", "time": [0.0, 0.1, 0.2], "flux": [1.0, NaN, 1.0]}\n',
    ]
    fake = FakeService(default=_alert_service)
    out = io.StringIO()
    with fake.client() as client:
        scored, failed = enrich_stream(client, lines, out)
    written = [_strict_loads(line.encode()) for line in out.getvalue().splitlines()]
    assert (scored, failed) == (2, 4)
    assert len(written) == 6  # the blank line is skipped, every other line comes back
    first = written[0]
    assert first["alert_id"] == 1712 and first["ra"] == 10.5  # the alert is kept as it was
    assert first["dipshape"] == {k: _result("1712", "exocomet")[k]
                                 for k in ("label", "probabilities", "flags", "model")}
    assert written[1]["raw"] == "this is not json"
    assert written[1]["dipshape"]["error"] == "unreadable_alert"
    assert written[2]["dipshape"]["error"] == "too_few_points"  # the server's code
    assert written[3]["dipshape"]["error"] == "missing_columns"
    assert written[4]["dipshape"]["error"] == "unreadable_alert"
    # NaN written by a producer: sent as null (RFC 8259), written back as null
    assert written[5]["flux"] == [1.0, None, 1.0] and written[5]["dipshape"]["label"] == \
        "exocomet"
    sent_ids = [_strict_loads(r.content)["id"] for r in fake.requests]
    assert sent_ids == ["1712", "A-2", "A-4"]
    assert _strict_loads(fake.requests[2].content)["flux"] == [1.0, None, 1.0]


def test_enrich_stream_reads_bytes_lines_and_names_anonymous_alerts_by_line():
    fake = FakeService(default=_alert_service)
    out = io.StringIO()
    with fake.client() as client:
        enrich_stream(client, [b'{"time": [0, 1, 2], "flux": [1, 1, 1]}\n'], out)
    assert _strict_loads(fake.requests[0].content)["id"] == "line-1"


def test_enrich_stream_stops_when_the_key_is_refused():
    fake = FakeService(default=lambda r: _error(401, "unauthorized", "missing X-API-Key"))
    lines = [json.dumps({"alert_id": i, "time": [0, 1, 2], "flux": [1, 1, 1]}) for i in range(3)]
    out = io.StringIO()
    with fake.client() as client, pytest.raises(DipshapeClientError) as info:
        enrich_stream(client, lines, out)
    assert info.value.status == 401 and fake.attempts == 1 and out.getvalue() == ""


def test_enrich_stream_marks_an_unreachable_service_on_the_line_and_goes_on():
    fake = FakeService(*([httpx.ConnectError("refused")] * 2), default=_alert_service)
    lines = [json.dumps({"alert_id": i, "time": [0, 1, 2], "flux": [1, 1, 1]}) for i in range(2)]
    out = io.StringIO()
    with fake.client(retries=1) as client:
        assert enrich_stream(client, lines, out) == (1, 1)
    first, second = (json.loads(x) for x in out.getvalue().splitlines())
    assert first["dipshape"]["error"] == "connection_error"
    assert second["dipshape"]["label"] == "exocomet"
