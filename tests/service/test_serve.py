"""`dipshape serve` as a real uvicorn process on loopback, reached with the Python client."""

from __future__ import annotations

import subprocess
import sys
import time
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
def server_process(tmp_path_factory):
    registry = tmp_path_factory.mktemp("serve") / "models"
    registry.mkdir()
    copy_version(registry)
    with serve_process(registry, env={"DIPSHAPE_MAX_BODY_BYTES": str(1024 * 1024)}) as served:
        yield served


@pytest.fixture(scope="module")
def server(server_process):
    return server_process.base_url


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


def test_acknowledged_labels_survive_a_killed_server(tmp_path):
    """Many concurrent label POSTs, then the server SIGKILLed mid-load: every label the service
    acknowledged (201) is in the store and the database passes PRAGMA integrity_check (SQLite
    documentation, "Atomic Commit In SQLite" and "Write-Ahead Logging")."""
    import sqlite3
    import threading

    from service.client import DipshapeClientError
    from service.store import LabelStore

    registry = tmp_path / "models"
    registry.mkdir()
    copy_version(registry)
    db = tmp_path / "labels.sqlite"
    sim = simulate_segment("exocomet", np.random.default_rng(8), id="LS-0008-s1",
                           cadence_min=30.0, window_days=20.0)
    acked: list[int] = []
    lock = threading.Lock()
    stop = threading.Event()

    def writer(k: int, base: str) -> None:
        with DipshapeClient(base, retries=0, timeout_s=10.0) as client:
            for i in range(200):
                if stop.is_set():
                    return
                body = {"id": f"LS-{k}-{i}", "time": sim.time, "flux": sim.flux}
                try:
                    ack = client.submit_label(body, "exocomet", note="load test")
                except (DipshapeClientError, httpx.HTTPError):
                    return  # the server is gone
                with lock:
                    acked.append(ack["label_id"])

    with serve_process(registry, db=db) as served:
        threads = [threading.Thread(target=writer, args=(k, served.base_url)) for k in range(6)]
        for t in threads:
            t.start()
        deadline = time.monotonic() + 60
        while len(acked) < 30:  # let some labels land, then kill the server mid-load
            assert time.monotonic() < deadline, f"only {len(acked)} labels in 60 s"
            assert any(t.is_alive() for t in threads), "every writer stopped early"
            time.sleep(0.01)
        served.process.kill()  # SIGKILL: no clean-up, no final checkpoint
        served.process.wait()
        stop.set()
        for t in threads:
            t.join(timeout=30)
    assert len(acked) >= 30
    with LabelStore(db) as store:
        stored = {label.label_id for label in store.labels()}
    assert set(acked) <= stored
    with sqlite3.connect(db) as con:
        assert con.execute("PRAGMA integrity_check").fetchone() == ("ok",)


def test_process_tree_and_memory_of_a_served_process(server_process):
    # Linux proc(5): VmHWM (peak resident) is never below VmRSS (resident now)
    from service.local import memory_mb

    tree = server_process.process_tree()
    assert tree[0] == server_process.pid
    rss, peak = memory_mb(tree[0]), memory_mb(tree[0], "VmHWM")
    assert 10 < rss <= peak
    assert np.isnan(memory_mb(2**22 + 12345))  # no such process
