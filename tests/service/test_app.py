"""The REST service: routes, the JSON contract, error codes, keys and roles, limits, swaps.

Statuses follow RFC 9110 (§15.5.2 401, §15.5.4 403, §15.5.14 413, §15.5.16 415, §15.5.21 422,
§15.6.4 503 with Retry-After §10.2.3, §15.6.5 504); error bodies are ours
(``{"error", "detail"}``, codes in service/errors.py).
"""

from __future__ import annotations

import io
import json
import math
import struct
import threading
import zipfile
from pathlib import Path

import anyio
import jsonschema
import numpy as np
import pytest
from fastapi.testclient import TestClient

from features.catalog import FEATURE_VERSION
from features.segment import make_segment
from service.app import ModelHolder, _Admission, check_bind, create_app
from service.auth import hash_key
from service.errors import ServiceError
from service.scoring import load_ood, result_schema, score_segment
from service.settings import ServiceSettings
from training.registry import load_model
from training.simulate import simulate_segment

from ._registry import copy_version, shipped_version

ACTIVE = shipped_version()
OTHER = ACTIVE + "-copy"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948) §5.2

SCORE_KEY, LABEL_KEY, ADMIN_KEY = "k-score-0123456789", "k-label-0123456789", "k-admin-0123456789"
KEY_LINES = ";".join([f"broker score {hash_key(SCORE_KEY)}",
                      f"vetter label {hash_key(LABEL_KEY)}",
                      f"ops admin {hash_key(ADMIN_KEY)}"])


def _segment_body(label: str, seed: int, id: str | None = None) -> dict:
    sim = simulate_segment(label, np.random.default_rng(seed), id=id or f"LS-{seed:04d}",
                           cadence_min=10.0, window_days=14.0, min_dip_snr=20.0)
    flux = [None if not math.isfinite(f) else float(f) for f in sim.flux]
    body = {"id": sim.id, "time": [float(t) for t in sim.time], "flux": flux}
    if sim.flux_err is not None:
        body["flux_err"] = [None if not math.isfinite(e) else float(e) for e in sim.flux_err]
    return body


@pytest.fixture(scope="module")
def registry(tmp_path_factory) -> Path:
    """A registry with two versions (copies of the shipped model), the shipped one active."""
    root = tmp_path_factory.mktemp("registry")
    copy_version(root, as_version=OTHER, active=False)
    copy_version(root)
    return root


@pytest.fixture(scope="module")
def client(registry, tmp_path_factory):
    settings = ServiceSettings(registry=registry, db=tmp_path_factory.mktemp("db") / "s.sqlite",
                               max_batch=8, max_points=50_000, max_body_bytes=2 * 1024 * 1024)
    with TestClient(create_app(settings), raise_server_exceptions=False) as c:
        yield c


@pytest.fixture(scope="module")
def planet() -> dict:
    return _segment_body("planet", 11)


def _assert_error(response, status: int, code: str) -> dict:
    assert response.status_code == status, response.text
    body = response.json()
    assert set(body) == {"error", "detail"}
    assert body["error"] == code
    assert "Traceback" not in body["detail"]
    return body


# -- health ---------------------------------------------------------------------------------


def test_health_and_readiness(client):
    assert client.get("/healthz").json() == {"status": "ok"}
    assert client.get("/readyz").json() == {"status": "ready", "model": ACTIVE}


def test_not_ready_without_a_model(tmp_path):
    app = create_app(ServiceSettings(registry=tmp_path / "empty", db=tmp_path / "s.sqlite"))
    with TestClient(app) as c:
        assert c.get("/healthz").status_code == 200
        r = c.get("/readyz")
        assert r.status_code == 503 and r.headers["retry-after"]
        _assert_error(c.post("/v1/score", json=_segment_body("planet", 1)), 503,
                      "model_not_ready")


# -- scoring --------------------------------------------------------------------------------


