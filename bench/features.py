"""Feature-extraction speed: dipshape's extractor vs a plain fit-every-family approach.

For a 2,000-point event window (2-min cadence, one transit) and a 20,000-point 27-day sector
(2-min cadence, periodic transits), prints the median time of ``features.extract`` on one core
and of a plain approach: ``scipy.optimize.curve_fit`` of every shape family (transit, eclipse,
comet, sinusoid, box) on all points from default starting points, the way it is often done by
hand. Goals: 2,000 points <= 10 ms, 20,000 points <= 60 ms, >= 10x faster than the plain approach.
Times are CPU time of this process with one thread, so other work on the machine barely moves
them.

    .venv/bin/python bench/features.py [--repeat 15]
"""

from __future__ import annotations

import sys
from pathlib import Path

# this script is named like the package it measures: keep its own folder off the import path
sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != Path(__file__).parent.resolve()]

import argparse  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402
from scipy.optimize import OptimizeWarning, curve_fit  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

from features import shapes  # noqa: E402
from features.pipeline import extract  # noqa: E402
from features.segment import make_segment  # noqa: E402

CAD = 2.0 / 1440.0
GOAL_MS = {2000: 10.0, 20000: 60.0}


def _segment(n: int, rng: np.random.Generator):
    """Invented Lumen Survey segment: transits of a 3.1-day planet, 800 ppm noise."""
    t = 1500.0 + np.arange(n) * CAD
    clean = shapes.transit_flux(t, t0=t[0] + 0.5 * min(n * CAD, 3.1), period_days=3.1, k=0.08,
                                a_over_rstar=10.0, b=0.3, u1=0.4, u2=0.25)
    f = clean * (1 + 2e-3 * np.sin(2 * np.pi * t / 11.0)) + rng.normal(0, 8e-4, n)
    return make_segment(t, f, np.full(n, 8e-4), id=f"LS-bench-{n}")


def _plain(seg) -> None:
    """Fit every family with curve_fit on all points from default starting points."""
    t, f, e = seg.time, seg.flux, seg.flux_err
    mid = 0.5 * (t[0] + t[-1])
    span = t[-1] - t[0]
    models = {
        "transit": (lambda x, t0, k, a, b: shapes.transit_flux(
            x, t0=t0, period_days=span * 2, k=abs(k), a_over_rstar=abs(a) + 1.01,
            b=min(abs(b), 1.0), u1=0.4, u2=0.25), [mid, 0.1, 10.0, 0.3]),
        "eclipse": (lambda x, t0, k, a, b, l3: shapes.eclipsing_binary_flux(
            x, t0=t0, period_days=span * 2, radius_ratio=abs(k), a_over_r1=abs(a) + 2.0,
            b=min(abs(b), 1.0), surface_brightness_ratio=0.3, u1_primary=0.4, u2_primary=0.25,
            u1_secondary=0.4, u2_secondary=0.25, third_light=float(np.clip(l3, 0, 0.99))),
            [mid, 0.3, 10.0, 0.3, 0.5]),
        "comet": (lambda x, t0, c, tail, tau: shapes.comet_flux(
            x, t0=t0, crossing_time_days=abs(c) + 1e-3, b=0.3, tail_length_rstar=abs(tail) + 1e-3,
            peak_optical_depth=abs(tau), height_rstar=0.2, u1=0.4, u2=0.25),
            [mid, 0.3, 1.0, 0.01]),
        "sinusoid": (lambda x, a, p, ph, c: c + a * np.sin(2 * np.pi * x / p + ph),
                     [1e-3, 1.0, 0.0, 1.0]),
        "box": (lambda x, t0, d, depth: 1 - depth * (np.abs(x - t0) < abs(d) / 2),
                [mid, 0.1, 1e-3]),
    }
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OptimizeWarning)
        for fn, p0 in models.values():
            try:
                curve_fit(fn, t, f, p0=p0, sigma=e, maxfev=2000)
            except Exception:  # a failed fit still cost its time
                pass


def _median_ms(fn, repeat: int) -> float:
    # CPU time of this process (one thread): robust to other work on a shared machine
    times = []
    for _ in range(repeat):
        t0 = time.process_time()
        fn()
        times.append(time.process_time() - t0)
    return float(np.median(times) * 1e3)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--repeat", type=int, default=15)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    with threadpool_limits(1):
        warm = _segment(2000, rng)
        extract(warm)  # builds the profile banks once per process
        print("feature extraction, one core, median of repeated runs")
        for n in (2000, 20000):
            seg = _segment(n, rng)
            ours = _median_ms(lambda s=seg: extract(s), args.repeat)
            plain = _median_ms(lambda s=seg: _plain(s), max(3, args.repeat // 5))
            print(f"  {n:6d} points: dipshape {ours:7.1f} ms (goal <= {GOAL_MS[n]:g} ms, "
                  f"ratio to goal {ours / GOAL_MS[n]:.2f}); plain curve_fit of every family "
                  f"{plain:8.1f} ms; speed-up {plain / ours:5.1f}x (goal >= 10x)")


if __name__ == "__main__":
    main()
