"""Simulation rate: segments per second on one core, for 2,000-point segments.

Prints the rate per class and overall (goal: >= 300 segments/s per core), and the rate for the
default observing priors (mixed lengths), measured in this run.

    .venv/bin/python bench/simulate.py [--n 1000]
"""

from __future__ import annotations

import sys
from pathlib import Path

# bench/features.py is named like the package: keep this folder off the import path
sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != Path(__file__).parent.resolve()]

import argparse  # noqa: E402
import time  # noqa: E402

from threadpoolctl import threadpool_limits  # noqa: E402

from training.classes import CLASSES  # noqa: E402
from training.simulate import simulate_dataset  # noqa: E402

N_POINTS = 2000
CADENCE_MIN = 2.0


def _rate(n: int, **kwargs) -> tuple[float, float]:
    t0 = time.perf_counter()
    segs = simulate_dataset(n, n_jobs=1, **kwargs)
    dt = time.perf_counter() - t0
    points = sum(s.time.size for s in segs) / len(segs)
    return n / dt, points


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--n", type=int, default=1000, help="segments per measurement")
    args = parser.parse_args()
    window = N_POINTS * CADENCE_MIN / 1440.0
    with threadpool_limits(1):
        simulate_dataset(20, seed=99, cadence_min=CADENCE_MIN, window_days=window)  # warm-up
        print(f"simulation rate, one core, {N_POINTS}-point segments ({CADENCE_MIN:g}-min cadence)")
        for label in CLASSES:
            rate, _ = _rate(max(args.n // 5, 50), seed=1, classes=(label,),
                            cadence_min=CADENCE_MIN, window_days=window)
            print(f"  {label:18s} {rate:8.0f} segments/s")
        rate, _ = _rate(args.n, seed=2, cadence_min=CADENCE_MIN, window_days=window)
        print(f"  {'all classes':18s} {rate:8.0f} segments/s   (goal >= 300/s; ratio to goal "
              f"{rate / 300:.2f})")
        rate, pts = _rate(max(args.n // 2, 50), seed=3)
        print(f"  default priors     {rate:8.0f} segments/s   (mean {pts:.0f} points/segment)")


if __name__ == "__main__":
    main()
