"""`dipshape serve` under load: a burst beyond the queue is refused at once; the rest is served.

Real uvicorn processes on loopback, reached by concurrent ``httpx.AsyncClient`` requests. The
outcome is deterministic, not the timing: nothing here measures speed (bench/load.py does).

References outside the project:

- RFC 9110 §15.6.4: 503 (Service Unavailable) says the server cannot handle the request now
  "due to a temporary overload" and may send Retry-After;
- RFC 9110 §10.2.3: ``Retry-After = HTTP-date / delay-seconds``, ``delay-seconds = 1*DIGIT``;
- JSON Schema draft 2020-12 (the ``jsonschema`` package's validator) for the result contract.

The error body ``{"error": code, "detail": text}`` and the code ``overloaded`` are the
product's contract (README, "The REST service").
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import math
import re
import sys
from collections.abc import Iterator, Mapping
from pathlib import Path

import httpx
import jsonschema
import numpy as np
import pytest

from service.local import serve_process
from service.scoring import result_schema
from training.classes import CLASSES
from training.simulate import simulate_segment

from ._registry import copy_version

REPO = Path(__file__).resolve().parents[2]
DIPSHAPE = str(Path(sys.executable).parent / "dipshape")
JSON = {"Content-Type": "application/json"}

BURST = 12
"""Requests fired at once at a service with room for two (one scoring, one waiting)."""
RETRY_AFTER_S = 2
"""The Retry-After the tight service is configured with (DIPSHAPE_RETRY_AFTER_S)."""
CLIENTS, PER_CLIENT = 4, 10
"""The sustained run: each client sends its requests one after the other."""


# --------------------------------------------------------------------------------------------
# Servers and segments
# --------------------------------------------------------------------------------------------


@contextlib.contextmanager
def _serve(tmp: Path, settings: Mapping[str, str]) -> Iterator[str]:
    """One-worker ``dipshape serve`` on a free loopback port with these DIPSHAPE_* settings."""
    registry = tmp / "models"
    registry.mkdir()
    copy_version(registry)
    with serve_process(registry, env=settings) as served:
        yield served.base_url


@pytest.fixture(scope="module")
def tight(tmp_path_factory) -> Iterator[str]:
    """Room for two requests: one scoring thread, one place in the queue."""
    with _serve(tmp_path_factory.mktemp("tight"), {
            "DIPSHAPE_MAX_CONCURRENCY": "1", "DIPSHAPE_MAX_QUEUE": "1",
            "DIPSHAPE_RETRY_AFTER_S": str(RETRY_AFTER_S)}) as base:
        yield base


@pytest.fixture(scope="module")
def roomy(tmp_path_factory) -> Iterator[str]:
    """The default limits (one scoring thread, 64 places in the queue)."""
    with _serve(tmp_path_factory.mktemp("roomy"), {}) as base:
        yield base


def _segment(label: str, seed: int) -> dict:
    """A 2,000-point segment (10-min cadence over 13.9 d) of the fictional Lumen Survey."""
    sim = simulate_segment(label, np.random.default_rng(seed), id=f"LS-{seed:04d}-s1",
                           cadence_min=10.0, window_days=13.9)
    return {"id": sim.id, "time": sim.time.tolist(),
            "flux": [f if math.isfinite(f) else None for f in sim.flux.tolist()]}


def _with_id(segment: dict, id: str) -> bytes:
    return json.dumps({**segment, "id": id}, allow_nan=False).encode()


@pytest.fixture(scope="module")
def validator() -> jsonschema.Draft202012Validator:
    schema = result_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def _assert_result_for(response: httpx.Response, sent_id: str,
                       validator: jsonschema.Draft202012Validator) -> None:
    body = response.json()
    validator.validate(body)  # JSON Schema draft 2020-12
    assert "error" not in body and body["label"] in CLASSES  # a result, not an error line
    assert body["id"] == sent_id


# --------------------------------------------------------------------------------------------
# A burst beyond the queue
# --------------------------------------------------------------------------------------------


async def _fire_at_once(base: str, bodies: list[bytes]) -> list[httpx.Response]:
    limits = httpx.Limits(max_connections=len(bodies), max_keepalive_connections=len(bodies))
    async with httpx.AsyncClient(base_url=base, limits=limits, timeout=60.0) as client:
        # open every connection first, so the posts leave together
        await asyncio.gather(*(client.get("/healthz") for _ in bodies))
        return await asyncio.gather(*(client.post("/v1/score", content=b, headers=JSON)
                                      for b in bodies))


@pytest.fixture(scope="module")
def burst(tight) -> list[tuple[str, httpx.Response]]:
    """(id sent, answer) for each of BURST requests fired at once at the tight service."""
    segment = _segment("planet", 100)
    ids = [f"LS-0100-b{i:02d}" for i in range(BURST)]
    responses = asyncio.run(_fire_at_once(tight, [_with_id(segment, i) for i in ids]))
    return list(zip(ids, responses, strict=True))


def test_every_answer_to_a_burst_is_a_result_or_a_refusal(burst):
    # a full queue is an overload (RFC 9110 §15.6.4 503), never a failure or a hang
    assert {r.status_code for _, r in burst} <= {200, 503}


def test_a_burst_beyond_the_queue_is_partly_served_and_partly_refused(burst):
    statuses = [r.status_code for _, r in burst]
    # the first request to arrive finds the service empty; twelve cannot fit in room for two
    assert statuses.count(200) >= 1
    assert statuses.count(503) >= 1


def test_a_refusal_is_the_overloaded_error_with_a_retry_after_in_seconds(burst):
    refused = [r for _, r in burst if r.status_code == 503]
    assert refused
    for r in refused:
        assert r.headers["Content-Type"].startswith("application/json")
        body = r.json()
        assert set(body) == {"error", "detail"}  # README, "The REST service"
        assert body["error"] == "overloaded"
        assert isinstance(body["detail"], str) and body["detail"]
        # RFC 9110 §10.2.3: delay-seconds = 1*DIGIT, a non-negative integer of seconds
        retry_after = r.headers["Retry-After"]
        assert re.fullmatch(r"[0-9]+", retry_after)
        assert int(retry_after) == RETRY_AFTER_S > 0


def test_a_served_answer_is_a_valid_result_for_its_own_segment(burst, validator):
    served = [(i, r) for i, r in burst if r.status_code == 200]
    assert served
    for sent_id, r in served:
        _assert_result_for(r, sent_id, validator)


def test_the_service_recovers_once_the_burst_is_over(tight, burst, validator):
    assert all(r.status_code in (200, 503) for _, r in burst)  # every answer is in
    segment = _segment("eclipsing_binary", 101)
    for n in range(3):
        r = httpx.post(tight + "/v1/score", content=_with_id(segment, f"LS-0101-r{n}"),
                       headers=JSON, timeout=60.0)
        assert r.status_code == 200, r.text
        _assert_result_for(r, f"LS-0101-r{n}", validator)


# --------------------------------------------------------------------------------------------
# Sustained clients within the queue
# --------------------------------------------------------------------------------------------


async def _clients(base: str, segments: list[dict]) -> list[tuple[str, httpx.Response]]:
    limits = httpx.Limits(max_connections=CLIENTS, max_keepalive_connections=CLIENTS)
    async with httpx.AsyncClient(base_url=base, limits=limits, timeout=60.0) as client:

        async def one_client(c: int) -> list[tuple[str, httpx.Response]]:
            out = []
            for k in range(PER_CLIENT):
                sent_id = f"LS-02{c:02d}-s{k:02d}"
                body = _with_id(segments[(c * PER_CLIENT + k) % len(segments)], sent_id)
                out.append((sent_id, await client.post("/v1/score", content=body,
                                                       headers=JSON)))
            return out

        per_client = await asyncio.gather(*(one_client(c) for c in range(CLIENTS)))
    return [pair for answers in per_client for pair in answers]


def test_clients_within_the_queue_all_get_their_own_results(roomy, validator):
    segments = [_segment(label, 200 + i) for i, label in enumerate(CLASSES * 2)]
    answers = asyncio.run(_clients(roomy, segments))
    assert len(answers) == CLIENTS * PER_CLIENT
    # four clients never fill 1 + 64 places: no refusal, no error of any kind
    assert [(i, r.status_code) for i, r in answers if r.status_code != 200] == []
    for sent_id, r in answers:
        _assert_result_for(r, sent_id, validator)
    assert len({i for i, _ in answers}) == CLIENTS * PER_CLIENT  # every id its own answer
