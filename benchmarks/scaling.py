"""Whole-volume prediction and labelling: throughput, memory and time as the volume grows.

A default 2 x 2 cascade (MLP) is trained quickly on a synthetic demo volume. Volumes of 2, 8 and
16 sections of 1024 x 1024 voxels (the working level; 1x = 2 sections) are then predicted through the same path
the workflow uses (shard plan -> predict_shard_job -> stitch_job) with blocks of one section,
each step in a fresh process on one thread, so the figures include reading, features, the
cascade, writing and verification. The smoothing across sections is off here (its default
reads two sections on each side of a block, which blocks of one section would each predict;
blocks of the default 32 sections predict at most 4 more, see the README). Labelling (label_objects, blocks of 8 x 512 x 512) runs on
probability volumes of 8 x 1024 x 1024 and 8 times that.

Figures:
  e2e_mvox_per_s_per_core  voxels / (predict + stitch seconds) for the 16-section volume, 1 core
  rss_ratio_8x             peak RSS of the predict job, 16 sections / 2 sections
  label_rss_ratio_8x       peak RSS of labelling, 8x volume / 1x volume
  time_ratio_4x, _8x       predict seconds of 4x (8x) volume / (4 (8) x seconds of 1x); 1.0 = linear
  speedup_2_cores          16-section volume: one job for all blocks vs two jobs side by side

Run from the repository root: .venv/bin/python benchmarks/scaling.py
"""

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ONE_THREAD = {v: "1" for v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")}
os.environ.update(ONE_THREAD)

import numpy as np  # noqa: E402
import zarr  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

SIDE = 1024

CHILD = """
import json, sys, time
task = json.loads(sys.argv[1])
start = time.perf_counter()
if task["kind"] == "predict":
    from tessera.workflow.jobs.predict import predict_shard_job
    predict_shard_job(task["plan"], task["image"], task["models"], task["out"], job=task["job"], target="mitochondria")
elif task["kind"] == "stitch":
    from tessera.workflow.jobs.predict import stitch_job
    stitch_job(task["plan"], task["shards"], task["out"], viewing_levels=1)
else:
    import numpy as np, zarr
    from tessera.objects.label import label_objects
    prob = zarr.open_array(task["prob"], mode="r")
    out = zarr.create_array(store=task["out"], shape=prob.shape, dtype=np.uint32, chunks=(1, 512, 512), zarr_format=3)
    label_objects(prob, out, spacing=(40, 16, 16), high=0.5, open_radius_nm=16, min_volume_um3=0.002,
                  block=(8, 512, 512), scale=255.0, workdir=task["tmp"])
seconds = time.perf_counter() - start
# proc(5)'s VmHWM: this process's own peak (ru_maxrss would carry the parent's in from exec)
with open("/proc/self/status") as status:
    peak_kib = next(int(line.split()[1]) for line in status if line.startswith("VmHWM:"))
print(json.dumps({"seconds": seconds, "rss_mb": peak_kib / 1024}))
"""


def child(task):
    """Start one measured step in a fresh interpreter (one thread); return its process."""
    return subprocess.Popen(
        [sys.executable, "-c", CHILD, json.dumps(task)],
        stdout=subprocess.PIPE,
        text=True,
        env={**os.environ, **ONE_THREAD},
    )


def finish(proc):
    out, _ = proc.communicate()
    if proc.returncode != 0:
        raise SystemExit("benchmark step failed")
    return json.loads(out.strip().splitlines()[-1])


def train(root):
    from tessera.cascade.api import (
        CascadeSpec,
        fit_cascade,
        mirrored_stack,
        prepare_tile,
        receptive_radius,
        save_node,
    )
    from tessera_demo.render import render_dataset

    volume = render_dataset(seed=9, shape=(8, SIDE, SIDE), spacing=(40.0, 8.0, 8.0), defects=False)
    image = volume["raw"].astype(np.float32)
    truth = (volume["mitochondria"] > 0).astype(np.uint8)
    spec = CascadeSpec(stages=2, levels=2, samples_per_tile=1500)
    radius = receptive_radius(spec)
    tiles = []
    for z in range(6):
        # a 256-px tile around the section's mitochondria, so both classes are present
        ys, xs = np.nonzero(truth[z])
        y0 = int(np.clip(np.median(ys) - 128, 0, SIDE - 256)) if ys.size else 384
        x0 = int(np.clip(np.median(xs) - 128, 0, SIDE - 256)) if xs.size else 384
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
                spec, f"z{z}", window, truth[z, y0 : y0 + 256, x0 : x0 + 256], fold=z % spec.folds
            )
        )
    models = fit_cascade(spec, tiles, target="mitochondria", threads=2)
    paths = []
    for node, model in models.items():
        paths.append(str(root / f"stage{node[0]}_level{node[1]}.npz"))
        save_node(model, paths[-1])
    return paths, volume["raw"]


