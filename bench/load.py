"""REST service under load: sustained throughput, latency, errors and memory; then overload.

Two phases, both on loopback, both bounded in request count and in time:

1. **Sustained.** Starts ``dipshape serve`` on a free loopback port (``--workers``, default 2;
   or uses the running service at ``--url``, loopback only), warms it up with every segment
   once, then runs ``--clients`` concurrent clients (asyncio + ``httpx.AsyncClient``, default
   8) for ``--seconds`` (default 30, at most 60), each sending 2,000-point simulated segments
   of the fictional Lumen Survey to ``POST /v1/score`` one after the other. Prints requests/s,
   p50/p99 latency of the 200 answers, the errors by status (goal: 0), and the resident memory
   (VmRSS from /proc) of each server process after the warm-up and at the end, with its growth
   (goal <= 10 %).
2. **Overload.** Starts a second server with one worker, one scoring thread and a small queue
   (``DIPSHAPE_MAX_QUEUE=2``) and fires ``--burst`` requests (default 40) at once: prints how
   many got 200 and how many 503, whether every 503 carries ``Retry-After`` and the
   ``overloaded`` error, and the p50/max time to answer a 503 and a 200 (a refusal should take
   milliseconds, not a scoring slot), then whether a request after the burst succeeds.

``DIPSHAPE_*`` variables of your environment reach both servers (the overload one then sets
``MAX_QUEUE`` and ``MAX_CONCURRENCY`` itself). The client runs on the same machine as the server
and competes with it for the cores; say what else was running when you quote the figures.

    .venv/bin/python bench/load.py [--workers 2] [--clients 8] [--seconds 30] [--url URL]
                                   [--burst 40] [--no-overload] [--registry models]
"""

from __future__ import annotations

import sys
from pathlib import Path

# bench/features.py is named like the package: keep this folder off the import path
sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != Path(__file__).parent.resolve()]

import argparse  # noqa: E402
import asyncio  # noqa: E402
import contextlib  # noqa: E402
import json  # noqa: E402
import math  # noqa: E402
import time  # noqa: E402
from collections import Counter  # noqa: E402
from collections.abc import Iterator, Mapping  # noqa: E402
from dataclasses import dataclass, field  # noqa: E402

import httpx  # noqa: E402
import numpy as np  # noqa: E402

from service.local import memory_mb, process_tree, serve_process  # noqa: E402
from service.settings import is_loopback  # noqa: E402
from training.classes import CLASSES  # noqa: E402
from training.simulate import simulate_segment  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
MAX_SECONDS = 60.0
"""Hard cap of the sustained phase [s], whatever ``--seconds`` says."""
READY_S = 60.0
"""How long a started server may take to answer 200 on /readyz [s]."""
GRACE_S = 10.0
"""How long requests in flight at the end of the sustained phase may still take [s]."""
STOP_S = 20.0
"""How long a server may take to exit after SIGTERM before it is killed [s]."""
RSS_GOAL_PCT = 10.0


# --------------------------------------------------------------------------------------------
# Segments, servers, processes
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Body:
    """One request body, encoded once so the client spends no time on JSON in the loop."""

    id: str
    content: bytes


def make_bodies(n: int, *, seed: int = 7000) -> list[Body]:
    """``n`` 2,000-point simulated segments (10-min cadence over 13.9 d), NaN sent as null.

    Parameters
    ----------
    n : int
        How many segments; the classes take turns.
    seed : int
        Segment ``i`` is drawn from ``numpy.random.default_rng(seed + i)``.

    Returns
    -------
    list of Body
    """
    out = []
    for i in range(n):
        sid = f"LS-{seed + i:04d}-s1"
        sim = simulate_segment(CLASSES[i % len(CLASSES)], np.random.default_rng(seed + i),
                               id=sid, cadence_min=10.0, window_days=13.9)
        doc = {"id": sid, "time": sim.time.tolist(),
               "flux": [f if math.isfinite(f) else None for f in sim.flux.tolist()]}
        out.append(Body(sid, json.dumps(doc, allow_nan=False).encode()))
    return out


@contextlib.contextmanager
def serve(workers: int, registry: Path, env: Mapping[str, str]) -> Iterator[tuple[str, int]]:
    """Run ``dipshape serve`` on a free loopback port until the block ends.

    Parameters
    ----------
    workers : int
        uvicorn worker processes.
    registry : Path
        Model registry folder.
    env : mapping
        ``DIPSHAPE_*`` settings for the server.

    Yields
    ------
    (str, int)
        The base URL and the pid of the server process.
    """
    with serve_process(registry, workers=workers, env=env, ready_timeout_s=READY_S,
                       stop_timeout_s=STOP_S) as served:
        yield served.base_url, served.pid


