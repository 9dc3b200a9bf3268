"""Scoring speed and quality: the shipped model vs the BIC model-comparison baseline.

Prints, measured in this run on one core (CPU time, one thread):
- per-segment scoring time (features + predict) of the active model for 2,000- and 20,000-point
  segments;
- on the same fresh simulated set, macro-F1 of the model and of the baseline that labels each
  segment by its lowest-BIC shape family (training/baseline.py), and the time of each per
  segment. The baseline shares the extractor's fits, so its cost is the extraction; the cost of
  fitting every family the plain way is in bench/features.py.

    .venv/bin/python bench/score.py [--n 300] [--registry models]
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

from features.catalog import FEATURE_VERSION  # noqa: E402
from features.segment import make_segment  # noqa: E402
from service.scoring import score_segment  # noqa: E402
from training import report  # noqa: E402
from training.baseline import predict_baseline  # noqa: E402
from training.dataset import simulated_table  # noqa: E402
from training.registry import load_model  # noqa: E402
from training.simulate import simulate_dataset  # noqa: E402

REPO = Path(__file__).resolve().parents[1]


def _median_ms(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.process_time()
        fn()
        times.append(time.process_time() - t0)
    return float(np.median(times) * 1e3)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--n", type=int, default=300, help="fresh simulated segments")
    parser.add_argument("--registry", type=Path, default=REPO / "models")
    parser.add_argument("--min-dip-snr", type=float, default=10.0,
                        help="detection selection of the set (as in the training presets)")
    args = parser.parse_args()
    with threadpool_limits(1):
        model = load_model(args.registry, expected_feature_version=FEATURE_VERSION)
        print(f"model {model.card.version}; one core, CPU time")
        for n_points, cadence in ((2000, 2.0), (20000, 2.0)):
            sims = simulate_dataset(10, seed=5, classes=("planet", "exocomet"),
                                    cadence_min=cadence, window_days=n_points * cadence / 1440)
            segs = [make_segment(s.time, s.flux, s.flux_err, id=s.id) for s in sims]
            score_segment(segs[0], model)  # warm-up
            ms = np.median([_median_ms(lambda s=s: score_segment(s, model), 3) for s in segs])
            print(f"  {n_points:6d} points: {ms:6.1f} ms per segment (features + predict)")
        t0 = time.process_time()
        table = simulated_table(args.n, seed=2468, min_dip_snr=args.min_dip_snr)
        t_features = (time.process_time() - t0) / args.n
        from training.dataset import feature_matrix
        from training.train import ordered_proba

        t0 = time.process_time()
        proba = ordered_proba(model.estimator, feature_matrix(table), list(model.card.classes))
        t_predict = (time.process_time() - t0) / args.n
        t0 = time.process_time()
        base = predict_baseline(table)
        t_base = (time.process_time() - t0) / args.n
        y = table["label"].to_numpy(dtype=str)
        m_model = report.evaluate(y, proba, list(model.card.classes))
        m_base = report.evaluate(y, None, list(model.card.classes), y_pred=base)
        print(f"  fresh simulated set of {args.n}, dips selected at SNR >= {args.min_dip_snr:g} "
              f"(simulation + features "
              f"{t_features * 1e3:.1f} ms per segment)")
        print(f"    model    macro-F1 {m_model['macro_f1']:.3f}  ECE {m_model['ece']:.3f}  "
              f"predict {t_predict * 1e3:.2f} ms per segment (batched)")
        print(f"    baseline macro-F1 {m_base['macro_f1']:.3f}  (lowest-BIC family)  "
              f"{t_base * 1e3:.3f} ms per segment on top of the same features")
        print(f"    macro-F1 ratio model/baseline {m_model['macro_f1'] / m_base['macro_f1']:.2f}")


if __name__ == "__main__":
    main()
