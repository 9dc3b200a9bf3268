"""REST service speed: requests/s, p50/p99 latency, overhead over in-process scoring, RSS.

Starts ``dipshape serve`` on a free loopback port with 1 and then 2 worker processes, sends
2,000-point simulated segments to ``POST /v1/score`` from concurrent clients (bounded in
request count and in time), and prints, measured in this run:

- in-process scoring latency (``score_segment``, the same segments) as the reference;
- per worker count: requests/s, p50 and p99 latency with as many clients as workers, and with
  one client the ratio of service latency to in-process latency (goal <= 1.5x), both against
  the in-process run before and, per request, against the scoring time the server measured
  for that same request (``elapsed_ms``; immune to load changes between the two runs);
- peak resident memory (VmHWM from /proc) of each worker process (goal <= 300 MB).

    .venv/bin/python bench/service.py [--requests 120] [--max-seconds 60]
"""

from __future__ import annotations

import sys
from pathlib import Path

# bench/features.py is named like the package: keep this folder off the import path
sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != Path(__file__).parent.resolve()]

import argparse  # noqa: E402
import math  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402
from concurrent.futures import ThreadPoolExecutor  # noqa: E402

import httpx  # noqa: E402
import numpy as np  # noqa: E402

from features.catalog import FEATURE_VERSION  # noqa: E402
from features.segment import make_segment  # noqa: E402
from service.local import memory_mb, serve_process  # noqa: E402
from service.scoring import load_ood, score_segment  # noqa: E402
from training.registry import load_model  # noqa: E402
from training.simulate import simulate_segment  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
CLASSES = ("planet", "eclipsing_binary", "exocomet", "variability", "systematic")


def _segments(n: int) -> list[dict]:
    out = []
    for i in range(n):
        # 10-min cadence over 13.9 d: 2,000 points
        sim = simulate_segment(CLASSES[i % 5], np.random.default_rng(1000 + i), id=f"LS-b{i}",
                               cadence_min=10.0, window_days=13.9)
        out.append({"id": sim.id, "time": sim.time.tolist(),
                    "flux": [None if not math.isfinite(f) else f for f in sim.flux.tolist()]})
    return out


def _in_process_ms(segments: list[dict], registry: Path) -> float:
    model = load_model(registry, expected_feature_version=FEATURE_VERSION)
    ood = load_ood(registry, model.card.version)
    times = []
    for body in segments:
        flux = np.array([np.nan if f is None else f for f in body["flux"]])
        seg = make_segment(np.array(body["time"]), flux, id=body["id"])
        t0 = time.perf_counter()
        score_segment(seg, model, ood=ood)
        times.append(time.perf_counter() - t0)
    return float(np.median(times) * 1e3)


def _run(workers: int, segments: list[dict], n_requests: int, max_s: float, registry: Path,
         ref_ms: float) -> None:
    with serve_process(registry, workers=workers, env={"DIPSHAPE_MAX_QUEUE": "1000"}) as served:
        base = served.base_url
        with httpx.Client(base_url=base, timeout=60.0) as c:
            for body in segments[:20]:  # warm-up (first requests allocate and load lazily)
                c.post("/v1/score", json=body).raise_for_status()
            # one client: the service's overhead over in-process scoring
            single, ratios = [], []
            for body in segments[: min(40, len(segments))]:
                t0 = time.perf_counter()
                r = c.post("/v1/score", json=body)
                r.raise_for_status()
                lat = time.perf_counter() - t0
                single.append(lat)
                # the same request's in-process scoring time, measured by the server
                ratios.append(lat * 1e3 / r.json()["elapsed_ms"])
        single_ms = float(np.median(single) * 1e3)

        local = threading.local()  # one connection per client thread, reused

        def one(i: int) -> tuple[float, int]:
            if not hasattr(local, "client"):
                local.client = httpx.Client(base_url=base, timeout=60.0)
            t0 = time.perf_counter()
            r = local.client.post("/v1/score", json=segments[i % len(segments)])
            return time.perf_counter() - t0, r.status_code

        start = time.perf_counter()
        latencies, errors = [], 0
        with ThreadPoolExecutor(max_workers=workers) as pool:
            futures = [pool.submit(one, i) for i in range(n_requests)]
            for f in futures:
                remaining = max_s - (time.perf_counter() - start)
                if remaining <= 0:
                    f.cancel()
                    continue
                lat, status = f.result(timeout=remaining)
                latencies.append(lat)
                errors += status != 200
        wall = time.perf_counter() - start
        lat = np.array(latencies) * 1e3
        tree = served.process_tree()
        rss = [memory_mb(p, "VmHWM") for p in (tree[1:] or tree)]  # workers, else the server
        print(f"{workers} worker(s), {workers} client(s): {len(lat) / wall:6.1f} req/s, "
              f"p50 {np.percentile(lat, 50):6.1f} ms, p99 {np.percentile(lat, 99):6.1f} ms, "
              f"{errors} errors in {len(lat)} requests")
        print(f"  one client: p50 {single_ms:.1f} ms vs in-process {ref_ms:.1f} ms -> "
              f"{single_ms / ref_ms:.2f}x; per request, latency / the server's own scoring "
              f"time: median {np.median(ratios):.2f}x (goal <= 1.5x)")
        print("  peak RSS per process [MB]: " + ", ".join(f"{r:.0f}" for r in rss)
              + " (goal <= 300)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--requests", type=int, default=120)
    parser.add_argument("--max-seconds", type=float, default=60.0)
    parser.add_argument("--registry", type=Path, default=REPO / "models")
    args = parser.parse_args()
    segments = _segments(40)
    ref_ms = _in_process_ms(segments, args.registry)
    print(f"2,000-point segments; in-process scoring p50 {ref_ms:.1f} ms")
    for workers in (1, 2):
        _run(workers, segments, args.requests, args.max_seconds, args.registry, ref_ms)


if __name__ == "__main__":
    main()
