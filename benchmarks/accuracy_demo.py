"""Accuracy of the cascade on demo data: the demo study through the workflow, and 2D against 3D
features on a FIB-SEM-like (isotropic) variant of the demo volume.

Part ``demo`` (key ``demo``): runs (or reuses) the demo study with the shipped config, then reads
each target's results/study/<target>/tiles_predicted/scores.tsv: pixel F1 and Jaccard on test
tiles, with the threshold chosen on validation tiles.

Part ``fibsem`` (key ``fibsem_2d_vs_3d``): three demo volumes (train, validation and test seeds)
rendered at 8 nm isotropic voxels and block-averaged 2x in every axis (16 nm voxels;
tessera_demo.fibsem), no section defects. The same small cascade (2 stages x 1 level, sigmas
without the largest default) is trained in 2D mode without and with neighbouring sections
(``neighbours`` 0 and 1) and in 3D mode (``dims`` 3, voxel aspect 1) on whole-section tiles of
the training volume, predicted section by section (``predict_section``) on the validation and
test volumes; the threshold maximising F1 on the validation sections is applied to the test
sections. Seconds are wall time of training and of predicting the validation and test sections.

Run from the repository root: .venv/bin/python benchmarks/accuracy_demo.py [--part demo|fibsem|all]
"""

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import yaml
from sklearn.metrics import f1_score, jaccard_score, precision_score, recall_score

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import OUT, report  # noqa: E402

from tessera.cascade.api import (  # noqa: E402
    CascadeSpec,
    fit_cascade,
    mirrored_stack,
    predict_section,
    prepare_tile,
    receptive_radius,
    z_halo,
)
from tessera_demo.fibsem import render_isotropic  # noqa: E402

REPO = Path(__file__).resolve().parents[1]

# FIB-SEM part: rendered shape at 8 nm, block mean 2x -> 48 x 192 x 192 voxels of 16 nm.
FIB_SHAPE, FIB_NM, FIB_FACTOR = (96, 384, 384), 8.0, 2
FIB_SEEDS = {"train": 5101, "validation": 5102, "test": 5103}
TRAIN_Z = (3, 9, 15, 21, 27, 33, 39, 45)
SCORE_Z = (6, 14, 22, 30, 38)  # scored sections of the validation and of the test volume
FIB_BASE = dict(
    stages=2,
    levels=1,
    sigmas=(0.7, 1.6, 3.5, 5.0),
    samples_per_tile=3000,
    folds=2,
    seed=0,
)
FIB_SPECS = {
    "2d_n0": dict(dims=2, neighbours=0),
    "2d_n1": dict(dims=2, neighbours=1),
    "3d": dict(dims=3, voxel_aspect=1.0),
}


def demo_part(figures, rows):
    targets = list(yaml.safe_load((REPO / "config" / "config.yaml").read_text())["targets"])
    outputs = [f"results/study/{t}/tiles_predicted/scores.tsv" for t in targets]
    snakemake = Path(sys.executable).parent / "snakemake"
    subprocess.run([str(snakemake), "--profile", "profiles/local", *outputs], cwd=REPO, check=True)
    figures["demo"] = {}
    for target, path in zip(targets, outputs):
        scores = pd.read_csv(REPO / path, sep="\t").set_index("role")
        test = scores.loc["test"]
        figures["demo"][target] = {
            "f1": float(test["f1"]),
            "jaccard": float(test["jaccard"]),
            "precision": float(test["precision"]),
            "recall": float(test["recall"]),
            "threshold": float(test["threshold"]),
        }
        rows.append((f"{target} test F1 (Jaccard {test['jaccard']:.3f})", float(test["f1"]), ""))


def section_tiles(spec, image, truth, sections):
    """One whole-section tile per section in `sections` (halo and z halo mirrored)."""
    halo, zh = receptive_radius(spec), z_halo(spec)
    _, ny, nx = image.shape
    tiles = []
    for i, z in enumerate(sections):
        window = mirrored_stack(image, z, zh, -halo, ny + halo, -halo, nx + halo)
        tiles.append(prepare_tile(spec, f"z{z}", window, truth[z], fold=i % 2))
    return tiles


