"""Time per 256 x 256 section of a 2 x 1 cascade in 3D mode (``dims`` = 3) against 2D mode.

Both cascades (default sigmas, the same settings but ``dims``) are trained quickly on tiles of a
synthetic near-isotropic volume of dark balls, then a block of SECTIONS sections of 256 x 256
core pixels is predicted with ``tessera.predict.predict_block`` (the path sharded prediction
uses: the block and its z halo read once, each section a view). The figure is the block's CPU
time per section, best of a few runs; the classifiers' time is the same in both modes (only the
number of image channels differs), the difference is the 3D filter bank and its z halo. Voxel
aspect 1 (isotropic) and 2 are timed.

End to end (``e2e_3d_mvox_per_s_per_core``): the default 2 x 2 cascade in 3D mode (voxel
aspect 1, two folds for a quick training, every other setting at its default) predicts a
volume of E2E_SHAPE through the path the workflow's jobs take (shard plan -> predict_shard_job
-> stitch_job: read, features, cascade, write, checksums) with the default ``predict.block``
read from the config schema; voxels per wall-clock second of both jobs. The volume repeats a
256 x 256 tile of the ball volume in plane.

One thread (BLAS and OpenMP pools limited to one); seconds are process CPU time, except end to
end (wall clock, as scaling.py).

Run from the repository root: .venv/bin/python benchmarks/cascade_3d.py
"""

import os
import sys
import tempfile
import time
from pathlib import Path

for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"  # one core: the figures are per core

import numpy as np  # noqa: E402
import yaml  # noqa: E402
import zarr  # noqa: E402
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
    save_node,
    z_halo,
)
from tessera.io.omezarr import AXES, multiscale_attrs  # noqa: E402
from tessera.io.store_checksums import record_checksums  # noqa: E402
from tessera.predict import predict_block  # noqa: E402
from tessera.workflow.jobs.predict import (  # noqa: E402
    predict_shard_job,
    shard_plan_job,
    stitch_job,
)

SIDE, SECTIONS, REPEATS, SEED = 256, 4, 2, 0
E2E_SHAPE = (32, 1536, 1536)
REPO = Path(__file__).resolve().parent.parent


def default_block():
    """The default ``predict.block`` (z, y, x), read from the config schema."""
    schema = yaml.safe_load((REPO / "config" / "schemas" / "config.schema.yaml").read_text())
    return tuple(schema["properties"]["predict"]["properties"]["block"]["default"])


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


def end_to_end(volume, truth):
    """Voxels per second (one thread, wall clock) of the default 2 x 2 3D cascade, predicting
    and stitching a volume of E2E_SHAPE with the default block, and the plan's figures."""
    spec = CascadeSpec(dims=3, voxel_aspect=1.0, folds=2)
    models = train(spec, volume, truth)
    tile, _ = balls((E2E_SHAPE[0], SIDE, SIDE), SEED + 1)
    big = np.tile(tile, (1, E2E_SHAPE[1] // SIDE, E2E_SHAPE[2] // SIDE))
    with tempfile.TemporaryDirectory(prefix="tessera-cascade-3d-") as tmp:
        root = Path(tmp)
        paths = []
        for (stage, level), model in models.items():
            paths.append(str(root / f"stage{stage}_level{level}.npz"))
            save_node(model, paths[-1])
        image = root / "raw.ome.zarr"
        group = zarr.open_group(store=str(image), mode="w", zarr_format=3)
        group.attrs["ome"] = multiscale_attrs(name="raw", spacing=(8, 8, 8), factors=[(1, 1, 1)])
        group.create_array(name="0", data=big, chunks=(1, 512, 512), dimension_names=AXES)
        record_checksums(image)
        plan = root / "plan.json"
        block = default_block()
        summary = shard_plan_job(
            image,
            paths,
            plan,
            target="balls",
            downsample=1,
            block=block,
            shard_jobs=1,
            max_halo=1024,
            dtype="uint8",
        )
        start = time.perf_counter()
        predict_shard_job(plan, image, paths, root / "job0", job=0, target="balls")
        stitch_job(plan, [root / "job0"], root / "probability.ome.zarr", viewing_levels=1)
        seconds = time.perf_counter() - start
    return {
        "shape": list(E2E_SHAPE),
        "block": list(block),
        "stages": spec.stages,
        "levels": spec.levels,
        "z_halo": z_halo(spec),
        "halo_px": summary["halo"],
        "seconds": round(seconds, 1),
        "mvox_per_s_per_core": round(big.size / seconds / 1e6, 3),
    }


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
    e2e = end_to_end(volume, truth)
    figures["e2e_3d"] = e2e
    figures["e2e_3d_mvox_per_s_per_core"] = e2e["mvox_per_s_per_core"]
    shape = " x ".join(str(n) for n in E2E_SHAPE)
    rows.append(
        (
            f"end to end, default 2 x 2 3D cascade, {shape}",
            e2e["mvox_per_s_per_core"],
            "Mvox/s/core",
        )
    )
    report("cascade_3d", rows, figures)


if __name__ == "__main__":
    with threadpool_limits(limits=1):
        main()
