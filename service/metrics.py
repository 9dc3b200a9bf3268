"""Prometheus metrics of one service process.

Each app owns its :class:`ServiceMetrics` (its own ``CollectorRegistry``: no module-level
state). With several uvicorn workers every process answers ``/metrics`` with its own counts, as
is usual for per-process Prometheus targets.
"""

from __future__ import annotations

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client.exposition import CONTENT_TYPE_LATEST

__all__ = ["CONTENT_TYPE", "LATENCY_BUCKETS_S", "ServiceMetrics"]

CONTENT_TYPE = CONTENT_TYPE_LATEST
"""Content type of the Prometheus text exposition format."""

LATENCY_BUCKETS_S = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0)
"""Upper bounds [s] of the request latency histogram."""


class ServiceMetrics:
    """Request counts, latency, scores by label and the active model version."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        self.requests = Counter("dipshape_requests", "HTTP requests by route and status",
                                ["route", "method", "status"], registry=self.registry)
        self.latency = Histogram("dipshape_request_seconds", "HTTP request latency [s]",
                                 ["route"], buckets=LATENCY_BUCKETS_S, registry=self.registry)
        self.scores = Counter("dipshape_scores", "Segments scored, by label (or error code)",
                              ["label"], registry=self.registry)
        self.model = Gauge("dipshape_active_model", "1 for the model version in use",
                           ["name", "version"], registry=self.registry)
        self._model_key: tuple[str, str] | None = None

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None:
        """Count one answered request and its latency."""
        self.requests.labels(route=route, method=method, status=str(status)).inc()
        self.latency.labels(route=route).observe(seconds)

    def observe_score(self, label: str) -> None:
        """Count one scored segment by its label, or by its error code."""
        self.scores.labels(label=label).inc()

    def set_model(self, name: str, version: str) -> None:
        """Mark the model in use (the previous one drops to 0)."""
        if self._model_key is not None and self._model_key != (name, version):
            self.model.labels(*self._model_key).set(0)
        self.model.labels(name=name, version=version).set(1)
        self._model_key = (name, version)

    def render(self) -> bytes:
        """The text exposition of every metric."""
        return generate_latest(self.registry)
