"""Choosing the default split depth (objects.split_min_depth_nm) on synthetic validation volumes.

Validation data: demo volumes rendered with seeds of their own (not the demo study's datasets,
not the tests' seeds), both condition scales, at two voxel sizes: the mitochondria's working
level of the demo (16 nm in-plane, 40 nm sections: serial block-face-like) and 16 nm on every
axis (FIB-SEM-like, key ``isotropic``). The true mitochondria (clusters of touching ones
included) are turned into a mask, filtered like the demo config does (opening 16 nm, min
0.02 um^3) and split with each candidate depth; the objects are matched one to one with the true
instances at IoU >= 0.5 (a common criterion in instance segmentation; above 0.5 a match is
unique) and scored by F1. The choice at each voxel size is the largest depth whose mean F1 is
within 0.02 of the best (the tolerance the downsampling study uses): a predicted mask has a
rougher surface than a true one, and rough surfaces raise spurious maxima of small depth, so of
near-equal depths the deeper is the safer. The default (``auto``) is printed beside each choice
at that voxel size. The pipeline's own evaluation against held-out annotation remains the check
on real data.

Usage: python benchmarks/split_depth.py [--quick]
"""

import sys

import numpy as np
from _common import objects_default, report

from tessera.objects.depth_limit import split_depth_nm
from tessera.objects.label import label_objects
from tessera_demo.render import render_dataset

SEEDS = (70001, 70002, 70003)  # validation seeds: used nowhere else
SCALES = (1.0, 1.25)
DEPTHS = (None, 10, 20, 30, 40, 60, 80, 120)
SPACING = (40.0, 16.0, 16.0)
ISOTROPIC_SEEDS = (72001, 72002, 72003)  # validation seeds: used nowhere else
ISOTROPIC_SPACING = (16.0, 16.0, 16.0)


def match_f1(labels, truth):
    """F1 of one-to-one matches at IoU >= 0.5 between two instance volumes."""
    both = (labels > 0) & (truth > 0)
    pairs, overlap = np.unique(
        np.stack([labels[both], truth[both]]).astype(np.int64), axis=1, return_counts=True
    )
    size_l = np.bincount(labels.ravel())
    size_t = np.bincount(truth.ravel())
    iou = overlap / (size_l[pairs[0]] + size_t[pairs[1]] - overlap)
    matched = int((iou >= 0.5).sum())
    n_l, n_t = int(labels.max()), int(np.count_nonzero(size_t[1:]))
    return 2 * matched / max(n_l + n_t, 1), n_l, n_t


def label_validation(prob, spacing, **split):
    """Objects of a validation volume with the settings the split defaults are chosen under
    (hysteresis at 0.5, a 16 nm opening, 0.02 um^3 minimum), and the split settings given."""
    out = np.zeros(prob.shape, np.uint32)
    label_objects(
        prob,
        out,
        spacing=spacing,
        high=0.5,
        open_radius_nm=16,
        min_volume_um3=0.02,
        block=(32, 256, 256),
        **split,
    )
    return out


def depth_scores(seeds, shape, spacing):
    """Mean F1 and objects per true object of every candidate depth on the volumes of `seeds`
    (both scales) rendered at `spacing`, and the depth the rule chooses."""
    scores = {str(d): [] for d in DEPTHS}
    counts = {str(d): [] for d in DEPTHS}
    for seed in seeds:
        for scale in SCALES:
            if spacing == SPACING:  # rendered at 8 nm in plane, as the demo, then halved
                truth = render_dataset(
                    seed=seed, shape=shape, spacing=(40.0, 8.0, 8.0), mito_volume_scale=scale
                )["mitochondria"][:, ::2, ::2]
            else:
                truth = render_dataset(
                    seed=seed, shape=shape, spacing=spacing, mito_volume_scale=scale
                )["mitochondria"]
            prob = (truth > 0).astype(np.float32)
            for depth in DEPTHS:
                out = label_validation(prob, spacing, split_min_depth_nm=depth)
                f1, n_objects, n_true = match_f1(out, truth)
                scores[str(depth)].append(f1)
                counts[str(depth)].append(n_objects / n_true)
    figures = {"seeds": list(seeds), "shape": list(shape), "spacing": list(spacing), "depths": {}}
    for depth in DEPTHS:
        f1, ratio = float(np.mean(scores[str(depth)])), float(np.mean(counts[str(depth)]))
        figures["depths"][str(depth)] = {"f1": f1, "objects_per_true": ratio}
    depths = [d for d in DEPTHS if d is not None]
    top = max(figures["depths"][str(d)]["f1"] for d in depths)
    figures["best_f1_nm"] = max(depths, key=lambda d: figures["depths"][str(d)]["f1"])
    figures["chosen_nm"] = max(d for d in depths if figures["depths"][str(d)]["f1"] >= top - 0.02)
    # the shipped default at this voxel size, so that a choice the config does not follow shows
    figures["default_nm"] = split_depth_nm(objects_default("split_min_depth_nm"), spacing)
    return figures


def table_rows(figures, prefix):
    rows = []
    for depth in DEPTHS:
        name = "no split" if depth is None else f"depth {depth} nm"
        values = figures["depths"][str(depth)]
        rows += [
            (f"{prefix}{name}: F1 at IoU 0.5", values["f1"], ""),
            (f"{prefix}{name}: objects / true", values["objects_per_true"], ""),
        ]
    rows.append((f"{prefix}best F1 at", figures["best_f1_nm"], "nm"))
    rows.append((f"{prefix}chosen (within 0.02 of the best F1)", figures["chosen_nm"], "nm"))
    rows.append((f"{prefix}the default (auto) at this voxel size", figures["default_nm"], "nm"))
    return rows


def main(quick=False):
    seeds = SEEDS[:1] if quick else SEEDS
    shape = (32, 384, 384) if quick else (64, 512, 512)
    figures = depth_scores(seeds, shape, SPACING)
    iso_seeds = ISOTROPIC_SEEDS[:1] if quick else ISOTROPIC_SEEDS
    iso_shape = (64, 192, 192) if quick else (128, 256, 256)
    figures["isotropic"] = depth_scores(iso_seeds, iso_shape, ISOTROPIC_SPACING)
    rows = table_rows(figures, "") + table_rows(figures["isotropic"], "isotropic 16 nm: ")
    report("split_depth", rows, figures)


if __name__ == "__main__":
    main(quick="--quick" in sys.argv)
