"""Training time of a 2 stages x 2 levels cascade on 20 tiles of 500 x 500 px, 2 threads.

Tiles come from a synthetic demo volume (tessera_demo, 20 sections of 1024 x 1024 at full
resolution), one tile per section, mitochondria as the target, folds 3; the default classifier
and settings of CascadeSpec unless --classifier is given. The 3D mode is timed too, on the
same scenario rendered with isotropic 8 nm voxels (FIB-SEM-like), each tile's features read
from the sections around it (mirrored beyond the volume's ends). Keys
``train_2x2_20tiles_s`` (2D) and ``train_2x2_20tiles_3d_s``.

Run from the repository root: .venv/bin/python benchmarks/train_time.py [--dims 2|3|2,3]
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
    z_halo,
)  # noqa: E402
from tessera_demo.render import render_dataset  # noqa: E402


def train_seconds(dims, *, classifier, threads):
    """Seconds to fit the 2 x 2 cascade in `dims`-D mode on 20 tiles of 500^2."""
    spacing = (40.0, 8.0, 8.0) if dims == 2 else (8.0, 8.0, 8.0)
    volume = render_dataset(seed=4, shape=(20, 1024, 1024), spacing=spacing, defects=False)
    # 8-bit grey values as ingest stores them (the filters convert what they read)
    image = volume["raw"]
    truth = (volume["mitochondria"] > 0).astype(np.uint8)
    spec = CascadeSpec(
        stages=2, levels=2, classifier=classifier, dims=dims, voxel_aspect=spacing[0] / spacing[1]
    )
    radius = receptive_radius(spec)
    rng = np.random.default_rng(0)
    tiles = []
    for z in range(20):
        y0, x0 = (int(v) for v in rng.integers(0, 1024 - 500, 2))
        window = mirrored_stack(
            image, z, z_halo(spec), y0 - radius, y0 + 500 + radius, x0 - radius, x0 + 500 + radius
        )
        tiles.append(
            prepare_tile(
                spec, f"z{z}", window, truth[z, y0 : y0 + 500, x0 : x0 + 500], fold=z % spec.folds
            )
        )
    start = time.perf_counter()
    fit_cascade(spec, tiles, target="mitochondria", threads=threads)
    return time.perf_counter() - start


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--classifier", default=CascadeSpec().classifier)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--dims", default="2,3", help="modes to time: 2, 3 or 2,3")
    args = parser.parse_args()
    rows, figures = [], {"classifier": args.classifier, "threads": args.threads}
    for dims in (int(d) for d in args.dims.split(",")):
        seconds = train_seconds(dims, classifier=args.classifier, threads=args.threads)
        label = (
            f"train 2x2 ({dims}D), 20 tiles of 500^2, {args.threads} threads ({args.classifier})"
        )
        rows.append((label, seconds, "s"))
        figures["train_2x2_20tiles_s" if dims == 2 else "train_2x2_20tiles_3d_s"] = seconds
        print(rows[-1], flush=True)
    report("train_time", rows, figures)


if __name__ == "__main__":
    main()
