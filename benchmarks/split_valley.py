"""Choosing the default valley probability (objects.split_valley_probability) on synthetic
validation volumes.

Validation data (none of it the demo study's datasets, seeds used nowhere else):

* demo volumes rendered with seeds of their own, both condition scales, at the mitochondria's
  working level (16 nm in-plane, 40 nm sections). Their clusters hold mitochondria pressed
  together, often with no neck at all. A probability map is made from the true instances: 1
  inside, lowered to `dip` on the voxels where two instances touch (two membranes lie there),
  an interior that wanders smoothly between 0.7 and 1 (a classifier is seldom sure everywhere),
  narrow gaps and necks between organelles (a closing by a 50 nm ball) filled at `dip` too (a
  classifier sees a pressed cluster as one dark mass), and a Gaussian blur of 2 voxels in-plane
  (the output smoothing of a prediction). ``dip`` 1.0
  is a map with no valley at all, which must not be made worse.
* pairs of touching ellipsoids (two sizes, pressed to 0.95 of the sum of their semi-axes along
  the line of centres) with the same valley and blur, at 50 x 12 x 12 nm voxels;
* dumbbells: two balls joined by a waist wider than the split depth allows by shape, whose
  probability is as high as the rest; each must stay one object.
* cristae: the demo volumes, the ellipsoid pairs and large separate ellipsoids (FIB-SEM-like
  10 nm voxels) whose maps also dip inside every organelle, to 0.5 before the blur along sheets
  30 nm thick and 90 nm apart across it (a mitochondrion's cristae are folds of membrane a
  classifier is less sure of; common practice, sizes from memory). No such dip marks a contact:
  every cut it makes is false.

Each map is filtered like the demo config does (threshold 0.5, opening 16 nm, min 0.02 um^3),
split with the default depth at its voxel size and each candidate valley probability (None = by
shape alone), and scored by F1 of one-to-one matches at IoU >= 0.5 against the true instances (a
dumbbell counts as one). The choice is the safest candidate whose mean F1 is within 0.01 of the
best (printed beside the config's default), where shape alone (None) is the safest and then the
lower the valley probability, the fewer voxels the probability map can lower, so of
near-equal candidates the lower is the safer against a noisy interior (the maps without a
valley check that the probability adds no false cuts there). The pipeline's own evaluation
against held-out annotation remains the check on real data.

Usage: python benchmarks/split_valley.py [--quick]
"""

import sys

import numpy as np
from _common import objects_default, report
from scipy import ndimage
from split_depth import label_validation, match_f1

from tessera.objects.depth_limit import split_depth_nm
from tessera.objects.morphology import ball
from tessera_demo.render import render_dataset

SEEDS = (71001, 71002, 71003)  # validation seeds: used nowhere else
SCALES = (1.0, 1.25)
DIPS = (0.55, 0.7, 1.0)  # probability set on the contact voxels before the blur
CRISTA_PROBABILITY = 0.5  # on the sheets inside each organelle, before the blur
CRISTA_PERIOD_NM, CRISTA_THICKNESS_NM = 90.0, 30.0
VALLEYS = (None, 0.6, 0.7, 0.8, 0.9, 0.95, 1.0)
SPACING = (40.0, 16.0, 16.0)
# the default split depth, as each case's voxel size makes it; the dumbbells' waists are drawn
# for its depth at the demo volumes' voxel size
DEPTH_SETTING = objects_default("split_min_depth_nm")
DEPTH_NM = split_depth_nm(DEPTH_SETTING, SPACING)


def contacts(instances):
    """Voxels of an instance with a 26-neighbour in another (non-zero) instance."""
    big = np.iinfo(instances.dtype).max
    hi = ndimage.maximum_filter(instances, size=3)
    lo = ndimage.minimum_filter(np.where(instances > 0, instances, big), size=3)
    return (instances > 0) & ((hi > instances) | (lo < instances))


def cristae(instances, spacing):
    """Thin parallel sheets across each instance, turned by a different angle in each."""
    zz, yy, xx = (np.arange(n) * s for n, s in zip(instances.shape, spacing, strict=True))
    yy, xx = yy[None, :, None], xx[None, None, :]
    angle = instances.astype(np.float64) * 2.39996  # the golden angle: turns differ
    across = yy * np.cos(angle) + xx * np.sin(angle)
    return (instances > 0) & (np.mod(across, CRISTA_PERIOD_NM) < CRISTA_THICKNESS_NM)


