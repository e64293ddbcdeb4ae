"""Prediction throughput of a 2 x 2 cascade, features included, per classifier, one thread.

For each classifier a cascade is trained quickly on a few tiles of a synthetic demo volume,
then one block of 1024 x 1024 core pixels is predicted with its receptive-field halo (the
block-prediction path sharded prediction uses). Throughput counts core voxels only, so the
halo's overhead is part of the figure.

Run from the repository root: .venv/bin/python benchmarks/predict_throughput.py
"""

import os
import sys
import time
from pathlib import Path

for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"  # one core: the figure is per core

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

from tessera.cascade.api import (  # noqa: E402
    CascadeSpec,
    fit_cascade,
    mirrored_stack,
    predict_frame,
    prepare_tile,
    receptive_radius,
)
from tessera.cascade.classifiers import KINDS  # noqa: E402
from tessera.workflow.resources import keep_freed_memory  # noqa: E402
from tessera_demo.render import render_dataset  # noqa: E402

CORE = 1024


def main():
    keep_freed_memory()  # as prediction and training jobs do
    volume = render_dataset(seed=5, shape=(8, 1024, 1024), spacing=(40.0, 8.0, 8.0), defects=False)
    image = volume["raw"].astype(np.float32)
    truth = (volume["mitochondria"] > 0).astype(np.uint8)
    default = CascadeSpec().classifier
    figures, rows = {"by_classifier": {}}, []
    for kind in KINDS:
        spec = CascadeSpec(stages=2, levels=2, classifier=kind, samples_per_tile=1500)
        radius = receptive_radius(spec)
        tiles = []
        for z in range(6):
            # a 256-px tile around the section's mitochondria, so both classes are present
            ys, xs = np.nonzero(truth[z])
            y0 = int(np.clip(np.median(ys) - 128, 0, 1024 - 256)) if ys.size else 384
            x0 = int(np.clip(np.median(xs) - 128, 0, 1024 - 256)) if xs.size else 384
            window = mirrored_stack(
                image,
                z,
                spec.neighbours,
                y0 - radius,
                y0 + 256 + radius,
                x0 - radius,
                x0 + 256 + radius,
            )
            tiles.append(
                prepare_tile(
                    spec,
                    f"z{z}",
                    window,
                    truth[z, y0 : y0 + 256, x0 : x0 + 256],
                    fold=z % spec.folds,
                )
            )
        models = fit_cascade(spec, tiles, target="mitochondria", threads=1)
        block = mirrored_stack(
            image, 7, spec.neighbours, -radius, CORE + radius, -radius, CORE + radius
        )
        start = time.perf_counter()
        predict_frame(models, block, (CORE, CORE))
        seconds = time.perf_counter() - start
        rate = CORE * CORE / seconds / 1e6
        figures["by_classifier"][kind] = rate
        rows.append((f"{kind} (halo {radius} px)", rate, "Mvox/s/core"))
        print(rows[-1], flush=True)
    figures["mvox_per_s_per_core"] = figures["by_classifier"][default]
    figures["default_classifier"] = default
    report("predict_throughput", rows, figures)


if __name__ == "__main__":
    main()
