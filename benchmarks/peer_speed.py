"""Speed and accuracy of tessera's default cascade beside a general-purpose pixel classifier.

The alternative: scikit-image's ``multiscale_basic_features`` (intensity, edges, texture at
σ 1-16) and scikit-learn's ``RandomForestClassifier`` (50 trees, depth 10, ``predict_proba``),
the usual recipe of interactive pixel classification. Both run on one thread (BLAS and OpenMP
pools limited to one, ``n_jobs=1``, ``workers=1``), in one run, on the same sections.

Data and split as in ``accuracy_real.py``: the open VNC ssTEM stack (../shared/data/vnc-sstem),
block-averaged 2x in-plane (512 x 512 sections); train on sections 0-13 (the same class-balanced
number of pixels per section for both), choose each model's threshold on 14-15, report pixel F1
on 16-19. Speed is core voxels of sections 16-19 per second of process CPU time (one thread:
seconds on one core, steadier than wall time on a shared machine; wall time is reported too),
features included, tessera with its halo and its default output smoothing (in plane, and
across sections: the maps of sections 12-13 are made too, untimed, for 14-15 to read).

Run from the repository root: .venv/bin/python benchmarks/peer_speed.py [--neighbours N]
"""

import os
import sys
import time
from pathlib import Path

for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"  # one core: the figures are per core

import numpy as np  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report, target_default  # noqa: E402
from accuracy_real import DATA, load, scores  # noqa: E402

from tessera.cascade.api import (  # noqa: E402
    CascadeSpec,
    fit_cascade,
    mirrored_stack,
    mix_sections,
    predict_section,
    prepare_tile,
    receptive_radius,
    section_sigma,
    sections_reach,
)
from tessera.workflow.resources import keep_freed_memory  # noqa: E402

TRAIN, SCORED, TIMED = range(14), range(14, 20), range(16, 20)
OUTPUT_SIGMA = 2.0  # the workflow's default smoothing of the final map (px)
SEED = 0


def timed(fn, sections):
    """{z: fn(z)} and the (CPU, wall) seconds spent on the sections in `TIMED`."""
    out, cpu, wall = {}, 0.0, 0.0
    for z in sections:
        c, w = time.process_time(), time.perf_counter()
        out[z] = fn(z)
        if z in TIMED:
            cpu += time.process_time() - c
            wall += time.perf_counter() - w
    return out, cpu, wall


def run_tessera(image, truth, neighbours=0):
    spec = CascadeSpec(seed=SEED, neighbours=neighbours)
    radius = receptive_radius(spec)
    h, w = image.shape[1:]
    tiles = [
        prepare_tile(
            spec,
            f"z{z:02d}",
            mirrored_stack(image, z, spec.neighbours, -radius, h + radius, -radius, w + radius),
            truth[z],
            fold=z * spec.folds // len(TRAIN),  # contiguous sections per fold
            room=(0, 0, 0, 0),  # the whole section: maps mirrored beyond it, as predicted
        )
        for z in TRAIN
    ]
    models = fit_cascade(spec, tiles, target="mitochondria", threads=1)
    # the default smoothing across sections reads the maps of the sections around: predict
    # those within its reach too (each once, as a block does), then mix each scored section
    sigma_z = section_sigma(target_default("output_smoothing_sections"), dims=spec.dims)
    first = max(min(SCORED) - sections_reach(sigma_z), 0)
    maps, cpu, wall = timed(
        lambda z: predict_section(models, image, z, output_sigma=OUTPUT_SIGMA),
        range(first, max(SCORED) + 1),
    )
    if sigma_z <= 0:
        return {z: maps[z] for z in SCORED}, cpu, wall
    mixed, mix_cpu, mix_wall = timed(
        lambda z: mix_sections(maps.__getitem__, z, sigma_z, image.shape[0]), SCORED
    )
    return mixed, cpu + mix_cpu, wall + mix_wall


def run_peer(image, truth, per_section):
    from skimage.feature import multiscale_basic_features  # noqa: PLC0415 - only this benchmark
    from sklearn.ensemble import RandomForestClassifier  # noqa: PLC0415 - only this benchmark

    def features(z):
        return multiscale_basic_features(
            image[z],
            intensity=True,
            edges=True,
            texture=True,
            sigma_min=1,
            sigma_max=16,
            workers=1,
        )

    rng = np.random.default_rng(SEED)
    rows, labels = [], []
    for z in TRAIN:
        feats = features(z)
        flat = truth[z].ravel()
        picks = [
            rng.choice(
                np.flatnonzero(flat == c),
                min(per_section // 2, int((flat == c).sum())),
                replace=False,
            )
            for c in (0, 1)
        ]
        pick = np.sort(np.concatenate(picks))
        rows.append(feats.reshape(-1, feats.shape[-1])[pick])
        labels.append(flat[pick])
    forest = RandomForestClassifier(n_estimators=50, max_depth=10, n_jobs=1, random_state=SEED)
    forest.fit(np.concatenate(rows), np.concatenate(labels))

    def predict(z):
        feats = features(z)
        prob = forest.predict_proba(feats.reshape(-1, feats.shape[-1]))[:, 1]
        return prob.reshape(feats.shape[:2]).astype(np.float32)

    return timed(predict, SCORED)


def main():
    # --neighbours N: the cascade with N sections on each side as features (the README advises
    # cascade.neighbours: auto, 1 in 2D, for mitochondria in serial sections); default 0
    neighbours = (
        int(sys.argv[sys.argv.index("--neighbours") + 1]) if "--neighbours" in sys.argv else 0
    )
    keep_freed_memory()  # as prediction and training jobs do (both models run in this process)
    if not (DATA / "raw").is_dir():
        print(f"peer_speed: skipped, {DATA} is not present (the open VNC stack is needed)")
        return
    image, truth = load()
    voxels = sum(image[z].size for z in TIMED)
    with threadpool_limits(limits=1):
        peer, peer_cpu, peer_wall = run_peer(image, truth, CascadeSpec().samples_per_tile)
        ours, ours_cpu, ours_wall = run_tessera(image, truth, neighbours)
    ours_scores, peer_scores = scores(ours, truth), scores(peer, truth)
    figures = {
        "tessera_mvox_per_s_per_core": voxels / ours_cpu / 1e6,
        "peer_mvox_per_s_per_core": voxels / peer_cpu / 1e6,
        "tessera_f1": ours_scores["f1"],
        "peer_f1": peer_scores["f1"],
        "tessera_wall_mvox_per_s": voxels / ours_wall / 1e6,
        "peer_wall_mvox_per_s": voxels / peer_wall / 1e6,
        "sections": list(TIMED),
        "section_shape": list(image.shape[1:]),
        "clock": "process CPU time, one thread",
        "tessera_neighbours": neighbours,
    }
    figures["ratio"] = figures["tessera_mvox_per_s_per_core"] / figures["peer_mvox_per_s_per_core"]
    rows = [
        (
            f"tessera cascade (2 x 2 MLP, neighbours {neighbours})",
            figures["tessera_mvox_per_s_per_core"],
            "Mvox/s/core",
        ),
        (
            "scikit-image features + random forest",
            figures["peer_mvox_per_s_per_core"],
            "Mvox/s/core",
        ),
        ("ratio tessera / alternative", figures["ratio"], "x"),
        ("tessera test F1 (sections 16-19)", figures["tessera_f1"], ""),
        ("alternative test F1 (sections 16-19)", figures["peer_f1"], ""),
    ]
    report("peer_speed", rows, figures)


if __name__ == "__main__":
    main()