def test_score_is_the_result_json_of_the_cli(client, planet, registry):
    r = client.post("/v1/score", json=planet)
    assert r.status_code == 200
    got = r.json()
    jsonschema.validate(got, result_schema())
    # the same segment scored in-process (what `dipshape score` writes) gives the same object
    model = load_model(registry, expected_feature_version=FEATURE_VERSION)
    seg = make_segment(np.array(planet["time"]),
                       np.array([np.nan if f is None else f for f in planet["flux"]]),
                       np.array([np.nan if f is None else f for f in planet["flux_err"]]),
                       id=planet["id"])
    want = score_segment(seg, model, ood=load_ood(registry, ACTIVE)).to_dict()
    got.pop("elapsed_ms"), want.pop("elapsed_ms")
    assert got == want
    assert got["id"] == planet["id"] and got["model"]["version"] == ACTIVE
    assert math.isclose(sum(got["probabilities"].values()), 1.0, rel_tol=1e-9)


def test_known_ephemeris_is_used(client):
    sim = simulate_segment("planet", np.random.default_rng(11), id="LS-0011",
                           cadence_min=10.0, window_days=14.0, min_dip_snr=20.0)
    body = _segment_body("planet", 11)
    eph = {"period": sim.truth["planet.period_days"], "epoch": sim.truth["planet.t0"],
           "duration": sim.truth["planet.t14_days"]}
    got = client.post("/v1/score", json=dict(body, ephemeris=eph)).json()
    assert got["ephemeris"] == {"period_days": pytest.approx(eph["period"]),
                                "epoch": pytest.approx(eph["epoch"]),
                                "duration_days": pytest.approx(eph["duration"])}
    bad = dict(body, ephemeris={"period": -1.0, "epoch": 0.0, "duration": 0.1})
    _assert_error(client.post("/v1/score", json=bad), 422, "invalid_ephemeris")


def test_batch_keeps_order_and_isolates_bad_items(client, planet):
    other = _segment_body("eclipsing_binary", 5)
    items = [planet, {"id": "bad-1", "time": [1, 2, 3], "flux": [1, 2, 3]}, other,
             "not an object", {"id": "bad-2", "time": planet["time"], "flux": ["x"] * 3}]
    r = client.post("/v1/score/batch", json=items)
    assert r.status_code == 200
    out = r.json()
    assert [o["id"] for o in out] == [planet["id"], "bad-1", other["id"], "item-3", "bad-2"]
    assert out[0]["label"] and out[2]["label"]
    assert out[1]["error"] == "too_few_points"
    assert out[3]["error"] == "invalid_request" and out[4]["error"] == "invalid_request"
    for o in out:
        jsonschema.validate(o, result_schema())


def test_batch_limit(client, planet):
    _assert_error(client.post("/v1/score/batch", json=[{"time": [1], "flux": [1]}] * 9), 422,
                  "batch_too_large")


def test_file_upload_csv_and_fits(client, tmp_path):
    from astropy.io import fits

    body = _segment_body("exocomet", 7)
    t = np.array(body["time"])
    f = np.array([np.nan if v is None else v for v in body["flux"]])
    csv = "time,flux\n" + "\n".join(f"{float(a)!r},{float(b)!r}"
                                     for a, b in zip(t, f, strict=True))
    r = client.post("/v1/score/file", files={"file": ("LS-0007-s2.csv", csv, "text/csv")})
    assert r.status_code == 200
    (res,) = r.json()
    assert res["id"] == "LS-0007-s2"
    jsonschema.validate(res, result_schema())

    cols = [fits.Column(name="TIME", format="D", array=t),
            fits.Column(name="PDCSAP_FLUX", format="D", array=f),
            fits.Column(name="QUALITY", format="J", array=np.zeros(t.size, dtype=np.int32))]
    buf = io.BytesIO()
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)]).writeto(buf)
    r = client.post("/v1/score/file",
                    files={"file": ("LS-0007-s2.fits", buf.getvalue(), "application/fits")})
    assert r.status_code == 200
    (res_fits,) = r.json()
    assert res_fits["id"] == "LS-0007-s2"
    assert res_fits["label"] == res["label"]


def test_file_upload_errors(client):
    _assert_error(client.post("/v1/score/file", files={"file": ("x.exe", b"MZ", "a/b")}), 415,
                  "unsupported_media_type")
    r = client.post("/v1/score/file", files={"file": ("LS-9.csv", b"", "text/csv")})
    assert r.status_code == 200
    assert r.json()[0]["error"] == "empty_file" and r.json()[0]["id"] == "LS-9"


