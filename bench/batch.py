"""Batch scoring throughput: the same segments on 1 and 2 local Dask workers.

Prints, measured in this run (wall time):
- throughput [segments/s] of ``service.batch.run_batch`` on a ``distributed.LocalCluster`` of
  1 and then 2 worker processes (one thread each) for the same simulated segments in one
  Parquet long table, and the speed-up of 2 workers over 1. "run" counts from the call to the
  last part written, so it includes shipping the model to the workers; "steady" counts the
  segments finished after every worker delivered its first part, over the time since then
  (the rate once every worker is busy). Cluster start-up is printed apart: on an existing
  cluster it is not paid per run.
- the per-segment cost of 2,000- and 20,000-point segments scored in this process.

The load average of the machine is printed before and after: other work on the same cores
lowers the speed-up.

    .venv/bin/python bench/batch.py [--n 2000] [--points 2000] [--registry models]
"""

from __future__ import annotations

import sys
from pathlib import Path

# bench/features.py is named like the package: keep this folder off the import path
sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != Path(__file__).parent.resolve()]

import argparse  # noqa: E402
import os  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from features.catalog import FEATURE_VERSION  # noqa: E402
from service.batch import PortableModel, cluster_client, plan_inputs, run_batch  # noqa: E402
from service.scoring import load_ood  # noqa: E402
from training.registry import load_model  # noqa: E402
from training.simulate import simulate_dataset  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
CADENCE_MIN = 2.0


def _table(n: int, points: int, seed: int, path: Path) -> Path:
    """n simulated segments of about ``points`` points as one long table."""
    sims = simulate_dataset(n, seed=seed, cadence_min=CADENCE_MIN,
                            window_days=points * CADENCE_MIN / 1440.0, id_prefix=f"B{seed}-")
    frames = []
    for s in sims:
        err = s.flux_err
        if err is None:  # the table has one schema: a scatter estimate where none was drawn
            scatter = 1.4826 * np.median(np.abs(np.diff(s.flux[np.isfinite(s.flux)]))) / 2**0.5
            err = np.full(s.time.size, scatter)
        frames.append(pd.DataFrame({"segment_id": s.id, "time": s.time, "flux": s.flux,
                                    "flux_err": err}))
    pd.concat(frames, ignore_index=True).to_parquet(path, index=False)
    return path


def _cluster_run(table: Path, portable: PortableModel, workers: int, chunk: int,
                 tmp: Path) -> dict[str, float]:
    t0 = time.perf_counter()
    with cluster_client(workers=workers) as client:
        started = time.perf_counter() - t0
        plan = plan_inputs([table], chunk_size=chunk)
        marks: list[tuple[float, int]] = []
        sizes = [sum(p.stop - p.start for p in c) for c in plan.chunks]

        def mark(index: int) -> None:
            marks.append((time.perf_counter(), sizes[index]))

        t1 = time.perf_counter()
        summary = run_batch(plan, portable, tmp / f"out-{workers}", client=client,
                            on_part=mark)
        run = time.perf_counter() - t1
    assert summary.complete and summary.n_records == plan.n_units, summary.text()
    # once every worker has delivered its first part: segments since / time since
    later = sum(n for _, n in marks[workers:])
    steady = later / (marks[-1][0] - marks[workers - 1][0]) if len(marks) > workers \
        else float("nan")
    return {"start": started, "run": run, "rate": plan.n_units / run, "steady": steady,
            "failed": summary.failed}


def _in_process_ms(table: Path, portable: PortableModel, tmp: Path, name: str) -> float:
    plan = plan_inputs([table], chunk_size=64)
    t0 = time.perf_counter()
    summary = run_batch(plan, portable, tmp / name)
    return (time.perf_counter() - t0) / summary.n_records * 1e3


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--n", type=int, default=2000, help="segments of the throughput runs")
    parser.add_argument("--points", type=int, default=2000, help="points per segment")
    parser.add_argument("--chunk-size", type=int, default=64)
    parser.add_argument("--n-cost", type=int, default=20,
                        help="segments of each per-segment cost run")
    parser.add_argument("--registry", type=Path, default=REPO / "models")
    args = parser.parse_args()
    print(f"load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())} "
          f"({os.cpu_count()} cores)")
    model = load_model(args.registry, expected_feature_version=FEATURE_VERSION)
    portable = PortableModel.from_registry(args.registry, model,
                                           load_ood(args.registry, model.card.version))
    with tempfile.TemporaryDirectory(prefix="dipshape-bench-") as name:
        tmp = Path(name)
        t0 = time.perf_counter()
        table = _table(args.n, args.points, 1, tmp / "lumen_batch.parquet")
        print(f"model {model.card.version}; {args.n} simulated segments of {args.points} "
              f"points in one long table ({time.perf_counter() - t0:.1f} s to simulate); "
              f"chunks of {args.chunk_size}")
        results = {}
        for workers in (1, 2):
            r = results[workers] = _cluster_run(table, portable, workers, args.chunk_size, tmp)
            print(f"  {workers} worker(s): cluster start {r['start']:5.1f} s; run "
                  f"{r['run']:6.1f} s -> {r['rate']:6.1f} segments/s "
                  f"(steady {r['steady']:6.1f}/s); {r['failed']:.0f} failed")
        print(f"  speed-up 2 workers / 1: {results[2]['rate'] / results[1]['rate']:.2f}x "
              f"run, {results[2]['steady'] / results[1]['steady']:.2f}x steady (goal >= 1.7x "
              "on 2 cores)")
        costs = {}
        for points in (2000, 20000):
            small = _table(args.n_cost, points, 2, tmp / f"cost-{points}.parquet")
            costs[points] = _in_process_ms(small, portable, tmp, f"cost-{points}")
            print(f"  in-process, {points:6d} points: {costs[points]:7.1f} ms per segment")
        print(f"  20,000 / 2,000 points: {costs[20000] / costs[2000]:.1f}x the cost for 10x "
              "the points")
    print(f"load average after: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")


if __name__ == "__main__":
    main()