def probability_map(instances, *, dip, seed, spacing, sigma=(0.5, 2.0, 2.0), with_cristae=False):
    """A probability map of `instances`: 0.7-1 inside, `dip` on contacts and gaps, blurred.

    A classifier sees organelles pressed together as one dark mass: the narrow gaps and necks
    between them (closed by a ball of 50 nm) are foreground too, as unsure as the contacts.
    `with_cristae`: sheets inside each organelle at :data:`CRISTA_PROBABILITY` too."""
    rng = np.random.default_rng(seed)
    wander = ndimage.gaussian_filter(rng.standard_normal(instances.shape), (1.0, 3.0, 3.0))
    wander = (wander - wander.min()) / max(np.ptp(wander), 1e-9)
    inside = instances > 0
    p = np.where(inside, 1.0 - 0.3 * wander, 0.0)
    if with_cristae:
        p[cristae(instances, spacing)] = CRISTA_PROBABILITY
    closed = ndimage.binary_closing(inside, ball(50.0, spacing), border_value=0)
    p[contacts(instances) | (closed & ~inside)] = dip
    return ndimage.gaussian_filter(p, sigma).astype(np.float32)


def ellipsoid_pairs(spacing=(50.0, 12.0, 12.0)):
    """Instances of two pairs of ellipsoids pressed flat (semi-axes in nm z, y, x).

    The centres are 0.65 and 0.6 of the sum of the x semi-axes apart; each voxel of the union
    belongs to the ellipsoid it is deeper in, so the two meet on a wide contact where the mask
    has almost no neck (by shape alone the depth of the smaller maximum is near 30 nm)."""
    shape = (24, 100, 200)
    zz, yy, xx = (np.arange(n) * s for n, s in zip(shape, spacing, strict=True))
    zz, yy, xx = zz[:, None, None], yy[None, :, None], xx[None, None, :]
    out = np.zeros(shape, np.uint16)
    pairs = (
        ((250.0, 160.0, 200.0), (200.0, 150.0, 170.0), 300.0, 0.65),
        ((200.0, 140.0, 150.0), (200.0, 140.0, 150.0), 850.0, 0.6),
    )
    for k, (a, b, y0, apart) in enumerate(pairs):
        x1 = 400.0
        x2 = x1 + apart * (a[2] + b[2])
        depth = [
            ((zz - 600.0) / ax[0]) ** 2 + ((yy - y0) / ax[1]) ** 2 + ((xx - x0) / ax[2]) ** 2
            for ax, x0 in ((a, x1), (b, x2))
        ]
        out[(depth[0] <= 1) & (depth[0] <= depth[1])] = 2 * k + 1
        out[(depth[1] <= 1) & (depth[1] < depth[0])] = 2 * k + 2
    return out, spacing


def dumbbells(spacing=(50.0, 12.0, 12.0), radius=200.0):
    """Instances of two dumbbells (balls joined by a rod wider than ``radius - depth``)."""
    shape = (20, 90, 220)
    zz, yy, xx = (np.arange(n) * s for n, s in zip(shape, spacing, strict=True))
    zz, yy, xx = zz[:, None, None], yy[None, :, None], xx[None, None, :]
    out = np.zeros(shape, np.uint16)
    for k, (y0, waist) in enumerate(((300.0, radius - 0.6 * DEPTH_NM), (750.0, radius - 15.0))):
        centres = (250.0, 1000.0)
        body = np.zeros(shape, bool)
        for x0 in centres:
            body |= (zz - 500.0) ** 2 + (yy - y0) ** 2 + (xx - x0) ** 2 <= radius**2
        rod = (zz - 500.0) ** 2 + (yy - y0) ** 2 <= waist**2
        body |= rod & (xx >= centres[0]) & (xx <= centres[1])
        out[body] = k + 1
    return out, spacing