def test_plot_is_a_png_of_the_requested_size(client, planet):
    r = client.post("/v1/plot", params={"width": 800, "height": 600}, json=planet)
    assert r.status_code == 200 and r.headers["content-type"] == "image/png"
    data = r.content
    assert data[:8] == PNG_SIGNATURE
    # IHDR is the first chunk: width and height as 4-byte big-endian integers (§11.2.2)
    assert data[12:16] == b"IHDR"
    assert struct.unpack(">II", data[16:24]) == (800, 600)
    _assert_error(client.post("/v1/plot", params={"width": 10}, json=planet), 422,
                  "invalid_request")


# -- error paths ----------------------------------------------------------------------------


@pytest.mark.parametrize(("body", "status", "code"), [
    (b'{"time": [1, 2', 400, "invalid_json"),
    (b"[1, 2, 3]", 422, "invalid_request"),
    (b'{"time": [1, 2, 3]}', 422, "invalid_request"),
    (b'{"time": [1, 2, 3], "flux": ["a", "b", "c"]}', 422, "invalid_request"),
    (b'{"time": [1, 2, 3], "flux": [1, 2, 3], "colour": "red"}', 422, "invalid_request"),
])
def test_malformed_bodies(client, body, status, code):
    r = client.post("/v1/score", content=body, headers={"Content-Type": "application/json"})
    _assert_error(r, status, code)


def test_flux_all_null_and_too_few_points_left(client):
    time = [float(i) * 0.01 for i in range(40)]
    r = client.post("/v1/score", json={"time": time, "flux": [None] * 40})
    body = _assert_error(r, 422, "too_few_points")
    assert body["detail"].startswith("0 usable points left of 40 rows")
    flux = [1.0 if i < 10 else None for i in range(40)]
    body = _assert_error(client.post("/v1/score", json={"time": time, "flux": flux}), 422,
                         "too_few_points")
    assert body["detail"].startswith("10 usable points left of 40 rows")


def test_lengths_and_points_limit(client):
    _assert_error(client.post("/v1/score", json={"time": [0.0, 1.0] * 20, "flux": [1.0] * 39}),
                  422, "length_mismatch")
    n = 50_001
    big = {"time": list(range(n)), "flux": [1.0] * n}
    _assert_error(client.post("/v1/score", json=big), 422, "too_many_points")


def test_oversized_body_is_413(client):
    blob = b'{"time": [' + b"1.0," * 600_000 + b'1.0], "flux": []}'
    assert len(blob) > 2 * 1024 * 1024
    _assert_error(client.post("/v1/score", content=blob,
                              headers={"Content-Type": "application/json"}),
                  413, "body_too_large")

    def chunks():  # no Content-Length: the limit counts the bytes actually read
        yield b'{"time": ['
        for _ in range(300):
            yield b"1.0," * 2000
        yield b"1.0]}"

    _assert_error(client.post("/v1/score", content=chunks(),
                              headers={"Content-Type": "application/json"}),
                  413, "body_too_large")


def test_unknown_route_and_method(client):
    _assert_error(client.get("/v1/nothing"), 404, "not_found")
    _assert_error(client.get("/v1/score"), 405, "method_not_allowed")


def test_unexpected_failure_never_leaks_a_trace(client, planet, monkeypatch):
    import service.app as app_module

    def boom(*args, **kwargs):
        raise RuntimeError("secret internal state /some/path")

    monkeypatch.setattr(app_module, "score_segment_with_features", boom)
    r = client.post("/v1/score", json=planet)
    body = _assert_error(r, 500, "internal_error")
    assert "secret" not in body["detail"]


# -- keys and roles -------------------------------------------------------------------------


@pytest.fixture(scope="module")
def keyed(registry, tmp_path_factory):
    settings = ServiceSettings(registry=registry, api_keys=KEY_LINES,
                               db=tmp_path_factory.mktemp("db") / "k.sqlite")
    with TestClient(create_app(settings), raise_server_exceptions=False) as c:
        yield c


