"""Accuracy of the cascade on real serial-section TEM: mitochondria of the open VNC stack.

Data: ../shared/data/vnc-sstem (Gerhard S, Funke J, Martel J, Cardona A, Fetter R (2013).
Segmented anisotropic ssTEM dataset of neural tissue. figshare. doi:10.6084/m9.figshare.856713;
CC BY-NC-SA 3.0). 20 sections of 1024 x 1024 px at 4.6 nm, about 50 nm apart.

Split (fixed): train on every annotated pixel of sections 0-13 (each section one tile, grouped
into folds of contiguous sections for out-of-fold context), choose the threshold that maximises F1 on sections 14-15,
report pixel precision, recall, F1 and Jaccard on sections 16-19. The images are block-averaged
2x in-plane first (9.2 nm pixels; mitochondria stay tens of pixels across), masks by majority.

Configurations: 1x0 (one stage, no levels: plain pixel classification), 1x2, 2x2, 3x2, and
2x1, 3x1 (one coarser level only); 2x2_xsec and 3x2_xsec add cross-section context (from stage 2
on every node also reads the previous stage's map of the sections above and below,
``context_sections=1``). Key ``chosen``: the cascade ladder from 2x2 (2x2, 3x2, 2x3; see
tessera.ladder) picks its rung on the validation sections only, and its test scores are
reported. Every configuration is scored with the final map smoothed as the workflow smooths it
by default (in plane: Gaussian, --output-sigma px; across sections: --output-sigma-z sections,
``auto`` = the 2D rule of tessera.cascade.across_sections, each section's map averaged with the
maps of the sections around it) and, for comparison, unsmoothed (neither).

Objects in 3D (key ``objects_3d`` of each configuration, and at the top level for the chosen
one): the map of sections 16-19 is turned
into objects as the objects step does with its default settings (validation threshold, no
morphology, enclosed cavities filled, 26-connected, the default minimum volume, touching
objects split with the default settings), and matched one-to-one at IoU > 0.5 with the
26-connected components of the truth on the same sections (tessera.object_scores). Key
``objects_3d_unsplit``: the same without splitting (the connected components).

``--orientations N`` trains every configuration on the training sections in N orientations
(cascade.orientations; the default is the spec's).

Run from the repository root: .venv/bin/python benchmarks/accuracy_real.py [--classifier KIND]
"""

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
from PIL import Image
from sklearn.metrics import f1_score, jaccard_score, precision_score, recall_score

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import objects_default, report, target_default  # noqa: E402

from tessera.block_reduce import block_mean  # noqa: E402
from tessera.cascade.api import (
    CascadeSpec,
    fit_cascade,
    mirrored_stack,
    mix_sections,
    predict_section,
    prepare_tile,
    receptive_radius,
    section_sigma,
    sections_reach,
    z_halo,
)  # noqa: E402
from tessera.ladder import choose_rung, ladder_rungs, rung_name  # noqa: E402
from tessera.object_scores import connected_truth, object_scores  # noqa: E402
from tessera.objects.depth_limit import split_depth_nm  # noqa: E402
from tessera.objects.label import label_objects  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
DATA = REPO.parent / "shared" / "data" / "vnc-sstem"
# name: (stages, levels, context_sections)
CONFIGS = {
    "1x0": (1, 0, 0),
    "1x2": (1, 2, 0),
    "2x2": (2, 2, 0),
    "3x2": (3, 2, 0),
    "2x1": (2, 1, 0),
    "3x1": (3, 1, 0),
    "2x2_xsec": (2, 2, 1),
    "3x2_xsec": (3, 2, 1),
}
#: Configurations run when --configs is not given (the cross-section ones are asked for by name).
DEFAULT_CONFIGS = ("1x0", "1x2", "2x2", "3x2", "2x1", "3x1")


def load(factor=2):
    raw = np.stack([np.asarray(Image.open(DATA / "raw" / f"{z:02d}.tif")) for z in range(20)])
    # Some masks are 1-bit PNGs (True = mitochondrion), others 8-bit with anti-aliased edges;
    # converting to 8-bit greyscale maps both to 0..255.
    masks = np.stack(
        [
            np.asarray(Image.open(DATA / "mitochondria" / f"{z:02d}.png").convert("L"))
            for z in range(20)
        ]
    )
    image = block_mean(raw, (1, factor, factor)).astype(np.float32)
    truth = (block_mean((masks > 127).astype(np.float32), (1, factor, factor)) > 0.5).astype(
        np.uint8
    )
    return image, truth


def best_threshold(prob, truth):
    grid = np.linspace(0.01, 0.99, 99)
    scores = [f1_score(truth, prob >= t) for t in grid]
    return float(grid[int(np.argmax(scores))])