def _role(pid: int, root: int, *, single: bool) -> str:
    try:
        cmd = Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode()
    except OSError:
        return "gone"
    if "resource_tracker" in cmd:
        return "resource tracker"
    if pid == root:
        return "server" if single else "supervisor"
    return "worker"


# --------------------------------------------------------------------------------------------
# Phase 1: sustained load
# --------------------------------------------------------------------------------------------


@dataclass
class Tally:
    """What a run of requests got back."""

    latencies_s: list[float] = field(default_factory=list)
    """Time to answer of each 200."""
    errors: Counter[str] = field(default_factory=Counter)
    """Everything that was not a 200 carrying its own id: status codes, exception names."""
    answered: int = 0
    """Requests that got an HTTP answer (any status)."""
    unanswered: int = 0
    """Requests that got no answer (connection error, timeout)."""

    def error_text(self) -> str:
        """``0`` or ``503 x3, ReadTimeout x1``."""
        if not self.errors:
            return "0"
        return ", ".join(f"{k} x{v}" for k, v in sorted(self.errors.items()))


async def _post(client: httpx.AsyncClient, body: Body, timeout_s: float) -> httpx.Response:
    return await client.post("/v1/score", content=body.content, timeout=timeout_s,
                             headers={"Content-Type": "application/json"})


async def _client_loop(client: httpx.AsyncClient, bodies: list[Body], first: int, step: int,
                       deadline: float, tally: Tally) -> None:
    k = first
    while (now := time.monotonic()) < deadline:
        body = bodies[k % len(bodies)]
        k += step
        t0 = time.perf_counter()
        try:
            r = await _post(client, body, min(MAX_SECONDS, deadline + GRACE_S - now))
        except httpx.HTTPError as exc:
            tally.errors[type(exc).__name__] += 1
            tally.unanswered += 1
            continue
        elapsed = time.perf_counter() - t0
        tally.answered += 1
        if r.status_code != 200:
            tally.errors[str(r.status_code)] += 1
        elif r.json().get("id") != body.id:
            tally.errors["200 with another id"] += 1
        else:
            tally.latencies_s.append(elapsed)


async def sustained(base: str, bodies: list[Body], clients: int,
                    seconds: float) -> tuple[Tally, float]:
    """``clients`` clients, each posting one segment after another for ``seconds``.

    Returns
    -------
    (Tally, float)
        What came back, and the wall time [s] from the start to the last answer.
    """
    tally = Tally()
    limits = httpx.Limits(max_connections=clients, max_keepalive_connections=clients)
    async with httpx.AsyncClient(base_url=base, limits=limits) as client:
        start = time.perf_counter()
        deadline = time.monotonic() + seconds
        await asyncio.gather(*(_client_loop(client, bodies, i, clients, deadline, tally)
                               for i in range(clients)))
        return tally, time.perf_counter() - start


async def warm_up(base: str, bodies: list[Body], clients: int) -> Tally:
    """Every segment once, ``clients`` at a time (first calls, lazy imports, every worker)."""
    tally = Tally()
    limits = httpx.Limits(max_connections=clients, max_keepalive_connections=clients)
    async with httpx.AsyncClient(base_url=base, limits=limits) as client:
        deadline = time.monotonic() + MAX_SECONDS

        async def one_each(first: int) -> None:
            for k in range(first, len(bodies), clients):
                if time.monotonic() >= deadline:
                    return
                try:
                    r = await _post(client, bodies[k], MAX_SECONDS)
                except httpx.HTTPError as exc:
                    tally.errors[type(exc).__name__] += 1
                    tally.unanswered += 1
                    continue
                tally.answered += 1
                if r.status_code != 200:
                    tally.errors[str(r.status_code)] += 1

        await asyncio.gather(*(one_each(i) for i in range(clients)))
    return tally


def _rss_table(root: int, *, single: bool) -> dict[int, tuple[str, float]]:
    """Role and VmRSS [MB] of the server process and its descendants.

    ``single``: one worker, so uvicorn scores in the server process itself.
    """
    return {p: (_role(p, root, single=single), memory_mb(p)) for p in process_tree(root)}