def test_keys_and_roles(keyed, planet):
    _assert_error(keyed.post("/v1/score", json=planet), 401, "missing_api_key")
    _assert_error(keyed.post("/v1/score", json=planet, headers={"X-API-Key": "nope"}), 401,
                  "invalid_api_key")
    assert keyed.post("/v1/score", json=planet,
                      headers={"X-API-Key": SCORE_KEY}).status_code == 200
    label = {"segment": planet, "label": "planet"}
    _assert_error(keyed.post("/v1/labels", json=label, headers={"X-API-Key": SCORE_KEY}), 403,
                  "forbidden")
    assert keyed.post("/v1/labels", json=label,
                      headers={"X-API-Key": LABEL_KEY}).status_code == 201
    _assert_error(keyed.post(f"/v1/models/{ACTIVE}/activate",
                             headers={"X-API-Key": LABEL_KEY}), 403, "forbidden")
    # admin holds every role
    assert keyed.post("/v1/score", json=planet,
                      headers={"X-API-Key": ADMIN_KEY}).status_code == 200
    # health and the schema stay open for probes
    assert keyed.get("/healthz").status_code == 200
    assert keyed.get("/v1/schema/result").status_code == 200


def test_open_service_refuses_non_loopback(tmp_path):
    with pytest.raises(ServiceError) as info:
        check_bind(ServiceSettings(host="0.0.0.0"))
    assert info.value.code == "open_bind_refused"
    assert check_bind(ServiceSettings(host="127.0.0.1")).open
    assert not check_bind(ServiceSettings(host="0.0.0.0", api_keys=KEY_LINES)).open


# -- labels ---------------------------------------------------------------------------------


def test_labels_round_trip_to_training(client, tmp_path):
    from training.dataset import labelled_table

    bodies = [_segment_body("exocomet", 21, "LS-0101-s1"), _segment_body("planet", 22,
                                                                         "LS-0102-s1")]
    for body, label in zip(bodies, ("exocomet", "dust_cloud"), strict=True):
        r = client.post("/v1/labels", json={"segment": body, "label": label,
                                            "note": "by eye", "submitter": "vetter-1"})
        assert r.status_code == 201
        ack = r.json()
        assert ack["id"] == body["id"] and ack["label"] == label and ack["label_id"] >= 1
    _assert_error(client.post("/v1/labels", json={"segment": dict(bodies[0], id=None),
                                                  "label": "planet"}), 422, "invalid_request")
    r = client.get("/v1/labels/export")
    assert r.status_code == 200 and r.headers["content-type"] == "application/zip"
    zipfile.ZipFile(io.BytesIO(r.content)).extractall(tmp_path)
    table, _ = labelled_table(tmp_path / "labels.csv", tmp_path / "segments")
    got = dict(zip(table["id"], table["label"], strict=True))
    assert got["LS-0101-s1"] == "exocomet" and got["LS-0102-s1"] == "dust_cloud"


# -- models ---------------------------------------------------------------------------------


def test_models_routes(client):
    listing = client.get("/v1/models").json()
    assert listing["active"] == ACTIVE
    assert {m["version"] for m in listing["models"]} == {OTHER, ACTIVE}
    active = client.get("/v1/models/active").json()
    assert active["version"] == ACTIVE and active["feature_version"] == FEATURE_VERSION
    assert len(active["sha256"]) == 64
    _assert_error(client.post("/v1/models/no-such/activate"), 404, "model_not_found")


def test_activation_swaps_atomically_during_scoring(registry, tmp_path):
    settings = ServiceSettings(registry=registry, db=tmp_path / "s.sqlite", max_batch=16,
                               max_concurrency=2)
    items = [_segment_body("planet", 40 + i) for i in range(6)]
    with TestClient(create_app(settings), raise_server_exceptions=False) as c:
        out: dict = {}
        worker = threading.Thread(target=lambda: out.update(
            batch=c.post("/v1/score/batch", json=items).json()))
        worker.start()
        assert c.post(f"/v1/models/{OTHER}/activate").json() == {"active": OTHER}
        worker.join()
        versions = {r["model"]["version"] for r in out["batch"]}
        assert len(versions) == 1, "one request is scored by one model from start to end"
        after = c.post("/v1/score", json=items[0]).json()
        assert after["model"]["version"] == OTHER
        assert c.get("/readyz").json()["model"] == OTHER
        assert c.post(f"/v1/models/{ACTIVE}/activate").status_code == 200
    assert (registry / "ACTIVE").read_text().strip() == ACTIVE


