"""The split_tiles rule: one target's annotation sets merged and split into train / validation / test."""

import pandas as pd

from tessera.errors import TesseraInputError
from tessera.tiles.split import split_tiles
from tessera.workflow.files.tile_registry import read_annotation_set, write_annotation_set


def split_tiles_job(
    annotation_dirs,
    out_dir,
    *,
    fractions,
    guard_sections,
    seed,
    test_datasets=None,
    train_tiles=(),
):
    """Merge the annotation sets of one target and split them into train / validation / test
    (the datasets of `test_datasets` held out whole as the test set, the tiles of
    `train_tiles` trained on: points marked ``role: train``)."""
    registries, labels = [], {}
    for path in annotation_dirs:
        registry, tile_labels = read_annotation_set(path)
        registries.append(registry)
        labels.update(tile_labels)
    merged = pd.concat(registries, ignore_index=True)
    split = split_tiles(
        merged,
        fractions=tuple(fractions),
        guard_sections=guard_sections,
        seed=seed,
        test_datasets=test_datasets,
        train_tiles=train_tiles,
    )
    # training needs tiles, the threshold validation tiles and the scores test tiles: say so
    # here, before any model is trained on a split that cannot be scored
    empty = [role for role in ("train", "validation", "test") if not (split["role"] == role).any()]
    if empty:
        sections = merged.groupby("dataset")["z"].nunique().sum()
        raise TesseraInputError(
            f"the split leaves no {' and no '.join(empty)} tiles ({len(merged)} tiles on "
            f"{sections} sections; held-out tiles lie at least split.guard_sections = "
            f"{guard_sections} sections from training); annotate tiles on more sections, lower "
            "split.guard_sections, or change split.fractions",
            source=out_dir,
        )
    write_annotation_set(out_dir, split, labels)
    return split["role"].value_counts().to_dict()