def pixel_scores(val_prob, val_truth, test_prob, test_truth):
    """Threshold maximising F1 on validation; precision, recall, F1, Jaccard on test."""
    grid = np.linspace(0.01, 0.99, 99)
    val_t = val_truth.ravel()
    threshold = float(grid[int(np.argmax([f1_score(val_t, val_prob.ravel() >= t) for t in grid]))])
    test_t, test_p = test_truth.ravel(), test_prob.ravel() >= threshold
    return {
        "precision": float(precision_score(test_t, test_p, zero_division=0)),
        "recall": float(recall_score(test_t, test_p)),
        "f1": float(f1_score(test_t, test_p)),
        "jaccard": float(jaccard_score(test_t, test_p)),
        "threshold": threshold,
    }


def fibsem_volumes(*, shape=FIB_SHAPE, spacing_nm=FIB_NM, factor=FIB_FACTOR, seeds=FIB_SEEDS):
    """The train, validation and test volumes of the FIB-SEM part."""
    return {
        role: render_isotropic(seed=seed, shape=shape, spacing_nm=spacing_nm, factor=factor)
        for role, seed in seeds.items()
    }


def compare(volumes, specs, *, train_z, score_z):
    """Train each spec on `train_z` of the train volume; scores on `score_z` of the others."""
    out = {}
    for name, spec in specs.items():
        train = volumes["train"]
        start = time.perf_counter()
        tiles = section_tiles(spec, train["image"], train["truth"], train_z)
        models = fit_cascade(spec, tiles, target="mitochondria")
        train_s = time.perf_counter() - start
        start = time.perf_counter()
        prob = {
            role: np.stack([predict_section(models, volumes[role]["image"], z) for z in score_z])
            for role in ("validation", "test")
        }
        predict_s = time.perf_counter() - start
        truth = {role: volumes[role]["truth"][list(score_z)] for role in prob}
        out[name] = {
            **pixel_scores(prob["validation"], truth["validation"], prob["test"], truth["test"]),
            "train_s": round(train_s, 1),
            "predict_s_per_section": round(predict_s / (2 * len(score_z)), 2),
            "z_halo": z_halo(spec),
        }
    return out


def fibsem_part(figures, rows):
    volumes = fibsem_volumes()
    specs = {name: CascadeSpec(**FIB_BASE, **extra) for name, extra in FIB_SPECS.items()}
    results = compare(volumes, specs, train_z=TRAIN_Z, score_z=SCORE_Z)
    test = volumes["test"]
    figures["fibsem_2d_vs_3d"] = {
        "rendered_shape": list(FIB_SHAPE),
        "rendered_nm": FIB_NM,
        "voxel_nm": list(test["spacing"]),
        "shape": list(test["image"].shape),
        "seeds": FIB_SEEDS,
        "train_sections": list(TRAIN_Z),
        "scored_sections": list(SCORE_Z),
        "cascade": {k: list(v) if isinstance(v, tuple) else v for k, v in FIB_BASE.items()},
        "test_mito_fraction": float(test["truth"][list(SCORE_Z)].mean()),
        "n_mitochondria": {r: v["summary"]["n_mitochondria"] for r, v in volumes.items()},
        **results,
    }
    for name, r in results.items():
        rows.append(
            (
                f"fibsem {name} test F1 (P {r['precision']:.3f} R {r['recall']:.3f} "
                f"J {r['jaccard']:.3f})",
                r["f1"],
                f"thr {r['threshold']:.2f}, train {r['train_s']:.0f} s, "
                f"predict {r['predict_s_per_section']:.2f} s/section",
            )
        )


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--part", choices=("all", "demo", "fibsem"), default="all")
    part = parser.parse_args().part
    # a part run alone keeps the other part's figures of an earlier run
    previous = OUT / "accuracy_demo.json"
    figures = json.loads(previous.read_text()) if part != "all" and previous.exists() else {}
    rows = []
    if part in ("all", "demo"):
        demo_part(figures, rows)
    if part in ("all", "fibsem"):
        fibsem_part(figures, rows)
    report("accuracy_demo", rows, figures)


if __name__ == "__main__":
    main()
