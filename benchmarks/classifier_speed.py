"""Fit time and prediction throughput of every cascade classifier kind, one thread.

Synthetic, seeded problem shaped like a pixel-classification training set: 200 000 rows of 40
float32 features (correlated Gaussian "filter responses"), a non-linear target from a few of them,
and balancing weights as the cascade would pass them. Every kind is fitted with its defaults and
`threads=1`; prediction is timed on 200 000 fresh rows, after a round trip through its stored
state (the path used when the cascade predicts). For the tree kinds the numpy fallback descent is
timed too. Accuracy on the fresh rows is printed as a sanity check, not as a result.

Run from the repository root: .venv/bin/python benchmarks/classifier_speed.py
"""

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

from tessera.cascade.classifiers import KINDS, classifier_from_state, make_classifier  # noqa: E402

ROWS, FEATURES, SEED = 200_000, 40, 0


def make_data(seed):
    rng = np.random.default_rng(seed)
    mixing = np.random.default_rng(SEED).normal(size=(FEATURES, FEATURES)) / np.sqrt(FEATURES)
    X = (rng.normal(size=(ROWS, FEATURES)) @ mixing).astype(np.float32)
    score = X[:, 0] * X[:, 1] + np.sin(2 * X[:, 2]) + 0.5 * X[:, 3] ** 2 - 0.6
    y = (score + 0.3 * rng.normal(size=ROWS) > 0).astype(np.uint8)
    return X, y


def main():
    X, y = make_data(SEED + 1)
    Xt, yt = make_data(SEED + 2)
    fraction = y.mean()
    w = np.where(y == 1, 0.5 / fraction, 0.5 / (1 - fraction))
    rows, figures = [], {"rows": ROWS, "features": FEATURES, "threads": 1, "kinds": {}}
    for kind in KINDS:
        start = time.perf_counter()
        clf = make_classifier(kind, seed=SEED, threads=1).fit(X, y, sample_weight=w)
        fit_s = time.perf_counter() - start
        loaded = classifier_from_state(*clf.to_state(), threads=1)
        start = time.perf_counter()
        p = loaded.predict(Xt)
        predict_s = time.perf_counter() - start
        entry = {
            "fit_seconds": round(fit_s, 3),
            "predict_mrows_per_s": round(ROWS / predict_s / 1e6, 3),
            "accuracy": round(float(((p > 0.5) == (yt == 1)).mean()), 4),
        }
        rows += [
            (f"{kind} fit", fit_s, "s"),
            (f"{kind} predict", entry["predict_mrows_per_s"], "Mrows/s"),
            (f"{kind} accuracy", entry["accuracy"], ""),
        ]
        if hasattr(loaded, "_compiled"):
            loaded._compiled = False  # force the numpy level-by-level descent
            start = time.perf_counter()
            loaded.predict(Xt[:50_000])
            numpy_rate = 50_000 / (time.perf_counter() - start) / 1e6
            entry["predict_numpy_fallback_mrows_per_s"] = round(numpy_rate, 3)
            rows.append((f"{kind} predict, numpy fallback", numpy_rate, "Mrows/s"))
        figures["kinds"][kind] = entry
    report("classifier_speed", rows, figures)


if __name__ == "__main__":
    main()