def scores(prob, truth):
    val_p = np.concatenate([prob[z].ravel() for z in (14, 15)])
    val_t = np.concatenate([truth[z].ravel() for z in (14, 15)])
    threshold = best_threshold(val_p, val_t)
    validation_f1 = float(f1_score(val_t, val_p >= threshold))
    test_p = np.concatenate([prob[z].ravel() for z in range(16, 20)]) >= threshold
    test_t = np.concatenate([truth[z].ravel() for z in range(16, 20)])
    return {
        "precision": float(precision_score(test_t, test_p)),
        "recall": float(recall_score(test_t, test_p)),
        "f1": float(f1_score(test_t, test_p)),
        "jaccard": float(jaccard_score(test_t, test_p)),
        "threshold": threshold,
        "validation_f1": validation_f1,
    }


#: Voxel size of the block-averaged stack (z y x, nm): sections ~50 nm apart, 2 x 4.6 nm pixels.
SPACING = (50.0, 9.2, 9.2)


def objects_3d(prob, truth, threshold, *, split=None):
    """3D object scores of the thresholded test sections 16-19 against the truth's components.

    `split` None follows the objects step's defaults (splitting touching objects when it does);
    False gives the connected components."""
    if split is None:
        split = objects_default("split")
    stack = np.stack([prob[z] for z in range(16, 20)]).astype(np.float32)
    predicted = np.zeros(stack.shape, np.uint32)
    label_objects(
        stack,
        predicted,
        spacing=SPACING,
        high=threshold,
        min_volume_um3=objects_default("min_volume_um3"),
        block=(4, 512, 512),
        split_min_depth_nm=split_depth_nm(objects_default("split_min_depth_nm"), SPACING)
        if split
        else None,
        split_valley_probability=objects_default("split_valley_probability") if split else None,
    )
    scores3d = object_scores(connected_truth(truth[16:20]), predicted)
    return {
        "truth_source": "26-connected components of the truth masks",
        "sections": [16, 17, 18, 19],
        "split": bool(split),
        **{k: (v.item() if hasattr(v, "item") else v) for k, v in scores3d.items()},
    }


def smoothed_maps(models, image, *, output_sigma, output_sigma_z, sections):
    """The final maps of `sections`, smoothed in plane and across sections as whole-volume
    prediction smooths them (tessera.cascade.api.mix_sections over the maps of the sections
    within reach, each predicted once)."""
    first = max(min(sections) - sections_reach(output_sigma_z), 0)
    last = min(max(sections) + sections_reach(output_sigma_z), image.shape[0] - 1)
    maps = {
        z: predict_section(models, image, z, output_sigma=output_sigma)
        for z in range(first, last + 1)
    }
    if output_sigma_z <= 0:
        return {z: maps[z] for z in sections}
    return {z: mix_sections(maps.__getitem__, z, output_sigma_z, image.shape[0]) for z in sections}


def evaluate(spec, image, truth, *, threads, output_sigma, output_sigma_z=0.0):
    radius = receptive_radius(spec)
    h, w = image.shape[1:]
    tiles = [
        prepare_tile(
            spec,
            f"z{z:02d}",
            mirrored_stack(image, z, z_halo(spec), -radius, h + radius, -radius, w + radius),
            truth[z],
            # contiguous blocks of sections per fold: a neighbouring section is not independent
            fold=z * spec.folds // 14,
            room=(0, 0, 0, 0),  # the whole section: maps mirrored beyond it, as predicted
        )
        for z in range(14)
    ]
    start = time.perf_counter()
    models = fit_cascade(spec, tiles, target="mitochondria", threads=threads)
    train_s = time.perf_counter() - start
    start = time.perf_counter()
    prob = smoothed_maps(
        models,
        image,
        output_sigma=output_sigma,
        output_sigma_z=output_sigma_z,
        sections=range(14, 20),
    )
    predict_s = time.perf_counter() - start
    raw = {z: predict_section(models, image, z) for z in range(14, 20)}
    smoothed = scores(prob, truth)
    return {
        **smoothed,
        "train_s": train_s,
        "predict_s": predict_s,
        "objects_3d": objects_3d(prob, truth, smoothed["threshold"]),
        "objects_3d_unsplit": objects_3d(prob, truth, smoothed["threshold"], split=False),
    }, scores(raw, truth)


