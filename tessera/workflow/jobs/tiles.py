"""Jobs of the annotation tiles: sample from label volumes, export for painting, import the
painted masks, and split per target."""

from pathlib import Path

import pandas as pd
import tifffile

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image, working_level
from tessera.tiles.sampling import sample_tiles_from_labels
from tessera.tiles.split import split_tiles
from tessera.workflow.files.points import read_points
from tessera.workflow.files.qc_table import excluded_sections
from tessera.workflow.files.tile_registry import read_annotation_set, write_annotation_set
from tessera.workflow.files.to_paint import export_tiles, import_painted

__all__ = ["export_tiles_job", "import_tiles_job", "sample_tiles_job", "split_tiles_job"]


def sample_tiles_job(
    labels_path,
    image_path,
    qc_table,
    out_dir,
    *,
    dataset,
    target,
    downsample,
    size,
    count,
    seed,
    exclude_flagged=True,
):
    """Sample annotation tiles of one dataset from a full label volume (TIFF stack, >0 = target).

    The label stack is read whole: full label volumes exist for synthetic and open benchmark
    data of modest size; real studies annotate tiles (the painted route) instead.
    """
    _, info = open_image(image_path)
    level = working_level(info["factors"], downsample, source=image_path)
    try:
        labels = tifffile.imread(labels_path)
    except (OSError, ValueError, tifffile.TiffFileError) as exc:
        raise TesseraInputError(f"cannot read label volume: {exc}", source=labels_path) from None
    if labels.shape != tuple(info["levels"][0].shape):
        raise TesseraInputError(
            f"label volume has shape {labels.shape}, the image {tuple(info['levels'][0].shape)}",
            source=labels_path,
        )
    # level-0 sections: sample_tiles_from_labels maps them to the working level itself
    exclude = excluded_sections(qc_table) if exclude_flagged else []
    registry, tile_labels = sample_tiles_from_labels(
        labels,
        dataset=dataset,
        target=target,
        level=level,
        factors=info["factors"][level],
        size=size,
        count=count,
        seed=seed,
        exclude_z=exclude,
    )
    write_annotation_set(out_dir, registry, tile_labels)
    return {"tiles": len(registry), "excluded_sections": exclude, "level": level}


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


def export_tiles_job(
    image_path, points_path, out_dir, *, dataset, target, downsample, size, datasets, targets
):
    """Cut this dataset's tiles of one target from the points sheet, for painting."""
    _, info = open_image(image_path)
    level = working_level(info["factors"], downsample, source=image_path)
    points = read_points(points_path, datasets=datasets, targets=targets)
    mine = points[(points["dataset"] == dataset) & (points["target"] == target)]
    if mine.empty:
        raise TesseraInputError(
            f"no points for dataset {dataset!r} and target {target!r}", source=points_path
        )
    registry = export_tiles(
        info["levels"][level],
        mine,
        level=level,
        factors=info["factors"][level],
        size=size,
        out_dir=out_dir,
    )
    return {"tiles": len(registry), "level": level}


def import_tiles_job(
    exported_dir, masks_dir, out_dir, *, ignore_value=None, allow_single_class=False
):
    """Read the painted masks of exported tiles and register them as an annotation set."""
    if masks_dir is None or not Path(masks_dir).is_dir():
        raise TesseraInputError(
            f"no painted masks yet: paint the tiles in {exported_dir} (previews *.preview.png) and "
            f"save one mask per tile as <tile_id>.png (0 = background, 1 or 255 = target) in the "
            f"folder named by annotations.painted.masks",
            source=masks_dir,
        )
    registry, labels = import_painted(
        exported_dir, masks_dir, ignore_value=ignore_value, allow_single_class=allow_single_class
    )
    write_annotation_set(out_dir, registry, labels)
    return {"tiles": len(registry)}