def write_image(path, raw, sections):
    from tessera.io.omezarr import AXES, multiscale_attrs
    from tessera.io.store_checksums import record_checksums

    group = zarr.open_group(store=str(path), mode="w", zarr_format=3)
    group.attrs["ome"] = multiscale_attrs(name="raw", spacing=(40, 16, 16), factors=[(1, 1, 1)])
    stack = np.concatenate([raw] * (-(-sections // raw.shape[0])))[:sections]
    group.create_array(name="0", data=stack, chunks=(1, 512, 512), dimension_names=AXES)
    record_checksums(path)


def predict_volume(root, models, raw, sections, jobs):
    from tessera.workflow.jobs.predict import shard_plan_job

    image = root / f"raw_{sections}.ome.zarr"
    if not image.exists():
        write_image(image, raw, sections)
    run = root / f"run_{sections}_{jobs}"
    plan = run / "plan.json"
    shard_plan_job(
        image,
        models,
        plan,
        target="mitochondria",
        downsample=1,
        block=(1, SIDE, SIDE),
        shard_jobs=jobs,
        max_halo=1024,
        dtype="uint8",
    )
    start = time.perf_counter()
    procs = [
        child(
            {
                "kind": "predict",
                "plan": str(plan),
                "image": str(image),
                "models": models,
                "out": str(run / f"job{j}"),
                "job": j,
            }
        )
        for j in range(jobs)
    ]
    results = [finish(p) for p in procs]
    wall = time.perf_counter() - start
    stitched = finish(
        child(
            {
                "kind": "stitch",
                "plan": str(plan),
                "shards": [str(run / f"job{j}") for j in range(jobs)],
                "out": str(run / "probability.ome.zarr"),
            }
        )
    )
    return {
        "wall": wall,
        "predict_s": max(r["seconds"] for r in results),
        "rss_mb": max(r["rss_mb"] for r in results),
        "stitch_s": stitched["seconds"],
        "voxels": sections * SIDE * SIDE,
    }


def probability_volume(path, sections):
    from scipy import ndimage

    rng = np.random.default_rng(0)
    array = zarr.create_array(
        store=str(path),
        shape=(sections, 2048, 2048),
        dtype=np.uint8,
        chunks=(1, 512, 512),
        zarr_format=3,
    )
    for z in range(sections):
        field = ndimage.gaussian_filter(rng.random((2048, 2048), dtype=np.float32), 4)
        array[z] = np.clip((field - field.mean()) / field.std() * 90 + 100, 0, 255).astype(np.uint8)


def label_volume(root, sections):
    prob = root / f"prob_{sections}.zarr"
    probability_volume(prob, sections)
    return finish(
        child(
            {
                "kind": "label",
                "prob": str(prob),
                "out": str(root / f"labels_{sections}.zarr"),
                "tmp": str(root),
            }
        )
    )


def main():
    with tempfile.TemporaryDirectory(prefix="tessera-scaling-") as tmp:
        root = Path(tmp)
        models, raw = train(root)
        runs = {n: predict_volume(root, models, raw, 2 * n, 1) for n in (1, 4, 8)}
        pair = predict_volume(root, models, raw, 16, 2)
        labels = {n: label_volume(root, n) for n in (2, 16)}
    one, eight = runs[1], runs[8]
    figures = {
        "e2e_mvox_per_s_per_core": eight["voxels"] / (eight["predict_s"] + eight["stitch_s"]) / 1e6,
        "rss_ratio_8x": eight["rss_mb"] / one["rss_mb"],
        "label_rss_ratio_8x": labels[16]["rss_mb"] / labels[2]["rss_mb"],
        "time_ratio_4x": runs[4]["predict_s"] / (4 * one["predict_s"]),
        "time_ratio_8x": eight["predict_s"] / (8 * one["predict_s"]),
        "speedup_2_cores": eight["wall"] / pair["wall"],
        "runs": {str(k): v for k, v in runs.items()},
        "two_jobs": pair,
        "labelling": {"2x2048x2048": labels[2], "16x2048x2048": labels[16]},
    }
    rows = [
        (
            "end to end, 16 x 1024^2 sections, 1 core",
            figures["e2e_mvox_per_s_per_core"],
            "Mvox/s/core",
        ),
        (
            "predict job peak RSS, 8x / 1x volume",
            figures["rss_ratio_8x"],
            f"({one['rss_mb']:.0f} MiB at 1x)",
        ),
        (
            "labelling peak RSS, 8x / 1x volume",
            figures["label_rss_ratio_8x"],
            f"({labels[2]['rss_mb']:.0f} MiB at 1x)",
        ),
        ("predict time 4x / (4 x 1x)", figures["time_ratio_4x"], "1.0 = linear"),
        ("predict time 8x / (8 x 1x)", figures["time_ratio_8x"], "1.0 = linear"),
        ("speed-up, 2 jobs on 2 cores", figures["speedup_2_cores"], "x"),
        ("labelling 16 x 2048^2 voxels", labels[16]["seconds"], "s"),
    ]
    report("scaling", rows, figures)


if __name__ == "__main__":
    main()