def test_holder_follows_an_activation_made_elsewhere(registry):
    holder = ModelHolder(registry, check_s=0.0)
    before = holder.load()
    assert before.version == ACTIVE
    (registry / "ACTIVE.tmp").write_text(OTHER + "\n")
    (registry / "ACTIVE.tmp").replace(registry / "ACTIVE")
    try:
        assert holder.get().version == OTHER
        assert before.model.card.version == ACTIVE  # the old snapshot still works
    finally:
        (registry / "ACTIVE").write_text(ACTIVE + "\n")


# -- limits ---------------------------------------------------------------------------------


def test_overload_answers_503_at_once():
    # one place (concurrency 1, queue 0), held by a request whose work blocks: the next one is
    # refused at once, before its body is read, and the count returns to 0 afterwards
    release = anyio.Event()

    async def blocking_app(scope, receive, send):
        await release.wait()
        await send({"type": "http.response.start", "status": 200, "headers": []})
        await send({"type": "http.response.body", "body": b""})

    admission = _Admission(blocking_app, capacity=1, retry_after_s=2)
    sent: list[dict] = []

    async def send(message):
        sent.append(message)

    async def never():  # the body of a refused request is never read
        raise AssertionError("the refused request's body was read")

    scope = {"type": "http", "method": "POST", "path": "/v1/score"}

    async def main():
        async with anyio.create_task_group() as tg:
            tg.start_soon(admission, scope, never, send)
            await anyio.sleep(0.05)
            assert admission.in_flight == 1
            await admission(scope, never, send)  # returns at once with the 503
            start = next(m for m in sent if m["type"] == "http.response.start")
            assert start["status"] == 503
            assert (b"retry-after", b"2") in start["headers"]
            body = json.loads(next(m for m in sent if m["type"] == "http.response.body")["body"])
            assert body["error"] == "overloaded"
            release.set()

    anyio.run(main)
    assert admission.in_flight == 0


def test_request_time_limit(registry, tmp_path, planet):
    settings = ServiceSettings(registry=registry, db=tmp_path / "s.sqlite",
                               request_timeout_s=1e-4)
    with TestClient(create_app(settings), raise_server_exceptions=False) as c:
        _assert_error(c.post("/v1/score", json=planet), 504, "timeout")


def test_overloaded_response_has_retry_after(registry, tmp_path, planet):
    settings = ServiceSettings(registry=registry, db=tmp_path / "s.sqlite", max_queue=0,
                               retry_after_s=3)
    app = create_app(settings)
    with TestClient(app, raise_server_exceptions=False) as c:
        admission = app.middleware_stack
        while not isinstance(admission, _Admission):  # find it in the ASGI stack
            admission = admission.app
        admission.in_flight = 1  # as if one request held the only place
        r = c.post("/v1/score", json=planet)
        _assert_error(r, 503, "overloaded")
        assert r.headers["retry-after"] == "3"
        # refused before the body is read: even a malformed body gets the 503
        _assert_error(c.post("/v1/score", content=b"{not json",
                             headers={"Content-Type": "application/json"}), 503, "overloaded")
        assert c.get("/healthz").status_code == 200  # probes are never refused
        admission.in_flight = 0
        assert c.post("/v1/score", json=planet).status_code == 200
        text = c.get("/metrics").text
        assert 'route="/v1/score",status="503"' in text


# -- metrics and docs -----------------------------------------------------------------------


def test_metrics_text(client, planet):
    client.post("/v1/score", json=planet)
    text = client.get("/metrics").text
    # Prometheus text exposition format: counters get a _total suffix
    assert 'dipshape_requests_total{method="POST",route="/v1/score",status="200"}' in text
    assert "dipshape_request_seconds_bucket" in text
    assert f'dipshape_active_model{{name="default",version="{ACTIVE}"}} 1.0' in text
    assert "dipshape_scores_total{label=" in text


def test_openapi_and_schema(client):
    spec = client.get("/openapi.json").json()
    for path in ("/v1/score", "/v1/score/batch", "/v1/score/file", "/v1/plot", "/v1/labels",
                 "/v1/labels/export", "/v1/models", "/v1/models/{version}/activate"):
        assert path in spec["paths"]
    assert client.get("/v1/schema/result").json() == result_schema()
    assert client.get("/docs").status_code == 200
