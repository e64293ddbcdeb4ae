"""The split_tiles rule: one target's annotation sets merged and split into train / validation / test."""

import pandas as pd

from tessera.errors import TesseraInputError
from tessera.tiles.split import empty_roles_problem, split_tiles
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
    # said here, before any model is trained on a split that cannot be scored; the workflow
    # refuses the same split when it loads, once the tiles are written
    problem = empty_roles_problem(split, guard_sections=guard_sections)
    if problem:
        raise TesseraInputError(problem, source=out_dir)
    write_annotation_set(out_dir, split, labels)
    return split["role"].value_counts().to_dict()
