"""The split_tiles rule: one target's annotation sets merged and split into train / validation / test."""

import pandas as pd

from tessera.tiles.split import split_tiles
from tessera.workflow.files.tile_registry import read_annotation_set, write_annotation_set


def split_tiles_job(annotation_dirs, out_dir, *, fractions, guard_sections, seed):
    """Merge the annotation sets of one target and split them into train / validation / test."""
    registries, labels = [], {}
    for path in annotation_dirs:
        registry, tile_labels = read_annotation_set(path)
        registries.append(registry)
        labels.update(tile_labels)
    merged = pd.concat(registries, ignore_index=True)
    split = split_tiles(
        merged, fractions=tuple(fractions), guard_sections=guard_sections, seed=seed
    )
    write_annotation_set(out_dir, split, labels)
    return split["role"].value_counts().to_dict()
