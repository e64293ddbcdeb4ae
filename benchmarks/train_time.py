"""Training time of a 2 stages x 2 levels cascade on 20 tiles of 500 x 500 px, 2 threads.

Tiles come from a synthetic demo volume (tessera_demo, 20 sections of 1024 x 1024 at full
resolution), one tile per section, mitochondria as the target, folds 3; the default classifier
and settings of CascadeSpec unless --classifier is given.

Run from the repository root: .venv/bin/python benchmarks/train_time.py
"""

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

from tessera.cascade.api import (
    CascadeSpec,
    fit_cascade,
    mirrored_stack,
    prepare_tile,
    receptive_radius,
)  # noqa: E402
from tessera_demo.render import render_dataset  # noqa: E402


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--classifier", default=CascadeSpec().classifier)
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args()
    volume = render_dataset(seed=4, shape=(20, 1024, 1024), spacing=(40.0, 8.0, 8.0), defects=False)
    image = volume["raw"].astype(np.float32)
    truth = (volume["mitochondria"] > 0).astype(np.uint8)
    spec = CascadeSpec(stages=2, levels=2, classifier=args.classifier)
    radius = receptive_radius(spec)
    rng = np.random.default_rng(0)
    tiles = []
    for z in range(20):
        y0, x0 = (int(v) for v in rng.integers(0, 1024 - 500, 2))
        window = mirrored_stack(
            image,
            z,
            spec.neighbours,
            y0 - radius,
            y0 + 500 + radius,
            x0 - radius,
            x0 + 500 + radius,
        )
        tiles.append(
            prepare_tile(
                spec, f"z{z}", window, truth[z, y0 : y0 + 500, x0 : x0 + 500], fold=z % spec.folds
            )
        )
    start = time.perf_counter()
    fit_cascade(spec, tiles, target="mitochondria", threads=args.threads)
    seconds = time.perf_counter() - start
    report(
        "train_time",
        [
            (
                f"train 2x2, 20 tiles of 500^2, {args.threads} threads ({args.classifier})",
                seconds,
                "s",
            )
        ],
        {"train_2x2_20tiles_s": seconds, "classifier": args.classifier, "threads": args.threads},
    )


if __name__ == "__main__":
    main()
