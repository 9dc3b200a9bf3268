"""Property: requests generated from the service's own OpenAPI schema never get a 5xx.

Bodies are drawn with hypothesis from the request schemas the app publishes at /openapi.json
(the JSON Schema subset those use: object, array, number, integer, string, null, anyOf), plus
arbitrary JSON values; every answer is either a success or one of our JSON errors with a 4xx
status.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.app import create_app
from service.settings import ServiceSettings

from ._registry import copy_version

REPO_MODELS = Path(__file__).resolve().parents[2] / "models"


JSON = st.recursive(st.none() | st.booleans()
                    | st.floats(allow_nan=False, allow_infinity=False) | st.integers()
                    | st.text(max_size=8),
                    lambda inner: st.lists(inner, max_size=5)
                    | st.dictionaries(st.text(max_size=6), inner, max_size=5), max_leaves=20)


def _inline(node, components):
    """Replace every OpenAPI ``$ref`` by the schema it names."""
    if isinstance(node, dict):
        if "$ref" in node:
            return _inline(components[node["$ref"].rsplit("/", 1)[-1]], components)
        return {k: _inline(v, components) for k, v in node.items()}
    if isinstance(node, list):
        return [_inline(v, components) for v in node]
    return node


@pytest.fixture(scope="module")
def app_and_spec(tmp_path_factory):
    root = tmp_path_factory.mktemp("registry")
    copy_version(root)
    settings_ = ServiceSettings(registry=root, db=root / "s.sqlite", max_points=5000,
                                max_batch=4)
    with TestClient(create_app(settings_), raise_server_exceptions=False) as client:
        spec = client.get("/openapi.json").json()
        yield client, spec


def from_schema(schema):
    """A hypothesis strategy for the JSON Schema subset of our request bodies."""
    if "anyOf" in schema:
        return st.one_of([from_schema(s) for s in schema["anyOf"]])
    kind = schema.get("type")
    if kind == "object":
        props = {k: from_schema(v) for k, v in schema.get("properties", {}).items()}
        required = set(schema.get("required", ()))
        return st.fixed_dictionaries({k: v for k, v in props.items() if k in required},
                                     optional={k: v for k, v in props.items()
                                               if k not in required})
    if kind == "array":
        # long enough sometimes to pass the 20-point minimum and reach the scorer
        return st.lists(from_schema(schema.get("items", {})), max_size=60)
    if kind == "number":
        return st.floats(allow_nan=False, allow_infinity=False, width=32) | st.integers(-5, 5)
    if kind == "integer":
        return st.integers(-(2**31), 2**31)
    if kind == "string":
        return st.text(max_size=min(schema.get("maxLength", 20), 20))
    if kind == "null":
        return st.none()
    return JSON


def _body_schema(spec, path):
    components = spec["components"]["schemas"]
    content = spec["paths"][path]["post"]["requestBody"]["content"]["application/json"]
    schema = _inline(content["schema"], components)
    schema.pop("title", None)
    return schema


def _check(response):
    assert response.status_code < 500, response.text
    if response.status_code >= 400:
        body = response.json()
        assert set(body) == {"error", "detail"} and body["error"]


@pytest.mark.parametrize("path", ["/v1/score", "/v1/labels", "/v1/plot"])
def test_schema_bodies_never_5xx(app_and_spec, path):
    client, spec = app_and_spec
    strategy = from_schema(_body_schema(spec, path)) | JSON

    @settings(max_examples=40, deadline=None, suppress_health_check=list(HealthCheck))
    @given(strategy)
    def run(body):
        _check(client.post(path, json=body))

    run()


def test_batch_items_never_5xx(app_and_spec):
    client, spec = app_and_spec
    item = from_schema(_body_schema(spec, "/v1/score")) | JSON

    @settings(max_examples=30, deadline=None, suppress_health_check=list(HealthCheck))
    @given(st.lists(item, max_size=5) | JSON)
    def run(body):
        r = client.post("/v1/score/batch", json=body)
        _check(r)
        if r.status_code == 200:
            assert len(r.json()) == len(body)

    run()


def test_raw_bytes_never_5xx(app_and_spec):
    client, _ = app_and_spec

    @settings(max_examples=40, deadline=None, suppress_health_check=list(HealthCheck))
    @given(st.binary(max_size=200))
    def run(raw):
        _check(client.post("/v1/score", content=raw,
                           headers={"Content-Type": "application/json"}))

    run()
