"""Accuracy of the cascade on demo data: the demo study through the workflow, and 2D against 3D
features on a FIB-SEM-like (isotropic) variant of the demo volume.

Part ``demo`` (key ``demo``): runs (or reuses) the demo study with the shipped config, then reads
each target's results/study/<target>/tiles_predicted/scores.tsv: pixel F1 and Jaccard on test
tiles, with the threshold chosen on validation tiles.

Part ``fibsem`` (key ``fibsem_2d_vs_3d``): three demo volumes (train, validation and test seeds)
rendered at 8 nm isotropic voxels and block-averaged 2x in every axis (16 nm voxels;
tessera_demo.fibsem), no section defects. The same small cascade (2 stages x 1 level, sigmas
0.7-5 px, as when these figures were first taken) is trained in 2D mode without and with neighbouring sections
(``neighbours`` 0 and 1) and in 3D mode (``dims`` 3, voxel aspect 1) on whole-section tiles of
the training volume, predicted section by section (``predict_section``) on the validation and
test volumes; the threshold maximising F1 on the validation sections is applied to the test
sections. Also the F1 on the pixels within 2 px (in plane) of a true boundary only, where
obliquely cut membranes blur and 3D features could help most. Three repeats with independent
seeds; their spread says how much of a difference is the draw of the volumes. Seconds are wall
time of training and of predicting the validation and test sections.

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
from scipy import ndimage
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
# three independent repeats (train, validation and test seeds each): the spread between them
# says how much of a difference between feature sets is the draw of the volumes
FIB_SEED_SETS = tuple(
    {"train": base + 1, "validation": base + 2, "test": base + 3} for base in (5100, 5200, 5300)
)
BAND_PX = 2  # boundary band: pixels within this many px of a truth boundary, in plane
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


def boundary_band(truth, width=BAND_PX):
    """Per section, the pixels within `width` px of the truth's boundary (dilation minus erosion)."""
    band = np.zeros(truth.shape, bool)
    for k, section in enumerate(truth.astype(bool)):
        grown = ndimage.binary_dilation(section, iterations=width)
        shrunk = ndimage.binary_erosion(section, iterations=width, border_value=1)
        band[k] = grown & ~shrunk
    return band


def fibsem_volumes(*, seeds, shape=FIB_SHAPE, spacing_nm=FIB_NM, factor=FIB_FACTOR):
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
        scores = pixel_scores(prob["validation"], truth["validation"], prob["test"], truth["test"])
        band = boundary_band(truth["test"])
        # F1 where oblique and fuzzy boundaries are: the pixels near a true boundary
        near = f1_score(truth["test"][band], prob["test"][band] >= scores["threshold"])
        out[name] = {
            **scores,
            "boundary_f1": float(near),
            "train_s": round(train_s, 1),
            "predict_s_per_section": round(predict_s / (2 * len(score_z)), 2),
            "z_halo": z_halo(spec),
        }
    return out


def fibsem_part(figures, rows):
    specs = {name: CascadeSpec(**FIB_BASE, **extra) for name, extra in FIB_SPECS.items()}
    runs = []
    for seeds in FIB_SEED_SETS:
        volumes = fibsem_volumes(seeds=seeds)
        results = compare(volumes, specs, train_z=TRAIN_Z, score_z=SCORE_Z)
        test = volumes["test"]["truth"][list(SCORE_Z)]
        runs.append(
            {
                "seeds": seeds,
                "n_mitochondria": {r: v["summary"]["n_mitochondria"] for r, v in volumes.items()},
                "test_mito_fraction": round(float(test.mean()), 4),
                **results,
            }
        )
    keys = ("precision", "recall", "f1", "jaccard", "boundary_f1", "train_s")
    keys += ("predict_s_per_section",)
    mean = {n: {k: float(np.mean([r[n][k] for r in runs])) for k in keys} for n in specs}
    figures["fibsem_2d_vs_3d"] = {
        "rendered_shape": list(FIB_SHAPE),
        "rendered_nm": FIB_NM,
        "voxel_nm": [FIB_NM * FIB_FACTOR] * 3,
        "train_sections": list(TRAIN_Z),
        "scored_sections": list(SCORE_Z),
        "boundary_band_px": BAND_PX,
        "cascade": {k: list(v) if isinstance(v, tuple) else v for k, v in FIB_BASE.items()},
        "specs": FIB_SPECS,
        "mean": mean,
        "f1_3d_minus_2d_n0": [round(r["3d"]["f1"] - r["2d_n0"]["f1"], 4) for r in runs],
        "runs": runs,
    }
    for name, m in mean.items():
        per_run = " ".join(f"{r[name]['f1']:.3f}" for r in runs)
        rows.append(
            (
                f"fibsem {name} mean test F1 (P {m['precision']:.3f} R {m['recall']:.3f} "
                f"J {m['jaccard']:.3f}; boundary F1 {m['boundary_f1']:.3f})",
                m["f1"],
                f"runs {per_run}; train {m['train_s']:.0f} s, "
                f"predict {m['predict_s_per_section']:.2f} s/section",
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
