"""Detection timing: detrend + dip search + period test, one core, median of repeated runs.

Prints the median time of each step (and the sum of the fastest runs, a guide on a shared
machine) for a 2,000-point segment (2-min cadence, 2.8 days, one
dip) and a 20,000-point sector (2-min cadence, 27.8 days, periodic transits, so the period test
runs too), with spot-like variability and white noise, measured in this run. Targets for this
part of the feature extraction: about 3 ms and 20 ms.

    .venv/bin/python bench/detect.py [--repeat 30]
"""

from __future__ import annotations

import sys
from pathlib import Path

# bench/features.py is named like the package: keep this folder off the import path
sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != Path(__file__).parent.resolve()]

import argparse  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

from features.detrend import detrend  # noqa: E402
from features.events import estimate_period, search_dips  # noqa: E402

CADENCE_DAYS = 2.0 / 1440.0
TARGET_MS = {2000: 3.0, 20000: 20.0}


def _segment(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Invented segment: 0.5 % variability of 9-day period, 1e-3 noise, box-shaped dips."""
    t = 1000.0 + np.arange(n) * CADENCE_DAYS
    f = 1.0 + 0.005 * np.sin(2 * np.pi * t / 9.0)
    if n <= 5000:
        f *= 1.0 - 0.004 * (np.abs(t - t.mean()) < 0.1)
    else:
        phase = (t - 1001.3 + 1.7) % 3.4 - 1.7
        f *= 1.0 - 0.004 * (np.abs(phase) < 0.06)
    sigma = 1e-3
    return t, f + rng.normal(0.0, sigma, n), np.full(n, sigma)


def _median_ms(fn, repeat: int) -> tuple[float, float, object]:
    """(median, minimum) wall time [ms] over ``repeat`` runs, and the last result."""
    out = fn()  # warm-up (imports, caches)
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return 1e3 * float(np.median(times)), 1e3 * float(np.min(times)), out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--repeat", type=int, default=30, help="runs per measurement")
    args = parser.parse_args()
    rng = np.random.default_rng(2024)
    with threadpool_limits(1):
        print("detection timing, one core, median of", args.repeat, "runs [ms]")
        for n in (2000, 20000):
            t, f, e = _segment(n, rng)
            ms_d, min_d, d = _median_ms(lambda t=t, f=f, e=e: detrend(t, f, e), args.repeat)
            ms_s, min_s, events = _median_ms(
                lambda t=t, d=d, e=e: search_dips(t, d.flux, e, sigma_white=d.sigma_white,
                                                  beta_red=d.beta_red), args.repeat)
            ms_p, min_p, eph = _median_ms(
                lambda t=t, d=d, e=e, ev=events: estimate_period(
                    t, d.flux, e, ev, sigma_white=d.sigma_white, beta_red=d.beta_red),
                args.repeat)
            total = ms_d + ms_s + ms_p
            fastest = min_d + min_s + min_p
            period = f"{eph.period_days:.4f} d" if eph is not None else "none"
            print(f"  {n:6d} points: detrend {ms_d:6.2f}  search {ms_s:6.2f} "
                  f"({len(events)} events)  period {ms_p:6.2f} ({period})  "
                  f"total {total:6.2f}   target {TARGET_MS[n]:.0f}, "
                  f"ratio {total / TARGET_MS[n]:.2f}   (fastest runs: {fastest:.2f})")


if __name__ == "__main__":
    main()