def ladder_pick(
    results, image, truth, *, make_spec, threads, output_sigma, output_sigma_z, base=(2, 2)
):
    """The cascade ladder from `base` (tessera.ladder): every rung's validation F1 (sections
    14-15), the pick by the workflow's own rule, and the pick's scores on the test sections.

    Rungs already in `results` are reused; the others are trained and scored here (and added).
    """
    rows = []
    for stages, levels in ladder_rungs(*base):
        name = rung_name(stages, levels)
        if name not in results:
            results[name], _ = evaluate(
                make_spec(stages, levels),
                image,
                truth,
                threads=threads,
                output_sigma=output_sigma,
                output_sigma_z=output_sigma_z,
            )
        rows.append((stages, levels, results[name]["validation_f1"]))
    table = choose_rung(pd.DataFrame(rows, columns=["stages", "levels", "f1"]))
    pick = table[table["chosen"]].iloc[0]
    test = results[pick["rung"]]
    return {
        "rung": pick["rung"],
        "stages": int(pick["stages"]),
        "levels": int(pick["levels"]),
        "dims": 2,
        **{k: test[k] for k in ("precision", "recall", "f1", "jaccard", "threshold")},
        **{k: test[k] for k in ("objects_3d", "objects_3d_unsplit") if k in test},
        "validation_f1": dict(zip(table["rung"], table["f1"].round(4).tolist(), strict=True)),
    }


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--classifier", default=CascadeSpec().classifier)
    parser.add_argument("--configs", default=",".join(DEFAULT_CONFIGS))
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--samples", type=int, default=6000)
    parser.add_argument("--neighbours", type=int, default=1)
    parser.add_argument("--output-sigma", type=float, default=target_default("output_smoothing_px"))
    parser.add_argument(
        "--output-sigma-z",
        default=target_default("output_smoothing_sections"),
        help="smoothing across sections: sections, or auto (the default's rule for 2D cascades)",
    )
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument(
        "--orientations", type=int, default=CascadeSpec().orientations, help="cascade.orientations"
    )
    args = parser.parse_args()
    if not (DATA / "raw").is_dir():
        raise SystemExit(f"{DATA} is not present; this benchmark needs the open VNC stack")
    image, truth = load()
    setting = args.output_sigma_z if args.output_sigma_z == "auto" else float(args.output_sigma_z)
    output_sigma_z = section_sigma(setting, dims=2)  # every configuration here works in 2D
    results, unsmoothed, rows = {}, {}, []
    for name in args.configs.split(","):
        stages, levels, context_sections = CONFIGS[name]
        spec = CascadeSpec(
            stages=stages,
            levels=levels,
            context_sections=context_sections,
            classifier=args.classifier,
            samples_per_tile=args.samples,
            neighbours=args.neighbours,
            seed=args.seed,
            orientations=args.orientations,
        )
        results[name], unsmoothed[name] = evaluate(
            spec,
            image,
            truth,
            threads=args.threads,
            output_sigma=args.output_sigma,
            output_sigma_z=output_sigma_z,
        )
        r, u = results[name], unsmoothed[name]
        o, c = r["objects_3d"], r["objects_3d_unsplit"]
        rows.append(
            (
                f"{name} F1 (P {r['precision']:.3f} R {r['recall']:.3f} J {r['jaccard']:.3f})",
                r["f1"],
                f"unsmoothed {u['f1']:.3f}; thr {r['threshold']:.2f}, train {r['train_s']:.0f} s, "
                f"predict {r['predict_s']:.0f} s",
            )
        )
        rows.append(
            (
                f"{name} object F1 in 3D (P {o['object_precision']:.3f} R {o['object_recall']:.3f})",
                o["object_f1"],
                f"{o['truth_objects']} true, {o['predicted_objects']} predicted objects; "
                f"ARAND {o['arand']:.3f}, VOI {o['voi_split']:.3f}/{o['voi_merge']:.3f}; "
                f"unsplit {c['object_f1']:.3f} ({c['predicted_objects']} objects)",
            )
        )
        print(rows[-2], rows[-1], sep="\n", flush=True)
    results["chosen"] = ladder_pick(
        results,
        image,
        truth,
        make_spec=lambda stages, levels: CascadeSpec(
            stages=stages,
            levels=levels,
            classifier=args.classifier,
            samples_per_tile=args.samples,
            neighbours=args.neighbours,
            seed=args.seed,
            orientations=args.orientations,
        ),
        threads=args.threads,
        output_sigma=args.output_sigma,
        output_sigma_z=output_sigma_z,
    )
    c = results["chosen"]
    rows.append(
        (
            f"ladder from 2x2 picks {c['rung']} (P {c['precision']:.3f} R {c['recall']:.3f} J {c['jaccard']:.3f})",
            c["f1"],
            f"test F1; validation F1 {c['validation_f1']}",
        )
    )
    print(rows[-1], flush=True)
    report(
        "accuracy_real",
        rows,
        {
            "classifier": args.classifier,
            "neighbours": args.neighbours,
            "seed": args.seed,
            "orientations": args.orientations,
            "output_sigma": args.output_sigma,
            "output_sigma_z": output_sigma_z,
            "vnc_mito": results,
            "vnc_mito_unsmoothed": unsmoothed,
            # the chosen model's objects on sections 16-19 (each configuration has its own)
            "objects_3d": results["chosen"]["objects_3d"],
        },
    )


if __name__ == "__main__":
    main()