def large_ellipsoids(spacing=(10.0, 10.0, 10.0)):
    """Instances of four separate ellipsoids of 0.1-0.5 um^3 at FIB-SEM-like voxels."""
    shape = (64, 160, 240)
    zz, yy, xx = (np.arange(n) * s for n, s in zip(shape, spacing, strict=True))
    zz, yy, xx = zz[:, None, None], yy[None, :, None], xx[None, None, :]
    out = np.zeros(shape, np.uint16)
    bodies = (  # semi-axes z, y, x and centre y, x (nm)
        ((250.0, 300.0, 500.0), (400.0, 600.0)),
        ((200.0, 250.0, 350.0), (400.0, 1700.0)),
        ((250.0, 250.0, 600.0), (1150.0, 800.0)),
        ((150.0, 200.0, 300.0), (1150.0, 1900.0)),
    )
    for k, (axes, (y0, x0)) in enumerate(bodies):
        inside = ((zz - 320.0) / axes[0]) ** 2 + ((yy - y0) / axes[1]) ** 2
        out[inside + ((xx - x0) / axes[2]) ** 2 <= 1] = k + 1
    return out, spacing


def cases(quick):
    seeds = SEEDS[:1] if quick else SEEDS
    shape = (32, 384, 384) if quick else (64, 512, 512)
    for seed in seeds:
        for scale in SCALES:
            truth = render_dataset(
                seed=seed, shape=shape, spacing=(40.0, 8.0, 8.0), mito_volume_scale=scale
            )["mitochondria"][:, ::2, ::2]
            yield f"render {seed} x{scale}", truth, SPACING, seed, False
            yield f"render {seed} x{scale} cristae", truth, SPACING, seed, True
    yield "ellipsoid pairs", *ellipsoid_pairs(), 1, False
    yield "ellipsoid pairs cristae", *ellipsoid_pairs(), 1, True
    yield "dumbbells", *dumbbells(), 2, False
    yield "large ellipsoids cristae", *large_ellipsoids(), 3, True


def main(quick=False):
    scores = {str(v): [] for v in VALLEYS}
    counts = {str(v): [] for v in VALLEYS}
    by_group = {(g, str(v)): [] for g in ("no cristae", "cristae") for v in VALLEYS}
    per_case = {}
    for name, truth, spacing, seed, with_cristae in cases(quick):
        for dip in DIPS:
            if name.startswith(("dumbbells", "large")) and dip != 1.0:
                continue  # separate organelles: no contact to dip
            prob = probability_map(
                truth, dip=dip, seed=seed, spacing=spacing, with_cristae=with_cristae
            )
            for valley in VALLEYS:
                out = label_validation(
                    prob,
                    spacing,
                    split_min_depth_nm=split_depth_nm(DEPTH_SETTING, spacing),
                    split_valley_probability=valley,
                )
                f1, n_objects, n_true = match_f1(out, truth)
                scores[str(valley)].append(f1)
                counts[str(valley)].append(n_objects / n_true)
                by_group["cristae" if with_cristae else "no cristae", str(valley)].append(f1)
                per_case[f"{name} dip {dip} valley {valley}"] = {
                    "f1": f1,
                    "objects": n_objects,
                    "true": n_true,
                }
    rows, figures = [], {"quick": quick, "depth_nm": DEPTH_NM, "valleys": {}, "cases": per_case}
    for valley in VALLEYS:
        f1, ratio = float(np.mean(scores[str(valley)])), float(np.mean(counts[str(valley)]))
        label = "shape alone" if valley is None else f"valley {valley}"
        rows += [(f"{label}: F1 at IoU 0.5", f1, ""), (f"{label}: objects / true", ratio, "")]
        groups = {g: float(np.mean(by_group[g, str(valley)])) for g in ("no cristae", "cristae")}
        rows += [(f"{label}: F1 {g} only", f, "") for g, f in groups.items()]
        figures["valleys"][str(valley)] = {"f1": f1, "objects_per_true": ratio, "f1_groups": groups}
    top = max(v["f1"] for v in figures["valleys"].values())
    # shape alone first, then from the lowest valley probability up: the first near the best
    close = [v for v in VALLEYS if figures["valleys"][str(v)]["f1"] >= top - 0.01]
    chosen = None if None in close else min(close)
    figures["chosen"] = chosen
    # the shipped default, so that a choice the config does not follow shows
    figures["default"] = objects_default("split_valley_probability")
    rows.append(("chosen split_valley_probability (within 0.01 of the best F1)", chosen, ""))
    rows.append(("the config schema's default", figures["default"], ""))
    report("split_valley", rows, figures)


if __name__ == "__main__":
    main(quick="--quick" in sys.argv)
