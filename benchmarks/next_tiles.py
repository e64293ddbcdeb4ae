"""Do uncertainty-ranked tiles help more than random ones? A fixed-seed experiment on demo data.

Two synthetic demo volumes (tessera_demo, mitochondria at 2x downsampling): the pool volume
offers tiles to annotate, the other supplies fixed test sections. A 2 x 1 cascade is trained on a
few random pool tiles that hold both classes (f1_before); the pool volume is predicted whole; then the same number of
tiles is added either by highest mean binary entropy (tessera.next_tiles.rank_tiles, spread out
and away from the known tiles) or at random (same exclusions), the model is retrained, and the
test-tile pixel F1 is compared. Repeated over --repeats seeds; figures are the means.

Run from the repository root: .venv/bin/python benchmarks/next_tiles.py
"""

import argparse
import sys
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

from tessera.block_reduce import block_mean  # noqa: E402
from tessera.cascade.api import (
    CascadeSpec,
    fit_cascade,
    mirrored_stack,
    predict_section,
    prepare_tile,
    receptive_radius,  # noqa: E402
    volume_room,
)  # noqa: E402
from tessera.next_tiles import rank_tiles  # noqa: E402
from tessera.threshold import confusion, scores_from_counts  # noqa: E402
from tessera_demo.render import render_dataset  # noqa: E402

SIZE = 32  # tile side at the working level


def working(seed):
    volume = render_dataset(seed=seed, shape=(16, 384, 384), defects=False)
    image = block_mean(volume["raw"], (1, 2, 2))
    truth = (block_mean((volume["mitochondria"] > 0).astype(np.float32), (1, 2, 2)) >= 0.5).astype(
        np.uint8
    )
    return image, truth


def train(spec, image, truth, boxes):
    radius = receptive_radius(spec)
    tiles = []
    for i, (z, y, x) in enumerate(boxes):
        window = mirrored_stack(
            image, z, 0, y - radius, y + SIZE + radius, x - radius, x + SIZE + radius
        )
        tiles.append(
            prepare_tile(
                spec,
                f"t{i}",
                window,
                truth[z, y : y + SIZE, x : x + SIZE],
                fold=i % spec.folds,
                room=volume_room(spec, image.shape[1:], (y, y + SIZE, x, x + SIZE)),
            )
        )
    return fit_cascade(spec, tiles, target="mitochondria", threads=2)


def test_f1(models, image, truth, sections):
    counts = np.zeros(3)
    for z in sections:
        counts += confusion(predict_section(models, image, z), truth[z], 0.5)[:3]
    return scores_from_counts(*counts)["f1"]


def random_boxes(rng, shape, count, taken, truth=None):
    """Random tiles apart from `taken`; with `truth`, only tiles holding both classes (as painted
    starting tiles would)."""
    out = []
    while len(out) < count:
        z = int(rng.integers(0, shape[0]))
        y, x = (int(v) for v in rng.integers(0, shape[1] - SIZE, 2))
        if truth is not None and np.unique(truth[z, y : y + SIZE, x : x + SIZE]).size < 2:
            continue
        if all(not (d == z and abs(y - b) < SIZE and abs(x - c) < SIZE) for d, b, c in taken + out):
            out.append((z, y, x))
    return out


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--start", type=int, default=4, help="random tiles the model starts from")
    parser.add_argument("--add", type=int, default=6, help="tiles added by each strategy")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    pool_image, pool_truth = working(11)
    test_image, test_truth = working(12)
    spec = CascadeSpec(
        stages=2,
        levels=1,
        sigmas=(0.7, 1.6, 3.5),
        coarse_sigmas=(0.7, 1.6),
        stencil_radii=(1, 2, 4),
        samples_per_tile=400,
        folds=2,
    )
    runs = []
    for seed in range(args.repeats):
        rng = np.random.default_rng(seed)
        start = random_boxes(rng, pool_image.shape, args.start, [], truth=pool_truth)
        model = train(spec, pool_image, pool_truth, start)
        before = test_f1(model, test_image, test_truth, range(0, 16, 2))
        prob = np.stack([predict_section(model, pool_image, z) for z in range(pool_image.shape[0])])
        known = pd.DataFrame(
            [
                {"dataset": "pool", "z": z, "y0": y, "x0": x, "height": SIZE, "width": SIZE}
                for z, y, x in start
            ]
        )
        picks = rank_tiles({"pool": prob}, known, size=SIZE, count=args.add, min_sections=1)
        uncertain = [
            (int(r.z), int(r.y) - SIZE // 2, int(r.x) - SIZE // 2) for r in picks.itertuples()
        ]
        f1_uncertain = test_f1(
            train(spec, pool_image, pool_truth, start + uncertain),
            test_image,
            test_truth,
            range(0, 16, 2),
        )
        extra = random_boxes(rng, pool_image.shape, args.add, start)
        f1_random = test_f1(
            train(spec, pool_image, pool_truth, start + extra),
            test_image,
            test_truth,
            range(0, 16, 2),
        )
        runs.append(
            {
                "seed": seed,
                "f1_before": before,
                "f1_uncertainty": f1_uncertain,
                "f1_random": f1_random,
            }
        )
        print(runs[-1], flush=True)
    table = pd.DataFrame(runs)
    means = table[["f1_before", "f1_uncertainty", "f1_random"]].mean()
    rows = [
        (f"test F1, {args.start} random tiles", float(means["f1_before"]), "mean of seeds"),
        (f"+ {args.add} most uncertain tiles", float(means["f1_uncertainty"]), "mean of seeds"),
        (f"+ {args.add} random tiles", float(means["f1_random"]), "mean of seeds"),
        (
            "seeds where uncertainty beat random",
            int((table["f1_uncertainty"] > table["f1_random"]).sum()),
            f"of {len(table)}",
        ),
    ]
    report(
        "next_tiles",
        rows,
        {
            **{k: float(v) for k, v in means.items()},
            "runs": runs,
            "start_tiles": args.start,
            "added_tiles": args.add,
        },
    )


if __name__ == "__main__":
    main()