def run_sustained(args: argparse.Namespace, bodies: list[Body]) -> None:
    """Phase 1: print throughput, latency, errors and memory growth."""
    seconds = min(args.seconds, MAX_SECONDS)
    with contextlib.ExitStack() as stack:
        if args.url:
            base, root = args.url.rstrip("/"), None
            where = f"the service at {base}"
        else:
            base, root = stack.enter_context(serve(args.workers, args.registry, {}))
            where = f"dipshape serve, {args.workers} worker(s)"
        warm = asyncio.run(warm_up(base, bodies, args.clients))
        single = args.workers == 1
        before = _rss_table(root, single=single) if root is not None else {}
        tally, wall = asyncio.run(sustained(base, bodies, args.clients, seconds))
        after = _rss_table(root, single=single) if root is not None else {}

    print(f"sustained: {where}, {args.clients} clients for {seconds:g} s, "
          f"2,000-point segments ({len(bodies)} distinct)")
    if warm.errors:
        print(f"  warm-up errors: {warm.error_text()} in {warm.answered} answers")
    lat = np.array(tally.latencies_s) * 1e3
    done = tally.answered + tally.unanswered
    print(f"  {len(lat) / wall:6.1f} requests/s ({len(lat)} x 200 in {wall:.1f} s)")
    if lat.size:
        print(f"  latency of a 200: p50 {np.percentile(lat, 50):7.1f} ms, "
              f"p99 {np.percentile(lat, 99):7.1f} ms, max {lat.max():7.1f} ms")
    print(f"  errors: {tally.error_text()} in {done} requests (goal 0)")
    if root is None:
        print("  RSS: not measured (--url: the server processes are not this script's)")
        return
    print(f"  RSS after warm-up -> at end [MB] (goal: growth <= {RSS_GOAL_PCT:g} %):")
    growths = []
    for pid, (role, mb0) in before.items():
        mb1 = after.get(pid, ("gone", float("nan")))[1]
        growth = 100.0 * (mb1 - mb0) / mb0
        if role in ("worker", "server"):
            growths.append(growth)
        print(f"    pid {pid:>7} {role:<16} {mb0:7.1f} -> {mb1:7.1f} ({growth:+.1f} %)")
    for pid in sorted(set(after) - set(before)):
        print(f"    pid {pid:>7} {after[pid][0]:<16} new during the run: {after[pid][1]:.1f} MB")
    if growths:
        worst = max(growths)
        verdict = "within" if worst <= RSS_GOAL_PCT else "ABOVE"
        print(f"  largest growth of a scoring process: {worst:+.1f} % ({verdict} the goal)")


# --------------------------------------------------------------------------------------------
# Phase 2: overload
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Answer:
    """One answer of the overload phase."""

    status: int | str
    """HTTP status, or the name of the exception when there was no answer."""
    elapsed_s: float
    retry_after: str | None = None
    error: str | None = None


async def _answer(client: httpx.AsyncClient, body: Body, timeout_s: float) -> Answer:
    t0 = time.perf_counter()
    try:
        r = await _post(client, body, timeout_s)
    except httpx.HTTPError as exc:
        return Answer(type(exc).__name__, time.perf_counter() - t0)
    elapsed = time.perf_counter() - t0
    try:
        error = r.json().get("error") if r.status_code != 200 else None
    except ValueError:
        error = "not JSON"
    return Answer(r.status_code, elapsed, r.headers.get("Retry-After"), error)


async def burst(base: str, bodies: list[Body], n: int) -> list[Answer]:
    """``n`` requests fired at once, each on its own connection."""
    limits = httpx.Limits(max_connections=n, max_keepalive_connections=n)
    async with httpx.AsyncClient(base_url=base, limits=limits) as client:
        return await asyncio.gather(*(_answer(client, bodies[i % len(bodies)], MAX_SECONDS)
                                      for i in range(n)))


async def probe_when_full(base: str, bodies: list[Body], capacity: int,
                          probes: int) -> list[Answer]:
    """One request at a time while ``capacity`` clients keep every slot and queue place taken.

    Each of the ``capacity`` pressing clients has one request in flight at a time, so they fill
    the scoring slots and the queue without being refused themselves; a probe arriving then
    finds the service full (or, in the few milliseconds between one pressing request and the
    next, a free place: it then gets a 200).
    """
    stop = asyncio.Event()
    limits = httpx.Limits(max_connections=capacity, max_keepalive_connections=capacity)
    async with (httpx.AsyncClient(base_url=base, limits=limits) as pressing,
                httpx.AsyncClient(base_url=base) as prober):

        async def press(first: int) -> None:
            k = first
            while not stop.is_set():
                with contextlib.suppress(httpx.HTTPError):
                    await _post(pressing, bodies[k % len(bodies)], MAX_SECONDS)
                k += capacity

        tasks = [asyncio.create_task(press(i)) for i in range(capacity)]
        try:
            await asyncio.sleep(0.5)  # every pressing request uploaded and admitted
            answers = []
            for j in range(probes):
                answers.append(await _answer(prober, bodies[j % len(bodies)], MAX_SECONDS))
                await asyncio.sleep(0.05)
        finally:
            stop.set()
            await asyncio.gather(*tasks)
    return answers


