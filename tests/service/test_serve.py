"""`dipshape serve` as a real uvicorn process on loopback, reached with the Python client."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import httpx
import numpy as np
import pytest

from service.client import DipshapeClient
from service.local import serve_process
from training.simulate import simulate_segment

from ._registry import copy_version, shipped_version

REPO = Path(__file__).resolve().parents[2]
DIPSHAPE = str(Path(sys.executable).parent / "dipshape")


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    registry = tmp_path_factory.mktemp("serve") / "models"
    registry.mkdir()
    copy_version(registry)
    with serve_process(registry, env={"DIPSHAPE_MAX_BODY_BYTES": str(1024 * 1024)}) as served:
        yield served.base_url


def test_scores_over_real_http(server):
    sim = simulate_segment("eclipsing_binary", np.random.default_rng(3), id="LS-0003-s1",
                           cadence_min=10.0, window_days=14.0, min_dip_snr=30.0)
    with DipshapeClient(server) as client:
        assert client.health() and client.ready()
        result = client.score(sim.time, sim.flux, sim.flux_err, id=sim.id)
        assert result["id"] == "LS-0003-s1"
        assert set(result["probabilities"]) >= {"planet", "eclipsing_binary", "exocomet",
                                                "variability", "systematic"}
        assert client.active_model()["version"] == shipped_version()


def test_chunked_body_over_the_limit_is_413(server):
    # RFC 9112 §7.1 chunked transfer coding: no Content-Length, so only counting the bytes
    # actually read can enforce the limit
    def chunks():
        yield b'{"time": ['
        for _ in range(200):
            yield b"1.0," * 2000
        yield b"1.0]}"

    r = httpx.post(server + "/v1/score", content=chunks(),
                   headers={"Content-Type": "application/json"})
    assert r.status_code == 413
    assert r.json()["error"] == "body_too_large"


def test_refuses_to_listen_beyond_loopback_without_keys(tmp_path):
    proc = subprocess.run([DIPSHAPE, "serve", "--host", "0.0.0.0", "--port", "0", "--db",
                           str(tmp_path / "s.sqlite")], capture_output=True, text=True,
                          timeout=60)
    assert proc.returncode == 2
    assert "open_bind_refused" in proc.stderr


def test_a_server_without_a_model_is_reported_not_ready(tmp_path):
    from service.errors import ServiceError

    with pytest.raises(ServiceError) as info, serve_process(tmp_path / "empty",
                                                            ready_timeout_s=5.0):
        pass
    assert info.value.code == "model_not_ready"
