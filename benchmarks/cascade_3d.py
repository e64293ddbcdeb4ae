"""Time per 256 x 256 section of a 2 x 1 cascade in 3D mode (``dims`` = 3) against 2D mode.

Both cascades (default sigmas, the same settings but ``dims``) are trained quickly on tiles of a
synthetic near-isotropic volume of dark balls, then a block of SECTIONS sections of 256 x 256
core pixels is predicted with ``tessera.predict.predict_block`` (the path sharded prediction
uses: the block and its z halo read once, each section a view). The figure is the block's CPU
time per section, best of a few runs; the classifiers' time is the same in both modes (only the
number of image channels differs), the difference is the 3D filter bank and its z halo. Voxel
aspect 1 (isotropic) and 2 are timed.

One thread (BLAS and OpenMP pools limited to one); seconds are process CPU time.

Run from the repository root: .venv/bin/python benchmarks/cascade_3d.py
"""

import os
import sys
import time
from pathlib import Path

for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"  # one core: the figures are per core

import numpy as np  # noqa: E402
from scipy import ndimage  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

from tessera.cascade.api import (  # noqa: E402
    CascadeSpec,
    fit_cascade,
    mirrored_stack,
    prepare_tile,
    receptive_radius,
    z_halo,
)
from tessera.predict import predict_block  # noqa: E402

SIDE, SECTIONS, REPEATS, SEED = 256, 4, 2, 0


def balls(shape, seed):
    rng = np.random.default_rng(seed)
    zz, yy, xx = np.indices(shape, dtype=np.float32)
    truth = np.zeros(shape, bool)
    for _ in range(int(np.prod(shape) / 20000)):
        c = rng.uniform(0, shape)
        r = rng.uniform(5, 12)
        truth |= (zz - c[0]) ** 2 + (yy - c[1]) ** 2 + (xx - c[2]) ** 2 < r * r
    image = 150 + 40 * ndimage.gaussian_filter(rng.normal(size=shape), 2) - 60 * truth
    image += rng.normal(0, 10, shape)
    return np.clip(image, 0, 255).astype(np.uint8), truth.astype(np.uint8)


def train(spec, volume, truth):
    halo, zh = receptive_radius(spec), z_halo(spec)
    tiles = []
    for i, z in enumerate(range(4, volume.shape[0] - 4, 6)):
        window = mirrored_stack(volume, z, zh, 64 - halo, 128 + halo, 64 - halo, 128 + halo)
        labels = truth[z, 64:128, 64:128]
        tiles.append(prepare_tile(spec, f"z{z}", window, labels, fold=i % 2))
    return fit_cascade(spec, tiles, target="balls")


def main():
    volume, truth = balls((40, SIDE, SIDE), SEED)
    rows, figures = [], {"section_px": SIDE, "block_sections": SECTIONS, "threads": 1}
    base = dict(stages=2, levels=1, samples_per_tile=1000, folds=2)
    specs = {
        "2d": CascadeSpec(**base),
        "3d_aspect1": CascadeSpec(**base, dims=3, voxel_aspect=1.0),
        "3d_aspect2": CascadeSpec(**base, dims=3, voxel_aspect=2.0),
    }
    box = (18, 18 + SECTIONS, 0, SIDE, 0, SIDE)
    for label, spec in specs.items():
        models = train(spec, volume, truth)
        best = float("inf")
        for _ in range(REPEATS):
            start = time.process_time()
            predict_block(models, volume, box)
            best = min(best, time.process_time() - start)
        figures[label] = {
            "z_halo": z_halo(spec),
            "halo_px": receptive_radius(spec),
            "cpu_s_per_section": round(best / SECTIONS, 3),
        }
        rows.append((f"{label}: CPU s per {SIDE}x{SIDE} section", best / SECTIONS, "s"))
    for label in ("3d_aspect1", "3d_aspect2"):
        ratio = figures[label]["cpu_s_per_section"] / figures["2d"]["cpu_s_per_section"]
        figures[label]["ratio_to_2d"] = round(ratio, 2)
        rows.append((f"{label}: ratio to 2D", ratio, "x"))
    report("cascade_3d", rows, figures)


if __name__ == "__main__":
    with threadpool_limits(limits=1):
        main()