def _ms(answers: list[Answer]) -> str:
    if not answers:
        return "none"
    t = np.array([a.elapsed_s for a in answers]) * 1e3
    return f"p50 {np.percentile(t, 50):7.1f} ms, max {t.max():7.1f} ms (n = {t.size})"


def _statuses(answers: list[Answer]) -> str:
    counts = Counter(str(a.status) for a in answers)
    return ", ".join(f"{v} x {k}" for k, v in sorted(counts.items()))


def _p50(answers: list[Answer]) -> float:
    return float(np.percentile([a.elapsed_s for a in answers], 50))


def run_overload(args: argparse.Namespace, bodies: list[Body]) -> None:
    """Phase 2: a burst far beyond what a small queue holds, then single requests when full."""
    env = {"DIPSHAPE_MAX_QUEUE": str(args.queue), "DIPSHAPE_MAX_CONCURRENCY": "1"}
    tiny = [Body("none", b"{}")]  # refused by validation (422) before any scoring
    with serve(1, args.registry, env) as (base, _):
        asyncio.run(warm_up(base, bodies[:2], 1))
        asyncio.run(burst(base, tiny, 1))  # the validation path's first call
        floor = asyncio.run(burst(base, tiny, args.burst))
        answers = asyncio.run(burst(base, bodies, args.burst))
        probes = asyncio.run(probe_when_full(base, bodies, 1 + args.queue, 10))
        after = asyncio.run(burst(base, bodies[:1], 1))[0]

    ok = [a for a in answers if a.status == 200]
    refused = [a for a in answers if a.status == 503]
    # RFC 9110 §10.2.3: Retry-After = HTTP-date / delay-seconds, delay-seconds = 1*DIGIT
    with_retry = [a for a in refused if a.retry_after and a.retry_after.isdigit()]
    overloaded = [a for a in refused if a.error == "overloaded"]
    print(f"overload: 1 worker, 1 scoring thread, DIPSHAPE_MAX_QUEUE={args.queue} "
          f"(room for {1 + args.queue})")
    print(f"  reference, {args.burst} tiny invalid bodies at once (422, no scoring): "
          f"{_ms(floor)}")
    print(f"  {args.burst} segments at once: {_statuses(answers)}")
    print(f"    503 with a delay-seconds Retry-After: {len(with_retry)} of {len(refused)}; "
          f"error 'overloaded': {len(overloaded)} of {len(refused)}")
    print(f"    time to answer a 503: {_ms(refused)}")
    print(f"    time to answer a 200: {_ms(ok)}")
    if ok and refused:
        print(f"    p50 503 / p50 of the reference burst: {_p50(refused) / _p50(floor):.1f}x; "
              f"p50 200 / p50 503: {_p50(ok) / _p50(refused):.1f}x")
    p_refused = [a for a in probes if a.status == 503]
    print(f"  one request at a time while {1 + args.queue} clients keep it full: "
          f"{_statuses(probes)}")
    print(f"    time to answer a 503: {_ms(p_refused)}")
    print(f"  a request after the burst: {after.status} in {after.elapsed_s * 1e3:.1f} ms"
          + (f" (p50 200 / p50 503 when full: {after.elapsed_s / _p50(p_refused):.1f}x)"
             if p_refused and after.status == 200 else ""))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--workers", type=int, default=2, help="worker processes (default 2)")
    parser.add_argument("--url", help="a running service on loopback instead of starting one")
    parser.add_argument("--clients", type=int, default=8, help="concurrent clients (default 8)")
    parser.add_argument("--seconds", type=float, default=30.0,
                        help=f"length of the sustained phase [s] (default 30, at most "
                             f"{MAX_SECONDS:g})")
    parser.add_argument("--segments", type=int, default=40, help="distinct segments (40)")
    parser.add_argument("--burst", type=int, default=40, help="requests fired at once (40)")
    parser.add_argument("--queue", type=int, default=2, help="MAX_QUEUE of the overload "
                        "server (2)")
    parser.add_argument("--no-overload", action="store_true", help="skip the overload phase")
    parser.add_argument("--registry", type=Path, default=REPO / "models")
    args = parser.parse_args()
    if args.url and not is_loopback(httpx.URL(args.url).host):
        parser.error(f"--url must be a loopback address (127.0.0.1, ::1, localhost): {args.url}")
    if not (1 <= args.clients <= 64 and 1 <= args.burst <= 200 and 1 <= args.segments <= 200
            and 1 <= args.workers <= 8 and args.seconds > 0 and args.queue >= 0):
        parser.error("keep it bounded: 1-64 clients, 1-200 burst, 1-200 segments, 1-8 workers")

    bodies = make_bodies(args.segments)
    run_sustained(args, bodies)
    if not args.no_overload:
        run_overload(args, bodies)


if __name__ == "__main__":
    main()
