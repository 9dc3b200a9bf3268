"""Test helper: another process that adds labels to a store and acknowledges each one.

Usage::

    python _store_writer.py DB PREFIX COUNT [--wait]

Opens the store at ``DB``; with ``--wait`` prints ``ready`` and waits for one line on stdin (so
that several writers can be started together). Then adds ``COUNT`` labels (0: until killed) with
ids ``LS-<PREFIX>-00000``, ``LS-<PREFIX>-00001``... of the fictional Lumen Survey, and prints
each ``label_id`` on its own line, flushed, right after ``add_label`` has returned: a line on
stdout is an acknowledged label.
"""

from __future__ import annotations

import argparse
import itertools
import sys

import numpy as np

from features.segment import make_segment
from service.store import LabelStore


def _segment(rng: np.random.Generator, seg_id: str):
    """An invented segment: white noise with one box-shaped dip (demo data, not a model)."""
    time = 1400.0 + np.arange(61) * (2.0 / 1440.0)
    flux = 1000.0 * (1.0 + rng.normal(0.0, 1e-3, time.size))
    flux[25:35] *= 0.995
    return make_segment(time, flux, np.full(time.size, 1.0), id=seg_id)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("db")
    parser.add_argument("prefix")
    parser.add_argument("count", type=int)
    parser.add_argument("--wait", action="store_true")
    args = parser.parse_args(argv)
    rng = np.random.default_rng(list(args.prefix.encode()))
    with LabelStore(args.db) as store:
        if args.wait:
            print("ready", flush=True)
            sys.stdin.readline()
        numbers = itertools.count() if args.count == 0 else range(args.count)
        for i in numbers:
            stored = store.add_label(_segment(rng, f"LS-{args.prefix}-{i:05d}"), "planet",
                                     submitter=f"writer-{args.prefix}")
            print(stored.label_id, flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
